"""The checkpoint store in one process: pass cache, ledger, verification, lock, read API.

External references for the numbers checked here:
- V_1 of the SK model at (gamma, beta) = (1/2, pi/8) is 1/sqrt(4e) (Farhi, Goldstone,
  Gutmann, Zhou, "The QAOA and the SK model at infinite size", Quantum 6, 759 (2022)).
- Optimal V_p of the SK model, same paper, Table 1: 0.3033, 0.4075, 0.4726 for p = 1, 2, 3.
Everything else checks the store against the in-process evaluator itself: a checkpointed
pass must reproduce ``kernels.exact.evaluate`` bit for bit.
"""

from __future__ import annotations

import json
import math
import os
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import zarr

from leadline.kernels.exact import PassInput, chunk_partial, run_pass_inprocess, evaluate, ChunkPlan
from leadline.kernels.mixture import parse_mixture
from leadline.cluster import CheckpointedPasses, InProcessChunks
from leadline.storage import (
    NotAStudyError,
    SchemaVersionError,
    StoreLock,
    StoreLockedError,
    StudyStore,
    open_study,
)
from leadline.storage import layout as L
from leadline.storage.lock import LOCK_NAME

SK = parse_mixture("2:0.5")
PLAN3 = ChunkPlan(3, 4, 2)  # 8 chunks of 2 high rows each, 2^3 low patterns
G3 = np.array([0.41, 0.55, 0.62])
B3 = np.array([0.52, 0.37, 0.19])


def _spec(store: Path, interval_s: float = 0.0) -> dict:
    # interval 0: every pass and every chunk is written at once (the mechanics under test here)
    return {
        "format_version": 2,
        "name": "unit",
        "store": str(store),
        "depths": {"pmin": 1, "pmax": 3},
        "optimizer": {"restarts": 0, "seed": 0, "gradient_tol": 1e-7, "max_iterations": 500},
        "compute": {"executor": "inprocess"},
        "checkpoint": {"interval_s": interval_s, "keep_passes": False},
        "ensembles": [{"label": "sk", "kind": "dense", "xi": "2:0.5", "q": None, "degree": None,
                       "reference": {"ground_state": None, "source": None}}],
    }


def new_store(tmp_path: Path, interval_s: float = 0.0) -> StudyStore:
    path = tmp_path / "unit.zarr"
    spec = _spec(path, interval_s)
    return StudyStore.create(path, name="unit", spec=spec, spec_toml="", ensembles=spec["ensembles"])


def pass_record(store_path: Path, p: int, key: str) -> dict:
    """The record of cached pass ``key`` of depth p, found in the batch arrays with plain zarr."""
    root = zarr.open_group(str(store_path), mode="r")
    for _name, arr in root[f"ensembles/sk/{L.depth_name(p)}/passes"].arrays():
        for entry in arr.attrs["entries"]:
            if entry["key"] == key:
                return entry
    raise KeyError(key)


class CountingRunner:
    """In-process chunk runner that counts computed chunks and can stop after some."""

    def __init__(self, stop_after: int | None = None):
        self.inner = InProcessChunks()
        self.computed: list[tuple[str, int]] = []
        self.stop_after = stop_after

    def run_chunks(self, inp, plan, done, on_chunk):
        def counted(k, part):
            if self.stop_after is not None and len(self.computed) >= self.stop_after:
                raise KeyboardInterrupt("simulated stop")
            self.computed.append((inp.fingerprint(), k))
            on_chunk(k, part)

        self.inner.run_chunks(inp, plan, done, counted)


def pass_log(plan, gradient=True):
    """(step, plan) of every pass an in-process evaluation at (G3, B3) runs, in order."""
    log = []

    def logged(inp, step_plan):
        log.append((inp.p, step_plan))
        return run_pass_inprocess(inp, step_plan)

    evaluate(SK, G3, B3, plan=plan, run_pass=logged, gradient=gradient)
    return log


