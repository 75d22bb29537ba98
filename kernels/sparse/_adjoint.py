"""The reverse sweep of the growing-contour recursion (holomorphic adjoints), mirroring
``_growing`` step by step on the same reduced vectors."""

from __future__ import annotations

import numpy as np

from ..exact import n_sites
from ._spectra import _PhaseSpectrum
from ._steps import _chain_beta_bar, _exp_times, _flip_time0_half, _h_of, _half_chain, _ipow_into, _row_groups, _Split


def _outer_adjoint(T, Phat_bar: np.ndarray, L_prev: np.ndarray, D: float, sp, beta_bar) -> np.ndarray:
    """Adjoint of a split step's outer-part transform (in place on ``Phat_bar``): adds the
    outer chain's beta adjoints and returns H3bar of the previous step, flat."""
    Pbar = T.inplace(Phat_bar).reshape(1 << sp.nl, 1 << sp.nr)
    H3 = _h_of(L_prev, D).reshape(Pbar.shape)
    H3 *= Pbar
    sp.outer_beta_bar(H3, beta_bar)
    del H3
    sp.times_outer(Pbar)
    return Pbar.reshape(-1)


def root_adjoint_rows(M, spec, q, coef, Ph4, Pb4, r_first, row_bits, tmp) -> np.ndarray:
    """Rows of the root's adjoint: Pb4[r] = M^T (coef q U^(q-1) S) with U = M Ph4[r]; the sin
    spectrum's adjoint accumulated in ``spec`` (rows from ``r_first``); returns Mbar of these rows.
    Shared by the in-memory and the chunked path."""
    rows, _, R1 = Ph4.shape
    Mbar = np.zeros_like(M)
    for r0, G in _row_groups(rows, row_bits):
        U = tmp.c2[: G * 8 * R1].reshape(G, 8, R1)
        np.matmul(M, Ph4[r0 : r0 + G], out=U)
        S = spec.rows(r_first + r0, G, tmp.r1).reshape(G, 8, R1)
        Ubar = _ipow_into(U, q - 1, tmp.c3[: U.size].reshape(U.shape))
        U *= Ubar  # U^q
        U *= coef
        spec.accumulate(r_first + r0, U.reshape(G, -1))
        Ubar *= coef * q
        Ubar *= S
        np.matmul(M.T, Ubar, out=Pb4[r0 : r0 + G])
        Mbar += np.tensordot(Ubar, Ph4[r0 : r0 + G], axes=([0, 2], [0, 2]))
    return Mbar


def step_adjoint_rows(M, spec, q, Ph4, Xb6, Pb4, r_first, row_bits, tmp) -> np.ndarray:
    """Rows of a split step's adjoint: from the folded X's adjoint rows Xb6[r] to Pb4[r]; the cos
    spectrum's adjoint accumulated in ``spec``; returns Mbar of these rows.  Shared by the
    in-memory and the chunked path."""
    rows, _, R1 = Ph4.shape
    Mbar = np.zeros_like(M)
    for r0, G in _row_groups(rows, row_bits):
        w = tmp.c2[: G * 32 * R1].reshape(G, 32, R1)
        np.matmul(M, Ph4[r0 : r0 + G], out=w)
        K = spec.rows(r_first + r0, G, tmp.r1).reshape(G, 32, R1)
        wq2 = _ipow_into(w, q - 2, tmp.c3[: w.size].reshape(w.shape))  # w^(q-2)
        Xbar = np.broadcast_to(Xb6[r0 : r0 + G][:, :, :, None], (G, 2, 2, 2, 2, 2, R1)).reshape(G, 32, R1)
        w *= wq2  # w^(q-1)
        w *= Xbar
        spec.accumulate(r_first + r0, w.reshape(G, -1))  # Kbar = Xbar w^(q-1)
        wq2 *= Xbar
        wq2 *= K
        wq2 *= q - 1.0  # wbar
        np.matmul(M.T, wq2, out=Pb4[r0 : r0 + G])
        Mbar += np.tensordot(wq2, Ph4[r0 : r0 + G], axes=([0, 2], [0, 2]))
    return Mbar


