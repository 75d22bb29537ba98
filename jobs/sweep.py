"""The depth sweep: for each ensemble, p = pmin..pmax, warm-started, checkpointed.

A sweep and a resume run the same loop (:func:`run_study`): finished depths
are read back from the store (their optimum warm-starts the next depth), and
the first unfinished depth is optimized from its recorded start with a
checkpointed run_pass, so the replay takes every finished pass from the pass
cache and every finished chunk of the pass in flight from its ledger (see
cluster/checkpointed.py for why this reproduces the uninterrupted numbers).
"""

from __future__ import annotations

import contextlib

import time
from typing import Callable

import numpy as np

from leadline.kernels.optimize import optimize_depth
from leadline.kernels.exact import plan_chunks
from leadline.kernels.numtext import fmt
from leadline.cluster import CheckpointedPasses, CheckpointStats
from leadline.storage import StudyStore
from leadline.storage.faults import crash_point

from .spec import EnsembleSpec, StudySpec

__all__ = ["run_study", "depth_line", "create_store"]


def create_store(spec: StudySpec, command: str = "sweep") -> StudyStore:
    """The new store of ``spec`` (its path checked free beforehand), holding the writer lock."""
    from leadline import __version__
    from leadline.kernels.exact import resolve_implementation

    return StudyStore.create(
        spec.store,
        name=spec.name,
        spec=spec.to_json(),
        spec_toml=spec.source_text,
        ensembles=[e.description() for e in spec.ensembles],
        writer=f"leadline {__version__}",
        command=command,
        extra={"kernel": resolve_implementation()},
    )


def _optimize_dense(ens: EnsembleSpec, spec: StudySpec, p: int, depth, executor, previous, previous_value):
    """An exact depth of a dense ensemble: passes and chunks checkpointed (cluster/checkpointed.py)."""
    plan = plan_chunks(p, spec.memory_budget)
    passes = CheckpointedPasses(depth, executor)
    try:
        result = optimize_depth(
            ens.mixture(),
            p,
            run_pass=passes.run_pass,
            plan=plan,
            previous=previous,
            previous_value=previous_value,
            restarts=spec.restarts,
            seed=spec.seed,
            gtol=spec.gradient_tol,
            maxiter=spec.max_iterations,
        )
        if depth.policy.keep_passes:
            passes.flush()
    except BaseException:
        # stopped (Ctrl-C, SIGTERM from a batch system, an executor failure): keep what was computed
        try:
            passes.flush()
        except Exception:  # noqa: BLE001 - the original error is the one to report
            pass
        raise
    return result, passes.stats, None


def _optimize_sparse(ens: EnsembleSpec, spec: StudySpec, p: int, depth, executor, previous, previous_value):
    """Max-q-XORSAT on a D-regular hypertree: in process, every evaluation checkpointed in the store.

    A resumed depth replays the optimizer and reads back the evaluations the killed run had
    written (jobs/evaluations.py); it ends with the same bits as an uninterrupted one."""
    from leadline.kernels.sparse import optimize_sparse, value_and_grad

    from .commands import _sparse as sparse_cli
    from .evaluations import CheckpointedSparseEvaluations
    from .ladders import sparse_default_restarts

    # the same default as `leadline optimize --sparse-q` (INTERP alone past p = 6): without it the
    # kernel's own default (3 seeded restarts) made every deep sweep depth about 4x dearer
    restarts = spec.restarts if spec.restarts is not None else sparse_default_restarts(p)
    chunked = contextlib.nullcontext(None)
    if not sparse_cli.fits_in_memory(p, gradient=True):
        # past memory: every evaluation on chunked vectors in the folder beside the store
        path = sparse_cli.plan_sparse_path(p, executor.settings, str(sparse_cli.sweep_scratch(spec.store)), True,
                                           f"ensemble {ens.label!r}")
        chunked = sparse_cli.scratch_runner(path, executor.settings, label=f"{ens.label}-p{p}",
                                            client=getattr(executor, "client", None))
    progress = getattr(executor, "progress", None)
    with chunked as run_chunked:
        evaluate_kw = {"chunked": run_chunked} if run_chunked is not None else {}
        evaluations = CheckpointedSparseEvaluations(
            depth, ens.q, ens.degree, lambda g, b: value_and_grad(ens.q, ens.degree, g, b, **evaluate_kw))

        def live(info: dict) -> None:
            if progress is not None:  # the sweep's progress line (the store's entries feed `leadline status`)
                seconds = evaluations.last_seconds
                progress.evaluation_done(
                    info["best_value"], label=f"{ens.label} p = {p}",
                    detail=(f", {evaluations.reused} reused" if evaluations.reused else "")
                    + (f", {seconds:.3g} s per evaluation" if seconds is not None else ""))

        try:
            result = optimize_sparse(
                ens.q, ens.degree, p, previous=previous, previous_value=previous_value,
                seed=spec.seed, gtol=spec.gradient_tol, maxiter=spec.max_iterations,
                evaluate_kw=evaluate_kw or None, restarts=restarts, evaluate=evaluations, callback=live,
            )
        finally:
            # finished or stopped (Ctrl-C, SIGTERM, a failure): the waiting evaluations are kept
            try:
                depth.flush()
            except Exception:  # noqa: BLE001 - the original error (if any) is the one to report
                pass
    return result, CheckpointStats(seconds_in_passes=evaluations.seconds), evaluations


