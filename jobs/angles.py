"""Angle files: one small versioned JSON layout read and written by every command.

Layout (version 1)::

    {
      "format": "leadline.angles",
      "version": 1,
      "xi": "2:0.5",              # mixture spec (q:w pairs), or null for sparse ensembles
      "ensemble": {...},          # optional: e.g. {"kind": "sparse", "q": 3, "degree": 4}
      "p": 2,
      "gamma": [0.3817, 0.6655],  # radians, t = 1 first
      "beta": [0.4960, 0.2690],
      "value": 0.407545           # V_p at these angles, or null
    }

Files are written atomically (temporary file + rename).
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError

FORMAT = "leadline.angles"
VERSION = 1
_KEYS = {"format", "version", "xi", "ensemble", "p", "gamma", "beta", "value"}


@dataclass
class AngleSet:
    p: int
    gamma: np.ndarray
    beta: np.ndarray
    xi: str | None = None
    value: float | None = None
    ensemble: dict | None = None

    def to_json(self) -> dict:
        return {
            "format": FORMAT,
            "version": VERSION,
            "xi": self.xi,
            "ensemble": self.ensemble,
            "p": int(self.p),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "value": None if self.value is None else float(self.value),
        }


def read_angles(path: str | os.PathLike) -> AngleSet:
    """Read and validate an angle file; raises InputError with the reason."""
    path = Path(path)
    try:
        data = json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"angle file {path} does not exist") from None
    except (OSError, json.JSONDecodeError) as exc:
        raise InputError(f"angle file {path} is not readable JSON: {exc}") from None
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise InputError(f"angle file {path} is not a leadline angle file (\"format\": \"{FORMAT}\" missing)")
    if data.get("version") != VERSION:
        raise InputError(f"angle file {path} has version {data.get('version')!r}; this leadline reads version {VERSION}")
    unknown = set(data) - _KEYS
    if unknown:
        raise InputError(f"angle file {path} has unknown keys: {', '.join(sorted(unknown))}")
    try:
        g = np.asarray(data["gamma"], dtype=float).reshape(-1)
        b = np.asarray(data["beta"], dtype=float).reshape(-1)
        p = int(data["p"])
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"angle file {path}: needs numeric p, gamma and beta ({exc})") from None
    if g.size != p or b.size != p:
        raise InputError(f"angle file {path}: p = {p} but gamma has {g.size} and beta {b.size} angles")
    if not (np.all(np.isfinite(g)) and np.all(np.isfinite(b))):
        raise InputError(f"angle file {path}: angles must be finite")
    value = data.get("value")
    if value is not None and not (isinstance(value, (int, float)) and math.isfinite(value)):
        raise InputError(f"angle file {path}: value must be a finite number or null")
    return AngleSet(p=p, gamma=g, beta=b, xi=data.get("xi"), value=value, ensemble=data.get("ensemble"))


def write_angles(path: str | os.PathLike, angles: AngleSet) -> None:
    """Write atomically: a reader never sees a half-written file."""
    path = Path(path)
    text = json.dumps(angles.to_json(), indent=2) + "\n"
    fd, tmp = tempfile.mkstemp(prefix=".angles-", dir=str(path.parent or "."))
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def check_writable(path: str | os.PathLike) -> None:
    """Raise InputError now if ``path`` could not be written later."""
    parent = Path(path).resolve().parent
    if not parent.is_dir():
        raise InputError(f"cannot write {path}: folder {parent} does not exist")
    if not os.access(parent, os.W_OK):
        raise InputError(f"cannot write {path}: folder {parent} is not writable")


def optimum_report(header: list[str], result, evaluations: str, ladder: list[dict], output) -> str:
    """Human-readable report of an optimization (shared by dense and sparse `optimize`).

    ``header`` are the first lines (ensemble, depth, value), ``result`` has gamma,
    beta, gradient_norm and converged; ``ladder`` lists {"p", "value"} per depth run.
    """
    lines = list(header) + [
        "gamma          = " + ", ".join(f"{x:.6f}" for x in result.gamma),
        "beta           = " + ", ".join(f"{x:.6f}" for x in result.beta),
        f"gradient (max) = {result.gradient_norm:.1e}" + ("" if result.converged else "  (not converged)"),
        f"evaluations    = {evaluations}",
    ]
    if len(ladder) > 1:
        lines.append("ladder         = " + ", ".join(f"p{r['p']}: {r['value']:.6f}" for r in ladder))
    if output:
        lines.append(f"angles written to {output}")
    return "\n".join(lines)

