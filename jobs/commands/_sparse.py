"""The sparse ensemble (--sparse-q Q --degree D) of `evaluate` and `optimize`.

The two command modules call into here with a few lines, so the command-line side of
Max-q-XORSAT on D-regular hypertrees (help texts, depth check, running, printing) lives in
one place; what a sparse ensemble may be (``check_sparse``, the degree limit) is shared with
the study spec and the Python API in ``leadline.jobs.sparse_ensemble``:

    leadline evaluate --sparse-q Q --degree D --gamma ... --beta ... [--gradient] [--json]
    leadline optimize --sparse-q Q --degree D --depth P [--json] [--output FILE]

"value" is the satisfied fraction nu_p(D; gamma, beta) (the cut fraction for Q = 2).
"""

from __future__ import annotations

import contextlib
import json

import typer

from leadline.kernels.sparse import evaluate_sparse, optimize_sparse
from leadline.kernels.numtext import fmt

from ..errors import InputError
from ..sparse_ensemble import check_sparse, ensemble_json

__all__ = ["SPARSE_Q_HELP", "DEGREE_HELP", "sparse_requested", "check_sparse_depth", "evaluate_xorsat", "optimize_xorsat"]

SPARSE_Q_HELP = ("Sparse ensemble of arity q: Max-q-XORSAT (q spins per constraint; q = 2: MaxCut) on "
                 "D-regular hypergraphs of large girth; needs --degree.")
DEGREE_HELP = "Degree D >= 2 of every spin (with --sparse-q); large values up to 1e9 are fine."


def sparse_requested(sparse_q, degree) -> bool:
    """True when the user asked for the sparse ensemble (either option given)."""
    return sparse_q is not None or degree is not None


#: complex numbers the growing-contour recursion holds at most, in units of 2^(2p-1): its two
#: buffers allocated once at the final size (kernels/sparse/_recursion.py); measured peak RSS
#: 2.6 GiB at p = 14 and 10.1 GiB at p = 15 (docs/performance.md)
SPARSE_VECTORS = 1.25
#: the reverse sweep keeps about this many times the evaluation's memory (measured at p = 12)
GRADIENT_MEMORY_FACTOR = 2.5


def check_sparse_depth(p: int, settings, option: str, gradient: bool = False) -> None:
    """Refuse depths whose whole-vector recursion cannot fit (InputError, one line)."""
    from ..spec import MAX_DEPTH

    if p > MAX_DEPTH:
        raise InputError(f"{option}: depth p = {p} is beyond {MAX_DEPTH}, the deepest this tool runs (vectors of 2^{2 * p + 1} entries)")
    need = SPARSE_VECTORS * 16 * 2 ** (2 * p - 1) * (GRADIENT_MEMORY_FACTOR if gradient else 1.0)
    distributed = settings is not None and settings.mode in ("local", "scheduler", "batch")
    try:
        import psutil

        total = psutil.virtual_memory().total
    except Exception:  # pragma: no cover - psutil is a dependency
        return
    if need > 0.8 * total and not distributed:
        raise InputError(
            f"{option}: the sparse recursion at p = {p} needs about {need / 2**30:.0f} GiB"
            f"{' with the gradient' if gradient else ''}, more than 80% of this machine's "
            f"{total / 2**30:.0f} GiB; lower the depth"
        )


def _report(ev) -> str:
    name = "cut fraction" if ev.q == 2 else "satisfied fraction"
    lines = [
        f"ensemble   = Max-{ev.q}-XORSAT{' (MaxCut)' if ev.q == 2 else ''}, {int(ev.degree)}-regular, large girth",
        f"depth p    = {ev.p}",
        f"{name} = {fmt(ev.value, 12)}",
    ]
    if ev.gradient is not None:
        lines.append("d/dgamma   = " + ", ".join(f"{x:+.6e}" for x in ev.gradient["gamma"]))
        lines.append("d/dbeta    = " + ", ".join(f"{x:+.6e}" for x in ev.gradient["beta"]))
    lines.append("residuals  = " + ", ".join(f"{k} {v:.1e}" for k, v in ev.residuals.items()))
    lines.append(f"work       = {ev.transforms} Walsh-Hadamard transforms, {ev.wall_time:.2f} s")
    return "\n".join(lines)


