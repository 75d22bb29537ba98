"""The growing-contour iteration and the global flip against the full-contour iteration.

Causality (the light cone of the measured spin) makes step m of the p-step iteration
depend only on a depth-m contour, and the path weight is even under a -> -a; both are
exact, so the growing path must reproduce the full iteration (the method of Farhi,
Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022); Basso, Gamarnik, Mei, Zhou, FOCS 2022)
to rounding, for values and gradients, for odd, even and mixed-parity mixtures and a
q = 1 term.  The sparse hypertree recursion (Basso, Farhi, Marwaha, Villalonga, Zhou,
TQC 2022; Basso, Gamarnik, Mei, Zhou, FOCS 2022) is checked the same way.
"""

from __future__ import annotations

import numpy as np
import pytest

from leadline.kernels.exact import (
    _chunks as chunks,
    PassInput,
    run_pass_inprocess,
    PassIntegrityError,
    evaluate,
    expand_correlations,
    sum_w_tolerance,
    ChunkPlan,
    evaluation_path_visits,
    plan_chunks,
)
from leadline.kernels.mixture import parse_mixture
from leadline.kernels.sparse import SparseIntegrityError, evaluate_sparse

MIXTURES = ["2:0.5", "3:1", "2:0.3,3:0.4,4:0.3", "1:0.2,5:0.8"]  # even, odd, mixed, with q = 1


@pytest.mark.parametrize("spec", MIXTURES)
def test_growing_equals_full_values_and_gradients(spec):
    mix = parse_mixture(spec)
    rng = np.random.default_rng(sum(map(ord, spec)))
    for p in range(1, 9):
        g = rng.uniform(-1.0, 1.0, p)
        b = rng.uniform(-1.0, 1.0, p)
        new = evaluate(mix, g, b, gradient=True)
        old = evaluate(mix, g, b, gradient=True, contour="full", plan=plan_chunks(p, flip=False))
        assert new.contour == "growing" and old.contour == "full"
        assert abs(new.value - old.value) <= 1e-12, (spec, p)
        for k in ("gamma", "beta"):
            np.testing.assert_allclose(new.gradient[k], old.gradient[k], rtol=0, atol=1e-12)
        # the final correlations are the full iteration's G_p on every site
        np.testing.assert_allclose(new.correlations, old.correlations, rtol=0, atol=1e-12)


def test_growing_gradient_matches_central_differences():
    mix = parse_mixture("1:0.1,2:0.4,3:0.5")
    rng = np.random.default_rng(5)
    p = 5
    g, b = rng.uniform(-0.8, 0.8, p), rng.uniform(-0.8, 0.8, p)
    ev = evaluate(mix, g, b, gradient=True)
    h = 1e-6
    for name, vec in (("gamma", g), ("beta", b)):
        for t in range(p):
            plus, minus = vec.copy(), vec.copy()
            plus[t] += h
            minus[t] -= h
            args_p = (plus, b) if name == "gamma" else (g, plus)
            args_m = (minus, b) if name == "gamma" else (g, minus)
            fd = (evaluate(mix, *args_p).value - evaluate(mix, *args_m).value) / (2 * h)
            assert ev.gradient[name][t] == pytest.approx(fd, abs=2e-8), (name, t)


def test_truncating_one_time_more_changes_the_value():
    """The cut is sharp: reading G_{m-1} one time too early (Gamma at |t| <= m-1) is wrong."""
    mix = parse_mixture("2:0.5")
    g, b = np.array([0.5, 0.4, 0.3]), np.array([0.6, 0.4, 0.2])
    exact = evaluate(mix, g, b).value
    # zero the step-m Gamma at |t| = m on the full contour: a different, wrong value
    p, n = 3, 7
    Gam = np.concatenate([g, [0.0], -g[::-1]])
    from leadline.kernels.exact import initial_correlations

    G = initial_correlations(p, b)
    for m in range(1, p + 1):
        cut = Gam.copy()
        keep = max(m - 1, 0)
        cut[keep:p] = 0.0
        cut[p + 1 : n - keep] = 0.0
        M = np.outer(cut, cut) * mix.dxi(G)
        G = run_pass_inprocess(PassInput(p, M, b), plan_chunks(p))[:n]
    wrong = (1j * np.sum(Gam * mix.xi(G[p, :]))).real
    assert abs(wrong - exact) > 1e-4


