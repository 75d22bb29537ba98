"""Adversarial numbers at the command line: the right value, or one line and exit 2 with nothing written.

Groups (worst class first): values that used to be wrong with exit 0 (huge or tiny mixture
weights, a flat start taken for an optimum, unphysical reference energies, transfer
predictions outside the range of C); tracebacks turned into one line; messages that pointed
the wrong way; display of tiny and huge values; strict number parsing.

Most cases run the real command line in this process (``leadline.jobs.cli.main``, the
console entry point, with its stdout/stderr captured), so the file stays fast; a few run
in a subprocess as a user would (``python -m leadline``).
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from leadline.jobs.cli import main
from leadline.kernels.numtext import fmt, parse_float, parse_int

# V_1* of the SK model xi = x^2/2 at its optimal p = 1 angles: 1/sqrt(4e)
# (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022))
SK_V1 = 1.0 / math.sqrt(4.0 * math.e)
# Parisi ground-state energy of SK (xi = x^2/2): Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)
SK_GS = 0.763166


def cli(*args, cwd: Path | None = None) -> tuple[int, str, str]:
    """Run the console entry point in this process: (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    old = os.getcwd()
    code = 0
    try:
        if cwd is not None:
            os.chdir(cwd)
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                main([str(a) for a in args])
            except SystemExit as exc:
                code = exc.code if isinstance(exc.code, int) else 1
    finally:
        os.chdir(old)
    return code, out.getvalue(), err.getvalue()


def run(*args, cwd=None):
    """The real command in a subprocess."""
    return subprocess.run([sys.executable, "-m", "leadline", *map(str, args)], capture_output=True, text=True,
                          timeout=300, cwd=cwd)


def snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns) for p in sorted(folder.rglob("*"))}


def refused(folder: Path, args, fragment: str) -> str:
    """The command exits 2 with exactly one 'leadline: error:' line containing fragment, writing nothing."""
    before = snapshot(folder)
    code, out, err = cli(*args, cwd=folder)
    lines = err.strip().splitlines()
    assert code == 2, (code, out, err)
    assert len(lines) == 1 and lines[0].startswith("leadline: error:"), err
    assert "Traceback" not in err and "Warning" not in err and out == ""
    assert fragment in lines[0], lines[0]
    assert snapshot(folder) == before, "a refused command changed its folder"
    return lines[0]


def ok_json(*args, cwd=None) -> dict:
    code, out, err = cli(*args, "--json", cwd=cwd)
    assert code == 0, err
    assert "Warning" not in err and "Traceback" not in err, err
    return json.loads(out)


def v1_closed_form(w: float, g: float, b: float) -> tuple[float, float, float]:
    """V_1 and its derivatives for xi = w x^2 from the closed form
    V_1 = -2 g Im xi(cos 2b - i sin 2b exp(-2 xi'(1) g^2))  (Claes, van Dam, Quantum 5, 542 (2021)),
    which for xi = w x^2 is 2 w g sin(4b) exp(-4 w g^2)."""
    e = math.exp(-4.0 * w * g * g)
    value = 2.0 * w * g * math.sin(4.0 * b) * e
    d_gamma = 2.0 * w * math.sin(4.0 * b) * e * (1.0 - 8.0 * w * g * g)
    d_beta = 8.0 * w * g * math.cos(4.0 * b) * e
    return value, d_gamma, d_beta


# ------------------------------------------------------------------ 1: wrong values with exit 0
@pytest.mark.parametrize("w", [1e150, 1e100, 1e-100, 1e-150, 1e6])
def test_huge_and_tiny_weights_give_the_closed_form_value_and_gradient(w):
    # the point of the case (gamma 7.6e-151 at w = 1e300) carried to each w: gamma sqrt(w) = 7.6e-1
    g, b = 0.76 / math.sqrt(w), 0.47
    out = ok_json("evaluate", "--xi", f"2:{w!r}", "--gamma", repr(g), "--beta", repr(b), "--gradient")
    value, d_gamma, d_beta = v1_closed_form(w, g, b)
    assert out["value"] == pytest.approx(value, rel=1e-12)
    assert out["gradient"]["gamma"][0] == pytest.approx(d_gamma, rel=1e-10)
    assert out["gradient"]["beta"][0] == pytest.approx(d_beta, rel=1e-10)


