"""Where passes run: in-process, a Dask LocalCluster, a scheduler by address, batch clusters.

The kernels never import Dask; this package supplies their ``run_pass``.
See :mod:`leadline.cluster.executor` for the executor interface and the
store hook (``done=`` / ``on_chunk=``).

The names below are imported on first use (PEP 562), so that importing
``leadline.cluster.settings`` (as the command line does for its options)
does not load the executor machinery.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "CheckpointedPasses": "checkpointed",
    "CheckpointStats": "checkpointed",
    "InProcessChunks": "runners",
    "as_chunk_runner": "runners",
    "AutoExecutor": "executor",
    "BatchConfigError": "errors",
    "ChunkFailure": "errors",
    "ComputeSettings": "settings",
    "DaskExecutor": "executor",
    "Executor": "executor",
    "ExecutorConfigError": "errors",
    "ExecutorError": "errors",
    "InProcessExecutor": "executor",
    "MODES": "settings",
    "ProgressDisplay": "progress",
    "SchedulerUnreachable": "errors",
    "connect_scheduler": "executor",
    "open_executor": "executor",
    "progress_wanted": "progress",
    "start_local_cluster": "executor",
}

__all__ = list(_WHERE)


__getattr__, __dir__ = lazy_names(__name__, _WHERE)
