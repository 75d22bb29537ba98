"""Errors raised by the executors.

Configuration problems (bad address, bad batch file, impossible memory
settings) are :class:`ExecutorConfigError`, a ``ValueError``: the command line
turns them into one line on stderr and exit code 2 before any work starts.
Failures while a pass runs are :class:`ExecutorError`.
"""

from __future__ import annotations

__all__ = [
    "ExecutorConfigError",
    "SchedulerUnreachable",
    "BatchConfigError",
    "ExecutorError",
    "ChunkFailure",
    "chunk_ranges",
]


class ExecutorConfigError(ValueError):
    """The requested executor cannot be set up as asked (user-fixable)."""


class SchedulerUnreachable(ExecutorConfigError):
    """No Dask scheduler answers at the given address within the connect timeout."""


class BatchConfigError(ExecutorConfigError):
    """The batch-cluster TOML file is missing, malformed or out of bounds."""


class ExecutorError(RuntimeError):
    """A pass could not be completed on the executor."""


class ChunkFailure(ExecutorError):
    """One task (a batch of chunks) failed on every attempt; the run stops.

    Attributes
    ----------
    chunks : list[int], chunk indices of the failed task (ChunkPlan order)
    attempts : int, how many times the task was run
    cause : BaseException or None, the last error seen
    """

    def __init__(self, chunks, attempts: int, cause: BaseException | None, where: str = ""):
        self.chunks = sorted(int(k) for k in chunks)
        self.attempts = int(attempts)
        self.cause = cause
        reason = f"{type(cause).__name__}: {cause}" if cause is not None else "unknown error"
        where = f" of {where}" if where else ""
        super().__init__(
            f"chunk{'s' if len(self.chunks) > 1 else ''} {chunk_ranges(self.chunks)}{where} "
            f"failed {self.attempts} time{'s' if self.attempts != 1 else ''}; last error: {reason}"
        )


def chunk_ranges(chunks) -> str:
    """'0-3, 7, 9-10' for [0, 1, 2, 3, 7, 9, 10]."""
    ks = sorted(set(int(k) for k in chunks))
    parts = []
    i = 0
    while i < len(ks):
        j = i
        while j + 1 < len(ks) and ks[j + 1] == ks[j] + 1:
            j += 1
        parts.append(str(ks[i]) if i == j else f"{ks[i]}-{ks[j]}")
        i = j + 1
    return ", ".join(parts)
