"""Executors: the objects that run passes, wherever the work goes.

Every executor is used the same way::

    with open_executor(ComputeSettings(...)) as ex:
        evaluation = evaluate(mixture, gamma, beta, plan=plan, run_pass=ex.run_pass)

Store hook (for the checkpoint layer)
-------------------------------------
``ex.run_pass(inp, plan, done=None, on_chunk=None) -> ndarray (2p+2, 2p+1)``

- ``done``: ``{chunk index: partial}`` of chunks already finished (for example
  read back from a checkpoint).  They are not recomputed, but they are summed
  at their place in chunk order, so a resumed pass gives bit-for-bit the
  result of an uninterrupted one.  Each partial must be the (2p+2, 2p+1)
  complex array that ``kernels.exact.chunk_partial`` returned for that chunk.
- ``on_chunk(k, partial)``: called in the calling thread once for every
  newly computed chunk, as soon as its task comes back (order of arrival;
  within one task, chunk order).  A store writes the partial and marks chunk
  ``k`` done in its ledger here.  An exception raised by ``on_chunk`` stops
  the pass (outstanding tasks are cancelled) and propagates.
- The plain two-argument form ``ex.run_pass(inp, plan)`` (also ``ex(inp,
  plan)``) is what ``kernels.exact.evaluate(run_pass=...)`` expects.

Kinds: :class:`InProcessExecutor` (no Dask), :class:`DaskExecutor` (a
LocalCluster it started, a scheduler by address, or a batch cluster it
started), :class:`AutoExecutor` (in-process for small passes, starts a
LocalCluster at the first large one).  Each closes what it started and
nothing else (a scheduler reached by address is left running).
"""

from __future__ import annotations

import asyncio
import socket
import time
from dataclasses import replace
from typing import Mapping
from urllib.parse import urlsplit

import numpy as np

from leadline.kernels.exact import PassInput, chunk_partial, prepare_low_side, ChunkPlan, plan_chunks

from .errors import ExecutorError, SchedulerUnreachable
from .mapreduce import OnChunk, OrderedSum, Placement, check_done, map_reduce_pass
from .progress import ProgressDisplay, progress_wanted
from .settings import ComputeSettings, auto_workers, worker_memory_limit, worth_a_cluster, worth_a_round_trip
from .workerenv import SINGLE_THREAD_ENV

__all__ = [
    "Executor",
    "InProcessExecutor",
    "DaskExecutor",
    "AutoExecutor",
    "open_executor",
    "start_local_cluster",
    "connect_scheduler",
]


class Executor:
    """Base: a context manager with ``run_pass(inp, plan, done=None, on_chunk=None)``."""

    mode = "?"

    def __init__(self, settings: ComputeSettings | None = None, progress: ProgressDisplay | None = None):
        self.settings = settings or ComputeSettings(mode="inprocess").resolved()
        self.progress = progress or ProgressDisplay(False)
        self.passes = 0
        self.pass_seconds = 0.0

    def plan_for(self, p: int) -> ChunkPlan:
        """The chunk plan for depth p under this executor's memory budget."""
        return plan_chunks(p, self.settings.memory_budget)

    def run_pass(
        self,
        inp: PassInput,
        plan: ChunkPlan,
        done: Mapping[int, np.ndarray] | None = None,
        on_chunk: OnChunk | None = None,
    ) -> np.ndarray:
        """Chunk-ordered sum of all partials of one pass, (2p+2, 2p+1) complex."""
        t0 = time.perf_counter()
        out = self._run(inp, plan, done, on_chunk)
        self.passes += 1
        self.pass_seconds += time.perf_counter() - t0
        return out

    __call__ = run_pass

    def _run(self, inp, plan, done, on_chunk) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def run_map(self, func, blocks) -> list:
        """Apply a pure function to each block and return the results in block order.

        The generic map used by non-pass work (the split Walsh-Hadamard transforms
        of the sparse recursion, kernels.sparse ``run_map=``).  In-process here.
        """
        return [func(b) for b in blocks]

    def describe(self) -> dict:
        return {"executor": self.mode}

    def close(self) -> None:
        self.progress.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class InProcessExecutor(Executor):
    """Every pass in this process, chunk by chunk (the reference for all others)."""

    mode = "inprocess"

    def _run(self, inp, plan, done, on_chunk):
        return _run_here(inp, plan, done, on_chunk, self.progress)


