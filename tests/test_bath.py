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
    return {int(r[0]): float(r[1]) for r in rows}[p]


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


@pytest.mark.parametrize("spec", MIXTURES)
@pytest.mark.parametrize("p,chi,cutoff", [(3, None, 0.0), (5, None, 0.0), (7, 12, 1e-9)])
def test_parity_blocks_match_dense_mps(spec, p, chi, cutoff):
    # the block-sparse MPS (X (x) prod (-1)^n_k) against the dense-tensor MPS: same truncations,
    # same state; untruncated and truncated (the two SVD blocks cut together by one cut-off)
    mix = parse_mixture(spec)
    g, b = angles(19, mix, p)
    kw = dict(fock=6, chi=chi, cutoff=cutoff)
    blocks = run_bath(mix, g, b, engine="mps", **kw)
    dense = run_bath(mix, g, b, engine="dense-mps", **kw)
    assert np.max(np.abs(blocks.correlations - dense.correlations)) < 1e-12
    assert blocks.largest_bond == dense.largest_bond
    assert blocks.discarded == pytest.approx(dense.discarded, rel=1e-6, abs=1e-15)


def test_parity_blocks_hold_half_the_numbers_and_the_dense_state():
    from leadline.kernels.bath import ParityMPS
    from leadline.kernels.bath._engine import readout_sweep

    mix = parse_mixture("2:0.5")
    g, b = angles(23, mix, 6)
    W, info = readout_sweep(mix, g, b, engine="mps", fock=6, chi=None, cutoff=0.0)
    psi = info["states"][0]
    assert isinstance(psi, ParityMPS)
    stored = sum(v.size for blk in psi.blocks for v in blk.values())
    dense = sum(t.size for t in psi.to_dense_tensors())
    assert stored <= 0.5 * dense + 8
    _, info_d = readout_sweep(mix, g, b, engine="dense", fock=6)
    # contract the blocks back into the Fock-space array (spin in the Z basis) and compare
    ts = psi.to_dense_tensors()
    x = ts[0]
    for t in ts[1:]:
        x = np.tensordot(x, t, axes=([-1], [0]))
    x = x.reshape(x.shape[1:-1])
    ref = info_d["states"][0].data
    # both in the chain order spin, mode p, ..., mode 1
    assert np.max(np.abs(x - ref)) < 1e-12


def test_truncation_is_reported_and_matters():
    mix = parse_mixture("2:0.5")
    g, b = angles(5, mix, 6)
    exact = evaluate(mix, g, b).value
    loose = run_bath(mix, g, b, fock=6, chi=4, basis="cholesky")
    tight = run_bath(mix, g, b, fock=16, chi=64, basis="cholesky")
    assert loose.largest_bond == 4 and loose.discarded > 1e-6
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
                "--tolerance", "1e-8", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["method"] == "bath" and out["tolerance"] == 1e-8
    assert out["value"] == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-8)
    assert abs(out["value"] - 1 / math.sqrt(4 * math.e)) <= out["error_estimate"] <= 1e-8
    t = out["truncation"]
    assert t["bond_cap"] == 256 and t["readout"] == "modes" and "discarded_weight" in t and "cutoff" in t
    assert out["limiting"] in ("cut-off", "Fock levels", "bond cap") and len(out["ladder"]) >= 3


@pytest.mark.parametrize("args,fragment", [
    (["--method", "nope"], "--method"),
    (["--fock", "5"], "--fock applies only"),
    (["--tolerance", "1e-3"], "--tolerance applies only"),
    (["--method", "bath", "--bond", "0"], "--bond"),
    (["--method", "bath", "--bond", "100000"], "--bond"),
    (["--method", "bath", "--fock", "1"], "--fock"),
    (["--method", "bath", "--fock", "100000"], "--fock"),
    (["--method", "bath", "--tolerance", "0"], "--tolerance"),
    (["--method", "bath", "--tolerance", "1e-15"], "--tolerance"),
    (["--method", "bath", "--time-limit", "-1"], "--time-limit"),
    (["--method", "bath", "--gradient"], "value only"),
])
def test_cli_bath_bad_input(args, fragment, capsys):
    from leadline.jobs.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", *args])
    out = capsys.readouterr()
    assert exc.value.code == 2
    assert fragment in out.err and out.out == ""
    assert len(out.err.strip().splitlines()) == 1


# ---------------------------------------------------------------- the error estimate and the tolerance
ESTIMATE_CASES = [("sk", 3), ("sk", 7), ("q3", 4), ("q3", 8), ("q4", 4), ("q4", 8), ("mix24", 5), ("mix24", 8)]


