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
4. the table shipped in ``kernels.ground_states``.
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
    Extrapolation,
    PowerLawGap,
    extrapolate,
    power_law_gaps,
)
from leadline.kernels.ground_states import lookup_ground_state, union_bound
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
    "check_output_path",
    "write_text_atomic",
    "FIGURE_SIZE_INCHES",
    "FIGURE_DPI",
]

TABLE_FORMAT = "leadline.table"
TABLE_VERSION = 1


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
    gap_fits: list[PowerLawGap]
    reach_threshold: dict | None
    reach_ground_state: dict | None
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
            "power_law_gap": [g.to_json() for g in self.gap_fits],
            "polynomial_depth_to_reach_threshold": self.reach_threshold,
            "polynomial_depth_to_reach_ground_state": self.reach_ground_state,
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
) -> EnsembleReport:
    """Rows, extrapolation and gap fits of one ensemble (see module docstring)."""
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
    extrap = extrapolate(depths, values) if len(rows) >= 2 else None
    if len(rows) < 2:
        notes.append("fewer than two finished depths: no extrapolation")
    gap_fits: list[PowerLawGap] = []
    if gs is not None and len(rows) >= 2:
        if any(v >= gs for v in values):
            notes.append("some V_p* is at or above the reference ground state: gap fit skipped; check the reference")
        else:
            gap_fits = power_law_gaps(
                depths, values, gs, target_ratios=target_ratios, threshold=alg if separated else None
            )
    if extrap is not None and mixture is not None:
        bound = union_bound(mixture)
        if extrap.high > bound:
            notes.append(
                f"some fits extrapolate above the rigorous upper bound sqrt(2 ln 2 xi(1)) = {bound:.4f} on any "
                f"energy density of this mixture (highest fit {extrap.high:.4f}): those fits are unphysical, "
                "and the spread is a warning that V_p* is not yet in its asymptotic regime"
            )
    reach_alg = extrap.depth_reaching(alg) if (extrap is not None and alg is not None and separated) else None
    reach_gs = extrap.depth_reaching(gs) if (extrap is not None and gs is not None) else None

    return EnsembleReport(
        label=str(meta.get("label")),
        kind=str(meta.get("kind", "dense")),
        xi=meta.get("xi"),
        description=_describe(meta),
        references=refs,
        rows=rows,
        extrapolation=extrap,
        gap_fits=gap_fits,
        reach_threshold=reach_alg,
        reach_ground_state=reach_gs,
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
    """
    ground_states = dict(ground_states or {})
    reports = []
    for label in study.ensembles():
        meta = dict(study.ensemble(label))
        meta.setdefault("label", label)
        override = ground_states.get(label, ground_states.get(None))
        computed = _computed_references(study, label, meta, reference_cache_dir)
        reports.append(
            build_ensemble_report(
                meta, study.depths(label), ground_state=override, computed=computed, target_ratios=target_ratios
            )
        )
    return StudyReport(name=str(getattr(study, "name", "study")), ensembles=reports)


# ----------------------------------------------------------------- markdown
def _fmt(x: float | None, spec: str, missing: str = "-") -> str:
    return missing if x is None else format(x, spec)


def _fmt_depth(d: float | None) -> str:
    if d is None:
        return "never (fit saturates below)"
    return f"{d:.3g}" if d < 1e4 else f"{d:.2e}"


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

    ex = rep.extrapolation
    if ex is not None:
        out.append("Extrapolation of V_p* to p -> infinity (least-squares polynomials in 1/p over the last k depths):")
        out.append("")
        fit_rows = [
            [str(f.degree), str(f.k), f"{f.depths[0]}..{f.depths[-1]}", f"{f.limit:.5f}", f"{f.rms_residual:.1e}"]
            for f in ex.fits
        ]
        out += _markdown_table(["degree", "k", "depths", "V_inf", "rms resid"], fit_rows, ["r", "r", "l", "r", "r"])
        out.append("")
        out.append(
            f"V_inf estimate: {ex.central:.4f} +- {ex.spread:.4f} (median of {len(ex.fits)} fits +- half their range;"
            f" fits range {ex.low:.4f} .. {ex.high:.4f})"
        )
        if has_gs:
            out.append(f"V_inf / GS estimate: {ex.central / refs.ground_state:.4f} +- {ex.spread / refs.ground_state:.4f}")
        for name, reach in (("ALG", rep.reach_threshold), ("GS", rep.reach_ground_state)):
            if reach is not None:
                if reach["median_depth"] is not None:
                    where = f"p ~ {_fmt_depth(reach['median_depth'])} (median over the fits that reach it)"
                else:
                    where = "not reached by most fits (their V_inf stays below)"
                out.append(
                    f"depth where the polynomial fits reach {name} = {reach['level']:.6f} (estimate): "
                    f"{where}; {reach['fits_reaching']} of {reach['fits']} fits reach it"
                )
        out.append("")
    if rep.gap_fits:
        out.append("Power-law fit of the gap GS - V_p* = A p^(-alpha) (log-log least squares over the last k depths):")
        out.append("")
        header = ["k", "depths", "A", "alpha"] + [f"p for ratio {r:g}" for r in rep.gap_fits[0].ratio_depths]
        align = ["r", "l", "r", "r"] + ["r"] * len(rep.gap_fits[0].ratio_depths)
        if has_alg:
            header.append("p to reach ALG")
            align.append("r")
        g_rows = []
        for g in rep.gap_fits:
            cells = [str(g.k), f"{g.depths[0]}..{g.depths[-1]}", f"{g.amplitude:.4f}", f"{g.exponent:.4f}"]
            cells += [_fmt_depth(d) for d in g.ratio_depths.values()]
            if has_alg:
                cells.append(_fmt_depth(g.threshold_depth) if g.threshold is not None else "n/a (ALG = GS)")
            g_rows.append(cells)
        out += _markdown_table(header, g_rows, align)
        out.append("")
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
]


def _csv_value(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, float):
        return repr(x) if math.isfinite(x) else ""
    return str(x)


def render_csv(report: StudyReport) -> str:
    """One long CSV table; column ``record`` says what a row is.

    record = "depth": p, inv_p, value (V_p*), gain, ratio_gs, ratio_alg,
    exceeds_alg, gradient_norm.  "reference": quantity ground_state or
    algorithmic_threshold, value, uncertainty, note (source).  "fit": one
    polynomial fit, degree, k, depths, value (V_inf).  "extrapolation":
    value (central V_inf), uncertainty (spread; an estimate, not a bound).
    "power_law": quantity amplitude / exponent / depth_for_ratio_R /
    depth_for_threshold for the window k.  "reach": quantity
    depth_to_reach_threshold / depth_to_reach_ground_state from the polynomial
    fits.  "note": a caveat in ``note``.  Floats are written at full precision.
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
            for f in rep.extrapolation.fits:
                emit(ensemble=rep.label, record="fit", quantity="V_inf", value=f.limit, degree=f.degree, k=f.k,
                     depths=f"{f.depths[0]}-{f.depths[-1]}", note=f"polynomial in 1/p, rms residual {f.rms_residual:.3e}")
            ex = rep.extrapolation
            emit(ensemble=rep.label, record="extrapolation", quantity="V_inf", value=ex.central, uncertainty=ex.spread,
                 note="median of fits +- half their range; an estimate, not a bound")
        for g in rep.gap_fits:
            span = f"{g.depths[0]}-{g.depths[-1]}"
            emit(ensemble=rep.label, record="power_law", quantity="amplitude", value=g.amplitude, k=g.k, depths=span,
                 note="GS - V_p = A p^-alpha")
            emit(ensemble=rep.label, record="power_law", quantity="exponent", value=g.exponent, k=g.k, depths=span)
            for ratio, d in g.ratio_depths.items():
                emit(ensemble=rep.label, record="power_law", quantity=f"depth_for_ratio_{ratio:g}", value=d, k=g.k,
                     depths=span, note="estimate")
            if g.threshold_depth is not None:
                emit(ensemble=rep.label, record="power_law", quantity="depth_for_threshold", value=g.threshold_depth,
                     k=g.k, depths=span, note="estimate")
        for name, reach in (("threshold", rep.reach_threshold), ("ground_state", rep.reach_ground_state)):
            if reach is not None:
                emit(ensemble=rep.label, record="reach", quantity=f"depth_to_reach_{name}", value=reach["median_depth"],
                     note=f"estimate; {reach['fits_reaching']} of {reach['fits']} polynomial fits reach it")
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
    """One JSON object (format "leadline.table", version 1)."""
    return json.dumps(report.to_json(), indent=1, allow_nan=False)


# -------------------------------------------------------------------- plots
FIGURE_SIZE_INCHES = (11.0, 5.5)
FIGURE_DPI = 100
ANGLE_PANEL_INCHES = (10.0, 3.2)  # width, height per ensemble row


def angle_plot_path(output: Path) -> Path:
    """FILE.png -> FILE-angles.png (the second figure, the angle schedules)."""
    output = Path(output)
    return output.with_name(output.stem + "-angles" + output.suffix)


def write_plots(report: StudyReport, output: Path) -> list[Path]:
    """Write the two figures; return their paths.

    ``output`` (FILE.png, 1100 x 550 pixels, legend at the right): V_p* against 1/p per ensemble,
    markers for the stored values, the representative polynomial fit (the
    one whose V_inf is closest to the central estimate) extended to 1/p = 0,
    the extrapolated V_inf +- spread as an error bar at 1/p = 0, and
    horizontal reference lines: GS dashed, ALG dotted, in the ensemble's colour.

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
        ex = rep.extrapolation
        if ex is not None:
            for other in ex.fits:  # the whole family, faint: their spread is the uncertainty
                xs = np.linspace(0.0, 1.0 / other.depths[0], 100)
                ax.plot(xs, other.predict(xs), "-", color=color, lw=0.6, alpha=0.25)
            fit = ex.representative
            xs = np.linspace(0.0, 1.0 / fit.depths[0], 200)
            ax.plot(xs, fit.predict(xs), "-", color=color, lw=1.5, alpha=0.9,
                    label=f"  fits in 1/p (faint: all {len(ex.fits)}; bold: degree {fit.degree}, last {fit.k} depths)")
            ax.errorbar([0.0], [ex.central], yerr=[ex.spread], fmt="s", color=color, capsize=4, ms=5,
                        label=f"{rep.label}: V_inf ~ {ex.central:.4f} +- {ex.spread:.4f} (estimate)")
        refs = rep.references
        if refs.ground_state is not None:
            ax.axhline(refs.ground_state, color=color, ls="--", lw=1.0,
                       label=f"  GS = {refs.ground_state:.4f} ({refs.ground_state_origin})")
        if refs.threshold is not None:
            ax.axhline(refs.threshold, color=color, ls=":", lw=1.2,
                       label=f"  ALG = {refs.threshold:.4f} ({refs.threshold_origin})")
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
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, frameon=False)
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
