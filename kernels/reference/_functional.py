"""Reference energies of a mixture: ground state (GS) and algorithmic threshold (ALG).

Both are infima of one zero-temperature variational functional (Ising spins,
no deterministic field), in the normalization E[H H'] = n xi(R) of
:mod:`leadline.kernels.mixture`; energies are MAXIMUM energy densities
(positive numbers):

    P(gamma) = Psi_gamma(0, 0) - 1/2 int_0^1 t xi''(t) gamma(t) dt,
    d_t Psi = -(xi''(t)/2) (d_xx Psi + gamma(t) (d_x Psi)^2),  Psi(1, x) = |x|.

- GS  = inf over non-decreasing gamma >= 0 (Auffinger, Chen, "Parisi formula
  for the ground state energy in the mixed p-spin model", Ann. Probab. 45 (2017)).
- ALG = inf over gamma >= 0 without monotonicity (El Alaoui, Montanari, Sellke,
  "Optimization of mean-field spin glasses", Ann. Probab. 49 (2021)): the energy
  that incremental approximate message passing reaches. ALG <= GS, with equality
  when there is no overlap gap (SK: Montanari, FOCS 2019).
- A q = 1 term (random field of variance xi'(0)) is one more heat step:
  Psi(0, 0) -> E Psi(0, sqrt(xi'(0)) z).

Step functions gamma = m_i on [q_{i-1}, q_i), 0 = q_0 < ... < q_k = 1, make
the PDE exactly solvable step by step (Cole-Hopf):

    Psi(q_{i-1}, x) = (1/m_i) log E exp(m_i Psi(q_i, x + s_i z)),
    s_i^2 = d_i = xi'(q_i) - xi'(q_{i-1}),  z ~ N(0, 1),

with the last step in closed form (log Phi = scipy.special.log_ndtr)

    log E exp(m |x + s z|) = logaddexp(m x + m^2 s^2/2 + log Phi(x/s + m s),
                                      -m x + m^2 s^2/2 + log Phi(-x/s + m s)),

and the penalty 1/2 sum_i m_i [theta(q_i) - theta(q_{i-1})], theta(t) = t xi'(t) - xi(t).
Earlier steps live on a uniform grid x >= 0 (Psi is even in x), use
Gauss-Hermite quadrature in z, 4-point Lagrange interpolation between grid
points, the exact linear asymptote Psi ~ |x| + const beyond the grid, and
log-sum-exp throughout.  The gradient with respect to the variance increments
d_i and the values m_i is computed by a reverse (adjoint) sweep through the
same recursion, so an optimizer step costs about two evaluations.

Internally the mixture is rescaled to xi'(1) = 1 (exact law: xi -> c xi
multiplies P, GS and ALG by sqrt(c) when m -> m / sqrt(c)), so one grid fits
every mixture.  Numbers in the results are in the caller's units.

No I/O here: caching lives in ``leadline.jobs.reference_cache``.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy.optimize import brentq, minimize
from scipy.special import log_ndtr, logsumexp

from ..mixture import Mixture, parse_mixture

__all__ = [
    "Discretization",
    "ReferenceValue",
    "References",
    "algorithmic_threshold",
    "extrapolate_in_steps",
    "ground_state",
    "reference_energies",
    "ReferenceRangeError",
    "check_physical",
    "step_functional",
    "METHOD_VERSION",
]

#: Bumped whenever a change could alter the numbers; part of every cache key.
METHOD_VERSION = 1

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
#: Smallest value m allowed (units of 1/sqrt(xi'(1))): m -> 0 is a plain heat step,
#: and a floor of 1e-6 changes P by at most ~1e-6 * xi'(1)^(1/2) while keeping
#: (1/m) log E exp(m F) accurate to ~1e-10.
_M_FLOOR = 1e-6
_M_CEILING = 1e4


# --------------------------------------------------------------------------- grid
@dataclass(frozen=True)
class Discretization:
    """Numerical resolution of the recursion.

    Every intermediate Psi(q_i, .) is stored as |x| + c_i + eps_i(x), with
    eps_i >= 0 even and decaying like a Gaussian of width sigma_i =
    sqrt(xi'(1) - xi'(q_i)) (its own smoothing width), on the grid
    x = sigma_i * u, u = 0, du, ..., u_max.  Storing eps on a grid scaled to
    its own width keeps every step equally well resolved however narrow
    the last steps of gamma get.

    grid_step        : du (units of sigma_i); cubic Lagrange interpolation
    grid_range       : u_max; eps is taken as 0 beyond (it is < 1e-25 there)
    quadrature_nodes : Gauss-Hermite nodes for a step whose Gaussian is narrow
                       compared with the kink of the next function
    kink_nodes       : Gauss-Legendre nodes on [0, u_max sigma] for a step whose
                       Gaussian is wide compared with the kink (the |x| part is
                       then integrated in closed form, only eps numerically)
    """

    grid_step: float = 0.04
    grid_range: float = 12.0
    quadrature_nodes: int = 48
    kink_nodes: int = 48

    def __post_init__(self) -> None:
        if not (0 < self.grid_step < self.grid_range):
            raise ValueError("need 0 < grid_step < grid_range")
        if self.quadrature_nodes < 4 or self.kink_nodes < 4:
            raise ValueError("need at least 4 quadrature nodes")

    def to_json(self) -> dict:
        return asdict(self)


#: A finer resolution, used to re-evaluate final answers (numerical error check).
FINE = Discretization(grid_step=0.015, grid_range=14.0, quadrature_nodes=96, kink_nodes=96)
#: A coarse resolution for quick property checks.
COARSE = Discretization(grid_step=0.08, grid_range=11.0, quadrature_nodes=32, kink_nodes=32)

# ratio (kink width of the next function) / (width of this step's Gaussian):
# above _RHO_HIGH Gauss-Hermite, below _RHO_LOW kink decomposition, smooth blend between
_RHO_LOW, _RHO_HIGH = 0.6, 0.9


def _hermite_rule(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes z (n,) and log-weights (n,) with sum exp(logw) = 1 for E f(z), z ~ N(0,1)."""
    z, w = np.polynomial.hermite_e.hermegauss(n)
    w = w / w.sum()
    return z, np.log(w)


