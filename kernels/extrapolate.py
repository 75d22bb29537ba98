"""Extrapolation of the optimal QAOA energy V_p* to large depth, with back-tests.

Pure numerics (numpy; scipy imported inside the functions that need it): no
I/O.  Energies are energy densities per spin (dimensionless, the tool's
normalization E[H(z)H(z')] = n xi(R); larger is better).  docs/extrapolation.md
is the user's description of everything below, with the calibration on the SK
ladder that chose the constants.

Fit families (each over several windows "the last w finished depths"):

* ``linear-in-1/p``, ``quadratic-in-1/p``, ``cubic-in-1/p``: polynomials in
  x = 1/p of degree 1, 2, 3, V(p) = c_0 + c_1/p + ... + c_d/p^d; V_inf = c_0.
  They can represent only corrections in integer powers of 1/p: a gap decaying
  like p^(-alpha) with alpha < 1 makes them biased low.
* ``free-power-law``: V(p) = V_inf - A p^(-alpha) with V_inf, A, alpha all
  free (the form behind the depth scaling p ~ eps^(-1.13) reported for SK by
  Boulebnane et al., arXiv:2505.07929 (2025)).  Fitted by variable projection:
  for fixed alpha the model is linear in (V_inf, A); the residual is minimized
  over alpha (grid, then bounded Brent).  On short series it tends to be
  biased high.
* ``power-law-to-GS``: V(p) = GS - A p^(-alpha), the power law anchored at a
  known ground-state energy GS (the conjecture V_p* -> GS, as for SK); V_inf =
  GS by assumption, not by fit.  Only when GS is known.

Depths may carry an uncertainty (the bath engine's error estimate); the fits
are then weighted least squares with weights 1/sigma^2 (exact depths get a
sigma far below any given one), and standard errors come from the covariance.

Back-test (every family and window): the last ``h`` depths are held out, the
same family with the same window size is fitted to the depths just before
them, and its predictions at the held-out depths are compared with V_p*.  The
back-test error e is the largest absolute prediction error.

Windows and hold-out grow with the ladder (:func:`window_sizes`,
:func:`default_holdout`): up to ``REFERENCE_DEPTHS`` depths a family with m
parameters is fitted over the last m+1 .. m+1+``EXTRA_WINDOWS`` depths and a
quarter of the depths (1 to 3) is held out, the geometry the SK calibration
chose; with n > ``REFERENCE_DEPTHS`` depths both are multiplied by
n / ``REFERENCE_DEPTHS`` (rounded), so that a window and the hold-out keep the
same share of the ladder, and of 1/p, as in the calibration.  Counted in
depths they would shrink in 1/p as the ladder deepens: at p = 33 a cubic over
the last 5 depths spans 1/p = 0.030 .. 0.034 and reaches V_inf through
least-squares weights summing to ~1.6e4 in absolute value, so a 1e-6 error in
V_p* moves it by ~1e-2, and 3 held-out depths move 1/p by 0.002, too little
for the back-test to tell the fits apart.

Weights, no cliff: a fit's weight falls smoothly with its back-test error,
``1 / (1 + (e / T)^4)`` with the scale T = max(``SCALE_GAIN_FRACTION`` x the
rise of V_p* over the held-out depths, ``SCALE_BEST_FACTOR`` x the smallest
error, twice the largest uncertainty of a held-out depth), divided by the
number of windows of its family (so a family does not outvote the others by
having more windows).  A fit whose curve beyond the last depth rises above an
upper bound on any value (GS plus its uncertainty, or the first-moment bound)
is unphysical and gets weight 0; so does a window too large to be back-tested.

Prediction of one fit at depth p (p = inf: V_inf): a normal distribution with
mean the fitted curve and standard deviation
``sqrt(se^2 + (BACKTEST_GROWTH x e x r)^2) x sqrt(REFERENCE_DEPTHS / n)`` for
n < REFERENCE_DEPTHS (else no factor): se the least-squares standard error at p,
e the back-test error, r = (1/p_last - 1/p) / (the 1/p distance the back-test
predicted over): the back-test error grown in proportion to how far beyond the
data the prediction reaches.

Headline (V_inf, V at a given depth): the weighted mixture of the fits'
predictions; central value its median, range its ``COVERAGE`` central interval,
high end cut at the upper bound and low end raised to V_pmax* (V_p* does not
decrease with p: depth p can emulate depth p - 1).  The depth reaching a level
is read off the same bands: where the high band, the median and the low band
cross the level (never: the low band stays below it, "not determined by these
depths").  The headline is given only with at least ``MIN_DEPTHS`` depths and
``MIN_FAMILIES`` families with a back-tested physical fit; otherwise each
family's value is listed and no headline number.  Every quantity is a
continuous function of the back-test errors: no small change in one error
switches a fit, the headline or its range on or off.

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
    "RENAMED_FAMILIES",
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
    "window_sizes",
    "extrapolate",
    "depth_for_ratio",
    "back_test_weight",
    "FREE_POWER",
    "ANCHORED_POWER",
    "BACKTEST_GROWTH",
    "COVERAGE",
    "MIN_DEPTHS",
    "MIN_FAMILIES",
]

ESTIMATE_NOTE = (
    "Extrapolations to p -> infinity and predicted depths are estimates from a finite number of "
    "depths, not bounds: the range carries the disagreement of the fit families and windows and "
    "their back-test errors, not a guaranteed error."
)

SPREAD_MEANING = (
    "The range is the central 95 % of the weighted fits' predictions: every fit family and window "
    "weighted by how well it predicted the held-out depths (back-test), each widened by its "
    "least-squares error and its back-test error grown with the distance of the extrapolation, "
    "and more so with few depths. On the SK ladder p <= 6..12 it contained V_p* at every later "
    "computed depth and the Parisi value (docs/extrapolation.md); it is an estimate, not a "
    "confidence interval or a bound, and the truth can lie outside it if V_p* changes behaviour "
    "beyond the computed depths."
)

DEFAULT_TARGET_RATIOS = (0.95, 0.99)
SCALE_GAIN_FRACTION = 0.1  # weight scale: 10 % of the rise of V_p* over the held-out depths ...
SCALE_BEST_FACTOR = 3.0  # ... or 3 x the smallest back-test error, whichever is larger
WEIGHT_POWER = 4  # weight 1 / (1 + (e / T)^4): 0.5 at e = T, 0.06 at 2 T, 0.012 at 3 T
BACKTEST_GROWTH = 0.75  # the back-test error, grown with distance, counts as 0.75 standard deviation (calibrated)
REFERENCE_DEPTHS = 12  # with n < 12 depths every prediction's spread grows by sqrt(12 / n); beyond, windows grow by n / 12
COVERAGE = 0.95  # the range is the central 95 % of the weighted mixture
MIN_DEPTHS = 8  # fewer depths: no headline number, each family's value in words
MIN_FAMILIES = 2  # fewer families with a back-tested physical fit: no headline number
EXTRA_WINDOWS = 3  # windows of n_params + 1 .. n_params + 1 + EXTRA_WINDOWS depths (x n / 12 beyond 12 depths)
ALPHA_RANGE = (0.05, 6.0)  # exponents the free power law may take
EXACT_SIGMA_FRACTION = 1e-3  # an exact depth beside uncertain ones: sigma = 1e-3 x the smallest given


@dataclass(frozen=True)
class Family:
    name: str
    description: str
    n_params: int
    needs_ground_state: bool = False
    degree: int | None = None  # polynomials in 1/p: their degree


FAMILIES = {
    "linear-in-1/p": Family("linear-in-1/p", "c0 + c1/p", 2, degree=1),
    "quadratic-in-1/p": Family("quadratic-in-1/p", "c0 + c1/p + c2/p^2", 3, degree=2),
    "cubic-in-1/p": Family("cubic-in-1/p", "c0 + c1/p + c2/p^2 + c3/p^3", 4, degree=3),
    "free-power-law": Family("free-power-law", "V_inf - A p^-alpha, V_inf free", 3),
    "power-law-to-GS": Family("power-law-to-GS", "GS - A p^-alpha, anchored at the ground state", 2, True),
}
POLYNOMIAL_BY_DEGREE = {f.degree: f.name for f in FAMILIES.values() if f.degree is not None}
FREE_POWER, ANCHORED_POWER = "free-power-law", "power-law-to-GS"

# the names of the first releases, refused with the new name in the message
RENAMED_FAMILIES = {"poly1": "linear-in-1/p", "poly2": "quadratic-in-1/p", "poly3": "cubic-in-1/p",
                    "power": FREE_POWER, "power-gs": ANCHORED_POWER}


def _check_family(name: str) -> None:
    if name in FAMILIES:
        return
    if name in RENAMED_FAMILIES:
        raise ValueError(f"fit family {name!r} is now called {RENAMED_FAMILIES[name]!r}")
    raise ValueError(f"unknown fit family {name!r}: choose one of {', '.join(FAMILIES)}")


def _clean(x: float | None) -> float | None:
    """float(x) if finite, else None (JSON has no inf/nan)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _as_series(depths: Sequence[int], values: Sequence[float],
               uncertainties: Sequence[float | None] | None = None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Sorted (p, V, sigma); sigma None when no depth carries an uncertainty."""
    p = np.asarray(depths, dtype=float)
    v = np.asarray(values, dtype=float)
    if p.ndim != 1 or p.shape != v.shape:
        raise ValueError(f"depths and values must be 1-d of equal length, got {p.shape} and {v.shape}")
    if np.any(p < 1) or np.any(p != np.round(p)):
        raise ValueError("depths must be integers >= 1")
    if not np.all(np.isfinite(v)):
        raise ValueError("values must be finite")
    s = None
    if uncertainties is not None:
        raw = list(uncertainties)
        if len(raw) != p.size:
            raise ValueError(f"uncertainties must have one entry per depth ({p.size}), got {len(raw)}")
        s = np.array([0.0 if u is None else float(u) for u in raw])
        if not np.all(np.isfinite(s)) or np.any(s < 0):
            raise ValueError("uncertainties must be finite and >= 0 (None or 0 for an exact depth)")
        if not np.any(s > 0):
            s = None
    order = np.argsort(p)
    p, v = p[order], v[order]
    if s is not None:
        s = s[order]
    if np.any(np.diff(p) == 0):
        raise ValueError("depths must be distinct")
    return p, v, s


def _fit_sigma(s: np.ndarray | None) -> np.ndarray | None:
    """Per-depth sigma of a weighted fit: exact depths (0) get a tiny sigma beside the given ones."""
    if s is None or not np.any(s > 0):
        return None
    floor = EXACT_SIGMA_FRACTION * float(np.min(s[s > 0]))
    return np.where(s > 0, s, floor)


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
        polynomials: coefficients c_0..c_d in ascending powers of 1/p;
        power laws: (V_inf, A, alpha) (for power-law-to-GS V_inf is the given GS).
    rms_residual : float
        Root-mean-square residual of V over the fitted depths.
    sigmas : tuple of float, optional
        Per-depth uncertainties the fit was weighted with (None: ordinary least squares).
    """

    family: str
    depths: tuple[int, ...]
    params: tuple[float, ...]
    rms_residual: float
    sigmas: tuple[float, ...] | None = None
    fitted_values: tuple[float, ...] | None = field(default=None, compare=False, repr=False)

    @property
    def k(self) -> int:
        """Number of depths in the window (shown to users as "window")."""
        return len(self.depths)

    window = k

    @property
    def is_polynomial(self) -> bool:
        return FAMILIES[self.family].degree is not None

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
        """Number of fitted parameters (GS of power-law-to-GS is given, not fitted)."""
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
        if self.family == FREE_POWER:
            cols.insert(0, np.ones_like(x))  # d/dV_inf
        return np.column_stack(cols)

    def _sensitivity_map(self) -> tuple[np.ndarray, float]:
        """(pinv of the weighted Jacobian, residual scale): se(p) = scale ||g(p)^T pinv||."""
        cached = self.__dict__.get("_sens")
        if cached is not None:
            return cached
        dof = self.k - self.n_params
        jac = self.gradient(np.asarray(self.depths, dtype=float))
        if self.sigmas is None:
            scale = self.rms_residual * math.sqrt(self.k / dof) if dof > 0 else 0.0
            out = (np.linalg.pinv(jac), scale)
        else:
            s = np.asarray(self.sigmas)
            chi2 = 0.0
            if self.fitted_values is not None:
                resid = (np.asarray(self.fitted_values) - self.predict(np.asarray(self.depths, dtype=float))) / s
                chi2 = float(resid @ resid)
            scale = math.sqrt(max(1.0, chi2 / dof)) if dof > 0 else 1.0
            out = (np.linalg.pinv(jac / s[:, None]), scale)  # covariance pinv pinv^T = (J^T W J)^-1
        object.__setattr__(self, "_sens", out)
        return out

    def standard_error(self, depth) -> float:
        """Least-squares standard error of the fitted V at ``depth`` (p = inf: of V_inf).

        Linearized propagation (common practice for nonlinear least squares):
        se = sigma ||g(p)^T J^+||, J the parameter derivatives at the fitted
        depths, g(p) those at ``depth``, sigma the residual standard deviation
        rms * sqrt(k / (k - n_params)).  With per-depth uncertainties s_i the
        Jacobian rows are divided by s_i (weighted least squares) and sigma is
        sqrt(max(1, chi^2 / dof)).  Zero for V_inf of power-law-to-GS (GS is given).
        """
        pinv, scale = self._sensitivity_map()
        if scale == 0.0:
            return 0.0
        sens = self.gradient(depth) @ pinv
        return float(scale * np.linalg.norm(sens[0]))

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
            "window": self.k,
            "depths": list(self.depths),
            "v_inf": _clean(self.limit),
            "rms_residual": _clean(self.rms_residual),
        }
        if self.is_polynomial:
            out["coefficients"] = [_clean(c) for c in self.params]
        else:
            out["amplitude"], out["exponent"] = _clean(self.params[1]), _clean(self.params[2])
        if self.sigmas is not None:
            out["weighted_by_uncertainties"] = True
        return out


