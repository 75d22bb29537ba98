"""`leadline sweep SPEC.toml`, `leadline resume STORE`, `leadline status STORE`.

Thin: validate (spec, store path, compute settings) before anything is
written, then call ``leadline.jobs.sweep``; store and lock problems become one
stderr line with exit code 2.
"""

from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path
from typing import Optional

import typer

from leadline.kernels.exact import IMPLEMENTATION_ENV
from leadline.kernels.numtext import fmt
from leadline.storage.errors import StoreError

from .. import compute
from ..errors import InputError, Stopped
from ..spec import check_new_store, load_spec, spec_from_json
from ._sparse import check_sweep_sparse


def _store_errors(func):
    """Turn store problems (locked, wrong schema, not a store) into one-line input errors,
    and a failed integrity check of a pass into one error line (exit 1)."""
    import functools

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        from leadline.kernels.exact import PassIntegrityError
        from leadline.kernels.sparse import SparseIntegrityError

        try:
            return func(*args, **kwargs)
        except StoreError as exc:
            raise InputError(str(exc)) from None
        except (PassIntegrityError, SparseIntegrityError) as exc:
            import click

            # one line, exit 1: the finished chunks and depths are kept; the depth stays "running"
            raise click.ClickException(
                f"{exc}; the store keeps every finished depth and chunk, and `leadline resume` recomputes the rest"
            ) from None

    return wrapper


def write_failed_text(exc: OSError, store: Path, creating: bool) -> str:
    """What to say when the operating system refused a write (full disk, file-size limit, ...).

    Every store write is ordered so that a failure at any point leaves a store that resume
    can use (as a kill does), and a store being created is removed with its hidden folder.
    """
    from ..paths import os_error_text

    try:  # as the user would type it: relative to the working folder when inside it
        shown = Path(store).resolve().relative_to(Path.cwd())
    except (OSError, ValueError):
        shown = Path(store)
    store = shown
    if creating and not Path(store).exists():
        return f"could not create store {store}: {os_error_text(exc)}; nothing was created"
    return (
        f"writing store {store} failed: {os_error_text(exc)}; every finished depth and checkpoint written before "
        f"is kept: make room, then `leadline resume {store}`"
    )


def _write_failed(exc: OSError, store: Path, creating: bool):
    """The command line's error line (exit 1) for :func:`write_failed_text`."""
    import click

    return click.ClickException(write_failed_text(exc, store, creating))


def run_into(open_store, spec, settings, *, report=None, stopped=None) -> tuple[Path, list[dict]]:
    """Start the executor, then open (or create) the store and sweep holding its lock.

    The executor comes first so that an unreachable scheduler or a bad batch file is
    reported before the store is created.  Returns the store's path and one record per
    depth finished now (``report(record)`` after each).  When Ctrl-C (or SIGTERM, under
    :func:`_sigterm_as_exit`) stops it, the lock is released and the passes computed so far
    are written; then ``stopped(exc, store_path)`` gives the exception to raise instead.
    """
    from ..sweep import run_study

    store_path = None
    try:
        with compute.open_compute(settings) as executor:
            with open_store() as store:
                store_path = store.path
                lines = run_study(store, spec, executor, report=report)
    except (KeyboardInterrupt, _Terminated) as exc:
        if stopped is None:
            raise
        raise stopped(exc, store_path) from None
    return store_path, lines


def _run(open_store, spec, settings, as_json: bool, quiet: bool) -> None:
    """The command line's run: a line per finished depth (or one JSON object), what was kept
    when stopped, and the status report at the end."""
    from leadline.storage import open_study

    from ..sweep import depth_line

    def report(line: dict) -> None:
        if not as_json:
            typer.echo(depth_line(line))

    def stopped(exc, store_path):
        # the lock is released and the passes computed so far are written: say what is kept
        why = "interrupted" if isinstance(exc, KeyboardInterrupt) else "stopped by SIGTERM"
        code = 130 if isinstance(exc, KeyboardInterrupt) else int(exc.code)
        return Stopped(stopped_text(why, store_path), code)

    with _sigterm_as_exit():
        store_path, lines = run_into(open_store, spec, settings, report=report, stopped=stopped)
    if as_json:
        typer.echo(json.dumps({"store": str(store_path), "finished_now": lines, "progress": open_study(store_path).progress()}))
    elif not quiet:
        typer.echo(status_text(open_study(store_path).progress()))


