"""The extrapolation rule on a deep ladder: this tool's SK sweep to p = 33 (tests/sk_deep_optima.csv).

The values are checked against the published SK tables first; then, from the depths p <= k
(k = 12..32), the headline range must contain V_p* at every later depth to p = 33 and the Parisi
value, and the windows that grow with the ladder must keep the range from swinging when one depth
is added (the fixed windows of the earlier rule widened it 4.7x from p <= 32 to p <= 33); the same
back-test on the pure 3-spin sweep to p = 24 (tests/q3_deep_optima.csv).
"""

from __future__ import annotations

import math

import pytest

from leadline.kernels.extrapolate import FAMILIES, REFERENCE_DEPTHS, default_holdout, extrapolate, window_sizes
from leadline.tests.extrapolation_calibration import (
    DEEP_K_RANGE,
    PARISI,
    calibrate_deep,
    load_deep_ladder,
    load_ladder,
)
# Boulebnane et al., arXiv:2505.07929 (2025): V_160 / GS ~ 0.978 at their angles, so the optimum is at
# least about that (the constant and its full source: tests/test_extrapolate.py)
from leadline.tests.test_extrapolate import PUBLISHED_RATIO_AT_160

# Basso, Farhi, Marwaha, Villalonga, Zhou, "The Quantum Approximate Optimization Algorithm at High
# Depth for MaxCut on Large-Girth Regular Graphs and the Sherrington-Kirkpatrick Model", TQC 2022,
# arXiv:2110.14206: Table 1 (optimal SK energies, 4 decimals) at p = 17 and Table 2 (values at good,
# not proven optimal, angles: lower bounds on the optimum) at p = 18, 19, 20.
BASSO_TABLE1_P17 = 0.6773
BASSO_TABLE2 = {18: 0.6813, 19: 0.6848, 20: 0.6879}


@pytest.fixture(scope="module")
def deep_rows():
    return calibrate_deep()


@pytest.fixture(scope="module")
def fixed_rows():
    return calibrate_deep(ks=(32, 33), scale_windows=False)


def test_the_deep_ladder_matches_the_published_sk_values():
    values, estimates = load_deep_ladder()
    assert sorted(values) == list(range(1, 34))
    assert round(values[17], 4) == BASSO_TABLE1_P17
    for p, published in BASSO_TABLE2.items():
        assert values[p] > published, (p, values[p])
    # the exact depths p = 13..16 are those of tests/sk_optima.csv (6 decimals there)
    short = load_ladder()
    for p in range(13, 17):
        assert values[p] == pytest.approx(short[p], abs=5e-7) and estimates[p] is None
    # bath depths carry the engine's estimate; V_p* never decreases (depth p can emulate p - 1)
    assert all(estimates[p] is not None and 0 < estimates[p] < 1e-6 for p in range(17, 34))
    assert all(values[p + 1] > values[p] for p in range(1, 33))


