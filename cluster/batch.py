"""HPC batch clusters (SLURM, PBS) through dask-jobqueue, described by a TOML file.

File layout (every key optional except ``system``; unknown keys are errors,
so typos do not pass silently)::

    system = "slurm"              # "slurm" or "pbs"
    jobs = 2                      # batch jobs to keep running (1..MAX_JOBS)
    walltime = "01:00:00"         # per job, [D-]HH:MM:SS, at most MAX_WALLTIME_H hours
    wait-for-workers-s = 600      # seconds a pass waits for the first worker

    [job]                         # what one batch job asks for
    cores = 4                     # cores per job
    memory = "8GB"                # memory per job
    workers = 4                   # worker processes per job (threads = cores / workers)
    queue = "compute"             # partition (SLURM) / queue (PBS)
    account = "proj123"           # account / project to charge
    interface = "ib0"             # network interface of the workers
    local-directory = "/tmp"      # scratch of the workers
    log-directory = "leadline-logs"
    python = "/home/me/leadline/.venv/bin/python"   # interpreter on the compute nodes
    directives = ["--constraint=cpu"]               # extra #SBATCH / #PBS lines
    setup = ["module load python/3.11"]             # shell lines before the worker starts

Modest defaults: one job of 4 cores and 8 GB for one hour.  Nothing is
submitted unless the user asked for batch mode (``--batch-file``); the
jobs end with the run (the cluster is closed) or at their walltime.
"""

from __future__ import annotations

import re
import shutil
import sys
from dataclasses import dataclass, field
from pathlib import Path

from .errors import BatchConfigError
from .workerenv import SINGLE_THREAD_ENV

__all__ = ["BatchConfig", "load_batch_config", "parse_batch_config", "make_batch_cluster", "MAX_JOBS", "MAX_WALLTIME_H"]

SYSTEMS = {"slurm": "sbatch", "pbs": "qsub"}
#: hard bound on submitted jobs (a typo must not flood a queue)
MAX_JOBS = 256
#: hard bound on walltime per job, hours (7 days)
MAX_WALLTIME_H = 168

_TOP_KEYS = {"system", "jobs", "walltime", "wait-for-workers-s", "job"}
#: keys of earlier releases -> their new name (refused with one line naming it)
_RENAMED = {"wait-for-workers": "wait-for-workers-s"}
_JOB_KEYS = {
    "cores", "memory", "workers", "queue", "account", "interface",
    "local-directory", "log-directory", "python", "directives", "setup",
}


