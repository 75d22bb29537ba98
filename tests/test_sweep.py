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
executor = "inprocess"
memory-mb = {memory_mb}

[checkpoint]
interval-s = {interval_s}
keep-passes = {keep}

[[ensemble]]
label = "sk"
xi = "2:0.5"
"""


def write_spec(folder: Path, store: str, memory_mb: float = 0.004, interval_s: float = 0,
               keep_passes: bool = False) -> Path:
    """The kill-test spec; interval-s = 0 writes every pass and every chunk as soon as it is done."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "study.toml"
    path.write_text(SPEC.format(store=store, memory_mb=memory_mb, interval_s=interval_s,
                                keep=str(keep_passes).lower()))
    return path


def env_with(**extra) -> dict:
    env = dict(os.environ)
    env.pop("LEADLINE_CRASH_AT", None)
    env.update({k: str(v) for k, v in extra.items()})
    return env


def run(args, env=None, cwd=None, timeout=180):
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


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted sweep; while it runs, a second writer tries the same store."""
    folder = tmp_path_factory.mktemp("reference")
    spec = write_spec(folder, "ref.zarr")
    store = folder / "ref.zarr"
    audit = folder / "audit.txt"
    proc = subprocess.Popen([*LEADLINE, "sweep", str(spec), "--quiet"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    deadline = time.time() + 60
    while not ((store / LOCK_NAME).exists() and (store / "zarr.json").exists()) and time.time() < deadline:
        time.sleep(0.05)
    first_running = proc.poll() is None
    # the second writers and a reader, started together while the first one runs
    started = {
        name: subprocess.Popen([*LEADLINE, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        for name, args in (("resume", ["resume", str(store)]), ("sweep", ["sweep", str(spec)]),
                           ("status", ["status", str(store), "--json"]))
    }
    probes = {"first_running": first_running}
    for name, p in started.items():
        out, err = p.communicate(timeout=120)
        probes[name] = subprocess.CompletedProcess(p.args, p.returncode, out, err)
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
    status = json.loads(probes["status"].stdout)
    if status["lock"] is not None:  # (the first writer may just have finished)
        assert status["lock"]["pid"] == reference["pid"] and status["lock"]["alive"]
    # the first writer is unharmed: finished, lock released, published values
    assert reference["rc"] == 0, reference["stderr"]
    assert not (reference["store"] / LOCK_NAME).exists()
    depths = open_study(reference["store"]).depths("sk")
    assert [d["p"] for d in depths] == [1, 2, 3]
    for d in depths:
        assert d["value"] == pytest.approx(SK_TABLE_1[d["p"]], abs=5e-5)
    assert sorted(collections.Counter(audit_lines(reference["audit"])).values())[-1] == 1


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
    # (crash point, count) chosen by the seeded generator; None = kill -9 after a random delay.
    # Counts are per process. With memory-mb = 0.004 and the growing contour, the passes of
    # step 1 are single-chunk, step 2 has 2 chunks and step 3 has 8 (p = 2: ~50 chunk records,
    # p = 3: ~240).
    kills = [
        ("pass-cached", int(rng.integers(5, 30))),            # between passes: inside the optimizer
        ("depth-arrays-written", 1),                          # while a depth's result is being written
        ("chunk-partial-written", int(rng.integers(20, 120))),  # mid pass, between data and ledger row
        (None, float(rng.uniform(0.5, 2.0))),                 # anywhere
        ("chunk-recorded", int(rng.integers(20, 120))),       # mid pass, right after a ledger row
    ]
    for i, (point, when) in enumerate(kills):
        args = ["sweep", str(spec)] if i == 0 else ["resume", str(store)]
        env = env_with(LEADLINE_CHUNK_AUDIT=audit)
        if point is not None:
            env["LEADLINE_CRASH_AT"] = f"{point}:{when}"
            r = run([*args, "--quiet"], env=env)
            assert r.returncode == -signal.SIGKILL, (point, when, r.returncode, r.stderr)
        else:
            proc = subprocess.Popen([*LEADLINE, *args, "--quiet"], env=env, stdout=subprocess.DEVNULL,
                                    stderr=subprocess.DEVNULL)
            time.sleep(when)
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
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
    "zero gtol": (spec_text({"optimizer": "gtol = 0"}), "gtol must be positive"),
    "unknown executor": (spec_text({"compute": 'executor = "cloud"'}), "executor must be one of"),
    "zero workers": (spec_text({"compute": "workers = 0"}), "workers must be >= 1"),
    "zero memory": (spec_text({"compute": "memory-mb = 0"}), "memory-mb must be positive"),
    "missing cluster config": (spec_text({"compute": 'cluster-config = "nope.toml"'}), "cluster-config"),
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
def test_resume_on_a_local_dask_cluster_skips_finished_chunks(reference, tmp_path):
    """Killed in process mid-pass, resumed on a real Dask LocalCluster (the executor's done/on_chunk hook)."""
    spec = write_spec(tmp_path, "dask.zarr")
    store = tmp_path / "dask.zarr"
    audit = tmp_path / "audit.txt"
    r = run(["sweep", str(spec), "--quiet"], env=env_with(LEADLINE_CRASH_AT="chunk-recorded:10",
                                                           LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == -signal.SIGKILL
    before = len(audit_lines(audit))
    r = run(["resume", str(store), "--executor", "local", "--workers", "1", "--quiet"],
            env=env_with(LEADLINE_CHUNK_AUDIT=audit))
    assert r.returncode == 0, r.stderr
    assert len(audit_lines(audit)) > before
    # worker processes run BLAS single-threaded, so the last bits may differ from the
    # in-process reference; the numbers agree to rounding
    _compare_with_reference(reference, store, exact=False)
    counts = collections.Counter(audit_lines(audit))
    assert max(counts.values()) == 1  # no chunk recorded twice across the two executors


def test_sparse_ensemble_sweep_matches_published_maxcut_values(tmp_path, capsys):
    """MaxCut on 3-regular graphs of large girth (q = 2, D = 3), depth-level checkpoints only.

    p = 1: 0.6925 (Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014));
    p = 2: 0.7559 (Wurtz, Love, Phys. Rev. A 103, 042612 (2021)).
    """
    from leadline.jobs.cli import main

    spec = tmp_path / "study.toml"
    spec.write_text(spec_text({"study": 'name = "mc"\nstore = "mc.zarr"', "optimizer": "restarts = 1"},
                              ensemble='[[ensemble]]\nlabel = "maxcut-d3"\nkind = "sparse"\nq = 2\ndegree = 3'))
    main(["sweep", str(spec), "--quiet"])
    study = open_study(tmp_path / "mc.zarr")
    assert study.ensemble("maxcut-d3")["kind"] == "sparse" and study.ensemble("maxcut-d3")["degree"] == 3
    values = {d["p"]: d["value"] for d in study.depths("maxcut-d3")}
    assert values[1] == pytest.approx(0.6925, abs=5e-5)
    assert values[2] == pytest.approx(0.7559, abs=5e-5)


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
    assert not (store / LOCK_NAME).exists()
    batches = [e for e in zarr.open_group(str(store / "ensembles/sk/p002/passes"), mode="r").arrays()]
    assert len(batches) == 1 and len(batches[0][1].attrs["entries"]) == 8
    r = run(["resume", str(store)])
    assert r.returncode == 0, r.stderr
    assert "8 from checkpoint" in [line for line in r.stdout.splitlines() if "p = 2" in line][0]
    _compare_with_reference(reference, store)
