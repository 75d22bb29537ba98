"""The chunk kernel as matrix products: one chunk's moments by three GEMMs.

Same contract and output as the row-by-row kernel in :mod:`chunks` (to
rounding), a different factorization of the work.  Split the l low sites
once more into an upper block x1 (l1 sites, the one next to the high block)
and a lower block x2 (l2 sites).  For a high row y the path weight is

    W[y, x1, x2] = R[y, x1] * K2[y, x2] * B[x1, x2]

with R = (high chain * exp(e_HH) * boundary link * exp of the x1 cross term),
K2 = exp of the x2 cross term (a Kronecker product of 2-vectors) and
B = exp(-1/2 aL^T M_LL aL) * (low chain), the same for every chunk.  Every
moment of the chunk is a marginal of this 3-index array, and each marginal
is one complex matrix product:

    P[y, x1] = sum_x2 W = R o (K2 @ B^T)        -> totals, first moments (x1 sites)
    C[y, x2] = sum_x1 W = K2 o (R @ B)          -> first moments (x2 sites)
    u[x1,x2] = sum_y  W = B o (R^T @ K2)        -> second moments of the low sites

so a path visit costs three complex multiply-adds inside BLAS (zgemm) instead
of about a dozen memory-bound elementwise operations.  The backward pass has
s(a) = A(y,x1) + T2(y,x2) + s_LL(x1,x2) (A = s_HH + x1 cross term), and each
marginal of W s needs three products (nine in all).

Nothing here is approximate: every number is the same finite sum of the same
products as in the row kernel, added in a different order.
"""

from __future__ import annotations

import numpy as np

from . import chunks as _chunks

__all__ = ["chunk_partial_blocked", "split_low", "second_moments_fast", "low_matrices"]


def split_low(n_low: int) -> tuple[int, int]:
    """(l1, l2) with l1 + l2 = n_low, l1 >= 1, l1 >= l2 (near-square GEMMs)."""
    l2 = n_low // 2
    return n_low - l2, l2


def _kron_pairs(first: np.ndarray, rest: np.ndarray | None) -> np.ndarray:
    """Kronecker product of per-row 2-vectors: out[y, x] = prod_k pair_k[y, bit_k(x)].

    ``first`` (c, 2) is the pair of site 0 (the most significant bit), ``rest``
    (c, m-1, 2) the pairs of sites 1..m-1 or None.  Built by outer products
    along the contiguous axis, (c, 2^m) complex.
    """
    out = first
    c = first.shape[0]
    if rest is not None:
        for k in range(rest.shape[1]):
            out = (out[:, :, None] * rest[:, k, None, :]).reshape(c, -1)
    return out


