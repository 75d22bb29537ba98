"""Reading a study store (no lock needed; safe while a writer runs).

This is the API the tables and plots code against::

    study = open_study("runs/sk.zarr")
    study.name, study.spec
    for label in study.ensembles():
        study.ensemble(label)   # {"label", "kind", "xi", "q", "degree", "reference"}
        study.depths(label)     # finished depths sorted by p

Everything here can also be read with plain zarr (see docs/store.md).
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np
import zarr

from . import layout as L
from .lock import describe_holder, holder_alive, read_lock
from .study import check_contents, check_study, inflight_summary, store_usage

__all__ = ["open_study", "StudyReader"]

#: the fields of one finished depth in :meth:`StudyReader.depths`
DEPTH_FIELDS = ("p", "value", "gamma", "beta", "gradient_norm", "evaluations", "wall_time_s", "converged", "method",
                "error_estimate")


def open_study(path: str | os.PathLike) -> "StudyReader":
    """Open the study store at ``path`` for reading.

    Format and format version are checked, then every part against the store's own record
    (storage/integrity.py): a store with a finished depth, its spec or an ensemble missing,
    unreadable or altered raises StoreDamagedError naming the parts.
    """
    return StudyReader(path)


class StudyReader:
    """Read-only view of a study store.

    Attributes
    ----------
    path : Path of the store
    name : study name from the spec
    spec : the validated spec (dict, the JSON form of the TOML)
    spec_toml : the spec text as the user wrote it
    """

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)
        attrs = check_study(self.path)
        #: what the check on open read: ensemble and depth attributes (read once, then served from here)
        self.contents = check_contents(self.path, attrs)
        self.attrs = attrs
        self.name: str = attrs["name"]
        self.spec: dict = L.current_spec(attrs["spec"])
        self.spec_toml: str = attrs.get("spec_toml", "")
        self.format_version: int = attrs[L.VERSION]
        self.created_utc: str | None = attrs.get("created_utc")
        self._root = zarr.open_group(str(self.path), mode="r", zarr_format=3)

    # ---------------------------------------------------------------- ensembles
    def ensembles(self) -> list[str]:
        """Ensemble labels in spec order."""
        return [e["label"] for e in self.spec["ensembles"]]

    def ensemble(self, label: str) -> dict:
        """{"label", "kind": "dense"|"sparse", "xi", "q", "degree", "reference": {...}}."""
        for e in self.spec["ensembles"]:
            if e["label"] == label:
                stored = self.contents.ensembles.get(label, {})
                return L.current_ensemble_attrs(stored) if stored.get("label") == label else _describe(e)
        raise KeyError(f"no ensemble {label!r} in study {self.name!r} (have {', '.join(self.ensembles())})")

    def references(self, label: str):
        """Computed GS/ALG cached in the store by `leadline reference --store`, or None.

        Returns a kernels.reference.References (attribute ``computed_reference`` of the
        ensemble group holds its JSON form; ``references`` in stores before schema 3).
        """
        from leadline.kernels.reference import References

        data = L.current_ensemble_attrs(self.contents.ensembles.get(label, {})).get(L.COMPUTED_REFERENCE)
        return References.from_json(data) if data else None

    def _depth_attrs(self, label: str) -> list[tuple[int, dict | None]]:
        """(p, attributes) of every depth group of ``label`` sorted by p (None: unreadable metadata)."""
        self.ensemble(label)  # KeyError for unknown labels
        return sorted(self.contents.depths.get(label, {}).items())

    def depths(self, label: str) -> list[dict]:
        """Finished depths of ``label`` sorted by p: {"p", "value", "gamma", "beta",
        "gradient_norm", "evaluations", "wall_time_s", "converged", "method", "error_estimate"}
        (angles as lists, radians; method "exact" or "bath", error_estimate None for exact)."""
        self.ensemble(label)
        return [{k: a["result"].get(k) for k in DEPTH_FIELDS} | {"p": p, "method": a["result"].get("method", "exact")}
                for p, a in self.contents.done(label).items()]

    def depth(self, label: str, p: int) -> dict | None:
        """Everything stored about depth p: result (with optimizer history), timings, repairs, state."""
        for q, attrs in self._depth_attrs(label):
            if q == p:
                return attrs
        return None

    # ---------------------------------------------------------------- progress
    def lock_holder(self) -> dict | None:
        """The writer lock holder with "alive": bool, or None when unlocked."""
        holder = read_lock(self.path)
        if holder is None:
            return None
        return dict(holder, alive=holder_alive(holder), description=describe_holder(holder))

    def progress(self) -> dict:
        """Per-ensemble progress and an estimated time left (what `leadline status` shows)."""
        pmin, pmax = int(self.spec["depths"]["pmin"]), int(self.spec["depths"]["pmax"])
        ensembles = []
        finished_timings = []  # (p, evaluations, wall seconds)
        pass_rates = []  # (seconds, path-passes)
        lock = self.lock_holder()
        writing = lock is not None and bool(lock.get("alive"))
        kinds = {e["label"]: e.get("kind", "dense") for e in self.spec.get("ensembles", [])}
        described = {e["label"]: e for e in self.spec.get("ensembles", [])}
        for label in self.ensembles():
            done, running = [], None
            for p, attrs in self._depth_attrs(label):
                if attrs is None:  # an unfinished depth whose metadata is damaged: resume starts it again
                    if pmin <= p <= pmax:
                        running = _running_info(p, None, None, writing)
                    continue
                if attrs.get("state") == "done" and "result" in attrs:
                    r, t = attrs["result"], attrs.get("timings", {})
                    done.append({"p": p, "value": r.get("value"), "evaluations": r.get("evaluations"),
                                 "wall_time_s": r.get("wall_time_s"), "method": r.get("method", "exact"),
                                 "error_estimate": r.get("error_estimate")})
                    if r.get("method", "exact") == "exact" and kinds.get(label, "dense") == "dense":
                        finished_timings.append((p, r.get("evaluations") or 0,
                                                 t.get("pass_compute_s", r.get("wall_time_s") or 0.0), t.get("paths")))
                    if t.get("pass_compute_s") and t.get("passes"):
                        paths = t.get("paths") or t["passes"] * 2.0 ** (2 * p + 1)
                        pass_rates.append((t["pass_compute_s"], paths))
                elif pmin <= p <= pmax:
                    running = _running_info(p, self._depth_group(label, p), attrs, writing)
                    if running["bath"] is None and _bath_depth(described.get(label, {}), p):
                        # a bath depth before its first saved evaluation (its preconditioner is computed first)
                        running["bath"] = {"evaluations_saved": 0, "evaluation_cpu_s": None}
                    if running["pass_compute_s"] > 0 and running["paths"]:
                        pass_rates.append((running["pass_compute_s"], running["paths"]))
            done_ps = {d["p"] for d in done}
            todo = [p for p in range(pmin, pmax + 1) if p not in done_ps]
            ensembles.append({"label": label, "done": done, "running": running, "todo": todo})
        eta = _estimate_seconds_left(ensembles, finished_timings, pass_rates, self.spec)
        return {
            "name": self.name,
            "path": str(self.path),
            "depths": [pmin, pmax],
            # raises of pmax by `leadline resume --pmax` ([] when the spec's pmax is the one it was created with)
            "depths_raised": list(self._root.attrs.get(L.DEPTHS_RAISED, [])),
            "ensembles": ensembles,
            "complete": all(not e["todo"] for e in ensembles),
            "estimated_seconds_left": eta,
            # what the estimate rests on: exact path-pass rates only, or also finished bath/sparse depths
            "estimate_basis": "depth costs" if any(_scaled_kind(described.get(e["label"], {}), p) for e in ensembles
                                                   for p in e["todo"]) else "pass rates",
            "lock": lock,
            "store": store_usage(self.path),
        }


    def _depth_group(self, label: str, p: int):
        """The zarr group of depth p (for the pass batches of a running depth); None if unreadable."""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return self._root[f"{L.ENSEMBLES}/{label}/{L.depth_name(p)}"]
        except Exception:  # noqa: BLE001 - being written, or damaged: shown without its passes
            return None


def _describe(e: dict) -> dict:
    ref = e.get("reference") or {}
    return {
        "label": e["label"],
        "kind": e.get("kind", "dense"),
        "xi": e.get("xi"),
        "q": e.get("q"),
        "degree": e.get("degree"),
        "reference": {"ground_state": ref.get("ground_state"), "source": ref.get("source")},
    }


def _running_info(p: int, g, attrs: dict | None, writing: bool) -> dict:
    """A depth that is not finished: being computed (``writing``: a live writer holds the lock) or stopped.

    ``attrs`` None: its metadata cannot be read (resume starts the depth again).  zarr's warnings
    about folders it does not recognize (leftovers, stray files) are not shown: resume checks
    and cleans what it uses."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return _running_info_quiet(p, g, attrs, writing)


