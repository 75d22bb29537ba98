"""`leadline plot`: V_p* against 1/p with fits and reference lines, and the angle schedules."""

from __future__ import annotations

from typing import List, Optional

import typer

from ..errors import InputError
from ..parsing import parse_ground_state_options, refuse_sparse_ground_states
from ..paths import check_output_file
from ..report import angle_plot_path, build_report, load_study, write_plots


def plot_command(
    store: str = typer.Argument(..., help="Study store directory written by 'leadline sweep'."),
    output: Optional[str] = typer.Option(None, "--output", "-o", help="PNG file for V_p* vs 1/p; the angle schedules go to FILE-angles.png beside it."),
    ground_state: Optional[List[str]] = typer.Option(
        None, "--ground-state", help="Reference ground-state energy density: VALUE or LABEL=VALUE, repeatable (drawn as a dashed line)."
    ),
) -> None:
    """Two figures of a study: V_p* vs 1/p per ensemble, and the optimal angle schedules.

    FILE.png: stored V_p* (dots: exact depths, diamonds: bath-engine depths),
    each extrapolation family's curve out to
    1/p = 0 (one line style per family; faint when not used), the held-out
    depths of the back-test (rings) with the back-test predictions (x), the
    headline V_inf and its range at 1/p = 0 (an estimate, not a bound), and
    reference lines GS (dashed) and ALG (dotted) where known; the value axis
    is set by the data and the used fits, an inset shows the last depths.
    FILE-angles.png: gamma_t and beta_t against (t - 1/2)/p, one curve per depth.

    Example: leadline plot study.zarr --output study.png
    """
    if output is None:
        raise InputError("--output FILE.png is required (the angle schedules are written to FILE-angles.png)")
    out_path = check_output_file(output, suffix=".png")
    check_output_file(angle_plot_path(out_path), suffix=".png")
    study = load_study(store)
    if not any(study.depths(label) for label in study.ensembles()):
        raise InputError(
            f"nothing to plot yet: no depth of {store} has finished (`leadline status {store}` shows the progress)"
        )
    overrides = parse_ground_state_options(ground_state, study.ensembles())
    refuse_sparse_ground_states(overrides, study)
    paths = write_plots(build_report(study, ground_states=overrides), out_path)
    for path in paths:
        typer.echo(f"wrote {path}")


def register(app: typer.Typer) -> None:
    app.command("plot")(plot_command)
