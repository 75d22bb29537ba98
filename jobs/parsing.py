"""Parsing of command-line values into kernel objects, with one-line errors."""

from __future__ import annotations

import math

import numpy as np

from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture

from .errors import InputError

__all__ = ["mixture_arg", "angles_arg", "angle_pair"]


def mixture_arg(spec: str | None, option: str = "--xi") -> Mixture:
    if spec is None:
        raise InputError(f"{option} is required: comma-separated q:w pairs, for example {option} 2:0.5")
    try:
        return parse_mixture(spec)
    except MixtureError as exc:
        raise InputError(f"{option}: {exc}") from None


def angles_arg(text: str | None, option: str) -> np.ndarray:
    """'0.1,-0.3,...' -> float array; rejects empty, non-numeric and non-finite entries."""
    if text is None or not str(text).strip():
        raise InputError(f"{option} needs comma-separated angles in radians, for example {option} 0.5,0.4")
    values = []
    for item in str(text).split(","):
        item = item.strip()
        try:
            x = float(item)
        except ValueError:
            raise InputError(f"{option}: {item!r} is not a number") from None
        if not math.isfinite(x):
            raise InputError(f"{option}: angles must be finite, got {item!r}")
        values.append(x)
    return np.array(values, dtype=float)


def angle_pair(gamma: str | None, beta: str | None) -> tuple[np.ndarray, np.ndarray]:
    g = angles_arg(gamma, "--gamma")
    b = angles_arg(beta, "--beta")
    if g.size != b.size:
        raise InputError(f"--gamma has {g.size} angles but --beta has {b.size}; both need p values")
    return g, b