def _log_abs_moment(x: np.ndarray, m: float, s: float) -> np.ndarray:
    """log E exp(m |x + s z|) in closed form (any real x, m > 0, s > 0)."""
    half = 0.5 * m * m * s * s
    return np.logaddexp(m * x + half + log_ndtr(x / s + m * s), -m * x + half + log_ndtr(-x / s + m * s))


class _Profile:
    """An even function F(y) = |y| + c + eps(|y|) with eps >= 0 of width sigma.

    Either closed form (the last step: eps of (1/m) log E exp(m |y + s z|))
    or grid values eps(sigma * u_l) interpolated by 4-point Lagrange in u.
    """

    def __init__(self, c: float, sigma: float, du: float, eps_grid=None, last=None):
        self.c = c
        self.sigma = sigma
        self.du = du
        self.last = last
        if eps_grid is not None:
            # ghost at u = -du: the smooth continuation of eps(a) = F(a) - a - c to
            # a < 0 is eps(|a|) + 2|a| (F is smooth and even, |a| is not); zeros past the end
            ghost = eps_grid[1] + 2.0 * sigma * du
            self.padded = np.concatenate(([ghost], eps_grid, [0.0, 0.0, 0.0]))
            self.n = eps_grid.size

    def eps(self, a: np.ndarray) -> np.ndarray:
        """eps(a) for a >= 0 (any shape)."""
        if self.last is not None:
            m, s = self.last
            val = (np.logaddexp(log_ndtr(a / s + m * s), -2.0 * m * a + log_ndtr(m * s - a / s))) / m
            return np.maximum(val, 0.0)
        t = a / (self.sigma * self.du)
        g = np.floor(t)
        inside = g < self.n
        g = np.minimum(g, self.n - 1).astype(np.intp)
        r = t - g
        rm1, rm2, rp1 = r - 1.0, r - 2.0, r + 1.0
        P = self.padded
        val = (
            -r * rm1 * rm2 / 6.0 * P[g]
            + rp1 * rm1 * rm2 / 2.0 * P[g + 1]
            - rp1 * r * rm2 / 2.0 * P[g + 2]
            + rp1 * r * rm1 / 6.0 * P[g + 3]
        )
        return np.where(inside, np.maximum(val, 0.0), 0.0)


# ----------------------------------------------------------- the functional itself
class _NormalizedMixture:
    """xi / xi'(1): field variance h2 = xi_n'(0), heat budget V = 1 - h2."""

    def __init__(self, mixture: Mixture):
        self.mixture = mixture
        self.scale = float(mixture.dxi(1.0))  # T = xi'(1)
        self.terms = [(q, w / self.scale) for q, w in mixture.terms]
        self.field_variance = sum(w for q, w in self.terms if q == 1)
        self.budget = 1.0 - self.field_variance

    def dxi(self, t):
        t = np.asarray(t, dtype=float)
        return sum(w * q * t ** (q - 1) for q, w in self.terms) + 0.0 * t

    def xi(self, t):
        t = np.asarray(t, dtype=float)
        return sum(w * t**q for q, w in self.terms) + 0.0 * t

    def theta(self, t):
        """t xi'(t) - xi(t) = int_0^t u xi''(u) du."""
        return t * self.dxi(t) - self.xi(t)

    def overlap_at(self, v: np.ndarray) -> np.ndarray:
        """q with xi_n'(q) - xi_n'(0) = v, for 0 <= v <= budget (vectorized bisection)."""
        v = np.asarray(v, dtype=float)
        lo = np.zeros_like(v)
        hi = np.ones_like(v)
        target = v + self.field_variance
        for _ in range(60):  # xi' is increasing: bisection to ~1e-18
            mid = 0.5 * (lo + hi)
            below = self.dxi(mid) < target
            lo = np.where(below, mid, lo)
            hi = np.where(below, hi, mid)
        return 0.5 * (lo + hi)


