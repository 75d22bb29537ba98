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
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from ..exact import check_angles, gamma_vector, link_beta_index, link_sign, n_sites, path_weights

__all__ = [
    "SparseEvaluation",
    "SparseIntegrityError",
    "RunMap",
    "evaluate_sparse",
    "value_and_grad",
    "sparse_to_dense_angles",
    "dense_to_sparse_angles",
    "scaled_value",
    "wht",
    "wht_blocked",
    "wht_rows_chunk",
    "wht_columns_chunk",
    "split_transform",
    "run_map_inprocess",
    "complex_log1p",
    "phase_vector",
    "sum_fH_tolerance",
    "optimize_sparse",
    "SparseOptimization",
    "check_problem",
]

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


# --------------------------------------------------------------------------- transforms
def _wht_middle(x3: np.ndarray, scratch: np.ndarray | None = None) -> None:
    """In-place unnormalized WHT along axis 1 of a 3-D array (pre, L, post), L a power of 2.

    Radix-2 butterflies, one vectorized numpy pass per stage: O(L log L) per fibre.
    """
    pre, L, post = x3.shape
    if L & (L - 1):
        raise ValueError(f"transform length {L} is not a power of 2")
    if scratch is None or scratch.size < x3.size // 2 or scratch.dtype != x3.dtype:
        scratch = np.empty(x3.size // 2, dtype=x3.dtype)
    h = 1
    while h < L:
        v = x3.reshape(pre, L // (2 * h), 2, h, post)
        a = v[:, :, 0]
        b = v[:, :, 1]
        t = scratch[: a.size].reshape(a.shape)
        np.subtract(a, b, out=t)
        a += b
        b[...] = t
        h *= 2


def wht(x: np.ndarray, scratch: np.ndarray | None = None) -> np.ndarray:
    """Unnormalized Walsh-Hadamard transform of a 1-D vector, IN PLACE; returns x.

    (W x)[k] = sum_j (-1)^popcount(j & k) x[j]; W W = N.  Length a power of 2,
    any float or complex dtype.  ``scratch``: optional buffer of >= N/2 of x's dtype.
    """
    if x.ndim != 1:
        raise ValueError("wht expects a 1-D array")
    _wht_middle(x.reshape(1, x.size, 1), scratch)
    return x


#: bits transformed by one matrix product in :func:`wht_blocked` (a 32 x 32 Hadamard
#: matrix: 32 multiply-adds per number inside BLAS replace five memory-bound butterfly
#: passes; 4..6 measured within noise of each other, 5 best at 2^22 points)
WHT_GROUP_BITS = 5
_HADAMARD: dict = {}


def _hadamard_block(k: int, post: int) -> np.ndarray:
    """The 2^k Hadamard matrix (Sylvester), Kronecker-multiplied by the identity of size ``post``."""
    key = (k, post)
    H = _HADAMARD.get(key)
    if H is None:
        H = np.ones((1, 1))
        for _ in range(k):
            H = np.block([[H, H], [H, -H]])
        if post > 1:
            H = np.kron(H, np.eye(post))
        _HADAMARD[key] = H
    return H


def _hadamard_bits(src: np.ndarray, dst: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Transform over the index bits lo..hi-1 of the complex vector ``src`` (1-D) by Hadamard
    matrix products, ping-ponging between ``src`` and ``dst`` (same size); returns whichever
    of the two holds the result."""
    N = src.size
    s = src.view(np.float64)
    d = dst.view(np.float64)
    done = lo
    flips = 0
    while done < hi:
        k = min(WHT_GROUP_BITS, hi - done)
        post = 2 << done  # (re, im) pairs of the bits below the group
        pre = N >> (done + k)
        if post * (1 << k) <= 128:  # low bits: one product with H kron I over each row
            np.matmul(s.reshape(pre, post << k), _hadamard_block(k, post), out=d.reshape(pre, post << k))
        else:
            np.matmul(_hadamard_block(k, 1), s.reshape(pre, 1 << k, post), out=d.reshape(pre, 1 << k, post))
        s, d = d, s
        done += k
        flips += 1
    return dst if flips % 2 else src


def _wht_blocked_pingpong(x: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """Transform of the complex vector x over all its bits, ping-ponging between x and
    ``scratch`` (same size); returns whichever of the two holds the result."""
    N = x.size
    n = N.bit_length() - 1
    if N != 1 << n:
        raise ValueError(f"transform length {N} is not a power of 2")
    return _hadamard_bits(x, scratch, 0, n)


#: :func:`wht_inplace`: rows of 2^ROW_BITS points for the low bits, blocks of about
#: 2^BLOCK_BITS points for the high bits (measured at 2^25 points, one core: 0.76 s
#: against 0.99 s for the whole-vector ping-pong; 14/16 and 16/18 in between, 12/15 slower)
ROW_BITS, BLOCK_BITS = 16, 17


def wht_inplace(x: np.ndarray, scratch: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Same transform as :func:`wht` in place on a 1-D complex vector, with two small scratch
    buffers instead of a full-size one (four-step order, like a four-step FFT).

    The vector is a (2^h, 2^l) array, l = ``ROW_BITS``: the low bits are transformed
    a row at a time (contiguous, in cache), then the high bits a block of columns at a time
    (gathered into the scratch, transformed there by :func:`_hadamard_bits`, written back).
    ``scratch``: two complex buffers of >= max(2^ROW_BITS, 2^BLOCK_BITS, 2^h) points.
    """
    N = x.size
    n = N.bit_length() - 1
    if N != 1 << n:
        raise ValueError(f"transform length {N} is not a power of 2")
    lbits = min(n, ROW_BITS)
    h = n - lbits
    need = max(1 << lbits, 1 << min(n, BLOCK_BITS), 1 << h)
    if scratch is None or min(s.size for s in scratch) < need:
        scratch = (np.empty(need, dtype=complex), np.empty(need, dtype=complex))
    s1, s2 = scratch
    B = 1 << lbits
    for r0 in range(0, N, B):
        row = x[r0 : r0 + B]
        out = _hadamard_bits(row, s1[:B], 0, lbits)
        if out is not row:
            row[...] = out
    if h == 0:
        return x
    X2 = x.reshape(1 << h, B)
    wbits = min(lbits, max(0, BLOCK_BITS - h))
    w = 1 << wbits
    for j0 in range(0, B, w):
        blk = s1[: w << h]
        blk.reshape(1 << h, w)[...] = X2[:, j0 : j0 + w]
        out = _hadamard_bits(blk, s2[: blk.size], wbits, wbits + h)
        X2[:, j0 : j0 + w] = out.reshape(1 << h, w)
    return x


def wht_blocked(x: np.ndarray, scratch: np.ndarray | None = None) -> np.ndarray:
    """Same transform as :func:`wht` (in place on a 1-D complex vector), by matrix products.

    The index bits are taken in groups of ``WHT_GROUP_BITS`` from the least
    significant end; each group is one real matrix product with the Hadamard
    matrix of its size, applied to the (real, imaginary) pairs, ping-ponging
    between ``x`` and a scratch buffer of the same size.  Same sums as the
    butterflies in a different order (agreement to rounding, checked in tests).
    """
    if x.ndim != 1 or x.dtype != np.complex128:
        return wht(x)
    s = scratch[: x.size] if scratch is not None and scratch.size >= x.size and scratch.dtype == x.dtype else np.empty_like(x)
    out = _wht_blocked_pingpong(x, s)
    if out is not x:
        x[:] = out
    return x


def wht_rows_chunk(block: np.ndarray) -> np.ndarray:
    """Chunk function: transform every row of a (rows, 2^l) block (the low bits). Pure."""
    out = np.array(block, copy=True, order="C")
    _wht_middle(out.reshape(out.shape[0], out.shape[1], 1))
    return out


def wht_columns_chunk(block: np.ndarray) -> np.ndarray:
    """Chunk function: transform every column of a (2^h, cols) block (the high bits). Pure."""
    out = np.array(block, copy=True, order="C")
    _wht_middle(out.reshape(1, out.shape[0], out.shape[1]))
    return out


def run_map_inprocess(func, blocks):
    """Default ``run_map``: apply ``func`` to each block in order, in this process."""
    return [func(b) for b in blocks]


def split_transform(
    x: np.ndarray,
    n_high: int,
    *,
    rows_per_chunk: int | None = None,
    cols_per_chunk: int | None = None,
    run_map: RunMap | None = None,
) -> np.ndarray:
    """WHT of x (length 2^n) in the four-step layout; writes the result into x and returns it.

    x is viewed as a (2^h, 2^l) row-major array, h = ``n_high`` (index = row * 2^l + col):
    1. rows (the l low bits) are transformed in chunks of ``rows_per_chunk`` rows,
    2. columns (the h high bits) in chunks of ``cols_per_chunk`` columns.
    Each chunk is a pure call ``func(block) -> block`` through ``run_map(func, blocks)``
    (default: in-process), so an executor can run the chunks anywhere; results are
    written back in chunk order.  Exactly equal (same butterflies) to :func:`wht`
    up to the order of floating-point additions.
    """
    N = x.size
    n = N.bit_length() - 1
    if N != 1 << n:
        raise ValueError(f"length {N} is not a power of 2")
    if not 0 <= n_high <= n:
        raise ValueError(f"n_high = {n_high} outside 0..{n}")
    run_map = run_map or run_map_inprocess
    R, Cn = 1 << n_high, 1 << (n - n_high)
    A = x.reshape(R, Cn)
    rows_per_chunk = max(1, min(R, rows_per_chunk or max(1, R // 4)))
    cols_per_chunk = max(1, min(Cn, cols_per_chunk or max(1, Cn // 4)))
    starts = list(range(0, R, rows_per_chunk))
    outs = run_map(wht_rows_chunk, [A[s : s + rows_per_chunk] for s in starts])
    for s, o in zip(starts, outs):
        A[s : s + rows_per_chunk] = o
    starts = list(range(0, Cn, cols_per_chunk))
    outs = run_map(wht_columns_chunk, [A[:, s : s + cols_per_chunk] for s in starts])
    for s, o in zip(starts, outs):
        A[:, s : s + cols_per_chunk] = o
    return x


# --------------------------------------------------------------------------- helpers
def phase_vector(gamma) -> np.ndarray:
    """phase(c) = Gamma . c for all 2^(2p+1) paths, shape (N,), float; O(N) by doubling.

    Pattern order as :func:`leadline.kernels.exact.sign_patterns` (first site = MSB,
    set bit = spin -1).
    """
    Gam = gamma_vector(gamma)
    out = np.array([Gam[-1], -Gam[-1]])
    for k in range(Gam.size - 2, -1, -1):
        out = np.concatenate([out + Gam[k], out - Gam[k]])
    return out


def _site_sums(vec: np.ndarray, n: int) -> np.ndarray:
    """sum_c vec(c) c_t for every site t, shape (n,) of vec's dtype."""
    out = np.empty(n, dtype=vec.dtype)
    for t in range(n):
        v = vec.reshape(1 << t, 2, 1 << (n - 1 - t))
        out[t] = v[:, 0, :].sum() - v[:, 1, :].sum()
    return out


def _flip_time0(vec: np.ndarray, p: int) -> None:
    """vec(a) *= a_0 in place (time 0 is site p, i.e. bit p counted from the LSB)."""
    vec.reshape(1 << p, 2, 1 << p)[:, 1, :] *= -1


def complex_log1p(z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """log(1 + z) for complex z, accurate in absolute terms for small |z|.

    Re = 1/2 log1p(2x + x^2 + y^2), Im = atan2(y, 1 + x).  (numpy's complex log1p
    forms |1 + z| first and loses ~1e-16 absolutely, which the power D-1 turns
    into ~1e-16 * D.)  ``out`` may be ``z`` itself (in place).
    """
    x = z.real.copy()
    y = z.imag.copy()
    if out is None:
        out = np.empty(z.shape, dtype=complex)
    t = x + 2.0
    t *= x
    t += y * y
    np.log1p(t, out=t)
    t *= 0.5
    out.real = t
    x += 1.0
    np.arctan2(y, x, out=t)
    out.imag = t
    return out


# --------------------------------------------------------------------------- result
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


# --------------------------------------------------------------------------- kernel
class _Transformer:
    """Applies the WHT in place, in-process or split through run_map; counts calls."""

    def __init__(self, N: int, run_map: RunMap | None, n_high: int | None, blocked: bool = False):
        self.N = N
        self.run_map = run_map
        self.blocked = blocked
        n = N.bit_length() - 1
        self.n_high = (n // 2) if n_high is None else n_high
        self.count = 0
        self._scratch = {}

    def __call__(self, x: np.ndarray) -> np.ndarray:
        self.count += 1
        if self.run_map is None:
            if self.blocked and x.dtype == np.complex128:
                s = self._scratch.get("blocked")
                if s is None:
                    s = self._scratch["blocked"] = np.empty(x.size, dtype=x.dtype)
                return wht_blocked(x, s)
            s = self._scratch.get(x.dtype)
            if s is None:
                s = self._scratch[x.dtype] = np.empty(x.size // 2, dtype=x.dtype)
            return wht(x, s)
        return split_transform(x, self.n_high, run_map=self.run_map)


def _ipow(x: np.ndarray, k: int) -> np.ndarray:
    """x**k for an integer k >= 0 by repeated multiplication (numpy's complex power is slow)."""
    if k == 0:
        return np.ones_like(x)
    out = x.copy()
    for _ in range(k - 1):
        out *= x
    return out


def _ipow_inplace(x: np.ndarray, k: int) -> None:
    """x <- x**k in place (k >= 1)."""
    if k == 1:
        return
    if k == 2:
        x *= x
        return
    base = x.copy()
    for _ in range(k - 1):
        x *= base


def _step(f, H_prev, Kh, q, D, T, N):
    """One recursion step; returns (L_m, V_m, dev) with H_m = exp((D-1) L_m)."""
    v = f * H_prev if H_prev is not None else f.copy()
    V = T(v)
    dev = abs(V[0] - 1.0)
    W = _ipow(V, q - 1)
    W *= Kh
    T(W)
    W /= N  # = message - 1
    return complex_log1p(W), V, dev


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
    """
    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    g, b = check_angles(gamma, beta)
    p = g.size
    if contour == "growing":
        return _evaluate_growing(q, D, g, b, gradient, run_map, n_high, t0)
    if contour != "full":
        raise ValueError(f"unknown contour {contour!r}; choose 'growing' or 'full'")
    n = n_sites(p)
    N = 1 << n
    T = _Transformer(N, run_map, n_high)

    f = path_weights(p, b)
    phase = phase_vector(g)
    Kh = -2.0 * np.sin(phase / 4.0) ** 2  # K - 1, exact form
    T(Kh)
    if not gradient:
        del phase

    tol = sum_fH_tolerance(p, D)
    if gradient:
        per_vec = 16 * N
        if memory_budget_bytes is None or (p + 1) * per_vec <= memory_budget_bytes:
            stride = 1
        else:
            stride = max(1, int(math.ceil(math.sqrt(p))))
    else:
        stride = None
    stored: dict[int, np.ndarray] = {}

    def checked(dev, m):
        if not dev <= tol:
            raise SparseIntegrityError(
                f"step {m} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {tol:.1e})"
            )
        return dev

    dev_max = 0.0
    L = None
    H = None
    if gradient:
        for m in range(1, p + 1):
            L, V, dev = _step(f, H, Kh, q, D, T, N)
            del V
            dev_max = max(dev_max, checked(dev, m))
            H = np.exp((D - 1.0) * L)
            if m % stride == 0 or m == p:
                stored[m] = L
    else:
        # value only: one working vector, every operation in place
        H = f.copy()
        for m in range(1, p + 1):
            if m > 1:
                H *= f  # v = f H_{m-1}
            T(H)  # V_m
            dev_max = max(dev_max, checked(abs(H[0] - 1.0), m))
            _ipow_inplace(H, q - 1)
            H *= Kh
            T(H)
            H /= N  # message - 1
            complex_log1p(H, out=H)
            H *= D - 1.0
            np.exp(H, out=H)  # H_m

    # root constraint
    H_p = H if gradient else None
    if gradient:
        u = f * H
    else:
        H *= f
        u = H
        del f
    root_norm = abs(u.sum() - 1.0)
    dev_max = max(dev_max, checked(root_norm, p + 1))
    _flip_time0(u, p)
    U = T(u)
    del H
    if not gradient:
        del Kh
    Sh = np.sin(phase_vector(g) / 2.0)
    T(Sh)
    if gradient:
        Y = _ipow(U, q)
    else:
        _ipow_inplace(U, q)
        Y = U
    corr = 1j * np.dot(Y, Sh) / N
    del Y
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}

    grad = None
    if gradient:
        grad = _backward(q, D, p, N, g, b, f, phase, Kh, Sh, H_p, U, stored, stride, T, residuals)

    return _result(q, D, g, b, corr, residuals, grad, t0, T.count)


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


def _backward(q, D, p, N, g, b, f, phase, Kh, Sh, H_p, U, stored, stride, T, residuals):
    """Reverse sweep (holomorphic adjoints; the value is real for real angles)."""
    n = n_sites(p)
    # nu = 1/2 + (i / 2N) sum_k U^q Sh
    coef = 0.5j / N
    Ubar = _ipow(U, q - 1)
    Shbar = (coef * Ubar) * U
    Ubar *= coef * q
    Ubar *= Sh
    ubar = T(Ubar)  # adjoint of W is W
    _flip_time0(ubar, p)  # u = f H a0
    fbar = ubar * H_p
    Hbar = ubar * f
    del ubar
    Khbar = np.zeros(N, dtype=complex)

    cache = stored  # checkpoints; entries are dropped once the sweep is below them

    def get_L(m):
        """L_m (None for m = 0, H_0 = 1), recomputing from the last checkpoint."""
        if m == 0:
            return None
        if m not in cache:
            c = max(k for k in list(cache) + [0] if k < m)
            H = None if c == 0 else np.exp((D - 1.0) * cache[c])
            for k in range(c + 1, m + 1):
                Lk, _, _ = _step(f, H, Kh, q, D, T, N)
                cache[k] = Lk
                H = np.exp((D - 1.0) * Lk)
        return cache[m]

    for m in range(p, 0, -1):
        L_m = get_L(m)
        L_prev = get_L(m - 1)
        H_prev = None if L_prev is None else np.exp((D - 1.0) * L_prev)
        # H_m = exp((D-1) log1p(mm1)) -> mm1bar = Hbar (D-1) exp((D-2) L_m)
        Xbar = Hbar * ((D - 1.0) * np.exp((D - 2.0) * L_m))
        del Hbar
        T(Xbar)
        Xbar /= N  # mm1 = W(X)/N
        v = f * H_prev if H_prev is not None else f.copy()
        V = T(v)
        if q > 2:
            Vq2 = _ipow(V, q - 2)
            Khbar += Xbar * (Vq2 * V)
            Vbar = Xbar * Kh
            Vbar *= (q - 1) * Vq2
            del Vq2
        else:
            Khbar += Xbar * V
            Vbar = Xbar * Kh
        del V, Xbar
        vbar = T(Vbar)
        if H_prev is not None:
            fbar += vbar * H_prev
        else:
            fbar += vbar
        Hbar = vbar * f
        del vbar
        for k in [k for k in cache if k >= m]:  # no longer needed below step m
            cache.pop(k)

    # gamma: through Kh = W(cos(phase/2) - 1) and Sh = W(sin(phase/2))
    T(Khbar)
    T(Shbar)
    phasebar = Shbar * (0.5 * np.cos(phase / 2.0)) - Khbar * (0.5 * np.sin(phase / 2.0))
    del Khbar, Shbar
    Gam_bar = _site_sums(phasebar, n)
    gamma_bar = Gam_bar[:p] - Gam_bar[n - 1 : p : -1]
    # beta: d f / d b_t (a) = sigma_t i f(a with the link-t spin product flipped)
    beta_bar = np.zeros(p, dtype=complex)
    for t in range(2 * p):
        block = 1 << (n - 1 - t)
        flipped = f.reshape(-1, block)[:, ::-1]
        beta_bar[link_beta_index(p, t)] += link_sign(p, t) * 1j * np.sum(fbar.reshape(-1, block) * flipped)
    residuals["imag_gradient"] = float(max(np.max(np.abs(gamma_bar.imag)), np.max(np.abs(beta_bar.imag))))
    return {"gamma": gamma_bar.real.copy(), "beta": beta_bar.real.copy()}


#: transforms shorter than this run in the calling process even when a run_map is
#: given (unless an explicit ``n_high`` asks for the split): a split transform costs
#: two map round trips, more than the arithmetic of a vector of 2^20 points (about
#: 10 ms in-process on the 2-core development machine)
SPLIT_MIN_POINTS = 1 << 20


class _Transformers:
    """A :class:`_Transformer` per vector length (the growing contour's sizes); one call count.

    :meth:`inplace` is the in-process transform of the growing contour: in place, with
    small scratch buffers (no full-size scratch).
    """

    def __init__(self, run_map: RunMap | None, n_high: int | None):
        self.run_map = run_map
        self.n_high = n_high
        self._by_size: dict[int, _Transformer] = {}
        self._scratch: tuple[np.ndarray, np.ndarray] | None = None
        self._inplace_calls = 0

    def _get(self, N: int) -> "_Transformer":
        T = self._by_size.get(N)
        if T is None:
            n = N.bit_length() - 1
            # an explicit layout asks for the split at every length it fits
            wanted = N >= SPLIT_MIN_POINTS or (self.n_high is not None and self.n_high <= n)
            run_map = self.run_map if wanted else None
            high = self.n_high if self.n_high is not None and self.n_high <= n else None
            T = self._by_size[N] = _Transformer(N, run_map, high, blocked=True)
        return T

    def __call__(self, x: np.ndarray) -> np.ndarray:
        return self._get(x.size)(x)

    def inplace(self, x: np.ndarray) -> np.ndarray:
        """Transform of the complex vector x in place (in-process: :func:`wht_inplace` with
        two small scratch buffers shared by all lengths); returns x."""
        T = self._get(x.size)
        if T.run_map is not None or x.dtype != np.complex128 or x.ndim != 1:
            return T(x)
        self._inplace_calls += 1
        n = x.size.bit_length() - 1
        need = max(1 << min(n, ROW_BITS), 1 << min(n, BLOCK_BITS), 1 << max(n - ROW_BITS, 0))
        if self._scratch is None or self._scratch[0].size < need:
            self._scratch = (np.empty(need, dtype=complex), np.empty(need, dtype=complex))
        return wht_inplace(x, self._scratch)

    @property
    def count(self) -> int:
        return sum(T.count for T in self._by_size.values()) + self._inplace_calls


def _half_chain(m: int, beta) -> np.ndarray:
    """f(a) of the depth-m contour for the paths with a_1 = +1, shape (2^(2m),) complex."""
    fh, fl = _chain_tables(m, beta, 0)
    return fl[0] * fh[0]


def _flip_time0_half(vec: np.ndarray, p: int) -> None:
    """vec(a) *= a_0 on a half vector (time 0 is site p: bit p from the LSB)."""
    vec.reshape(1 << (p - 1), 2, 1 << p)[:, 1, :] *= -1


def _chain_beta_bar(cbar, chain, m, first_link, beta_bar, fixed_first=True):
    """beta_bar += d/db of sum cbar * chain, for a chain vector over consecutive contour sites.

    ``chain`` holds the product of the links ``first_link ..`` over its sites (site
    order MSB first); with ``fixed_first`` its first site is fixed (+1, not in the
    index: one link per index bit), else every site is in the index.  d L_t(d) / db = sigma_t i L_t(1 - d), i.e. the chain with every spin
    after link t flipped (a block reversal of the index); no division.
    """
    nlinks = chain.size.bit_length() - 1 - (0 if fixed_first else 1)
    for u in range(nlinks):
        t = first_link + u
        block = 1 << (nlinks - u)
        flipped = chain.reshape(-1, block)[:, ::-1]
        beta_bar[link_beta_index(m, t)] += link_sign(m, t) * 1j * np.sum(cbar.reshape(-1, block) * flipped)


#: elementwise work on the growing contour runs over chunks of about 2^CHUNK_BITS points
#: (1 MiB of complex numbers): the temporaries stay in cache and none of them is full-size
CHUNK_BITS = 16


def _kron_pairs(pairs, dtype=float) -> np.ndarray:
    """Kronecker product of 2-vectors (first pair = most significant bit), shape (2^len,)."""
    out = np.ones(1, dtype=dtype)
    for pr in pairs:
        out = np.multiply.outer(out, np.asarray(pr, dtype=dtype)).reshape(-1)
    return out


def _popcounts(nbits: int) -> np.ndarray:
    """popcount(i) for i in 0..2^nbits-1, int64."""
    out = np.zeros(1, dtype=np.int64)
    for _ in range(nbits):
        out = np.add.outer(out, np.array([0, 1], dtype=np.int64)).reshape(-1)
    return out


def _kron_env(T: np.ndarray, pairs, dpairs) -> np.ndarray:
    """e[s] = sum_k T[k] prod_{s' != s} pairs[s'][k_s'] * dpairs[s][k_s] for every site s.

    T has 2^len(pairs) entries (first pair = most significant bit).  Divide and
    conquer: contracting one half of the sites with its Kronecker factor leaves a
    vector over the other half; two passes over T, then vectors of sqrt size.
    """
    n = len(pairs)
    if n == 0:
        return np.zeros(0, dtype=T.dtype)
    if n == 1:
        return np.array([T @ np.asarray(dpairs[0])])
    a = n // 2
    T2 = T.reshape(1 << a, 1 << (n - a))
    hi = _kron_pairs(pairs[:a])
    lo = _kron_pairs(pairs[a:])
    return np.concatenate([_kron_env(T2 @ lo, pairs[:a], dpairs[:a]), _kron_env(hi @ T2, pairs[a:], dpairs[a:])])


class _PhaseSpectrum:
    """Closed-form spectrum of cos(phase/2) - 1 (``kind="cos"``) or sin(phase/2) (``"sin"``)
    on the half index of a depth-m contour, times ``scale``, generated in rows.

    phase(c) = sum_s Gamma_s c_s, so E(c) = exp(i phase(c)/2) is a product over the sites and
    its full transform is the product of the one-site transforms: W(E)[k] = prod_s w_s(k_s),
    w_s(0) = 2 cos(theta_s), w_s(1) = 2i sin(theta_s), theta_s = Gamma_s/2.  cos and sin of
    phase/2 are the even and odd parts of E: W(cos)[k] = W(E)[k] on even |k|, W(sin)[k] =
    W(E)[k]/i on odd |k|.  The half index k' (sites 2..n) stands for the wave vector whose
    first bit makes the weight even (cos) or odd (sin) -- the spectra the flipped recursion
    uses -- so with j = |k'| and u_s = (2 cos theta_s, 2 sin theta_s):

        W(cos)[k'] = sK(j mod 4) u_1(j mod 2)     prod_{s>=2} u_s(k'_s),  sK = (+1, -1, -1, +1)
        W(sin)[k'] = sS(j mod 4) u_1(1 - j mod 2) prod_{s>=2} u_s(k'_s),  sS = (+1, +1, -1, -1)

    Real, exact to rounding in relative terms, and no transform is needed.  The one entry
    where cos - 1 differs, k' = 0, is N (prod_s cos theta_s - 1), taken as
    N expm1(sum_s log1p(-2 sin^2(theta_s/2))) so that it keeps its relative precision when
    every angle is small (large D).  Row h (the high index, 2^b points) is
    ``hi[h] * lo[res[h]]``: the product over the high sites times one of four tables over
    the low sites, chosen by the high sites' weight mod 4.  :meth:`accumulate` and
    :meth:`theta_bar` give the adjoint: d/d theta_s of sum(bar * spectrum).
    """

    _CASES = {"cos": ((1.0, 0), (-1.0, 1), (-1.0, 0), (1.0, 1)), "sin": ((1.0, 1), (1.0, 0), (-1.0, 1), (-1.0, 0))}

    def __init__(self, gamma, kind: str, scale: float, b: int):
        theta = 0.5 * gamma_vector(gamma)
        n = theta.size
        self.b = b = min(b, n - 1)
        self.a = a = n - 1 - b
        self.kind = kind
        self.scale = scale
        self.u = np.stack([2.0 * np.cos(theta), 2.0 * np.sin(theta)], axis=1)
        self.du = np.stack([-2.0 * np.sin(theta), 2.0 * np.cos(theta)], axis=1)
        self.hi = _kron_pairs(self.u[1 : a + 1]) * scale
        self.res = _popcounts(a) % 4
        self.ulo = _kron_pairs(self.u[a + 1 :])
        self.pop = _popcounts(b) % 4
        first = self._first(self.u[0])
        self.lo = np.stack([self.ulo * first[(r + self.pop) % 4] for r in range(4)])
        self.fix0 = None
        if kind == "cos":
            cos_t = np.cos(theta)
            if np.all(cos_t > 0):  # every factor in (0, 1]: through logs, exact near 1
                prod_m1 = math.expm1(float(np.sum(np.log1p(-2.0 * np.sin(0.5 * theta) ** 2))))
            else:  # some |theta| >= pi/2: the product is far from 1, no cancellation to avoid
                prod_m1 = float(np.prod(cos_t)) - 1.0
            self.fix0 = scale * float(1 << n) * prod_m1
        self._Q = None

    def _first(self, u0) -> np.ndarray:
        return np.array([sign * u0[which] for sign, which in self._CASES[self.kind]])

    def rows(self, h0: int, G: int, out: np.ndarray) -> np.ndarray:
        """Rows h0 .. h0+G-1 into ``out`` (>= G 2^b floats); returns the (G, 2^b) view."""
        out = out[: G << self.b].reshape(G, 1 << self.b)
        np.multiply(self.lo[self.res[h0 : h0 + G]], self.hi[h0 : h0 + G, None], out=out)
        if h0 == 0 and self.fix0 is not None:
            out[0, 0] = self.fix0
        return out

    def full(self) -> np.ndarray:
        return self.rows(0, 1 << self.a, np.empty(1 << (self.a + self.b))).reshape(-1).copy()

    def accumulate(self, h0: int, bar: np.ndarray) -> None:
        """Add rows h0.. of an adjoint (G, 2^b) complex array to the gradient sums."""
        if self._Q is None:
            self._Q = np.zeros(1 << self.a, dtype=complex)
            self._R = np.zeros((4, 1 << self.b), dtype=complex)
        G = bar.shape[0]
        res = self.res[h0 : h0 + G]
        for r in range(4):
            sel = np.nonzero(res == r)[0]
            if sel.size == 0:
                continue
            rows = bar[sel]
            self._Q[h0 + sel] = rows @ self.lo[r]
            self._R[r] += self.hi[h0 + sel] @ rows

    def theta_bar(self) -> np.ndarray:
        """d/d theta_s of sum(bar * spectrum) over all accumulated rows, shape (n,) complex."""
        n = self.a + self.b + 1
        out = np.zeros(n, dtype=complex)
        if self._Q is None:
            return out
        out[1 : self.a + 1] = self.scale * _kron_env(self._Q, list(self.u[1 : self.a + 1]), list(self.du[1 : self.a + 1]))
        first, dfirst = self._first(self.u[0]), self._first(self.du[0])
        Y = np.zeros(1 << self.b, dtype=complex)
        for r in range(4):
            idx = (r + self.pop) % 4
            Y += self._R[r] * first[idx]
            out[0] += np.dot(self._R[r] * self.ulo, dfirst[idx])
        out[self.a + 1 :] = _kron_env(Y, list(self.u[self.a + 1 :]), list(self.du[self.a + 1 :]))
        return out


def _chain_tables(m: int, beta, a: int):
    """f on the half vector of the depth-m contour (first site +1) as f[h 2^b + l] = fh[h] fl[h & 1, l].

    The chain f(a) = 1/2 prod_t L_t(a_t a_{t+1}) splits at the boundary between the
    high sites 2..a+1 (index h) and the low sites (index l): fh is the chain up to the
    last high site, fl[s] the rest including the boundary link, for that site's bit s.
    """
    from ..exact import chain_weights, link_table

    links = link_table(m, beta)
    n = n_sites(m)
    b = n - 1 - a
    fh = 0.5 * chain_weights(links[:a], a + 1)[: 1 << a]
    rest = chain_weights(links[a + 1 :], b)
    half = rest.size // 2
    fl = np.empty((2, rest.size), dtype=complex)
    fl[0, :half] = rest[:half] * links[a, 0]
    fl[0, half:] = rest[half:] * links[a, 1]
    fl[1, :half] = rest[:half] * links[a, 1]
    fl[1, half:] = rest[half:] * links[a, 0]
    return fh, fl


class _Split:
    """The factors of f lift(H) on the depth-m contour around its middle (steps m >= 3 with
    k = 3 middle sites, the root at p >= 2 with k = 1), and the matrix that turns the
    transform of the outer part into the transform of the whole.

    Index of the half vector: (l, j, h), l = sites 2..c-1 of the outer left part, j the
    ``k`` middle sites, h the outer right sites (c = m-1 in a step: j = time m, merged
    site, time -m, the sites H_{m-1} does not depend on; c = m at the root: j = time 0).
    f = 1/2 A[l] C[s(l), j, t(h)] B[h] with s the last bit of l and t the first of h.  If
    the rest of the summand is P(l, h) (A B H, no j), its transform is

        W(P C)[kl, kj, kh] = 1/4 sum_{al, be} Cc[al, kj, be] W(P)[kl ^ al, kh ^ be]

    (Cc: C transformed over all its bits; ^ flips the last bit of kl / first bit of kh),
    i.e. the (4 2^k) x 4 matrix ``M`` (rows (last bit of kl, kj, first bit of kh)) applied
    to the four quarter-blocks of W(P): one transform of 2^(2m-k) points instead of 2^(2m).
    """

    def __init__(self, m: int, beta, k: int, time0: bool):
        from ..exact import chain_weights, link_table, link_derivative_table

        self.m, self.k = m, k
        links = link_table(m, beta)
        self.dlinks = link_derivative_table(m, beta)
        c = m - 1 if k == 3 else m  # first middle site
        self.c = c
        self.nl, self.nr = c - 1, 2 * m - c - k + 1  # bits of l and h
        self.A = chain_weights(links[: c - 1], c)[: 1 << (c - 1)]
        self.B = chain_weights(links[c + k :], self.nr)
        self.first_mid_link = c - 1
        self.mid_links = links[c - 1 : c + k].copy()
        self.time0 = time0
        self.M = self._matrix(self.mid_links)

    def _tensor(self, rows) -> np.ndarray:
        from ..exact import chain_weights

        C = chain_weights(rows, self.k + 2).reshape(2, 1 << self.k, 2)
        if self.time0:
            C = C * np.array([1.0, -1.0])[None, :, None]
        return C

    def _matrix(self, rows) -> np.ndarray:
        C = self._tensor(rows)
        Hk = _hadamard_block(self.k, 1)
        H2 = _hadamard_block(1, 1)
        Cc = np.einsum("sjt,kj,as,bt->akb", C, Hk, H2, H2)
        M = np.empty((2, 1 << self.k, 2, 2, 2), dtype=complex)
        for a_ in range(2):
            for b_ in range(2):
                for c_ in range(2):
                    for d_ in range(2):
                        M[a_, :, b_, c_, d_] = 0.25 * Cc[a_ ^ c_, :, b_ ^ d_]
        return M.reshape(4 << self.k, 4)

    def matrix_beta_bar(self, Mbar: np.ndarray, beta_bar: np.ndarray) -> None:
        """beta_bar += d/db of sum(Mbar * M) through the middle links."""
        for i in range(self.k + 1):
            rows = self.mid_links.copy()
            rows[i] = self.dlinks[self.first_mid_link + i]
            t = self.first_mid_link + i
            beta_bar[link_beta_index(self.m, t)] += np.sum(Mbar * self._matrix(rows))

    def times_outer(self, X: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """out <- X * 1/2 A[l] B[h] (default: in place), X of shape (2^nl, 2^nr), a few rows at a time."""
        out = X if out is None else out
        A2 = 0.5 * self.A
        for r0, G in _row_groups(X.shape[0], self.nr):
            blk = out[r0 : r0 + G]
            np.multiply(X[r0 : r0 + G], A2[r0 : r0 + G, None], out=blk)
            blk *= self.B
        return out

    def outer_beta_bar(self, R: np.ndarray, beta_bar: np.ndarray) -> None:
        """beta_bar += d/db of sum(R * 1/2 A B) (R of shape (2^nl, 2^nr))."""
        Abar = 0.5 * (R @ self.B)
        Bbar = 0.5 * (self.A @ R)
        _chain_beta_bar(Abar, self.A, self.m, 0, beta_bar)
        _chain_beta_bar(Bbar, self.B, self.m, self.c + self.k, beta_bar, fixed_first=False)


def _row_groups(rows: int, row_bits: int):
    """(r0, G) groups of rows of 2^row_bits points, about 2^CHUNK_BITS points per group."""
    G = max(1, min(rows, (1 << CHUNK_BITS) >> row_bits))
    for r0 in range(0, rows, G):
        yield r0, min(G, rows - r0)


class _Chunk:
    """Preallocated chunk temporaries of ``size`` points."""

    def __init__(self, size: int):
        self.r1 = np.empty(size)
        self.r2 = np.empty(size)
        self.r3 = np.empty(size)
        self.c1 = np.empty(size, dtype=complex)
        self.c2 = np.empty(size, dtype=complex)
        self.c3 = np.empty(size, dtype=complex)


def _ipow_into(x: np.ndarray, k: int, out: np.ndarray) -> np.ndarray:
    """out <- x^k (k >= 0) by multiplication; returns out."""
    if k == 0:
        out[...] = 1.0
        return out
    out[...] = x
    for _ in range(k - 1):
        out *= x
    return out


#: integer degrees up to this D - 1 take H = (1 + z)^(D-1) by multiplication: rounding about
#: (D-1) x 2.2e-16 relative, the same order as the exp/log1p form, at a fraction of its cost
#: (five transcendental functions per point); larger and non-integer degrees use exp/log1p
INT_POWER_MAX = 8


def _int_power(D: float) -> int | None:
    k = D - 1.0
    return int(k) if float(k).is_integer() and 1 <= k <= INT_POWER_MAX else None


def _log_power(A: np.ndarray, D: float, tmp: _Chunk, L_out: np.ndarray | None = None) -> None:
    """A <- (1 + A)^(D-1) in place, chunk by chunk: exp((D-1) log1p(A)) with the accurate
    complex log1p of :func:`complex_log1p`, or by multiplication for small integer D
    (:data:`INT_POWER_MAX`).  ``L_out`` receives what the reverse sweep needs (see
    :func:`_exp_times`): log1p(A), or 1 + A with multiplication."""
    size = min(1 << CHUNK_BITS, A.size)
    k = _int_power(D)
    if k is not None:
        for h in range(A.size // size):
            sl = slice(h * size, (h + 1) * size)
            Ac = A[sl]
            Ac += 1.0
            if L_out is not None:
                L_out[sl] = Ac
            if k > 1:
                base = tmp.c1[:size]
                base[...] = Ac
                _ipow_into(base, k, Ac)
        return
    t, ph, w = tmp.r1[:size], tmp.r2[:size], tmp.r3[:size]
    for h in range(A.size // size):
        Ac = A[h * size : (h + 1) * size]
        x, y = Ac.real, Ac.imag
        np.add(x, 2.0, out=t)
        t *= x
        np.multiply(y, y, out=w)
        t += w
        np.log1p(t, out=t)
        t *= 0.5  # Re log1p(z)
        np.add(x, 1.0, out=w)
        np.arctan2(y, w, out=ph)  # Im log1p(z)
        if L_out is not None:
            Lc = L_out[h * size : (h + 1) * size]
            Lc.real = t
            Lc.imag = ph
        t *= D - 1.0
        ph *= D - 1.0
        np.exp(t, out=t)
        np.cos(ph, out=w)
        w *= t
        np.sin(ph, out=ph)
        ph *= t
        Ac.real = w
        Ac.imag = ph


def _exp_times(x: np.ndarray, L: np.ndarray, D: float, tmp: _Chunk) -> None:
    """x <- x (D-1) (1 + z)^(D-2) in place (the derivative of (1 + z)^(D-1)), chunk by chunk,
    from what :func:`_log_power` kept: L = log1p(z), or 1 + z for small integer D."""
    size = min(1 << CHUNK_BITS, x.size)
    k = _int_power(D)
    e = tmp.c1[:size]
    for h in range(x.size // size):
        sl = slice(h * size, (h + 1) * size)
        if k is not None:
            _ipow_into(L[sl], k - 1, e)
        else:
            np.multiply(L[sl], D - 2.0, out=e)
            np.exp(e, out=e)
        e *= D - 1.0
        x[sl] *= e


def _h_of(L: np.ndarray, D: float) -> np.ndarray:
    """(1 + z)^(D-1) from what :func:`_log_power` kept (a new array)."""
    k = _int_power(D)
    if k is not None:
        return _ipow_into(L, k, np.empty_like(L))
    out = L * (D - 1.0)
    return np.exp(out, out=out)


def _fold_middle(X: np.ndarray, m: int) -> np.ndarray:
    """Sum over the merged middle site's wave-vector bit (bit m of the half index)."""
    X3 = X.reshape(1 << (m - 1), 2, 1 << m)
    return X3[:, 0, :] + X3[:, 1, :]


def _fresh_complex(n: int) -> np.ndarray:
    """An uninitialized complex vector of n points in plain anonymous memory (mmap).

    numpy asks the kernel for transparent huge pages on large arrays; where the kernel
    compacts memory on such faults, the first touch of fresh memory cost more system time
    than the ordinary pages (sparse p = 14, two runs each: 2.2-2.3 s against 4.0-5.8 s).
    """
    import mmap

    return np.frombuffer(mmap.mmap(-1, 16 * max(n, 1)), dtype=complex)[:n]


class _StepData:
    """What the reverse sweep keeps of step m: log1p(message - 1) on the reduced index
    (without the merged site), and the transform of the outer part (split steps)."""

    def __init__(self, L, Phat):
        self.L = L
        self.Phat = Phat


def _evaluate_growing(q, D, g, b, gradient, run_map, n_high, t0) -> SparseEvaluation:
    """The recursion on the growing contour with the global flip (module docstring).

    Flip: f, K and every H_m are even under a -> -a (K = cos(phase/2) and the
    XOR product of flipped paths is flipped), and the root's f H a_0 and
    sin(phase/2) are both odd.  So every vector is kept as its half with the
    first site +1 (2^(2m) points), and the transform of an even (or odd)
    function is twice the half-length transform of its half, supported on the
    wave vectors of even (odd) weight, which the half-length index enumerates
    once each; the transform back of such a spectrum is the plain half-length
    transform.  Sums over the spectrum are sums over the half index.

    Step m (half index of 2^(2m) points, N = 2^(2m+1)), with H_{m-1} kept on the
    2^(2m-3) points it depends on (``H3``, without any merged site):
      P = 1/2 A B H3 (the outer chain factors), W(P) by one transform of 2^(2m-3)
      points, and V_m / 2 = W(f lift(H_{m-1})) rebuilt from its quarter-blocks
      (:class:`_Split`) row by row, never stored whole;
      X = (V_m / 2)^(q-1) (2^(q-1)/N) W(K - 1)   (the spectrum in closed form,
      :class:`_PhaseSpectrum`), summed over the merged site's wave-vector bit at
      once, because H_m does not depend on that site: only half of message - 1 is
      needed, and it is the transform of the folded X (2^(2m-1) points);
      H3_m = exp((D-1) log1p(message - 1)).
    The root is the same with the single middle site (time 0, with the factor a_0)
    and the sum of U^q W(sin(phase/2)) row by row.  Steps and roots below depth 3
    and 2 build the vectors whole (same formulas, no split).
    """
    p = g.size
    T = _Transformers(run_map, n_high)
    tmp = _Chunk(max(1 << CHUNK_BITS, 1 << (p + 3)))  # a row group holds at least one row
    # two buffers for every step from 3 on (prefixes of them; their pages are touched once):
    # the final folded size 2^(2p-1) for X and H, a quarter of it for the outer part
    big = _fresh_complex(1 << (2 * p - 1))
    small = _fresh_complex(1 << max(2 * p - 3, 0))

    dev_max = 0.0
    steps: list[_StepData] = []
    H3 = None
    for m in range(1, p + 1):
        N = 1 << n_sites(m)
        tol = sum_fH_tolerance(m, D)
        if m >= 3:
            sp = _Split(m, b[:m], 3, False)
            s8 = 1 << (2 * m - 3)
            Phat = T.inplace(sp.times_outer(H3, small[:s8].reshape(H3.shape)).reshape(-1))
            del H3
            Xf = big[: 4 * s8]
            spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3)
            rows = 1 << (sp.nl - 1)
            R1 = 1 << (sp.nr - 1)
            Ph4 = Phat.reshape(rows, 4, R1)
            Xf6 = Xf.reshape(rows, 2, 2, 2, 2, R1)
            for r0, G in _row_groups(rows, m + 3):
                w = tmp.c2[: G * 32 * R1].reshape(G, 32, R1)
                np.matmul(sp.M, Ph4[r0 : r0 + G], out=w)
                if r0 == 0:
                    dev = abs(2.0 * w[0, 0, 0] - 1.0)  # V_m[0] = sum_a f H_{m-1} = 1
                X = tmp.c3[: w.size].reshape(G, 32, R1)
                _ipow_into(w, q - 1, X)
                X.view(np.float64).reshape(G, 32 * R1, 2)[...] *= spec.rows(r0, G, tmp.r1)[:, :, None]
                X7 = X.reshape(G, 2, 2, 2, 2, 2, R1)
                np.add(X7[:, :, :, 0], X7[:, :, :, 1], out=Xf6[r0 : r0 + G])
            Phat = Phat.copy() if gradient else None
            del Ph4, Xf6
        else:
            Xf = np.empty(N // 4, dtype=complex)
            v = _half_chain(m, b[:m])
            if H3 is not None:
                v.reshape(1 << (m - 2), 8, 1 << (m - 1))[...] *= H3.reshape(1 << (m - 2), 1, 1 << (m - 1))
            del H3
            w = T.inplace(v)
            dev = abs(2.0 * w[0] - 1.0)
            spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, 2 * m)
            X = _ipow_into(w, q - 1, np.empty_like(w)) * spec.full()
            Xf[...] = _fold_middle(X, m).reshape(-1)
            Phat = None
        if not dev <= tol:
            raise SparseIntegrityError(
                f"step {m} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {tol:.1e})"
            )
        dev_max = max(dev_max, dev)
        Z = T.inplace(Xf)  # message - 1 (independent of the merged site)
        del Xf
        L = np.empty_like(Z) if gradient else None
        _log_power(Z, D, tmp, L)
        if gradient:
            steps.append(_StepData(L, Phat))
        H3 = Z.reshape(1 << (m - 1), 1 << m)  # H3_m: (times 2..m, times -m..-1)
        del Z
    N = 1 << n_sites(p)
    tol = sum_fH_tolerance(p, D)
    coef = 0.5j * float(2**q) / N  # nu = 1/2 + coef sum_k U^q W(sin(phase/2)), U = W(f H a_0)
    root = {}
    if p >= 2:
        sp = _Split(p, b, 1, True)
        sp.times_outer(H3)
        Phat = T.inplace(H3.reshape(-1))
        del H3, small
        rows = 1 << (sp.nl - 1)
        R1 = 1 << (sp.nr - 1)
        Ph4 = Phat.reshape(rows, 4, R1)
        # sum_a f H (the check): W(P C0)[0] with C0 = C without the sign a_0
        C0 = _Split(p, b, 1, False)
        total = (C0.M @ Ph4[0, :, 0])[0]
        spec = _PhaseSpectrum(g, "sin", 1.0, p + 2)
        acc = 0.0
        for r0, G in _row_groups(rows, p + 2):
            U = tmp.c2[: G * 8 * R1].reshape(G, 8, R1)
            np.matmul(sp.M, Ph4[r0 : r0 + G], out=U)
            Y = _ipow_into(U, q, tmp.c3[: U.size].reshape(U.shape))
            acc += np.sum(spec.rows(r0, G, tmp.r1).reshape(G, 8, R1) * Y)
        root = {"split": sp, "Phat": Phat if gradient else None, "spec": spec}
    else:
        Hf = np.repeat(H3.reshape(1, 2), 2, axis=0).reshape(-1)  # (merged site, time -1)
        u = _half_chain(p, b) * Hf
        total = u.sum()
        _flip_time0_half(u, p)
        U = T.inplace(u.copy())
        spec = _PhaseSpectrum(g, "sin", 1.0, 2 * p)
        acc = np.sum(spec.full() * U**q)
        root = {"U": U, "Hf": Hf, "spec": spec}
    root_norm = abs(2.0 * total - 1.0)
    if not root_norm <= tol:
        raise SparseIntegrityError(
            f"root at p = {p}: sum_a f(a) H(a) deviates from 1 by {root_norm:.3e} (allowed {tol:.1e})"
        )
    dev_max = max(dev_max, root_norm)
    corr = 2.0 * coef * acc
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}
    grad = None
    if gradient:
        grad = _backward_growing(q, D, g, b, coef, root, steps, T, tmp, residuals)
    return _result(q, D, g, b, corr, residuals, grad, t0, T.count)


def _outer_adjoint(T, Phat_bar: np.ndarray, L_prev: np.ndarray, D: float, sp, beta_bar) -> np.ndarray:
    """Adjoint of a split step's outer-part transform (in place on ``Phat_bar``): adds the
    outer chain's beta adjoints and returns H3bar of the previous step, flat."""
    Pbar = T.inplace(Phat_bar).reshape(1 << sp.nl, 1 << sp.nr)
    H3 = _h_of(L_prev, D).reshape(Pbar.shape)
    H3 *= Pbar
    sp.outer_beta_bar(H3, beta_bar)
    del H3
    sp.times_outer(Pbar)
    return Pbar.reshape(-1)


def _backward_growing(q, D, g, b, coef, root, steps, T, tmp, residuals):
    """Reverse sweep over the growing contours (holomorphic adjoints), mirroring
    :func:`_evaluate_growing` step by step on the same reduced vectors."""
    p = g.size
    gamma_bar = np.zeros(p, dtype=complex)
    beta_bar = np.zeros(p, dtype=complex)

    def add_theta_bar(theta_bar, m):
        Gam_bar = 0.5 * theta_bar  # theta = Gamma / 2
        n = n_sites(m)
        gamma_bar[:m] += Gam_bar[:m] - Gam_bar[n - 1 : m : -1]

    spec = root["spec"]
    # root: nu = 1/2 + coef sum_k U^q S, S the sin spectrum (unscaled)
    if p >= 2:
        sp = root["split"]
        Phat = root["Phat"]
        rows = 1 << (sp.nl - 1)
        R1 = 1 << (sp.nr - 1)
        Ph4 = Phat.reshape(rows, 4, R1)
        Phat_bar = np.empty_like(Phat)
        Pb4 = Phat_bar.reshape(rows, 4, R1)
        Mbar = np.zeros_like(sp.M)
        for r0, G in _row_groups(rows, p + 2):
            U = tmp.c2[: G * 8 * R1].reshape(G, 8, R1)
            np.matmul(sp.M, Ph4[r0 : r0 + G], out=U)
            S = spec.rows(r0, G, tmp.r1).reshape(G, 8, R1)
            Ubar = _ipow_into(U, q - 1, tmp.c3[: U.size].reshape(U.shape))
            U *= Ubar  # U^q
            U *= coef
            spec.accumulate(r0, U.reshape(G, -1))
            Ubar *= coef * q
            Ubar *= S
            np.matmul(sp.M.T, Ubar, out=Pb4[r0 : r0 + G])
            Mbar += np.tensordot(Ubar, Ph4[r0 : r0 + G], axes=([0, 2], [0, 2]))
        add_theta_bar(spec.theta_bar(), p)
        sp.matrix_beta_bar(Mbar, beta_bar)
        del Phat, Ph4
        H3bar = _outer_adjoint(T, Phat_bar, steps[p - 1].L, D, sp, beta_bar)
        del Phat_bar
    else:
        U = root["U"]
        S = spec.full()
        spec.accumulate(0, (coef * U**q).reshape(1, -1))
        add_theta_bar(spec.theta_bar(), p)
        Ubar = coef * q * U ** (q - 1) * S
        ubar = T.inplace(Ubar)
        _flip_time0_half(ubar, p)
        f = _half_chain(p, b)
        _chain_beta_bar(ubar * root["Hf"], f, p, 0, beta_bar)
        H3bar = (ubar * f).reshape(2, 2).sum(axis=0)  # sum over the merged site
    for m in range(p, 0, -1):
        N = 1 << n_sites(m)
        st = steps[m - 1]
        # H3_m = (1 + Z)^(D-1): Zbar = H3bar (D-1) (1 + Z)^(D-2)
        _exp_times(H3bar, st.L, D, tmp)
        st.L = None
        Xf_bar = T.inplace(H3bar)
        del H3bar
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3 if m >= 3 else 2 * m)
        if m >= 3:
            sp = _Split(m, b[:m], 3, False)
            rows = 1 << (sp.nl - 1)
            R1 = 1 << (sp.nr - 1)
            Ph4 = st.Phat.reshape(rows, 4, R1)
            Phat_bar = np.empty_like(st.Phat)
            Pb4 = Phat_bar.reshape(rows, 4, R1)
            Xb6 = Xf_bar.reshape(rows, 2, 2, 2, 2, R1)
            Mbar = np.zeros_like(sp.M)
            for r0, G in _row_groups(rows, m + 3):
                w = tmp.c2[: G * 32 * R1].reshape(G, 32, R1)
                np.matmul(sp.M, Ph4[r0 : r0 + G], out=w)
                K = spec.rows(r0, G, tmp.r1).reshape(G, 32, R1)
                wq2 = _ipow_into(w, q - 2, tmp.c3[: w.size].reshape(w.shape))  # w^(q-2)
                Xbar = np.broadcast_to(Xb6[r0 : r0 + G][:, :, :, None], (G, 2, 2, 2, 2, 2, R1)).reshape(G, 32, R1)
                w *= wq2  # w^(q-1)
                w *= Xbar
                spec.accumulate(r0, w.reshape(G, -1))  # Kbar = Xbar w^(q-1)
                wq2 *= Xbar
                wq2 *= K
                wq2 *= q - 1.0  # wbar
                np.matmul(sp.M.T, wq2, out=Pb4[r0 : r0 + G])
                Mbar += np.tensordot(wq2, Ph4[r0 : r0 + G], axes=([0, 2], [0, 2]))
            add_theta_bar(spec.theta_bar(), m)
            sp.matrix_beta_bar(Mbar, beta_bar)
            st.Phat = None
            del Ph4, Xb6, Xf_bar
            H3bar = _outer_adjoint(T, Phat_bar, steps[m - 2].L, D, sp, beta_bar)
            del Phat_bar
        else:
            f = _half_chain(m, b[:m])
            v = f.copy()
            if m == 2:
                H3prev = _h_of(steps[0].L, D).reshape(1, 1, 2)
                v.reshape(1, 8, 2)[...] *= H3prev
            w = T.inplace(v)
            Xbar = np.repeat(Xf_bar.reshape(1 << (m - 1), 1, 1 << m), 2, axis=1).reshape(-1)
            K = spec.full()
            spec.accumulate(0, (Xbar * w ** (q - 1)).reshape(1, -1))
            add_theta_bar(spec.theta_bar(), m)
            wbar = Xbar * (q - 1) * w ** (q - 2) * K
            vbar = T.inplace(wbar)
            if m == 2:
                _chain_beta_bar(vbar * np.broadcast_to(H3prev, (1, 8, 2)).reshape(-1), f, m, 0, beta_bar)
                H3bar = (vbar * f).reshape(1, 8, 2).sum(axis=1).reshape(-1)
            else:
                _chain_beta_bar(vbar, f, m, 0, beta_bar)
    residuals["imag_gradient"] = float(max(np.max(np.abs(gamma_bar.imag)), np.max(np.abs(beta_bar.imag))))
    return {"gamma": gamma_bar.real.copy(), "beta": beta_bar.real.copy()}


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


# --------------------------------------------------------------------------- optimizer
@dataclass
class SparseOptimization:
    value: float
    gamma: np.ndarray
    beta: np.ndarray
    p: int
    q: int
    degree: float
    gradient_norm: float
    evaluations: int
    converged: bool
    message: str
    wall_time: float
    history: list

    def to_json(self) -> dict:
        D = self.degree
        return {
            "value": float(self.value),
            "kind": "sparse",
            "p": int(self.p),
            "q": int(self.q),
            "degree": int(D) if float(D).is_integer() else float(D),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "gradient_norm": float(self.gradient_norm),
            "evaluations": int(self.evaluations),
            "restarts": len(self.history),
            "converged": bool(self.converged),
            "message": str(self.message),
            "wall_time_s": float(self.wall_time),
            "history": self.history,
        }


def optimize_sparse(
    q: int,
    degree: float,
    p: int,
    *,
    previous=None,
    previous_value: float | None = None,
    starts=None,
    restarts: int = 3,
    seed: int = 0,
    gtol: float = 1e-8,  # 1e-9 is not always reachable: the value stops changing in double precision first
    maxiter: int = 500,
    evaluate_kw: dict | None = None,
) -> SparseOptimization:
    """Maximize nu_p(D; gamma, beta) with scipy L-BFGS-B and the exact gradient.

    Starts (deterministic for fixed inputs and ``seed``): the explicit ``starts``
    list of (gamma, beta) if given (then only those and ``previous``); else the
    ``previous`` optimum at depth p-1 warm-started by INTERP
    (:func:`leadline.kernels.optimize.interpolate_angles`), a linear ramp with gamma
    scaled by 1/sqrt(D) (common practice for QAOA on regular graphs), and
    ``restarts`` seeded random points.  With ``previous_value`` (nu*_{p-1}) the padded
    start is added as a safety net, so nu*_p >= nu*_{p-1}.  The result is in the canonical form of
    :func:`leadline.kernels.optimize.canonical_angles` for xi = x^q (same symmetries).
    ``gradient_norm`` is the max-norm of the gradient at the optimum.
    """
    from scipy.optimize import minimize

    from ..mixture import parse_mixture
    from ..optimize import canonical_angles, interpolate_angles

    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    if p < 1:
        raise ValueError("depth p must be >= 1")
    evaluate_kw = evaluate_kw or {}
    rng = np.random.default_rng([int(seed), int(p)])
    scale = 1.0 / math.sqrt(D)
    candidates = [(np.asarray(g0, float), np.asarray(b0, float)) for g0, b0 in (starts or [])]
    if previous is not None and len(previous[0]) == p - 1 and p > 1:
        candidates.append(interpolate_angles(*previous))
    elif previous is not None and len(previous[0]) == p:
        candidates.append((np.asarray(previous[0], float), np.asarray(previous[1], float)))
    if starts is None:
        tt = (np.arange(p) + 0.5) / p
        candidates.append((1.2 * scale * tt, 0.6 * (1.0 - tt)))  # linear ramp
        for _ in range(restarts):
            candidates.append((rng.uniform(0.1, 1.2, p) * scale, rng.uniform(0.05, 0.7, p)))
    history = []
    best = None
    evaluations = 0
    if previous is not None and previous_value is not None and len(previous[0]) == p - 1:
        # safety net (as in optimize_depth): the padded start (g_p = b_p = 0) reproduces
        # nu*_{p-1}; it is tried last and only used if every other start ends below it
        padded = (np.append(np.asarray(previous[0], float), 0.0), np.append(np.asarray(previous[1], float), 0.0))
    else:
        padded = None
    for i, (g0, b0) in enumerate(candidates + ([padded] if padded is not None else [])):
        if padded is not None and i == len(candidates) and best is not None and -best[0].fun >= previous_value - 1e-12:
            break
        values = []

        def fun(x):
            nonlocal evaluations
            evaluations += 1
            val, gg, gb = value_and_grad(q, D, x[:p], x[p:], **evaluate_kw)
            values.append(float(val))
            return -val, -np.concatenate([gg, gb])

        x0 = np.concatenate([g0, b0])
        res = minimize(fun, x0, jac=True, method="L-BFGS-B", options={"gtol": gtol, "ftol": 1e-15, "maxiter": maxiter})
        gnorm = float(np.max(np.abs(res.jac)))
        history.append({"start": i, "values": values, "value": float(-res.fun), "evaluations": int(res.nfev), "gradient_norm": gnorm})
        # the highest value; among starts that reach it (within 1e-13) the one nearest a stationary point
        if best is None or -res.fun > -best[0].fun + 1e-13 or (-res.fun >= -best[0].fun - 1e-13 and gnorm < best[1]):
            best = (res, gnorm)
    res, gnorm = best
    # symmetries (g, b) -> (-g, -b) and b_t -> b_t + pi (pi/2 for even q) hold here too
    gamma, beta = canonical_angles(parse_mixture(f"{q}:1"), res.x[:p], res.x[p:])
    return SparseOptimization(
        value=float(-res.fun),
        gamma=gamma,
        beta=beta,
        p=p,
        q=q,
        degree=D,
        gradient_norm=gnorm,
        evaluations=evaluations,
        converged=bool(gnorm <= gtol),  # the largest gradient component within the tolerance asked for
        message=str(res.message),
        wall_time=time.perf_counter() - t0,
        history=history,
    )
