"""Extrapolation of the optimal QAOA energy V_p* to large depth, with back-tests.

Pure numerics (numpy; scipy.optimize imported inside the one fit that needs it):
no I/O.  Energies are energy densities per spin (dimensionless, the tool's
normalization E[H(z)H(z')] = n xi(R); larger is better).

Fit families (each over several windows "the last k finished depths"):

* ``poly1``, ``poly2``, ``poly3``: polynomials in x = 1/p of degree 1, 2, 3,
  V(p) = c_0 + c_1/p + ... + c_d/p^d; V_inf = c_0.  They can represent only
  corrections in integer powers of 1/p: a gap decaying like p^(-alpha) with
  alpha < 1 makes them biased low.
* ``power``: V(p) = V_inf - A p^(-alpha) with V_inf, A, alpha all free (a
  power-law approach to the limit, the form behind the depth scaling
  p ~ eps^(-1.13) reported for SK by Boulebnane et al., arXiv:2505.07929
  (2025)).  Fitted by variable projection: for fixed alpha the model is linear
  in (V_inf, A); the residual is minimized over alpha (grid, then bounded
  Brent).  On short series it tends to be biased high.
* ``power-gs``: V(p) = GS - A p^(-alpha), the power law anchored at a known
  ground-state energy GS (the conjecture V_p* -> GS, as for SK); V_inf = GS by
  assumption, not by fit.  Only when GS is known.

Back-test (every family and window): the last ``h`` depths are held out, the
same family with the same window size k is fitted to the k depths just before
them, and its predictions at the held-out depths are compared with V_p*.  The
back-test error is the largest absolute prediction error.  A fit passes when
its error is at most max(``PASS_GAIN_FRACTION`` x the rise of V_p* over the
held-out depths, ``PASS_BEST_FACTOR`` x the smallest error of any fit).

A fit is unphysical when its curve beyond the last depth rises above an upper
bound on any energy density: the lower of the ground state GS (plus its
uncertainty), when known, and a given rigorous bound (the first-moment bound).  Unphysical fits are reported and flagged,
never used in the headline.

Headline (for V_inf, V at a given depth, the depth reaching a level): over the
fits that pass the back-test and are physical ("used"), the central value is the
median over families of each family's best back-tested window, and the range
is the smallest and largest value over all used fits (every family, every
window), each fit's value widened by +- ``SE_FACTOR`` least-squares standard
errors (the noise in V_p* propagated through the fit; for a depth, through
the slope of the fitted curve), and for V cut at the upper bound (GS) when
one is known.  The range shows how much the answer depends on the choice among
fits that predicted the held-out depths well; it is not a confidence interval
and not a bound.

Every result is a plain object with ``to_json()`` (no inf/nan: None instead).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np

__all__ = [
    "ESTIMATE_NOTE",
    "SPREAD_MEANING",
    "FAMILIES",
    "Family",
    "Fit",
    "Backtest",
    "WindowFit",
    "Estimate",
    "LevelEstimate",
    "Extrapolation",
    "fit_family",
    "fit_polynomial",
    "fit_power_law",
    "fit_anchored_power_law",
    "default_holdout",
    "extrapolate",
    "depth_for_ratio",
]

ESTIMATE_NOTE = (
    "Extrapolations to p -> infinity and predicted depths are estimates from a finite number of "
    "depths, not bounds: the spread across fit families measures how much the answer depends on "
    "the fit, not a guaranteed error."
)

SPREAD_MEANING = (
    "The range is the spread of the predictions of every fit family and window that predicted the "
    "held-out depths well (back-test) and stays physical: it shows how much the answer depends on "
    "the choice of fit, it is not a confidence interval or a bound, and the truth can lie outside "
    "it if V_p* changes behaviour beyond the computed depths."
)

DEFAULT_TARGET_RATIOS = (0.95, 0.99)
PASS_GAIN_FRACTION = 0.1
PASS_BEST_FACTOR = 3.0
EXTRA_WINDOWS = 3  # windows k = n_params + 1 .. n_params + 1 + EXTRA_WINDOWS
ALPHA_RANGE = (0.05, 6.0)  # exponents the free power law may take
SE_FACTOR = 2.0  # each used fit spans its value +- 2 least-squares standard errors in a range


@dataclass(frozen=True)
class Family:
    name: str
    description: str
    n_params: int
    needs_ground_state: bool = False


FAMILIES = {
    "poly1": Family("poly1", "polynomial in 1/p, degree 1", 2),
    "poly2": Family("poly2", "polynomial in 1/p, degree 2", 3),
    "poly3": Family("poly3", "polynomial in 1/p, degree 3", 4),
    "power": Family("power", "V_inf - A p^-alpha, V_inf free", 3),
    "power-gs": Family("power-gs", "GS - A p^-alpha, anchored at the ground state", 2, True),
}


def _clean(x: float | None) -> float | None:
    """float(x) if finite, else None (JSON has no inf/nan)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _as_series(depths: Sequence[int], values: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(depths, dtype=float)
    v = np.asarray(values, dtype=float)
    if p.ndim != 1 or p.shape != v.shape:
        raise ValueError(f"depths and values must be 1-d of equal length, got {p.shape} and {v.shape}")
    if np.any(p < 1) or np.any(p != np.round(p)):
        raise ValueError("depths must be integers >= 1")
    if not np.all(np.isfinite(v)):
        raise ValueError("values must be finite")
    order = np.argsort(p)
    p, v = p[order], v[order]
    if np.any(np.diff(p) == 0):
        raise ValueError("depths must be distinct")
    return p, v


# --------------------------------------------------------------------- fits
@dataclass(frozen=True)
class Fit:
    """One family fitted to one window of depths.

    Attributes
    ----------
    family : str
        A key of :data:`FAMILIES`.
    depths : tuple of int
        The depths fitted, ascending.
    params : tuple of float
        poly*: coefficients c_0..c_d in ascending powers of 1/p;
        power / power-gs: (V_inf, A, alpha) (for power-gs V_inf is the given GS).
    rms_residual : float
        Root-mean-square residual of V over the fitted depths.
    """

    family: str
    depths: tuple[int, ...]
    params: tuple[float, ...]
    rms_residual: float

    @property
    def k(self) -> int:
        return len(self.depths)

    @property
    def is_polynomial(self) -> bool:
        return self.family.startswith("poly")

    @property
    def limit(self) -> float:
        """V_inf: the fitted curve at 1/p = 0."""
        return float(self.params[0])

    def predict(self, depth) -> np.ndarray | float:
        """The fitted V at depth(s) p (any real p > 0; p = inf gives V_inf)."""
        p = np.asarray(depth, dtype=float)
        with np.errstate(divide="ignore"):
            x = np.where(np.isinf(p), 0.0, 1.0 / p)
        if self.is_polynomial:
            out = np.polynomial.polynomial.polyval(x, np.asarray(self.params))
        else:
            v_inf, amp, alpha = self.params
            out = v_inf - amp * x**alpha
        return out if np.ndim(out) else float(out)

    @property
    def n_params(self) -> int:
        """Number of fitted parameters (GS of power-gs is given, not fitted)."""
        return FAMILIES[self.family].n_params

    def gradient(self, depth) -> np.ndarray:
        """d V(p) / d (fitted parameters), one row per depth (shape (len(depth), n_params))."""
        p = np.atleast_1d(np.asarray(depth, dtype=float))
        with np.errstate(divide="ignore"):
            x = np.where(np.isinf(p), 0.0, 1.0 / p)
        if self.is_polynomial:
            return np.vander(x, len(self.params), increasing=True)
        _, amp, alpha = self.params
        xa = x**alpha
        with np.errstate(divide="ignore", invalid="ignore"):
            dalpha = np.where(x > 0, amp * xa * np.log(np.where(x > 0, 1.0 / x, 1.0)), 0.0)
        cols = [-xa, dalpha]  # d/dA, d/dalpha
        if self.family == "power":
            cols.insert(0, np.ones_like(x))  # d/dV_inf
        return np.column_stack(cols)

    def standard_error(self, depth) -> float:
        """Least-squares standard error of the fitted V at ``depth`` (p = inf: of V_inf).

        Linearized propagation (common practice for nonlinear least squares):
        se = sigma ||g(p)^T J^+||, J the parameter derivatives at the fitted
        depths, g(p) those at ``depth``, sigma the residual standard deviation
        rms * sqrt(k / (k - n_params)).  Zero for V_inf of power-gs (GS is given).
        """
        dof = self.k - self.n_params
        if dof <= 0:
            return 0.0
        sigma = self.rms_residual * math.sqrt(self.k / dof)
        jac = self.gradient(np.asarray(self.depths, dtype=float))
        sens = self.gradient(depth) @ np.linalg.pinv(jac)
        return float(sigma * np.linalg.norm(sens[0]))

    def peak_beyond(self, depth: float) -> float:
        """Largest fitted V for p >= ``depth`` (sampled in 1/p; exact for the power laws)."""
        if not self.is_polynomial:
            return float(max(self.predict(depth), self.limit))  # monotone in p
        xs = np.linspace(0.0, 1.0 / depth, 401)
        return float(np.max(np.polynomial.polynomial.polyval(xs, np.asarray(self.params))))

    def depth_reaching(self, level: float) -> float | None:
        """Smallest real depth p >= max(depths) where the fitted curve reaches ``level``.

        Returns max(depths) when the curve is already at or above the level
        there, None when it stays below the level all the way to p = infinity.
        """
        p_last = float(max(self.depths))
        if self.predict(p_last) >= level:
            return p_last
        if not self.is_polynomial:
            v_inf, amp, alpha = self.params
            if not (v_inf > level and amp > 0 and alpha > 0):
                return None
            return _clean((amp / (v_inf - level)) ** (1.0 / alpha))
        shifted = np.array(self.params, dtype=float)
        shifted[0] -= level
        roots = np.polynomial.polynomial.polyroots(shifted)
        real = [r.real for r in np.atleast_1d(roots) if abs(r.imag) <= 1e-12 * max(1.0, abs(r.real))]
        inside = [x for x in real if 0.0 < x <= 1.0 / p_last]
        if not inside:
            return None
        return 1.0 / max(inside)

    def to_json(self) -> dict:
        out = {
            "family": self.family,
            "k": self.k,
            "depths": list(self.depths),
            "limit": _clean(self.limit),
            "rms_residual": _clean(self.rms_residual),
        }
        if self.is_polynomial:
            out["coefficients"] = [_clean(c) for c in self.params]
        else:
            out["amplitude"], out["exponent"] = _clean(self.params[1]), _clean(self.params[2])
        return out


def fit_polynomial(depths: Sequence[int], values: Sequence[float], degree: int) -> Fit:
    """Least-squares polynomial of ``degree`` (1..3) in 1/p through (p, V_p*)."""
    p, v = _as_series(depths, values)
    if p.size < degree + 1:
        raise ValueError(f"a degree-{degree} fit needs at least {degree + 1} depths, got {p.size}")
    vander = np.vander(1.0 / p, degree + 1, increasing=True)
    coef, *_ = np.linalg.lstsq(vander, v, rcond=None)
    resid = v - vander @ coef
    return Fit(f"poly{degree}", tuple(int(d) for d in p), tuple(float(c) for c in coef),
               float(np.sqrt(np.mean(resid**2))))


def _linear_given_alpha(p: np.ndarray, v: np.ndarray, alpha: float) -> tuple[float, float, float]:
    """(V_inf, A, sum of squared residuals) of V = V_inf - A p^-alpha for a fixed alpha."""
    design = np.column_stack([np.ones_like(p), -(p ** (-alpha))])
    coef, *_ = np.linalg.lstsq(design, v, rcond=None)
    resid = v - design @ coef
    return float(coef[0]), float(coef[1]), float(resid @ resid)


def fit_power_law(depths: Sequence[int], values: Sequence[float]) -> Fit | None:
    """Least-squares V = V_inf - A p^(-alpha) with all three parameters free.

    Variable projection: for a fixed alpha the model is linear in (V_inf, A);
    the residual is scanned on a log grid of alpha in :data:`ALPHA_RANGE`, then
    refined by bounded Brent between the grid neighbours of the best point.
    Deterministic.  None when fewer than three depths, when the best alpha
    sits at an end of the range (no interior optimum) or when A <= 0 (the fit
    decreases with p).
    """
    from scipy.optimize import minimize_scalar

    p, v = _as_series(depths, values)
    if p.size < 3:
        return None
    grid = np.geomspace(*ALPHA_RANGE, 241)
    sse = np.array([_linear_given_alpha(p, v, a)[2] for a in grid])
    i = int(np.argmin(sse))
    if i in (0, grid.size - 1):
        return None
    res = minimize_scalar(lambda a: _linear_given_alpha(p, v, a)[2], bounds=(grid[i - 1], grid[i + 1]),
                          method="bounded", options={"xatol": 1e-12})
    alpha = float(res.x) if res.fun <= sse[i] else float(grid[i])
    v_inf, amp, s = _linear_given_alpha(p, v, alpha)
    if not amp > 0:
        return None
    return Fit("power", tuple(int(d) for d in p), (v_inf, amp, alpha), float(np.sqrt(s / p.size)))


def fit_anchored_power_law(depths: Sequence[int], values: Sequence[float], ground_state: float) -> Fit | None:
    """GS - V = A p^(-alpha) by least squares of log(GS - V) against log p.

    None when fewer than two depths or a value is at or above GS (no positive gap).
    """
    p, v = _as_series(depths, values)
    gap = ground_state - v
    if p.size < 2 or np.any(gap <= 0):
        return None
    design = np.column_stack([np.ones_like(p), -np.log(p)])
    (log_a, alpha), *_ = np.linalg.lstsq(design, np.log(gap), rcond=None)
    fit = Fit("power-gs", tuple(int(d) for d in p), (float(ground_state), float(np.exp(log_a)), float(alpha)), 0.0)
    resid = v - fit.predict(p)
    return Fit(fit.family, fit.depths, fit.params, float(np.sqrt(np.mean(resid**2))))


def fit_family(family: str, depths: Sequence[int], values: Sequence[float],
               ground_state: float | None = None) -> Fit | None:
    """Fit one family of :data:`FAMILIES` to (depths, values); None when it cannot be fitted."""
    if family not in FAMILIES:
        raise ValueError(f"unknown fit family {family!r}: choose one of {', '.join(FAMILIES)}")
    if family.startswith("poly"):
        return fit_polynomial(depths, values, int(family[4:]))
    if family == "power":
        return fit_power_law(depths, values)
    if ground_state is None:
        return None
    return fit_anchored_power_law(depths, values, ground_state)


# ----------------------------------------------------------------- back-test
@dataclass(frozen=True)
class Backtest:
    """A fit of the same family and window size on earlier depths, scored on held-out depths."""

    fit: Fit
    held_out: tuple[int, ...]
    predicted: tuple[float, ...]
    actual: tuple[float, ...]

    @property
    def errors(self) -> tuple[float, ...]:
        """predicted - actual at each held-out depth."""
        return tuple(a - b for a, b in zip(self.predicted, self.actual))

    @property
    def max_error(self) -> float:
        return max(abs(e) for e in self.errors)

    def to_json(self) -> dict:
        return {
            "fitted_depths": list(self.fit.depths),
            "held_out": list(self.held_out),
            "predicted": [_clean(x) for x in self.predicted],
            "actual": list(self.actual),
            "errors": [_clean(e) for e in self.errors],
            "max_abs_error": _clean(self.max_error),
        }


USED, FAILED, UNPHYSICAL, UNTESTED = "used", "failed back-test", "unphysical", "no back-test"


@dataclass(frozen=True)
class WindowFit:
    """A fit on the last k depths, its back-test and its status (used / failed back-test / unphysical / no back-test)."""

    fit: Fit
    backtest: Backtest | None
    status: str
    reason: str = ""

    @property
    def family(self) -> str:
        return self.fit.family

    @property
    def backtest_error(self) -> float | None:
        return None if self.backtest is None else self.backtest.max_error

    @property
    def used(self) -> bool:
        return self.status == USED

    def to_json(self) -> dict:
        out = self.fit.to_json()
        out.update(status=self.status, reason=self.reason or None,
                   backtest=self.backtest.to_json() if self.backtest else None,
                   backtest_error=_clean(self.backtest_error))
        return out


# ------------------------------------------------------------------ headline
def _median(values: list[float]) -> float:
    """Median of real numbers where +inf stands for "never"."""
    return float(np.median(np.asarray(values, dtype=float)))


@dataclass(frozen=True)
class Estimate:
    """A headline number: central value and the range over the used fits.

    ``central`` is the median over families of each family's best back-tested
    window; ``low`` / ``high`` the extremes over every used fit; ``by_family``
    the value of each family's best window.
    """

    central: float
    low: float
    high: float
    n_fits: int
    by_family: dict
    capped: bool = False

    def scaled(self, factor: float) -> "Estimate":
        return Estimate(self.central * factor, self.low * factor, self.high * factor, self.n_fits,
                        {k: v * factor for k, v in self.by_family.items()}, self.capped)

    def capped_at(self, bound: float | None) -> "Estimate":
        """The same estimate with ``high`` cut at a rigorous upper bound (GS)."""
        if bound is None or self.high <= bound:
            return self
        return Estimate(self.central, self.low, float(bound), self.n_fits, self.by_family, True)

    def covers(self, value: float) -> bool:
        return self.low <= value <= self.high

    def to_json(self) -> dict:
        return {
            "central": _clean(self.central),
            "low": _clean(self.low),
            "high": _clean(self.high),
            "fits": self.n_fits,
            "by_family": {k: _clean(v) for k, v in self.by_family.items()},
            "high_capped_at_bound": self.capped,
        }


@dataclass(frozen=True)
class LevelEstimate:
    """Predicted depth at which V_p* reaches ``level`` (a ratio of GS, or ALG).

    Depths are real numbers; ``None`` in ``central`` / ``high`` means "never"
    (the fits saturate below the level).
    """

    name: str
    level: float
    central: float | None
    low: float | None
    high: float | None
    fits_reaching: int
    fits: int
    by_family: dict

    def to_json(self) -> dict:
        return {
            "target": self.name,
            "level": _clean(self.level),
            "central": _clean(self.central),
            "low": _clean(self.low),
            "high": _clean(self.high),
            "never_means": "None: the fits saturate below the level",
            "fits_reaching": self.fits_reaching,
            "fits": self.fits,
            "by_family": {k: _clean(v) for k, v in self.by_family.items()},
        }


def depth_for_ratio(amplitude: float, exponent: float, reference: float, ratio: float) -> float | None:
    """Depth at which V_p / reference = ratio under reference - V_p = A p^(-alpha).

    p(r) = (A / ((1 - r) reference))^(1/alpha) for 0 < r < 1, reference > 0,
    A > 0 and alpha > 0; otherwise None.
    """
    if not (0 < ratio < 1 and reference > 0 and amplitude > 0 and exponent > 0):
        return None
    return _clean((amplitude / ((1.0 - ratio) * reference)) ** (1.0 / exponent))


def default_holdout(n: int) -> int:
    """Held-out depths of the back-test: a quarter of the depths, 1 to 3."""
    return max(1, min(3, n // 4))


@dataclass
class Extrapolation:
    """Every family over every window, their back-tests and the headline numbers.

    Attributes
    ----------
    fits : list of WindowFit
        Ordered by family (``FAMILIES`` order), then window size k.
    holdout : int
        Number of held-out depths h of the back-test.
    pass_threshold : float | None
        Largest back-test error that passes; None without any back-test.
    held_out_gain : float | None
        V_p* at the last depth minus V_p* at the last depth before the held-out ones.
    ground_state, upper_bound : float | None
        GS (when known) and the bound above which a fit is unphysical: the
        lower of GS + its uncertainty and the given rigorous bound.
    limit : Estimate | None
        V_inf headline (None when no fit is used).
    at_depth : dict {p: Estimate}
        Predicted V_p at the requested depths.
    levels : list of LevelEstimate
        Predicted depths for the target ratios (and ALG).
    """

    fits: list[WindowFit]
    holdout: int
    pass_threshold: float | None
    held_out_gain: float | None
    ground_state: float | None
    upper_bound: float | None
    limit: Estimate | None
    at_depth: dict = field(default_factory=dict)
    levels: list = field(default_factory=list)
    bound_name: str | None = None
    note: str = ESTIMATE_NOTE

    @property
    def used(self) -> list[WindowFit]:
        return [w for w in self.fits if w.used]

    @property
    def families_used(self) -> list[str]:
        return [f for f in FAMILIES if any(w.family == f for w in self.used)]

    def best_by_family(self) -> dict:
        """{family: its used window with the smallest back-test error} (ties: smaller k)."""
        out = {}
        for fam in self.families_used:
            cands = [w for w in self.used if w.family == fam]
            out[fam] = min(cands, key=lambda w: (w.backtest_error, w.fit.k))
        return out

    def estimate(self, quantity, allowance=None) -> Estimate | None:
        """Headline of ``quantity(fit) -> float`` over the used fits (see module docstring).

        ``allowance(fit)``, when given, is a standard error: each fit then
        spans its value +- ``SE_FACTOR`` standard errors in the range.
        """
        if not self.used:
            return None
        best = self.best_by_family()
        by_family = {fam: float(quantity(w.fit)) for fam, w in best.items()}
        lows, highs = [], []
        for w in self.used:
            q = float(quantity(w.fit))
            a = SE_FACTOR * float(allowance(w.fit)) if allowance is not None and math.isfinite(q) else 0.0
            lows.append(q - a)
            highs.append(q + a)
        return Estimate(_median(list(by_family.values())), min(lows), max(highs), len(lows), by_family)

    def level_estimate(self, name: str, level: float) -> LevelEstimate | None:
        if not self.used:
            return None

        def depth(fit):
            d = fit.depth_reaching(level)
            return math.inf if d is None else d

        def allowance(fit):
            # the standard error of V at the crossing depth, turned into depth by the slope dV/dp
            d = fit.depth_reaching(level)
            if d is None or d <= max(fit.depths):
                return 0.0
            slope = (fit.predict(d * (1 + 1e-6)) - fit.predict(d * (1 - 1e-6))) / (2e-6 * d)
            return fit.standard_error(d) / slope if slope > 0 else math.inf

        est = self.estimate(depth, allowance)
        reaching = sum(1 for w in self.used if w.fit.depth_reaching(level) is not None)
        return LevelEstimate(name, float(level), _clean(est.central), _clean(est.low), _clean(est.high),
                             reaching, len(self.used), {k: _clean(v) for k, v in est.by_family.items()})

    def ratio_at_depth(self) -> dict:
        """{p: Estimate of V_p / GS} (empty without GS)."""
        if self.ground_state is None:
            return {}
        return {p: est.scaled(1.0 / self.ground_state) for p, est in self.at_depth.items()}

    def to_json(self) -> dict:
        ratio = self.ratio_at_depth()
        return {
            "families": {f.name: f.description for f in FAMILIES.values()},
            "families_used": self.families_used,
            "holdout": self.holdout,
            "pass_rule": (
                f"back-test error <= max({PASS_GAIN_FRACTION:g} x held-out gain, "
                f"{PASS_BEST_FACTOR:g} x smallest back-test error) and physical"
            ),
            "held_out_gain": _clean(self.held_out_gain),
            "pass_threshold": _clean(self.pass_threshold),
            "ground_state": _clean(self.ground_state),
            "upper_bound": _clean(self.upper_bound),
            "upper_bound_name": self.bound_name,
            "headline_rule": (
                "central: median over families of each family's best back-tested window; "
                "low/high: extremes over every used fit"
            ),
            "limit": self.limit.to_json() if self.limit else None,
            "limit_ratio_gs": (self.limit.scaled(1.0 / self.ground_state).to_json()
                               if self.limit and self.ground_state else None),
            "at_depth": [
                {"p": p, "value": est.to_json(), "ratio_gs": ratio[p].to_json() if p in ratio else None}
                for p, est in self.at_depth.items()
            ],
            "depth_for": [lv.to_json() for lv in self.levels],
            "fits": [w.to_json() for w in self.fits],
            "spread_meaning": SPREAD_MEANING,
            "note": self.note,
        }


def _windows(n_usable: int, n_params: int) -> list[int]:
    return list(range(n_params + 1, min(n_usable, n_params + 1 + EXTRA_WINDOWS) + 1))


def extrapolate(
    depths: Sequence[int],
    values: Sequence[float],
    *,
    ground_state: float | None = None,
    ground_state_uncertainty: float = 0.0,
    upper_bound: float | None = None,
    upper_bound_name: str = "the first-moment bound",
    threshold: float | None = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    at_depths: Iterable[int] = (),
    holdout: int | None = None,
    families: Iterable[str] | None = None,
) -> Extrapolation | None:
    """Fit every family over its windows, back-test each, and form the headline numbers.

    Parameters
    ----------
    depths, values : sequences
        Finished depths p (distinct) and V_p* (energy density per spin).
    ground_state : float, optional
        GS: enables the anchored family, the ratios and the unphysical flag V_inf > GS.
    ground_state_uncertainty : float
        A fit counts as above GS only beyond this margin.
    upper_bound : float, optional
        Rigorous bound on any value (for energies the first-moment bound); a fit above the lower
        of it and GS is unphysical.
    upper_bound_name : str
        How notes name ``upper_bound``.
    threshold : float, optional
        Algorithmic threshold ALG; when given (and below GS), the depth reaching it is predicted.
    target_ratios : ratios of GS whose depth is predicted (needs GS).
    at_depths : depths at which V (and V/GS) is predicted.
    holdout : int, optional
        Held-out depths of the back-test (default :func:`default_holdout`).
    families : names of :data:`FAMILIES` to use (default all that apply).

    Returns
    -------
    Extrapolation or None
        None with fewer than two depths.
    """
    p, v = _as_series(depths, values)
    n = p.size
    if n < 2:
        return None
    h = default_holdout(n) if holdout is None else int(holdout)
    if not 1 <= h < n:
        raise ValueError(f"holdout must be between 1 and {n - 1}, got {h}")
    names = list(FAMILIES) if families is None else list(families)
    for name in names:
        if name not in FAMILIES:
            raise ValueError(f"unknown fit family {name!r}: choose one of {', '.join(FAMILIES)}")
    gs = None if ground_state is None else float(ground_state)
    if gs is not None and np.any(v >= gs):
        names = [f for f in names if f != "power-gs"]  # no positive gap to fit
    candidates = []
    if gs is not None:
        candidates.append((gs + float(ground_state_uncertainty), "GS"))
    if upper_bound is not None:
        candidates.append((float(upper_bound), upper_bound_name))
    bound, bound_name = min(candidates) if candidates else (None, None)

    raw: list[tuple[Fit, Backtest | None]] = []
    for name in names:
        fam = FAMILIES[name]
        if fam.needs_ground_state and gs is None:
            continue
        for k in _windows(n, fam.n_params):
            fit = fit_family(name, p[-k:], v[-k:], gs)
            if fit is None:
                continue
            bt = None
            if k <= n - h:
                train = fit_family(name, p[n - h - k: n - h], v[n - h - k: n - h], gs)
                if train is not None:
                    held = p[n - h:]
                    bt = Backtest(train, tuple(int(d) for d in held),
                                  tuple(float(x) for x in np.atleast_1d(train.predict(held))),
                                  tuple(float(x) for x in v[n - h:]))
            raw.append((fit, bt))

    errors = [bt.max_error for _, bt in raw if bt is not None and math.isfinite(bt.max_error)]
    gain = float(v[-1] - v[n - h - 1]) if n - h - 1 >= 0 else None
    pass_threshold = None
    if errors:
        pass_threshold = max(PASS_GAIN_FRACTION * abs(gain or 0.0), PASS_BEST_FACTOR * min(errors))

    fits: list[WindowFit] = []
    for fit, bt in raw:
        peak = fit.peak_beyond(float(p[-1]))
        if bt is None:
            status, reason = UNTESTED, f"window k = {fit.k} leaves no earlier depths for a back-test"
        elif not (bt.max_error <= pass_threshold):
            status, reason = FAILED, f"back-test error {bt.max_error:.2e} > {pass_threshold:.2e}"
        elif bound is not None and fit.family != "power-gs" and peak > bound:
            status, reason = UNPHYSICAL, f"fitted curve reaches {peak:.4f} > {bound_name} {bound:.4f}"
        else:
            status, reason = USED, ""
        fits.append(WindowFit(fit, bt, status, reason))

    result = Extrapolation(fits, h, pass_threshold, gain, gs, bound, None, bound_name=bound_name)
    limit = result.estimate(lambda f: f.limit, lambda f: f.standard_error(math.inf))
    result.limit = limit.capped_at(bound) if limit is not None else None
    if result.used:
        result.at_depth = {
            int(d): result.estimate(lambda f, d=d: f.predict(d), lambda f, d=d: f.standard_error(d)).capped_at(bound)
            for d in sorted(set(int(d) for d in at_depths))
        }
        if gs is not None:
            for r in target_ratios:
                result.levels.append(result.level_estimate(f"ratio {r:g}", r * gs))
            if threshold is not None and threshold < gs:
                result.levels.append(result.level_estimate("ALG", float(threshold)))
    return result
