"""The report as Markdown that also reads well as plain text in a terminal (`leadline table`).

Tables are assembled by hand (:func:`_markdown_table`, a dozen lines) because no kept library
reproduces this layout byte for byte: tabulate's pipe format marks left-aligned columns
``|:---|`` (and matches the widths only after changing its module-wide MIN_PADDING), and
prettytable's Markdown style spaces the rule row differently.
"""

from __future__ import annotations

import math

from leadline.kernels.extrapolate import (
    ANCHORED_POWER,
    BACKTEST_GROWTH,
    COVERAGE,
    FAMILIES,
    REFERENCE_DEPTHS,
    SCALE_BEST_FACTOR,
    SCALE_GAIN_FRACTION,
    SPREAD_MEANING,
    WEIGHT_POWER,
    Extrapolation,
)
from leadline.kernels.numtext import fmt

from ._model import EnsembleReport, StudyReport
from ._references import References
from ._universality import render_universality_markdown

__all__ = ["render_markdown"]


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
        unc = f" +- {refs.ground_state_uncertainty:.1e}" if refs.ground_state_uncertainty else ""
        out.append(f"- ground state GS = {fmt(refs.ground_state)}{unc} ({refs.ground_state_origin}: {refs.ground_state_source})")
    else:
        out.append("- ground state GS: not known")
    if refs.threshold is not None:
        unc = f" +- {refs.threshold_uncertainty:.1e}" if refs.threshold_uncertainty else ""
        out.append(f"- algorithmic threshold ALG = {fmt(refs.threshold)}{unc} ({refs.threshold_origin}: {refs.threshold_source})")
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


def headline_rule_text() -> str:
    """How the headline and its range are formed, in one sentence (table and docs)."""
    return (
        "each weighted fit predicts a normal distribution (mean: its curve; standard deviation: its "
        f"least-squares error and {BACKTEST_GROWTH:g} x its back-test error grown with the distance in 1/p "
        "beyond the data, both x sqrt(" f"{REFERENCE_DEPTHS}/n) with n < {REFERENCE_DEPTHS} depths); central = median "
        f"of the weighted mixture, range = its central {COVERAGE:.0%}, high end cut at the upper bound, low end "
        "raised to the last computed value"
    )


def _family_lines(ex: Extrapolation, value_name: str) -> list[str]:
    """What each family gives (its best window), when there is no headline."""
    out = []
    for fam, (w, value) in ex.family_values().items():
        f = w.fit
        err = "no back-test" if w.back_test is None else f"back-test error {w.back_test_error:.1e}"
        extra = "" if w.used else f", {w.status}"
        out.append(f"- {fam} (window {f.k}, depths {f.depths[0]}..{f.depths[-1]}): "
                   f"{value_name}_inf = {value:.4f} ({err}{extra})")
    return out


