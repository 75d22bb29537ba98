"""Dense Fock-space state of one spin and K bosonic modes: the small-p reference.

The state is an array of shape (2, d_1, ..., d_K) (spin index 0: Z = +1, index 1: Z = -1),
so memory is 2 prod_k d_k complex numbers: use for p <= ~5.
"""

from __future__ import annotations

import numpy as np

__all__ = ["DenseState"]


class DenseState:
    """Spin (x) modes as one dense array; the operations the bath sweep needs."""

    discarded = 0.0  # never truncates

    def __init__(self, data: np.ndarray):
        self.data = data

    @classmethod
    def initial(cls, dims: list[int]) -> "DenseState":
        """Spin in |+>, every mode in its vacuum."""
        data = np.zeros((2, *dims), complex)
        data[(slice(None),) + (0,) * len(dims)] = 1 / np.sqrt(2)
        return cls(data)

    def copy(self) -> "DenseState":
        return DenseState(self.data.copy())

    def apply_z(self) -> "DenseState":
        """Z on the spin (in place); returns self."""
        self.data[1] *= -1
        return self

    def apply_layer(self, ops: list) -> None:
        """Spin-controlled displacements: for spin value z, mode k gets ops[k][z-index]."""
        for zi in range(2):
            sub = self.data[zi]
            for k, op in enumerate(ops):
                if op is None:
                    continue
                sub = np.moveaxis(np.tensordot(op[zi], sub, axes=([1], [k])), 0, k)
            self.data[zi] = sub

    def apply_spin(self, U: np.ndarray) -> None:
        """A one-spin unitary (the mixer)."""
        self.data = np.tensordot(U, self.data, axes=([1], [0]))

    def mode_readout(self) -> tuple[np.ndarray, list]:
        """(<Z b_k>, populations of mode k's Fock levels) for every mode k."""
        K = self.data.ndim - 1
        zb = np.zeros(K, complex)
        pops = []
        for k in range(K):
            d = self.data.shape[k + 1]
            x = np.moveaxis(self.data, k + 1, 1)
            if d > 1:
                lower = np.conj(x[:, :-1]) * x[:, 1:] * np.sqrt(np.arange(1, d)).reshape(1, -1, *([1] * (K - 1)))
                zb[k] = lower[0].sum() - lower[1].sum()
            pops.append(np.sum(np.abs(np.moveaxis(x, 1, 0)) ** 2, axis=tuple(range(1, K + 1))))
        return zb, pops

    def apply_mixer(self, beta: float) -> None:
        """exp(-i beta X) on the spin."""
        c, s = np.cos(beta), np.sin(beta)
        self.apply_spin(np.array([[c, -1j * s], [-1j * s, c]]))

    def z_overlap(self, other: "DenseState") -> complex:
        """<self| Z |other>."""
        return complex(np.vdot(self.data[0], other.data[0]) - np.vdot(self.data[1], other.data[1]))

    def bond_dimensions(self) -> list[int]:
        return []
