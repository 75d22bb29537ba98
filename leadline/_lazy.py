"""Lazy public names for a package: each name is imported from its module on first use.

Used by the subpackages' ``__init__`` so that importing a package (for example by the command
line, which must answer at once) does not import the heavy libraries behind its names.
"""

from __future__ import annotations

import importlib
import sys


def lazy_names(package: str, where: dict[str, str]):
    """``(__getattr__, __dir__)`` for ``package`` whose public names live in ``.module`` files.

    ``where`` maps each public name to the module (relative to ``package``) that defines it; a
    name is imported once, then cached in the package's namespace.
    """

    def __getattr__(name: str):
        try:
            module = where[name]
        except KeyError:
            raise AttributeError(f"module {package!r} has no attribute {name!r}") from None
        value = getattr(importlib.import_module(f".{module}", package), name)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(set(vars(sys.modules[package])) | set(where))

    return __getattr__, __dir__
