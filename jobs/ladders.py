"""The depth ladders: optimize depths in turn, each warm-starting the next.

One loop per engine (exact, bath, sparse), shared by the Python API (``jobs/api.py``)
and the commands that run a ladder (``optimize``, and its sparse and bath forms).  They
live apart from both so that the commands and the API can import them without importing
each other (the API also runs whole commands: ``transfer``, ``sweep``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Ladder", "optimize_ladder", "bath_ladder", "sparse_ladder", "sparse_default_restarts", "ladder_start"]


@dataclass
class Ladder:
    """Optimum at the last depth of a ladder of depths, each warm-starting the next.

    Attributes
    ----------
    result : OptimizationResult or SparseOptimization
        The optimum at the last depth (value, gamma, beta, gradient_norm,
        evaluations, restarts, converged, message, history).
    ladder : list of dict
        ``{"p", "value", "evaluations"}`` per depth optimized, in order.
    wall_time : float
        Seconds for the whole ladder.
    ensemble : dict or None
        ``{"kind": "sparse", "q", "degree"}`` for sparse runs, else None.
    """

    result: Any
    ladder: list = field(default_factory=list)
    wall_time: float = 0.0
    ensemble: dict | None = None

    @property
    def value(self) -> float:
        """V_p* (dense) or nu_p* (sparse) at the last depth."""
        return float(self.result.value)

    @property
    def gamma(self) -> np.ndarray:
        return self.result.gamma

    @property
    def beta(self) -> np.ndarray:
        return self.result.beta

    @property
    def p(self) -> int:
        return int(self.result.p)

    @property
    def first_depth(self) -> int:
        return int(self.ladder[0]["p"]) if self.ladder else self.p

    @property
    def evaluations_total(self) -> int:
        return int(sum(r["evaluations"] for r in self.ladder))

    def to_json(self) -> dict:
        """The object ``leadline optimize --json`` prints."""
        out = self.result.to_json()
        if self.ensemble is not None:
            out["ensemble"] = dict(self.ensemble)
            out["ladder"] = list(self.ladder)
            out["wall_time_s"] = float(self.wall_time)
        else:
            out["evaluations_total"] = self.evaluations_total
            out["wall_time_s"] = float(self.wall_time)
            out["ladder"] = list(self.ladder)
        return out



def optimize_ladder(mix, depth: int, initial, *, run_pass, budget: int, restarts=None, seed=0, gradient_tol=1e-7,
                    max_iterations=500, on_evaluation=None) -> Ladder:
    """Optimize depths in turn up to ``depth`` (from ``initial``, an AngleSet, if given).

    The loop shared by :func:`optimize` and ``leadline optimize``.  ``on_evaluation(value, p)``
    is called after every evaluation (the command line's progress bar).
    """
    from leadline.kernels.optimize import optimize_depth
    from leadline.kernels.exact import plan_chunks

    t0 = time.perf_counter()
    first, previous, previous_value = ladder_start(initial, depth)
    ladder, result = [], None
    for p in range(first, depth + 1):
        callback = None
        if on_evaluation is not None:
            callback = lambda info, p=p: on_evaluation(info.get("value"), p)  # noqa: E731
        result = optimize_depth(mix, p, run_pass=run_pass, callback=callback, plan=plan_chunks(p, budget),
                                previous=previous, previous_value=previous_value, restarts=restarts,
                                seed=seed, gtol=gradient_tol, maxiter=max_iterations)
        ladder.append({"p": p, "value": result.value, "evaluations": result.evaluations})
        previous, previous_value = (result.gamma, result.beta), result.value
    return Ladder(result=result, ladder=ladder, wall_time=time.perf_counter() - t0)


def ladder_start(initial, depth: int):
    """(first depth, previous angles, previous value) of a ladder to ``depth``: from ``initial``
    (an AngleSet of depth ``depth - 1`` or ``depth``) only ``depth`` is optimized, else 1..depth."""
    if initial is None:
        return 1, None, None
    return depth, (initial.gamma, initial.beta), (initial.value if initial.p == depth - 1 else None)


def bath_ladder(mix, depth: int, initial, *, run_map, engine: dict, restarts=None, seed=0, gtol=1e-7,
                maxiter=500, on_evaluation=None):
    """Optimize depths in turn up to ``depth`` with the bath engine (from ``initial``, an AngleSet).

    Shared by :func:`leadline.optimize` (``method="bath"``) and ``leadline optimize --method bath``.
    ``on_evaluation(info, p)`` is called after every gradient (the progress line).
    """
    from leadline.kernels.bath import optimize_bath_depth

    from .bath import bath_restarts

    t0 = time.perf_counter()
    first, previous, previous_value = ladder_start(initial, depth)
    earlier = None  # the optimum of p - 2 once the ladder has made it (the extrapolated start)
    ladder, result = [], None
    for p in range(first, depth + 1):
        callback = None
        if on_evaluation is not None:
            callback = lambda info, p=p: on_evaluation(info, p)  # noqa: E731
        result = optimize_bath_depth(
            mix, p, engine=engine, run_map=run_map, hessian_map=run_map, previous=previous,
            previous_value=previous_value, earlier=earlier, restarts=bath_restarts(restarts, previous is not None, p),
            seed=seed, gtol=gtol, maxiter=maxiter, callback=callback,
        )
        ladder.append({"p": p, "value": result.value, "error_estimate": result.error_estimate,
                       "evaluations": result.evaluations})
        earlier = previous
        previous, previous_value = (result.gamma, result.beta), result.value
    return Ladder(result=result, ladder=ladder, wall_time=time.perf_counter() - t0)


def sparse_default_restarts(p: int) -> int:
    """Seeded extra starts of the sparse ladder at depth p when none are asked for (INTERP alone
    suffices past p = 6: measured on MaxCut D = 3 up to p = 10, benchmarks/bench_sparse.py --published)."""
    return 3 if p <= 2 else 1 if p <= 6 else 0


def sparse_ladder(kernel, q, D, depth, initial, *, restarts, seed, gradient_tol, max_iterations, ensemble,
                  evaluate_kw=None) -> Ladder:
    """The depth loop shared by :func:`optimize_sparse` and ``leadline optimize --sparse-q``."""
    t0 = time.perf_counter()
    first, previous = (depth, (initial.gamma, initial.beta)) if initial is not None else (1, None)
    previous_value = initial.value if initial is not None and initial.p == depth - 1 else None
    ladder, result = [], None
    for p in range(first, depth + 1):
        n_restarts = restarts if restarts is not None else sparse_default_restarts(p)
        result = kernel(q, D, p, previous=previous, previous_value=previous_value, restarts=n_restarts,
                        seed=seed, gtol=gradient_tol, maxiter=max_iterations, evaluate_kw=evaluate_kw)
        previous, previous_value = (result.gamma, result.beta), result.value
        ladder.append({"p": p, "value": result.value, "evaluations": result.evaluations})
    return Ladder(result=result, ladder=ladder, wall_time=time.perf_counter() - t0, ensemble=ensemble)