def _optimize_bath(ens: EnsembleSpec, spec: StudySpec, p: int, depth, executor, previous, previous_value,
                   earlier=None):
    """A depth past exact reach: the bath optimizer, its evaluations checkpointed one by one.

    ``earlier``: the optimum of depth p-2 (the extrapolated start); a resumed sweep reads it from
    the store, so the replay starts where the uninterrupted run did.
    """
    from leadline.kernels.bath import optimize_bath_depth

    from .bath import CheckpointedEvaluations, bath_restarts

    def live(info: dict) -> None:
        # what `leadline status` shows for the depth in progress (one small attribute write)
        depth.group.attrs.update({"bath_progress": {
            "value": info["best_value"], "error_estimate": info["best_error_estimate"],
            "gradient_norm": info["gradient_norm"], "evaluation_s": info["evaluation_s"],
            "evaluations": evaluations.computed + evaluations.reused}})
        progress = getattr(executor, "progress", None)
        if progress is not None:  # the sweep's progress line
            progress.evaluation_done(
                info["best_value"], label=f"{ens.label} p = {p} (bath)", count=info["evaluations"],
                detail=f" +- {info['best_error_estimate']:.1e}, {info['evaluation_s']:.3f} s per evaluation")

    evaluations = CheckpointedEvaluations(depth, executor)
    try:
        result = optimize_bath_depth(
            ens.mixture(), p, engine=ens.bath_engine(), run_map=evaluations, previous=previous,
            previous_value=previous_value, earlier=earlier, hessian_map=getattr(executor, "run_map", None),
            restarts=bath_restarts(spec.restarts, previous is not None, p),
            seed=spec.seed, gtol=spec.gradient_tol, maxiter=spec.max_iterations, callback=live,
        )
    finally:
        try:
            depth.flush()
        except Exception:  # noqa: BLE001 - the original error (if any) is the one to report
            pass
    return result, CheckpointStats(), evaluations


#: how each ensemble kind optimizes one depth (extension point, see jobs/spec.py ENSEMBLE_KINDS)
OPTIMIZERS = {"dense": _optimize_dense, "sparse": _optimize_sparse}


