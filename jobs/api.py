"""The Python API: what the command line does, as functions for notebooks and scripts.

``import leadline`` exposes these names (imported on first use, so the import
itself stays light).  Each function returns the result object whose
``to_json()`` is what the matching command prints with ``--json``; the
examples in docs/api.md are run by the tests.

Bad input raises :class:`leadline.jobs.errors.InputError` (a ``ValueError``)
with the same one-line message the command line prints.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator, Sequence

import numpy as np

from .errors import InputError
from .ladders import Ladder, bath_ladder, optimize_ladder, sparse_ladder

if TYPE_CHECKING:
    from leadline.kernels.exact import Evaluation
    from leadline.kernels.mixture import Mixture
    from leadline.kernels.reference import References
    from leadline.kernels.sparse import SparseEvaluation
    from leadline.storage.reader import StudyReader

__all__ = [
    "evaluate",
    "optimize",
    "evaluate_sparse",
    "optimize_sparse",
    "evaluate_bath",
    "reference_energies",
    "transfer",
    "sweep",
    "resume",
    "status",
    "open_study",
    "study_dataframe",
    "Ladder",
    "StudyRun",
    "Transfer",
]


def _blas_capped(func):
    """Run an API function with BLAS capped as on the command line (``LEADLINE_BLAS_THREADS``,
    default 1; see cluster/workerenv.py); the process's own setting is restored afterwards."""
    import functools

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        from leadline.cluster.workerenv import in_process_blas, in_process_threads

        try:
            threads = in_process_threads()
        except ValueError as exc:
            raise InputError(str(exc)) from None
        with in_process_blas(threads):
            return func(*args, **kwargs)

    return wrapper


def _keywords(func):
    """Refuse an old keyword (``gtol=``, ``memory_mb=``, ...) with one line naming the new one
    (jobs/renames.py), instead of Python's bare "unexpected keyword argument"."""
    import functools
    import inspect

    parameters = frozenset(inspect.signature(func).parameters)

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        for keyword in kwargs:
            if keyword not in parameters:
                from .renames import renamed_keyword

                text = renamed_keyword(func.__name__, keyword, parameters)
                if text is not None:
                    raise TypeError(text)
        return func(*args, **kwargs)

    return wrapper


# ----------------------------------------------------------------- helpers
def _mixture(xi) -> "Mixture":
    from leadline.kernels.mixture import Mixture

    from .parsing import mixture_arg

    if isinstance(xi, Mixture):
        return xi
    return mixture_arg(None if xi is None else str(xi), option="xi")


def _angles(gamma, beta) -> tuple[np.ndarray, np.ndarray]:
    g = np.atleast_1d(np.asarray(gamma, dtype=float))
    b = np.atleast_1d(np.asarray(beta, dtype=float))
    if g.ndim != 1 or g.size == 0 or g.size != b.size or b.ndim != 1:
        raise InputError(f"gamma and beta need the same number p >= 1 of angles, got {g.size} and {b.size}")
    if not (np.all(np.isfinite(g)) and np.all(np.isfinite(b))):
        raise InputError("angles must be finite")
    from .angles import check_periodic_angles

    check_periodic_angles(b, "beta", "beta_t", "pi")
    return g, b


def _start(angles, depth: int):
    """An angle file path, an AngleSet or (gamma, beta) of depth p-1 or p -> AngleSet or None."""
    from .angles import AngleSet
    from .parsing import check_start_depth, warm_start

    if angles is None:
        return None
    if isinstance(angles, (str, Path)):
        return warm_start(str(angles), depth)
    if isinstance(angles, AngleSet):
        start = angles
    else:
        g, b = _angles(*angles)
        start = AngleSet(p=g.size, gamma=g, beta=b, xi=None, value=None)
    check_start_depth(start.p, depth, "angles")
    return start


@contextlib.contextmanager
def _executor(executor: str, scheduler: str | None, workers: int | None, memory_mib: float,
              batch_file: str | Path | None = None) -> Iterator[Any]:
    """An executor like the command line's (quiet), closed on exit."""
    from . import compute

    batch = None if batch_file is None else str(batch_file)
    settings = compute.settings_from_options(executor, scheduler, workers, 1, memory_mib, batch, True)
    with compute.open_compute(settings) as ex:
        yield ex


