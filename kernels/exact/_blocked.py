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
marginal of W s needs three products (nine in all).  Three of them (B K2,
B^T R0 and R K2^T) do not involve s and are the forward pass's own at the same
M: they are reused from bounded in-process tapes (:class:`ProductCache`:
PRODUCTS and COLUMNS), so an adjoint pass costs six products after its forward
pass ran in the same process (nine on a miss, same result).  The
last adjoint pass of a gradient has M = 0; there the products collapse to sums.

Layout: work arrays are (pattern, row) -- the chunk's rows on the contiguous
axis -- so Kronecker builds and bit reductions stream through memory and BLAS
takes the transposes for free.

Nothing here is approximate: every number is the same finite sum of the same
products as in the row kernel, added in a different order.
"""

from __future__ import annotations

import numpy as np

from ._contour import chain_weights, sign_patterns
from ._patterns import chain_derivative_sums, chunk_log_scale, high_chain, high_rows, row_log_scale, split_low, unscale

__all__ = [
    "chunk_partial_blocked",
    "second_moments_fast",
    "low_matrices",
    "ProductCache",
    "PRODUCTS",
    "COLUMNS",
    "tape_capacity_bytes",
]


# --------------------------------------------------------------------------- pattern builders
def _kron_t(first: np.ndarray, rest: np.ndarray | None, op=np.multiply) -> np.ndarray:
    """Kronecker combination of per-row 2-vectors in transposed layout, (2^m, c).

    ``first`` (2, c) is site 0 (the most significant bit of the pattern index),
    ``rest`` (m-1, 2, c) sites 1..m-1 or None.  out[x, y] = op-combination over
    sites k of pair_k[bit_k(x), y]; the row index y is the contiguous axis.
    """
    out = first
    c = first.shape[1]
    if rest is None or rest.shape[0] == 0:
        return first.copy()  # callers modify the result in place
    for k in range(rest.shape[0]):
        out = op(out[:, None, :], rest[k][None, :, :]).reshape(-1, c)
    return out


def _exp_pairs_t(v: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """(m, 2, c): exp(v - shift) for spin +1 and exp(-v - shift) for spin -1; v is (c, m)."""
    vt, st = v.T, shift.T
    return np.stack([np.exp(vt - st), np.exp(-vt - st)], axis=1)


def _add_pairs_t(t: np.ndarray) -> np.ndarray:
    """(m, 2, c): +t for spin +1 and -t for spin -1; t is (c, m)."""
    tt = t.T
    return np.stack([tt, -tt], axis=1)


def _linear_t(t: np.ndarray, base: np.ndarray) -> np.ndarray:
    """out[x, y] = base[y] + sum_k t[y,k] s_k(x), (2^m, c)."""
    c, m = t.shape
    if m == 0:
        return base[None, :].astype(np.result_type(t.dtype, base.dtype, np.float64))
    pairs = _add_pairs_t(t)
    first = pairs[0] + base[None, :]
    return _kron_t(first, pairs[1:] if m > 1 else None, np.add)


def bit_sums_t(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Column totals and signed first moments over the bits of the row index.

    X : (2^m, c).  Returns total (c,) and mom (c, m), mom[:, k] = sum_x X[x, :] s_k(x)
    (site 0 = most significant bit).  Pairwise reduction, contiguous inner loops.
    """
    N, c = X.shape
    m = N.bit_length() - 1
    mom = np.empty((c, m), dtype=X.dtype)
    T = X
    for k in range(m - 1, -1, -1):
        Tr = T.reshape(2**k, 2, c)
        even, odd = Tr[:, 0, :], Tr[:, 1, :]
        mom[:, k] = even.sum(axis=0) - odd.sum(axis=0)
        T = even + odd
    return T[0], mom


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
    h = plan.n_high
    mats["F1"] = chain_weights(low.links[h : h + l1 - 1], l1)
    mats["F2"] = chain_weights(low.links[h + l1 :], l2) if l2 else np.ones(1, dtype=complex)
    if low.s_ll is not None:
        B = mats["B"]
        s = low.s_ll.reshape(shape)
        Bs = B * s
        mats["s"] = s
        mats["Bs"] = Bs
        mats["trivial"] = not np.any(inp.M)
        if mats["trivial"]:
            # M = 0: E = 1 and the cross factors are 1; the products collapse to sums
            mats["b1"] = B.sum(axis=1)
            mats["bs1"] = Bs.sum(axis=1)
            mats["BS2"] = B @ mats["S2"]  # (2^l1, l2)
            halves = B.reshape(2, 2 ** (l1 - 1), 2**l2)
            mats["Bh"] = halves.sum(axis=1)  # (2, 2^l2)
            mats["Bsh"] = Bs.reshape(2, 2 ** (l1 - 1), 2**l2).sum(axis=1)
            S1h = mats["S1"].reshape(2, 2 ** (l1 - 1), l1)
            mats["BS1h"] = np.stack([halves[a].T @ S1h[a] for a in (0, 1)])  # (2, 2^l2, l1)
        else:
            mats["Es"] = E * s
            mats["BBs_cols"] = np.concatenate([B, Bs], axis=1)  # (2^l1, 2^(l2+1))
            mats["BBs_rows"] = np.concatenate([B, Bs], axis=0)  # (2^(l1+1), 2^l2)
    low.extra[key] = mats
    return mats