def test_every_step_has_unit_weight_sum_with_and_without_flip():
    mix = parse_mixture("2:0.3,3:0.7")
    rng = np.random.default_rng(11)
    p = 6
    g, b = rng.uniform(-1, 1, p), rng.uniform(-1, 1, p)
    seen = []

    def recording(inp, plan):
        R = run_pass_inprocess(inp, plan)
        n = 2 * inp.p + 1
        seen.append((inp.p, plan.flip, float(np.max(np.abs(np.diag(R[:n]) - 1)))))
        return R

    for flip in (False, True):
        seen.clear()
        evaluate(mix, g, b, plan=plan_chunks(p, flip=flip), run_pass=recording)
        assert [m for m, _, _ in seen] == list(range(1, p + 1))  # one pass per step, growing
        assert all(f == flip for _, f, _ in seen)
        assert all(dev <= sum_w_tolerance(m) for m, _, dev in seen)


def test_flip_pass_equals_full_pass():
    """One pass over half the high patterns, doubled, equals the pass over all of them."""
    rng = np.random.default_rng(2)
    for p, h in ((2, 2), (4, 3), (5, 6)):
        n = 2 * p + 1
        A = rng.normal(size=(n, n)) + 1j * rng.normal(size=(n, n))
        M = 0.2 * (A + A.T)
        Gbar = rng.normal(size=(n, n)) + 0j
        b = rng.uniform(-1, 1, p)
        for adjoint in (None, Gbar):
            inp = PassInput(p, M, b, adjoint=adjoint)
            half = run_pass_inprocess(inp, ChunkPlan(p, h, 1, True))
            full = run_pass_inprocess(inp, ChunkPlan(p, h, 1, False))
            np.testing.assert_allclose(half, full, rtol=0, atol=1e-12 * np.max(np.abs(full)))
            assert ChunkPlan(p, h, 1, True).n_chunks * 2 == ChunkPlan(p, h, 1, False).n_chunks


def test_path_visits_and_plans_per_step():
    mix = parse_mixture("2:0.5")
    p = 7
    plans = []

    def recording(inp, plan):
        plans.append(plan)
        assert plan.p == inp.p
        return run_pass_inprocess(inp, plan)

    ev = evaluate(mix, np.full(p, 0.3), np.full(p, 0.4), run_pass=recording)
    assert [pl.p for pl in plans] == list(range(1, p + 1))
    assert ev.path_visits == sum(pl.path_visits for pl in plans) == evaluation_path_visits(p)
    # (4/3)(4^p - 1) visits: 1.5 p times fewer than the p 2^(2p+1) of the full contour, asymptotically
    assert evaluation_path_visits(p) == 4 * (4**p - 1) // 3
    full = evaluate(mix, np.full(p, 0.3), np.full(p, 0.4), contour="full", plan=plan_chunks(p, flip=False))
    assert full.path_visits == evaluation_path_visits(p, "full") == p * 2 ** (2 * p + 1)
    assert ev.to_json()["path_visits"] == ev.path_visits


def test_plan_json_round_trip_and_old_plans():
    plan = plan_chunks(6)
    assert plan.flip
    assert ChunkPlan.from_json(plan.to_json()) == plan
    old = {"p": 6, "n_high": 5, "rows_per_chunk": 4}  # written before the flip existed
    assert ChunkPlan.from_json(old) == ChunkPlan(6, 5, 4, False)
    with pytest.raises(ValueError):
        ChunkPlan(3, 3, 8, True)  # only 2^(h-1) = 4 high patterns are enumerated