def _budget(memory_mib: float) -> int:
    from .parsing import check_memory_mib

    return int(check_memory_mib(memory_mib, "memory_mib") * 2**20)


# ----------------------------------------------------------------- dense
@_keywords
@_blas_capped
def evaluate(
    xi,
    gamma: Sequence[float],
    beta: Sequence[float],
    *,
    gradient: bool = False,
    check_fixed_point: bool = False,
    memory_mib: float = 256.0,
    executor: str = "auto",
    scheduler: str | None = None,
    workers: int | None = None,
    batch_file: str | Path | None = None,
) -> "Evaluation":
    """Exact infinite-size QAOA energy density V_p(gamma, beta) of a mixed-spin glass.

    Parameters
    ----------
    xi : str or Mixture
        The mixture as ``q:w`` pairs, xi(x) = sum w x^q: ``"2:0.5"`` is the SK
        model (i<j pairs), ``"3:1"`` the pure 3-spin model.
    gamma, beta : sequence of float
        Angles g_1..g_p and b_1..b_p in radians (t = 1 acts first).
    gradient : bool
        Also compute dV/dgamma and dV/dbeta (reverse mode, about 3x one evaluation).
    check_fixed_point : bool
        One extra pass; ``residuals["fixed_point"]`` = max|G_(p+1) - G_p|.
    memory_mib : float
        Memory budget of one chunk task (sets the chunk plan).
    executor, scheduler, workers, batch_file
        Where passes run, as on the command line: ``"auto"``, ``"inprocess"``,
        ``"local"``, ``"scheduler"`` (the Dask scheduler at ``scheduler="tcp://host:8786"``),
        ``"batch"`` (SLURM/PBS jobs described by the TOML file ``batch_file``; docs/clusters.md).

    Returns
    -------
    Evaluation
        ``.value``, ``.gradient`` (dict of arrays or None), ``.residuals``,
        ``.plan``, ``.wall_time``; ``.to_json()`` is what
        ``leadline evaluate --json`` prints.

    Examples
    --------
    >>> import leadline
    >>> round(leadline.evaluate("2:0.5", [0.5], [0.392699]).value, 6)
    0.303265
    """
    from leadline.kernels.exact import evaluate as evaluate_kernel, plan_chunks

    from .cost import check_depth
    from .parsing import check_representable, check_underflow

    mix = _mixture(xi)
    g, b = _angles(gamma, beta)
    check_representable(mix, g, "gamma", beta=b)  # the same range as the command line
    check_depth(g.size, "gamma/beta")
    plan = plan_chunks(g.size, _budget(memory_mib))
    with _executor(executor, scheduler, workers, memory_mib, batch_file) as ex:
        result = evaluate_kernel(mix, g, b, plan=plan, run_pass=ex.run_pass, gradient=gradient,
                                 fixed_point_check=check_fixed_point)
    check_underflow(result.value, mix, g, "gamma")
    return result


