"""The sparse ensemble (--sparse-q Q --degree D) of `evaluate` and `optimize`.

The two command modules call into here with a few lines, so the command-line side of
Max-q-XORSAT on D-regular hypertrees (help texts, depth check, running, printing) lives in
one place; what a sparse ensemble may be (``check_sparse``, the degree limit) is shared with
the study spec and the Python API in ``leadline.jobs.sparse_ensemble``:

    leadline evaluate --sparse-q Q --degree D --gamma ... --beta ... [--gradient] [--json] [--scratch DIR]
    leadline optimize --sparse-q Q --degree D --depth P [--json] [--output FILE] [--scratch DIR]

Which path runs (in memory, or chunked vectors out of core / on Dask workers with --scratch),
what it needs and what is refused: :func:`plan_sparse_path`.

"value" is the satisfied fraction nu_p(D; gamma, beta) (the cut fraction for Q = 2).
"""

from __future__ import annotations

import contextlib
import json
from dataclasses import dataclass
from pathlib import Path

import typer

from leadline.kernels.sparse import evaluate_sparse, optimize_sparse
from leadline.kernels.numtext import fmt

from ..errors import InputError
from ..sparse_ensemble import check_sparse, ensemble_json

__all__ = ["XORSAT_HELP", "DEGREE_HELP", "SCRATCH_HELP", "plan_sparse_path", "SparsePath", "scratch_runner", "fits_in_memory", "check_sweep_sparse", "sweep_scratch", "sparse_requested", "check_sparse_depth", "evaluate_xorsat", "optimize_xorsat"]

SPARSE_Q_HELP = ("Sparse ensemble of arity q: Max-q-XORSAT (q spins per constraint; q = 2: MaxCut) on "
                 "D-regular hypergraphs of large girth; needs --degree.")
DEGREE_HELP = "Degree D >= 2 of every spin (with --sparse-q); large values up to 1e9 are fine."


def sparse_requested(sparse_q, degree) -> bool:
    """True when the user asked for the sparse ensemble (either option given)."""
    return sparse_q is not None or degree is not None


#: complex numbers the growing-contour recursion holds at most, in units of 2^(2p-1): its two
#: buffers allocated once at the final size (kernels/sparse/_growing.py); measured peak RSS
#: 2.6 GiB at p = 14 and 10.1 GiB at p = 15 (docs/performance.md)
SPARSE_VECTORS = 1.25
#: the reverse sweep keeps about this many times the evaluation's memory (measured at p = 12)
GRADIENT_MEMORY_FACTOR = 2.5


#: tests: pretend the machine has this many bytes of memory (the switch to chunked vectors)
MEMORY_ENV = "LEADLINE_SPARSE_MEMORY_BYTES"


def _memory_total() -> float:
    import os

    if os.environ.get(MEMORY_ENV):
        return float(os.environ[MEMORY_ENV])
    import psutil

    return float(psutil.virtual_memory().total)


def fits_in_memory(p: int, gradient: bool) -> bool:
    """Does the in-memory recursion at depth p fit in 80% of this machine's memory?"""
    need = SPARSE_VECTORS * 16 * 2 ** (2 * p - 1) * (GRADIENT_MEMORY_FACTOR if gradient else 1.0)
    return need <= 0.8 * _memory_total()


def sweep_scratch(store_path) -> Path:
    """Where a sweep keeps the chunked vectors of its sparse ensembles: beside its store."""
    store_path = Path(store_path)
    return store_path.parent / f"{store_path.name}.sparse-scratch"


def check_sweep_sparse(spec, settings) -> None:
    """Before a sweep starts: every sparse ensemble's deepest depth fits in memory or, chunked,
    in the scratch folder beside the store (InputError, one line, otherwise)."""
    for ens in spec.ensembles:
        if ens.kind == "sparse" and not fits_in_memory(spec.pmax, True):
            plan_sparse_path(spec.pmax, settings, str(sweep_scratch(spec.store)), True, f"ensemble {ens.label!r}")


