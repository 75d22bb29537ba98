"""The bath optimizer (optimize --method bath) and sweeps that continue an ensemble with it.

External references:
- Optimal V_p of the SK model (xi = x^2/2): Farhi, Goldstone, Gutmann, Zhou, "The QAOA and the SK
  model at infinite size", Quantum 6, 759 (2022), Table 1: V_3* = 0.4726, V_4* = 0.5157, V_6* = 0.5721
  (4 decimals).
- The exact optimizer of this package (reverse-mode gradient of the exact iteration, itself
  checked against that table in tests/test_optimize.py) gives V_p* to 1e-8; the bath optimizer,
  started from INTERP of the exact depth p - 1 optimum, must find it to 1e-6 (pure q = 3 has no
  published table at these depths: the exact optimizer is the reference).
Kill and resume: the same spec uninterrupted must give the same bits.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from leadline.kernels.mixture import parse_mixture
from leadline.storage import open_study

LEADLINE = [sys.executable, "-m", "leadline"]
# Quantum 6, 759 (2022), Table 1 (SK model), to 4 decimals
SK_TABLE_1 = {3: 0.4726, 4: 0.5157, 6: 0.5721}
ENGINE = {"tolerance": 1e-7}


def _exact_ladder(xi: str, p: int):
    """Exact optima of depths p - 1 and p (the exact optimizer, INTERP ladder)."""
    from leadline.kernels.optimize import optimize_depth

    mix = parse_mixture(xi)
    previous = previous_value = None
    out = {}
    for q in range(1, p + 1):
        r = optimize_depth(mix, q, previous=previous, previous_value=previous_value)
        out[q] = r
        previous, previous_value = (r.gamma, r.beta), r.value
    return mix, out[p - 1], out[p]


def _bath_from_exact(xi: str, p: int):
    from leadline.kernels.bath import optimize_bath_depth

    mix, before, exact = _exact_ladder(xi, p)
    got = optimize_bath_depth(mix, p, engine=ENGINE, previous=(before.gamma, before.beta), previous_value=before.value)
    return got, exact


@pytest.mark.parametrize("xi,p", [("2:0.5", 3), ("3:1", 3), pytest.param("2:0.5", 4, marks=pytest.mark.slow), pytest.param("2:0.5", 6, marks=pytest.mark.slow),
                                  pytest.param("3:1", 6, marks=pytest.mark.slow)])
def test_bath_optimizer_finds_the_exact_optimum(xi, p):
    got, exact = _bath_from_exact(xi, p)
    assert abs(got.value - exact.value) <= 1e-6, (got.value, exact.value)
    # the estimate is honest: the reported value is not above the optimum by more than it
    assert got.value <= exact.value + got.error_estimate + 1e-9
    # stopped near the optimum (a generic point has gradient norm ~ 0.1 .. 1), not at the iteration cap
    assert got.error_estimate <= 1e-6 and got.gradient_norm <= 1e-2 and got.converged
    if xi == "2:0.5":
        assert round(got.value, 4) == SK_TABLE_1[p]
    # the same optimum, not a nearby point: the angles agree with the exact optimizer's
    assert np.max(np.abs(got.gamma - exact.gamma)) < 2e-3 and np.max(np.abs(got.beta - exact.beta)) < 2e-3


def test_search_runs_at_one_cutoff_and_the_preconditioner_saves_gradients():
    """SK p = 4 from INTERP of the exact p = 3 optimum: the search evaluates single runs at the fixed
    cut-off tolerance / 10, only the final point gets the ladder; the exact-Hessian preconditioner
    reaches the optimum in at most 6 gradients, where BFGS from a scaled identity needs more."""
    from leadline.kernels.bath import optimize_bath_depth

    mix, before, exact = _exact_ladder("2:0.5", 4)
    results = []
    for kwargs in ({}, {"inverse_hessian": 0.3 * np.eye(8)}):
        settings = []

        def run_map(func, tasks):
            tasks = list(tasks)
            settings.extend(t[3] for t in tasks)
            return [func(t) for t in tasks]

        r = optimize_bath_depth(mix, 4, engine=ENGINE, run_map=run_map, previous=(before.gamma, before.beta),
                                previous_value=before.value, **kwargs)
        assert abs(r.value - exact.value) <= 1e-6 and round(r.value, 4) == SK_TABLE_1[4] and r.converged
        assert r.evaluations == len(settings)
        ladders = [s for s in settings if "cutoff" not in s]
        assert ladders == [ENGINE]  # the final point only
        assert all(s["cutoff"] == pytest.approx(ENGINE["tolerance"] / 10) for s in settings if "cutoff" in s)
        results.append(r)
    preconditioned, identity = results
    assert preconditioned.gradients <= 6 < identity.gradients


def test_preconditioner_is_positive_definite_and_padded():
    from leadline.kernels.bath import preconditioner

    mix = parse_mixture("2:0.5")
    g = np.linspace(0.3, 0.6, 14)
    b = np.linspace(0.6, 0.1, 14)
    H = preconditioner(mix, g, b, 14, depth=4)  # exact Hessian at depth 4, padded to 14 modes
    assert H.shape == (28, 28) and np.allclose(H, H.T, atol=1e-12)
    assert np.linalg.eigvalsh(H).min() > 0
    # modes beyond depth 4 are uncoupled: the padded block is diagonal
    inv = np.linalg.inv(H)
    assert np.allclose(inv[4:14, 4:14], np.diag(np.diag(inv[4:14, 4:14])), atol=1e-9)
    # its exact gradients are 2 x 4 + 1 independent tasks of one map (an executor's on a cluster)
    calls = []

    def run_map(func, tasks):
        tasks = list(tasks)
        calls.append(len(tasks))
        return [func(t) for t in reversed(tasks)][::-1]  # computed in another order, returned in task order

    assert np.array_equal(preconditioner(mix, g, b, 14, depth=4, run_map=run_map), H) and calls == [9]


class _Smooth:
    """A run_map that ignores the engine: V = -(z - z*)^T A (z - z*) / 2 + c sum (z - z*)^3 over the 2p
    angles z = (gamma, beta), with its closed-form gradient; counts the evaluations."""

    def __init__(self, p, seed=3):
        rng = np.random.default_rng(seed)
        B = rng.normal(size=(2 * p, 2 * p))
        self.A = B @ B.T / (2 * p) + np.diag(np.linspace(0.2, 9.0, 2 * p))  # spread as SK's -Hessian, 0.2 .. 9
        self.star = np.concatenate([np.linspace(0.3, 0.6, p), np.linspace(0.6, 0.1, p)])
        self.c = 0.05
        self.count = 0

    def value(self, z):
        d = z - self.star
        return float(-0.5 * d @ self.A @ d + self.c * np.sum(d ** 3))

    def gradient(self, z):
        d = z - self.star
        return -self.A @ d + 3 * self.c * d ** 2

    def __call__(self, func, tasks):
        tasks = list(tasks)
        self.count += len(tasks)
        return [(self.value(np.concatenate([t[1], t[2]])), 0.0, 0.0) for t in tasks]


def test_forward_differences_lose_their_bias_and_the_central_one_reuses_them():
    """Forward differences with the curvature term h V_jj / 2 removed are accurate to O(h^2) (Taylor);
    the central difference at the same point then costs only the 2p backward points."""
    from leadline.kernels.bath import _optimize, fourier_basis

    p = 5
    f = _Smooth(p)
    g0, b0 = np.linspace(0.25, 0.55, p), np.linspace(0.55, 0.15, p)
    search = _optimize._Search(parse_mixture("2:0.5"), p, p, g0, b0, {}, f, None, {"values": []})
    S, C = fourier_basis(p, p)
    Q = np.block([[S, np.zeros((p, p))], [np.zeros((p, p)), C]])  # angles = start + Q x
    x = np.full(2 * p, 0.01)
    exact = Q.T @ f.gradient(np.concatenate([g0, b0]) + Q @ x)
    curvature = np.diag(Q.T @ f.A @ Q)  # -V_jj of the quadratic part, as the BFGS model would give it
    h = _optimize.STEP
    _, _, plain = search.gradient(x, kind="forward")
    assert f.count == 2 * p + 1
    assert np.max(np.abs(plain - exact)) > 0.4 * h * np.max(curvature)  # the bias h V''/2 is there
    _, _, fwd = search.gradient(x, kind="forward", curvature=curvature)
    # what is left: h/2 times the cubic term's share of V_jj, and O(h^2)
    assert np.max(np.abs(fwd - exact)) < 2e-6 < 0.01 * np.max(np.abs(plain - exact))
    before = f.count
    _, _, central = search.gradient(x, kind="central")
    assert f.count - before == 2 * p  # V(x) and V(x + h e_j) reused
    assert np.max(np.abs(central - exact)) < 50 * h * h


def test_hybrid_search_stops_where_central_differences_do(monkeypatch):
    """On the smooth function above (started 0.02 off its maximum, BFGS from its exact inverse Hessian)
    the hybrid search reaches the maximum as the central one does -- its stop is confirmed by a central
    gradient -- with fewer evaluations."""
    from leadline.kernels.bath import _optimize, fourier_basis, optimize_bath_depth

    p = 6
    counts = {}
    for mode in ("central", "hybrid"):
        monkeypatch.setattr(_optimize, "DIFFERENCES", mode)
        f = _Smooth(p)
        S, C = fourier_basis(p, p)
        Q = np.block([[S, np.zeros((p, p))], [np.zeros((p, p)), C]])
        start = (f.star[:p] + 0.02 * np.cos(np.arange(p)), f.star[p:] - 0.02 * np.sin(np.arange(p)))
        r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[start],
                                restarts=0, inverse_hessian=np.linalg.inv(Q.T @ f.A @ Q))
        z = np.concatenate([r.gamma, r.beta])
        assert r.converged and abs(r.value) < 1e-8 and np.max(np.abs(z - f.star)) < 1e-4, (mode, r.value, r.message)
        counts[mode] = f.count
    assert counts["hybrid"] < counts["central"], counts


def test_stall_rule_stops_where_the_last_three_gradients_gained_less_than_tolerance_over_5():
    from leadline.kernels.bath import stalled

    tol = 1e-6
    assert not stalled([0.5, 0.6, 0.6, 0.6], tol) and not stalled([0.6, 0.6, 0.6], tol)  # 3 gains need 4 values
    assert stalled([0.5, 0.6, 0.6 + 1e-8, 0.6 + 2e-8, 0.6 + 1.5e-7], tol)  # 1.5e-7 over the last 3 < 2e-7
    assert not stalled([0.5, 0.6, 0.6 + 1e-8, 0.6 + 2e-8, 0.6 + 2.5e-7], tol)
    assert not stalled([0.6, 0.6, 0.6, 0.6 + 3e-7], tol)  # a late gain above tolerance / 5 keeps it going


def test_search_stops_on_the_stall_rule(monkeypatch):
    """BFGS from a scaled identity on the smooth function: with the rule off it takes many gradients to
    the maximum; with the stall threshold raised above the gains (tolerance x 1e6) it makes the stall stop
    after 3 gradients past its first."""
    from leadline.kernels.bath import _optimize, optimize_bath_depth

    p = 6
    out = {}
    for fraction in (0.0, 1e6):
        monkeypatch.setattr(_optimize, "STALL_FRACTION", fraction)
        f = _Smooth(p)
        start = (f.star[:p] + 0.02 * np.cos(np.arange(p)), f.star[p:] - 0.02 * np.sin(np.arange(p)))
        out[fraction] = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f,
                                            starts=[start], restarts=0, inverse_hessian=0.05 * np.eye(2 * p))
    off, on = out[0.0], out[1e6]
    assert not off.message.startswith("gain over") and off.gradients > 8 and abs(off.value) < 1e-8
    assert on.message.startswith("gain over the last 3 gradients below tolerance") and on.converged
    assert on.gradients == 4 or on.gradients == 5  # 4 values span 3 gains (+ the central confirmation)


def test_extrapolated_start_is_the_linear_trend_of_the_last_two_optima():
    """2 I(x_{p-1}) - I(I(x_{p-2})) with INTERP I (Zhou et al., Phys. Rev. X 10, 021067 (2020), eq. B1):
    schedules that are samples of one linear ramp at every depth are continued exactly, and the start
    is used only from depth 5 with both optima of the right depths."""
    from leadline.kernels.mixture import parse_mixture as mix_of
    from leadline.kernels.optimize import EXTRAPOLATE_FROM, extrapolated_start, interpolate_angles, start_candidates

    x3, x4 = np.array([0.2, 0.3, 0.4]), np.array([0.1, 0.25, 0.35, 0.45])
    g, b = extrapolated_start((x4, x4[::-1]), (x3, x3[::-1]))
    i4 = interpolate_angles(x4, x4[::-1])
    ii3 = interpolate_angles(*interpolate_angles(x3, x3[::-1]))
    assert np.allclose(g, i4[0] + (i4[0] - ii3[0])) and np.allclose(b, i4[1] + (i4[1] - ii3[1]))
    # the optimum at p - 1 equal to INTERP of p - 2's: no correction, the start is INTERP
    x4i = interpolate_angles(x3, x3)[0]
    assert np.allclose(extrapolated_start((x4i, x4i), (x3, x3))[0], interpolate_angles(x4i, x4i)[0])
    m = mix_of("2:0.5")
    kinds = [c[2] for c in start_candidates(m, 5, previous=(x4, x4), earlier=(x3, x3), restarts=0)]
    assert EXTRAPOLATE_FROM == 5 and kinds == ["extrapolated"]
    x2, x3b = np.array([0.2, 0.3]), np.array([0.2, 0.3, 0.4])
    assert [c[2] for c in start_candidates(m, 4, previous=(x3b, x3b), earlier=(x2, x2), restarts=0)] == ["interp"]
    assert [c[2] for c in start_candidates(m, 5, previous=(x4, x4), restarts=0)] == ["interp"]


def test_carried_inverse_hessian_is_padded_mode_by_mode():
    from leadline.kernels.bath import pad_inverse_hessian

    q, p = 3, 5
    rng = np.random.default_rng(0)
    B = rng.normal(size=(2 * q, 2 * q))
    H = B @ B.T + np.eye(2 * q)
    out = pad_inverse_hessian(H, p)
    assert out.shape == (2 * p, 2 * p) and np.allclose(out, out.T)
    idx = [0, 1, 2, 5, 6, 7]  # gamma modes 1..3, beta modes 1..3 at depth 5
    assert np.array_equal(out[np.ix_(idx, idx)], H)
    assert out[3, 3] == out[4, 4] == H[2, 2] and out[8, 8] == out[9, 9] == H[5, 5]
    assert np.linalg.eigvalsh(out).min() > 0
    with pytest.raises(ValueError):
        pad_inverse_hessian(np.eye(12), p)


def test_same_bits_on_one_and_two_workers():
    """One bath optimization step whose evaluations and preconditioner gradients run on a LocalCluster
    of 1 and of 2 workers, and the same in this process: the same bits."""
    from leadline.cluster import ComputeSettings
    from leadline.cluster.executor import start_local_cluster
    from leadline.kernels.bath import optimize_bath_depth

    mix = parse_mixture("2:0.5")
    previous = ([0.5], [0.3927])
    engine = {"tolerance": 1e-6}
    results = []
    for workers in (1, 2):
        with start_local_cluster(ComputeSettings(mode="local", workers=workers).resolved()) as ex:
            assert len(ex.client.nthreads()) == workers or ex.client.wait_for_workers(workers) is None
            r = optimize_bath_depth(mix, 2, engine=engine, run_map=ex.run_map, hessian_map=ex.run_map,
                                    previous=previous, maxiter=2)
        results.append(r)
    results.append(optimize_bath_depth(mix, 2, engine=engine, previous=previous, maxiter=2))
    one, two, here = results
    assert here.value == one.value and here.gamma.tobytes() == one.gamma.tobytes()
    assert one.value == two.value and one.error_estimate == two.error_estimate
    assert one.gamma.tobytes() == two.gamma.tobytes() and one.beta.tobytes() == two.beta.tobytes()
    assert one.evaluations == two.evaluations > 9


# ------------------------------------------------------------------ sweeps
SPEC = """
[study]
name = "bath-kill"
store = "{store}"

