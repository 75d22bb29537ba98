"""`leadline evaluate --method bath`: V_p from the bosonic-bath engine, to a tolerance.

Kept apart from evaluate.py so that the exact path is untouched; the bath engine is
imported only when this method is asked for.
"""

from __future__ import annotations

import json
import sys
import time
from typing import Optional

import typer

from leadline.kernels.numtext import fmt

from ..errors import InputError

METHODS = ("exact", "bath")
METHOD_HELP = "exact (default): the exact path-sum iteration. bath: the bosonic-bath engine (matrix product state, polynomial in p, with an error estimate; see docs/bath.md)."
TOLERANCE_HELP = "--method bath: error asked for (default 1e-6). The engine tightens its truncation until its error estimate is below it, or says in one line that it cannot (exit 2)."
FOCK_HELP = "--method bath: most Fock levels any bath mode may get (default 40; each mode gets what its occupation needs)."
BOND_HELP = "--method bath: largest bond dimension chi of the matrix product state (default 256; the truncation itself is by discarded weight)."
TIME_HELP = "--method bath: wall-clock seconds allowed (default: no limit); when they pass, it stops in one line (exit 2)."

#: accepted ranges of the bath options (outside them: too small to mean anything, or absurd)
TOLERANCE_RANGE = (1e-11, 1e-1)
BOND_RANGE = (4, 4096)
FOCK_RANGE = (4, 200)
#: deepest circuit the bath engine accepts; beyond NOTE_DEPTH a cost note is printed
MAX_BATH_DEPTH = 200
NOTE_DEPTH = 32


def check_method(method: str, tolerance: Optional[float], fock: Optional[int], bond: Optional[int],
                 time_limit: Optional[float], *, gradient: bool, fixed_point: bool, sparse: bool) -> bool:
    """Validate the method options; True when the bath engine is asked for."""
    if method not in METHODS:
        raise InputError(f"--method must be one of {', '.join(METHODS)}, got {method!r}")
    given = (("--tolerance", tolerance), ("--fock", fock), ("--bond", bond), ("--time-limit", time_limit))
    if method == "exact":
        for name, value in given:
            if value is not None:
                raise InputError(f"{name} applies only to --method bath")
        return False
    if sparse:
        raise InputError("--method bath is for the mixed-spin (dense) model, not --sparse-q/--degree")
    if gradient or fixed_point:
        raise InputError("--method bath gives the value only: drop --gradient/--check-fixed-point")
    for name, value, (lo, hi) in (("--tolerance", tolerance, TOLERANCE_RANGE), ("--fock", fock, FOCK_RANGE),
                                  ("--bond", bond, BOND_RANGE)):
        if value is not None and not (lo <= value <= hi):
            raise InputError(f"{name} must be between {lo:g} and {hi:g}, got {value:g}")
    if time_limit is not None and not (time_limit > 0 and time_limit < float("inf")):
        raise InputError(f"--time-limit must be a positive number of seconds, got {time_limit}")
    return True


def check_bath_size(p: int, bond: int, fock: int) -> None:
    """Refuse depths beyond the engine's range and bond caps whose states cannot fit in memory."""
    if p > MAX_BATH_DEPTH:
        raise InputError(f"--method bath accepts at most p = {MAX_BATH_DEPTH} layers (its cost grows like "
                         f"p^2 to p^3 times bond^3; measured to p = 32, docs/bath.md), got p = {p}")
    need = state_bytes(p, bond, fock)
    import psutil

    avail = psutil.virtual_memory().available
    if need > avail:
        raise InputError(f"--bond {bond} at p = {p} may need {need / 2**30:.1f} GiB for the state "
                         f"({avail / 2**30:.1f} GiB available): give a smaller --bond or --fock")


