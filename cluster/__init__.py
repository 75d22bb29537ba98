"""Where passes run: in-process, a Dask LocalCluster, a scheduler by address, batch clusters.

The kernels never import Dask; this package supplies their ``run_pass``.
See :mod:`leadline.cluster.executor` for the executor interface and the
store hook (``done=`` / ``on_chunk=``).
"""

from .errors import BatchConfigError, ChunkFailure, ExecutorConfigError, ExecutorError, SchedulerUnreachable
from .executor import (
    AutoExecutor,
    DaskExecutor,
    Executor,
    InProcessExecutor,
    connect_scheduler,
    open_executor,
    start_local_cluster,
)
from .progress import ProgressDisplay, progress_wanted
from .settings import MODES, ComputeSettings

__all__ = [
    "AutoExecutor",
    "BatchConfigError",
    "ChunkFailure",
    "ComputeSettings",
    "DaskExecutor",
    "Executor",
    "ExecutorConfigError",
    "ExecutorError",
    "InProcessExecutor",
    "MODES",
    "ProgressDisplay",
    "SchedulerUnreachable",
    "connect_scheduler",
    "open_executor",
    "progress_wanted",
    "start_local_cluster",
]
