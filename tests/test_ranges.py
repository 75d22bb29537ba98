"""Extreme values: wherever the value is computed, the passes agree with a high-precision reference.

Reference: the dense path sum evaluated with mpmath at 40-60 digits (tests/precise_reference.py,
written from the definitions in Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022) and
Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306), which has no overflow and no
cancellation trouble at these depths; mpmath: Johansson et al., a Python library for
arbitrary-precision floating-point arithmetic.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from leadline.kernels.exact import (
    EXPONENT_LIMIT,
    EXPONENT_MAX,
    IMPLEMENTATIONS,
    PassIntegrityError,
    PassRangeError,
    RangeError,
    check_pass_range,
    check_range,
    evaluate,
    exponent_bound,
    p1_log_value,
    p1_max_gamma,
    pass_partials,
    plan_chunks,
    prepare_low_side,
    sum_w_tolerance,
)
from leadline.kernels.exact import _ranges as ranges
from leadline.kernels.mixture import parse_mixture
from leadline.tests.dense_reference import dense_value
from leadline.tests.precise_reference import precise_run

EPS = float(np.finfo(float).eps)

# (xi, gamma, beta): large angles and weights inside the plain factorized range (E <= 350)
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


def _precise(spec, gamma, beta, dps=40):
    mix = parse_mixture(spec)
    weights = {q: repr(w) for q, w in mix.terms}
    return precise_run(weights, [repr(float(x)) for x in gamma], [repr(float(x)) for x in beta], dps=dps)


@pytest.mark.parametrize("spec,gamma,beta", IN_RANGE)
def test_in_range_values_agree_with_mpmath(spec, gamma, beta):
    mix = parse_mixture(spec)
    assert exponent_bound(mix, gamma) <= EXPONENT_LIMIT
    check_range(mix, gamma, beta)  # accepted
    ref = _precise(spec, gamma, beta)
    for impl in ("blocked", "rowwise"):
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


# beyond the old limit E <= 350: (xi, gamma, beta); values from 1e-759 to 45, p = 1..3
BEYOND = [
    ("2:0.5", [18.5], [0.3]),  # E = 684, V ~ 9e-297 (the old passes halved it)
    ("2:0.5", [9.0, 9.0], [0.3, 0.2]),  # E = 648, V ~ 3e-26
    ("2:0.5", [20.0, 20.0], [0.3, 0.2]),  # E = 3200, V ~ 9e-123
    ("2:0.5", [50.0, 50.0], [0.3, 0.2]),  # E = 2e4, V ~ 2e-759: below the double range, comes out 0
    ("2:0.5", [50.0, -49.5], [0.01, 0.3]),  # E = 2e4, V ~ 0.038: needs the log form
    ("2:0.5", [0.1, 50.0], [0.3, 0.2]),  # E = 5e3, V ~ 0.078
    ("2:0.5", [0.1, 5000.0], [0.3, 0.2]),  # E = 5e7
    ("3:1", [10.0, -10.0], [0.3, 0.2]),  # E = 2400, V ~ -4e-166
    ("3:1e6", [0.001, 0.5], [0.3, 0.2]),  # E = 1.5e6, V ~ 4.47
    ("3:1e9", [0.0001, 0.3], [0.3, 0.2]),  # E = 5.4e8, V ~ 1.6e-21
    ("2:0.5", [5.0, 5.0, 5.0], [0.3, 0.2, 0.1]),  # E = 450, V ~ 1.4e-9
    ("2:0.5", [0.2, 0.4, 50.0], [0.3, 0.2, 0.1]),  # E = 5e3
    ("2:0.5,3:1", [0.3, 30.0, 0.5], [0.3, 0.2, 0.1]),  # E = 7.6e3
    ("2:2000", [0.01, 0.5, 0.02], [0.3, 0.2, 0.1]),  # E = 2.3e3, V ~ 14.3
    ("2:1e6", [0.0003, 0.001, 0.5], [0.3, 0.2, 0.1]),  # E = 1e6, V ~ 340
]


def value_tolerance(E: float, ref: float) -> float:
    """Stated accuracy of a value: rounding of the exponents, eps E, relative to max(1, |V|)."""
    return (1e-13 + 4 * EPS * E) * max(1.0, abs(ref))


@pytest.mark.parametrize("spec,gamma,beta", BEYOND)
def test_values_beyond_the_old_limit_agree_with_mpmath(spec, gamma, beta):
    mix = parse_mixture(spec)
    E = exponent_bound(mix, gamma)
    assert EXPONENT_LIMIT < E <= EXPONENT_MAX
    check_range(mix, gamma, beta)  # accepted now
    ref = float(_precise(spec, gamma, beta, dps=60)["value"])
    for impl in ("blocked", "rowwise"):
        for contour in ("growing", "full"):
            ev = evaluate(mix, gamma, beta, run_pass=IMPLEMENTATIONS[impl], contour=contour)
            assert abs(ev.value - ref) <= value_tolerance(E, ref), (impl, contour, ev.value, ref)
            assert ev.residuals["sum_w"] <= sum_w_tolerance(len(gamma), E)


# on the default path (growing contour) these tiny values come out to many digits, not only
# to the absolute accuracy above (measured; the full-contour baseline resolves them to ~1e-17 only)
TINY = [
    ("2:0.5", [18.5], [0.3]),
    ("2:0.5", [20.0, 20.0], [0.3, 0.2]),
    ("3:1", [10.0, -10.0], [0.3, 0.2]),
    ("3:1e9", [0.0001, 0.3], [0.3, 0.2]),
]


@pytest.mark.parametrize("spec,gamma,beta", TINY)
def test_tiny_values_keep_their_digits_on_the_growing_contour(spec, gamma, beta):
    mix = parse_mixture(spec)
    ref = float(_precise(spec, gamma, beta, dps=60)["value"])
    assert 0 < abs(ref) < 1e-20
    for impl in ("blocked", "rowwise"):
        value = evaluate(mix, gamma, beta, run_pass=IMPLEMENTATIONS[impl]).value
        assert value == pytest.approx(ref, rel=1e-8)


def _precise_gradient(spec, gamma, beta, dps=60, step="1e-25"):
    """Central differences of the mpmath value at 60 digits (step 1e-25: truncation ~1e-50)."""
    mix = parse_mixture(spec)
    weights = {q: repr(w) for q, w in mix.terms}
    out = []
    with mpmath.workdps(dps):
        h = mpmath.mpf(step)
        for which in (0, 1):
            for t in range(len(gamma)):
                vals = []
                for sign in (1, -1):
                    g = [mpmath.mpf(repr(float(x))) for x in gamma]
                    b = [mpmath.mpf(repr(float(x))) for x in beta]
                    (g if which == 0 else b)[t] += sign * h
                    vals.append(precise_run(weights, g, b, dps=dps)["value"])
                out.append(float((vals[0] - vals[1]) / (2 * h)))
    return np.array(out)


GRADIENT_CASES = [
    ("2:0.5", [18.5], [0.3]),
    ("2:0.5", [50.0, -49.5], [0.01, 0.3]),
    ("2:0.5", [0.1, 50.0], [0.3, 0.2]),
    ("3:1e6", [0.001, 0.5], [0.3, 0.2]),
    ("2:0.5,3:1", [0.3, 30.0, 0.5], [0.3, 0.2, 0.1]),
]


@pytest.mark.parametrize("spec,gamma,beta", GRADIENT_CASES)
def test_gradients_beyond_the_old_limit_agree_with_mpmath(spec, gamma, beta):
    # stated tolerance: 100 eps E relative to max(1, |gradient|) -- the adjoint's quadratic form
    # s(a) = a^T Gbar a grows like E too (measured worst: 31 eps E, blocked kernel at p = 3)
    mix = parse_mixture(spec)
    E = exponent_bound(mix, gamma)
    ref = _precise_gradient(spec, gamma, beta)
    scale = max(1.0, float(np.max(np.abs(ref))))
    for impl in ("blocked", "rowwise"):
        for contour in ("growing", "full"):
            ev = evaluate(mix, gamma, beta, run_pass=IMPLEMENTATIONS[impl], contour=contour, gradient=True)
            grad = np.concatenate([ev.gradient["gamma"], ev.gradient["beta"]])
            assert np.max(np.abs(grad - ref)) <= (1e-12 + 100 * EPS * E) * scale, (impl, contour, grad, ref)


def _log_form_steps(spec, gamma, beta):
    """Which forward passes of an evaluation build their rows in log form."""
    seen = []

    def run_pass(inp, plan):
        seen.append(prepare_low_side(inp, plan).log_ll is not None)
        return IMPLEMENTATIONS["blocked"](inp, plan)

    evaluate(parse_mixture(spec), gamma, beta, run_pass=run_pass)
    return seen


def test_log_form_is_used_only_where_needed():
    assert _log_form_steps("2:0.5", [50.0, -49.5], [0.01, 0.3]) == [False, True]
    assert not any(_log_form_steps("2:0.5", [13.0], [0.3]))
    assert not any(_log_form_steps("2:0.5", [0.4, 0.7, 0.9], [0.3, 0.2, 0.1]))


def test_without_the_log_form_the_factorized_pass_loses_its_weights(monkeypatch):
    # the shared low-low factor spans exp(-4000)..1 here: without the log form every weight of
    # some rows underflows and the sum-of-weights check fails -- the switch is not decoration
    monkeypatch.setattr(ranges, "LOG_FORM_RANGE", math.inf)
    with pytest.raises(PassIntegrityError, match="deviates from 1"):
        evaluate(parse_mixture("2:0.5"), [50.0, -49.5], [0.01, 0.3])


def test_lost_or_doubled_chunk_is_still_caught_far_out():
    mix = parse_mixture("2:0.5")
    plan = plan_chunks(2, n_high=3, rows_per_chunk=1)  # 4 chunks (flip)
    assert plan.n_chunks == 4

    def dropping(inp, plan_):
        parts = pass_partials(inp, plan_, range(plan_.n_chunks))
        return sum(parts[1:], np.zeros_like(parts[0]))

    def doubling(inp, plan_):
        parts = pass_partials(inp, plan_, range(plan_.n_chunks))
        return sum(parts, np.zeros_like(parts[0])) + parts[0]

    for gamma, beta in (([0.1, 50.0], [0.3, 0.2]), ([50.0, -49.5], [0.01, 0.3])):
        ok = evaluate(mix, gamma, beta, plan=plan, contour="full")
        assert ok.residuals["sum_w"] < 1e-11
        for bad in (dropping, doubling):
            with pytest.raises(PassIntegrityError, match="lost, doubled or corrupted"):
                evaluate(mix, gamma, beta, plan=plan, run_pass=bad, contour="full")


def test_non_finite_pass_is_reported_as_a_range_problem():
    def overflowing(inp, plan):
        out = IMPLEMENTATIONS["blocked"](inp, plan)
        out[0, 0] = np.inf  # as a pass whose weights overflowed would report it
        return out

    with pytest.raises(PassRangeError, match="left the double range"):
        evaluate(parse_mixture("2:0.5"), [0.5], [0.3], run_pass=overflowing)


# ------------------------------------------------------------------ what is refused
# p = 1: the closed form (Claes, van Dam, Quantum 5, 542 (2021); for SK Farhi, Goldstone, Gutmann,
# Zhou, Quantum 6, 759 (2022)) says V_1 is below the smallest double; checked against mpmath
P1_BELOW = [
    ("2:0.5", 50.0, 0.3, -2170),  # V_1 ~ 1.6e-2170
    ("2:2000", 0.5, 0.3, -866),  # V_1 ~ 4.8e-866
    ("3:1e6", 0.5, 0.3, -651436),  # V_1 ~ 2.2e-651436
    ("2:0.5", 19.0, 0.3, -313),  # just past the edge
]


@pytest.mark.parametrize("spec,gamma,beta,decade", P1_BELOW)
def test_p1_value_below_the_double_range_is_refused(spec, gamma, beta, decade):
    mix = parse_mixture(spec)
    ref = _precise(spec, [gamma], [beta], dps=50)["value"]
    with mpmath.workdps(50):
        assert int(mpmath.floor(mpmath.log10(abs(ref)))) == decade
        assert p1_log_value(mix, gamma, beta) == pytest.approx(float(mpmath.log(abs(ref))), rel=1e-12)
    with pytest.raises(RangeError, match=r"representable for \|gamma\| <= ") as info:
        check_range(mix, [gamma], [beta])
    assert f"e{decade}" in str(info.value)  # the line names the size of the value


def test_p1_edge_is_where_the_value_leaves_the_double_range():
    mix = parse_mixture("2:0.5")
    top = p1_max_gamma(mix, 0.3)
    assert 18.8 < top < 18.9
    check_range(mix, [top * (1 - 1e-9)], [0.3])  # accepted: V_1 is still a normal double
    value = evaluate(mix, [top * (1 - 1e-9)], [0.3]).value
    ref = float(_precise("2:0.5", [top * (1 - 1e-9)], [0.3], dps=50)["value"])
    assert 2.2e-308 < ref < 1e-306 and value == pytest.approx(ref, rel=1e-9)
    with pytest.raises(RangeError):
        check_range(mix, [top * (1 + 1e-9)], [0.3])


def test_p1_zero_value_is_not_refused():
    # beta = 0: V_1 = 0 exactly at any gamma (the mixer does nothing), a representable value
    mix = parse_mixture("2:0.5")
    check_range(mix, [50.0], [0.0])
    assert evaluate(mix, [50.0], [0.0]).value == 0.0


OUT_OF_RANGE = [
    ("2:0.5", [4e4, 0.1]),  # E = 3.2e9
    ("3:1e10", [0.00001, 0.3]),  # E = 5.4e9 (measured: the value keeps only six digits there)
    ("2:0.5", [3e4] * 3),
]


@pytest.mark.parametrize("spec,gamma", OUT_OF_RANGE)
def test_exponents_beyond_the_maximum_are_refused(spec, gamma):
    mix = parse_mixture(spec)
    assert exponent_bound(mix, gamma) > EXPONENT_MAX
    with pytest.raises(RangeError, match=r"sum_t \|gamma_t\| <="):
        check_range(mix, gamma, [0.3] * len(gamma))


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
