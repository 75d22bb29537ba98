"""Study specs: a TOML file that says what to sweep, how, where to compute and where to store.

Layout (version 1; every key is checked, unknown keys are errors)::

    [study]
    name = "sk-and-mixed"            # required; any text
    store = "sk-and-mixed.zarr"      # required; relative paths are relative to this file's folder

    [depths]
    pmin = 1                         # default 1
    pmax = 6                         # required, pmin <= pmax <= 30 (<= 200 when every ensemble
                                     # continues with the bath engine from a depth <= 30)

    [optimizer]                      # all optional
    restarts = 2                     # extra seeded starts per depth (default: 8 at p<=2, 4 at p<=4, 2 at p<=8, 0 after;
                                     # sparse ensembles 3 at p<=2, 1 at p<=6, 0 after)
    seed = 0                         # seeds every random start (default 0)
    gradient-tol = 1e-7              # stop when the gradient norm (largest component) is below this
    max-iterations = 500             # iteration cap of each local quasi-Newton run

    [compute]                        # all optional
    executor = "auto"                # auto | inprocess | local | scheduler | batch
    scheduler = "tcp://10.0.0.5:8786"    # a running Dask scheduler (executor auto or scheduler)
    batch-file = "slurm.toml"        # batch-cluster file (executor auto or batch), relative to this file
    workers = 4                      # local Dask workers (default: one per core)
    threads-per-worker = 1
    memory-mib = 256                 # memory budget of one chunk task; sets the chunk plan

    [checkpoint]                     # all optional (docs/store.md)
    interval-s = 30                  # a kill loses at most about max(one pass, this) of computing; 0 = write every pass
    keep-passes = false              # keep the pass batches of finished depths (default: dropped)

    [[ensemble]]                     # one or more, swept in this order
    label = "sk"                     # required; letters, digits, - _ . (it names a folder in the store)
    kind = "dense"                   # default "dense" (a mixed-spin glass given by xi)
    xi = "2:0.5"                     # required for dense: q:w pairs, xi(x) = sum w x^q
    bath-from = 17                   # optional, dense only: depths >= this use the bath engine
                                     # (pmin < bath-from <= pmax; docs/bath.md)
    bath-tolerance = 1e-6            # optional with bath-from: error asked of every bath evaluation
    bath-fock = 40                   # optional with bath-from: Fock-level cap of the engine
    bath-bond = 256                  # optional with bath-from: bond cap of the engine
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
depth is optimized; each returns the result, its CheckpointStats and its saved
evaluations or None).  Sparse depths run in this process and save every
evaluation (value and gradient) in the depth's store as the checkpoint policy
says: an interrupted sparse depth replays the saved ones and continues
(jobs/evaluations.py).

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
from leadline.storage.layout import SPEC_FORMAT_VERSION, current_spec

from .errors import InputError
from .parsing import MAX_GRADIENT_TOL, MIN_MEMORY_MIB
from .renames import renamed_spec_key

__all__ = ["StudySpec", "EnsembleSpec", "load_spec", "spec_from_dict", "spec_from_json", "check_new_store", "raised_spec_text", "MAX_DEPTH", "ENSEMBLE_KINDS"]

#: deepest exact depth a spec may ask for (2^61 paths per pass: far beyond any machine already)
MAX_DEPTH = 30
#: deepest depth of an ensemble that continues with the bath engine (its cost is polynomial in p)
MAX_BATH_DEPTH = 200
_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_EXECUTORS = ("auto", "inprocess", "local", "scheduler", "batch")

_SECTIONS = {
    "study": {"name", "store"},
    "depths": {"pmin", "pmax"},
    "optimizer": {"restarts", "seed", "gradient-tol", "max-iterations"},
    "compute": {"executor", "scheduler", "batch-file", "workers", "threads-per-worker", "memory-mib"},
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
    bath_from: int | None = None
    bath_fock: int | None = None
    bath_bond: int | None = None
    bath_tolerance: float | None = None

    def description(self) -> dict:
        out = {
            "label": self.label,
            "kind": self.kind,
            "xi": self.xi,
            "q": self.q,
            "degree": self.degree,
            "reference": {"ground_state": self.ground_state, "source": self.source},
        }
        if self.bath_from is not None:
            out["bath"] = {"from": self.bath_from, "tolerance": self.bath_tolerance, "fock": self.bath_fock,
                           "bond": self.bath_bond}
        return out

    def method(self, p: int) -> str:
        """How depth p of this ensemble is optimized: "bath" from ``bath_from`` on, else "exact"."""
        return "bath" if self.bath_from is not None and p >= self.bath_from else "exact"

    def bath_engine(self) -> dict:
        """Keyword arguments of the bath engine for this ensemble's bath depths."""
        from .bath import engine_settings

        return engine_settings(self.bath_tolerance, self.bath_fock, self.bath_bond)

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
    gradient_tol: float = 1e-7
    max_iterations: int = 500
    executor: str = "auto"
    scheduler: str | None = None
    batch_file: Path | None = None
    workers: int | None = None
    threads_per_worker: int = 1
    memory_mib: float = 256.0
    checkpoint_interval_s: float = 30.0
    keep_passes: bool = False
    source_text: str = field(default="", repr=False, compare=False)

    @property
    def memory_budget(self) -> int:
        return int(self.memory_mib * 2**20)

    def to_json(self) -> dict:
        """The normalized spec (stored in the store's root attribute "spec")."""
        return {
            "format_version": SPEC_FORMAT_VERSION,
            "name": self.name,
            "store": str(self.store),
            "depths": {"pmin": self.pmin, "pmax": self.pmax},
            "optimizer": {"restarts": self.restarts, "seed": self.seed, "gradient_tol": self.gradient_tol, "max_iterations": self.max_iterations},
            "compute": {
                "executor": self.executor,
                "scheduler": self.scheduler,
                "batch_file": str(self.batch_file) if self.batch_file else None,
                "workers": self.workers,
                "threads_per_worker": self.threads_per_worker,
                "memory_mib": self.memory_mib,
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
            "batch_file": self.batch_file,
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
    for key in extra:
        renamed = renamed_spec_key(where.strip("[]"), key)
        if renamed:
            raise InputError(renamed)
    if extra:
        raise InputError(f"{where}: unknown key {extra[0]!r} (allowed: {', '.join(sorted(allowed))})")


def _table(doc: dict, name: str) -> dict:
    value = doc.get(name, {})
    if not isinstance(value, dict):
        raise InputError(f"[{name}] must be a table")
    _unknown(value, _SECTIONS[name], f"[{name}]")
    return value


def _dense(item: dict, where: str, label: str) -> dict:
    from .bath import check_engine_values

    _unknown(item, {"label", "kind", "xi", "reference", "bath-from", "bath-tolerance", "bath-fock", "bath-bond"}, where)
    xi = _text(item, where, "xi", required=True)
    try:
        mixture = parse_mixture(xi)
    except MixtureError as exc:
        raise InputError(f"{where} xi: {exc}") from None
    bath_from = _int(item, where, "bath-from", None, minimum=2)
    tolerance, fock, bond = item.get("bath-tolerance"), item.get("bath-fock"), item.get("bath-bond")
    if bath_from is None and (tolerance is not None or fock is not None or bond is not None):
        raise InputError(f"{where}: bath-tolerance, bath-fock and bath-bond set the bath engine, which runs only with bath-from")
    check_engine_values(tolerance, fock, bond, names=tuple(f"{where} bath-{k}" for k in ("tolerance", "fock", "bond")))
    return {"xi": mixture.spec(), "bath_from": bath_from, "bath_tolerance": tolerance, "bath_fock": fock,
            "bath_bond": bond}


def _sparse(item: dict, where: str, label: str) -> dict:
    from leadline.kernels.sparse import check_problem

    if any(key in item for key in ("bath-from", "bath-tolerance", "bath-fock", "bath-bond")):
        raise InputError(f"{where}: bath-from applies to dense ensembles (kind = \"dense\") only")
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


def _check_depths(ensembles, pmin: int, pmax: int) -> None:
    """Depth limits per ensemble: exact depths <= MAX_DEPTH, bath-from inside pmin+1..pmax."""
    for ens in ensembles:
        where = f"[[ensemble]] {ens.label!r}"
        if ens.bath_from is not None:
            if ens.bath_from <= pmin:
                raise InputError(
                    f"{where} bath-from = {ens.bath_from} must be above [depths] pmin = {pmin}: the bath "
                    "optimizer starts from the optimum of the exact depth before it"
                )
            if ens.bath_from > pmax:
                raise InputError(f"{where} bath-from = {ens.bath_from} is beyond [depths] pmax = {pmax}: no depth would use it")
            if ens.bath_from > MAX_DEPTH + 1:
                raise InputError(f"{where} bath-from = {ens.bath_from}: exact depths end at {MAX_DEPTH}")
            if pmax > MAX_BATH_DEPTH:
                raise InputError(f"[depths] pmax = {pmax} is beyond {MAX_BATH_DEPTH}, the deepest bath depth")
        elif pmax > MAX_DEPTH:
            raise InputError(
                f"[depths] pmax = {pmax} is beyond {MAX_DEPTH} (2^{2 * pmax + 1} paths per pass) for {where}; "
                "continue it with the bath engine (bath-from)"
            )


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

    restarts = _int(opt, "optimizer", "restarts", None, minimum=0)
    seed = _int(opt, "optimizer", "seed", 0, minimum=0)
    gradient_tol = _float(opt, "optimizer", "gradient-tol", 1e-7, positive=True)
    if gradient_tol > MAX_GRADIENT_TOL:
        raise InputError(f"[optimizer] gradient-tol must be at most {MAX_GRADIENT_TOL:g}, got {gradient_tol!r}: a larger tolerance stops before a stationary point")
    max_iterations = _int(opt, "optimizer", "max-iterations", 500, minimum=1)

    executor = _text(comp, "compute", "executor", "auto")
    if executor not in _EXECUTORS:
        raise InputError(f"[compute] executor must be one of {', '.join(_EXECUTORS)}, got {executor!r}")
    scheduler = _text(comp, "compute", "scheduler")
    batch_text = _text(comp, "compute", "batch-file")
    batch_file = _resolve(base, batch_text) if batch_text else None
    workers = _int(comp, "compute", "workers", None, minimum=1)
    threads = _int(comp, "compute", "threads-per-worker", 1, minimum=1)
    memory_mib = _float(comp, "compute", "memory-mib", 256.0, positive=True)
    if memory_mib < MIN_MEMORY_MIB:
        raise InputError(f"{_where('compute', 'memory-mib')} must be >= {MIN_MEMORY_MIB:g} MiB (the memory of one chunk task), got {memory_mib!r}")
    interval_s = _float(ckpt, "checkpoint", "interval-s", 30.0)
    if interval_s < 0:
        raise InputError(f"[checkpoint] interval-s must be >= 0 seconds, got {interval_s!r}")
    keep_passes = ckpt.get("keep-passes", False)
    if not isinstance(keep_passes, bool):
        raise InputError(f"[checkpoint] keep-passes must be true or false, got {keep_passes!r}")
    if batch_file is not None:
        from leadline.cluster import ExecutorConfigError
        from leadline.cluster.batch import load_batch_config

        try:
            load_batch_config(batch_file)
        except ExecutorConfigError as exc:
            raise InputError(f"[compute] batch-file: {exc}") from None

    ensembles = _ensembles(doc)
    _check_depths(ensembles, pmin, pmax)
    spec = StudySpec(
        name=name,
        store=store,
        pmin=pmin,
        pmax=pmax,
        ensembles=ensembles,
        restarts=restarts,
        seed=seed,
        gradient_tol=gradient_tol,
        max_iterations=max_iterations,
        executor=executor,
        scheduler=scheduler,
        batch_file=batch_file,
        workers=workers,
        threads_per_worker=threads,
        memory_mib=memory_mib,
        checkpoint_interval_s=interval_s,
        keep_passes=keep_passes,
        source_text=text,
    )
    spec.compute_settings()  # the combination (executor with scheduler/batch-file, memory)
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


def spec_from_dict(doc: dict, base: str | os.PathLike | None = None) -> StudySpec:
    """Validate a spec given as a dict of the TOML file's tables (keys spelled as in the file);
    relative paths are taken relative to ``base`` (default: the working folder).

    The dict is written out as TOML first (tomli-w) and read back by the same checks as a
    file, so the store records a spec text that `leadline sweep` would accept as it is."""
    import tomli_w

    if not isinstance(doc, dict):
        raise InputError(f"a spec is a path to a TOML file or a dict of its tables, got {type(doc).__name__}")
    try:
        text = tomli_w.dumps(doc)
    except (TypeError, ValueError) as exc:
        raise InputError(f"spec dict cannot be written as TOML ({exc}): use str, int, float, bool, lists and dicts") from None
    return parse_spec(text, Path(base if base is not None else Path.cwd()).resolve(), origin="spec dict")


def spec_from_json(data: dict, text: str = "") -> StudySpec:
    """Rebuild a StudySpec from its stored normalized form (the store's "spec" attribute;
    the key names of older stores are read too)."""
    data = current_spec(data)
    d, o, c = data["depths"], data["optimizer"], data["compute"]
    k = data.get("checkpoint") or {}
    ensembles = []
    for e in data["ensembles"]:
        ref = e.get("reference") or {}
        bath = e.get("bath") or {}
        ensembles.append(
            EnsembleSpec(
                label=e["label"], kind=e.get("kind", "dense"), xi=e.get("xi"), q=e.get("q"),
                degree=e.get("degree"), ground_state=ref.get("ground_state"), source=ref.get("source"),
                bath_from=bath.get("from"), bath_tolerance=bath.get("tolerance"), bath_fock=bath.get("fock"),
                bath_bond=bath.get("bond"),
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
        gradient_tol=float(o.get("gradient_tol", 1e-7)),
        max_iterations=int(o.get("max_iterations", 500)),
        executor=c.get("executor", "auto"),
        scheduler=c.get("scheduler"),
        batch_file=Path(c["batch_file"]) if c.get("batch_file") else None,
        workers=c.get("workers"),
        threads_per_worker=int(c.get("threads_per_worker", 1)),
        memory_mib=float(c.get("memory_mib", 256.0)),
        checkpoint_interval_s=float(k.get("interval_s", 30.0)),
        keep_passes=bool(k.get("keep_passes", False)),
        source_text=text,
    )


_PMAX_LINE = re.compile(r"(?m)^([^#\n]*\bpmax\s*=\s*)(\d+)")


def raised_spec_text(text: str, old: int, new: int, when: str) -> str:
    """The spec text of a study whose deepest depth `leadline resume --pmax` raised from ``old`` to
    ``new``: its pmax line rewritten (when there is exactly one and the result still reads as
    pmax = new), and a closing comment saying when and from what."""
    note = f"\n# [depths] pmax raised from {old} to {new} by `leadline resume --pmax {new}` ({when})\n"
    if len(_PMAX_LINE.findall(text)) == 1:
        rewritten = _PMAX_LINE.sub(lambda m: f"{m.group(1)}{new}", text)
        try:
            if int(tomllib.loads(rewritten)["depths"]["pmax"]) == new:
                return rewritten.rstrip("\n") + "\n" + note
        except (tomllib.TOMLDecodeError, KeyError, TypeError, ValueError):
            pass
    return text.rstrip("\n") + "\n" + note


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
