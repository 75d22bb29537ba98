"""Walsh-Hadamard transforms of the sparse recursion: radix-2 butterflies, Hadamard matrix
products, the in-place four-step transform with small scratch, the split (row/column chunk)
transform with an injected ``run_map``, and the per-length transformer objects the recursions use."""

from __future__ import annotations

import numpy as np

from ._common import RunMap


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
    columns_inplace(x.reshape(1 << h, B), (s1, s2))
    return x


def columns_inplace(X2: np.ndarray, scratch: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Transform every column of the C-contiguous complex (2^h, W) array ``X2`` over its h row
    bits, in place, a block of columns at a time (about 2^BLOCK_BITS points gathered into a small
    scratch and transformed in cache); returns X2.  ``scratch``: two complex buffers of
    >= max(2^BLOCK_BITS, 2^h) points."""
    rows, W = X2.shape
    h = rows.bit_length() - 1
    if rows != 1 << h:
        raise ValueError(f"{rows} rows is not a power of 2")
    wbits = min(W.bit_length() - 1, max(0, BLOCK_BITS - h))
    w = 1 << wbits
    need = w << h
    if scratch is None or min(s.size for s in scratch) < need:
        scratch = (np.empty(need, dtype=complex), np.empty(need, dtype=complex))
    s1, s2 = scratch
    for j0 in range(0, W, w):
        blk = s1[: w << h]
        blk.reshape(1 << h, w)[...] = X2[:, j0 : j0 + w]
        out = _hadamard_bits(blk, s2[: blk.size], wbits, wbits + h)
        X2[:, j0 : j0 + w] = out.reshape(1 << h, w)
    return X2


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