def _extrapolation_markdown(ex: Extrapolation, value_name: str = "V") -> list[str]:
    """The extrapolation block: every fit with its back-test and weight, the headline, predictions."""
    out = [f"Extrapolation of {value_name}_p* to p -> infinity (fit families over windows of the last depths):", ""]
    tested = [w for w in ex.fits if w.back_test is not None]
    if tested:
        bt = tested[0].back_test
        held = f"p = {bt.held_out[0]}" + (f"..{bt.held_out[-1]}" if len(bt.held_out) > 1 else "")
        out.append(
            f"Back-test: each fit is refitted on the same number of depths ending at p = {bt.fit.depths[-1]} and "
            f"predicts the held-out {held}; its weight falls smoothly with its largest error e, "
            f"1 / (1 + (e / {ex.weight_scale:.2e})^{WEIGHT_POWER}), where {ex.weight_scale:.2e} = "
            f"max({SCALE_GAIN_FRACTION:g} x the rise over the held-out depths, {SCALE_BEST_FACTOR:g} x the smallest "
            "error); a family's windows share its weight."
        )
        if ex.window_scale > 1.0:
            out.append(f"With {ex.n_depths} depths the windows and the hold-out are {ex.window_scale:.2f} times those "
                       f"calibrated on {REFERENCE_DEPTHS} depths ({ex.n_depths}/{REFERENCE_DEPTHS}), so that each keeps "
                       "its share of the ladder.")
    else:
        out.append("Back-test: too few depths to hold any out; no fit can be weighted.")
    if ex.upper_bound is not None:
        out.append(f"A fit whose curve rises above the upper bound ({ex.bound_name}) = {fmt(ex.upper_bound)} "
                   "is flagged unphysical (weight 0).")
    if ex.uncertain_depths:
        out.append(f"{ex.uncertain_depths} depth(s) carry an error estimate (bath engine): fits weighted by "
                   "1/estimate^2, exact depths far above them.")
    out.append("")
    rows = []
    for w in ex.fits:
        f = w.fit
        rows.append([
            w.family, str(f.k), f"{f.depths[0]}..{f.depths[-1]}", f"{f.limit:.5f}",
            "GS given" if w.family == ANCHORED_POWER else f"{f.standard_error(math.inf):.1e}",
            _fmt(w.back_test_error, ".2e"), f"{w.weight:.3f}", w.status,
        ])
    out += _markdown_table(["family", "window", "depths", f"{value_name}_inf", "std err", "back-test error",
                            "weight", "status"], rows, ["l", "r", "l", "r", "r", "r", "r", "l"])
    out.append("")
    out.append("Families: " + "; ".join(f"{f.name}: {f.description}" for f in FAMILIES.values())
               + ". window = number of last depths fitted.")
    out.append("")
    if ex.declined is not None:
        out.append(f"No headline: {ex.declined}. What each family gives (its best window; not an estimate):")
        out += _family_lines(ex, value_name)
        out.append("")
        return out
    lim = ex.limit
    if lim is None:
        out.append("No headline: no fit was back-tested and stays physical.")
        out.append("")
        return out
    best = ex.best_by_family()
    fams = ", ".join(f"{fam} window {w.fit.k}: {w.fit.limit:.4f}" for fam, w in best.items())
    out.append(
        f"{value_name}_inf estimate: {lim.central:.4f}, range {_fmt_range(lim.low, lim.high, '.4f', lim.capped)} "
        f"({lim.n_fits} weighted fits of {len(best)} families)"
    )
    if ex.ground_state is not None:
        r = lim.scaled(1.0 / ex.ground_state)
        out.append(f"{value_name}_inf / GS estimate: {r.central:.4f}, range {_fmt_range(r.low, r.high, '.4f', r.capped)}")
    out.append(f"Headline rule: {headline_rule_text()}. Best window per family: {fams}.")
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
        l_rows = []
        for lv in ex.levels:
            hi = _fmt_level_depth(lv.high) if lv.determined else "not determined by these depths"
            l_rows.append([lv.name, f"{lv.level:.6f}", _fmt_level_depth(lv.central),
                           f"{_fmt_level_depth(lv.low)} .. {hi}", f"{lv.fits_reaching} of {lv.fits}"])
        out.append("Predicted depth to reach a target (where the high band, the median and the low band of the "
                   "headline rule reach it; never = stays below):")
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
    header.append("gradient norm")
    align.append("r")
    bath = any(r.method == "bath" for r in rep.rows)
    if bath:  # which depths come from the bath engine, with its error estimate
        header.append("method")
        align.append("l")
    rows = []
    for r in rep.rows:
        cells = [str(r.p), f"{r.inv_p:.4f}", fmt(r.value), "-" if r.gain is None else fmt(r.gain, signed=True)]
        if has_gs:
            cells.append(_fmt(r.ratio_gs, ".4f"))
        if has_alg:
            cells += [_fmt(r.ratio_alg, ".4f"), "yes" if r.exceeds_alg else "no"]
        cells.append(_fmt(r.gradient_norm, ".1e"))
        if bath:
            cells.append(f"bath +- {r.error_estimate:.1e}" if r.method == "bath" else "exact")
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
