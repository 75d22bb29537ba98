"""Checks of file paths the user names, made before any work so nothing is computed in vain."""

from __future__ import annotations

import os
from pathlib import Path

from .errors import InputError

__all__ = ["check_output_file"]


def check_output_file(path: str | os.PathLike, suffix: str | None = None, option: str = "--output") -> Path:
    """Validate a file to be written later: a file name (with ``suffix``), in an existing writable folder.

    Raises InputError with one line naming what was found.
    """
    text = str(path)
    if not text.strip():
        raise InputError(f"{option} needs a file name" + (f" ending in {suffix}, e.g. result{suffix}" if suffix else ""))
    path = Path(text)
    if suffix is not None:
        if path.name.lower() == suffix:
            raise InputError(f"{option} {text!r} has no file name before {suffix}; write e.g. result{suffix}")
        if path.suffix.lower() != suffix:
            raise InputError(f"{option} {text!r} must end with {suffix}")
    if path.is_dir() or text.endswith(("/", os.sep)):
        raise InputError(f"{option} {text!r} is a folder; give a file name inside it")
    parent = path.parent if str(path.parent) else Path(".")
    if parent.exists() and not parent.is_dir():
        raise InputError(f"{option} {text!r}: {str(parent)!r} is a file, not a folder")
    if not parent.is_dir():
        raise InputError(f"{option} {text!r}: folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{option} {text!r}: folder {str(parent)!r} is not writable")
    if path.exists() and not os.access(path, os.W_OK):
        raise InputError(f"{option} {text!r} exists and is not writable")
    return path
