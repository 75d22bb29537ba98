"""What every part of the sparse recursion shares: the problem check, the per-step tolerance of
the normalization sum_a f(a) H(a) = 1, its error, and the result object."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

__all__ = ["RunMap", "SparseIntegrityError", "check_problem", "sum_fH_tolerance", "SparseEvaluation"]


RunMap = Callable[[Callable[[np.ndarray], np.ndarray], Sequence[np.ndarray]], list]


class SparseIntegrityError(RuntimeError):
    """A step whose normalization sum_a f(a) H(a) is not 1: corrupt transform or chunk."""


def check_problem(q, degree) -> tuple[int, float]:
    """Validate (q, D): q an integer >= 2, D a number >= 2 (real D allowed for scaling studies)."""
    if isinstance(q, bool) or not float(q).is_integer() or int(q) < 2:
        raise ValueError(f"constraint size q must be an integer >= 2, got {q!r}")
    D = float(degree)
    if not math.isfinite(D) or D < 2:
        raise ValueError(f"degree D must be a finite number >= 2, got {degree!r}")
    return int(q), D


def sum_fH_tolerance(p: int, degree: float = 2.0) -> float:
    """Allowed |sum_a f(a) H(a) - 1| per step at depth p and degree D.

    Two parts: rounding of an N-term sum (1e-10 per site, common practice), and the
    rounding of the exponent (D-1) log1p(message - 1), whose absolute error is about
    (D-1) times the unit roundoff 2.2e-16 (the messages carry O(1/D) information and the
    power D-1 magnifies their rounding).  Measured deviations stay below 1.1 x 2.2e-16 x D
    for q = 2, 3, 9, p = 1..4, D = 3..1e12 (tests/test_sparse_ranges.py; full and growing contour); the factor
    4 (2p+1) leaves room, and a lost or doubled transform block still shows up as an
    O(1) deviation.
    """
    return (2 * p + 1) * (1e-10 + 4.0 * 2.2e-16 * max(float(degree) - 1.0, 0.0))


@dataclass
class SparseEvaluation:
    """Result of one sparse evaluation (the object the CLI prints as JSON).

    value      : nu_p(D; gamma, beta), satisfied fraction in [0, 1] (cut fraction for q = 2)
    gradient   : None or {"gamma": (p,), "beta": (p,)} of d nu / d angle (radians^-1)
    residuals  : "sum_fH" max |sum f H - 1| over steps, "imag_value" |Im nu|, and with a
                 gradient "imag_gradient"
    correlator : <z_1...z_q> = 2 nu - 1
    """

    value: float
    p: int
    q: int
    degree: float
    gamma: np.ndarray
    beta: np.ndarray
    residuals: dict
    gradient: dict | None = None
    wall_time: float = 0.0
    transforms: int = 0
    correlator: float = 0.0

    def to_json(self) -> dict:
        D = self.degree
        out = {
            "value": float(self.value),
            "kind": "sparse",
            "p": int(self.p),
            "q": int(self.q),
            "degree": int(D) if float(D).is_integer() else float(D),
            "correlator": float(self.correlator),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "residuals": {k: float(v) for k, v in self.residuals.items()},
            "wall_time_s": float(self.wall_time),
            "transforms": int(self.transforms),
        }
        if self.gradient is not None:
            out["gradient"] = {k: [float(x) for x in v] for k, v in self.gradient.items()}
        return out


def _result(q, D, g, b, corr, residuals, grad, t0, transforms) -> SparseEvaluation:
    """The evaluation result from the root correlator <z_1...z_q> (nu = 1/2 + corr/2)."""
    nu_c = 0.5 + 0.5 * corr
    return SparseEvaluation(
        value=float(nu_c.real),
        p=g.size,
        q=q,
        degree=D,
        gamma=g,
        beta=b,
        residuals=residuals,
        gradient=grad,
        wall_time=time.perf_counter() - t0,
        transforms=transforms,
        correlator=float(corr.real),
    )