def _log_expm1(x: np.ndarray) -> np.ndarray:
    """log(exp(x) - 1) for x >= 0 without overflow (x + log1p(-exp(-x)) for large x); -inf at 0."""
    x = np.asarray(x, dtype=float)
    big = x > 30.0
    with np.errstate(divide="ignore", over="ignore"):
        small = np.log(np.expm1(np.where(big, 0.0, x)))
    return np.where(big, x + np.log1p(-np.exp(-np.where(big, x, 30.0))), small)


class _Recursion:
    """P(d, m) for one normalized mixture: d (k,) variance increments (sum = budget), m (k,) values."""

    def __init__(self, nmix: _NormalizedMixture, disc: Discretization):
        self.nmix = nmix
        self.disc = disc
        self.z, self.logw = _hermite_rule(disc.quadrature_nodes)
        t, w = np.polynomial.legendre.leggauss(disc.kink_nodes)
        self.leg_t = 0.5 * (t + 1.0)  # nodes on [0, 1]
        self.leg_logw = np.log(0.5 * w)
        self.u = disc.grid_step * np.arange(int(round(disc.grid_range / disc.grid_step)) + 1)
        self.evaluations = 0

    # one Cole-Hopf step: (1/m) log E exp(m F(x + s z)) - |x| - c_F - m s^2 / 2 at x >= 0
    def _step_eps(self, F: _Profile, m: float, s: float, x: np.ndarray) -> np.ndarray:
        rho = F.sigma / s
        blend = min(1.0, max(0.0, (rho - _RHO_LOW) / (_RHO_HIGH - _RHO_LOW)))
        blend = blend * blend * (3.0 - 2.0 * blend)  # smoothstep: C1 in the parameters
        out = 0.0
        if blend > 0.0:
            y = np.abs(x[:, None] + s * self.z[None, :])
            A = self.logw[None, :] + m * (y + F.eps(y))
            out = out + blend * (logsumexp(A, axis=1) / m)
        if blend < 1.0:
            L0 = _log_abs_moment(x, m, s)
            ymax = self.disc.grid_range * F.sigma
            y = ymax * self.leg_t
            e = F.eps(y)
            log_core = _log_expm1(m * e) + m * y + self.leg_logw + math.log(ymax)
            # phi_s(y - x) + phi_s(y + x), in logs, for x, y >= 0
            d2 = (y[None, :] - x[:, None]) ** 2 / (2.0 * s * s)
            log_pair = -d2 - math.log(s) - _LOG_SQRT_2PI + np.log1p(np.exp(-2.0 * x[:, None] * y[None, :] / (s * s)))
            logJ = logsumexp(log_core[None, :] + log_pair, axis=1)
            out = out + (1.0 - blend) * (np.logaddexp(L0, logJ) / m)
        return out - np.abs(x) - 0.5 * m * s * s

    def _heat_mean(self, F: _Profile, h: float) -> float:
        """E F(h z) - c_F for the random-field heat step (z ~ N(0, 1))."""
        rho = F.sigma / h
        blend = min(1.0, max(0.0, (rho - _RHO_LOW) / (_RHO_HIGH - _RHO_LOW)))
        blend = blend * blend * (3.0 - 2.0 * blend)
        out = 0.0
        if blend > 0.0:  # |y| + eps(|y|) is smooth: Gauss-Hermite on the sum
            y = np.abs(h * self.z)
            out += blend * float(np.exp(self.logw) @ (y + F.eps(y)))
        if blend < 1.0:  # E|h z| in closed form, eps (width << h) by Gauss-Legendre
            out += (1.0 - blend) * h * math.sqrt(2.0 / math.pi)
            ymax = self.disc.grid_range * F.sigma
            y = ymax * self.leg_t
            dens = 2.0 * np.exp(-0.5 * (y / h) ** 2 - _LOG_SQRT_2PI) / h
            out += (1.0 - blend) * float(np.exp(self.leg_logw) @ (dens * F.eps(y))) * ymax
        return out

    def _profiles_below(self, d, m, start: int, above: _Profile | None) -> float:
        """Run steps start, start-1, ..., 0 (0-based) from the profile of Psi(q_{start+1}, .).

        Returns Psi(0, .) averaged over the random field; fills self._last_profiles.
        """
        du = self.disc.grid_step
        h2 = self.nmix.field_variance
        k = len(m)
        profiles = self._last_profiles
        F = above
        for i in range(start, -1, -1):
            s_i = math.sqrt(d[i])
            if i == k - 1:
                F = _Profile(0.5 * m[i] * d[i], s_i, du, last=(m[i], s_i))
                if i == 0 and h2 <= 0.0:
                    return float(F.c + F.eps(np.zeros(1))[0])
            else:
                c = F.c + 0.5 * m[i] * d[i]
                if i == 0 and h2 <= 0.0:
                    return float(c + self._step_eps(F, m[i], s_i, np.zeros(1))[0])
                sigma = math.sqrt(F.sigma * F.sigma + d[i])
                eps = np.maximum(self._step_eps(F, m[i], s_i, sigma * self.u), 0.0)
                F = _Profile(c, sigma, du, eps_grid=eps)
            profiles[i] = F
        return float(F.c + self._heat_mean(F, math.sqrt(h2)))

    def psi0(self, d: np.ndarray, m: np.ndarray) -> float:
        """Psi(0, .) averaged over the random field (k = len(m) steps).

        d : (k,) variance increments xi_n'(q_i) - xi_n'(q_{i-1}); m : (k,) values.
        """
        self.evaluations += 1
        self._last_profiles = [None] * len(m)
        return self._profiles_below(np.asarray(d, float), np.asarray(m, float), len(m) - 1, None)

    def psi0_and_gradient(self, d: np.ndarray, m: np.ndarray, rel_step: float = 1e-5):
        """Psi0 and its central-difference gradient in d and m, (k,) each.

        A change of d_j or m_j only affects Psi(q_i, .) for i <= j, so the
        profiles above step j are reused: a full gradient costs about k + 1
        evaluations instead of 4k.
        """
        d = np.asarray(d, float).copy()
        m = np.asarray(m, float).copy()
        k = len(m)
        base = self.psi0(d, m)
        cached = list(self._last_profiles)
        grads = []
        for arr in (d, m):
            g = np.zeros(k)
            for j in range(k):
                above = cached[j + 1] if j + 1 < k else None
                step = rel_step * arr[j]
                keep = arr[j]
                vals = []
                for sign in (1.0, -1.0):
                    arr[j] = keep + sign * step
                    self._last_profiles = [None] * k
                    vals.append(self._profiles_below(d, m, j, above))
                arr[j] = keep
                g[j] = (vals[0] - vals[1]) / (2.0 * step)
            grads.append(g)
        self.evaluations += k  # about k + 1 evaluations' worth of steps
        return base, grads[0], grads[1]

    def penalty(self, d: np.ndarray, m: np.ndarray):
        """1/2 sum m_i [theta(q_i) - theta(q_{i-1})]; also the breakpoints q (k-1,)."""
        v = np.cumsum(d)[:-1]
        q = self.nmix.overlap_at(np.clip(v, 0.0, self.nmix.budget))
        theta = np.concatenate(([0.0], self.nmix.theta(q), [self.nmix.theta(1.0)]))
        return 0.5 * float(m @ np.diff(theta)), q

    def penalty_gradient(self, d: np.ndarray, m: np.ndarray):
        """d(penalty)/dd and d(penalty)/dm, (k,) each (d theta / d v = q)."""
        value, q = self.penalty(d, m)
        theta = np.concatenate(([0.0], self.nmix.theta(q), [self.nmix.theta(1.0)]))
        grad_m = 0.5 * np.diff(theta)
        grad_v = 0.5 * (m[:-1] - m[1:]) * q
        grad_d = np.zeros(len(m))
        grad_d[:-1] = np.cumsum(grad_v[::-1])[::-1]
        return value, grad_d, grad_m

    def functional(self, d: np.ndarray, m: np.ndarray) -> float:
        return self.psi0(d, m) - self.penalty(d, m)[0]

    def functional_and_gradient(self, d: np.ndarray, m: np.ndarray):
        psi, gd, gm = self.psi0_and_gradient(d, m)
        pen, pd, pm = self.penalty_gradient(np.asarray(d, float), np.asarray(m, float))
        return psi - pen, gd - pd, gm - pm


