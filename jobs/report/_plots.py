"""The two figures of a report (`leadline plot`): V_p* against 1/p with the fits, and the angle schedules.

matplotlib is imported inside :func:`write_plots` (and the legend helper it calls), never at
module level: the command line must start without it (tests/test_startup.py).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from leadline.kernels.extrapolate import FAMILIES, Extrapolation
from leadline.kernels.numtext import fmt
from leadline.kernels.sparse import scaled_value

from ._model import StudyReport

__all__ = ["write_plots", "angle_plot_path", "value_axis_limits", "inset_extent", "value_figure", "FIGURE_SIZE_INCHES", "FIGURE_DPI"]


FIGURE_SIZE_INCHES = (11.0, 5.5)
FIGURE_DPI = 100
ANGLE_PANEL_INCHES = (10.0, 3.2)  # width, height per ensemble row


def angle_plot_path(output: Path) -> Path:
    """FILE.png -> FILE-angles.png (the second figure, the angle schedules)."""
    output = Path(output)
    return output.with_name(output.stem + "-angles" + output.suffix)


FAMILY_LINESTYLES = {"linear-in-1/p": (0, (1, 1.5)), "quadratic-in-1/p": (0, (4, 2)),
                     "cubic-in-1/p": (0, (6, 2, 1, 2)), "free-power-law": "-",
                     "power-law-to-GS": (0, (3, 1, 1, 1))}
INSET_DEPTHS = 5  # the inset shows the last five depths and the fits out to 1/p = 0
REJECTED_ALPHA = 0.25


def _drawn_fits(ex: Extrapolation) -> list:
    """[(WindowFit, used)]: per family its used window with the highest back-test weight, else
    (family not used: unphysical or not back-tested) its window with the smallest back-test error."""
    best = ex.best_by_family()
    out = []
    for fam in FAMILIES:
        cands = [w for w in ex.fits if w.family == fam]
        if cands:
            w = best.get(fam) or min(cands, key=lambda c: (c.back_test_error if c.back_test else math.inf, c.fit.k))
            out.append((w, fam in best))
    return out


def _curve(fit, x_max: float):
    xs = np.linspace(0.0, x_max, 200)
    return xs, np.asarray(fit.predict(np.where(xs > 0, 1.0 / np.maximum(xs, 1e-300), np.inf)))


def _padded(lo: float, hi: float, pad: float = 0.04) -> tuple[float, float]:
    span = hi - lo if hi > lo else max(abs(hi), 1.0) * 1e-3
    return lo - pad * span, hi + pad * span


def value_axis_limits(report: StudyReport, x_max: float = math.inf) -> tuple[float, float] | None:
    """Limits of the value axis over 1/p in [0, x_max]: the stored values, the curves of the used
    fits as drawn, the headline bars and the reference lines; never a rejected fit (unphysical or
    not back-tested), which would squash the data. None when nothing is drawn."""
    ys: list[float] = []
    for rep in report.ensembles:
        if not rep.rows:
            continue
        if rep.kind == "sparse":
            ys += [scaled_value(rep.q, rep.degree, r.value) for r in rep.rows if r.inv_p <= x_max]
            continue
        ys += [r.value for r in rep.rows if r.inv_p <= x_max]
        ex = rep.extrapolation
        if ex is not None:
            for w, used in _drawn_fits(ex):
                if used:
                    ys += list(_curve(w.fit, min(x_max, 1.0 / w.fit.depths[0]))[1])
            if ex.limit is not None:
                ys += [ex.limit.low, ex.limit.high]
        refs = rep.references
        ys += [y for y in (refs.ground_state, refs.threshold) if y is not None]
    ys = [y for y in ys if math.isfinite(y)]
    return _padded(min(ys), max(ys)) if ys else None


def _draw_extrapolation(ax, ex: Extrapolation, color, label: str | None) -> None:
    """Each family's curve out to 1/p = 0, its back-test, and the headline at 1/p = 0.

    Per family the used window with the highest weight is drawn (bold); a
    family with no used window (unphysical, or no back-test) is drawn thin and
    faint.  The held-out depths are ringed, and each used fit's back-test
    predictions at them are marked with x.  The headline V_inf (central,
    range) is an error bar at 1/p = 0.
    """
    for w, used in _drawn_fits(ex):
        fit, fam = w.fit, w.family
        xs, ys = _curve(fit, 1.0 / fit.depths[0])
        ax.plot(xs, ys, color=color, ls=FAMILY_LINESTYLES[fam], lw=1.4 if used else 0.7,
                alpha=0.9 if used else REJECTED_ALPHA)
        if w.back_test is not None and used:
            bt = w.back_test
            ax.plot([1.0 / p for p in bt.held_out], bt.predicted, "x", color=color, ms=5, alpha=0.9)
    tested = [w for w in ex.fits if w.back_test is not None]
    if tested:
        bt = tested[0].back_test
        ax.plot([1.0 / p for p in bt.held_out], bt.actual, "o", mfc="none", mec=color, ms=10, mew=1.0)
    if ex.limit is not None:
        lim = ex.limit
        text = f"{label}: V_inf ~ {fmt(lim.central, 4)} ({fmt(lim.low, 4)}..{fmt(lim.high, 4)}, estimate)" if label else None
        ax.errorbar([0.0], [lim.central], yerr=[[lim.central - lim.low], [lim.high - lim.central]], fmt="s",
                    color=color, capsize=4, ms=5, label=text)


def inset_extent(report: StudyReport) -> float | None:
    """Right end (in 1/p) of the inset: just beyond the earliest of the last INSET_DEPTHS depths."""
    firsts = [rep.rows[-min(INSET_DEPTHS, len(rep.rows))].p for rep in report.ensembles
              if rep.kind != "sparse" and rep.extrapolation is not None and rep.rows]
    return 1.1 / min(firsts) if firsts else None


#: marker of depths from the bosonic-bath engine (exact depths: "o"), so a figure says which is which
BATH_MARKER = "D"


def _draw_values(ax, rows, color, label: str | None = None, ms: float | None = None) -> None:
    """V_p* of a dense ensemble: exact depths as dots, bath-engine depths as diamonds with their error
    estimate as an error bar (too small to see at most scales; the legend states the largest)."""
    size = {} if ms is None else {"ms": ms}
    exact = [r for r in rows if r.method != "bath"]
    bath = [r for r in rows if r.method == "bath"]
    if exact:
        ax.plot([r.inv_p for r in exact], [r.value for r in exact], "o", color=color, label=label, **size)
    if bath:
        largest = max((r.error_estimate or 0.0) for r in bath)
        bath_label = None
        if label is not None:
            first = f"{label}, " if not exact else "  "
            bath_label = (f"{first}bath engine, p = {bath[0].p}..{bath[-1].p} (error estimate <= {largest:.1e})"
                          if len(bath) > 1 else f"{first}bath engine, p = {bath[0].p} (error estimate {largest:.1e})")
        ax.errorbar([r.inv_p for r in bath], [r.value for r in bath], yerr=[r.error_estimate or 0.0 for r in bath],
                    fmt=BATH_MARKER, color=color, label=bath_label, **({"ms": 0.8 * ms} if ms else {"ms": 5}))


def _draw_zoom(ax, report: StudyReport, zoomed) -> None:
    """Inset (upper right) magnifying the last depths and the fits out to 1/p = 0."""
    x_max = inset_extent(report)
    if x_max is None:
        return
    inset = ax.inset_axes([0.47, 0.4, 0.5, 0.46])
    for rep, color in zoomed:
        _draw_values(inset, [r for r in rep.rows if r.inv_p <= x_max], color, ms=4)
        _draw_extrapolation(inset, rep.extrapolation, color, None)
        if rep.references.ground_state is not None:
            inset.axhline(rep.references.ground_state, color=color, ls="--", lw=1.0)
    inset.set_xlim(-0.03 * x_max, x_max)
    limits = value_axis_limits(StudyReport(report.name, [rep for rep, _ in zoomed]), x_max)
    if limits is not None:
        inset.set_ylim(*limits)
    inset.tick_params(labelsize=7)
    inset.grid(True, alpha=0.3)
    inset.set_title(f"zoom: the last {INSET_DEPTHS} depths and the fits out to 1/p = 0", fontsize=7, pad=2)


def _family_legend_handles():
    """Proxy artists explaining the line styles, the back-test marks and the headline bar (grey)."""
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color="0.3", ls=FAMILY_LINESTYLES[f.name], lw=1.4, label=f"{f.name}: {f.description}")
               for f in FAMILIES.values()]
    handles.append(Line2D([], [], color="0.3", ls="none", marker="o", mfc="none", ms=9,
                          label="held-out depths of the back-test"))
    handles.append(Line2D([], [], color="0.3", ls="none", marker="x", label="back-test predictions (fit on earlier depths)"))
    handles.append(Line2D([], [], color="0.3", lw=0.7, alpha=REJECTED_ALPHA,
                          label="faint: family not used (unphysical / no back-test)"))
    return handles


def write_plots(report: StudyReport, output: Path) -> list[Path]:
    """Write the two figures; return their paths.

    ``output`` (FILE.png, 1100 x 550 pixels, legend at the right): V_p* against 1/p per ensemble,
    markers for the stored values (dots: exact depths; diamonds: bath-engine depths, with their
    error estimate as an error bar), each fit family's curve out to 1/p = 0 (one
    line style per family, its best back-tested window; faint when the family
    is not used), the held-out depths of the back-test ringed with the
    back-test predictions marked x, the headline V_inf and its range as an
    error bar at 1/p = 0, and horizontal reference lines: GS dashed, ALG
    dotted, in the ensemble's colour.

    ``FILE-angles.png`` (1000 x 320*n_ensembles pixels): optimal gamma_t and
    beta_t against (t - 1/2)/p, one curve per depth p (darker = deeper), one
    row of two panels per ensemble.
    """
    plt = _pyplot()

    output = Path(output)
    paths = [output, angle_plot_path(output)]
    # both figures are drawn into temporary files beside their final names and moved into place
    # only when both are complete: a failed write (full disk, file-size limit) leaves no half file
    temps = [p.with_name(f".{p.name}.{os.getpid()}.tmp") for p in paths]
    try:
        fig, _ = value_figure(report)
        fig.savefig(temps[0], dpi=FIGURE_DPI, format="png")
        plt.close(fig)
        _angle_figure(report, temps[1])
        for tmp, final in zip(temps, paths):
            os.replace(tmp, final)
    except OSError as exc:
        if exc.errno:
            failed = OSError(exc.errno, exc.strerror, str(output))
            failed.add_note("no figure was written")
            raise failed from None
        raise
    finally:
        for tmp in temps:
            tmp.unlink(missing_ok=True)
    return paths


def _pyplot():
    """matplotlib.pyplot on the Agg backend, its font cache kept quiet.

    On a machine where matplotlib has never run, its first import scans the fonts and writes a
    cache, and says so on stderr ("building the font cache", or "Could not save font_manager
    cache" when the disk is full or a file-size limit is set): lines about matplotlib's own files,
    not the user's figure, that would break the one-line error a failed `plot` promises. Only that
    logger is quieted, to errors.
    """
    import logging

    logging.getLogger("matplotlib.font_manager").setLevel(logging.ERROR)
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def value_figure(report: StudyReport):
    """(figure, main axes) of V_p* against 1/p (see :func:`write_plots`); the inset is ``ax.child_axes``."""
    plt = _pyplot()

    fig, ax = plt.subplots(figsize=FIGURE_SIZE_INCHES, dpi=FIGURE_DPI)
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    zoomed = []  # dense ensembles with an extrapolation, drawn again in the inset
    for i, rep in enumerate(report.ensembles):
        color = colors[i % len(colors)]
        if not rep.rows:
            continue
        x = np.array([r.inv_p for r in rep.rows])
        y = np.array([r.value for r in rep.rows])
        if rep.kind == "sparse":
            # a satisfied fraction is not an energy: show the scaled value, which tends
            # to V_p* of xi = x^q as D grows (universality view)
            y = np.array([scaled_value(rep.q, rep.degree, v) for v in y])
            ax.plot(x, y, "x--", color=color, lw=0.8,
                    label=f"{rep.label}: q = {rep.q}, D = {rep.degree:g}, sqrt(D)(nu*-1/2)2/sqrt(q)")
            continue
        _draw_values(ax, rep.rows, color, label=f"{rep.label}: {rep.description}")
        if rep.extrapolation is not None:
            _draw_extrapolation(ax, rep.extrapolation, color, rep.label)
            zoomed.append((rep, color))
        refs = rep.references
        if refs.ground_state is not None:
            ax.axhline(refs.ground_state, color=color, ls="--", lw=1.0,
                       label=f"  GS = {fmt(refs.ground_state, 4)} ({refs.ground_state_origin})")
        if refs.threshold is not None:
            ax.axhline(refs.threshold, color=color, ls=":", lw=1.2,
                       label=f"  ALG = {fmt(refs.threshold, 4)} ({refs.threshold_origin})")
    limits = value_axis_limits(report)
    if limits is not None:
        ax.set_ylim(*limits)
    if zoomed:
        _draw_zoom(ax, report, zoomed)
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
    return fig, ax


def _angle_figure(report: StudyReport, path: Path) -> None:
    plt = _pyplot()

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
    fig.savefig(path, dpi=FIGURE_DPI, format="png")
    plt.close(fig)
