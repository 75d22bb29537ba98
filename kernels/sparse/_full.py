"""The baseline recursion on the full contour (every step on all 2^(2p+1) paths), value and
reverse-mode gradient; ``contour="full"`` of :func:`evaluate_sparse`."""

from __future__ import annotations

import math

import numpy as np

from ..exact import link_beta_index, link_sign, n_sites, path_weights
from ._common import SparseIntegrityError, _result, sum_fH_tolerance
from ._spectra import _site_sums, phase_vector
from ._steps import _flip_time0, _ipow, _ipow_inplace, complex_log1p
from ._transforms import _Transformer


def _step(f, H_prev, Kh, q, D, T, N):
    """One recursion step; returns (L_m, V_m, dev) with H_m = exp((D-1) L_m)."""
    v = f * H_prev if H_prev is not None else f.copy()
    V = T(v)
    dev = abs(V[0] - 1.0)
    W = _ipow(V, q - 1)
    W *= Kh
    T(W)
    W /= N  # = message - 1
    return complex_log1p(W), V, dev


def _evaluate_full(q, D, g, b, gradient, run_map, n_high, memory_budget_bytes, t0):
    """The recursion on the full contour (the baseline; see :func:`evaluate_sparse`)."""
    p = g.size
    n = n_sites(p)
    N = 1 << n
    T = _Transformer(N, run_map, n_high)

    f = path_weights(p, b)
    phase = phase_vector(g)
    Kh = -2.0 * np.sin(phase / 4.0) ** 2  # K - 1, exact form
    T(Kh)
    if not gradient:
        del phase

    tol = sum_fH_tolerance(p, D)
    if gradient:
        per_vec = 16 * N
        if memory_budget_bytes is None or (p + 1) * per_vec <= memory_budget_bytes:
            stride = 1
        else:
            stride = max(1, int(math.ceil(math.sqrt(p))))
    else:
        stride = None
    stored: dict[int, np.ndarray] = {}

    def checked(dev, m):
        if not dev <= tol:
            raise SparseIntegrityError(
                f"step {m} at p = {p}: sum_a f(a) H(a) deviates from 1 by {dev:.3e} (allowed {tol:.1e})"
            )
        return dev

    dev_max = 0.0
    L = None
    H = None
    if gradient:
        for m in range(1, p + 1):
            L, V, dev = _step(f, H, Kh, q, D, T, N)
            del V
            dev_max = max(dev_max, checked(dev, m))
            H = np.exp((D - 1.0) * L)
            if m % stride == 0 or m == p:
                stored[m] = L
    else:
        # value only: one working vector, every operation in place
        H = f.copy()
        for m in range(1, p + 1):
            if m > 1:
                H *= f  # v = f H_{m-1}
            T(H)  # V_m
            dev_max = max(dev_max, checked(abs(H[0] - 1.0), m))
            _ipow_inplace(H, q - 1)
            H *= Kh
            T(H)
            H /= N  # message - 1
            complex_log1p(H, out=H)
            H *= D - 1.0
            np.exp(H, out=H)  # H_m

    # root constraint
    H_p = H if gradient else None
    if gradient:
        u = f * H
    else:
        H *= f
        u = H
        del f
    root_norm = abs(u.sum() - 1.0)
    dev_max = max(dev_max, checked(root_norm, p + 1))
    _flip_time0(u, p)
    U = T(u)
    del H
    if not gradient:
        del Kh
    Sh = np.sin(phase_vector(g) / 2.0)
    T(Sh)
    if gradient:
        Y = _ipow(U, q)
    else:
        _ipow_inplace(U, q)
        Y = U
    corr = 1j * np.dot(Y, Sh) / N
    del Y
    nu_c = 0.5 + 0.5 * corr
    residuals = {"sum_fH": dev_max, "imag_value": float(abs(nu_c.imag))}

    grad = None
    if gradient:
        grad = _backward(q, D, p, N, g, b, f, phase, Kh, Sh, H_p, U, stored, stride, T, residuals)

    return _result(q, D, g, b, corr, residuals, grad, t0, T.count)


