"""Chunk runners: who computes the chunks of one pass that are not finished yet.

A *chunk runner* computes those chunks and reports each as it finishes::

    runner.run_chunks(inp, plan, done, on_chunk)   # done: {k: partial}; on_chunk(k, partial) once per other k

:class:`InProcessChunks` is the in-process one.  :func:`as_chunk_runner`
adapts the executors of this package (whose ``run_pass(inp, plan, done=...,
on_chunk=...)`` is exactly this hook), anything with ``run_chunks``, or a
plain ``run_pass(inp, plan)`` callable (then passes are cached whole, without
per-chunk checkpoints).  :mod:`.checkpointed` drives a runner for the store.
"""

from __future__ import annotations

import inspect
from typing import Callable

import numpy as np

from leadline.kernels.exact import ChunkPlan, PassInput, chunk_partial, prepare_low_side

__all__ = ["InProcessChunks", "as_chunk_runner", "OnChunk"]

OnChunk = Callable[[int, np.ndarray], None]


class InProcessChunks:
    """Chunk runner in this process; the low side is prepared once per call."""

    def run_chunks(self, inp: PassInput, plan: ChunkPlan, done, on_chunk: OnChunk) -> None:
        todo = [k for k in range(plan.n_chunks) if k not in done]
        if not todo:
            return
        low = prepare_low_side(inp, plan)
        for k in todo:
            on_chunk(k, chunk_partial(inp, plan, k, low))

    def close(self) -> None:
        pass


class _DoneHook:
    """Adapter for an executor whose run_pass takes ``done=`` and ``on_chunk=`` (leadline.cluster)."""

    def __init__(self, executor):
        self.executor = executor

    def run_chunks(self, inp, plan, done, on_chunk):
        self.executor.run_pass(inp, plan, done=dict(done), on_chunk=on_chunk)


class _WholePass:
    """Adapter for a plain run_pass(inp, plan): no per-chunk checkpoints."""

    whole_pass_only = True

    def __init__(self, run_pass):
        self.run_pass = run_pass


def as_chunk_runner(executor):
    """Wrap ``executor`` (None = in process) into a chunk runner (see module docstring)."""
    if executor is None:
        return InProcessChunks()
    if hasattr(executor, "run_chunks"):
        return executor
    run_pass = getattr(executor, "run_pass", executor)
    try:
        params = inspect.signature(run_pass).parameters
    except (TypeError, ValueError):
        params = {}
    if "on_chunk" in params and "done" in params:
        return _DoneHook(executor)
    if callable(run_pass):
        return _WholePass(run_pass)
    raise TypeError(f"cannot use {executor!r} as a pass executor")
