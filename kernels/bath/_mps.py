"""A small matrix product state over (spin, mode_1, ..., mode_K) for the bath sweep.

Dense tensors: the reference for the parity block-sparse MPS of ``_parity`` (which the
one-state readout uses by default), and the state of the carried-state and principal forms.

Site 0 is the spin (dimension 2), site k the k-th bosonic mode cut to d_k Fock levels.
Tensors have shape (left bond, physical, right bond).  The state is kept in mixed canonical
form with its orthogonality centre on the spin, so the one-spin mixer costs nothing and each
truncation is the optimal one for that bond.

A layer exp(-i g Z (x) B_t) is a spin-controlled product of one-mode unitaries: an operator of
bond dimension 2 (the spin value z travels along the chain).  Applying it doubles the bonds up
to the last driven mode; a QR sweep to the right and an SVD sweep back to the spin restore the
canonical form and cut every bond to at most ``chi`` singular values (and drop those whose
squared share is below ``cutoff``).  The squared norm removed is added to ``discarded`` and the
state is renormalized.

Why an own MPS: the only operations needed are this controlled product, a one-site unitary and
the overlap <psi|Z|phi>; written directly on numpy/scipy SVDs they are ~100 lines, while a
general tensor-network library would need the controlled product expressed as an MPO and
would add a large dependency for no saving.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = ["MPSState", "mixer_matrix"]


def mixer_matrix(beta: float) -> np.ndarray:
    """exp(-i beta X) in the Z basis."""
    c, s = np.cos(beta), np.sin(beta)
    return np.array([[c, -1j * s], [-1j * s, c]])


def _svd(M: np.ndarray):
    try:
        return scipy.linalg.svd(M, full_matrices=False, lapack_driver="gesdd")
    except np.linalg.LinAlgError:  # gesdd can fail to converge; gesvd is slower but robust
        return scipy.linalg.svd(M, full_matrices=False, lapack_driver="gesvd")


class MPSState:
    """Matrix product state with centre on site 0 (the spin)."""

    def __init__(self, tensors: list[np.ndarray], chi: int | None, cutoff: float, discarded: float = 0.0):
        self.tensors = tensors
        self.chi = chi
        self.cutoff = cutoff
        self.discarded = discarded

    @classmethod
    def initial(cls, dims: list[int], chi: int | None = None, cutoff: float = 1e-16) -> "MPSState":
        """Spin in |+>, every mode in its vacuum (a product state, bonds 1)."""
        spin = np.zeros((1, 2, 1), complex)
        spin[0, :, 0] = 1 / np.sqrt(2)
        ts = [spin]
        for d in dims:
            t = np.zeros((1, d, 1), complex)
            t[0, 0, 0] = 1.0
            ts.append(t)
        return cls(ts, chi, cutoff)

    def copy(self) -> "MPSState":
        return MPSState([t.copy() for t in self.tensors], self.chi, self.cutoff, self.discarded)

    def apply_z(self) -> "MPSState":
        self.tensors[0][:, 1, :] *= -1
        return self

    def apply_spin(self, U: np.ndarray) -> None:
        self.tensors[0] = np.einsum("ab,lbr->lar", U, self.tensors[0])

    def apply_mixer(self, beta: float) -> None:
        """exp(-i beta X) on the spin."""
        self.apply_spin(mixer_matrix(beta))

    def bond_dimensions(self) -> list[int]:
        return [t.shape[2] for t in self.tensors[:-1]]

    def apply_layer(self, ops: list) -> None:
        """Spin-controlled one-mode unitaries ops[k] = (U(+1), U(-1)) or None, then recompress."""
        last = max((k + 1 for k, op in enumerate(ops) if op is not None), default=0)
        if last == 0:
            return
        ts = self.tensors
        A = ts[0]
        B = np.zeros((A.shape[0], 2, 2, A.shape[2]), complex)  # (l, s, z, r)
        B[:, 0, 0, :] = A[:, 0, :]
        B[:, 1, 1, :] = A[:, 1, :]
        ts[0] = B.reshape(A.shape[0], 2, 2 * A.shape[2])
        for j in range(1, last + 1):
            A = ts[j]
            op = ops[j - 1]
            Dl, d, Dr = A.shape
            if op is None:
                parts = [A, A]
            else:
                parts = [np.einsum("mn,lnr->lmr", op[z], A) for z in range(2)]
            if j < last:
                B = np.zeros((2, Dl, d, 2, Dr), complex)
                B[0, :, :, 0, :] = parts[0]
                B[1, :, :, 1, :] = parts[1]
                ts[j] = B.reshape(2 * Dl, d, 2 * Dr)
            else:
                ts[j] = np.concatenate(parts, axis=0)  # (z l, d, r): z summed into the right
        self._recompress(last)

    def _recompress(self, last: int) -> None:
        ts = self.tensors
        # left-to-right QR over sites 0..last-1 (sites after `last` are right-orthonormal)
        for j in range(last):
            Dl, d, Dr = ts[j].shape
            Q, R = np.linalg.qr(ts[j].reshape(Dl * d, Dr))
            ts[j] = Q.reshape(Dl, d, Q.shape[1])
            ts[j + 1] = np.tensordot(R, ts[j + 1], axes=([1], [0]))
        # right-to-left SVD truncation back to the spin
        for j in range(last, 0, -1):
            Dl, d, Dr = ts[j].shape
            U, S, Vh = _svd(ts[j].reshape(Dl, d * Dr))
            total = float(np.sum(S**2))
            keep = S.size
            if self.chi is not None:
                keep = min(keep, self.chi)
            if self.cutoff > 0 and total > 0:
                # drop the smallest values while their squared share stays below cutoff
                tail = np.cumsum((S[::-1] ** 2)) / total
                n_small = int(np.searchsorted(tail, self.cutoff, side="right"))
                keep = min(keep, max(1, S.size - n_small))
            dropped = float(np.sum(S[keep:] ** 2)) / total if total > 0 else 0.0
            self.discarded += dropped
            S = S[:keep]
            ts[j] = Vh[:keep].reshape(keep, d, Dr)
            ts[j - 1] = np.tensordot(ts[j - 1], U[:, :keep] * S[None, :], axes=([2], [0]))
        ts[0] /= np.linalg.norm(ts[0])

    def mode_readout(self) -> tuple[np.ndarray, list]:
        """(<Z b>, Fock-level populations) of every mode site 1..K, in one left-to-right sweep.

        With the centre on the spin and every site to its right right-orthonormal, the part of
        the chain right of site j contracts to the identity, so <Z_0 O_j> needs only the left
        transfer matrices: E_Z (Z on the spin) and E_1 (no operator) carried site by site.
        """
        ts = self.tensors
        Z = np.array([1.0, -1.0])
        A = ts[0]
        E = np.stack([np.einsum("lar,las->rs", np.conj(A) * Z[None, :, None], A),
                      np.einsum("lar,las->rs", np.conj(A), A)])
        zb = np.zeros(len(ts) - 1, complex)
        pops = []
        for j in range(1, len(ts)):
            A = ts[j]
            d = A.shape[1]
            # M[e, n, m] = sum_{l,l',r} E[e,l,l'] conj(A[l,n,r]) A[l',m,r]  (reduced matrix of the site)
            EA = np.einsum("elm,mnr->elnr", E, A, optimize=True)
            M = np.einsum("lkr,elnr->ekn", np.conj(A), EA, optimize=True)
            if d > 1:
                zb[j - 1] = np.sum(np.diagonal(M[0], 1) * np.sqrt(np.arange(1, d)))
            pops.append(np.real(np.diagonal(M[1])).copy())
            E = np.einsum("lnr,elns->ers", np.conj(A), EA, optimize=True)
        return zb, pops

    def pad_site(self, j: int, d: int) -> None:
        """Give site j (a mode) d >= its Fock levels; the new levels start empty (canonical form kept)."""
        A = self.tensors[j]
        if d > A.shape[1]:
            B = np.zeros((A.shape[0], d, A.shape[2]), complex)
            B[:, : A.shape[1], :] = A
            self.tensors[j] = B

    def z_overlap(self, other: "MPSState") -> complex:
        """<self| Z |other>."""
        a, b = self.tensors, other.tensors
        Z = np.array([1.0, -1.0])
        E = np.einsum("lar,las->rs", np.conj(a[0]) * Z[None, :, None], b[0])
        for j in range(1, len(a)):
            E = np.einsum("ab,anr,bns->rs", E, np.conj(a[j]), b[j], optimize=True)
        return complex(E[0, 0])
