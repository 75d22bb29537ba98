"""A run_pass that checkpoints: finished passes are written in batches, long passes keep a ledger.

Resume strategy (why a resumed sweep gives the same numbers as an
uninterrupted one, and never recomputes a finished chunk):

* Evaluations are deterministic, and the optimizer (L-BFGS-B, seeded starts)
  is deterministic for fixed inputs, so a depth in progress is simply run
  again from its recorded start.  It asks for the same passes in the same
  order.
* Every pass is named by ``PassInput.fingerprint()`` (which covers the
  step's depth, M, beta and the adjoint) plus the whole chunk plan.  Finished
  passes (small (2m+2, 2m+1) complex sums) are written in batches (see
  storage/policy.py) and returned at once when the replay asks for them
  again; passes computed after the last batch was written are computed again
  (the same bits: the same plan, the same chunk order).
* A pass long enough to keep a ledger has its finished chunks on disk with
  their partials, so only the missing chunks are computed.
* The sum is always formed in chunk order 0, 1, 2, ... from the partials
  (exactly as ``kernels.exact.run_pass_inprocess`` does), so it is bit for
  bit the same however the chunks were scheduled or interrupted.

This module is the one place where a store and an executor meet: the store
(:class:`leadline.storage.DepthStore`) persists passes, ledgers and batches;
the chunk runner (:mod:`leadline.cluster.runners`: in process, or any executor
of this package) computes chunks; :class:`CheckpointedPasses` decides, pass by
pass, what is read back, what is computed where, and what is written when
(the policy of ``[checkpoint]``, :mod:`leadline.storage.policy`).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from leadline.kernels.exact import ChunkPlan, PassInput, PassIntegrityError, PassRangeError, pass_exponent_bound, sum_w_tolerance
from leadline.storage import DepthStore
from leadline.storage import layout as L
from leadline.storage.faults import crash_point
from leadline.storage.policy import DEFAULT_SECONDS_PER_PATH

from .runners import as_chunk_runner

__all__ = ["CheckpointedPasses", "CheckpointStats"]


@dataclass
class CheckpointStats:
    """What the checkpointed run_pass did in this process."""

    passes_requested: int = 0
    #: passes found in the store that an earlier session computed (a resumed depth)
    passes_reused: int = 0
    #: passes asked for again after this session computed them (the optimizer revisiting a point)
    passes_repeated: int = 0
    passes_computed: int = 0
    chunks_computed: int = 0
    chunks_reused: int = 0
    repairs: int = 0
    passes_ledgered: int = 0
    batches_written: int = 0
    seconds_in_passes: float = 0.0
    seconds_writing: float = 0.0
    cpu_writing_s: float = 0.0

    def to_json(self) -> dict:
        return dict(self.__dict__)


class CheckpointedPasses:
    """``run_pass(inp, plan)`` backed by the store: batches, ledger, verified partials.

    Any plan is accepted (each step of an evaluation may have its own); a pass
    is keyed by its input's fingerprint (which includes the step's depth) and
    the whole plan, so passes of different steps, plans or inputs never mix.

    Parameters
    ----------
    depth : the :class:`~leadline.storage.study.DepthStore` of the depth being optimized
    executor : None (in process), a chunk runner, or an executor (see :func:`as_chunk_runner`)
    progress : optional callable(event: dict) for status lines
    """

    def __init__(self, depth: DepthStore, executor=None, progress=None):
        self.depth = depth
        self.policy = depth.policy
        self.runner = as_chunk_runner(executor)
        self.progress = progress
        self.stats = CheckpointStats()
        self._rate: tuple[float, float] | None = None  # (paths, seconds) of the largest pass computed here
        self._computed_here: set[str] = set()  # keys of the passes this session computed

    def __call__(self, inp: PassInput, plan: ChunkPlan) -> np.ndarray:
        return self.run_pass(inp, plan)

    def run_pass(self, inp: PassInput, plan: ChunkPlan) -> np.ndarray:
        """Summed partials of all chunks of the pass, in chunk order; shape (2m+2, 2m+1) complex."""
        if plan.p != inp.p:
            raise ValueError(f"pass input for p = {inp.p} with a chunk plan for p = {plan.p}")
        t0 = time.perf_counter()
        self.stats.passes_requested += 1
        key = L.pass_key(inp, plan)
        repairs_before = len(self.depth.repairs)
        try:
            cached = self.depth.cached_pass(key, inp.backward)
            if cached is not None:
                if key in self._computed_here:
                    self.stats.passes_repeated += 1
                else:
                    self.stats.passes_reused += 1
                return cached
            expected = self.expected_seconds(plan)
            if self.policy.flush_before(self.depth.pending_seconds, expected):
                self.flush()
            if not getattr(self.runner, "whole_pass_only", False) and self.policy.chunk_ledger(expected, plan.n_chunks):
                total = self._compute_ledgered(inp, plan, key)
                self.stats.passes_ledgered += 1
            else:
                total = self._compute_whole(inp, plan, key)
            self.stats.passes_computed += 1
            self._computed_here.add(key)
            crash_point("pass-computed")
            if self.policy.flush_after(self.depth.pending_seconds):
                self.flush()
            return total
        finally:
            self.stats.repairs += len(self.depth.repairs) - repairs_before
            self.stats.seconds_in_passes += time.perf_counter() - t0

    def flush(self) -> None:
        """Write the passes computed since the last write (one batch)."""
        t0, c0 = time.perf_counter(), time.process_time()
        if self.depth.flush():
            self.stats.batches_written += 1
        self.stats.seconds_writing += time.perf_counter() - t0
        self.stats.cpu_writing_s += time.process_time() - c0

    # ------------------------------------------------------------------ policy
    def expected_seconds(self, plan: ChunkPlan) -> float:
        """Compute time of a pass with ``plan``, from the largest pass measured in this session."""
        paths = _paths(plan)
        if self._rate is None or self._rate[0] <= 0:
            return paths * DEFAULT_SECONDS_PER_PATH
        return paths * self._rate[1] / self._rate[0]

    def _measured(self, plan: ChunkPlan, seconds: float) -> None:
        paths = _paths(plan)
        if self._rate is None or paths >= self._rate[0]:
            self._rate = (paths, seconds)

    # ------------------------------------------------------------------ compute
    def _meta(self, inp: PassInput, plan: ChunkPlan, key: str) -> dict:
        meta = {"fingerprint": key.split("-")[0], "kind": "backward" if inp.backward else "forward",
                "step": int(inp.p), "plan": L.plan_json(plan)}
        allowed = _sum_w_allowed(inp)
        if allowed > sum_w_tolerance(inp.p):
            # exponents far beyond the usual range round more: the store's re-check needs the allowance
            meta["sum_w_allowed"] = allowed
        return meta

    def _compute_ledgered(self, inp: PassInput, plan: ChunkPlan, key: str) -> np.ndarray:
        n_chunks = plan.n_chunks
        shape = (2 * inp.p + 2, 2 * inp.p + 1)
        self.flush()  # nothing pending may depend on the ledger this pass is about to reuse
        t_write, c_write = time.perf_counter(), time.process_time()
        inflight = self.depth.inflight(key, self._meta(inp, plan, key), n_chunks, shape)
        self.stats.seconds_writing += time.perf_counter() - t_write
        self.stats.cpu_writing_s += time.process_time() - c_write
        for attempt in (1, 2):
            partials = inflight.verified_partials()
            self.stats.chunks_reused += len(partials)
            missing = [k for k in range(n_chunks) if k not in partials]
            clock = [time.perf_counter()]

            def on_chunk(k: int, part: np.ndarray) -> None:
                if k in partials:
                    raise PassIntegrityError(f"chunk {k} of pass {key} reported twice")
                now, c_write = time.perf_counter(), time.process_time()
                inflight.record(k, part, int(round((now - clock[0]) * 1e6)))
                clock[0] = time.perf_counter()
                self.stats.seconds_writing += clock[0] - now
                self.stats.cpu_writing_s += time.process_time() - c_write
                partials[k] = part
                self.stats.chunks_computed += 1
                if self.progress is not None:
                    self.progress({"event": "chunk", "key": key, "done": len(partials), "total": n_chunks})

            t0 = time.perf_counter()
            if missing:
                self.runner.run_chunks(inp, plan, dict(partials), on_chunk)
            if len(missing) == n_chunks:
                self._measured(plan, time.perf_counter() - t0)
            lost = [k for k in range(n_chunks) if k not in partials]
            if lost:
                raise PassIntegrityError(f"pass {key}: chunks {lost[:5]} were never reported by the executor")
            total = _sum_in_chunk_order(partials, n_chunks, inp.p)
            problem = _check_total(total, inp)
            if problem is None:
                meta = self._meta(inp, plan, key)
                meta.update(n_chunks=n_chunks, completions=inflight.completions(), wall_s=inflight.wall_seconds(),
                            paths=_paths(plan))
                self.depth.add_pass(key, total, meta)
                self.flush()  # the ledger is reused by the next long pass: its sum must be on disk first
                return total
            self.depth.note_repair("pass recomputed from scratch", key, detail=problem)
            inflight = self.depth.restart_inflight(inflight)
        raise _failure(f"pass {key} at p = {inp.p}: {problem} (twice)", problem)

    def _compute_whole(self, inp: PassInput, plan: ChunkPlan, key: str) -> np.ndarray:
        t0 = time.perf_counter()
        if getattr(self.runner, "whole_pass_only", False):
            total = np.asarray(self.runner.run_pass(inp, plan))
        else:
            partials: dict[int, np.ndarray] = {}
            self.runner.run_chunks(inp, plan, {}, lambda k, part: partials.__setitem__(k, part))
            lost = [k for k in range(plan.n_chunks) if k not in partials]
            if lost:
                raise PassIntegrityError(f"pass {key}: chunks {lost[:5]} were never reported by the executor")
            total = _sum_in_chunk_order(partials, plan.n_chunks, inp.p)
        wall = time.perf_counter() - t0
        self._measured(plan, wall)
        problem = _check_total(total, inp)
        if problem is not None:
            raise _failure(f"pass {key} at p = {inp.p}: {problem}", problem)
        self.stats.chunks_computed += plan.n_chunks
        meta = self._meta(inp, plan, key)
        meta.update(n_chunks=plan.n_chunks, completions=[1] * plan.n_chunks, wall_s=wall, paths=_paths(plan))
        self.depth.add_pass(key, total, meta, chunks_to_witness=range(plan.n_chunks))
        return total


def _paths(plan: ChunkPlan) -> int:
    """Paths a pass with ``plan`` enumerates (half of them with the global flip)."""
    return int(plan.n_chunks) * int(plan.rows_per_chunk) * 2 ** int(plan.n_low)


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
        return _NON_FINITE
    if not inp.backward:
        dev = float(np.max(np.abs(np.diag(total[:n]) - 1.0)))
        allowed = _sum_w_allowed(inp)
        if not dev <= allowed:
            return f"sum of path weights deviates from 1 by {dev:.3e} (allowed {allowed:.1e})"
    return None


def _failure(message: str, problem: str) -> PassIntegrityError:
    """The error for a pass that failed its check: non-finite sums mean the weights left the double range."""
    if problem == _NON_FINITE:
        return PassRangeError(f"{message}: the path weights left the double range")
    return PassIntegrityError(message)


_NON_FINITE = "non-finite entries"


def _sum_w_allowed(inp: PassInput) -> float:
    """The pass's sum-of-weights allowance (grows with its exponents far outside the usual range)."""
    return sum_w_tolerance(inp.p, pass_exponent_bound(inp.M))