@pytest.mark.parametrize("plan", [PLAN3, ChunkPlan(3, 4, 2, flip=True)], ids=["no-flip", "flip"])
def test_checkpointed_pass_equals_inprocess_bit_for_bit(tmp_path, plan):
    log = pass_log(plan)
    assert [m for m, _ in log] == [1, 2, 3, 3, 2, 1]  # growing contour: each step on its own contour
    chunks = sum(q.n_chunks for _, q in log)
    with new_store(tmp_path) as store:
        depth = store.depth("sk", 3, plan)
        runner = CountingRunner()
        cp = CheckpointedPasses(depth, runner)
        ref = evaluate(SK, G3, B3, plan=plan, gradient=True)
        ev = evaluate(SK, G3, B3, plan=plan, run_pass=cp.run_pass, gradient=True)
        assert ev.value == ref.value
        assert np.array_equal(ev.gradient["gamma"], ref.gradient["gamma"])
        assert np.array_equal(ev.gradient["beta"], ref.gradient["beta"])
        assert len(runner.computed) == chunks
        # asked again: every pass from the store, nothing computed
        again = evaluate(SK, G3, B3, plan=plan, run_pass=cp.run_pass, gradient=True)
        assert again.value == ref.value and len(runner.computed) == chunks
        # computed earlier in this same session: repeats, not work reused from a checkpoint
        assert cp.stats.passes_repeated == len(log) and cp.stats.passes_reused == 0
    # every pass recorded with its own step and its own plan (flip explicit)
    with StudyStore.open(tmp_path / "unit.zarr") as store:
        records = store.depth("sk", 3, plan).pass_records()
        assert sorted((r["step"], r["kind"]) for r in records) == sorted(
            (m, kind) for (m, _), kind in zip(log, ["forward"] * 3 + ["backward"] * 3))
        for r in records:
            step_plan = next(q for m, q in log if m == r["step"])
            assert r["plan"] == L.plan_json(step_plan) and r["plan"]["flip"] is plan.flip
            assert r["shape"] == [2 * r["step"] + 2, 2 * r["step"] + 1]
            assert r["paths"] == step_plan.path_visits


def test_sk_p1_value_through_store(tmp_path):
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022): V_1(1/2, pi/8) = 1/sqrt(4e)
    plan = ChunkPlan(1, 2, 1)  # 4 chunks
    with new_store(tmp_path) as store:
        cp = CheckpointedPasses(store.depth("sk", 1, plan))
        ev = evaluate(SK, [0.5], [math.pi / 8], plan=plan, run_pass=cp.run_pass)
    assert ev.value == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-13)


def _forward_input(p=3):
    from leadline.kernels.exact import gamma_vector, initial_correlations

    Gam = gamma_vector(G3)
    M = np.outer(Gam, Gam) * SK.dxi(initial_correlations(p, B3))
    return PassInput(p, M, B3)


def test_interrupted_pass_resumes_with_missing_chunks_only(tmp_path):
    inp = _forward_input()
    expected = sum((chunk_partial(inp, PLAN3, k) for k in range(PLAN3.n_chunks)), np.zeros((8, 7), complex))
    with new_store(tmp_path) as store:
        first = CountingRunner(stop_after=3)
        with pytest.raises(KeyboardInterrupt):
            CheckpointedPasses(store.depth("sk", 3, PLAN3), first).run_pass(inp, PLAN3)
        assert [k for _, k in first.computed] == [0, 1, 2]
    with StudyStore.open(tmp_path / "unit.zarr") as store:  # a new session
        second = CountingRunner()
        total = CheckpointedPasses(store.depth("sk", 3, PLAN3), second).run_pass(inp, PLAN3)
        assert [k for _, k in second.computed] == [3, 4, 5, 6, 7]
        assert np.array_equal(total, expected)  # chunk-order sum, bit for bit
        attrs = pass_record(store.path, 3, L.pass_key(inp, PLAN3))
        assert attrs["step"] == 3 and attrs["plan"] == L.plan_json(PLAN3) and attrs["plan"]["flip"] is False
        assert attrs["completions"] == [1] * PLAN3.n_chunks
        assert attrs["crc32"] == L.checksum(total)


