"""The batch path against a real SLURM: jobs submitted through sbatch, Dask workers in them.

Needs a running SLURM whose default partition accepts jobs on this machine; as root,
``scripts/local-slurm.sh`` brings up a single-node one (CI runs it first, see .ci/run).
Without one every test here is skipped with the reason (no silent pass).

Reference values: the in-process executor of the same command (the batch executor sums the
same chunk partials in the same chunk order), and for the sweep the published optimal SK
values of Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), Table 1 (0.3033, 0.4075).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from leadline.storage import open_study

LEADLINE = [sys.executable, "-m", "leadline"]
HOLD_FILE_ENV, HOLD_ENV = "LEADLINE_HOLD_FILE", "LEADLINE_HOLD_AT"
SK_TABLE_1 = {1: 0.3033, 2: 0.4075}  # Quantum 6, 759 (2022), Table 1


def _slurm_unusable() -> str | None:
    """Why SLURM cannot be used here, or None if it can."""
    for tool in ("sbatch", "squeue", "scancel", "sinfo"):
        if shutil.which(tool) is None:
            return f"no `{tool}` on PATH (run scripts/local-slurm.sh as root to bring up a single-node SLURM)"
    try:
        out = subprocess.run(["sinfo", "-h", "-o", "%a %t"], capture_output=True, text=True, timeout=20)
    except subprocess.TimeoutExpired:
        return "sinfo did not answer within 20 s (slurmctld not running?)"
    if out.returncode != 0:
        return f"sinfo failed: {out.stderr.strip() or out.returncode} (slurmctld not running?)"
    states = [line.split() for line in out.stdout.splitlines() if line.strip()]
    if not any(a == "up" and t.rstrip("*~#").startswith(("idle", "mix", "alloc")) for a, t in states):
        return f"no usable SLURM node (sinfo: {out.stdout.strip() or 'empty'})"
    return None


REASON = _slurm_unusable()
pytestmark = pytest.mark.skipif(REASON is not None, reason=f"SLURM not available: {REASON}")


def _jobs(tag: str) -> list[str]:
    """Ids of the queued or running jobs whose comment is ``tag`` (the jobs of this test)."""
    out = subprocess.run(["squeue", "-h", "-o", "%i %k"], capture_output=True, text=True, timeout=20, check=True)
    return [line.split()[0] for line in out.stdout.splitlines() if line.split()[1:] == [tag]]


def _wait_for(condition, what: str, limit_s: float = 120.0, poll_s: float = 0.5):
    """Poll ``condition()`` until it returns something true (a hang guard, not a timing check)."""
    deadline = time.monotonic() + limit_s
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what} after {limit_s:.0f} s")
        time.sleep(poll_s)


@pytest.fixture()
def batch(tmp_path):
    """A batch-cluster file whose jobs carry a unique comment; every such job is cancelled at the end."""
    tag = f"leadline-test-{uuid.uuid4().hex[:12]}"
    config = tmp_path / "slurm.toml"
    config.write_text(
        'system = "slurm"\njobs = 1\nwalltime = "00:15:00"\nwait-for-workers-s = 120\n\n'
        "[job]\ncores = 1\nmemory = \"2GB\"\ninterface = \"lo\"\n"
        f'local-directory = "{tmp_path}"\nlog-directory = "{tmp_path / "logs"}"\n'
        f'directives = ["--comment={tag}"]\n'
    )
    yield config, tag
    left = _jobs(tag)
    if left:
        subprocess.run(["scancel", *left], timeout=30)


# the scheduler of the batch cluster runs in the tool's process: its comms follow the job's
# interface ("lo"), its dashboard is put on loopback too (dask-jobqueue's own config key);
# every pass is shipped to the batch job, however small (by default small passes stay in the
# calling process); and a worker whose scheduler is gone gives up after 15 s instead of
# dask-jobqueue's default 60 s, so the job of a killed sweep leaves the queue sooner
LOOPBACK_ENV = {"DASK_JOBQUEUE__SLURM__SCHEDULER_OPTIONS": '{"dashboard_address": "127.0.0.1:0"}',
                "LEADLINE_SHIP_MIN_VISITS": "0", "DASK_JOBQUEUE__SLURM__DEATH_TIMEOUT": "15"}


def _run(args, env=None, timeout=300):
    env = {**(env or os.environ), **LOOPBACK_ENV}
    return subprocess.run([*LEADLINE, *args], capture_output=True, text=True, timeout=timeout, env=env)


def test_evaluate_on_slurm_matches_in_process(batch):
    config, tag = batch
    args = ["evaluate", "--xi", "2:0.5,3:0.3,4:0.2", "--gamma", "0.21,0.35,0.42,0.47", "--beta", "0.55,0.44,0.3,0.15",
            "--gradient", "--json", "--memory-mib", "0.05", "--quiet"]
    here = _run(args)
    assert here.returncode == 0, here.stderr
    there = _run([*args, "--batch-file", str(config)])
    assert there.returncode == 0, there.stderr
    a, b = json.loads(here.stdout), json.loads(there.stdout)
    assert a["plan"] == b["plan"] and a["plan"]["n_high"] >= 2  # several chunks per pass went to the job
    assert abs(a["value"] - b["value"]) <= 1e-12
    for key in ("gamma", "beta"):
        assert max(abs(x - y) for x, y in zip(a["gradient"][key], b["gradient"][key])) <= 1e-12
    # the run closed its cluster: its job is gone (cancelled by the tool, not by this test)
    _wait_for(lambda: not _jobs(tag), "the evaluate job to leave the queue", limit_s=60)


SPEC = """
[study]
name = "slurm-kill"
store = "{store}"
[depths]
pmin = 1
pmax = 2
[optimizer]
restarts = 0
seed = 0
[compute]
{compute}
memory-mib = 0.004
[checkpoint]
interval-s = 0  # every pass keeps a chunk ledger, so the kill lands mid-pass after chunk records
[[ensemble]]
label = "sk"
xi = "2:0.5"
"""


def test_sweep_killed_on_slurm_resumes_to_in_process_values(batch, tmp_path):
    config, tag = batch
    (tmp_path / "study.toml").write_text(
        SPEC.format(store="batch.zarr", compute=f'executor = "batch"\nbatch-file = "{config}"'))
    (tmp_path / "ref").mkdir()
    (tmp_path / "ref" / "study.toml").write_text(SPEC.format(store="ref.zarr", compute='executor = "inprocess"'))
    ref = _run(["sweep", str(tmp_path / "ref" / "study.toml"), "--quiet"])
    assert ref.returncode == 0, ref.stderr

    hold = tmp_path / "held"
    env = {**os.environ, **LOOPBACK_ENV, HOLD_ENV: "chunk-recorded:6", HOLD_FILE_ENV: str(hold)}
    proc = subprocess.Popen([*LEADLINE, "sweep", str(tmp_path / "study.toml"), "--quiet"], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(lambda: hold.exists() or proc.poll() is not None, "the sweep to reach its 6th recorded chunk")
        assert proc.poll() is None, proc.stderr.read()
        killed_jobs = _jobs(tag)
        assert killed_jobs, "the sweep was mid-pass but had no batch job"
        os.kill(proc.pid, signal.SIGKILL)  # no cleanup: the tool cannot cancel its jobs
        assert proc.wait(timeout=30) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    hold.unlink()
    status = json.loads(_run(["status", str(tmp_path / "batch.zarr"), "--json"]).stdout)
    assert not status["complete"] and not status["lock"]["alive"]

    resumed = _run(["resume", str(tmp_path / "batch.zarr"), "--batch-file", str(config), "--quiet"])
    assert resumed.returncode == 0, resumed.stderr
    got = {d["p"]: d for d in open_study(tmp_path / "batch.zarr").depths("sk")}
    want = {d["p"]: d for d in open_study(tmp_path / "ref" / "ref.zarr").depths("sk")}
    assert sorted(got) == sorted(want) == [1, 2]
    for p in (1, 2):
        assert abs(got[p]["value"] - want[p]["value"]) <= 1e-10
        assert got[p]["value"] == pytest.approx(SK_TABLE_1[p], abs=5e-5)
        assert max(abs(x - y) for x, y in zip(got[p]["gamma"], want[p]["gamma"])) <= 1e-10
    # no job left behind: the killed sweep's job ends once its workers lose their scheduler,
    # the resumed sweep's job is cancelled when it closes its cluster
    _wait_for(lambda: not _jobs(tag), "every job of this test to leave the queue", limit_s=150)
