"""The p-step iteration for V_p(gamma, beta) and its reverse-mode gradient.

    G_0[j,k] = sum_a f(a) a_j a_k
    for m = 1..p:  M_m = (Gamma Gamma^T) o xi'(G_{m-1});  G_m = pass(M_m)
    V_p = i sum_j Gamma_j xi(G_p[time0, j])

(Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022) for the SK model;
Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306 for any mixture xi.)

The pass is injected: ``run_pass(PassInput, ChunkPlan) -> (2p+2, 2p+1)``
summed partials.  In-process, Dask, and checkpointed executors all supply it,
so this module never knows where the work runs.

Gradient: the adjoint of every step is one more chunked pass (see
chunks.py); the whole gradient costs p forward + (p+1) backward passes.
Derivatives are holomorphic in the complex G entries; V is real for real
angles, so the final gradient is the real part.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .chunks import PassInput, run_pass_inprocess
from .contour import check_angles, gamma_vector, initial_correlations, link_beta_index, time0_index
from .mixture import Mixture
from .plan import ChunkPlan, plan_chunks

__all__ = [
    "PassIntegrityError",
    "Evaluation",
    "evaluate",
    "sum_w_tolerance",
    "RunPass",
]

RunPass = Callable[[PassInput, ChunkPlan], np.ndarray]


class PassIntegrityError(RuntimeError):
    """A pass whose weights do not sum to 1: a lost, doubled or corrupt chunk."""


def sum_w_tolerance(p: int) -> float:
    """Allowed |sum_a w(a) - 1| for one pass at depth p.

    Rounding in a sum of 2^(2p+1) terms of modulus <= 1 grows at most like
    the number of pairwise-reduction levels; 1e-11 * (2p+1) is ~100x the
    worst deviation seen at p <= 14 and far below the 1/2^(2p+1) that a
    single lost path of typical weight would cause.
    """
    return 1e-11 * (2 * p + 1)


@dataclass
class Evaluation:
    """Result of one evaluation of V_p (the object the CLI prints as JSON).

    value      : V_p(gamma, beta), the energy density (real part)
    gradient   : None, or dict {"gamma": (p,), "beta": (p,)} of dV/dangle
    residuals  : invariant checks (max deviations), see formula.md
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
        }
        if self.plan is not None:
            out["plan"] = self.plan.to_json()
        if self.gradient is not None:
            out["gradient"] = {k: [float(x) for x in v] for k, v in self.gradient.items()}
        return out


def _check_pass(G: np.ndarray, p: int, step: int) -> float:
    dev = float(np.max(np.abs(np.diag(G) - 1.0)))
    if not dev <= sum_w_tolerance(p):
        raise PassIntegrityError(
            f"pass {step} at p = {p}: sum of path weights deviates from 1 by {dev:.3e} "
            f"(allowed {sum_w_tolerance(p):.1e}); a chunk was lost, doubled or corrupted"
        )
    return dev


def _reversal(n: int) -> np.ndarray:
    return np.arange(n)[::-1]


def evaluate(
    mixture: Mixture,
    gamma,
    beta,
    *,
    plan: ChunkPlan | None = None,
    run_pass: RunPass | None = None,
    gradient: bool = False,
    fixed_point_check: bool = False,
) -> Evaluation:
    """Exact infinite-size V_p(gamma, beta) for mixture xi, optionally with its gradient.

    Parameters
    ----------
    mixture : the covariance mixture xi
    gamma, beta : array-like of shape (p,), radians; t = 1 acts first
    plan : chunk plan (default: :func:`plan_chunks` for p)
    run_pass : executor of one pass (default: in-process loop)
    gradient : also compute dV/dgamma, dV/dbeta by reverse mode
    fixed_point_check : run one extra forward pass and report max|G_{p+1} - G_p|
    """
    t0 = time.perf_counter()
    g, b = check_angles(gamma, beta)
    p = g.size
    n = 2 * p + 1
    c0 = time0_index(p)
    plan = plan or plan_chunks(p)
    if plan.p != p:
        raise ValueError(f"chunk plan is for p = {plan.p}, angles have p = {p}")
    run_pass = run_pass or run_pass_inprocess
    Gam = gamma_vector(g)
    GG = np.outer(Gam, Gam)

    G = initial_correlations(p, b)
    Gs = [G]
    Ms = []
    sum_w_dev = 0.0
    passes = 0
    for m in range(1, p + 1):
        M = GG * mixture.dxi(Gs[-1])
        Ms.append(M)
        R = run_pass(PassInput(p, M, b), plan)
        passes += 1
        G = R[:n]
        sum_w_dev = max(sum_w_dev, _check_pass(G, p, m))
        Gs.append(G)

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
    if fixed_point_check:
        M = GG * mixture.dxi(Gp)
        R = run_pass(PassInput(p, M, b), plan)
        passes += 1
        _check_pass(R[:n], p, p + 1)
        residuals["fixed_point"] = float(np.max(np.abs(R[:n] - Gp)))

    grad = None
    if gradient:
        grad, nb = _backward(mixture, g, b, Gam, Gs, Ms, plan, run_pass)
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
        plan=plan,
        wall_time=time.perf_counter() - t0,
        passes=passes,
        correlations=Gp,
    )


def _backward(mixture, g, b, Gam, Gs, Ms, plan, run_pass):
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