def state_bytes(p: int, bond: int, fock: int) -> float:
    """Peak bytes of one state at the bond cap: p sites of (2 chi) x d x (2 chi) during a layer,
    d about half the Fock cap (later modes need fewer levels), complex128."""
    return p * (2 * bond) ** 2 * max(fock // 2, 2) * 16.0


def run_checked(mix, g, b, *, tolerance=None, bond=None, fock=None, time_limit=None, quiet=True):
    """evaluate_bath with the option checks, the size checks and the refusals of the command line
    (the Python API calls this too); InputError (one line) for anything it cannot promise."""
    from leadline.kernels.bath import BathLimitError, DEFAULT_BOND_CAP, DEFAULT_FOCK_CAP, DEFAULT_TOLERANCE, evaluate_bath

    check_method("bath", tolerance, fock, bond, time_limit, gradient=False, fixed_point=False, sparse=False)
    tolerance = DEFAULT_TOLERANCE if tolerance is None else tolerance
    bond = DEFAULT_BOND_CAP if bond is None else bond
    fock = DEFAULT_FOCK_CAP if fock is None else fock
    p = int(g.size)
    check_bath_size(p, bond, fock)
    if p > NOTE_DEPTH and not quiet:
        typer.echo(f"leadline: the bath engine at p = {p} is deeper than measured (p <= {NOTE_DEPTH}: up to minutes of CPU); "
                   f"its cost grows like p^2 to p^3 x bond^3 (--time-limit bounds it)", err=True)
    res = _run(evaluate_bath, BathLimitError, mix, g, b, tolerance, bond, fock, time_limit, quiet)
    check_bath_value(res.value, res.error_estimate, mix, tolerance)
    return res


def energy_bound(mix) -> float:
    """sqrt(2 ln 2 xi(1)): no state has |energy density| above it, so neither has any V_p.

    H(sigma)/N is a centred Gaussian of variance xi(1)/N for each of the 2^N configurations, and
    the expected maximum of M centred Gaussians of variance s^2 is at most s sqrt(2 ln M) (the
    Gaussian maximal inequality, common practice); for SK (xi(1) = 1/2) it gives 0.8326 against
    the Parisi ground state 0.763166 (Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002)).
    """
    import math

    return math.sqrt(2.0 * math.log(2.0) * float(abs(mix.xi(1.0))))


def check_bath_value(value: float, estimate: float, mix, tolerance: float) -> None:
    """Refuse (one line) a value that cannot be trusted: its estimate exceeds its size, or it
    leaves the physical range |V_p| <= sqrt(2 ln 2 xi(1)) by more than its estimate."""
    if estimate > abs(value):
        raise InputError(f"V_p = {value:.3e} +- {estimate:.1e}: the error estimate exceeds the value, so not even "
                         f"its sign is known; ask a smaller --tolerance (now {tolerance:g})")
    bound = energy_bound(mix)
    if abs(value) - estimate > bound:
        raise InputError(f"V_p = {value:.6f} leaves the physical range |V_p| <= sqrt(2 ln 2 xi(1)) = {bound:.6f}: "
                         f"the truncation broke down; not reported")


def evaluate_bath_command(mix, g, b, tolerance, fock, bond, time_limit, as_json: bool, quiet: bool) -> None:
    p = int(g.size)
    res = run_checked(mix, g, b, tolerance=tolerance, bond=bond, fock=fock, time_limit=time_limit, quiet=quiet)
    if as_json:
        out = {"method": "bath", "p": p, "xi": mix.to_json(),
               "gamma": [float(x) for x in g], "beta": [float(x) for x in b]}
        out.update(res.to_json())
        typer.echo(json.dumps(out))
        return
    typer.echo(report(mix, p, res))


def _run(evaluate_bath, BathLimitError, mix, g, b, tolerance, bond, fock, time_limit, quiet):
    """The evaluation, with one progress line per layer on stderr once it has run 10 s."""
    t0 = time.perf_counter()

    def progress(run, cutoff, t, p, largest):
        if not quiet and time.perf_counter() - t0 > 10.0:
            print(f"leadline: bath run {run + 1} (cut-off {cutoff:.2g}): layer {t}/{p}, bond {largest}, "
                  f"{time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)

    try:
        return evaluate_bath(mix, g, b, tolerance=tolerance, bond_cap=bond, fock_cap=fock, time_limit=time_limit,
                             progress=progress)
    except BathLimitError as exc:
        raise InputError(str(exc)) from None


def _rung(x: dict) -> str:
    if x.get("value") is None:  # abandoned: the cut-off was too loose for the depth
        return f"abandoned at layer {x['abandoned_at_layer']}"
    return fmt(x["value"], 10)


def report(mix, p: int, res) -> str:
    r = res.run
    carried = ", ".join(str(s + 1) for s in r.carried) or "none"
    return "\n".join([
        f"xi(x)      = {mix.label()}",
        f"depth p    = {p}",
        f"V_p        = {fmt(res.value, 12)} +- {res.error_estimate:.1e} (bosonic bath; tolerance {res.tolerance:.0e})",
        f"truncation = cut-off {r.cutoff:.2g}, bond {r.largest_bond} (cap {r.chi}), Fock levels {min(r.fock)}..{max(r.fock)}; "
        f"limiting: {res.limiting}",
        f"discarded  = {r.discarded:.1e}, top Fock level population {r.top_population:.1e}, carried states: {carried}",
        "ladder     = " + ", ".join(f"{x['cutoff']:.2g}: {_rung(x)}" for x in res.ladder),
        f"time       = {sum(x['wall_time_s'] for x in res.ladder):.2f} s",
    ])