def test_expand_correlations_reads_the_merged_site():
    G = np.arange(9, dtype=complex).reshape(3, 3)  # depth 1: times 1, c(=+-2), -1
    E = expand_correlations(G, 2)  # depth 2: times 1, 2, c, -2, -1
    assert E.shape == (5, 5)
    assert E[0, 4] == G[0, 2] and E[1, 3] == G[1, 1] and E[1, 0] == G[1, 0] and E[3, 4] == G[1, 2]


def test_lost_chunk_in_a_small_step_is_detected():
    mix = parse_mixture("2:0.5")

    def lossy(inp, plan):
        if inp.p == 2:  # drop one chunk of step 2 only
            return np.sum(chunks.pass_partials(inp, plan, range(1, plan.n_chunks)), axis=0)
        return run_pass_inprocess(inp, plan)

    plan_for = lambda m: ChunkPlan(m, 2, 1, True)  # noqa: E731  (two chunks in every step)
    with pytest.raises(PassIntegrityError, match="pass 2 at p = 2"):
        evaluate(mix, [0.3, 0.4, 0.5], [0.5, 0.4, 0.3], plan=plan_for, run_pass=lossy)


# ----------------------------------------------------------------------------- sparse
@pytest.mark.parametrize("q,D", [(2, 3), (3, 4), (4, 5), (2, 7.5)])
def test_sparse_growing_equals_full(q, D):
    rng = np.random.default_rng(q * 10 + int(D))
    for p in range(1, 7):
        g = rng.uniform(-1.0, 1.0, p) / np.sqrt(D)
        b = rng.uniform(-1.0, 1.0, p)
        new = evaluate_sparse(q, D, g, b, gradient=True)
        old = evaluate_sparse(q, D, g, b, gradient=True, contour="full")
        assert abs(new.value - old.value) <= 1e-12, (q, D, p)
        for k in ("gamma", "beta"):
            np.testing.assert_allclose(new.gradient[k], old.gradient[k], rtol=0, atol=1e-12)
        assert new.residuals["sum_fH"] <= 1e-12


def test_sparse_growing_at_large_degree_matches_full():
    # the large-D regime where the recursion's stability matters (D up to 1e8)
    for D in (1e5, 1e8):
        g = np.array([0.3, 0.5, 0.6]) * 2 * np.sqrt(3) / np.sqrt(D)
        b = np.array([0.5, 0.4, 0.2])
        new = evaluate_sparse(3, D, g, b, gradient=True)
        old = evaluate_sparse(3, D, g, b, gradient=True, contour="full")
        assert abs(new.value - old.value) <= 1e-13
        scale = max(np.max(np.abs(old.gradient["gamma"])), 1.0)
        np.testing.assert_allclose(new.gradient["gamma"], old.gradient["gamma"], rtol=0, atol=1e-9 * scale)


def test_sparse_corrupt_step_fails_loudly():
    g, b = [0.4, 0.7, 0.9], [0.5, 0.3, 0.2]

    def losing(func, blocks):
        out = [func(x) for x in blocks]
        out[0] = np.zeros_like(out[0])
        return out

    with pytest.raises(SparseIntegrityError):
        evaluate_sparse(3, 4, g, b, run_map=losing, n_high=2)


def test_blocked_transform_equals_butterflies():
    """The matrix-product Walsh-Hadamard transform against the radix-2 butterflies and,
    at small size, against scipy.linalg.hadamard (Sylvester's construction)."""
    from scipy.linalg import hadamard

    from leadline.kernels.sparse import wht, wht_blocked

    rng = np.random.default_rng(8)
    for n in (0, 1, 3, 5, 6, 7, 11, 16):
        x = rng.normal(size=2**n) + 1j * rng.normal(size=2**n)
        ref = wht(x.copy())
        got = wht_blocked(x.copy())
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12 * max(1.0, np.max(np.abs(ref))))
        if n <= 7:
            np.testing.assert_allclose(got, hadamard(2**n) @ x, rtol=0, atol=1e-12 * max(1.0, np.max(np.abs(ref))))