def check_sparse_depth(p: int, settings, option: str, gradient: bool = False) -> None:
    """Refuse depths whose whole-vector recursion cannot fit (InputError, one line)."""
    from ..spec import MAX_DEPTH

    if p > MAX_DEPTH:
        raise InputError(f"{option}: depth p = {p} is beyond {MAX_DEPTH}, the deepest this tool runs (vectors of 2^{2 * p + 1} entries)")
    need = SPARSE_VECTORS * 16 * 2 ** (2 * p - 1) * (GRADIENT_MEMORY_FACTOR if gradient else 1.0)
    distributed = settings is not None and settings.mode in ("local", "scheduler", "batch")
    total = _memory_total()
    if need > 0.8 * total and not distributed:
        raise InputError(
            f"{option}: the sparse recursion at p = {p} needs about {need / 2**30:.0f} GiB"
            f"{' with the gradient' if gradient else ''}, more than 80% of this machine's "
            f"{total / 2**30:.0f} GiB; lower the depth" + ("" if gradient else " or give --scratch DIR (out of core)")
        )


SCRATCH_HELP = ("Sparse ensembles: keep the step vectors as Zarr arrays in this folder (out of core; "
                "with --executor local/scheduler/batch they live on the Dask workers and the folder must be one "
                "every worker sees) and record every finished step there, so a killed run given the same folder "
                "resumes after its last finished step. Removed after success.")

#: vectors of 2^(2p-1) points a chunked evaluation keeps on disk at most (kernels/sparse/_chunked.py):
#: out of core step p's input, outer transform and result (1/4 + 1/4 + 1: the column pass and the
#: root's transform work in place); on workers the root's input, its outer transform and the
#: transform's row-pass copy when they exchange through the folder
SCRATCH_VECTORS = 1.5
SCRATCH_VECTORS_WORKERS = 3.0
#: with the gradient every step's two vectors stay for the reverse sweep (4/3 x 1.25 = 1.67), plus
#: at most three more of the last size at once (the root's outer transform, an adjoint and its
#: row-pass copy): 4.7 counted from the order of writes in kernels/sparse/_chunked.py, rounded up
SCRATCH_VECTORS_GRADIENT = 6.0
#: complex numbers a task of the chunked path holds at most, in bands or column blocks (a band in, a
#: band out, a column block and a transform scratch; out of core: a block read ahead, one computed,
#: two being written)
BANDS_PER_TASK = 4
#: leave this much of the scratch file system free (other users of a shared disk)
DISK_MARGIN = 1.1


@dataclass
class SparsePath:
    """Which path a sparse evaluation takes and what it needs (the cost guard's statement)."""

    kind: str              # "memory", "disk" (out of core) or "workers" (Dask workers)
    memory_bytes: float    # per process (memory, disk) or per worker (workers)
    disk_bytes: float      # scratch folder, 0 for "memory"
    scratch: Path | None = None

    def describe(self, p: int) -> str:
        if self.kind == "memory":
            return f"sparse path = in memory, about {_size(self.memory_bytes)} at p = {p}"
        if self.kind == "disk":
            return (f"sparse path = out of core, about {_size(self.memory_bytes)} per process, "
                    f"{_size(self.disk_bytes)} in {self.scratch}")
        return (f"sparse path = on the Dask workers, up to {_size(self.memory_bytes)} per worker (workers on this "
                f"machine, and a transform that does not fit in half the workers' memory, exchange through the "
                f"folder), {_size(self.disk_bytes)} in {self.scratch}")


def _size(nbytes: float) -> str:
    if nbytes < 2**20:
        return "under 1 MiB"
    return f"{nbytes / 2**30:.1f} GiB" if nbytes >= 2**30 else f"{nbytes / 2**20:.0f} MiB"


def _existing_ancestor(path: Path) -> Path:
    path = path.absolute()
    while not path.exists():
        path = path.parent
    return path


