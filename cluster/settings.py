"""Where passes run, as chosen on the command line, with laptop defaults.

Modes
-----
inprocess : every pass in this process, no Dask (small work, tests)
local     : a Dask LocalCluster of worker processes started and stopped by the tool
scheduler : an existing Dask scheduler reached by address (``--scheduler``)
batch     : an HPC batch cluster (SLURM or PBS through dask-jobqueue) described
            by a TOML file (``--batch-file``); jobs are submitted only in this mode
auto      : in-process until a pass is large enough to pay for a LocalCluster
            (see :data:`AUTO_MIN_PATHS_PER_PASS`), then a LocalCluster for the rest
            of the run
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

from leadline.kernels.exact import DEFAULT_MEMORY_BUDGET, ChunkPlan

from .errors import ExecutorConfigError

__all__ = [
    "MODES",
    "ComputeSettings",
    "usable_cores",
    "worker_memory_limit",
    "AUTO_MIN_PATHS_PER_PASS",
    "AUTO_MIN_CHUNKS",
    "worth_a_cluster",
    "idle_cores",
    "auto_workers",
    "DEFAULT_CONNECT_TIMEOUT_S",
]

MODES = ("auto", "inprocess", "local", "scheduler", "batch")

#: seconds to wait for a scheduler to answer before giving up
DEFAULT_CONNECT_TIMEOUT_S = 10.0

# Switch point of the auto mode, measured with benchmarks/bench_cluster.py on
# the 2-vCPU development machine (docs/performance.md, "Cluster overhead"):
#   - starting a 2-worker LocalCluster: 1.3-2.3 s, once per run;
#   - per-pass overhead of the LocalCluster (p = 6, where the work is ~1.4 ms):
#     17-24 ms per pass (submit, transfer, ordered reduction);
#   - the kernel visits about 1.4e9 paths per second and core.
# With the growing contour and the flip one evaluation visits (4/3) 4^p paths,
# almost all in its last two steps: ~0.26 s at p = 14, ~1 s at p = 15, ~4 s at
# p = 16 on one core.  On w free cores the saving is about T (1 - 1/w) minus the
# per-pass overhead, so a run whose largest pass visits >= 2^30 paths (step 15
# with the flip) repays the start-up within its first evaluations; smaller runs
# stay in-process.  The LocalCluster starts at the first such pass with >= 2
# chunks.
# The saving needs FREE cores: with the machine's other work at a load average of
# ~5.5 on 2 vCPUs, two concurrent chunk computations each ran 1.5-2x slower and
# the 2-worker cluster lost to in-process at every depth measured.  So auto also
# requires >= 2 idle cores (cores minus the 1-minute load average, counting this
# process as idle) and gives the LocalCluster only that many workers unless
# --workers says otherwise.
AUTO_MIN_PATHS_PER_PASS = 2**30
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


def product_cache_bytes() -> int:
    """Bytes of the blocked kernel's per-process memo of forward products (kernels/exact/_blocked.py).

    Both tapes: $LEADLINE_PRODUCT_CACHE_MB (default 384 MiB) + $LEADLINE_COLUMN_CACHE_MB (256).
    """
    from leadline.kernels.exact import tape_capacity_bytes

    return tape_capacity_bytes()


def worker_memory_limit(memory_budget: int, threads_per_worker: int) -> int:
    """Bytes per worker process: base + kernel memo + threads x budget x headroom.

    Dask pauses a worker at 80 % of this and restarts it at 95 %, so it must
    cover the peak, not the average.
    """
    return int(WORKER_BASE_MEMORY + product_cache_bytes() + threads_per_worker * memory_budget * CHUNK_MEMORY_HEADROOM)


#: A pass that visits fewer paths than this runs in the calling process even when a
#: Dask cluster is in use.  Measured on the development machine (2 vCPUs): one
#: LocalCluster round trip costs 17-24 ms per pass (submit, transfer, ordered
#: reduction), while the kernel visits about 1.4e9 paths per second and core, so a
#: pass of 2^25 visits (~24 ms, step 13 of the growing contour with the flip) is
#: where shipping starts to pay on two workers.  The small steps of the growing
#: contour (all but the last two or three of an evaluation) stay local.
MIN_VISITS_PER_SHIPPED_PASS = 2**25


#: development switch: another threshold (0 ships every pass; the cluster tests use it
#: to exercise the workers with passes small enough to be fast)
SHIP_MIN_VISITS_ENV = "LEADLINE_SHIP_MIN_VISITS"


def worth_a_round_trip(plan: ChunkPlan) -> bool:
    """Is a pass of this plan large enough to send to Dask workers at all?"""
    try:
        threshold = int(os.environ.get(SHIP_MIN_VISITS_ENV, MIN_VISITS_PER_SHIPPED_PASS))
    except ValueError:
        threshold = MIN_VISITS_PER_SHIPPED_PASS
    if threshold <= 0:
        return True
    return plan.path_visits >= threshold and plan.n_chunks >= AUTO_MIN_CHUNKS


def worth_a_cluster(plan: ChunkPlan) -> bool:
    """Auto mode: is a pass of this plan large enough to repay starting a LocalCluster?"""
    return plan.path_visits >= AUTO_MIN_PATHS_PER_PASS and plan.n_chunks >= AUTO_MIN_CHUNKS


def idle_cores() -> int:
    """Cores not busy with other work: usable cores - 1-minute load + 1 (this process)."""
    cores = usable_cores()
    try:
        load = os.getloadavg()[0]
    except (AttributeError, OSError):
        return cores
    return max(0, min(cores, int(cores - load + 1 + 0.5)))


def auto_workers(settings: "ComputeSettings") -> int:
    """Workers for the auto mode's LocalCluster, or 0 to stay in-process (fewer than 2 idle cores).

    An explicit --workers is honoured as is.
    """
    if settings.workers_given:
        return int(settings.workers)
    idle = idle_cores() // max(1, settings.threads_per_worker)
    return idle if idle >= 2 else 0


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
    batch_file : path of the batch-cluster TOML file (mode "batch")
    quiet : no progress bar
    connect_timeout : seconds to reach a scheduler
    workers_given : True when the user chose the worker count (set by :meth:`resolved`)
    """

    mode: str = "auto"
    scheduler: str | None = None
    workers: int | None = None
    threads_per_worker: int = 1
    memory_budget: int = DEFAULT_MEMORY_BUDGET
    batch_file: Path | None = None
    quiet: bool = False
    connect_timeout: float = DEFAULT_CONNECT_TIMEOUT_S
    workers_given: bool = False

    def resolved(self) -> "ComputeSettings":
        """Check the combination and fill defaults; raises ExecutorConfigError."""
        mode = self.mode
        if mode not in MODES:
            raise ExecutorConfigError(f"executor must be one of {', '.join(MODES)}, got {mode!r}")
        if self.scheduler is not None and self.batch_file is not None:
            raise ExecutorConfigError("give either a scheduler address or a batch file, not both")
        if self.scheduler is not None:
            if mode not in ("auto", "scheduler"):
                raise ExecutorConfigError(f"a scheduler address cannot be combined with executor {mode!r}")
            mode = "scheduler"
        elif self.batch_file is not None:
            if mode not in ("auto", "batch"):
                raise ExecutorConfigError(f"a batch file cannot be combined with executor {mode!r}")
            mode = "batch"
        elif mode == "scheduler":
            raise ExecutorConfigError("executor 'scheduler' needs a scheduler address")
        elif mode == "batch":
            raise ExecutorConfigError("executor 'batch' needs a batch file")
        if self.workers is not None and self.workers < 1:
            raise ExecutorConfigError(f"number of workers must be >= 1, got {self.workers}")
        if self.threads_per_worker < 1:
            raise ExecutorConfigError(f"threads per worker must be >= 1, got {self.threads_per_worker}")
        if self.memory_budget <= 0:
            raise ExecutorConfigError("memory budget must be positive")
        if not self.connect_timeout > 0:
            raise ExecutorConfigError("connect timeout must be positive")
        workers = self.workers
        given = self.workers_given or workers is not None
        if workers is None:
            workers = max(1, usable_cores() // self.threads_per_worker)
        if mode in ("local", "auto"):
            self._check_memory(workers)
        return replace(self, mode=mode, workers=workers, workers_given=given)

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
                f"more than this machine's {total / 2**30:.1f} GiB; lower --workers or --memory-mib"
            )