class _Terminated(SystemExit):
    pass


def _sigterm_as_exit():
    """SIGTERM (a batch system's time limit, `kill`) unwinds like Ctrl-C: passes computed
    since the last checkpoint are written and the lock is released."""
    import contextlib
    import signal
    import threading

    @contextlib.contextmanager
    def guard():
        if threading.current_thread() is not threading.main_thread():
            yield
            return

        def handler(signum, frame):
            raise _Terminated(128 + signum)

        previous = signal.signal(signal.SIGTERM, handler)
        try:
            yield
        finally:
            signal.signal(signal.SIGTERM, previous)

    return guard()


@_store_errors
def sweep_command(
    spec_path: Path = typer.Argument(..., metavar="SPEC.toml", help="Study spec (TOML); every key is described in docs/cli.md."),
    executor: Optional[str] = typer.Option(None, "--executor", help="Override [compute] executor for this run: auto, inprocess, local, scheduler, batch."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", help="Override [compute] scheduler (address of a running Dask scheduler)."),
    workers: Optional[int] = typer.Option(None, "--workers", help="Override [compute] workers."),
    batch_file: Optional[Path] = typer.Option(None, "--batch-file", help="Override [compute] batch-file (batch-cluster TOML)."),
    quiet: bool = compute.quiet_option(),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object at the end instead of report lines."),
) -> None:
    """Run a depth sweep: for each ensemble, optimize p = pmin..pmax with warm starts, checkpointing into a Zarr store.

    Example:

        leadline sweep study.toml          # creates the store named in [study] store

    If it stops (killed, crashed, out of time), `leadline resume STORE` continues exactly where it was.
    Where passes run is the spec's [compute] unless --executor, --scheduler, --workers or --batch-file
    say otherwise (for this run only; `resume` takes the same options).
    """
    from ..sweep import create_store

    spec = load_spec(spec_path)
    _check_overrides(workers, batch_file)
    settings = prepare_sweep(spec, executor, scheduler, workers, batch_file, quiet=quiet or as_json)
    try:
        _run(lambda: create_store(spec), spec, settings, as_json, quiet)
    except OSError as exc:
        raise _write_failed(exc, spec.store, creating=True) from None


def prepare_sweep(spec, executor=None, scheduler=None, workers=None, batch_file=None, quiet=True):
    """Everything a new sweep checks before it writes anything; returns its compute settings.

    The store must not exist yet; ``executor``, ``scheduler``, ``workers``, ``batch_file``
    (None: the spec's [compute]) change where passes run, as they do for `resume`."""
    check_new_store(spec.store)
    settings = _settings_with(spec, executor, scheduler, workers, batch_file, quiet)
    check_sweep_sparse(spec, settings)
    return settings


@_store_errors
def resume_command(
    store_path: Path = typer.Argument(..., metavar="STORE", help="Study store written by `leadline sweep`."),
    executor: Optional[str] = typer.Option(None, "--executor", help="Override [compute] executor: auto, inprocess, local, scheduler, batch."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", help="Override [compute] scheduler (address of a running Dask scheduler)."),
    workers: Optional[int] = typer.Option(None, "--workers", help="Override [compute] workers."),
    batch_file: Optional[Path] = typer.Option(None, "--batch-file", help="Override [compute] batch-file (batch-cluster TOML)."),
    pmax: Optional[int] = typer.Option(
        None, "--pmax", metavar="P",
        help="Continue the study deeper, to depth P: its [depths] pmax is raised for good (recorded in the store); "
             "finished depths are kept and warm-start the new ones."),
    quiet: bool = compute.quiet_option(),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object at the end instead of report lines."),
) -> None:
    """Continue a stopped sweep exactly where it was; finished depths, passes and chunks are not recomputed.

    Examples:

        leadline resume runs/study.zarr

        leadline resume runs/study.zarr --pmax 40    # go on to p = 40

    The chunk plan (memory-mib) stays the one of the spec; where passes run may be changed.
    """
    try:
        spec, settings = prepare_resume(store_path, executor, scheduler, workers, batch_file, quiet or as_json,
                                        pmax=pmax)
        _run(lambda: open_for_resume(store_path, spec), spec, settings, as_json, quiet)
    except OSError as exc:
        raise _write_failed(exc, store_path, creating=False) from None


def prepare_resume(store_path: Path, executor=None, scheduler=None, workers=None, batch_file=None, quiet=True,
                   pmax=None, pmax_name="--pmax"):
    """Everything `resume` checks before it computes: the store (readable, undamaged, not held
    by a live writer), its spec, the overrides of where passes run, a raised deepest depth
    ``pmax`` (None: the spec's; named ``pmax_name`` in messages); returns (spec, settings), the
    spec with the raised pmax (written to the store by :func:`open_for_resume`).
    Pins the chunk kernel the study started with (``LEADLINE_KERNEL``)."""
    from leadline.storage import StudyStore, check_study
    from leadline.storage.study import check_contents

    store_path = Path(store_path)
    attrs = check_study(store_path)
    check_contents(store_path, attrs)  # a damaged store is refused before its spec is used
    # where the store is now (it may have been copied, e.g. to a cluster): a sparse depth's scratch
    # folder goes beside it, not beside the path it was created at
    spec = dataclasses.replace(_stored_spec(store_path, attrs), store=store_path.resolve())
    if pmax is not None:
        spec = _raised(spec, pmax, pmax_name)
    _pin_kernel(attrs.get("kernel"))
    _check_overrides(workers, batch_file)
    settings = _settings_with(spec, executor, scheduler, workers, batch_file, quiet)
    check_sweep_sparse(spec, settings)
    # refuse now if another writer holds it (this open prints what the user should know, once)
    StudyStore.open(store_path, command="resume").close()
    return spec, settings


def _check_overrides(workers, batch_file) -> None:
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be >= 1, got {workers}")
    if batch_file is not None and not Path(batch_file).is_file():
        raise InputError(f"--batch-file: file {batch_file} does not exist")


def _raised(spec, pmax, name: str):
    """``spec`` continued to depth ``pmax`` (checked as `sweep` checks [depths] pmax); the same spec
    when ``pmax`` is its own."""
    from ..spec import _check_depths

    if isinstance(pmax, bool) or not isinstance(pmax, int):
        raise InputError(f"{name} must be a whole number, got {pmax!r}")
    if pmax < spec.pmax:
        raise InputError(f"{name} {pmax} is below the study's pmax {spec.pmax}: a study's depths can be raised, "
                         "not lowered (its finished depths stay in the store)")
    if pmax == spec.pmax:
        return spec
    try:
        _check_depths(spec.ensembles, spec.pmin, pmax)
    except InputError as exc:
        raise InputError(f"{name} {pmax}: {exc}; nothing was changed") from None
    return dataclasses.replace(spec, pmax=pmax)


def open_for_resume(store_path: Path, spec=None):
    """The store of a resume, opened for writing (its lock taken) after :func:`prepare_resume`;
    with the spec :func:`prepare_resume` returned, a raised pmax is written to the store."""
    from leadline.storage import StudyStore
    from leadline.storage.study import utc_now

    from ..spec import raised_spec_text

    store = StudyStore.open(store_path, command="resume", notice=lambda text: None)
    try:
        stored = int(store.spec["depths"]["pmax"])
        if spec is not None and spec.pmax > stored:
            when = utc_now()  # the same moment in the spec text's comment and in the store's list
            store.raise_pmax(spec.pmax, raised_spec_text(store.attrs.get("spec_toml", ""), stored, spec.pmax, when), when)
    except BaseException:
        store.close()
        raise
    return store


def _stored_spec(store_path: Path, attrs: dict):
    """The spec a store was created with, checked again as `sweep` checks a new one.

    A store with an integrity record has its spec's digest checked on open; an older store
    has none, so a spec edited into nonsense (a negative weight, pmax beyond the limit) is
    caught here before it runs."""
    from ..spec import _check_depths

    try:
        spec = spec_from_json(attrs["spec"], attrs.get("spec_toml", ""))
        if not 1 <= spec.pmin <= spec.pmax:
            raise ValueError(f"depths {spec.pmin}..{spec.pmax} are not a range of depths from 1")
        try:  # the limits `sweep` applies: pmax beyond 30 only for ensembles continued by the bath engine
            _check_depths(spec.ensembles, spec.pmin, spec.pmax)
        except InputError as exc:
            raise ValueError(str(exc)) from None
        for ens in spec.ensembles:
            if ens.kind == "dense":
                ens.mixture()
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        detail = f"{exc.args[0]!r} is missing" if isinstance(exc, KeyError) else str(exc)
        raise InputError(
            f"store {store_path} is damaged: its root attribute 'spec' cannot be used ({detail}); nothing was run: "
            "restore the store from a backup (or start a new sweep)"
        ) from None
    return spec


def _pin_kernel(recorded: str | None) -> None:
    """Resume with the chunk kernel the study started with, so replayed numbers match to the bit."""
    if not recorded:
        return
    current = os.environ.get(IMPLEMENTATION_ENV)
    if current is None:
        os.environ[IMPLEMENTATION_ENV] = recorded  # also inherited by local Dask workers
    elif current != recorded:
        typer.echo(
            f"leadline: warning: {IMPLEMENTATION_ENV}={current} but the study started with the {recorded!r} "
            "kernel; new passes may differ from the uninterrupted run in the last digits",
            err=True,
        )


def _settings_with(spec, executor, scheduler, workers, batch_file, quiet):
    """The spec's compute settings with the overrides of `sweep` and `resume` (this run only)."""
    from dataclasses import replace

    from leadline.cluster import ExecutorConfigError

    settings = spec.compute_settings()
    changes: dict = {"quiet": quiet}
    if executor is not None:
        changes["mode"] = executor
        # the spec's address or file stays only for the executor that uses it
        if executor != "scheduler":
            changes["scheduler"] = None
        if executor != "batch":
            changes["batch_file"] = None
    if scheduler is not None:
        changes.update(mode=executor or "scheduler", scheduler=scheduler.strip(), batch_file=None)
    if batch_file is not None:
        changes.update(mode=executor or "batch", batch_file=Path(batch_file).resolve(), scheduler=None)
    if workers is not None:
        changes["workers"] = workers
    try:
        if changes.get("batch_file") is not None:
            from leadline.cluster.batch import load_batch_config

            load_batch_config(changes["batch_file"])
        return replace(settings, **changes).resolved()
    except ExecutorConfigError as exc:
        raise InputError(str(exc)) from None


@_store_errors
def status_command(
    store_path: Path = typer.Argument(..., metavar="STORE", help="Study store written by `leadline sweep`."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of the report."),
) -> None:
    """Show which depths are done, the one in progress (chunks done of the pass in flight) and the time left.

    Example:

        leadline status runs/study.zarr --json
    """
    from leadline.storage import open_study

    progress = open_study(store_path).progress()
    if as_json:
        typer.echo(json.dumps(progress))
    else:
        typer.echo(status_text(progress))


def stopped_text(why: str, store_path) -> str:
    """What a stopped sweep kept and how to go on (printed on stderr)."""
    from leadline.storage import open_study

    if store_path is None:
        return f"{why} before the store was created; nothing was written (run the sweep again)"
    progress = open_study(store_path).progress()
    lines = [f"{why}; saved in {store_path}:"]
    for e in progress["ensembles"]:
        parts = []
        done = [d["p"] for d in e["done"]]
        if done:
            parts.append(f"p = {_ranges(done)} done")
        r = e["running"]
        if r is not None:
            saved = (r.get("bath") or {}).get("evaluations_saved") or (r.get("sparse") or {}).get("evaluations_saved")
            text = (f"p = {r['p']} stopped with {_count(saved, 'evaluation')} saved" if saved
                    else f"p = {r['p']} stopped with {_count(r['passes_saved'], 'pass', 'passes')} saved")
            if r["inflight"] is not None:
                text += f" and {r['inflight']['chunks_done']}/{r['inflight']['n_chunks']} chunks of the next"
            parts.append(text)
        if not parts:
            parts.append("not started")
        lines.append(f"  {e['label']}: " + "; ".join(parts))
    if progress["complete"]:
        lines.append("the study is complete")
    else:
        lines.append(f"continue with: leadline resume {store_path}")
    return "\n".join(lines)


def _count(n: int, one: str, many: str | None = None) -> str:
    """'1 evaluation', '2 evaluations'."""
    return f"{n} {one if n == 1 else (many or one + 's')}"


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "unknown (nothing measured yet for a depth left)"
    if seconds < 90:
        return f"~{seconds:.0f} s"
    if seconds < 5400:
        return f"~{seconds / 60:.0f} min"
    return f"~{seconds / 3600:.1f} h"


def _size(n: int) -> str:
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= scale:
            return f"{n / scale:.1f} {unit}"
    return f"{n} bytes"


def _ranges(ps: list[int]) -> str:
    if not ps:
        return "-"
    out, start, prev = [], ps[0], ps[0]
    for p in ps[1:] + [None]:
        if p is not None and p == prev + 1:
            prev = p
            continue
        out.append(f"{start}" if start == prev else f"{start}..{prev}")
        if p is not None:
            start = prev = p
    return ", ".join(out)


def status_text(progress: dict) -> str:
    """The `leadline status` report."""
    pmin, pmax = progress["depths"]
    raised = progress.get("depths_raised") or []
    since = f" (pmax raised from {raised[0]['from']} on {raised[0]['utc'][:10]})" if raised else ""
    lines = [f"study {progress['name']!r}  store {progress['path']}  depths {pmin}..{pmax}{since}"]
    usage = progress.get("store")
    if usage is not None:
        lines.append(f"store size: {_size(usage['bytes'])} in {usage['files']} files")
    lock = progress.get("lock")
    if lock is None:
        lines.append("writer: none (resume with `leadline resume STORE` if not complete)")
    elif lock.get("alive"):
        lines.append(f"writer: {lock['description']}, running")
    else:
        lines.append(f"writer: {lock['description']}, no longer running (stale lock; resume takes it over)")
    for e in progress["ensembles"]:
        done = e["done"]
        lines.append(f"  {e['label']}")
        if done:
            values = "  ".join(f"p{d['p']}={fmt(d['value'])}" + (f"(bath +- {d['error_estimate']:.0e})"
                                if d.get("method") == "bath" else "") for d in done)
            lines.append(f"    done     p = {_ranges([d['p'] for d in done])}: {values}")
        r = e["running"]
        if r is not None and r.get("bath") and not r.get("metadata_damaged"):
            b = r["bath"]
            state = "running" if r.get("active", True) else "stopped"
            text = f"    {state:<8} p = {r['p']} (bath): {_count(b['evaluations_saved'], 'evaluation')} saved"
            if b.get("value") is not None:
                text += (f", best V so far = {b['value']:.10f} +- {b['error_estimate']:.1e}, gradient norm "
                         f"{b['gradient_norm']:.1e}")
            if b.get("evaluation_cpu_s") is not None:
                text += f", {b['evaluation_cpu_s']:.3f} CPU s per evaluation"
            text += f", session {r['sessions']}"
            lines.append(text)
        elif r is not None and r.get("sparse") and not r.get("metadata_damaged"):
            sp = r["sparse"]
            state, more = ("running", "") if r.get("active", True) else ("stopped", "; resume continues it")
            lines.append(f"    {state:<8} p = {r['p']}: {_count(sp['evaluations_saved'], 'evaluation')} saved, best value so far = "
                         f"{sp['value']:.10f} (gradient norm {sp['gradient_norm']:.1e}), {sp['evaluation_s']:.3g} s per "
                         f"evaluation, session {r['sessions']}{more}")
        elif r is not None and r.get("metadata_damaged") and r.get("active"):
            lines.append(f"    running  p = {r['p']}: starting")  # its folder is there, its metadata not yet
        elif r is not None and r.get("metadata_damaged"):
            lines.append(f"    stopped  p = {r['p']}: its metadata cannot be read; resume starts this depth again")
        elif r is not None:
            # "running" only while a live writer holds the lock; otherwise the depth waits for resume
            state, more = ("running", "") if r.get("active", True) else ("stopped", "; resume continues it")
            text = (f"    {state:<8} p = {r['p']}: {r['passes_saved']} passes saved "
                    f"(~{r['evaluations_done']} evaluations), session {r['sessions']}")
            if r["inflight"] is not None:
                f = r["inflight"]
                text += f"; pass in flight: {f['chunks_done']}/{f['n_chunks']} chunks done"
            if r["repairs"]:
                text += f"; {r['repairs']} repaired"
            lines.append(text + more)
        todo = [p for p in e["todo"] if r is None or p != r["p"]]
        if todo:
            lines.append(f"    to do    p = {_ranges(todo)}")
    if progress["complete"]:
        lines.append("complete")
    else:
        basis = ("finished depths' measured cost, scaled per depth: a rough guide"
                 if progress.get("estimate_basis") == "depth costs" else "measured seconds per path x mean evaluations per depth")
        lines.append(f"estimated time left: {_duration(progress['estimated_seconds_left'])} ({basis})")
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    app.command("sweep")(sweep_command)
    app.command("resume")(resume_command)
    app.command("status")(status_command)
