"""Studies from Python (`leadline.sweep`, `resume`, `status`) and old keywords refused by name.

The study functions run the code of `leadline sweep/resume/status`, so their records are
checked against the command line's (bit for bit: the same computation in process), and the
values against published ones: SK V_1*, V_2* of Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759
(2022), Table 1; MaxCut on 3-regular graphs of large girth at p = 1,
1/2 + (1/2) D^(-1/2) ((D-1)/D)^((D-1)/2) (Wang, Hadfield, Jiang, Rieffel, PRA 97, 022304 (2018)).
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

import leadline
from leadline.jobs.renames import RENAMED_KEYWORDS, RENAMED_OPTIONS
from leadline.storage import faults

CLI = [sys.executable, "-m", "leadline"]

SPEC = {
    "study": {"name": "py", "store": "py.zarr"},
    "depths": {"pmax": 2},
    "optimizer": {"restarts": 0},
    "compute": {"executor": "inprocess"},
    "ensemble": [
        {"label": "sk", "xi": "2:0.5"},
        {"label": "cut3", "kind": "sparse", "q": 2, "degree": 3},
    ],
}

#: the same spec as a file, as a user would write it
SPEC_TOML = """
[study]
name = "py"
store = "py.zarr"

[depths]
pmax = 2

[optimizer]
restarts = 0

[compute]
executor = "inprocess"

[[ensemble]]
label = "sk"
xi = "2:0.5"

