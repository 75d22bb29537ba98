"""V_p to a requested tolerance: a ladder of truncations and an error estimate.

One run (:func:`run_bath`, one-state readout) is truncated by a relative cut-off c: every SVD
drops the smallest singular values whose squared share stays below c (the bond cap chi only
as a memory guard), and every mode keeps enough Fock levels that its top two levels hold at
most max(c^2, (tolerance/100)^2) of the norm after each layer: the Heisenberg identity the readout rests on breaks at
the top level by a term whose expectation is bounded (Cauchy-Schwarz) by the square root of
that level's population, and errors of that size were measured.  The ladder runs
c_k = tolerance / 10^k, k = 0, 1, ... and stops at the first k >= 2 with

    estimate_k = 2 max(|V_k - V_(k-1)|, |V_(k-1) - V_(k-2)| / 3) + discarded_k + sqrt(top_k) <= tolerance

and discarded_k <= discarded_(k-1) / 2 (or below 1e-4 tolerance), reporting V_k = V(c_k).
A run whose W stops giving a positive semidefinite bath (:class:`BathBreakdown`: its cut-off is
too loose for the depth, the readout amplifies truncation errors with the layers) is abandoned
where that shows, listed in the ladder with ``abandoned_at_layer``, and not used by the estimate;
after two such runs the ladder jumps to the cut-off whose predicted breakdown lies half a decade
past the last layer (:func:`cutoff_after_breakdown`), and goes on 10x per step from there.
The truncation errors fall several-fold per step of the ladder (measured for SK, pure q = 3,
q = 4 and 2+4, docs/bath.md), so the first term exceeds the error of V_k whenever they fall at
least 1.5x per step; the step before (at a third of its size) catches two runs that agree by accident although the
error is not converged (measured: pure q = 4 at p = 10, cut-offs 1e-10 and 1e-11 agree to 8e-11
while both are 4e-9 off); the last two terms (what the run itself threw away) guard as well.
The second condition refuses the agreement of two runs that truncated alike: where the
Schmidt spectrum has a gap, cut-offs 1e-6..1e-8 can keep the same bond and discard the same
weight, so their values agree to 1e-12 while both are 1e-7 off (pure q = 3 at p = 4).  The
tests check that the estimate bounds the true error wherever the exact value is known.  If the
ladder cannot reach the tolerance -- the bond cap binds in two runs in a row, the
Fock cap binds, the cut-off reaches rounding level, or the time limit passes --
:class:`BathLimitError` says so in one line, naming the limiting truncation.

Determinism: BLAS runs on one thread inside (threadpoolctl), so the same inputs give the same
bits whatever thread count the caller's process uses.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from ..exact import check_angles
from ._engine import BathBreakdown, BathLimitError, BathRun, run_bath

__all__ = ["BathEvaluation", "cutoff_after_breakdown", "evaluate_bath", "DEFAULT_TOLERANCE", "DEFAULT_BOND_CAP", "DEFAULT_FOCK_CAP"]

DEFAULT_TOLERANCE = 1e-6
DEFAULT_BOND_CAP = 256
DEFAULT_FOCK_CAP = 40
SMALLEST_CUTOFF = 1e-15  # below this the SVD's rounding (1e-16 relative) is the truncation


@dataclass
class BathEvaluation:
    """V_p from the tightest run of the ladder, its error estimate and the truncations used.

    value          : V_p of ``run``
    error_estimate : |V(run) - V(check)| + discarded weight + sqrt(top-level population) of ``run``
    tolerance      : what was asked
    limiting       : which truncation dominates what is left: "cut-off", "Fock levels" or "bond cap"
    run, check     : the last two runs of the ladder (check: the one before, 10x looser cut-off)
    ladder         : (cut-off, V, largest bond, most Fock levels, wall seconds) of every run
    """

    value: float
    error_estimate: float
    tolerance: float
    limiting: str
    run: BathRun
    check: BathRun
    ladder: list = field(default_factory=list)

    def to_json(self) -> dict:
        return {
            "value": float(self.value),
            "error_estimate": float(self.error_estimate),
            "tolerance": float(self.tolerance),
            "limiting": self.limiting,
            "truncation": self.run.to_json(),
            "check_truncation": self.check.to_json(),
            "ladder": [dict(r) for r in self.ladder],
        }


def fock_target(cutoff: float, tolerance: float) -> float:
    """Population the top two Fock levels of a mode may hold after a layer: cutoff^2, but never
    below (tolerance/100)^2 (its square root, a term of the estimate, stays below 1% of the
    tolerance).  Measured (SK p = 20, INTERP, cut-off 1e-9): top populations 4e-19 and 1e-14
    gave the same V to 10 digits, the latter with 24 instead of 29 levels and 25% less CPU."""
    return max(cutoff**2, (tolerance / 100.0) ** 2)


def _limiting(run: BathRun, bond_cap: int, fock_cap: int) -> str:
    if run.largest_bond >= bond_cap:
        return "bond cap"
    if np.sqrt(run.top_population) > run.discarded or max(run.fock) >= fock_cap:
        return "Fock levels"
    return "cut-off"


def _one_thread():
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


def evaluate_bath(mixture, gamma, beta, *, tolerance: float = DEFAULT_TOLERANCE, bond_cap: int = DEFAULT_BOND_CAP,
                  fock_cap: int = DEFAULT_FOCK_CAP, time_limit: float | None = None, engine: str = "mps",
                  progress=None) -> BathEvaluation:
    """V_p(gamma, beta) by the bath engine, grown until its error estimate is <= tolerance.

    mixture    : a Mixture or a string such as ``"2:0.5"`` (xi(x) = sum w x^q as q:w pairs)
    tolerance  : the error asked for (default 1e-6)
    bond_cap   : largest bond dimension chi any run may use (memory guard)
    fock_cap   : most Fock levels any mode may get
    time_limit : wall seconds for the whole ladder (None: no limit)
    progress   : called as progress(run_index, cutoff, t, p, bond) after every layer

    Raises BathLimitError (one line, naming the limiting truncation) when the tolerance cannot be
    met within these limits, ValueError on bad arguments.
    """
    if isinstance(mixture, str):
        from ..mixture import parse_mixture

        mixture = parse_mixture(mixture)
    g, b = check_angles(gamma, beta)
    if not (np.isfinite(tolerance) and tolerance > 0):
        raise ValueError(f"tolerance must be a positive number, got {tolerance}")
    t0 = time.perf_counter()
    deadline = None if time_limit is None else t0 + float(time_limit)
    runs: list[BathRun] = []
    ladder = []
    abandoned: list[tuple[float, int]] = []  # (cut-off, layer) of every run that broke down
    cutoff = float(tolerance)
    with _one_thread():
        while True:
            if cutoff < SMALLEST_CUTOFF:
                raise BathLimitError(
                    f"cannot reach tolerance {tolerance:.1e}: cut-off at rounding level ({cutoff:.2g}); "
                    f"estimate {_estimate(runs):.1e}")
            k = len(runs)
            t_run = time.perf_counter()
            report = None if progress is None else (lambda t, p, bond, k=k, c=cutoff: progress(k, c, t, p, bond))
            try:
                run = run_bath(mixture, g, b, fock=2, fock_max=fock_cap, fock_tol=fock_target(cutoff, tolerance),
                               cutoff=cutoff, chi=bond_cap, engine=engine, deadline=deadline, progress=report, check_psd=True)
            except BathBreakdown as exc:  # too loose for this depth: worthless, try 10x tighter
                if exc.bond >= bond_cap:  # ... unless the cap, not the cut-off, truncated it
                    raise BathLimitError(
                        f"cannot reach tolerance {tolerance:.1e}: the bond cap {bond_cap} binds (the run at cut-off "
                        f"{cutoff:.2g} broke down at layer {exc.layer} with its bond at the cap); a larger --bond "
                        f"needs more memory and time") from None
                ladder.append({"cutoff": cutoff, "value": None, "abandoned_at_layer": exc.layer,
                               "remainder": exc.remainder, "wall_time_s": time.perf_counter() - t_run})
                abandoned.append((cutoff, exc.layer))
                cutoff = cutoff_after_breakdown(abandoned, g.size)
                continue
            except BathLimitError as exc:
                last = f"; last estimate {_estimate(runs):.1e} at cut-off {runs[-1].cutoff:.2g}" if len(runs) > 1 else ""
                raise BathLimitError(f"cannot reach tolerance {tolerance:.1e} within --time-limit {time_limit:g} s: "
                                     f"{exc}{last}") from None
            runs.append(run)
            ladder.append({"cutoff": cutoff, "value": run.value, "largest_bond": run.largest_bond,
                           "max_fock": max(run.fock), "wall_time_s": run.wall_time})
            if len(runs) >= 3:
                est = _estimate(runs)
                if est <= tolerance and _distinct(runs, tolerance):
                    return BathEvaluation(run.value, est, float(tolerance), _limiting(run, bond_cap, fock_cap),
                                          run, runs[-2], ladder)
                if all(max(r.fock) >= fock_cap and np.sqrt(r.top_population) > tolerance / 2 for r in runs[-2:]):
                    raise BathLimitError(
                        f"cannot reach tolerance {tolerance:.1e}: the Fock cap {fock_cap} binds "
                        f"(top-level population {run.top_population:.1e}); raise --fock")
                capped = [r.largest_bond >= bond_cap for r in runs[-2:]]
                if all(capped):
                    raise BathLimitError(
                        f"cannot reach tolerance {tolerance:.1e}: the bond cap {bond_cap} binds "
                        f"(estimate {est:.1e} at cut-off {cutoff:.2g}); a larger --bond needs more memory and time")
            cutoff /= 10.0


BREAKDOWN_HEADROOM = 0.5  # decades of cut-off beyond the predicted onset at which the first valid run starts
MAX_JUMP = 3.0  # most decades the ladder jumps past the plain 10x step after a breakdown


def cutoff_after_breakdown(abandoned: list, p: int) -> float:
    """The next cut-off of the ladder after the run at ``abandoned[-1]`` = (cut-off, layer) broke down.

    Plain: 10x tighter.  After two breakdowns the layer at which runs break down is extrapolated
    linearly in log10(cut-off) (measured linear for SK at INTERP angles, p = 40: layers 13, 27 at
    1e-5, 1e-6, onset near 40 at 1e-7, docs/bath.md), and the ladder jumps to the cut-off whose
    predicted breakdown lies ``BREAKDOWN_HEADROOM`` decades past layer p.  A run just inside its
    onset is valid but far off (SK p = 40 at 1e-7: 2e-5 where 1e-8 was 8e-7 off), and as the
    loosest of the three runs the estimate uses, it alone pushed the estimate above 1e-5 at
    1e-9.  The estimate itself is unchanged: three valid runs a decade apart.  The jump is at
    least the plain 10x and at most ``MAX_JUMP`` decades more; the cut-off is rounded to two
    significant digits (it is printed).
    """
    c, layer = abandoned[-1]
    plain = c / 10.0
    if len(abandoned) < 2:
        return plain
    c0, layer0 = abandoned[-2]
    per_decade = (layer - layer0) / np.log10(c0 / c)
    if not np.isfinite(per_decade) or per_decade <= 0:
        return plain
    decades = (p - layer) / per_decade + BREAKDOWN_HEADROOM
    decades = min(max(decades, 1.0), 1.0 + MAX_JUMP)
    return float(f"{c * 10.0 ** -decades:.2g}")


def _estimate(runs: list) -> float:
    if len(runs) < 3:
        return float("inf")
    a, b, c = runs[-3], runs[-2], runs[-1]
    step = max(abs(c.value - b.value), abs(b.value - a.value) / 3.0)
    return 2.0 * step + c.discarded + float(np.sqrt(c.top_population))


def _distinct(runs: list, tolerance: float) -> bool:
    """The last run truncated visibly less than the one before (else their agreement says
    nothing), or it threw away a negligible weight (measured errors stayed below ~50x it)."""
    a, b = runs[-2], runs[-1]
    return b.discarded <= 0.5 * a.discarded or b.discarded <= 1e-4 * tolerance