def _chunk_file(store_path: Path, k: int) -> Path:
    return store_path / "ensembles/sk/p003/inflight/partials" / f"c.{k}.0.0"


@pytest.mark.parametrize("damage", ["flip", "truncate", "zero-length"])
def test_damaged_partial_is_detected_and_recomputed(tmp_path, damage):
    inp = _forward_input()
    path = tmp_path / "unit.zarr"
    with new_store(tmp_path) as store:
        with pytest.raises(KeyboardInterrupt):
            CheckpointedPasses(store.depth("sk", 3, PLAN3), CountingRunner(stop_after=5)).run_pass(inp, PLAN3)
    f = _chunk_file(path, 2)
    data = bytearray(f.read_bytes())
    if damage == "flip":
        data[len(data) // 2] ^= 0xFF
        f.write_bytes(bytes(data))
    elif damage == "truncate":
        f.write_bytes(bytes(data[: len(data) // 2]))
    else:
        f.write_bytes(b"")
    with StudyStore.open(path) as store:
        runner = CountingRunner()
        depth = store.depth("sk", 3, PLAN3)
        total = CheckpointedPasses(depth, runner).run_pass(inp, PLAN3)
        assert sorted(k for _, k in runner.computed) == [2, 5, 6, 7]
        ref = sum((chunk_partial(inp, PLAN3, k) for k in range(PLAN3.n_chunks)), np.zeros((8, 7), complex))
        assert np.array_equal(total, ref)
        repairs = depth.group.attrs["repairs"]
        assert [(r["what"], r["chunk"]) for r in repairs] == [("chunk recomputed", 2)]
        completions = pass_record(store.path, 3, L.pass_key(inp, PLAN3))["completions"]
        assert completions == [1, 1, 2, 1, 1, 1, 1, 1]  # the repaired chunk is the only one computed twice


def test_damaged_pass_cache_entry_is_dropped_and_recomputed(tmp_path):
    inp = _forward_input()
    path = tmp_path / "unit.zarr"
    with new_store(tmp_path) as store:
        good = CheckpointedPasses(store.depth("sk", 3, PLAN3)).run_pass(inp, PLAN3)
    key = L.pass_key(inp, PLAN3)
    chunk = path / "ensembles/sk/p003/passes" / L.batch_name(1) / "c.0"
    data = bytearray(chunk.read_bytes())
    data[-3] ^= 0x01
    chunk.write_bytes(bytes(data))
    with StudyStore.open(path) as store:
        depth = store.depth("sk", 3, PLAN3)
        assert depth.cached_pass(key, backward=False) is None  # detected, dropped
        runner = CountingRunner()
        again = CheckpointedPasses(depth, runner).run_pass(inp, PLAN3)
        assert np.array_equal(again, good)
        # this was the last pass in flight: its verified ledger still holds every chunk
        assert runner.computed == []
        assert depth.group.attrs["repairs"][0]["what"] == "saved pass dropped"
        assert depth.cached_pass(key, backward=False) is not None  # stored again


def test_cached_forward_pass_must_satisfy_sum_w(tmp_path):
    """A cache entry whose checksum matches but whose sum of weights is off is not trusted."""
    inp = _forward_input()
    with new_store(tmp_path) as store:
        CheckpointedPasses(store.depth("sk", 3, PLAN3)).run_pass(inp, PLAN3)
        key = L.pass_key(inp, PLAN3)
        depth = store.depth("sk", 3, PLAN3)  # a new session reads the batch from disk
        arr = depth.group[f"passes/{L.batch_name(1)}"]
        entries = arr.attrs["entries"]
        assert [e["key"] for e in entries] == [key] and entries[0]["offset"] == 0
        bad = np.array(arr[...])
        bad[0] += 1e-6  # entry (0, 0) of the only pass: a lost or doubled chunk would do this
        arr[...] = bad
        entries[0]["crc32"] = L.checksum(bad.reshape(entries[0]["shape"]))
        arr.attrs.update({"entries": entries})
        depth = store.depth("sk", 3, PLAN3)
        assert depth.cached_pass(key, backward=False) is None
        assert "sum of path weights" in depth.group.attrs["repairs"][-1]["detail"]


def test_schema_version_checked_on_open(tmp_path):
    path = tmp_path / "unit.zarr"
    new_store(tmp_path).close()
    meta = json.loads((path / "zarr.json").read_text())
    meta["attributes"]["format_version"] = 99
    (path / "zarr.json").write_text(json.dumps(meta))
    with pytest.raises(SchemaVersionError, match="format version 99"):
        open_study(path)
    with pytest.raises(SchemaVersionError):
        StudyStore.open(path)
    with pytest.raises(NotAStudyError):
        open_study(tmp_path / "nothing-here.zarr")


# ---------------------------------------------------------------------------- lock
def test_second_writer_refused_naming_the_holder(tmp_path):
    with new_store(tmp_path):
        with pytest.raises(StoreLockedError, match=f"pid {os.getpid()} on host {socket.gethostname()}"):
            StudyStore.open(tmp_path / "unit.zarr")
    # released on close: a new writer gets it
    StudyStore.open(tmp_path / "unit.zarr").close()
    assert not (tmp_path / "unit.zarr" / LOCK_NAME).exists()


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def _write_lock(directory: Path, **holder) -> None:
    (directory / LOCK_NAME).write_text(json.dumps(holder))


def test_stale_lock_taken_over(tmp_path):
    d = tmp_path / "s"
    d.mkdir()
    _write_lock(d, pid=_dead_pid(), host=socket.gethostname(), process_start=1.0, token="old")
    lock = StoreLock(d).acquire()
    assert lock.took_over["token"] == "old"
    assert json.loads((d / LOCK_NAME).read_text())["token"] == lock.token
    lock.release()
    assert not (d / LOCK_NAME).exists()


def test_reused_pid_counts_as_stale(tmp_path):
    d = tmp_path / "s"
    d.mkdir()
    # our own (live) pid, but recorded with another start time: the pid was reused
    _write_lock(d, pid=os.getpid(), host=socket.gethostname(), process_start=12345.0, token="old")
    with StoreLock(d) as lock:
        assert lock.took_over is not None


def test_lock_of_other_host_is_respected(tmp_path):
    d = tmp_path / "s"
    d.mkdir()
    _write_lock(d, pid=1, host="some-other-node", process_start=1.0, token="theirs", command="sweep")
    with pytest.raises(StoreLockedError, match="some-other-node"):
        StoreLock(d).acquire()
    assert json.loads((d / LOCK_NAME).read_text())["token"] == "theirs"


def test_concurrent_takeover_of_a_stale_lock_has_one_winner(tmp_path):
    """Several processes race for the same stale lock: exactly one gets it.

    The winner keeps the lock (and stays alive) until every racer has answered, so a late
    racer cannot find a lock gone stale again; no step depends on elapsed time.
    """
    d = tmp_path / "s"
    d.mkdir()
    _write_lock(d, pid=_dead_pid(), host=socket.gethostname(), process_start=1.0, token="old")
    code = (
        "import sys; from leadline.storage import StoreLock, StoreLockedError\n"
        "print('ready', flush=True); sys.stdin.readline()\n"
        "try:\n    lock = StoreLock(sys.argv[1]).acquire(); print('won', flush=True)\n"
        "except StoreLockedError: lock = None; print('refused', flush=True)\n"
        "sys.stdin.readline()\n"
        "if lock is not None: lock.release()\n"
    )
    procs = [subprocess.Popen([sys.executable, "-c", code, str(d)], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                              text=True) for _ in range(3)]
    try:
        for proc in procs:
            assert proc.stdout.readline().strip() == "ready"
        for proc in procs:  # release them together
            proc.stdin.write("go\n")
            proc.stdin.flush()
        outcomes = sorted(proc.stdout.readline().strip() for proc in procs)  # every racer has answered
        assert outcomes == ["refused", "refused", "won"]
        assert json.loads((d / LOCK_NAME).read_text())["token"] != "old"
    finally:
        for proc in procs:
            proc.communicate("done\n", timeout=60)
    assert not (d / LOCK_NAME).exists()  # the winner released it


# ---------------------------------------------------------------------------- read API
def test_read_api_and_plain_zarr_layout(tmp_path):
    """A tiny sweep in process; then read it with the API and with plain zarr."""
    from leadline.jobs.spec import parse_spec
    from leadline.jobs.sweep import run_study

    text = """
[study]
name = "api"
store = "api.zarr"
[depths]
pmax = 2
[optimizer]
restarts = 0
[compute]
executor = "inprocess"
memory-mib = 0.004
[checkpoint]
keep-passes = true
[[ensemble]]
label = "sk"
xi = "2:0.5"
[ensemble.reference]
ground-state = 0.763166
source = "Parisi value, Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)"
"""
    spec = parse_spec(text, tmp_path)
    with StudyStore.create(spec.store, name=spec.name, spec=spec.to_json(), spec_toml=text,
                           ensembles=[e.description() for e in spec.ensembles]) as store:
        run_study(store, spec, None)
    study = open_study(tmp_path / "api.zarr")
    assert study.name == "api" and study.ensembles() == ["sk"]
    assert study.spec["depths"] == {"pmin": 1, "pmax": 2}
    ens = study.ensemble("sk")
    assert ens == {"label": "sk", "kind": "dense", "xi": "2:0.5", "q": None, "degree": None,
                   "reference": {"ground_state": 0.763166,
                                 "source": "Parisi value, Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)"}}
    depths = study.depths("sk")
    assert [d["p"] for d in depths] == [1, 2]
    assert set(depths[0]) == {"p", "value", "gamma", "beta", "gradient_norm", "evaluations", "wall_time_s", "converged",
                              "method", "error_estimate"}
    # exact depths say so and carry no error estimate (bath depths carry the engine's)
    assert all(d["method"] == "exact" and d["error_estimate"] is None for d in depths)
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), Table 1
    assert depths[0]["value"] == pytest.approx(0.3033, abs=5e-5)
    assert depths[1]["value"] == pytest.approx(0.4075, abs=5e-5)
    assert len(depths[1]["gamma"]) == 2 and all(d["converged"] for d in depths)
    with pytest.raises(KeyError):
        study.ensemble("nope")

    # the same numbers with plain zarr, following the documented layout
    root = zarr.open_group(str(tmp_path / "api.zarr"), mode="r")
    assert root.attrs["format"] == "leadline.study" and root.attrs["format_version"] == 4
    g = root["ensembles/sk/p002"]
    assert g.attrs["state"] == "done"
    assert g.attrs["result"]["value"] == depths[1]["value"]
    assert np.array_equal(g["gamma"][...], np.array(depths[1]["gamma"]))
    assert np.array_equal(g["beta"][...], np.array(depths[1]["beta"]))
    assert root["ensembles/sk"].attrs["reference"]["ground_state"] == 0.763166
    assert "inflight" not in g  # removed once the depth is done
    # keep-passes: the depth's passes stay, in batch arrays; their entries index the flat data
    entries = []
    for name, arr in g["passes"].arrays():
        assert L.parse_batch_name(name) is not None
        flat = arr[...]
        assert arr.attrs["crc32"] == L.checksum(flat)
        for e in arr.attrs["entries"]:
            m = e["step"]
            assert e["shape"] == [2 * m + 2, 2 * m + 1] and 1 <= m <= 2
            matrix = flat[e["offset"]: e["offset"] + (2 * m + 2) * (2 * m + 1)].reshape(e["shape"])
            assert L.checksum(matrix) == e["crc32"] and e["key"].startswith(e["fingerprint"])
            assert e["completions"] == [1] * e["n_chunks"] and e["kind"] in ("forward", "backward")
            if e["kind"] == "forward":  # sum of the path weights is 1 (every pass checks it)
                assert np.allclose(np.diag(matrix[: 2 * m + 1]), 1.0, atol=1e-12)
            entries.append(e)
    assert len(entries) == g.attrs["timings"]["passes"]
    progress = study.progress()
    assert progress["complete"] and progress["estimated_seconds_left"] == 0.0
    files = [f for f in (tmp_path / "api.zarr").rglob("*") if f.is_file()]
    assert progress["store"] == {"files": len(files), "bytes": sum(f.stat().st_size for f in files)}
    from leadline.jobs.commands.sweep import status_text

    assert f"in {len(files)} files" in status_text(progress).splitlines()[1]


# ---------------------------------------------------------------------------- checkpoint policy
def test_small_passes_wait_for_their_batch_and_are_recomputed_to_the_same_bits(tmp_path):
    """Default kind of policy: passes far cheaper than the interval are written in one batch."""
    path = tmp_path / "unit.zarr"
    ref = evaluate(SK, G3, B3, plan=PLAN3, gradient=True)
    log = pass_log(PLAN3)
    chunks = sum(q.n_chunks for _, q in log)
    with new_store(tmp_path, interval_s=30.0) as store:
        runner = CountingRunner()
        cp = CheckpointedPasses(store.depth("sk", 3, PLAN3), runner)
        ev = evaluate(SK, G3, B3, plan=PLAN3, run_pass=cp.run_pass, gradient=True)
        assert ev.value == ref.value and len(runner.computed) == chunks
        assert cp.stats.batches_written == 0 and cp.stats.passes_ledgered == 0
        assert not (path / "ensembles/sk/p003/passes").exists()  # nothing written yet
        assert not (path / "ensembles/sk/p003/inflight").exists()
    # a kill now loses these passes: the next session computes them again, to the same bits
    with StudyStore.open(path) as store:
        runner = CountingRunner()
        cp = CheckpointedPasses(store.depth("sk", 3, PLAN3), runner)
        again = evaluate(SK, G3, B3, plan=PLAN3, run_pass=cp.run_pass, gradient=True)
        assert again.value == ref.value and np.array_equal(again.gradient["beta"], ref.gradient["beta"])
        assert len(runner.computed) == chunks
        cp.flush()  # what the sweep does when stopped cleanly (or when the interval is reached)
        batches = sorted(p.name for p in (path / "ensembles/sk/p003/passes").iterdir() if p.is_dir())
        assert batches == [L.batch_name(1)]
        assert len([f for f in (path / "ensembles/sk/p003/passes").rglob("*") if f.is_file()]) == 3  # 2 + group
    with StudyStore.open(path) as store:
        runner = CountingRunner()
        cp = CheckpointedPasses(store.depth("sk", 3, PLAN3), runner)
        third = evaluate(SK, G3, B3, plan=PLAN3, run_pass=cp.run_pass, gradient=True)
        assert third.value == ref.value and runner.computed == [] and cp.stats.passes_reused == len(log)


@pytest.mark.parametrize("seconds_per_path, ledger", [(1e-2, True), (1e-9, False)])
def test_a_pass_expected_to_take_the_interval_keeps_a_chunk_ledger(tmp_path, seconds_per_path, ledger):
    inp = _forward_input()
    with new_store(tmp_path, interval_s=1.0) as store:
        cp = CheckpointedPasses(store.depth("sk", 3, PLAN3), CountingRunner())
        cp._rate = (1.0, seconds_per_path)  # as if measured on an earlier pass
        assert (cp.expected_seconds(PLAN3) >= 1.0) is ledger
        cp.run_pass(inp, PLAN3)
        inflight = tmp_path / "unit.zarr/ensembles/sk/p003/inflight"
        assert inflight.exists() is ledger
        assert cp.stats.passes_ledgered == int(ledger)
        # a ledgered pass's sum is written at once; a short one waits for its batch
        assert (tmp_path / "unit.zarr/ensembles/sk/p003/passes").exists() is ledger


def test_policy_flushes_before_a_pass_that_would_exceed_the_interval():
    from leadline.storage import CheckpointPolicy

    policy = CheckpointPolicy(interval_s=30.0)
    assert not policy.flush_before(0.0, 100.0)  # nothing waiting
    assert policy.flush_before(20.0, 15.0) and not policy.flush_before(20.0, 5.0)
    assert policy.flush_after(30.0) and not policy.flush_after(29.9)
    assert not policy.chunk_ledger(100.0, 1)  # one chunk: nothing to save inside the pass
    every = CheckpointPolicy(interval_s=0.0)
    assert every.flush_after(0.0) and every.chunk_ledger(0.0, 2)
    assert CheckpointPolicy.from_spec({"checkpoint": {"interval_s": 5, "keep_passes": True}}) == CheckpointPolicy(5.0, True)
    assert CheckpointPolicy.from_spec({}) == CheckpointPolicy()


def test_time_left_scales_bath_and_sparse_depths_by_their_own_cost_model():
    """`status`'s estimate: a bath depth left is priced from the last finished bath depth (the
    4p + 1 evaluations of a gradient, 1.27x per depth for one evaluation), a sparse depth 4x per
    depth from the last finished sparse depth, never from exact path rates (that priced SK p = 18
    by bath at 1.9e9 hours); a depth with nothing of its kind to measure from makes it unknown."""
    from leadline.storage.reader import _estimate_seconds_left

    spec = {"ensembles": [{"label": "sk", "kind": "dense", "bath": {"from": 3}},
                          {"label": "mc", "kind": "sparse"}]}

    def ens(label, done, todo, running=None):
        return {"label": label, "done": [dict(p=p, wall_time_s=w, method=m) for p, w, m in done],
                "todo": todo, "running": running}

    running_bath = {"p": 4, "paths": 0.0, "bath": {"evaluations_saved": 10, "evaluation_cpu_s": 1.0}}
    sk = ens("sk", [(1, 1.0, "exact"), (2, 2.0, "exact"), (3, 100.0, "bath")], [4, 5], running_bath)
    mc = ens("mc", [(1, 1.0, "exact"), (2, 10.0, "exact")], [3])
    passes = [(1.0, 2.0 ** 5)]  # exact rates: not used for bath or sparse depths
    got = _estimate_seconds_left([sk, mc], [(2, 10, 2.0, 2.0 ** 5)], passes, spec)
    bath4 = 100.0 * 1.27 * 17 / 13 - 10 * 1.0
    bath5 = 100.0 * 1.27 ** 2 * 21 / 13
    assert got == pytest.approx(bath4 + bath5 + 10.0 * 4)
    # nothing of its kind finished yet: unknown, not a partial sum
    assert _estimate_seconds_left([ens("sk", [(1, 1.0, "exact"), (2, 2.0, "exact")], [3])], [], passes, spec) is None
    assert _estimate_seconds_left([ens("mc", [], [1, 2])], [], [], spec) is None


def test_status_of_a_bath_depth_before_its_first_saved_evaluation_uses_the_live_figure():
    """A bath depth whose first batch of evaluations is not yet written: its seconds per evaluation
    come from the optimizer's live progress attribute (was shown as "0.000 CPU s per evaluation"),
    and with no figure at all the status line leaves the figure out."""
    from leadline.storage.reader import _running_info

    live = {"bath_progress": {"value": 0.41, "error_estimate": 1e-7, "gradient_norm": 1e-3,
                              "evaluation_s": 0.25, "evaluations": 3}}
    info = _running_info(3, None, live, writing=True)
    assert info["bath"]["evaluations_saved"] == 0 and info["bath"]["evaluation_cpu_s"] == 0.25
    bare = {"bath_progress": {"value": 0.41, "error_estimate": 1e-7, "gradient_norm": 1e-3}}
    assert _running_info(3, None, bare, writing=True)["bath"]["evaluation_cpu_s"] is None
    from leadline.jobs.commands.sweep import status_text

    def text(running):
        return status_text({"name": "s", "path": "s.zarr", "depths": (1, 3), "lock": None, "complete": False,
                            "estimated_seconds_left": None,
                            "ensembles": [{"label": "sk", "done": [], "todo": [3], "running": running}]})

    assert "0.250 CPU s per evaluation" in text(info)
    bare_line = text(_running_info(3, None, bare, writing=True))
    assert "p = 3 (bath): 0 evaluations saved, best V so far = 0.4100000000" in bare_line
    assert "per evaluation" not in bare_line
