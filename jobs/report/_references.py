"""Reference energies of an ensemble (ground state GS, algorithmic threshold ALG) and where they come from.

Energies are energy densities per spin (dimensionless) in the normalization
E[H(z)H(z')] = n xi(R); the tool maximizes V_p.

A table is a function of its store (and of what its command line says): it never reads the
user-wide cache of ``leadline reference --xi``, so the same store gives the same table
whatever that cache holds.  Precedence, highest first:
1. a ground-state value given on the command line (``--ground-state``);
2. a value given in the study spec (stored in the ensemble's "reference");
3. of the values computed by ``kernels.reference`` and recorded in the store
   (``leadline reference --store``) and the table shipped in ``kernels.reference``,
   the more precise one (smaller uncertainty; the shipped value on a tie).
ALG has no shipped values: it comes from the spec or from the store.
The table only reads: nothing here computes a reference energy.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture
from leadline.kernels.reference import lookup_ground_state

__all__ = ["References", "resolve_references", "computed_references", "ensemble_mixture", "finite_or_none",
           "short_of_tolerance"]


@dataclass(frozen=True)
class References:
    """Reference energies of one ensemble (energy density per spin) and where they come from.

    ``*_origin`` is one of "command line", "spec", "computed", "shipped table" (None when unknown).
    """

    ground_state: float | None = None
    ground_state_uncertainty: float | None = None
    ground_state_source: str | None = None
    ground_state_origin: str | None = None
    threshold: float | None = None
    threshold_uncertainty: float | None = None
    threshold_source: str | None = None
    threshold_origin: str | None = None

    def to_json(self) -> dict:
        return {
            "ground_state": self.ground_state,
            "ground_state_uncertainty": self.ground_state_uncertainty,
            "ground_state_source": self.ground_state_source,
            "ground_state_origin": self.ground_state_origin,
            "algorithmic_threshold": self.threshold,
            "algorithmic_threshold_uncertainty": self.threshold_uncertainty,
            "algorithmic_threshold_source": self.threshold_source,
            "algorithmic_threshold_origin": self.threshold_origin,
        }


def finite_or_none(x: Any) -> float | None:
    if x is None:
        return None
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def ensemble_mixture(meta: Mapping) -> Mixture | None:
    xi = meta.get("xi")
    if not xi or meta.get("kind", "dense") != "dense":
        return None
    try:
        return parse_mixture(xi)
    except MixtureError:
        return None


def resolve_references(
    meta: Mapping,
    *,
    ground_state: float | None = None,
    computed: Any = None,
) -> References:
    """Reference energies of one ensemble by precedence (see module docstring).

    Parameters
    ----------
    meta : dict
        The ensemble as returned by ``StudyReader.ensemble``; its "reference"
        dict may hold "ground_state" (and optionally "uncertainty", "source",
        "origin", "algorithmic_threshold", "algorithmic_threshold_uncertainty").
        Without an "origin" such values count as given in the spec.
    ground_state : float, optional
        Value given on the command line (highest precedence).
    computed : object, optional
        Result of ``kernels.reference.reference_energies`` (attributes
        ground_state, algorithmic_threshold and their uncertainties), e.g.
        read back from the store's cache.
    """
    ref = dict(meta.get("reference") or {})
    gs = gs_unc = gs_src = gs_origin = None
    alg = alg_unc = alg_src = alg_origin = None

    # 1. command line
    if ground_state is not None:
        gs, gs_src, gs_origin = float(ground_state), "given on the command line", "command line"

    # 2. spec (or an entry that the store marks as computed)
    ref_origin = ref.get("origin") or "spec"
    ref_gs = finite_or_none(ref.get("ground_state"))
    if gs is None and ref_gs is not None:
        gs = ref_gs
        gs_unc = finite_or_none(ref.get("uncertainty", ref.get("ground_state_uncertainty")))
        gs_src = ref.get("source") or ref.get("ground_state_source") or (
            "given in the spec" if ref_origin == "spec" else ref_origin
        )
        gs_origin = ref_origin
    ref_alg = finite_or_none(ref.get("algorithmic_threshold"))
    if ref_alg is not None:
        alg = ref_alg
        alg_unc = finite_or_none(ref.get("algorithmic_threshold_uncertainty"))
        alg_src = ref.get("algorithmic_threshold_source") or (
            "given in the spec" if ref_origin == "spec" else ref_origin
        )
        alg_origin = ref_origin

    # 3. computed by kernels.reference and recorded in the store, or the shipped table:
    #    the more precise ground state wins
    candidates = []
    if computed is not None:
        c_gs = finite_or_none(getattr(computed, "ground_state", None))
        c_alg = finite_or_none(getattr(computed, "algorithmic_threshold", None))
        if c_gs is not None:
            candidates.append((
                c_gs,
                finite_or_none(
                    getattr(computed, "ground_state_uncertainty", None)
                    or (getattr(computed, "uncertainties", None) or {}).get("ground_state")
                ),
                getattr(computed, "source", None)
                or "leadline reference: zero-temperature Parisi functional, Auffinger & Chen, Ann. Probab. 45 (2017)",
                "computed",
            ))
        if alg is None and c_alg is not None:
            alg, alg_origin = c_alg, "computed"
            alg_src = getattr(computed, "source", None) or (
                "leadline reference: incremental AMP threshold, El Alaoui, Montanari & Sellke, Ann. Probab. 49 (2021)"
            )
            alg_unc = finite_or_none(
                getattr(computed, "algorithmic_threshold_uncertainty", None)
                or (getattr(computed, "uncertainties", None) or {}).get("algorithmic_threshold")
            )
    mixture = ensemble_mixture(meta)
    match = lookup_ground_state(mixture) if mixture is not None else None
    if match is not None:
        candidates.append((match.ground_state, match.uncertainty, match.source, "shipped table"))
    if gs is None and candidates:
        # smallest uncertainty first (unknown counts as worst); the shipped value on a tie
        gs, gs_unc, gs_src, gs_origin = min(
            candidates, key=lambda c: (math.inf if c[1] is None else c[1], c[3] != "shipped table")
        )

    return References(gs, gs_unc, gs_src, gs_origin, alg, alg_unc, alg_src, alg_origin)


def computed_references(study: Any, label: str, meta: Mapping | None = None) -> Any:
    """GS/ALG computed by ``kernels.reference`` and recorded in this study's store, or None; never computes.

    Only the store is read (its reader method ``references(label)``, written by
    ``leadline reference --store``): a table does not change with the state of any cache.
    """
    getter = getattr(study, "references", None)
    if not callable(getter):
        return None
    try:
        return getter(label)
    except (KeyError, LookupError, ValueError, NotImplementedError):
        return None


def short_of_tolerance(refs) -> dict[str, str]:
    """{"ground_state" | "algorithmic_threshold": why} for each value whose uncertainty is above the
    tolerance asked for (the step limit was reached first); empty when both met it."""
    tols = refs.details.get("tolerances") or {}
    out = {}
    for key, unc, option in (("ground_state", refs.ground_state_uncertainty, "--gs-tol"),
                             ("algorithmic_threshold", refs.algorithmic_threshold_uncertainty, "--alg-tol")):
        tol = tols.get(key)
        if tol is not None and unc > tol:
            out[key] = (f"above the requested {option} {tol:.0e}: the limit of {tols.get('max_steps')} steps "
                        "was reached first (raise --max-steps)")
    return out