def test_windows_and_hold_out_grow_with_the_ladder():
    for n in range(2, REFERENCE_DEPTHS + 1):  # up to 12 depths: the calibrated rule, unchanged
        assert default_holdout(n) == max(1, min(3, n // 4))
        for m in (2, 3, 4):
            assert window_sizes(n, m) == list(range(m + 1, min(n, m + 4) + 1))
    # 33 depths: x 33/12; the cubic (4 parameters) over 14..22 depths instead of 5..8, 8 held out
    assert window_sizes(33, 4) == [14, 17, 19, 22] and default_holdout(33) == 8
    assert window_sizes(33, 4, scaled=False) == [5, 6, 7, 8] and default_holdout(33, scaled=False) == 3
    # a window keeps its share of the ladder in 1/p: the cubic's widest window at k = 12 spans
    # 1/p = 1/5 .. 1/12, at 33 depths 1/12 .. 1/33; its first depth is p_last x 5/12 in both
    for n in (16, 24, 33, 48):
        for m in (2, 3, 4):
            sizes = window_sizes(n, m)
            assert len(sizes) == 4 and sizes[-1] <= n
            assert sizes[-1] / n == pytest.approx((m + 4) / REFERENCE_DEPTHS, abs=0.5 / n)


def test_the_deep_range_contains_every_later_depth_and_the_parisi_value(deep_rows):
    """From p <= k, k = 12..32, 231 predictions of later V_p* (to p = 33) and 22 of V_inf."""
    assert [r.k for r in deep_rows] == list(DEEP_K_RANGE)
    for r in deep_rows:
        assert r.declined is None
        assert r.later_contained == len(r.later) == 33 - r.k, r
        assert r.parisi_contained, r
        if r.later:
            assert r.worst_margin > 0.03, r  # inside, not at an edge


def test_the_deep_range_narrows_and_does_not_swing(deep_rows, fixed_rows):
    width = {r.k: r.width for r in deep_rows}
    assert width[33] < width[16] / 2  # more depths narrow it
    last = [width[k] for k in range(28, 34)]
    assert max(last) < 1.5 * min(last)  # no single depth moves it by more than half
    # the fixed windows: a cubic over p = 29..33 reaches V_inf with weights summing to ~1.6e4, and
    # the 1e-6 shortfalls of V_p* swing the range 4.7x wider from p <= 32 to p <= 33
    fixed = {r.k: r.width for r in fixed_rows}
    assert fixed[33] > 3 * fixed[32]


def test_the_deep_prediction_at_p160_meets_the_published_value(deep_rows):
    r33 = deep_rows[-1]
    central, low, high = (x / PARISI for x in r33.beyond[160])
    assert high >= PUBLISHED_RATIO_AT_160  # the range does not contradict V_160* / GS >~ 0.978
    assert central >= PUBLISHED_RATIO_AT_160 - 0.005
    assert low <= central <= high


def test_every_family_and_window_at_33_depths_is_fitted_and_back_tested():
    values, estimates = load_deep_ladder()
    depths = sorted(values)
    ex = extrapolate(depths, [values[p] for p in depths], uncertainties=[estimates[p] for p in depths],
                     ground_state=PARISI, ground_state_uncertainty=1e-6)
    assert ex.window_scale == pytest.approx(33 / 12) and ex.holdout == 8
    assert {w.family for w in ex.fits} == set(FAMILIES)
    assert all(w.back_test is not None and math.isfinite(w.back_test_error) for w in ex.fits)
    assert ex.to_json()["window_scale"] == pytest.approx(2.75)


# ---------------------------------------------- the pure 3-spin ladder (tests/q3_deep_optima.csv)
def claes_van_dam_p1(xi, dxi1):
    """max over (gamma, beta) of V_1 = 2 g Im xi(cos 2b - i sin 2b exp(-2 xi'(1) g^2)) (Claes, van Dam,
    Quantum 5, 542 (2021), the p = 1 energy of a mixed-spin model at infinite size; sign of g chosen
    so that the maximum is positive)."""
    import numpy as np
    from scipy.optimize import minimize

    def v(x):
        g, b = x
        return 2 * g * np.imag(xi(np.cos(2 * b) - 1j * np.sin(2 * b) * np.exp(-2 * dxi1 * g * g)))

    starts = [(g, b) for g in np.linspace(-1, 1, 9) for b in np.linspace(-0.7, 0.7, 8)]
    runs = [minimize(lambda x: -v(x), s, method="Nelder-Mead", options={"xatol": 1e-12, "fatol": 1e-15, "maxiter": 4000})
            for s in starts]
    return max(-r.fun for r in runs)


def test_the_q3_ladder_starts_at_the_closed_form_and_increases():
    values, estimates = load_deep_ladder("q3")
    assert sorted(values) == list(range(1, 25))
    assert values[1] == pytest.approx(claes_van_dam_p1(lambda z: z ** 3, 3.0), abs=1e-9)
    assert all(values[p + 1] > values[p] for p in range(1, 24))
    assert all((estimates[p] is None) == (p <= 16) for p in values)


def test_the_q3_range_contains_every_later_depth_and_the_ground_state():
    """From p <= k, k = 12..23, of the pure 3-spin ladder: every later V_p* (to p = 24) and the shipped
    ground state 1.15 +- 0.002 (from memory: 0.8132 x sqrt(2), Montanari & Ricci-Tersenghi 2003)."""
    rows = calibrate_deep(ladder="q3")
    assert rows[0].ground_state == pytest.approx(1.15)
    for r in rows:
        assert r.declined is None and r.parisi_contained, r
        assert r.later_contained == len(r.later) == 24 - r.k, r
        if r.later:
            assert r.worst_margin > 0.03, r
    assert rows[-1].width < rows[4].width  # p <= 24 narrower than p <= 16



def test_the_optimizers_shortfalls_do_not_move_the_deep_range():
    """A bath V_p* can lie below the optimum by the optimizer's last gains (up to ~1e-6). Raising every
    bath depth by a random shortfall of up to 1e-6 moves the p <= 33 range by far less than its width:
    the windows no longer amplify it (with the last 5 depths a cubic did, a thousandfold)."""
    import numpy as np

    values, estimates = load_deep_ladder()
    depths = sorted(values)

    def limit(vals, scale_windows=True):
        return extrapolate(depths, vals, uncertainties=[estimates[p] for p in depths], ground_state=PARISI,
                           ground_state_uncertainty=1e-6, scale_windows=scale_windows).limit

    base = limit([values[p] for p in depths])
    rng = np.random.default_rng(0)
    for _ in range(3):
        raised = [values[p] + (rng.uniform(0.0, 1e-6) if estimates[p] else 0.0) for p in depths]
        moved = limit(raised)
        assert abs(moved.low - base.low) < 1e-4 and abs(moved.central - base.central) < 1e-4, (moved, base)
    # the fixed windows, for contrast: the same kind of shortfall moves their low end by more than 1e-3
    fixed = limit([values[p] for p in depths], scale_windows=False)
    shifts = [abs(limit([values[p] + (rng.uniform(0.0, 1e-6) if estimates[p] else 0.0) for p in depths],
                        scale_windows=False).low - fixed.low) for _ in range(3)]
    assert max(shifts) > 1e-3, shifts
