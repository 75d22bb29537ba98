"""A small on-disk cache of reference energies, one JSON file per mixture and settings.

Location: ``--cache-dir``, else ``$LEADLINE_CACHE_DIR``, else
``$XDG_CACHE_HOME/leadline`` (``~/.cache/leadline``), under ``references/``.
File name: sha256 of the canonical key {"xi", "gs_tol", "alg_tol", "max_steps",
"method_version"}; content: {"key": ..., "references": References.to_json()}.
A file whose key does not match is ignored (and overwritten on the next write).
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import TYPE_CHECKING

from .paths import write_text_atomic

if TYPE_CHECKING:  # scipy behind it: imported when a cache entry is read or keyed
    from leadline.kernels.reference import References

__all__ = ["default_cache_dir", "cache_key", "load", "store"]


def default_cache_dir() -> Path:
    env = os.environ.get("LEADLINE_CACHE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "leadline"


def cache_key(xi_spec: str, gs_tol: float, alg_tol: float, max_steps: int) -> dict:
    from leadline.kernels.reference import METHOD_VERSION

    return {
        "xi": xi_spec,
        "gs_tol": float(gs_tol),
        "alg_tol": float(alg_tol),
        "max_steps": int(max_steps),
        "method_version": METHOD_VERSION,
    }


def _path(cache_dir: Path, key: dict) -> Path:
    digest = hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:32]
    return Path(cache_dir) / "references" / f"{digest}.json"


def load(cache_dir: Path, key: dict) -> References | None:
    """The cached References for key, or None (missing, unreadable or other key)."""
    from leadline.kernels.reference import References

    path = _path(cache_dir, key)
    try:
        data = json.loads(path.read_text())
        if data.get("key") != key:
            return None
        refs = References.from_json(data["references"])
    except (OSError, ValueError, KeyError, TypeError):
        return None
    from leadline.kernels.mixture import parse_mixture
    from leadline.kernels.reference import check_physical

    try:  # a value cached before the physical check existed (ALG < 0 at large q) is not served
        check_physical(refs, parse_mixture(key["xi"]))
    except ValueError:  # ReferenceRangeError, or a mixture this version refuses
        return None
    return refs


def store(cache_dir: Path, key: dict, refs: References) -> Path:
    """Write atomically (temporary file + rename); returns the path."""
    path = _path(cache_dir, key)
    path.parent.mkdir(parents=True, exist_ok=True)
    write_text_atomic(path, json.dumps({"key": key, "references": refs.to_json()}, indent=1))
    return path
