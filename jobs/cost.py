"""What an evaluation or an optimization will cost, said (and limited) before it starts.

Path visits come from :func:`leadline.kernels.exact.evaluation_path_visits`, memory
from the chunk plan and the executor's worker count, time from the in-process rate
measured on the development machine (cluster/settings.py: one forward pass of
2^31 paths at p = 15 in 2.5 s, of 2^29 paths at p = 14 in 0.6 s, i.e. about
8.6e8 path visits per second on one core with the blocked kernel).  The time is an
order of magnitude for planning, not a promise: it scales with the machine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from leadline.kernels.exact import ChunkPlan, evaluation_path_visits

from .errors import InputError
from .spec import MAX_DEPTH

if TYPE_CHECKING:  # pragma: no cover
    from leadline.cluster import ComputeSettings

__all__ = ["check_depth", "PATH_VISITS_PER_CORE_S", "COST_NOTE_SECONDS", "MAX_LOCAL_SECONDS", "GRADIENT_FACTOR", "Cost", "evaluation_cost", "check_cost"]

#: measured in-process rate, path visits per second per core (see the module docstring)
PATH_VISITS_PER_CORE_S = 8.6e8
#: a value and gradient cost about this many evaluations (p forward and p+1 adjoint passes,
#: an adjoint pass about twice a forward one); also what `evaluate --help` says
GRADIENT_FACTOR = 3.0
#: say what a run will cost (one stderr line) when one evaluation takes at least this much core time
COST_NOTE_SECONDS = 10.0
#: longest estimated run accepted on this machine's executors (in-process, local cluster)
MAX_LOCAL_SECONDS = 7 * 24 * 3600.0


@dataclass(frozen=True)
class Cost:
    """Estimated cost of one evaluation (value, or value and gradient)."""

    p: int
    path_visits: float
    chunk_bytes: int
    workers: int | None  # parallel chunk tasks on this executor; None when unknown (scheduler, batch)
    seconds: float | None  # on this executor; None when the worker count is unknown
    core_seconds: float

    def line(self, what: str = "one evaluation") -> str:
        where = (
            f"about {_duration(self.seconds)} on {self.workers} core{'s' if self.workers != 1 else ''}"
            if self.seconds is not None
            else f"about {_duration(self.core_seconds)} of core time (spread over the cluster's workers)"
        )
        return (
            f"{what} at p = {self.p}: {self.path_visits:.2g} path visits, "
            f"{self.chunk_bytes / 2**20:.0f} MiB per chunk task, {where}"
        )


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    if seconds < 730 * 86400:
        return f"{seconds / 86400:.0f} days"
    return f"{seconds / (365.25 * 86400):.2g} years"


def _parallel_workers(settings: ComputeSettings | None) -> int | None:
    if settings is None or settings.mode == "inprocess":
        return 1
    if settings.mode in ("local", "auto"):
        return max(1, int(settings.workers or 1) * int(settings.threads_per_worker))
    return None


def evaluation_cost(p: int, plan: ChunkPlan, settings: ComputeSettings | None = None, gradient: bool = False) -> Cost:
    """Estimated cost of one evaluation at depth p with this chunk plan on this executor."""
    visits = float(evaluation_path_visits(p)) * (GRADIENT_FACTOR if gradient else 1.0)
    core_seconds = visits / PATH_VISITS_PER_CORE_S
    workers = _parallel_workers(settings)
    if workers is not None:
        workers = max(1, min(workers, plan.n_chunks))
    seconds = core_seconds / workers if workers is not None else None
    return Cost(p, visits, plan.chunk_bytes(), workers, seconds, core_seconds)


def check_depth(p: int, option: str) -> None:
    """Refuse a dense depth beyond MAX_DEPTH (InputError, one line); cheap, call it before planning."""
    if p > MAX_DEPTH:
        # (4/3)(4^p - 1) visits (kernels/exact/_plan.py), written from its logarithm: 4^p itself
        # would take minutes to build at p = 1e8
        log10_visits = math.log10(4.0 / 3.0) + p * math.log10(4.0)
        exponent = math.floor(log10_visits)
        visits = f"{10 ** (log10_visits - exponent):.1f}e+{exponent}"
        raise InputError(
            f"{option}: depth p = {p} is beyond {MAX_DEPTH}, the deepest this tool runs "
            f"(2^{2 * p + 1} paths per pass, {visits} path visits per evaluation)"
        )


def check_cost(p: int, plan: ChunkPlan, settings: ComputeSettings | None, *, gradient: bool, option: str) -> Cost:
    """Refuse depths the executor cannot hold (InputError, one line with the cost); return the cost."""
    check_depth(p, option)
    cost = evaluation_cost(p, plan, settings, gradient=gradient)
    if plan.chunk_bytes() > plan_budget(settings):
        raise InputError(
            f"{option}: at p = {p} one chunk task needs {plan.chunk_bytes() / 2**20:.0f} MiB, more than "
            f"--memory-mb {plan_budget(settings) / 2**20:g}; raise --memory-mb"
        )
    if cost.seconds is not None and cost.seconds > MAX_LOCAL_SECONDS:
        raise InputError(
            f"{option}: {cost.line()}, beyond the {_duration(MAX_LOCAL_SECONDS)} this machine's executors "
            "accept; run it on a cluster (--scheduler or --cluster-config) or lower the depth"
        )
    return cost


def plan_budget(settings: ComputeSettings | None) -> int:
    from leadline.kernels.exact import DEFAULT_MEMORY_BUDGET

    return settings.memory_budget if settings is not None else DEFAULT_MEMORY_BUDGET