def _run_here(inp, plan, done, on_chunk, progress) -> np.ndarray:
    """One pass chunk by chunk in this process (same contract as every executor's pass)."""
    if plan.p != inp.p:
        raise ValueError(f"chunk plan is for p = {plan.p}, pass input has p = {inp.p}")
    done = check_done(done, plan)
    total = OrderedSum(plan, done)
    progress.pass_started(plan.n_chunks, already_done=len(done))
    low = None
    for k in range(plan.n_chunks):
        if k in done:
            continue
        if low is None:
            low = prepare_low_side(inp, plan)
        part = chunk_partial(inp, plan, k, low)
        if on_chunk is not None:
            on_chunk(k, part)
        total.add(k, part)
        progress.chunks_done(1)
    return total.acc


class DaskExecutor(Executor):
    """Passes as batches of chunk tasks on a distributed Client.

    Parameters
    ----------
    client : distributed.Client
    cluster : the cluster object this executor started (closed with it), or None
    expected_threads : worker threads expected (batch jobs may still be queued)
    wait_for_workers_s : how long a pass waits for the first worker
    """

    def __init__(self, client, *, cluster=None, mode="local", settings=None, progress=None,
                 expected_threads: int = 1, wait_for_workers_s: float = 60.0):
        self.mode = mode
        super().__init__(settings, progress)
        self.client = client
        self.cluster = cluster
        self.expected_threads = max(1, int(expected_threads))
        self.wait_for_workers_s = float(wait_for_workers_s)
        self.placement = Placement()
        #: passes kept in the calling process because they were too small to ship
        self.local_passes = 0

    def worker_threads(self) -> int:
        return int(sum(self.client.nthreads().values()))

    def _run(self, inp, plan, done, on_chunk):
        if not worth_a_round_trip(plan):
            # the growing contour's small steps: the arithmetic is cheaper than one
            # scheduler round trip, so they never leave this process
            self.local_passes += 1
            return _run_here(inp, plan, done, on_chunk, self.progress)
        threads = self.worker_threads()
        if threads == 0:
            try:
                self.client.wait_for_workers(1, timeout=self.wait_for_workers_s)
            except (TimeoutError, OSError):
                raise ExecutorError(
                    f"no Dask worker joined the scheduler at {self.client.scheduler.address} "
                    f"within {self.wait_for_workers_s:g} s"
                ) from None
            threads = self.worker_threads()
        slots = max(threads, self.expected_threads)
        return map_reduce_pass(
            self.client, inp, plan, slots=slots, done=done, on_chunk=on_chunk, progress=self.progress,
            placement=self.placement,
        )

    def run_map(self, func, blocks) -> list:
        """Blocks as Dask tasks (retried like pass tasks), gathered in block order."""
        blocks = list(blocks)
        if not blocks:
            return []
        try:
            self.client.wait_for_workers(1, timeout=self.wait_for_workers_s)
        except Exception:
            raise ExecutorError(f"no Dask worker joined the scheduler at {self.client.scheduler.address}") from None
        futures = self.client.map(func, blocks, retries=2, pure=False)
        try:
            return self.client.gather(futures)
        except Exception as exc:  # a block that failed after its retries
            raise ExecutorError(f"a transform block failed {3} times; last error: {exc}") from None
        finally:
            for f in futures:
                f.release()

    def describe(self) -> dict:
        info = self.client.scheduler_info() if self.client.status == "running" else {}
        workers = info.get("workers", {})
        return {
            "executor": self.mode,
            "scheduler": self.client.scheduler.address,
            "workers": len(workers),
            "threads": int(sum(w.get("nthreads", 0) for w in workers.values())),
        }

    def close(self) -> None:
        super().close()
        try:
            self.client.close(timeout=10)
        finally:
            if self.cluster is not None:
                self.cluster.close(timeout=20)
                self.cluster = None


