"""Executors on real Dask components (no mocks): LocalClusters of worker processes,
a scheduler and workers started as separate processes on 127.0.0.1, a real SIGKILL.

External anchors:
- SK p = 1 closed form V_1(g, b) = g sin(4b) exp(-2 g^2), so
  dV/dg = (1 - 4 g^2) sin(4b) exp(-2 g^2) and dV/db = 4 g cos(4b) exp(-2 g^2)
  (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), the p = 1 case; SK normalized
  with i<j pairs, xi(x) = x^2/2).
- Every forward pass has sum_a w(a) = 1, i.e. unit diagonal of G (ibid., and Basso,
  Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306, for any mixture xi).
- The in-process executor is the reference of the distributed ones: the same
  chunk partials summed in the same chunk order must give the same numbers.
"""

from __future__ import annotations

import io
import json
import math
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from leadline.cluster import (
    BatchConfigError,
    ChunkFailure,
    ComputeSettings,
    ExecutorConfigError,
    InProcessExecutor,
    ProgressDisplay,
    SchedulerUnreachable,
    connect_scheduler,
    open_executor,
    progress_wanted,
    start_local_cluster,
)
from leadline.cluster.batch import cluster_kwargs, make_batch_cluster, parse_batch_config
from leadline.cluster.mapreduce import batch_chunks
from leadline.cluster.settings import worth_a_cluster, SHIP_MIN_VISITS_ENV, worth_a_round_trip
from leadline.cluster.workerenv import worker_report
from leadline.kernels.exact import (
    PassInput,
    chunk_partial,
    prepare_low_side,
    gamma_vector,
    initial_correlations,
    evaluate,
    plan_chunks,
)
from leadline.kernels.mixture import parse_mixture

# the interpreter running the tests, whatever environment it lives in (no script paths assumed)
DASK_SCHEDULER = [sys.executable, "-m", "distributed.cli.dask_scheduler"]
DASK_WORKER = [sys.executable, "-m", "distributed.cli.dask_worker"]
LEADLINE = [sys.executable, "-m", "leadline"]

MIXED = parse_mixture("2:0.5,3:0.3,4:0.2")
P5_ANGLES = (np.array([0.21, 0.35, 0.42, 0.47, 0.52]), np.array([0.55, 0.44, 0.36, 0.27, 0.15]))
P5_PLAN = plan_chunks(5, n_high=6, rows_per_chunk=2)  # 32 chunks, so every worker gets some


# --------------------------------------------------------------------------- helpers
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _stop(proc: subprocess.Popen) -> None:
    """Stop one process we started (by its own handle), SIGTERM then SIGKILL."""
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)


def _read_json(path: Path):
    """The JSON in ``path``, or None while it is missing or still being written."""
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None


