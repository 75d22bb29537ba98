"""`leadline table`: per-depth V_p*, ratios to reference energies and extrapolations of a study."""

from __future__ import annotations

from typing import List, Optional

import typer

from ..errors import InputError
from ..parsing import parse_at_depths, parse_ground_state_options, refuse_sparse_ground_states
from ..paths import check_output_file, write_text_atomic
from ..report import build_report, load_study, render_csv, render_json, render_markdown

FORMATS = {"markdown": render_markdown, "csv": render_csv, "json": render_json}


def table_command(
    store: str = typer.Argument(..., help="Study store directory written by 'leadline sweep'."),
    fmt: str = typer.Option("markdown", "--format", help="markdown (reads well in a terminal), csv (one long table, column 'record' says what a row is) or json (one object)."),
    output: Optional[str] = typer.Option(None, "--output", "-o", help="Write to this file instead of stdout."),
    ground_state: Optional[List[str]] = typer.Option(
        None, "--ground-state",
        help="Reference ground-state energy density: VALUE (one-ensemble study) or LABEL=VALUE, repeatable. Overrides the spec, computed and shipped values.",
    ),
    at_depth: Optional[str] = typer.Option(
        None, "--at-depth",
        help="Comma-separated depths at which to predict V_p and V_p/GS from the extrapolation, e.g. 50,100,160.",
    ),
) -> None:
    """Table of the optimal energies V_p* per depth, with extrapolations to p -> infinity.

    Per ensemble: p, 1/p, V_p*, gain over p-1, V_p*/GS where a ground state is
    known, V_p*/ALG and whether V_p* exceeds ALG where the algorithmic threshold
    is known, the final gradient norm; then the extrapolation: fit families
    (polynomials in 1/p of degree 1-3, a free power law V_inf - A p^-alpha, the
    power law anchored at GS) over several windows of the last depths (longer
    beyond 12 depths, in proportion), each back-tested on held-out depths and
    weighted by its back-test error; from 8 depths on, the headline
    V_inf with a range from the weighted fits, and the predicted depths for
    ratios 0.95, 0.99 and ALG (fewer depths: what each family gives, no
    headline). Extrapolations are estimates, not bounds (docs/extrapolation.md).

    Example: leadline table study.zarr --at-depth 50,100,160 --format csv --output table.csv
    """
    render = FORMATS.get(fmt.lower().strip())
    if render is None:
        raise InputError(f"--format {fmt!r}: choose one of {', '.join(FORMATS)}")
    depths = parse_at_depths(at_depth)
    out_path = check_output_file(output) if output is not None else None
    study = load_study(store)
    overrides = parse_ground_state_options(ground_state, study.ensembles())
    refuse_sparse_ground_states(overrides, study)
    text = render(build_report(study, ground_states=overrides, at_depths=depths))
    if not text.endswith("\n"):
        text += "\n"
    if out_path is None:
        typer.echo(text, nl=False)
    else:
        write_text_atomic(out_path, text)
        typer.echo(f"wrote {out_path}", err=True)


def register(app: typer.Typer) -> None:
    app.command("table")(table_command)