@contextlib.contextmanager
def transform_map(settings):
    """run_map of the executor the user asked for (local, scheduler, batch), else None.

    With one, the sparse recursion's Walsh-Hadamard transforms are split into row and
    column blocks that run as tasks; in-process (and in auto mode) they run whole.
    """
    if settings is None or settings.mode not in ("local", "scheduler", "batch"):
        yield None
        return
    from .. import compute

    with compute.open_compute(settings) as ex:
        yield ex.run_map


def evaluate_xorsat(sparse_q, degree, *, xi, gamma, beta, angles=None, gradient=False, as_json=False,
                    settings=None) -> None:
    """`leadline evaluate --sparse-q Q --degree D ...`: validate everything, evaluate, print."""
    from ..angles import check_periodic_angles, read_angles
    from ..parsing import angle_pair

    q, D = check_sparse(sparse_q, degree, xi)
    if angles is not None:
        if gamma is not None or beta is not None:
            raise InputError("give either --angles FILE or --gamma/--beta, not both")
        aset = read_angles(angles)
        g, b = aset.gamma, aset.beta
    else:
        g, b = angle_pair(gamma, beta)
    check_periodic_angles(g, "--angles" if angles is not None else "--gamma", "gamma_t", "2 pi")
    check_sparse_depth(g.size, settings, "--angles" if angles is not None else "--gamma/--beta", gradient=gradient)
    with transform_map(settings) as run_map:
        ev = evaluate_sparse(q, D, g, b, gradient=gradient, run_map=run_map)
    if as_json:
        out = ev.to_json()
        out["ensemble"] = ensemble_json(q, D)
        typer.echo(json.dumps(out))
    else:
        typer.echo(_report(ev))


def optimize_xorsat(sparse_q, degree, *, xi, depth, restarts=None, seed=0, gradient_tol=1e-7, max_iterations=500, output=None, as_json=False, start=None,
                    settings=None) -> None:
    """`leadline optimize --sparse-q Q --degree D --depth P`: depths 1..P in turn (INTERP warm starts).

    With ``start`` (an angle file of depth P-1 or P) only depth P is optimized, from it.
    """
    from ..angles import AngleSet, convergence_warning, optimum_report, write_angles
    from ..api import sparse_ladder
    from ..parsing import check_optimizer_options, warm_start
    from ..paths import check_output_file

    q, D = check_sparse(sparse_q, degree, xi)
    depth = check_optimizer_options(depth, restarts, gradient_tol, max_iterations, seed)
    initial = warm_start(start, depth)
    check_sparse_depth(depth, settings, "--depth", gradient=True)
    if output is not None:
        check_output_file(output)
    with transform_map(settings) as run_map:
        run = sparse_ladder(optimize_sparse, q, D, depth, initial, restarts=restarts, seed=seed, gradient_tol=gradient_tol,
                            max_iterations=max_iterations, ensemble=ensemble_json(q, D),
                            evaluate_kw={"run_map": run_map} if run_map is not None else None)
    result, ladder, first, wall = run.result, run.ladder, run.first_depth, run.wall_time
    if output is not None:
        write_angles(output, AngleSet(p=depth, gamma=result.gamma, beta=result.beta, xi=None, value=result.value, ensemble=ensemble_json(q, D)))
    warning = convergence_warning(result)
    if warning:
        typer.echo(warning, err=True)
    if as_json:
        typer.echo(json.dumps(run.to_json()))
        return
    name = "cut fraction" if q == 2 else "satisfied fraction"
    header = [
        f"ensemble       = Max-{q}-XORSAT{' (MaxCut)' if q == 2 else ''}, {D}-regular, large girth",
        f"depth p        = {depth}",
        f"{name} = {fmt(result.value, 10)}",
    ]
    evaluations = f"{sum(r['evaluations'] for r in ladder)} over depths {first}..{depth}, {wall:.1f} s"
    typer.echo(optimum_report(header, result, evaluations, ladder, output))