class ProcessCluster:
    """`dask scheduler` and `dask worker` processes on 127.0.0.1 (no nanny: a killed worker stays dead)."""

    def __init__(self, tmp: Path, n_workers: int):
        self.procs: list[subprocess.Popen] = []
        self.workers: list[subprocess.Popen] = []
        env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
        sched_file = tmp / "scheduler.json"
        log = open(tmp / "dask.log", "ab")
        self.log = log
        self.procs.append(
            subprocess.Popen(
                [*DASK_SCHEDULER, "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                 "--scheduler-file", str(sched_file)],
                stdout=log, stderr=log, env=env,
            )
        )
        # wait for the scheduler file the scheduler writes (the limit only guards against a hang)
        deadline = time.monotonic() + 60
        while (info := _read_json(sched_file)) is None:
            if time.monotonic() > deadline or self.procs[0].poll() is not None:
                raise RuntimeError("dask scheduler did not start")
            time.sleep(0.05)
        self.address = info["address"]
        assert self.address.startswith("tcp://127.0.0.1:")
        for _ in range(n_workers):
            w = subprocess.Popen(
                [*DASK_WORKER, self.address, "--nthreads", "1", "--no-nanny", "--host", "127.0.0.1",
                 "--no-dashboard", "--memory-limit", "2GiB"],
                stdout=log, stderr=log, env=env,
            )
            self.procs.append(w)
            self.workers.append(w)

    def wait_for_workers(self, client, n: int) -> None:
        client.wait_for_workers(n, timeout=30)

    def close(self) -> None:
        for proc in reversed(self.procs):
            _stop(proc)
        self.log.close()


def _reference_pass(p: int, n_high: int, seed: int = 0, backward: bool = True):
    """A realistic pass: first-step exponent matrix of SK, optionally with an adjoint matrix."""
    rng = np.random.default_rng(seed)
    g, b = rng.uniform(0.1, 0.5, p), rng.uniform(0.1, 0.5, p)
    gam = gamma_vector(g)
    M = np.outer(gam, gam) * parse_mixture("2:0.5").dxi(initial_correlations(p, b))
    n = 2 * p + 1
    adj = rng.normal(size=(n, n)) + 1j * rng.normal(size=(n, n)) if backward else None
    return PassInput(p, M, b, adj), plan_chunks(p, n_high=n_high, rows_per_chunk=1)


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module", autouse=True)
def ship_every_pass():
    """These tests check where work runs with passes small enough to be fast, so every
    pass is shipped to the workers (by default a pass below 2^25 path visits stays in the
    calling process: test_small_passes_stay_in_the_calling_process)."""
    old = os.environ.get(SHIP_MIN_VISITS_ENV)
    os.environ[SHIP_MIN_VISITS_ENV] = "0"
    yield
    if old is None:
        os.environ.pop(SHIP_MIN_VISITS_ENV, None)
    else:
        os.environ[SHIP_MIN_VISITS_ENV] = old


@pytest.fixture(scope="module")
def local1():
    ex = start_local_cluster(ComputeSettings(mode="local", workers=1))
    yield ex
    ex.close()


@pytest.fixture(scope="module")
def local2():
    ex = start_local_cluster(ComputeSettings(mode="local", workers=2))
    yield ex
    ex.close()


@pytest.fixture(scope="module")
def reference_p5():
    with InProcessExecutor() as ex:
        return evaluate(MIXED, *P5_ANGLES, plan=P5_PLAN, run_pass=ex.run_pass, gradient=True)


@pytest.fixture()
def process_cluster(tmp_path):
    cluster = ProcessCluster(tmp_path, n_workers=2)
    yield cluster
    cluster.close()


# --------------------------------------------------------------------------- same numbers everywhere
def _assert_same(ev, ref):
    assert abs(ev.value - ref.value) <= 1e-12
    for k in ("gamma", "beta"):
        np.testing.assert_allclose(ev.gradient[k], ref.gradient[k], rtol=0, atol=1e-12)


def test_inprocess_executor_matches_kernel_loop(reference_p5):
    # the kernel's own in-process loop (default run_pass) sums the same partials in the same order
    direct = evaluate(MIXED, *P5_ANGLES, plan=P5_PLAN, gradient=True)
    _assert_same(direct, reference_p5)
    assert reference_p5.residuals["sum_w"] < 1e-12


@pytest.mark.parametrize("which", ["local1", "local2"])
def test_local_cluster_same_value_and_gradient(which, request, reference_p5):
    ex = request.getfixturevalue(which)
    assert ex.describe()["workers"] == (1 if which == "local1" else 2)
    ev = evaluate(MIXED, *P5_ANGLES, plan=P5_PLAN, run_pass=ex.run_pass, gradient=True)
    _assert_same(ev, reference_p5)


def test_local_cluster_reproduces_sk_p1_closed_form(local2):
    # Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), p = 1: V_1 = g sin(4b) exp(-2 g^2)
    g, b = 0.37, 0.23
    plan = plan_chunks(1, n_high=2, rows_per_chunk=1)  # 4 chunks of one path pair each
    ev = evaluate(parse_mixture("2:0.5"), [g], [b], plan=plan, run_pass=local2.run_pass, gradient=True)
    e = math.exp(-2 * g * g)
    assert ev.value == pytest.approx(g * math.sin(4 * b) * e, abs=1e-14)
    assert ev.gradient["gamma"][0] == pytest.approx((1 - 4 * g * g) * math.sin(4 * b) * e, abs=1e-13)
    assert ev.gradient["beta"][0] == pytest.approx(4 * g * math.cos(4 * b) * e, abs=1e-13)


def test_external_scheduler_through_cli(process_cluster, reference_p5):
    from distributed import Client

    with Client(process_cluster.address, timeout=10, set_as_default=False) as client:
        process_cluster.wait_for_workers(client, 2)
        # --memory-mib 0.02 gives the plan of P5_PLAN's size class: many chunks
        budget = int(0.02 * 2**20)
        plan = plan_chunks(5, budget)
        assert plan.n_chunks >= 16
        with InProcessExecutor() as ex:
            ref = evaluate(MIXED, *P5_ANGLES, plan=plan, run_pass=ex.run_pass, gradient=True)
        cmd = LEADLINE + [
            "evaluate", "--xi", MIXED.spec(),
            "--gamma", ",".join(repr(float(x)) for x in P5_ANGLES[0]), "--beta", ",".join(repr(float(x)) for x in P5_ANGLES[1]),
            "--gradient", "--json", "--memory-mib", "0.02", "--scheduler", process_cluster.address,
        ]
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        assert out.returncode == 0, out.stderr
        got = json.loads(out.stdout)
        assert got["plan"] == plan.to_json()
        assert abs(got["value"] - ref.value) <= 1e-12
        for k in ("gamma", "beta"):
            np.testing.assert_allclose(got["gradient"][k], ref.gradient[k], rtol=0, atol=1e-12)
        # the work really ran on the external workers: both executed pass tasks
        counts = client.run(lambda dask_worker: sum(
            1 for key in dask_worker.state.log if "leadline-pass" in str(key)))
        assert len(counts) == 2 and all(c > 0 for c in counts.values()), counts


# --------------------------------------------------------------------------- lost work
def test_worker_killed_mid_pass_same_result(process_cluster, tmp_path):
    """A worker killed (SIGKILL) while it holds a task of the pass: the pass still ends with the
    in-process numbers.  The victim is armed to hold at its first task (LEADLINE_HOLD_AT), so
    the kill happens mid-pass by an event, never by timing."""
    import threading

    from leadline.storage.faults import HOLD_ENV, HOLD_FILE_ENV, rearm

    inp, plan = _reference_pass(p=7, n_high=10)  # backward pass, 1024 chunks
    with InProcessExecutor() as ex:
        ref = ex.run_pass(inp, plan)
    ex = connect_scheduler(process_cluster.address, ComputeSettings(scheduler=process_cluster.address).resolved())
    hold = tmp_path / "hold"
    with ex:
        process_cluster.wait_for_workers(ex.client, 2)
        victim_addr = sorted(ex.client.nthreads())[0]
        victim_pid = ex.client.run(rearm, workers=[victim_addr],
                                   **{HOLD_ENV: "chunk-task:1", HOLD_FILE_ENV: str(hold)})[victim_addr]
        victim = {p.pid: p for p in process_cluster.workers}[victim_pid]
        seen: dict[int, int] = {}
        killed = {}

        def kill_when_held():
            while not hold.exists():  # the victim is inside a task: an event, not a delay
                threading.Event().wait(0.01)
            killed.update(chunks_done=len(seen), busy=len(ex.client.processing().get(victim_addr, ())),
                          held=json.loads(hold.read_text()))
            os.kill(victim.pid, signal.SIGKILL)  # a real kill, no clean shutdown
            hold.unlink()

        killer = threading.Thread(target=kill_when_held, daemon=True)
        killer.start()

        def on_chunk(k, partial):
            seen[k] = seen.get(k, 0) + 1

        got = ex.run_pass(inp, plan, on_chunk=on_chunk)
        killer.join(timeout=60)
        assert killed, "the kill never happened"
        assert killed["held"]["pid"] == victim.pid and killed["held"]["point"] == "chunk-task"
        assert victim.wait(timeout=10) == -signal.SIGKILL
        assert killed["chunks_done"] < plan.n_chunks and killed["busy"] > 0
        assert len(ex.client.nthreads()) == 1  # the scheduler saw the worker go
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
    assert sorted(seen) == list(range(plan.n_chunks))  # every chunk reported at least once


def test_repeated_failure_stops_with_chunk_names(local2):
    p = 2
    plan = plan_chunks(p, n_high=3, rows_per_chunk=1)
    bad = PassInput(p, np.zeros((3, 3), dtype=complex), np.array([0.1, 0.2]))  # M must be 5 x 5
    with pytest.raises(ChunkFailure) as info:
        local2.run_pass(bad, plan)
    err = info.value
    assert err.attempts == 3 and err.chunks
    assert "chunk" in str(err) and "failed 3 times" in str(err) and "forward pass at p = 2" in str(err)
    # the cluster is still usable afterwards
    good = PassInput(p, np.zeros((5, 5), dtype=complex), np.array([0.1, 0.2]))
    assert np.allclose(np.diag(local2.run_pass(good, plan)[:5]), 1.0, atol=1e-14)


# --------------------------------------------------------------------------- store hook
@pytest.mark.parametrize("where", ["inprocess", "local2"])
def test_done_and_on_chunk_hook(where, request):
    inp, plan = _reference_pass(p=4, n_high=5)
    low = prepare_low_side(inp, plan)
    partials = {k: chunk_partial(inp, plan, k, low) for k in range(plan.n_chunks)}
    full = np.zeros_like(partials[0])
    for k in range(plan.n_chunks):
        full += partials[k]
    ex = InProcessExecutor() if where == "inprocess" else request.getfixturevalue("local2")
    assert plan.n_chunks == 16  # 2^5 high patterns, half of them with the flip, one row each
    done = {k: partials[k] for k in (0, 3, 4, 5, 11, 15)}
    arrived = []
    got = ex.run_pass(inp, plan, done=done, on_chunk=lambda k, part: arrived.append((k, part)))
    assert sorted(k for k, _ in arrived) == sorted(set(range(plan.n_chunks)) - set(done))
    for k, part in arrived:
        np.testing.assert_array_equal(part, partials[k])
    np.testing.assert_array_equal(got, full)  # bit for bit: same partials, same order
    with pytest.raises(ValueError, match="outside the plan"):
        ex.run_pass(inp, plan, done={plan.n_chunks: partials[0]})


def test_adjoint_batches_are_steered_to_the_forward_worker(local2):
    from leadline.cluster.mapreduce import batch_chunks as batches_of

    inp, plan = _reference_pass(p=4, n_high=5)
    forward = PassInput(inp.p, inp.M, inp.beta)
    ref_f = InProcessExecutor().run_pass(forward, plan)
    ref_b = InProcessExecutor().run_pass(inp, plan)
    np.testing.assert_array_equal(local2.run_pass(forward, plan), ref_f)
    slots = local2.worker_threads()
    hints = [local2.placement.lookup(inp, plan, b) for b in batches_of(range(plan.n_chunks), slots)]
    assert all(h in local2.client.nthreads() for h in hints)  # every adjoint batch has a home
    np.testing.assert_array_equal(local2.run_pass(inp, plan), ref_b)  # a hint never changes numbers


def test_local_cluster_listens_on_loopback_only(local2):
    """Every socket the local cluster listens on (scheduler and workers, comms and HTTP) is
    bound to 127.0.0.1: nothing is exposed on the host's other interfaces."""

    def http_sockets(server):
        http = getattr(server, "http_server", None)
        return [s.getsockname()[0] for s in http._sockets.values()] if http is not None else []

    client = local2.client
    hosts = [client.scheduler.address.split("://")[1].rsplit(":", 1)[0]]
    hosts += list(client.nthreads())  # worker comm addresses
    hosts = [h.split("://")[-1].rsplit(":", 1)[0] for h in hosts]
    hosts += client.run_on_scheduler(lambda dask_scheduler: http_sockets(dask_scheduler))
    for found in client.run(lambda dask_worker: http_sockets(dask_worker)).values():
        hosts += found
    assert len(hosts) >= 3 and set(hosts) == {"127.0.0.1"}, hosts


def test_executor_map_keeps_block_order_on_a_local_cluster(local2):
    """run_map on real worker processes returns results in block order, whatever order the
    blocks finish in: early blocks carry the most work, and both workers take part."""
    sizes = [400, 300, 200, 100, 50, 20, 10, 5] * 2

    def block(n):
        a = np.arange(1.0, n * n + 1).reshape(n, n)
        return n, float(np.trace(a @ a.T)), os.getpid()

    out = local2.run_map(block, sizes)
    assert [n for n, _, _ in out] == sizes
    # trace(A A^T) = sum of squares 1..n^2 = m(m+1)(2m+1)/6 with m = n^2 (common practice)
    for n, value, _ in out:
        m = n * n
        assert value == pytest.approx(m * (m + 1) * (2 * m + 1) / 6, rel=1e-12)
    assert len({pid for _, _, pid in out}) == 2 and os.getpid() not in {pid for _, _, pid in out}


# --------------------------------------------------------------------------- workers and settings
def test_workers_run_single_threaded_blas(local2):
    reports = local2.client.run(worker_report)
    assert len(reports) == 2
    for rep in reports.values():
        assert rep["OPENBLAS_NUM_THREADS"] == "1" and rep["OMP_NUM_THREADS"] == "1"
        assert rep["blas_threads"] == 1  # asked from the loaded OpenBLAS itself


def test_batches_cover_every_chunk_once():
    todo = [k for k in range(1000) if k % 7]
    batches = batch_chunks(todo, slots=3)
    assert [k for b in batches for k in b] == todo
    assert 10 <= len(batches) <= 12
    assert batch_chunks([], 4) == []
    assert batch_chunks([5], 4) == [[5]]


def test_auto_switch_point_and_small_work_stays_inprocess(monkeypatch):
    monkeypatch.delenv(SHIP_MIN_VISITS_ENV)
    # the growing contour's last pass visits 2^(2p) paths with the flip: p >= 15 starts a cluster
    assert not worth_a_cluster(plan_chunks(14))
    assert worth_a_cluster(plan_chunks(15))
    assert not worth_a_round_trip(plan_chunks(12)) and worth_a_round_trip(plan_chunks(14))
    with open_executor(ComputeSettings(mode="auto", quiet=True)) as ex:
        ev = evaluate(parse_mixture("2:0.5"), [0.5], [math.pi / 8], run_pass=ex.run_pass)
        assert ex.describe()["executor"] == "auto (inprocess)"
    # Farhi et al., Quantum 6, 759 (2022): V_1(1/2, pi/8) = 1/sqrt(4e)
    assert ev.value == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-14)