@pytest.mark.parametrize("name,p", ESTIMATE_CASES)
@pytest.mark.parametrize("tol", [1e-4, 1e-6, 1e-8])
def test_error_estimate_bounds_true_error(name, p, tol):
    mix, g, b, _ = optimum(name, p)
    exact = evaluate(mix, g, b).value
    res = evaluate_bath(mix, g, b, tolerance=tol)
    assert abs(res.value - exact) <= res.error_estimate <= tol
    assert res.value == res.run.value and res.run.cutoff < res.check.cutoff


@pytest.mark.slow
@pytest.mark.parametrize("name", ["sk", "q3", "q4", "mix24"])
@pytest.mark.parametrize("p", [10, 12, 13, 14])
def test_error_estimate_bounds_true_error_deeper(name, p):
    # p = 13, 14: INTERP angles from the p = 12 optimum (Zhou et al., PRX 10, 021067 (2020))
    from leadline.kernels.optimize import interpolate_angles

    if p <= 12:
        mix, g, b, _ = optimum(name, p)
    else:
        mix, g, b, _ = optimum(name, 12)
        while g.size < p:
            g, b = interpolate_angles(g, b)
    exact = evaluate(mix, g, b).value
    res = evaluate_bath(mix, g, b, tolerance=1e-6)
    assert abs(res.value - exact) <= res.error_estimate <= 1e-6


def test_per_layer_trace():
    # one entry per layer; the relative Schur remainder of an accurate run lies in (0, 1]
    # (1 at layer 1: the first bath row has no earlier modes; Cholesky of a positive definite matrix)
    mix, g, b, _ = optimum("sk", 6)
    trace = []
    W, info = readout_sweep(mix, g, b, fock=12, chi=None, cutoff=1e-12, trace=trace)
    assert len(trace) == 6 and trace[0]["remainder"] == pytest.approx(1.0)
    assert all(0 < t["remainder"] <= 1 + 1e-12 for t in trace)
    assert max(t["bond"] for t in trace) == max(info["states"][0].bond_dimensions())
    assert [t["carried"] for t in trace] == [0] * 6


def test_loose_cutoff_breakdown_is_abandoned():
    # SK at INTERP angles p = 14 (Zhou et al., PRX 10, 021067 (2020)) from the p = 12 optimum:
    # at cut-off 1e-4 the readout's W stops giving a positive semidefinite bath (measured at
    # layer 12); the ladder drops that run and still bounds the error against the exact iteration.
    from leadline.kernels.bath._engine import BathBreakdown
    from leadline.kernels.optimize import interpolate_angles

    mix, g, b, _ = optimum("sk", 12)
    while g.size < 14:
        g, b = interpolate_angles(g, b)
    with pytest.raises(BathBreakdown, match="not positive semidefinite at layer"):
        run_bath(mix, g, b, fock=2, fock_max=40, fock_tol=1e-8, cutoff=1e-4, chi=256, check_psd=True)
    run_bath(mix, g, b, fock=2, fock_max=40, fock_tol=1e-8, cutoff=1e-4, chi=256)  # unchecked: runs on
    res = evaluate_bath(mix, g, b, tolerance=1e-4)
    assert res.ladder[0]["value"] is None and res.ladder[0]["abandoned_at_layer"] <= 14
    assert all(r["value"] is not None for r in res.ladder[1:])
    assert abs(res.value - evaluate(mix, g, b).value) <= res.error_estimate <= 1e-4


def test_ladder_jumps_past_the_predicted_breakdown():
    # Two breakdowns give the layers gained per decade of cut-off; the ladder jumps to half a decade
    # past the predicted onset at layer p.  Measured SK p = 40 at INTERP angles (docs/bath.md):
    # breakdowns at layers 13 (1e-5) and 27 (1e-6), 14 layers per decade: 10^-(13/14 + 0.5) x 1e-6.
    from leadline.kernels.bath import cutoff_after_breakdown

    assert cutoff_after_breakdown([(1e-5, 13), (1e-6, 27)], 40) == pytest.approx(3.7e-8)
    assert cutoff_after_breakdown([(1e-6, 27)], 40) == pytest.approx(1e-7)  # one breakdown: plain 10x
    assert cutoff_after_breakdown([(1e-5, 13), (1e-6, 13)], 40) == pytest.approx(1e-7)  # no trend: plain
    assert cutoff_after_breakdown([(1e-5, 20), (1e-6, 21)], 40) == pytest.approx(1e-10)  # at most 3 decades more
    assert cutoff_after_breakdown([(1e-5, 30), (1e-6, 39)], 40) == pytest.approx(1e-7)  # at least 10x


