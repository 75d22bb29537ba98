"""Map-reduce of one pass over a Dask client: batches of chunks -> ordered sum.

Map: the chunks still to do are cut into contiguous batches; one task =
``kernels.exact.pass_partials(inp, plan, batch)`` (one low-side set-up per
batch, then the chunks one after another, so a task's peak memory is the
planner's per-chunk budget however long the batch).  There are about
:data:`TASKS_PER_SLOT` tasks per worker thread: enough for load balance and
small enough that a lost worker costs a fraction of its share.

Reduce: each task returns one (2p+2, 2p+1) partial per chunk; they are added
to a zero accumulator strictly in chunk order 0, 1, 2, ... (early arrivals
wait), exactly as ``kernels.exact.run_pass_inprocess`` does, so the sum is
bit-for-bit the same whatever the number of workers, batch sizes or
completion order.

Locality: the blocked kernel memoizes a forward pass's products in the worker
process; :class:`Placement` sends each adjoint batch to the worker that ran
the same forward batch (a hint only, results never depend on it).

Failures: a task that raises is rerun by distributed (``retries=``); a task
lost with its worker is rescheduled by the scheduler, and if the scheduler
gives up on it (``KilledWorker``) or it is cancelled, it is resubmitted under
a new key up to ``resubmits`` times.  A task that still fails stops the pass
with :class:`ChunkFailure` naming its chunks.
"""

from __future__ import annotations

import itertools
import math
from typing import Callable, Mapping

import numpy as np

from leadline.kernels.exact import PassInput, pass_partials, ChunkPlan
from leadline.storage.faults import crash_point

from .errors import ChunkFailure, ExecutorError

__all__ = ["TASKS_PER_SLOT", "batch_chunks", "OrderedSum", "map_reduce_pass", "pass_label", "check_done", "Placement"]

#: tasks per worker thread and pass (load balance vs per-task overhead)
TASKS_PER_SLOT = 4
#: distributed's own reruns of a task that raised
TASK_RETRIES = 2
#: our resubmissions of a task whose worker died or that was cancelled
TASK_RESUBMITS = 3

OnChunk = Callable[[int, np.ndarray], None]
_serial = itertools.count()


def partials_and_worker(inp: PassInput, plan: ChunkPlan, chunks) -> tuple[list[np.ndarray], str | None]:
    """The task: ``pass_partials`` plus the address of the worker that ran it."""
    try:
        from distributed import get_worker

        where = get_worker().address
    except (ImportError, ValueError):
        where = None
    crash_point("chunk-task")  # fault injection (no-op unless armed in this worker)
    return pass_partials(inp, plan, chunks), where


class Placement:
    """Where each batch of a forward pass ran, so its adjoint pass can go to the same worker.

    The blocked kernel memoizes a forward pass's products per process
    (kernels/exact/_blocked.py); an adjoint pass with the same M and beta on the same
    worker reuses them.  Only a hint (``allow_other_workers``): results do not
    depend on it.  Keeps the last ``capacity`` forward passes.
    """

    def __init__(self, capacity: int = 64):
        self.capacity = int(capacity)
        self._where: dict[str, dict[tuple, str]] = {}

    @staticmethod
    def forward_key(inp: PassInput, plan: ChunkPlan) -> str:
        return PassInput(inp.p, inp.M, inp.beta).fingerprint() + repr(plan.to_json())

    def record(self, inp: PassInput, plan: ChunkPlan, batch, worker: str | None) -> None:
        if inp.backward or worker is None:
            return
        key = self.forward_key(inp, plan)
        if key not in self._where and len(self._where) >= self.capacity:
            self._where.pop(next(iter(self._where)))
        self._where.setdefault(key, {})[tuple(batch)] = worker

    def lookup(self, inp: PassInput, plan: ChunkPlan, batch) -> str | None:
        if not inp.backward:
            return None
        return self._where.get(self.forward_key(inp, plan), {}).get(tuple(batch))


def pass_label(inp: PassInput, plan: ChunkPlan) -> str:
    kind = "backward" if inp.backward else "forward"
    return f"{kind} pass at p = {plan.p} (inputs {inp.fingerprint()[:12]})"


def batch_chunks(todo, slots: int, tasks_per_slot: int = TASKS_PER_SLOT) -> list[list[int]]:
    """Cut the chunk indices ``todo`` (ascending) into contiguous batches.

    About ``slots * tasks_per_slot`` batches of equal size (at least one chunk each).
    """
    todo = list(todo)
    if not todo:
        return []
    n_tasks = max(1, int(slots) * int(tasks_per_slot))
    size = max(1, math.ceil(len(todo) / n_tasks))
    return [todo[i : i + size] for i in range(0, len(todo), size)]


