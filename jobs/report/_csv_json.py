"""The report in machine-readable forms: one long CSV table and one JSON object (`leadline table --format`)."""

from __future__ import annotations

import csv
import io
import json
import math
from typing import Any

from leadline.kernels.extrapolate import COVERAGE, FAMILIES, Extrapolation

from ._model import StudyReport

__all__ = ["CSV_COLUMNS", "render_csv", "render_json"]


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
    "window",
    "depths",
    "note",
    "family",
    "status",
    "backtest_error",
    "weight",
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
             family=w.family, degree=FAMILIES[w.family].degree, window=f.k, depths=span,
             backtest_error=w.backtest_error, weight=w.weight, status=w.status,
             note="; ".join(x for x in (params, w.reason) if x))
        if w.backtest is not None:
            bt = w.backtest
            fitted = f"{bt.fit.depths[0]}-{bt.fit.depths[-1]}"
            for p, pred, err in zip(bt.held_out, bt.predicted, bt.errors):
                emit(ensemble=label, record="backtest", quantity="V_p", p=p, inv_p=1.0 / p, value=pred,
                     backtest_error=err, family=w.family, window=f.k, depths=fitted, status=w.status,
                     note="predicted from the fitted depths; backtest_error = predicted - stored")
    if ex.declined is not None:
        emit(ensemble=label, record="note", note=f"no headline: {ex.declined}")
    lim = ex.limit
    if lim is not None:
        rule = ("central: median of the weighted mixture of the fits' predictions; low/high: its central "
                f"{COVERAGE:.0%}")
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
        determined = "" if lv.determined else "; not determined by these depths (empty high)"
        emit(ensemble=label, record="depth_for", quantity=f"depth_for_{name}", value=lv.central, low=lv.low,
             high=lv.high, note=f"estimate at level {lv.level!r}; empty = never{determined}; "
                                f"{lv.fits_reaching} of {lv.fits} weighted fits reach it")


def render_csv(report: StudyReport) -> str:
    """One long CSV table; column ``record`` says what a row is.

    record = "depth": p, inv_p, value (V_p*), gain, ratio_gs, ratio_alg,
    exceeds_alg, gradient_norm.  "reference": quantity ground_state or
    algorithmic_threshold, value, uncertainty, note (source).  "fit": one fit
    of one family over its window of last depths: family, degree (polynomials),
    window (number of depths), depths, value (V_inf), uncertainty (its
    standard error), backtest_error (largest absolute error on the held-out
    depths), weight (its share of the headline), status (used / unphysical /
    no back-test), note (why).  "backtest": one
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