def _low_link_derivatives(V: np.ndarray, mats: dict, links: np.ndarray, dlinks: np.ndarray) -> np.ndarray:
    """D_t = sum_x V(x) d/db_t (low chain)(x) for the l-1 links inside the low block.

    V is (2^l1, 2^l2) without the low chain.  The chain is F1(x1) L_mid F2(x2):
    links inside x1 see the x1-marginal of V L_mid F2, links inside x2 the
    x2-marginal of F1 L_mid V, the middle link the 2 x 2 table over its two
    spins -- two passes over V, never dividing by a link factor.
    """
    l1, l2 = mats["l1"], mats["l2"]
    if l2 == 0:
        return chain_derivative_sums(V.reshape(-1), links, dlinks)
    I, J = 2 ** (l1 - 1), 2 ** (l2 - 1)
    V4 = V.reshape(I, 2, 2, J)  # [x1 high bits, last x1 spin, first x2 spin, x2 low bits]
    F1r = mats["F1"].reshape(I, 2)
    F2r = mats["F2"].reshape(2, J)
    Y = np.einsum("iabj,bj->iab", V4, F2r)
    Z = np.einsum("ia,iabj->abj", F1r, V4)
    mid, dmid = links[l1 - 1], dlinks[l1 - 1]
    Lm = np.array([[mid[0], mid[1]], [mid[1], mid[0]]])
    dLm = np.array([[dmid[0], dmid[1]], [dmid[1], dmid[0]]])
    D = np.empty(l1 + l2 - 1, dtype=complex)
    D[: l1 - 1] = chain_derivative_sums(np.einsum("iab,ab->ia", Y, Lm).reshape(-1), links[: l1 - 1], dlinks[: l1 - 1])
    D[l1 - 1] = np.einsum("ia,iab,ab->", F1r, Y, dLm)
    D[l1:] = chain_derivative_sums(np.einsum("abj,ab->bj", Z, Lm).reshape(-1), links[l1:], dlinks[l1:])
    return D


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


def _high_chain_derivatives(AH: np.ndarray, links: np.ndarray, dlinks: np.ndarray) -> np.ndarray:
    """(c, h-1): 1/2 * prod of the high links with link t differentiated, by prefix and
    suffix products (O(c h), no division by a link factor)."""
    c, h = AH.shape
    nl = h - 1
    same = AH[:, :-1] == AH[:, 1:]  # (c, h-1)
    L = np.where(same, links[:nl, 0], links[:nl, 1])
    dL = np.where(same, dlinks[:nl, 0], dlinks[:nl, 1])
    left = np.ones((c, nl + 1), dtype=complex)
    right = np.ones((c, nl + 1), dtype=complex)
    for t in range(nl):
        left[:, t + 1] = left[:, t] * L[:, t]
        right[:, nl - 1 - t] = right[:, nl - t] * L[:, nl - 1 - t]
    return 0.5 * left[:, :nl] * dL * right[:, 1:]


