"""The chunked sparse recursion (kernels/sparse/_chunked.py) against the in-memory one.

The reference is the in-memory growing-contour recursion, itself checked against brute-force
statevectors and published values in test_sparse.py.  Here: the same value to 1e-14 when the
step vectors are cut into bands, in value and gradient (in process, out of core in a Zarr folder, on real Dask worker
processes, also when one of them is killed by SIGKILL during a transform), the kill -9 resume
of a checkpointed evaluation (no finished step computed again), and the one-line refusals of
the command line's cost guard.

Published check: MaxCut on 3-regular graphs of large girth at the optimal p = 2 angles of
the optimizer gives 0.7559 (Wurtz, Love, Phys. Rev. A 103, 042612 (2021), table of optimal
cut fractions; also Basso et al., TQC 2022, arXiv:2110.14206, Table 1, truncated to 4 digits).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from leadline.kernels.sparse import BandStore, evaluate_chunked, evaluate_sparse

LEADLINE = [sys.executable, "-m", "leadline"]
# D = 3, q = 2 (MaxCut) and D = 4, q = 3, angles of the size the optimizer finds
CASES = [(2, 3, 9), (3, 4, 8)]


def _angles(p: int, D: float, seed: int):
    rng = np.random.default_rng(seed)
    return rng.uniform(0.2, 1.0, p) / np.sqrt(D), rng.uniform(0.05, 0.7, p)


@pytest.mark.parametrize("q,D,pmax", CASES)
def test_banded_in_process_equals_in_memory(q, D, pmax):
    for p in range(1, pmax + 1):
        g, b = _angles(p, D, 10 * p + q)
        ref = evaluate_sparse(q, D, g, b, gradient=True)
        for target in (4, 7, 22):  # many small bands, a few, one
            got = evaluate_chunked(q, D, g, b, BandStore(), target_bits=target, gradient=p <= 7)
            assert abs(got.value - ref.value) <= 1e-14, (p, target)
            assert got.residuals["sum_fH"] <= 1e-13
            if p <= 7:
                _same_gradient(got, ref)


def _same_gradient(got, ref):
    for k in ("gamma", "beta"):
        np.testing.assert_allclose(got.gradient[k], ref.gradient[k], rtol=0, atol=1e-14)


def _zarr_store(tmp_path, exchange, target=12, client=None):
    """exchange "local": the out-of-core store of this process (direct chunk-file I/O); "disk" and
    "rechunk": the Dask one, exchanging through the folder or by Dask's rechunk."""
    from leadline.cluster.sparse_vectors import LocalBandStore, ZarrBandStore
    from leadline.storage.sparse_scratch import SparseScratch

    scratch = SparseScratch.open(tmp_path / f"scratch-{exchange}", {"test": exchange})
    if exchange == "local":
        return LocalBandStore(scratch, target_bits=target)
    return ZarrBandStore(scratch, target_bits=target, client=client, exchange=exchange)


@pytest.mark.parametrize("exchange,q,D,p", [("local", 2, 3, 6), ("local", 3, 4, 5), ("rechunk", 2, 3, 6), ("disk", 3, 4, 5)])
def test_zarr_store_equals_in_memory(tmp_path, q, D, p, exchange):
    from leadline.kernels.sparse import reverse_stage

    g, b = _angles(p, D, 7)
    ref = evaluate_sparse(q, D, g, b, gradient=True)
    store = _zarr_store(tmp_path, exchange, target=10)
    got = evaluate_chunked(q, D, g, b, store, target_bits=10, gradient=True)
    assert abs(got.value - ref.value) <= 1e-14
    _same_gradient(got, ref)
    assert store.scratch.finished()[0] == reverse_stage(p, 3)  # every step and reverse stage recorded
    assert [f.name for f in (store.scratch.path / "vectors.zarr").iterdir()] == ["zarr.json"]  # nothing left