def check_scratch(scratch: str, need: float) -> Path:
    """The scratch folder as a Path, or InputError (one line): not writable, a file, or too
    little free space for ``need`` bytes (less what a resumable run already holds there)."""
    import shutil
    import tempfile

    path = Path(scratch).expanduser()
    if path.exists() and not path.is_dir():
        raise InputError(f"--scratch {scratch}: is a file, not a folder")
    base = _existing_ancestor(path)
    try:  # a real write (permissions alone do not tell for root or a read-only mount)
        with tempfile.TemporaryFile(dir=base):
            pass
    except OSError as exc:
        raise InputError(f"--scratch {scratch}: {base} is not writable ({exc.strerror or 'read-only or no permission'})") from None
    held = sum(f.stat().st_size for f in path.rglob("*") if f.is_file()) if path.is_dir() else 0
    free = shutil.disk_usage(base).free
    if DISK_MARGIN * need - held > free:
        raise InputError(f"--scratch {scratch}: the chunked evaluation needs about {need / 2**30:.1f} GiB there, "
                         f"{free / 2**30:.1f} GiB free; give a folder on a larger disk or lower the depth")
    return path


def plan_sparse_path(p: int, settings, scratch: str | None, gradient: bool, option: str) -> SparsePath:
    """Choose the path of a sparse evaluation at depth p and check it fits, before any work.

    In memory unless --scratch is given; with --scratch the vectors are chunked (out of core in
    this process, or on Dask workers with a distributed executor).  InputError (one line) for a
    depth that fits nowhere, a gradient with --scratch, or an unusable scratch folder."""
    from leadline.kernels.sparse import CHUNK_POINTS_BITS

    from ..spec import MAX_DEPTH

    if p > MAX_DEPTH:
        raise InputError(f"{option}: depth p = {p} is beyond {MAX_DEPTH}, the deepest this tool runs (vectors of 2^{2 * p + 1} entries)")
    vec = 16.0 * 2 ** (2 * p - 1)
    distributed = settings is not None and settings.mode in ("local", "scheduler", "batch")
    if scratch is None:
        check_sparse_depth(p, settings, option, gradient=gradient)
        return SparsePath("memory", SPARSE_VECTORS * vec * (GRADIENT_MEMORY_FACTOR if gradient else 1.0), 0.0)
    disk = (SCRATCH_VECTORS_GRADIENT if gradient else SCRATCH_VECTORS_WORKERS if distributed else SCRATCH_VECTORS) * vec
    path = check_scratch(scratch, disk)
    task = BANDS_PER_TASK * 16.0 * 2**CHUNK_POINTS_BITS
    if distributed:
        workers = max(1, int(getattr(settings, "workers", None) or 1))
        # a transform's row bands and their rechunked copy, spread over the workers
        return SparsePath("workers", max(task, 2.0 * vec / workers), disk, path)
    from leadline.cluster.sparse_vectors import LocalBandStore

    task = BANDS_PER_TASK * 16.0 * LocalBandStore.largest_block(p, CHUNK_POINTS_BITS)
    return SparsePath("disk", min(task, 2.5 * vec), disk, path)


def _report(ev) -> str:
    name = "cut fraction" if ev.q == 2 else "satisfied fraction"
    lines = [
        f"ensemble   = Max-{ev.q}-XORSAT{' (MaxCut)' if ev.q == 2 else ''}, {int(ev.degree)}-regular, large girth",
        f"depth p    = {ev.p}",
        f"{name} = {fmt(ev.value, 12)}",
    ]
    if ev.gradient is not None:
        lines.append("d/dgamma   = " + ", ".join(f"{x:+.6e}" for x in ev.gradient["gamma"]))
        lines.append("d/dbeta    = " + ", ".join(f"{x:+.6e}" for x in ev.gradient["beta"]))
    lines.append("residuals  = " + ", ".join(f"{k} {v:.1e}" for k, v in ev.residuals.items()))
    lines.append(f"work       = {ev.transforms} Walsh-Hadamard transforms, {ev.wall_time:.2f} s")
    return "\n".join(lines)


