"""The range of angles and mixture weights a pass computes in double precision.

A pass weighs each path by w(a) = f(a) exp(-1/2 a^T M a) with M[j,k] =
Gamma_j Gamma_k xi'(G[j,k]).  Every contour correlation satisfies
|G[j,k]| <= 1 (it is a matrix element of a product of unitaries and Pauli
operators between normalized states), so every partial sum of the exponent
has modulus at most

    E = 1/2 sum_{j,k} |Gamma_j| |Gamma_k| xi'(1) = 2 xi'(1) (sum_t |gamma_t|)^2.

The weights themselves stay small however large E is (|w(a)| <= |f(a)| <= 1/2 in
every case measured against mpmath, tests/test_ranges.py): the paths whose bra and
ket halves agree have exponent 0, the others are damped.  What can leave the double
range is the pieces a kernel builds a weight from.  The kernels (kernels/exact/_chunks.py,
kernels/exact/_blocked.py) therefore

* scale every factor to modulus <= 1 (the low-low factor by its largest modulus,
  each cross factor by its own, each row by the largest bound of its chunk, S) and
  multiply the chunk's partial back by exp(S); inside E <= EXPONENT_LIMIT this is
  the old computation, to rounding;
* beyond EXPONENT_LIMIT, when the low-low exponent of a pass spans more than
  LOG_FORM_RANGE, build each row's weights in log form, relative to the row's exact
  largest real exponent (slower; :func:`_chunks.needs_log_form`).

So no weight overflows, and a weight is lost to underflow only below exp(-358) times
the largest weight of its chunk (exp(-708) in log form).  What remains are two limits:

1. Rounding of the exponent.  Each weight is the exp of a sum of terms up to E, so
   its relative rounding is about eps E (eps = 2.2e-16); measured against a 60-digit
   mpmath evaluation the value's error stays below eps E relative to its scale.
   Beyond E = EXPONENT_MAX = 1e9 fewer than about seven digits would survive, and
   the check refuses (:func:`check_range`).
2. The value itself.  At p = 1 it is known in closed form (Claes, van Dam,
   Quantum 5, 542 (2021); Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022)):

       V_1 = -2 gamma Im xi(cos 2beta - i sin 2beta exp(-2 xi'(1) gamma^2))
           = 2 gamma sin 2beta xi'(cos 2beta) exp(-2 xi'(1) gamma^2) (1 + O(exp(-4 xi'(1) gamma^2))),

   which falls below the smallest normal double (2.2e-308) once 2 xi'(1) gamma^2
   exceeds about 708: such angles are refused before computing, with the largest
   |gamma| that is representable at that beta.  At p >= 2 no closed form says in
   advance how small V_p is; a value below the double range comes out as 0.
"""

from __future__ import annotations

import math

import numpy as np

from ..mixture import Mixture

__all__ = [
    "EXPONENT_LIMIT",
    "LOG_FORM_RANGE",
    "EXPONENT_MAX",
    "RangeError",
    "exponent_bound",
    "pass_exponent_bound",
    "max_gamma_sum",
    "p1_log_value",
    "p1_max_gamma",
    "check_range",
    "check_pass_range",
]

#: below this bound E every partial factor of the plain factorized pass lies between
#: exp(-2E) and exp(E), well inside double precision (2E <= 700 < 708)
EXPONENT_LIMIT = 350.0
#: beyond EXPONENT_LIMIT, a pass whose low-low exponent spans more than this (max - min of
#: its real part) builds its weights in log form (_chunks.needs_log_form)
LOG_FORM_RANGE = 350.0
#: largest accepted E: the relative rounding of every weight, about eps E, stays below 2.2e-7
EXPONENT_MAX = 1e9
#: natural log of the smallest normal double, 2.2250738585072014e-308
LOG_SMALLEST = math.log(np.finfo(float).tiny)


class RangeError(ValueError):
    """Angles or weights outside the range a pass computes in double precision."""


def exponent_bound(mixture: Mixture, gamma) -> float:
    """E = 2 xi'(1) (sum_t |gamma_t|)^2, the bound on every partial exponent of every pass."""
    g = np.abs(np.asarray(gamma, dtype=float).reshape(-1))
    s = float(g.sum())
    return 2.0 * float(mixture.dxi(1.0)) * s * s  # inf, never OverflowError, for huge angles


def pass_exponent_bound(M) -> float:
    """E of one pass from its exponent matrix M (uses the actual correlations, never larger)."""
    return 0.5 * float(np.abs(np.asarray(M)).sum())


def max_gamma_sum(mixture: Mixture, limit: float = EXPONENT_MAX) -> float:
    """Largest sum_t |gamma_t| with E <= ``limit`` for this mixture."""
    return math.sqrt(limit / (2.0 * float(mixture.dxi(1.0))))


