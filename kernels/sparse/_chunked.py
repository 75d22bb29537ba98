"""The growing-contour recursion on chunked step vectors (past one machine's memory).

The in-memory recursion (``_growing``) holds the step vectors whole.  Here every vector of a
split step (m >= 3: the outer part's transform ``phat`` of 2^(2m-3) points and the step
result ``h{m}`` of 2^(2m-1) points) lives in a *vector store* that the caller injects: a Zarr
array on local disk (out of core), on Dask workers, or in this process (tests).  The numerics
are the same functions as in memory (``build_rows``, ``root_rows``, ``_Split``, the closed-form
spectra), applied band by band.

Layout.  A vector of 2^n points is cut into 2^k *bands*, contiguous ranges of the index
(band i = points i 2^(n-k) .. (i+1) 2^(n-k) - 1).  Its Walsh-Hadamard transform is the
four-step split: every band is transformed over its n-k low bits where it lies (the row
pass), then the k high bits are transformed across bands (the column pass: the exchange,
done by the store -- Dask's rechunk on workers, column blocks read back from disk out of
core).  A store keeps a vector as a (2^B, 2^(n-B)) array, B = n // 2 (:func:`rows_bits`),
so that row bands and column blocks are both at most about the square root of the vector.

The store protocol (:class:`BandStore` is the in-process one; ``cluster.sparse_vectors``
has the Zarr/Dask one) -- all a recursion needs:

    transform(out, row_func, src, out_n, bands, col_func)
        out = W(func(src)) where row_func(band_of_src (flat), i) returns band i of func(src)
        ALREADY transformed over its low bits, and col_func(block) transforms a block of
        columns (2^B rows) over the high bits and applies any elementwise finish
    reduce(func, src, bands) -> [func(band_i, i) for every band], in band order
    values(name, flat_indices) -> array;  put(name, flat);  get(name) -> flat;  drop(name)
    finished() -> (last finished step, its residual max) or (0, 0.0);  finish(m, residual)

Checkpoints: ``finish(m, ...)`` is called once ``h{m}`` is complete; a store that persists
(the Zarr one) records it, so a run that dies resumes at step ``finished() + 1`` and no
finished step is computed again.  Steps 1 and 2 (and every depth p < 3) are a few points and
run whole.

Value only: the reverse sweep (gradient) runs in memory (``_adjoint``).
"""

from __future__ import annotations

import functools
import time

import numpy as np

from ..exact import check_angles, n_sites
from ._common import SparseEvaluation, SparseIntegrityError, _result, check_problem, sum_fH_tolerance
from ._growing import _evaluate_growing, build_rows, root_rows, whole_step
from ._spectra import _PhaseSpectrum
from ._steps import _Chunk, _log_power, _Split
from ._transforms import _hadamard_bits, _Transformers, wht_inplace

__all__ = ["BandStore", "evaluate_chunked", "band_bits", "rows_bits", "step_sizes", "CHUNK_POINTS_BITS"]

#: default band size: about 2^22 points (64 MiB of complex numbers) per row band and column
#: block, so a task holds a few times that (a modest footprint, common practice for chunked arrays)
CHUNK_POINTS_BITS = 22


def rows_bits(n: int) -> int:
    """B: a vector of 2^n points is kept as a (2^B, 2^(n-B)) array, B = n // 2."""
    return n // 2


def band_bits(n: int, row_points_bits: int, target_bits: int) -> int:
    """k: bands of a vector of 2^n points whose bands must hold whole rows of 2^row_points_bits
    points (the rows a step's formulas work on) and at most 2^target_bits points if possible.
    Never more bands than rows of the (2^B, 2^(n-B)) array."""
    want = max(0, n - target_bits)
    return max(0, min(want, n - row_points_bits, rows_bits(n)))