class AutoExecutor(Executor):
    """In-process for small passes; a LocalCluster from the first pass that is worth one.

    "Worth one" is :func:`settings.worth_a_cluster` (measured switch point) and
    at least two idle cores (:func:`settings.auto_workers`); the decision is
    taken once per run.
    """

    mode = "auto"

    def __init__(self, settings, progress=None):
        super().__init__(settings, progress)
        self._inprocess = InProcessExecutor(settings, self.progress)
        self._local: DaskExecutor | None = None
        self._declined = False

    def _run(self, inp, plan, done, on_chunk):
        if self._local is None and not self._declined and worth_a_cluster(plan):
            workers = auto_workers(self.settings)
            if workers >= 1:
                self._local = start_local_cluster(replace(self.settings, workers=workers), self.progress)
            else:
                self._declined = True  # the cores are busy: stay in-process for this run
        target = self._local if self._local is not None else self._inprocess
        return target._run(inp, plan, done, on_chunk)

    def describe(self) -> dict:
        inner = self._local.describe() if self._local is not None else {"executor": "inprocess"}
        return {**inner, "executor": f"auto ({inner['executor']})"}

    def close(self) -> None:
        try:
            if self._local is not None:
                self._local.close()
                self._local = None
        finally:
            super().close()


# --------------------------------------------------------------------------- builders
def _client_for(cluster):
    """A client of a cluster this tool started; the cluster is closed if connecting fails."""
    from distributed import Client

    try:
        return Client(cluster, set_as_default=False)
    except BaseException:
        cluster.close()
        raise


def start_local_cluster(settings: ComputeSettings, progress: ProgressDisplay | None = None) -> DaskExecutor:
    """A LocalCluster of ``settings.workers`` processes on 127.0.0.1 with single-threaded BLAS."""
    from distributed import LocalCluster

    settings = settings.resolved() if settings.workers is None else settings
    cluster = LocalCluster(
        n_workers=settings.workers,
        threads_per_worker=settings.threads_per_worker,
        processes=True,
        host="127.0.0.1",
        # (None still starts the scheduler's HTTP server, on port 8787: a second cluster on
        # the machine then warns about the port on stderr; a free loopback port never collides)
        dashboard_address="127.0.0.1:0",
        memory_limit=worker_memory_limit(settings.memory_budget, settings.threads_per_worker),
        env=dict(SINGLE_THREAD_ENV),
        silence_logs=50,  # CRITICAL only: worker chatter would garble the progress bar
    )
    client = _client_for(cluster)
    return DaskExecutor(
        client, cluster=cluster, mode="local", settings=settings, progress=progress,
        expected_threads=settings.workers * settings.threads_per_worker,
    )


def _host_port(address: str) -> tuple[str, str | None, int | None]:
    """('tcp', host, port) of a scheduler address; port None if absent."""
    text = address.strip()
    if "://" not in text:
        text = "tcp://" + text
    parts = urlsplit(text)
    try:
        port = parts.port
    except ValueError:
        raise SchedulerUnreachable(f"scheduler address {address!r} has an invalid port") from None
    return parts.scheme, parts.hostname, port


async def _identity_request(address: str, timeout: float):
    from distributed.comm import connect

    comm = await connect(address, timeout=timeout)
    try:
        await comm.write({"op": "identity", "reply": True})
        return await comm.read()
    finally:
        comm.abort()


def _identity(address: str, timeout: float) -> dict:
    """The scheduler's identity message, within ``timeout`` seconds overall."""
    return asyncio.run(asyncio.wait_for(_identity_request(address, timeout), timeout))