[[ensemble]]
label = "cut3"
kind = "sparse"
q = 2
degree = 3
"""

#: measured times: everything else of a record is a result
TIMES = {"wall_time_s", "history", "timings", "session_wall_s"}


def _results(finished: list[dict]) -> list[tuple]:
    return [(r["label"], r["p"], {k: v for k, v in r["result"].items() if k not in TIMES}) for r in finished]


def _no_times(rows: list[dict]) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "wall_time_s"} for r in rows]


@pytest.fixture(scope="module")
def from_python(tmp_path_factory):
    """A study swept by `leadline.sweep` from a dict (relative store: the working folder)."""
    folder = tmp_path_factory.mktemp("python")
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(folder)
        run = leadline.sweep(SPEC)
    return folder, run


def test_sweep_from_a_dict_is_the_command_s_study(from_python, tmp_path):
    folder, run = from_python
    assert run.store == folder / "py.zarr" and run.complete
    values = {(r["ensemble"], r["p"]): r["value"] for r in run.rows}
    assert [round(values["sk", p], 4) for p in (1, 2)] == [0.3033, 0.4075]  # Table 1, Farhi et al. (2022)
    D = 3
    cut_p1 = 0.5 + 0.5 / math.sqrt(D) * ((D - 1) / D) ** ((D - 1) / 2)  # Wang et al. (2018)
    assert abs(values["cut3", 1] - cut_p1) < 1e-7
    # the command line on the same spec written as a file: the same records, the same rows
    (tmp_path / "py.toml").write_text(SPEC_TOML)
    proc = subprocess.run(CLI + ["sweep", "py.toml", "--json"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    cli = json.loads(proc.stdout)
    assert sorted(cli) == sorted(run.to_json())
    assert _results(cli["finished_now"]) == _results(run.to_json()["finished_now"])
    cli_rows = leadline.resume(tmp_path / "py.zarr").rows
    assert _no_times(cli_rows) == _no_times(run.rows)
    # the spec recorded in the store: the dict's TOML, normalized as the file's
    a, b = leadline.open_study(run.store), leadline.open_study(tmp_path / "py.zarr")
    assert {**a.spec, "store": None} == {**b.spec, "store": None}


def test_resume_and_status_are_the_commands(from_python, monkeypatch):
    folder, run = from_python
    monkeypatch.delenv("LEADLINE_KERNEL", raising=False)
    again = leadline.resume(run.store)
    assert again.finished_now == [] and again.rows == run.rows
    assert "LEADLINE_KERNEL" not in os.environ  # the study's kernel was pinned for the resume only
    proc = subprocess.run(CLI + ["status", str(run.store), "--json"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert leadline.status(run.store) == json.loads(proc.stdout)


def test_ctrl_c_says_what_is_kept_and_resume_gives_the_uninterrupted_numbers(from_python, tmp_path):
    """A real SIGINT to a Python process held inside `leadline.sweep` (an event, not a delay):
    KeyboardInterrupt with what was kept; `leadline.resume` then ends with the numbers of the
    uninterrupted sweep, bit for bit."""
    _, reference = from_python
    spec = dict(SPEC, compute={"executor": "inprocess"}, checkpoint={"interval-s": 30})
    hold = tmp_path / "held"
    script = textwrap.dedent(f"""
        import leadline
        leadline.sweep({spec!r})
    """)
    env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
    # p = 1 of SK runs 22 passes (11 evaluations, a forward and an adjoint pass each): the 30th is in p = 2
    env.update(LEADLINE_HOLD_AT="pass-computed:30", LEADLINE_HOLD_FILE=str(hold))
    proc = subprocess.Popen([sys.executable, "-c", script], cwd=tmp_path, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not hold.exists():
        assert proc.poll() is None, proc.communicate()[1]
        assert time.monotonic() < deadline, "the sweep never reached its hold point"
        time.sleep(0.02)
    proc.send_signal(signal.SIGINT)
    hold.unlink()
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == -signal.SIGINT, err
    store = tmp_path / "py.zarr"
    last = err.strip().splitlines()
    message = "\n".join(last[last.index(next(x for x in last if x.startswith("KeyboardInterrupt:"))):])
    assert message.startswith(f"KeyboardInterrupt: interrupted; saved in {store}:"), err
    assert "sk: p = 1 done; p = 2 stopped with" in message and f"continue with: leadline resume {store}" in message
    assert leadline.status(store)["lock"] is None  # the lock was released
    resumed = leadline.resume(store)
    assert resumed.complete
    assert _no_times(resumed.rows) == _no_times(reference.rows)


def test_bad_input_is_refused_before_anything_is_written(from_python, tmp_path, monkeypatch):
    folder, run = from_python
    monkeypatch.chdir(tmp_path)
    with pytest.raises(leadline.InputError, match="already exists; continue it with `leadline resume"):
        leadline.sweep(dict(SPEC, study={"name": "py", "store": str(run.store)}))
    cases = [
        (dict(SPEC, optimizer={"gtol": 1e-6}), r"\[optimizer\] gtol is now called gradient-tol"),
        (dict(SPEC, depths={"pmax": None}), "cannot be written as TOML"),
        (dict(SPEC, depths={"pmax": 0}), r"\[depths\] pmax must be >= 1"),
    ]
    for spec, message in cases:
        with pytest.raises(leadline.InputError, match=message):
            leadline.sweep(spec)
    with pytest.raises(leadline.InputError, match="executor 'scheduler' needs a scheduler address"):
        leadline.sweep(SPEC, executor="scheduler")
    with pytest.raises(leadline.InputError, match="workers must be an integer >= 1"):
        leadline.resume(run.store, workers=0)
    with pytest.raises(leadline.InputError, match="spec file nothing.toml does not exist"):
        leadline.sweep("nothing.toml")
    with pytest.raises(leadline.InputError, match="no study store"):
        leadline.resume(tmp_path / "missing.zarr")
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_a_refused_write_says_what_is_kept_and_how_to_go_on(tmp_path, monkeypatch):
    """The operating system refusing a write (ENOSPC injected at the first finished depth): an
    OSError with the command's message; resume then completes the study."""
    monkeypatch.chdir(tmp_path)
    faults.rearm(LEADLINE_CRASH_AT="depth-done:1:ENOSPC")
    try:
        with pytest.raises(OSError, match=r"writing store py.zarr failed: .*make room, then `leadline resume py.zarr`"):
            leadline.sweep(SPEC)
    finally:
        faults.rearm(LEADLINE_CRASH_AT=None)
    assert leadline.resume("py.zarr").complete


