"""The command-line contract of `evaluate` and `optimize`, through real subprocesses."""

from __future__ import annotations

import json
import math
import subprocess
import sys

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


@pytest.mark.parametrize("form", ["separate", "equals"])
def test_negative_angles_both_forms(form):
    if form == "separate":
        args = ["--gamma", "-0.3,0.5", "--beta", "-0.2,0.1"]
    else:
        args = ["--gamma=-0.3,0.5", "--beta=-0.2,0.1"]
    r = run("evaluate", "--xi", "3:1", *args, "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["gamma"] == [-0.3, 0.5] and out["beta"] == [-0.2, 0.1]


def test_evaluate_gradient_json():
    r = run("evaluate", "--xi", "2:0.5,3:0.5", "--gamma", "0.3,0.4", "--beta", "0.5,0.2", "--gradient", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert len(out["gradient"]["gamma"]) == 2 and len(out["gradient"]["beta"]) == 2


def test_evaluate_human_report():
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3927")
    assert r.returncode == 0
    assert "V_p" in r.stdout and "0.3032" in r.stdout


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
    assert saved["format"] == "leadline.angles" and saved["version"] == 1 and saved["p"] == 2
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
