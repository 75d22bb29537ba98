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
"""

from __future__ import annotations

import ctypes
import os

__all__ = ["SINGLE_THREAD_ENV", "blas_threads", "worker_report"]

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
