"""`leadline optimize`: optimal angles and V_p* at one depth."""

from __future__ import annotations

import json
from typing import Optional

import typer

from leadline.kernels.exact import DEFAULT_MEMORY_BUDGET, plan_chunks
from leadline.kernels.numtext import fmt

from .. import compute
from ..angles import AngleSet, convergence_warning, optimum_report, write_angles
from ..api import optimize_ladder
from ..cost import COST_NOTE_SECONDS, check_cost, check_depth
from ..paths import check_output_file
from ..parsing import check_memory_mb, check_optimizer_options, check_representable, file_mixture, mixture_arg, warm_start
from . import _sparse as sparse


def optimize_command(
    xi: Optional[str] = typer.Option(None, "--xi", help="Mixture as q:w pairs, e.g. 2:0.5 (SK) or 3:1 (pure 3-spin)."),
    depth: Optional[int] = typer.Option(None, "--depth", "-p", help="Depth p to optimize (>= 1)."),
    start: Optional[str] = typer.Option(
        None,
        "--angles",
        help="Angle file to start from: depth p-1 (warm start by interpolation) or depth p (used as is). "
        "Without it, depths 1..p are optimized in turn, each warm-starting the next.",
    ),
    restarts: Optional[int] = typer.Option(
        None, "--restarts", help="Extra seeded starts per depth (default: 8 at p<=2, 4 at p<=4, 2 at p<=8, else 0)."
    ),
    seed: int = typer.Option(0, "--seed", help="Seed of the random and perturbed starts (results are reproducible)."),
    gtol: float = typer.Option(1e-7, "--gtol", help="Stop when the largest gradient component is below this."),
    maxiter: int = typer.Option(500, "--maxiter", help="Iteration cap of each local quasi-Newton run."),
    output: Optional[str] = typer.Option(None, "--output", "-o", help="Write the optimal angles to this angle file (JSON)."),
    memory_mb: float = typer.Option(DEFAULT_MEMORY_BUDGET / 2**20, "--memory-mb", help="Memory budget of one chunk task in MiB."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a report."),
    xorsat: Optional[int] = typer.Option(None, "--xorsat", help=sparse.XORSAT_HELP),
    degree: Optional[str] = typer.Option(None, "--degree", help=sparse.DEGREE_HELP),
    executor: str = compute.executor_option(),
    scheduler: Optional[str] = compute.scheduler_option(),
    workers: Optional[int] = compute.workers_option(),
    threads_per_worker: int = compute.threads_option(),
    cluster_config: Optional[str] = compute.cluster_config_option(),
    quiet: bool = compute.quiet_option(),
    scratch: Optional[str] = typer.Option(None, "--scratch", help=sparse.SCRATCH_HELP),
) -> None:
    """Find the angles that maximize V_p and report V_p* in canonical form.

    Examples:

        leadline optimize --xi 2:0.5 --depth 5            # SK: V_5* = 0.5476

        leadline optimize --xi 3:1 --depth 4 --angles p3.json --output p4.json
    """
    check_memory_mb(memory_mb)
    depth = check_optimizer_options(depth, restarts, gtol, maxiter, seed)
    if not sparse.sparse_requested(xorsat, degree):
        check_depth(depth, "--depth")
    initial = warm_start(start, depth)
    if initial is not None and initial.ensemble is not None and xi is None and not sparse.sparse_requested(xorsat, degree):
        # a file written by `optimize --xorsat`: continue on its own sparse ensemble
        xorsat, degree = initial.ensemble["q"], str(initial.ensemble["degree"])
    if sparse.sparse_requested(xorsat, degree):
        settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mb, cluster_config, quiet)
        return sparse.optimize_xorsat(xorsat, degree, xi=xi, depth=depth, restarts=restarts, seed=seed, gtol=gtol,
                                          maxiter=maxiter, output=output, as_json=as_json, start=start, settings=settings,
                                          scratch=scratch)
    if scratch is not None:
        raise InputError("--scratch is for sparse ensembles (--xorsat Q --degree D)")
    mix = file_mixture(xi, initial, start) if initial is not None else mixture_arg(xi)
    if initial is not None:
        check_representable(mix, initial.gamma, "--angles")
    if output is not None:
        check_output_file(output)
    settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mb, cluster_config, quiet)
    cost = check_cost(depth, plan_chunks(depth, int(memory_mb * 2**20)), settings, gradient=True, option="--depth")
    if not quiet and cost.core_seconds >= COST_NOTE_SECONDS:
        typer.echo(f"leadline: {cost.line('one evaluation with gradient')}; an optimization runs tens to hundreds", err=True)

    with compute.open_compute(settings) as ex:
        run = optimize_ladder(
            mix,
            depth,
            initial,
            run_pass=ex.run_pass,
            budget=int(memory_mb * 2**20),
            restarts=restarts,
            seed=seed,
            gtol=gtol,
            maxiter=maxiter,
            on_evaluation=lambda value, p: ex.progress.evaluation_done(value, label=f"optimize p = {p}"),
        )
    result, ladder, first, total_evals, wall = run.result, run.ladder, run.first_depth, run.evaluations_total, run.wall_time

    if output is not None:
        write_angles(output, AngleSet(p=depth, gamma=result.gamma, beta=result.beta, xi=mix.spec(), value=result.value))
    warning = convergence_warning(result)
    if warning:
        typer.echo(warning, err=True)
    if as_json:
        typer.echo(json.dumps(run.to_json()))
        return
    header = [f"xi(x)          = {mix.label()}", f"depth p        = {depth}", f"V_p*           = {fmt(result.value, 10)}"]
    evaluations = f"{total_evals} over depths {first}..{depth} ({result.restarts} starts at p = {depth}), {wall:.1f} s"
    typer.echo(optimum_report(header, result, evaluations, ladder, output))


def register(app: typer.Typer) -> None:
    app.command("optimize")(optimize_command)
