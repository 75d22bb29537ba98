"""Depth-extrapolation fits and the shipped ground-state table.

The fitter is tested on synthetic series generated here from stated models
(this tests the fitting code, not physics); the shipped reference values are
checked against their published sources.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from leadline.kernels.extrapolate import (
    ESTIMATE_NOTE,
    depth_for_ratio,
    extrapolate,
    fit_polynomial,
    fit_power_law_gap,
    power_law_gaps,
)
from leadline.kernels.ground_states import SHIPPED_GROUND_STATES, lookup_ground_state, union_bound
from leadline.kernels.mixture import parse_mixture

DEPTHS = np.arange(1, 13)


def quadratic_model(p, v_inf=0.75, a=0.5, b=0.1):
    """Synthetic V_p = v_inf - a/p + b/p^2 (a stated model, not physics data)."""
    p = np.asarray(p, dtype=float)
    return v_inf - a / p + b / p**2


# ------------------------------------------------------------ polynomials
def test_exact_polynomial_series_is_recovered_by_every_fit_that_can_represent_it():
    values = quadratic_model(DEPTHS)
    ex = extrapolate(DEPTHS, values)
    assert ex is not None
    degrees = {f.degree for f in ex.fits}
    assert degrees == {1, 2, 3}
    for fit in ex.fits:
        if fit.degree >= 2:
            assert fit.limit == pytest.approx(0.75, abs=1e-9)
            assert fit.rms_residual < 1e-10
        else:
            # a straight line through a curved series is biased by about b / (p_i p_j)
            assert abs(fit.limit - 0.75) < 0.1 / (DEPTHS[-fit.k] * DEPTHS[-fit.k + 1]) * 1.01 + 1e-12
    # every fit uses the LAST k depths
    for fit in ex.fits:
        assert fit.depths == tuple(int(d) for d in DEPTHS[-fit.k :])
    assert ex.low <= ex.central <= ex.high
    assert ex.spread == pytest.approx((ex.high - ex.low) / 2)


def test_noisy_series_limit_recovered_within_the_reported_spread():
    rng = np.random.default_rng(20240611)
    sigma = 2e-5
    values = quadratic_model(DEPTHS) + sigma * rng.standard_normal(DEPTHS.size)
    ex = extrapolate(DEPTHS, values)
    assert abs(ex.central - 0.75) < 3e-3
    assert abs(ex.central - 0.75) <= ex.spread
    assert "not bounds" in ex.note and ex.note == ESTIMATE_NOTE


def test_spread_is_proportional_to_the_noise_on_a_series_every_fit_represents():
    # V_p = 0.6 - 0.3/p: every fit of degree >= 1 is exact without noise, and
    # each fitted limit is linear in the data, so the spread scales with sigma.
    z = np.random.default_rng(7).standard_normal(DEPTHS.size)
    clean = 0.6 - 0.3 / DEPTHS
    assert extrapolate(DEPTHS, clean).spread < 1e-12
    spreads = [extrapolate(DEPTHS, clean + s * z).spread for s in (1e-6, 1e-4, 1e-2)]
    assert spreads[0] > 0
    assert spreads[1] == pytest.approx(100 * spreads[0], rel=1e-5)
    assert spreads[2] == pytest.approx(100 * spreads[1], rel=1e-5)


def test_spread_grows_with_noise_for_a_curved_series_over_several_seeds():
    for seed in range(5):
        z = np.random.default_rng(seed).standard_normal(DEPTHS.size)
        small = extrapolate(DEPTHS, quadratic_model(DEPTHS) + 1e-6 * z).spread
        large = extrapolate(DEPTHS, quadratic_model(DEPTHS) + 1e-2 * z).spread
        assert large > 3 * small


def test_few_depths():
    assert extrapolate([1], [0.3]) is None
    ex = extrapolate([1, 2], [0.3, 0.4])
    assert [(f.degree, f.k) for f in ex.fits] == [(1, 2)]
    assert ex.central == pytest.approx(0.5)  # line through (1, 0.3), (1/2, 0.4) hits 0.5 at 1/p = 0
    with pytest.raises(ValueError):
        fit_polynomial([1, 2], [0.3, 0.4], 2)
    with pytest.raises(ValueError):
        extrapolate([1, 1], [0.3, 0.4])


def test_polynomial_depth_reaching_a_level():
    fit = fit_polynomial([2, 3, 4], 0.8 - 0.5 / np.array([2, 3, 4]), 1)
    assert fit.depth_reaching(0.7) == pytest.approx(5.0)  # 0.8 - 0.5/p = 0.7 at p = 5
    assert fit.depth_reaching(0.9) is None  # the line tops out at 0.8
    assert fit.depth_reaching(0.5) == 4.0  # already reached at the last depth


# -------------------------------------------------------------- power law
def test_power_law_fit_recovers_parameters_and_predicted_depths():
    gs, amplitude, alpha = 1.0, 0.6, 0.7
    depths = np.arange(3, 11)
    values = gs - amplitude * depths ** (-alpha)
    fit = fit_power_law_gap(depths, values, gs, threshold=0.97)
    assert fit.amplitude == pytest.approx(amplitude, rel=1e-10)
    assert fit.exponent == pytest.approx(alpha, rel=1e-10)
    for ratio in (0.95, 0.99):
        expected = (amplitude / ((1 - ratio) * gs)) ** (1 / alpha)
        assert fit.ratio_depths[ratio] == pytest.approx(expected, rel=1e-9)
        # the fitted V at the predicted depth has exactly the target ratio
        assert fit.predict(fit.ratio_depths[ratio]) / gs == pytest.approx(ratio, rel=1e-10)
    assert fit.threshold_depth == pytest.approx((amplitude / 0.03) ** (1 / alpha), rel=1e-9)
    js = fit.to_json()
    assert js["depth_for_ratio"]["0.95"] == pytest.approx(fit.ratio_depths[0.95])


def test_power_law_windows_and_edge_cases():
    depths = np.arange(1, 9)
    values = 2.0 - 1.5 * depths**-0.5
    fits = power_law_gaps(depths, values, 2.0)
    assert [f.k for f in fits] == [3, 4, 5]
    for f in fits:
        assert f.exponent == pytest.approx(0.5, rel=1e-10)
    assert power_law_gaps([1, 2], [0.3, 0.4], 1.0)[0].k == 2
    # a value at or above the reference cannot be fitted as a positive gap
    assert fit_power_law_gap([1, 2, 3], [0.3, 0.4, 1.2], 1.0) is None
    assert depth_for_ratio(1.0, -0.2, 1.0, 0.95) is None  # a growing gap never closes


# --------------------------------------------------- shipped ground states
def test_sk_parisi_value_in_the_tool_normalization():
    # Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002): E_0 = -0.763166 per spin for SK (xi = x^2/2)
    match = lookup_ground_state(parse_mixture("2:0.5"))
    assert match.ground_state == pytest.approx(0.763166, abs=1e-9)
    assert match.scale == 1.0
    assert "Crisanti" in match.source and "046137" in match.source
    # exact scaling law GS(c xi) = sqrt(c) GS(xi): xi = x^2 is c = 2
    match2 = lookup_ground_state(parse_mixture("2:1"))
    assert match2.ground_state == pytest.approx(0.763166 * math.sqrt(2), rel=1e-12)
    assert match2.scale == 1.0  # shipped as its own entry
    match3 = lookup_ground_state(parse_mixture("2:4.5"))  # c = 9 times SK
    assert match3.ground_state == pytest.approx(3 * 0.763166, rel=1e-12)
    assert match3.uncertainty == pytest.approx(3 * match.uncertainty)


def test_unknown_mixtures_get_no_value():
    assert lookup_ground_state(parse_mixture("2:0.5,4:0.5")) is None
    assert lookup_ground_state(parse_mixture("5:1")) is None
    assert lookup_ground_state(parse_mixture("1:1,2:0.5")) is None


def test_every_shipped_value_is_sourced_and_below_the_union_bound():
    for entry in SHIPPED_GROUND_STATES:
        assert entry.source and entry.uncertainty > 0
        if entry.from_memory:
            assert "from memory" in entry.source
        # first-moment bound sqrt(2 ln 2 xi(1)); for pure q-spin the q -> infinity limit
        # (random energy model, Derrida, Phys. Rev. B 24, 2613 (1981))
        assert entry.ground_state < union_bound(entry.mixture)
    # pure 3-spin lies between the SK (q = 2) value at equal variance and the REM limit
    q2 = lookup_ground_state(parse_mixture("2:1")).ground_state
    q3 = lookup_ground_state(parse_mixture("3:1")).ground_state
    assert q2 < q3 < math.sqrt(2 * math.log(2))
    assert union_bound(parse_mixture("3:1")) == pytest.approx(1.177410, abs=1e-6)
