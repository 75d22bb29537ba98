"""The p-step iteration for V_p(gamma, beta) and its reverse-mode gradient.

    G_0[j,k] = sum_a f(a) a_j a_k
    for m = 1..p:  M_m = (Gamma Gamma^T) o xi'(G_{m-1});  G_m = pass(M_m)
    V_p = i sum_j Gamma_j xi(G_p[time0, j])

(Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022) for the SK model;
Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306 for any mixture xi.)

Growing contour (the default, ``contour="growing"``)
----------------------------------------------------
Step m only sees the light cone of the measured spin: in M_m every Gamma
entry with |t| > m can be set to zero without changing V_p (causality: the
spin step m describes interacts with its children only in phase layers
1..m).  The path variables at times m+1..p, 0, -p..-(m+1) then carry link
factors only; summing them (unitarity of the mixer) forces a_{m+1} =
a_{-(m+1)}, so step m is a pass over the contour of a DEPTH-m problem,

    times 1, ..., m, c, -m, ..., -1       (2m+1 sites, angles b_1..b_m)

whose middle site c stands for both +(m+1) and -(m+1) and has Gamma_c = 0.
Step m + 1 reads G_m[+-(m+1), k] from row c (:func:`expand_correlations`);
step p is the full contour, its middle site the real time 0.  G_0 on the
one-site contour is 1 (a free spin).  With the global flip of each pass
(plan.py) one evaluation visits sum_m 2^(2m) ~ (2/3) 2^(2p+1) paths instead
of p 2^(2p+1): 1.5p times fewer.  ``contour="full"`` keeps the p passes over
all 2^(2p+1) paths (the baseline tests and benchmarks compare against).

The pass is injected: ``run_pass(PassInput, ChunkPlan) -> (2m+2, 2m+1)``
summed partials.  In-process, Dask, and checkpointed executors all supply it,
so this module never knows where the work runs.

Gradient: the adjoint of every step is one more chunked pass on the same
contour as its forward step (chunks.py); the reverse sweep mirrors the
forward one, so step m feeds d/dg_t and d/db_t only for t <= m.  Derivatives
are holomorphic in the complex G entries; V is real for real angles, so the
final gradient is the real part.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ._chunks import PassInput, run_pass_inprocess
from ._contour import check_angles, gamma_vector, initial_correlations, link_beta_index, time0_index
from ..mixture import Mixture
from ._plan import ChunkPlan, plan_chunks, step_plans

__all__ = [
    "PassIntegrityError",
    "PassRangeError",
    "Evaluation",
    "evaluate",
    "sum_w_tolerance",
    "RunPass",
    "CONTOURS",
    "expand_correlations",
]

#: iteration variants: the growing contour (default) and the full-contour baseline
CONTOURS = ("growing", "full")

RunPass = Callable[[PassInput, ChunkPlan], np.ndarray]


class PassIntegrityError(RuntimeError):
    """A pass whose weights do not sum to 1: a lost, doubled or corrupt chunk."""


class PassRangeError(PassIntegrityError):
    """A pass whose weights or moments are not finite: they left the double range.

    A subclass of :class:`PassIntegrityError` so that callers that back off from a
    failed pass (the optimizer's line search) treat both alike; the command line
    reports it as one line about the range (kernels/exact/_ranges.py), not as a lost chunk.
    """


#: unit roundoff of double precision
_EPS = float(np.finfo(float).eps)


def sum_w_tolerance(p: int, exponent: float = 0.0) -> float:
    """Allowed |sum_a w(a) - 1| for one pass at depth p whose exponents reach ``exponent``.

    Rounding in a sum of 2^(2p+1) terms of modulus <= 1 grows at most like
    the number of pairwise-reduction levels; 1e-11 * (2p+1) is ~100x the
    worst deviation seen at p <= 14 and far below the 1/2^(2p+1) that a
    single lost path of typical weight would cause.  Each weight is the exp of
    a sum of terms up to ``exponent`` = E (kernels/exact/_ranges.py, pass_exponent_bound),
    so its relative rounding is about eps * E: the allowance grows by
    (2p+1) * 4 eps E, which is below 1e-11 * (2p+1) for every E <= 10^4 and
    ~30x the deviations measured up to E = 1.5e6 (tests/test_ranges.py).
    """
    return (2 * p + 1) * (1e-11 + 4.0 * _EPS * max(float(exponent), 0.0))


@dataclass
class Evaluation:
    """Result of one evaluation of V_p (the object the CLI prints as JSON).

    value      : V_p(gamma, beta), the energy density (real part)
    gradient   : None, or dict {"gamma": (p,), "beta": (p,)} of dV/dangle
    residuals  : invariant checks (max deviations): sum of weights of every
                 pass, symmetry, conjugate symmetry, unit diagonal, Im V
    plan       : chunk plan of the last (largest) step
    path_visits: paths enumerated by all forward passes (the cost of the value)
    contour    : "growing" or "full" (see module docstring)
    """

    value: float
    p: int
    mixture: Mixture
    gamma: np.ndarray
    beta: np.ndarray
    residuals: dict
    gradient: dict | None = None
    plan: ChunkPlan | None = None
    wall_time: float = 0.0
    passes: int = 0
    path_visits: int = 0
    contour: str = "growing"
    correlations: np.ndarray | None = field(default=None, repr=False)

    def to_json(self) -> dict:
        out = {
            "value": float(self.value),
            "p": int(self.p),
            "xi": self.mixture.to_json(),
            "gamma": [float(x) for x in self.gamma],
            "beta": [float(x) for x in self.beta],
            "residuals": {k: float(v) for k, v in self.residuals.items()},
            "wall_time_s": float(self.wall_time),
            "passes": int(self.passes),
            "path_visits": int(self.path_visits),
            "contour": self.contour,
        }
        if self.plan is not None:
            out["plan"] = self.plan.to_json()
        if self.gradient is not None:
            out["gradient"] = {k: [float(x) for x in v] for k, v in self.gradient.items()}
        return out


def _check_pass(G: np.ndarray, p: int, step: int, M: np.ndarray | None = None) -> float:
    from ._ranges import pass_exponent_bound

    E = pass_exponent_bound(M) if M is not None else 0.0
    if not np.all(np.isfinite(G)):
        raise PassRangeError(
            f"pass {step} at p = {p}: the path weights left the double range (non-finite moments; "
            f"exponents up to {E:.4g})"
        )
    dev = float(np.max(np.abs(np.diag(G) - 1.0)))
    allowed = sum_w_tolerance(p, E)
    if not dev <= allowed:
        raise PassIntegrityError(
            f"pass {step} at p = {p}: sum of path weights deviates from 1 by {dev:.3e} "
            f"(allowed {allowed:.1e}); a chunk was lost, doubled or corrupted"
        )
    return dev


def _reversal(n: int) -> np.ndarray:
    return np.arange(n)[::-1]


def _expand_index(m: int) -> np.ndarray:
    """Positions on the depth-(m-1) contour of the 2m+1 sites of the depth-m contour.

    Depth m: 0..m-1 are times 1..m, m is the merged site c, m+1..2m are times
    -m..-1.  Depth m-1: 0..m-2 are times 1..m-1, m-1 is its merged site (times
    +-m), m..2m-2 are times -(m-1)..-1.  Times +-m read the old merged site;
    the new merged site (Gamma_c = 0, never enters M) reads it too.
    """
    return np.concatenate([np.arange(m - 1), [m - 1, m - 1, m - 1], np.arange(m, 2 * m - 1)]).astype(np.intp)


def expand_correlations(G: np.ndarray, m: int) -> np.ndarray:
    """G_{m-1} on the depth-(m-1) contour, (2m-1, 2m-1), read on the depth-m contour, (2m+1, 2m+1)."""
    idx = _expand_index(m)
    return G[np.ix_(idx, idx)]


def _fold_expanded(Gbar_exp: np.ndarray, m: int) -> np.ndarray:
    """Adjoint of :func:`expand_correlations`: (2m+1, 2m+1) -> (2m-1, 2m-1), summing repeats."""
    idx = _expand_index(m)
    out = np.zeros((2 * m - 1, 2 * m - 1), dtype=Gbar_exp.dtype)
    np.add.at(out, np.ix_(idx, idx), Gbar_exp)
    return out


def _planner(plan, p: int):
    """``plan_for(m)`` from a ChunkPlan of the last step, a callable, or None (default plans)."""
    if plan is None:
        return step_plans(plan_chunks(p))
    if isinstance(plan, ChunkPlan):
        if plan.p != p:
            raise ValueError(f"chunk plan is for p = {plan.p}, angles have p = {p}")
        return step_plans(plan)
    return plan


def evaluate(
    mixture: Mixture,
    gamma,
    beta,
    *,
    plan: ChunkPlan | Callable[[int], ChunkPlan] | None = None,
    run_pass: RunPass | None = None,
    gradient: bool = False,
    fixed_point_check: bool = False,
    contour: str = "growing",
) -> Evaluation:
    """Exact infinite-size V_p(gamma, beta) for mixture xi, optionally with its gradient.

    Parameters
    ----------
    mixture : the covariance mixture xi
    gamma, beta : array-like of shape (p,), radians; t = 1 acts first
    plan : chunk plan of the last step (depth p; smaller steps get
        :func:`plan.step_plans` of it), or a callable ``m -> ChunkPlan`` giving
        every step's plan; default :func:`plan_chunks`.  With ``contour="full"``
        every pass uses the plan of depth p.
    run_pass : executor of one pass (default: in-process loop)
    gradient : also compute dV/dgamma, dV/dbeta by reverse mode
    fixed_point_check : run one extra forward pass and report max|G_{p+1} - G_p|
    contour : "growing" (default) or "full" (the baseline; module docstring)
    """
    g, b = check_angles(gamma, beta)
    k, normal = mixture.normal_form()
    if k == 0:
        return _evaluate(mixture, g, b, plan, run_pass, gradient, fixed_point_check, contour)
    # exact rescaling (Mixture.normal_form): V(xi; g) = 2^k V(xi / 4^k; 2^k g), multiplications by powers of 2
    ev = _evaluate(normal, np.ldexp(g, k), b, plan, run_pass, gradient, fixed_point_check, contour)
    ev.value = math.ldexp(ev.value, k)
    if ev.gradient is not None:
        ev.gradient = {"gamma": np.ldexp(ev.gradient["gamma"], 2 * k), "beta": np.ldexp(ev.gradient["beta"], k)}
    ev.residuals["imag_value"] = math.ldexp(ev.residuals["imag_value"], k)
    ev.mixture, ev.gamma = mixture, g
    return ev


def _evaluate(mixture, g, b, plan, run_pass, gradient, fixed_point_check, contour) -> Evaluation:
    t0 = time.perf_counter()
    p = g.size
    if contour not in CONTOURS:
        raise ValueError(f"unknown contour {contour!r}; choose one of {CONTOURS}")
    plan_for = _planner(plan, p)
    run_pass = run_pass or run_pass_inprocess
    if contour == "growing":
        fwd = _forward_growing(mixture, g, b, plan_for, run_pass)
    else:
        fwd = _forward_full(mixture, g, b, plan_for(p), run_pass)
    Gs, Ms, passes, visits, sum_w_dev = fwd
    n = 2 * p + 1
    c0 = time0_index(p)
    Gam = gamma_vector(g)
    Gp = Gs[-1]
    Vc = 1j * np.sum(Gam * mixture.xi(Gp[c0, :]))
    rev = _reversal(n)
    residuals = {
        "sum_w": sum_w_dev,
        "symmetry": float(np.max(np.abs(Gp - Gp.T))),
        "conjugate_symmetry": float(np.max(np.abs(Gp[np.ix_(rev, rev)] - np.conj(Gp)))),
        "unit_diagonal": float(np.max(np.abs(np.diag(Gp) - 1.0))),
        "imag_value": float(abs(Vc.imag)),
    }
    final_plan = plan_for(p)
    if fixed_point_check:
        M = np.outer(Gam, Gam) * mixture.dxi(Gp)
        R = run_pass(PassInput(p, M, b), final_plan)
        passes += 1
        _check_pass(R[:n], p, p + 1, M)
        residuals["fixed_point"] = float(np.max(np.abs(R[:n] - Gp)))

    grad = None
    if gradient:
        if contour == "growing":
            grad, nb = _backward_growing(mixture, g, b, Gs, Ms, plan_for, run_pass)
        else:
            grad, nb = _backward_full(mixture, g, b, Gam, Gs, Ms, final_plan, run_pass)
        passes += nb
        residuals["imag_gradient"] = float(max(np.max(np.abs(grad["gamma"].imag)), np.max(np.abs(grad["beta"].imag))))
        grad = {k: v.real.copy() for k, v in grad.items()}

    return Evaluation(
        value=float(Vc.real),
        p=p,
        mixture=mixture,
        gamma=g,
        beta=b,
        residuals=residuals,
        gradient=grad,
        plan=final_plan,
        wall_time=time.perf_counter() - t0,
        passes=passes,
        path_visits=visits,
        contour=contour,
        correlations=Gp,
    )


def _forward_growing(mixture, g, b, plan_for, run_pass):
    """Steps m = 1..p, each on the depth-m contour.

    Returns (Gs, Ms, passes, path visits, max |sum w - 1|) with Gs[m] of shape
    (2m+1, 2m+1) (Gs[0] the one-site G_0 = 1) and Ms[m-1] the exponent matrix of
    step m on the depth-m contour.
    """
    p = g.size
    Gs = [np.ones((1, 1), dtype=complex)]
    Ms = []
    visits = 0
    sum_w_dev = 0.0
    for m in range(1, p + 1):
        Gam = gamma_vector(g[:m])
        M = np.outer(Gam, Gam) * mixture.dxi(expand_correlations(Gs[-1], m))
        Ms.append(M)
        step_plan = plan_for(m)
        R = run_pass(PassInput(m, M, b[:m]), step_plan)
        visits += step_plan.path_visits
        G = R[: 2 * m + 1]
        sum_w_dev = max(sum_w_dev, _check_pass(G, m, m, M))
        Gs.append(G)
    return Gs, Ms, p, visits, sum_w_dev


def _backward_growing(mixture, g, b, Gs, Ms, plan_for, run_pass):
    """Reverse sweep over the growing contours; returns ({"gamma", "beta"} complex, passes).

    Step m's adjoint pass runs on the depth-m contour of its forward pass and
    feeds g_1..g_m and b_1..b_m only; G_0 = 1 does not depend on the angles,
    so there is no pass for it.
    """
    p = g.size
    c0 = time0_index(p)
    Gp = Gs[-1]
    Gam = gamma_vector(g)
    gamma_bar = np.zeros(p, dtype=complex)
    beta_bar = np.zeros(p, dtype=complex)

    def add_gamma(Gam_bar: np.ndarray, m: int) -> None:
        # Gamma^(m) = (g_1..g_m, 0, -g_m..-g_1)
        gamma_bar[:m] += Gam_bar[:m] - Gam_bar[2 * m : m : -1]

    add_gamma(1j * mixture.xi(Gp[c0, :]), p)
    Gbar = np.zeros_like(Gp)
    Gbar[c0, :] += 1j * Gam * mixture.dxi(Gp[c0, :])
    for m in range(p, 0, -1):
        n = 2 * m + 1
        R = run_pass(PassInput(m, Ms[m - 1], b[:m], adjoint=Gbar), plan_for(m))
        for t in range(2 * m):
            beta_bar[link_beta_index(m, t)] += R[n, t]
        Mbar = -0.5 * R[:n]
        Gexp = expand_correlations(Gs[m - 1], m)
        Gam_m = gamma_vector(g[:m])
        d1 = mixture.dxi(Gexp)
        add_gamma((Mbar * d1) @ Gam_m + (Mbar * d1).T @ Gam_m, m)
        if m > 1:
            Gbar = _fold_expanded(np.outer(Gam_m, Gam_m) * mixture.d2xi(Gexp) * Mbar, m)
    return {"gamma": gamma_bar, "beta": beta_bar}, p


def _forward_full(mixture, g, b, plan, run_pass):
    """The baseline: p passes over all 2^(2p+1) paths of the depth-p contour."""
    p = g.size
    n = 2 * p + 1
    if plan.p != p:
        raise ValueError(f"chunk plan is for p = {plan.p}, angles have p = {p}")
    Gam = gamma_vector(g)
    GG = np.outer(Gam, Gam)
    Gs = [initial_correlations(p, b)]
    Ms = []
    sum_w_dev = 0.0
    for m in range(1, p + 1):
        M = GG * mixture.dxi(Gs[-1])
        Ms.append(M)
        R = run_pass(PassInput(p, M, b), plan)
        G = R[:n]
        sum_w_dev = max(sum_w_dev, _check_pass(G, p, m, M))
        Gs.append(G)
    return Gs, Ms, p, p * plan.path_visits, sum_w_dev


def _backward_full(mixture, g, b, Gam, Gs, Ms, plan, run_pass):
    """Reverse sweep through the p steps; returns ({"gamma", "beta"} complex, passes)."""
    p = g.size
    n = 2 * p + 1
    c0 = time0_index(p)
    GG = np.outer(Gam, Gam)
    Gp = Gs[-1]

    Gam_bar = np.zeros(n, dtype=complex)
    Gbar = np.zeros((n, n), dtype=complex)
    Gam_bar += 1j * mixture.xi(Gp[c0, :])
    Gbar[c0, :] += 1j * Gam * mixture.dxi(Gp[c0, :])
    beta_bar = np.zeros(p, dtype=complex)
    passes = 0

    def add_links(D):
        for t in range(2 * p):
            beta_bar[link_beta_index(p, t)] += D[t]

    for m in range(p, 0, -1):
        M = Ms[m - 1]
        Gprev = Gs[m - 1]
        R = run_pass(PassInput(p, M, b, adjoint=Gbar), plan)
        passes += 1
        Q = R[:n]
        add_links(R[n, : 2 * p])
        Mbar = -0.5 * Q
        d1 = mixture.dxi(Gprev)
        Gam_bar += (Mbar * d1) @ Gam + (Mbar * d1).T @ Gam
        Gbar = GG * mixture.d2xi(Gprev) * Mbar

    # G_0 depends on beta through f: adjoint pass with M = 0
    R = run_pass(PassInput(p, np.zeros((n, n), dtype=complex), b, adjoint=Gbar), plan)
    passes += 1
    add_links(R[n, : 2 * p])

    gamma_bar = Gam_bar[:p] - Gam_bar[n - 1 : p : -1]
    return {"gamma": gamma_bar, "beta": beta_bar}, passes
