"""Study specs: a TOML file that says what to sweep, how, where to compute and where to store.

Layout (version 1; every key is checked, unknown keys are errors)::

    [study]
    name = "sk-and-mixed"            # required; any text
    store = "sk-and-mixed.zarr"      # required; relative paths are relative to this file's folder

    [depths]
    pmin = 1                         # default 1
    pmax = 6                         # required, pmin <= pmax <= 30

    [optimizer]                      # all optional
    restarts = 2                     # extra seeded starts per depth (default: 8 at p<=2, 4 at p<=4, 2 at p<=8, 0 after)
    seed = 0                         # seeds every random start (default 0)
    gtol = 1e-7                      # stop when the largest gradient component is below this
    maxiter = 500                    # iteration cap of each local quasi-Newton run

    [compute]                        # all optional
    executor = "auto"                # auto | inprocess | local | scheduler | batch
    scheduler = "tcp://10.0.0.5:8786"    # a running Dask scheduler (executor auto or scheduler)
    cluster-config = "slurm.toml"    # batch-cluster file (executor auto or batch), relative to this file
    workers = 4                      # local Dask workers (default: one per core)
    threads-per-worker = 1
    memory-mb = 256                  # memory budget of one chunk task; sets the chunk plan

    [checkpoint]                     # all optional (docs/store.md)
    interval-s = 30                  # a kill loses at most about max(one pass, this) of computing; 0 = write every pass
    keep-passes = false              # keep the pass batches of finished depths (default: dropped)

    [[ensemble]]                     # one or more, swept in this order
    label = "sk"                     # required; letters, digits, - _ . (it names a folder in the store)
    kind = "dense"                   # default "dense" (a mixed-spin glass given by xi)
    xi = "2:0.5"                     # required for dense: q:w pairs, xi(x) = sum w x^q
    [ensemble.reference]             # optional
    ground-state = 0.763166          # reference ground-state energy density (same normalization as xi)
    source = "Parisi value, Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)"   # required with ground-state

    [[ensemble]]                     # a sparse ensemble: Max-q-XORSAT on D-regular hypergraphs of large girth
    label = "maxcut-d3"
    kind = "sparse"
    q = 2                            # constraint size (2 = MaxCut); value = satisfied fraction
    degree = 3                       # D >= 2

Extension point: ensemble kinds are the entries of :data:`ENSEMBLE_KINDS`
(TOML table -> stored description) and of ``jobs.sweep.OPTIMIZERS`` (how a
depth is optimized).  Sparse depths run in this process and are checkpointed
per depth only (an interrupted sparse depth is re-run from its start).

:func:`load_spec` validates everything and never writes anything; every
problem is one :class:`~leadline.jobs.errors.InputError` line.
"""

from __future__ import annotations

import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from leadline.kernels.mixture import MixtureError, parse_mixture

from .errors import InputError
from .parsing import MAX_GTOL, MIN_MEMORY_MB

__all__ = ["StudySpec", "EnsembleSpec", "load_spec", "spec_from_json", "check_new_store", "MAX_DEPTH", "ENSEMBLE_KINDS"]

SPEC_VERSION = 1
#: deepest depth a spec may ask for (2^61 paths per pass: far beyond any machine already)
MAX_DEPTH = 30
_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_EXECUTORS = ("auto", "inprocess", "local", "scheduler", "batch")

_SECTIONS = {
    "study": {"name", "store"},
    "depths": {"pmin", "pmax"},
    "optimizer": {"restarts", "seed", "gtol", "maxiter"},
    "compute": {"executor", "scheduler", "cluster-config", "workers", "threads-per-worker", "memory-mb"},
    "checkpoint": {"interval-s", "keep-passes"},
    "ensemble": None,  # array of tables, checked per kind
}


@dataclass(frozen=True)
class EnsembleSpec:
    """One ensemble of the study; ``description()`` is what the store records."""

    label: str
    kind: str = "dense"
    xi: str | None = None
    q: int | None = None
    degree: float | None = None
    ground_state: float | None = None
    source: str | None = None

    def description(self) -> dict:
        return {
            "label": self.label,
            "kind": self.kind,
            "xi": self.xi,
            "q": self.q,
            "degree": self.degree,
            "reference": {"ground_state": self.ground_state, "source": self.source},
        }

    def mixture(self):
        return parse_mixture(self.xi)