def step_functional(
    mixture: Mixture | str,
    breakpoints,
    values,
    discretization: Discretization | None = None,
) -> float:
    """P(gamma) for the step function gamma = values[i] on [q_i, q_{i+1}).

    mixture     : Mixture or spec string (E[H H'] = n xi(R))
    breakpoints : (k-1,) increasing overlaps in (0, 1): q_1 < ... < q_{k-1}
    values      : (k,) positive values m_1..m_k of gamma (caller's units)
    Returns the functional value (an upper bound on GS when values are
    non-decreasing, Auffinger-Chen 2017).
    """
    mix = parse_mixture(mixture) if isinstance(mixture, str) else mixture
    nmix = _NormalizedMixture(mix)
    q = np.concatenate(([0.0], np.asarray(breakpoints, dtype=float), [1.0]))
    m = np.asarray(values, dtype=float)
    if len(m) != len(q) - 1 or np.any(np.diff(q) < 0) or np.any(m <= 0):
        raise ValueError("need k positive values and k-1 increasing breakpoints in (0, 1)")
    d = np.diff(nmix.dxi(q))
    rec = _Recursion(nmix, discretization or Discretization())
    root = math.sqrt(nmix.scale)
    value = rec.functional(d, m * root)
    return value * root


# ------------------------------------------------------------------ minimization
class _StepProblem:
    """The functional as a function of L-BFGS-B variables.

    x = (u_1..u_k, a_1..a_k): variance increments d = V softmax(u) (V the heat
    budget 1 - xi_n'(0)), and values m = floor + cumsum(a) (non-decreasing,
    GS) or m = floor + a (free, ALG), with box bounds 0 <= a.
    """

    def __init__(self, rec: _Recursion, monotone: bool):
        self.rec = rec
        self.monotone = monotone
        self.budget = rec.nmix.budget

    def unpack(self, x: np.ndarray):
        k = x.size // 2
        u = x[:k] - x[:k].max()
        e = np.exp(u)
        d = self.budget * (1e-12 + e / e.sum()) / (1.0 + k * 1e-12)
        a = x[k:]
        m = _M_FLOOR + (np.cumsum(a) if self.monotone else a)
        return d, m

    def pack(self, d: np.ndarray, m: np.ndarray) -> np.ndarray:
        u = np.log(np.maximum(d, 1e-300))
        a = np.asarray(m, float) - _M_FLOOR
        if self.monotone:
            a = np.diff(a, prepend=0.0)
        return np.concatenate((u, np.maximum(a, 0.0)))

    def __call__(self, x: np.ndarray):
        k = x.size // 2
        d, m = self.unpack(x)
        val, gd, gm = self.rec.functional_and_gradient(d, m)
        p = d / d.sum()
        grad_u = d * gd - p * (d @ gd)
        grad_a = np.cumsum(gm[::-1])[::-1] if self.monotone else gm
        return val, np.concatenate((grad_u, grad_a))

    def minimize(self, x0: np.ndarray, maxiter: int = 400):
        k = x0.size // 2
        bounds = [(None, None)] * k + [(0.0, _M_CEILING)] * k
        return minimize(
            self, x0, jac=True, method="L-BFGS-B", bounds=bounds,
            options={"maxiter": maxiter, "ftol": 1e-13, "gtol": 1e-8, "maxcor": 20},
        )