def _make_fit(family, p, v, s, params) -> Fit:
    fit = Fit(family, tuple(int(d) for d in p), tuple(float(c) for c in params), 0.0,
              None if s is None else tuple(float(x) for x in s))
    resid = v - np.atleast_1d(fit.predict(p))
    return Fit(fit.family, fit.depths, fit.params, float(np.sqrt(np.mean(resid**2))), fit.sigmas,
               None if s is None else tuple(float(x) for x in v))


def fit_polynomial(depths: Sequence[int], values: Sequence[float], degree: int,
                   uncertainties: Sequence[float | None] | None = None) -> Fit:
    """Least-squares polynomial of ``degree`` (1..3) in 1/p through (p, V_p*) (weighted by 1/sigma^2 if given)."""
    p, v, s = _as_series(depths, values, uncertainties)
    if degree not in POLYNOMIAL_BY_DEGREE:
        raise ValueError(f"polynomial degree must be 1, 2 or 3, got {degree}")
    if p.size < degree + 1:
        raise ValueError(f"a degree-{degree} fit needs at least {degree + 1} depths, got {p.size}")
    s = _fit_sigma(s)
    vander = np.vander(1.0 / p, degree + 1, increasing=True)
    wt = np.ones_like(p) if s is None else 1.0 / s
    coef, *_ = np.linalg.lstsq(vander * wt[:, None], v * wt, rcond=None)
    return _make_fit(POLYNOMIAL_BY_DEGREE[degree], p, v, s, coef)


