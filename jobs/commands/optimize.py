"""`leadline optimize`: optimal angles and V_p* at one depth."""

from __future__ import annotations

import json
from typing import Optional

import typer

from leadline.kernels.exact import DEFAULT_MEMORY_BUDGET, plan_chunks
from leadline.kernels.numtext import fmt

from .. import compute
from ..angles import AngleSet, convergence_warning, optimum_report, write_angles
from ..ladders import bath_ladder, optimize_ladder
from ..bath import check_optimize_method, engine_settings
from ..cost import COST_NOTE_SECONDS, check_cost, check_depth
from ..errors import InputError
from ..paths import check_output_file
from ..parsing import check_memory_mib, check_optimizer_options, check_representable, file_mixture, mixture_arg, warm_start
from . import _evaluate_bath as bath, _sparse as sparse


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
        None, "--restarts", help="Extra seeded starts per depth (default: 8 at p<=2, 4 at p<=4, 2 at p<=8, else 0; with --sparse-q 3 at p<=2, 1 at p<=6, else 0)."
    ),
    seed: int = typer.Option(0, "--seed", help="Seed of the random and perturbed starts (results are reproducible)."),
    gradient_tol: float = typer.Option(1e-7, "--gradient-tol", help="Stop when the gradient norm (the largest component of dV/d(gamma, beta)) is below this."),
    max_iterations: int = typer.Option(500, "--max-iterations", help="Iteration cap of each local quasi-Newton run."),
    output: Optional[str] = typer.Option(None, "--output", "-o", help="Write the optimal angles to this angle file (JSON)."),
    memory_mib: Optional[float] = typer.Option(None, "--memory-mib", help=f"Memory budget of one chunk task in MiB (exact method; default {DEFAULT_MEMORY_BUDGET / 2**20:g})."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a report."),
    sparse_q: Optional[int] = typer.Option(None, "--sparse-q", help=sparse.SPARSE_Q_HELP),
    degree: Optional[str] = typer.Option(None, "--degree", help=sparse.DEGREE_HELP),
    executor: str = compute.executor_option(),
    scheduler: Optional[str] = compute.scheduler_option(),
    workers: Optional[int] = compute.workers_option(),
    threads_per_worker: int = compute.threads_option(),
    batch_file: Optional[str] = compute.batch_file_option(),
    quiet: bool = compute.quiet_option(),
    method: str = typer.Option("exact", "--method", help=bath.METHOD_HELP + " With bath the gradient is a finite difference, its evaluations run on the executor."),
    tolerance: Optional[float] = typer.Option(None, "--tolerance", help=bath.TOLERANCE_HELP + " Every evaluation of the optimizer is asked for it; the optimizer never chases changes below its error estimate."),
    fock: Optional[int] = typer.Option(None, "--fock", help=bath.FOCK_HELP),
    bond: Optional[int] = typer.Option(None, "--bond", help=bath.BOND_HELP),
    scratch: Optional[str] = typer.Option(None, "--scratch", help=sparse.SCRATCH_HELP),
) -> None:
    """Find the angles that maximize V_p and report V_p* in canonical form.

    Examples:

        leadline optimize --xi 2:0.5 --depth 5            # SK: V_5* = 0.5476

        leadline optimize --xi 3:1 --depth 4 --angles p3.json --output p4.json

        leadline optimize --xi 2:0.5 --depth 18 --angles p17.json --method bath
    """
    use_bath = check_optimize_method(method, tolerance=tolerance, fock=fock, bond=bond, memory_mib=memory_mib,
                                     sparse=sparse.sparse_requested(sparse_q, degree))
    memory_mib = DEFAULT_MEMORY_BUDGET / 2**20 if memory_mib is None else memory_mib
    check_memory_mib(memory_mib)
    depth = check_optimizer_options(depth, restarts, gradient_tol, max_iterations, seed)
    if not sparse.sparse_requested(sparse_q, degree) and not use_bath:
        check_depth(depth, "--depth")
    initial = warm_start(start, depth)
    if initial is not None and initial.ensemble is not None and xi is None and not sparse.sparse_requested(sparse_q, degree):
        # a file written by `optimize --sparse-q`: continue on its own sparse ensemble
        sparse_q, degree = initial.ensemble["q"], str(initial.ensemble["degree"])
    if sparse.sparse_requested(sparse_q, degree):
        settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mib, batch_file, quiet)
        return sparse.optimize_xorsat(sparse_q, degree, xi=xi, depth=depth, restarts=restarts, seed=seed, gradient_tol=gradient_tol,
                                          max_iterations=max_iterations, output=output, as_json=as_json, start=start, settings=settings,
                                          scratch=scratch)
    if scratch is not None:
        raise InputError("--scratch is for sparse ensembles (--sparse-q Q --degree D)")
    mix = file_mixture(xi, initial, start) if initial is not None else mixture_arg(xi)
    if initial is not None:
        check_representable(mix, initial.gamma, "--angles")
    if output is not None:
        check_output_file(output)
    settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mib, batch_file, quiet)
    if use_bath:
        return _optimize_bath(mix, depth, initial, settings, engine_settings(tolerance, fock, bond), restarts=restarts,
                              seed=seed, gradient_tol=gradient_tol, max_iterations=max_iterations, output=output, as_json=as_json)
    cost = check_cost(depth, plan_chunks(depth, int(memory_mib * 2**20)), settings, gradient=True, option="--depth")
    if not quiet and cost.core_seconds >= COST_NOTE_SECONDS:
        typer.echo(f"leadline: {cost.line('one evaluation with gradient')}; an optimization runs tens to hundreds", err=True)

    with compute.open_compute(settings) as ex:
        run = optimize_ladder(
            mix,
            depth,
            initial,
            run_pass=ex.run_pass,
            budget=int(memory_mib * 2**20),
            restarts=restarts,
            seed=seed,
            gradient_tol=gradient_tol,
            max_iterations=max_iterations,
            on_evaluation=lambda value, p: ex.progress.evaluation_done(value, label=f"optimize p = {p}"),
        )
    result, ladder, first, total_evals, wall = run.result, run.ladder, run.first_depth, run.evaluations_total, run.wall_time

    if _write_and_json(run, mix, depth, output, as_json):
        return
    header = [f"xi(x)          = {mix.label()}", f"depth p        = {depth}", f"V_p*           = {fmt(result.value, 10)}"]
    evaluations = f"{total_evals} over depths {first}..{depth} ({result.restarts} starts at p = {depth}), {wall:.1f} s"
    typer.echo(optimum_report(header, result, evaluations, ladder, output))


