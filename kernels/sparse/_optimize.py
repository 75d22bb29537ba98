"""The angle optimizer of the sparse ensembles (scipy L-BFGS-B with the exact gradient)."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from ._common import check_problem
from ._recursion import evaluate_sparse, value_and_grad


#: half-width of the gamma search box in units of the ensemble's own scale 2 / sqrt(D)
GAMMA_BOX = 4.0
#: a best value within this of 1/2 is the trivial value, never reported as converged
TRIVIAL_MARGIN = 1e-9


def _grid_start(q: int, D: float, evaluate_kw: dict) -> tuple[np.ndarray, np.ndarray]:
    """The best point of a coarse p = 1 grid: gamma at the ensemble's own scale 2 / sqrt(D)
    (the dense q-spin optimum's, carried over by dense_to_sparse_angles), beta over a period.

    At large q the p = 1 landscape oscillates in beta (xi'(cos 2b) = q cos^(q-1) 2b), and the
    fixed starts can all lie where V < 1/2; 9 x 32 evaluations at p = 1 cost a few milliseconds each.
    """
    scale = 2.0 / math.sqrt(D)
    gammas = np.minimum(scale * np.array([0.05, 0.1, 0.2, 0.3, 0.45, 0.6, 0.8, 1.0, 1.3]), 3.0)
    betas = np.linspace(-math.pi / 2, math.pi / 2, 33)[1:]
    best, point = -math.inf, None
    for g in gammas:
        for b in betas:
            value = evaluate_sparse(q, D, [g], [b], **evaluate_kw).value
            if value > best:
                best, point = value, (np.array([g]), np.array([b]))
    return point


@dataclass
class SparseOptimization:
    value: float
    gamma: np.ndarray
    beta: np.ndarray
    p: int
    q: int
    degree: float
    gradient_norm: float
    evaluations: int
    converged: bool
    message: str
    wall_time: float
    history: list

    def to_json(self) -> dict:
        D = self.degree
        return {
            "value": float(self.value),
            "kind": "sparse",
            "p": int(self.p),
            "q": int(self.q),
            "degree": int(D) if float(D).is_integer() else float(D),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "gradient_norm": float(self.gradient_norm),
            "evaluations": int(self.evaluations),
            "restarts": len(self.history),
            "converged": bool(self.converged),
            "message": str(self.message),
            "wall_time_s": float(self.wall_time),
            "history": self.history,
        }


def optimize_sparse(
    q: int,
    degree: float,
    p: int,
    *,
    previous=None,
    previous_value: float | None = None,
    starts=None,
    restarts: int = 3,
    seed: int = 0,
    gtol: float = 1e-8,  # 1e-9 is not always reachable: the value stops changing in double precision first
    maxiter: int = 500,
    evaluate_kw: dict | None = None,
    evaluate=None,
    callback=None,
) -> SparseOptimization:
    """Maximize nu_p(D; gamma, beta) with scipy L-BFGS-B and the exact gradient.

    Starts (deterministic for fixed inputs and ``seed``): the explicit ``starts``
    list of (gamma, beta) if given (then only those and ``previous``); else the
    ``previous`` optimum at depth p-1 warm-started by INTERP
    (:func:`leadline.kernels.optimize.interpolate_angles`), then, unless INTERP is the only start
    asked for (``previous`` given and ``restarts`` = 0), a linear ramp with gamma scaled by
    1/sqrt(D) (common practice for QAOA on regular graphs) and ``restarts`` seeded random points.
    (Measured on the MaxCut D = 3 ladder p = 7..13: INTERP converged in 38-73 evaluations and gave
    the optimum at every depth; the ramp took 52-267 evaluations and ended lower from p = 9 on.)
    With ``previous_value`` (nu*_{p-1}) the padded start is added as a safety net, so
    nu*_p >= nu*_{p-1}.  The result is in the canonical form of
    :func:`leadline.kernels.optimize.canonical_angles` for xi = x^q (same symmetries).
    ``gradient_norm`` is the max-norm of the gradient at the optimum.

    ``evaluate(gamma, beta) -> (value, grad_gamma, grad_beta)``, if given, replaces
    ``value_and_grad(q, degree, gamma, beta, **evaluate_kw)`` for the optimizer's evaluations
    (a sweep's store returns recorded ones; it must give the same bits for the same angles).
    ``callback(info)`` is called after each of them with {"evaluations", "value",
    "gradient_norm", "best_value"} (the max-norm of this evaluation's gradient; the best value
    of this optimization so far).
    """
    from scipy.optimize import minimize

    from ..mixture import parse_mixture
    from ..optimize import canonical_angles, interpolate_angles

    t0 = time.perf_counter()
    q, D = check_problem(q, degree)
    if p < 1:
        raise ValueError("depth p must be >= 1")
    evaluate_kw = evaluate_kw or {}
    rng = np.random.default_rng([int(seed), int(p)])
    scale = 1.0 / math.sqrt(D)
    candidates = [(np.asarray(g0, float), np.asarray(b0, float)) for g0, b0 in (starts or [])]
    if previous is not None and len(previous[0]) == p - 1 and p > 1:
        candidates.append(interpolate_angles(*previous))
    elif previous is not None and len(previous[0]) == p:
        candidates.append((np.asarray(previous[0], float), np.asarray(previous[1], float)))
    if starts is None:
        interp_alone = bool(candidates) and restarts == 0  # a warm start from ``previous`` and nothing else asked for
        if p == 1:
            candidates.insert(0, _grid_start(q, D, evaluate_kw))
        tt = (np.arange(p) + 0.5) / p
        if not interp_alone:
            candidates.append((1.2 * scale * tt, 0.6 * (1.0 - tt)))  # linear ramp
        for _ in range(restarts):
            candidates.append((rng.uniform(0.1, 1.2, p) * scale, rng.uniform(0.05, 0.7, p)))
    # search box: gamma multiplies an integer count, so V is 2 pi periodic in each g_t; beyond
    # GAMMA_BOX times the ensemble's own scale 2 / sqrt(D) (the dense box, kernels/optimize.py,
    # in sparse units) the landscape is flat to many digits and an L-BFGS step that lands there
    # stops at the trivial value 1/2 with a vanishing gradient
    gmax = min(math.pi, 2.0 * GAMMA_BOX * scale)
    lower = np.concatenate([np.full(p, -gmax), np.full(p, -math.pi)])
    upper = -lower
    history = []
    best = None
    evaluations = 0
    best_seen = -math.inf
    if evaluate is None:
        def evaluate(g, b):
            return value_and_grad(q, D, g, b, **evaluate_kw)
    if previous is not None and previous_value is not None and len(previous[0]) == p - 1:
        # safety net (as in optimize_depth): the padded start (g_p = b_p = 0) reproduces
        # nu*_{p-1}; it is tried last and only used if every other start ends below it
        padded = (np.append(np.asarray(previous[0], float), 0.0), np.append(np.asarray(previous[1], float), 0.0))
    else:
        padded = None
    for i, (g0, b0) in enumerate(candidates + ([padded] if padded is not None else [])):
        if padded is not None and i == len(candidates) and best is not None and -best[0].fun >= previous_value - 1e-12:
            break
        values = []

        def fun(x):
            nonlocal evaluations, best_seen
            evaluations += 1
            val, gg, gb = evaluate(x[:p], x[p:])
            values.append(float(val))
            grad = np.concatenate([gg, gb])
            if callback is not None:
                best_seen = max(best_seen, float(val))
                callback({"evaluations": evaluations, "value": float(val),
                          "gradient_norm": float(np.max(np.abs(grad))), "best_value": best_seen})
            return -val, -grad

        x0 = np.clip(np.concatenate([g0, b0]), lower, upper)
        res = minimize(fun, x0, jac=True, method="L-BFGS-B", bounds=list(zip(lower, upper)),
                       options={"gtol": gtol, "ftol": 1e-15, "maxiter": maxiter})
        gnorm = float(np.max(np.abs(res.jac)))
        history.append({"start": i, "values": values, "value": float(-res.fun), "evaluations": int(res.nfev), "gradient_norm": gnorm})
        # the highest value; among starts that reach it (within 1e-13) the one nearest a stationary point
        if best is None or -res.fun > -best[0].fun + 1e-13 or (-res.fun >= -best[0].fun - 1e-13 and gnorm < best[1]):
            best = (res, gnorm)
    res, gnorm = best
    # every depth p >= 1 beats the trivial value 1/2 at small gamma (the first-order gain is
    # positive at a suitable beta), so a stationary point there is a flat region, not an optimum
    trivial = bool(abs(-res.fun - 0.5) <= TRIVIAL_MARGIN)
    # symmetries (g, b) -> (-g, -b) and b_t -> b_t + pi (pi/2 for even q) hold here too
    gamma, beta = canonical_angles(parse_mixture(f"{q}:1"), res.x[:p], res.x[p:])
    return SparseOptimization(
        value=float(-res.fun),
        gamma=gamma,
        beta=beta,
        p=p,
        q=q,
        degree=D,
        gradient_norm=gnorm,
        evaluations=evaluations,
        converged=bool(gnorm <= gtol) and not trivial,  # the largest gradient component within the tolerance asked for
        message=(f"stopped at the trivial value 1/2 (what gamma = 0 gives) in a flat part of the landscape: "
                 f"not an optimum ({res.message})") if trivial else str(res.message),
        wall_time=time.perf_counter() - t0,
        history=history,
    )