def connect_scheduler(address: str, settings: ComputeSettings, progress: ProgressDisplay | None = None) -> DaskExecutor:
    """A client of the scheduler at ``address``; SchedulerUnreachable within the connect timeout.

    A plain TCP probe comes first so that a refused connection fails at once
    (distributed itself retries refused connections until its timeout), then
    an identity request under a hard deadline (a silent peer fails too).
    """
    from distributed import Client

    timeout = settings.connect_timeout
    scheme, host, port = _host_port(address)
    if not host:
        raise SchedulerUnreachable(f"scheduler address {address!r} has no host; use HOST:PORT or tcp://HOST:PORT")
    if scheme == "tcp":
        if port is None:
            raise SchedulerUnreachable(f"scheduler address {address!r} has no port; use HOST:PORT (dask's default is 8786)")
        try:
            with socket.create_connection((host, port), timeout=timeout):
                pass
        except OSError as exc:
            reason = "timed out" if isinstance(exc, TimeoutError) else (exc.strerror or str(exc))
            raise SchedulerUnreachable(
                f"cannot reach a Dask scheduler at {address} ({reason}); start one with `dask scheduler` "
                "or check --scheduler"
            ) from None
        target = f"tcp://{host}:{port}"
    else:
        target = address.strip()
    # distributed's Client can wait forever on a peer that accepts TCP but never
    # answers, so ask for the scheduler's identity under a hard deadline first
    try:
        identity = _identity(target, timeout)
    except (OSError, TimeoutError, asyncio.TimeoutError, ValueError) as exc:
        raise SchedulerUnreachable(
            f"no Dask scheduler answered at {address} within {timeout:g} s ({type(exc).__name__}); "
            "check --scheduler"
        ) from None
    if not isinstance(identity, dict) or identity.get("type") != "Scheduler":
        raise SchedulerUnreachable(f"the server at {address} is not a Dask scheduler; check --scheduler")
    try:
        client = Client(target, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise SchedulerUnreachable(
            f"no Dask scheduler answered at {address} within {timeout:g} s ({type(exc).__name__}); "
            "check --scheduler"
        ) from None
    return DaskExecutor(
        client, cluster=None, mode="scheduler", settings=settings, progress=progress,
        expected_threads=1, wait_for_workers_s=max(60.0, 6 * timeout),
    )


def start_batch_cluster(settings: ComputeSettings, progress: ProgressDisplay | None = None) -> DaskExecutor:
    """Submit the batch jobs described by ``settings.batch_file`` and connect to them."""

    from .batch import load_batch_config, make_batch_cluster

    config = load_batch_config(settings.batch_file)
    cluster = make_batch_cluster(config, submit=True)
    client = _client_for(cluster)
    return DaskExecutor(
        client, cluster=cluster, mode="batch", settings=settings, progress=progress,
        expected_threads=config.total_threads, wait_for_workers_s=config.wait_for_workers_s,
    )


def open_executor(settings: ComputeSettings, *, progress: ProgressDisplay | None = None) -> Executor:
    """Build the executor ``settings`` ask for (validated first); use it as a context manager.

    Raises ExecutorConfigError (user-fixable: bad address, bad batch file,
    memory) before any work starts.
    """
    settings = settings.resolved()
    if progress is None:
        progress = ProgressDisplay(progress_wanted(settings.quiet))
    if settings.mode == "inprocess":
        return InProcessExecutor(settings, progress)
    if settings.mode == "auto":
        return AutoExecutor(settings, progress)
    if settings.mode == "local":
        return start_local_cluster(settings, progress)
    if settings.mode == "scheduler":
        return connect_scheduler(settings.scheduler, settings, progress)
    if settings.mode == "batch":
        return start_batch_cluster(settings, progress)
    raise AssertionError(settings.mode)  # resolved() checked the mode
