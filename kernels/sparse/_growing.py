"""The recursion on the growing contour with the global flip (the default of
:func:`evaluate_sparse`): step m on the depth-m contour's half vector, split around its middle
sites; the reverse sweep is in ``_adjoint``."""

from __future__ import annotations

import numpy as np

from ..exact import n_sites
from ._adjoint import _backward_growing
from ._common import SparseEvaluation, SparseIntegrityError, _result, sum_fH_tolerance
from ._spectra import _PhaseSpectrum
from . import _steps
from ._steps import (_Chunk, _flip_time0_half, _fold_middle, _fresh_complex, _half_chain,
                     _ipow_into, _log_power, _row_groups, _Split, _StepData)
from ._transforms import _Transformers


def build_rows(M, spec, q, Ph4, Xf6, r_first, row_bits, tmp) -> None:
    """Rows of a split step: Xf6[r] = fold(W(f lift H)^(q-1) x spectrum) from the quarter-blocks
    Ph4[r] of the outer part's transform (r counted from ``r_first`` in the whole vector, for
    the spectrum's rows), a few rows at a time.  Shared by the in-memory and the chunked path."""
    rows, _, R1 = Ph4.shape
    for r0, G in _row_groups(rows, row_bits):
        w = tmp.c2[: G * 32 * R1].reshape(G, 32, R1)
        np.matmul(M, Ph4[r0 : r0 + G], out=w)
        X = tmp.c3[: w.size].reshape(G, 32, R1)
        _ipow_into(w, q - 1, X)
        X.view(np.float64).reshape(G, 32 * R1, 2)[...] *= spec.rows(r_first + r0, G, tmp.r1)[:, :, None]
        X7 = X.reshape(G, 2, 2, 2, 2, 2, R1)
        np.add(X7[:, :, :, 0], X7[:, :, :, 1], out=Xf6[r0 : r0 + G])


def root_rows(M, spec, q, Ph4, r_first, row_bits, tmp) -> complex:
    """sum over rows r of U[r]^q x sin spectrum, U[r] = M Ph4[r] (the root's sum, rows from
    ``r_first``), a few rows at a time.  Shared by the in-memory and the chunked path."""
    rows, _, R1 = Ph4.shape
    acc = 0.0
    for r0, G in _row_groups(rows, row_bits):
        U = tmp.c2[: G * 8 * R1].reshape(G, 8, R1)
        np.matmul(M, Ph4[r0 : r0 + G], out=U)
        Y = _ipow_into(U, q, tmp.c3[: U.size].reshape(U.shape))
        acc += np.sum(spec.rows(r_first + r0, G, tmp.r1).reshape(G, 8, R1) * Y)
    return acc


def whole_step(m, H3, q, g, b, T):
    """Step m < 3 with whole vectors: (the folded X to transform, |sum f H - 1|)."""
    N = 1 << n_sites(m)
    Xf = np.empty(N // 4, dtype=complex)
    v = _half_chain(m, b[:m])
    if H3 is not None:
        v.reshape(1 << (m - 2), 8, 1 << (m - 1))[...] *= H3.reshape(1 << (m - 2), 1, 1 << (m - 1))
    w = T.inplace(v)
    dev = abs(2.0 * w[0] - 1.0)
    spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, 2 * m)
    X = _ipow_into(w, q - 1, np.empty_like(w)) * spec.full()
    Xf[...] = _fold_middle(X, m).reshape(-1)
    return Xf, dev


