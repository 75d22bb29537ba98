"""Keep BLAS single-threaded inside workers, and a way to check it.

A worker runs ``threads_per_worker`` chunk tasks at once; if each numpy call
also started one BLAS thread per core, a 2-core machine with 2 workers would
run 2 x 2 x 2 threads and thrash (common practice: pin BLAS to one thread per
task thread when the outer level is already parallel).  The variables below
are read by OpenBLAS/MKL/OpenMP when the library loads, so they must be in
the environment of the worker process before it starts: LocalCluster passes
them to each nanny (``env=``), batch jobs export them in the job script, and
``dask worker`` processes started by hand get them from distributed's
``distributed.nanny.pre-spawn-environ`` default (or from the user's shell).

The process that runs a command or a Python API call computes too (passes
too small to ship, the bath engine, the optimizer's linear algebra).  There
:func:`in_process_blas` caps BLAS at ``LEADLINE_BLAS_THREADS`` threads
(default 1; ``auto`` leaves the libraries as they start): numpy's OpenBLAS
otherwise starts one thread per core in every process, and on a machine that
is already busy those threads wait on each other (measured in
benchmarks/bench_blas.py, docs/performance.md).  Libraries
already loaded are capped through threadpoolctl; the thread variables are
set for the duration so a BLAS first loaded inside the call starts capped.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
from typing import Iterator

__all__ = ["SINGLE_THREAD_ENV", "BLAS_THREADS_ENV", "blas_threads", "in_process_blas", "in_process_threads",
           "worker_report"]

#: threads of BLAS in the process that runs a command or an API call: a count >= 1, or "auto"
BLAS_THREADS_ENV = "LEADLINE_BLAS_THREADS"

#: environment of every worker process the tool starts
SINGLE_THREAD_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}

# OpenBLAS builds export one of these (numpy wheels ship a prefixed 64-bit build)
_GETTERS = (
    "scipy_openblas_get_num_threads64_",
    "openblas_get_num_threads64_",
    "openblas_get_num_threads",
    "MKL_Get_Max_Threads",
)


def blas_threads() -> int | None:
    """Threads the BLAS loaded in this process would use, or None if not found.

    Looks through the shared libraries mapped into the process (Linux
    /proc/self/maps) for an OpenBLAS or MKL and asks it directly, so the
    answer is what the library decided, not what the environment says.
    """
    import numpy  # noqa: F401  (make sure numpy's BLAS is loaded)

    try:
        with open("/proc/self/maps") as fh:
            paths = {line.split()[-1] for line in fh if ".so" in line and "/" in line}
    except OSError:
        return None
    for path in sorted(paths):
        name = os.path.basename(path).lower()
        if "blas" not in name and "mkl" not in name:
            continue
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for symbol in _GETTERS:
            fn = getattr(lib, symbol, None)
            if fn is not None:
                fn.restype = ctypes.c_int
                return int(fn())
    return None


def worker_report() -> dict:
    """What a worker process sees: pid, BLAS threads, thread variables (run on workers)."""
    return {
        "pid": os.getpid(),
        "blas_threads": blas_threads(),
        **{k: os.environ.get(k) for k in SINGLE_THREAD_ENV},
    }


def in_process_threads() -> int | None:
    """BLAS threads for the calling process: ``$LEADLINE_BLAS_THREADS`` (default 1), None for "auto".

    Raises ValueError (one line naming the variable) for anything else.
    """
    raw = os.environ.get(BLAS_THREADS_ENV, "").strip().lower()
    if raw == "":
        return 1
    if raw == "auto":
        return None
    try:
        n = int(raw)
    except ValueError:
        n = 0
    if n < 1:
        raise ValueError(f"{BLAS_THREADS_ENV}={os.environ[BLAS_THREADS_ENV]!r}: need a whole number >= 1 or 'auto'")
    return n


@contextlib.contextmanager
def in_process_blas(threads: int | None = None) -> Iterator[int | None]:
    """Cap BLAS/OpenMP threads of this process while the block runs; restore them after.

    ``threads`` defaults to :func:`in_process_threads`; None (``auto``) changes nothing.
    Nested uses are fine (the inner one restores what the outer one set).
    """
    if threads is None:
        threads = in_process_threads()
    if threads is None:
        yield None
        return
    from threadpoolctl import threadpool_limits

    saved = {k: os.environ.get(k) for k in SINGLE_THREAD_ENV}
    os.environ.update({k: str(threads) for k in SINGLE_THREAD_ENV})
    try:
        with threadpool_limits(limits=threads):
            yield threads
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
