"""The exact evaluator against closed forms, the dense reference and its invariants.

Sources:
- SK p = 1 closed form V_1 = g sin(4b) exp(-2 g^2), maximum 1/sqrt(4e) at g = 1/2,
  b = pi/8: Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), the p = 1 case
  of their formula (section numbers are not cited: not checked against the published text).
- Mixed-spin p = 1: G_1[0,1] = cos 2b - i sin 2b exp(-2 g^2 xi'(1)) and
  V_1 = -2 g Im xi(G_1[0,1]): Claes, van Dam, Quantum 5, 542 (2021).
- Invariants (sum w = 1, G[-j,-k] = conj G[j,k], unit diagonal, fixed point,
  real V): Farhi, Goldstone, Gutmann, Zhou (2022), properties of their iteration.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from leadline.kernels.exact import (
    _chunks as chunks,
    PassInput,
    run_pass_inprocess,
    initial_correlations,
    path_weights,
    PassIntegrityError,
    evaluate,
    sum_w_tolerance,
    ChunkPlan,
    plan_chunks,
)
from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture

from .dense_reference import dense_f, dense_value

# Implementations of one pass (the performance work may register more).
IMPLEMENTATIONS = getattr(chunks, "IMPLEMENTATIONS", {"numpy": run_pass_inprocess})


@pytest.fixture(params=sorted(IMPLEMENTATIONS))
def run_pass(request):
    return IMPLEMENTATIONS[request.param]


def random_mixture(rng: np.random.Generator, qmax: int = 6) -> Mixture:
    qs = rng.choice(np.arange(1, qmax + 1), size=rng.integers(1, 4), replace=False)
    return Mixture.from_weights({int(q): float(rng.uniform(0.1, 1.0)) for q in qs})


# ----------------------------------------------------------------------------- p = 1
@pytest.mark.parametrize("g,b", [(0.5, math.pi / 8), (0.3, 0.2), (-0.7, 1.1), (1.3, -0.4)])
def test_sk_p1_closed_form(run_pass, g, b):
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022): V_1 = g sin(4b) exp(-2 g^2)
    ev = evaluate(parse_mixture("2:0.5"), [g], [b], run_pass=run_pass)
    assert ev.value == pytest.approx(g * math.sin(4 * b) * math.exp(-2 * g * g), abs=1e-14)


def test_sk_p1_optimum():
    """Same source: the maximum of V_1 is 1/sqrt(4e) = 0.30327 at g = 1/2, b = pi/8.

    Shown to be a maximum of the evaluator itself: zero exact gradient there, a negative
    definite Hessian by central differences of the gradient, and every point of a ring
    around it lower.  (The closed form's Hessian there is diag(-4 e^(-1/2), -8 e^(-1/2))
    in (g, b): d2/dg2 [g e^(-2g^2)] = (16 g^3 - 12 g) e^(-2g^2), d2/db2 sin 4b = -16 sin 4b.)
    """
    mix = parse_mixture("2:0.5")
    ev = evaluate(mix, [0.5], [math.pi / 8], gradient=True)
    assert ev.value == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-14)
    assert abs(ev.gradient["gamma"][0]) < 1e-13 and abs(ev.gradient["beta"][0]) < 1e-13
    h = 1e-4
    hessian = np.zeros((2, 2))
    for i, (dg, db) in enumerate(((h, 0.0), (0.0, h))):
        up = evaluate(mix, [0.5 + dg], [math.pi / 8 + db], gradient=True).gradient
        dn = evaluate(mix, [0.5 - dg], [math.pi / 8 - db], gradient=True).gradient
        hessian[:, i] = [(up["gamma"][0] - dn["gamma"][0]) / (2 * h), (up["beta"][0] - dn["beta"][0]) / (2 * h)]
    expected = np.diag([-4 * math.exp(-0.5), -8 * math.exp(-0.5)])
    np.testing.assert_allclose(hessian, expected, atol=1e-6)
    assert np.all(np.linalg.eigvalsh(0.5 * (hessian + hessian.T)) < 0)
    for angle in np.linspace(0, 2 * math.pi, 12, endpoint=False):
        g, b = 0.5 + 0.05 * math.cos(angle), math.pi / 8 + 0.05 * math.sin(angle)
        assert evaluate(mix, [g], [b]).value < ev.value - 1e-4


@pytest.mark.parametrize("spec", ["3:1", "1:0.3,2:0.5", "2:0.5,3:0.25,5:0.1", "4:1", "1:1", "3:0.6,6:0.2"])
def test_mixed_p1_closed_form(run_pass, spec):
    # Claes, van Dam, Quantum 5, 542 (2021): V_1 = -2 g Im xi(cos 2b - i sin 2b e^{-2 g^2 xi'(1)})
    mix = parse_mixture(spec)
    rng = np.random.default_rng(7)
    for g, b in rng.uniform(-1.2, 1.2, size=(5, 2)):
        G01 = math.cos(2 * b) - 1j * math.sin(2 * b) * math.exp(-2 * g * g * float(mix.dxi(1.0)))
        expected = -2 * g * complex(mix.xi(G01)).imag
        ev = evaluate(mix, [g], [b], run_pass=run_pass)
        assert ev.value == pytest.approx(expected, abs=1e-13)


# ----------------------------------------------------------------------------- dense reference
def plans_for(p: int) -> list[ChunkPlan]:
    n = 2 * p + 1
    plans = [plan_chunks(p), ChunkPlan(p, 1, 1), ChunkPlan(p, 1, 2), ChunkPlan(p, n - 1, 2 ** (n - 1))]
    if p <= 4:
        plans.append(ChunkPlan(p, n - 1, 1))  # smallest chunks: two paths each
    plans.append(ChunkPlan(p, p, 2))
    return plans


@pytest.mark.parametrize("p", [1, 2, 3, 4, 5, 6])
def test_chunked_equals_dense(run_pass, p):
    rng = np.random.default_rng(100 + p)
    for trial in range(2):
        mix = random_mixture(rng)
        g = rng.uniform(-1.0, 1.0, p)
        b = rng.uniform(-1.0, 1.0, p)
        V = dense_value(mix, g, b)
        assert abs(V.imag) < 1e-12
        for plan in plans_for(p):
            ev = evaluate(mix, g, b, plan=plan, run_pass=run_pass)
            assert ev.value == pytest.approx(V.real, abs=1e-12), (mix.spec(), plan)


def test_initial_correlations_match_dense():
    rng = np.random.default_rng(3)
    for p in (1, 2, 4):
        b = rng.uniform(-2, 2, p)
        _, Gs, _ = dense_value(parse_mixture("2:1"), rng.uniform(-1, 1, p), b, return_all=True)
        np.testing.assert_allclose(initial_correlations(p, b), Gs[0], atol=1e-14)
        # the chunked pass with M = 0 is G_0 as well
        n = 2 * p + 1
        R = run_pass_inprocess(PassInput(p, np.zeros((n, n), complex), b), plan_chunks(p))
        np.testing.assert_allclose(R[:n], Gs[0], atol=1e-14)


def test_path_weights_match_dense():
    rng = np.random.default_rng(4)
    for p in (1, 3):
        b = rng.uniform(-2, 2, p)
        np.testing.assert_allclose(path_weights(p, b), dense_f(p, b), atol=1e-15)
        assert path_weights(p, b).sum() == pytest.approx(1.0, abs=1e-14)


# ----------------------------------------------------------------------------- invariants
angles = st.floats(min_value=-1.5, max_value=1.5, allow_nan=False)


@settings(max_examples=25, deadline=None)
@given(
    p=st.integers(1, 4),
    data=st.data(),
    qs=st.sets(st.integers(1, 6), min_size=1, max_size=3),
)
def test_invariants_property(p, data, qs):
    """sum w = 1 at every step, conjugate symmetry, unit diagonal, fixed point, Im V = 0."""
    g = np.array(data.draw(st.lists(angles, min_size=p, max_size=p)))
    b = np.array(data.draw(st.lists(angles, min_size=p, max_size=p)))
    weights = {q: data.draw(st.floats(0.05, 1.0)) for q in qs}
    mix = Mixture.from_weights(weights)
    V, Gs, sums = dense_value(mix, g, b, return_all=True)
    for s in sums:
        assert abs(s - 1) < 1e-12
    ev = evaluate(mix, g, b, fixed_point_check=True, plan=ChunkPlan(p, p, 2))
    r = ev.residuals
    assert r["sum_w"] <= sum_w_tolerance(p)
    assert r["conjugate_symmetry"] < 1e-12
    assert r["symmetry"] < 1e-12
    assert r["unit_diagonal"] < 1e-12
    assert r["fixed_point"] < 1e-11
    assert r["imag_value"] < 1e-12
    # every intermediate G_m of the dense iteration is conjugate-symmetric too
    rev = np.arange(2 * p + 1)[::-1]
    for G in Gs:
        np.testing.assert_allclose(G[np.ix_(rev, rev)], np.conj(G), atol=1e-12)


@pytest.mark.parametrize("flip", [False, True])
@pytest.mark.parametrize("contour", ["growing", "full"])
def test_lost_chunk_is_detected(flip, contour):
    """Invariant 1 (sum_a w = 1; with the flip 2 sum_half w = 1) catches a lost or doubled chunk."""
    mix = parse_mixture("2:0.5,3:0.5")
    p = 3
    plan = ChunkPlan(p, 3, 2, flip)
    assert plan.n_chunks == (2 if flip else 4)

    def lossy(inp, plan):
        if inp.p < p:  # the small steps of the growing contour have one chunk
            return chunks.run_pass_inprocess(inp, plan)
        partials = chunks.pass_partials(inp, plan, range(1, plan.n_chunks))  # chunk 0 lost
        return np.sum(partials, axis=0)

    with pytest.raises(PassIntegrityError, match="sum of path weights"):
        evaluate(mix, [0.3, 0.4, 0.5], [0.5, 0.4, 0.3], plan=plan, run_pass=lossy, contour=contour)

    def doubled(inp, plan):
        partials = chunks.pass_partials(inp, plan, [0] + list(range(plan.n_chunks)))
        return np.sum(partials, axis=0)

    with pytest.raises(PassIntegrityError):
        evaluate(mix, [0.3, 0.4, 0.5], [0.5, 0.4, 0.3], plan=plan, run_pass=doubled, contour=contour)


# ----------------------------------------------------------------------------- planner
def test_planner_respects_budget():
    for p in (3, 8, 12, 14):
        for budget in (16 * 2**20, 256 * 2**20, 1024 * 2**20):
            plan = plan_chunks(p, budget)
            assert plan.chunk_bytes() <= budget
            assert plan.n_chunks * plan.rows_per_chunk == 2 ** (plan.n_high - plan.flip)
    # p = 12 must fit under 1 GB with the default budget
    assert plan_chunks(12).chunk_bytes() < 2**30


def test_plan_validation():
    with pytest.raises(ValueError):
        ChunkPlan(3, 0, 1)
    with pytest.raises(ValueError):
        ChunkPlan(3, 7, 1)
    with pytest.raises(ValueError):
        ChunkPlan(3, 3, 3)
    plan = ChunkPlan(4, 3, 2)
    assert ChunkPlan.from_json(plan.to_json()) == plan
    assert plan.rows(3) == (6, 8)


# ----------------------------------------------------------------------------- mixture
def test_mixture_parsing_and_derivatives():
    mix = parse_mixture("2:0.5, 3:1")
    assert mix.terms == ((2, 0.5), (3, 1.0))
    x = 0.3 + 0.2j
    assert mix.xi(x) == pytest.approx(0.5 * x**2 + x**3)
    assert mix.dxi(x) == pytest.approx(x + 3 * x**2)
    assert mix.d2xi(x) == pytest.approx(1 + 6 * x)
    assert parse_mixture(mix.spec()) == mix
    assert parse_mixture("2:0.5,4:0") == parse_mixture("2:0.5")


@pytest.mark.parametrize(
    "spec",
    ["0:1", "-2:1", "2.5:1", "2:1,2:3", "2:-1", "2:nan", "2:inf", "2:0", "", "2", "x:1", "2:abc", "2:1,,3:1"],
)
def test_mixture_rejects(spec):
    with pytest.raises(MixtureError):
        parse_mixture(spec)