def _running_info_quiet(p: int, g, attrs: dict | None, writing: bool) -> dict:
    damaged, attrs = attrs is None, attrs or {}
    passes = bath_done = 0
    seconds = bath_seconds = 0.0
    paths = 0.0
    sparse = []  # the saved evaluations of a sparse depth: (value, gradient norm, seconds)
    try:
        for name, arr in (g[L.PASSES].arrays() if g is not None else ()):
            if L.parse_batch_name(name) is None:
                continue
            for entry in arr.attrs.asdict().get("entries", []):
                if entry.get("kind") == "bath":  # a bath evaluation, not a pass
                    bath_done += 1
                    bath_seconds += float(entry.get("wall_s", 0.0))
                    continue
                if entry.get("kind") == "sparse":  # a sparse evaluation (value and gradient)
                    sparse.append((float(entry.get("value", float("nan"))), float(entry.get("gradient_norm", float("nan"))),
                                   float(entry.get("wall_s", 0.0))))
                    continue
                passes += 1
                seconds += float(entry.get("wall_s", 0.0))
                paths += float(entry.get("paths") or 2.0 ** (2 * int(entry.get("step", p)) + 1))
    except Exception:  # noqa: BLE001 - a batch being written or damaged: resume checks and recomputes it
        pass
    inflight = inflight_summary(g) if g is not None else None
    if inflight is not None:
        seconds += inflight["wall_s"]
    return {
        "p": p,
        "active": writing,
        "metadata_damaged": damaged,
        "plan": attrs.get("plan"),
        "started_utc": attrs.get("started_utc"),
        "sessions": attrs.get("sessions"),
        "passes_saved": passes,
        "evaluations_done": passes // (2 * p),  # p forward and p adjoint passes per evaluation
        "pass_compute_s": seconds,
        "paths": paths,
        "inflight": inflight,
        "repairs": len(attrs.get("repairs", [])),
        # a bath depth: the live state of its optimizer and its checkpointed evaluations
        "bath": None if not (bath_done or attrs.get("bath_progress")) else dict(
            attrs.get("bath_progress") or {}, evaluations_saved=bath_done,
            # before the first batch is written, the optimizer's live figure (None if it has none)
            evaluation_cpu_s=(bath_seconds / bath_done) if bath_done
            else (attrs.get("bath_progress") or {}).get("evaluation_s")),
        "sparse": _sparse_running(sparse),
    }