def _split_starts(problem: _StepProblem, d: np.ndarray, m: np.ndarray) -> list[np.ndarray]:
    """Starts with k+1 steps and the same gamma: step j cut into two halves of variance."""
    starts = []
    for j in range(len(d)):
        d_new = np.concatenate((d[:j], [d[j] / 2, d[j] / 2], d[j + 1 :]))
        m_new = np.concatenate((m[: j + 1], m[j:]))
        starts.append(problem.pack(d_new, m_new))
    return starts


def _candidate_starts(problem: _StepProblem, x: np.ndarray) -> list[np.ndarray]:
    """Starts at k+1 steps from the optimum x at k steps.

    Exact splits (same gamma) of every step, and the same splits with the upper
    half's value raised by half (the direction an extra level of replica symmetry
    breaking opens, which an exact split sees only at second order).
    """
    d, m = problem.unpack(x)
    starts = _split_starts(problem, d, m)
    for j in range(len(d)):
        d_new = np.concatenate((d[:j], [d[j] / 2, d[j] / 2], d[j + 1 :]))
        m_new = np.concatenate((m[: j + 1], m[j:]))
        m_new[j + 1 :] = m_new[j + 1 :] + 0.5 * m[j]
        starts.append(problem.pack(d_new, m_new))
    return starts