def step_sizes(p: int) -> list[tuple[int, int, int]]:
    """(m, points of phat, points of h_m) for the split steps m = 3..p (and the root as m = p + 1:
    its phat has 2^(2p-1) points, no h)."""
    out = [(m, 1 << (2 * m - 3), 1 << (2 * m - 1)) for m in range(3, p + 1)]
    if p >= 3:
        out.append((p + 1, 1 << (2 * p - 1), 0))
    return out


# --------------------------------------------------------------------------- band functions
def _outer_band(band: np.ndarray, i: int, *, A2: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Band i of 1/2 A[l] B[h] H (the outer chain factors), transformed over its low bits."""
    R = B.size
    rows = band.size // R
    out = band.reshape(rows, R) * A2[i * rows : (i + 1) * rows, None]
    out *= B
    return wht_inplace(out.reshape(-1))


def _build_band(band: np.ndarray, i: int, *, M, spec, q: int, m: int) -> np.ndarray:
    """Band i of the folded X of step m from band i of phat, transformed over its low bits."""
    R1 = 1 << (m - 2)
    rows = band.size // (4 * R1)
    out = np.empty(4 * band.size, dtype=complex)
    tmp = _Chunk(max(1 << 16, 32 * R1))
    build_rows(M, spec, q, band.reshape(rows, 4, R1), out.reshape(rows, 2, 2, 2, 2, R1), i * rows, m + 3, tmp)
    return wht_inplace(out)


def _root_band(band: np.ndarray, i: int, *, M, spec, q: int, p: int) -> complex:
    """The root's partial sum over band i of its phat."""
    R1 = 1 << (p - 1)
    rows = band.size // (4 * R1)
    tmp = _Chunk(max(1 << 16, 8 * R1))
    return complex(root_rows(M, spec, q, band.reshape(rows, 4, R1), i * rows, p + 2, tmp))


def _column_block(block: np.ndarray, *, k: int, D: float | None = None) -> np.ndarray:
    """A block of columns (2^B rows): transform over the top k bits of its row index, then
    (with D) H = (1 + z)^(D-1) elementwise."""
    flat = np.ascontiguousarray(block, dtype=complex).reshape(-1)
    lo = (flat.size.bit_length() - 1) - k
    out = _hadamard_bits(flat, np.empty_like(flat), lo, lo + k)
    if D is not None:
        _log_power(out, D, _Chunk(min(out.size, 1 << 16)))
    return out.reshape(block.shape)


# --------------------------------------------------------------------------- in-process store
class BandStore:
    """The vector store in this process (numpy arrays): the reference for the Zarr/Dask one,
    same bands and same order of operations; nothing persists."""

    def __init__(self):
        self.vectors: dict[str, np.ndarray] = {}
        self._done = (0, 0.0)

    def put(self, name, flat):
        self.vectors[name] = np.array(flat, dtype=complex).reshape(-1)

    def get(self, name):
        return self.vectors[name]

    def drop(self, name):
        self.vectors.pop(name, None)

    def values(self, name, idx):
        return self.vectors[name][np.asarray(idx)]

    def transform(self, out, row_func, src, out_n, bands, col_func):
        x = self.vectors[src]
        S = x.size // bands
        y = np.concatenate([row_func(x[i * S : (i + 1) * S], i) for i in range(bands)])
        B = rows_bits(out_n)
        Y = y.reshape(1 << B, -1)
        c = max(1, Y.shape[1] // 4)
        for j in range(0, Y.shape[1], c):
            Y[:, j : j + c] = col_func(Y[:, j : j + c])
        self.vectors[out] = y

    def reduce(self, func, src, bands):
        x = self.vectors[src]
        S = x.size // bands
        return [func(x[i * S : (i + 1) * S], i) for i in range(bands)]

    def finished(self):
        return self._done

    def finish(self, m, residual):
        self._done = (m, residual)


# --------------------------------------------------------------------------- the recursion
def evaluate_chunked(q, degree, gamma, beta, store, *, target_bits: int = CHUNK_POINTS_BITS,
                     progress=None) -> SparseEvaluation:
    """nu_p(D; gamma, beta) as :func:`evaluate_sparse`, every split step's vectors in ``store``
    (module docstring), in bands of about 2^target_bits points.  ``progress(m, p, seconds)`` is
    called after every finished step (m = p + 1: the root).  Resumes after the last step the
    store reports finished."""
    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    g, b = check_angles(gamma, beta)
    p = g.size
    if p < 3:  # a few points: nothing to chunk
        return _evaluate_growing(q, D, g, b, False, None, None, t0)
    T = _Transformers(None, None)
    tmp = _Chunk(1 << 8)
    done, dev_max = store.finished()
    transforms = 0

    def check(dev, m, where):
        if not dev <= sum_fH_tolerance(m, D):
            raise SparseIntegrityError(
                f"{where} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {sum_fH_tolerance(m, D):.1e})")

    if done < 2:
        H3 = None
        for m in (1, 2):
            ts = time.perf_counter()
            Xf, dev = whole_step(m, H3, q, g, b, T)
            check(dev, m, f"step {m}")
            dev_max = max(dev_max, dev)
            Z = T.inplace(Xf)
            _log_power(Z, D, tmp)
            H3 = Z
            if progress is not None:
                progress(m, p, time.perf_counter() - ts)
        store.put("h2", H3)
        store.finish(2, dev_max)
        done = 2
    transforms += 4
    for m in range(done + 1, p + 1):
        ts = time.perf_counter()
        N = 1 << n_sites(m)
        sp = _Split(m, b[:m], 3, False)
        n_small = 2 * m - 3
        k = band_bits(n_small, m, target_bits - 2)  # the step's X has 4x the points of phat
        bands = 1 << k
        store.transform("phat", functools.partial(_outer_band, A2=0.5 * sp.A, B=sp.B), f"h{m - 1}", n_small, bands,
                        functools.partial(_column_block, k=k))
        R1 = 1 << (sp.nr - 1)
        corner = store.values("phat", [0, R1, 2 * R1, 3 * R1])
        dev = abs(2.0 * (sp.M[0] @ corner) - 1.0)  # V_m[0] = sum_a f H_{m-1} = 1
        check(dev, m, f"step {m}")
        dev_max = max(dev_max, dev)
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3)
        store.transform(f"h{m}", functools.partial(_build_band, M=sp.M, spec=spec, q=q, m=m), "phat", n_small + 2,
                        bands, functools.partial(_column_block, k=k, D=D))
        store.drop("phat")
        store.finish(m, dev_max)
        store.drop(f"h{m - 1}")
        transforms += 2
        if progress is not None:
            progress(m, p, time.perf_counter() - ts)
    # root: the same with the single middle site (time 0)
    ts = time.perf_counter()
    N = 1 << n_sites(p)
    coef = 0.5j * float(2**q) / N
    sp = _Split(p, b, 1, True)
    n_root = 2 * p - 1
    k = band_bits(n_root, p + 1, target_bits)
    bands = 1 << k
    store.transform("phat", functools.partial(_outer_band, A2=0.5 * sp.A, B=sp.B), f"h{p}", n_root, bands,
                    functools.partial(_column_block, k=k))
    R1 = 1 << (sp.nr - 1)
    corner = store.values("phat", [0, R1, 2 * R1, 3 * R1])
    total = (_Split(p, b, 1, False).M[0] @ corner)
    root_norm = abs(2.0 * total - 1.0)
    check(root_norm, p, "root")
    dev_max = max(dev_max, root_norm)
    spec = _PhaseSpectrum(g, "sin", 1.0, p + 2)
    parts = store.reduce(functools.partial(_root_band, M=sp.M, spec=spec, q=q, p=p), "phat", bands)
    acc = complex(np.sum(np.array(parts, dtype=complex)))
    store.drop("phat")
    transforms += 1
    if progress is not None:
        progress(p + 1, p, time.perf_counter() - ts)
    corr = 2.0 * coef * acc
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}
    return _result(q, D, g, b, corr, residuals, None, t0, transforms)
