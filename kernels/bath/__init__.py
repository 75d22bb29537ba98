"""The bosonic-bath engine: V_p(gamma, beta) from one spin coupled to a Gaussian bath.

Computes the same infinite-size QAOA energy density V_p as the exact path-sum iteration,
for any mixture xi, from an equivalent form: one spin coupled to bosonic modes whose field
correlations are xi' of the spin's own two-time correlations.  The state (spin x modes) is
either a dense Fock-space array (small p, the reference) or a matrix product state with
per-mode Fock cut-offs and a bond cap chi; the modes are the bath's principal modes
(step-by-step form) or the causal Cholesky modes (one sweep).  :func:`evaluate_bath` tightens
the truncation until its error estimate meets the tolerance asked for.

Modules (private): ``_dense``, ``_mps``, ``_parity`` (the states: Fock array, dense-tensor MPS,
parity block-sparse MPS), ``_modes`` (bath modes and bases),
``_engine`` (one run), ``_estimate`` (the tolerance ladder and its error estimate), ``_optimize``
(optimal angles by noise-aware finite differences).  May import: numpy,
scipy.linalg and the contour layout of :mod:`leadline.kernels.exact` (``_optimize`` also its
evaluation, for the exact-Hessian preconditioner, :mod:`leadline.kernels.optimize`, and the
first-moment bound of :mod:`leadline.kernels.reference`).  Names are imported on
first use.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "DenseState": "_dense",
    "BASES": "_engine",
    "BathRun": "_engine",
    "BathLimitError": "_engine",
    "bath_correlations": "_engine",
    "run_bath": "_engine",
    "readout_sweep": "_engine",
    "BathEvaluation": "_estimate",
    "evaluate_bath": "_estimate",
    "cutoff_after_breakdown": "_estimate",
    "DEFAULT_TOLERANCE": "_estimate",
    "DEFAULT_BOND_CAP": "_estimate",
    "DEFAULT_FOCK_CAP": "_estimate",
    "bath_matrix": "_modes",
    "cholesky_row": "_modes",
    "fock_levels": "_modes",
    "layer_unitaries": "_modes",
    "mode_amplitudes": "_modes",
    "principal_factor": "_modes",
    "MPSState": "_mps",
    "BathOptimization": "_optimize",
    "optimize_bath_depth": "_optimize",
    "bath_point": "_optimize",
    "fourier_basis": "_optimize",
    "preconditioner": "_optimize",
    "pad_inverse_hessian": "_optimize",
    "stalled": "_optimize",
    "EngineBreakdown": "_optimize",
    "plausible": "_optimize",
    "exact_fourier_gradient": "_optimize",
    "hessian_depth": "_optimize",
    "search_settings": "_optimize",
    "ParityMPS": "_parity",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
