"""A run_pass that checkpoints: finished passes are cached, the pass in flight has a ledger.

Resume strategy (why a resumed sweep gives the same numbers as an
uninterrupted one, and never recomputes a finished chunk):

* Evaluations are deterministic, and the optimizer (L-BFGS-B, seeded starts)
  is deterministic for fixed inputs, so a depth in progress is simply run
  again from its recorded start.  It asks for the same passes in the same
  order.
* Every pass is named by ``PassInput.fingerprint()`` plus the chunk plan.
  Finished passes (small (2p+2, 2p+1) complex sums) are cached in the store
  and returned at once when the replay asks for them again.
* The pass that was in flight has a ledger of finished chunks with their
  partials, so only the missing chunks are computed.
* The sum is always formed in chunk order 0, 1, 2, ... from the partials
  (exactly as ``kernels.chunks.run_pass_inprocess`` does), so it is bit for
  bit the same however the chunks were scheduled or interrupted.

Executors
---------
A *chunk runner* computes the chunks of one pass that are not yet finished
and reports each as it finishes::

    runner.run_chunks(inp, plan, done, on_chunk)   # done: {k: partial}; on_chunk(k, partial) once per other k

:class:`InProcessChunks` is the in-process one.  :func:`as_chunk_runner`
adapts the executors of ``leadline.cluster`` (whose ``run_pass(inp, plan,
done=..., on_chunk=...)`` is exactly this hook), anything with
``run_chunks``, or a plain ``run_pass(inp, plan)`` callable (then passes are
cached whole, without per-chunk checkpoints).
"""

from __future__ import annotations

import inspect
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from leadline.kernels.chunks import PassInput, chunk_partial, prepare_low_side
from leadline.kernels.iteration import PassIntegrityError, sum_w_tolerance
from leadline.kernels.plan import ChunkPlan

from . import layout as L
from .study import DepthStore

__all__ = ["CheckpointedPasses", "InProcessChunks", "as_chunk_runner", "CheckpointStats"]

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


@dataclass
class CheckpointStats:
    """What the checkpointed run_pass did in this process."""

    passes_requested: int = 0
    passes_from_cache: int = 0
    passes_computed: int = 0
    chunks_computed: int = 0
    chunks_reused: int = 0
    repairs: int = 0
    seconds_in_passes: float = 0.0

    def to_json(self) -> dict:
        return dict(self.__dict__)