# ----------------------------------------------------------------------------- sparse internals
def _brute_half_spectrum(gamma, kind):
    """W(cos(phase/2) - 1) or W(sin(phase/2)) of all 2^(2m+1) paths by scipy.linalg.hadamard
    (Sylvester's construction), read at the half index: the wave vector whose first bit makes
    the weight even (cos) or odd (sin)."""
    from scipy.linalg import hadamard

    from leadline.kernels.exact import sign_patterns
    from leadline.kernels.sparse import phase_vector

    m = len(gamma)
    n = 2 * m + 1
    phase = phase_vector(gamma)
    F = np.cos(phase / 2) - 1 if kind == "cos" else np.sin(phase / 2)
    spec = hadamard(2**n) @ F
    half = np.arange(2 ** (n - 1))
    weight = np.array([bin(k).count("1") for k in half])
    first = weight % 2 if kind == "cos" else 1 - weight % 2
    assert sign_patterns(1)[1, 0] == -1  # a set bit is spin -1, first site the most significant bit
    return spec[(first << (n - 1)) + half]


@pytest.mark.parametrize("kind", ["cos", "sin"])
def test_closed_form_phase_spectrum_equals_the_transform(kind):
    from leadline.kernels.sparse._spectra import _PhaseSpectrum

    rng = np.random.default_rng(21 if kind == "cos" else 22)
    for m in range(1, 5):
        g = rng.uniform(-1.5, 1.5, m) * (1.0 if m % 2 else 4.0)  # |gamma| up to 6: some cos(gamma/2) < 0
        ref = _brute_half_spectrum(g, kind)
        for b in range(1, 2 * m + 1):  # every split into rows of 2^b points
            got = _PhaseSpectrum(g, kind, 1.0, b).full()
            np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12 * 2 ** (2 * m + 1))


def test_closed_form_spectrum_keeps_the_zero_entry_at_tiny_angles():
    # sum_c (cos(phase(c)/2) - 1) at angles ~1e-5 (the large-D regime): against 50-digit mpmath
    import itertools

    import mpmath

    from leadline.kernels.sparse._spectra import _PhaseSpectrum

    g = [1.3e-5, 2.1e-5, 0.7e-5]
    Gam = g + [0.0] + [-x for x in reversed(g)]
    with mpmath.workdps(50):
        ref = mpmath.fsum(
            mpmath.cos(mpmath.fsum(mpmath.mpf(G) * s for G, s in zip(Gam, c)) / 2) - 1
            for c in itertools.product((1, -1), repeat=len(Gam))
        )
    got = _PhaseSpectrum(g, "cos", 1.0, 3).full()[0]
    assert abs(got - float(ref)) <= 1e-14 * abs(float(ref))


def test_site_product_adjoint_against_brute_force():
    from leadline.kernels.sparse._spectra import _kron_env, _kron_pairs

    rng = np.random.default_rng(23)
    for n in range(1, 7):
        pairs = [rng.normal(size=2) for _ in range(n)]
        dpairs = [rng.normal(size=2) for _ in range(n)]
        T = rng.normal(size=2**n) + 1j * rng.normal(size=2**n)
        ref = [T @ _kron_pairs([dpairs[s] if s == t else pairs[s] for s in range(n)]) for t in range(n)]
        np.testing.assert_allclose(_kron_env(T, pairs, dpairs), ref, rtol=1e-12, atol=1e-12)