@_keywords
@_blas_capped
def optimize(
    xi,
    depth: int,
    *,
    angles=None,
    restarts: int | None = None,
    seed: int = 0,
    gradient_tol: float = 1e-7,
    max_iterations: int = 500,
    memory_mib: float | None = None,
    executor: str = "auto",
    scheduler: str | None = None,
    workers: int | None = None,
    batch_file: str | Path | None = None,
    method: str = "exact",
    tolerance: float | None = None,
    fock: int | None = None,
    bond: int | None = None,
) -> Ladder:
    """Optimal angles and V_p* at depth ``depth`` (maximizes V_p).

    Without ``angles`` the depths 1..depth are optimized in turn, each
    warm-starting the next by interpolation (INTERP); with ``angles`` of depth
    ``depth - 1`` only ``depth`` is optimized, warm-started from them; angles
    of depth ``depth`` are used as the starting point.

    Parameters
    ----------
    xi : str or Mixture
        The mixture, e.g. ``"2:0.5"`` (SK) or ``"3:1"``.
    depth : int
        Depth p >= 1.
    angles : path, AngleSet or (gamma, beta), optional
        Start, as ``leadline optimize --angles``.
    restarts : int, optional
        Extra seeded starts per depth (default 8 at p <= 2, 4 at p <= 4, 2 at p <= 8, else 0).
    seed, gradient_tol, max_iterations
        Seed of the random starts; gradient tolerance; iteration cap per local run.
    memory_mib, executor, scheduler, workers, batch_file
        As for :func:`evaluate` (``memory_mib``: exact method only, default 256).
    method : str
        ``"exact"`` (default: the exact iteration and its reverse-mode gradient) or
        ``"bath"`` (the bosonic-bath engine with finite differences, for depths past
        exact reach; docs/bath.md).  With ``"bath"``, ``result.error_estimate`` is the
        engine's estimate of V_p*'s truncation error and restarts default to none
        after a warm start.
    tolerance, fock, bond
        Bath engine settings (method ``"bath"`` only), as ``--tolerance/--fock/--bond``: the
        error asked of every evaluation (default 1e-6), the Fock-level and bond caps.

    Returns
    -------
    Ladder
        ``.value``, ``.gamma``, ``.beta`` (canonical form), ``.result`` (the
        full optimizer record of the last depth), ``.ladder``; ``.to_json()``
        is what ``leadline optimize --json`` prints.
    """
    from .bath import check_optimize_method, engine_settings
    from .cost import check_depth
    from .parsing import check_optimizer_options

    mix = _mixture(xi)
    depth = check_optimizer_options(depth, restarts, gradient_tol, max_iterations, seed)
    use_bath = check_optimize_method(method, tolerance=tolerance, fock=fock, bond=bond, memory_mib=memory_mib)
    if not use_bath:
        check_depth(depth, "depth")
    initial = _start(angles, depth)
    if use_bath:
        with _executor(executor, scheduler, workers, 256.0, batch_file) as ex:
            return bath_ladder(mix, depth, initial, run_map=ex.run_map, engine=engine_settings(tolerance, fock, bond),
                               restarts=restarts, seed=seed, gtol=gradient_tol, maxiter=max_iterations)
    memory_mib = 256.0 if memory_mib is None else memory_mib
    budget = _budget(memory_mib)
    with _executor(executor, scheduler, workers, memory_mib, batch_file) as ex:
        return optimize_ladder(mix, depth, initial, run_pass=ex.run_pass, budget=budget, restarts=restarts,
                               seed=seed, gradient_tol=gradient_tol, max_iterations=max_iterations)


# ----------------------------------------------------------------- sparse
def _sparse_problem(q, degree) -> tuple[int, int]:
    from .sparse_ensemble import check_sparse

    return check_sparse(q, degree, None)


@_keywords
@_blas_capped
def evaluate_bath(xi, gamma: Sequence[float], beta: Sequence[float], *, tolerance: float = 1e-6,
                  fock: int = 40, bond: int = 256, time_limit: float | None = None) -> "BathEvaluation":
    """V_p(gamma, beta) from the bosonic-bath engine (any depth), to an error estimate <= tolerance.

    Parameters
    ----------
    xi : str or Mixture
        The mixture as ``q:w`` pairs (``"2:0.5"`` is SK).
    gamma, beta : sequence of float
        Angles in radians (t = 1 acts first).
    tolerance : float
        Error asked for; the engine tightens its truncation until its estimate meets it.
    fock, bond : int
        Most Fock levels per mode and largest bond dimension it may use (as ``--fock``,
        ``--bond``; the JSON's ``truncation`` shows ``bond_cap`` and the ``fock_levels`` used).
    time_limit : float or None
        Wall seconds allowed.

    Returns
    -------
    BathEvaluation
        ``.value``, ``.error_estimate``, ``.limiting`` (the truncation that dominates what is
        left), ``.run`` (its truncation); ``.to_json()`` as ``evaluate --method bath --json``.
        Raises InputError (one line) when the tolerance cannot be met within the limits, or
        when the value cannot be trusted.

    Examples
    --------
    >>> import leadline
    >>> round(leadline.evaluate_bath("2:0.5", [0.5], [0.392699]).value, 6)
    0.303265
    """
    from .commands._evaluate_bath import run_checked

    mix = _mixture(xi)
    g, b = _angles(gamma, beta)
    return run_checked(mix, g, b, tolerance=tolerance, bond=bond, fock=fock, time_limit=time_limit)


