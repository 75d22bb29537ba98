"""`leadline transfer`: instances, empirical mixture, rescaled angles and the exact statevector check.

External references used here:
- scipy.sparse.linalg.expm_multiply (Al-Mohy, Higham, SIAM J. Sci. Comput. 33, 488 (2011))
  as an independent simulator of the QAOA state;
- p = 1 MaxCut edge expectation on triangle-free graphs, <C_uv> = 1/2 + (1/4) sin(4b) sin(g)
  (cos^{d_u} g + cos^{d_v} g), d = degree - 1 (Wang, Hadfield, Jiang, Rieffel, Phys. Rev. A 97,
  022304 (2018), Sec. III, the p = 1 formula with no triangles);
- p = 1 expectations of Z_u and Z_u Z_v for Ising costs with fields (Ozaeta, van Dam, McMahon,
  Quantum Sci. Technol. 7, 045036 (2022), the single-layer formula for sum h Z + sum J Z Z);
  both closed forms are written here from memory of the papers (equation numbers not checked),
  in the convention exp(-i beta B) exp(-i gamma C) |+>^n with C maximized;
- maximum cuts in closed form: K_n cuts floor(n^2/4) edges, bipartite graphs (even cycles,
  K_{a,b}) cut every edge (handbook facts, common practice);
- girths: Petersen graph 5, cycle C_n n, K_4 3, cube graph Q_3 4, trees none (handbook facts,
  common practice);
- the finite-degree recursion is exact when every radius-p neighbourhood is a tree (Basso,
  Farhi, Marwaha, Villalonga, Zhou, TQC 2022, arXiv:2110.14206), and the ring of disagrees at
  p = 1 reaches the cut fraction 3/4 (Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014));
- SK p = 1 optimum gamma = 1/2, beta = pi/8, V_1 = 1/sqrt(4e) (Farhi, Goldstone, Gutmann, Zhou,
  Quantum 6, 759 (2022)); finite-size allowance 1/n as in tests/test_finite_size.py.
"""

from __future__ import annotations

import csv
import itertools
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.sparse.linalg import expm_multiply

from leadline.kernels.finite_size import sample_couplings
from leadline.kernels.finite_size import (
    Instance,
    InstanceError,
    empirical_mixture,
    evolve,
    girth,
    instance_diagonal,
    parse_instance,
    rescale_angles,
    shape_distance,
    sparse_prediction,
    statevector_check,
)
from leadline.kernels.mixture import parse_mixture

LEADLINE = Path(sys.executable).with_name("leadline")
SK = parse_mixture("2:0.5")
SK_P1 = (np.array([0.5]), np.array([math.pi / 8]))
SK_V1 = 1 / math.sqrt(4 * math.e)


# ---------------------------------------------------------------- helpers
def spins(n: int) -> np.ndarray:
    """(2^n, n) spins: z_j = -1 where bit j of the basis index is set."""
    x = np.arange(1 << n)
    return 1 - 2 * ((x[:, None] >> np.arange(n)) & 1)


def brute_diagonal(inst: Instance) -> np.ndarray:
    Z = spins(inst.n)
    out = np.full(1 << inst.n, inst.constant)
    for S, w in inst.terms.items():
        out += w * np.prod(Z[:, list(S)], axis=1)
    return out


def mixer_matrix(n: int) -> sp.csr_matrix:
    X = sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 0.0]]))
    total = sp.csr_matrix((1 << n, 1 << n))
    for j in range(n):
        # qubit j is bit j of the index: kron(I_{high bits}, X, I_{low bits})
        total = total + sp.kron(sp.kron(sp.identity(1 << (n - j - 1)), X), sp.identity(1 << j), format="csr")
    return total


def random_instance(rng, n: int, orders=(1, 2, 3), terms: int = 12, constant: float = 0.7) -> Instance:
    table = {}
    for _ in range(terms):
        q = int(rng.choice(orders))
        S = tuple(sorted(rng.choice(n, size=q, replace=False).tolist()))
        table[S] = table.get(S, 0.0) + float(rng.normal())
    return Instance(n=n, terms=table, constant=constant)


def graph_instance(edges, n=None) -> Instance:
    """MaxCut: C = sum over edges (1 - z_u z_v)/2, written as the text format would have it."""
    text = "".join(f"0.5\n-0.5 {u} {v}\n" for u, v in edges)
    inst = parse_instance(text)
    if n is not None:
        inst.n = n
    return inst


