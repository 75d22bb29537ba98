"""Depth tables and plots of a finished (or partly finished) study.

Reads only the store's read API (``leadline.storage.open_study`` ->
StudyReader with ``.name``, ``.spec``, ``.ensembles()``, ``.ensemble(label)``,
``.depths(label)``), or any object with the same methods, such as
:class:`InMemoryStudy` (tests, published numbers).

For each ensemble it builds one :class:`EnsembleReport`: one row per finished
depth (p, 1/p, V_p*, gain over p-1, ratios to the reference energies, final
gradient norm), the extrapolation of V_p* to p -> infinity
(``kernels.extrapolate``), the power-law fit of the gap to the ground state and
the depths it predicts.  Renderers turn a :class:`StudyReport` into Markdown,
CSV (one long table with a ``record`` column, readable with the csv module) or
one JSON object, and into two PNG figures.

Energies are energy densities per spin (dimensionless) in the normalization
E[H(z)H(z')] = n xi(R); the tool maximizes V_p.

Reference energies, highest precedence first:
1. a ground-state value given on the command line (``--ground-state``);
2. a value given in the study spec (stored in the ensemble's "reference");
3. ground state and algorithmic threshold computed by ``kernels.reference``
   and cached in the store (or found in the ensemble's "reference" with a
   "computed" origin);
4. the table shipped in ``kernels.reference``.
Where no ground state is known the ratio columns are left out, with a note.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from leadline.kernels.extrapolate import (
    DEFAULT_TARGET_RATIOS,
    ESTIMATE_NOTE,
    FAMILIES,
    SE_FACTOR,
    SPREAD_MEANING,
    UNPHYSICAL,
    Extrapolation,
    extrapolate,
)
from leadline.kernels.reference import lookup_ground_state, union_bound
from leadline.kernels.sparse import scaled_value
from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture
from .universality import render_universality_markdown, universality_views

__all__ = [
    "InMemoryStudy",
    "References",
    "DepthRow",
    "EnsembleReport",
    "StudyReport",
    "build_report",
    "resolve_references",
    "render_markdown",
    "render_csv",
    "render_json",
    "write_plots",
    "angle_plot_path",
    "CSV_COLUMNS",
    "load_study",
    "parse_ground_state_options",
    "parse_at_depths",
    "check_output_path",
    "write_text_atomic",
    "FIGURE_SIZE_INCHES",
    "FIGURE_DPI",
]

TABLE_FORMAT = "leadline.table"
TABLE_VERSION = 2  # 2: extrapolation by fit families with back-tests


# ------------------------------------------------------------------ sources
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
    from .errors import InputError

    path = Path(path)
    if not path.exists():
        raise InputError(f"study store {str(path)!r} does not exist: give the directory written by 'leadline sweep'")
    try:
        from leadline.storage import open_study
    except ImportError:  # pragma: no cover - the store package is part of the tool
        raise InputError("this installation has no study store support (leadline.storage.open_study)") from None
    try:
        return open_study(path)
    except InputError:
        raise
    except Exception as exc:  # any failure to open is a bad path from the user's point of view
        raise InputError(f"cannot read study store {str(path)!r}: {exc}") from None


def parse_ground_state_options(values: Sequence[str] | None, labels: Sequence[str]) -> dict:
    """['0.76', 'sk=0.763', ...] -> {None or label: float}; InputError on bad input.

    A bare VALUE applies to every ensemble and is only accepted when the study
    has exactly one ensemble, or as a default next to LABEL=VALUE entries.
    """
    from .errors import InputError

    out: dict = {}
    for text in values or []:
        label, sep, number = str(text).rpartition("=")
        label = label.strip() if sep else None
        try:
            value = float(number)
        except ValueError:
            raise InputError(f"--ground-state {text!r}: expected VALUE or LABEL=VALUE with a number, e.g. --ground-state sk=0.763166") from None
        if not (math.isfinite(value) and value > 0):
            raise InputError(f"--ground-state {text!r}: the ground-state energy density must be a positive finite number")
        if label is not None and label not in labels:
            raise InputError(f"--ground-state {text!r}: no ensemble {label!r} in this study (ensembles: {', '.join(labels)})")
        if label in out:
            raise InputError(f"--ground-state given twice for {label or 'all ensembles'}")
        out[label] = value
    if None in out and len(labels) > 1 and len(out) == 1:
        raise InputError(
            "--ground-state VALUE is ambiguous with several ensembles: write LABEL=VALUE "
            f"(ensembles: {', '.join(labels)})"
        )
    return out


def parse_at_depths(text: str | None) -> tuple[int, ...]:
    """'50,100,160' -> (50, 100, 160); InputError on anything but positive integers."""
    from .errors import InputError

    if text is None:
        return ()
    out = []
    for part in str(text).split(","):
        part = part.strip()
        try:
            depth = int(part)
        except ValueError:
            raise InputError(f"--at-depth {text!r}: expected comma-separated positive integers, e.g. --at-depth 50,100,160") from None
        if depth < 1:
            raise InputError(f"--at-depth {text!r}: depths must be >= 1")
        out.append(depth)
    return tuple(sorted(set(out)))


def check_output_path(path: str | Path, suffix: str | None = None, option: str = "--output") -> Path:
    """Validate an output file path before any work (see :func:`jobs.paths.check_output_file`)."""
    from .paths import check_output_file

    return check_output_file(path, suffix=suffix, option=option)


def write_text_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file and a rename."""
    import os
    import tempfile

    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent if str(path.parent) else ".")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual permissions of a new file
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


