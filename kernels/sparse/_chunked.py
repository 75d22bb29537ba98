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

    transform(out, row_func, srcs, out_n, bands, col_func) -> [partial of band i, ...]
        row_func(band i of every src (flat), i) returns band i of the output (2^out_n points
        in all), or (that band, a partial result); with ``col_func`` the output bands were
        transformed over their low bits and col_func(block) transforms a block of columns
        (2^B rows) over the high bits (the exchange); without, the bands are the output
    reduce(func, src, bands) -> [func(band_i, i) for every band], in band order
    values(name, flat_indices) -> array;  put(name, flat);  get(name) -> flat;  drop(name)
    finished() -> (last finished step, its residual max) or (0, 0.0);  finish(m, residual, state=None)
    rewind(m, residual): record m as the last finished step again (no new step: before a vector is
        overwritten in place); optional ``in_place`` attribute: transform(out, ..., srcs=[out]) works
    state() -> the JSON-able ``state`` of the last finish (the root's sum, the angle adjoints so far)

Checkpoints: ``finish(m, ...)`` is called once ``h{m}`` is complete; a store that persists
(the Zarr one) records it, so a run that dies resumes at step ``finished() + 1`` and no
finished step is computed again.  With the gradient the root (m = p + 1) and every stage of the
reverse sweep (:func:`reverse_stage`: the root's adjoint, then steps p .. 3) are checkpoints
too, with the angle adjoints summed so far in the record's ``state``.  Steps 1 and 2 (and every depth p < 3) are a few points and
run whole.

A step's result is kept as Z = message - 1 (``z{m}``); the next step's row pass raises it to
H = (1 + Z)^(D-1) band by band.  With the gradient, every ``z{m}`` and ``phat{m}`` stays in the
store for the reverse sweep, which runs band by band too (the adjoint row functions of
``_adjoint``; the partial sums of the spectra's and chain factors' adjoints are summed in band
order).  Partial sums make the chunked gradient agree with the in-memory one to rounding, not
bit for bit.
"""

from __future__ import annotations

import copy
import functools
import time

import numpy as np

from ..exact import check_angles, n_sites
from ._common import SparseEvaluation, SparseIntegrityError, _result, check_problem, sum_fH_tolerance
from ._adjoint import root_adjoint_rows, small_step_adjoint, step_adjoint_rows
from ._growing import _evaluate_growing, build_rows, root_rows, whole_step
from ._spectra import _PhaseSpectrum
from ._steps import _chain_beta_bar, _Chunk, _exp_times, _log_power, _Split
from ._transforms import _Transformers, columns_inplace, wht_inplace

__all__ = ["BandStore", "evaluate_chunked", "band_bits", "rows_bits", "step_sizes", "reverse_stage", "CHUNK_POINTS_BITS"]

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
def _power(z: np.ndarray, D: float, keep: bool = False):
    """H = (1 + z)^(D-1) of a band (a new array); with ``keep`` also what the adjoint needs."""
    H = np.array(z, dtype=complex)
    L = np.empty_like(H) if keep else None
    _log_power(H, D, _Chunk(min(H.size, 1 << 16)), L)
    return (H, L) if keep else H


def _outer_band(z: np.ndarray, i: int, *, A2: np.ndarray, B: np.ndarray, D: float) -> np.ndarray:
    """Band i of 1/2 A[l] B[h] H, H = (1 + z)^(D-1) (the outer chain factors), transformed over
    its low bits."""
    R = B.size
    rows = z.size // R
    out = _power(z, D).reshape(rows, R)
    out *= A2[i * rows : (i + 1) * rows, None]
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


def _fresh(spec):
    """The spectrum with empty adjoint sums (its tables shared): a band's own accumulator."""
    out = copy.copy(spec)
    out._Q = None
    return out


def _spec_part(spec, r_first: int, rows: int):
    """What a band added to a spectrum's adjoint sums (rows of Q, and R)."""
    if spec._Q is None:
        return None
    return spec._Q[r_first : r_first + rows].copy(), spec._R.copy()


def _root_adjoint_band(band, i, *, M, spec, q, p, coef):
    """Band i of the root's adjoint (transformed over its low bits), with (spectrum part, Mbar)."""
    R1 = 1 << (p - 1)
    rows = band.size // (4 * R1)
    Pb = np.empty_like(band)
    tmp = _Chunk(max(1 << 16, 8 * R1))
    spec = _fresh(spec)
    Mbar = root_adjoint_rows(M, spec, q, coef, band.reshape(rows, 4, R1), Pb.reshape(rows, 4, R1), i * rows, p + 2, tmp)
    return wht_inplace(Pb), (_spec_part(spec, i * rows, rows), Mbar)


def _step_adjoint_band(phat, xbar, i, *, M, spec, q, m):
    """Band i of a split step's adjoint (transformed over its low bits), with (spectrum part, Mbar)."""
    R1 = 1 << (m - 2)
    rows = phat.size // (4 * R1)
    Pb = np.empty_like(phat)
    tmp = _Chunk(max(1 << 16, 32 * R1))
    spec = _fresh(spec)
    Mbar = step_adjoint_rows(M, spec, q, phat.reshape(rows, 4, R1), xbar.reshape(rows, 2, 2, 2, 2, R1),
                             Pb.reshape(rows, 4, R1), i * rows, m + 3, tmp)
    return wht_inplace(Pb), (_spec_part(spec, i * rows, rows), Mbar)


def _outer_adjoint_band(pbar, z, i, *, A: np.ndarray, B: np.ndarray, D: float):
    """Band i of the adjoint of the outer factors: H3bar = Pbar 1/2 A B, with the chain adjoints'
    parts (rows of Abar, the band's sum of Bbar); H = (1 + z)^(D-1)."""
    R = B.size
    rows = pbar.size // R
    P = pbar.reshape(rows, R)
    HP = _power(z, D).reshape(rows, R)
    HP *= P
    Ab = A[i * rows : (i + 1) * rows]
    parts = (0.5 * (HP @ B), 0.5 * (Ab @ HP))
    out = P * (0.5 * Ab)[:, None]
    out *= B
    return out.reshape(-1), parts


def _power_adjoint_band(hbar, z, i, *, D: float):
    """Band i of Zbar = H3bar (D-1) (1 + z)^(D-2), transformed over its low bits."""
    _, L = _power(z, D, keep=True)
    out = np.array(hbar, dtype=complex)
    _exp_times(out, L, D, _Chunk(min(out.size, 1 << 16)))
    return wht_inplace(out)


def _column_block(block: np.ndarray, *, k: int) -> np.ndarray:
    """A block of columns (2^B rows): transform over the top k bits of its row index (in place
    when the block is a C-contiguous complex array; returns the result)."""
    out = block if block.dtype == complex and block.flags.c_contiguous and block.flags.writeable else (
        np.ascontiguousarray(block, dtype=complex).copy())
    columns_inplace(out.reshape(1 << k, -1))
    return out


def _band_call(row_func, parts, i):
    """row_func's result as (band, partial)."""
    out = row_func(*parts, i)
    return out if isinstance(out, tuple) else (out, None)


# --------------------------------------------------------------------------- in-process store
class BandStore:
    """The vector store in this process (numpy arrays): the reference for the Zarr/Dask one,
    same bands and same order of operations; nothing persists."""

    def __init__(self):
        self.vectors: dict[str, np.ndarray] = {}
        self._done = (0, 0.0)
        self._state = None

    def put(self, name, flat):
        self.vectors[name] = np.array(flat, dtype=complex).reshape(-1)

    def get(self, name):
        return self.vectors[name]

    def drop(self, name):
        self.vectors.pop(name, None)

    def values(self, name, idx):
        return self.vectors[name][np.asarray(idx)]

    def transform(self, out, row_func, srcs, out_n, bands, col_func=None):
        srcs = [srcs] if isinstance(srcs, str) else list(srcs)
        xs = [self.vectors[s] for s in srcs]
        results = [_band_call(row_func, [x[i * (x.size // bands) : (i + 1) * (x.size // bands)] for x in xs], i)
                   for i in range(bands)]
        y = np.concatenate([r[0] for r in results])
        if col_func is not None:
            Y = y.reshape(1 << rows_bits(out_n), -1)
            c = max(1, Y.shape[1] // 4)
            for j in range(0, Y.shape[1], c):
                Y[:, j : j + c] = col_func(Y[:, j : j + c])
        self.vectors[out] = y
        return [r[1] for r in results]

    def reduce(self, func, src, bands):
        x = self.vectors[src]
        S = x.size // bands
        return [func(x[i * S : (i + 1) * S], i) for i in range(bands)]

    def finished(self):
        return self._done

    def state(self):
        return self._state

    def finish(self, m, residual, state=None):
        self._done = (m, residual)
        self._state = state

    def rewind(self, m, residual):
        self._done = (m, residual)


# --------------------------------------------------------------------------- the recursion
def _combine_spec(spec, parts) -> None:
    """Put the bands' parts of a spectrum's adjoint sums (in band order) into ``spec``."""
    parts = [x for x in parts if x is not None]
    spec._Q = np.concatenate([x[0] for x in parts])
    spec._R = np.sum([x[1] for x in parts], axis=0)


def evaluate_chunked(q, degree, gamma, beta, store, *, gradient: bool = False,
                     target_bits: int = CHUNK_POINTS_BITS, progress=None) -> SparseEvaluation:
    """nu_p(D; gamma, beta) as :func:`evaluate_sparse` (with ``gradient`` also its gradient),
    every split step's vectors in ``store`` (module docstring), in bands of about
    2^target_bits points.  ``progress(m, p, seconds)`` is called after every finished step
    (m = p + 1: the root; with the gradient, m = -k after the reverse sweep's step k).  Resumes
    after the last step the store reports finished."""
    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    g, b = check_angles(gamma, beta)
    p = g.size
    if p < 3:  # a few points: nothing to chunk
        return _evaluate_growing(q, D, g, b, gradient, None, None, t0)
    T = _Transformers(None, None)
    tmp = _Chunk(1 << 8)
    done, dev_max = store.finished()
    transforms = 0

    def check(dev, m, where):
        if not dev <= sum_fH_tolerance(m, D):
            raise SparseIntegrityError(
                f"{where} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {sum_fH_tolerance(m, D):.1e})")

    def report(m, ts):
        if progress is not None:
            progress(m, p, time.perf_counter() - ts)

    # steps 1 and 2: a few points, in memory (again on a resume: the reverse sweep needs them)
    small_L, H3, dev12 = [], None, 0.0
    for m in (1, 2):
        ts = time.perf_counter()
        Xf, dev = whole_step(m, H3, q, g, b, T)
        check(dev, m, f"step {m}")
        dev12 = max(dev12, dev)
        Z = T.inplace(Xf)
        small_L.append(_power(Z, D, keep=True)[1])
        H3 = _power(Z, D)
        if done < 2:
            report(m, ts)
    if done < 2:
        store.put("z2", Z)
        dev_max = max(dev_max, dev12)
        store.finish(2, dev_max)
        done = 2
    transforms += 4

    def layout(m):
        return band_bits(2 * m - 3, m, target_bits - 2)  # the step's X has 4x the points of phat

    # the root's transform may overwrite z{p} (a store that can, no reverse sweep that needs z{p}, and
    # its bands whole row-chunks of z{p}): the largest vector then needs no second copy beside it
    kr = band_bits(2 * p - 1, p + 1, target_bits)
    in_place = bool(getattr(store, "in_place", False)) and not gradient and kr <= layout(p)
    root_in = f"z{p}" if in_place else "phat_root"

    for m in range(done + 1, p + 1):
        ts = time.perf_counter()
        N = 1 << n_sites(m)
        sp = _Split(m, b[:m], 3, False)
        k = layout(m)
        phat = f"phat{m}" if gradient else "phat"
        store.transform(phat, functools.partial(_outer_band, A2=0.5 * sp.A, B=sp.B, D=D), f"z{m - 1}", 2 * m - 3,
                        1 << k, functools.partial(_column_block, k=k))
        R1 = 1 << (sp.nr - 1)
        dev = abs(2.0 * (sp.M[0] @ store.values(phat, [0, R1, 2 * R1, 3 * R1])) - 1.0)  # V_m[0] = sum f H = 1
        check(dev, m, f"step {m}")
        dev_max = max(dev_max, dev)
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3)
        store.transform(f"z{m}", functools.partial(_build_band, M=sp.M, spec=spec, q=q, m=m), phat, 2 * m - 1,
                        1 << k, functools.partial(_column_block, k=k))
        store.finish(m, dev_max)
        if not gradient:
            store.drop(phat)
            if not (m == p and in_place):
                store.drop(f"z{m - 1}")
        transforms += 2
        report(m, ts)
    # root: the same with the single middle site (time 0); with the gradient it is a checkpoint too
    N = 1 << n_sites(p)
    coef = 0.5j * float(2**q) / N
    if done <= p:
        ts = time.perf_counter()
        sp = _Split(p, b, 1, True)
        if in_place:  # z{p} is about to be overwritten: a run killed from here on redoes step p from z{p-1}
            store.rewind(p - 1, dev_max)
        store.transform(root_in, functools.partial(_outer_band, A2=0.5 * sp.A, B=sp.B, D=D), f"z{p}", 2 * p - 1,
                        1 << kr, functools.partial(_column_block, k=kr))
        R1 = 1 << (sp.nr - 1)
        total = _Split(p, b, 1, False).M[0] @ store.values(root_in, [0, R1, 2 * R1, 3 * R1])
        root_norm = abs(2.0 * total - 1.0)
        check(root_norm, p, "root")
        dev_max = max(dev_max, root_norm)
        spec = _PhaseSpectrum(g, "sin", 1.0, p + 2)
        parts = store.reduce(functools.partial(_root_band, M=sp.M, spec=spec, q=q, p=p), root_in, 1 << kr)
        acc = complex(np.sum(np.array(parts, dtype=complex)))
        transforms += 1
        if gradient:
            store.finish(p + 1, dev_max, {"acc": _pack([acc])})
        report(p + 1, ts)
    else:
        acc = _unpack(store.state()["acc"])[0]
    corr = 2.0 * coef * acc
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}
    grad = None
    if gradient:
        grad = _backward_chunked(q, D, g, b, coef, store, small_L, T, tmp, layout, kr, residuals, report, acc)
        transforms += 3 * (p - 2) + 2 + 4
    else:
        store.drop(root_in)
        store.drop(f"z{p - 1}")
    return _result(q, D, g, b, corr, residuals, grad, t0, transforms)


def _pack(z) -> list:
    """Complex numbers as JSON-exact [re, im] pairs (a float's repr reads back to the same bits)."""
    return [[float(x.real), float(x.imag)] for x in np.asarray(z, dtype=complex).reshape(-1)]


def _unpack(pairs) -> np.ndarray:
    return np.array([complex(re, im) for re, im in pairs], dtype=complex)


def reverse_stage(p: int, m: int) -> int:
    """The checkpoint number of the reverse sweep's stage m (m = p + 1: the root's adjoint, then
    m = p .. 3: the split steps), after the forward steps 1..p and the root (p + 1)."""
    return p + 2 + (p + 1 - m)


def _backward_chunked(q, D, g, b, coef, store, small_L, T, tmp, layout, kr, residuals, report, acc):
    """The reverse sweep of :func:`_backward_growing` on the store's bands (same row functions),
    checkpointed after every stage: the adjoint H3bar of the next step down (``h3bar{m}``) is
    complete in the store and the angle adjoints so far are in the record, so a killed sweep
    resumes after its last finished stage; a stage's inputs are dropped only after its record."""
    p = g.size
    done, _ = store.finished()
    gamma_bar = np.zeros(p, dtype=complex)
    beta_bar = np.zeros(p, dtype=complex)
    if done >= reverse_stage(p, p + 1):
        state = store.state()
        gamma_bar, beta_bar = _unpack(state["gamma_bar"]), _unpack(state["beta_bar"])

    def add_theta_bar(theta_bar, m):
        Gam_bar = 0.5 * theta_bar  # theta = Gamma / 2
        n = n_sites(m)
        gamma_bar[:m] += Gam_bar[:m] - Gam_bar[n - 1 : m : -1]

    def outer_adjoint(sp, m_of_z, n, k):
        """pbar -> h3bar{m_of_z} through the outer factors of ``sp`` (H from z{m_of_z}); chain adjoints."""
        parts = store.transform(f"h3bar{m_of_z}", functools.partial(_outer_adjoint_band, A=sp.A, B=sp.B, D=D),
                                ["pbar", f"z{m_of_z}"], n, 1 << k, None)
        Abar = np.concatenate([x[0] for x in parts])
        Bbar = np.sum([x[1] for x in parts], axis=0)
        _chain_beta_bar(Abar, sp.A, sp.m, 0, beta_bar)
        _chain_beta_bar(Bbar, sp.B, sp.m, sp.c + sp.k, beta_bar, fixed_first=False)

    def finish(m, *names):
        store.finish(reverse_stage(p, m), residuals["sum_fH"],
                     {"acc": _pack([acc]), "gamma_bar": _pack(gamma_bar), "beta_bar": _pack(beta_bar)})
        for name in names:
            store.drop(name)

    if done < reverse_stage(p, p + 1):
        ts = time.perf_counter()
        sp = _Split(p, b, 1, True)
        spec = _PhaseSpectrum(g, "sin", 1.0, p + 2)
        parts = store.transform("pbar", functools.partial(_root_adjoint_band, M=sp.M, spec=spec, q=q, p=p, coef=coef),
                                "phat_root", 2 * p - 1, 1 << kr, functools.partial(_column_block, k=kr))
        _combine_spec(spec, [x[0] for x in parts])
        add_theta_bar(spec.theta_bar(), p)
        sp.matrix_beta_bar(np.sum([x[1] for x in parts], axis=0), beta_bar)
        outer_adjoint(sp, p, 2 * p - 1, kr)
        finish(p + 1, "phat_root", "pbar")
        report(-(p + 1), ts)
    for m in range(p, 2, -1):
        if done >= reverse_stage(p, m):
            continue
        ts = time.perf_counter()
        N = 1 << n_sites(m)
        k = layout(m)
        store.transform("xbar", functools.partial(_power_adjoint_band, D=D), [f"h3bar{m}", f"z{m}"], 2 * m - 1, 1 << k,
                        functools.partial(_column_block, k=k))
        sp = _Split(m, b[:m], 3, False)
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3)
        parts = store.transform("pbar", functools.partial(_step_adjoint_band, M=sp.M, spec=spec, q=q, m=m),
                                [f"phat{m}", "xbar"], 2 * m - 3, 1 << k, functools.partial(_column_block, k=k))
        _combine_spec(spec, [x[0] for x in parts])
        add_theta_bar(spec.theta_bar(), m)
        sp.matrix_beta_bar(np.sum([x[1] for x in parts], axis=0), beta_bar)
        outer_adjoint(sp, m - 1, 2 * m - 3, k)
        finish(m, f"h3bar{m}", f"z{m}", f"phat{m}", "xbar", "pbar")
        report(-m, ts)
    H3bar = np.array(store.get("h3bar2"))
    for m in (2, 1):
        N = 1 << n_sites(m)
        _exp_times(H3bar, small_L[m - 1], D, tmp)
        Xf_bar = T.inplace(H3bar)
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, 2 * m)
        H3bar = small_step_adjoint(m, Xf_bar, small_L[0] if m == 2 else None, q, D, b, spec, T, beta_bar, add_theta_bar)
    store.drop("h3bar2")
    store.drop("z2")
    residuals["imag_gradient"] = float(max(np.max(np.abs(gamma_bar.imag)), np.max(np.abs(beta_bar.imag))))
    return {"gamma": gamma_bar.real.copy(), "beta": beta_bar.real.copy()}
