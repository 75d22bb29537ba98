"""The range of angles and mixture weights a pass computes exactly in double precision.

A pass weighs each path by w(a) = f(a) exp(-1/2 a^T M a) with M[j,k] =
Gamma_j Gamma_k xi'(G[j,k]).  The kernels never form that exponential in one
piece: they multiply partial factors (high-high part, cross terms, low-low
part), each the exponential of a sub-sum of the quadratic form.  Every
contour correlation satisfies |G[j,k]| <= 1 (it is a matrix element of a
product of unitaries and Pauli operators between normalized states), so each
sub-sum has modulus at most

    E = 1/2 sum_{j,k} |Gamma_j| |Gamma_k| xi'(1) = 2 xi'(1) (sum_t |gamma_t|)^2,

and the partial factors lie between exp(-2E) and exp(E) (the cross terms are
shifted by their own modulus, which doubles the lower end).  Double precision
holds numbers down to exp(-708) at full precision, so E <= EXPONENT_LIMIT = 350
guarantees that no factor overflows or falls below the normal range; inside it
the pass is exact to rounding.  Beyond it a factor underflows to zero or
overflows to infinity and the pass breaks its sum-of-weights check.
(Measured against a 40-digit mpmath evaluation: exact up to E ~ 340, wrong in
the first digit from E ~ 650 on; tests/test_ranges.py.)

The values themselves are tiny out there: at p = 1 on the SK model,
V_1 = gamma sin(4 beta) exp(-2 gamma^2) (Farhi, Goldstone, Gutmann, Zhou,
Quantum 6, 759 (2022)), below 1e-146 once E > 350.
"""

from __future__ import annotations

import math

import numpy as np

from ..mixture import Mixture

__all__ = [
    "EXPONENT_LIMIT",
    "RangeError",
    "exponent_bound",
    "pass_exponent_bound",
    "max_gamma_sum",
    "check_range",
    "check_pass_range",
]

#: largest allowed bound E on the modulus of a partial exponent (2E <= 700 < 708)
EXPONENT_LIMIT = 350.0


class RangeError(ValueError):
    """Angles or weights outside the range a pass computes exactly in double precision."""


def exponent_bound(mixture: Mixture, gamma) -> float:
    """E = 2 xi'(1) (sum_t |gamma_t|)^2, the bound on every partial exponent of every pass."""
    g = np.abs(np.asarray(gamma, dtype=float).reshape(-1))
    return 2.0 * float(mixture.dxi(1.0)) * float(g.sum()) ** 2


def pass_exponent_bound(M) -> float:
    """E of one pass from its exponent matrix M (uses the actual correlations, never larger)."""
    return 0.5 * float(np.abs(np.asarray(M)).sum())


def max_gamma_sum(mixture: Mixture) -> float:
    """Largest sum_t |gamma_t| inside the range for this mixture."""
    return math.sqrt(EXPONENT_LIMIT / (2.0 * float(mixture.dxi(1.0))))


def check_range(mixture: Mixture, gamma) -> float:
    """Raise :class:`RangeError` (one line stating the range) when the angles are out of it.

    Returns the bound E.  Cheap (O(p)); call it before any pass runs.
    """
    E = exponent_bound(mixture, gamma)
    if not E <= EXPONENT_LIMIT:
        s = float(np.abs(np.asarray(gamma, dtype=float)).sum())
        raise RangeError(
            f"out of the double-precision range: 2 xi'(1) (sum_t |gamma_t|)^2 = {E:.4g} exceeds "
            f"{EXPONENT_LIMIT:g}; with xi'(1) = {float(mixture.dxi(1.0)):.6g} the angles need "
            f"sum_t |gamma_t| <= {max_gamma_sum(mixture):.6g} (here {s:.6g})"
        )
    return E


def check_pass_range(M) -> float:
    """The same check for one pass's exponent matrix (used around executors)."""
    E = pass_exponent_bound(M)
    if not E <= EXPONENT_LIMIT:
        raise RangeError(
            f"out of the double-precision range: this pass's exponents reach {E:.4g} "
            f"(exact up to {EXPONENT_LIMIT:g}); use smaller gamma or smaller weights in xi"
        )
    return E
