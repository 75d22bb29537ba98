"""Names that changed, so an old command line or spec gets one line naming the new spelling.

Every rename of a user-facing option, spec key or Python keyword is listed here once; the
command line (``jobs/cli.py``: an unknown option), the spec checker (``jobs/spec.py``: an
unknown key) and the Python API (``jobs/api.py``: an unexpected keyword, TypeError) look old
names up and refuse them with the new one (exit 2 and nothing written on the command line).  The batch
file has its own short list in ``cluster/batch.py`` (that layer cannot import this one).
The vocabulary behind the new names: the glossary in docs/cli.md.
"""

from __future__ import annotations

__all__ = ["RENAMED_OPTIONS", "RENAMED_SPEC_KEYS", "RENAMED_KEYWORDS", "renamed_option", "renamed_spec_key", "renamed_keyword"]

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


#: old keyword -> new keyword of the Python API (``import leadline``): its own renames, and the
#: command line's old spellings as a user coming from there would type them
RENAMED_KEYWORDS = {
    "gtol": "gradient_tol",
    "maxiter": "max_iterations",
    "memory_mb": "memory_mib",
    "cluster_config": "batch_file",
    "xorsat": "q",
    "sparse_q": "q",
    "bond_cap": "bond",
    "fock_cap": "fock",
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


def renamed_keyword(function: str, keyword: str, parameters) -> str | None:
    """The one-line refusal of an old keyword of the Python API, or None.

    Only when ``function`` has the new name among its ``parameters`` (a keyword that was never
    one of its arguments gets Python's own message)."""
    new = RENAMED_KEYWORDS.get(keyword)
    if new is None or new not in parameters:
        return None
    return f"{function}(): keyword {keyword}= is now called {new}= (same meaning); use {new}="
