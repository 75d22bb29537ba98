"""Angle optimization at one depth: warm starts, quasi-Newton with the exact gradient.

Strategy
--------
* Warm start from the optimum at depth p-1 by linear interpolation of the angle
  schedules (the INTERP heuristic of Zhou, Wang, Choi, Pichler, Lukin, Phys. Rev.
  X 10, 021067 (2020), eq. (B1)), plus a few seeded perturbations of it.
* At low depth, seeded random restarts as well (the landscape has few local
  optima there and the evaluations are cheap).
* Each start runs scipy's L-BFGS-B on -V_p with the exact reverse-mode gradient
  (kernels/exact/_iteration.py), so one step costs one evaluation plus its adjoint,
  never 2p+1 evaluations.
* Safety net: if no start beats V*_{p-1}, the padded start (angles of depth p-1
  with g_p = b_p = 0, which reproduces V*_{p-1} exactly) is optimized too, so
  V*_p >= V*_{p-1} always holds.
* Results are reported in one canonical form (:func:`canonical_angles`).

Symmetries used for the canonical form (each one is checked by a property test
in tests/test_optimize.py):
  (S1) b_t -> b_t + pi for any single t (exp(-i pi B) is a global phase);
  (S2) if xi has only even powers: b_t -> b_t + pi/2 for any single t
       (X^{(x)n} commutes with H when H(z) = H(-z) and fixes |+>);
  (S3) (g, b) -> (-g, -b) (complex conjugation: H, B and |+> are real);
  (S4) g -> -g alone flips the sign of V (J -> -J leaves the ensemble invariant),
       so a maximizer never has a sign-flipped twin with the same value;
  (S5) if xi has only odd powers: b_t -> b_t + pi/2 together with
       g_s -> -g_s for s <= t (the inserted X^{(x)n} moves to |+>, turning H into
       H(-z) = -H in the layers before it).
Everything is deterministic for fixed inputs and seed, so a run that is
interrupted and restarted replays exactly the same sequence of evaluations.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .exact import PassIntegrityError, evaluate, ChunkPlan, plan_chunks
from .mixture import Mixture

#: half-width of the gamma search box in units of 1/sqrt(xi'(1))
GAMMA_BOX = 4.0
#: a best value at or below this (for the normal form of xi, xi(1) about 1) is the trivial
#: value 0 and never reported as converged
TRIVIAL_MARGIN = 1e-12

__all__ = [
    "OptimizationResult",
    "optimize_depth",
    "canonical_angles",
    "beta_period",
    "canonical_width",
    "interpolate_angles",
    "default_restarts",
    "start_candidates",
    "extrapolated_start",
]


@dataclass
class OptimizationResult:
    """Outcome of :func:`optimize_depth` (printed as JSON by the CLI, stored by sweeps).

    ``gradient_norm`` is the largest component of the gradient in the mixture's own units:
    for xi(1) within [2^-6, 2^6] the plain gradient of V_p; otherwise that of
    V_p / 2^k in the angles (2^k gamma, beta), with xi / 4^k the normal form
    (:meth:`Mixture.normal_form`), so that ``gtol`` means the same for every scale of xi.
    """

    value: float
    gamma: np.ndarray
    beta: np.ndarray
    p: int
    mixture: Mixture
    gradient_norm: float
    evaluations: int
    restarts: int
    converged: bool
    message: str
    wall_time: float
    history: list = field(default_factory=list)

    def to_json(self) -> dict:
        return {
            "value": float(self.value),
            "p": int(self.p),
            "xi": self.mixture.to_json(),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "gradient_norm": float(self.gradient_norm),
            "evaluations": int(self.evaluations),
            "restarts": int(self.restarts),
            "converged": bool(self.converged),
            "message": self.message,
            "wall_time_s": float(self.wall_time),
            "history": self.history,
        }


def beta_period(mixture: Mixture) -> float:
    """Period of V_p in each single b_t: pi/2 for even-only xi, else pi (S1, S2)."""
    return math.pi if mixture.has_odd else math.pi / 2


def _wrap(b: np.ndarray, period: float) -> np.ndarray:
    """Reduce into (-period/2, period/2]."""
    r = b - period * np.floor(b / period + 0.5)
    r = np.where(np.isclose(r, -period / 2, rtol=0, atol=1e-14), period / 2, r)
    return r


def canonical_width(mixture: Mixture) -> float:
    """Width of the interval that canonical b_t lie in: pi/2 if xi has one parity, else pi."""
    return math.pi if (mixture.has_odd and mixture.has_even) else math.pi / 2


def canonical_angles(mixture: Mixture, gamma, beta) -> tuple[np.ndarray, np.ndarray]:
    """One representative of the symmetry class of (gamma, beta); V_p is unchanged.

    Each b_t is reduced into (-W/2, W/2] with W = :func:`canonical_width`: by the
    period (S1/S2) and, when xi has only odd powers, by (S5) b_t -> b_t +- pi/2 with
    g_1..g_t -> -g_1..-g_t.  Then the overall sign (S3) is chosen so that the first
    nonzero gamma is positive (if all gamma vanish, the first nonzero beta).
    """
    g = np.asarray(gamma, dtype=float).copy()
    P = beta_period(mixture)
    W = canonical_width(mixture)
    b = _wrap(np.asarray(beta, dtype=float), P)
    if W < P:  # odd powers only: fold b_t by pi/2, flipping the phases before it
        for t in range(b.size):
            if not (-W / 2 < b[t] <= W / 2):
                b[t] -= math.copysign(W, b[t])
                g[: t + 1] *= -1
    lead = next((x for x in g if abs(x) > 1e-15), None)
    if lead is None:
        lead = next((x for x in b if abs(x) > 1e-15 and not np.isclose(abs(x), W / 2)), 0.0)
    if lead < 0:
        g, b = -g, _wrap(-b, W)
    return g, b


def interpolate_angles(gamma, beta) -> tuple[np.ndarray, np.ndarray]:
    """INTERP: schedules of depth p-1 -> starting schedules of depth p.

    [x_p]_i = (i-1)/(p-1) [x_{p-1}]_{i-1} + (p-i)/(p-1) [x_{p-1}]_i, i = 1..p, with
    [x_{p-1}]_0 = [x_{p-1}]_p = 0 (Zhou et al., Phys. Rev. X 10, 021067 (2020), eq. B1).
    """

    def interp(x):
        x = np.asarray(x, dtype=float)
        q = x.size  # = p - 1
        p = q + 1
        if q == 0:
            return np.zeros(1)
        padded = np.concatenate([[0.0], x, [0.0]])
        i = np.arange(1, p + 1)
        return (i - 1) / (p - 1) * padded[i - 1] + (p - i) / (p - 1) * padded[i]

    return interp(gamma), interp(beta)


#: the extrapolated start is used from this depth on (below it INTERP alone was closer to the optimum:
#: SK and pure q = 3 at p = 3, 4; from p = 5 on closer, docs/bath.md "Fewer gradients per deep depth")
EXTRAPOLATE_FROM = 5


def extrapolated_start(previous, earlier) -> tuple[np.ndarray, np.ndarray]:
    """The start of depth p from the optima of depths p-1 and p-2: INTERP plus the last correction.

    INTERP of the p-1 optimum, plus INTERP of how far that optimum moved from its own INTERP start:
    x = I(x*_{p-1}) + I(x*_{p-1} - I(x*_{p-2})) = 2 I(x*_{p-1}) - I(I(x*_{p-2})) (I is linear), a linear
    extrapolation of the schedules in depth.  Measured 4-10x closer to the optimum than INTERP at
    p = 10..23 (SK and pure q = 3, docs/bath.md).
    """
    g1, b1 = interpolate_angles(*previous)
    g2, b2 = interpolate_angles(*interpolate_angles(*earlier))
    return 2.0 * g1 - g2, 2.0 * b1 - b2


def default_restarts(p: int) -> int:
    """Seeded extra starts besides the warm start: many at low p, few at high p."""
    if p <= 2:
        return 8
    if p <= 4:
        return 4
    if p <= 8:
        return 2
    return 0


def _random_start(rng: np.random.Generator, mixture: Mixture, p: int) -> tuple[np.ndarray, np.ndarray]:
    scale = 1.0 / math.sqrt(float(mixture.dxi(1.0)))
    g = rng.uniform(0.1, 1.2, size=p) * scale
    b = rng.uniform(0.05, 0.5, size=p) * beta_period(mixture)
    return g, b


def start_candidates(mixture: Mixture, p: int, *, previous=None, starts=None, restarts: int | None = None,
                     seed: int = 0, earlier=None) -> list[tuple[np.ndarray, np.ndarray, str]]:
    """The starts of a depth, in the order they are tried: (gamma, beta, kind).

    Given starts first, then the warm start (INTERP of a depth p-1 ``previous``, or
    ``previous`` itself at depth p), then ``restarts`` seeded extra starts (perturbations
    of the warm start, or random ones without it; default :func:`default_restarts`).
    With ``earlier`` (the optimum of depth p-2) and p >= EXTRAPOLATE_FROM the warm start is
    :func:`extrapolated_start` instead of INTERP (the bath optimizer's choice; the exact optimizer
    passes no ``earlier``).  Shared by the exact and the bath optimizer.
    """
    rng = np.random.default_rng([int(seed), int(p)])
    n_extra = default_restarts(p) if restarts is None else int(restarts)
    candidates: list[tuple[np.ndarray, np.ndarray, str]] = []
    for g, b in starts or []:
        candidates.append((np.asarray(g, float), np.asarray(b, float), "given"))
    warm = None
    if (previous is not None and earlier is not None and len(previous[0]) == p - 1 and len(earlier[0]) == p - 2
            and p >= EXTRAPOLATE_FROM):
        warm = extrapolated_start(previous, earlier)
        candidates.append((warm[0], warm[1], "extrapolated"))
    elif previous is not None and len(previous[0]) == p - 1 and p > 1:
        warm = interpolate_angles(*previous)
        candidates.append((warm[0], warm[1], "interp"))
    elif previous is not None and len(previous[0]) == p:
        warm = (np.asarray(previous[0], float), np.asarray(previous[1], float))
        candidates.append((warm[0], warm[1], "previous"))
    for _ in range(n_extra):
        if warm is not None:
            g = warm[0] * (1 + 0.1 * rng.standard_normal(p)) + 0.02 * rng.standard_normal(p)
            b = warm[1] * (1 + 0.1 * rng.standard_normal(p)) + 0.02 * rng.standard_normal(p)
            candidates.append((g, b, "perturbed"))
        else:
            g, b = _random_start(rng, mixture, p)
            candidates.append((g, b, "random"))
    if not candidates:
        g, b = _random_start(rng, mixture, p)
        candidates.append((g, b, "random"))
    return candidates


def optimize_depth(
    mixture: Mixture,
    p: int,
    *,
    run_pass=None,
    plan: ChunkPlan | None = None,
    previous: tuple | None = None,
    previous_value: float | None = None,
    starts: list | None = None,
    restarts: int | None = None,
    seed: int = 0,
    gtol: float = 1e-7,
    maxiter: int = 500,
    callback: Callable[[dict], None] | None = None,
) -> OptimizationResult:
    """Maximize V_p(gamma, beta) over the 2p angles.

    Parameters
    ----------
    mixture : covariance mixture xi
    p : depth
    run_pass, plan : executor of one pass and chunk plan (see kernels/exact/_iteration.py)
    previous : (gamma, beta) optimum at depth p-1, shape (p-1,) each; warm start by INTERP
    previous_value : V*_{p-1}, enables the padded-start safety net
    starts : explicit list of (gamma, beta) starts of shape (p,) (tried first)
    restarts : number of extra seeded starts (perturbed warm starts, or random
        starts when there is no warm start); default :func:`default_restarts`
    seed : seeds every random choice (with p), so results are reproducible
    gtol : stop when the max-norm of the projected gradient is below this
    maxiter : iteration cap of each local run
    callback : called after each evaluation with a dict (start, evaluation, value)
    """
    k, normal = mixture.normal_form()
    if k:
        # optimize in the mixture's own units (Mixture.normal_form: exact powers of 2), where the
        # tolerances gtol and ftol mean what they mean for an O(1) mixture:
        # V(xi; g) = 2^k V(xi / 4^k; 2^k g)
        def up(pair):
            return None if pair is None else (np.ldexp(np.asarray(pair[0], float), k), pair[1])

        res = optimize_depth(normal, p, run_pass=run_pass, plan=plan, previous=up(previous),
                             previous_value=None if previous_value is None else math.ldexp(previous_value, -k),
                             starts=[up(s) for s in starts] if starts else None, restarts=restarts, seed=seed,
                             gtol=gtol, maxiter=maxiter,
                             callback=None if callback is None else (lambda info: callback({**info, "value": math.ldexp(info["value"], k)})))
        res.value = math.ldexp(res.value, k)
        res.gamma = np.ldexp(res.gamma, -k)
        res.mixture = mixture
        for record in res.history:
            record["values"] = [None if v is None else math.ldexp(v, k) for v in record["values"]]
            if "value" in record:
                record["value"] = math.ldexp(record["value"], k)
        return res
    t0 = time.perf_counter()
    if p < 1:
        raise ValueError("depth p must be >= 1")
    plan = plan or plan_chunks(p)
    candidates = start_candidates(mixture, p, previous=previous, starts=starts, restarts=restarts, seed=seed)

    # search box: b over two periods (V is periodic in each b_t), |g| up to
    # GAMMA_BOX / sqrt(xi'(1)), far beyond the optima (|g| sqrt(xi'(1)) < 1 in every
    # case we computed) and short of where the path weights overflow
    gmax = GAMMA_BOX / math.sqrt(float(mixture.dxi(1.0)))
    P = beta_period(mixture)
    lower = np.concatenate([np.full(p, -gmax), np.full(p, -P)])
    upper = -lower
    # |V_p| <= ground-state energy <= sqrt(2 xi(1) ln 2) (first-moment bound), so this is worse than any value
    penalty = 10.0 * (1.0 + float(mixture.xi(1.0)))
    evaluations = 0
    history: list[dict] = []
    best = None

    def local_run(index: int, g0, b0, kind: str):
        nonlocal best
        record = {"start": index, "kind": kind, "values": [], "evaluations": 0}

        def fun(x):
            nonlocal evaluations
            evaluations += 1
            record["evaluations"] += 1
            try:
                ev = evaluate(mixture, x[:p], x[p:], plan=plan, run_pass=run_pass, gradient=True)
            except PassIntegrityError:
                # weights overflow far from the useful region (huge gamma): report a
                # value worse than any attainable one so the line search backs off
                record["values"].append(None)
                return penalty, np.zeros_like(x)
            grad = np.concatenate([ev.gradient["gamma"], ev.gradient["beta"]])
            if not (np.isfinite(ev.value) and np.all(np.isfinite(grad))):
                record["values"].append(None)
                return penalty, np.zeros_like(x)
            record["values"].append(float(ev.value))
            if callback is not None:
                callback({"start": index, "evaluation": evaluations, "value": float(ev.value)})
            return -ev.value, -grad

        g0, b0 = canonical_angles(mixture, g0, b0)  # value-preserving, puts b inside the bounds
        x0 = np.clip(np.concatenate([g0, b0]), lower, upper)
        from scipy.optimize import minimize  # here, not at import: keeps `import leadline` and the CLI light

        res = minimize(
            fun,
            x0,
            jac=True,
            method="L-BFGS-B",
            bounds=list(zip(lower, upper)),
            options={"maxiter": maxiter, "gtol": gtol, "ftol": 1e-15, "maxcor": 30},
        )
        value = -float(res.fun)
        x = np.asarray(res.x, float)
        # the gradient at the returned point (scipy keeps it as res.jac)
        grad = -np.asarray(res.jac, float)
        gnorm = float(np.max(np.abs(grad)))
        record.update({"value": value, "gradient_norm": gnorm, "message": str(res.message)})
        history.append(record)
        # converged means what it says: the largest gradient component is within the tolerance asked for
        converged = bool(gnorm <= gtol)
        cand = (value, x, gnorm, converged, str(res.message))
        if best is None or value > best[0] + 1e-13:
            best = cand

    for i, (g0, b0, kind) in enumerate(candidates):
        local_run(i, g0, b0, kind)

    if previous is not None and previous_value is not None and len(previous[0]) == p - 1:
        if best[0] < previous_value - 1e-12:
            g0 = np.concatenate([previous[0], [0.0]])
            b0 = np.concatenate([previous[1], [0.0]])
            local_run(len(candidates), g0, b0, "padded")

    value, x, gnorm, converged, message = best
    if value <= TRIVIAL_MARGIN:
        # V_p* > 0 at every depth (small gamma at a suitable beta gains to first order), so a
        # stationary point at V = 0 is a flat region (huge gamma, or gamma = 0), not an optimum
        converged = False
        message = f"stopped at the trivial value 0 (what gamma = 0 gives) in a flat part of the landscape: not an optimum ({message})"
    g, b = canonical_angles(mixture, x[:p], x[p:])
    return OptimizationResult(
        value=value,
        gamma=g,
        beta=b,
        p=p,
        mixture=mixture,
        gradient_norm=gnorm,
        evaluations=evaluations,
        restarts=len(history),
        converged=converged,
        message=message,
        wall_time=time.perf_counter() - t0,
        history=history,
    )