def p1_log_value(mixture: Mixture, gamma: float, beta: float) -> float:
    """ln |V_1(gamma, beta)| from the closed form, without underflow (-inf when V_1 = 0 exactly).

    V_1 = -2 g Im xi(C - i S e) with C = cos 2b, S = sin 2b, e = exp(-2 xi'(1) g^2).
    Expanding xi(C - i S e) = sum_q w_q sum_k binom(q, k) C^(q-k) (-i S e)^k, the
    imaginary part collects the odd k; the lowest odd order whose coefficient does
    not vanish dominates once e is small, and the others are kept as long as they
    are representable relative to it.
    """
    k, normal = mixture.normal_form()
    if k:  # exact scaling (Mixture.normal_form): |V_1(xi; g)| = 2^k |V_1(xi / 4^k; 2^k g)|
        return k * math.log(2.0) + p1_log_value(normal, math.ldexp(float(gamma), k), beta)
    g = float(gamma)
    C, S = math.cos(2 * beta), math.sin(2 * beta)
    if g == 0.0 or S == 0.0:
        return -math.inf
    log_e = -2.0 * float(mixture.dxi(1.0)) * g * g
    qmax = max(q for q, _ in mixture.terms)
    # Im (-i S e)^k = (-1)^((k+1)/2) (S e)^k for odd k
    coef = {}
    for k in range(1, qmax + 1, 2):
        c = sum(w * math.comb(q, k) * C ** (q - k) for q, w in mixture.terms if q >= k)
        coef[k] = (-1) ** ((k + 1) // 2) * c * S**k
    orders = [k for k, c in coef.items() if c != 0.0]
    if not orders:
        return -math.inf
    k0 = orders[0]
    # ratio of every other order to the leading one: c_k / c_k0 * e^(k - k0) (tiny or not)
    total = 1.0
    for k in orders[1:]:
        log_ratio = math.log(abs(coef[k] / coef[k0])) + (k - k0) * log_e
        if log_ratio > -745.0:
            total += math.copysign(math.exp(log_ratio), coef[k] / coef[k0])
    if total == 0.0:
        return -math.inf
    return math.log(2.0 * abs(g) * abs(coef[k0])) + k0 * log_e + math.log(abs(total))


def p1_max_gamma(mixture: Mixture, beta: float) -> float:
    """The largest |gamma| up to which V_1(gamma, beta) stays a normal double (bisection; inf if always)."""
    lo, hi = 0.0, 1.0
    while p1_log_value(mixture, hi, beta) >= LOG_SMALLEST:
        lo, hi = hi, 2.0 * hi
        if hi > 1e12:
            return math.inf
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if p1_log_value(mixture, mid, beta) >= LOG_SMALLEST:
            lo = mid
        else:
            hi = mid
    return lo


def _log10_text(log_value: float) -> str:
    """exp(log_value) written as 'm.me-N' though it is far below the double range."""
    x = log_value / math.log(10.0)
    exponent = math.floor(x)
    return f"{10 ** (x - exponent):.2g}e{exponent:+d}"


def check_range(mixture: Mixture, gamma, beta=None) -> float:
    """Raise :class:`RangeError` (one line stating the range) when the angles are out of it.

    Out of range: E > EXPONENT_MAX (any depth), or, at p = 1 with ``beta`` given, a
    nonzero V_1 below the smallest normal double.  Returns E.  Cheap; call it
    before any pass runs.
    """
    E = exponent_bound(mixture, gamma)
    s = float(np.abs(np.asarray(gamma, dtype=float)).sum())
    if not E <= EXPONENT_MAX:
        raise RangeError(
            f"out of the double-precision range: 2 xi'(1) (sum_t |gamma_t|)^2 = {E:.4g} exceeds "
            f"{EXPONENT_MAX:.0e}, where rounding of the exponents alone (2.2e-16 x E) would cost the value its "
            f"seventh digit; with xi'(1) = {float(mixture.dxi(1.0)):.6g} the angles need "
            f"sum_t |gamma_t| <= {max_gamma_sum(mixture):.6g} (here {s:.6g})"
        )
    g = np.asarray(gamma, dtype=float).reshape(-1)
    if beta is not None and g.size == 1:
        b = float(np.asarray(beta, dtype=float).reshape(-1)[0])
        log_v = p1_log_value(mixture, float(g[0]), b)
        if log_v != -math.inf and log_v < LOG_SMALLEST:
            top = p1_max_gamma(mixture, b)
            raise RangeError(
                f"out of the double-precision range: at p = 1, V_1 = 2 gamma sin(2 beta) xi'(cos 2 beta) "
                f"exp(-2 xi'(1) gamma^2) is about {_log10_text(log_v)} here, below the smallest double "
                f"2.2e-308; at beta = {b:.6g} with this xi it is representable for |gamma| <= {top:.6g} "
                f"(here {abs(float(g[0])):.6g})"
            )
    return E


def check_pass_range(M) -> float:
    """The same check for one pass's exponent matrix (used around executors)."""
    E = pass_exponent_bound(M)
    if not E <= EXPONENT_MAX:
        raise RangeError(
            f"out of the double-precision range: this pass's exponents reach {E:.4g} "
            f"(computed up to {EXPONENT_MAX:.0e}); use smaller gamma or smaller weights in xi"
        )
    return E