@dataclass(frozen=True)
class StudySpec:
    """A validated study spec (paths absolute)."""

    name: str
    store: Path
    pmin: int
    pmax: int
    ensembles: tuple[EnsembleSpec, ...]
    restarts: int | None = None
    seed: int = 0
    gtol: float = 1e-7
    maxiter: int = 500
    executor: str = "auto"
    scheduler: str | None = None
    cluster_config: Path | None = None
    workers: int | None = None
    threads_per_worker: int = 1
    memory_mb: float = 256.0
    checkpoint_interval_s: float = 30.0
    keep_passes: bool = False
    source_text: str = field(default="", repr=False, compare=False)

    @property
    def memory_budget(self) -> int:
        return int(self.memory_mb * 2**20)

    def to_json(self) -> dict:
        """The normalized spec (stored in the store's root attribute "spec")."""
        return {
            "spec_version": SPEC_VERSION,
            "name": self.name,
            "store": str(self.store),
            "depths": {"pmin": self.pmin, "pmax": self.pmax},
            "optimizer": {"restarts": self.restarts, "seed": self.seed, "gtol": self.gtol, "maxiter": self.maxiter},
            "compute": {
                "executor": self.executor,
                "scheduler": self.scheduler,
                "cluster_config": str(self.cluster_config) if self.cluster_config else None,
                "workers": self.workers,
                "threads_per_worker": self.threads_per_worker,
                "memory_mb": self.memory_mb,
            },
            "checkpoint": {"interval_s": self.checkpoint_interval_s, "keep_passes": self.keep_passes},
            "ensembles": [e.description() for e in self.ensembles],
        }

    def compute_settings(self, **overrides):
        """ComputeSettings for leadline.cluster (validated; InputError on a bad combination)."""
        from leadline.cluster import ComputeSettings, ExecutorConfigError

        values = {
            "mode": self.executor,
            "scheduler": self.scheduler,
            "workers": self.workers,
            "threads_per_worker": self.threads_per_worker,
            "memory_budget": self.memory_budget,
            "batch_config": self.cluster_config,
        }
        values.update({k: v for k, v in overrides.items() if v is not None})
        try:
            return ComputeSettings(**values).resolved()
        except ExecutorConfigError as exc:
            raise InputError(f"[compute]: {exc}") from None


# --------------------------------------------------------------------------- checks
def _where(section: str, key: str | None = None) -> str:
    # "study" -> "[study] key"; a place already spelled out ("[[ensemble]] 'sk'") is kept as is
    where = section if section.startswith("[") else f"[{section}]"
    return f"{where} {key}" if key else where


def _int(table: dict, section: str, key: str, default=None, *, minimum=None, required=False):
    if key not in table:
        if required:
            raise InputError(f"{_where(section, key)} is required")
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, int):
        raise InputError(f"{_where(section, key)} must be an integer, got {value!r}")
    if minimum is not None and value < minimum:
        raise InputError(f"{_where(section, key)} must be >= {minimum}, got {value}")
    return value


def _float(table: dict, section: str, key: str, default=None, *, positive=False):
    if key not in table:
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{_where(section, key)} must be a finite number, got {value!r}")
    if positive and not value > 0:
        raise InputError(f"{_where(section, key)} must be positive, got {value!r}")
    return float(value)


def _text(table: dict, section: str, key: str, default=None, *, required=False):
    if key not in table:
        if required:
            raise InputError(f"{_where(section, key)} is required")
        return default
    value = table[key]
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"{_where(section, key)} must be a non-empty string, got {value!r}")
    return value.strip()


def _unknown(table: dict, allowed: set, where: str) -> None:
    extra = sorted(set(table) - allowed)
    if extra:
        raise InputError(f"{where}: unknown key {extra[0]!r} (allowed: {', '.join(sorted(allowed))})")


def _table(doc: dict, name: str) -> dict:
    value = doc.get(name, {})
    if not isinstance(value, dict):
        raise InputError(f"[{name}] must be a table")
    _unknown(value, _SECTIONS[name], f"[{name}]")
    return value


def _dense(item: dict, where: str, label: str) -> dict:
    _unknown(item, {"label", "kind", "xi", "reference"}, where)
    xi = _text(item, where, "xi", required=True)
    try:
        mixture = parse_mixture(xi)
    except MixtureError as exc:
        raise InputError(f"{where} xi: {exc}") from None
    return {"xi": mixture.spec()}


def _sparse(item: dict, where: str, label: str) -> dict:
    from leadline.kernels.sparse import check_problem

    _unknown(item, {"label", "kind", "q", "degree", "reference"}, where)
    for key in ("q", "degree"):
        if key not in item:
            raise InputError(f"{where}: kind = \"sparse\" needs q (constraint size, 2 = MaxCut) and degree (D >= 2)")
    q, degree = item["q"], item["degree"]
    if isinstance(degree, bool) or not isinstance(degree, (int, float)) or isinstance(q, bool) or not isinstance(q, int):
        raise InputError(f"{where}: q must be an integer and degree a number, got q = {q!r}, degree = {degree!r}")
    try:
        q, degree = check_problem(q, degree)
    except ValueError as exc:
        raise InputError(f"{where}: {exc}") from None
    from .sparse_ensemble import MAX_DEGREE, degree_limit_message

    if degree > MAX_DEGREE:
        raise InputError(f"{where}: {degree_limit_message(degree)}")
    return {"q": q, "degree": int(degree) if float(degree).is_integer() else degree}