def test_out_of_core_vectors_are_zarr_arrays(tmp_path):
    """The out-of-core store writes the chunk files itself; plain zarr reads the same numbers back
    (zarr-python, the reference implementation of the Zarr v3 format)."""
    import zarr

    store = _zarr_store(tmp_path, "local", target=10)
    x = np.random.default_rng(1).standard_normal(1 << 13) + 1j * np.random.default_rng(2).standard_normal(1 << 13)
    store.put("v", x)
    store.transform("w", lambda band, i: 2.0 * band, "v", 13, 4)  # 4 bands, each written as its chunk files
    arr = zarr.open_array(str(store.scratch.path / "vectors.zarr" / "w"), mode="r")
    assert arr.chunks != arr.shape
    np.testing.assert_array_equal(np.asarray(arr[...]).reshape(-1), 2.0 * x)
    np.testing.assert_array_equal(store.get("w"), 2.0 * x)
    store.close()


def test_worker_killed_during_a_transform_same_value(tmp_path, monkeypatch):
    """Two real `dask worker` processes (no nanny); the first worker to start its 3rd row-band
    task holds there (LEADLINE_HOLD_AT), gets SIGKILL, and Dask reruns its work on the other."""
    from distributed import Client

    from leadline.tests.test_cluster import ProcessCluster

    q, D, p = 2, 3, 6
    g, b = _angles(p, D, 3)
    ref = evaluate_sparse(q, D, g, b, gradient=True)
    hold = tmp_path / "hold.json"
    monkeypatch.setenv("LEADLINE_HOLD_AT", "sparse-band-task:3")
    monkeypatch.setenv("LEADLINE_HOLD_FILE", str(hold))
    cluster = ProcessCluster(tmp_path, n_workers=2)
    monkeypatch.delenv("LEADLINE_HOLD_AT")  # this process only runs the client
    try:
        with Client(cluster.address, timeout=30) as client:
            cluster.wait_for_workers(client, 2)
            store = _zarr_store(tmp_path, "rechunk", target=10, client=client)
            # left to choose, the store exchanges through the folder: every worker is on this machine
            assert type(store)(store.scratch, target_bits=10, client=client).exchange_for(10) == "disk"
            killed = {}
            stop = threading.Event()

            def kill_when_held():
                while not stop.is_set():
                    held = _read_json(hold)
                    if held is None:
                        time.sleep(0.01)
                        continue
                    if not killed:
                        victim = next(w for w in cluster.workers if w.pid == held["pid"])
                        os.kill(victim.pid, signal.SIGKILL)  # a real kill in the middle of a transform
                        killed["code"] = victim.wait(timeout=10)
                    hold.unlink()  # the survivor may hold at its own 3rd task too: let it go

            t = threading.Thread(target=kill_when_held)
            t.start()
            try:
                got = evaluate_chunked(q, D, g, b, store, target_bits=10, gradient=True)
            finally:
                stop.set()
                t.join(timeout=60)
            assert killed.get("code") == -signal.SIGKILL
            assert len(client.nthreads()) == 1  # the scheduler saw the worker go
    finally:
        cluster.close()
    assert abs(got.value - ref.value) <= 1e-14
    _same_gradient(got, ref)


def _read_json(path: Path):
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None


def _evaluate_cli(tmp_path, p, scratch, env_extra=None, extra=()):
    g, b = _angles(p, 3, 5)
    args = ["evaluate", "--sparse-q", "2", "--degree", "3", "--gamma", ",".join(repr(float(x)) for x in g), "--beta",
            ",".join(repr(float(x)) for x in b), "--json", *(["--scratch", str(scratch)] if scratch else []), *extra]
    env = {**os.environ, **(env_extra or {})}
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, timeout=300, cwd=tmp_path, env=env)