@_keywords
@_blas_capped
def evaluate_sparse(q: int, degree, gamma: Sequence[float], beta: Sequence[float], *,
                    gradient: bool = False) -> "SparseEvaluation":
    """Satisfied fraction nu_p(D; gamma, beta) of Max-q-XORSAT on D-regular hypergraphs of large girth.

    Parameters
    ----------
    q : int
        Constraint size (q = 2 is MaxCut; the value is then the cut fraction).
    degree : int
        Every spin is in ``degree`` constraints (D >= 2; ``1e6`` is fine).
    gamma, beta : sequence of float
        Angles in radians; gamma multiplies the number of satisfied constraints.
    gradient : bool
        Also d nu / d(gamma, beta).

    Returns
    -------
    SparseEvaluation
        ``.value``, ``.correlator``, ``.gradient``, ``.residuals``; ``.to_json()``
        plus ``"ensemble"`` is what ``leadline evaluate --sparse-q Q --degree D --json`` prints.

    Examples
    --------
    >>> import leadline
    >>> round(leadline.evaluate_sparse(2, 3, [0.6154797], [0.3926991]).value, 6)
    0.69245
    """
    from leadline.kernels.sparse import evaluate_sparse as kernel

    from .angles import check_periodic_angles

    q, D = _sparse_problem(q, degree)
    g, b = _angles(gamma, beta)
    check_periodic_angles(g, "gamma", "gamma_t", "2 pi")
    return kernel(q, D, g, b, gradient=gradient)


@_keywords
@_blas_capped
def optimize_sparse(q: int, degree, depth: int, *, angles=None, restarts: int | None = None, seed: int = 0,
                    gradient_tol: float = 1e-7, max_iterations: int = 500) -> Ladder:
    """Optimal angles and nu_p* of Max-q-XORSAT on D-regular large-girth hypergraphs.

    Depths 1..depth in turn (INTERP warm starts), or only ``depth`` from
    ``angles`` (as in :func:`optimize`).  Default restarts: 3 at p <= 2, 1 at
    p <= 6, else 0.

    Returns
    -------
    Ladder
        ``.to_json()`` is what ``leadline optimize --sparse-q Q --degree D --json`` prints.
    """
    from leadline.kernels.sparse import optimize_sparse as kernel

    from .parsing import check_optimizer_options
    from .sparse_ensemble import ensemble_json

    q, D = _sparse_problem(q, degree)
    depth = check_optimizer_options(depth, restarts, gradient_tol, max_iterations, seed)
    initial = _start(angles, depth)
    return sparse_ladder(kernel, q, D, depth, initial, restarts=restarts, seed=seed, gradient_tol=gradient_tol, max_iterations=max_iterations,
                         ensemble=ensemble_json(q, D))


