"""The bosonic-bath engine: V_p(gamma, beta) from one spin coupled to a Gaussian bath.

Computes the same infinite-size QAOA energy density V_p as the exact path-sum iteration,
for any mixture xi, from an equivalent form: one spin coupled to bosonic modes whose field
correlations are xi' of the spin's own two-time correlations.  The state (spin x modes) is
either a dense Fock-space array (small p, the reference) or a matrix product state with
per-mode Fock cut-offs and a bond cap chi; the modes are the bath's principal modes
(step-by-step form) or the causal Cholesky modes (one sweep).  :func:`evaluate_bath` runs two
truncations and reports the larger one's value with |difference| as its error estimate.
"""

from .dense import DenseState
from .engine import BASES, BathRun, bath_correlations, run_bath
from .estimate import BathEvaluation, evaluate_bath, larger_truncation
from .modes import bath_matrix, cholesky_row, fock_levels, layer_unitaries, mode_amplitudes, principal_factor
from .mps import MPSState

__all__ = [
    "BASES",
    "BathEvaluation",
    "BathRun",
    "DenseState",
    "MPSState",
    "bath_correlations",
    "bath_matrix",
    "cholesky_row",
    "evaluate_bath",
    "fock_levels",
    "larger_truncation",
    "layer_unitaries",
    "mode_amplitudes",
    "principal_factor",
    "run_bath",
]