class CheckpointedPasses:
    """``run_pass(inp, plan)`` backed by the store: cache, ledger, verified partials.

    Parameters
    ----------
    depth : the :class:`~leadline.storage.study.DepthStore` of the depth being optimized
    executor : None (in process), a chunk runner, or an executor (see :func:`as_chunk_runner`)
    progress : optional callable(event: dict) for status lines
    """

    def __init__(self, depth: DepthStore, executor=None, progress=None):
        self.depth = depth
        self.runner = as_chunk_runner(executor)
        self.progress = progress
        self.stats = CheckpointStats()

    def __call__(self, inp: PassInput, plan: ChunkPlan) -> np.ndarray:
        return self.run_pass(inp, plan)

    def run_pass(self, inp: PassInput, plan: ChunkPlan) -> np.ndarray:
        """Summed partials of all chunks of the pass, in chunk order; shape (2p+2, 2p+1) complex."""
        if plan != self.depth.plan:
            if plan.p < self.depth.plan.p:
                # a smaller step of the growing contour (a quarter of the last step's
                # work or less): recomputed on resume rather than checkpointed
                return self._compute_uncached(inp, plan)
            raise ValueError(f"pass with plan {plan} in a depth record with plan {self.depth.plan}")
        t0 = time.perf_counter()
        self.stats.passes_requested += 1
        key = L.pass_key(inp, plan)
        repairs_before = len(self.depth.repairs)
        try:
            cached = self.depth.cached_pass(key, inp.backward)
            if cached is not None:
                self.stats.passes_from_cache += 1
                return cached
            total = self._compute(inp, plan, key)
            self.stats.passes_computed += 1
            return total
        finally:
            self.stats.repairs += len(self.depth.repairs) - repairs_before
            self.stats.seconds_in_passes += time.perf_counter() - t0

    # ------------------------------------------------------------------ compute
    def _meta(self, inp: PassInput) -> dict:
        return {"fingerprint": inp.fingerprint(), "kind": "backward" if inp.backward else "forward"}

    def _compute(self, inp: PassInput, plan: ChunkPlan, key: str) -> np.ndarray:
        n_chunks = plan.n_chunks
        if getattr(self.runner, "whole_pass_only", False) or n_chunks == 1:
            return self._compute_whole(inp, plan, key)
        inflight = self.depth.inflight(key, self._meta(inp))
        for attempt in (1, 2):
            partials = inflight.verified_partials()
            self.stats.chunks_reused += len(partials)
            missing = [k for k in range(n_chunks) if k not in partials]
            clock = [time.perf_counter()]

            def on_chunk(k: int, part: np.ndarray) -> None:
                if k in partials:
                    raise PassIntegrityError(f"chunk {k} of pass {key} reported twice")
                now = time.perf_counter()
                inflight.record(k, part, int(round((now - clock[0]) * 1e6)))
                clock[0] = now
                partials[k] = part
                self.stats.chunks_computed += 1
                if self.progress is not None:
                    self.progress({"event": "chunk", "key": key, "done": len(partials), "total": n_chunks})

            if missing:
                self.runner.run_chunks(inp, plan, dict(partials), on_chunk)
            lost = [k for k in range(n_chunks) if k not in partials]
            if lost:
                raise PassIntegrityError(f"pass {key}: chunks {lost[:5]} were never reported by the executor")
            total = _sum_in_chunk_order(partials, n_chunks, inp.p)
            problem = _check_total(total, inp)
            if problem is None:
                meta = self._meta(inp)
                meta.update(n_chunks=n_chunks, completions=inflight.completions(), wall_s=inflight.wall_seconds())
                self.depth.store_pass(key, total, meta)
                return total
            self.depth.note_repair("pass recomputed from scratch", key, detail=problem)
            inflight = self.depth.restart_inflight(inflight)
        raise PassIntegrityError(f"pass {key} at p = {inp.p}: {problem} (twice)")

    def _compute_uncached(self, inp: PassInput, plan: ChunkPlan) -> np.ndarray:
        t0 = time.perf_counter()
        if getattr(self.runner, "whole_pass_only", False):
            total = np.asarray(self.runner.run_pass(inp, plan))
        else:
            partials: dict[int, np.ndarray] = {}
            self.runner.run_chunks(inp, plan, {}, lambda k, part: partials.__setitem__(k, part))
            total = _sum_in_chunk_order(partials, plan.n_chunks, inp.p)
        problem = _check_total(total, inp)
        if problem is not None:
            raise PassIntegrityError(f"pass at step p = {inp.p}: {problem}")
        self.stats.passes_requested += 1
        self.stats.passes_computed += 1
        self.stats.chunks_computed += plan.n_chunks
        self.stats.seconds_in_passes += time.perf_counter() - t0
        return total

    def _compute_whole(self, inp: PassInput, plan: ChunkPlan, key: str) -> np.ndarray:
        t0 = time.perf_counter()
        if getattr(self.runner, "whole_pass_only", False):
            total = np.asarray(self.runner.run_pass(inp, plan))
        else:
            partials: dict[int, np.ndarray] = {}
            self.runner.run_chunks(inp, plan, {}, lambda k, part: partials.__setitem__(k, part))
            total = _sum_in_chunk_order(partials, plan.n_chunks, inp.p)
        wall = time.perf_counter() - t0
        problem = _check_total(total, inp)
        if problem is not None:
            raise PassIntegrityError(f"pass {key} at p = {inp.p}: {problem}")
        self.stats.chunks_computed += plan.n_chunks
        meta = self._meta(inp)
        meta.update(n_chunks=plan.n_chunks, completions=[1] * plan.n_chunks, wall_s=wall)
        self.depth.store_pass(key, total, meta, chunks_finished_here=range(plan.n_chunks))
        return total


def _sum_in_chunk_order(partials: dict[int, np.ndarray], n_chunks: int, p: int) -> np.ndarray:
    n = 2 * p + 1
    acc = np.zeros((n + 1, n), dtype=complex)
    for k in range(n_chunks):
        acc += partials[k]
    return acc


def _check_total(total: np.ndarray, inp: PassInput) -> str | None:
    """Invariant check before a pass is trusted or stored (None when sound)."""
    n = 2 * inp.p + 1
    if total.shape != (n + 1, n):
        return f"shape {total.shape}, expected {(n + 1, n)}"
    if not np.all(np.isfinite(total)):
        return "non-finite entries"
    if not inp.backward:
        dev = float(np.max(np.abs(np.diag(total[:n]) - 1.0)))
        if not dev <= sum_w_tolerance(inp.p):
            return f"sum of path weights deviates from 1 by {dev:.3e} (allowed {sum_w_tolerance(inp.p):.1e})"
    return None
