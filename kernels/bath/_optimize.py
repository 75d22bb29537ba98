"""Optimal angles with the bath engine: finite differences of a smooth schedule, noise-aware.

The bath engine gives V_p with a truncation error estimate but no derivative, so the gradient
is a finite difference.  The angles are written in an orthonormal Fourier basis of the
schedules (the FOURIER parametrization of Zhou, Wang, Choi, Pichler, Lukin, Phys. Rev. X 10,
021067 (2020), eq. (7), normalized here):

    gamma_i = sum_k u_k S[i, k],  S[i, k] = sqrt(2/p) sin((k - 1/2)(i - 1/2) pi / p)
    beta_i  = sum_k v_k C[i, k],  C[i, k] = sqrt(2/p) cos((k - 1/2)(i - 1/2) pi / p)

With q = p coefficients this is an orthogonal change of the 2p angles (nothing is lost); with
q < p only the q smoothest modes move.  ``stages`` lists the q of each stage, the last one
usually p: a few smooth coefficients first (a gradient costs 4q + 1 evaluations), then all
of them.  Each stage runs scipy's BFGS on -V_p with central differences; the 4q + 1
evaluations of one gradient are independent and go through ``run_map`` (in order, so the
result does not depend on where they ran).

Noise: every evaluation carries the engine's error estimate e.  The difference step is
h = clip(e^(1/3), 1e-4, 1e-2) (balancing e/h against h^2 of central differences); a stage
stops when the gradient's largest component is below max(gtol, e/h) (the gradient noise
level) or when an iteration gains less than e.  The result reports V_p* with its estimate,
the gradient norm and that noise level.

Determinism: the evaluations are pure functions of (mixture, angles, engine settings), the
optimizer is deterministic, and ``run_map`` returns results in task order, so the same inputs
give the same bits on any number of workers; a depth that is replayed with evaluations read
back from a checkpoint follows the same path.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..mixture import Mixture
from ..optimize import canonical_angles, start_candidates

__all__ = ["BathOptimization", "optimize_bath_depth", "bath_point", "fourier_basis", "default_stages",
           "difference_step"]


@dataclass
class BathOptimization:
    """Outcome of :func:`optimize_bath_depth` (printed as JSON by the CLI, stored by sweeps)."""

    value: float
    error_estimate: float
    gamma: np.ndarray
    beta: np.ndarray
    p: int
    mixture: Mixture
    gradient_norm: float
    gradient_noise: float
    evaluations: int
    gradients: int
    restarts: int
    converged: bool
    message: str
    wall_time: float
    evaluation_seconds: float
    engine: dict = field(default_factory=dict)
    stages: list = field(default_factory=list)
    history: list = field(default_factory=list)

    def to_json(self) -> dict:
        return {
            "method": "bath",
            "value": float(self.value),
            "error_estimate": float(self.error_estimate),
            "p": int(self.p),
            "xi": self.mixture.to_json(),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "gradient_norm": float(self.gradient_norm),
            "gradient_noise": float(self.gradient_noise),
            "evaluations": int(self.evaluations),
            "gradients": int(self.gradients),
            "restarts": int(self.restarts),
            "converged": bool(self.converged),
            "message": self.message,
            "wall_time_s": float(self.wall_time),
            "evaluation_s": float(self.evaluation_seconds),
            "engine": dict(self.engine),
            "stages": list(self.stages),
            "history": self.history,
        }


def fourier_basis(p: int, q: int) -> tuple[np.ndarray, np.ndarray]:
    """(S, C), each (p, q): the first q orthonormal sine (gamma) and cosine (beta) modes."""
    i = np.arange(1, p + 1)[:, None] - 0.5
    k = np.arange(1, q + 1)[None, :] - 0.5
    arg = i * k * math.pi / p
    scale = math.sqrt(2.0 / p)
    return scale * np.sin(arg), scale * np.cos(arg)


def default_stages(p: int) -> tuple[int, ...]:
    """Coefficients per stage: all 2p angles (measured the cheapest way to the optimum, docs/bath.md)."""
    return (p,)


def difference_step(error_estimate: float) -> float:
    """Central-difference step for a value known to ``error_estimate``: e^(1/3) in [1e-4, 1e-2]."""
    return float(min(1e-2, max(1e-4, max(float(error_estimate), 1e-15) ** (1.0 / 3.0))))


def bath_point(task) -> tuple[float, float, float]:
    """One bath evaluation (the unit of distributed work): (value, error_estimate, seconds).

    ``task`` = (mixture, gamma, beta, engine keyword arguments of ``evaluate_bath``).  A
    module-level function of plain data, so Dask can ship it to any worker.
    """
    from ._estimate import evaluate_bath

    mixture, gamma, beta, engine = task
    t0 = time.process_time()
    res = evaluate_bath(mixture, np.asarray(gamma, float), np.asarray(beta, float), **dict(engine))
    return float(res.value), float(res.error_estimate), time.process_time() - t0


def _local_map(func, tasks) -> list:
    return [func(t) for t in tasks]


class _Objective:
    """-V_p and its central-difference gradient in Fourier coordinates, one map per point."""

    def __init__(self, mixture, p, q, engine, run_map, step, callback, record):
        self.mixture, self.p, self.q = mixture, p, q
        self.S, self.C = fourier_basis(p, q)
        self.engine = dict(engine)
        self.run_map = run_map
        self.step = step
        self.callback = callback
        self.record = record
        self.evaluations = 0
        self.gradients = 0
        self.seconds = 0.0
        self.last = None  # (x, value, error, gradient)
        self.known: dict = {}  # x.tobytes() -> (value, error, seconds) already evaluated
        self.best = None  # (value, error, x, gradient)

    def angles(self, x):
        return self.S @ x[: self.q], self.C @ x[self.q:]

    def __call__(self, x):
        x = np.asarray(x, float)
        h = self.step
        known = self.known.pop(x.tobytes(), None)  # the start, evaluated once to choose h
        points = [x]
        for j in range(x.size):
            for sign in (1.0, -1.0):
                y = x.copy()
                y[j] += sign * h
                points.append(y)
        tasks = []
        for y in points[(0 if known is None else 1):]:
            g, b = self.angles(y)
            tasks.append((self.mixture, g, b, self.engine))
        out = self.run_map(bath_point, tasks)
        if known is not None:
            out = [known, *out]
        self.evaluations += len(tasks)
        self.gradients += 1
        self.seconds += float(sum(o[2] for o in out))
        values = np.array([o[0] for o in out])
        value, error = float(values[0]), float(out[0][1])
        grad = (values[1::2] - values[2::2]) / (2.0 * h)
        self.last = (x.copy(), value, error, grad)
        if self.best is None or value > self.best[0]:
            self.best = (value, error, x.copy(), grad)
        self.record["values"].append(value)
        if self.callback is not None:
            self.callback({"evaluation": self.evaluations, "evaluations": len(tasks), "value": value,
                           "error_estimate": error, "best_value": self.best[0], "best_error_estimate": self.best[1],
                           "gradient_norm": float(np.max(np.abs(grad))),
                           "evaluation_s": self.seconds / max(1, self.evaluations)})
        return -value, -grad


def _stage(mixture, p, q, g0, b0, *, engine, run_map, gtol, maxiter, callback, record):
    """One BFGS run on q Fourier coefficients per schedule, from angles (g0, b0)."""
    from scipy.optimize import minimize  # here, not at import: keeps the command line light

    S, C = fourier_basis(p, q)
    x0 = np.concatenate([S.T @ g0, C.T @ b0])  # projection (exact when q = p)
    probe = run_map(bath_point, [(mixture, S @ x0[:q], C @ x0[q:], dict(engine))])[0]
    step = difference_step(probe[1])
    obj = _Objective(mixture, p, q, engine, run_map, step, callback, record)
    obj.evaluations, obj.seconds = 1, probe[2]
    obj.known[np.asarray(x0, float).tobytes()] = probe
    noise = probe[1] / step
    target = max(gtol, noise)

    class _Done(Exception):
        pass

    previous = [None]

    def stop_check(xk):
        # noise-aware stopping: a gradient below its noise level, or a gain below the estimate
        x, value, error, grad = obj.last
        if not np.array_equal(x, xk):
            return
        if np.max(np.abs(grad)) <= max(gtol, error / step):
            raise _Done("gradient below max(gtol, its noise level)")
        if previous[0] is not None and value - previous[0] < error:
            raise _Done("gain of the last iteration below the error estimate")
        previous[0] = value

    message = "iteration limit"
    try:
        res = minimize(obj, x0, jac=True, method="BFGS", callback=stop_check,
                       options={"maxiter": maxiter, "gtol": target, "norm": np.inf})
        message = str(res.message)
    except _Done as done:
        message = str(done)
    value, error, x, grad = obj.best
    gnorm = float(np.max(np.abs(grad)))
    g, b = obj.angles(x)
    noise = error / step
    return {
        "value": value, "error_estimate": error, "gamma": g, "beta": b, "gradient_norm": gnorm,
        "gradient_noise": noise, "converged": gnorm <= max(10 * gtol, 10 * noise) or "below" in message,
        "message": message, "evaluations": obj.evaluations, "gradients": obj.gradients, "seconds": obj.seconds,
        "q": q, "step": step,
    }


def optimize_bath_depth(
    mixture: Mixture,
    p: int,
    *,
    engine: dict | None = None,
    run_map: Callable | None = None,
    previous: tuple | None = None,
    previous_value: float | None = None,
    starts: list | None = None,
    restarts: int | None = 0,
    seed: int = 0,
    stages: tuple[int, ...] | None = None,
    gtol: float = 1e-6,
    maxiter: int = 200,
    callback: Callable[[dict], None] | None = None,
) -> BathOptimization:
    """Maximize V_p over the angles with the bath engine (finite differences, noise-aware).

    engine : keyword arguments of :func:`evaluate_bath` (fixed for the whole depth, so every
        difference compares values of the same truncation)
    run_map : ``run_map(func, tasks) -> [func(t) for t in tasks]`` in task order (an
        executor's ``run_map``; default: in this process)
    previous, previous_value, starts, restarts, seed : as for the exact optimizer
        (INTERP warm start from depth p-1; default here: no extra starts)
    stages : Fourier coefficients per schedule of each stage (default :func:`default_stages`)
    gtol : stop when the largest gradient component is below max(gtol, its noise level)
    maxiter : iteration cap of each stage
    callback : called after each gradient with a dict (evaluation, evaluations, value,
        error_estimate, best_value, best_error_estimate (of the stage), gradient_norm, evaluation_s)
    """
    t0 = time.perf_counter()
    if p < 1:
        raise ValueError("depth p must be >= 1")
    engine = dict(engine or {})
    run_map = run_map or _local_map
    stages = tuple(default_stages(p) if stages is None else stages)
    if not stages or any(not 1 <= q <= p for q in stages):
        raise ValueError(f"every stage needs 1..p = {p} coefficients, got {stages}")
    candidates = start_candidates(mixture, p, previous=previous, starts=starts, restarts=restarts, seed=seed)
    if previous is not None and previous_value is not None and len(previous[0]) == p - 1:
        # the padded start reproduces V*_{p-1}: tried when no start beats it (as the exact optimizer)
        padded = (np.concatenate([previous[0], [0.0]]), np.concatenate([previous[1], [0.0]]), "padded")
    else:
        padded = None
    history, best = [], None
    totals = {"evaluations": 0, "gradients": 0, "seconds": 0.0}

    def run_start(index, g, b, kind):
        nonlocal best
        g, b = canonical_angles(mixture, g, b)
        out = None
        for q in stages:
            record = {"start": index, "kind": kind, "coefficients": q, "values": []}
            out = _stage(mixture, p, q, g, b, engine=engine, run_map=run_map, gtol=gtol, maxiter=maxiter,
                         callback=callback, record=record)
            g, b = out["gamma"], out["beta"]
            for key in ("evaluations", "gradients", "seconds"):
                totals[key] += out[key]
            record.update({k: out[k] for k in ("value", "error_estimate", "gradient_norm", "gradient_noise",
                                               "message", "evaluations", "step")})
            history.append(record)
        if best is None or out["value"] > best["value"]:
            best = out

    for i, (g, b, kind) in enumerate(candidates):
        run_start(i, g, b, kind)
    if padded is not None and best["value"] < previous_value - best["error_estimate"]:
        run_start(len(candidates), *padded)
    g, b = canonical_angles(mixture, best["gamma"], best["beta"])
    return BathOptimization(
        value=best["value"], error_estimate=best["error_estimate"], gamma=g, beta=b, p=p, mixture=mixture,
        gradient_norm=best["gradient_norm"], gradient_noise=best["gradient_noise"],
        evaluations=totals["evaluations"], gradients=totals["gradients"], restarts=len(history) // len(stages),
        converged=bool(best["converged"]), message=best["message"], wall_time=time.perf_counter() - t0,
        evaluation_seconds=totals["seconds"] / max(1, totals["evaluations"]), engine=engine,
        stages=list(stages), history=history,
    )