def _env_mib(name: str, default_mib: float) -> int:
    """Bytes from an environment variable in MiB (default if unset or not a number; >= 0)."""
    import os

    try:
        return max(0, int(float(os.environ.get(name, default_mib)) * 2**20))
    except ValueError:
        return int(default_mib * 2**20)


class ProductCache:
    """Bounded in-process memo of a forward pass's base products, for its adjoint pass.

    The adjoint pass at step m uses the same M as forward pass m, so the two
    products that do not involve s (B K2 and B^T R0, per chunk) are the forward
    pass's own -- the "tape" of reverse-mode differentiation.  Kept per
    (M, beta, plan, chunk), least recently used dropped beyond ``max_bytes``
    (default $LEADLINE_PRODUCT_CACHE_MB, 384 MiB; 0 disables it).  A miss only costs the two
    products again; results are the same either way (same code, same inputs).
    Thread-safe (Dask workers run chunks in threads).
    """

    def __init__(self, max_bytes: int | None = None):
        import threading
        from collections import OrderedDict

        if max_bytes is None:
            max_bytes = _env_mib("LEADLINE_PRODUCT_CACHE_MB", 384)
        self.max_bytes = int(max_bytes)
        self._items: "OrderedDict[tuple, tuple]" = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    @staticmethod
    def _key(inp, plan, chunk: int) -> tuple:
        import hashlib

        h = hashlib.blake2b(digest_size=16)
        h.update(np.ascontiguousarray(inp.M, dtype=complex).tobytes())
        h.update(np.ascontiguousarray(inp.beta, dtype=float).tobytes())
        return (h.digest(), int(inp.p), int(plan.n_high), int(plan.rows_per_chunk), int(chunk))

    def put(self, inp, plan, chunk: int, *arrays: np.ndarray) -> None:
        size = sum(a.nbytes for a in arrays)
        if size > self.max_bytes:
            return
        key = self._key(inp, plan, chunk)
        with self._lock:
            old = self._items.pop(key, None)
            if old is not None:
                self._bytes -= sum(a.nbytes for a in old)
            self._items[key] = arrays
            self._bytes += size
            while self._bytes > self.max_bytes and self._items:
                _, dropped = self._items.popitem(last=False)
                self._bytes -= sum(a.nbytes for a in dropped)

    def get(self, inp, plan, chunk: int):
        key = self._key(inp, plan, chunk)
        with self._lock:
            arrays = self._items.get(key)
            if arrays is None:
                self.misses += 1
                return None
            self._items.move_to_end(key)
            self.hits += 1
            return arrays

    def clear(self) -> None:
        with self._lock:
            self._items.clear()
            self._bytes = 0


#: the process-wide product cache used by :func:`chunk_partial_blocked`: the two row
#: products B K2 and B^T R0 of each chunk, (2^l1 + 2^l2) x rows entries
PRODUCTS = ProductCache()
#: the column-sum product R K2^T of each chunk (2^l entries, larger): its own cache,
#: so it never evicts the row products ($LEADLINE_COLUMN_CACHE_MB, default 256 MiB)
COLUMNS = ProductCache(_env_mib("LEADLINE_COLUMN_CACHE_MB", 256))


def tape_capacity_bytes() -> int:
    """Most bytes the two tapes (PRODUCTS + COLUMNS) may hold in one process (for memory limits)."""
    return PRODUCTS.max_bytes + COLUMNS.max_bytes


