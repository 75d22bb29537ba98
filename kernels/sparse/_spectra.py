"""Phases and their spectra: phase(c) = Gamma . c on all paths (full contour), and the closed-form
transforms of cos(phase/2) - 1 and sin(phase/2) on the growing contour's half index, with their
adjoints (:class:`_PhaseSpectrum`)."""

from __future__ import annotations

import math

import numpy as np

from ..exact import gamma_vector


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
