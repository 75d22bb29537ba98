"""Command-line options that choose where passes run, shared by every computing command.

Usage in a command (options are functions so each command gets its own copy)::

    def my_command(..., memory_mb: float = ...,
                   executor: str = compute.executor_option(),
                   scheduler: Optional[str] = compute.scheduler_option(),
                   workers: Optional[int] = compute.workers_option(),
                   threads_per_worker: int = compute.threads_option(),
                   cluster_config: Optional[str] = compute.cluster_config_option(),
                   quiet: bool = compute.quiet_option()):
        settings = compute.settings_from_options(executor, scheduler, workers,
                                                 threads_per_worker, memory_mb, cluster_config, quiet)
        with compute.open_compute(settings) as ex:
            evaluate(..., run_pass=ex.run_pass)

``settings_from_options`` validates everything (InputError, exit 2) before any
work; ``open_compute`` turns an unreachable scheduler or a bad batch file into
InputError (exit 2, within the connect timeout) and a pass that fails on the
cluster into one error line (exit 1).
"""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import TYPE_CHECKING, Iterator, Optional

import typer

from leadline.cluster.batch import load_batch_config
from leadline.cluster.errors import ExecutorConfigError, ExecutorError
from leadline.cluster.settings import DEFAULT_CONNECT_TIMEOUT_S, ComputeSettings

if TYPE_CHECKING:  # the executor module (asyncio, Dask hooks) loads when a command computes
    from leadline.cluster.executor import Executor

from .errors import InputError
from .parsing import check_memory_mb

__all__ = [
    "EXECUTOR_CHOICES",
    "executor_option",
    "scheduler_option",
    "workers_option",
    "threads_option",
    "cluster_config_option",
    "quiet_option",
    "settings_from_options",
    "open_compute",
]

EXECUTOR_CHOICES = ("auto", "inprocess", "local")


def executor_option():
    return typer.Option(
        "auto",
        "--executor",
        help="Where passes run: auto (in this process for small work; a local Dask cluster once a pass "
        "has >= 2^29 paths, i.e. p >= 14, and >= 2 cores are idle), inprocess (never Dask), "
        "local (always a local Dask cluster). "
        "--scheduler and --cluster-config choose the other two ways.",
    )


def scheduler_option():
    return typer.Option(
        None,
        "--scheduler",
        help="Address of a running Dask scheduler, e.g. tcp://10.0.0.5:8786 (start one with `dask scheduler` "
        "and workers with `dask worker ADDRESS`). Fails after 10 s if nothing answers.",
    )


def workers_option():
    return typer.Option(None, "--workers", help="Worker processes of the local Dask cluster (default: one per core).")


def threads_option():
    return typer.Option(
        1, "--threads-per-worker", help="Threads per local worker process (default 1; BLAS stays single-threaded)."
    )


def cluster_config_option():
    return typer.Option(
        None,
        "--cluster-config",
        help="TOML file describing a SLURM or PBS batch cluster; batch jobs are submitted for this run "
        "(layout: docs/clusters.md).",
    )


def quiet_option():
    return typer.Option(False, "--quiet", "-q", help="No progress bar (it is also off when stdout is not a terminal).")


def settings_from_options(
    executor: str = "auto",
    scheduler: Optional[str] = None,
    workers: Optional[int] = None,
    threads_per_worker: int = 1,
    memory_mb: float = 256.0,
    cluster_config: Optional[str] = None,
    quiet: bool = False,
    connect_timeout: float = DEFAULT_CONNECT_TIMEOUT_S,
) -> ComputeSettings:
    """Validated ComputeSettings from the command-line values; InputError on bad input."""
    if executor not in EXECUTOR_CHOICES:
        raise InputError(f"--executor must be one of {', '.join(EXECUTOR_CHOICES)}, got {executor!r}")
    if scheduler is not None and not scheduler.strip():
        raise InputError("--scheduler needs an address such as tcp://127.0.0.1:8786")
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be >= 1, got {workers}")
    if threads_per_worker < 1:
        raise InputError(f"--threads-per-worker must be >= 1, got {threads_per_worker}")
    check_memory_mb(memory_mb)
    if executor != "auto" and (scheduler is not None or cluster_config is not None):
        which = "--scheduler" if scheduler is not None else "--cluster-config"
        raise InputError(f"--executor {executor} cannot be combined with {which}")
    if scheduler is not None and cluster_config is not None:
        raise InputError("give either --scheduler or --cluster-config, not both")
    if cluster_config is not None:
        try:
            load_batch_config(cluster_config)  # reject a bad file before any work
        except ExecutorConfigError as exc:
            raise InputError(f"--cluster-config: {exc}") from None
    settings = ComputeSettings(
        mode=executor,
        scheduler=scheduler.strip() if scheduler is not None else None,
        workers=workers,
        threads_per_worker=threads_per_worker,
        memory_budget=int(memory_mb * 2**20),
        batch_config=Path(cluster_config) if cluster_config is not None else None,
        quiet=quiet,
        connect_timeout=connect_timeout,
    )
    try:
        return settings.resolved()
    except ExecutorConfigError as exc:
        raise InputError(str(exc)) from None


@contextlib.contextmanager
def open_compute(settings: ComputeSettings) -> Iterator[Executor]:
    """The executor for ``settings``, closed on exit; errors become one-line CLI errors."""
    import click

    from leadline.cluster.executor import open_executor

    try:
        executor = open_executor(settings)
    except ExecutorConfigError as exc:
        raise InputError(str(exc)) from None
    with executor:
        try:
            yield executor
        except ExecutorError as exc:
            raise click.ClickException(str(exc)) from None