def test_sparse_growing_at_large_angles_equals_full():
    # |gamma| > pi: some cos(gamma/2) < 0 in the closed-form spectrum (integer D: at such
    # angles a non-integer power of the message can cross the branch cut of the logarithm,
    # where the two recursions need not pick the same branch)
    rng = np.random.default_rng(60)
    for q, D in [(2, 3), (3, 4), (4, 9)]:
        for p in (1, 2, 4):
            g = rng.uniform(-6.0, 6.0, p)
            b = rng.uniform(-1.0, 1.0, p)
            new = evaluate_sparse(q, D, g, b, gradient=True)
            old = evaluate_sparse(q, D, g, b, gradient=True, contour="full")
            assert abs(new.value - old.value) <= 1e-12, (q, D, p)
            for k in ("gamma", "beta"):  # O(1) spectra here: the two sweeps' rounding differs by ~1e-12
                np.testing.assert_allclose(new.gradient[k], old.gradient[k], rtol=0, atol=1e-11)


@pytest.mark.parametrize("chunk_bits", [2, 5])
def test_sparse_growing_in_small_row_groups_equals_full(monkeypatch, chunk_bits):
    # the row-by-row paths (several groups per step, several row tables per spectrum)
    import leadline.kernels.sparse._steps as sparse

    monkeypatch.setattr(sparse, "CHUNK_BITS", chunk_bits)
    rng = np.random.default_rng(30 + chunk_bits)
    for q, D in [(2, 3), (3, 4), (5, 2.5)]:
        for p in range(1, 7):
            g = rng.uniform(-1.0, 1.0, p) / np.sqrt(D)
            b = rng.uniform(-1.0, 1.0, p)
            new = evaluate_sparse(q, D, g, b, gradient=True)
            old = evaluate_sparse(q, D, g, b, gradient=True, contour="full")
            assert abs(new.value - old.value) <= 1e-12, (q, D, p)
            for k in ("gamma", "beta"):
                np.testing.assert_allclose(new.gradient[k], old.gradient[k], rtol=0, atol=1e-12)


def test_integer_degree_power_by_multiplication_equals_exp_log1p(monkeypatch):
    # (1 + z)^(D-1) by multiplication (small integer D) against exp((D-1) log1p(z))
    import leadline.kernels.sparse._steps as sparse

    rng = np.random.default_rng(40)
    for q, D in [(2, 2), (3, 4), (4, 9)]:
        for p in (3, 5):
            g = rng.uniform(-1.0, 1.0, p) / np.sqrt(D)
            b = rng.uniform(-1.0, 1.0, p)
            assert sparse._int_power(D) == D - 1
            mult = evaluate_sparse(q, D, g, b, gradient=True)
            with monkeypatch.context() as mp:
                mp.setattr(sparse, "INT_POWER_MAX", 0)
                assert sparse._int_power(D) is None
                logs = evaluate_sparse(q, D, g, b, gradient=True)
            assert abs(mult.value - logs.value) <= 1e-14
            for k in ("gamma", "beta"):
                np.testing.assert_allclose(mult.gradient[k], logs.gradient[k], rtol=0, atol=1e-13)


@pytest.mark.parametrize("row_bits,block_bits", [(16, 17), (2, 3), (3, 2), (1, 1)])
def test_in_place_four_step_transform_equals_butterflies(monkeypatch, row_bits, block_bits):
    """The in-place transform with small scratch (rows, then gathered column blocks) against
    the radix-2 butterflies and, at small size, scipy.linalg.hadamard (Sylvester's construction)."""
    from scipy.linalg import hadamard

    import leadline.kernels.sparse._transforms as sparse

    monkeypatch.setattr(sparse, "ROW_BITS", row_bits)
    monkeypatch.setattr(sparse, "BLOCK_BITS", block_bits)
    rng = np.random.default_rng(50 + row_bits)
    for n in (0, 1, 2, 3, 5, 8, 11):
        x = rng.normal(size=2**n) + 1j * rng.normal(size=2**n)
        ref = sparse.wht(x.copy())
        got = x.copy()
        assert sparse.wht_inplace(got) is got
        scale = max(1.0, np.max(np.abs(ref)))
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12 * scale)
        if n <= 7:
            np.testing.assert_allclose(got, hadamard(2**n) @ x, rtol=0, atol=1e-12 * scale)