def small_step_adjoint(m, Xf_bar, L_prev, q, D, b, spec, T, beta_bar, add_theta_bar):
    """Adjoint of step m < 3 (whole vectors) from the folded X's adjoint; returns H3bar of step
    m - 1 (None for m = 1).  ``L_prev``: what step 1 kept (for m = 2)."""
    f = _half_chain(m, b[:m])
    v = f.copy()
    if m == 2:
        H3prev = _h_of(L_prev, D).reshape(1, 1, 2)
        v.reshape(1, 8, 2)[...] *= H3prev
    w = T.inplace(v)
    Xbar = np.repeat(Xf_bar.reshape(1 << (m - 1), 1, 1 << m), 2, axis=1).reshape(-1)
    K = spec.full()
    spec.accumulate(0, (Xbar * w ** (q - 1)).reshape(1, -1))
    add_theta_bar(spec.theta_bar(), m)
    wbar = Xbar * (q - 1) * w ** (q - 2) * K
    vbar = T.inplace(wbar)
    if m == 2:
        _chain_beta_bar(vbar * np.broadcast_to(H3prev, (1, 8, 2)).reshape(-1), f, m, 0, beta_bar)
        return (vbar * f).reshape(1, 8, 2).sum(axis=1).reshape(-1)
    _chain_beta_bar(vbar, f, m, 0, beta_bar)
    return None


def _backward_growing(q, D, g, b, coef, root, steps, T, tmp, residuals):
    """Reverse sweep over the growing contours (holomorphic adjoints), mirroring
    :func:`_evaluate_growing` step by step on the same reduced vectors."""
    p = g.size
    gamma_bar = np.zeros(p, dtype=complex)
    beta_bar = np.zeros(p, dtype=complex)

    def add_theta_bar(theta_bar, m):
        Gam_bar = 0.5 * theta_bar  # theta = Gamma / 2
        n = n_sites(m)
        gamma_bar[:m] += Gam_bar[:m] - Gam_bar[n - 1 : m : -1]

    spec = root["spec"]
    # root: nu = 1/2 + coef sum_k U^q S, S the sin spectrum (unscaled)
    if p >= 2:
        sp = root["split"]
        Phat = root["Phat"]
        rows = 1 << (sp.nl - 1)
        R1 = 1 << (sp.nr - 1)
        Ph4 = Phat.reshape(rows, 4, R1)
        Phat_bar = np.empty_like(Phat)
        Pb4 = Phat_bar.reshape(rows, 4, R1)
        Mbar = root_adjoint_rows(sp.M, spec, q, coef, Ph4, Pb4, 0, p + 2, tmp)
        add_theta_bar(spec.theta_bar(), p)
        sp.matrix_beta_bar(Mbar, beta_bar)
        del Phat, Ph4
        H3bar = _outer_adjoint(T, Phat_bar, steps[p - 1].L, D, sp, beta_bar)
        del Phat_bar
    else:
        U = root["U"]
        S = spec.full()
        spec.accumulate(0, (coef * U**q).reshape(1, -1))
        add_theta_bar(spec.theta_bar(), p)
        Ubar = coef * q * U ** (q - 1) * S
        ubar = T.inplace(Ubar)
        _flip_time0_half(ubar, p)
        f = _half_chain(p, b)
        _chain_beta_bar(ubar * root["Hf"], f, p, 0, beta_bar)
        H3bar = (ubar * f).reshape(2, 2).sum(axis=0)  # sum over the merged site
    for m in range(p, 0, -1):
        N = 1 << n_sites(m)
        st = steps[m - 1]
        # H3_m = (1 + Z)^(D-1): Zbar = H3bar (D-1) (1 + Z)^(D-2)
        _exp_times(H3bar, st.L, D, tmp)
        st.L = None
        Xf_bar = T.inplace(H3bar)
        del H3bar
        spec = _PhaseSpectrum(g[:m], "cos", float(2 ** (q - 1)) / N, m + 3 if m >= 3 else 2 * m)
        if m >= 3:
            sp = _Split(m, b[:m], 3, False)
            rows = 1 << (sp.nl - 1)
            R1 = 1 << (sp.nr - 1)
            Ph4 = st.Phat.reshape(rows, 4, R1)
            Phat_bar = np.empty_like(st.Phat)
            Pb4 = Phat_bar.reshape(rows, 4, R1)
            Xb6 = Xf_bar.reshape(rows, 2, 2, 2, 2, R1)
            Mbar = step_adjoint_rows(sp.M, spec, q, Ph4, Xb6, Pb4, 0, m + 3, tmp)
            add_theta_bar(spec.theta_bar(), m)
            sp.matrix_beta_bar(Mbar, beta_bar)
            st.Phat = None
            del Ph4, Xb6, Xf_bar
            H3bar = _outer_adjoint(T, Phat_bar, steps[m - 2].L, D, sp, beta_bar)
            del Phat_bar
        else:
            H3bar = small_step_adjoint(m, Xf_bar, steps[0].L if m == 2 else None, q, D, b, spec, T, beta_bar,
                                       add_theta_bar)
    residuals["imag_gradient"] = float(max(np.max(np.abs(gamma_bar.imag)), np.max(np.abs(beta_bar.imag))))
    return {"gamma": gamma_bar.real.copy(), "beta": beta_bar.real.copy()}