def cycle(n):
    return [(i, (i + 1) % n) for i in range(n)]


def complete(n):
    return list(itertools.combinations(range(n), 2))


def complete_bipartite(a, b):
    return [(i, a + j) for i in range(a) for j in range(b)]


PETERSEN = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 0), (0, 5), (1, 6), (2, 7), (3, 8), (4, 9),
            (5, 7), (7, 9), (9, 6), (6, 8), (8, 5)]
CUBE = [(u, u ^ (1 << k)) for u in range(8) for k in range(3) if u < u ^ (1 << k)]


def run_cli(*args, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run([str(LEADLINE), *map(str, args)], capture_output=True, text=True, timeout=300, cwd=cwd)


# ---------------------------------------------------------------- (a) statevector
@pytest.mark.parametrize("n,p", [(3, 1), (5, 2), (6, 3), (7, 2)])
def test_statevector_matches_scipy_expm_multiply(n, p):
    rng = np.random.default_rng([5, n, p])
    inst = random_instance(rng, n)
    diagonal = instance_diagonal(inst)
    np.testing.assert_allclose(diagonal, brute_diagonal(inst), rtol=0, atol=1e-12)
    gamma, beta = rng.uniform(-1, 1, p), rng.uniform(-1, 1, p)
    C = sp.diags(brute_diagonal(inst)).tocsr()
    B = mixer_matrix(n)
    reference = np.full(1 << n, 2.0 ** (-n / 2), dtype=complex)
    for t in range(p):
        reference = expm_multiply(-1j * gamma[t] * C, reference)
        reference = expm_multiply(-1j * beta[t] * B, reference)
    ours = evolve(diagonal, gamma, beta)
    assert np.max(np.abs(ours - reference)) < 1e-10
    check = statevector_check(inst, gamma, beta)
    prob = np.abs(reference) ** 2
    values = brute_diagonal(inst)
    assert check.expectation == pytest.approx(float(prob @ values), abs=1e-10)
    assert check.best == pytest.approx(values.max(), abs=1e-12)
    top = values >= values.max() - 1e-9
    assert check.p_best == pytest.approx(float(prob[top].sum()), abs=1e-10)


def test_progress_reports_every_layer_step():
    seen = []
    inst = random_instance(np.random.default_rng(1), 5)
    statevector_check(inst, [0.1, 0.2], [0.3, 0.4], progress=lambda done, total: seen.append((done, total)))
    assert seen == [(k, 12) for k in range(1, 13)]


# ---------------------------------------------------------------- (b) p = 1 closed forms
def wang_edge(gamma, beta, du, dv):
    """Wang, Hadfield, Jiang, Rieffel, PRA 97, 022304 (2018): triangle-free p = 1 edge value."""
    return 0.5 + 0.25 * math.sin(4 * beta) * math.sin(gamma) * (math.cos(gamma) ** du + math.cos(gamma) ** dv)


@pytest.mark.parametrize(
    "edges",
    [cycle(7), PETERSEN, CUBE, complete_bipartite(2, 4), [(0, 1), (1, 2), (2, 3), (1, 4), (4, 5), (5, 6), (6, 0), (3, 7)]],
    ids=["C7", "Petersen", "cube", "K24", "irregular"],
)
def test_p1_maxcut_matches_the_triangle_free_closed_form(edges):
    inst = graph_instance(edges)
    degree = np.zeros(inst.n, dtype=int)
    for u, v in edges:
        degree[u] += 1
        degree[v] += 1
    for gamma, beta in [(0.37, 0.21), (1.1, -0.4), (-0.8, 0.9)]:
        expected = sum(wang_edge(gamma, beta, degree[u] - 1, degree[v] - 1) for u, v in edges)
        assert statevector_check(inst, [gamma], [beta]).expectation == pytest.approx(expected, abs=1e-10)


def ozaeta_expectation(h, J, gamma, beta):
    """Ozaeta, van Dam, McMahon, QST 7, 045036 (2022): p = 1 <C> for C = sum h_u z_u + sum J_uv z_u z_v."""
    n = len(h)
    c2 = lambda x: math.cos(2 * gamma * x)  # noqa: E731
    total = 0.0
    for u in range(n):
        total += h[u] * math.sin(2 * beta) * math.sin(2 * gamma * h[u]) * np.prod([c2(J[u, w]) for w in range(n) if w != u])
    for u, v in itertools.combinations(range(n), 2):
        if J[u, v] == 0:
            continue
        others = [w for w in range(n) if w not in (u, v)]
        first = 0.5 * math.sin(4 * beta) * math.sin(2 * gamma * J[u, v]) * (
            c2(h[u]) * np.prod([c2(J[u, w]) for w in others]) + c2(h[v]) * np.prod([c2(J[v, w]) for w in others])
        )
        second = -0.5 * math.sin(2 * beta) ** 2 * (
            c2(h[u] + h[v]) * np.prod([c2(J[u, w] + J[v, w]) for w in others])
            - c2(h[u] - h[v]) * np.prod([c2(J[u, w] - J[v, w]) for w in others])
        )
        total += J[u, v] * (first + second)
    return total


@pytest.mark.parametrize("seed", range(4))
def test_p1_ising_with_fields_matches_the_closed_form(seed):
    rng = np.random.default_rng([11, seed])
    n = 7
    h = rng.normal(size=n)
    J = np.triu(rng.normal(size=(n, n)) * (rng.random((n, n)) < 0.6), 1)  # triangles included
    J = J + J.T
    lines = [f"{float(h[u])!r} {u}" for u in range(n)]
    lines += [f"{float(J[u, v])!r} {u} {v}" for u, v in itertools.combinations(range(n), 2) if J[u, v] != 0]
    inst = parse_instance("\n".join(lines))
    gamma, beta = rng.uniform(-1, 1), rng.uniform(-1, 1)
    assert statevector_check(inst, [gamma], [beta]).expectation == pytest.approx(ozaeta_expectation(h, J, gamma, beta), abs=1e-10)


# ---------------------------------------------------------------- (c) best values
@pytest.mark.parametrize("n", range(2, 9))
def test_best_cut_of_complete_graph(n):
    assert instance_diagonal(graph_instance(complete(n))).max() == pytest.approx(n * n // 4, abs=1e-12)


@pytest.mark.parametrize("n", [4, 6, 8, 10, 12])
def test_best_cut_of_even_cycle_is_every_edge(n):
    check = statevector_check(graph_instance(cycle(n)), [0.0], [0.0])
    assert check.best == pytest.approx(n, abs=1e-12)
    assert check.p_best == pytest.approx(2 / 2**n, abs=1e-14)  # the two alternating strings, from |+>^n


@pytest.mark.parametrize("a,b", [(1, 5), (2, 3), (3, 4), (4, 4)])
def test_best_cut_of_complete_bipartite_is_every_edge(a, b):
    assert instance_diagonal(graph_instance(complete_bipartite(a, b))).max() == pytest.approx(a * b, abs=1e-12)


# ---------------------------------------------------------------- (d) scaling
@pytest.mark.parametrize("c", [0.1, 3.0, 17.0])
def test_scaling_every_weight_scales_gamma_down_and_the_expectation_up(c):
    rng = np.random.default_rng(3)
    inst = random_instance(rng, 8, orders=(2, 3), terms=20)
    big = inst.scaled(c)
    a = rescale_angles(empirical_mixture(inst), SK, [0.3, 0.5])
    b = rescale_angles(empirical_mixture(big), SK, [0.3, 0.5])
    np.testing.assert_allclose(b.gamma, a.gamma / c, rtol=1e-14)
    assert b.lam == pytest.approx(c * a.lam, rel=1e-14)
    beta = [0.4, 0.2]
    small_check, big_check = statevector_check(inst, a.gamma, beta), statevector_check(big, b.gamma, beta)
    assert big_check.expectation == pytest.approx(c * small_check.expectation, rel=1e-12, abs=1e-12)
    assert big_check.best == pytest.approx(c * small_check.best, rel=1e-12)
    assert big_check.p_best == pytest.approx(small_check.p_best, abs=1e-12)


# ---------------------------------------------------------------- (e) transfer works
def sampled_instance(mixture, n, rng) -> Instance:
    """An instance of the `finite-size` sampler written as terms (constant included)."""
    K = sample_couplings(mixture, n, rng)
    terms = {}
    for mask in np.flatnonzero(K[1:]) + 1:
        terms[tuple(j for j in range(n) if (mask >> j) & 1)] = float(K[mask])
    return Instance(n=n, terms=terms, constant=float(K[0]))


@pytest.mark.slow  # about 20 s: statevectors up to n = 20
def test_transferred_sk_angles_reach_n_lambda_v_within_the_finite_size_spread():
    """SK instances at n = 12..20: mean of (<C> - predicted)/n within 1/n + 3 standard errors."""
    for n, count in [(12, 40), (14, 30), (16, 20), (18, 12), (20, 8)]:
        rng = np.random.default_rng([29, n])
        gaps = []
        for _ in range(count):
            inst = sampled_instance(SK, n, rng)
            xi = empirical_mixture(inst)
            assert xi.weights().keys() == {2}
            scale = rescale_angles(xi, SK, SK_P1[0])
            assert scale.distance == 0.0
            predicted = inst.constant + n * scale.lam * SK_V1
            gaps.append((statevector_check(inst, scale.gamma, SK_P1[1]).expectation - predicted) / n)
        gaps = np.array(gaps)
        error = gaps.std(ddof=1) / math.sqrt(count)
        assert abs(gaps.mean()) <= 1.0 / n + 3 * error, (n, gaps.mean(), error)
        # sensitivity: without the rescaling by lambda the angles are those of another ensemble
        # only by O(1/n); with gamma doubled they are far off
        assert SK_V1 - sk_value_at_double_gamma() > 1.0 / n + 3 * error


def sk_value_at_double_gamma() -> float:
    from leadline.kernels.exact import evaluate

    return evaluate(SK, 2 * SK_P1[0], SK_P1[1]).value


# ---------------------------------------------------------------- (f) sparse prediction and girth
@pytest.mark.parametrize(
    "edges,expected",
    [(PETERSEN, 5), (cycle(9), 9), (complete(4), 3), (CUBE, 4), ([(0, 1), (1, 2), (1, 3), (3, 4)], None)],
    ids=["Petersen", "C9", "K4", "cube", "tree"],
)
def test_girth_of_known_graphs(edges, expected):
    n = max(max(e) for e in edges) + 1
    assert girth(n, edges) == expected
    if expected is not None:
        assert girth(n, edges, limit=expected - 1) is None
        assert girth(n, edges, limit=expected) == expected


@pytest.mark.parametrize("edges,p", [(cycle(8), 1), (cycle(10), 2), (cycle(12), 3), (PETERSEN, 1)], ids=["C8 p1", "C10 p2", "C12 p3", "Petersen p1"])
def test_finite_degree_prediction_is_exact_when_girth_exceeds_2p_plus_1(edges, p):
    inst = graph_instance(edges)
    structure = inst.sparse_structure()
    assert structure is not None and structure.magnitude == 0.5
    assert girth(inst.n, inst.edges()) > 2 * p + 1
    rng = np.random.default_rng(p)
    gamma, beta = rng.uniform(0.1, 1.0, p), rng.uniform(0.1, 0.6, p)
    exact = statevector_check(inst, gamma, beta).expectation
    assert sparse_prediction(structure, inst.n, inst.constant, gamma, beta) == pytest.approx(exact, abs=1e-10)


def test_ring_of_disagrees_reaches_three_quarters_at_p1():
    inst = graph_instance(cycle(10))
    structure = inst.sparse_structure()
    grid = [(g, b) for g in np.linspace(0.05, 1.55, 61) for b in np.linspace(0.05, 0.75, 57)]
    best = max(sparse_prediction(structure, 10, inst.constant, [g], [b]) for g, b in grid)
    assert best / 10 == pytest.approx(0.75, abs=2e-3)
    assert best / 10 <= 0.75 + 1e-12


# ---------------------------------------------------------------- (g) instance files
def test_text_and_json_spellings_agree_and_identical_terms_merge():
    text = "# a comment\n1.5 0 1\n-0.5 1 0   # same term, other order\n2\n0.25 2\n1 3 1 2\n0.5\n"
    a = parse_instance(text)
    assert a.terms == {(0, 1): 1.0, (2,): 0.25, (1, 2, 3): 1.0}
    assert a.constant == 2.5 and a.n == 4
    b = parse_instance(json.dumps(a.to_json()))
    assert b.terms == a.terms and b.constant == a.constant and b.n == a.n
    c = parse_instance(json.dumps({"format": "leadline.instance", "version": 1, "n": 6, "terms": [{"weight": 1, "spins": [5]}]}))
    assert c.n == 6
    xi = empirical_mixture(a)
    assert xi.weights() == pytest.approx({1: 0.25**2 / 4, 2: 1 / 4, 3: 1 / 4})


def test_cancelling_terms_are_dropped():
    inst = parse_instance("1 0 1\n-1 1 0\n2 0 2\n")
    assert inst.terms == {(0, 2): 2.0}


def test_shape_distance():
    assert shape_distance(parse_mixture("2:0.5"), parse_mixture("2:3")) == 0.0
    assert shape_distance(parse_mixture("2:1"), parse_mixture("3:1")) == 1.0
    assert shape_distance(parse_mixture("2:1,4:1"), parse_mixture("2:3,4:1")) == pytest.approx(0.25)


BAD_FILES = {
    "repeated index": "1 0 1\n2 3 3\n",
    "non-number weight": "1 0 1\nabc 1 2\n",
    "non-number index": "1 0 x\n",
    "fractional index": "1 0 1.5\n",
    "negative index": "1 0 -2\n",
    "blank": "\n\n",
    "comments only": "# nothing\n   # here\n",
    "only a constant": "3.5\n",
    "infinite weight": "inf 0 1\n",
    "bad JSON": "{\"format\": ",
    "JSON version": json.dumps({"format": "leadline.instance", "version": 7, "terms": []}),
    "JSON term": json.dumps({"format": "leadline.instance", "version": 1, "terms": [{"w": 1, "spins": [0]}]}),
    "JSON small n": json.dumps({"format": "leadline.instance", "version": 1, "n": 2, "terms": [{"weight": 1, "spins": [0, 4]}]}),
}


@pytest.mark.parametrize("name", list(BAD_FILES))
def test_bad_instance_raises_instance_error(name):
    with pytest.raises(InstanceError):
        parse_instance(BAD_FILES[name])


@pytest.mark.parametrize("name", ["repeated index", "non-number weight", "non-number index", "negative index", "blank", "JSON version"])
def test_cli_bad_instance_file_exits_2_with_one_line_and_writes_nothing(tmp_path, name):
    path = tmp_path / "bad.txt"
    path.write_text(BAD_FILES[name])
    out = tmp_path / "angles.csv"
    done = run_cli("transfer", path, "--depth", "1", "--output", out, "--json")
    assert done.returncode == 2, done.stderr
    assert done.stdout == ""
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("leadline: error:"), done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.txt"]


@pytest.mark.parametrize(
    "args,message",
    [
        (["--angles", "missing.json"], "does not exist"),
        (["--max-spins", "27"], "--max-spins"),
        (["--depth", "0"], "--depth"),
        (["--ensemble", "sk"], "--store"),
    ],
)
def test_cli_bad_options_exit_2(tmp_path, args, message):
    path = tmp_path / "ring.txt"
    path.write_text("".join(f"-1 {u} {v}\n" for u, v in cycle(6)))
    done = run_cli("transfer", path, *args, "--output", tmp_path / "a.csv", cwd=tmp_path)
    assert done.returncode == 2 and done.stdout == ""
    assert message in done.stderr and len(done.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "a.csv").exists()


# ---------------------------------------------------------------- (h) the command
def test_cli_json_keys_csv_and_the_sk_file(tmp_path):
    rng = np.random.default_rng(8)
    inst = sampled_instance(SK, 10, rng)
    path = tmp_path / "sk10.json"
    path.write_text(json.dumps(inst.to_json()))
    angles = tmp_path / "sk1.json"
    angles.write_text(json.dumps({"format": "leadline.angles", "version": 1, "xi": "2:0.5", "ensemble": None, "p": 1,
                                  "gamma": [0.5], "beta": [math.pi / 8], "value": SK_V1}))
    csv_path = tmp_path / "out.csv"
    done = run_cli("transfer", path, "--angles", angles, "--json", "--output", csv_path)
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    for key in ("n", "xi", "lambda", "gamma", "beta", "predicted", "expectation", "best", "ratio", "p_best"):
        assert key in out
    scale = rescale_angles(empirical_mixture(inst), SK, [0.5])
    assert out["n"] == 10 and out["lambda"] == pytest.approx(scale.lam, rel=1e-14)
    assert out["gamma"] == pytest.approx(list(scale.gamma), rel=1e-14)
    assert out["predicted"] == pytest.approx(inst.constant + 10 * scale.lam * SK_V1, rel=1e-12)
    check = statevector_check(inst, scale.gamma, [math.pi / 8])
    assert out["expectation"] == pytest.approx(check.expectation, abs=1e-12)
    assert out["best"] == pytest.approx(check.best, abs=1e-12)
    assert out["ratio"] == pytest.approx(check.expectation / check.best, rel=1e-12)
    assert out["statevector_memory_bytes"] > 24 * 2**10
    assert "about" in done.stderr and "memory" in done.stderr
    rows = [line for line in csv_path.read_text().splitlines() if not line.startswith("#")]
    table = list(csv.DictReader(rows))
    assert [int(r["t"]) for r in table] == [1]
    assert float(table[0]["gamma"]) == out["gamma"][0] and float(table[0]["beta"]) == out["beta"][0]
    assert "exp(-i gamma_t C)" in csv_path.read_text()


def test_cli_without_angles_reports_nulls_and_the_best_value(tmp_path):
    path = tmp_path / "k4.txt"
    path.write_text("".join(f"0.5\n-0.5 {u} {v}\n" for u, v in complete(4)))
    done = run_cli("transfer", path, "--json", "--quiet")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert out["best"] == 4.0 and out["gamma"] is None and out["expectation"] is None and out["lambda"] is None
    assert done.stderr == ""


def test_cli_above_the_spin_limit_skips_the_check(tmp_path):
    path = tmp_path / "ring.txt"
    path.write_text("".join(f"-1 {u} {v}\n" for u, v in cycle(30)))
    done = run_cli("transfer", path, "--depth", "1", "--json")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert out["expectation"] is None and out["best"] is None and out["p_best"] is None
    # the ring is sparse (D = 2) with girth 30 > 3: the finite-degree prediction is exact there;
    # the infinite-size one is not, and both are reported
    assert out["sparse"] == {"q": 2, "degree": 2, "weight": 1.0, "terms": 30}
    assert out["girth"] is None and out["girth_above"] == 16
    assert out["predicted_finite_degree"] is not None


def test_cli_shape_mismatch_says_so_and_still_predicts(tmp_path):
    path = tmp_path / "mixed.txt"
    path.write_text("1 0 1 2\n-1 1 2 3\n1 0 3\n0.5 2 4 5\n-1 1 5\n")
    angles = tmp_path / "sk.json"
    angles.write_text(json.dumps({"format": "leadline.angles", "version": 1, "xi": "2:0.5", "p": 1,
                                  "gamma": [0.5], "beta": [math.pi / 8], "value": SK_V1}))
    done = run_cli("transfer", path, "--angles", angles)
    assert done.returncode == 0, done.stderr
    assert "differs in shape" in done.stdout and "--depth 1" in done.stdout
    assert "exact <C>" in done.stdout
    out = json.loads(run_cli("transfer", path, "--angles", angles, "--json").stdout)
    inst = parse_instance(path.read_text())
    xi = empirical_mixture(inst)
    scale = rescale_angles(xi, SK, [0.5])
    assert out["same_shape"] is False and out["shape_distance"] == pytest.approx(scale.distance)
    from leadline.kernels.exact import evaluate

    # the prediction is V_p of the instance's own mixture at the rescaled angles
    assert out["predicted"] == pytest.approx(inst.n * evaluate(xi, scale.gamma, [math.pi / 8]).value, rel=1e-12)


def test_cli_depth_alone_gives_the_sk_optimum_in_instance_units(tmp_path):
    """A +-1 instance on all pairs has xi = ((n-1)/2) x^2, a multiple of SK's x^2/2, so the p = 1
    optimum for it is SK's gamma = 1/2, beta = pi/8 with gamma divided by lambda, and the
    predicted <C> is n lambda / sqrt(4e) (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022))."""
    rng = np.random.default_rng(12)
    n = 8
    path = tmp_path / "pm1.txt"
    path.write_text("".join(f"{int(rng.choice([-1, 1]))} {i} {j}\n" for i, j in complete(n)))
    out = json.loads(run_cli("transfer", path, "--depth", "1", "--json").stdout)
    lam = math.sqrt((n - 1) / 2 / 0.5)
    assert out["xi"] == "2:3.5" and out["lambda"] == 1.0
    assert out["gamma"][0] == pytest.approx(0.5 / lam, abs=1e-6)
    assert out["beta"][0] == pytest.approx(math.pi / 8, abs=1e-6)
    assert out["predicted"] == pytest.approx(n * lam * SK_V1, rel=1e-9)


SPEC = """
[study]
name = "transfer-test"
store = "study.zarr"

[depths]
pmax = 2

[optimizer]
restarts = 0

[compute]
executor = "inprocess"

[[ensemble]]
label = "sk"
xi = "2:0.5"
"""


@pytest.mark.slow  # a real sweep p = 1..2 first
def test_cli_store_optimum_matches_the_angle_file_route(tmp_path):
    (tmp_path / "study.toml").write_text(SPEC)
    done = run_cli("sweep", "study.toml", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    inst = sampled_instance(SK, 9, np.random.default_rng(4))
    (tmp_path / "i.json").write_text(json.dumps(inst.to_json()))
    from_store = run_cli("transfer", "i.json", "--store", "study.zarr", "--json", cwd=tmp_path)
    assert from_store.returncode == 0, from_store.stderr
    out = json.loads(from_store.stdout)
    assert out["p"] == 2 and "ensemble sk" in out["source"]
    at_one = json.loads(run_cli("transfer", "i.json", "--store", "study.zarr", "--depth", "1", "--json", cwd=tmp_path).stdout)
    scale = rescale_angles(empirical_mixture(inst), SK, [0.5])
    assert at_one["gamma"][0] == pytest.approx(scale.gamma[0], abs=1e-6)  # the stored p = 1 optimum is (1/2, pi/8)
    assert at_one["predicted"] == pytest.approx(inst.constant + 9 * scale.lam * SK_V1, abs=1e-8)
    missing = run_cli("transfer", "i.json", "--store", "study.zarr", "--depth", "3", cwd=tmp_path)
    assert missing.returncode == 2 and "no finished depth 3" in missing.stderr


@pytest.mark.parametrize("block", [1, 4, 64])
def test_layers_in_small_blocks_equal_one_block(block):
    """The in-place layers bound their temporaries by splitting into blocks (rows and, for high
    qubits, columns); every split must give the same state as one block (2^7 amplitudes)."""
    from leadline.kernels.finite_size import apply_phase, mix_qubit

    rng = np.random.default_rng(block)
    inst = random_instance(rng, 7)
    diagonal = instance_diagonal(inst)
    whole = evolve(diagonal, [0.3, -0.7], [0.2, 0.5])
    psi = np.full(1 << 7, 2.0 ** (-3.5), dtype=complex)
    for g, b in [(0.3, 0.2), (-0.7, 0.5)]:
        apply_phase(psi, diagonal, g, block=block)
        for j in range(7):
            mix_qubit(psi, j, b, block=block)
    np.testing.assert_allclose(psi, whole, rtol=0, atol=1e-14)


def test_cli_sparse_angle_file_on_the_petersen_graph(tmp_path):
    """A MaxCut angle file of the 3-regular large-girth ensemble acts on the satisfied (cut) count,
    which is this instance's C exactly: gamma carries over unchanged, and with girth 5 > 2p+1 the
    exact <C> equals m nu at p = 1 (Basso et al., TQC 2022)."""
    from leadline.kernels.sparse import evaluate_sparse

    g, b = 0.6, 0.35
    nu = evaluate_sparse(2, 3, [g], [b]).value
    angles = tmp_path / "maxcut3.json"
    angles.write_text(json.dumps({"format": "leadline.angles", "version": 1, "xi": None,
                                  "ensemble": {"kind": "sparse", "q": 2, "degree": 3}, "p": 1,
                                  "gamma": [g], "beta": [b], "value": nu}))
    path = tmp_path / "petersen.txt"
    path.write_text("".join(f"0.5\n-0.5 {u} {v}\n" for u, v in PETERSEN))
    done = run_cli("transfer", path, "--angles", angles, "--json")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert out["lambda"] == pytest.approx(0.5, rel=1e-14) and out["gamma"] == pytest.approx([g], rel=1e-14)
    assert out["girth"] == 5
    assert out["predicted_finite_degree"] == pytest.approx(15 * nu, abs=1e-10)
    assert out["expectation"] == pytest.approx(15 * nu, abs=1e-10)
    # the infinite-size prediction uses the file's finite-degree value per spin, lambda (D/q)(2 nu - 1)
    assert out["predicted"] == pytest.approx(7.5 + 10 * 0.5 * 1.5 * (2 * nu - 1), abs=1e-10)


def test_the_command_module_imports_no_heavy_library():
    code = (
        "import sys, leadline.jobs.commands.transfer, leadline.kernels.finite_size\n"
        "print(sorted(m for m in ('dask', 'distributed', 'zarr', 'matplotlib', 'scipy.optimize') if m in sys.modules))"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_weighted_low_degree_graph_is_matched_to_the_sparse_ensemble(tmp_path):
    """A weighted MaxCut on the Petersen graph (3-regular, girth 5; Holton & Sheehan, The
    Petersen Graph, CUP 1993) is not the dense ensemble: transfer says which ensemble fits it
    (degree 3, girth 5) and checks the sparse ensemble's own angles exactly; their <C> is the
    scipy expm_multiply statevector's at those angles."""
    weights = [1.0 if k % 3 else 2.0 for k in range(len(PETERSEN))]  # two sizes of weight
    path = tmp_path / "weighted-petersen.txt"
    path.write_text("".join(f"{w / 2}\n{-w / 2} {u} {v}\n" for w, (u, v) in zip(weights, PETERSEN)))
    out = json.loads(run_cli("transfer", path, "--depth", "1", "--json").stdout)
    assert out["sparse"] is None and out["degrees"] == {"q": 2, "min": 3, "max": 3, "mean": 3.0}
    assert out["girth"] == 5
    (note,) = [n for n in out["notes"] if "sparse ensemble (q = 2, D = 3)" in n]
    assert "girth 5" in note and "large-degree limit" in note
    alt = out["sparse_angles"]
    assert alt["q"] == 2 and alt["degree"] == 3 and alt["p"] == 1
    inst = parse_instance(path.read_text())
    C = sp.diags(brute_diagonal(inst)).tocsr()
    state = np.full(1 << inst.n, 2.0 ** (-inst.n / 2), dtype=complex)
    state = expm_multiply(-1j * alt["gamma"][0] * C, state)
    state = expm_multiply(-1j * alt["beta"][0] * mixer_matrix(inst.n), state)
    expected = float(np.abs(state) ** 2 @ brute_diagonal(inst))
    assert alt["expectation"] == pytest.approx(expected, abs=1e-10)
    assert alt["ratio"] == pytest.approx(expected / out["best"], abs=1e-12)
    assert alt["better"] == (alt["ratio"] > out["ratio"])
    assert f"give ratio {alt['ratio']:.6f} against {out['ratio']:.6f}" in note
    # the text report says the same in one note line
    text = run_cli("transfer", path, "--depth", "1", "--quiet").stdout
    assert "note: every spin is in 3 terms of order 2, girth 5" in text


def test_mixtures_read_rounded_in_text_and_exact_in_json(tmp_path):
    """A ring of 7 with weights 1/3 has xi = (1/9) x^2: the report's text reads 2:0.111111, the
    JSON keeps the exact float (its shortest text that reads back to the same number)."""
    path = tmp_path / "third.txt"
    path.write_text("".join(f"{1 / 3!r} {i} {(i + 1) % 7}\n" for i in range(7)))
    text = run_cli("transfer", path, "--depth", "1", "--quiet").stdout
    assert "optimized for the instance's mixture 2:0.111111\n" in text, text
    out = json.loads(run_cli("transfer", path, "--depth", "1", "--json").stdout)
    exact = parse_mixture(out["xi"])
    assert exact.spec() == out["xi"] and abs(exact.terms[0][1] - 1 / 9) < 1e-15 and out["xi"] != "2:0.111111"
    assert parse_mixture("2:0.6696428571428571").rounded_spec() == "2:0.669643"