def _linear_given_alpha(p: np.ndarray, v: np.ndarray, alpha: float,
                        wt: np.ndarray | None = None) -> tuple[float, float, float]:
    """(V_inf, A, weighted sum of squared residuals) of V = V_inf - A p^-alpha for a fixed alpha."""
    wt = np.ones_like(p) if wt is None else wt
    design = np.column_stack([np.ones_like(p), -(p ** (-alpha))])
    coef, *_ = np.linalg.lstsq(design * wt[:, None], v * wt, rcond=None)
    resid = (v - design @ coef) * wt
    return float(coef[0]), float(coef[1]), float(resid @ resid)


def fit_power_law(depths: Sequence[int], values: Sequence[float],
                  uncertainties: Sequence[float | None] | None = None) -> Fit | None:
    """Least-squares V = V_inf - A p^(-alpha) with all three parameters free.

    Variable projection: for a fixed alpha the model is linear in (V_inf, A);
    the residual is scanned on a log grid of alpha in :data:`ALPHA_RANGE`, then
    refined by bounded Brent between the grid neighbours of the best point.
    Deterministic.  None when fewer than three depths, when the best alpha
    sits at an end of the range (no interior optimum) or when A <= 0 (the fit
    decreases with p).
    """
    from scipy.optimize import minimize_scalar

    p, v, s = _as_series(depths, values, uncertainties)
    if p.size < 3:
        return None
    s = _fit_sigma(s)
    wt = None if s is None else 1.0 / s
    grid = np.geomspace(*ALPHA_RANGE, 241)
    sse = np.array([_linear_given_alpha(p, v, a, wt)[2] for a in grid])
    i = int(np.argmin(sse))
    if i in (0, grid.size - 1):
        return None
    res = minimize_scalar(lambda a: _linear_given_alpha(p, v, a, wt)[2], bounds=(grid[i - 1], grid[i + 1]),
                          method="bounded", options={"xatol": 1e-12})
    alpha = float(res.x) if res.fun <= sse[i] else float(grid[i])
    v_inf, amp, _ = _linear_given_alpha(p, v, alpha, wt)
    if not amp > 0:
        return None
    return _make_fit(FREE_POWER, p, v, s, (v_inf, amp, alpha))


