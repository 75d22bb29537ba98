"""Names that changed, so an old command line or spec gets one line naming the new spelling.

Every rename of a user-facing option or spec key is listed here once; the command line
(``jobs/cli.py``: an unknown option) and the spec checker (``jobs/spec.py``: an unknown key)
look old names up and refuse them with the new one (exit 2, nothing written).  The batch
file has its own short list in ``cluster/batch.py`` (that layer cannot import this one).
The vocabulary behind the new names: the glossary in docs/cli.md.
"""

from __future__ import annotations

__all__ = ["RENAMED_OPTIONS", "RENAMED_SPEC_KEYS", "renamed_option", "renamed_spec_key"]

#: old command-line option -> new option
RENAMED_OPTIONS = {
    "--cluster-config": "--batch-file",
    "--gtol": "--gradient-tol",
    "--maxiter": "--max-iterations",
    "--memory-mb": "--memory-mib",
    "--xorsat": "--sparse-q",
}

#: (section, old key) -> new key of the study spec
RENAMED_SPEC_KEYS = {
    ("compute", "cluster-config"): "batch-file",
    ("compute", "memory-mb"): "memory-mib",
    ("optimizer", "gtol"): "gradient-tol",
    ("optimizer", "maxiter"): "max-iterations",
}


def renamed_option(option: str) -> str | None:
    """The one-line refusal of an old option name (``--gtol`` or ``--gtol=1e-6``), or None."""
    name = option.split("=", 1)[0]
    new = RENAMED_OPTIONS.get(name)
    if new is None:
        return None
    return f"option {name} is now called {new} (same meaning); use {new}"


def renamed_spec_key(section: str, key: str) -> str | None:
    """The one-line refusal of an old spec key, or None."""
    new = RENAMED_SPEC_KEYS.get((section, key))
    if new is None:
        return None
    return f"[{section}] {key} is now called {new} (same meaning); rename the key in the spec"
