"""Contour layout of a depth-p QAOA path and its chain weight f.

Layout (used by every kernel in leadline).  The 2p+1 "times" along the
contour sit at array positions t = 0..2p in the order

    1, 2, ..., p, 0, -p, ..., -1

so position ``p`` is time 0 (see :func:`time0_index`).  The phase vector is

    Gamma = (g_1, ..., g_p, 0, -g_p, ..., -g_1)

A path is one spin's history a in {+1,-1}^{2p+1} in that order, and

    f(a) = 1/2 * prod_{t=0}^{2p-1} L_t(a_t a_{t+1})

with the link factor L_t(x) = cos(b) if x = +1, and sigma_t * i sin(b) if
x = -1, where sigma_t = +1 on the bra side (t < p, b = b_{t+1}) and -1 on the
ket side (t >= p, b = b_{2p-t}).  sum_a f(a) = 1.

Pattern indexing: a block of m consecutive sites is enumerated by an integer
x in [0, 2^m); the block's FIRST site is the most significant bit and a set
bit means spin -1.  :func:`sign_patterns` gives the (2^m, m) table of spins.

Source of the construction: Farhi, Goldstone, Gutmann, Zhou, "The Quantum
Approximate Optimization Algorithm and the Sherrington-Kirkpatrick model at
infinite size", Quantum 6, 759 (2022); Basso, Gamarnik, Mei, Zhou, FOCS 2022
(arXiv:2204.10306) for mixed q.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "n_sites",
    "time0_index",
    "gamma_vector",
    "link_beta_index",
    "link_sign",
    "link_table",
    "link_derivative_table",
    "sign_patterns",
    "chain_weights",
    "path_weights",
    "initial_correlations",
    "check_angles",
]


def n_sites(p: int) -> int:
    """Number of contour sites, 2p+1."""
    return 2 * p + 1


def time0_index(p: int) -> int:
    """Array position of time 0 on the contour (= p)."""
    return p


def check_angles(gamma, beta) -> tuple[np.ndarray, np.ndarray]:
    """Validate and return float arrays (gamma, beta), each of shape (p,)."""
    g = np.asarray(gamma, dtype=float).reshape(-1)
    b = np.asarray(beta, dtype=float).reshape(-1)
    if g.size == 0:
        raise ValueError("need at least one angle pair (depth p >= 1)")
    if g.shape != b.shape:
        raise ValueError(f"gamma has {g.size} angles but beta has {b.size}; they must have the same length p")
    if not (np.all(np.isfinite(g)) and np.all(np.isfinite(b))):
        raise ValueError("angles must be finite numbers")
    return g, b


def gamma_vector(gamma) -> np.ndarray:
    """Gamma = (g_1..g_p, 0, -g_p..-g_1), shape (2p+1,), float."""
    g = np.asarray(gamma, dtype=float).reshape(-1)
    return np.concatenate([g, [0.0], -g[::-1]])


def link_beta_index(p: int, t: int) -> int:
    """0-based index into beta of the angle used by link (t, t+1)."""
    return t if t < p else 2 * p - 1 - t


def link_sign(p: int, t: int) -> int:
    """+1 on the bra side (t < p), -1 on the ket side."""
    return 1 if t < p else -1


def link_table(p: int, beta) -> np.ndarray:
    """Link factors, shape (2p, 2) complex: [t, 0] = L_t(+1), [t, 1] = L_t(-1)."""
    b = np.asarray(beta, dtype=float)
    out = np.empty((2 * p, 2), dtype=complex)
    for t in range(2 * p):
        bt = b[link_beta_index(p, t)]
        out[t, 0] = np.cos(bt)
        out[t, 1] = link_sign(p, t) * 1j * np.sin(bt)
    return out


def link_derivative_table(p: int, beta) -> np.ndarray:
    """d L_t / d b for each link, same shape and layout as :func:`link_table`."""
    b = np.asarray(beta, dtype=float)
    out = np.empty((2 * p, 2), dtype=complex)
    for t in range(2 * p):
        bt = b[link_beta_index(p, t)]
        out[t, 0] = -np.sin(bt)
        out[t, 1] = link_sign(p, t) * 1j * np.cos(bt)
    return out


def sign_patterns(m: int, dtype=np.float64) -> np.ndarray:
    """All spin patterns of m sites, shape (2^m, m); first site = most significant bit."""
    x = np.arange(2**m, dtype=np.int64)[:, None]
    bits = (x >> np.arange(m - 1, -1, -1, dtype=np.int64)[None, :]) & 1
    return (1 - 2 * bits).astype(dtype)


def chain_weights(links: np.ndarray, m: int) -> np.ndarray:
    """Product of consecutive link factors over all patterns of m sites.

    ``links`` has shape (m-1, 2) (rows of :func:`link_table` for the links
    inside the block).  Returns shape (2^m,) complex, pattern order as in
    :func:`sign_patterns`.  Built site by site, O(2^m).
    """
    out = np.ones(2, dtype=complex)  # patterns of the last site alone
    # add sites from the last to the first; the new site becomes the MSB
    for k in range(m - 2, -1, -1):
        n = out.size
        half = n // 2  # site k+1 is the current MSB: spin +1 in [0, half)
        new = np.empty(2 * n, dtype=complex)
        new[:half] = out[:half] * links[k, 0]  # a_k=+1, a_{k+1}=+1
        new[half:n] = out[half:] * links[k, 1]  # a_k=+1, a_{k+1}=-1
        new[n : n + half] = out[:half] * links[k, 1]  # a_k=-1, a_{k+1}=+1
        new[n + half :] = out[half:] * links[k, 0]  # a_k=-1, a_{k+1}=-1
        out = new
    return out


def path_weights(p: int, beta) -> np.ndarray:
    """f(a) for all 2^(2p+1) paths, shape (2^(2p+1),) complex.  Dense: small p only."""
    return 0.5 * chain_weights(link_table(p, beta), n_sites(p))


def initial_correlations(p: int, beta) -> np.ndarray:
    """G_0[j,k] = sum_a f(a) a_j a_k by 2x2 transfer matrices, shape (2p+1, 2p+1) complex.

    Exact and O(p^3); equal to the chunked pass with M = 0.
    """
    n = n_sites(p)
    links = link_table(p, beta)
    Z = np.diag([1.0, -1.0]).astype(complex)
    T = [np.array([[l[0], l[1]], [l[1], l[0]]], dtype=complex) for l in links]
    ones = np.ones(2, dtype=complex)
    G = np.eye(n, dtype=complex)
    for j in range(n):
        # left vector up to and including site j with Z at j
        left = ones.copy()
        for t in range(j):
            left = left @ T[t]
        left = left @ Z
        for k in range(j + 1, n):
            vec = left.copy()
            for t in range(j, k):
                vec = vec @ T[t]
            vec = vec @ Z
            for t in range(k, n - 1):
                vec = vec @ T[t]
            G[j, k] = G[k, j] = 0.5 * vec.sum()
    return G