def test_kill_9_during_checkpointed_evaluation_resumes_without_recomputing(tmp_path):
    p = 7
    scratch = tmp_path / "scratch"
    audit = tmp_path / "audit.txt"
    env = {"LEADLINE_CHUNK_AUDIT": str(audit)}
    first = _evaluate_cli(tmp_path, p, scratch, {**env, "LEADLINE_CRASH_AT": "sparse-step-finished:3"})
    assert first.returncode == -signal.SIGKILL, first.stderr
    assert json.loads((scratch / "progress.json").read_text())["step"] == 4  # steps 2, 3, 4 recorded
    second = _evaluate_cli(tmp_path, p, scratch, env)
    assert second.returncode == 0, second.stderr
    assert "resuming after step 4" in second.stderr
    assert "step 5/7 done" in second.stderr and "step 4/7 done" not in second.stderr
    g, b = _angles(p, 3, 5)  # the angles of _evaluate_cli
    assert json.loads(second.stdout)["value"] == pytest.approx(evaluate_sparse(2, 3, g, b).value, abs=1e-14)
    steps = audit.read_text().split()[1::2]
    assert sorted(map(int, steps)) == list(range(2, p + 1))  # every step recorded once over both runs
    assert not scratch.exists()  # removed after success


def test_kill_9_while_the_root_overwrites_the_last_step_in_place(tmp_path):
    """Out of core the root's transform overwrites the last step's vector band by band (no room for a
    second copy of the largest vector); killed after it wrote a band, the run resumes at that step
    (its input is kept until the root is done) and gives the same value."""
    p = 7
    scratch = tmp_path / "scratch"
    # one band per transform at p = 7: steps 3..7 write 10 bands, the root's transform the 11th
    first = _evaluate_cli(tmp_path, p, scratch, {"LEADLINE_CRASH_AT": "sparse-band-written:11"})
    assert first.returncode == -signal.SIGKILL, first.stderr
    assert "step 7/7 done" in first.stderr
    assert json.loads((scratch / "progress.json").read_text())["step"] == 6
    second = _evaluate_cli(tmp_path, p, scratch)
    assert second.returncode == 0, second.stderr
    assert "resuming after step 6" in second.stderr and "step 7/7 done" in second.stderr
    g, b = _angles(p, 3, 5)  # the angles of _evaluate_cli
    assert json.loads(second.stdout)["value"] == pytest.approx(evaluate_sparse(2, 3, g, b).value, abs=1e-14)
    assert not scratch.exists()


def test_kill_9_during_the_reverse_sweep_resumes_without_recomputing(tmp_path):
    """The gradient's reverse sweep is checkpointed stage by stage like the forward steps: killed
    after its second stage (the root's adjoint, then step 7), the resumed run computes only the
    stages after it and gives the uninterrupted gradient."""
    from leadline.kernels.sparse import reverse_stage

    p = 7
    scratch = tmp_path / "scratch"
    audit = tmp_path / "audit.txt"
    env = {"LEADLINE_CHUNK_AUDIT": str(audit)}
    # finish calls: steps 2..7 (6), the root (7th), the root's adjoint (8th), reverse step 7 (9th)
    first = _evaluate_cli(tmp_path, p, scratch, {**env, "LEADLINE_CRASH_AT": "sparse-step-finished:9"}, ["--gradient"])
    assert first.returncode == -signal.SIGKILL, first.stderr
    assert json.loads((scratch / "progress.json").read_text())["step"] == reverse_stage(p, 7)
    second = _evaluate_cli(tmp_path, p, scratch, env, ["--gradient"])
    assert second.returncode == 0, second.stderr
    assert "resuming after reverse sweep step 7" in second.stderr
    assert "reverse sweep: step 6 done" in second.stderr
    assert "reverse sweep: step 7 done" not in second.stderr and "step 7/7 done" not in second.stderr
    stages = sorted(map(int, audit.read_text().split()[1::2]))
    assert stages == list(range(2, reverse_stage(p, 3) + 1))  # every checkpoint written once over both runs
    g, b = _angles(p, 3, 5)  # the angles of _evaluate_cli
    here = evaluate_sparse(2, 3, g, b, gradient=True)
    got = json.loads(second.stdout)
    assert got["value"] == pytest.approx(here.value, abs=1e-14)
    for k in ("gamma", "beta"):
        np.testing.assert_allclose(got["gradient"][k], here.gradient[k], rtol=0, atol=1e-14)
    assert not scratch.exists()


