"""Optimal angles with the bath engine: preconditioned quasi-Newton on finite differences.

The bath engine gives V_p with a truncation error estimate but no derivative, so the gradient
is a finite difference.  The angles move in an orthonormal Fourier basis of the schedules
(the FOURIER parametrization of Zhou, Wang, Choi, Pichler, Lukin, Phys. Rev. X 10, 021067
(2020), eq. (7), normalized here), as a displacement of the start:

    gamma_i = gamma0_i + sum_k u_k S[i, k],  S[i, k] = sqrt(2/p) sin((k - 1/2)(i - 1/2) pi / p)
    beta_i  = beta0_i  + sum_k v_k C[i, k],  C[i, k] = sqrt(2/p) cos((k - 1/2)(i - 1/2) pi / p)

With q = p coefficients this is an orthogonal change of the 2p angles (nothing is lost); with
q < p only the q smoothest modes move (``stages``; measured: the step from INTERP to the
optimum is not smooth, so all p are the default).

What makes a depth cheap (each measured, docs/bath.md):

* **One truncation for the search.**  Every point of the search is one engine run at the
  fixed cut-off ``tolerance / 10`` (no ladder): at a fixed cut-off V is a smooth function of
  the angles, so central differences with step h = 1e-3 or 1e-4 give the gradient to about
  2e-5 at cut-off 1e-7 (SK p = 12); a gradient bias d moves the value reached by
  d^2 / (2 lambda_min), negligible.  Only the final point gets the full ladder of
  :func:`evaluate_bath` (V_p* with its error estimate).
* **Hybrid differences.**  Far from the optimum a gradient is a forward difference (2p
  evaluations; the point itself is known from the line search) whose leading bias h V_jj / 2
  is removed with the curvature of the quasi-Newton model (the diagonal of its inverse);
  before any stop the central difference at the same point is taken (2p more evaluations,
  the forward points are reused) and used from then on, so the stop is decided as accurately
  as with central differences throughout.
* **A preconditioner.**  BFGS starts from the exact Hessian (kernels.exact reverse-mode
  gradient, forward differences) at depth p0 = min(p, 13) (15 from p = 20) of the start
  schedule resampled to p0 layers, in the same Fourier coordinates, padded to p modes (mode k
  has the same shape at every depth); its eigenvalues are made positive.  From INTERP this
  takes the optimizer to the optimum in a handful of gradients instead of the dozens from an
  identity start.
* **Line searches on values.**  A trial step costs one evaluation, not a gradient: the step
  along the quasi-Newton direction is accepted (or refined by a parabola through the values)
  before the next gradient is taken.  No trial step is longer than ``MAX_STEP`` radians, and a
  direction with no gain first sends the model back to the preconditioner once (a BFGS restart).

Breakdowns: an engine run far from the optimum can break down (seen at SK p = 20: V = 2.4e17 with
error estimate 0.17 at a trial 2.5 radians away).  A run whose value is outside the first-moment
bound or whose own estimate is above ``BREAKDOWN_ESTIMATE`` (:func:`plausible`) is no gain for a line
search; next to a gradient it ends the search at the best point so far (not converged, the message
says so); at the final point it raises :class:`EngineBreakdown`.  No such value is ever reported.

Stopping: when the predicted gain of the next quasi-Newton step, g^T H g / 2, is below
tolerance / 10, when the last 3 gradients together gained less than tolerance / 5 (the gradient's
noise keeps the predicted gain up in the flat tail of deep depths), when the largest gradient
component is below ``gtol``, or when a line search finds no gain.  The report gives V_p* with
the final ladder's estimate e, the gradient norm of the search's last gradient and its noise,
a bound e_c / h (e_c: the value error estimate of the search's runs; a bound that assumes the
truncation error were not smooth in the angles).

Determinism: the evaluations are pure functions of (mixture, angles, engine settings), the
preconditioner's exact gradients are computed with one BLAS thread wherever they run (a map
like the evaluations), the optimizer is deterministic,
and ``run_map`` returns results in task order, so the same inputs give the same bits on any
number of workers; a depth that is replayed with evaluations read back from a checkpoint
follows the same path.
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
           "EngineBreakdown", "plausible",
           "difference_step", "stalled", "search_settings", "preconditioner", "pad_inverse_hessian",
           "exact_fourier_gradient", "hessian_depth"]


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
    #: the search's final inverse BFGS matrix ((2p, 2p), Fourier coordinates of depth p): the start of
    #: depth p + 1 after :func:`pad_inverse_hessian` (not in to_json; sweeps store it separately)
    inverse_hessian: np.ndarray | None = None

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
    """Coefficients per stage: all 2p angles (the step from INTERP to the optimum is not smooth, docs/bath.md)."""
    return (p,)


#: difference step in Fourier coordinates (measured at SK p = 12: central gradient error ~ the value
#: error of the truncation at 1e-3 and 1e-4, 5e-5 from the h^2 term at 1e-2; 1e-4 keeps the
#: forward differences' curvature-corrected bias below that, docs/bath.md)
STEP = 1e-4
#: "hybrid" (forward differences, 2p evaluations per gradient, with their h V''/2 bias removed by the
#: quasi-Newton model's curvature; central ones, 2p more at the same point, before any stop and from
#: then on), "central" (4p + 1 per gradient) or "forward" (2p + 1, uncorrected); measured against
#: each other in benchmarks/bench_bath_optimize.py --compare
DIFFERENCES = "hybrid"
#: hybrid only: True makes the gradients after a central confirmation that did not stop the search
#: forward ones again (a later stop is confirmed by another central one at its point); False keeps
#: central differences from the first confirmation on.  Measured at SK p = 22, 25, 26 and q = 3 p = 23
#: (docs/bath.md): 16% fewer evaluations in all, all of it at SK p = 26, where the forward gradients
#: gained less and the search stopped 1.3e-6 lower; 13% more at SK p = 22.  Not adopted.
FORWARD_AFTER_CONFIRM = False
#: the search runs at this fraction of the tolerance as its fixed cut-off
SEARCH_CUTOFF = 0.1
#: longest trial step of a line search (2-norm in Fourier coordinates = 2-norm of the change of the
#: 2p angles, radians): a quasi-Newton model updated across a tiny, noisy step can point 10 radians
#: away (seen at SK p = 20: |d| = 9.8), where the truncated engine breaks down; 0.5 is several times
#: any step the SK and q = 3 sweeps took from INTERP (common practice: a step-length limit, as in
#: line searches that cap the step at a multiple of the variables' size)
MAX_STEP = 0.5
#: an engine run whose own error estimate is above this, or whose value lies outside the first-moment
#: bound |V| <= sqrt(2 ln 2 xi(1)) (no energy density exceeds it), broke down: a line search treats it as
#: no gain, a gradient next to it ends the search, and the final point must not be one
BREAKDOWN_ESTIMATE = 1e-2
#: stop when the last STALL_GRADIENTS gradients together gained less than STALL_FRACTION x tolerance: the
#: tail of a deep depth gains 1e-8 .. 1e-7 per gradient while the predicted gain of the noisy gradient
#: stays above tolerance / 10 (measured on the SK and q = 3 sweeps' records at p = 17..22: 23% fewer
#: gradients, the value reached at most 1e-6 below the longer run's, docs/bath.md "Fewer gradients per deep depth")
STALL_GRADIENTS = 3
STALL_FRACTION = 0.2
#: depth of the exact Hessian used as the preconditioner (resampled schedule, padded to p); 13 saves
#: gradients over 10 at p >= 13 for about 7 CPU s (docs/bath.md, "A cheaper depth")
HESSIAN_DEPTH = 13
#: from depth DEEP_HESSIAN_FROM on the exact Hessian is taken at DEEP_HESSIAN_DEPTH (measured at SK p = 20
#: and 21: 1.30x and 1.36x less CPU per depth than at 13; at p = 17 it cost more than it saved,
#: docs/bath.md "Fewer gradients per deep depth")
DEEP_HESSIAN_FROM = 20
DEEP_HESSIAN_DEPTH = 15
#: differences of the exact gradient that give that Hessian: "forward" (2 p0 + 1 gradients) or "central" (4 p0)
HESSIAN_DIFFERENCES = "forward"


def stalled(values, tolerance: float) -> bool:
    """True when the values at the last STALL_GRADIENTS + 1 gradients rose by less than STALL_FRACTION x tolerance."""
    k = STALL_GRADIENTS
    return len(values) > k and values[-1] - values[-1 - k] < STALL_FRACTION * tolerance


def difference_step(error_estimate: float | None = None) -> float:
    """Central-difference step in Fourier coordinates (fixed: the search's runs are smooth in the angles)."""
    return STEP


def search_settings(engine: dict) -> dict:
    """Engine settings of one search run: a fixed cut-off of tolerance / 10 (no ladder)."""
    from ._estimate import DEFAULT_BOND_CAP, DEFAULT_FOCK_CAP, DEFAULT_TOLERANCE

    tolerance = float(engine.get("tolerance", DEFAULT_TOLERANCE))
    return {"cutoff": SEARCH_CUTOFF * tolerance, "fock_cap": int(engine.get("fock_cap", DEFAULT_FOCK_CAP)),
            "bond_cap": int(engine.get("bond_cap", DEFAULT_BOND_CAP))}


def bath_point(task) -> tuple[float, float, float]:
    """One bath evaluation (the unit of distributed work): (value, error_estimate, CPU seconds).

    ``task`` = (mixture, gamma, beta, settings): ``settings`` with a ``cutoff`` is one engine
    run at that truncation (estimate: its discarded weight plus the square root of its top
    Fock level population); otherwise the keyword arguments of ``evaluate_bath`` (the ladder
    to a tolerance).  A module-level function of plain data, so Dask can ship it to any worker.
    """
    from ._estimate import _one_thread, evaluate_bath
    from ._engine import run_bath

    mixture, gamma, beta, engine = task
    engine = dict(engine)
    g, b = np.asarray(gamma, float), np.asarray(beta, float)
    t0 = time.process_time()
    if "cutoff" in engine:
        c = float(engine["cutoff"])
        with _one_thread():
            run = run_bath(mixture, g, b, fock=2, fock_max=int(engine["fock_cap"]), fock_tol=c * c, cutoff=c,
                           chi=int(engine["bond_cap"]))
        return float(run.value), float(run.discarded + np.sqrt(run.top_population)), time.process_time() - t0
    res = evaluate_bath(mixture, g, b, **engine)
    return float(res.value), float(res.error_estimate), time.process_time() - t0


def _local_map(func, tasks) -> list:
    return [func(t) for t in tasks]


def _resample(x, p0: int) -> np.ndarray:
    """A schedule of p layers at the p0 midpoints (i - 1/2) / p0 (linear, ends held)."""
    x = np.asarray(x, float)
    t = (np.arange(x.size) + 0.5) / x.size
    return np.interp((np.arange(p0) + 0.5) / p0, t, x)


def hessian_depth(p: int) -> int:
    """Depth of the preconditioner's exact Hessian for a depth-p search (before min(p, .))."""
    return DEEP_HESSIAN_DEPTH if p >= DEEP_HESSIAN_FROM else HESSIAN_DEPTH


def exact_fourier_gradient(task) -> np.ndarray:
    """The exact gradient of V_p0 in p0's Fourier coordinates at displacement e of (g0, b0) (one task).

    ``task`` = (mixture, g0, b0, e); computed with one BLAS thread, so the bits do not depend on
    where it runs (a module-level function of plain data, shipped to a Dask worker as is).
    """
    from ..exact import evaluate
    from ._estimate import _one_thread

    mixture, g0, b0, e = task
    p0 = len(g0)
    S, C = fourier_basis(p0, p0)
    with _one_thread():
        ev = evaluate(mixture, g0 + S @ e[:p0], b0 + C @ e[p0:], gradient=True)
        return np.concatenate([S.T @ ev.gradient["gamma"], C.T @ ev.gradient["beta"]])


def preconditioner(mixture: Mixture, gamma, beta, q: int, depth: int | None = None,
                   run_map: Callable | None = None) -> np.ndarray:
    """Inverse of a positive-definite model of -Hessian(V) in the Fourier coordinates of depth p.

    The exact Hessian (forward differences of the exact reverse-mode gradient, step 1e-4:
    2 p0 + 1 exact gradients; central ones with ``HESSIAN_DIFFERENCES = "central"``) at
    depth p0 = min(p, depth) (default :func:`hessian_depth`) of the schedule resampled to p0
    layers, in p0's Fourier coordinates; modes k <= p0 keep their entries, higher modes get the
    diagonal of mode p0 (mode k has the same shape at every depth); eigenvalues below 1e-2 of the
    largest are raised to it.  Returns the (2q, 2q) block of the first q modes per schedule.
    The exact gradients are independent tasks (:func:`exact_fourier_gradient`), mapped with
    ``run_map`` (an executor's, so a cluster computes them side by side; default: in this process).
    """
    p = len(gamma)
    p0 = min(p, hessian_depth(p) if depth is None else depth)
    g0, b0 = _resample(gamma, p0), _resample(beta, p0)
    h = 1e-4
    n0 = 2 * p0
    steps = []  # displacements whose exact gradients are needed, the centre first for forward differences
    if HESSIAN_DIFFERENCES == "forward":
        steps.append(np.zeros(n0))
    for j in range(n0):
        for sign in ((1.0,) if HESSIAN_DIFFERENCES == "forward" else (1.0, -1.0)):
            e = np.zeros(n0)
            e[j] = sign * h
            steps.append(e)
    grads = (run_map or _local_map)(exact_fourier_gradient, [(mixture, g0, b0, e) for e in steps])
    H0 = np.zeros((n0, n0))
    for j in range(n0):
        if HESSIAN_DIFFERENCES == "forward":  # the exact gradient has no noise: forward differences suffice
            H0[:, j] = -(grads[1 + j] - grads[0]) / h
        else:
            H0[:, j] = -(grads[2 * j] - grads[2 * j + 1]) / (2 * h)
    H0 = 0.5 * (H0 + H0.T)
    w, U = np.linalg.eigh(H0)
    w = np.maximum(np.abs(w), 1e-2 * np.max(np.abs(w)))
    H0 = (U * w) @ U.T
    # pad to q modes per schedule: index k of gamma -> k, of beta -> q + k
    H = np.zeros((2 * q, 2 * q))
    m = min(p0, q)
    src = [*range(m), *range(p0, p0 + m)]
    dst = [*range(m), *range(q, q + m)]
    H[np.ix_(dst, dst)] = H0[np.ix_(src, src)]
    for k in range(m, q):
        H[k, k] = H0[p0 - 1, p0 - 1]
        H[q + k, q + k] = H0[n0 - 1, n0 - 1]
    return np.linalg.inv(H)


def pad_inverse_hessian(Hinv, p: int) -> np.ndarray:
    """The (2p, 2p) start of depth p from the final inverse BFGS matrix of depth p' < p.

    Mode k has the same shape at every depth (:func:`fourier_basis`), so the (2p', 2p') matrix keeps
    its entries for modes k <= p' of each schedule; the new modes are uncoupled, each with the
    diagonal entry of the last mode of its schedule (as :func:`preconditioner` pads its Hessian).
    """
    Hinv = np.asarray(Hinv, float)
    q = Hinv.shape[0] // 2
    if Hinv.shape != (2 * q, 2 * q) or not 1 <= q <= p:
        raise ValueError(f"an inverse Hessian of 2 x 1..{p} modes is needed, got shape {Hinv.shape}")
    out = np.zeros((2 * p, 2 * p))
    src = [*range(q), *range(q, 2 * q)]
    dst = [*range(q), *range(p, p + q)]
    out[np.ix_(dst, dst)] = Hinv[np.ix_(src, src)]
    for k in range(q, p):
        out[k, k] = Hinv[q - 1, q - 1]
        out[p + k, p + k] = Hinv[2 * q - 1, 2 * q - 1]
    return out


def bfgs_update(Hinv: np.ndarray, s: np.ndarray, y: np.ndarray) -> np.ndarray | None:
    """The BFGS update of the inverse Hessian for step s and gradient change y (of the function
    minimized, -V); None (no update) when s.y is not clearly positive."""
    sy = float(s @ y)
    if not sy > 1e-12 * float(np.linalg.norm(s) * np.linalg.norm(y)):
        return None
    rho = 1.0 / sy
    V = np.eye(s.size) - rho * np.outer(s, y)
    return V @ Hinv @ V.T + rho * np.outer(s, s)


class EngineBreakdown(RuntimeError):
    """The bath engine returned a value it cannot have (outside the first-moment bound, not finite,
    or with an error estimate above BREAKDOWN_ESTIMATE) where the optimizer needed a number."""


def plausible(mixture: Mixture, value: float, estimate: float) -> bool:
    """Whether one engine run's (value, error estimate) can be trusted at all (see BREAKDOWN_ESTIMATE)."""
    from ..reference import union_bound

    bound = union_bound(mixture)
    return (math.isfinite(value) and math.isfinite(estimate) and estimate <= BREAKDOWN_ESTIMATE
            and abs(value) <= bound + estimate)


class _Search:
    """V_p at one truncation along the search, and its central-difference gradient, one map per batch."""

    def __init__(self, mixture, p, q, g0, b0, settings, run_map, callback, record):
        self.mixture, self.p, self.q = mixture, p, q
        self.g0, self.b0 = np.asarray(g0, float), np.asarray(b0, float)
        self.S, self.C = fourier_basis(p, q)
        self.settings = dict(settings)
        self.run_map = run_map
        self.callback = callback
        self.record = record
        self.evaluations = 0
        self.gradients = 0
        self.seconds = 0.0
        self.best = None  # (value, error, x, gradient)
        self.forward = None  # (x, V(x + h e_j), (V(x), estimate)) of the last forward gradient

    def angles(self, x):
        return self.g0 + self.S @ x[: self.q], self.b0 + self.C @ x[self.q:]

    def _map(self, points):
        out = self.run_map(bath_point, [(self.mixture, *self.angles(y), self.settings) for y in points])
        self.evaluations += len(points)
        self.seconds += float(sum(o[2] for o in out))
        return out

    def values(self, points) -> list[tuple[float, float]]:
        """(value, estimate) at each point: the line search's trial steps; a breakdown (see
        :func:`plausible`) counts as -inf, no gain, and is recorded."""
        out = []
        for o in self._map(points):
            if plausible(self.mixture, o[0], o[1]):
                out.append((o[0], o[1]))
            else:
                self.record["breakdowns"] = self.record.get("breakdowns", 0) + 1
                out.append((-math.inf, o[1]))
        return out

    def gradient(self, x, known=None, kind="central", curvature=None):
        """(value, estimate, gradient) at x; ``known`` = (value, estimate) at x if evaluated already.

        ``kind`` "forward": (V(x + h e_j) - V(x)) / h + h c_j / 2, c_j = ``curvature`` (the model's
        -V_jj, removing the leading bias; zero if None); "central": (V(x + h e_j) - V(x - h e_j)) / 2h,
        reusing the forward points of the last forward gradient at the same x.
        """
        x = np.asarray(x, float)
        n = x.size
        reuse = None
        if kind == "central" and self.forward is not None and np.array_equal(self.forward[0], x):
            reuse = self.forward[1]
            known = self.forward[2]
        points = [] if known is not None else [x]
        signs = (-1.0,) if reuse is not None else (1.0, -1.0) if kind == "central" else (1.0,)
        for j in range(n):
            for sign in signs:
                y = x.copy()
                y[j] += sign * STEP
                points.append(y)
        out = self._map(points)
        bad = [o for o in out if not plausible(self.mixture, o[0], o[1])]
        if bad:
            self.record["breakdowns"] = self.record.get("breakdowns", 0) + len(bad)
            raise EngineBreakdown(f"the bath engine broke down next to the search point ({len(bad)} of "
                                  f"{len(out)} difference points: value {bad[0][0]:.3g}, estimate {bad[0][1]:.1e})")
        if known is not None:
            out = [(*known, 0.0), *out]
        self.gradients += 1
        values = np.array([o[0] for o in out])
        value, error = float(values[0]), float(out[0][1])
        if reuse is not None:
            grad = (reuse - values[1:]) / (2.0 * STEP)
        elif kind == "central":
            grad = (values[1::2] - values[2::2]) / (2.0 * STEP)
        else:
            grad = (values[1:] - value) / STEP
            if curvature is not None:
                grad = grad + 0.5 * STEP * np.asarray(curvature, float)
            self.forward = (x.copy(), values[1:].copy(), (value, error))
        if self.best is None or value > self.best[0] or (value == self.best[0] and np.array_equal(x, self.best[2])):
            self.best = (value, error, x.copy(), grad)
        self.record["values"].append(value)
        if self.callback is not None:
            self.callback({"evaluation": self.evaluations, "evaluations": len(points), "value": value,
                           "error_estimate": error, "best_value": self.best[0], "best_error_estimate": self.best[1],
                           "gradient_norm": float(np.max(np.abs(grad))),
                           "evaluation_s": self.seconds / max(1, self.evaluations)})
        return value, error, grad


def _stage(mixture, p, q, g0, b0, *, engine, run_map, gtol, maxiter, callback, record, hessian=None,
           hessian_map=None):
    """One preconditioned BFGS run on q Fourier coefficients per schedule, from angles (g0, b0).

    Maximizes V_p at the search truncation; the final point is evaluated to the tolerance.
    """
    settings = search_settings(engine)
    tolerance = float(engine.get("tolerance", 1e-6))
    search = _Search(mixture, p, q, g0, b0, settings, run_map, callback, record)
    if hessian is None:
        Hinv = preconditioner(mixture, g0, b0, q, run_map=hessian_map)
    else:
        Hinv = np.array(hessian, float)
    n = 2 * q
    H0 = np.array(Hinv, float)  # the preconditioner: where a model that stopped gaining starts again
    fresh = True  # the model is H0 (no update since the start or the last restart)
    x = np.zeros(n)
    # hybrid: forward differences while far from the optimum, central ones before any stop and after
    kind = "central" if DIFFERENCES == "central" else "forward"

    def take_gradient(x, known=None):
        curvature = None
        if kind == "forward" and DIFFERENCES == "hybrid":
            curvature = np.diag(np.linalg.inv(Hinv))
        return search.gradient(x, known=known, kind=kind, curvature=curvature)

    def confirm():
        """Before a stop on a forward gradient: the central one at the same point (hybrid only)."""
        nonlocal kind, value, error, grad
        if kind != "forward" or DIFFERENCES != "hybrid":
            return False
        kind = "central"
        value, error, grad = take_gradient(x)
        return True

    value, error, grad = take_gradient(x)
    message, converged = "iteration limit", False
    try:
        for _ in range(maxiter):
            d = Hinv @ grad
            predicted = float(grad @ d)  # first-order gain of the full step; g^T H g / 2 is the quadratic model's
            norm_d = float(np.linalg.norm(d))
            a_max = 4.0 if norm_d <= 0 else min(4.0, MAX_STEP / norm_d)  # no trial step longer than MAX_STEP
            if np.max(np.abs(grad)) <= gtol:
                if confirm():
                    continue
                message, converged = "gradient below gtol", True
                break
            if predicted / 2.0 <= SEARCH_CUTOFF * tolerance:
                if confirm():
                    continue
                message, converged = "predicted gain of the next step below tolerance / 10", True
                break
            if stalled(record["values"], tolerance):
                if confirm():
                    continue
                message = f"gain over the last {STALL_GRADIENTS} gradients below tolerance / {1 / STALL_FRACTION:g}"
                converged = True
                break
            # line search on values: the full step (at most MAX_STEP long), refined by the parabola
            # through V(0), V'(0) and V there
            a0 = min(1.0, a_max)
            (v1, e1), = search.values([x + a0 * d])
            steps = [(a0, v1, e1)]
            curvature = (v1 - value - predicted * a0) / (a0 * a0)
            if curvature < 0:
                a = min(max(-predicted / (2.0 * curvature), 0.1 * a0), a_max)
                if not 0.7 * a0 <= a <= 1.4 * a0:
                    (va, ea), = search.values([x + a * d])
                    steps.append((a, va, ea))
            a, v_new, e_new = max(steps, key=lambda s: s[1])
            tries = 0
            while v_new <= value and tries < 3:
                a *= 0.25
                (v_new, e_new), = search.values([x + a * d])
                tries += 1
            if v_new <= value:
                if confirm():
                    continue
                if not fresh:
                    # updates across short, noisy steps can spoil the model (seen at SK p = 20: a step 40x
                    # shorter than proposed, then directions with no gain): start it again from the
                    # preconditioner once before stopping (common practice: restarting BFGS)
                    Hinv, fresh = H0.copy(), True
                    record["model_restarts"] = record.get("model_restarts", 0) + 1
                    continue
                message, converged = "no gain along the quasi-Newton direction (at the search truncation)", True
                break
            x_new = x + a * d
            if FORWARD_AFTER_CONFIRM and DIFFERENCES == "hybrid":
                kind = "forward"
            v_new, e_new, g_new = take_gradient(x_new, known=(v_new, e_new))
            updated = bfgs_update(Hinv, x_new - x, -(g_new - grad))  # BFGS on -V
            if updated is not None:
                Hinv, fresh = updated, False
            x, value, error, grad = x_new, v_new, e_new, g_new
    except EngineBreakdown as exc:  # a gradient next to a breakdown: keep the best point so far
        message, converged = str(exc), False
    search_value, search_error, x, grad = search.best
    g, b = search.angles(x)
    # the final point to the tolerance (the ladder of evaluate_bath), one checkpointed task
    final = run_map(bath_point, [(mixture, g, b, dict(engine))])[0]
    search.evaluations += 1
    search.seconds += final[2]
    if not plausible(mixture, final[0], final[1]):
        raise EngineBreakdown(f"the bath engine broke down at the final point of depth {p} (value "
                              f"{final[0]:.3g}, estimate {final[1]:.1e}): no V_p* to report; a larger bond "
                              "dimension or more Fock levels (--bond, --fock; spec: bath-bond, bath-fock) may carry it")
    gnorm = float(np.max(np.abs(grad)))
    return {
        "value": float(final[0]), "error_estimate": float(final[1]), "gamma": g, "beta": b, "gradient_norm": gnorm,
        "gradient_noise": max(search_error, abs(search_value - final[0])) / STEP, "converged": converged,
        "message": message, "evaluations": search.evaluations, "gradients": search.gradients,
        "seconds": search.seconds, "q": q, "step": STEP, "search_value": search_value,
        "inverse_hessian": Hinv,
    }


def optimize_bath_depth(
    mixture: Mixture,
    p: int,
    *,
    engine: dict | None = None,
    run_map: Callable | None = None,
    previous: tuple | None = None,
    previous_value: float | None = None,
    earlier: tuple | None = None,
    starts: list | None = None,
    restarts: int | None = 0,
    seed: int = 0,
    stages: tuple[int, ...] | None = None,
    gtol: float = 1e-6,
    maxiter: int = 200,
    callback: Callable[[dict], None] | None = None,
    inverse_hessian=None,
    hessian_map: Callable | None = None,
) -> BathOptimization:
    """Maximize V_p over the angles with the bath engine (finite differences, noise-aware).

    engine : keyword arguments of :func:`evaluate_bath` (``tolerance``, ``fock_cap``, ``bond_cap``):
        the final point's ladder; the search runs at the fixed cut-off tolerance / 10
        (:func:`search_settings`), so every difference compares values of the same truncation
    run_map : ``run_map(func, tasks) -> [func(t) for t in tasks]`` in task order (an
        executor's ``run_map``; default: in this process)
    previous, previous_value, starts, restarts, seed : as for the exact optimizer
        (INTERP warm start from depth p-1; default here: no extra starts)
    earlier : the optimum (gamma, beta) of depth p-2: with it the warm start is the extrapolated
        start (:func:`leadline.kernels.optimize.extrapolated_start`, from p = 5), not INTERP
    stages : Fourier coefficients per schedule of each stage (default :func:`default_stages`)
    gtol : stop when the largest gradient component is below gtol (the search also stops when
        the predicted gain of its next step is below tolerance / 10)
    maxiter : iteration cap (quasi-Newton iterations) of each stage
    inverse_hessian : (2p, 2p) starting inverse Hessian of -V in Fourier coordinates (default:
        :func:`preconditioner`, the exact Hessian at depth min(p, hessian_depth(p)) padded to p)
    hessian_map : ``run_map`` for the preconditioner's exact gradients (an executor's ``run_map``,
        not a checkpointing one: they are not bath evaluations; default: in this process)
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
    candidates = start_candidates(mixture, p, previous=previous, starts=starts, restarts=restarts, seed=seed,
                                  earlier=earlier)
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
                         callback=callback, record=record, hessian=inverse_hessian if q == p else None,
                         hessian_map=hessian_map)
            g, b = out["gamma"], out["beta"]
            for key in ("evaluations", "gradients", "seconds"):
                totals[key] += out[key]
            record.update({k: out[k] for k in ("value", "error_estimate", "gradient_norm", "gradient_noise",
                                               "message", "evaluations", "step", "search_value")})
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
        inverse_hessian=best["inverse_hessian"] if best["q"] == p else None,
    )
