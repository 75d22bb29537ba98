"""Sums and products over the sign patterns of a block of contour sites, shared by both chunk kernels.

The row-by-row kernel (:mod:`._chunks`) and the matrix-product kernel (:mod:`._blocked`) both
build the low side of a pass from these (quadratic forms and link chains over all 2^m patterns
of m sites, split into two blocks) and both enumerate a chunk's high rows with them.  Pattern
order is that of :func:`._contour.sign_patterns` (first site = most significant bit, a set bit
= spin -1).  Imports only the contour layout.
"""

from __future__ import annotations

import numpy as np

from ._contour import chain_weights, sign_patterns

__all__ = [
    "split_low",
    "quadratic_over_patterns",
    "quadratic_split",
    "chain_split",
    "chain_derivative_sums",
    "high_rows",
    "high_chain",
]


def split_low(n_low: int) -> tuple[int, int]:
    """(l1, l2) with l1 + l2 = n_low, l1 >= 1, l1 >= l2 (near-square GEMMs)."""
    l2 = n_low // 2
    return n_low - l2, l2


def quadratic_over_patterns(A: np.ndarray) -> np.ndarray:
    """q(x) = s(x)^T A s(x) over all 2^m patterns of m sites, O(2^m) after O(m^2).

    Sites are added from the last to the first (the new site is the MSB):
    q(a_k, rest) = q(rest) + A_kk + 2 a_k sum_{i>k} A_ki a_i.
    """
    A = np.asarray(A)
    m = A.shape[0]
    q = np.zeros(1, dtype=np.result_type(A.dtype, np.float64))
    lin = [None] * m
    for k in range(m - 1, -1, -1):
        # linear form sum_{i>k} A_ki a_i over the patterns of sites k+1..m-1
        lf = np.zeros(1, dtype=q.dtype)
        for i in range(m - 1, k, -1):
            lf = np.concatenate([lf + A[k, i], lf - A[k, i]])
        lin[k] = lf
        q = np.concatenate([q + A[k, k] + 2 * lf, q + A[k, k] - 2 * lf])
    return q


def quadratic_split(A: np.ndarray, l1: int) -> np.ndarray:
    """q(x) = s(x)^T A s(x) for all patterns of m sites as a (2^l1, 2^(m-l1)) matrix.

    A is (m, m) (symmetric or not: only A + A^T enters).  The sites split in the
    x1 block (first l1) and the x2 block: q = q11(x1) + q22(x2) + 2 s1^T A12s s2,
    the cross term one small matrix product.  Recursive on the blocks.
    """
    A = np.asarray(A)
    m = A.shape[0]
    dtype = np.result_type(A.dtype, np.float64)
    if m <= 4 or l1 == 0 or l1 == m:
        return quadratic_over_patterns(A).astype(dtype).reshape(2**l1, 2 ** (m - l1))
    l2 = m - l1
    q11 = quadratic_split(A[:l1, :l1], (l1 + 1) // 2).reshape(-1)
    q22 = quadratic_split(A[l1:, l1:], (l2 + 1) // 2).reshape(-1)
    cross = (A[:l1, l1:] + A[l1:, :l1].T).astype(dtype)  # (l1, l2)
    S1 = sign_patterns(l1)
    S2 = sign_patterns(l2)
    q = (S1 @ cross).astype(dtype) @ S2.T.astype(dtype)  # (2^l1, 2^l2)
    q += q11[:, None]
    q += q22[None, :]
    return q


def chain_split(links: np.ndarray, l1: int, l2: int) -> np.ndarray:
    """Product of the links inside a block of l1 + l2 sites, as a (2^l1, 2^l2) matrix.

    ``links`` (l1+l2-1, 2): rows of the link table inside the block.  The chain
    factorizes as F1(x1) * L_mid(last x1 spin, first x2 spin) * F2(x2).
    """
    F1 = chain_weights(links[: l1 - 1], l1)
    if l2 == 0:
        return F1.reshape(-1, 1).copy()
    F2 = chain_weights(links[l1:], l2)
    mid = links[l1 - 1]
    # last x1 spin is the x1 LSB; first x2 spin is the x2 MSB; equal spins -> mid[0]
    a = np.arange(2**l1) & 1
    b = np.arange(2**l2) >> (l2 - 1)
    Lm = np.where(a[:, None] == b[None, :], mid[0], mid[1])
    out = F1[:, None] * F2[None, :]
    out *= Lm
    return out


def chain_derivative_sums(u0: np.ndarray, links: np.ndarray, dlinks: np.ndarray) -> np.ndarray:
    """D_t = sum_x u0(x) * (d/db_t prod_k L_k(x_k x_{k+1})) for the links inside a block.

    ``links``/``dlinks`` have shape (m-1, 2) for a block of m sites.  Computed
    with left environments (partial contractions of u0 with the first links)
    and right chains, O(2^m) in total, never dividing by a link factor.
    Returns shape (m-1,).
    """
    N = u0.shape[0]
    m = N.bit_length() - 1
    nl = m - 1
    out = np.zeros(nl, dtype=complex)
    if nl == 0:
        return out
    # right chains R_k over sites k..m-1 (pattern order, site k = MSB)
    right = [None] * (m + 1)
    r = np.ones(2, dtype=complex)
    right[m - 1] = r
    for k in range(m - 2, -1, -1):
        n = r.size
        half = n // 2
        new = np.empty(2 * n, dtype=complex)
        new[:half] = r[:half] * links[k, 0]
        new[half:n] = r[half:] * links[k, 1]
        new[n : n + half] = r[:half] * links[k, 1]
        new[n + half :] = r[half:] * links[k, 0]
        r = new
        right[k] = r
    env = u0.astype(complex)  # over sites t..m-1, leading sites summed with their links
    for t in range(nl):
        # env has shape (2^(m-t),): site t is the MSB, site t+1 the next bit
        e = env.reshape(2, 2, -1)  # [a_t, a_{t+1}, rest]
        # derivative of link t: x = a_t a_{t+1}; same (0) for (+,+),(-,-)
        rr = right[t + 1].reshape(2, -1)  # [a_{t+1}, rest]
        same = (e[0, 0] * rr[0]).sum() + (e[1, 1] * rr[1]).sum()
        diff = (e[0, 1] * rr[1]).sum() + (e[1, 0] * rr[0]).sum()
        out[t] = dlinks[t, 0] * same + dlinks[t, 1] * diff
        # absorb site t with link t into the environment
        env = (e[0] * np.array([links[t, 0], links[t, 1]])[:, None]
               + e[1] * np.array([links[t, 1], links[t, 0]])[:, None]).reshape(-1)
    return out


def high_rows(plan: ChunkPlan, chunk: int) -> np.ndarray:
    start, stop = plan.rows(chunk)
    h = plan.n_high
    y = np.arange(start, stop, dtype=np.int64)[:, None]
    bits = (y >> np.arange(h - 1, -1, -1, dtype=np.int64)[None, :]) & 1
    return (1 - 2 * bits).astype(np.float64)


def high_chain(AH: np.ndarray, links: np.ndarray) -> np.ndarray:
    """1/2 * prod of the links inside the high block, per row; (c,) complex."""
    c, h = AH.shape
    fh = np.full(c, 0.5, dtype=complex)
    for t in range(h - 1):
        same = AH[:, t] == AH[:, t + 1]
        fh *= np.where(same, links[t, 0], links[t, 1])
    return fh