# ----------------------------------------------------------------- references
@_keywords
@_blas_capped
def reference_energies(xi, *, gs_tol: float = 1e-4, alg_tol: float = 1e-3, max_steps: int = 10,
                       cache: bool = True, cache_dir: str | Path | None = None) -> "References":
    """Ground-state energy density GS and algorithmic threshold ALG of a mixture.

    Same computation and cache as ``leadline reference --xi``.

    Parameters
    ----------
    xi : str or Mixture
        The mixture (``"2:0.5"``: SK, GS = 0.763166).
    gs_tol, alg_tol : float
        Stop adding steps when GS (ALG) moves by less than this (1e-7 .. 0.1).
    max_steps : int
        Largest number k of steps tried (3 .. 30).
    cache : bool
        Read and write the cache (``cache_dir``, else ``$LEADLINE_CACHE_DIR``,
        else ``~/.cache/leadline``).

    Returns
    -------
    References
        ``.ground_state``, ``.algorithmic_threshold`` (``ReferenceValue``:
        value, uncertainty, ...), ``.overlap_gap``; ``.to_json()`` (plus
        ``"cached"``) is what ``leadline reference --json`` prints.
    """
    from leadline.kernels.reference import ReferenceRangeError, reference_energies as compute

    from . import reference_cache
    from .parsing import check_reference_settings

    mix = _mixture(xi)
    check_reference_settings(gs_tol, alg_tol, max_steps)
    directory = None
    if cache:
        directory = Path(cache_dir) if cache_dir is not None else reference_cache.default_cache_dir()
    key = reference_cache.cache_key(mix.spec(), gs_tol, alg_tol, max_steps)
    refs = reference_cache.load(directory, key) if directory is not None else None
    if refs is None:
        try:
            refs = compute(mix, gs_tol=gs_tol, alg_tol=alg_tol, max_steps=max_steps)
        except ReferenceRangeError as exc:
            raise InputError(str(exc)) from None
        if directory is not None:
            with contextlib.suppress(OSError):
                reference_cache.store(directory, key, refs)
    return refs


# ----------------------------------------------------------------- transfer
class Transfer(dict):
    """What ``leadline transfer --json`` prints, as a dict (``["ratio"]``, ``["gamma"]``, ``["notes"]``, ...)."""

    def to_json(self) -> dict:
        return dict(self)


@_keywords
@_blas_capped
def transfer(instance: str | Path, *, angles: str | Path | None = None, store: str | Path | None = None,
             ensemble: str | None = None, depth: int | None = None, max_spins: int | None = None,
             shape_tolerance: float | None = None, seed: int = 0, output: str | Path | None = None) -> Transfer:
    """Angles for a concrete instance file: rescaled ensemble angles, predicted <C>, exact check at small n.

    As ``leadline transfer`` (docs/transfer.md): give ``angles`` (an angle file), ``store`` (a
    study; ``ensemble`` and ``depth`` pick the optimum) or ``depth`` alone (optimize for the
    instance's own mixture).  ``output`` writes the instance-unit angles as CSV.

    Returns
    -------
    Transfer
        A dict: ``xi``, ``gamma``, ``beta`` (instance units), ``predicted``, ``expectation``,
        ``best``, ``ratio``, ``notes``, ...; ``.to_json()`` is what ``--json`` prints.
    """
    from .commands import transfer as command

    def text(x):
        return None if x is None else str(x)

    options = {}
    if max_spins is not None:
        options["max_spins"] = int(max_spins)
    if shape_tolerance is not None:
        options["shape_tolerance"] = float(shape_tolerance)
    return Transfer(command.transfer_instance(
        text(instance), angles=text(angles), store=text(store), ensemble=ensemble, depth=depth, seed=seed,
        output=text(output), quiet=True, **options,
    ))


# ----------------------------------------------------------------- studies
@dataclass
class StudyRun:
    """What :func:`sweep` or :func:`resume` did, and the study's rows afterwards.

    Attributes
    ----------
    store : Path
        The study store.
    finished_now : list of dict
        One record per depth finished by this call (``label``, ``p``, ``result``,
        ``timings``), as in ``leadline sweep --json``.
    progress : dict
        What ``leadline status --json`` prints (``progress["complete"]``, ...).
    rows : list of dict
        Every finished depth of the study, one dict per (ensemble, p), with the columns of
        :func:`study_dataframe`.
    """

    store: Path
    finished_now: list
    progress: dict
    rows: list

    @property
    def complete(self) -> bool:
        return bool(self.progress.get("complete"))

    def to_json(self) -> dict:
        """The object ``leadline sweep --json`` (and ``resume --json``) prints."""
        return {"store": str(self.store), "finished_now": list(self.finished_now), "progress": self.progress}