def test_settings_reject_bad_combinations():
    with pytest.raises(ExecutorConfigError):
        ComputeSettings(mode="inprocess", scheduler="127.0.0.1:1").resolved()
    with pytest.raises(ExecutorConfigError):
        ComputeSettings(workers=0).resolved()
    with pytest.raises(ExecutorConfigError, match="GiB"):
        ComputeSettings(mode="local", workers=64, memory_budget=2**34).resolved()
    assert ComputeSettings(scheduler="127.0.0.1:1").resolved().mode == "scheduler"


def test_progress_off_when_quiet_or_not_a_terminal():
    assert not progress_wanted(True)
    assert not progress_wanted(False, stream=io.StringIO())
    disp = ProgressDisplay(True, delay_s=3600)  # counts, never draws in a test
    with InProcessExecutor(progress=disp) as ex:
        inp, plan = _reference_pass(p=3, n_high=4, backward=False)
        ex.run_pass(inp, plan)
        ex.run_pass(inp, plan, done={0: chunk_partial(inp, plan, 0)})
        task = disp._progress.tasks[0]
        assert (task.completed, task.total) == (2 * plan.n_chunks, 2 * plan.n_chunks)


# --------------------------------------------------------------------------- unreachable scheduler
def test_unreachable_scheduler_exits_2(tmp_path):
    port = _free_port()  # closed again: nothing listens there
    out = subprocess.run(
        LEADLINE + ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3927",
                    "--scheduler", f"127.0.0.1:{port}"],
        capture_output=True, text=True, timeout=60, cwd=tmp_path,
    )
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "cannot reach a Dask scheduler" in lines[0], out.stderr
    assert out.stdout == "" and list(tmp_path.iterdir()) == []