@contextlib.contextmanager
def transform_map(settings):
    """run_map of the executor the user asked for (local, scheduler, batch), else None.

    With one, the sparse recursion's Walsh-Hadamard transforms are split into row and
    column blocks that run as tasks; in-process (and in auto mode) they run whole.
    """
    if settings is None or settings.mode not in ("local", "scheduler", "batch"):
        yield None
        return
    from .. import compute

    with compute.open_compute(settings) as ex:
        yield ex.run_map


def _stage_name(done: int, p: int) -> str:
    """A checkpoint of a chunked evaluation in words (kernels.sparse ``reverse_stage`` numbering)."""
    if done <= p:
        return f"step {done}"
    if done == p + 1:
        return "the root"
    m = 2 * p + 3 - done
    return "the reverse sweep's root" if m == p + 1 else f"reverse sweep step {m}"


@contextlib.contextmanager
def scratch_runner(path: SparsePath, settings, label=None, client=None):
    """``chunked(q, D, g, b, gradient)`` for :func:`evaluate_sparse`: each evaluation in the scratch
    folder (out of core, or on the executor's Dask workers), progress per step on stderr unless
    --quiet, the folder removed after success and kept (for the resume) after a failure.  With
    ``label`` (the optimizer) every evaluation uses the subfolder "<label>" afresh."""
    import time

    from leadline.cluster.sparse_vectors import LocalBandStore, ZarrBandStore
    from leadline.kernels.sparse import CHUNK_POINTS_BITS, evaluate_chunked
    from leadline.storage.errors import StoreError
    from leadline.storage.sparse_scratch import SparseScratch

    quiet = settings is None or settings.quiet
    announced = []

    def run(q, D, g, b, gradient, client=None):
        if g.size < 3:  # a few points, nothing to chunk (the optimizer's p = 1 grid, depth 2)
            return evaluate_chunked(q, D, g, b, None, gradient=gradient)
        fingerprint = {"q": q, "degree": D, "gamma": [float(x).hex() for x in g],
                       "beta": [float(x).hex() for x in b], "band_bits": CHUNK_POINTS_BITS, "gradient": bool(gradient)}
        folder = path.scratch if label is None else path.scratch / label
        try:
            try:
                # the same evaluation stopped in this folder (a resumed sweep replays up to it): continue it
                scratch = SparseScratch.open(folder, fingerprint)
            except StoreError:
                if label is None:
                    raise
                SparseScratch(folder, {}).remove()  # the optimizer's previous evaluation (other angles)
                scratch = SparseScratch.open(folder, fingerprint)
        except StoreError as exc:
            raise InputError(str(exc)) from None
        p = g.size
        if not quiet and (label is None or not announced):
            typer.echo(path.describe(p) + (f"; resuming after {_stage_name(scratch.finished()[0], p)}" if scratch.resumed else ""),
                       err=True)
            announced.append(p)
        start = time.perf_counter()

        def progress(m, p, seconds):
            if not quiet and label is None:
                what = ("root" if m > p else f"step {m}/{p}") if m > 0 else (
                    "reverse sweep: root" if -m > p else f"reverse sweep: step {-m}")
                typer.echo(f"  {what} done in {seconds:.1f} s ({time.perf_counter() - start:.0f} s so far)", err=True)

        store = (ZarrBandStore(scratch, target_bits=CHUNK_POINTS_BITS, client=client) if client is not None
                 else LocalBandStore(scratch, target_bits=CHUNK_POINTS_BITS))
        try:
            ev = evaluate_chunked(q, D, g, b, store, gradient=gradient, target_bits=CHUNK_POINTS_BITS, progress=progress)
        finally:
            if client is None:
                store.close()
        scratch.remove()
        return ev

    if path.kind == "workers" and client is not None:
        yield lambda q, D, g, b, gradient: run(q, D, g, b, gradient, client)
    elif path.kind == "workers":
        from .. import compute

        with compute.open_compute(settings) as ex:
            yield lambda q, D, g, b, gradient: run(q, D, g, b, gradient, ex.client)
    else:
        yield run
    if label is not None:
        with contextlib.suppress(OSError):
            path.scratch.rmdir()  # only if empty: the folder may hold the user's own files


