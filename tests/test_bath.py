"""The bosonic-bath engine against the exact path-sum iteration and closed forms.

Sources:
- Exact V_p: the path-sum iteration of Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022)
  (SK) and Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306 (any mixture xi), as
  implemented in leadline.kernels.exact (itself checked against closed forms and a dense
  reference in test_kernel.py).
- SK p = 1 closed form V_1 = g sin(4b) exp(-2 g^2), maximum 1/sqrt(4e) at g = 1/2, b = pi/8:
  Farhi, Goldstone, Gutmann, Zhou (2022), Sec. 3.
- Mixed-spin p = 1: V_1 = -2 g Im xi(cos 2b - i sin 2b exp(-2 g^2 xi'(1))): Claes, van Dam,
  Quantum 5, 542 (2021).
- The spin-boson form for SK: Boulebnane et al., arXiv:2505.07929 (2025); the form for any
  xi (bath two-point function xi' of the spin's correlations) is what these tests establish
  numerically.
- Optimal angles: leadline's exact optimizer (benchmarks/data/bath_angles.json); the SK optimal
  values agree with tests/sk_optima.csv, which cites Basso et al., arXiv:2110.14206, Table 1 and
  Farhi et al., Quantum 6, 759 (2022), Table 1.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest

import os

from leadline.kernels.bath import evaluate_bath, fock_levels, principal_factor, readout_sweep, run_bath
from leadline.kernels.exact import evaluate
from leadline.kernels.mixture import parse_mixture

MIXTURES = ["2:0.5", "3:1", "2:0.3,3:0.4,4:0.3", "1:0.2,5:0.8"]


def angles(seed: int, mix, p: int):
    """Seeded angles of the size of QAOA optima (|g| sqrt(xi'(1)) and b in [0.1, 0.5])."""
    rng = np.random.default_rng([seed, p])
    s = 1.0 / math.sqrt(float(mix.dxi(1.0)))
    return rng.uniform(0.1, 0.5, p) * s, rng.uniform(0.1, 0.5, p)


@pytest.mark.parametrize("spec", MIXTURES)
@pytest.mark.parametrize("p", [1, 2, 3, 4])
def test_dense_fock_matches_exact_iteration(spec, p):
    mix = parse_mixture(spec)
    g, b = angles(7, mix, p)
    exact = evaluate(mix, g, b).value
    fock = {1: 14, 2: 14, 3: 14, 4: 12}[p]
    run = run_bath(mix, g, b, fock=fock, basis="cholesky", engine="dense")
    assert run.value == pytest.approx(exact, abs=1e-9)
    # the spin's equal-time correlations are 1 and W is Hermitian
    assert np.allclose(np.diag(run.correlations), 1.0, atol=1e-12)
    assert np.allclose(run.correlations, run.correlations.conj().T, atol=1e-14)


@pytest.mark.parametrize("spec", MIXTURES)
def test_principal_step_by_step_dense_matches_exact(spec):
    mix = parse_mixture(spec)
    g, b = angles(11, mix, 3)
    exact = evaluate(mix, g, b).value
    run = run_bath(mix, g, b, fock=16, tail=16, basis="principal", engine="dense")
    assert run.steps == 3
    assert run.value == pytest.approx(exact, abs=1e-9)


def test_p1_closed_forms():
    # SK optimum 1/sqrt(4e) (Farhi et al. 2022, Sec. 3)
    run = run_bath(parse_mixture("2:0.5"), [0.5], [math.pi / 8], fock=16, basis="cholesky", engine="dense")
    assert run.value == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-10)
    # mixed p = 1 (Claes, van Dam 2021)
    mix = parse_mixture("1:0.2,5:0.8")
    g, b = 0.3, 0.7
    G01 = math.cos(2 * b) - 1j * math.sin(2 * b) * math.exp(-2 * g * g * float(mix.dxi(1.0)))
    v1 = -2 * g * complex(mix.xi(G01)).imag
    run = run_bath(mix, [g], [b], fock=16, basis="cholesky", engine="mps", chi=None)
    assert run.value == pytest.approx(v1, abs=1e-10)


@pytest.mark.parametrize("spec", MIXTURES)
@pytest.mark.parametrize("basis,p", [("cholesky", 1), ("cholesky", 2), ("cholesky", 3), ("cholesky", 4),
                                     ("principal", 2), ("principal", 3)])
def test_mps_matches_dense_without_truncation(spec, basis, p):
    mix = parse_mixture(spec)
    g, b = angles(3, mix, p)
    fock = 6
    dense = run_bath(mix, g, b, fock=fock, tail=3, basis=basis, engine="dense")
    for reverse in (False, True):  # both chain orders of the modes
        mps = run_bath(mix, g, b, fock=fock, tail=3, basis=basis, engine="mps", chi=None, cutoff=0.0, reverse=reverse)
        assert mps.discarded == 0.0
        assert mps.value == pytest.approx(dense.value, abs=1e-10)
        assert np.max(np.abs(mps.correlations - dense.correlations)) < 1e-10


@pytest.mark.parametrize("spec,p", [("2:0.5", 5), ("3:1", 5), ("2:0.5,4:0.5", 6), ("1:0.2,5:0.8", 4)])
def test_error_estimate_bounds_true_error(spec, p):
    mix = parse_mixture(spec)
    g, b = angles(5, mix, p)
    exact = evaluate(mix, g, b).value
    for fock, chi in [(3, 2), (4, 4), (6, 8), (8, 16)]:
        res = evaluate_bath(mix, g, b, fock=fock, tail=3, chi=chi, basis="cholesky")
        assert abs(res.value - exact) <= res.error_estimate
        assert res.value == res.run.value and res.run.chi == 2 * chi


OPTIMA = os.path.join(os.path.dirname(__file__), os.pardir, "benchmarks", "data", "bath_angles.json")


def optimum(name: str, p: int):
    with open(OPTIMA) as fh:
        entry = json.load(fh)[name]
    e = entry["depths"][str(p)]
    return parse_mixture(entry["xi"]), np.array(e["gamma"]), np.array(e["beta"]), float(e["value"])


def sk_optimum_value(p: int) -> float:
    """V_p* of SK from tests/sk_optima.csv (Basso et al. arXiv:2110.14206 / Farhi et al. 2022, Table 1)."""
    with open(os.path.join(os.path.dirname(__file__), "sk_optima.csv")) as fh:
        rows = [ln.split(",") for ln in fh if ln[0].isdigit()]
    return {int(a): float(v) for a, v in rows}[p]


@pytest.mark.parametrize("spec", MIXTURES)
@pytest.mark.parametrize("p", [1, 2, 3, 4])
def test_readout_matches_carried_states_and_dense_fock(spec, p):
    # one state + back substitution against psi and every chi_s carried, both in the dense Fock
    # space and in an untruncated MPS; the identity is exact in the full Fock space, so enough levels
    mix = parse_mixture(spec)
    g, b = angles(13, mix, p)
    fock = {1: 20, 2: 20, 3: 18, 4: 14}[p]
    carried = run_bath(mix, g, b, fock=fock, engine="dense", readout="carried")
    dense = run_bath(mix, g, b, fock=fock, engine="dense", readout="modes")
    mps = run_bath(mix, g, b, fock=fock, engine="mps", chi=None, cutoff=0.0, readout="modes")
    assert dense.readout == "modes" and dense.carried == []
    assert np.max(np.abs(dense.correlations - carried.correlations)) < 1e-10
    assert np.max(np.abs(mps.correlations - dense.correlations)) < 1e-10
    assert dense.value == pytest.approx(evaluate(mix, g, b).value, abs=1e-10)


def test_readout_dense_p5():
    mix = parse_mixture("2:0.5")
    g, b = angles(17, mix, 5)
    dense = run_bath(mix, g, b, fock=11, engine="dense")
    carried = run_bath(mix, g, b, fock=11, engine="dense", readout="carried")
    assert abs(dense.value - carried.value) < 1e-10
    assert abs(dense.value - evaluate(mix, g, b).value) < 1e-9


@pytest.mark.parametrize("engine", ["dense", "mps"])
def test_tiny_pivots_carry_their_states(engine):
    # a zero gamma (pivot g_s C[s,s] = 0) and a zero beta (Z_4 = Z_3: the bath row is spanned
    # by earlier modes, C[3,3] = 0): those s carry chi_s and say so; the value stays exact
    mix = parse_mixture("2:0.3,3:0.7")
    g, b = np.array([0.3, 0.0, 0.5, 0.4]), np.array([0.4, 0.3, 0.0, 0.2])
    run = run_bath(mix, g, b, fock=18, engine=engine, chi=None, cutoff=0.0)
    assert 1 in run.carried and 3 in run.carried and 0 not in run.carried
    assert run.to_json()["carried_times"] == [s + 1 for s in run.carried]
    assert run.value == pytest.approx(evaluate(mix, g, b).value, abs=1e-9)


def test_fock_levels_grow_from_occupation():
    mix, g, b, exact = optimum("sk", 6)
    fixed = run_bath(mix, g, b, fock=4, chi=64)
    grown = run_bath(mix, g, b, fock=4, fock_max=30, fock_tol=1e-12, chi=64)
    assert abs(fixed.value - exact) > 1e-4 and fixed.top_population > 1e-4
    assert abs(grown.value - exact) < 1e-10 and grown.top_population < 1e-12
    assert max(grown.fock) > 12 and min(grown.fock) < max(grown.fock)  # per mode, from its occupation


FAST_OPTIMA = [("sk", 2), ("sk", 5), ("sk", 8), ("q3", 4), ("q3", 7), ("q4", 3), ("q4", 6), ("mix24", 5), ("mix24", 8)]
SLOW_OPTIMA = [(n, p) for n in ("sk", "q3", "q4", "mix24") for p in (10, 12)]


def _readout_at_optimum(name, p, chi):
    mix, g, b, stored = optimum(name, p)
    exact = evaluate(mix, g, b).value
    assert exact == pytest.approx(stored, abs=1e-12)
    if name == "sk":
        assert exact == pytest.approx(sk_optimum_value(p), abs=1e-9)
    run = run_bath(mix, g, b, fock=4, fock_max=30, fock_tol=1e-12, chi=chi)
    return run, exact


@pytest.mark.parametrize("name,p", FAST_OPTIMA)
def test_readout_at_optimal_angles(name, p):
    run, exact = _readout_at_optimum(name, p, 48)
    assert run.carried == []
    assert abs(run.value - exact) < 1e-8


@pytest.mark.slow
@pytest.mark.parametrize("name,p", SLOW_OPTIMA)
def test_readout_at_optimal_angles_deeper(name, p):
    run, exact = _readout_at_optimum(name, p, 64)
    assert abs(run.value - exact) < 1e-8


def test_truncation_is_reported_and_matters():
    mix = parse_mixture("2:0.5")
    g, b = angles(5, mix, 6)
    exact = evaluate(mix, g, b).value
    loose = run_bath(mix, g, b, fock=6, chi=4, basis="cholesky")
    tight = run_bath(mix, g, b, fock=16, chi=64, basis="cholesky")
    assert loose.max_bond == 4 and loose.discarded > 1e-6
    assert abs(tight.value - exact) < 1e-3 * abs(loose.value - exact)


def test_principal_modes_and_fock_levels():
    WB = np.array([[2.0, 0.5], [0.5, 1.0]])
    C, lam = principal_factor(WB)
    assert lam[0] > lam[1] > 0
    assert np.allclose(C @ C.conj().T, WB)
    assert fock_levels(np.array([2.0, 1.0, 0.1]), 10, tail=3) == [10, 5, 3]


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "leadline", *args], capture_output=True, text=True, timeout=120)


def test_cli_bath_json():
    r = run_cli("evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", str(math.pi / 8), "--method", "bath",
                "--fock", "8", "--bond", "4", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["method"] == "bath"
    assert out["value"] == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-8)
    assert out["error_estimate"] >= abs(out["value"] - 1 / math.sqrt(4 * math.e))
    t = out["truncation"]
    assert t["fock_levels"] == [12] and t["bond_cap"] == 8 and "discarded_weight" in t
    assert out["check_truncation"]["bond_cap"] == 4


@pytest.mark.parametrize("args,fragment", [
    (["--method", "nope"], "--method"),
    (["--fock", "5"], "--fock applies only"),
    (["--method", "bath", "--bond", "0"], "--bond"),
    (["--method", "bath", "--fock", "1"], "--fock"),
    (["--method", "bath", "--gradient"], "value only"),
    (["--method", "bath", "--basis", "qr"], "--basis"),
])
def test_cli_bath_bad_input(args, fragment, capsys):
    from leadline.jobs.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", *args])
    out = capsys.readouterr()
    assert exc.value.code == 2
    assert fragment in out.err and out.out == ""
    assert len(out.err.strip().splitlines()) == 1