# --------------------------------------------------------------- references
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


def _finite_or_none(x: Any) -> float | None:
    if x is None:
        return None
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def _ensemble_mixture(meta: Mapping) -> Mixture | None:
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
    ref_gs = _finite_or_none(ref.get("ground_state"))
    if gs is None and ref_gs is not None:
        gs = ref_gs
        gs_unc = _finite_or_none(ref.get("uncertainty", ref.get("ground_state_uncertainty")))
        gs_src = ref.get("source") or ref.get("ground_state_source") or (
            "given in the spec" if ref_origin == "spec" else ref_origin
        )
        gs_origin = ref_origin
    ref_alg = _finite_or_none(ref.get("algorithmic_threshold"))
    if ref_alg is not None:
        alg = ref_alg
        alg_unc = _finite_or_none(ref.get("algorithmic_threshold_uncertainty"))
        alg_src = ref.get("algorithmic_threshold_source") or (
            "given in the spec" if ref_origin == "spec" else ref_origin
        )
        alg_origin = ref_origin

    # 3. computed by kernels.reference (cached in the store)
    if computed is not None:
        c_gs = _finite_or_none(getattr(computed, "ground_state", None))
        c_alg = _finite_or_none(getattr(computed, "algorithmic_threshold", None))
        if gs is None and c_gs is not None:
            gs, gs_origin = c_gs, "computed"
            gs_src = getattr(computed, "source", None) or (
                "leadline reference: zero-temperature Parisi functional, Auffinger & Chen, Ann. Probab. 45 (2017)"
            )
            gs_unc = _finite_or_none(
                getattr(computed, "ground_state_uncertainty", None)
                or (getattr(computed, "uncertainties", None) or {}).get("ground_state")
            )
        if alg is None and c_alg is not None:
            alg, alg_origin = c_alg, "computed"
            alg_src = getattr(computed, "source", None) or (
                "leadline reference: incremental AMP threshold, El Alaoui, Montanari & Sellke, Ann. Probab. 49 (2021)"
            )
            alg_unc = _finite_or_none(
                getattr(computed, "algorithmic_threshold_uncertainty", None)
                or (getattr(computed, "uncertainties", None) or {}).get("algorithmic_threshold")
            )

    # 4. shipped table
    if gs is None:
        mixture = _ensemble_mixture(meta)
        match = lookup_ground_state(mixture) if mixture is not None else None
        if match is not None:
            gs, gs_unc, gs_src, gs_origin = match.ground_state, match.uncertainty, match.source, "shipped table"

    return References(gs, gs_unc, gs_src, gs_origin, alg, alg_unc, alg_src, alg_origin)