#: ensemble kinds: kind -> function(table, where, label) -> extra description fields
ENSEMBLE_KINDS = {"dense": _dense, "sparse": _sparse}


def _ensembles(doc: dict) -> tuple[EnsembleSpec, ...]:
    items = doc.get("ensemble")
    if items is None:
        raise InputError("the spec needs at least one [[ensemble]] table with a label and xi")
    if not isinstance(items, list) or not all(isinstance(i, dict) for i in items) or not items:
        raise InputError("[[ensemble]] must be an array of tables, for example [[ensemble]] label = \"sk\" xi = \"2:0.5\"")
    out, seen = [], set()
    for i, item in enumerate(items, 1):
        where = f"[[ensemble]] #{i}"
        label = _text(item, where, "label", required=True)
        if not _LABEL.match(label):
            raise InputError(
                f"{where} label {label!r}: use letters, digits, '-', '_' and '.' (at most 64, not starting with '-', '_' or '.')"
            )
        if label in seen:
            raise InputError(f"{where}: label {label!r} is used twice")
        seen.add(label)
        where = f"[[ensemble]] {label!r}"
        kind = item.get("kind", "dense")
        if kind not in ENSEMBLE_KINDS:
            raise InputError(f"{where} kind must be one of {', '.join(ENSEMBLE_KINDS)}, got {kind!r}")
        fields = ENSEMBLE_KINDS[kind](item, where, label)
        ref = item.get("reference")
        ground_state = source = None
        if ref is not None and kind == "sparse":
            raise InputError(
                f"{where} reference: a sparse ensemble's value is a satisfied fraction, not an energy "
                "density; ground-state references apply to dense ensembles only"
            )
        if ref is not None:
            if not isinstance(ref, dict):
                raise InputError(f"{where} reference must be a table with ground-state and source")
            _unknown(ref, {"ground-state", "source"}, f"{where} reference")
            ground_state = _float(ref, f"{where} reference", "ground-state", positive=True)
            source = _text(ref, f"{where} reference", "source")
            if ground_state is not None and source is None:
                raise InputError(f"{where} reference: give the source of ground-state (paper, table, or 'from memory')")
            if ground_state is None and source is not None:
                raise InputError(f"{where} reference: source given without ground-state")
        out.append(EnsembleSpec(label=label, kind=kind, ground_state=ground_state, source=source, **fields))
    return tuple(out)


def _resolve(base: Path, text: str) -> Path:
    path = Path(os.path.expanduser(text))
    return (path if path.is_absolute() else base / path).resolve()


