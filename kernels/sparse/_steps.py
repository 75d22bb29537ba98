"""Pieces of one recursion step: the chain factors f on the half vector and around the middle
sites (:class:`_Split`), the accurate complex log1p and the power (1 + z)^(D-1) chunk by chunk,
integer powers, row groups and chunk temporaries."""

from __future__ import annotations

import numpy as np

from ..exact import link_beta_index, link_sign, n_sites
from ._transforms import _hadamard_block


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
