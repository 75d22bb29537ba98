"""Reference energies of a mixture: the ground state (GS) and the algorithmic threshold (ALG).

What it computes: both from the zero-temperature variational functional (``_functional``),
and the small sourced table of ground-state values shipped with the tool (``_table``).

May import: numpy, scipy and :mod:`leadline.kernels.mixture`.

The names below are imported on first use, so importing the package stays light.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "Discretization": "_functional",
    "ReferenceValue": "_functional",
    "References": "_functional",
    "algorithmic_threshold": "_functional",
    "extrapolate_in_steps": "_functional",
    "ground_state": "_functional",
    "reference_energies": "_functional",
    "ReferenceRangeError": "_functional",
    "check_physical": "_functional",
    "step_functional": "_functional",
    "METHOD_VERSION": "_functional",
    "COARSE": "_functional",
    "ShippedValue": "_table",
    "GroundStateMatch": "_table",
    "SHIPPED_GROUND_STATES": "_table",
    "lookup_ground_state": "_table",
    "union_bound": "_table",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
