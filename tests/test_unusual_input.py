"""Extreme values and unusual input at the command line: one clear stderr line, exit 2, nothing written.

Every refusal runs the command line's entry point (``leadline.jobs.cli.main``, what the
``leadline`` script calls) in this process, from an empty (or snapshotted) folder, and
checks: exit code 2, exactly one stderr line starting with "leadline: error:", no
traceback, no stdout, and no file created or changed.  In-process because a fresh
interpreter per case cost most of this file's time; the commands that must run as their
own process (a fault-injected kill, a read-only mount) still use a subprocess.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

LEADLINE = [sys.executable, "-m", "leadline"]


def run(*args, cwd=None, env=None):
    full_env = dict(os.environ, **(env or {}))
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, timeout=300, cwd=cwd, env=full_env)


def run_here(*args, cwd: Path, env=None) -> subprocess.CompletedProcess:
    """``leadline ARGS`` through its entry point in this process (cwd and env as given)."""
    import contextlib
    import io

    from leadline.jobs.cli import main

    out, err = io.StringIO(), io.StringIO()
    with pytest.MonkeyPatch.context() as mp:
        for key, value in (env or {}).items():
            mp.setenv(key, value)
        mp.chdir(cwd)
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                main(list(args))
                code = 0
            except SystemExit as exc:
                code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    return subprocess.CompletedProcess(list(args), code, out.getvalue(), err.getvalue())


def snapshot(folder: Path) -> dict:
    out = {}
    for path in sorted(folder.rglob("*")):
        st = path.stat()
        out[str(path.relative_to(folder))] = (path.is_dir(), st.st_size, st.st_mtime_ns)
    return out


def assert_refused(r, fragment: str) -> str:
    assert r.returncode == 2, (r.returncode, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("leadline: error:"), lines[0]
    assert "Traceback" not in r.stderr and "Warning" not in r.stderr
    assert r.stdout == ""
    assert fragment in lines[0], lines[0]
    return lines[0]


def refused_in(folder: Path, args, fragment: str, env=None) -> str:
    before = snapshot(folder)
    r = run_here(*args, cwd=folder, env=env)
    line = assert_refused(r, fragment)
    assert snapshot(folder) == before, "a refused command changed its folder"
    return line


def angle_file(path: Path, **fields) -> Path:
    data = {"format": "leadline.angles", "version": 1, "xi": "2:0.5", "ensemble": None, "p": 1,
            "gamma": [0.5], "beta": [math.pi / 8], "value": None}
    data.update(fields)
    path.write_text(json.dumps(data))
    return path


# ------------------------------------------------------------------ 1: range of angles and weights
# p = 1: the closed form V_1 = 2 g sin(2b) xi'(cos 2b) exp(-2 xi'(1) g^2) (Claes, van Dam, Quantum 5,
# 542 (2021)) is about 1.6e-2170, 4.8e-866 and 2.2e-651436 in these three cases (tests/test_ranges.py
# checks them against mpmath): not a double, so refused with the representable range
@pytest.mark.parametrize(
    "args,decade",
    [
        (["evaluate", "--xi", "2:0.5", "--gamma", "50", "--beta", "0.3"], "e-2170"),
        (["evaluate", "--xi", "2:2000", "--gamma", "0.5", "--beta", "0.3"], "e-866"),
        (["evaluate", "--xi", "3:1e6", "--gamma", "0.5", "--beta", "0.3"], "e-651436"),
        (["finite-size", "--xi", "2:0.5", "--gamma", "50", "--beta", "0.3", "--n", "4", "--instances", "2"], "e-2170"),
    ],
)
def test_unrepresentable_value_is_refused_with_the_range(tmp_path, args, decade):
    line = refused_in(tmp_path, args, "out of the double-precision range")
    assert "representable for |gamma| <=" in line  # the line states the representable range
    assert decade in line


@pytest.mark.parametrize(
    "args",
    [
        ["evaluate", "--xi", "2:0.5", "--gamma", "40000,0.1", "--beta", "0.3,0.2"],
        ["evaluate", "--xi", "3:1e10", "--gamma", "0.00001,0.3", "--beta", "0.3,0.2", "--gradient"],
    ],
)
def test_exponents_beyond_double_resolution_are_refused(tmp_path, args):
    line = refused_in(tmp_path, args, "out of the double-precision range")
    assert "sum_t |gamma_t| <=" in line


def test_value_that_underflows_at_p2_is_refused_after_the_evaluation(tmp_path):
    # SK, gamma = (50, 50), beta = (0.3, 0.2): the 60-digit value is about 1.5e-759
    # (tests/precise_reference.py, docs/limits.md), below the smallest double; p >= 2 has no
    # closed form to refuse it in advance, so the command refuses the 0 it computed
    from leadline.tests.precise_reference import precise_run

    exact = precise_run({2: "0.5"}, ["50", "50"], ["0.3", "0.2"], dps=60)["value"]
    assert 0 < exact < 2.2e-308  # not a double: refusing is right
    line = refused_in(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", "50,50", "--beta", "0.3,0.2"], "V_p underflows")
    assert "2.2e-308" in line
    # an exact 0 near the origin is a true value and is printed
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "0,0", "--beta", "0.3,0.2", cwd=tmp_path)
    assert r.returncode == 0 and "V_p        = 0.000000000000" in r.stdout


def test_out_of_range_warm_start_is_refused(tmp_path):
    angle_file(tmp_path / "far.json", gamma=[40000.0])
    refused_in(tmp_path, ["optimize", "--depth", "2", "--angles", "far.json"], "out of the double-precision range")


def test_in_range_extreme_value_is_computed():
    # SK at p = 1: V_1 = g sin(4b) exp(-2 g^2) (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022));
    # g = 18.5: 2 g^2 = 684, beyond the old limit of 350, and V_1 ~ 9e-297 is still a normal double
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "18.5", "--beta", "0.3", "--json")
    assert r.returncode == 0, r.stderr
    value = json.loads(r.stdout)["value"]
    assert value == pytest.approx(18.5 * math.sin(1.2) * math.exp(-2 * 18.5**2), rel=1e-9)


@pytest.mark.parametrize(
    "args,expected",
    [
        # 60-digit mpmath values of the dense path sum (tests/precise_reference.py; tests/test_ranges.py)
        (["evaluate", "--xi", "2:0.5", "--gamma", "0.1,50", "--beta", "0.3,0.2"], 0.077504160624),
        (["evaluate", "--xi", "2:0.5", "--gamma=50,-49.5", "--beta", "0.01,0.3", "--gradient"], 0.038244185719),
        (["evaluate", "--xi", "3:1e6", "--gamma", "0.001,0.5", "--beta", "0.3,0.2"], 4.4697561518),
        (["finite-size", "--xi", "2:0.5", "--gamma", "0.1,50", "--beta", "0.3,0.2", "--n", "4", "--instances", "2"], 0.077504160624),
    ],
)
def test_large_angles_with_a_representable_value_print_it(tmp_path, args, expected):
    r = run(*args, "--json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""  # no overflow warnings
    out = json.loads(r.stdout)
    value = out["value"] if "value" in out else out["infinite_size_value"]
    # stated accuracy (docs/limits.md): 4 x 2.2e-16 x E relative, E = 2e4 .. 1.5e6 here
    assert value == pytest.approx(expected, rel=1e-8)
    assert list(tmp_path.iterdir()) == []


def test_large_angles_report_shows_tiny_values():
    # SK p = 2 at gamma = (20, 20): V ~ 9.35e-123 (mpmath, tests/test_ranges.py); the report
    # prints significant digits instead of twelve zeros
    r = run("evaluate", "--xi", "2:0.5", "--gamma", "20,20", "--beta", "0.3,0.2")
    assert r.returncode == 0, r.stderr
    assert "V_p        = 9.35185363" in r.stdout and "e-123" in r.stdout


# ------------------------------------------------------------------ 2: very large sparse degrees
@pytest.mark.parametrize(
    "args",
    [
        ["evaluate", "--sparse-q", "9", "--degree", "1e12", "--gamma", "0.1,0.2", "--beta", "0.1,0.2"],
        ["optimize", "--sparse-q", "2", "--degree", "1e10", "--depth", "2"],
    ],
)
def test_degree_beyond_double_precision_is_refused(tmp_path, args):
    line = refused_in(tmp_path, args, "beyond 1e+09")
    assert "2.2e-16" in line


@pytest.mark.slow
def test_degree_1e8_optimizes(tmp_path):
    # the README promises stability to D = 1e8.  MaxCut on D-regular graphs of large girth:
    # nu_p* = 1/2 + V_p*(SK) / sqrt(D) + o(1/sqrt(D)) (Basso, Farhi, Marwaha, Villalonga, Zhou,
    # TQC 2022, arXiv:2110.14206), with V_2*(SK) = 0.4075 (Farhi, Goldstone, Gutmann, Zhou,
    # Quantum 6, 759 (2022), Table 1)
    r = run("optimize", "--sparse-q", "2", "--degree", "1e8", "--depth", "2", "--json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    nu = json.loads(r.stdout)["value"]
    assert math.sqrt(1e8) * (nu - 0.5) == pytest.approx(0.4075, abs=1e-4)


def test_sweep_spec_with_huge_degree_is_refused(tmp_path):
    (tmp_path / "s.toml").write_text(
        '[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmax = 2\n'
        '[[ensemble]]\nlabel = "x"\nkind = "sparse"\nq = 2\ndegree = 1e12\n'
    )
    refused_in(tmp_path, ["sweep", "s.toml"], "beyond 1e+09")


# ------------------------------------------------------------------ 4: angle files, strictly
@pytest.mark.parametrize(
    "fields,fragment",
    [
        ({"p": 0, "gamma": [], "beta": []}, '"p" must be an integer >= 1'),
        ({"gamma": ["0.5"]}, '"gamma" must hold numbers'),
        ({"gamma": 0.5}, '"gamma" must be a list'),
        ({"p": 1.5}, '"p" must be an integer'),
        ({"p": True}, '"p" must be an integer'),
        ({"gamma": [True]}, '"gamma" must hold numbers'),
        ({"xi": "2:abc"}, 'angle file a.json: "xi"'),
        ({"xi": 2}, '"xi" must be a mixture'),
        ({"ensemble": {"kind": "sparse", "q": 1, "degree": 3}, "xi": None}, 'ensemble "q"'),
    ],
)
def test_angle_file_layout_is_validated(tmp_path, fields, fragment):
    angle_file(tmp_path / "a.json", **fields)
    refused_in(tmp_path, ["evaluate", "--angles", "a.json"], fragment)


def test_angle_file_not_utf8(tmp_path):
    (tmp_path / "a.json").write_bytes(b'{"format": "\xff\xfe"}')
    refused_in(tmp_path, ["evaluate", "--angles", "a.json"], "not UTF-8")


def test_angle_file_names(tmp_path):
    refused_in(tmp_path, ["evaluate", "--angles", ""], "--angles needs a file name")
    refused_in(tmp_path, ["evaluate", "--angles", "."], "is a folder")


# ------------------------------------------------------------------ 5: options checked before any work
def test_optimize_bad_seed_output_memory(tmp_path):
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--seed", "-1"], "--seed must be >= 0")
    (tmp_path / "sub").mkdir()
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--output", "sub"], "is a folder")
    refused_in(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3", "--memory-mib", "inf"],
               "--memory-mib must be a positive finite")
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--memory-mib", "inf"],
               "--memory-mib must be a positive finite")
    refused_in(tmp_path, ["optimize", "--sparse-q", "2", "--degree", "3", "--depth", "1", "--seed", "-2"], "--seed")


# ------------------------------------------------------------------ 6: depth and cost limits
def test_depth_beyond_the_limit_is_refused_with_its_cost(tmp_path):
    angles = ",".join(["0.1"] * 31)
    line = refused_in(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", angles, "--beta", angles], "beyond 30")
    assert "path visits" in line
    angles = ",".join(["0.01"] * 40)
    refused_in(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", angles, "--beta", angles], "beyond 30")
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "40"], "beyond 30")
    refused_in(tmp_path, ["optimize", "--sparse-q", "3", "--degree", "4", "--depth", "31"], "beyond 30")


def test_depth_this_machine_cannot_finish_is_refused(tmp_path):
    angles = ",".join(["0.05"] * 27)
    line = refused_in(tmp_path, ["evaluate", "--xi", "2:0.5", "--gamma", angles, "--beta", angles,
                                 "--executor", "inprocess"], "path visits")
    assert "MiB per chunk task" in line and "--scheduler" in line


# ------------------------------------------------------------------ 8: the ensemble of an angle file
@pytest.mark.slow
def test_evaluate_and_optimize_take_the_ensemble_from_the_file(tmp_path):
    sparse = angle_file(tmp_path / "x.json", xi=None, ensemble={"kind": "sparse", "q": 3, "degree": 4},
                        gamma=[0.3], beta=[0.4])
    r = run("evaluate", "--angles", str(sparse), "--json")
    assert r.returncode == 0, r.stderr
    direct = run("evaluate", "--sparse-q", "3", "--degree", "4", "--gamma", "0.3", "--beta", "0.4", "--json")
    assert json.loads(r.stdout)["value"] == json.loads(direct.stdout)["value"]
    dense = angle_file(tmp_path / "sk1.json", gamma=[0.5], beta=[math.pi / 8])
    r = run("optimize", "--depth", "2", "--angles", str(dense), "--json")
    assert r.returncode == 0, r.stderr
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), Table 1: V_2* = 0.4075 (SK)
    assert round(json.loads(r.stdout)["value"], 4) == 0.4075


def test_angle_file_without_mixture_needs_xi(tmp_path):
    angle_file(tmp_path / "a.json", xi=None)
    refused_in(tmp_path, ["evaluate", "--angles", "a.json"], "names no mixture")


# ------------------------------------------------------------------ 10: optimizer tolerance
@pytest.mark.parametrize("gtol", ["inf", "0.5"])
def test_gtol_that_cannot_reach_a_stationary_point_is_refused(tmp_path, gtol):
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--gradient-tol", gtol], "--gradient-tol must be")


def test_non_convergence_is_reported():
    r = run("optimize", "--xi", "2:0.5", "--depth", "2", "--max-iterations", "1", "--restarts", "0", "--json")
    assert r.returncode == 0
    assert json.loads(r.stdout)["converged"] is False
    assert "did not converge" in r.stderr


# ------------------------------------------------------------------ 12: messages
def test_output_path_messages(tmp_path):
    (tmp_path / "afile").write_text("x")
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--output", "afile/out.json"],
               "'afile' is a file, not a folder")
    refused_in(tmp_path, ["optimize", "--xi", "2:0.5", "--depth", "1", "--output", ""], "needs a file name")
    refused_in(tmp_path, ["plot", "any.zarr", "--output", ".png"], "has no file name before .png")
    refused_in(tmp_path, ["table", "any.zarr", "--output", "afile/t.md"], "'afile' is a file, not a folder")


def test_spec_ensemble_place_is_spelled_right(tmp_path):
    (tmp_path / "s.toml").write_text('[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmax = 1\n[[ensemble]]\nxi = "2:0.5"\n')
    line = refused_in(tmp_path, ["sweep", "s.toml"], "[[ensemble]] #1 label is required")
    assert "[[ensemble] " not in line


def test_json_echoes_values_as_written():
    r = run("evaluate", "--xi", "3:1", "--gamma", "0.1", "--beta", "0.2", "--json")
    assert json.loads(r.stdout)["xi"]["spec"] == "3:1"
    r = run("evaluate", "--sparse-q", "3", "--degree", "3", "--gamma", "0.1", "--beta", "0.2", "--json")
    out = json.loads(r.stdout)
    assert out["degree"] == 3 and isinstance(out["degree"], int) and out["ensemble"]["degree"] == 3


# ------------------------------------------------------------------ stores: 3, 7, 9, 11
@pytest.fixture(scope="module")
def stores(tmp_path_factory):
    """A finished sparse study (p = 1) and a dense study killed before its first depth finished."""
    base = tmp_path_factory.mktemp("stores")
    (base / "sparse.toml").write_text(
        '[study]\nname = "x"\nstore = "sparse.zarr"\n[depths]\npmax = 1\n'
        '[[ensemble]]\nlabel = "x3"\nkind = "sparse"\nq = 3\ndegree = 4\n'
    )
    r = run("sweep", "sparse.toml", "--quiet", cwd=base)
    assert r.returncode == 0, r.stderr
    (base / "empty.toml").write_text(
        '[study]\nname = "e"\nstore = "empty.zarr"\n[depths]\npmax = 1\n[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\n'
    )
    # storage/faults.py: SIGKILL after the first computed pass, so the depth stays unfinished
    # (with the default checkpoint interval a depth this small writes no pass batch at all)
    r = run("sweep", "empty.toml", "--quiet", cwd=base, env={"LEADLINE_CRASH_AT": "pass-computed:1"})
    assert r.returncode != 0 and (base / "empty.zarr").is_dir()
    return base


def test_plot_without_a_finished_depth(stores, tmp_path):
    refused_in(tmp_path, ["plot", str(stores / "empty.zarr"), "--output", "v.png"], "nothing to plot yet")


def test_ground_state_refused_for_sparse(stores, tmp_path):
    store = str(stores / "sparse.zarr")
    for fmt in ("markdown", "csv"):
        refused_in(tmp_path, ["table", store, "--format", fmt, "--ground-state", "x3=0.9"], "is sparse")
    refused_in(tmp_path, ["table", store, "--ground-state", "0.9"], "is sparse")
    refused_in(tmp_path, ["plot", store, "--output", "v.png", "--ground-state", "0.9"], "is sparse")


def test_spec_refuses_energy_reference_for_sparse(tmp_path):
    (tmp_path / "s.toml").write_text(
        '[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmax = 1\n'
        '[[ensemble]]\nlabel = "x"\nkind = "sparse"\nq = 2\ndegree = 3\n'
        '[ensemble.reference]\nground-state = 0.9\nsource = "from memory"\n'
    )
    refused_in(tmp_path, ["sweep", "s.toml"], "satisfied fraction")


@pytest.mark.parametrize("what", ["folder", "file"])
def test_resume_on_something_that_is_not_a_store(tmp_path, what):
    target = tmp_path / "work"
    if what == "folder":
        target.mkdir()
        (target / "notes.txt").write_text("mine")
    else:
        target.write_text("mine")
    line = refused_in(tmp_path, ["resume", "work"], "not a study store")
    assert "delete" not in line.lower()
    assert ("is a file" in line) == (what == "file")


def _read_only_copy(stores: Path, tmp_path: Path):
    """Run commands on a read-only copy of the sparse store: a read-only bind mount in a private
    mount namespace (util-linux unshare) where that works, else a copy without write permission."""
    src = tmp_path / "src"
    for name in ("sparse.zarr", "empty.zarr"):
        shutil.copytree(stores / name, src / name)
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    if os.geteuid() != 0:
        for path in [*src.rglob("*")]:
            path.chmod(path.stat().st_mode & 0o555)

        def command(*args):
            return run(*args, cwd=src)

        return command
    if shutil.which("unshare") is None:
        pytest.fail("need util-linux unshare (running as root, where permissions do not make a folder read-only)")

    def command(*args):
        script = (
            f"mount --bind {src} {mnt} && mount -o remount,ro,bind {mnt} && cd {mnt} && "
            + " ".join(f"'{a}'" for a in [*LEADLINE, *args])
        )
        return subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=300)

    return command


@pytest.mark.slow
def test_read_only_store(stores, tmp_path):
    command = _read_only_copy(stores, tmp_path)
    for args in (["resume", "sparse.zarr"], ["reference", "--store", "empty.zarr"]):
        r = command(*args)
        assert_refused(r, "is read-only")
        assert "leadline status, table" in r.stderr
    r = command("status", "sparse.zarr")
    assert r.returncode == 0 and "x3" in r.stdout, r.stderr
    r = command("table", "sparse.zarr", "--format", "csv")
    assert r.returncode == 0 and "x3,depth" in r.stdout, r.stderr


def test_sweep_integrity_failure_is_one_line(tmp_path, monkeypatch, capsys):
    # in-process: make the sweep's pass fail its integrity check and read what the user sees
    from leadline.jobs import cli, sweep
    from leadline.kernels.sparse import SparseIntegrityError

    def failing(*args, **kwargs):
        raise SparseIntegrityError("step 2 at p = 2: sum_a f(a) H(a) deviates from 1 by 2.0e-09 (allowed 5.0e-10)")

    monkeypatch.setattr(sweep, "run_study", failing)  # the command imports it when it runs
    monkeypatch.chdir(tmp_path)
    (tmp_path / "s.toml").write_text(
        '[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmax = 1\n[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\n'
        "[compute]\nexecutor = \"inprocess\"\n"
    )
    with pytest.raises(SystemExit) as info:
        cli.main(["sweep", "s.toml", "--quiet"])
    assert info.value.code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "leadline resume" in err[0] and "deviates from 1" in err[0]
