"""Where passes run, as chosen on the command line, with laptop defaults.

Modes
-----
inprocess : every pass in this process, no Dask (small work, tests)
local     : a Dask LocalCluster of worker processes started and stopped by the tool
scheduler : an existing Dask scheduler reached by address (``--scheduler``)
batch     : an HPC batch cluster (SLURM or PBS through dask-jobqueue) described
            by a TOML file (``--cluster-config``); jobs are submitted only in this mode
auto      : in-process until a pass is large enough to pay for a LocalCluster
            (see :data:`AUTO_MIN_PATHS_PER_PASS`), then a LocalCluster for the rest
            of the run
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

from leadline.kernels.plan import DEFAULT_MEMORY_BUDGET, ChunkPlan

from .errors import ExecutorConfigError

__all__ = [
    "MODES",
    "ComputeSettings",
    "usable_cores",
    "worker_memory_limit",
    "AUTO_MIN_PATHS_PER_PASS",
    "AUTO_MIN_CHUNKS",
    "worth_a_cluster",
    "DEFAULT_CONNECT_TIMEOUT_S",
]

MODES = ("auto", "inprocess", "local", "scheduler", "batch")

#: seconds to wait for a scheduler to answer before giving up
DEFAULT_CONNECT_TIMEOUT_S = 10.0

# Switch point of the auto mode (measured on a 2-core x86-64 machine with
# benchmarks/bench_cluster.py; see /work/notes/cluster.md for the numbers):
#   - starting a 2-worker LocalCluster costs ~1.5 s, once per run;
#   - one pass on it costs ~15 ms more than in-process (submit, transfer,
#     ordered reduction);
#   - in-process throughput is ~5e7 paths/s, so a pass of 2^(2p+1) paths
#     takes ~0.17 s at p = 11 and ~0.7 s at p = 12.
# With w workers a pass of T seconds saves about T (1 - 1/w) - overhead; a
# single p = 12 evaluation (12 passes) saves ~12 x 0.33 s = 4 s > 1.5 s of
# start-up on 2 workers, a p = 11 one (11 x 0.07 s) does not.  Hence the
# LocalCluster starts at the first pass with >= 2^25 paths (p >= 12).
AUTO_MIN_PATHS_PER_PASS = 2**25
#: and only when the plan can keep at least two workers busy
AUTO_MIN_CHUNKS = 2

#: memory of a worker process beyond its chunk tasks (interpreter, numpy, distributed)
WORKER_BASE_MEMORY = 384 * 2**20
#: headroom factor on the planner's per-chunk estimate
CHUNK_MEMORY_HEADROOM = 1.5


def usable_cores() -> int:
    """CPU cores this process may use (affinity mask where available)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def worker_memory_limit(memory_budget: int, threads_per_worker: int) -> int:
    """Bytes per worker process: base + threads x budget x headroom."""
    return int(WORKER_BASE_MEMORY + threads_per_worker * memory_budget * CHUNK_MEMORY_HEADROOM)


def worth_a_cluster(plan: ChunkPlan) -> bool:
    """Auto mode: does a pass of this plan justify starting a LocalCluster?"""
    return plan.n_paths >= AUTO_MIN_PATHS_PER_PASS and plan.n_chunks >= AUTO_MIN_CHUNKS


@dataclass(frozen=True)
class ComputeSettings:
    """Everything needed to build an executor (see module docstring for modes).

    Attributes
    ----------
    mode : one of MODES
    scheduler : scheduler address (mode "scheduler"), e.g. "tcp://127.0.0.1:8786"
    workers : worker processes of a LocalCluster (default: usable cores)
    threads_per_worker : threads per worker process (default 1; BLAS stays at 1 per thread)
    memory_budget : bytes of one chunk task; sets the chunk plan and worker memory limits
    batch_config : path of the batch-cluster TOML file (mode "batch")
    quiet : no progress bar
    connect_timeout : seconds to reach a scheduler
    """

    mode: str = "auto"
    scheduler: str | None = None
    workers: int | None = None
    threads_per_worker: int = 1
    memory_budget: int = DEFAULT_MEMORY_BUDGET
    batch_config: Path | None = None
    quiet: bool = False
    connect_timeout: float = DEFAULT_CONNECT_TIMEOUT_S

    def resolved(self) -> "ComputeSettings":
        """Check the combination and fill defaults; raises ExecutorConfigError."""
        mode = self.mode
        if mode not in MODES:
            raise ExecutorConfigError(f"executor must be one of {', '.join(MODES)}, got {mode!r}")
        if self.scheduler is not None and self.batch_config is not None:
            raise ExecutorConfigError("give either a scheduler address or a cluster config file, not both")
        if self.scheduler is not None:
            if mode not in ("auto", "scheduler"):
                raise ExecutorConfigError(f"a scheduler address cannot be combined with executor {mode!r}")
            mode = "scheduler"
        elif self.batch_config is not None:
            if mode not in ("auto", "batch"):
                raise ExecutorConfigError(f"a cluster config file cannot be combined with executor {mode!r}")
            mode = "batch"
        elif mode == "scheduler":
            raise ExecutorConfigError("executor 'scheduler' needs a scheduler address")
        elif mode == "batch":
            raise ExecutorConfigError("executor 'batch' needs a cluster config file")
        if self.workers is not None and self.workers < 1:
            raise ExecutorConfigError(f"number of workers must be >= 1, got {self.workers}")
        if self.threads_per_worker < 1:
            raise ExecutorConfigError(f"threads per worker must be >= 1, got {self.threads_per_worker}")
        if self.memory_budget <= 0:
            raise ExecutorConfigError("memory budget must be positive")
        if not self.connect_timeout > 0:
            raise ExecutorConfigError("connect timeout must be positive")
        workers = self.workers
        if workers is None:
            workers = max(1, usable_cores() // self.threads_per_worker)
        if mode in ("local", "auto"):
            self._check_memory(workers)
        return replace(self, mode=mode, workers=workers)

    def _check_memory(self, workers: int) -> None:
        try:
            import psutil

            total = psutil.virtual_memory().total
        except Exception:  # pragma: no cover - psutil is a dependency
            return
        need = workers * worker_memory_limit(self.memory_budget, self.threads_per_worker)
        if need > 0.9 * total:
            raise ExecutorConfigError(
                f"{workers} workers x {self.threads_per_worker} threads x "
                f"{self.memory_budget / 2**20:.0f} MiB per chunk task need ~{need / 2**30:.1f} GiB, "
                f"more than this machine's {total / 2**30:.1f} GiB; lower --workers or --memory-mb"
            )