def _computed_references(study: Any, label: str, meta: Mapping, cache_dir: str | Path | None = None) -> Any:
    """GS/ALG computed by ``kernels.reference`` for this ensemble, if cached; never computes.

    Looks first for a cache in the study store (a reader method ``references(label)``, when
    the store offers one), then in the reference cache of ``leadline reference``
    (``cache_dir``, else ``$LEADLINE_CACHE_DIR`` / ``~/.cache/leadline``): every cached
    entry for the same mixture and method version, the one with the tightest tolerances.
    Computing takes seconds to minutes per mixture, so the table only reads.
    """
    getter = getattr(study, "references", None)
    if callable(getter):
        try:
            found = getter(label)
        except (KeyError, LookupError, ValueError, NotImplementedError):
            found = None
        if found is not None:
            return found
    mixture = _ensemble_mixture(meta)
    if mixture is None:
        return None
    try:
        from leadline.kernels.mixture import parse_mixture
        from leadline.kernels.reference import METHOD_VERSION, References as Computed

        from . import reference_cache
    except ImportError:  # pragma: no cover - reference energies are part of the tool
        return None
    directory = Path(cache_dir) if cache_dir is not None else reference_cache.default_cache_dir()
    folder = directory / "references"
    if not folder.is_dir():
        return None
    best = None
    for path in sorted(folder.glob("*.json")):
        try:
            data = json.loads(path.read_text())
            key = data["key"]
            # compare mixtures, not spellings (older caches wrote weights as "1.0")
            if parse_mixture(key.get("xi")) != mixture or key.get("method_version") != METHOD_VERSION:
                continue
            refs = Computed.from_json(data["references"])
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            continue
        rank = (float(key.get("gs_tol", 1.0)) + float(key.get("alg_tol", 1.0)), path.name)
        if best is None or rank < best[0]:
            best = (rank, refs)
    return best[1] if best else None


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

    @property
    def inverse_depth(self) -> float:
        return 1.0 / self.p

    def to_json(self) -> dict:
        return {
            "p": self.p,
            "inv_p": self.inverse_depth,
            "value": self.value,
            "gain": self.gain,
            "ratio_gs": self.ratio_gs,
            "ratio_alg": self.ratio_alg,
            "exceeds_alg": self.exceeds_alg,
            "gradient_norm": self.gradient_norm,
            "converged": self.converged,
            "gamma": list(self.gamma),
            "beta": list(self.beta),
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
        """Sparse ensembles scaled next to the dense q-spin V_p* (jobs/universality.py)."""
        return universality_views(self.ensembles)

    def to_json(self) -> dict:
        return {
            "format": TABLE_FORMAT,
            "version": TABLE_VERSION,
            "study": self.name,
            "units": "energy density per spin, dimensionless; E[H(z)H(z')] = n xi(R); V_p is maximized",
            "note": self.note,
            "ensembles": [e.to_json() for e in self.ensembles],
            "universality": self.universality,
        }


def _describe(meta: Mapping) -> str:
    kind = meta.get("kind", "dense")
    if kind == "dense" and meta.get("xi"):
        mixture = _ensemble_mixture(meta)
        return f"xi(x) = {mixture.label()}" if mixture else f"xi = {meta['xi']}"
    parts = [kind]
    if meta.get("q") is not None:
        parts.append(f"q = {meta['q']}")
    if meta.get("degree") is not None:
        parts.append(f"degree {meta['degree']}")
    return ", ".join(parts)


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
                gradient_norm=_finite_or_none(rec.get("gradient_norm")),
                converged=rec.get("converged"),
                gamma=tuple(float(x) for x in rec.get("gamma", ())),
                beta=tuple(float(x) for x in rec.get("beta", ())),
            )
        )

    notes: list[str] = []
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
    mixture = _ensemble_mixture(meta)
    shipped = lookup_ground_state(mixture) if mixture is not None else None
    if gs is not None and shipped is not None and refs.ground_state_origin != "shipped table":
        allowed = shipped.uncertainty + (refs.ground_state_uncertainty or 0.0)
        verdict = "agrees with" if abs(gs - shipped.ground_state) <= allowed else "DIFFERS from"
        notes.append(
            f"GS ({refs.ground_state_origin}) {verdict} the shipped value {shipped.ground_state:.6f} "
            f"+- {shipped.uncertainty:.1g} ({shipped.source}); difference {gs - shipped.ground_state:+.1e}"
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
    dense = meta.get("kind", "dense") == "dense"
    extrap = None
    if len(rows) >= 2:
        extrap = extrapolate(
            depths, values,
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
                f"{len(flagged)} fit(s) that pass the back-test ({', '.join(names)}) extrapolate above the upper "
                f"bound {extrap.bound_name} = {extrap.upper_bound:.4f} (up to {top:.4f}): flagged unphysical and "
                "left out of the headline"
            )
        if extrap.limit is None:
            notes.append("no fit passes the back-test and stays physical (or too few depths for a back-test): "
                         "no headline extrapolation")

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
    reference_cache_dir: str | Path | None = None,
    at_depths: Iterable[int] = (),
) -> StudyReport:
    """Report of every ensemble of ``study`` (StudyReader or InMemoryStudy), in spec order.

    Parameters
    ----------
    ground_states : dict {label or None: value}, optional
        Ground-state values given on the command line; the key None applies
        to every ensemble without its own entry.
    reference_cache_dir : path, optional
        Cache of ``leadline reference`` to read computed GS/ALG from (default:
        its default location).
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
        computed = _computed_references(study, label, meta, reference_cache_dir)
        reports.append(
            build_ensemble_report(
                meta, study.depths(label), ground_state=override, computed=computed, target_ratios=target_ratios,
                at_depths=at_depths,
            )
        )
    return StudyReport(name=str(getattr(study, "name", "study")), ensembles=reports)


# ----------------------------------------------------------------- markdown
def _fmt(x: float | None, spec: str, missing: str = "-") -> str:
    return missing if x is None else format(x, spec)


def _markdown_table(header: list[str], rows: list[list[str]], align: list[str]) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]

    def line(cells):
        out = []
        for c, w, a in zip(cells, widths, align):
            out.append(c.rjust(w) if a == "r" else c.ljust(w))
        return "| " + " | ".join(out) + " |"

    sep = "|" + "|".join(("-" * (w + 1) + ":") if a == "r" else ("-" * (w + 2)) for w, a in zip(widths, align)) + "|"
    return [line(header), sep, *(line(r) for r in rows)]


def _reference_lines(refs: References) -> list[str]:
    out = []
    if refs.ground_state is not None:
        unc = f" +- {refs.ground_state_uncertainty:.2g}" if refs.ground_state_uncertainty else ""
        out.append(f"- ground state GS = {refs.ground_state:.6f}{unc} ({refs.ground_state_origin}: {refs.ground_state_source})")
    else:
        out.append("- ground state GS: not known")
    if refs.threshold is not None:
        unc = f" +- {refs.threshold_uncertainty:.2g}" if refs.threshold_uncertainty else ""
        out.append(f"- algorithmic threshold ALG = {refs.threshold:.6f}{unc} ({refs.threshold_origin}: {refs.threshold_source})")
    else:
        out.append("- algorithmic threshold ALG: not known")
    return out


def _fmt_range(low: float | None, high: float | None, spec: str, capped: bool = False) -> str:
    lo = "never" if low is None else format(low, spec)
    hi = "never" if high is None else format(high, spec)
    return f"{lo} .. {hi}" + (" (capped at GS)" if capped else "")


def _fmt_level_depth(d: float | None) -> str:
    if d is None:
        return "never"
    return f"{d:.3g}" if d < 1e4 else f"{d:.2e}"


def _extrapolation_markdown(ex: Extrapolation, value_name: str = "V") -> list[str]:
    """The extrapolation block: every fit with its back-test, the headline, predictions."""
    out = [f"Extrapolation of {value_name}_p* to p -> infinity (fit families over windows of the last k depths):", ""]
    tested = [w for w in ex.fits if w.backtest is not None]
    if tested:
        bt = tested[0].backtest
        held = f"p = {bt.held_out[0]}" + (f"..{bt.held_out[-1]}" if len(bt.held_out) > 1 else "")
        out.append(
            f"Back-test: each fit is refitted on the same number of depths ending at p = {bt.fit.depths[-1]} and "
            f"predicts the held-out {held}; it passes when its largest error is <= {ex.pass_threshold:.2e} "
            f"= max(0.1 x the rise over the held-out depths, 3 x the smallest error)."
        )
    else:
        out.append("Back-test: too few depths to hold any out; no fit can pass.")
    if ex.upper_bound is not None:
        out.append(f"A fit whose curve rises above the upper bound ({ex.bound_name}) = {ex.upper_bound:.6f} "
                   "is flagged unphysical.")
    out.append("")
    rows = []
    for w in ex.fits:
        f = w.fit
        rows.append([
            w.family, str(f.k), f"{f.depths[0]}..{f.depths[-1]}", f"{f.limit:.5f}",
            "GS given" if w.family == "power-gs" else f"{f.standard_error(math.inf):.1e}",
            _fmt(w.backtest_error, ".2e"), w.status,
        ])
    out += _markdown_table(["family", "k", "depths", f"{value_name}_inf", "std err", "back-test error", "status"],
                           rows, ["l", "r", "l", "r", "r", "r", "l"])
    out.append("")
    out.append("Families: " + "; ".join(f"{f.name}: {f.description}" for f in FAMILIES.values()) + ".")
    out.append("")
    lim = ex.limit
    if lim is None:
        out.append("No headline: no fit passes the back-test and stays physical.")
        out.append("")
        return out
    best = ex.best_by_family()
    fams = ", ".join(f"{fam} k = {w.fit.k}: {w.fit.limit:.4f}" for fam, w in best.items())
    out.append(
        f"{value_name}_inf estimate: {lim.central:.4f}, range {_fmt_range(lim.low, lim.high, '.4f', lim.capped)} "
        f"({lim.n_fits} used fits of {len(best)} families)"
    )
    if ex.ground_state is not None:
        r = lim.scaled(1.0 / ex.ground_state)
        out.append(f"{value_name}_inf / GS estimate: {r.central:.4f}, range {_fmt_range(r.low, r.high, '.4f', r.capped)}")
    out.append(
        f"Headline rule: central = median over families of each family's best back-tested window ({fams}); "
        f"range = smallest and largest over every used fit, each +- {SE_FACTOR:g} least-squares standard errors."
    )
    out.append(f"What the range means: {SPREAD_MEANING}")
    out.append("")
    if ex.at_depth:
        ratio = ex.ratio_at_depth()
        header = ["p", f"{value_name}_p", "range"] + ([f"{value_name}_p/GS", "range (ratio)"] if ratio else [])
        p_rows = []
        for p, est in ex.at_depth.items():
            cells = [str(p), f"{est.central:.5f}", _fmt_range(est.low, est.high, ".5f", est.capped)]
            if ratio:
                rr = ratio[p]
                cells += [f"{rr.central:.4f}", _fmt_range(rr.low, rr.high, ".4f", rr.capped)]
            p_rows.append(cells)
        out.append("Predicted at given depths (same headline rule):")
        out.append("")
        out += _markdown_table(header, p_rows, ["r"] * len(header))
        out.append("")
    if ex.levels:
        l_rows = [
            [lv.name, f"{lv.level:.6f}", _fmt_level_depth(lv.central),
             f"{_fmt_level_depth(lv.low)} .. {_fmt_level_depth(lv.high)}", f"{lv.fits_reaching} of {lv.fits}"]
            for lv in ex.levels
        ]
        out.append("Predicted depth to reach a target (same headline rule; never = the fit saturates below it):")
        out.append("")
        out += _markdown_table(["target", "level", "depth p", "range", "fits reaching"], l_rows,
                               ["l", "r", "r", "r", "r"])
        out.append("")
    return out


def _ensemble_markdown(rep: EnsembleReport) -> list[str]:
    refs = rep.references
    out = [f"## {rep.label}: {rep.description}", ""]
    sparse = rep.kind == "sparse"
    if sparse:
        out.append("- value: nu_p*, the optimal satisfied fraction per constraint (cut fraction for q = 2), "
                   "exact on hypergraphs of girth > 2p+1; not an energy density (see the universality view)")
    else:
        out += _reference_lines(refs)
    out.append("")
    has_gs, has_alg = refs.ground_state is not None, refs.threshold is not None
    header = ["p", "1/p", "nu_p*" if sparse else "V_p*", "gain"]
    align = ["r", "r", "r", "r"]
    if has_gs:
        header.append("V_p*/GS")
        align.append("r")
    if has_alg:
        header += ["V_p*/ALG", "> ALG"]
        align += ["r", "l"]
    header.append("grad norm")
    align.append("r")
    rows = []
    for r in rep.rows:
        cells = [str(r.p), f"{r.inverse_depth:.4f}", f"{r.value:.6f}", _fmt(r.gain, "+.6f")]
        if has_gs:
            cells.append(_fmt(r.ratio_gs, ".4f"))
        if has_alg:
            cells += [_fmt(r.ratio_alg, ".4f"), "yes" if r.exceeds_alg else "no"]
        cells.append(_fmt(r.gradient_norm, ".1e"))
        rows.append(cells)
    if rows:
        out += _markdown_table(header, rows, align)
    else:
        out.append("(no finished depth yet)")
    out.append("")

    if rep.extrapolation is not None:
        out += _extrapolation_markdown(rep.extrapolation, value_name="nu" if sparse else "V")
    for note in rep.notes:
        out.append(f"Note: {note}.")
    if rep.notes:
        out.append("")
    return out


def render_markdown(report: StudyReport) -> str:
    """The report as Markdown that also reads well as plain text in a terminal."""
    out = [
        f"# Study {report.name}: optimal QAOA energy V_p* per depth",
        "",
        "Energies are energy densities per spin (dimensionless), normalization E[H(z)H(z')] = n xi(R);",
        "V_p* is the optimized (maximal) value at depth p. gain = V_p* - V_(p-1)*.",
        "",
    ]
    for rep in report.ensembles:
        out += _ensemble_markdown(rep)
    out += render_universality_markdown(report.universality)
    out.append(f"Caveat: {report.note}")
    return "\n".join(out) + "\n"


# ---------------------------------------------------------------------- csv
CSV_COLUMNS = [
    "ensemble",
    "record",
    "quantity",
    "p",
    "inv_p",
    "value",
    "uncertainty",
    "gain",
    "ratio_gs",
    "ratio_alg",
    "exceeds_alg",
    "gradient_norm",
    "degree",
    "k",
    "depths",
    "note",
    "family",
    "status",
    "backtest_error",
    "low",
    "high",
]


def _csv_value(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, float):
        return repr(x) if math.isfinite(x) else ""
    return str(x)


def _emit_extrapolation(emit, label: str, ex: Extrapolation) -> None:
    """CSV records of one extrapolation (see :func:`render_csv`)."""
    for w in ex.fits:
        f = w.fit
        span = f"{f.depths[0]}-{f.depths[-1]}"
        params = ("coefficients " + " ".join(f"{c:.6g}" for c in f.params) if f.is_polynomial
                  else f"A = {f.params[1]:.6g}, alpha = {f.params[2]:.6g}")
        emit(ensemble=label, record="fit", quantity="V_inf", value=f.limit, uncertainty=f.standard_error(math.inf),
             family=w.family, degree=int(w.family[4:]) if f.is_polynomial else None, k=f.k, depths=span,
             backtest_error=w.backtest_error, status=w.status, note="; ".join(x for x in (params, w.reason) if x))
        if w.backtest is not None:
            bt = w.backtest
            fitted = f"{bt.fit.depths[0]}-{bt.fit.depths[-1]}"
            for p, pred, err in zip(bt.held_out, bt.predicted, bt.errors):
                emit(ensemble=label, record="backtest", quantity="V_p", p=p, inv_p=1.0 / p, value=pred,
                     backtest_error=err, family=w.family, k=f.k, depths=fitted, status=w.status,
                     note="predicted from the fitted depths; backtest_error = predicted - stored")
    lim = ex.limit
    if lim is not None:
        rule = "central: median over families of the best back-tested windows; low/high: extremes over used fits"
        emit(ensemble=label, record="extrapolation", quantity="V_inf", value=lim.central, low=lim.low, high=lim.high,
             note=f"{rule}; an estimate, not a bound")
        if ex.ground_state is not None:
            r = lim.scaled(1.0 / ex.ground_state)
            emit(ensemble=label, record="extrapolation", quantity="ratio_gs_inf", value=r.central, low=r.low,
                 high=r.high, note="V_inf / GS; an estimate, not a bound")
    ratio = ex.ratio_at_depth()
    for p, est in ex.at_depth.items():
        emit(ensemble=label, record="at_depth", quantity="V_p", p=p, inv_p=1.0 / p, value=est.central,
             low=est.low, high=est.high, note="estimate")
        if p in ratio:
            emit(ensemble=label, record="at_depth", quantity="ratio_gs", p=p, inv_p=1.0 / p, value=ratio[p].central,
                 low=ratio[p].low, high=ratio[p].high, note="estimate")
    for lv in ex.levels:
        name = "ALG" if lv.name == "ALG" else lv.name.replace("ratio ", "ratio_")
        emit(ensemble=label, record="depth_for", quantity=f"depth_for_{name}", value=lv.central, low=lv.low,
             high=lv.high, note=f"estimate at level {lv.level!r}; empty = never; "
                                f"{lv.fits_reaching} of {lv.fits} used fits reach it")


def render_csv(report: StudyReport) -> str:
    """One long CSV table; column ``record`` says what a row is.

    record = "depth": p, inv_p, value (V_p*), gain, ratio_gs, ratio_alg,
    exceeds_alg, gradient_norm.  "reference": quantity ground_state or
    algorithmic_threshold, value, uncertainty, note (source).  "fit": one fit
    of one family over the last k depths: family, degree (polynomials), k,
    depths, value (V_inf), uncertainty (its standard error), backtest_error
    (largest absolute error on the held-out depths), status (used / failed
    back-test / unphysical / no back-test), note (why).  "backtest": one
    held-out depth p of one fit: value (predicted V_p), backtest_error
    (predicted - stored), depths (the depths the back-test fit used).
    "extrapolation": quantity V_inf or ratio_gs_inf, value (central), low,
    high.  "at_depth": quantity V_p or ratio_gs at depth p, value, low, high.
    "depth_for": quantity depth_for_ratio_R or depth_for_ALG, value (central
    depth), low, high (empty = never reached), note.  "note": a caveat in
    ``note``.  Floats are written at full precision.
    """
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, lineterminator="\n")
    writer.writeheader()

    def emit(**fields):
        writer.writerow({c: _csv_value(fields.get(c)) for c in CSV_COLUMNS})

    for rep in report.ensembles:
        refs = rep.references
        if refs.ground_state is not None:
            emit(ensemble=rep.label, record="reference", quantity="ground_state", value=refs.ground_state,
                 uncertainty=refs.ground_state_uncertainty, note=f"{refs.ground_state_origin}: {refs.ground_state_source}")
        if refs.threshold is not None:
            emit(ensemble=rep.label, record="reference", quantity="algorithmic_threshold", value=refs.threshold,
                 uncertainty=refs.threshold_uncertainty, note=f"{refs.threshold_origin}: {refs.threshold_source}")
        for r in rep.rows:
            emit(ensemble=rep.label, record="depth", quantity="V_p", p=r.p, inv_p=r.inverse_depth, value=r.value,
                 gain=r.gain, ratio_gs=r.ratio_gs, ratio_alg=r.ratio_alg, exceeds_alg=r.exceeds_alg,
                 gradient_norm=r.gradient_norm)
        if rep.extrapolation is not None:
            _emit_extrapolation(emit, rep.label, rep.extrapolation)
        for note in rep.notes:
            emit(ensemble=rep.label, record="note", note=note)
    for view in report.universality:
        for row in view["rows"]:
            for e in row["sparse"]:
                if e["scaled"] is not None:
                    emit(ensemble=e["label"], record="universality", quantity=f"scaled_q{view['q']}", p=row["p"],
                         inv_p=1.0 / row["p"], value=e["scaled"], gain=None,
                         uncertainty=None, note=(f"scaled - V_p*(x^{view['q']}) = {e['difference']!r}"
                                                 if e["difference"] is not None else "no dense x^q value"))
    emit(ensemble="", record="note", note=report.note)
    return buf.getvalue()


def render_json(report: StudyReport) -> str:
    """One JSON object (format "leadline.table", version 2)."""
    return json.dumps(report.to_json(), indent=1, allow_nan=False)


# -------------------------------------------------------------------- plots
FIGURE_SIZE_INCHES = (11.0, 5.5)
FIGURE_DPI = 100
ANGLE_PANEL_INCHES = (10.0, 3.2)  # width, height per ensemble row


def angle_plot_path(output: Path) -> Path:
    """FILE.png -> FILE-angles.png (the second figure, the angle schedules)."""
    output = Path(output)
    return output.with_name(output.stem + "-angles" + output.suffix)


FAMILY_LINESTYLES = {"poly1": (0, (1, 1.5)), "poly2": (0, (4, 2)), "poly3": (0, (6, 2, 1, 2)),
                     "power": "-", "power-gs": (0, (3, 1, 1, 1))}


def _drawn_fits(ex: Extrapolation) -> list:
    """[(WindowFit, used)]: per family its used window with the smallest back-test error, else
    (family not used) its window with the smallest back-test error."""
    best = ex.best_by_family()
    out = []
    for fam in FAMILIES:
        cands = [w for w in ex.fits if w.family == fam]
        if cands:
            w = best.get(fam) or min(cands, key=lambda c: (c.backtest_error if c.backtest else math.inf, c.fit.k))
            out.append((w, fam in best))
    return out


def _draw_extrapolation(ax, ex: Extrapolation, color, label: str | None) -> None:
    """Each family's curve out to 1/p = 0, its back-test, and the headline at 1/p = 0.

    Per family the used window with the smallest back-test error is drawn
    (bold); a family with no used window is drawn thin and faint with its best
    back-tested window.  The held-out depths are ringed, and each drawn fit's
    back-test predictions at them are marked with x.  The headline V_inf
    (central, range) is an error bar at 1/p = 0.
    """
    for w, used in _drawn_fits(ex):
        fit, fam = w.fit, w.family
        xs = np.linspace(0.0, 1.0 / fit.depths[0], 200)
        ax.plot(xs, fit.predict(np.where(xs > 0, 1.0 / np.maximum(xs, 1e-300), np.inf)), color=color,
                ls=FAMILY_LINESTYLES[fam], lw=1.4 if used else 0.8, alpha=0.9 if used else 0.35)
        if w.backtest is not None:
            bt = w.backtest
            ax.plot([1.0 / p for p in bt.held_out], bt.predicted, "x", color=color, ms=5 if used else 3,
                    alpha=0.9 if used else 0.35)
    tested = [w for w in ex.fits if w.backtest is not None]
    if tested:
        bt = tested[0].backtest
        ax.plot([1.0 / p for p in bt.held_out], bt.actual, "o", mfc="none", mec=color, ms=10, mew=1.0)
    if ex.limit is not None:
        lim = ex.limit
        text = f"{label}: V_inf ~ {lim.central:.4f} ({lim.low:.4f}..{lim.high:.4f}, estimate)" if label else None
        ax.errorbar([0.0], [lim.central], yerr=[[lim.central - lim.low], [lim.high - lim.central]], fmt="s",
                    color=color, capsize=4, ms=5, label=text)


def _draw_zoom(ax, zoomed) -> None:
    """Inset (upper right) magnifying 1/p from 0 to just beyond the earliest fitted window."""
    firsts = [w.fit.depths[0] for rep, _ in zoomed for w, _ in _drawn_fits(rep.extrapolation)]
    if not firsts:
        return
    x_max = 1.15 / min(firsts)
    inset = ax.inset_axes([0.47, 0.47, 0.5, 0.48])
    for rep, color in zoomed:
        rows = [r for r in rep.rows if r.inverse_depth <= x_max]
        inset.plot([r.inverse_depth for r in rows], [r.value for r in rows], "o", color=color, ms=4)
        _draw_extrapolation(inset, rep.extrapolation, color, None)
        if rep.references.ground_state is not None:
            inset.axhline(rep.references.ground_state, color=color, ls="--", lw=1.0)
    inset.set_xlim(-0.02 * x_max, x_max)
    inset.tick_params(labelsize=7)
    inset.grid(True, alpha=0.3)
    inset.set_title("zoom: fits out to 1/p = 0", fontsize=7, pad=2)


def _family_legend_handles():
    """Proxy artists explaining the line styles, the back-test marks and the headline bar (grey)."""
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color="0.3", ls=FAMILY_LINESTYLES[f.name], lw=1.4, label=f"{f.name}: {f.description}")
               for f in FAMILIES.values()]
    handles.append(Line2D([], [], color="0.3", ls="none", marker="o", mfc="none", ms=9,
                          label="held-out depths of the back-test"))
    handles.append(Line2D([], [], color="0.3", ls="none", marker="x", label="back-test predictions (fit on earlier depths)"))
    handles.append(Line2D([], [], color="0.3", lw=0.8, alpha=0.35, label="faint: family not used (failed / unphysical)"))
    return handles


def write_plots(report: StudyReport, output: Path) -> list[Path]:
    """Write the two figures; return their paths.

    ``output`` (FILE.png, 1100 x 550 pixels, legend at the right): V_p* against 1/p per ensemble,
    markers for the stored values, each fit family's curve out to 1/p = 0 (one
    line style per family, its best back-tested window; faint when the family
    is not used), the held-out depths of the back-test ringed with the
    back-test predictions marked x, the headline V_inf and its range as an
    error bar at 1/p = 0, and horizontal reference lines: GS dashed, ALG
    dotted, in the ensemble's colour.

    ``FILE-angles.png`` (1000 x 320*n_ensembles pixels): optimal gamma_t and
    beta_t against (t - 1/2)/p, one curve per depth p (darker = deeper), one
    row of two panels per ensemble.
    """
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    output = Path(output)
    paths = [output, angle_plot_path(output)]

    fig, ax = plt.subplots(figsize=FIGURE_SIZE_INCHES, dpi=FIGURE_DPI)
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    zoomed = []  # dense ensembles with an extrapolation, drawn again in the inset
    for i, rep in enumerate(report.ensembles):
        color = colors[i % len(colors)]
        if not rep.rows:
            continue
        x = np.array([r.inverse_depth for r in rep.rows])
        y = np.array([r.value for r in rep.rows])
        if rep.kind == "sparse":
            # a satisfied fraction is not an energy: show the scaled value, which tends
            # to V_p* of xi = x^q as D grows (universality view)
            y = np.array([scaled_value(rep.q, rep.degree, v) for v in y])
            ax.plot(x, y, "x--", color=color, lw=0.8,
                    label=f"{rep.label}: q = {rep.q}, D = {rep.degree:g}, sqrt(D)(nu*-1/2)2/sqrt(q)")
            continue
        ax.plot(x, y, "o", color=color, label=f"{rep.label}: {rep.description}")
        if rep.extrapolation is not None:
            _draw_extrapolation(ax, rep.extrapolation, color, rep.label)
            zoomed.append((rep, color))
        refs = rep.references
        if refs.ground_state is not None:
            ax.axhline(refs.ground_state, color=color, ls="--", lw=1.0,
                       label=f"  GS = {refs.ground_state:.4f} ({refs.ground_state_origin})")
        if refs.threshold is not None:
            ax.axhline(refs.threshold, color=color, ls=":", lw=1.2,
                       label=f"  ALG = {refs.threshold:.4f} ({refs.threshold_origin})")
    if zoomed:
        _draw_zoom(ax, zoomed)
    ax.set_xlabel("1/p  (inverse QAOA depth)")
    ax.set_ylabel("V_p*  (energy density per spin, dimensionless)")
    ax.set_title(f"{report.name}\noptimal QAOA energy vs 1/p (extrapolations are estimates, not bounds)", fontsize=9)
    ax.set_xlim(-0.03, 1.03)
    ax.grid(True, alpha=0.3)
    top = ax.secondary_xaxis("top")
    top_depths = [1, 2, 3, 4, 5, 7, 10, 20]
    top.set_xticks([1.0 / d for d in top_depths], [str(d) for d in top_depths])
    top.tick_params(labelsize=7)
    top.set_xlabel("depth p", fontsize=8, labelpad=2)
    if report.ensembles:
        handles, _ = ax.get_legend_handles_labels()
        if any(rep.extrapolation is not None for rep in report.ensembles):
            handles += _family_legend_handles()
        ax.legend(handles=handles, fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0,
                  frameon=False)
    fig.subplots_adjust(left=0.075, right=0.63, top=0.86, bottom=0.1)
    fig.savefig(paths[0], dpi=FIGURE_DPI)
    plt.close(fig)

    n = max(1, len(report.ensembles))
    width, height = ANGLE_PANEL_INCHES
    fig, axes = plt.subplots(n, 2, figsize=(width, height * n), dpi=FIGURE_DPI, squeeze=False)
    cmap = plt.get_cmap("viridis")
    for i, rep in enumerate(report.ensembles):
        ax_g, ax_b = axes[i]
        pmax = max((r.p for r in rep.rows), default=1)
        for r in rep.rows:
            if not r.gamma:
                continue
            t = (np.arange(1, r.p + 1) - 0.5) / r.p
            shade = cmap(0.85 * (r.p - 1) / max(1, pmax - 1))
            ax_g.plot(t, r.gamma, "o-", color=shade, ms=3, lw=1, label=f"p = {r.p}")
            ax_b.plot(t, r.beta, "o-", color=shade, ms=3, lw=1, label=f"p = {r.p}")
        ax_g.set_ylabel(f"{rep.label}\ngamma_t (rad)")
        ax_b.set_ylabel("beta_t (rad)")
        for ax_ in (ax_g, ax_b):
            ax_.set_xlim(0, 1)
            ax_.grid(True, alpha=0.3)
        ax_g.set_title(f"{rep.label}: {rep.description}: phase angles", fontsize=9)
        ax_b.set_title(f"{rep.label}: mixing angles", fontsize=9)
        if any(r.gamma for r in rep.rows):
            ax_b.legend(fontsize=6, ncol=2, loc="best")
    for ax_ in axes[-1]:
        ax_.set_xlabel("(t - 1/2)/p  (position in the schedule)")
    fig.subplots_adjust(left=0.09, right=0.98, top=1 - 0.35 / (height * n), bottom=0.55 / (height * n), hspace=0.45, wspace=0.2)
    fig.savefig(paths[1], dpi=FIGURE_DPI)
    plt.close(fig)
    return paths