[depths]
pmax = {pmax}

[optimizer]
restarts = 0

[compute]
executor = "inprocess"

[checkpoint]
interval-s = 0

[[ensemble]]
label = "sk"
xi = "2:0.5"
bath-from = {pmax}
bath-tolerance = 1e-6
"""


def _run(args, env=None, timeout=300):
    import os

    full = dict(os.environ)
    for var in ("LEADLINE_CRASH_AT", "LEADLINE_HOLD_AT", "LEADLINE_HOLD_FILE"):
        full.pop(var, None)
    full.update(env or {})
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, env=full, timeout=timeout)


def _held_sweep(spec: Path, hold_at: str, hold: Path) -> subprocess.Popen:
    """`leadline sweep SPEC` in a subprocess, returned once it holds at crash point ``hold_at``
    (``name:count``; it writes ``hold`` there and waits)."""
    import os
    import time

    env = dict(os.environ, LEADLINE_HOLD_AT=hold_at, LEADLINE_HOLD_FILE=str(hold))
    env.pop("LEADLINE_CRASH_AT", None)
    proc = subprocess.Popen([*LEADLINE, "sweep", str(spec), "--quiet"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, env=env)
    deadline = time.monotonic() + 240
    while not hold.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            proc.wait()
            raise AssertionError(f"the sweep did not reach {hold_at} (exit {proc.returncode})")
        time.sleep(0.05)
    return proc


def _depths(store: Path) -> dict:
    return {d["p"]: d for d in open_study(store).depths("sk")}


@pytest.mark.parametrize("pmax", [3, 5])
def test_kill_mid_bath_depth_then_resume_gives_the_same_bits(tmp_path, pmax):
    """At p = 5 the bath depth starts from the extrapolated start, so the resumed run must read the
    optima of p = 3 and 4 back from the store to replay it."""
    (tmp_path / "ref").mkdir()
    (tmp_path / "ref" / "s.toml").write_text(SPEC.format(store="ref.zarr", pmax=pmax))
    ref = _run(["sweep", str(tmp_path / "ref" / "s.toml"), "--quiet"])
    assert ref.returncode == 0, ref.stderr
    assert "(bath)" in ref.stdout.splitlines()[pmax - 1] and "+-" in ref.stdout.splitlines()[pmax - 1]

    (tmp_path / "s.toml").write_text(SPEC.format(store="k.zarr", pmax=pmax))
    store, hold = tmp_path / "k.zarr", tmp_path / "held"
    proc = _held_sweep(tmp_path / "s.toml", "bath-evaluations-cached:4", hold)
    try:
        # status while the bath depth runs: depth, current V, estimate, time per evaluation
        status = _run(["status", str(store)])
        assert status.returncode == 0, status.stderr
        line = next(x for x in status.stdout.splitlines() if x.strip().startswith("running"))
        assert f"p = {pmax} (bath)" in line and "best V so far = 0." in line and "+-" in line and "per evaluation" in line
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=60) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    hold.unlink()
    r = _run(["resume", str(store), "--json"])
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    (line,) = out["finished_now"]
    assert line["p"] == pmax and line["timings"]["bath_evaluations_reused"] > 10
    got, want = _depths(store), _depths(tmp_path / "ref" / "ref.zarr")
    history = open_study(store).depth("sk", pmax)["result"]["history"]
    assert history[0]["kind"] == ("extrapolated" if pmax >= 5 else "interp")
    for p in range(1, pmax + 1):
        assert got[p]["value"] == want[p]["value"]
        assert got[p]["gamma"] == want[p]["gamma"] and got[p]["beta"] == want[p]["beta"]
    assert got[pmax]["method"] == "bath" and got[pmax]["error_estimate"] == want[pmax]["error_estimate"] > 0
    assert got[pmax - 1]["method"] == "exact" and got[pmax - 1]["error_estimate"] is None
    table = _run(["table", str(store)]).stdout
    assert "| exact" in table and "bath +- " in table


def test_status_of_a_bath_depth_before_its_first_evaluation(tmp_path):
    """Held right after the bath depth p = 3 started (before its preconditioner and first evaluation):
    status names it a bath depth with no evaluation saved, not an exact depth with 0 passes."""
    (tmp_path / "s.toml").write_text(SPEC.format(store="h.zarr", pmax=3))
    store = tmp_path / "h.zarr"
    proc = _held_sweep(tmp_path / "s.toml", "depth-started:3", tmp_path / "held")
    try:
        status = _run(["status", str(store)])
        assert status.returncode == 0, status.stderr
        line = next(x for x in status.stdout.splitlines() if x.strip().startswith("running"))
        assert "p = 3 (bath): 0 evaluations saved" in line and "passes" not in line, line
    finally:
        proc.kill()
        proc.wait()


# ------------------------------------------------------------------ bad input
BAD_OPTIMIZE = {
    "exact option with bath": (["--method", "bath", "--memory-mib", "64"], "--memory-mib sets the chunk plan"),
    "bath option with exact": (["--tolerance", "1e-8"], "--tolerance applies only to --method bath"),
    "bath on sparse": (["--method", "bath", "--sparse-q", "3", "--degree", "4"], "not --sparse-q/--degree"),
    "unknown method": (["--method", "fast"], "--method must be one of exact, bath"),
    "fock too small": (["--method", "bath", "--fock", "1"], "--fock must be between 4 and 200"),
    "fock with exact": (["--fock", "8"], "--fock applies only to --method bath"),
    "bond with exact": (["--bond", "64"], "--bond applies only to --method bath"),
    "scratch with bath": (["--method", "bath", "--scratch", "x"], "--scratch is for sparse ensembles"),
    "tolerance not a number": (["--method", "bath", "--tolerance", "nan"], "--tolerance must be between"),
    "bath below its start depth": (["--method", "bath", "--depth", "5", "--angles", "{p2}"], "not --depth 5"),
}


@pytest.mark.parametrize("case", sorted(BAD_OPTIMIZE))
def test_bad_optimize_options_one_line_exit_2(case, tmp_path):
    args, needle = BAD_OPTIMIZE[case]
    if "{p2}" in args:  # a depth-2 angle file: a bath depth below which nothing starts
        (tmp_path / "p2.json").write_text(json.dumps({"format": "leadline.angles", "format_version": 1, "xi": "2:0.5",
                                                      "p": 2, "gamma": [0.4, 0.6], "beta": [0.5, 0.3]}))
        args = [a.replace("{p2}", str(tmp_path / "p2.json")) for a in args]
    base = ["optimize", "--depth", "3", "--output", str(tmp_path / "out.json")]
    if "--depth" in args:
        base = ["optimize", "--output", str(tmp_path / "out.json")]
    if "--sparse-q" not in args:
        base += ["--xi", "2:0.5"]
    r = _run([*base, *args])
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and needle in r.stderr, r.stderr
    assert not (tmp_path / "out.json").exists()


BAD_SPECS = {
    "bath-from at pmin": ("pmin = 3\npmax = 5", 'bath-from = 3', "must be above [depths] pmin = 3"),
    "bath-from beyond pmax": ("pmax = 5", 'bath-from = 9', "is beyond [depths] pmax = 5"),
    "fock without bath-from": ("pmax = 5", 'bath-fock = 8', "runs only with bath-from"),
    "tolerance without bath-from": ("pmax = 5", 'bath-tolerance = 1e-7', "runs only with bath-from"),
    "deep exact ensemble": ("pmax = 40", "", "continue it with the bath engine"),
    "bath-from too deep": ("pmax = 40", "bath-from = 35", "exact depths end at 30"),
    "bad bond": ("pmax = 5", "bath-from = 3\nbath-bond = 0", "bath-bond must be between 4 and 4096"),
    "bad tolerance": ("pmax = 5", "bath-from = 3\nbath-tolerance = 2.0", "bath-tolerance must be between"),
    "bath-from not an integer": ("pmax = 5", "bath-from = 2.5", "bath-from must be an integer"),
    "bath-from as a string": ("pmax = 5", 'bath-from = "3"', "bath-from must be an integer"),
    "bath-from 1": ("pmax = 5", "bath-from = 1", "bath-from must be >= 2"),
    "tolerance as a string": ("pmax = 5", 'bath-from = 3\nbath-tolerance = "1e-6"', "bath-tolerance must be a number"),
    "fock not an integer": ("pmax = 5", "bath-from = 3\nbath-fock = 8.0", "bath-fock must be an integer"),
}


@pytest.mark.parametrize("kwargs,needle", [
    ({"method": "exact", "tolerance": 1e-7}, "--tolerance applies only to --method bath"),
    ({"method": "exact", "bond": 64}, "--bond applies only to --method bath"),
    ({"method": "bath", "memory_mib": 64}, "--memory-mib sets the chunk plan"),
    ({"method": "bath", "fock": 2}, "--fock must be between"),
])
def test_api_refuses_mixed_method_options(kwargs, needle):
    import leadline
    from leadline.jobs.errors import InputError

    with pytest.raises(InputError, match=needle.replace("-", "\\-")):
        leadline.optimize("2:0.5", 3, **kwargs)


@pytest.mark.parametrize("case", sorted(BAD_SPECS))
def test_bad_bath_spec_one_line_exit_2_nothing_written(case, tmp_path, capsys):
    from leadline.jobs.cli import main

    depths, extra, needle = BAD_SPECS[case]
    spec = tmp_path / "s.toml"
    spec.write_text(f'[study]\nname = "x"\nstore = "x.zarr"\n[depths]\n{depths}\n'
                    f'[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\n{extra}\n')
    with pytest.raises(SystemExit) as exc:
        main(["sweep", str(spec)])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and needle in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.toml"]


def test_bath_from_on_a_sparse_ensemble_is_refused(tmp_path, capsys):
    from leadline.jobs.cli import main

    spec = tmp_path / "s.toml"
    spec.write_text('[study]\nname = "x"\nstore = "x.zarr"\n[depths]\npmax = 4\n'
                    '[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2\ndegree = 3\nbath-from = 3\n')
    with pytest.raises(SystemExit) as exc:
        main(["sweep", str(spec)])
    assert exc.value.code == 2 and "applies to dense ensembles" in capsys.readouterr().err


@pytest.mark.parametrize("forward_again", [False, True])
def test_after_a_confirmation_that_does_not_stop_the_gradients_are_forward_again(monkeypatch, forward_again):
    """A stop check (here the stall rule, forced once) is confirmed by a central gradient at the same
    point; when that one does not stop the search, the next gradients are forward differences again
    (``FORWARD_AFTER_CONFIRM``) or stay central (the previous rule), and either way the search reaches
    the maximum."""
    from leadline.kernels.bath import _optimize, fourier_basis, optimize_bath_depth

    p = 6
    monkeypatch.setattr(_optimize, "FORWARD_AFTER_CONFIRM", forward_again)
    calls = {"stalled": 0}

    def stalled_once(values, tolerance):  # the second check says "stalled", no other does
        calls["stalled"] += 1
        return calls["stalled"] == 2

    monkeypatch.setattr(_optimize, "stalled", stalled_once)
    kinds = []
    original = _optimize._Search.gradient

    def gradient(self, x, known=None, kind="central", curvature=None):
        kinds.append(kind)
        return original(self, x, known=known, kind=kind, curvature=curvature)

    monkeypatch.setattr(_optimize._Search, "gradient", gradient)
    f = _Smooth(p)
    S, C = fourier_basis(p, p)
    Q = np.block([[S, np.zeros((p, p))], [np.zeros((p, p)), C]])
    start = (f.star[:p] + 0.02 * np.cos(np.arange(p)), f.star[p:] - 0.02 * np.sin(np.arange(p)))
    r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[start],
                            restarts=0, inverse_hessian=0.5 * np.linalg.inv(Q.T @ f.A @ Q))  # a preconditioner off by 2x
    z = np.concatenate([r.gamma, r.beta])
    assert r.converged and abs(r.value) < 1e-8 and np.max(np.abs(z - f.star)) < 1e-4, (r.value, r.message)
    assert kinds[:3] == ["forward", "forward", "central"], kinds  # the forced stop check, confirmed centrally
    assert len(kinds) > 3, kinds
    if forward_again:
        assert kinds[3] == "forward" and kinds[-1] == "central", kinds  # forward again; the stop confirmed
    else:
        assert set(kinds[2:]) == {"central"}, kinds


# ------------------------------------------------- engine breakdowns never become V_p*
class _BreaksDown(_Smooth):
    """The smooth run_map, with chosen calls returning what a broken-down engine run gave at SK p = 20 in a
    sweep (V = 2.4e17 with error estimate 0.17, 10 radians from the optimum): ``trial`` breaks the first
    line-search trial, ``gradient`` one point of the second gradient, ``final`` the final ladder."""

    def __init__(self, p, where):
        super().__init__(p)
        self.where, self.batches, self.trials, self.calls = where, 0, 0, []

    def __call__(self, func, tasks):
        tasks = list(tasks)
        out = super().__call__(func, tasks)
        self.calls.append([np.concatenate([t[1], t[2]]) for t in tasks])
        search = all("cutoff" in t[3] for t in tasks)
        if search and len(tasks) == 1:
            self.trials += 1
            if self.where == "trial" and self.trials == 1:
                out[0] = (2.4e17, 0.17, 0.0)
        elif search:
            self.batches += 1
            if self.where == "gradient" and self.batches == 2:
                out[3] = (-6.6e19, 0.29, 0.0)
        elif self.where == "final":
            out[0] = (float("nan"), 0.0, 0.0)
        return out


def _smooth_start(f, p):
    return (f.star[:p] + 0.02 * np.cos(np.arange(p)), f.star[p:] - 0.02 * np.sin(np.arange(p)))


def test_a_broken_down_trial_step_is_no_gain():
    from leadline.kernels.bath import optimize_bath_depth

    p = 6
    f = _BreaksDown(p, "trial")
    r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[_smooth_start(f, p)],
                            restarts=0, inverse_hessian=0.05 * np.eye(2 * p))
    assert r.converged and abs(r.value) < 1e-8, (r.value, r.message)  # backtracked and went on to the maximum (0)
    assert sum(h.get("breakdowns", 0) for h in r.history) == 1


def test_a_breakdown_beside_the_search_point_ends_the_search_at_the_best_point():
    from leadline.kernels.bath import optimize_bath_depth

    p = 6
    f = _BreaksDown(p, "gradient")
    r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[_smooth_start(f, p)],
                            restarts=0, inverse_hessian=0.05 * np.eye(2 * p))
    assert not r.converged and "broke down" in r.message
    # reported: the best point before it, evaluated again by the final (ladder) run; never the broken value
    z = np.concatenate([r.gamma, r.beta])
    assert r.value == pytest.approx(f.value(z), abs=1e-15) and -1.0 < r.value <= 0.0
    assert r.value >= f.value(np.concatenate(_smooth_start(f, p)))


def test_a_broken_down_final_point_is_refused():
    from leadline.kernels.bath import EngineBreakdown, optimize_bath_depth

    p = 6
    f = _BreaksDown(p, "final")
    with pytest.raises(EngineBreakdown, match="final point"):
        optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[_smooth_start(f, p)],
                            restarts=0, inverse_hessian=0.05 * np.eye(2 * p))


def test_trial_steps_are_at_most_max_step_long():
    """A quasi-Newton model far too large (100 x I, as after an update across a tiny noisy step) proposes
    steps of several radians; every trial stays within MAX_STEP of the point it starts from, and the
    search still reaches the maximum."""
    from leadline.kernels.bath import _optimize, optimize_bath_depth

    p = 6
    f = _BreaksDown(p, "none")
    r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[_smooth_start(f, p)],
                            restarts=0, inverse_hessian=100.0 * np.eye(2 * p))
    assert abs(r.value) < 1e-8, (r.value, r.message)
    base, longest = None, 0.0
    for points in f.calls:
        if len(points) > 1:
            base = np.mean(points, axis=0)  # a gradient's stencil: its centre, to within the step 1e-4
        elif base is not None:
            longest = max(longest, float(np.linalg.norm(points[0] - base)))
    assert 0.1 < longest <= _optimize.MAX_STEP + 1e-3, longest


def test_plausible_values_of_an_engine_run():
    """No energy density exceeds the first-moment bound sqrt(2 ln 2 xi(1)) (0.8326 for SK; Derrida,
    Phys. Rev. B 24, 2613 (1981), the random energy model bound): beyond it, not finite, or with an
    error estimate above 1e-2, a run broke down."""
    from leadline.kernels.bath import plausible

    sk = parse_mixture("2:0.5")
    assert plausible(sk, 0.7633, 1e-7) and plausible(sk, -0.5, 1e-6) and plausible(sk, 0.83, 1e-3)
    assert not plausible(sk, 0.84, 1e-7) and not plausible(sk, 2.4e17, 0.17) and not plausible(sk, 0.5, 0.02)
    assert not plausible(sk, float("nan"), 0.0) and not plausible(sk, 0.5, float("inf"))


def test_a_spoiled_model_is_started_again_from_the_preconditioner(monkeypatch):
    """After the model's first update its directions gain nothing (what updates across short, noisy steps
    did at SK p = 20: ten trial steps along two directions, all below the current value; emulated here by
    the next ten trials returning no gain): the model starts again from the preconditioner once, and the
    search reaches the maximum instead of stopping where it was."""
    from leadline.kernels.bath import _optimize, optimize_bath_depth

    real_update, real_values = _optimize.bfgs_update, _optimize._Search.values
    state = {"updated": False, "blocked": 0}

    def update(Hinv, s, y):
        out = real_update(Hinv, s, y)
        state["updated"] = state["updated"] or out is not None
        return out

    def values(self, points):
        out = real_values(self, points)
        if state["updated"] and state["blocked"] < 10:
            state["blocked"] += len(points)
            return [(-np.inf, e) for _, e in out]
        return out

    monkeypatch.setattr(_optimize, "bfgs_update", update)
    monkeypatch.setattr(_optimize._Search, "values", values)
    p = 6
    f = _BreaksDown(p, "none")
    r = optimize_bath_depth(parse_mixture("2:0.5"), p, engine={"tolerance": 1e-8}, run_map=f, starts=[_smooth_start(f, p)],
                            restarts=0, inverse_hessian=0.05 * np.eye(2 * p))
    assert state["blocked"] == 10
    assert sum(h.get("model_restarts", 0) for h in r.history) == 1
    assert r.converged and abs(r.value) < 1e-8, (r.value, r.message)


BROKEN_FINAL = """
import sys
import leadline.kernels.bath._optimize as O
real = O.bath_point
O.bath_point = lambda task: (float("nan"), 0.0, 0.0) if "cutoff" not in task[3] else real(task)
from leadline.jobs.cli import main
main(sys.argv[1:])
"""


def test_optimize_refuses_a_broken_down_final_point_in_one_line(tmp_path):
    """`optimize --method bath` whose final (ladder) evaluation breaks down: one line, exit 1, no angle file."""
    r = subprocess.run([sys.executable, "-c", BROKEN_FINAL, "optimize", "--xi", "2:0.5", "--depth", "2", "--method", "bath",
                        "--output", str(tmp_path / "a.json")], capture_output=True, text=True, timeout=300)
    lines = r.stderr.strip().splitlines()
    assert r.returncode == 1 and len(lines) == 1, r.stderr
    assert lines[0].startswith("leadline: error: the bath engine broke down at the final point of depth")
    assert not (tmp_path / "a.json").exists() and r.stdout.strip() == ""
