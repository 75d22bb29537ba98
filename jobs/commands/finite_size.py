"""`leadline finite-size`: statevector averages at finite n next to the exact V_p."""

from __future__ import annotations

import json
import time
from typing import Optional

import numpy as np
import typer

from leadline.kernels.finite_size import estimate_energy_density
from leadline.kernels.exact import evaluate as evaluate_kernel, plan_chunks
from leadline.kernels.numtext import fmt, parse_int

from ..cost import check_cost, check_depth
from ..errors import InputError
from ..parsing import angle_pair, check_representable, mixture_arg

MIN_SPINS = 2
MAX_SPINS = 22  # 2^22 complex128 = 64 MiB per state; larger n is hours of work
MAX_INSTANCES = 1_000_000


def spins_arg(text: str | None) -> list[int]:
    """'8,10,12' -> sorted list of distinct ints in MIN_SPINS..MAX_SPINS."""
    if text is None or not str(text).strip():
        raise InputError("--n needs comma-separated numbers of spins, for example --n 8,10,12")
    sizes = []
    for item in str(text).split(","):
        item = item.strip()
        try:
            n = parse_int(item)
        except ValueError:
            raise InputError(f"--n: {item!r} is not a whole number of spins") from None
        if not MIN_SPINS <= n <= MAX_SPINS:
            raise InputError(f"--n: number of spins must be between {MIN_SPINS} and {MAX_SPINS}, got {n}")
        if n in sizes:
            raise InputError(f"--n: {n} is listed twice")
        sizes.append(n)
    return sorted(sizes)


def finite_size_command(
    xi: Optional[str] = typer.Option(
        None, "--xi", help="Mixture as q:w pairs, xi(x) = sum w x^q. SK with i<j pairs: 2:0.5; pure 3-spin: 3:1."
    ),
    gamma: Optional[str] = typer.Option(
        None, "--gamma", help="Phase angles g_1..g_p, comma-separated radians (t = 1 acts first). Negative values: --gamma=-0.3,0.5 or --gamma -0.3,0.5."
    ),
    beta: Optional[str] = typer.Option(None, "--beta", help="Mixing angles b_1..b_p, comma-separated radians."),
    spins: Optional[str] = typer.Option(
        "8,10,12", "--n", "--spins", help=f"Numbers of spins n, comma-separated, each {MIN_SPINS}..{MAX_SPINS} (cost grows like n 2^n per instance)."
    ),
    instances: int = typer.Option(50, "--instances", help="Random instances per n (at least 2); the standard error falls like 1/sqrt(instances)."),
    seed: int = typer.Option(0, "--seed", help="Seed (>= 0). The instances of size n depend only on (seed, n), not on the other sizes requested."),
    keep_constant: bool = typer.Option(
        False, "--keep-constant", help="Keep the instance's constant term (even q) in the energy; by default it is dropped, which keeps the mean and lowers the spread."
    ),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
) -> None:
    """Average <H>/n of the QAOA state over random instances at finite n, next to the exact V_p.

    Instances are sampled exactly as in the model (all ordered q-tuples, so
    E[H(z)H(z')] = n xi(R)); the state is computed by statevector. The table
    shows how the finite-n average approaches the infinite-size V_p.

    Example (SK model at its p = 1 optimum, V_1 = 0.30327):

        leadline finite-size --xi 2:0.5 --gamma 0.5 --beta 0.392699 --n 8,12,16 --instances 100
    """
    mix = mixture_arg(xi)
    g, b = angle_pair(gamma, beta)
    check_representable(mix, g, beta=b)  # the exact infinite-size column must be a double
    check_depth(g.size, "--gamma/--beta")
    check_cost(g.size, plan_chunks(g.size), None, gradient=False, option="--gamma/--beta")
    sizes = spins_arg(spins)
    if not 2 <= instances <= MAX_INSTANCES:
        raise InputError(f"--instances must be between 2 and {MAX_INSTANCES}, got {instances}")
    if seed < 0:
        raise InputError(f"--seed must be >= 0, got {seed}")

    started = time.perf_counter()
    exact = evaluate_kernel(mix, g, b)
    rows = []
    for n in sizes:
        t0 = time.perf_counter()
        rng = np.random.default_rng([seed, n])
        est = estimate_energy_density(mix, n, g, b, instances, rng, keep_constant=keep_constant)
        difference = est.mean - exact.value
        rows.append(
            {
                "n": n,
                "mean": est.mean,
                "std_error": est.std_error,
                "difference": difference,
                "difference_in_std_errors": difference / est.std_error if est.std_error > 0 else None,
                "wall_time_s": time.perf_counter() - t0,
            }
        )
    out = {
        "xi": mix.spec(),
        "p": int(g.size),
        "gamma": g.tolist(),
        "beta": b.tolist(),
        "instances": instances,
        "seed": seed,
        "constant_term": "kept" if keep_constant else "dropped",
        "infinite_size_value": exact.value,
        "sizes": rows,
        "wall_time_s": time.perf_counter() - started,
    }
    if as_json:
        typer.echo(json.dumps(out))
        return
    typer.echo(report(out, mix.label()))


def report(out: dict, label: str) -> str:
    lines = [
        f"xi(x)      = {label}",
        f"depth p    = {out['p']}",
        f"instances  = {out['instances']} per n, seed {out['seed']}, constant term {out['constant_term']}",
        f"V_p        = {fmt(out['infinite_size_value'])}  (exact, n -> infinity)",
        "",
        "   n   mean <H>/n   std error   mean - V_p   in std errors",
    ]
    for row in out["sizes"]:
        z = row["difference_in_std_errors"]
        z_text = f"{z:+13.1f}" if z is not None else "            -"
        lines.append(
            f"{row['n']:4d}   {fmt(row['mean']):>10}   {fmt(row['std_error']):>9}   {fmt(row['difference'], signed=True):>10}  {z_text}"
        )
    lines.append(f"({out['wall_time_s']:.1f} s)")
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    app.command("finite-size")(finite_size_command)