def _write_and_json(run, mix, depth: int, output, as_json: bool) -> bool:
    """Write the angle file, warn when not converged, print JSON if asked; True when printed."""
    result = run.result
    if output is not None:
        write_angles(output, AngleSet(p=depth, gamma=result.gamma, beta=result.beta, xi=mix.spec(), value=result.value))
    warning = convergence_warning(result)
    if warning:
        typer.echo(warning, err=True)
    if as_json:
        typer.echo(json.dumps(run.to_json()))
    return as_json


def _optimize_bath(mix, depth, initial, settings, engine, *, restarts, seed, gradient_tol, max_iterations, output, as_json) -> None:
    """`optimize --method bath`: the bath ladder on the executor, reported with the error estimate."""
    from leadline.kernels.bath import BathLimitError

    with compute.open_compute(settings) as ex:
        try:
            run = bath_ladder(
                mix, depth, initial, run_map=ex.run_map, engine=engine, restarts=restarts, seed=seed, gtol=gradient_tol,
                maxiter=max_iterations,
                on_evaluation=lambda info, p: ex.progress.evaluation_done(
                    info["best_value"], label=f"optimize p = {p} (bath)", count=info["evaluations"],
                    detail=f" +- {info['best_error_estimate']:.1e}, {info['evaluation_s']:.2f} s per evaluation"),
            )
        except BathLimitError as exc:  # the engine cannot meet the tolerance at some point it was asked for
            raise InputError(f"{exc}; nothing written") from None
    result = run.result
    if _write_and_json(run, mix, depth, output, as_json):
        return
    header = [f"xi(x)          = {mix.label()}", f"depth p        = {depth}",
              f"V_p*           = {result.value:.10f} +- {result.error_estimate:.1e} (bosonic bath)"]
    evaluations = (f"{run.evaluations_total} over depths {run.first_depth}..{depth} ({result.gradients} gradients at "
                   f"p = {depth}, {result.evaluation_seconds:.3f} CPU s each), {run.wall_time:.1f} s")
    text = optimum_report(header, result, evaluations, run.ladder, output)
    text = text.replace(f"gradient norm  = {result.gradient_norm:.1e}",
                        f"gradient norm  = {result.gradient_norm:.1e} (noise {result.gradient_noise:.1e})")
    typer.echo(text)


def register(app: typer.Typer) -> None:
    app.command("optimize")(optimize_command)
