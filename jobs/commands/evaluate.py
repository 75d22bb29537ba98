"""`leadline evaluate`: V_p(gamma, beta) for one mixture and one set of angles."""

from __future__ import annotations

import json
from typing import Optional

import typer

from leadline.kernels.exact import evaluate as evaluate_kernel, DEFAULT_MEMORY_BUDGET, plan_chunks
from leadline.kernels.numtext import fmt

from .. import compute
from ..angles import read_angles
from ..cost import COST_NOTE_SECONDS, check_cost, check_depth
from ..errors import InputError
from ..parsing import angle_pair, check_memory_mb, check_representable, check_underflow, file_mixture, mixture_arg
from . import _evaluate_bath as bath, _sparse as sparse


def evaluate_command(
    xi: Optional[str] = typer.Option(
        None, "--xi", help="Mixture as q:w pairs, xi(x) = sum w x^q. SK with i<j pairs: 2:0.5; pure 3-spin: 3:1."
    ),
    gamma: Optional[str] = typer.Option(
        None, "--gamma", help="Phase angles g_1..g_p, comma-separated radians (t = 1 acts first). Negative values: --gamma=-0.3,0.5 or --gamma -0.3,0.5."
    ),
    beta: Optional[str] = typer.Option(None, "--beta", help="Mixing angles b_1..b_p, comma-separated radians."),
    angles: Optional[str] = typer.Option(None, "--angles", help="Angle file (JSON written by `leadline optimize --output`) instead of --gamma/--beta; its xi is used when --xi is not given."),
    gradient: bool = typer.Option(False, "--gradient", help="Also compute dV/dgamma and dV/dbeta (reverse mode, about 3x one evaluation)."),
    fixed_point: bool = typer.Option(False, "--check-fixed-point", help="Run one extra pass and report max|G_(p+1) - G_p| (should be ~1e-15)."),
    memory_mb: float = typer.Option(DEFAULT_MEMORY_BUDGET / 2**20, "--memory-mb", help="Memory budget of one chunk task in MiB; sets the chunk plan."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object (value, p, xi, residuals, ...) instead of a report."),
    xorsat: Optional[int] = typer.Option(None, "--xorsat", help=sparse.XORSAT_HELP),
    degree: Optional[str] = typer.Option(None, "--degree", help=sparse.DEGREE_HELP),
    executor: str = compute.executor_option(),
    scheduler: Optional[str] = compute.scheduler_option(),
    workers: Optional[int] = compute.workers_option(),
    threads_per_worker: int = compute.threads_option(),
    cluster_config: Optional[str] = compute.cluster_config_option(),
    quiet: bool = compute.quiet_option(),
    method: str = typer.Option("exact", "--method", help=bath.METHOD_HELP),
    tolerance: Optional[float] = typer.Option(None, "--tolerance", help=bath.TOLERANCE_HELP),
    fock: Optional[int] = typer.Option(None, "--fock", help=bath.FOCK_HELP),
    bond: Optional[int] = typer.Option(None, "--bond", help=bath.BOND_HELP),
    time_limit: Optional[float] = typer.Option(None, "--time-limit", help=bath.TIME_HELP),
    scratch: Optional[str] = typer.Option(None, "--scratch", help=sparse.SCRATCH_HELP),
) -> None:
    """Evaluate the exact infinite-size QAOA energy density V_p(gamma, beta).

    Example (SK model, p = 1 optimum, V = 1/sqrt(4e) = 0.30327):

        leadline evaluate --xi 2:0.5 --gamma 0.5 --beta 0.392699
    """
    check_memory_mb(memory_mb)
    angle_set = None
    if angles is not None:
        if gamma is not None or beta is not None:
            raise InputError("give either --angles FILE or --gamma/--beta, not both")
        angle_set = read_angles(angles)
        if angle_set.ensemble is not None and xi is None and not sparse.sparse_requested(xorsat, degree):
            # a file written by `optimize --xorsat`: evaluate on its own sparse ensemble
            xorsat, degree = angle_set.ensemble["q"], str(angle_set.ensemble["degree"])
    use_bath = bath.check_method(method, tolerance, fock, bond, time_limit, gradient=gradient,
                                 fixed_point=fixed_point, sparse=sparse.sparse_requested(xorsat, degree))
    if sparse.sparse_requested(xorsat, degree):
        settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mb, cluster_config, quiet)
        return sparse.evaluate_xorsat(xorsat, degree, xi=xi, gamma=gamma, beta=beta, angles=angles,
                                          gradient=gradient, as_json=as_json, settings=settings, scratch=scratch)
    if scratch is not None:
        raise InputError("--scratch is for sparse ensembles (--xorsat Q --degree D); the dense evaluation checkpoints through `leadline sweep`")
    if angle_set is not None:
        mix = file_mixture(xi, angle_set, angles)
        g, b = angle_set.gamma, angle_set.beta
    else:
        mix = mixture_arg(xi)
        g, b = angle_pair(gamma, beta)
    check_representable(mix, g, "--angles" if angle_set is not None else "--gamma", beta=b)
    if use_bath:
        return bath.evaluate_bath_command(mix, g, b, tolerance, fock, bond, time_limit, as_json, quiet)
    check_depth(g.size, "--angles" if angle_set is not None else "--gamma/--beta")
    plan = plan_chunks(g.size, int(memory_mb * 2**20))
    settings = compute.settings_from_options(executor, scheduler, workers, threads_per_worker, memory_mb, cluster_config, quiet)
    cost = check_cost(g.size, plan, settings, gradient=gradient, option="--gamma/--beta")
    if not quiet and cost.core_seconds >= COST_NOTE_SECONDS:
        typer.echo(f"leadline: {cost.line()}", err=True)
    with compute.open_compute(settings) as ex:
        passes = g.size * (2 if gradient else 1) + (1 if fixed_point else 0)  # one pass per step and direction
        ex.progress.announce_job(f"evaluate p = {g.size}", passes, plan.n_chunks)
        result = evaluate_kernel(mix, g, b, plan=plan, run_pass=ex.run_pass, gradient=gradient, fixed_point_check=fixed_point)
    check_underflow(result.value, mix, g, "--angles" if angle_set is not None else "--gamma")
    if as_json:
        typer.echo(json.dumps(result.to_json()))
        return
    typer.echo(report(result))


def _value_text(value: float) -> str:
    """Twelve decimals where they show the value, else scientific notation (kernels/numtext.py)."""
    return fmt(value, 12)


def report(result) -> str:
    lines = [
        f"xi(x)      = {result.mixture.label()}",
        f"depth p    = {result.p}",
        f"V_p        = {_value_text(result.value)}",
    ]
    if result.gradient is not None:
        lines.append("dV/dgamma  = " + ", ".join(f"{x:+.6e}" for x in result.gradient["gamma"]))
        lines.append("dV/dbeta   = " + ", ".join(f"{x:+.6e}" for x in result.gradient["beta"]))
    res = ", ".join(f"{k} {v:.1e}" for k, v in result.residuals.items())
    lines.append(f"invariants = {res}")
    plan = result.plan
    lines.append(
        f"work       = {result.passes} passes on growing contours, {result.path_visits:.3g} path visits "
        f"forward; last step {plan.n_chunks} chunks (2^{plan.n_high} x 2^{plan.n_low} paths"
        f"{', half by the flip' if plan.flip else ''}), {result.wall_time:.2f} s"
    )
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    app.command("evaluate")(evaluate_command)