def test_jumped_ladder_bounds_the_true_error():
    # SK at INTERP angles p = 15 from the p = 12 optimum (Zhou et al., PRX 10, 021067 (2020)), tolerance
    # 1e-3: cut-offs 1e-3 and 1e-4 break down (layers 7 and 12), the ladder jumps past 1e-5 and its
    # estimate still bounds the error against the exact iteration.
    from leadline.kernels.optimize import interpolate_angles

    mix, g, b, _ = optimum("sk", 12)
    while g.size < 15:
        g, b = interpolate_angles(g, b)
    res = evaluate_bath(mix, g, b, tolerance=1e-3)
    assert [r.get("abandoned_at_layer") for r in res.ladder[:2]] == [7, 12]
    assert 1e-6 < res.ladder[2]["cutoff"] < 1e-5
    assert abs(res.value - evaluate(mix, g, b).value) <= res.error_estimate <= 1e-3


@pytest.mark.parametrize("spec", MIXTURES)
def test_error_estimate_corner_cases(spec):
    # one mode (p = 1, closed form of Claes, van Dam 2021) and zero angles (tiny pivots)
    mix = parse_mixture(spec)
    g, b = 0.3 / math.sqrt(float(mix.dxi(1.0))), 0.7
    G01 = math.cos(2 * b) - 1j * math.sin(2 * b) * math.exp(-2 * g * g * float(mix.dxi(1.0)))
    res = evaluate_bath(spec, [g], [b], tolerance=1e-8)  # a mixture string is accepted
    assert abs(res.value - (-2 * g * complex(mix.xi(G01)).imag)) <= res.error_estimate <= 1e-8
    gz, bz = [0.3, 0.0, 0.5, 0.4], [0.4, 0.3, 0.0, 0.2]
    gz = [x / math.sqrt(float(mix.dxi(1.0))) for x in gz]
    res = evaluate_bath(mix, gz, bz, tolerance=1e-6)
    assert abs(res.value - evaluate(mix, gz, bz).value) <= res.error_estimate <= 1e-6
    assert res.run.carried  # the zero angles were detected and carried


@pytest.mark.parametrize("gamma,beta,fragment", [
    ("3", "0.5", "exceeds the value"),     # V_1 ~ 4e-8, below what the default tolerance resolves
    ("0.3", "0", "exceeds the value"),     # V_1 = 0 up to rounding
    ("18.5", "0.3", "Fock cap 40 binds"),  # displacements of ~18: hundreds of Fock levels
    ("1000", "1000", "double-precision"),  # the value underflows (the exact method's range check)
])
def test_cli_bath_refuses_untrustworthy_values(gamma, beta, fragment):
    r = run_cli("evaluate", "--xi", "2:0.5", f"--gamma={gamma}", f"--beta={beta}", "--method", "bath")
    assert r.returncode == 2 and r.stdout == ""
    assert fragment in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_physical_range_and_sizes_refused():
    from leadline.jobs.commands._evaluate_bath import check_bath_size, check_bath_value, energy_bound
    from leadline.jobs.errors import InputError

    sk = parse_mixture("2:0.5")
    # sqrt(2 ln 2 xi(1)) lies above the Parisi ground state of SK, 0.763166 (Crisanti, Rizzo, Phys. Rev. E
    # 65, 046137 (2002))
    assert 0.7632 < energy_bound(sk) == pytest.approx(math.sqrt(math.log(2)), abs=1e-15)
    check_bath_value(0.5, 1e-7, sk, 1e-6)  # fine
    with pytest.raises(InputError, match="physical range"):
        check_bath_value(0.9, 1e-7, sk, 1e-6)
    with pytest.raises(InputError, match="at most p = 200"):
        check_bath_size(201, 16, 40)
    with pytest.raises(InputError, match="GiB"):
        check_bath_size(100, 4096, 200)


def test_json_names_the_largest_bond_and_the_cap():
    res = evaluate_bath("2:0.5", [0.4, 0.5], [0.5, 0.3], tolerance=1e-6)
    t = res.to_json()["truncation"]
    assert "largest_bond" in t and "bond_cap" in t and "max_bond" not in t
    assert all("largest_bond" in row for row in res.to_json()["ladder"])


def test_deterministic_bits_whatever_the_thread_count():
    code = ("import leadline;"
            "r = leadline.evaluate_bath('2:0.5', [0.3, 0.5, 0.6], [0.5, 0.4, 0.2]);"
            "print(r.value.hex(), r.error_estimate.hex())")
    outs = set()
    for threads in ("1", "2"):
        env = dict(os.environ, OMP_NUM_THREADS=threads, OPENBLAS_NUM_THREADS=threads, MKL_NUM_THREADS=threads)
        r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
        assert r.returncode == 0, r.stderr
        outs.add(r.stdout)
    assert len(outs) == 1


def test_limits_refused_in_one_line():
    from leadline.kernels.bath import BathLimitError

    mix, g, b, _ = optimum("sk", 10)
    with pytest.raises(BathLimitError, match="bond cap 4 binds"):
        evaluate_bath(mix, g, b, tolerance=1e-8, bond_cap=4)
    with pytest.raises(BathLimitError, match="time limit"):
        evaluate_bath(mix, g, b, tolerance=1e-10, time_limit=1e-3)