@dataclass(frozen=True)
class BatchConfig:
    """A validated batch-cluster description (see module docstring for the TOML layout)."""

    system: str
    jobs: int = 1
    walltime: str = "01:00:00"
    wait_for_workers_s: float = 600.0
    cores: int = 4
    memory: str = "8GB"
    workers: int | None = None
    queue: str | None = None
    account: str | None = None
    interface: str | None = None
    local_directory: str | None = None
    log_directory: str | None = None
    python: str | None = None
    directives: tuple[str, ...] = field(default_factory=tuple)
    setup: tuple[str, ...] = field(default_factory=tuple)
    source: str = "<memory>"

    @property
    def processes(self) -> int:
        return self.workers if self.workers is not None else self.cores

    @property
    def threads_per_worker(self) -> int:
        return max(1, self.cores // self.processes)

    @property
    def total_threads(self) -> int:
        return self.jobs * self.processes * self.threads_per_worker


def _walltime_hours(text: str) -> float:
    m = re.fullmatch(r"(?:(\d+)-)?(\d{1,3}):(\d{2}):(\d{2})", text)
    if not m or int(m.group(3)) >= 60 or int(m.group(4)) >= 60:
        raise BatchConfigError(f"walltime must look like HH:MM:SS or D-HH:MM:SS, got {text!r}")
    days, h, mi, s = (int(g) if g else 0 for g in m.groups())
    return days * 24 + h + mi / 60 + s / 3600


def _slurm_walltime(text: str) -> str:
    return text  # SLURM accepts both HH:MM:SS and D-HH:MM:SS


def _pbs_walltime(text: str) -> str:
    hours = _walltime_hours(text)
    total = round(hours * 3600)
    return f"{total // 3600:02d}:{total % 3600 // 60:02d}:{total % 60:02d}"


def parse_batch_config(data: dict, source: str = "<memory>") -> BatchConfig:
    """Validate a parsed TOML document; raises BatchConfigError naming the file and key."""

    def bad(msg: str) -> BatchConfigError:
        return BatchConfigError(f"{source}: {msg}")

    unknown = set(data) - _TOP_KEYS
    for key in sorted(unknown & set(_RENAMED)):
        raise bad(f"{key} is now called {_RENAMED[key]} (same meaning, in seconds); rename the key")
    if unknown:
        raise bad(f"unknown key(s) {', '.join(sorted(unknown))}; allowed: {', '.join(sorted(_TOP_KEYS))}")
    job = data.get("job", {})
    if not isinstance(job, dict):
        raise bad("[job] must be a table")
    unknown = set(job) - _JOB_KEYS
    if unknown:
        raise bad(f"unknown key(s) in [job]: {', '.join(sorted(unknown))}; allowed: {', '.join(sorted(_JOB_KEYS))}")

    system = data.get("system")
    if not isinstance(system, str) or system.lower() not in SYSTEMS:
        raise bad(f"system must be one of {', '.join(SYSTEMS)}, got {system!r}")

    def integer(table, key, default, lo, hi, where=""):
        v = table.get(key, default)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise bad(f"{where}{key} must be an integer in {lo}..{hi}, got {v!r}")
        return v

    def text(table, key, default=None, where="[job] "):
        v = table.get(key, default)
        if v is not None and (not isinstance(v, str) or not v.strip()):
            raise bad(f"{where}{key} must be a non-empty string, got {v!r}")
        return v

    def lines(table, key):
        v = table.get(key, [])
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise bad(f"[job] {key} must be a list of strings")
        return tuple(v)

    jobs = integer(data, "jobs", 1, 1, MAX_JOBS)
    walltime = text(data, "walltime", "01:00:00", where="")
    try:
        hours = _walltime_hours(walltime)
    except BatchConfigError as exc:
        raise bad(str(exc)) from None
    if not 0 < hours <= MAX_WALLTIME_H:
        raise bad(f"walltime must be positive and at most {MAX_WALLTIME_H} hours, got {walltime}")
    wait = data.get("wait-for-workers-s", 600)
    if isinstance(wait, bool) or not isinstance(wait, (int, float)) or not wait > 0:
        raise bad(f"wait-for-workers-s must be a positive number of seconds, got {wait!r}")
    cores = integer(job, "cores", 4, 1, 4096, "[job] ")
    workers = integer(job, "workers", None, 1, cores, "[job] ")
    memory = text(job, "memory", "8GB")
    if not re.fullmatch(r"\d+(\.\d+)?\s*[KMGT]i?B", memory, flags=re.I):
        raise bad(f"[job] memory must look like 8GB or 7.5GiB, got {memory!r}")
    return BatchConfig(
        system=system.lower(),
        jobs=jobs,
        walltime=walltime,
        wait_for_workers_s=float(wait),
        cores=cores,
        memory=memory,
        workers=workers,
        queue=text(job, "queue"),
        account=text(job, "account"),
        interface=text(job, "interface"),
        local_directory=text(job, "local-directory"),
        log_directory=text(job, "log-directory"),
        python=text(job, "python"),
        directives=lines(job, "directives"),
        setup=lines(job, "setup"),
        source=source,
    )


def load_batch_config(path) -> BatchConfig:
    """Read and validate a batch-cluster TOML file."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        try:
            import tomli as tomllib
        except ModuleNotFoundError:
            raise BatchConfigError("reading a batch file needs Python >= 3.11 (tomllib) or the tomli package") from None

    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise BatchConfigError(f"cannot read batch file {path}: {exc.strerror or exc}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise BatchConfigError(f"{path}: not valid TOML: {exc}") from None
    return parse_batch_config(data, source=str(path))


def cluster_kwargs(config: BatchConfig) -> dict:
    """Keyword arguments of the dask-jobqueue cluster class for ``config``."""
    exports = [f"export {k}={v}" for k, v in SINGLE_THREAD_ENV.items()]
    kw = dict(
        cores=config.cores,
        processes=config.processes,
        memory=config.memory,
        queue=config.queue,
        account=config.account,
        interface=config.interface,
        local_directory=config.local_directory,
        log_directory=config.log_directory,
        python=config.python or sys.executable,
        job_extra_directives=list(config.directives),
        job_script_prologue=exports + list(config.setup),
        job_name="leadline",
        walltime=_slurm_walltime(config.walltime) if config.system == "slurm" else _pbs_walltime(config.walltime),
    )
    return {k: v for k, v in kw.items() if v is not None}


def make_batch_cluster(config: BatchConfig, *, submit: bool = True):
    """Start the jobqueue cluster object (its scheduler runs here) and, if ``submit``, the jobs.

    Raises BatchConfigError if the submit command of the batch system is not on PATH.
    """
    from dask_jobqueue import PBSCluster, SLURMCluster

    command = SYSTEMS[config.system]
    if submit and shutil.which(command) is None:
        raise BatchConfigError(
            f"{config.source}: batch system {config.system!r} needs `{command}` on PATH; "
            "run from a login node of the cluster, or drop --batch-file"
        )
    cls = SLURMCluster if config.system == "slurm" else PBSCluster
    cluster = cls(**cluster_kwargs(config))
    if submit:
        cluster.scale(jobs=config.jobs)
    return cluster
