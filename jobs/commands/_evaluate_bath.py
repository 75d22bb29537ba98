"""`leadline evaluate --method bath`: V_p from the bosonic-bath engine, with an error estimate.

Kept apart from evaluate.py so that the exact path is untouched; the bath engine is
imported only when this method is asked for.
"""

from __future__ import annotations

import json
from typing import Optional

import typer

from leadline.kernels.numtext import fmt

from ..errors import InputError

METHODS = ("exact", "bath")
METHOD_HELP = "exact (default): the exact path-sum iteration. bath: the bosonic-bath engine (matrix product state, any depth, with a truncation error estimate; see docs/bath.md)."
FOCK_HELP = "--method bath: Fock levels d of each bath mode in the first run (default 10; principal basis: of the most driven mode, weaker ones down to 3). The value comes from a second run at 1.5 d levels and 2 chi; the difference of the two runs is the error estimate."
BOND_HELP = "--method bath: bond dimension cap chi of the matrix product state in the first run (default 32)."
BASIS_HELP = "--method bath: bath mode basis, cholesky (default: one causal sweep) or principal (eigenmodes, step by step)."

DEFAULT_FOCK = 10
DEFAULT_TAIL = 3
DEFAULT_BOND = 32
DEFAULT_BASIS = "cholesky"


def check_method(method: str, fock: Optional[int], bond: Optional[int], basis: Optional[str], *, gradient: bool,
                 fixed_point: bool, sparse: bool) -> bool:
    """Validate the method options; True when the bath engine is asked for."""
    if method not in METHODS:
        raise InputError(f"--method must be one of {', '.join(METHODS)}, got {method!r}")
    if method == "exact":
        for name, value in (("--fock", fock), ("--bond", bond), ("--basis", basis)):
            if value is not None:
                raise InputError(f"{name} applies only to --method bath")
        return False
    if sparse:
        raise InputError("--method bath is for the mixed-spin (dense) model, not --sparse-q/--degree")
    if gradient or fixed_point:
        raise InputError("--method bath gives the value only: drop --gradient/--check-fixed-point")
    if fock is not None and fock < 2:
        raise InputError(f"--fock must be >= 2 levels, got {fock}")
    if bond is not None and bond < 1:
        raise InputError(f"--bond must be >= 1, got {bond}")
    if basis is not None and basis not in ("cholesky", "principal"):
        raise InputError(f"--basis must be cholesky or principal, got {basis!r}")
    return True


def evaluate_bath_command(mix, g, b, fock, bond, basis, as_json: bool) -> None:
    from leadline.kernels.bath import evaluate_bath

    fock = DEFAULT_FOCK if fock is None else fock
    bond = DEFAULT_BOND if bond is None else bond
    basis = DEFAULT_BASIS if basis is None else basis
    tail = min(DEFAULT_TAIL, fock)
    res = evaluate_bath(mix, g, b, fock=fock, tail=tail, chi=bond, basis=basis)
    if as_json:
        out = {"method": "bath", "p": int(g.size), "xi": mix.to_json(),
               "gamma": [float(x) for x in g], "beta": [float(x) for x in b]}
        out.update(res.to_json())
        typer.echo(json.dumps(out))
        return
    r, c = res.run, res.check
    typer.echo("\n".join([
        f"xi(x)      = {mix.label()}",
        f"depth p    = {g.size}",
        f"V_p        = {fmt(res.value, 12)} +- {res.error_estimate:.1e} (bosonic bath, {r.basis} modes)",
        f"truncation = Fock levels {max(r.fock)}..{min(r.fock)}, bond <= {r.chi} (reached {r.max_bond}), discarded weight {r.discarded:.1e}",
        f"check run  = Fock levels {max(c.fock)}..{min(c.fock)}, bond <= {c.chi}: V_p = {fmt(c.value, 12)}",
        f"time       = {r.wall_time + c.wall_time:.2f} s",
    ]))