def chunk_partial_blocked(inp, plan, chunk: int, low) -> np.ndarray:
    """Contribution of one chunk to a pass, (2p+2, 2p+1) complex, by matrix products.

    Work arrays are kept in transposed layout (pattern index first, the chunk's
    rows contiguous), so the Kronecker builds and the bit reductions run along
    contiguous memory and BLAS takes the transposes for free.
    """
    if low.log_ll is not None:
        # a pass in log form (_chunks.needs_log_form) has no shared low-low factor to multiply
        raise ValueError("a pass in log form runs the row kernel (kernels/exact/_chunks.py dispatches it)")
    p, h, l = inp.p, plan.n_high, plan.n_low
    n = 2 * p + 1
    M = np.asarray(inp.M)
    links, dlinks = low.links, low.dlinks
    mats = low_matrices(inp, plan, low)
    l1, l2 = mats["l1"], mats["l2"]
    B = mats["B"]
    half1 = 2 ** (l1 - 1)

    AH = high_rows(plan, chunk)  # (c, h)
    c = AH.shape[0]
    v = -(AH @ M[:h, h:])  # (c, l) cross coefficients
    # exp(v_k s) = exp(|Re v_k|) exp(v_k s - |Re v_k|): every Kronecker factor has
    # modulus <= 1, B = exp(low-low part) * low chain too (shifted by low.ll_shift), and
    # the row scale rides in e_row relative to the chunk's largest, S (as in the row
    # kernel; _patterns.row_log_scale): no factor exceeds 1 in modulus, so no partial
    # product overflows or underflows where the finished weight does not.  The
    # partial is multiplied by exp(S) on return.
    shift = np.abs(v.real)
    e_row = row_log_scale(-0.5 * ((AH @ M[:h, :h]) * AH).sum(axis=1), v, low)
    S = chunk_log_scale(e_row, low)
    exp_hh = np.exp(e_row - S) if S else np.exp(e_row)
    row = high_chain(AH, links) * exp_hh  # (c,)
    last = AH[:, h - 1]
    # boundary link between site h-1 and h: x = aH_last * aL_0; rows: aL_0 = +1, -1
    lbT = np.stack(
        [np.where(last > 0, links[h - 1, 0], links[h - 1, 1]), np.where(last > 0, links[h - 1, 1], links[h - 1, 0])]
    )  # (2, c)
    pairs1 = _exp_pairs_t(v[:, :l1], shift[:, :l1])  # (l1, 2, c)
    rest1 = pairs1[1:] if l1 > 1 else None
    if l2:
        pairs2 = _exp_pairs_t(v[:, l1:], shift[:, l1:])
        K2 = _kron_t(pairs2[0], pairs2[1:] if l2 > 1 else None)  # (2^l2, c)
    else:
        K2 = np.ones((1, c), dtype=complex)

    out = np.zeros((n + 1, n), dtype=complex)
    if inp.adjoint is None:
        # R = row * boundary link * x1 cross factor, folded into the first site's pair
        R0 = _kron_t(pairs1[0] * lbT, rest1)  # (2^l1, c): boundary link * x1 cross factor
        Pb = B @ K2  # (2^l1, c)
        Cb = B.T @ R0  # (2^l2, c)
        PRODUCTS.put(inp, plan, chunk, Pb, Cb)  # the adjoint pass at this M needs them again
        R = R0
        R *= row
        P = R * Pb  # (2^l1, c): sums over x2
        C = K2 * Cb  # (2^l2, c): sums over x1
        C *= row
        U = R @ K2.T  # (2^l1, 2^l2): sums over the rows
        COLUMNS.put(inp, plan, chunk, U)
        u = U * B
        total, mom1 = bit_sums_t(P)
        _, mom2 = bit_sums_t(C)
        mom = np.concatenate([mom1, mom2], axis=1)
        LL = _low_second_moments(u, P.sum(axis=1), C.sum(axis=1), mats)
    else:
        E, F, s_ll, Bs = mats["E"], mats["F"], mats["s"], mats["Bs"]
        trivial = mats["trivial"]
        Gs = 0.5 * (inp.adjoint + inp.adjoint.T)
        s_h = ((AH @ Gs[:h, :h]) * AH).sum(axis=1)
        t = 2.0 * (AH @ Gs[:h, h:])  # (c, l)
        A = _linear_t(t[:, :l1], s_h)  # (2^l1, c): the part of s from high and x1 sites
        T2 = _linear_t(t[:, l1:], np.zeros(c))  # (2^l2, c): the x2 cross part
        if not trivial:
            cached = PRODUCTS.get(inp, plan, chunk)
            Pb, Cb = cached if cached is not None else (B @ K2, None)
            K2T2 = K2 * T2
            # P-type: sums over x2 of K1 K2 B s (no boundary link, no row factor)
            G1 = Pb * A
            G1 += mats["BBs_cols"] @ np.concatenate([K2T2, K2], axis=0)
            P0 = _kron_t(pairs1[0], rest1)  # x1 cross factor only
            P0 *= G1
        else:
            # M = 0: K1 = K2 = 1, E = 1, T2 = S2 t2^T
            P0 = A * mats["b1"][:, None]
            P0 += mats["BS2"] @ t[:, l1:].T
            P0 += mats["bs1"][:, None]
        z_plus = P0[:half1].sum(axis=0)
        z_minus = P0[half1:].sum(axis=0)
        P0[:half1] *= lbT[0]
        P0[half1:] *= lbT[1]
        total0, mom1 = bit_sums_t(P0)
        # C-type: sums over x1 of R0 K2 B s, R0 = boundary link * K1
        if not trivial:
            R0 = _kron_t(pairs1[0] * lbT, rest1)
            RA = R0 * A
            C0 = mats["BBs_rows"].T @ np.concatenate([RA, R0], axis=0)
            C0 += T2 * (Cb if Cb is not None else B.T @ R0)
            C0 *= K2
        else:
            R0 = np.empty((2**l1, c), dtype=complex)
            R0[:half1] = lbT[0]
            R0[half1:] = lbT[1]
            RA = R0 * A
            Bh, Bsh, BS1h = mats["Bh"], mats["Bsh"], mats["BS1h"]
            t1 = t[:, :l1].T
            C0 = T2 * (Bh[0][:, None] * lbT[0] + Bh[1][:, None] * lbT[1])
            for a in (0, 1):
                C0 += (Bh[a][:, None] * s_h + BS1h[a] @ t1 + Bsh[a][:, None]) * lbT[a]
        _, mom2 = bit_sums_t(C0)
        # U-type: sums over rows of row R0 K2 E s (without the low chain)
        R0 *= row
        RA *= row
        if not trivial:
            cachedU = COLUMNS.get(inp, plan, chunk)
            V = cachedU[0] * mats["Es"] if cachedU is not None else R0 @ K2.T
            if cachedU is None:
                V *= mats["Es"]
            X2 = np.concatenate([RA, R0], axis=1) @ np.concatenate([K2, K2T2], axis=1).T
            X2 *= E
            V += X2
            del X2
        else:
            V = (R0 @ t[:, l1:]) @ mats["S2"].T  # R0 T2^T, T2 = S2 t2^T
            V += R0.sum(axis=1)[:, None] * s_ll
            V += RA.sum(axis=1)[:, None]
        total = row * total0
        mom = row[:, None] * np.concatenate([mom1, mom2], axis=1)
        u = F * V
        LL = _low_second_moments(u, P0 @ row, C0 @ row, mats)
        D = np.zeros(2 * p, dtype=complex)
        if h > 1:
            dfh = _high_chain_derivatives(AH, links, dlinks)  # (c, h-1)
            D[: h - 1] = (dfh * (exp_hh * total0)[:, None]).sum(axis=0)
        dlb_plus = np.where(last > 0, dlinks[h - 1, 0], dlinks[h - 1, 1])
        dlb_minus = np.where(last > 0, dlinks[h - 1, 1], dlinks[h - 1, 0])
        D[h - 1] = (row * (dlb_plus * z_plus + dlb_minus * z_minus)).sum()
        if l > 1:
            D[h:] = _low_link_derivatives(V, mats, links[h:], dlinks[h:])
        out[n, : 2 * p] = D

    out[:h, :h] = AH.T @ (total[:, None] * AH)
    hl = AH.T @ mom
    out[:h, h:n] = hl
    out[h:n, :h] = hl.T
    out[h:n, h:n] = LL
    return unscale(out, S)
