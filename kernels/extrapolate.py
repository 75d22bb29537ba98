"""Extrapolation of the optimal QAOA energy V_p* to infinite depth.

Pure numerics (numpy only): no I/O. Two families of fits, both applied to the
optimal energies V_p* (energy density per spin, dimensionless, in the tool's
normalization E[H(z)H(z')] = n xi(R); larger is better) of consecutive depths.

1. Polynomials in x = 1/p,  V(x) = c_0 + c_1 x + ... + c_d x^d,  of degree
   d = 1, 2, 3, least squares over the last k finished depths, for several k.
   The extrapolated value is V_inf = c_0.  The central estimate is the median
   of V_inf over all fits, and the spread (half the range of V_inf across the
   fits) is reported as its uncertainty.  This is an ESTIMATE of how much the
   answer depends on the arbitrary choice of fit, NOT a bound: nothing
   guarantees that V_p* follows a low-degree polynomial in 1/p, and the true
   limit may lie outside central +- spread.

2. A power law for the gap to a reference energy E_ref (the ground state GS):
   E_ref - V_p* ~ A p^(-alpha), by least squares of log(gap) against log(p)
   over the last k depths.  It predicts the depth at which V_p*/GS would reach
   a target ratio r, p(r) = (A / ((1 - r) GS))^(1/alpha), and, when the
   algorithmic threshold ALG < GS is known, the depth at which V_p* would reach
   ALG.  These are extrapolations far beyond the data: estimates, not bounds.

Every result is a plain object with ``to_json()``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np

__all__ = [
    "ESTIMATE_NOTE",
    "PolynomialFit",
    "Extrapolation",
    "PowerLawGap",
    "fit_polynomial",
    "extrapolate",
    "fit_power_law_gap",
    "power_law_gaps",
    "depth_for_level",
    "depth_for_ratio",
]

ESTIMATE_NOTE = (
    "Extrapolations to p -> infinity and predicted depths are estimates from a finite number of "
    "depths, not bounds: the spread across fit families measures how much the answer depends on "
    "the fit, not a guaranteed error."
)

DEFAULT_DEGREES = (1, 2, 3)
DEFAULT_TARGET_RATIOS = (0.95, 0.99)


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


# ---------------------------------------------------------------- polynomials
@dataclass(frozen=True)
class PolynomialFit:
    """Least-squares polynomial in x = 1/p fitted to V_p* at the given depths.

    Attributes
    ----------
    degree : int
        Polynomial degree d (1, 2 or 3).
    depths : tuple of int
        The k depths used (the last k finished depths), ascending.
    coefficients : tuple of float, length d + 1
        c_0 .. c_d in ascending powers of x = 1/p; ``coefficients[0]`` is V_inf.
    rms_residual : float
        Root-mean-square residual over the fitted depths (0 when k = d + 1:
        the polynomial then interpolates the points exactly).
    """

    degree: int
    depths: tuple[int, ...]
    coefficients: tuple[float, ...]
    rms_residual: float

    @property
    def k(self) -> int:
        return len(self.depths)

    @property
    def limit(self) -> float:
        """The extrapolated value V_inf = c_0 (fit evaluated at 1/p = 0)."""
        return self.coefficients[0]

    def predict(self, inverse_depth) -> np.ndarray | float:
        """The fitted V at x = 1/p (array or scalar, any shape)."""
        x = np.asarray(inverse_depth, dtype=float)
        out = np.polynomial.polynomial.polyval(x, np.asarray(self.coefficients))
        return out if np.ndim(out) else float(out)

    def depth_reaching(self, level: float) -> float | None:
        """Smallest real depth p > max(depths) where the fitted curve reaches ``level``.

        Solves V(x) = level for x in (0, 1/max(depths)], returns 1/x for the
        largest such root (the first crossing when p increases), or None when
        the fitted curve stays below ``level`` all the way to 1/p = 0.  If the
        last fitted point is already at or above the level, returns that depth.
        """
        p_last = max(self.depths)
        if self.predict(1.0 / p_last) >= level:
            return float(p_last)
        shifted = np.array(self.coefficients, dtype=float)
        shifted[0] -= level
        roots = np.polynomial.polynomial.polyroots(shifted)
        real = [r.real for r in np.atleast_1d(roots) if abs(r.imag) <= 1e-12 * max(1.0, abs(r.real))]
        inside = [x for x in real if 0.0 < x <= 1.0 / p_last]
        if not inside:
            return None
        return 1.0 / max(inside)

    def to_json(self) -> dict:
        return {
            "family": "polynomial in 1/p",
            "degree": self.degree,
            "k": self.k,
            "depths": list(self.depths),
            "coefficients": [float(c) for c in self.coefficients],
            "limit": float(self.limit),
            "rms_residual": float(self.rms_residual),
        }


def fit_polynomial(depths: Sequence[int], values: Sequence[float], degree: int) -> PolynomialFit:
    """Least-squares polynomial of ``degree`` in 1/p through (p, V_p*).

    Parameters
    ----------
    depths : sequence of int, length k >= degree + 1
    values : sequence of float, length k
        V_p* in energy density per spin.
    degree : int >= 0
    """
    p, v = _as_series(depths, values)
    if p.size < degree + 1:
        raise ValueError(f"a degree-{degree} fit needs at least {degree + 1} depths, got {p.size}")
    x = 1.0 / p
    vander = np.vander(x, degree + 1, increasing=True)
    coef, *_ = np.linalg.lstsq(vander, v, rcond=None)
    resid = v - vander @ coef
    rms = float(np.sqrt(np.mean(resid**2)))
    if p.size == degree + 1:
        rms = 0.0
    return PolynomialFit(
        degree=degree,
        depths=tuple(int(d) for d in p),
        coefficients=tuple(float(c) for c in coef),
        rms_residual=rms,
    )


@dataclass(frozen=True)
class Extrapolation:
    """V_p* extrapolated to p -> infinity from several polynomial fits in 1/p.

    Attributes
    ----------
    fits : tuple of PolynomialFit
        Every (degree, k) fit that the data allowed, ordered by degree then k.
    central : float
        Median of the fits' V_inf (energy density per spin).
    spread : float
        Half the range of V_inf across the fits: reported as the uncertainty
        of ``central``.  An estimate of the fit dependence, NOT a bound.
    low, high : float
        Smallest and largest V_inf across the fits.
    """

    fits: tuple[PolynomialFit, ...]
    central: float
    spread: float
    low: float
    high: float
    note: str = ESTIMATE_NOTE

    @property
    def representative(self) -> PolynomialFit:
        """The fit whose V_inf is closest to the central value (ties: lowest degree, smallest k)."""
        return min(self.fits, key=lambda f: (abs(f.limit - self.central), f.degree, f.k))

    def depth_reaching(self, level: float) -> dict:
        """Depth at which the fitted curves reach ``level``, summarized over the fits.

        Returns {"level", "median_depth" (float or None), "fits_reaching": int,
        "fits": int}.  ``median_depth`` is the median over the fits that reach
        the level at some finite depth; None if fewer than half of them do
        (then most fits extrapolate to a V_inf below the level).  An estimate.
        """
        reached = [d for d in (f.depth_reaching(level) for f in self.fits) if d is not None]
        enough = len(reached) * 2 >= len(self.fits) and reached
        return {
            "level": float(level),
            "median_depth": _clean(float(np.median(reached))) if enough else None,
            "fits_reaching": len(reached),
            "fits": len(self.fits),
        }

    def to_json(self) -> dict:
        return {
            "central": float(self.central),
            "spread": float(self.spread),
            "low": float(self.low),
            "high": float(self.high),
            "uncertainty_meaning": "half the range of V_inf across fits; an estimate, not a bound",
            "fits": [f.to_json() for f in self.fits],
            "note": self.note,
        }


def _windows(n: int, degree: int, max_extra: int) -> list[int]:
    """Window sizes k for one degree: from degree + 1 up to degree + 1 + max_extra, at most n."""
    return [k for k in range(degree + 1, min(n, degree + 1 + max_extra) + 1)]


def extrapolate(
    depths: Sequence[int],
    values: Sequence[float],
    *,
    degrees: Iterable[int] = DEFAULT_DEGREES,
    max_extra_points: int = 3,
) -> Extrapolation | None:
    """Fit V_p* with polynomials in 1/p over the last k depths and summarize V_inf.

    For each degree d in ``degrees`` and each window k = d + 1, ..., d + 1 +
    ``max_extra_points`` (at most the number of depths), fit the last k depths.
    Small windows weight the largest depths (closest to the limit), larger
    windows average noise but include small depths where the 1/p expansion is
    poorest; the spread across all of them is the reported uncertainty.

    Parameters
    ----------
    depths : sequence of int
        Finished depths p (need not start at 1, must be distinct).
    values : sequence of float
        V_p* at those depths (energy density per spin).

    Returns
    -------
    Extrapolation or None
        None when fewer than two depths are available (no fit possible).
    """
    p, v = _as_series(depths, values)
    fits = []
    for d in sorted(set(int(d) for d in degrees)):
        if d < 1:
            raise ValueError(f"degrees must be >= 1, got {d}")
        for k in _windows(p.size, d, max_extra_points):
            fits.append(fit_polynomial(p[-k:], v[-k:], d))
    if not fits:
        return None
    limits = np.array([f.limit for f in fits])
    return Extrapolation(
        fits=tuple(fits),
        central=float(np.median(limits)),
        spread=float((limits.max() - limits.min()) / 2.0),
        low=float(limits.min()),
        high=float(limits.max()),
    )


# ------------------------------------------------------------ power-law gap
def depth_for_level(amplitude: float, exponent: float, gap: float) -> float | None:
    """Depth p at which A p^(-alpha) equals ``gap`` (> 0): p = (A / gap)^(1/alpha).

    None when alpha <= 0 (the fitted gap does not close) or gap <= 0.
    """
    if not (gap > 0 and exponent > 0 and amplitude > 0):
        return None
    return _clean((amplitude / gap) ** (1.0 / exponent))


def depth_for_ratio(amplitude: float, exponent: float, reference: float, ratio: float) -> float | None:
    """Depth at which V_p / reference = ratio under reference - V_p = A p^(-alpha).

    p(r) = (A / ((1 - r) * reference))^(1/alpha), for 0 < r < 1 and reference > 0.
    """
    if not (0 < ratio < 1 and reference > 0):
        return None
    return depth_for_level(amplitude, exponent, (1.0 - ratio) * reference)


@dataclass(frozen=True)
class PowerLawGap:
    """Fit of reference - V_p* = A p^(-alpha) over the last k depths (log-log least squares).

    Attributes
    ----------
    reference : float
        The energy the gap is measured to (the ground state GS), energy density per spin.
    depths : tuple of int
        The k depths used.
    amplitude, exponent : float
        A and alpha.
    rms_log_residual : float
        RMS residual of log(gap) (0 for k = 2).
    ratio_depths : dict {ratio: depth or None}
        Predicted (real-valued) depth where V_p*/reference reaches each target ratio.
    threshold_depth : float or None
        Predicted depth where V_p* reaches the algorithmic threshold (only when
        ALG is known and below the reference).
    """

    reference: float
    depths: tuple[int, ...]
    amplitude: float
    exponent: float
    rms_log_residual: float
    ratio_depths: dict = field(default_factory=dict)
    threshold: float | None = None
    threshold_depth: float | None = None
    note: str = ESTIMATE_NOTE

    @property
    def k(self) -> int:
        return len(self.depths)

    def gap(self, depth) -> np.ndarray | float:
        """Fitted gap A p^(-alpha) at depth(s) p (real, > 0)."""
        return self.amplitude * np.asarray(depth, dtype=float) ** (-self.exponent)

    def predict(self, depth) -> np.ndarray | float:
        """Fitted V_p = reference - A p^(-alpha)."""
        out = self.reference - self.gap(depth)
        return out if np.ndim(out) else float(out)

    def to_json(self) -> dict:
        return {
            "family": "power law reference - V_p = A p^-alpha",
            "reference": float(self.reference),
            "k": self.k,
            "depths": list(self.depths),
            "amplitude": float(self.amplitude),
            "exponent": float(self.exponent),
            "rms_log_residual": float(self.rms_log_residual),
            "depth_for_ratio": {f"{r:g}": _clean(d) for r, d in self.ratio_depths.items()},
            "threshold": _clean(self.threshold),
            "depth_for_threshold": _clean(self.threshold_depth),
            "note": self.note,
        }


def fit_power_law_gap(
    depths: Sequence[int],
    values: Sequence[float],
    reference: float,
    *,
    k: int | None = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    threshold: float | None = None,
) -> PowerLawGap | None:
    """Fit reference - V_p* = A p^(-alpha) by least squares of log gap vs log p.

    Parameters
    ----------
    depths, values : sequences
        Finished depths and V_p* (energy density per spin).
    reference : float
        Ground-state energy density GS (> 0), the level the gap closes to.
    k : int, optional
        Use the last k depths (default: all). Needs k >= 2.
    target_ratios : iterable of float in (0, 1)
        Approximation ratios V_p*/GS for which the depth is predicted.
    threshold : float, optional
        Algorithmic threshold ALG; when 0 < ALG < reference, also predict the
        depth where V_p* reaches it.

    Returns
    -------
    PowerLawGap or None
        None if fewer than two usable depths (a gap must be > 0: a value at or
        above the reference is not fitted).
    """
    p, v = _as_series(depths, values)
    if k is not None:
        p, v = p[-k:], v[-k:]
    gap = reference - v
    if p.size < 2 or np.any(gap <= 0):
        return None
    lp, lg = np.log(p), np.log(gap)
    design = np.column_stack([np.ones_like(lp), -lp])
    (log_a, alpha), *_ = np.linalg.lstsq(design, lg, rcond=None)
    resid = lg - design @ np.array([log_a, alpha])
    rms = 0.0 if p.size == 2 else float(np.sqrt(np.mean(resid**2)))
    amplitude = float(np.exp(log_a))
    ratios = {float(r): depth_for_ratio(amplitude, alpha, reference, r) for r in target_ratios}
    thr_depth = None
    if threshold is not None and 0 < threshold < reference:
        thr_depth = depth_for_level(amplitude, alpha, reference - threshold)
    return PowerLawGap(
        reference=float(reference),
        depths=tuple(int(d) for d in p),
        amplitude=amplitude,
        exponent=float(alpha),
        rms_log_residual=rms,
        ratio_depths=ratios,
        threshold=_clean(threshold),
        threshold_depth=thr_depth,
    )


def power_law_gaps(
    depths: Sequence[int],
    values: Sequence[float],
    reference: float,
    *,
    windows: Iterable[int] | None = None,
    target_ratios: Iterable[float] = DEFAULT_TARGET_RATIOS,
    threshold: float | None = None,
) -> list[PowerLawGap]:
    """Power-law gap fits over several windows of last depths (default k = 3, 4, 5, capped at n).

    With fewer than three depths, the single window k = n (>= 2) is used.
    """
    p, v = _as_series(depths, values)
    n = p.size
    if windows is None:
        windows = [k for k in (3, 4, 5) if k <= n] or ([n] if n >= 2 else [])
    out = []
    for k in windows:
        fit = fit_power_law_gap(p, v, reference, k=k, target_ratios=target_ratios, threshold=threshold)
        if fit is not None:
            out.append(fit)
    return out