def test_scratch_on_a_local_cluster_from_the_command_line(tmp_path):
    """`evaluate --scratch DIR --executor local`: the vectors on two Dask worker processes (exchange
    through DIR, the local-cluster default), value and gradient equal to the in-memory recursion."""
    p = 6
    r = _evaluate_cli(tmp_path, p, tmp_path / "scratch", None, ["--gradient", "--executor", "local", "--workers", "2"])
    assert r.returncode == 0, r.stderr
    assert "sparse path = on the Dask workers" in r.stderr
    g, b = _angles(p, 3, 5)  # the angles of _evaluate_cli
    here = evaluate_sparse(2, 3, g, b, gradient=True)
    got = json.loads(r.stdout)
    assert got["value"] == pytest.approx(here.value, abs=1e-14)
    for k in ("gamma", "beta"):
        np.testing.assert_allclose(got["gradient"][k], here.gradient[k], rtol=0, atol=1e-14)
    assert not (tmp_path / "scratch").exists()


def _refused(r, words):
    assert r.returncode == 2, (r.returncode, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and words in lines[0], r.stderr
    assert r.stdout == ""


def test_refusals_before_any_work(tmp_path):
    # too deep for the disk: 3 x 2^39 x 16 bytes (24 TiB) at p = 20
    r = _evaluate_cli(tmp_path, 20, tmp_path / "big")
    _refused(r, "GiB free")
    assert not (tmp_path / "big").exists()
    # a folder that holds something else, and a folder of another evaluation
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "notes.txt").write_text("mine")
    _refused(_evaluate_cli(tmp_path, 4, tmp_path / "other"), "other files")
    (tmp_path / "prev").mkdir()
    (tmp_path / "prev" / "fingerprint.json").write_text('{"kind": "leadline-sparse-scratch", "q": 9}')
    _refused(_evaluate_cli(tmp_path, 4, tmp_path / "prev"), "another sparse evaluation")
    assert sorted(os.listdir(tmp_path / "prev")) == ["fingerprint.json"]
    # --scratch is for the sparse ensembles
    r = subprocess.run([*LEADLINE, "evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", "--scratch", "x"],
                       capture_output=True, text=True, timeout=120, cwd=tmp_path)
    _refused(r, "sparse ensembles")


@pytest.mark.parametrize("fs", ["read-only", "full"])
def test_read_only_or_full_scratch_folder(tmp_path, fs):
    """A read-only bind mount and a 1 MiB tmpfs in a private mount namespace (util-linux unshare;
    as root, permissions alone do not make a folder read-only)."""
    if os.geteuid() != 0 or shutil.which("unshare") is None:
        pytest.skip("needs root and util-linux unshare for a private mount")
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    mount = (f"mount --bind {mnt} {mnt} && mount -o remount,ro,bind {mnt}" if fs == "read-only"
             else f"mount -t tmpfs -o size=1m tmpfs {mnt}")
    g, b = _angles(9, 3, 1)  # p = 9: 3 x 2^17 x 16 bytes = 6 MiB of scratch
    cmd = [*LEADLINE, "evaluate", "--sparse-q", "2", "--degree", "3", "--gamma", ",".join(repr(float(x)) for x in g),
           "--beta", ",".join(repr(float(x)) for x in b), "--scratch", f"{mnt}/s"]
    script = f"{mount} && " + " ".join(f"'{a}'" for a in cmd) + f"; rc=$?; ls -A {mnt}; exit $rc"
    r = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=120)
    _refused(r, "not writable" if fs == "read-only" else "GiB free")


def test_sweep_refuses_a_sparse_depth_that_fits_nowhere(tmp_path):
    # the memory check pretends a 5 kB machine (LEADLINE_SPARSE_MEMORY_BYTES); p = 20 needs 48 TiB of scratch
    (tmp_path / "s.toml").write_text('[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmax = 20\n'
                                     '[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2\ndegree = 3\n')
    env = {**os.environ, "LEADLINE_SPARSE_MEMORY_BYTES": "5000"}
    r = subprocess.run([*LEADLINE, "sweep", "s.toml", "--quiet"], capture_output=True, text=True, timeout=120,
                       cwd=tmp_path, env=env)
    _refused(r, "GiB free")
    assert sorted(os.listdir(tmp_path)) == ["s.toml"]  # no store, no scratch folder


