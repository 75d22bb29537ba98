"""A plain dense reference for V_p: all 2^(2p+1) paths at once, no chunking.

Written independently of the chunk kernel, straight from the definitions in
Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022) (SK) and Basso, Gamarnik,
Mei, Zhou, FOCS 2022, arXiv:2204.10306 (mixed q): f(a) is built link by link from
an explicit loop over paths' bit patterns, and every step is one einsum over
all paths.  Memory O(p 4^p): use for p <= ~10.
"""

from __future__ import annotations

import numpy as np


def dense_paths(p: int) -> np.ndarray:
    """(2^(2p+1), 2p+1) float array of all spin paths in contour order."""
    n = 2 * p + 1
    idx = np.arange(2**n)
    bits = (idx[:, None] >> np.arange(n - 1, -1, -1)[None, :]) & 1
    return 1.0 - 2.0 * bits


def dense_f(p: int, beta) -> np.ndarray:
    """f(a) for every path: 1/2 prod over links, bra side +i sin, ket side -i sin."""
    a = dense_paths(p)
    b = np.asarray(beta, dtype=float)
    f = np.full(a.shape[0], 0.5, dtype=complex)
    for t in range(2 * p):
        angle = b[t] if t < p else b[2 * p - 1 - t]
        sign = 1.0 if t < p else -1.0
        same = a[:, t] == a[:, t + 1]
        f *= np.where(same, np.cos(angle), sign * 1j * np.sin(angle))
    return f


def dense_value(mixture, gamma, beta, return_all: bool = False):
    """V_p and the list of G_0..G_p by the plain dense iteration."""
    g = np.asarray(gamma, dtype=float)
    p = g.size
    a = dense_paths(p)
    f = dense_f(p, beta)
    Gam = np.concatenate([g, [0.0], -g[::-1]])
    G = np.einsum("x,xj,xk->jk", f, a, a)
    Gs = [G]
    sums = [f.sum()]
    for _ in range(p):
        M = np.outer(Gam, Gam) * mixture.dxi(G)
        w = f * np.exp(-0.5 * np.einsum("xj,jk,xk->x", a, M, a))
        sums.append(w.sum())
        G = np.einsum("x,xj,xk->jk", w, a, a)
        Gs.append(G)
    V = 1j * np.sum(Gam * mixture.xi(G[p, :]))
    if return_all:
        return V, Gs, sums
    return V
