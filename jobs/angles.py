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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from leadline.kernels.numtext import fmt, fmt_list

from .errors import InputError
from .paths import write_text_atomic

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


#: largest |angle| accepted where V is periodic in it (every beta_t: period pi; sparse gamma_t: 2 pi,
#: the satisfied count is an integer).  The input's own rounding, |x| x 2.2e-16, is 2e-10 rad here;
#: at 1e300 it would be 1e284 rad, and the printed value would be that of an arbitrary angle.
MAX_PERIODIC_ANGLE = 1e6


def check_periodic_angles(values, option: str, name: str, period: str) -> None:
    """InputError when a periodic angle is so large that its own rounding exceeds what V resolves."""
    values = np.asarray(values, dtype=float).reshape(-1)
    if values.size and float(np.max(np.abs(values))) > MAX_PERIODIC_ANGLE:
        worst = float(np.max(np.abs(values)))
        raise InputError(
            f"{option}: |{name}| = {worst:.3g} is beyond {MAX_PERIODIC_ANGLE:.0e}: V_p is periodic in {name} "
            f"(period {period}) and the rounding of so large an angle ({worst * 2.2e-16:.2g} rad) leaves its "
            f"value undefined; reduce it modulo {period}"
        )


def _is_number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _angle_list(data: dict, key: str, path) -> np.ndarray:
    values = data.get(key)
    if not isinstance(values, list):
        raise InputError(f"angle file {path}: \"{key}\" must be a list of numbers (radians), got {json.dumps(values)}")
    for x in values:
        if not _is_number(x):
            raise InputError(f"angle file {path}: \"{key}\" must hold numbers (radians), found {json.dumps(x)}")
        if not math.isfinite(x):
            raise InputError(f"angle file {path}: angles must be finite, found {x!r} in \"{key}\"")
    return np.array(values, dtype=float)


def _ensemble(data: dict, path) -> dict | None:
    ens = data.get("ensemble")
    if ens is None:
        return None
    if not isinstance(ens, dict) or ens.get("kind") != "sparse":
        raise InputError(f"angle file {path}: \"ensemble\" must be null or {{\"kind\": \"sparse\", \"q\": Q, \"degree\": D}}")
    q, d = ens.get("q"), ens.get("degree")
    if not (isinstance(q, int) and not isinstance(q, bool) and q >= 2):
        raise InputError(f"angle file {path}: ensemble \"q\" must be an integer >= 2, got {json.dumps(q)}")
    if not (_is_number(d) and math.isfinite(d) and float(d).is_integer() and d >= 2):
        raise InputError(f"angle file {path}: ensemble \"degree\" must be an integer >= 2, got {json.dumps(d)}")
    return {"kind": "sparse", "q": int(q), "degree": int(d)}


def read_angles(path: str | os.PathLike) -> AngleSet:
    """Read and validate an angle file strictly (the layout above); raises InputError with the reason."""
    if not str(path).strip():
        raise InputError("--angles needs a file name (an angle file written by `leadline optimize --output`)")
    path = Path(path)
    if path.is_dir():
        raise InputError(f"angle file {path} is a folder; give the JSON file written by `leadline optimize --output`")
    try:
        data = json.loads(path.read_text(encoding="utf-8-sig"))  # a leading BOM (some editors write one) is not content
    except FileNotFoundError:
        raise InputError(f"angle file {path} does not exist") from None
    except UnicodeDecodeError:
        raise InputError(f"angle file {path} is not UTF-8 text (an angle file is JSON)") from None
    except (OSError, json.JSONDecodeError) as exc:
        raise InputError(f"angle file {path} is not readable JSON: {exc}") from None
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise InputError(f"angle file {path} is not a leadline angle file (\"format\": \"{FORMAT}\" missing)")
    if data.get("version") != VERSION:
        raise InputError(f"angle file {path} has version {data.get('version')!r}; this leadline reads version {VERSION}")
    unknown = set(data) - _KEYS
    if unknown:
        raise InputError(f"angle file {path} has unknown keys: {', '.join(sorted(unknown))}")
    missing = [k for k in ("p", "gamma", "beta") if k not in data]
    if missing:
        raise InputError(f"angle file {path}: needs {', '.join(missing)} (the depth p and p angles each)")
    p = data["p"]
    if not (isinstance(p, int) and not isinstance(p, bool)) or p < 1:
        raise InputError(f"angle file {path}: \"p\" must be an integer >= 1, got {json.dumps(p)}")
    g = _angle_list(data, "gamma", path)
    b = _angle_list(data, "beta", path)
    check_periodic_angles(b, f"angle file {path}", "beta_t", "pi")
    if g.size != p or b.size != p:
        raise InputError(f"angle file {path}: p = {p} but gamma has {g.size} and beta {b.size} angles")
    xi = data.get("xi")
    if xi is not None and not isinstance(xi, str):
        raise InputError(f"angle file {path}: \"xi\" must be a mixture such as \"2:0.5\" or null, got {json.dumps(xi)}")
    ensemble = _ensemble(data, path)
    if xi is not None and ensemble is not None:
        raise InputError(f"angle file {path}: gives both \"xi\" and a sparse \"ensemble\"; an angle set belongs to one")
    value = data.get("value")
    if value is not None and not (_is_number(value) and math.isfinite(value)):
        raise InputError(f"angle file {path}: value must be a finite number or null")
    return AngleSet(p=p, gamma=g, beta=b, xi=xi, value=value, ensemble=ensemble)


def write_angles(path: str | os.PathLike, angles: AngleSet) -> None:
    """Write atomically: a reader never sees a half-written file."""
    write_text_atomic(path, json.dumps(angles.to_json(), indent=2) + "\n")


def convergence_warning(result) -> str | None:
    """One stderr line when the optimizer stopped away from a stationary point, else None."""
    if result.converged:
        return None
    return (
        f"leadline: warning: the optimizer did not converge (largest gradient component "
        f"{result.gradient_norm:.1e}; {result.message}); the angles are the best found, not an optimum"
    )


def optimum_report(header: list[str], result, evaluations: str, ladder: list[dict], output) -> str:
    """Human-readable report of an optimization (shared by dense and sparse `optimize`).

    ``header`` are the first lines (ensemble, depth, value), ``result`` has gamma,
    beta, gradient_norm and converged; ``ladder`` lists {"p", "value"} per depth run.
    """
    lines = list(header) + [
        "gamma          = " + fmt_list(result.gamma),
        "beta           = " + fmt_list(result.beta),
        f"gradient (max) = {result.gradient_norm:.1e}" + ("" if result.converged else "  (not converged)"),
        f"evaluations    = {evaluations}",
    ]
    if len(ladder) > 1:
        lines.append("ladder         = " + ", ".join(f"p{r['p']}: {fmt(r['value'])}" for r in ladder))
    if output:
        lines.append(f"angles written to {output}")
    return "\n".join(lines)