def _backward(q, D, p, N, g, b, f, phase, Kh, Sh, H_p, U, stored, stride, T, residuals):
    """Reverse sweep (holomorphic adjoints; the value is real for real angles)."""
    n = n_sites(p)
    # nu = 1/2 + (i / 2N) sum_k U^q Sh
    coef = 0.5j / N
    Ubar = _ipow(U, q - 1)
    Shbar = (coef * Ubar) * U
    Ubar *= coef * q
    Ubar *= Sh
    ubar = T(Ubar)  # adjoint of W is W
    _flip_time0(ubar, p)  # u = f H a0
    fbar = ubar * H_p
    Hbar = ubar * f
    del ubar
    Khbar = np.zeros(N, dtype=complex)

    cache = stored  # checkpoints; entries are dropped once the sweep is below them

    def get_L(m):
        """L_m (None for m = 0, H_0 = 1), recomputing from the last checkpoint."""
        if m == 0:
            return None
        if m not in cache:
            c = max(k for k in list(cache) + [0] if k < m)
            H = None if c == 0 else np.exp((D - 1.0) * cache[c])
            for k in range(c + 1, m + 1):
                Lk, _, _ = _step(f, H, Kh, q, D, T, N)
                cache[k] = Lk
                H = np.exp((D - 1.0) * Lk)
        return cache[m]

    for m in range(p, 0, -1):
        L_m = get_L(m)
        L_prev = get_L(m - 1)
        H_prev = None if L_prev is None else np.exp((D - 1.0) * L_prev)
        # H_m = exp((D-1) log1p(mm1)) -> mm1bar = Hbar (D-1) exp((D-2) L_m)
        Xbar = Hbar * ((D - 1.0) * np.exp((D - 2.0) * L_m))
        del Hbar
        T(Xbar)
        Xbar /= N  # mm1 = W(X)/N
        v = f * H_prev if H_prev is not None else f.copy()
        V = T(v)
        if q > 2:
            Vq2 = _ipow(V, q - 2)
            Khbar += Xbar * (Vq2 * V)
            Vbar = Xbar * Kh
            Vbar *= (q - 1) * Vq2
            del Vq2
        else:
            Khbar += Xbar * V
            Vbar = Xbar * Kh
        del V, Xbar
        vbar = T(Vbar)
        if H_prev is not None:
            fbar += vbar * H_prev
        else:
            fbar += vbar
        Hbar = vbar * f
        del vbar
        for k in [k for k in cache if k >= m]:  # no longer needed below step m
            cache.pop(k)

    # gamma: through Kh = W(cos(phase/2) - 1) and Sh = W(sin(phase/2))
    T(Khbar)
    T(Shbar)
    phasebar = Shbar * (0.5 * np.cos(phase / 2.0)) - Khbar * (0.5 * np.sin(phase / 2.0))
    del Khbar, Shbar
    Gam_bar = _site_sums(phasebar, n)
    gamma_bar = Gam_bar[:p] - Gam_bar[n - 1 : p : -1]
    # beta: d f / d b_t (a) = sigma_t i f(a with the link-t spin product flipped)
    beta_bar = np.zeros(p, dtype=complex)
    for t in range(2 * p):
        block = 1 << (n - 1 - t)
        flipped = f.reshape(-1, block)[:, ::-1]
        beta_bar[link_beta_index(p, t)] += link_sign(p, t) * 1j * np.sum(fbar.reshape(-1, block) * flipped)
    residuals["imag_gradient"] = float(max(np.max(np.abs(gamma_bar.imag)), np.max(np.abs(beta_bar.imag))))
    return {"gamma": gamma_bar.real.copy(), "beta": beta_bar.real.copy()}