def fit_anchored_power_law(depths: Sequence[int], values: Sequence[float], ground_state: float,
                           uncertainties: Sequence[float | None] | None = None) -> Fit | None:
    """GS - V = A p^(-alpha) by least squares of log(GS - V) against log p.

    With uncertainties, each log-gap is weighted by gap / sigma (its linearized
    uncertainty is sigma / gap).  None when fewer than two depths or a value is
    at or above GS (no positive gap).
    """
    p, v, s = _as_series(depths, values, uncertainties)
    gap = ground_state - v
    if p.size < 2 or np.any(gap <= 0):
        return None
    s = _fit_sigma(s)
    wt = np.ones_like(p) if s is None else gap / s
    design = np.column_stack([np.ones_like(p), -np.log(p)])
    (log_a, alpha), *_ = np.linalg.lstsq(design * wt[:, None], np.log(gap) * wt, rcond=None)
    return _make_fit(ANCHORED_POWER, p, v, s, (float(ground_state), float(np.exp(log_a)), float(alpha)))


def fit_family(family: str, depths: Sequence[int], values: Sequence[float],
               ground_state: float | None = None,
               uncertainties: Sequence[float | None] | None = None) -> Fit | None:
    """Fit one family of :data:`FAMILIES` to (depths, values); None when it cannot be fitted."""
    _check_family(family)
    fam = FAMILIES[family]
    if fam.degree is not None:
        return fit_polynomial(depths, values, fam.degree, uncertainties)
    if family == FREE_POWER:
        return fit_power_law(depths, values, uncertainties)
    if ground_state is None:
        return None
    return fit_anchored_power_law(depths, values, ground_state, uncertainties)


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

    @property
    def reach(self) -> float:
        """How far in 1/p the back-test predicted: 1/(last fitted depth) - 1/(last held-out depth)."""
        return 1.0 / self.fit.depths[-1] - 1.0 / self.held_out[-1]

    def to_json(self) -> dict:
        return {
            "fitted_depths": list(self.fit.depths),
            "held_out": list(self.held_out),
            "predicted": [_clean(x) for x in self.predicted],
            "actual": list(self.actual),
            "errors": [_clean(e) for e in self.errors],
            "max_abs_error": _clean(self.max_error),
        }


USED, UNPHYSICAL, UNTESTED = "used", "unphysical", "no back-test"