def extrapolate_in_steps(values) -> tuple[float, float, str]:
    """Limit k -> infinity of the minima v_k at k = 1..K steps, and an uncertainty.

    Fits v_k = v_inf + A k^(-a) through the last three values (a is solved for,
    within [0.5, 12]); the uncertainty is the larger of |v_K - v_inf| and the
    change of v_inf against the fit through the previous three.  Without a
    usable fit: v_K and the last change.  Returns (value, uncertainty, method).
    """
    v = [float(x) for x in values]
    K = len(v)
    if K == 1:
        return v[0], float("inf"), "single step count"

    def fit(k3: int):  # through steps k3-2, k3-1, k3 (1-based)
        a_, b_, c_ = v[k3 - 3], v[k3 - 2], v[k3 - 1]
        d1, d2 = b_ - a_, c_ - b_
        if not (d1 < 0 and d2 <= 0 and abs(d2) < abs(d1)):
            return None
        if d2 == 0:
            return c_
        ratio = d2 / d1

        def r(a):
            return (k3**-a - (k3 - 1) ** -a) / ((k3 - 1) ** -a - (k3 - 2) ** -a) - ratio

        lo, hi = 0.5, 12.0
        if r(lo) * r(hi) > 0:
            return None
        a = brentq(r, lo, hi)
        amp = d2 / (k3**-a - (k3 - 1) ** -a)
        return c_ - amp * k3**-a

    last_change = abs(v[-1] - v[-2])
    if K >= 3:
        v_inf = fit(K)
        if v_inf is not None:
            unc = abs(v[-1] - v_inf)
            prev = fit(K - 1) if K >= 4 else None
            if prev is not None:
                unc = max(unc, abs(v_inf - prev))
            # never claim less than half the last change: the fit assumes the
            # minima at every k were found, which a local optimizer cannot promise
            return v_inf, max(unc, 0.5 * last_change, 1e-9), "power law in k through the last three step counts"
    return v[-1], last_change, "last value (no power-law fit)"


def _seconds_named(record: dict) -> dict:
    """JSON names carry the unit of a plain number of seconds (``wall_time_s``)."""
    record = dict(record)
    if "wall_time" in record:
        record["wall_time_s"] = record.pop("wall_time")
    return record


def _seconds_read(data: dict) -> dict:
    """The dataclass fields from JSON written by this release (``wall_time_s``) or an older one."""
    data = dict(data)
    if "wall_time_s" in data:
        data["wall_time"] = data.pop("wall_time_s")
    return data


@dataclass
class ReferenceValue:
    """One reference energy (maximum energy density, caller's units of xi).

    kind           : "ground_state" or "algorithmic_threshold"
    value          : k -> infinity estimate (see :func:`extrapolate_in_steps`)
    uncertainty    : its uncertainty (includes the numerical error estimate)
    best_bound     : the smallest value at finite k (for GS a rigorous upper bound
                     on the ground state up to the numerical error)
    k_sequence     : minima at k = 1, 2, ... steps
    breakpoints    : (k-1,) overlaps q_i of the best step function
    gamma_values   : (k,) its values m_i (units 1 / energy)
    numerical_error: |P(default grid) - P(fine grid)| at the best step function
    converged      : True when the last change in k was below ``tolerance``
    """

    kind: str
    value: float
    uncertainty: float
    best_bound: float
    k_sequence: list
    breakpoints: list
    gamma_values: list
    numerical_error: float
    converged: bool
    tolerance: float
    method: str
    evaluations: int = 0
    wall_time: float = 0.0

    @property
    def steps(self) -> int:
        return len(self.k_sequence)

    def to_json(self) -> dict:
        return _seconds_named(asdict(self))

    @classmethod
    def from_json(cls, data: dict) -> "ReferenceValue":
        return cls(**_seconds_read(data))


def _exact_field_only(nmix: _NormalizedMixture, kind: str, tol: float) -> ReferenceValue:
    # xi = w x: independent spins in a Gaussian field, energy E|h z| = sqrt(2 w / pi)
    value = math.sqrt(2.0 * nmix.scale / math.pi)
    return ReferenceValue(kind, value, 0.0, value, [value], [], [], 0.0, True, tol, "exact (field only)")


def _minimize_over_steps(
    mixture: Mixture,
    monotone: bool,
    tol: float,
    max_steps: int,
    min_steps: int,
    discretization: Discretization,
    search: Discretization,
    tries: int,
) -> ReferenceValue:
    kind = "ground_state" if monotone else "algorithmic_threshold"
    t0 = time.perf_counter()
    nmix = _NormalizedMixture(mixture)
    if nmix.budget <= 1e-14:
        return _exact_field_only(nmix, kind, tol)
    root = math.sqrt(nmix.scale)
    rec_search = _Recursion(nmix, search)
    rec_report = _Recursion(nmix, discretization)
    problem = _StepProblem(rec_search, monotone)
    res = problem.minimize(problem.pack(np.array([nmix.budget]), np.array([1.0])))
    x = res.x
    sequence = [rec_report.functional(*problem.unpack(x)) * root]
    converged = False
    for k in range(2, max_steps + 1):
        starts = _candidate_starts(problem, x)
        exact, nudged = starts[: k - 1], starts[k - 1 :]
        # the exact split whose new direction pulls hardest, and the best nudged ones
        chosen = [exact[int(np.argmax([np.linalg.norm(problem(s)[1]) for s in exact]))]]
        nudged_values = [rec_search.functional(*problem.unpack(s)) for s in nudged]
        chosen += [nudged[j] for j in np.argsort(nudged_values)[: max(1, tries - 1)]]
        best = None
        for start in chosen:
            r = problem.minimize(start)
            if best is None or r.fun < best.fun:
                best = r
        x = best.x
        value = rec_report.functional(*problem.unpack(x)) * root
        sequence.append(min(value, sequence[-1]))
        if k >= min_steps and sequence[-2] - sequence[-1] < tol:
            converged = True
            break
    d, m = problem.unpack(x)
    fine = _Recursion(nmix, FINE).functional(d, m) * root
    numerical_error = abs(fine - rec_report.functional(d, m) * root)
    value, unc, method = extrapolate_in_steps(sequence)
    _, q = rec_report.penalty(d, m)
    return ReferenceValue(
        kind=kind,
        value=float(value),
        uncertainty=float(unc + numerical_error),
        best_bound=float(sequence[-1]),
        k_sequence=[float(v) for v in sequence],
        breakpoints=[float(t) for t in q],
        gamma_values=[float(t) for t in m / root],
        numerical_error=float(numerical_error),
        converged=converged,
        tolerance=float(tol),
        method=method,
        evaluations=rec_search.evaluations + rec_report.evaluations,
        wall_time=time.perf_counter() - t0,
    )