def test_silent_listener_times_out_within_the_connect_timeout():
    # something accepts TCP but never speaks the Dask protocol
    with socket.socket() as srv:
        srv.bind(("127.0.0.1", 0))
        srv.listen()
        addr = f"tcp://127.0.0.1:{srv.getsockname()[1]}"
        # the error names the timeout it gave up after (no wall-clock assertion here)
        with pytest.raises(SchedulerUnreachable, match="within 1 s"):
            connect_scheduler(addr, ComputeSettings(scheduler=addr, connect_timeout=1.0).resolved())


# --------------------------------------------------------------------------- batch clusters
OVERNIGHT_SLURM = """
system = "slurm"
jobs = 8
walltime = "10:00:00"
wait-for-workers-s = 3600

[job]
cores = 32
memory = "120GB"
workers = 16
queue = "compute"
account = "proj123"
directives = ["--constraint=cpu"]
setup = ["module load python/3.11"]
"""


def test_batch_config_slurm_job_script(tmp_path):
    import tomllib

    import dask
    import dask_jobqueue  # noqa: F401  (registers the jobqueue config defaults)

    cfg = parse_batch_config(tomllib.loads(OVERNIGHT_SLURM), "overnight.toml")
    assert (cfg.jobs, cfg.processes, cfg.threads_per_worker, cfg.total_threads) == (8, 16, 2, 256)
    # the cluster object starts a real scheduler here: keep it (and its dashboard) on loopback
    with dask.config.set({"jobqueue.slurm.scheduler-options": {"host": "127.0.0.1", "dashboard_address": "127.0.0.1:0"}}):
        cluster = make_batch_cluster(cfg, submit=False)  # builds the job script, submits nothing
    try:
        script = cluster.job_script()
        assert len(cluster.workers) == 0
    finally:
        cluster.close()
    for line in ("#SBATCH -t 10:00:00", "#SBATCH -A proj123", "#SBATCH -p compute", "#SBATCH --constraint=cpu",
                 "export OPENBLAS_NUM_THREADS=1", "module load python/3.11", "--nworkers 16", "--nthreads 2"):
        assert line in script, (line, script)


