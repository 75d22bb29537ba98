"""Sweeps through real processes: kill -9 and resume, concurrent writers, damaged stores, bad specs.

External references:
- Optimal V_p of the SK model (xi = x^2/2): Farhi, Goldstone, Gutmann, Zhou, "The QAOA and
  the SK model at infinite size", Quantum 6, 759 (2022), Table 1: 0.3033, 0.4075, 0.4726
  for p = 1, 2, 3.
The kill tests compare an interrupted-and-resumed sweep with an uninterrupted one of the
same spec (the numbers must agree to 1e-10; by construction they agree to the bit).
"""

from __future__ import annotations

import collections
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zarr

from leadline.storage import open_study
from leadline.storage.lock import LOCK_NAME

LEADLINE = [sys.executable, "-m", "leadline"]
# Quantum 6, 759 (2022), Table 1 (SK model), to 4 decimals
SK_TABLE_1 = {1: 0.3033, 2: 0.4075, 3: 0.4726}

SPEC = """
[study]
name = "kill-test"
store = "{store}"

[depths]
pmin = 1
pmax = 3

[optimizer]
restarts = 0
seed = 0

[compute]
{compute}
memory-mib = {memory_mib}

[checkpoint]
interval-s = {interval_s}
keep-passes = {keep}

[[ensemble]]
label = "sk"
xi = "2:0.5"
"""


