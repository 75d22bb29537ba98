"""Finite-size checks: sampled instances, concrete instances and the exact statevector QAOA.

What it computes: instances sampled exactly from the mixture's ensemble and their QAOA energy
by statevector (``_statevector``); concrete cost functions read from text or JSON, their
empirical mixture, angle rescaling, girth and statevector check, used by ``transfer``
(``_instance``).

May import: numpy, :mod:`leadline.kernels.mixture`, and :mod:`leadline.kernels.sparse` (the
prediction for a sparse instance).

The names below are imported on first use, so importing the package stays light.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "MAX_SPINS": "_statevector",
    "odd_set_count": "_statevector",
    "subset_variances": "_statevector",
    "walsh_hadamard": "_statevector",
    "sample_couplings": "_statevector",
    "sample_diagonal": "_statevector",
    "qaoa_state": "_statevector",
    "apply_phase": "_statevector",
    "mix_qubit": "_statevector",
    "energy_density": "_statevector",
    "FiniteSizeEstimate": "_statevector",
    "estimate_energy_density": "_statevector",
    "FORMAT": "_instance",
    "VERSION": "_instance",
    "MAX_STATEVECTOR_SPINS": "_instance",
    "DEFAULT_STATEVECTOR_SPINS": "_instance",
    "MAX_INDEX": "_instance",
    "InstanceError": "_instance",
    "Instance": "_instance",
    "SparseStructure": "_instance",
    "parse_instance": "_instance",
    "parse_instance_text": "_instance",
    "parse_instance_json": "_instance",
    "empirical_mixture": "_instance",
    "shape_distance": "_instance",
    "girth": "_instance",
    "instance_diagonal": "_instance",
    "statevector_bytes": "_instance",
    "StatevectorCheck": "_instance",
    "statevector_check": "_instance",
    "evolve": "_instance",
    "Rescaling": "_instance",
    "rescale_angles": "_instance",
    "sparse_reference": "_instance",
    "sparse_prediction": "_instance",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