def back_test_weight(error: float, scale: float) -> float:
    """Smooth weight of a back-test error: 1 / (1 + (error / scale)^WEIGHT_POWER) (1 at 0, 0.5 at the scale)."""
    if not math.isfinite(error):
        return 0.0
    if scale <= 0:
        return 1.0 if error == 0 else 0.0
    return 1.0 / (1.0 + (error / scale) ** WEIGHT_POWER)


@dataclass(frozen=True)
class WindowFit:
    """A fit on the last depths (its window), its back-test, status and weight in the headline.

    ``score`` is :func:`back_test_weight` of the back-test error (0 without a
    back-test); ``weight`` the share of the fit in the headline mixture (score
    divided by the number of windows of its family, normalized over all fits;
    0 when unphysical or untested).
    """

    fit: Fit
    back_test: Backtest | None
    status: str
    reason: str = ""
    score: float = 0.0
    weight: float = 0.0

    @property
    def family(self) -> str:
        return self.fit.family

    @property
    def back_test_error(self) -> float | None:
        return None if self.back_test is None else self.back_test.max_error

    @property
    def used(self) -> bool:
        return self.status == USED

    def to_json(self) -> dict:
        out = self.fit.to_json()
        out.update(status=self.status, reason=self.reason or None,
                   back_test=self.back_test.to_json() if self.back_test else None,
                   back_test_error=_clean(self.back_test_error), back_test_score=_clean(self.score),
                   weight=_clean(self.weight))
        return out


# ------------------------------------------------------------------ headline
def _mixture_quantiles(means: np.ndarray, sds: np.ndarray, weights: np.ndarray, probs: Sequence[float]) -> list[float]:
    """Quantiles of sum_i w_i N(mean_i, sd_i^2) (weights summing to 1), by bisection (continuous in every input)."""
    from scipy.special import ndtr

    sds = np.maximum(sds, 1e-15 * np.maximum(1.0, np.abs(means)))
    target = np.asarray(probs, dtype=float)
    lo = np.full(target.shape, float(np.min(means - 9 * sds)))
    hi = np.full(target.shape, float(np.max(means + 9 * sds)))
    for _ in range(64):  # all quantiles at once (2^-64 of the bracket)
        mid = 0.5 * (lo + hi)
        below = ndtr((mid[:, None] - means[None, :]) / sds[None, :]) @ weights < target
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return [float(x) for x in 0.5 * (lo + hi)]


@dataclass(frozen=True)
class Estimate:
    """A headline number: central value (mixture median) and range (its central COVERAGE interval).

    ``by_family``: the value of each family's highest-scoring window;
    ``capped``: the high end was cut at the upper bound; ``floored``: the low
    end was raised to V_pmax*.
    """

    central: float
    low: float
    high: float
    n_fits: int
    by_family: dict
    capped: bool = False
    floored: bool = False

    def scaled(self, factor: float) -> "Estimate":
        return Estimate(self.central * factor, self.low * factor, self.high * factor, self.n_fits,
                        {k: v * factor for k, v in self.by_family.items()}, self.capped, self.floored)

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
            "low_raised_to_last_depth": self.floored,
        }


