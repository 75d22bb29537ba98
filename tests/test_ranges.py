"""Extreme values: inside the representable range the passes agree with a high-precision reference.

Reference: the dense path sum evaluated with mpmath at 40 digits (tests/precise_reference.py,
written from the definitions in Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022) and
Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306), which has no overflow and no
cancellation trouble at these depths.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from leadline.kernels.exact import (
    evaluate,
    EXPONENT_LIMIT,
    RangeError,
    check_pass_range,
    check_range,
    exponent_bound,
)
from leadline.kernels.mixture import parse_mixture
from leadline.tests.dense_reference import dense_value
from leadline.tests.precise_reference import precise_run

# (xi, gamma, beta): large angles and weights, all inside the range (E <= 350)
IN_RANGE = [
    ("2:0.5", [5.0], [0.3]),  # E = 50, V ~ 9e-22
    ("2:0.5", [13.0], [0.3]),  # E = 338, V ~ 2e-146
    ("2:0.5", [3.0, 3.0], [0.3, 0.2]),
    ("2:0.5", [6.0, 6.0], [0.3, 0.2]),  # E = 288
    ("3:1", [2.0, 2.0], [0.3, 0.2]),
    ("3:1", [4.0, -3.0], [0.3, 0.2]),  # E = 294
    ("2:40", [0.9], [0.7]),  # large weight: xi'(1) = 80, E = 130
    ("2:0.5,3:1", [1.0, 1.5, 0.5], [0.3, 0.2, 0.1]),  # p = 3, E = 72
]


def _precise(spec, gamma, beta):
    mix = parse_mixture(spec)
    weights = {q: repr(w) for q, w in mix.terms}
    return precise_run(weights, [repr(x) for x in gamma], [repr(x) for x in beta], dps=40)


@pytest.mark.parametrize("spec,gamma,beta", IN_RANGE)
def test_in_range_values_agree_with_mpmath(spec, gamma, beta):
    mix = parse_mixture(spec)
    assert exponent_bound(mix, gamma) <= EXPONENT_LIMIT
    check_range(mix, gamma)  # accepted
    ref = _precise(spec, gamma, beta)
    for impl in ("blocked", "rowwise"):
        from leadline.kernels.exact import IMPLEMENTATIONS

        value = evaluate(mix, gamma, beta, run_pass=IMPLEMENTATIONS[impl]).value
        # absolute agreement at the rounding level of O(1) correlations ...
        assert abs(value - float(ref["value"])) <= 1e-14, (impl, value, ref["value"])
        # ... and where V is far below 1 but a normal double, the tiny value itself comes out right
        if abs(float(ref["value"])) < 1e-20:
            assert value == pytest.approx(float(ref["value"]), rel=1e-6)


def test_p1_closed_form_far_out():
    # SK (xi = x^2/2) at p = 1: V_1 = g sin(4b) exp(-2 g^2)
    # (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022)); mpmath agrees at 40 digits
    ref = _precise("2:0.5", [13.0], [0.3])
    with mpmath.workdps(40):
        closed = 13 * mpmath.sin(4 * mpmath.mpf("0.3")) * mpmath.exp(-338)
        assert abs(ref["value"] / closed - 1) < mpmath.mpf("1e-30")


# beyond the range the double-precision passes break (measured): the check refuses them first
OUT_OF_RANGE = [
    ("2:0.5", [18.5], [0.3]),  # E = 684: a factor underflows and the value comes out halved
    ("2:0.5", [9.0, 9.0], [0.3, 0.2]),  # E = 648: value wrong in the second digit
    ("2:0.5", [50.0], [0.3]),  # E = 5000: nan weights
    ("2:2000", [0.5], [0.3]),
    ("3:1e6", [0.5], [0.3]),
]


@pytest.mark.parametrize("spec,gamma,beta", OUT_OF_RANGE)
def test_out_of_range_is_refused(spec, gamma, beta):
    mix = parse_mixture(spec)
    with pytest.raises(RangeError, match=r"sum_t \|gamma_t\| <="):
        check_range(mix, gamma)


def test_limit_is_where_double_precision_starts_to_fail():
    # just past the limit the pass is measurably wrong against mpmath: the limit is not arbitrary
    with np.errstate(all="ignore"):
        value = evaluate(parse_mixture("2:0.5"), [18.5], [0.3]).value
    ref = float(_precise("2:0.5", [18.5], [0.3])["value"])
    assert ref > 1e-300 and abs(value / ref - 1) > 0.1


def test_bound_holds_for_every_pass():
    # the range check uses |G[j,k]| <= 1 for every contour correlation; check it on the dense
    # reference for random angles and mixtures, and that each pass's own exponent bound stays below
    rng = np.random.default_rng(19)
    for spec in ("2:0.5", "3:1", "2:0.3,4:0.7", "1:0.2,3:0.5"):
        mix = parse_mixture(spec)
        for p in (1, 2, 3):
            g = rng.uniform(-1.5, 1.5, p)
            b = rng.uniform(-1.0, 1.0, p)
            _, Gs, _ = dense_value(mix, g, b, return_all=True)
            Gam = np.concatenate([g, [0.0], -g[::-1]])
            for G in Gs:
                assert np.max(np.abs(G)) <= 1 + 1e-12
                M = np.outer(Gam, Gam) * mix.dxi(G)
                assert check_pass_range(M) <= exponent_bound(mix, g) + 1e-9


def test_large_weight_scales_like_the_model():
    # xi -> c xi with gamma -> gamma / sqrt(c) multiplies V by sqrt(c) (H -> sqrt(c) H);
    # a large weight inside the range therefore reproduces the SK value exactly
    # (SK p = 1 optimum 1/sqrt(4e), Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022))
    c = 1e4
    mix = parse_mixture(f"2:{0.5 * c}")
    v = evaluate(mix, [0.5 / math.sqrt(c)], [math.pi / 8]).value
    assert v == pytest.approx(math.sqrt(c) / math.sqrt(4 * math.e), rel=1e-12)