def _as_mixture(mixture) -> Mixture:
    return parse_mixture(mixture) if isinstance(mixture, str) else mixture


def ground_state(
    mixture: Mixture | str,
    tol: float = 1e-4,
    *,
    max_steps: int = 10,
    min_steps: int = 3,
    discretization: Discretization | None = None,
    search: Discretization | None = None,
    tries: int = 2,
) -> ReferenceValue:
    """Ground-state energy density max_z H(z)/n (Auffinger-Chen 2017 formula).

    mixture : Mixture or spec string, E[H H'] = n xi(R); SK "2:0.5" -> 0.763166.
    tol     : raise the number of steps k until the minimum moves by less than tol.
    discretization / search : grids for reported values / for the optimizer
              (defaults: Discretization() and COARSE).
    """
    return _minimize_over_steps(
        _as_mixture(mixture), True, tol, max_steps, min_steps,
        discretization or Discretization(), search or COARSE, tries,
    )


def algorithmic_threshold(
    mixture: Mixture | str,
    tol: float = 1e-3,
    *,
    max_steps: int = 8,
    min_steps: int = 3,
    discretization: Discretization | None = None,
    search: Discretization | None = None,
    tries: int = 2,
) -> ReferenceValue:
    """Energy reached by incremental AMP (El Alaoui-Montanari-Sellke 2021): inf over free gamma.

    Same arguments as :func:`ground_state`.
    """
    return _minimize_over_steps(
        _as_mixture(mixture), False, tol, max_steps, min_steps,
        discretization or Discretization(), search or COARSE, tries,
    )


@dataclass
class References:
    """Both reference energies of one mixture (what the CLI prints and stores cache).

    overlap_gap : True when ALG < GS by more than the sum of both uncertainties
                  (then incremental AMP provably falls short of the ground state).
    """

    xi: str
    ground_state: float
    ground_state_uncertainty: float
    algorithmic_threshold: float
    algorithmic_threshold_uncertainty: float
    ground_state_k_sequence: list
    algorithmic_threshold_k_sequence: list
    overlap_gap: bool
    wall_time: float
    details: dict = field(default_factory=dict)
    method_version: int = METHOD_VERSION

    def to_json(self) -> dict:
        out = _seconds_named(asdict(self))
        out["details"] = {k: _seconds_named(v) if isinstance(v, dict) and "wall_time" in v else v
                          for k, v in out["details"].items()}
        return out

    @classmethod
    def from_json(cls, data: dict) -> "References":
        return cls(**_seconds_read(data))


def reference_energies(
    mixture: Mixture | str,
    *,
    gs_tol: float = 1e-4,
    alg_tol: float = 1e-3,
    max_steps: int = 10,
    discretization: Discretization | None = None,
) -> References:
    """GS and ALG of one mixture, with uncertainties and the overlap-gap verdict.

    Both scale exactly with the mixture, GS(c xi) = sqrt(c) GS(xi) and the same for ALG
    (the cost of c xi is sqrt(c) H), so a mixture with xi(1) outside [2^-6, 2^6] is computed as
    its normal form xi / 4^k (:meth:`Mixture.normal_form`) and the energies are multiplied by
    2^k; the tolerances then apply to the normal form.  Raises :class:`ReferenceRangeError`
    when the result is not physical (a value outside (0, sqrt(2 ln 2 xi(1))], a non-finite
    uncertainty): the functional's numerics failed for this mixture and nothing is returned.
    """
    mix = _as_mixture(mixture)
    k, normal = mix.normal_form()
    if k:
        refs = reference_energies(normal, gs_tol=gs_tol, alg_tol=alg_tol, max_steps=max_steps,
                                  discretization=discretization)
        return _rescaled(refs, mix, k)
    refs = _reference_energies(mix, gs_tol, alg_tol, max_steps, discretization)
    check_physical(refs, mix)
    return refs