def check_done(done: Mapping[int, np.ndarray] | None, plan: ChunkPlan) -> dict[int, np.ndarray]:
    """Validate the finished partials handed in by a store: indices and shapes."""
    if not done:
        return {}
    n = plan.n_sites
    out = {}
    for k, part in done.items():
        k = int(k)
        if not 0 <= k < plan.n_chunks:
            raise ValueError(f"finished chunk {k} is outside the plan's 0..{plan.n_chunks - 1}")
        arr = np.asarray(part)
        if arr.shape != (n + 1, n):
            raise ValueError(f"finished chunk {k} has shape {arr.shape}, expected {(n + 1, n)}")
        out[k] = arr
    return out


class OrderedSum:
    """Adds partials in chunk order 0..n-1 whatever order they arrive in."""

    def __init__(self, plan: ChunkPlan, done: Mapping[int, np.ndarray]):
        n = plan.n_sites
        self.n_chunks = plan.n_chunks
        self.acc = np.zeros((n + 1, n), dtype=complex)
        self.next = 0
        self.pending: dict[int, np.ndarray] = dict(done)
        self._advance()

    def add(self, chunk: int, partial: np.ndarray) -> None:
        self.pending[int(chunk)] = partial
        self._advance()

    def _advance(self) -> None:
        while self.next < self.n_chunks and self.next in self.pending:
            self.acc += self.pending.pop(self.next)
            self.next += 1

    @property
    def complete(self) -> bool:
        return self.next == self.n_chunks

    def missing(self) -> list[int]:
        return [k for k in range(self.next, self.n_chunks) if k not in self.pending]


def map_reduce_pass(
    client,
    inp: PassInput,
    plan: ChunkPlan,
    *,
    slots: int,
    done: Mapping[int, np.ndarray] | None = None,
    on_chunk: OnChunk | None = None,
    progress=None,
    retries: int = TASK_RETRIES,
    resubmits: int = TASK_RESUBMITS,
    placement: Placement | None = None,
) -> np.ndarray:
    """Run one pass on ``client`` and return the chunk-ordered sum, (2p+2, 2p+1) complex.

    Parameters
    ----------
    client : distributed.Client
    inp, plan : the pass and its chunk plan (``plan.p == inp.p``)
    slots : worker threads to size the batches for
    done : {chunk index: partial} already finished (skipped, but summed in order)
    on_chunk : called as ``on_chunk(k, partial)`` in this thread for every newly
        computed chunk as its task arrives (arrival order, chunk order within a task)
    progress : a ProgressDisplay or None
    placement : remembers where forward batches ran and steers adjoint batches there
    """
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    if plan.p != inp.p:
        raise ValueError(f"chunk plan is for p = {plan.p}, pass input has p = {inp.p}")
    done = check_done(done, plan)
    total = OrderedSum(plan, done)
    todo = [k for k in range(plan.n_chunks) if k not in done]
    if progress is not None:
        progress.pass_started(plan.n_chunks, already_done=len(done))
    if not todo:
        return total.acc

    serial = next(_serial)
    token = inp.fingerprint()[:12]
    batches = batch_chunks(todo, slots)
    batch_of: dict[str, list[int]] = {}
    attempts: dict[int, int] = {}  # batch number -> submissions so far

    def submit(b: int):
        attempts[b] = attempts.get(b, 0) + 1
        batch = batches[b]
        key = f"leadline-pass-{token}-{serial}-b{b}-a{attempts[b]}"
        hint = placement.lookup(inp, plan, batch) if placement is not None else None
        fut = client.submit(
            partials_and_worker, inp, plan, batch, key=key, retries=retries, pure=False,
            workers=[hint] if hint else None, allow_other_workers=bool(hint),
        )
        batch_of[fut.key] = b
        return fut

    futures = [submit(b) for b in range(len(batches))]
    queue = as_completed(futures, loop=client.loop)
    outstanding = set(futures)
    try:
        for fut in queue:
            outstanding.discard(fut)
            b = batch_of.pop(fut.key)
            batch = batches[b]
            status = fut.status
            if status == "finished":
                try:
                    partials, worker = fut.result()
                except Exception as exc:  # lost between completion and transfer
                    status, error = "lost", exc
                else:
                    fut.release()
                    if placement is not None:
                        placement.record(inp, plan, batch, worker)
                    if len(partials) != len(batch):
                        raise ExecutorError(f"task for chunks {batch[0]}-{batch[-1]} returned {len(partials)} partials")
                    for k, part in zip(batch, partials):
                        if on_chunk is not None:
                            on_chunk(k, part)
                        total.add(k, part)
                    if progress is not None:
                        progress.chunks_done(len(batch))
                    continue
            else:
                error = fut.exception() if status == "error" else None
            fut.release()
            recoverable = status in ("cancelled", "lost") or isinstance(error, KilledWorker)
            if recoverable and attempts[b] <= resubmits:
                new = submit(b)
                outstanding.add(new)
                queue.add(new)
                continue
            runs = attempts[b] * (1 if recoverable else retries + 1)
            raise ChunkFailure(batch, runs, error, where=pass_label(inp, plan))
    except BaseException:
        for fut in outstanding:
            fut.cancel()
        raise
    if not total.complete:
        raise ExecutorError(f"{pass_label(inp, plan)}: chunks {total.missing()[:10]} never came back")
    return total.acc