def _evaluate_growing(q, D, g, b, gradient, run_map, n_high, t0) -> SparseEvaluation:
    """The recursion on the growing contour with the global flip (module docstring).

    Flip: f, K and every H_m are even under a -> -a (K = cos(phase/2) and the
    XOR product of flipped paths is flipped), and the root's f H a_0 and
    sin(phase/2) are both odd.  So every vector is kept as its half with the
    first site +1 (2^(2m) points), and the transform of an even (or odd)
    function is twice the half-length transform of its half, supported on the
    wave vectors of even (odd) weight, which the half-length index enumerates
    once each; the transform back of such a spectrum is the plain half-length
    transform.  Sums over the spectrum are sums over the half index.

    Step m (half index of 2^(2m) points, N = 2^(2m+1)), with H_{m-1} kept on the
    2^(2m-3) points it depends on (``H3``, without any merged site):
      P = 1/2 A B H3 (the outer chain factors), W(P) by one transform of 2^(2m-3)
      points, and V_m / 2 = W(f lift(H_{m-1})) rebuilt from its quarter-blocks
      (:class:`_Split`) row by row, never stored whole;
      X = (V_m / 2)^(q-1) (2^(q-1)/N) W(K - 1)   (the spectrum in closed form,
      :class:`_PhaseSpectrum`), summed over the merged site's wave-vector bit at
      once, because H_m does not depend on that site: only half of message - 1 is
      needed, and it is the transform of the folded X (2^(2m-1) points);
      H3_m = exp((D-1) log1p(message - 1)).
    The root is the same with the single middle site (time 0, with the factor a_0)
    and the sum of U^q W(sin(phase/2)) row by row.  Steps and roots below depth 3
    and 2 build the vectors whole (same formulas, no split).
    """
    p = g.size
    T = _Transformers(run_map, n_high)
    tmp = _Chunk(max(1 << _steps.CHUNK_BITS, 1 << (p + 3)))  # a row group holds at least one row
    # two buffers for every step from 3 on (prefixes of them; their pages are touched once):
    # the final folded size 2^(2p-1) for X and H, a quarter of it for the outer part
    big = _fresh_complex(1 << (2 * p - 1))
    small = _fresh_complex(1 << max(2 * p - 3, 0))

    dev_max = 0.0
    steps: list[_StepData] = []
    H3 = None
    for m in range(1, p + 1):
        N = 1 << n_sites(m)
        tol = sum_fH_tolerance(m, D)
        if m >= 3:
            sp = _Split(m, b[:m], 3, False)
            s8 = 1 << (2 * m - 3)
            Phat = T.inplace(sp.times_outer(H3, small[:s8].reshape(H3.shape)).reshape(-1))
            del H3
            Xf = big[: 4 * s8]
            spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3)
            rows = 1 << (sp.nl - 1)
            R1 = 1 << (sp.nr - 1)
            Ph4 = Phat.reshape(rows, 4, R1)
            dev = abs(2.0 * (sp.M[0] @ Ph4[0, :, 0]) - 1.0)  # V_m[0] = sum_a f H_{m-1} = 1
            build_rows(sp.M, spec, q, Ph4, Xf.reshape(rows, 2, 2, 2, 2, R1), 0, m + 3, tmp)
            Phat = Phat.copy() if gradient else None
            del Ph4
        else:
            Xf, dev = whole_step(m, H3, q, g, b, T)
            del H3
            Phat = None
        if not dev <= tol:
            raise SparseIntegrityError(
                f"step {m} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {tol:.1e})"
            )
        dev_max = max(dev_max, dev)
        Z = T.inplace(Xf)  # message - 1 (independent of the merged site)
        del Xf
        L = np.empty_like(Z) if gradient else None
        _log_power(Z, D, tmp, L)
        if gradient:
            steps.append(_StepData(L, Phat))
        H3 = Z.reshape(1 << (m - 1), 1 << m)  # H3_m: (times 2..m, times -m..-1)
        del Z
    N = 1 << n_sites(p)
    tol = sum_fH_tolerance(p, D)
    coef = 0.5j * float(2**q) / N  # nu = 1/2 + coef sum_k U^q W(sin(phase/2)), U = W(f H a_0)
    root = {}
    if p >= 2:
        sp = _Split(p, b, 1, True)
        sp.times_outer(H3)
        Phat = T.inplace(H3.reshape(-1))
        del H3, small
        rows = 1 << (sp.nl - 1)
        R1 = 1 << (sp.nr - 1)
        Ph4 = Phat.reshape(rows, 4, R1)
        # sum_a f H (the check): W(P C0)[0] with C0 = C without the sign a_0
        C0 = _Split(p, b, 1, False)
        total = (C0.M @ Ph4[0, :, 0])[0]
        spec = _PhaseSpectrum(g, "sin", 1.0, p + 2)
        acc = root_rows(sp.M, spec, q, Ph4, 0, p + 2, tmp)
        root = {"split": sp, "Phat": Phat if gradient else None, "spec": spec}
    else:
        Hf = np.repeat(H3.reshape(1, 2), 2, axis=0).reshape(-1)  # (merged site, time -1)
        u = _half_chain(p, b) * Hf
        total = u.sum()
        _flip_time0_half(u, p)
        U = T.inplace(u.copy())
        spec = _PhaseSpectrum(g, "sin", 1.0, 2 * p)
        acc = np.sum(spec.full() * U**q)
        root = {"U": U, "Hf": Hf, "spec": spec}
    root_norm = abs(2.0 * total - 1.0)
    if not root_norm <= tol:
        raise SparseIntegrityError(
            f"root at p = {p}: sum_a f(a) H(a) deviates from 1 by {root_norm:.3e} (allowed {tol:.1e})"
        )
    dev_max = max(dev_max, root_norm)
    corr = 2.0 * coef * acc
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}
    grad = None
    if gradient:
        grad = _backward_growing(q, D, g, b, coef, root, steps, T, tmp, residuals)
    return _result(q, D, g, b, corr, residuals, grad, t0, T.count)
