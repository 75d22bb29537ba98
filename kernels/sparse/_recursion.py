"""Exact QAOA value of Max-q-XORSAT on D-regular hypergraphs of large girth.

Problem (conventions of the whole module).  Spins z in {+1,-1}^n; each of
the m = nD/q constraints acts on q spins, c(z) = (1 + s z_1...z_q)/2 with a
sign s = +-1, and C = sum of c counts the satisfied constraints.  QAOA:

    |g,b> = prod_{t=1..p} exp(-i b_t B) exp(-i g_t C) |+>^n     (t = 1 acts first)

When every radius-p neighbourhood is a hypertree (girth > 2p+1) the value is
the same for every constraint and every sign pattern (gauge the signs away),
and this module returns the satisfied fraction

    nu_p(D; g, b) = <C>/m = 1/2 + <z_1...z_q>/2          (MaxCut: q = 2, cut fraction)

Method (Basso, Farhi, Marwaha, Villalonga, Zhou, TQC 2022, arXiv:2110.14206
for MaxCut on large-girth regular graphs; Basso, Gamarnik, Mei, Zhou, FOCS
2022, arXiv:2204.10306 for Max-q-XORSAT), in the contour layout of
:mod:`leadline.kernels.exact` (N = 2^(2p+1) paths, f and Gamma as there):

    phase(c) = Gamma . c,   K(c) = cos(phase(c)/2),   S(c) = sin(phase(c)/2)
    H_0 = 1
    H_m(a) = [ sum_{b_1..b_{q-1}} prod_i f(b_i) H_{m-1}(b_i) K(a.b_1...b_{q-1}) ]^(D-1)
    <z_1...z_q> = i sum_{a_1..a_q} prod_i f(a_i) H_p(a_i) (a_i)_0 S(a_1...a_q)

(a.b is the elementwise product of paths = XOR of their bit patterns).  The
inner sums are XOR-convolutions, so with the unnormalized Walsh-Hadamard
transform W (W W = N):

    V_m = W(f H_{m-1})                 V_m[0] = sum f H_{m-1} = 1  (exact identity)
    message_m - 1 = W( V_m^(q-1) * W(K - 1) ) / N
    H_m = exp( (D-1) log1p(message_m - 1) )
    <z_1...z_q> = (i/N) sum_k W(f H_p a_0)[k]^q W(S)[k]

Numerical stability at large D: message - 1 is computed directly from
K - 1 = -2 sin^2(phase/4) (never as "1 + small" minus 1), and log1p of the
complex message is taken with an accurate complex log1p (numpy's complex
log1p loses the absolute precision of small arguments, which the power D-1
would amplify by D).  This uses sum f H = 1, which is checked at every step
(residual "sum_fH").

Growing contour (default).  Causality: H_m is a function of the path at times
|t| <= m only, and the sum over the leaves' paths in step m sees Gamma only at
|t| <= m.  Summing the path variables at later times (unitarity of the mixer)
forces a_{m+1} = a_{-(m+1)}, so step m is the same recursion on the contour of
a depth-m problem (times 1..m, a merged middle site standing for +-(m+1),
-m..-1; its chain is the depth-m f), and H_{m-1} is lifted to it unchanged
(it does not depend on times +-m or the merged site).  The root uses the full
depth-p contour.  With the global flip every vector is a half vector
(2^(2m) points at step m).  Three more exact reductions (:func:`_evaluate_growing`):
the spectra of cos(phase/2) - 1 and sin(phase/2) are products over the sites
(closed form, no transform); the chain f factorizes around the three middle sites
H_{m-1} does not see, so the first transform of step m runs on the 2^(2m-3) points
of the outer part and a 32 x 4 matrix rebuilds the rest from its quarter-blocks;
and H_m does not see its merged site, so only the half of message - 1 it needs is
computed (a transform of 2^(2m-1) points after summing over that wave-vector
bit).  The root is the same with time 0 in the middle.  One evaluation transforms
about (4/3)(2^(2p-3) + 2^(2p-1)) + 2^(2p-1) points in all, against p (2 or 3)
transforms of 2^(2p+1) points on the full contour (``contour="full"`` keeps that
recursion as the baseline), and holds 1.25 x 2^(2p-1) complex numbers at most
(transforms in place, :func:`wht_inplace`).

Cost: O(4^p) time and memory for the value (O(p 4^p) on the full contour); the
gradient (reverse mode through the same reduced steps) costs a small constant
times one evaluation.

Splitting: the transform of a vector viewed as a (2^h, 2^l) array is the
row transform (over the low bits) followed by the column transform (over the
high bits), like a four-step FFT.  :func:`wht_rows_chunk` and
:func:`wht_columns_chunk` are the pure chunk functions; :func:`split_transform`
maps them with an injected ``run_map(func, blocks) -> list of arrays``.
"""