def parse_spec(text: str, base: Path, origin: str = "spec") -> StudySpec:
    """Validate spec text; relative paths are taken relative to ``base``."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{origin} is not valid TOML: {exc}") from None
    _unknown(doc, set(_SECTIONS), f"{origin}")
    study = _table(doc, "study")
    depths = _table(doc, "depths")
    opt = _table(doc, "optimizer")
    comp = _table(doc, "compute")
    ckpt = _table(doc, "checkpoint")

    name = _text(study, "study", "name", required=True)
    store = _resolve(base, _text(study, "study", "store", required=True))
    pmin = _int(depths, "depths", "pmin", 1)
    pmax = _int(depths, "depths", "pmax", required=True)
    if pmin < 1:
        raise InputError(f"[depths] pmin must be >= 1, got {pmin}")
    if pmax < 1:
        raise InputError(f"[depths] pmax must be >= 1, got {pmax}")
    if pmax < pmin:
        raise InputError(f"[depths] pmax = {pmax} is below pmin = {pmin}")
    if pmax > MAX_DEPTH:
        raise InputError(f"[depths] pmax = {pmax} is beyond {MAX_DEPTH} (2^{2 * pmax + 1} paths per pass)")

    restarts = _int(opt, "optimizer", "restarts", None, minimum=0)
    seed = _int(opt, "optimizer", "seed", 0, minimum=0)
    gtol = _float(opt, "optimizer", "gtol", 1e-7, positive=True)
    if gtol > MAX_GTOL:
        raise InputError(f"[optimizer] gtol must be at most {MAX_GTOL:g}, got {gtol!r}: a larger tolerance stops before a stationary point")
    maxiter = _int(opt, "optimizer", "maxiter", 500, minimum=1)

    executor = _text(comp, "compute", "executor", "auto")
    if executor not in _EXECUTORS:
        raise InputError(f"[compute] executor must be one of {', '.join(_EXECUTORS)}, got {executor!r}")
    scheduler = _text(comp, "compute", "scheduler")
    cluster_text = _text(comp, "compute", "cluster-config")
    cluster_config = _resolve(base, cluster_text) if cluster_text else None
    workers = _int(comp, "compute", "workers", None, minimum=1)
    threads = _int(comp, "compute", "threads-per-worker", 1, minimum=1)
    memory_mb = _float(comp, "compute", "memory-mb", 256.0, positive=True)
    if memory_mb < MIN_MEMORY_MB:
        raise InputError(f"{_where('compute', 'memory-mb')} must be >= {MIN_MEMORY_MB:g} MiB (the memory of one chunk task), got {memory_mb!r}")
    interval_s = _float(ckpt, "checkpoint", "interval-s", 30.0)
    if interval_s < 0:
        raise InputError(f"[checkpoint] interval-s must be >= 0 seconds, got {interval_s!r}")
    keep_passes = ckpt.get("keep-passes", False)
    if not isinstance(keep_passes, bool):
        raise InputError(f"[checkpoint] keep-passes must be true or false, got {keep_passes!r}")
    if cluster_config is not None:
        from leadline.cluster import ExecutorConfigError
        from leadline.cluster.batch import load_batch_config

        try:
            load_batch_config(cluster_config)
        except ExecutorConfigError as exc:
            raise InputError(f"[compute] cluster-config: {exc}") from None

    spec = StudySpec(
        name=name,
        store=store,
        pmin=pmin,
        pmax=pmax,
        ensembles=_ensembles(doc),
        restarts=restarts,
        seed=seed,
        gtol=gtol,
        maxiter=maxiter,
        executor=executor,
        scheduler=scheduler,
        cluster_config=cluster_config,
        workers=workers,
        threads_per_worker=threads,
        memory_mb=memory_mb,
        checkpoint_interval_s=interval_s,
        keep_passes=keep_passes,
        source_text=text,
    )
    spec.compute_settings()  # the combination (executor with scheduler/cluster-config, memory)
    return spec


def load_spec(path: str | os.PathLike) -> StudySpec:
    """Read and validate the spec file at ``path`` (InputError on any problem)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")  # UTF-8, a leading BOM accepted
    except FileNotFoundError:
        raise InputError(f"spec file {path} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read spec file {path}: {exc}") from None
    return parse_spec(text, path.resolve().parent, origin=f"spec {path}")


def spec_from_json(data: dict, text: str = "") -> StudySpec:
    """Rebuild a StudySpec from its stored normalized form (the store's "spec" attribute)."""
    d, o, c = data["depths"], data["optimizer"], data["compute"]
    k = data.get("checkpoint") or {}
    ensembles = []
    for e in data["ensembles"]:
        ref = e.get("reference") or {}
        ensembles.append(
            EnsembleSpec(
                label=e["label"], kind=e.get("kind", "dense"), xi=e.get("xi"), q=e.get("q"),
                degree=e.get("degree"), ground_state=ref.get("ground_state"), source=ref.get("source"),
            )
        )
    return StudySpec(
        name=data["name"],
        store=Path(data["store"]),
        pmin=int(d["pmin"]),
        pmax=int(d["pmax"]),
        ensembles=tuple(ensembles),
        restarts=o.get("restarts"),
        seed=int(o.get("seed", 0)),
        gtol=float(o.get("gtol", 1e-7)),
        maxiter=int(o.get("maxiter", 500)),
        executor=c.get("executor", "auto"),
        scheduler=c.get("scheduler"),
        cluster_config=Path(c["cluster_config"]) if c.get("cluster_config") else None,
        workers=c.get("workers"),
        threads_per_worker=int(c.get("threads_per_worker", 1)),
        memory_mb=float(c.get("memory_mb", 256.0)),
        checkpoint_interval_s=float(k.get("interval_s", 30.0)),
        keep_passes=bool(k.get("keep_passes", False)),
        source_text=text,
    )


def check_new_store(path: Path) -> None:
    """InputError unless a new store can be created at ``path`` (nothing is created)."""
    if path.exists():
        if (path / "zarr.json").exists():
            raise InputError(f"store {path} already exists; continue it with `leadline resume {path}` or change [study] store")
        raise InputError(f"[study] store {path} already exists and is not a study store; choose another path")
    parent = path.parent
    if not parent.is_dir():
        raise InputError(f"[study] store {path}: folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"[study] store {path}: folder {parent} is not writable")
