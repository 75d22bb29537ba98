"""The command-line contract of `evaluate` and `optimize`, through real subprocesses."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

LEADLINE = [sys.executable, "-m", "leadline"]


def run(*args, cwd=None):
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, timeout=120, cwd=cwd)


def test_evaluate_json_sk_p1():
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022): V_1(1/2, pi/8) = 1/sqrt(4e)
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", str(math.pi / 8), "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["value"] == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-12)
    assert out["p"] == 1
    assert out["xi"]["spec"] == "2:0.5"
    for key in ("sum_w", "conjugate_symmetry", "unit_diagonal", "imag_value"):
        assert key in out["residuals"]


def claes_van_dam_p1(mix_terms, g, b):
    """V_1 = -2 g Im xi(cos 2b - i sin 2b exp(-2 g^2 xi'(1))) (Claes, van Dam, Quantum 5, 542 (2021))."""
    z = math.cos(2 * b) - 1j * math.sin(2 * b) * math.exp(-2 * g * g * sum(w * q for q, w in mix_terms))
    return -2 * g * sum(w * z**q for q, w in mix_terms).imag


@pytest.mark.parametrize("form", ["separate", "equals"])
def test_negative_angles_both_forms(form):
    """Negative angles are read as numbers in both option forms, and give the right value:
    p = 1 against the closed form, p = 2 against the brute-force path sum of tests/dense_reference.py."""
    from .dense_reference import dense_value
    from leadline.kernels.mixture import parse_mixture

    cases = [(["-0.3"], ["-0.2"]), (["-0.3", "0.5"], ["-0.2", "0.1"])]
    for gamma, beta in cases:
        if form == "separate":
            args = ["--gamma", ",".join(gamma), "--beta", ",".join(beta)]
        else:
            args = [f"--gamma={','.join(gamma)}", f"--beta={','.join(beta)}"]
        r = run("evaluate", "--xi", "3:1", *args, "--json")
        assert r.returncode == 0, r.stderr
        out = json.loads(r.stdout)
        g, b = [float(x) for x in gamma], [float(x) for x in beta]
        assert out["gamma"] == g and out["beta"] == b
        if len(g) == 1:
            expected = claes_van_dam_p1([(3, 1.0)], g[0], b[0])
        else:
            expected = dense_value(parse_mixture("3:1"), np.array(g), np.array(b)).real
        assert out["value"] == pytest.approx(expected, abs=1e-12)
        # V(-g, b) = -V(g, b): losing the minus of one angle list flips the sign, which the value
        # check sees because the value is far from 0
        assert abs(expected) > 1e-3


def test_evaluate_gradient_json():
    """The reported gradient against central differences of the brute-force path sum
    (tests/dense_reference.py; step 1e-5, truncation error O(h^2) ~ 1e-10, common practice)."""
    from .dense_reference import dense_value
    from leadline.kernels.mixture import parse_mixture

    g, b = np.array([0.3, 0.4]), np.array([0.5, 0.2])
    r = run("evaluate", "--xi", "2:0.5,3:0.5", "--gamma", "0.3,0.4", "--beta", "0.5,0.2", "--gradient", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    mix, h = parse_mixture("2:0.5,3:0.5"), 1e-5
    assert out["value"] == pytest.approx(dense_value(mix, g, b).real, abs=1e-12)
    for key, x in (("gamma", g), ("beta", b)):
        for i in range(2):
            e = np.zeros(2)
            e[i] = h
            up = dense_value(mix, g + e, b).real if key == "gamma" else dense_value(mix, g, b + e).real
            dn = dense_value(mix, g - e, b).real if key == "gamma" else dense_value(mix, g, b - e).real
            assert out["gradient"][key][i] == pytest.approx((up - dn) / (2 * h), abs=1e-8), (key, i)


def test_evaluate_human_report():
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3927")
    assert r.returncode == 0
    line = next(x for x in r.stdout.splitlines() if x.startswith("V_p"))
    # V_1 = g sin(4b) exp(-2 g^2) (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), p = 1);
    # at g = 1/2, b = 0.3927 ~ pi/8 that is 1/sqrt(4e) = 0.303265 to 6 decimals (same paper)
    expected = 0.5 * math.sin(4 * 0.3927) * math.exp(-0.5)
    assert float(line.split("=")[1]) == pytest.approx(expected, abs=1e-12)
    assert round(expected, 6) == round(1 / math.sqrt(4 * math.e), 6)


BAD = [
    (["--xi", "0:1"], "q must be"),
    (["--xi", "2.5:1"], "integer"),
    (["--xi", "2:1,2:0.5"], "twice"),
    (["--xi", "2:-1"], "negative"),
    (["--xi", "2:nan"], "finite"),
    (["--xi", "2:inf"], "finite"),
    (["--xi", "2:0"], "all zero"),
    (["--xi", "2:0.5", "--gamma", "0.1,0.2", "--beta", "0.1"], "same"),
    (["--xi", "2:0.5", "--gamma", "nan", "--beta", "0.1"], "finite"),
    (["--xi", "2:0.5", "--gamma", "inf", "--beta", "0.1"], "finite"),
    (["--xi", "2:0.5", "--gamma", "abc", "--beta", "0.1"], "not a number"),
    (["--gamma", "0.1", "--beta", "0.1"], "--xi"),
]


@pytest.mark.parametrize("args,fragment", BAD)
def test_evaluate_bad_input(args, fragment):
    if fragment == "same":
        fragment = "--beta has 1"
    r = run("evaluate", *args)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert "Traceback" not in r.stderr
    assert fragment in lines[0]
    assert r.stdout == ""


def test_optimize_json_and_angle_file(tmp_path):
    out_file = tmp_path / "sk2.json"
    r = run("optimize", "--xi", "2:0.5", "--depth", "2", "--json", "--output", str(out_file))
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    # Quantum 6, 759 (2022), Table 1: V_2* = 0.4075
    assert round(out["value"], 4) == 0.4075
    for key in ("gamma", "beta", "p", "xi", "gradient_norm", "evaluations", "wall_time_s"):
        assert key in out
    saved = json.loads(out_file.read_text())
    assert saved["format"] == "leadline.angles" and saved["format_version"] == 1 and saved["p"] == 2
    # evaluate reads the file back and reproduces the value
    r2 = run("evaluate", "--angles", str(out_file), "--json")
    assert r2.returncode == 0, r2.stderr
    assert json.loads(r2.stdout)["value"] == pytest.approx(out["value"], abs=1e-12)
    # warm start from the file one depth up; Table 1: V_3* = 0.4726
    r3 = run("optimize", "--xi", "2:0.5", "--depth", "3", "--angles", str(out_file), "--json")
    assert r3.returncode == 0, r3.stderr
    assert round(json.loads(r3.stdout)["value"], 4) == 0.4726


@pytest.mark.parametrize(
    "args",
    [
        ["--xi", "2:0.5", "--depth", "0"],
        ["--xi", "2:0.5"],
        ["--xi", "2:x", "--depth", "2"],
        ["--xi", "2:0.5", "--depth", "2", "--angles", "/nonexistent/angles.json"],
        ["--xi", "2:0.5", "--depth", "2", "--output", "/nonexistent/dir/out.json"],
        ["--xi", "2:0.5", "--depth", "2", "--restarts", "-1"],
    ],
)
def test_optimize_bad_input(args, tmp_path):
    r = run("optimize", *args, cwd=tmp_path)
    assert r.returncode == 2, r.stdout
    assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr
    assert list(tmp_path.iterdir()) == []


def test_bad_angle_file(tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"format": "leadline.angles", "version": 1, "p": 2, "gamma": [0.1], "beta": [0.1, 0.2]}))
    r = run("evaluate", "--angles", str(bad), "--xi", "2:0.5")
    assert r.returncode == 2 and "gamma has 1" in r.stderr


def test_help_teaches():
    r = run("--help")
    assert r.returncode == 0 and "evaluate" in r.stdout and "optimize" in r.stdout
    r = run("evaluate", "--help")
    assert r.returncode == 0 and "Example" in r.stdout and "--xi" in r.stdout


def test_dense_optimize_on_a_local_cluster_matches_in_process():
    """`optimize` with its passes on a Dask LocalCluster (worker processes on 127.0.0.1):
    the same optimum as in process, and the published value (Quantum 6, 759 (2022), Table 1:
    V_2* = 0.4075 for SK)."""
    args = ["optimize", "--xi", "2:0.5", "--depth", "2", "--restarts", "0", "--memory-mib", "0.004", "--json"]
    here = run(*args)
    assert here.returncode == 0, here.stderr
    there = subprocess.run([*LEADLINE, *args, "--executor", "local", "--workers", "1", "--quiet"],
                           capture_output=True, text=True, timeout=300,
                           env={**os.environ, "LEADLINE_SHIP_MIN_VISITS": "0"})  # ship even these small passes
    assert there.returncode == 0, there.stderr
    a, b = json.loads(here.stdout), json.loads(there.stdout)
    assert round(b["value"], 4) == 0.4075
    assert abs(a["value"] - b["value"]) <= 1e-10
    assert max(abs(x - y) for x, y in zip(a["gamma"] + a["beta"], b["gamma"] + b["beta"])) <= 1e-8