def _exp_pairs(v: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """(c, m, 2): [exp(v - shift), exp(-v - shift)] per site (spin +1, -1)."""
    return np.stack([np.exp(v - shift), np.exp(-v - shift)], axis=-1)


def _kron_exp(v: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """out[y, x] = exp(sum_k (v[y,k] s_k(x) - shift[y,k])), (c, 2^m) complex, site 0 = MSB."""
    c, m = v.shape
    if m == 0:
        return np.ones((c, 1), dtype=complex)
    pairs = _exp_pairs(v, shift)
    return _kron_pairs(pairs[:, 0, :], pairs[:, 1:, :])


def _kron_add(t: np.ndarray) -> np.ndarray:
    """out[y, x] = sum_k t[y,k] s_k(x), (c, 2^m), site 0 = MSB."""
    c, m = t.shape
    out = np.zeros((c, 1), dtype=np.result_type(t.dtype, np.float64))
    for k in range(m):
        pair = np.stack([t[:, k], -t[:, k]], axis=-1)  # (c, 2)
        out = (out[:, :, None] + pair[:, None, :]).reshape(c, -1)
    return out


def second_moments_fast(u: np.ndarray) -> np.ndarray:
    """S[j,k] = sum_x u(x) s_j(x) s_k(x) over 2^l patterns, (l, l); about 4 * 2^l additions.

    The degree <= 2 Walsh coefficients, accumulated while the pattern index is
    folded one bit at a time from the last site (least significant bit) on:
    the state holds, per remaining prefix, the sum (column 0), the signed sums
    of each folded site, and of each pair of folded sites.
    """
    N = u.shape[0]
    l = N.bit_length() - 1
    X = u.reshape(N, 1)
    sites: list[int] = []  # folded sites, in column order 1..m
    pairs: list[tuple[int, int]] = []  # folded pairs, columns m+1..
    for k in range(l - 1, -1, -1):
        Xr = X.reshape(-1, 2, X.shape[1])
        e, o = Xr[:, 0, :], Xr[:, 1, :]
        m = len(sites)
        K = X.shape[1]
        new = np.empty((e.shape[0], K + 1 + m), dtype=X.dtype)
        # column layout: [sum, sites..., pairs...] -> [sum, sites..., k, pairs..., (k,i) for i in sites]
        np.add(e[:, : 1 + m], o[:, : 1 + m], out=new[:, : 1 + m])
        np.subtract(e[:, 0], o[:, 0], out=new[:, 1 + m])
        np.add(e[:, 1 + m :], o[:, 1 + m :], out=new[:, 2 + m : 2 + m + len(pairs)])
        np.subtract(e[:, 1 : 1 + m], o[:, 1 : 1 + m], out=new[:, 2 + m + len(pairs) :])
        pairs = pairs + [(k, i) for i in sites]
        sites = sites + [k]
        X = new
    row = X[0]
    S = np.empty((l, l), dtype=u.dtype)
    total = row[0]
    for j in range(l):
        S[j, j] = total
    m = len(sites)
    for idx, (j, k) in enumerate(pairs):
        S[j, k] = S[k, j] = row[1 + m + idx]
    return S


def low_matrices(inp, plan, low) -> dict:
    """Per-pass matrices of the low block for this kernel, cached on ``low.extra``.

    E = exp(-1/2 aL^T M_LL aL), F = low chain, B = E F, all (2^l1, 2^l2);
    S1 (2^l1, l1) and S2 (2^l2, l2) the spin tables of the two sub-blocks;
    backward also s = s_LL and Bs = B s.
    """
    key = "blocked"
    if key in low.extra:
        return low.extra[key]
    from .contour import sign_patterns

    l1, l2 = split_low(plan.n_low)
    shape = (2**l1, 2**l2)
    E = low.exp_ll.reshape(shape)
    F = low.f_low.reshape(shape)
    mats = {
        "l1": l1,
        "l2": l2,
        "E": E,
        "F": F,
        "B": E * F,
        "S1": sign_patterns(l1),
        "S2": sign_patterns(l2).astype(complex),
    }
    if low.s_ll is not None:
        s = low.s_ll.reshape(shape)
        mats["s"] = s
        mats["Bs"] = mats["B"] * s
    low.extra[key] = mats
    return mats


def _low_second_moments(u: np.ndarray, marg1: np.ndarray, marg2: np.ndarray, mats: dict) -> np.ndarray:
    """(l, l) second moments of the low sites from u (2^l1, 2^l2) and its two marginals."""
    l1, l2 = mats["l1"], mats["l2"]
    l = l1 + l2
    S = np.empty((l, l), dtype=complex)
    S[:l1, :l1] = second_moments_fast(marg1)
    if l2:
        S[l1:, l1:] = second_moments_fast(marg2)
        mixed = mats["S1"].T @ (u @ mats["S2"])  # (l1, l2)
        S[:l1, l1:] = mixed
        S[l1:, :l1] = mixed.T
    return S


def chunk_partial_blocked(inp, plan, chunk: int, low) -> np.ndarray:
    """Contribution of one chunk to a pass, (2p+2, 2p+1) complex, by matrix products."""
    p, h, l = inp.p, plan.n_high, plan.n_low
    n = 2 * p + 1
    M = np.asarray(inp.M)
    links, dlinks = low.links, low.dlinks
    mats = low_matrices(inp, plan, low)
    l1, l2 = mats["l1"], mats["l2"]
    B = mats["B"]
    half1 = 2 ** (l1 - 1)

    AH = _chunks._high_rows(plan, chunk)  # (c, h)
    c = AH.shape[0]
    v = -(AH @ M[:h, h:])  # (c, l) cross coefficients
    # exp(v_k s) = exp(|Re v_k|) exp(v_k s - |Re v_k|): every Kronecker factor has
    # modulus <= 1 and the row scale rides in e_hh (as in the row kernel), so no
    # partial product overflows where the full weight does not
    shift = np.abs(v.real)
    e_hh = -0.5 * np.einsum("yi,ij,yj->y", AH, M[:h, :h], AH) + shift.sum(axis=1)
    exp_hh = np.exp(e_hh)
    row = _chunks._high_chain(AH, links) * exp_hh  # (c,)
    last = AH[:, h - 1]
    # boundary link between site h-1 and h: x = aH_last * aL_0
    lb = np.stack(
        [np.where(last > 0, links[h - 1, 0], links[h - 1, 1]), np.where(last > 0, links[h - 1, 1], links[h - 1, 0])],
        axis=-1,
    )  # (c, 2): aL_0 = +1, -1
    pairs1 = _exp_pairs(v[:, :l1], shift[:, :l1])  # (c, l1, 2)
    rest1 = pairs1[:, 1:, :] if l1 > 1 else None
    K2 = _kron_exp(v[:, l1:], shift[:, l1:])  # (c, 2^l2)

    out = np.zeros((n + 1, n), dtype=complex)
    if inp.adjoint is None:
        # R = row * boundary link * x1 cross factor, folded into the first site's pair
        R = _kron_pairs(pairs1[:, 0, :] * lb * row[:, None], rest1)  # (c, 2^l1)
        P = R * (K2 @ B.T)  # (c, 2^l1): sums over x2
        C = K2 * (R @ B)  # (c, 2^l2): sums over x1
        u = R.T @ K2  # (2^l1, 2^l2): sums over the rows
        u *= B
        total, mom1 = _chunks.bit_sums(P)
        _, mom2 = _chunks.bit_sums(C)
        mom = np.concatenate([mom1, mom2], axis=1)
        LL = _low_second_moments(u, P.sum(axis=0), C.sum(axis=0), mats)
    else:
        E, F, s_ll, Bs = mats["E"], mats["F"], mats["s"], mats["Bs"]
        Gs = 0.5 * (inp.adjoint + inp.adjoint.T)
        s_h = np.einsum("yi,ij,yj->y", AH, Gs[:h, :h], AH)
        t = 2.0 * (AH @ Gs[:h, h:])  # (c, l)
        A = _kron_add(t[:, :l1])
        A += s_h[:, None]  # (c, 2^l1): the part of s from high sites and x1 sites
        T2 = _kron_add(t[:, l1:])  # (c, 2^l2)
        K2T = K2 * T2
        K1 = _kron_pairs(pairs1[:, 0, :], rest1)  # x1 cross factor only
        # P-type: sums over x2 of K1 K2 B s (no boundary link, no row factor)
        G1 = K2 @ B.T
        G1 *= A
        G1 += K2T @ B.T
        G1 += K2 @ Bs.T
        P0 = K1 * G1
        z_plus = P0[:, :half1].sum(axis=1)
        z_minus = P0[:, half1:].sum(axis=1)
        P0[:, :half1] *= lb[:, 0:1]
        P0[:, half1:] *= lb[:, 1:2]
        total0, mom1 = _chunks.bit_sums(P0)
        # C-type: sums over x1 of R0 K2 B s, R0 = boundary link * K1
        R0 = _kron_pairs(pairs1[:, 0, :] * lb, rest1)
        RA = R0 * A
        C0 = RA @ B
        C0 += T2 * (R0 @ B)
        C0 += R0 @ Bs
        C0 *= K2
        _, mom2 = _chunks.bit_sums(C0)
        total = row * total0
        mom = row[:, None] * np.concatenate([mom1, mom2], axis=1)
        # U-type: sums over rows of row R0 K2 E s (without the low chain)
        R0 *= row[:, None]
        RA *= row[:, None]
        U0 = R0.T @ K2
        U0 *= s_ll
        U0 += RA.T @ K2
        U0 += R0.T @ K2T
        U0 *= E
        u = F * U0
        LL = _low_second_moments(u, row @ P0, row @ C0, mats)
        D = np.zeros(2 * p, dtype=complex)
        if h > 1:
            dfh = _chunks._high_chain_derivatives(AH, links, dlinks)  # (c, h-1)
            D[: h - 1] = (dfh * (exp_hh * total0)[:, None]).sum(axis=0)
        dlb_plus = np.where(last > 0, dlinks[h - 1, 0], dlinks[h - 1, 1])
        dlb_minus = np.where(last > 0, dlinks[h - 1, 1], dlinks[h - 1, 0])
        D[h - 1] = (row * (dlb_plus * z_plus + dlb_minus * z_minus)).sum()
        if l > 1:
            D[h:] = _chunks._chain_derivative_sums(U0.reshape(-1), links[h:], dlinks[h:])
        out[n, : 2 * p] = D

    out[:h, :h] = AH.T @ (total[:, None] * AH)
    hl = AH.T @ mom
    out[:h, h:n] = hl
    out[h:n, :h] = hl.T
    out[h:n, h:n] = LL
    return out
