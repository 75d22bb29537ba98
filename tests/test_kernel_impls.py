"""Every chunk-kernel implementation against the plain dense reference and each other.

Sources of the checked quantities (the definitions, evaluated by brute force over
all 2^(2p+1) paths in tests/dense_reference.py and below):
- the pass G[j,k] = sum_a w(a) a_j a_k, w = f exp(-1/2 a^T M a), and V_p:
  Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022); Basso, Gamarnik,
  Mei, Zhou, FOCS 2022 (arXiv:2204.10306) for mixed q;
- the adjoint pass Q[j,k] = sum_a w s a_j a_k, s = a^T Gbar a, and the link-derivative
  sums D_t = sum_a (d f / d b at link t) exp(-1/2 a^T M a) s(a): the chain rule applied
  to the same definitions (common practice);
- invariants (sum w = 1, G symmetric with unit diagonal, G[-j,-k] = conj G[j,k],
  real V): Farhi, Goldstone, Gutmann, Zhou (2022), properties of their iteration.
Tolerances: 1e-12 relative, the agreement asked of every implementation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from leadline.kernels.exact import (
    _chunks as chunks,
    CHUNK_KERNELS,
    IMPLEMENTATIONS,
    PassInput,
    chunk_partial,
    prepare_low_side,
    evaluate,
    ChunkPlan,
    plan_chunks,
)
from leadline.kernels.mixture import Mixture

from .dense_reference import dense_f, dense_paths, dense_value

IMPLS = sorted(CHUNK_KERNELS)
OTHER_IMPLS = [name for name in IMPLS if name != "rowwise"]


def random_mixture(rng: np.random.Generator, odd: bool) -> Mixture:
    """1-3 powers q <= 6, at least one odd power if ``odd`` else only even powers."""
    pool = [1, 3, 5] if odd else [2, 4, 6]
    qs = set(rng.choice(pool, size=1).tolist())
    qs |= set(rng.choice(np.arange(1, 7) if odd else np.array([2, 4, 6]), size=rng.integers(0, 3)).tolist())
    return Mixture.from_weights({int(q): float(rng.uniform(0.1, 1.0)) for q in qs})


def plans(p: int) -> list[ChunkPlan]:
    """Default plan, the smallest and largest splits, and a middle one with several chunks."""
    n = 2 * p + 1
    out = {plan_chunks(p), ChunkPlan(p, 1, 1), ChunkPlan(p, 1, 2), ChunkPlan(p, n - 1, 2 ** (n - 1))}
    out.add(ChunkPlan(p, max(1, p), 2))
    if p <= 4:
        out.add(ChunkPlan(p, n - 1, 1))  # smallest chunks: two paths each
    return sorted(out, key=lambda pl: (pl.n_high, pl.rows_per_chunk))


def dense_link_derivatives(p: int, beta) -> np.ndarray:
    """(2p, 2^(2p+1)): d f / d b at link t for every path, f with that one link differentiated."""
    a = dense_paths(p)
    b = np.asarray(beta, dtype=float)
    out = np.empty((2 * p, a.shape[0]), dtype=complex)
    for t_diff in range(2 * p):
        f = np.full(a.shape[0], 0.5, dtype=complex)
        for t in range(2 * p):
            angle = b[t] if t < p else b[2 * p - 1 - t]
            sign = 1.0 if t < p else -1.0
            same = a[:, t] == a[:, t + 1]
            if t == t_diff:
                f *= np.where(same, -np.sin(angle), sign * 1j * np.cos(angle))
            else:
                f *= np.where(same, np.cos(angle), sign * 1j * np.sin(angle))
        out[t_diff] = f
    return out


def dense_pass(p: int, M: np.ndarray, beta, adjoint=None) -> np.ndarray:
    """(2p+2, 2p+1): the pass by brute force over all paths (rows 0..2p moments, row 2p+1 D)."""
    n = 2 * p + 1
    a = dense_paths(p)
    e = np.exp(-0.5 * np.einsum("xj,jk,xk->x", a, M, a))
    out = np.zeros((n + 1, n), dtype=complex)
    if adjoint is None:
        out[:n] = np.einsum("x,xj,xk->jk", dense_f(p, beta) * e, a, a)
        return out
    s = np.einsum("xj,jk,xk->x", a, adjoint, a)
    out[:n] = np.einsum("x,xj,xk->jk", dense_f(p, beta) * e * s, a, a)
    out[n, : 2 * p] = dense_link_derivatives(p, beta) @ (e * s)
    return out


def random_pass_input(rng, p, adjoint: bool, beta=None, scale=0.4) -> PassInput:
    n = 2 * p + 1
    M = scale * (rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n)))
    M = 0.5 * (M + M.T)
    b = rng.uniform(-1.5, 1.5, p) if beta is None else np.asarray(beta, dtype=float)
    A = rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n)) if adjoint else None
    return PassInput(p, M, b, A)


def assert_close(got, want, rtol=1e-12):
    scale = max(1.0, float(np.max(np.abs(want))))
    err = float(np.max(np.abs(got - want)))
    assert err <= rtol * scale, f"max deviation {err:.3e} (scale {scale:.3e})"


# ----------------------------------------------------------------------------- registry
def test_registry_and_selection(monkeypatch):
    assert "rowwise" in CHUNK_KERNELS and "blocked" in CHUNK_KERNELS
    assert set(IMPLEMENTATIONS) == set(CHUNK_KERNELS)
    assert chunks.resolve_implementation("rowwise") == "rowwise"
    monkeypatch.setenv(chunks.IMPLEMENTATION_ENV, "rowwise")
    assert chunks.resolve_implementation() == "rowwise"
    monkeypatch.delenv(chunks.IMPLEMENTATION_ENV)
    assert chunks.resolve_implementation() == chunks.DEFAULT_IMPLEMENTATION
    with pytest.raises(ValueError, match="unknown kernel implementation"):
        chunks.resolve_implementation("nonesuch")


# ----------------------------------------------------------------------------- whole passes vs dense
@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("p", [1, 2, 3, 4, 5, 6])
def test_pass_equals_dense(impl, p):
    """Forward and adjoint pass, every plan, against the brute-force sums over all paths."""
    rng = np.random.default_rng(1000 + p)
    for adjoint in (False, True):
        inp = random_pass_input(rng, p, adjoint)
        want = dense_pass(p, inp.M, inp.beta, inp.adjoint)
        for plan in plans(p):
            got = chunks.run_pass_inprocess(inp, plan, impl=impl)
            assert_close(got, want)


@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("p", [1, 2, 3, 4, 5, 6])
def test_value_equals_dense_reference(impl, p):
    """V_p and the invariants for random mixtures with odd and with even powers, q <= 6."""
    rng = np.random.default_rng(2000 + p)
    for odd in (True, False):
        mix = random_mixture(rng, odd)
        g = rng.uniform(-1.0, 1.0, p)
        b = rng.uniform(-1.0, 1.0, p)
        V = dense_value(mix, g, b)
        for plan in (plans(p)[0], plans(p)[-1], plan_chunks(p)):
            ev = evaluate(mix, g, b, plan=plan, run_pass=IMPLEMENTATIONS[impl])
            assert ev.value == pytest.approx(V.real, rel=1e-12, abs=1e-13)
            r = ev.residuals
            assert r["unit_diagonal"] < 1e-12 and r["symmetry"] < 1e-12
            assert r["conjugate_symmetry"] < 1e-12 and r["imag_value"] < 1e-12


# ----------------------------------------------------------------------------- chunk partials vs the row kernel
@pytest.mark.parametrize("impl", OTHER_IMPLS)
@pytest.mark.parametrize("p", [1, 2, 3, 4, 5, 6])
def test_chunk_partials_equal_row_kernel(impl, p):
    """Each chunk's partial (forward and adjoint), smallest and largest plans, M = 0 too."""
    rng = np.random.default_rng(3000 + p)
    n = 2 * p + 1
    for adjoint in (False, True):
        for zero_M in (False, True):
            inp = random_pass_input(rng, p, adjoint)
            if zero_M:
                inp = PassInput(p, np.zeros((n, n), complex), inp.beta, inp.adjoint)
            for plan in plans(p):
                low = prepare_low_side(inp, plan)
                for k in sorted({0, plan.n_chunks // 2, plan.n_chunks - 1}):
                    want = chunk_partial(inp, plan, k, low, impl="rowwise")
                    got = chunk_partial(inp, plan, k, low, impl=impl)
                    assert_close(got, want)


# beta values where a link factor vanishes: sin b = 0 (b = 0, pi) or cos b = 0 (b = pi/2)
SPECIAL_BETAS = [0.0, math.pi / 2, math.pi, -math.pi / 2]


@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("p", [1, 2, 3, 4])
def test_vanishing_link_factors(impl, p):
    """Adjoint pass where sin b or cos b is 0 for some links (no division by a link factor)."""
    rng = np.random.default_rng(4000 + p)
    for trial in range(3):
        beta = rng.uniform(-1.2, 1.2, p)
        idx = rng.choice(p, size=rng.integers(1, p + 1), replace=False)
        beta[idx] = rng.choice(SPECIAL_BETAS, size=idx.size)
        for adjoint in (False, True):
            inp = random_pass_input(rng, p, adjoint, beta=beta)
            want = dense_pass(p, inp.M, beta, inp.adjoint)
            for plan in plans(p):
                assert_close(chunks.run_pass_inprocess(inp, plan, impl=impl), want)


@pytest.mark.parametrize("impl", OTHER_IMPLS)
def test_gradient_equals_row_kernel(impl):
    """Full reverse-mode gradient (p forward + p+1 adjoint passes) agrees with the row kernel."""
    rng = np.random.default_rng(5)
    for p in (1, 3, 6):
        for odd in (True, False):
            mix = random_mixture(rng, odd)
            g = rng.uniform(-1.0, 1.0, p)
            b = rng.uniform(-1.0, 1.0, p)
            b[0] = math.pi / 2 if odd else 0.0
            want = evaluate(mix, g, b, gradient=True, run_pass=IMPLEMENTATIONS["rowwise"])
            got = evaluate(mix, g, b, gradient=True, run_pass=IMPLEMENTATIONS[impl])
            assert got.value == pytest.approx(want.value, rel=1e-12, abs=1e-14)
            for key in ("gamma", "beta"):
                assert_close(got.gradient[key], want.gradient[key])


@pytest.mark.parametrize("impl", IMPLS)
def test_gradient_matches_dense_differences(impl):
    """Gradient against central differences of the dense reference (step 1e-5: error ~1e-10)."""
    rng = np.random.default_rng(6)
    p = 3
    mix = Mixture.from_weights({2: 0.5, 3: 0.3})
    g = rng.uniform(-0.8, 0.8, p)
    b = rng.uniform(-0.8, 0.8, p)
    ev = evaluate(mix, g, b, gradient=True, run_pass=IMPLEMENTATIONS[impl])
    step = 1e-5
    for key, x in (("gamma", g), ("beta", b)):
        for i in range(p):
            up, dn = x.copy(), x.copy()
            up[i] += step
            dn[i] -= step
            args_up = (up, b) if key == "gamma" else (g, up)
            args_dn = (dn, b) if key == "gamma" else (g, dn)
            fd = (dense_value(mix, *args_up).real - dense_value(mix, *args_dn).real) / (2 * step)
            assert ev.gradient[key][i] == pytest.approx(fd, rel=1e-6, abs=1e-8)


@pytest.mark.parametrize("impl", OTHER_IMPLS)
def test_wide_dynamic_range_agrees(impl):
    """M = u u^T with |u| ~ 8: path weights spread over ~100 orders of magnitude."""
    rng = np.random.default_rng(7)
    p = 3
    n = 2 * p + 1
    u = rng.uniform(-1, 1, n) * 8.0
    M = np.outer(u, u).astype(complex)
    inp = PassInput(p, M, rng.uniform(-1, 1, p))
    plan = ChunkPlan(p, 3, 2)
    want = chunks.run_pass_inprocess(inp, plan, impl="rowwise")
    got = chunks.run_pass_inprocess(inp, plan, impl=impl)
    assert np.all(np.isfinite(got))
    assert_close(got, want)


def test_product_cache_hit_equals_miss():
    """The adjoint pass gives the same partials whether the forward products are reused or not."""
    from leadline.kernels.exact import _blocked as blocked

    rng = np.random.default_rng(8)
    p = 4
    inp_b = random_pass_input(rng, p, adjoint=True)
    inp_f = PassInput(p, inp_b.M, inp_b.beta)
    for plan in (plan_chunks(p), ChunkPlan(p, 3, 2), ChunkPlan(p, 1, 2)):
        blocked.PRODUCTS.clear()
        blocked.COLUMNS.clear()
        miss = chunks.run_pass_inprocess(inp_b, plan, impl="blocked")
        hits_before = blocked.PRODUCTS.hits, blocked.COLUMNS.hits
        chunks.run_pass_inprocess(inp_f, plan, impl="blocked")  # fills the caches
        hit = chunks.run_pass_inprocess(inp_b, plan, impl="blocked")
        assert blocked.PRODUCTS.hits - hits_before[0] == plan.n_chunks
        assert blocked.COLUMNS.hits - hits_before[1] == plan.n_chunks
        assert_close(hit, miss, rtol=1e-14)
        assert_close(hit, dense_pass(p, inp_b.M, inp_b.beta, inp_b.adjoint))
    small = blocked.ProductCache(max_bytes=1000)
    small.put(inp_f, plan, 0, np.zeros(100, complex))  # 1600 bytes: not kept
    assert small.get(inp_f, plan, 0) is None