def _run_study(prepare, open_store, *, creating: bool, store_path: Path, quiet: bool) -> StudyRun:
    """The sweep (or resume) loop of the command line, with its errors as exceptions:
    InputError for the store's and the spec's problems, OSError (the command's message) when
    the system refused a write, KeyboardInterrupt (saying what was kept) on Ctrl-C."""
    from leadline.storage.errors import StoreError

    from .commands import sweep as command
    from .sweep import depth_line

    def report(line: dict) -> None:
        if not quiet:
            print(depth_line(line), flush=True)

    def stopped(exc, path):
        return KeyboardInterrupt(command.stopped_text("interrupted", path))

    try:
        spec, settings = prepare()
        path, lines = command.run_into(lambda: open_store(spec), spec, settings, report=report, stopped=stopped)
    except StoreError as exc:
        raise InputError(str(exc)) from None
    except OSError as exc:
        raise OSError(exc.errno, command.write_failed_text(exc, store_path, creating)) from None
    reader = open_study(path)
    return StudyRun(store=Path(path), finished_now=lines, progress=reader.progress(), rows=study_rows(reader))


def _where_overrides(workers, batch_file):
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise InputError(f"workers must be an integer >= 1, got {workers!r}")
    if batch_file is not None and not Path(batch_file).is_file():
        raise InputError(f"batch_file: file {batch_file} does not exist")


@_keywords
@_blas_capped
def sweep(spec, *, executor: str | None = None, scheduler: str | None = None, workers: int | None = None,
          batch_file: str | Path | None = None, quiet: bool = True) -> StudyRun:
    """Run a depth study, as ``leadline sweep SPEC.toml``: every ensemble at p = pmin..pmax,
    warm-started, checkpointed into a new Zarr store (the spec's ``[study] store``).

    Parameters
    ----------
    spec : path or dict
        The study spec (docs/cli.md): a TOML file, or a dict of its tables with the keys
        spelled as in the file (``{"study": {"name": ..., "store": ...}, "depths": {"pmax": 3},
        "ensemble": [{"label": "sk", "xi": "2:0.5"}]}``; relative paths from the working folder).
    executor : str, optional
        Where passes run, overriding ``[compute]`` for this run: ``"auto"``, ``"inprocess"``,
        ``"local"``, ``"scheduler"`` (with ``scheduler``), ``"batch"`` (with ``batch_file``).
    scheduler : str, optional
        Address of a running Dask scheduler (``"tcp://host:8786"``).
    workers : int, optional
        Worker processes of a local Dask cluster.
    batch_file : path, optional
        Batch-cluster TOML file (docs/clusters.md).
    quiet : bool
        False: print a line per finished depth and the progress bars, as the command does.

    Returns
    -------
    StudyRun
        ``.rows`` (every finished depth), ``.finished_now``, ``.progress``, ``.store``;
        ``.to_json()`` is what ``leadline sweep --json`` prints.  If it stops (Ctrl-C raises
        KeyboardInterrupt saying what was kept, a crash, a kill), :func:`resume` continues it
        exactly where it was.
    """
    from .commands import sweep as command
    from .spec import load_spec, spec_from_dict
    from .sweep import create_store

    _where_overrides(workers, batch_file)
    parsed = spec_from_dict(spec) if isinstance(spec, dict) else load_spec(spec)

    def prepare():
        return parsed, command.prepare_sweep(parsed, executor, scheduler, workers, batch_file, quiet)

    return _run_study(prepare, create_store, creating=True, store_path=parsed.store, quiet=quiet)


@_keywords
@_blas_capped
def resume(store: str | Path, *, executor: str | None = None, scheduler: str | None = None,
           workers: int | None = None, batch_file: str | Path | None = None, quiet: bool = True,
           pmax: int | None = None) -> StudyRun:
    """Continue a stopped study, as ``leadline resume STORE``: finished depths, passes and
    chunks are not recomputed, and the numbers are those of an uninterrupted run.

    ``executor``, ``scheduler``, ``workers``, ``batch_file`` and ``quiet`` as for
    :func:`sweep` (the chunk plan stays the spec's).  A complete study returns at once.
    ``pmax`` continues the study deeper, as ``--pmax``: the store's [depths] pmax is raised to it
    for good (never lowered), and the new depths are warm-started from the finished ones.

    Returns
    -------
    StudyRun
        As :func:`sweep`; ``.to_json()`` is what ``leadline resume --json`` prints.
    """
    import os

    from leadline.kernels.exact import IMPLEMENTATION_ENV

    from .commands import sweep as command

    _where_overrides(workers, batch_file)
    path = Path(store)

    def prepare():
        return command.prepare_resume(path, executor, scheduler, workers, batch_file, quiet, pmax=pmax,
                                      pmax_name="pmax")

    kernel = os.environ.get(IMPLEMENTATION_ENV)
    try:
        return _run_study(prepare, lambda spec: command.open_for_resume(path, spec), creating=False,
                          store_path=path, quiet=quiet)
    finally:  # the study's chunk kernel is pinned for the resume only, not for the rest of the session
        if kernel is None:
            os.environ.pop(IMPLEMENTATION_ENV, None)
        else:
            os.environ[IMPLEMENTATION_ENV] = kernel


