"""The bath MPS, block-sparse by the parity X (x) prod_k (-1)^(n_k).

Spin flip times total boson parity commutes with every layer: the one-mode generator
c b + c* b^+ is odd under the mode's parity (also cut to d levels) and X maps Z to -Z; the mixer
exp(-i b X) commutes with X; |+>|vacuum> is even.  So the state stays in one sector, and with
the spin written in the X basis (|+>: parity 0, |->: parity 1) and every Fock level n of parity
n mod 2, each bond index has a definite parity (that of everything left of it).  A site tensor
is stored as blocks keyed (left parity, physical parity), of shape (D_l[q], d[m], D_r[q ^ m]):
half the numbers of the dense tensor, and every QR and SVD splits into two blocks.

The layer exp(-i g Z (x) B) = 1 (x) A + Z (x) B' with U_k(z) = E_k + z F_k (E_k = cos(g G_k)
even, F_k = -i sin(g G_k) odd): A collects the products with an even number of F, B' those with
an odd number.  As an operator of bond dimension 2 the bond label r is the parity of the
operator so far (Z and F odd), which ends at 0; the new bond index (r, a) has parity r ^ par(a).

Z on the spin (the carried states of tiny pivots) flips the sector: every bond label flips.
Same interface as :class:`MPSState` (the dense-tensor MPS, kept as the reference the tests
compare with to 1e-12).
"""

from __future__ import annotations

import numpy as np

from ._mps import _svd

__all__ = ["ParityMPS"]


def _levels(d: int, m: int) -> np.ndarray:
    return np.arange(m, d, 2)