def run_study(
    store: StudyStore,
    spec: StudySpec,
    executor=None,
    *,
    report: Callable[[dict], None] | None = None,
) -> list[dict]:
    """Run (or continue) the sweep of ``spec`` into ``store``; returns one record per depth done now.

    ``executor`` is a leadline.cluster executor (or None: in process).
    ``report(record)`` is called after every finished depth.
    """
    done_now = []
    for ens in spec.ensembles:
        previous = previous_value = earlier = None
        for p in range(spec.pmin, spec.pmax + 1):
            stored = store.finished_depth(ens.label, p)
            if stored is not None:
                earlier = previous
                previous = (np.asarray(stored["gamma"], dtype=float), np.asarray(stored["beta"], dtype=float))
                previous_value = float(stored["value"])
                continue
            plan = plan_chunks(p, spec.memory_budget) if ens.method(p) == "exact" else None
            depth = store.depth(ens.label, p, plan)
            crash_point("depth-started")
            t0, c0 = time.perf_counter(), time.process_time()
            # saved: the checkpointed evaluations of a bath or sparse depth (None: passes, dense)
            if ens.method(p) == "bath":
                result, stats, saved = _optimize_bath(ens, spec, p, depth, executor, previous, previous_value,
                                                      earlier=earlier)
            else:
                result, stats, saved = OPTIMIZERS[ens.kind](ens, spec, p, depth, executor, previous, previous_value)
            bath = saved if ens.method(p) == "bath" else None
            session_s = time.perf_counter() - t0
            session_cpu_s = time.process_time() - c0
            pass_compute_s = depth.pass_seconds()
            overhead_s = max(0.0, session_s - stats.seconds_in_passes)
            timings = {
                "wall_time_s": pass_compute_s + overhead_s,
                "pass_compute_s": pass_compute_s,
                "optimizer_overhead_s": overhead_s,
                "passes": depth.passes_used(),
                "paths": depth.paths_used(),
                "session_wall_s": session_s,
                "session_cpu_s": session_cpu_s,
                "optimizer_cpu_s": max(0.0, session_cpu_s - stats.cpu_writing_s),
                "sessions": int(depth.group.attrs.get("sessions", 1)),
                "this_session": stats.to_json(),
            }
            if bath is not None:
                # the evaluations' CPU seconds, over every session (the checkpoint keeps each one's)
                timings.update({
                    "wall_time_s": session_s, "pass_compute_s": 0.0, "optimizer_overhead_s": session_s,
                    "bath_evaluations": result.evaluations, "bath_evaluations_computed": bath.computed,
                    "bath_evaluations_reused": bath.reused,
                    "bath_evaluation_cpu_s": result.evaluation_seconds * result.evaluations,
                })
            elif saved is not None:
                # evaluations instead of passes: their seconds over every session, plus this session's rest
                timings.update({
                    "pass_compute_s": 0.0, "passes": 0, "paths": 0.0,
                    "wall_time_s": pass_compute_s + overhead_s, "optimizer_overhead_s": overhead_s,
                    "sparse_evaluations": result.evaluations, "sparse_evaluations_computed": saved.computed,
                    "sparse_evaluations_reused": saved.reused, "sparse_evaluation_s": pass_compute_s,
                })
            record = result.to_json()
            record["wall_time_s"] = timings["wall_time_s"]
            record["plan"] = plan.to_json() if plan is not None else None
            record.setdefault("method", "exact")
            store.finish_depth(ens.label, p, record, timings)
            earlier = previous
            previous = (result.gamma, result.beta)
            previous_value = float(result.value)
            line = {"label": ens.label, "p": p, "result": record, "timings": timings}
            done_now.append(line)
            if report is not None:
                report(line)
    return done_now


def depth_line(line: dict) -> str:
    """One human-readable line for a finished depth."""
    r, t = line["result"], line["timings"]
    s = t["this_session"]
    if r.get("method") == "bath":
        reused = f", {t['bath_evaluations_reused']} reused" if t.get("bath_evaluations_reused") else ""
        return (
            f"{line['label']:<12} p = {line['p']:<3d} V_p* = {fmt(r['value'], 12)} +- {r['error_estimate']:.1e} (bath)  "
            f"gradient norm {r['gradient_norm']:.1e} (noise {r['gradient_noise']:.1e})  {r['evaluations']} evaluations"
            f"{reused}, {r['evaluation_s']:.3f} s each, {t['wall_time_s']:.2f} s"
        )
    passes = ""
    if s["passes_requested"]:
        # reuse is only mentioned when there was some (a resumed or replayed depth)
        reused = f", {s['passes_reused']} reused" if s["passes_reused"] else ""
        passes = f"{s['passes_computed']} passes computed{reused}, "
    if t.get("sparse_evaluations_reused"):  # a resumed sparse depth: evaluations read back from the store
        passes = f"{t['sparse_evaluations_reused']} reused, "
    stopped = " (not converged)" if r.get("converged") is False else ""
    return (
        f"{line['label']:<12} p = {line['p']:<3d} V_p* = {fmt(r['value'], 12)}  gradient norm {r['gradient_norm']:.1e}"
        f"{stopped}  {r['evaluations']} evaluations, {passes}{t['wall_time_s']:.2f} s"
    )