def evaluate_xorsat(sparse_q, degree, *, xi, gamma, beta, angles=None, gradient=False, as_json=False,
                    settings=None, scratch=None) -> None:
    """`leadline evaluate --sparse-q Q --degree D ...`: validate everything, evaluate, print."""
    from ..angles import check_periodic_angles, read_angles
    from ..parsing import angle_pair

    q, D = check_sparse(sparse_q, degree, xi)
    if angles is not None:
        if gamma is not None or beta is not None:
            raise InputError("give either --angles FILE or --gamma/--beta, not both")
        aset = read_angles(angles)
        g, b = aset.gamma, aset.beta
    else:
        g, b = angle_pair(gamma, beta)
    check_periodic_angles(g, "--angles" if angles is not None else "--gamma", "gamma_t", "2 pi")
    path = plan_sparse_path(g.size, settings, scratch, gradient, "--angles" if angles is not None else "--gamma/--beta")
    if path.kind == "memory":
        with transform_map(settings) as run_map:
            ev = evaluate_sparse(q, D, g, b, gradient=gradient, run_map=run_map)
    else:
        with scratch_runner(path, settings) as chunked:
            ev = evaluate_sparse(q, D, g, b, gradient=gradient, chunked=chunked)
    if as_json:
        out = ev.to_json()
        out["ensemble"] = ensemble_json(q, D)
        typer.echo(json.dumps(out))
    else:
        typer.echo(_report(ev))


def optimize_xorsat(sparse_q, degree, *, xi, depth, restarts=None, seed=0, gradient_tol=1e-7, max_iterations=500, output=None, as_json=False, start=None,
                    settings=None, scratch=None) -> None:
    """`leadline optimize --sparse-q Q --degree D --depth P`: depths 1..P in turn (INTERP warm starts).

    With ``start`` (an angle file of depth P-1 or P) only depth P is optimized, from it.
    """
    from ..angles import AngleSet, convergence_warning, optimum_report, write_angles
    from ..ladders import sparse_ladder
    from ..parsing import check_optimizer_options, warm_start
    from ..paths import check_output_file

    q, D = check_sparse(sparse_q, degree, xi)
    depth = check_optimizer_options(depth, restarts, gradient_tol, max_iterations, seed)
    initial = warm_start(start, depth)
    path = plan_sparse_path(depth, settings, scratch, True, "--depth")
    if output is not None:
        check_output_file(output)
    if path.kind == "memory":
        with transform_map(settings) as run_map:
            run = sparse_ladder(optimize_sparse, q, D, depth, initial, restarts=restarts, seed=seed, gradient_tol=gradient_tol,
                                max_iterations=max_iterations, ensemble=ensemble_json(q, D),
                                evaluate_kw={"run_map": run_map} if run_map is not None else None)
    else:
        with scratch_runner(path, settings, label="evaluation") as chunked:
            run = sparse_ladder(optimize_sparse, q, D, depth, initial, restarts=restarts, seed=seed, gradient_tol=gradient_tol,
                                max_iterations=max_iterations, ensemble=ensemble_json(q, D), evaluate_kw={"chunked": chunked})
    result, ladder, first, wall = run.result, run.ladder, run.first_depth, run.wall_time
    if output is not None:
        write_angles(output, AngleSet(p=depth, gamma=result.gamma, beta=result.beta, xi=None, value=result.value, ensemble=ensemble_json(q, D)))
    warning = convergence_warning(result)
    if warning:
        typer.echo(warning, err=True)
    if as_json:
        typer.echo(json.dumps(run.to_json()))
        return
    name = "cut fraction" if q == 2 else "satisfied fraction"
    header = [
        f"ensemble       = Max-{q}-XORSAT{' (MaxCut)' if q == 2 else ''}, {D}-regular, large girth",
        f"depth p        = {depth}",
        f"{name} = {fmt(result.value, 10)}",
    ]
    evaluations = f"{sum(r['evaluations'] for r in ladder)} over depths {first}..{depth}, {wall:.1f} s"
    typer.echo(optimum_report(header, result, evaluations, ladder, output))