def _sparse_running(saved: list[tuple[float, float, float]]) -> dict | None:
    """A sparse depth in progress, from its saved evaluations: how many, the best value among them
    (with that evaluation's gradient max-norm) and the mean seconds per evaluation; None if none."""
    if not saved:
        return None
    value, gradient_norm, _ = max(saved, key=lambda e: e[0] if e[0] == e[0] else -np.inf)
    return {"evaluations_saved": len(saved), "value": value, "gradient_norm": gradient_norm,
            "evaluation_s": sum(s for *_, s in saved) / len(saved)}


#: growth of one bath evaluation's cost per depth: the engine's growth table at cut-off 1e-7 (SK,
#: 1.27x per depth from p = 16 to 24 and 1.25x from 24 to 32, docs/bath.md); a depth also needs
#: 4p + 1 evaluations per gradient, so a bath depth grows by 1.27 (4p + 1) / (4p - 3) per depth
BATH_EVALUATION_GROWTH = 1.27
#: growth of a sparse depth's cost per depth: the recursion's work is 4x per depth (measured
#: 1.07, 4.46, 17.3 s per evaluation at p = 12, 13, 14, docs/performance.md), the evaluations
#: per depth about flat (216..307 at p = 10..12 on MaxCut D = 3)
SPARSE_DEPTH_GROWTH = 4.0