CHUNKED_SWEEP = ('[study]\nname = "t"\nstore = "s.zarr"\n[depths]\npmin = 3\npmax = 3\n[optimizer]\nrestarts = 0\n'
                 'max-iterations = 2\n[compute]\nexecutor = "inprocess"\n[checkpoint]\ninterval-s = 0\n'
                 '[[ensemble]]\nlabel = "mc"\nkind = "sparse"\nq = 2\ndegree = 3\n')


def _chunked_sweep(folder: Path, command: list[str], **extra):
    # the memory check pretends a 1 kB machine (LEADLINE_SPARSE_MEMORY_BYTES): p = 3 runs chunked out of core
    env = {**os.environ, "LEADLINE_SPARSE_MEMORY_BYTES": "1000", **extra}
    if "LEADLINE_CRASH_AT" not in extra:
        env.pop("LEADLINE_CRASH_AT", None)
    return subprocess.run([*LEADLINE, *command], capture_output=True, text=True, timeout=300, cwd=folder, env=env)


def test_sweep_killed_inside_a_chunked_evaluation_resumes_it_and_its_saved_evaluations(tmp_path):
    """A sweep's sparse depth on chunked vectors (p = 3 out of core, two optimizer iterations),
    kill -9 in the middle of its second evaluation: resume reads the first evaluation back from the
    store, continues the second from its last finished step in the scratch folder (no step of
    either computed again: the audit file) and ends with the uninterrupted sweep's bits."""
    (tmp_path / "ref").mkdir()
    (tmp_path / "ref" / "s.toml").write_text(CHUNKED_SWEEP)
    ref_audit = tmp_path / "ref-audit.txt"
    ref = _chunked_sweep(tmp_path / "ref", ["sweep", "s.toml", "--quiet"], LEADLINE_CHUNK_AUDIT=str(ref_audit))
    assert ref.returncode == 0, ref.stderr
    stages = [line for line in ref_audit.read_text().splitlines() if line.startswith("sparse-step ")]
    evaluations = [line for line in ref_audit.read_text().splitlines() if not line.startswith("sparse-step ")]
    assert len(evaluations) >= 2 and len(stages) % len(evaluations) == 0
    per_evaluation = len(stages) // len(evaluations)

    (tmp_path / "s.toml").write_text(CHUNKED_SWEEP)
    audit = tmp_path / "audit.txt"
    first = _chunked_sweep(tmp_path, ["sweep", "s.toml"], LEADLINE_CHUNK_AUDIT=str(audit),
                           LEADLINE_CRASH_AT=f"sparse-step-finished:{per_evaluation + 2}")
    assert first.returncode == -signal.SIGKILL, first.stderr
    second = _chunked_sweep(tmp_path, ["resume", "s.zarr"], LEADLINE_CHUNK_AUDIT=str(audit))
    assert second.returncode == 0, second.stderr
    assert "resuming after" in second.stderr
    assert "evaluations, 1 reused," in second.stdout.splitlines()[0], second.stdout
    lines = audit.read_text().splitlines()
    assert sorted(lines) == sorted(ref_audit.read_text().splitlines())  # every stage and evaluation once
    want = json.loads((tmp_path / "ref" / "s.zarr" / "ensembles" / "mc" / "p003" / "zarr.json").read_text())
    got = json.loads((tmp_path / "s.zarr" / "ensembles" / "mc" / "p003" / "zarr.json").read_text())
    for key in ("value", "gamma", "beta", "history"):
        assert got["attributes"]["result"][key] == want["attributes"]["result"][key], key
    assert not (tmp_path / "s.zarr.sparse-scratch").exists()  # removed after the depth