from __future__ import annotations

import math
import time

import numpy as np

from ..exact import check_angles
from ._common import RunMap, SparseEvaluation, check_problem
from ._growing import _evaluate_growing

__all__ = ["evaluate_sparse", "value_and_grad", "sparse_to_dense_angles", "dense_to_sparse_angles", "scaled_value"]


def evaluate_sparse(
    q: int,
    degree: float,
    gamma,
    beta,
    *,
    gradient: bool = False,
    run_map: RunMap | None = None,
    n_high: int | None = None,
    memory_budget_bytes: int | None = None,
    contour: str = "growing",
    chunked=None,
) -> SparseEvaluation:
    """Exact nu_p(D; gamma, beta) of Max-q-XORSAT on a D-regular hypertree, optionally with gradient.

    Parameters
    ----------
    q : int >= 2, constraint size (q = 2: MaxCut, value is the cut fraction)
    degree : D >= 2 (every spin in D constraints); real D is allowed (large-D scaling)
    gamma, beta : array-like (p,), radians, t = 1 acts first; cost exp(-i g C) with C the
        number of satisfied constraints, mixer exp(-i b B), B = sum X
    gradient : also return d nu / d gamma and d nu / d beta (reverse mode)
    run_map : executor of the transform chunks, ``run_map(func, blocks) -> list``; None
        (default) transforms whole vectors in-process
    n_high : high bits of the split layout (default n // 2) when ``run_map`` is given
    memory_budget_bytes : with ``gradient`` and ``contour="full"``, bound on the per-step
        vectors kept for the reverse sweep; steps between checkpoints are recomputed
        (default: keep all).  The growing contour keeps all steps: together they hold
        about 0.42 x 2^(2p+1) complex numbers.
    contour : "growing" (default: step m on the depth-m contour, transforms of at
        most 2^(2m-1) points) or "full" (every step on all 2^(2p+1) paths; the baseline)
    chunked : ``chunked(q, D, gamma, beta, gradient) -> SparseEvaluation`` that runs the
        evaluation on chunked vectors instead (``evaluate_chunked`` with a vector store; the
        command line's ``--scratch`` passes one), or None (in memory)
    """
    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    g, b = check_angles(gamma, beta)
    p = g.size
    if chunked is not None:
        return chunked(q, D, g, b, gradient)
    if contour == "growing":
        return _evaluate_growing(q, D, g, b, gradient, run_map, n_high, t0)
    if contour != "full":
        raise ValueError(f"unknown contour {contour!r}; choose 'growing' or 'full'")
    from ._full import _evaluate_full

    return _evaluate_full(q, D, g, b, gradient, run_map, n_high, memory_budget_bytes, t0)


def value_and_grad(q: int, degree: float, gamma, beta, **kw) -> tuple[float, np.ndarray, np.ndarray]:
    """(nu, d nu/d gamma (p,), d nu/d beta (p,)) -- the objective interface an optimizer takes."""
    ev = evaluate_sparse(q, degree, gamma, beta, gradient=True, **kw)
    return ev.value, ev.gradient["gamma"], ev.gradient["beta"]


# --------------------------------------------------------------------------- universality
def dense_to_sparse_angles(q: int, degree: float, gamma):
    """Sparse angles g_t = 2 sqrt(q) gamma_t / sqrt(D) for dense q-spin angles gamma_t."""
    return 2.0 * math.sqrt(q) * np.asarray(gamma, dtype=float) / math.sqrt(degree)


def sparse_to_dense_angles(q: int, degree: float, gamma):
    """Inverse of :func:`dense_to_sparse_angles`: gamma_t = g_t sqrt(D) / (2 sqrt(q))."""
    return np.asarray(gamma, dtype=float) * math.sqrt(degree) / (2.0 * math.sqrt(q))


def scaled_value(q: int, degree: float, nu: float) -> float:
    """sqrt(D) (nu - 1/2) * 2 / sqrt(q): tends to the dense V_p of xi = x^q as D -> infinity.

    Basso, Gamarnik, Mei, Zhou, FOCS 2022 (arXiv:2204.10306), with the sparse angles
    g_t = 2 sqrt(q) gamma_t / sqrt(D) (:func:`dense_to_sparse_angles`).
    """
    return math.sqrt(degree) * (nu - 0.5) * 2.0 / math.sqrt(q)