class ParityMPS:
    """Block-sparse MPS over (spin, mode sites), centre on the spin (site 0)."""

    def __init__(self, blocks, dims, chi, cutoff, discarded=0.0):
        self.blocks = blocks  # blocks[j][(q, m)]: (D_l[q], d_m, D_r[q ^ m])
        self.dims = dims  # physical dimension of each site (site 0: 2)
        self.chi = chi
        self.cutoff = cutoff
        self.discarded = discarded

    @classmethod
    def initial(cls, dims: list[int], chi: int | None = None, cutoff: float = 1e-16) -> "ParityMPS":
        """Spin in |+> (parity 0 in the X basis), every mode in its vacuum."""
        all_dims = [2, *dims]
        blocks = []
        for d in all_dims:
            b = {}
            for q in (0, 1):
                for m in (0, 1):
                    dl = 1 if q == 0 else 0
                    dr = 1 if (q ^ m) == 0 else 0
                    b[(q, m)] = np.zeros((dl, len(_levels(d, m)), dr), complex)
            b[(0, 0)][0, 0, 0] = 1.0
            blocks.append(b)
        return cls(blocks, all_dims, chi, cutoff)

    def copy(self) -> "ParityMPS":
        return ParityMPS([{k: v.copy() for k, v in b.items()} for b in self.blocks], list(self.dims), self.chi,
                         self.cutoff, self.discarded)

    def bond_dimensions(self) -> list[int]:
        return [sum(self.blocks[j][(0, r)].shape[2] for r in (0, 1)) for j in range(len(self.blocks) - 1)]

    # ------------------------------------------------------------------ one-site operations
    def apply_z(self) -> "ParityMPS":
        """Z on the spin: |+> <-> |->, and every bond label flips (the state changes sector)."""
        b0 = self.blocks[0]
        self.blocks[0] = {(q, m): b0[(q, m ^ 1)] for q in (0, 1) for m in (0, 1)}
        for j in range(1, len(self.blocks)):
            b = self.blocks[j]
            self.blocks[j] = {(q, m): b[(q ^ 1, m)] for q in (0, 1) for m in (0, 1)}
        return self

    def apply_mixer(self, beta: float) -> None:
        """exp(-i beta X): phases e^(-i beta), e^(+i beta) on |+>, |->."""
        for (q, m), v in self.blocks[0].items():
            v *= np.exp(-1j * beta) if m == 0 else np.exp(1j * beta)

    def pad_site(self, j: int, d: int) -> None:
        old = self.dims[j]
        if d <= old:
            return
        for (q, m), v in list(self.blocks[j].items()):
            n_new = len(_levels(d, m))
            w = np.zeros((v.shape[0], n_new, v.shape[2]), complex)
            w[:, : v.shape[1], :] = v
            self.blocks[j][(q, m)] = w
        self.dims[j] = d

    # ------------------------------------------------------------------ the layer
    def apply_layer(self, ops: list) -> None:
        """Spin-controlled one-mode unitaries ops[k] = (U(+1), U(-1)) or None, then recompress."""
        last = max((k + 1 for k, op in enumerate(ops) if op is not None), default=0)
        if last == 0:
            return
        # spin site: r = 0 (identity) or r = 1 (Z = flip in the X basis); new right index (r, a)
        b0 = self.blocks[0]
        new0 = {}
        for q in (0, 1):
            for m in (0, 1):
                # block (q, m): right parity q ^ m; parts r = 0 (old (q, m)), r = 1 (old (q, m ^ 1))
                new0[(q, m)] = np.concatenate([b0[(q, m)], b0[(q, m ^ 1)]], axis=2)
        self.blocks[0] = new0  # new right index of parity r: [r_op = 0: old r | r_op = 1: old r ^ 1]
        for j in range(1, last + 1):
            op = ops[j - 1]
            d = self.dims[j]
            if op is None:
                E, F = np.eye(d), None
            else:
                E, F = (op[0] + op[1]) / 2, (op[0] - op[1]) / 2
            old = self.blocks[j]
            new = {}
            for q in (0, 1):
                for m in (0, 1):
                    rows = []
                    for rl in (0, 1):
                        src_q = q ^ rl  # old left parity of this part
                        cols = []
                        for rr in ((0, 1) if j < last else (0,)):
                            o = E if rl == rr else F
                            n_old = m ^ rl ^ rr
                            blk = old[(src_q, n_old)]
                            if o is None:
                                part = np.zeros((blk.shape[0], len(_levels(d, m)), blk.shape[2]), complex)
                            else:
                                sub = o[np.ix_(_levels(d, m), _levels(d, n_old))]
                                part = np.einsum("mn,lnr->lmr", sub, blk)
                            cols.append(part)
                        rows.append(np.concatenate(cols, axis=2))
                    new[(q, m)] = np.concatenate(rows, axis=0)
            self.blocks[j] = new
        self._recompress(last)

    def _recompress(self, last: int) -> None:
        bl = self.blocks
        dims = self.dims
        for j in range(last):  # QR left to right, block by right parity
            for qr in (0, 1):
                parts = [(q, qr ^ q) for q in (0, 1)]  # blocks (q, m) with q ^ m = qr
                mats = [bl[j][k].reshape(-1, bl[j][k].shape[2]) for k in parts]
                M = np.concatenate(mats, axis=0)
                if M.shape[0] == 0 or M.shape[1] == 0:
                    Q = np.zeros((M.shape[0], 0), complex)
                    R = np.zeros((0, M.shape[1]), complex)
                else:
                    Q, R = np.linalg.qr(M)
                k = Q.shape[1]
                off = 0
                for key, mat in zip(parts, mats):
                    Dl, dm = bl[j][key].shape[:2]
                    bl[j][key] = Q[off: off + mat.shape[0]].reshape(Dl, dm, k)
                    off += mat.shape[0]
                for m in (0, 1):
                    bl[j + 1][(qr, m)] = np.tensordot(R, bl[j + 1][(qr, m)], axes=([1], [0]))
        for j in range(last, 0, -1):  # SVD right to left, block by left parity, one truncation for both
            svds = []
            for ql in (0, 1):
                mats = [bl[j][(ql, m)] for m in (0, 1)]
                Dl = mats[0].shape[0]
                M = np.concatenate([x.reshape(Dl, -1) for x in mats], axis=1)
                if M.size == 0:
                    svds.append((np.zeros((Dl, 0), complex), np.zeros(0), np.zeros((0, M.shape[1]), complex), mats))
                else:
                    U, S, Vh = _svd(M)
                    svds.append((U, S, Vh, mats))
            S_all = np.concatenate([s[1] for s in svds])
            keep = self._keep(S_all)
            total = float(np.sum(S_all**2))
            order = np.argsort(-S_all, kind="stable")
            kept = np.zeros(S_all.size, bool)
            kept[order[:keep]] = True
            n0 = svds[0][1].size
            masks = [kept[:n0], kept[n0:]]
            self.discarded += float(np.sum(S_all[~kept] ** 2)) / total if total > 0 else 0.0
            for ql, ((U, S, Vh, mats), mask) in enumerate(zip(svds, masks)):
                U, S, Vh = U[:, mask], S[mask], Vh[mask]
                k = S.size
                off = 0
                for m, x in zip((0, 1), mats):
                    w = x.shape[1] * x.shape[2]
                    bl[j][(ql, m)] = Vh[:, off: off + w].reshape(k, x.shape[1], x.shape[2])
                    off += w
                US = U * S[None, :]
                for q in (0, 1):  # previous site's blocks with right parity ql
                    key = (q, ql ^ q)
                    bl[j - 1][key] = np.tensordot(bl[j - 1][key], US, axes=([2], [0]))
        nrm = np.sqrt(sum(float(np.sum(np.abs(v) ** 2)) for v in bl[0].values()))
        for v in bl[0].values():
            v /= nrm

    def _keep(self, S: np.ndarray) -> int:
        keep = S.size
        if self.chi is not None:
            keep = min(keep, self.chi)
        total = float(np.sum(S**2))
        if self.cutoff > 0 and total > 0:
            s = np.sort(S)  # ascending
            tail = np.cumsum(s**2) / total
            n_small = int(np.searchsorted(tail, self.cutoff, side="right"))
            keep = min(keep, max(1, S.size - n_small))
        return keep

    # ------------------------------------------------------------------ readout
    def _spin_env(self, ket: "ParityMPS"):
        """E_Z[q]: (bra right parity q) x (ket right parity q ^ 1) after the spin site, Z on it."""
        a, b = self.blocks[0], ket.blocks[0]
        return [np.einsum("lnr,lns->rs", np.conj(a[(0, q)]), b[(0, q ^ 1)]) for q in (0, 1)]

    def mode_readout(self) -> tuple[np.ndarray, list]:
        """(<Z b>, Fock-level populations) of every mode site 1..K, in one left-to-right sweep."""
        bl = self.blocks
        EZ = self._spin_env(self)
        a = bl[0]
        E1 = [np.einsum("lnr,lns->rs", np.conj(a[(0, q)]), a[(0, q)]) for q in (0, 1)]
        K = len(bl) - 1
        zb = np.zeros(K, complex)
        pops = []
        for j in range(1, len(bl)):
            A = bl[j]
            d = self.dims[j]
            pop = np.zeros(d)
            val = 0.0 + 0.0j
            newZ = [None, None]
            new1 = [None, None]
            for m in (0, 1):
                lv = _levels(d, m)
                for q in (0, 1):
                    # population: bra and ket block (q, m)
                    X = A[(q, m)]
                    EX = np.tensordot(E1[q], X, axes=([1], [0]))  # (bra l, n, r)
                    pop[lv] += np.real(np.einsum("lnr,lnr->n", np.conj(X), EX))
                    t = np.tensordot(np.conj(X), EX, axes=([0, 1], [0, 1]))
                    r = q ^ m
                    new1[r] = t if new1[r] is None else new1[r] + t
                    # Z-environment: bra (q, m), ket (q ^ 1, m') ; identity on the site: m' = m
                    Y = A[(q ^ 1, m)]
                    EY = np.tensordot(EZ[q], Y, axes=([1], [0]))
                    t = np.tensordot(np.conj(X), EY, axes=([0, 1], [0, 1]))
                    newZ[r] = t if newZ[r] is None else newZ[r] + t
                    # <Z b>: bra level n (parity m) in block (q, m), ket level n + 1 in block (q ^ 1, m ^ 1)
                    Yb = A[(q ^ 1, m ^ 1)]
                    lk = _levels(d, m ^ 1)
                    EYb = np.tensordot(EZ[q], Yb, axes=([1], [0]))  # (bra l, n_ket, r)
                    Mz = np.einsum("lnr,lkr->nk", np.conj(X), EYb)  # bra level index, ket level index
                    for i, n in enumerate(lv):
                        kpos = np.searchsorted(lk, n + 1)
                        if kpos < lk.size and lk[kpos] == n + 1:
                            val += Mz[i, kpos] * np.sqrt(n + 1)
            zb[j - 1] = val
            pops.append(pop)
            EZ, E1 = newZ, new1
        return zb, pops

    def z_overlap(self, other: "ParityMPS") -> complex:
        """<self| Z |other> (other in the opposite sector, as Z psi evolved is)."""
        E = self._spin_env(other)
        for j in range(1, len(self.blocks)):
            A, B = self.blocks[j], other.blocks[j]
            new = [None, None]
            for q in (0, 1):
                for m in (0, 1):
                    t = np.tensordot(np.conj(A[(q, m)]), np.tensordot(E[q], B[(q ^ 1, m)], axes=([1], [0])),
                                     axes=([0, 1], [0, 1]))
                    r = q ^ m
                    new[r] = t if new[r] is None else new[r] + t
            E = new
        return complex(E[0][0, 0]) if E[0].size else 0.0j

    def to_dense_tensors(self) -> list:
        """The same state as dense tensors in the Z basis of the spin and Fock order (for tests)."""
        out = []
        for j, b in enumerate(self.blocks):
            d = self.dims[j]
            Dl = [b[(q, 0)].shape[0] for q in (0, 1)]
            Dr = [b[(0, r)].shape[2] for r in (0, 1)]
            T = np.zeros((sum(Dl), d, sum(Dr)), complex)
            for q in (0, 1):
                for m in (0, 1):
                    lo = 0 if q == 0 else Dl[0]
                    r = q ^ m
                    ro = 0 if r == 0 else Dr[0]
                    x = b[(q, m)]
                    T[lo: lo + x.shape[0], _levels(d, m), ro: ro + x.shape[2]] = x
            if j == 0:  # X basis -> Z basis: |+> = (|0> + |1>)/sqrt2, |-> = (|0> - |1>)/sqrt2
                H = np.array([[1, 1], [1, -1]]) / np.sqrt(2)
                T = np.einsum("zs,lsr->lzr", H, T)
            out.append(T)
        return out