def test_the_normal_form_gives_the_same_digits():
    # V_p(c xi; gamma) = sqrt(c) V_p(xi; sqrt(c) gamma) (H -> sqrt(c) H; docs/limits.md): computed on
    # xi / 4^k at 2^k gamma, every product is the unscaled one times a power of 2, so the digits agree exactly
    from leadline.kernels.exact import evaluate
    from leadline.kernels.exact._iteration import _evaluate
    from leadline.kernels.mixture import parse_mixture

    mix = parse_mixture("2:3000.7,3:170.3,5:0.11")
    assert mix.scale_exponent() == 6
    g, b = np.array([0.01, 0.02, 0.005]), np.array([0.3, 0.2, 0.1])
    scaled = evaluate(mix, g, b, gradient=True)
    plain = _evaluate(mix, g, b, None, None, True, False, "growing")
    assert scaled.value == plain.value
    assert np.array_equal(scaled.gradient["gamma"], plain.gradient["gamma"])
    assert np.array_equal(scaled.gradient["beta"], plain.gradient["beta"])


@pytest.mark.parametrize("w", [1e100, 1e-100])
def test_optimize_with_huge_or_tiny_weights_finds_the_scaled_sk_optimum(w):
    # xi = w x^2 = 2w (x^2/2): V_1* = sqrt(2w) / sqrt(4e) at gamma* = (1/2) / sqrt(2w), beta* = pi/8
    # (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022))
    out = ok_json("optimize", "--xi", f"2:{w!r}", "--depth", "1")
    assert out["converged"] is True
    assert out["value"] == pytest.approx(math.sqrt(2.0 * w) * SK_V1, rel=1e-9)
    assert out["gamma"][0] == pytest.approx(0.5 / math.sqrt(2.0 * w), rel=1e-6)
    assert out["beta"][0] == pytest.approx(math.pi / 8, abs=1e-6)


def test_weights_beyond_the_range_are_refused_with_the_scaling_law(tmp_path):
    for args in (["optimize", "--xi", "2:1e300", "--depth", "1", "--output", "a.json"],
                 ["evaluate", "--xi", "2:1e300", "--gamma", "7.6e-151", "--beta", "0.47", "--gradient"],
                 ["evaluate", "--xi", "2:1e-200", "--gamma", "1", "--beta", "0.47"]):
        line = refused(tmp_path, args, "outside 1e-150..1e+150")
        assert "V_p(c xi; gamma, beta) = sqrt(c) V_p(xi; sqrt(c) gamma, beta)" in line


def test_flat_start_is_not_taken_for_an_optimum():
    # Max-9-XORSAT, D = 300, p = 1: the optimum beats the trivial value 1/2 and every point of a grid
    out = ok_json("optimize", "--xorsat", "9", "--degree", "300", "--depth", "1")
    assert out["converged"] is True and out["value"] > 0.52
    from leadline.kernels.sparse import evaluate_sparse, optimize_sparse

    grid = max(evaluate_sparse(9, 300, [g], [b]).value
               for g in np.linspace(0.01, 0.2, 12) for b in np.linspace(-0.7, 0.7, 29))
    assert out["value"] >= grid - 1e-12
    # a start in the flat region (large gamma, where nu = 1/2 to 60 digits) is never "converged"
    flat = optimize_sparse(9, 300, 1, starts=[(np.array([2.5]), np.array([0.3]))])
    assert abs(flat.value - 0.5) <= 1e-9  # it does stop there ...
    assert flat.converged is False and "trivial value" in flat.message  # ... and says so
    from leadline.kernels.mixture import parse_mixture
    from leadline.kernels.optimize import optimize_depth

    # dense: the flat region far out in gamma (gamma sqrt(xi'(1)) = 3.9, the box edge) and gamma = 0
    for g0 in (0.0, 1.3):
        dense = optimize_depth(parse_mixture("9:1"), 1, starts=[(np.array([g0]), np.array([0.3 if g0 else 0.0]))],
                               restarts=0)
        assert abs(dense.value) <= 1e-12
        assert dense.converged is False and "trivial value" in dense.message