def test_batch_config_pbs_and_bounds(tmp_path):
    cfg = parse_batch_config({"system": "pbs", "walltime": "1-02:00:00", "job": {"cores": 8}})
    kw = cluster_kwargs(cfg)
    assert kw["walltime"] == "26:00:00" and kw["processes"] == 8 and kw["cores"] == 8
    for bad, match in [
        ({"system": "lsf"}, "system"),
        ({"system": "slurm", "jobs": 10_000}, "jobs"),
        ({"system": "slurm", "walltime": "400:00:00"}, "walltime"),
        ({"system": "slurm", "walltime": "8h"}, "walltime"),
        ({"system": "slurm", "job": {"cpus": 4}}, "unknown"),
        ({"system": "slurm", "job": {"memory": "lots"}}, "memory"),
    ]:
        with pytest.raises(BatchConfigError, match=match):
            parse_batch_config(bad)


def test_cli_batch_mode_refuses_without_submit_command(tmp_path):
    cfg = tmp_path / "overnight.toml"
    cfg.write_text(OVERNIGHT_SLURM)
    (tmp_path / "empty-bin").mkdir()
    env = {**os.environ, "PATH": str(tmp_path / "empty-bin")}  # no sbatch here: nothing can be submitted
    out = subprocess.run(
        LEADLINE + ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3927", "--batch-file", str(cfg)],
        capture_output=True, text=True, timeout=60, env=env,
    )
    assert out.returncode == 2 and "sbatch" in out.stderr and len(out.stderr.strip().splitlines()) == 1
    bad = tmp_path / "bad.toml"
    bad.write_text('system = "slurm"\njobs = 0\n')
    out = subprocess.run(
        LEADLINE + ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3927", "--batch-file", str(bad)],
        capture_output=True, text=True, timeout=60,
    )
    assert out.returncode == 2 and "jobs must be an integer" in out.stderr


def test_small_passes_stay_in_the_calling_process(local2, reference_p5, monkeypatch):
    """With the default threshold the small steps of a growing-contour evaluation never
    pay a round trip; the value and gradient are the same as on the workers."""
    monkeypatch.delenv(SHIP_MIN_VISITS_ENV)
    before = local2.local_passes
    ev = evaluate(MIXED, *P5_ANGLES, plan=P5_PLAN, run_pass=local2.run_pass, gradient=True)
    assert local2.local_passes - before == 10  # p = 5: 5 forward + 5 adjoint passes
    _assert_same(ev, reference_p5)