def _estimate_seconds_left(ensembles, finished_timings, pass_rates, spec) -> float | None:
    """Crude estimate of the time left, or None where a depth left has nothing to measure from.

    Exact depths: remaining passes times the measured seconds per path-pass.  Evaluations
    per depth are taken as the mean over finished exact depths (or 30 per start when none is
    finished).  Path visits of one evaluation with its gradient: measured at the deepest
    finished depth (the stored timings count them) and scaled by 4 per depth (every pass
    visits 2^(2m+1) paths of a depth-m contour); without such a record, 2p+1 passes of
    2^(2p+1) paths.  Bath depths and sparse depths: the last finished depth of that ensemble
    and method, scaled by a cost model (:func:`_scaled_depth_seconds`).  A depth with no such
    measurement makes the whole estimate unknown rather than leaving it out.
    """
    described = {e["label"]: e for e in spec.get("ensembles", [])}
    left = 0.0
    for e in ensembles:
        desc = described.get(e["label"], {})
        for p in e["todo"]:
            if desc.get("kind", "dense") != "dense":
                cost = _scaled_depth_seconds(e, p, "exact", lambda q: SPARSE_DEPTH_GROWTH ** q)
            elif _scaled_kind(desc, p):
                cost = _scaled_depth_seconds(e, p, "bath", lambda q: BATH_EVALUATION_GROWTH ** q * (4 * q + 1))
            else:
                cost = _exact_depth_seconds(e, p, finished_timings, pass_rates, spec)
            if cost is None:
                return None
            left += cost
    return left


def _bath_depth(desc: dict, p: int) -> bool:
    """Whether depth p of this (stored) ensemble description runs the bath engine (bath-from <= p)."""
    bath_from = (desc.get("bath") or {}).get("from")
    return bath_from is not None and p >= int(bath_from)


def _scaled_kind(desc: dict, p: int) -> bool:
    """Whether depth p of this ensemble is priced from finished depths (bath or sparse) rather than passes."""
    return desc.get("kind", "dense") != "dense" or _bath_depth(desc, p)


def _scaled_depth_seconds(e: dict, p: int, method: str, model) -> float | None:
    """The wall time of the deepest finished depth of this ensemble and method, times
    model(p) / model(p_last): the cost model's ratio from that depth to p; the checkpointed
    evaluations of a running bath or sparse depth count as done."""
    done = sorted((d["p"], d["wall_time_s"]) for d in e["done"]
                  if d.get("method", "exact") == method and d.get("wall_time_s"))
    if not done:
        return None
    p_last, w_last = done[-1]
    cost = w_last * model(max(p, p_last)) / model(p_last)
    running = e.get("running")
    if running is not None and running["p"] == p and running.get("bath"):
        b = running["bath"]
        cost = max(0.1 * cost, cost - b.get("evaluations_saved", 0) * (b.get("evaluation_cpu_s") or 0.0))
    elif running is not None and running["p"] == p and running.get("sparse"):
        sp = running["sparse"]  # a sparse depth's saved evaluations count as done too
        cost = max(0.1 * cost, cost - sp["evaluations_saved"] * sp["evaluation_s"])
    return cost


def _exact_depth_seconds(e: dict, p: int, finished_timings, pass_rates, spec) -> float | None:
    if not pass_rates:
        return None
    seconds = sum(s for s, _ in pass_rates)
    work = sum(w for _, w in pass_rates)
    if work <= 0:
        return None
    rate = seconds / work
    if finished_timings:
        evals = float(np.mean([n for _, n, *_ in finished_timings]))
    else:
        restarts = spec.get("optimizer", {}).get("restarts")
        evals = 30.0 * (1 + (restarts if restarts is not None else 2))
    measured = [(q, paths / n) for q, n, _, paths in finished_timings if paths and n]
    base = max(measured) if measured else None
    per_evaluation = base[1] * 4.0 ** (p - base[0]) if base is not None else (2 * p + 1) * 2.0 ** (2 * p + 1)
    work = evals * per_evaluation
    if e["running"] is not None and e["running"]["p"] == p:
        work = max(work - e["running"]["paths"], per_evaluation)
    return work * rate
