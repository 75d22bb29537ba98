"""Bath matrices, mode bases and the single-mode displacement of one layer.

The bath of the spin-boson form is a Gaussian field B_t = sum_k C[t, k] b_k + h.c. over
phase layers t = 1..p, with modes b_k in their vacuum.  Its two-point function is

    <B_t B_s> = sum_k C[t, k] conj(C[s, k]) = xi'(W(t, s))    (s <= t),

W the spin's own two-time correlation <Z_t Z_s>.  Elementwise xi' of a Hermitian positive
semidefinite matrix is again one (Schur product theorem; xi' has non-negative
coefficients), so a factor C with C C^H = xi'(W) exists.  Two factorizations are offered:

* ``cholesky``: C lower triangular, built row by row while the spin evolves (mode k is
  first touched at layer k; causal, one sweep).
* ``principal``: C = U sqrt(Lambda) from the eigendecomposition of the whole bath matrix,
  modes ordered by eigenvalue, largest first (needs the whole W: step-by-step form).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "bath_matrix",
    "cholesky_row",
    "principal_factor",
    "mode_amplitudes",
    "fock_levels",
    "layer_unitaries",
]


def bath_matrix(mixture, W: np.ndarray) -> np.ndarray:
    """Hermitian bath matrix xi'(W) from the lower triangle of the spin correlations W (p x p)."""
    L = np.tril(mixture.dxi(np.tril(W)))
    B = L + np.conj(np.tril(L, -1)).T
    np.fill_diagonal(B, np.real(np.diag(B)))
    return B


def cholesky_row(C: np.ndarray, t: int, row: np.ndarray) -> float:
    """Fill row t of the lower-triangular factor C in place from bath row W_B(t, 0..t).

    Forward substitution: sum_{k<=s} C[t,k] conj(C[s,k]) = W_B(t,s) for s < t, then
    C[t,t] = sqrt(W_B(t,t) - sum_k |C[t,k]|^2).  A zero pivot (a bath row already spanned by
    earlier modes, e.g. a zero angle) leaves the rest of that column zero.
    Returns the Schur remainder W_B(t,t) - sum_k |C[t,k]|^2 before it is clipped at 0 (negative:
    the bath row is not consistent with a positive semidefinite bath, i.e. W is too inexact).
    """
    for s in range(t):
        acc = row[s] - np.dot(C[t, :s], np.conj(C[s, :s]))
        piv = C[s, s].real
        C[t, s] = acc / piv if piv > 1e-14 else 0.0
    rest = float(np.real(row[t])) - float(np.sum(np.abs(C[t, :t]) ** 2))
    C[t, t] = np.sqrt(max(rest, 0.0))
    return rest


def principal_factor(WB: np.ndarray, rel_tol: float = 1e-13) -> tuple[np.ndarray, np.ndarray]:
    """(C, eigenvalues): C = U sqrt(Lambda), columns by eigenvalue (largest first).

    Eigenvalues below rel_tol * largest (rounding, or exact zeros of a rank-deficient bath)
    are dropped with their modes.
    """
    lam, U = np.linalg.eigh(WB)
    order = np.argsort(lam)[::-1]
    lam, U = lam[order], U[:, order]
    keep = lam > rel_tol * max(lam[0], 1e-300)
    lam, U = lam[keep], U[:, keep]
    return U * np.sqrt(lam)[None, :], lam


def mode_amplitudes(gamma: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Bound on each mode's displacement amplitude: a_k = sum_t |gamma_t C[t, k]|.

    A mode driven by displacements of total amplitude a holds at most a coherent state of
    mean occupation a^2; the Fock cut-off of the mode follows from it (:func:`fock_levels`).
    """
    return np.abs(np.asarray(gamma)[:, None] * C).sum(axis=0)


def fock_levels(amplitudes: np.ndarray, fock: int, tail: int = 2) -> list[int]:
    """Per-mode Fock cut-offs: ``fock`` levels for the most driven mode, fewer for the rest.

    d_k = max(tail, ceil(fock * a_k / a_max)): the width of a coherent state's Fock
    distribution grows like its amplitude, so the levels scale with a_k.  ``fock`` levels for
    every mode is ``tail = fock``.
    """
    a = np.asarray(amplitudes, float)
    amax = float(a.max()) if a.size else 0.0
    if amax <= 0:
        return [1] * a.size
    return [int(min(fock, max(tail, np.ceil(fock * x / amax - 1e-12)))) for x in a]


def _ladder(d: int) -> np.ndarray:
    """Truncated annihilation operator on d Fock levels."""
    return np.diag(np.sqrt(np.arange(1, d, dtype=float)), 1)


def layer_unitaries(g: float, row: np.ndarray, dims: list[int]) -> list:
    """Per mode k: (U_k(+1), U_k(-1)) with U_k(z) = exp(-i g z (c_k b_k + conj(c_k) b_k^+)).

    The Hermitian generator is cut to dims[k] Fock levels before exponentiating, so each U
    is exactly unitary on the truncated space.  Modes with c_k = 0 (or one level) get None.
    """
    ops = []
    for c, d in zip(row, dims):
        if d <= 1 or abs(g * c) == 0.0:
            ops.append(None)
            continue
        a = _ladder(d)
        H = c * a + np.conj(c) * a.T
        e, V = np.linalg.eigh(H)
        Up = (V * np.exp(-1j * g * e)[None, :]) @ V.conj().T
        Um = (V * np.exp(1j * g * e)[None, :]) @ V.conj().T
        ops.append((Up, Um))
    return ops