def test_a_sweep_stores_the_optimum_not_the_flat_start(tmp_path):
    # the same ensemble through a real sweep: it stored 0.5 as a finished, converged depth
    (tmp_path / "s.toml").write_text('[study]\nname = "flat"\nstore = "flat.zarr"\n[depths]\npmax = 1\n'
                                     '[[ensemble]]\nlabel = "x9"\nkind = "sparse"\nq = 9\ndegree = 300\n')
    r = run("sweep", "s.toml", "--quiet", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    import leadline

    (row,) = leadline.open_study(tmp_path / "flat.zarr").depths("x9")
    assert row["converged"] is True and row["value"] > 0.52


def test_reference_energies_use_the_exact_scaling():
    from leadline.kernels.reference import reference_energies

    # xi = 4096 x^2 = 8192 (x^2/2): GS = sqrt(8192) x 0.763166 (SK, Crisanti & Rizzo 2002); computed on
    # the normal form x^2 (4096 = 4^6), so the tolerances apply there and scale by 2^6
    refs = reference_energies("2:4096", gs_tol=1e-3, alg_tol=1e-2, max_steps=3)
    assert refs.xi == "2:4096"
    assert abs(refs.ground_state - math.sqrt(8192.0) * SK_GS) < 64 * 2e-3
    assert refs.details["scaling"]["factor"] == 64.0


def test_an_unphysical_cached_reference_is_not_served(tmp_path):
    # a cache entry written before the check (the 60-spin ALG of -20918) is a miss, never a printed value
    from leadline.jobs import reference_cache
    from leadline.kernels.reference import References

    key = reference_cache.cache_key("60:1", 1e-4, 1e-3, 10)
    bad = References(xi="60:1", ground_state=1.17741, ground_state_uncertainty=1e-12, algorithmic_threshold=-20918.2,
                     algorithmic_threshold_uncertainty=34.0, ground_state_k_sequence=[1.17741],
                     algorithmic_threshold_k_sequence=[1.17741, -20918.2], overlap_gap=True, wall_time=1.0)
    reference_cache.store(tmp_path, key, bad)
    assert reference_cache.load(tmp_path, key) is None
    good = References(xi="60:1", ground_state=1.17741, ground_state_uncertainty=1e-12, algorithmic_threshold=1.0,
                      algorithmic_threshold_uncertainty=1e-3, ground_state_k_sequence=[1.17741],
                      algorithmic_threshold_k_sequence=[1.1, 1.0], overlap_gap=True, wall_time=1.0)
    reference_cache.store(tmp_path, key, good)
    assert reference_cache.load(tmp_path, key).algorithmic_threshold == 1.0


@pytest.mark.slow
def test_unphysical_reference_energies_are_refused(tmp_path):
    # pure 60-spin: the step functional's ALG came out as -20918 (ALG is in (0, GS] by definition)
    refused(tmp_path, ["reference", "--xi", "60:1", "--no-cache", "--max-steps", "3"], "outside (0, 1.17741]")


def test_transfer_prediction_stays_in_the_range_of_c(tmp_path):
    (tmp_path / "one.txt").write_text("1 0 99999999\n")  # one term among 1e8 spins
    (tmp_path / "forty.txt").write_text("1 " + " ".join(map(str, range(40))) + "\n")  # one 40-spin term
    for name in ("one.txt", "forty.txt"):
        out = ok_json("transfer", name, "--depth", "1", "--quiet", cwd=tmp_path)
        assert out["predicted"] is None  # |C| <= sum |w| = 1 for every string; n V_p* is 4289 and 1.21
        assert any("outside the range every C(z) lies in" in note for note in out["notes"])
    # a dense instance keeps its prediction: SK-like couplings +-1/sqrt(n) on all pairs of 12 spins
    rng = np.random.default_rng(7)
    lines = [f"{float(rng.choice([-1, 1])) / math.sqrt(12)!r} {i} {j}" for i in range(12) for j in range(i + 1, 12)]
    (tmp_path / "dense.txt").write_text("\n".join(lines) + "\n")
    out = ok_json("transfer", "dense.txt", "--depth", "1", "--quiet", cwd=tmp_path)
    assert out["predicted"] is not None and abs(out["predicted"]) <= sum(abs(float(x.split()[0])) for x in lines)


# ------------------------------------------------------------------ 2: tracebacks -> one line
def test_overflowing_inputs_are_one_line(tmp_path):
    many = ",".join(["0.001"] * 5000)
    (tmp_path / "g300.json").write_text(json.dumps({"format": "leadline.angles", "version": 1, "xi": "2:0.5", "p": 1,
                                                    "gamma": [1e300], "beta": [0.3]}))
    (tmp_path / "w200.txt").write_text("1e200 0 1\n-1e200 1 2\n1e200 2 0\n")
    (tmp_path / "small.txt").write_text("1 0 1\n1 1 2\n")
    cases = [
        (["evaluate", "--xi", "2:0.5", "--gamma", "1e300", "--beta", "0.3"], "sum_t |gamma_t| <= 22360.7"),
        (["evaluate", "--angles", "g300.json"], "out of the double-precision range"),
        (["optimize", "--depth", "1", "--angles", "g300.json", "--output", "o.json"], "out of the double-precision range"),
        (["evaluate", "--xi", "1000000:1", "--gamma", "0.1", "--beta", "0.3"], "beyond 1000"),
        (["optimize", "--xi", "2:0.5", "--depth", "5000", "--output", "o.json"], "2.7e+3010 path visits"),
        (["optimize", "--xi", "2:0.5", "--depth", "100000000"], "is beyond 30"),
        (["evaluate", "--xi", "2:0.5", "--gamma", many, "--beta", many], "depth p = 5000 is beyond 30"),
        (["transfer", "w200.txt", "--depth", "1", "--output", "a.csv"], "about 1e+400"),
        (["transfer", "small.txt", "--depth", "31", "--output", "a.csv"], "depth p = 31 is beyond 30"),
        (["transfer", "small.txt", "--depth", "5000"], "depth p = 5000 is beyond 30"),
        # periodic angles so large that their own rounding (1e300 x 2.2e-16 rad) leaves V undefined
        (["evaluate", "--xorsat", "3", "--degree", "4", "--gamma", "1e300", "--beta", "0.3"], "reduce it modulo 2 pi"),
        (["evaluate", "--xi", "2:0.5", "--gamma", "0.3", "--beta", "1e300"], "reduce it modulo pi"),
    ]
    for args, fragment in cases:
        refused(tmp_path, args, fragment)


def test_one_line_in_a_real_process(tmp_path):
    # the same refusals as a user sees them: one stderr line, exit 2, no stdout, nothing written
    (tmp_path / "w200.txt").write_text("1e200 0 1\n-1e200 1 2\n")
    for args, fragment in ((["optimize", "--xi", "2:0.5", "--depth", "5000"], "is beyond 30"),
                           (["transfer", "w200.txt", "--depth", "1", "--output", "a.csv"], "cannot be used"),
                           (["evaluate", "--xi", "2:1_000", "--gamma", "0.1", "--beta", "0.2"], "not a number")):
        r = run(*args, cwd=tmp_path)
        assert r.returncode == 2 and r.stdout == "", (r.returncode, r.stdout, r.stderr)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("leadline: error:") and fragment in lines[0], r.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["w200.txt"]


# ------------------------------------------------------------------ 3: guards and messages
def test_messages_point_the_right_way(tmp_path):
    (tmp_path / "p2.json").write_text(json.dumps({"format": "leadline.angles", "version": 1, "xi": "2:0.5", "p": 2,
                                                  "gamma": [0.38, 0.66], "beta": [0.49, 0.27]}))
    line = refused(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--gtol", "0"], "tolerance <= 0 never")
    assert "larger tolerance" not in line
    refused(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--memory-mb", "1e-9"], "at least 0.002")
    refused(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", "1", "--beta", "1", "--memory-mb", "0.001"], "at least 0.002")
    line = refused(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--angles", "p2.json"], "depth 3 (warm start")
    assert "depth 0" not in line


def test_a_utf8_bom_is_accepted(tmp_path):
    (tmp_path / "bom.txt").write_bytes("\ufeff1 0 1\n1 1 2\n".encode("utf-8"))
    out = ok_json("transfer", "bom.txt", "--quiet", cwd=tmp_path)
    assert out["n"] == 3 and out["xi"] == "2:0.6666666666666666"  # (1 + 1) / 3
    data = {"format": "leadline.angles", "version": 1, "xi": "2:0.5", "p": 1, "gamma": [0.5], "beta": [math.pi / 8]}
    (tmp_path / "a.json").write_bytes(("\ufeff" + json.dumps(data)).encode("utf-8"))
    assert ok_json("evaluate", "--angles", "a.json", cwd=tmp_path)["value"] == pytest.approx(SK_V1, abs=1e-12)


# ------------------------------------------------------------------ 4: display
def test_tiny_and_huge_values_are_shown_in_scientific_notation():
    code, out, err = cli("evaluate", "--xi", "2:0.5", "--gamma", "3.5e-101", "--beta", "0.3")
    assert code == 0, err
    value_line = next(line for line in out.splitlines() if line.startswith("V_p "))
    # V_1 = gamma sin(4 beta) exp(-2 gamma^2) for SK (Claes, van Dam 2021) = 3.262e-101
    assert "3.262136800885e-101" in value_line
    code, out, err = cli("optimize", "--xi", "2:1e150", "--depth", "1")
    assert code == 0, err
    assert max(len(line) for line in out.splitlines()) < 120  # no number spelled out to 75 digits
    assert "gamma          = 3.535534e-76" in out and "V_p*           = 4.2888194248e+74" in out


def test_fmt_shows_every_value():
    # format semantics of Python's str.format (the reference for what "%.6f" and "%.6e" print)
    assert fmt(0.303265329856, 6) == "0.303265"
    assert fmt(0.0, 6) == "0.000000"
    assert fmt(3.5e-101, 6) == "3.500000e-101"
    assert fmt(-1e301, 10) == "-1.0000000000e+301"
    assert fmt(123456.5, 2) == "123456.50"
    assert fmt(float("nan")) == "nan"
    for x in (3.5e-101, 9.3e-301, 1e75, -2.5e-7, 0.5, 12345.678):
        assert float(fmt(x, 6)) == pytest.approx(x, rel=1e-6)


# ------------------------------------------------------------------ 5: strict number parsing
def test_strict_number_parsing(tmp_path):
    (tmp_path / "s.json").write_text(json.dumps({"format": "leadline.instance", "version": 1,
                                                 "terms": [{"weight": "1.5", "spins": [0, 1]}]}))
    (tmp_path / "arab.txt").write_text("1 0 \u0661\n", encoding="utf-8")
    (tmp_path / "under.txt").write_text("1_0 0 1\n")
    cases = [
        (["evaluate", "--xi", "2:1_000", "--gamma", "0.1", "--beta", "0.2"], "weight w in '2:1_000' is not a number"),
        (["evaluate", "--xi", "\u0662:0.5", "--gamma", "0.1", "--beta", "0.2"], "is not a number (ASCII digits)"),
        (["evaluate", "--xi", "2:0.5", "--gamma", "\u0661", "--beta", "0.2"], "is not a number"),
        (["evaluate", "--xi", "2:0.5", "--gamma", "1_0", "--beta", "0.2"], "is not a number"),
        (["optimize", "--xi", "2:0.5", "--depth", "1_0"], "is not a whole number"),
        (["optimize", "--xi", "2:0.5", "--depth", "\u0661"], "is not a whole number"),
        (["evaluate", "--xi", "2:0.5", "--gamma", "1", "--beta", "1", "--memory-mb", "1_000"], "is not a number"),
        (["evaluate", "--xorsat", "3", "--degree", "1_000", "--gamma", "0.1", "--beta", "0.2"], "--degree"),
        (["transfer", "s.json"], "JSON numbers, not strings"),
        (["transfer", "arab.txt"], "is not a whole number"),
        (["transfer", "under.txt"], "is not a number"),
    ]
    for args, fragment in cases:
        refused(tmp_path, args, fragment)
    assert parse_float(" 1.5e-3") == 1.5e-3 and parse_int("+12") == 12
    for bad in ("1_000", "\u0661", "0x10", "", "1.5.2", "\u00a01"):
        with pytest.raises(ValueError):
            parse_float(bad)