def test_old_keywords_are_refused_with_the_new_name():
    calls = [
        (leadline.optimize, ("2:0.5", 1), "gtol", "gradient_tol"),
        (leadline.optimize, ("2:0.5", 1), "maxiter", "max_iterations"),
        (leadline.optimize_sparse, (2, 3, 1), "maxiter", "max_iterations"),
        (leadline.evaluate, ("2:0.5", [0.5], [0.3]), "memory_mb", "memory_mib"),
        (leadline.evaluate, ("2:0.5", [0.5], [0.3]), "cluster_config", "batch_file"),
        (leadline.sweep, (SPEC,), "cluster_config", "batch_file"),
        (leadline.evaluate_sparse, (), "xorsat", "q"),
        (leadline.evaluate_bath, ("2:0.5", [0.5], [0.3]), "bond_cap", "bond"),
        (leadline.evaluate_bath, ("2:0.5", [0.5], [0.3]), "fock_cap", "fock"),
    ]
    for func, args, old, new in calls:
        with pytest.raises(TypeError) as info:
            func(*args, **{old: 1})
        assert str(info.value) == f"{func.__name__}(): keyword {old}= is now called {new}= (same meaning); use {new}="
    # a keyword the function never had keeps Python's own message (evaluate has no gradient tolerance)
    with pytest.raises(TypeError, match="unexpected keyword argument 'gtol'"):
        leadline.evaluate("2:0.5", [0.5], [0.3], gtol=1e-6)
    # every renamed command-line option is known under its Python spelling too
    for old in RENAMED_OPTIONS:
        assert old.lstrip("-").replace("-", "_") in RENAMED_KEYWORDS, old


def test_where_passes_run_is_overridden_for_one_run_on_the_command_line_and_in_python(tmp_path, monkeypatch):
    """A spec that names a scheduler nobody runs: `--executor inprocess` (and `executor="inprocess"`)
    runs the study here without trying it, and the stored spec keeps its [compute] for later runs."""
    monkeypatch.chdir(tmp_path)
    unreachable = {"executor": "scheduler", "scheduler": "tcp://127.0.0.1:9"}
    single = dict(SPEC, depths={"pmax": 1}, ensemble=SPEC["ensemble"][:1])
    run = leadline.sweep(dict(single, study={"name": "a", "store": "a.zarr"}, compute=unreachable),
                         executor="inprocess")
    (tmp_path / "b.toml").write_text(SPEC_TOML.replace('"py"', '"b"').replace("py.zarr", "b.zarr")
                                     .replace("pmax = 2", "pmax = 1").split("[[ensemble]]\nlabel = \"cut3\"")[0]
                                     .replace('executor = "inprocess"',
                                              'executor = "scheduler"\nscheduler = "tcp://127.0.0.1:9"'))
    proc = subprocess.run(CLI + ["sweep", "b.toml", "--executor", "inprocess", "--json"], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert _results(json.loads(proc.stdout)["finished_now"]) == _results(run.finished_now)
    assert leadline.open_study("b.zarr").spec["compute"]["scheduler"] == "tcp://127.0.0.1:9"
    bad = subprocess.run(CLI + ["sweep", "b.toml", "--executor", "batch"], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "store" in bad.stderr  # b.zarr exists: refused before anything else
    bad = subprocess.run(CLI + ["resume", "b.zarr", "--executor", "batch"], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and bad.stderr.strip().endswith("executor 'batch' needs a batch file"), bad.stderr


def test_resume_pmax_continues_every_ensemble_deeper(from_python, tmp_path):
    """`leadline.resume(store, pmax=3)` continues a finished p <= 2 study of a dense and a sparse
    ensemble to p = 3, as `leadline resume --pmax 3`: SK V_3* = 0.4726 (Farhi, Goldstone, Gutmann,
    Zhou, Quantum 6, 759 (2022), Table 1) and MaxCut on 3-regular graphs of large girth at p = 3,
    0.7924 (Wurtz, Love, PRA 103, 042612 (2021)); a lower pmax is refused with one line."""
    import shutil

    folder, run = from_python
    store = tmp_path / "deeper.zarr"
    shutil.copytree(run.store, store)
    with pytest.raises(leadline.InputError, match="pmax 1 is below the study's pmax 2"):
        leadline.resume(store, pmax=1)
    deeper = leadline.resume(store, pmax=3)
    assert sorted((line["label"], line["p"]) for line in deeper.finished_now) == [("cut3", 3), ("sk", 3)]
    values = {(r["ensemble"], r["p"]): r["value"] for r in deeper.rows}
    assert round(values["sk", 3], 4) == 0.4726  # Table 1, Farhi et al. (2022)
    assert round(values["cut3", 3], 4) == 0.7924  # Wurtz, Love, PRA 103, 042612 (2021)
    assert all(values[key] == r["value"] for r in run.rows for key in [(r["ensemble"], r["p"])])
    assert leadline.status(store)["depths"] == [1, 3]
