"""The report model: what a depth table says, built from a study's stored depths.

Reads only the store's read API (``leadline.storage.open_study`` ->
StudyReader with ``.name``, ``.spec``, ``.ensembles()``, ``.ensemble(label)``,
``.depths(label)``), or any object with the same methods, such as
:class:`InMemoryStudy` (tests, published numbers).

For each ensemble it builds one :class:`EnsembleReport`: one row per finished
depth (p, 1/p, V_p*, gain over p-1, ratios to the reference energies
(``_references``), final gradient norm), the extrapolation of V_p* to
p -> infinity (``kernels.extrapolate``), the power-law fit of the gap to the
ground state and the depths it predicts.  The renderers (``_markdown``,
``_csv_json``, ``_plots``) only format a :class:`StudyReport`; what a table says
is decided here.

Energies are energy densities per spin (dimensionless) in the normalization
E[H(z)H(z')] = n xi(R); the tool maximizes V_p.  Where no ground state is known
the ratio columns are left out, with a note.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from leadline.kernels.extrapolate import (
    DEFAULT_TARGET_RATIOS,
    ESTIMATE_NOTE,
    FAMILIES,
    UNPHYSICAL,
    Extrapolation,
    extrapolate,
)
from leadline.kernels.numtext import fmt
from leadline.kernels.reference import lookup_ground_state, union_bound

from ._references import References, computed_references, ensemble_mixture, finite_or_none, resolve_references
from ._universality import universality_views

__all__ = [
    "InMemoryStudy",
    "load_study",
    "DepthRow",
    "EnsembleReport",
    "StudyReport",
    "build_ensemble_report",
    "build_report",
    "TABLE_FORMAT",
    "TABLE_VERSION",
]

TABLE_FORMAT = "leadline.table"
TABLE_VERSION = 4  # 2: extrapolation by fit families with back-tests; 3: smooth weights, mixture range, family names;
#                  4: key "format_version" (was "version")


class InMemoryStudy:
    """A study held in memory with the same read API as the store's StudyReader.

    Parameters
    ----------
    name : str
    entries : sequence of (ensemble, depths)
        ``ensemble`` a dict {"label", "kind", "xi", "q", "degree", "reference"}
        as returned by ``StudyReader.ensemble``; ``depths`` a list of dicts
        {"p", "value", "gamma", "beta", "gradient_norm", ...} as returned by
        ``StudyReader.depths``.
    spec : dict, optional
    """

    def __init__(self, name: str, entries: Sequence[tuple[dict, list[dict]]], spec: dict | None = None):
        self.name = name
        self.spec = dict(spec or {})
        self._entries = {e["label"]: (dict(e), sorted(d, key=lambda r: r["p"])) for e, d in entries}

    def ensembles(self) -> list[str]:
        return list(self._entries)

    def ensemble(self, label: str) -> dict:
        return dict(self._entries[label][0])

    def depths(self, label: str) -> list[dict]:
        return [dict(r) for r in self._entries[label][1]]


def load_study(path: str | Path) -> Any:
    """Open a study store for reading (``leadline.storage.open_study``); InputError if that fails."""
    from ..errors import InputError

    path = Path(path)
    if not path.exists():
        raise InputError(f"study store {str(path)!r} does not exist: give the directory written by 'leadline sweep'")
    try:
        from leadline.storage import open_study
    except ImportError:  # pragma: no cover - the store package is part of the tool
        raise InputError("this installation has no study store support (leadline.storage.open_study)") from None
    from leadline.storage.errors import StoreDamagedError

    try:
        return open_study(path)
    except InputError:
        raise
    except StoreDamagedError as exc:  # its message names the store, the parts and what to do
        raise InputError(str(exc)) from None
    except Exception as exc:  # any failure to open is a bad path from the user's point of view
        raise InputError(f"cannot read study store {str(path)!r}: {exc}") from None


# ------------------------------------------------------------------- report
@dataclass(frozen=True)
class DepthRow:
    """One finished depth: V_p* (energy density per spin) and derived columns."""

    p: int
    value: float
    gain: float | None
    ratio_gs: float | None
    ratio_alg: float | None
    exceeds_alg: bool | None
    gradient_norm: float | None
    converged: bool | None
    gamma: tuple[float, ...]
    beta: tuple[float, ...]
    method: str = "exact"
    error_estimate: float | None = None

    @property
    def inv_p(self) -> float:
        return 1.0 / self.p

    def to_json(self) -> dict:
        return {
            "p": self.p,
            "inv_p": self.inv_p,
            "value": self.value,
            "gain": self.gain,
            "ratio_gs": self.ratio_gs,
            "ratio_alg": self.ratio_alg,
            "exceeds_alg": self.exceeds_alg,
            "gradient_norm": self.gradient_norm,
            "converged": self.converged,
            "gamma": list(self.gamma),
            "beta": list(self.beta),
            "method": self.method,
            "error_estimate": self.error_estimate,
        }


@dataclass
class EnsembleReport:
    label: str
    kind: str
    xi: str | None
    description: str
    references: References
    rows: list[DepthRow]
    extrapolation: Extrapolation | None
    notes: list[str] = field(default_factory=list)
    q: int | None = None
    degree: float | None = None

    def to_json(self) -> dict:
        return {
            "label": self.label,
            "kind": self.kind,
            "xi": self.xi,
            "q": self.q,
            "degree": self.degree,
            "description": self.description,
            "references": self.references.to_json(),
            "depths": [r.to_json() for r in self.rows],
            "extrapolation": self.extrapolation.to_json() if self.extrapolation else None,
            "notes": list(self.notes),
        }


@dataclass
class StudyReport:
    name: str
    ensembles: list[EnsembleReport]
    note: str = ESTIMATE_NOTE

    @property
    def universality(self) -> list[dict]:
        """Sparse ensembles scaled next to the dense q-spin V_p* (``_universality``)."""
        return universality_views(self.ensembles)

    def to_json(self) -> dict:
        return {
            "format": TABLE_FORMAT,
            "format_version": TABLE_VERSION,
            "study": self.name,
            "units": "energy density per spin, dimensionless; E[H(z)H(z')] = n xi(R); V_p is maximized",
            "note": self.note,
            "ensembles": [e.to_json() for e in self.ensembles],
            "universality": self.universality,
        }


def _describe(meta: Mapping) -> str:
    kind = meta.get("kind", "dense")
    if kind == "dense" and meta.get("xi"):
        mixture = ensemble_mixture(meta)
        return f"xi(x) = {mixture.label()}" if mixture else f"xi = {meta['xi']}"
    parts = [kind]
    if meta.get("q") is not None:
        parts.append(f"q = {meta['q']}")
    if meta.get("degree") is not None:
        parts.append(f"degree {meta['degree']}")
    return ", ".join(parts)


def _value_uncertainty(rec: Mapping) -> float | None:
    """The stored uncertainty of V_p* of a depth record (None: exact): the bath engine's
    ``error_estimate``, or a ``value_uncertainty`` / ``uncertainty`` given with the value."""
    for key in ("error_estimate", "value_uncertainty", "uncertainty"):
        if rec.get(key) is not None:
            return rec.get(key)
    return None


def build_ensemble_report(
    meta: Mapping,
    depth_records: Sequence[Mapping],
    *,
    ground_state: float | None = None,
    computed: Any = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    at_depths: Iterable[int] = (),
) -> EnsembleReport:
    """Rows and extrapolation (``kernels.extrapolate``) of one ensemble (see module docstring)."""
    refs = resolve_references(meta, ground_state=ground_state, computed=computed)
    gs, alg = refs.ground_state, refs.threshold
    records = sorted(depth_records, key=lambda r: int(r["p"]))
    rows: list[DepthRow] = []
    previous: dict[int, float] = {}
    for rec in records:
        p, value = int(rec["p"]), float(rec["value"])
        gain = value - previous[p - 1] if (p - 1) in previous else None
        previous[p] = value
        rows.append(
            DepthRow(
                p=p,
                value=value,
                gain=gain,
                ratio_gs=value / gs if gs else None,
                ratio_alg=value / alg if alg else None,
                exceeds_alg=(value > alg) if alg is not None else None,
                gradient_norm=finite_or_none(rec.get("gradient_norm")),
                converged=rec.get("converged"),
                gamma=tuple(float(x) for x in rec.get("gamma", ())),
                beta=tuple(float(x) for x in rec.get("beta", ())),
                method=str(rec.get("method", "exact")),
                error_estimate=finite_or_none(rec.get("error_estimate")),
            )
        )

    notes: list[str] = []
    stopped = [r.p for r in rows if r.converged is False]
    if stopped:
        notes.append(
            f"not converged at p = {', '.join(map(str, stopped))}: the optimizer stopped before the gradient norm "
            "reached the gradient tolerance (gradient-tol), so V_p* there may lie slightly below that depth's optimum"
        )
    if meta.get("kind") == "sparse":
        pass  # a satisfied fraction has no ground-state ratio; the universality view compares it
    elif gs is None:
        notes.append(
            "no reference ground-state energy known for this ensemble: ratio columns and the "
            "gap fit are left out (give one with --ground-state or in the spec)"
        )
    elif refs.ground_state_origin == "shipped table" and "from memory" in (refs.ground_state_source or ""):
        notes.append("the ground-state value is recalled (from memory), not checked against its source")
    if alg is None and meta.get("kind") != "sparse":
        notes.append("algorithmic threshold not known for this ensemble: V_p*/ALG columns left out")
    mixture = ensemble_mixture(meta)
    shipped = lookup_ground_state(mixture) if mixture is not None else None
    if computed is not None and getattr(computed, "details", None) is not None:
        from ._references import short_of_tolerance

        short = short_of_tolerance(computed)
        for key, name, origin in (("ground_state", "GS", refs.ground_state_origin),
                                  ("algorithmic_threshold", "ALG", refs.threshold_origin)):
            if key in short and origin == "computed":
                notes.append(f"the computed {name} uncertainty is {short[key]}")
    stored_gs = finite_or_none(getattr(computed, "ground_state", None)) if computed is not None else None
    if stored_gs is not None and refs.ground_state_origin == "shipped table":
        stored_unc = finite_or_none(getattr(computed, "ground_state_uncertainty", None))
        notes.append(
            f"the store also holds a computed GS {stored_gs:.6f}"
            + (f" +- {stored_unc:.1e}" if stored_unc is not None else "")
            + "; the shipped value is more precise and is the one used"
        )
    if gs is not None and shipped is not None and refs.ground_state_origin != "shipped table":
        allowed = shipped.uncertainty + (refs.ground_state_uncertainty or 0.0)
        verdict = "agrees with" if abs(gs - shipped.ground_state) <= allowed else "DIFFERS from"
        notes.append(
            f"GS ({refs.ground_state_origin}) {verdict} the shipped value {fmt(shipped.ground_state)} "
            f"+- {shipped.uncertainty:.1e} ({shipped.source}); difference {gs - shipped.ground_state:+.1e}"
        )

    # ALG below GS beyond both uncertainties (an overlap gap): only then is "the depth where
    # V_p* reaches ALG" a different question from reaching GS
    separated = None
    if gs is not None and alg is not None:
        separated = gs - alg > (refs.ground_state_uncertainty or 0.0) + (refs.threshold_uncertainty or 0.0)
        if not separated:
            notes.append("ALG equals GS within their uncertainties (no overlap gap): no separate depth to reach ALG")
    depths = [r.p for r in rows]
    values = [r.value for r in rows]
    # depths from an approximate engine carry a standard uncertainty of V_p*; exact depths none
    uncertainties = [finite_or_none(_value_uncertainty(rec)) for rec in records]
    dense = meta.get("kind", "dense") == "dense"
    extrap = None
    if len(rows) >= 2:
        extrap = extrapolate(
            depths, values,
            uncertainties=uncertainties if any(u for u in uncertainties) else None,
            ground_state=gs if dense else None,
            ground_state_uncertainty=(refs.ground_state_uncertainty or 0.0) if dense else 0.0,
            upper_bound=union_bound(mixture) if mixture is not None else (1.0 if not dense else None),
            upper_bound_name="the first-moment bound" if mixture is not None else "a satisfied fraction's maximum",
            threshold=alg if (dense and separated) else None,
            target_ratios=target_ratios,
            at_depths=at_depths,
        )
    else:
        notes.append("fewer than two finished depths: no extrapolation")
    if dense and gs is not None and any(v >= gs for v in values):
        notes.append("some V_p* is at or above the reference ground state: anchored power law skipped; check the reference")
    if extrap is not None:
        flagged = [w for w in extrap.fits if w.status == UNPHYSICAL]
        if flagged:
            top = max(w.fit.peak_beyond(float(depths[-1])) for w in flagged)
            names = sorted({w.family for w in flagged}, key=list(FAMILIES).index)
            notes.append(
                f"{len(flagged)} back-tested fit(s) ({', '.join(names)}) extrapolate above the upper "
                f"bound ({extrap.bound_name}) = {fmt(extrap.upper_bound, 4)} (up to {fmt(top, 4)}): flagged unphysical and "
                "given weight 0 in the headline"
            )
        if extrap.declined is None and extrap.limit is None:
            notes.append("no fit was back-tested and stays physical: no headline extrapolation")

    return EnsembleReport(
        label=str(meta.get("label")),
        kind=str(meta.get("kind", "dense")),
        xi=meta.get("xi"),
        description=_describe(meta),
        references=refs,
        rows=rows,
        extrapolation=extrap,
        notes=notes,
        q=int(meta["q"]) if meta.get("q") is not None else None,
        degree=float(meta["degree"]) if meta.get("degree") is not None else None,
    )


def build_report(
    study: Any,
    *,
    ground_states: Mapping[str | None, float] | None = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    at_depths: Iterable[int] = (),
) -> StudyReport:
    """Report of every ensemble of ``study`` (StudyReader or InMemoryStudy), in spec order.

    Parameters
    ----------
    ground_states : dict {label or None: value}, optional
        Ground-state values given on the command line; the key None applies
        to every ensemble without its own entry.
    at_depths : iterable of int
        Depths at which V_p (and V_p/GS) is predicted from the extrapolation.
    """
    at_depths = tuple(at_depths)
    ground_states = dict(ground_states or {})
    reports = []
    for label in study.ensembles():
        meta = dict(study.ensemble(label))
        meta.setdefault("label", label)
        override = ground_states.get(label, ground_states.get(None))
        computed = computed_references(study, label, meta)
        reports.append(
            build_ensemble_report(
                meta, study.depths(label), ground_state=override, computed=computed, target_ratios=target_ratios,
                at_depths=at_depths,
            )
        )
    return StudyReport(name=str(getattr(study, "name", "study")), ensembles=reports)