@dataclass(frozen=True)
class LevelEstimate:
    """Predicted depth at which V_p* reaches ``level`` (a ratio of GS, or ALG).

    Depths are real numbers.  ``low`` is where the high band reaches the
    level, ``central`` where the median does, ``high`` where the low band does;
    None means "never" (``high`` None: the depth is not determined by these
    depths).  ``by_family``: each family's highest-scoring window (None: that
    fit saturates below the level).
    """

    name: str
    level: float
    central: float | None
    low: float | None
    high: float | None
    fits_reaching: int
    fits: int
    by_family: dict

    @property
    def determined(self) -> bool:
        return self.high is not None

    def to_json(self) -> dict:
        return {
            "target": self.name,
            "level": _clean(self.level),
            "central": _clean(self.central),
            "low": _clean(self.low),
            "high": _clean(self.high),
            "determined": self.determined,
            "never_means": "None: the band stays below the level at every depth (not determined by these depths)",
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


def _ladder_scale(n: int) -> float:
    """How much longer than the calibrated ladder n depths are (1 up to REFERENCE_DEPTHS)."""
    return max(1.0, n / REFERENCE_DEPTHS)


def _round_half_up(x: float) -> int:
    return int(math.floor(x + 0.5))


def default_holdout(n: int, *, scaled: bool = True) -> int:
    """Held-out depths of the back-test: a quarter of the depths, 1 to 3 up to
    ``REFERENCE_DEPTHS`` depths, a quarter (rounded) beyond (8 of 33).  ``scaled=False``: 1 to 3
    at any n (the rule before the windows grew with the ladder, kept for comparison)."""
    if n <= REFERENCE_DEPTHS or not scaled:
        return max(1, min(3, n // 4))
    return _round_half_up(n / 4)


def window_sizes(n: int, n_params: int, *, scaled: bool = True) -> list[int]:
    """Window sizes (numbers of last depths) of a family with ``n_params`` parameters over n depths.

    n_params + 1 .. n_params + 1 + ``EXTRA_WINDOWS`` up to ``REFERENCE_DEPTHS`` depths; beyond,
    each multiplied by n / ``REFERENCE_DEPTHS`` and rounded, so a window keeps its share of the
    ladder (SK, 33 depths: the cubic's windows are 14, 17, 19, 22 depths instead of 5 .. 8).
    Sizes above n, or too small to leave a degree of freedom, are left out. ``scaled=False``:
    never multiplied (the rule before, kept for comparison).
    """
    f = _ladder_scale(n) if scaled else 1.0
    sizes = {_round_half_up((n_params + 1 + j) * f) for j in range(EXTRA_WINDOWS + 1)}
    return sorted(k for k in sizes if n_params + 1 <= k <= n)


@dataclass
class Extrapolation:
    """Every family over every window, their back-tests and the headline numbers.

    Attributes
    ----------
    fits : list of WindowFit
        Ordered by family (``FAMILIES`` order), then window size.
    holdout : int
        Number of held-out depths h of the back-test.
    weight_scale : float | None
        T of the back-test weight; None without any back-test.
    held_out_gain : float | None
        V_p* at the last depth minus V_p* at the last depth before the held-out ones.
    ground_state, upper_bound : float | None
        GS (when known) and the bound above which a fit is unphysical: the
        lower of GS + its uncertainty and the given rigorous bound.
    limit : Estimate | None
        V_inf headline (None when not earned: see ``declined``).
    declined : str | None
        Why there is no headline, in words (None when there is one).
    at_depth : dict {p: Estimate}
        Predicted V_p at the requested depths.
    levels : list of LevelEstimate
        Predicted depths for the target ratios (and ALG).
    """

    fits: list[WindowFit]
    holdout: int
    weight_scale: float | None
    held_out_gain: float | None
    ground_state: float | None
    upper_bound: float | None
    limit: Estimate | None
    at_depth: dict = field(default_factory=dict)
    levels: list = field(default_factory=list)
    bound_name: str | None = None
    note: str = ESTIMATE_NOTE
    declined: str | None = None
    n_depths: int = 0
    last_depth: int = 0
    last_value: float | None = None
    uncertain_depths: int = 0
    back_test_growth: float = BACKTEST_GROWTH
    window_scale: float = 1.0  # windows and hold-out x this (n / REFERENCE_DEPTHS beyond REFERENCE_DEPTHS depths)
    _bands: dict = field(default_factory=dict, repr=False, compare=False)  # depth -> Estimate

    @property
    def used(self) -> list[WindowFit]:
        return [w for w in self.fits if w.used]

    @property
    def families_used(self) -> list[str]:
        return [f for f in FAMILIES if any(w.family == f for w in self.used)]

    def best_by_family(self) -> dict:
        """{family: its used window with the highest back-test score} (ties: smaller window)."""
        out = {}
        for fam in self.families_used:
            cands = [w for w in self.used if w.family == fam]
            out[fam] = min(cands, key=lambda w: (-w.score, w.fit.k))
        return out

    def family_values(self) -> dict:
        """{family: V_inf of its best window}: what each family gives (used or not, physical or not)."""
        out = {}
        for fam in FAMILIES:
            cands = [w for w in self.fits if w.family == fam]
            if cands:
                w = min(cands, key=lambda c: (-c.score if c.used else 1.0, c.fit.k))
                out[fam] = (w, w.fit.limit)
        return out

    # -- the weighted mixture of predictions
    def _spread_factor(self) -> float:
        return math.sqrt(REFERENCE_DEPTHS / self.n_depths) if self.n_depths < REFERENCE_DEPTHS else 1.0

    def prediction_sd(self, w: WindowFit, depth: float) -> float:
        """Standard deviation of fit ``w``'s prediction at ``depth`` (inf: V_inf); module docstring."""
        fit = w.fit
        x_last = 1.0 / self.last_depth
        x = 0.0 if math.isinf(depth) else 1.0 / depth
        reach = w.back_test.reach if w.back_test is not None else x_last
        grown = self.back_test_growth * (w.back_test_error or 0.0) * max(0.0, x_last - x) / reach
        return math.hypot(fit.standard_error(depth), grown) * self._spread_factor()

    def _band(self, depth: float, probs: Sequence[float]) -> list[float]:
        used = self.used
        means = np.array([float(w.fit.predict(depth)) for w in used])
        sds = np.array([self.prediction_sd(w, depth) for w in used])
        weights = np.array([w.weight for w in used])
        return _mixture_quantiles(means, sds, weights / weights.sum(), probs)

    def estimate_at(self, depth: float) -> Estimate | None:
        """Headline of V at ``depth`` (math.inf: V_inf): mixture median and central interval, cut at
        the upper bound and, beyond the last depth, raised to V_pmax*."""
        if self.declined is not None or not self.used:
            return None
        depth = float(depth)
        if depth not in self._bands:
            self._bands[depth] = self._estimate_at(depth)
        return self._bands[depth]

    def _estimate_at(self, depth: float) -> Estimate:
        tail = (1.0 - COVERAGE) / 2
        low, central, high = self._band(depth, (tail, 0.5, 1.0 - tail))
        capped = floored = False
        if self.upper_bound is not None and high > self.upper_bound:
            high, capped = float(self.upper_bound), True
            central = min(central, high)
        if self.last_value is not None and depth >= self.last_depth and low < self.last_value:
            low, floored = float(self.last_value), True
            central = max(central, low)
        by_family = {fam: float(w.fit.predict(depth)) for fam, w in self.best_by_family().items()}
        return Estimate(float(central), float(low), float(high), len(self.used), by_family, capped, floored)

    def level_estimate(self, name: str, level: float) -> LevelEstimate | None:
        """Depth at which the high band, the median and the low band of V reach ``level``."""
        if self.declined is not None or not self.used:
            return None
        p_last = float(self.last_depth)
        grid = np.geomspace(p_last, 1e6, 161)
        at = [self.estimate_at(float(d)) for d in grid]
        at_inf = self.estimate_at(math.inf)

        def crossing(attr) -> float | None:
            vals = np.array([getattr(e, attr) for e in at])
            if vals[0] >= level:
                return p_last
            idx = np.nonzero(vals >= level)[0]
            if idx.size == 0:
                if getattr(at_inf, attr) < level:
                    return None
                return math.inf  # beyond 1e6
            j = int(idx[0])
            lo, hi = float(grid[j - 1]), float(grid[j])
            for _ in range(50):  # log-bisection on the band, which is continuous in p
                mid = math.sqrt(lo * hi)
                if getattr(self.estimate_at(mid), attr) >= level:
                    hi = mid
                else:
                    lo = mid
            return hi

        by_family = {fam: w.fit.depth_reaching(level) for fam, w in self.best_by_family().items()}
        reaching = sum(1 for w in self.used if w.fit.depth_reaching(level) is not None)
        return LevelEstimate(name, float(level), _clean(crossing("central")), _clean(crossing("high")),
                             _clean(crossing("low")), reaching, len(self.used), by_family)

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
            "held_out_count": self.holdout,  # how many last depths each back-test holds out
            "window_scale": self.window_scale,  # windows and hold-out x this (n / 12 beyond 12 depths)
            "weight_rule": (
                f"weight = 1 / (1 + (back-test error / scale)^{WEIGHT_POWER}) / (windows of the family), "
                f"scale = max({SCALE_GAIN_FRACTION:g} x held-out gain, {SCALE_BEST_FACTOR:g} x smallest "
                "back-test error, 2 x largest held-out uncertainty); 0 when unphysical or not back-tested"
            ),
            "held_out_gain": _clean(self.held_out_gain),
            "weight_scale": _clean(self.weight_scale),
            "ground_state": _clean(self.ground_state),
            "upper_bound": _clean(self.upper_bound),
            "upper_bound_name": self.bound_name,
            "headline_rule": (
                f"each used fit predicts a normal distribution: mean its curve, sd sqrt(se^2 + "
                f"({self.back_test_growth:g} x back-test error x reach)^2) x sqrt({REFERENCE_DEPTHS}/n) when n < "
                f"{REFERENCE_DEPTHS} depths; central: median of the weighted mixture; low/high: its central "
                f"{COVERAGE:.0%}, high cut at the upper bound, low raised to V at the last depth; "
                f"no headline with fewer than {MIN_DEPTHS} depths or {MIN_FAMILIES} families"
            ),
            "declined": self.declined,
            "family_values": {fam: _clean(v) for fam, (_, v) in self.family_values().items()},
            "uncertain_depths": self.uncertain_depths,
            "v_inf": self.limit.to_json() if self.limit else None,
            "ratio_gs_inf": (self.limit.scaled(1.0 / self.ground_state).to_json()
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


def extrapolate(
    depths: Sequence[int],
    values: Sequence[float],
    *,
    uncertainties: Sequence[float | None] | None = None,
    ground_state: float | None = None,
    ground_state_uncertainty: float = 0.0,
    upper_bound: float | None = None,
    upper_bound_name: str = "the first-moment bound",
    threshold: float | None = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    at_depths: Iterable[int] = (),
    holdout: int | None = None,
    families: Iterable[str] | None = None,
    min_depths: int = MIN_DEPTHS,
    min_families: int = MIN_FAMILIES,
    back_test_growth: float = BACKTEST_GROWTH,
    scale_windows: bool = True,
) -> Extrapolation | None:
    """Fit every family over its windows, back-test each, and form the headline numbers.

    Parameters
    ----------
    depths, values : sequences
        Finished depths p (distinct) and V_p* (energy density per spin).
    uncertainties : sequence, optional
        Per-depth standard uncertainty of V_p* (None or 0: exact).  Fits are
        then weighted by 1/sigma^2 and the back-test weight scale is at least
        twice the largest uncertainty of a held-out depth.
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
    min_depths, min_families : int
        Fewer depths, or fewer families with a back-tested physical fit: no headline
        (``declined`` says why; every fit is still listed).
    back_test_growth : float
        How many standard deviations the grown back-test error counts for
        (default :data:`BACKTEST_GROWTH`, chosen by the SK calibration).
    scale_windows : bool
        True (default): beyond ``REFERENCE_DEPTHS`` depths the windows and the hold-out grow in
        proportion to the depths (:func:`window_sizes`, :func:`default_holdout`).  False: the fixed
        windows and hold-out of the earlier rule, for comparison (docs/extrapolation.md).

    Returns
    -------
    Extrapolation or None
        None with fewer than two depths.
    """
    p, v, s = _as_series(depths, values, uncertainties)
    n = p.size
    if n < 2:
        return None
    h = default_holdout(n, scaled=scale_windows) if holdout is None else int(holdout)
    if not 1 <= h < n:
        raise ValueError(f"holdout must be between 1 and {n - 1}, got {h}")
    names = list(FAMILIES) if families is None else list(families)
    for name in names:
        _check_family(name)
    gs = None if ground_state is None else float(ground_state)
    if gs is not None and np.any(v >= gs):
        names = [f for f in names if f != ANCHORED_POWER]  # no positive gap to fit
    candidates = []
    if gs is not None:
        candidates.append((gs + float(ground_state_uncertainty), "GS"))
    if upper_bound is not None:
        candidates.append((float(upper_bound), upper_bound_name))
    bound, bound_name = min(candidates) if candidates else (None, None)

    def sig(lo, hi):
        return None if s is None else s[lo:hi]

    raw: list[tuple[Fit, Backtest | None]] = []
    for name in names:
        fam = FAMILIES[name]
        if fam.needs_ground_state and gs is None:
            continue
        for k in window_sizes(n, fam.n_params, scaled=scale_windows):
            fit = fit_family(name, p[-k:], v[-k:], gs, sig(n - k, n))
            if fit is None:
                continue
            bt = None
            if k <= n - h:
                train = fit_family(name, p[n - h - k: n - h], v[n - h - k: n - h], gs, sig(n - h - k, n - h))
                if train is not None:
                    held = p[n - h:]
                    bt = Backtest(train, tuple(int(d) for d in held),
                                  tuple(float(x) for x in np.atleast_1d(train.predict(held))),
                                  tuple(float(x) for x in v[n - h:]))
            raw.append((fit, bt))

    errors = [bt.max_error for _, bt in raw if bt is not None and math.isfinite(bt.max_error)]
    gain = float(v[-1] - v[n - h - 1]) if n - h - 1 >= 0 else None
    scale = None
    if errors:
        held_noise = 2.0 * float(np.max(s[n - h:])) if s is not None else 0.0
        scale = max(SCALE_GAIN_FRACTION * abs(gain or 0.0), SCALE_BEST_FACTOR * min(errors), held_noise)

    staged = []
    for fit, bt in raw:
        peak = fit.peak_beyond(float(p[-1]))
        if bt is None:
            status, reason = UNTESTED, f"a window of {fit.k} depths leaves no earlier depths for a back-test"
        elif bound is not None and fit.family != ANCHORED_POWER and peak > bound:
            status, reason = UNPHYSICAL, f"fitted curve reaches {peak:.4f} > {bound_name} {bound:.4f}"
        else:
            status, reason = USED, ""
        score = back_test_weight(bt.max_error, scale) if bt is not None else 0.0
        staged.append((fit, bt, status, reason, score))
    windows_per_family = {}
    for fit, bt, *_ in staged:
        if bt is not None:
            windows_per_family[fit.family] = windows_per_family.get(fit.family, 0) + 1
    raw_weights = [score / windows_per_family[fit.family] if status == USED else 0.0
                   for fit, bt, status, _, score in staged]
    total = sum(raw_weights)
    fits = [WindowFit(fit, bt, status, reason, score, (wt / total) if total > 0 else 0.0)
            for (fit, bt, status, reason, score), wt in zip(staged, raw_weights)]

    result = Extrapolation(fits, h, scale, gain, gs, bound, None, bound_name=bound_name, n_depths=n,
                           last_depth=int(p[-1]), last_value=float(v[-1]),
                           uncertain_depths=0 if s is None else int(np.sum(s > 0)),
                           back_test_growth=float(back_test_growth),
                           window_scale=_ladder_scale(n) if scale_windows else 1.0)
    n_families = len({w.family for w in fits if w.used and w.weight > 0})
    if n < min_depths:
        result.declined = f"too few depths for an extrapolation ({n}, at least {min_depths} needed)"
    elif n_families < min_families:
        result.declined = (f"too few fit families with a back-tested fit below the upper bound ({n_families}, "
                           f"at least {min_families} needed)")
    if result.declined is not None:
        return result
    result.limit = result.estimate_at(math.inf)
    result.at_depth = {int(d): result.estimate_at(float(d)) for d in sorted(set(int(d) for d in at_depths))}
    if gs is not None:
        for r in target_ratios:
            result.levels.append(result.level_estimate(f"ratio {r:g}", r * gs))
        if threshold is not None and threshold < gs:
            result.levels.append(result.level_estimate("ALG", float(threshold)))
    return result