def write_spec(folder: Path, store: str, memory_mib: float = 0.004, interval_s: float = 0,
               keep_passes: bool = False, compute: str = 'executor = "inprocess"') -> Path:
    """The kill-test spec; interval-s = 0 writes every pass and every chunk as soon as it is done.

    memory-mib 0.004: with the growing contour the passes of step 1 are single-chunk, step 2
    has 2 chunks and step 3 has 8."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "study.toml"
    path.write_text(SPEC.format(store=store, memory_mib=memory_mib, interval_s=interval_s,
                                keep=str(keep_passes).lower(), compute=compute))
    return path


def env_with(**extra) -> dict:
    env = dict(os.environ)
    env.pop("LEADLINE_CRASH_AT", None)
    env.update({k: str(v) for k, v in extra.items()})
    return env


# generous: a local Dask cluster on a machine starved of CPU took longer than 180 s once (passes in ~1 min idle)
def run(args, env=None, cwd=None, timeout=400):
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, env=env or env_with(), cwd=cwd,
                          timeout=timeout)


def audit_lines(path: Path) -> list[str]:
    return path.read_text().splitlines() if path.exists() else []


def all_completions(store: Path) -> list[int]:
    """Per-chunk completion counts of every cached pass of every depth (plain zarr)."""
    root = zarr.open_group(str(store), mode="r")
    out = []
    for _, ens in root["ensembles"].groups():
        for _, depth in ens.groups():
            if "passes" in depth:
                for _, arr in depth["passes"].arrays():
                    for entry in arr.attrs["entries"]:
                        out.extend(entry["completions"])
    return out


def wait_for_file(path: Path, proc: subprocess.Popen, limit_s: float = 120.0) -> dict:
    """Wait until ``proc`` writes its hold file (an event written by the code, not a delay).

    The limit only guards against a hang; returns the file's content (pid, point, count).
    """
    deadline = time.monotonic() + limit_s
    while not path.exists():
        assert proc.poll() is None, f"the process ended (rc {proc.returncode}) before reaching its hold point"
        assert time.monotonic() < deadline, f"no hold file {path.name} after {limit_s:.0f} s"
        time.sleep(0.02)
    return json.loads(path.read_text())


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted sweep; held mid-run, a second writer tries the same store and status reads it."""
    folder = tmp_path_factory.mktemp("reference")
    spec = write_spec(folder, "ref.zarr")
    store = folder / "ref.zarr"
    audit = folder / "audit.txt"
    hold = folder / "held"
    # held at its 3rd recorded chunk (inside the first p = 3 pass): surely running, lock held
    proc = subprocess.Popen([*LEADLINE, "sweep", str(spec), "--quiet"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True,
                            env=env_with(LEADLINE_CHUNK_AUDIT=audit, LEADLINE_HOLD_AT="chunk-recorded:3",
                                         LEADLINE_HOLD_FILE=hold))
    held = wait_for_file(hold, proc)
    # the second writers and readers, started together while the first one is held
    started = {
        name: subprocess.Popen([*LEADLINE, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        for name, args in (("resume", ["resume", str(store)]), ("sweep", ["sweep", str(spec)]),
                           ("status", ["status", str(store), "--json"]), ("status_human", ["status", str(store)]))
    }
    probes = {"held": held}
    for name, p in started.items():
        out, err = p.communicate(timeout=120)
        probes[name] = subprocess.CompletedProcess(p.args, p.returncode, out, err)
    probes["first_running"] = proc.poll() is None
    hold.unlink()  # let the first writer go on
    out, err = proc.communicate(timeout=180)
    return {"folder": folder, "store": store, "spec": spec, "audit": audit, "rc": proc.returncode,
            "stdout": out, "stderr": err, "probes": probes, "pid": proc.pid}


def test_second_writer_refused_first_unharmed(reference):
    probes = reference["probes"]
    assert probes["first_running"], "the reference sweep ended before the second writer could try"
    resume = probes["resume"]
    assert resume.returncode == 2
    assert f"in use by pid {reference['pid']}" in resume.stderr and len(resume.stderr.strip().splitlines()) == 1
    sweep = probes["sweep"]
    assert sweep.returncode == 2 and "already exists" in sweep.stderr and "leadline resume" in sweep.stderr
    assert probes["held"]["pid"] == reference["pid"]
    status = json.loads(probes["status"].stdout)
    assert status["lock"]["pid"] == reference["pid"] and status["lock"]["alive"]
    assert not status["complete"]
    # the first writer is unharmed: finished, lock released, published values
    assert reference["rc"] == 0, reference["stderr"]
    assert not (reference["store"] / LOCK_NAME).exists()
    depths = open_study(reference["store"]).depths("sk")
    assert [d["p"] for d in depths] == [1, 2, 3]
    for d in depths:
        assert d["value"] == pytest.approx(SK_TABLE_1[d["p"]], abs=5e-5)
    assert sorted(collections.Counter(audit_lines(reference["audit"])).values())[-1] == 1


def test_status_during_a_run_human_and_json(reference):
    """`status` of a store whose writer is held after its 3rd chunk record: inside the second
    two-chunk pass of step 2 at p = 2 (step 1 passes are single-chunk and keep no ledger)."""
    probes = reference["probes"]
    assert probes["held"]["point"] == "chunk-recorded" and probes["held"]["count"] == 3
    status = json.loads(probes["status"].stdout)
    (sk,) = status["ensembles"]
    assert [d["p"] for d in sk["done"]] == [1] and sk["todo"] == [2, 3]
    assert sk["done"][0]["value"] == pytest.approx(SK_TABLE_1[1], abs=5e-5)
    assert sk["running"]["p"] == 2
    assert sk["running"]["inflight"]["chunks_done"] == 1 and sk["running"]["inflight"]["n_chunks"] == 2
    human = probes["status_human"]
    assert human.returncode == 0, human.stderr
    lines = human.stdout.splitlines()
    assert lines[0].startswith("study 'kill-test'") and "depths 1..3" in lines[0]
    assert any(line.startswith("writer: ") and f"pid {reference['pid']}" in line and line.endswith("running")
               for line in lines), human.stdout
    done = next(line.strip() for line in lines if line.strip().startswith("done"))
    # the values shown are the stored ones, to 6 decimals (Table 1 to 4)
    shown = dict(item.split("=") for item in done.split(":", 1)[1].split())
    assert done.startswith("done     p = 1") and set(shown) == {"p1"}
    assert float(shown["p1"]) == pytest.approx(SK_TABLE_1[1], abs=5e-5)
    running = next(line.strip() for line in lines if line.strip().startswith("running"))
    assert running.startswith("running  p = 2:") and "pass in flight: 1/2 chunks done" in running


def _compare_with_reference(reference, store: Path, exact: bool = True) -> None:
    """Same depths, values and angles as the uninterrupted sweep: bit for bit in process
    (``exact``), to rounding when another executor computed some passes."""
    ref = open_study(reference["store"]).depths("sk")
    got = open_study(store).depths("sk")
    assert [d["p"] for d in got] == [d["p"] for d in ref] == [1, 2, 3]
    for a, b in zip(ref, got):
        if exact:
            assert (a["value"], a["gamma"], a["beta"]) == (b["value"], b["gamma"], b["beta"])
        assert abs(a["value"] - b["value"]) <= 1e-10
        assert np.max(np.abs(np.subtract(a["gamma"], b["gamma"]))) <= 1e-10
        assert np.max(np.abs(np.subtract(a["beta"], b["beta"]))) <= 1e-10
        assert a["evaluations"] == b["evaluations"]  # the optimizer replayed the same path


@pytest.mark.slow
def test_kill_at_random_moments_then_resume_matches_uninterrupted(reference, tmp_path):
    rng = np.random.default_rng(20261201)
    spec = write_spec(tmp_path, "killed.zarr", keep_passes=True)  # kept, so the store's own counts can be checked
    store = tmp_path / "killed.zarr"
    audit = tmp_path / "audit.txt"
    # (crash point, count, how) with counts chosen by the seeded generator. "self": the process
    # kills itself at the point (LEADLINE_CRASH_AT); "external": it holds at the point and this
    # test sends the SIGKILL (a kill from outside, at a moment the code announced, not a delay).
    # Counts are per process; with memory-mib = 0.004 and the growing contour the passes of
    # step 1 are single-chunk, step 2 has 2 chunks and step 3 has 8, so the mid-pass kills
    # land inside p = 2 or p = 3.
    kills = [
        ("pass-cached", int(rng.integers(5, 30)), "self"),            # between passes: inside the optimizer
        ("depth-arrays-written", 1, "self"),                          # while a depth's result is being written
        ("depth-done", 1, "self"),                                    # done flag written, in-flight ledger not yet removed
        ("chunk-partial-written", int(rng.integers(5, 25)), "self"),  # mid pass, between data and ledger row
        ("pass-cached", int(rng.integers(2, 6)), "external"),         # anywhere between passes, from outside
        ("chunk-recorded", int(rng.integers(5, 25)), "self"),       # mid pass, right after a ledger row
    ]
    for i, (point, when, how) in enumerate(kills):
        args = ["sweep", str(spec)] if i == 0 else ["resume", str(store)]
        env = env_with(LEADLINE_CHUNK_AUDIT=audit)
        if how == "self":
            env["LEADLINE_CRASH_AT"] = f"{point}:{when}"
            r = run([*args, "--quiet"], env=env)
            assert r.returncode == -signal.SIGKILL, (point, when, r.returncode, r.stderr)
        else:
            hold = tmp_path / "held"
            env.update(LEADLINE_HOLD_AT=f"{point}:{when}", LEADLINE_HOLD_FILE=str(hold))
            proc = subprocess.Popen([*LEADLINE, *args, "--quiet"], env=env, stdout=subprocess.DEVNULL,
                                    stderr=subprocess.DEVNULL)
            try:
                assert wait_for_file(hold, proc)["pid"] == proc.pid
                proc.send_signal(signal.SIGKILL)
                assert proc.wait(timeout=60) == -signal.SIGKILL
            finally:
                if proc.poll() is None:
                    proc.kill()
                    proc.wait()
            hold.unlink()
        status = run(["status", str(store), "--json"])
        assert status.returncode == 0, status.stderr
        progress = json.loads(status.stdout)
        if progress["lock"] is not None:
            assert not progress["lock"]["alive"]  # stale: the killed process
    final = run(["resume", str(store), "--quiet"], env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    assert final.returncode == 0, final.stderr
    assert json.loads(run(["status", str(store), "--json"]).stdout)["complete"]
    _compare_with_reference(reference, store)
    # no finished chunk was computed twice: every chunk recorded once in the audit, and the
    # same set of (pass, chunk) as the uninterrupted run; the store's own counts agree
    lines = audit_lines(audit)
    counts = collections.Counter(lines)
    assert max(counts.values()) == 1, [k for k, v in counts.items() if v > 1][:3]
    assert set(lines) == set(audit_lines(reference["audit"]))
    assert set(all_completions(store)) == {1}


def test_damaged_chunk_arrays_detected_and_repaired_on_resume(reference, tmp_path):
    spec = write_spec(tmp_path, "damaged.zarr")
    store = tmp_path / "damaged.zarr"
    audit = tmp_path / "audit.txt"
    # stop right after p = 2 is done, then inside the first step-3 pass of p = 3 after 3 of its
    # 8 chunks are recorded (the step-2 pass before it has 2 chunks; step 1 keeps no ledger)
    r = run(["sweep", str(spec), "--quiet"], env=env_with(LEADLINE_CRASH_AT="depth-done:2",
                                                           LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == -signal.SIGKILL
    r = run(["resume", str(store), "--quiet"], env=env_with(LEADLINE_CRASH_AT="chunk-recorded:5",
                                                            LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == -signal.SIGKILL
    inflight = store / "ensembles/sk/p003/inflight"
    rows = zarr.open_array(str(inflight / "ledger"), mode="r")[...]
    serial = zarr.open_group(str(inflight), mode="r").attrs["serial"]
    finished = [int(k) for k in np.flatnonzero(rows[:, 0] == serial)]
    assert len(finished) == 3
    # flip bytes inside one partial's chunk file, truncate the ledger row of another
    part_file = inflight / "partials" / f"c.{finished[0]}.0.0"
    data = bytearray(part_file.read_bytes())
    data[len(data) // 2] ^= 0x5A
    part_file.write_bytes(bytes(data))
    row_file = inflight / "ledger" / f"c.{finished[1]}.0"
    row_file.write_bytes(row_file.read_bytes()[:3])
    r = run(["resume", str(store), "--quiet"], env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == 0, r.stderr
    _compare_with_reference(reference, store)
    repairs = open_study(store).depth("sk", 3)["repairs"]
    repaired = {(e["what"], e["chunk"]) for e in repairs}
    assert ("chunk recomputed", finished[0]) in repaired
    assert ("ledger row unreadable", finished[1]) in repaired
    counts = collections.Counter(audit_lines(audit))
    twice = sorted(int(k.split()[1]) for k, v in counts.items() if v == 2)
    assert twice == sorted(finished[:2]) and max(counts.values()) == 2  # only the damaged ones


# ---------------------------------------------------------------------------- bad specs
GOOD = {
    "study": 'name = "s"\nstore = "s.zarr"',
    "depths": "pmin = 1\npmax = 2",
    "optimizer": "restarts = 1\nseed = 0",
    "compute": 'executor = "inprocess"',
}
ENSEMBLE = '[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"'


def spec_text(replace: dict | None = None, ensemble: str = ENSEMBLE, extra: str = "") -> str:
    sections = dict(GOOD, **(replace or {}))
    body = "\n".join(f"[{k}]\n{v}" for k, v in sections.items() if v is not None)
    return f"{body}\n{extra}\n{ensemble}\n"


BAD_SPECS = {
    "toml syntax": ("[study\nname = 's'", "not valid TOML"),
    "unknown top-level key": (spec_text(extra="[extras]\nx = 1"), "unknown key 'extras'"),
    "unknown key in section": (spec_text({"depths": "pmax = 2\npmaxx = 3"}), "unknown key 'pmaxx'"),
    "unknown ensemble key": (spec_text(ensemble=ENSEMBLE + "\nweight = 2"), "unknown key 'weight'"),
    "bad mixture": (spec_text(ensemble='[[ensemble]]\nlabel = "sk"\nxi = "2:-0.5"'), "xi"),
    "mixture not q:w": (spec_text(ensemble='[[ensemble]]\nlabel = "sk"\nxi = "two"'), "xi"),
    "pmax < 1": (spec_text({"depths": "pmin = 1\npmax = 0"}), "pmax must be >= 1"),
    "pmax < pmin": (spec_text({"depths": "pmin = 3\npmax = 2"}), "below pmin"),
    "pmax missing": (spec_text({"depths": "pmin = 1"}), "[depths] pmax is required"),
    "pmax not integer": (spec_text({"depths": "pmax = 2.5"}), "must be an integer"),
    "negative restarts": (spec_text({"optimizer": "restarts = -1"}), "restarts must be >= 0"),
    "zero gtol": (spec_text({"optimizer": "gradient-tol = 0"}), "gradient-tol must be positive"),
    "unknown executor": (spec_text({"compute": 'executor = "cloud"'}), "executor must be one of"),
    "zero workers": (spec_text({"compute": "workers = 0"}), "workers must be >= 1"),
    "zero memory": (spec_text({"compute": "memory-mib = 0"}), "memory-mib must be positive"),
    "missing cluster config": (spec_text({"compute": 'batch-file = "nope.toml"'}), "batch-file"),
    "scheduler with local executor": (spec_text({"compute": 'executor = "local"\nscheduler = "tcp://127.0.0.1:1"'}),
                                      "scheduler"),
    "negative checkpoint interval": (spec_text(extra="[checkpoint]\ninterval-s = -1"), "interval-s must be >= 0"),
    "keep-passes not a boolean": (spec_text(extra='[checkpoint]\nkeep-passes = "yes"'), "keep-passes must be true or false"),
    "unknown checkpoint key": (spec_text(extra="[checkpoint]\nevery = 3"), "unknown key 'every'"),
    "no ensembles": (spec_text(ensemble=""), "at least one [[ensemble]]"),
    "duplicate label": (spec_text(ensemble=ENSEMBLE + "\n" + ENSEMBLE), "used twice"),
    "bad label": (spec_text(ensemble='[[ensemble]]\nlabel = "../x"\nxi = "2:0.5"'), "label"),
    "reference without source": (spec_text(ensemble=ENSEMBLE + "\n[ensemble.reference]\nground-state = 0.76"),
                                 "source"),
    "sparse without degree": (spec_text(ensemble='[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2'), "degree"),
    "sparse degree below 2": (spec_text(ensemble='[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2\ndegree = 1'),
                              "degree D must be"),
    "sparse with xi": (spec_text(ensemble='[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2\ndegree = 3\nxi = "2:1"'),
                       "unknown key 'xi'"),
    "unknown kind": (spec_text(ensemble='[[ensemble]]\nlabel = "mc"\nkind = "tree"'), "kind must be one of"),
    "missing name": (spec_text({"study": 'store = "s.zarr"'}), "[study] name is required"),
    "store folder missing": (spec_text({"study": 'name = "s"\nstore = "no/such/folder/s.zarr"'}), "does not exist"),
    "store parent is a file": (spec_text({"study": 'name = "s"\nstore = "afile/s.zarr"'}), "does not exist"),
    "store exists": (spec_text({"study": 'name = "s"\nstore = "existing.zarr"'}), "already exists"),
}


def _tree(folder: Path) -> list[tuple[str, int]]:
    return sorted((str(p.relative_to(folder)), p.stat().st_size) for p in folder.rglob("*"))


@pytest.mark.parametrize("case", sorted(BAD_SPECS))
def test_bad_spec_exits_2_and_writes_nothing(case, tmp_path, capsys):
    from leadline.jobs.cli import main

    text, needle = BAD_SPECS[case]
    (tmp_path / "afile").write_text("x")
    (tmp_path / "existing.zarr").mkdir()
    (tmp_path / "existing.zarr" / "zarr.json").write_text("{}")
    spec = tmp_path / "study.toml"
    spec.write_text(text)
    before = _tree(tmp_path)
    with pytest.raises(SystemExit) as exc:
        main(["sweep", str(spec)])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.startswith("leadline: error:")
    assert needle in err, err
    assert _tree(tmp_path) == before


def test_bad_spec_through_a_real_process(tmp_path):
    spec = tmp_path / "study.toml"
    spec.write_text(spec_text({"depths": "pmin = 1\npmax = 0"}))
    r = run(["sweep", str(spec)])
    assert r.returncode == 2 and "pmax must be >= 1" in r.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.toml"]


def test_resume_and_status_of_a_non_store_exit_2(tmp_path):
    for command in ("resume", "status"):
        r = run([command, str(tmp_path / "missing.zarr")])
        assert r.returncode == 2 and "no study store" in r.stderr
    assert list(tmp_path.iterdir()) == []


@pytest.mark.slow
def test_sweep_killed_while_on_a_local_dask_cluster_then_resumed(reference, tmp_path):
    """The writer is SIGKILLed mid-pass while its passes run on a Dask LocalCluster; its worker
    processes go with it, and a resume on a new cluster ends with the uninterrupted numbers.
    (LEADLINE_SHIP_MIN_VISITS=0: these small passes are shipped to the workers too.)"""
    import psutil

    spec = write_spec(tmp_path, "dask.zarr", compute='executor = "local"\nworkers = 1')
    store = tmp_path / "dask.zarr"
    audit = tmp_path / "audit.txt"
    hold = tmp_path / "held"
    proc = subprocess.Popen([*LEADLINE, "sweep", str(spec), "--quiet"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL,
                            env=env_with(LEADLINE_CHUNK_AUDIT=audit, LEADLINE_HOLD_AT="chunk-recorded:5",
                                         LEADLINE_HOLD_FILE=hold, LEADLINE_SHIP_MIN_VISITS=0))
    cluster_procs = []
    try:
        wait_for_file(hold, proc)
        cluster_procs = psutil.Process(proc.pid).children(recursive=True)
        assert cluster_procs, "no Dask worker processes under the sweep"
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=60) == -signal.SIGKILL
        # no orphaned worker: the processes of the killed writer's cluster end by themselves
        _, alive = psutil.wait_procs(cluster_procs, timeout=90)
        assert not alive, [p.pid for p in alive]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        for child in cluster_procs:  # only the processes this test's sweep started
            if child.is_running():
                child.kill()
    hold.unlink()
    progress = json.loads(run(["status", str(store), "--json"]).stdout)
    assert not progress["complete"] and not progress["lock"]["alive"]
    assert progress["ensembles"][0]["running"]["inflight"]["chunks_done"] > 0  # killed mid-pass
    r = run(["resume", str(store), "--executor", "local", "--workers", "1", "--quiet"],
            env=env_with(LEADLINE_CHUNK_AUDIT=audit, LEADLINE_SHIP_MIN_VISITS=0))
    assert r.returncode == 0, r.stderr
    # worker processes run BLAS single-threaded, so the last bits may differ from the
    # in-process reference; the numbers agree to rounding
    _compare_with_reference(reference, store, exact=False)
    counts = collections.Counter(audit_lines(audit))
    assert max(counts.values()) == 1  # no finished chunk computed again after the kill
    assert set(counts) == set(audit_lines(reference["audit"]))


SPARSE_SPEC = spec_text({"study": 'name = "mc"\nstore = "mc.zarr"', "optimizer": "restarts = 1"},
                        ensemble='[[ensemble]]\nlabel = "maxcut-d3"\nkind = "sparse"\nq = 2\ndegree = 3')
# MaxCut on D-regular triangle-free graphs at p = 1: the optimum 1/2 + (1/2) D^(-1/2) ((D-1)/D)^((D-1)/2)
# (Wang, Hadfield, Jiang, Rieffel, Phys. Rev. A 97, 022304 (2018)); D = 3 gives 0.692450, quoted
# as 0.6925 by Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014).
MAXCUT_D3_P1 = 0.5 + 0.5 / math.sqrt(3) * (2 / 3)
# p = 2, optimized: 0.7559 (Wurtz, Love, Phys. Rev. A 103, 042612 (2021)), 4 decimals
MAXCUT_D3_P2 = 0.7559


@pytest.fixture(scope="module")
def sparse_reference(tmp_path_factory):
    """An uninterrupted sweep of a sparse ensemble (MaxCut, D = 3, p = 1..2), with --json."""
    folder = tmp_path_factory.mktemp("sparse")
    (folder / "study.toml").write_text(SPARSE_SPEC)
    r = run(["sweep", str(folder / "study.toml"), "--json"])
    assert r.returncode == 0, r.stderr
    return {"store": folder / "mc.zarr", "json": json.loads(r.stdout)}


def test_sparse_ensemble_sweep_matches_published_maxcut_values(sparse_reference):
    """MaxCut on 3-regular graphs of large girth (q = 2, D = 3), depth-level checkpoints only;
    `sweep --json` reports what the store holds."""
    assert MAXCUT_D3_P1 == pytest.approx(0.692450, abs=5e-7)
    study = open_study(sparse_reference["store"])
    assert study.ensemble("maxcut-d3")["kind"] == "sparse" and study.ensemble("maxcut-d3")["degree"] == 3
    values = {d["p"]: d["value"] for d in study.depths("maxcut-d3")}
    assert abs(values[1] - MAXCUT_D3_P1) < 1e-6
    assert values[2] == pytest.approx(MAXCUT_D3_P2, abs=5e-5)
    out = sparse_reference["json"]
    assert Path(out["store"]).resolve() == sparse_reference["store"].resolve()
    assert [(line["label"], line["p"]) for line in out["finished_now"]] == [("maxcut-d3", 1), ("maxcut-d3", 2)]
    assert [line["result"]["value"] for line in out["finished_now"]] == [values[1], values[2]]
    assert out["progress"]["complete"] and out["progress"]["lock"] is None


def test_sparse_ensemble_killed_mid_depth_then_resumed(sparse_reference, tmp_path):
    """SIGKILL while p = 2 is running (depth marked running, optimizer under way), then
    `resume --json`: p = 1 is kept, p = 2 is redone to the uninterrupted value."""
    (tmp_path / "study.toml").write_text(SPARSE_SPEC)
    store = tmp_path / "mc.zarr"
    hold = tmp_path / "held"
    proc = subprocess.Popen([*LEADLINE, "sweep", str(tmp_path / "study.toml"), "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=env_with(LEADLINE_HOLD_AT="depth-started:2", LEADLINE_HOLD_FILE=hold))
    try:
        assert wait_for_file(hold, proc)["point"] == "depth-started"
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=60) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    hold.unlink()
    progress = json.loads(run(["status", str(store), "--json"]).stdout)
    (ens,) = progress["ensembles"]
    assert [d["p"] for d in ens["done"]] == [1] and ens["running"]["p"] == 2 and not progress["complete"]
    r = run(["resume", str(store), "--json"])
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert [(line["label"], line["p"]) for line in out["finished_now"]] == [("maxcut-d3", 2)]
    assert out["progress"]["complete"] and out["progress"]["lock"] is None
    got = {d["p"]: d for d in open_study(store).depths("maxcut-d3")}
    want = {d["p"]: d for d in open_study(sparse_reference["store"]).depths("maxcut-d3")}
    for p in (1, 2):
        assert abs(got[p]["value"] - want[p]["value"]) <= 1e-10
        assert np.max(np.abs(np.subtract(got[p]["gamma"], want[p]["gamma"]))) <= 1e-10
    assert got[2]["value"] == pytest.approx(MAXCUT_D3_P2, abs=5e-5)
    assert out["finished_now"][0]["result"]["value"] == got[2]["value"]


SPARSE_KILL_SPEC = spec_text({"study": 'name = "mc"\nstore = "mc.zarr"', "depths": "pmin = 1\npmax = 3"},
                             extra="[checkpoint]\ninterval-s = 0",
                             ensemble='[[ensemble]]\nlabel = "maxcut-d3"\nkind = "sparse"\nq = 2\ndegree = 3')


def _sparse_depths(store: Path) -> dict:
    root = zarr.open_group(str(store), mode="r")
    return {p: dict(root[f"ensembles/maxcut-d3/p{p:03d}"].attrs["result"]) for p in (1, 2, 3)}


def test_sparse_depth_killed_mid_optimization_resumes_its_saved_evaluations(tmp_path):
    """kill -9 in the middle of a sparse depth (p = 3, MaxCut D = 3, every evaluation written at once):
    `status` shows the depth's saved evaluations and best value; `resume` reads those back (none
    computed again: the store's counts and an independent audit line per written evaluation) and
    ends with the uninterrupted sweep's values, angles and optimizer history to the bit."""
    (tmp_path / "ref").mkdir()
    (tmp_path / "ref" / "study.toml").write_text(SPARSE_KILL_SPEC)
    ref_audit = tmp_path / "ref-audit.txt"
    r = run(["sweep", str(tmp_path / "ref" / "study.toml"), "--quiet"], env=env_with(LEADLINE_CHUNK_AUDIT=ref_audit))
    assert r.returncode == 0, r.stderr
    want = _sparse_depths(tmp_path / "ref" / "mc.zarr")
    n1, n2, n3 = (want[p]["evaluations"] for p in (1, 2, 3))
    assert n3 > 20
    # the reference wrote each evaluation once (the optimizer never asked for the same angles twice)
    assert len(audit_lines(ref_audit)) == len(set(audit_lines(ref_audit))) == n1 + n2 + n3

    (tmp_path / "study.toml").write_text(SPARSE_KILL_SPEC)
    store, hold, audit = tmp_path / "mc.zarr", tmp_path / "held", tmp_path / "audit.txt"
    saved = n3 // 2  # the kill comes after this many evaluations of p = 3 are in the store
    proc = subprocess.Popen([*LEADLINE, "sweep", str(tmp_path / "study.toml"), "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=env_with(LEADLINE_CHUNK_AUDIT=audit, LEADLINE_HOLD_FILE=hold,
                                         LEADLINE_HOLD_AT=f"sparse-evaluations-cached:{n1 + n2 + saved}"))
    try:
        assert wait_for_file(hold, proc)["point"] == "sparse-evaluations-cached"
        status = run(["status", str(store)])
        line = next(x for x in status.stdout.splitlines() if "p = 3" in x)
        assert line.split()[0] == "running" and f"{saved} evaluations saved" in line, status.stdout
        assert "best value so far = 0.79" in line and "s per evaluation" in line, line
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=60) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    hold.unlink()
    running = json.loads(run(["status", str(store), "--json"]).stdout)["ensembles"][0]["running"]
    assert running["p"] == 3 and not running["active"] and running["sparse"]["evaluations_saved"] == saved
    r = run(["resume", str(store), "--json"], env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == 0, r.stderr
    (line,) = json.loads(r.stdout)["finished_now"]
    t = line["timings"]
    assert line["p"] == 3 and t["sparse_evaluations_reused"] == saved
    assert t["sparse_evaluations_computed"] == n3 - saved and t["sessions"] == 2
    lines = audit_lines(audit)
    assert len(lines) == len(set(lines)) == n1 + n2 + n3  # no saved evaluation written twice
    assert set(lines) == set(audit_lines(ref_audit))  # the same evaluations as the uninterrupted sweep
    got = _sparse_depths(store)
    for p in (1, 2, 3):
        for key in ("value", "gamma", "beta", "gradient_norm", "evaluations", "history"):
            assert got[p][key] == want[p][key], (p, key)
    assert 0.7923 <= got[3]["value"] < 0.7924  # arXiv:2503.12789, Table 1 (MaxCut, D = 3, p = 3), 4 digits: 0.7923


@pytest.mark.slow
def test_kills_between_batched_checkpoints_resume_bit_for_bit(reference, tmp_path):
    """The default kind of policy: small passes wait in memory and are written in batches.

    A kill loses the passes computed since the last batch (they are computed again, to the
    same bits); passes in a written batch are never computed again.
    """
    rng = np.random.default_rng(20261202)
    spec = write_spec(tmp_path, "batched.zarr", interval_s=0.002)  # batches of a few passes, idle or loaded
    store = tmp_path / "batched.zarr"
    audit = tmp_path / "audit.txt"
    kills = [("pass-computed", int(rng.integers(20, 60))), ("pass-cached", int(rng.integers(2, 6))),
             ("pass-computed", int(rng.integers(30, 70)))]
    for i, (point, when) in enumerate(kills):
        args = ["sweep", str(spec)] if i == 0 else ["resume", str(store)]
        r = run([*args, "--quiet"], env=env_with(LEADLINE_CHUNK_AUDIT=audit, LEADLINE_CRASH_AT=f"{point}:{when}"))
        assert r.returncode == -signal.SIGKILL, (point, when, r.returncode, r.stderr)
    final = run(["resume", str(store), "--quiet"], env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    assert final.returncode == 0, final.stderr
    _compare_with_reference(reference, store)
    lines = audit_lines(audit)
    assert lines and max(collections.Counter(lines).values()) == 1  # a written pass is never computed again
    assert set(lines) <= set(audit_lines(reference["audit"]))  # same passes, same keys as the reference
    # finished depths keep no pass batches: the store holds the depth records only
    root = zarr.open_group(str(store), mode="r")
    for p in (1, 2, 3):
        assert sorted(root[f"ensembles/sk/p00{p}"].keys()) == ["beta", "gamma"]


def test_kill_while_creating_the_store_leaves_no_store(tmp_path):
    """The store is built under a temporary name and renamed: a kill before the rename leaves
    nothing at the store path, and the next sweep starts cleanly (and removes the leftover)."""
    spec = write_spec(tmp_path, "created.zarr")
    r = run(["sweep", str(spec), "--quiet"], env=env_with(LEADLINE_CRASH_AT="store-built:1"))
    assert r.returncode == -signal.SIGKILL
    assert not (tmp_path / "created.zarr").exists()
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".created.zarr")]
    assert len(leftovers) == 1
    r = run(["resume", str(tmp_path / "created.zarr")])
    assert r.returncode == 2 and "no study store" in r.stderr
    spec.write_text(spec.read_text().replace("pmax = 3", "pmax = 1"))
    r = run(["sweep", str(spec), "--quiet"])
    assert r.returncode == 0, r.stderr
    assert [d["p"] for d in open_study(tmp_path / "created.zarr").depths("sk")] == [1]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["created.zarr", "study.toml"]


def test_sigterm_writes_the_waiting_passes_and_releases_the_lock(reference, tmp_path):
    """SIGTERM (a batch system's time limit) mid-depth under the default interval: the passes
    waiting for their batch are written, the lock is released, and resume takes them from the store."""
    spec = write_spec(tmp_path, "term.zarr", interval_s=30)
    store = tmp_path / "term.zarr"
    # p = 1 runs 22 passes (11 evaluations, each 1 forward + 1 adjoint pass): the 30th is in p = 2
    r = run(["sweep", str(spec)], env=env_with(LEADLINE_CRASH_AT="pass-computed:30:TERM"))
    assert r.returncode == 128 + signal.SIGTERM, (r.returncode, r.stderr)
    assert r.stderr.startswith(f"leadline: stopped by SIGTERM; saved in {store}:"), r.stderr
    assert not (store / LOCK_NAME).exists()
    batches = [e for e in zarr.open_group(str(store / "ensembles/sk/p002/passes"), mode="r").arrays()]
    assert len(batches) == 1 and len(batches[0][1].attrs["entries"]) == 8
    r = run(["resume", str(store)])
    assert r.returncode == 0, r.stderr
    assert "8 reused" in [line for line in r.stdout.splitlines() if "p = 2" in line][0]
    _compare_with_reference(reference, store)


def test_ctrl_c_says_what_is_kept_and_how_to_resume(reference, tmp_path):
    """A real SIGINT to a sweep held mid-depth (LEADLINE_HOLD_AT, an event, not a delay): exit 130,
    stderr says which depths are done, how many passes of the stopped one are kept, and the resume
    command; status calls the depth stopped (no writer), and resume ends with the uninterrupted numbers."""
    spec = write_spec(tmp_path, "int.zarr", interval_s=30)
    store = tmp_path / "int.zarr"
    hold = tmp_path / "held"
    # p = 1 runs 22 passes (11 evaluations, each 1 forward + 1 adjoint pass): the 30th is in p = 2
    proc = subprocess.Popen([*LEADLINE, "sweep", str(spec)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env_with(LEADLINE_HOLD_AT="pass-computed:30", LEADLINE_HOLD_FILE=hold))
    held = wait_for_file(hold, proc)
    assert held["pid"] == proc.pid
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, (proc.returncode, err)
    assert "Traceback" not in err
    assert err.splitlines() == [
        f"leadline: interrupted; saved in {store}:",
        "  sk: p = 1 done; p = 2 stopped with 8 passes saved",
        f"continue with: leadline resume {store}",
    ], err
    # a fresh, uninterrupted depth says nothing about reuse (passes the optimizer asks for twice
    # in one session are repeats, not work taken from a checkpoint)
    assert "reused" not in reference["stdout"]
    (p1,) = [line for line in out.splitlines() if "p = 1" in line]
    assert "reused" not in p1 and "22 passes computed" in p1
    assert not (store / LOCK_NAME).exists()
    status = run(["status", str(store)])
    assert "writer: none" in status.stdout
    assert any(line.strip().startswith("stopped  p = 2: 8 passes saved") for line in status.stdout.splitlines()), status.stdout
    r = run(["resume", str(store)])
    assert r.returncode == 0, r.stderr
    assert "8 reused" in [line for line in r.stdout.splitlines() if "p = 2" in line][0]
    _compare_with_reference(reference, store)


@pytest.mark.parametrize("p", [1, 5, 12])
def test_sparse_sweep_depth_uses_the_command_lines_default_restarts(p, monkeypatch, tmp_path):
    """A sweep's sparse depth with no `restarts` in the spec starts the optimizer as
    `leadline optimize --sparse-q` does (jobs.ladders.sparse_default_restarts: INTERP alone past
    p = 6), not with the kernel's 3 seeded restarts, which made deep depths about 4x dearer."""
    import leadline.kernels.sparse as sparse_kernels
    from leadline.jobs.ladders import sparse_default_restarts
    from leadline.jobs.spec import spec_from_dict
    from leadline.jobs.sweep import _optimize_sparse

    spec = spec_from_dict({"study": {"name": "mc", "store": str(tmp_path / "mc.zarr")}, "depths": {"pmax": 12},
                           "ensemble": [{"label": "mc", "kind": "sparse", "q": 2, "degree": 3}]})
    seen = {}
    monkeypatch.setattr(sparse_kernels, "optimize_sparse", lambda *a, **kw: seen.update(kw) or "result")

    class Executor:
        settings = None

    result, _, _ = _optimize_sparse(spec.ensembles[0], spec, p, None, Executor(), None, None)
    assert result == "result" and seen["restarts"] == sparse_default_restarts(p)
    assert sparse_default_restarts(1) == 3 and sparse_default_restarts(12) == 0


def test_store_of_a_sweep_past_exact_depths_can_be_resumed(tmp_path):
    """A spec with pmax above 30 continued by the bath engine is accepted by `sweep`; its store
    must be accepted again by `status` and `resume` (they once refused it as damaged: "depths
    1..32 outside 1..30"), while a dense ensemble without bath-from still stops at 30."""
    spec = tmp_path / "deep.toml"
    spec.write_text(spec_text({"depths": "pmin = 1\npmax = 32"},
                              ensemble='[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\nbath-from = 2'))
    r = run(["sweep", str(spec), "--quiet"], env=env_with(LEADLINE_CRASH_AT="depth-done:1"))
    assert r.returncode == -signal.SIGKILL
    r = run(["status", str(tmp_path / "s.zarr")])
    assert r.returncode == 0 and "done     p = 1:" in r.stdout and "p = 2..32" in r.stdout, r.stderr
    r = run(["resume", str(tmp_path / "s.zarr"), "--quiet"], env=env_with(LEADLINE_CRASH_AT="depth-started:2"))
    assert r.returncode == -signal.SIGKILL, r.stderr  # it ran on into the first bath depth


def test_stop_message_counts_saved_evaluations_of_bath_and_sparse_depths(monkeypatch):
    """A sweep stopped in a bath or sparse depth says how many evaluations it kept (it said
    "0 passes saved" after a SIGTERM in an SK bath depth with 367 evaluations saved)."""
    import leadline.storage as storage
    from leadline.jobs.commands.sweep import stopped_text

    def running(p, **kind):
        return {"p": p, "passes_saved": 0, "inflight": None, "bath": None, "sparse": None, **kind}

    progress = {"complete": False, "ensembles": [
        {"label": "sk", "done": [{"p": 1}], "running": running(2, bath={"evaluations_saved": 367})},
        {"label": "mc", "done": [], "running": running(1, sparse={"evaluations_saved": 1})},
        {"label": "mix", "done": [], "running": running(1, passes_saved=8)},
    ]}
    monkeypatch.setattr(storage, "open_study", lambda path: type("S", (), {"progress": lambda self: progress})())
    text = stopped_text("stopped by SIGTERM", "s.zarr")
    assert "sk: p = 1 done; p = 2 stopped with 367 evaluations saved" in text
    assert "mc: p = 1 stopped with 1 evaluation saved" in text
    assert "mix: p = 1 stopped with 8 passes saved" in text


def _root_attrs(store: Path) -> dict:
    return json.loads((store / "zarr.json").read_text())["attributes"]


def test_resume_pmax_continues_a_finished_study_deeper(reference, tmp_path):
    """`resume --pmax P` raises a finished study's deepest depth for good: a kill right after the
    raise leaves a store that a plain `resume` finishes, the finished depths are untouched, the new
    depth warm-starts from them and reaches the published optimum (Farhi, Goldstone, Gutmann,
    Zhou, Quantum 6, 759 (2022), Table 1: SK V_4* = 0.5157), and the store says what was raised."""
    import shutil
    import tomllib

    store = tmp_path / "s.zarr"
    shutil.copytree(reference["store"], store)
    before = {p: _depth_attrs(store, p)["result"] for p in (1, 2, 3)}
    r = run(["resume", str(store), "--pmax", "4", "--quiet"], env=env_with(LEADLINE_CRASH_AT="depth-started:1"))
    assert r.returncode == -signal.SIGKILL, r.stderr  # the raise was written, then p = 4 began
    r = run(["status", str(store)])
    assert r.returncode == 0 and "depths 1..4 (pmax raised from 3 on " in r.stdout, r.stdout + r.stderr
    r = run(["resume", str(store)])
    assert r.returncode == 0, r.stderr
    assert "sk           p = 4 " in r.stdout
    after = {p: _depth_attrs(store, p)["result"] for p in (1, 2, 3, 4)}
    assert all(after[p] == before[p] for p in (1, 2, 3))
    assert round(after[4]["value"], 4) == 0.5157  # Table 1, Farhi et al. (2022)
    attrs = _root_attrs(store)
    assert attrs["spec"]["depths"]["pmax"] == 4
    assert [(e["from"], e["to"]) for e in attrs["depths_raised"]] == [(3, 4)]
    assert tomllib.loads(attrs["spec_toml"])["depths"]["pmax"] == 4
    assert "# [depths] pmax raised from 3 to 4 by `leadline resume --pmax 4`" in attrs["spec_toml"]
    status = json.loads(run(["status", str(store), "--json"]).stdout)
    assert status["depths"] == [1, 4] and status["complete"] and len(status["depths_raised"]) == 1


def _depth_attrs(store: Path, p: int) -> dict:
    return json.loads((store / "ensembles" / "sk" / f"p{p:03d}" / "zarr.json").read_text())["attributes"]


@pytest.mark.parametrize("pmax, message", [
    ("2", "--pmax 2 is below the study's pmax 3: a study's depths can be raised, not lowered"),
    ("31", "--pmax 31: [depths] pmax = 31 is beyond 30"),
    ("x", "Invalid value for '--pmax': 'x' is not a whole number"),
])
def test_resume_pmax_refuses_a_lower_or_impossible_depth_and_writes_nothing(reference, tmp_path, pmax, message):
    import shutil

    store = tmp_path / "s.zarr"
    shutil.copytree(reference["store"], store)
    tree, root = _tree(store), (store / "zarr.json").read_bytes()
    r = run(["resume", str(store), "--pmax", pmax])
    assert r.returncode == 2 and message in " ".join(r.stderr.split()), r.stderr
    assert _tree(store) == tree and (store / "zarr.json").read_bytes() == root
    r = run(["resume", str(store), "--pmax", "3"])  # its own pmax: nothing to raise, nothing to do
    assert r.returncode == 0 and "depths_raised" not in _root_attrs(store), r.stderr


def test_raised_spec_text_rewrites_the_one_pmax_or_only_comments():
    import tomllib

    from leadline.jobs.spec import raised_spec_text

    text = '[study]\nname = "s"\n\n[depths]\npmin = 1\npmax = 32   # one night\n'
    out = raised_spec_text(text, 32, 40, "2026-12-04T00:00:00Z")
    assert tomllib.loads(out)["depths"]["pmax"] == 40 and "pmax = 40   # one night" in out
    assert out.endswith("# [depths] pmax raised from 32 to 40 by `leadline resume --pmax 40` (2026-12-04T00:00:00Z)\n")
    inline = 'depths = { pmin = 1, pmax = 3 }\n# pmax = 9 was too deep\n'
    assert tomllib.loads(raised_spec_text(inline, 3, 5, "t"))["depths"]["pmax"] == 5
    # two candidate lines (one inside a string): the text is kept as written, with the comment
    odd = '[depths]\npmax = 3\n[[ensemble]]\nlabel = "a"\nsource = """\npmax = 3 in the paper"""\n'
    out = raised_spec_text(odd, 3, 5, "t")
    assert out.startswith(odd.rstrip("\n")) and "pmax raised from 3 to 5" in out


def test_a_copied_store_resumes_where_it_is_now(reference, tmp_path):
    """A store copied elsewhere (to a cluster, say) resumes with its new location as the study's
    store, so a sparse depth's scratch folder is made beside it (common practice: a moved
    dataset is used where it is)."""
    import shutil

    from leadline.jobs.commands.sweep import prepare_resume

    store = tmp_path / "moved" / "s.zarr"
    shutil.copytree(reference["store"], store)
    saved = dict(os.environ)
    try:
        spec, _ = prepare_resume(store, executor="inprocess")
    finally:  # it pins the study's chunk kernel in os.environ, as `resume` does for its run
        os.environ.clear()
        os.environ.update(saved)
    assert spec.store == store.resolve() and spec.store != Path(reference["store"]).resolve()