class ReferenceRangeError(ValueError):
    """The variational functional gave a value that cannot be a reference energy (numerics failed)."""


def check_physical(refs: "References", mix: Mixture) -> None:
    """Refuse (ReferenceRangeError) what cannot be GS or ALG: 0 < ALG <= GS <= sqrt(2 ln 2 xi(1))."""
    top = math.sqrt(2.0 * math.log(2.0) * float(mix.xi(1.0)))
    for name, value, unc, seq in (
        ("ground state", refs.ground_state, refs.ground_state_uncertainty, refs.ground_state_k_sequence),
        ("algorithmic threshold", refs.algorithmic_threshold, refs.algorithmic_threshold_uncertainty,
         refs.algorithmic_threshold_k_sequence),
    ):
        bad = [v for v in [value, *seq] if not (math.isfinite(v) and 0.0 < v <= top * (1.0 + 1e-9) + abs(unc))]
        if bad or not (math.isfinite(unc) and unc < value):
            shown = bad[0] if bad else value
            raise ReferenceRangeError(
                f"the variational functional fails for xi = {mix.spec()}: its {name} came out as {shown:.6g} "
                f"+- {unc:.2g}, outside (0, {top:.6g}] (0 < ALG <= GS <= sqrt(2 ln 2 xi(1))); "
                "no reference energies for this mixture (large powers q make the step functional's "
                "exponentials leave the double range)"
            )


def _rescaled(refs: "References", mix: Mixture, k: int) -> "References":
    """References of xi / 4^k -> those of xi: energies times 2^k, the functional's gamma values / 2^k."""
    def up(x):
        return math.ldexp(float(x), k)

    def details(d: dict) -> dict:
        d = dict(d)
        for key in ("value", "uncertainty", "best_bound", "numerical_error"):
            if key in d:
                d[key] = up(d[key])
        if "k_sequence" in d:
            d["k_sequence"] = [up(v) for v in d["k_sequence"]]
        if "gamma_values" in d:
            d["gamma_values"] = [math.ldexp(float(v), -k) for v in d["gamma_values"]]
        return d

    info = dict(refs.details)
    for key in ("ground_state", "algorithmic_threshold"):
        if key in info:
            info[key] = details(info[key])
    info["scaling"] = {"computed_for": refs.xi, "factor": up(1.0),
                       "law": "GS(c xi) = sqrt(c) GS(xi); tolerances apply to the mixture computed for"}
    return References(
        xi=mix.spec(),
        ground_state=up(refs.ground_state),
        ground_state_uncertainty=up(refs.ground_state_uncertainty),
        algorithmic_threshold=up(refs.algorithmic_threshold),
        algorithmic_threshold_uncertainty=up(refs.algorithmic_threshold_uncertainty),
        ground_state_k_sequence=[up(v) for v in refs.ground_state_k_sequence],
        algorithmic_threshold_k_sequence=[up(v) for v in refs.algorithmic_threshold_k_sequence],
        overlap_gap=refs.overlap_gap,
        wall_time=refs.wall_time,
        details=info,
        method_version=refs.method_version,
    )


def _reference_energies(mix: Mixture, gs_tol, alg_tol, max_steps, discretization) -> "References":
    t0 = time.perf_counter()
    gs = ground_state(mix, gs_tol, max_steps=max_steps, discretization=discretization)
    alg = algorithmic_threshold(mix, alg_tol, max_steps=max_steps, discretization=discretization)
    # ALG <= GS holds exactly (a larger class of gamma); finite-k minima can invert it
    # only within their uncertainties
    alg_value = min(alg.value, gs.value + gs.uncertainty)
    gap = alg_value < gs.value - (gs.uncertainty + alg.uncertainty)
    return References(
        xi=mix.spec(),
        ground_state=gs.value,
        ground_state_uncertainty=gs.uncertainty,
        algorithmic_threshold=alg_value,
        algorithmic_threshold_uncertainty=alg.uncertainty,
        ground_state_k_sequence=gs.k_sequence,
        algorithmic_threshold_k_sequence=alg.k_sequence,
        overlap_gap=bool(gap),
        wall_time=time.perf_counter() - t0,
        details={
            "ground_state": gs.to_json(),
            "algorithmic_threshold": alg.to_json(),
            "tolerances": {"ground_state": gs_tol, "algorithmic_threshold": alg_tol, "max_steps": max_steps},
            "discretization": (discretization or Discretization()).to_json(),
        },
    )