def status(store: str | Path) -> dict:
    """How far a study got, as ``leadline status STORE --json``: depths done per ensemble, the
    one in progress, what is left, the writer (if any) and the estimated time left.

    Reads only (never takes the lock), so it works while a sweep runs.

    Returns
    -------
    dict
        ``complete``, ``depths``, ``ensembles`` (per ensemble: ``done``, ``running``, ``todo``),
        ``lock``, ``estimated_seconds_left``, ... (docs/store.md).
    """
    return open_study(store).progress()


def open_study(path: str | Path) -> "StudyReader":
    """Open a study store (written by ``leadline sweep``) for reading; never takes the lock.

    Returns
    -------
    StudyReader
        ``.name``, ``.spec``, ``.ensembles()``, ``.ensemble(label)``,
        ``.depths(label)`` (finished depths), ``.depth(label, p)``,
        ``.progress()`` (what ``leadline status --json`` prints),
        ``.lock_holder()``.  See docs/store.md.
    """
    from leadline.storage.errors import StoreError
    from leadline.storage.reader import open_study as open_reader

    try:
        return open_reader(path)
    except StoreError as exc:
        raise InputError(str(exc)) from None


def study_dataframe(study) -> Any:
    """The finished depths of a study as a pandas DataFrame, one row per (ensemble, p).

    Needs pandas (``pip install 'leadline[pandas]'``).

    Parameters
    ----------
    study : path or StudyReader
        A study store or an open reader.

    Returns
    -------
    pandas.DataFrame
        Columns ``ensemble``, ``kind`` ("dense" or "sparse"), ``xi`` (q:w spec or
        None), ``q``, ``degree`` (sparse, else None), ``p``, ``value`` (V_p*, or
        nu_p* for sparse), ``gradient_norm``, ``evaluations``, ``converged``,
        ``wall_time_s``, ``gamma``, ``beta`` (lists, radians, t = 1 first).
    """
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover - depends on the installation
        raise ImportError("study_dataframe needs pandas: pip install 'leadline[pandas]'") from None
    reader = study if hasattr(study, "depths") else open_study(study)
    return pd.DataFrame(study_rows(reader), columns=list(ROW_COLUMNS))


#: the columns of :func:`study_rows` and :func:`study_dataframe`
ROW_COLUMNS = ("ensemble", "kind", "xi", "q", "degree", "p", "value", "gradient_norm", "evaluations",
               "converged", "wall_time_s", "gamma", "beta")


def study_rows(reader) -> list[dict]:
    """The finished depths of an open study, one dict per (ensemble, p) (the DataFrame's rows)."""
    rows = []
    for label in reader.ensembles():
        meta = reader.ensemble(label)
        for d in reader.depths(label):
            rows.append({
                "ensemble": label,
                "kind": meta.get("kind", "dense"),
                "xi": meta.get("xi"),
                "q": meta.get("q"),
                "degree": meta.get("degree"),
                "p": int(d["p"]),
                "value": d["value"],
                "gradient_norm": d.get("gradient_norm"),
                "evaluations": d.get("evaluations"),
                "converged": d.get("converged"),
                "wall_time_s": d.get("wall_time_s"),
                "gamma": list(d["gamma"]),
                "beta": list(d["beta"]),
            })
    return rows
