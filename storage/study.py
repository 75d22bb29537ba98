"""Writing a study store: spec, ensembles, per-depth results, pass batches, in-flight ledger.

Only one process writes a store at a time (:class:`~leadline.storage.lock.StoreLock`).
Every write is ordered so that a SIGKILL at any instant leaves a store that
resume can use: data first, then the record that vouches for it (a ledger row
with the data's CRC-32, a batch's CRC-32 attributes, a depth's ``state = "done"``).
Zarr's local store replaces files atomically (temporary file + rename), and
whatever a half-finished write leaves behind fails its checksum and is
recomputed, never trusted.  A new store is built under a hidden temporary name
next to its final path and renamed into place, so a store path either does not
exist or holds a complete, locked store.

What is written when is decided by :class:`~leadline.storage.policy.CheckpointPolicy`
(see cluster/checkpointed.py and docs/store.md).
"""

from __future__ import annotations

import collections
import datetime as _dt
import os
import re
import shutil
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import ZstdCodec

from leadline.kernels.exact import sum_w_tolerance

from . import integrity as I
from . import layout as L
from .errors import NotAStudyError, SchemaVersionError, StoreDamagedError, StoreError
from .faults import crash_point, witness
from .lock import StoreLock, holder_alive, read_lock
from .policy import CheckpointPolicy

__all__ = ["StudyStore", "DepthStore", "InflightPass", "check_study", "check_contents", "utc_now", "inflight_summary",
           "store_usage", "write_cost_probe"]

#: leftovers of writes a kill interrupted: zarr's temporary files, and lock files not yet linked
_ZARR_TEMP = re.compile(r"(\.[0-9a-f]{32}\.partial|^\.leadline\.lock\.[0-9a-f]{32}\.tmp)$")
#: a store being created: built as "<parent>/.<name>.creating-<hex>", then renamed to "<parent>/<name>"
_CREATING = ".creating-"

#: chunk files named c.<k>.0.0 side by side (no folder per chunk: cheaper to create and delete)
_FLAT_KEYS = {"name": "default", "separator": "."}
#: recently computed pass sums kept in memory (the optimizer may ask for one again)
_RECENT_PASSES = 64


def _run_async(coro) -> None:
    """Run a coroutine of zarr's async API on zarr's own event loop (as its sync API does)."""
    from zarr.core.sync import sync

    sync(coro)


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _compressor():
    # zstd's own frame checksum makes most damaged chunk files fail to decode at all
    return ZstdCodec(level=1, checksum=True)


def _stderr_notice(text: str) -> None:
    print(f"leadline: {text}", file=sys.stderr, flush=True)


def check_study(path: str | os.PathLike) -> dict:
    """Root attributes of the study store at ``path``, after format and schema checks.

    Raises NotAStudyError or SchemaVersionError with a message that says what to do.
    """
    path = Path(path)
    if not path.exists():
        raise NotAStudyError(f"no study store at {path}")
    # say only what was found: the path may be the user's own folder or file
    looks_like = f"a study store is the folder `leadline sweep` creates, with zarr.json and format {L.FORMAT!r}"
    if not path.is_dir():
        raise NotAStudyError(f"{path} is a file, not a study store ({looks_like})")
    if not (path / "zarr.json").is_file():
        if (path / L.ENSEMBLES).is_dir() or (path / "leadline.lock").exists():
            raise StoreDamagedError(
                f"store {path} is damaged: its root metadata zarr.json (name, spec and record of the study) is "
                "missing; restore the store from a backup"
            )
        raise NotAStudyError(f"{path} is a folder without zarr.json, not a study store ({looks_like})")
    try:
        attrs = I.read_attrs(path)
    except I.Unreadable as exc:
        if (path / L.ENSEMBLES).is_dir():
            raise StoreDamagedError(f"store {path} is damaged: the root group {exc}; restore the store from a backup") from None
        raise NotAStudyError(f"{path} is not a readable Zarr v3 group: the folder {exc}") from None
    if attrs.get("format") != L.FORMAT:
        raise NotAStudyError(f"{path} is a Zarr group but not a leadline study store (format {attrs.get('format')!r})")
    version = L.store_version(attrs)
    if version not in L.READABLE_SCHEMAS:
        raise SchemaVersionError(
            f"store {path} has format version {version!r}, this leadline reads versions "
            f"{', '.join(map(str, L.READABLE_SCHEMAS))}; use the leadline release that wrote it"
        )
    # the version under this release's name, whichever release wrote the store; the spec stays as
    # stored (the integrity record holds its digest): readers take it through layout.current_spec
    attrs[L.VERSION] = version
    return attrs


def check_contents(path: str | os.PathLike, attrs: dict) -> "I.Contents":
    """Check the store's parts against its record and layout (storage/integrity.py).

    Raises StoreDamagedError naming the damaged parts when anything finished, the spec
    or an ensemble is missing, unreadable or altered; returns what was read otherwise.
    """
    path = Path(path)
    contents = I.inspect(path, attrs, int(L.store_version(attrs) or 0))
    fatal = contents.fatal
    if fatal and all(f.permission for f in fatal):
        raise StoreDamagedError(
            f"store {path} cannot be read: {I.describe_findings(fatal)}. Nothing was changed; give this user "
            "read access to those parts (or run as the store's owner)"
        )
    if fatal:
        raise StoreDamagedError(
            f"store {path} is damaged: {I.describe_findings(fatal)}. Nothing was changed; restore the store "
            "from a backup (or start a new sweep)"
        )
    return contents


def store_usage(path: str | os.PathLike) -> dict:
    """{"files", "bytes"} of everything under the store folder (what `leadline status` shows)."""
    files = size = 0
    for dirpath, _dirs, names in os.walk(path):
        for name in names:
            try:
                size += os.lstat(os.path.join(dirpath, name)).st_size
            except OSError:
                continue
            files += 1
    return {"files": files, "bytes": size}


def _remove_abandoned_creations(path: Path) -> None:
    """Delete half-built stores of ``path`` left by killed creators (their lock holder is dead)."""
    prefix = f".{path.name}{_CREATING}"
    try:
        entries = list(path.parent.iterdir())
    except OSError:
        return
    for entry in entries:
        if not entry.name.startswith(prefix) or not entry.is_dir():
            continue
        holder = read_lock(entry)
        if holder is None:
            # the creator died before it locked the folder, or is locking it right now
            try:
                young = time.time() - entry.stat().st_mtime < 60
            except OSError:
                continue
            if young:
                continue
        elif holder_alive(holder):
            continue
        shutil.rmtree(entry, ignore_errors=True)


class StudyStore:
    """A study store opened for writing (holds the writer lock until :meth:`close`)."""

    def __init__(self, path: Path, root: zarr.Group, lock: StoreLock, policy: CheckpointPolicy | None = None):
        self.path = path
        self.root = root
        self.lock = lock
        self.policy = policy or CheckpointPolicy.from_spec(root.attrs.asdict().get("spec"))

    # ------------------------------------------------------------ open/create
    @classmethod
    def create(
        cls,
        path: str | os.PathLike,
        *,
        name: str,
        spec: dict,
        spec_toml: str,
        ensembles: list[dict],
        writer: str = "leadline",
        command: str = "sweep",
        extra: dict | None = None,
    ) -> "StudyStore":
        """Create a new store at ``path`` (which must not exist) and lock it.

        ``spec`` is the validated spec as JSON-able dict, ``spec_toml`` its
        text, ``ensembles`` one description dict per ensemble (spec order),
        ``extra`` more root attributes (e.g. the chunk kernel in use).

        The store is built under a hidden name in the same folder and renamed
        to ``path`` when complete (rename is atomic within a file system): a
        kill during creation leaves no folder at ``path``, and the next
        creation removes the abandoned one.
        """
        path = Path(path)
        exists = StoreError(f"{path} already exists; continue it with `leadline resume {path}` or choose a new store path")
        if path.exists():
            raise exists
        _remove_abandoned_creations(path)
        building = path.parent / f".{path.name}{_CREATING}{uuid.uuid4().hex[:12]}"
        os.mkdir(building)
        lock = StoreLock(building, command).acquire()
        try:
            attrs = {
                "format": L.FORMAT,
                L.VERSION: L.SCHEMA_VERSION,
                "name": name,
                "spec": spec,
                "spec_toml": spec_toml,
                "created_utc": utc_now(),
                "writer": writer,
                **(extra or {}),
            }
            root = zarr.create_group(store=str(building), zarr_format=3, attributes=attrs)
            top = root.require_group(L.ENSEMBLES)
            for desc in ensembles:
                top.create_group(desc["label"], attributes=dict(desc))
            # the record of what the store was created with, from the attributes as they read back
            stored = {d["label"]: I.read_attrs(building / L.ENSEMBLES / d["label"]) for d in ensembles}
            root.attrs[I.RECORD] = I.new_record(I.read_attrs(building), stored)
            crash_point("store-built")
            try:
                if path.exists():
                    raise FileExistsError(path)
                os.rename(building, path)
            except OSError:
                raise exists from None
            lock.directory = path
            store = cls(path, zarr.open_group(str(path), mode="r+", zarr_format=3), lock)
            return store
        except BaseException:
            if lock.directory == building:
                lock.release()
                shutil.rmtree(building, ignore_errors=True)
            else:
                lock.release()
            raise

    @classmethod
    def open(cls, path: str | os.PathLike, *, command: str = "resume", notice=_stderr_notice) -> "StudyStore":
        """Open an existing store for writing: schema check, lock, cleanup, layout upgrade.

        ``notice(text)`` receives one line when something the user should know
        happened (old-layout pass caches dropped); default: stderr.
        """
        path = Path(path)
        check_study(path)
        lock = StoreLock(path, command).acquire()
        try:
            attrs = check_study(path)  # again, now that no other writer can change it
            contents = check_contents(path, attrs)
            root = zarr.open_group(str(path), mode="r+", zarr_format=3)
            store = cls(path, root, lock)
            store._remove_temp_files()
            store._upgrade(notice, contents)
            store._reconcile(contents, notice)
            store._drop_finished_caches()
            return store
        except BaseException:
            lock.release()
            raise

    def close(self) -> None:
        self.lock.release()

    def __enter__(self) -> "StudyStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _remove_temp_files(self) -> None:
        """Temporary files of writes that a kill interrupted (never referenced by anything)."""
        for dirpath, _dirs, files in os.walk(self.path):
            for f in files:
                if _ZARR_TEMP.search(f):
                    full = os.path.join(dirpath, f)
                    try:
                        # a lock candidate of another process may be seconds old; leave it to its owner
                        if f.endswith(".tmp") and time.time() - os.stat(full).st_mtime < 60:
                            continue
                        os.unlink(full)
                    except OSError:
                        pass

    def _depth_dirs(self):
        """(label, p, directory) of every depth group on disk."""
        top = self.path / L.ENSEMBLES
        if not top.is_dir():
            return
        for ens in sorted(top.iterdir()):
            if not ens.is_dir():
                continue
            for d in sorted(ens.iterdir()):
                p = L.parse_depth_name(d.name)
                if p is not None and d.is_dir():
                    yield ens.name, p, d

    def _upgrade(self, notice, contents: "I.Contents") -> None:
        """Bring an older layout to this release's: schema 1 drops old pass caches, schemas 1-2
        get the integrity record, schemas 1-3 get this release's attribute names
        (:data:`layout.RENAMED_IN_4`).  Safe to repeat after a kill: the version attribute is
        written last."""
        version = L.store_version(self.root.attrs.asdict())
        if version == L.SCHEMA_VERSION:
            return
        if version in (1, 2):
            self._upgrade_to_3(notice, contents, version)
        self._rename_attributes(version)

    def _rename_attributes(self, version) -> None:
        """Schema 3 -> 4: the attributes get this release's names (values unchanged); the
        integrity record's digest of the spec follows the renamed spec."""
        for label in list(self.root.require_group(L.ENSEMBLES).group_keys()):
            group = self.root[f"{L.ENSEMBLES}/{label}"]
            attrs = group.attrs.asdict()
            if "references" in attrs:
                group.attrs[L.COMPUTED_REFERENCE] = attrs["references"]
                del group.attrs["references"]
            for name in list(group.group_keys()):
                if L.parse_depth_name(name) is None:
                    continue
                depth = group[name]
                timings = depth.attrs.asdict().get("timings")
                if isinstance(timings, dict) and isinstance(timings.get("this_session"), dict):
                    timings["this_session"] = L.current_session(timings["this_session"])
                    depth.attrs["timings"] = timings
        root = self.root.attrs.asdict()
        migrated = list(root.get("migrated", []))
        migrated.append({"from": 3, "to": L.SCHEMA_VERSION, "utc": utc_now(), "renamed": "attribute names"})
        spec = L.current_spec(root["spec"])
        changes = {"spec": spec, "migrated": migrated}
        record = root.get(I.RECORD)
        if isinstance(record, dict) and isinstance(record.get("identity"), dict):
            changes[I.RECORD] = dict(I.current_record(record), identity=dict(record["identity"], spec=I.digest(spec)))
        self.root.attrs.update(changes)
        self.root.attrs[L.VERSION] = L.SCHEMA_VERSION
        if L.OLD_VERSION in self.root.attrs:
            del self.root.attrs[L.OLD_VERSION]

    def _upgrade_to_3(self, notice, contents: "I.Contents", version) -> None:
        """Schema 1 -> 3: keep every depth record, drop the pass caches and ledgers of the old layout.
        Schema 1 or 2 -> 3: write the integrity record from what is on disk (it was checked
        for readability and for angle arrays that agree with their results).

        Old saved passes were keyed for the full-contour iteration (one plan
        per depth); the current iteration never asks for them, and reusing them
        would mix results of different plans.  Safe to repeat after a kill.
        """
        if I.RECORD not in self.root.attrs:
            # finished depths are added by _reconcile, which runs next
            self.root.attrs[I.RECORD] = I.new_record(self.root.attrs.asdict(), contents.ensembles)
            contents.record = self.root.attrs[I.RECORD]
        dropped = 0
        depths = set()
        for label, p, d in (self._depth_dirs() if version == 1 else ()):
            for sub in (L.PASSES, L.INFLIGHT):
                if (d / sub).exists():
                    if sub == L.PASSES:
                        dropped += sum(1 for e in (d / sub).iterdir() if e.is_dir())
                    shutil.rmtree(d / sub, ignore_errors=True)
                    depths.add((label, p))
        migrated = list(self.root.attrs.get("migrated", []))
        migrated.append({"from": version, "to": 3, "utc": utc_now(), "passes_dropped": dropped})
        self.root.attrs.update({"migrated": migrated})
        if depths:
            notice(
                f"store {self.path} was written by an older leadline (schema {version}): finished depths are "
                f"kept; {dropped} saved passes of {len(depths)} depths no longer apply and were dropped "
                "(an unfinished depth restarts from its recorded start)"
            )

    def _reconcile(self, contents: "I.Contents", notice) -> None:
        """Record finished depths the record does not list yet (a kill right after a depth's done flag)."""
        record = I.current_record(self.root.attrs[I.RECORD])
        finished = {label: dict(v) for label, v in record["finished"].items()}
        changed = "version" in self.root.attrs[I.RECORD]  # an old key name: written anew with this one
        for label in contents.ensembles:
            mine = finished.setdefault(label, {})
            for p, attrs in contents.done(label).items():
                if str(p) not in mine:
                    mine[str(p)] = I.digest(attrs["result"])
                    changed = True
        if changed:
            self.root.attrs[I.RECORD] = dict(record, finished=finished)
        for f in contents.findings:  # not fatal: the metadata of an unfinished depth
            notice(f"store {self.path}: {f.text()}; that unfinished depth starts again")

    def _record_finished(self, label: str, p: int, directory: Path) -> None:
        """Add depth p of ``label`` to the record, with the digest of its result as it reads back."""
        result = I.read_attrs(directory)["result"]
        record = I.current_record(self.root.attrs[I.RECORD])
        finished = {k: dict(v) for k, v in record["finished"].items()}
        finished.setdefault(label, {})[str(p)] = I.digest(result)
        self.lock.verify()
        self.root.attrs[I.RECORD] = dict(record, finished=finished)

    def _drop_finished_caches(self) -> None:
        """Pass batches and ledgers of finished depths (left by a kill right after a depth finished)."""
        if self.policy.keep_passes:
            return
        for _label, _p, d in self._depth_dirs():
            if not ((d / L.PASSES).exists() or (d / L.INFLIGHT).exists()):
                continue
            try:
                state = zarr.open_group(str(d), mode="r", zarr_format=3).attrs.get("state")
            except Exception:  # noqa: BLE001
                continue
            if state == "done":
                shutil.rmtree(d / L.PASSES, ignore_errors=True)
                shutil.rmtree(d / L.INFLIGHT, ignore_errors=True)

    # ------------------------------------------------------------ contents
    @property
    def attrs(self) -> dict:
        return self.root.attrs.asdict()

    @property
    def spec(self) -> dict:
        return self.attrs["spec"]

    def raise_pmax(self, pmax: int, spec_toml: str, utc: str | None = None) -> bool:
        """Let the study continue past its deepest depth, to ``pmax``; False if it already goes that far.

        The stored spec's [depths] pmax, its text (``spec_toml``, the caller's rewrite) and the
        record's digests of both change in one write of the root attributes, and the raise is
        appended to the root attribute ``depths_raised`` (at ``utc``, default now).  Finished depths are not touched, so a
        kill before or after the write leaves a store that opens (with the old or the new pmax)."""
        attrs = self.root.attrs.asdict()
        spec = L.current_spec(attrs["spec"])
        old = int(spec["depths"]["pmax"])
        if pmax <= old:
            return False
        spec = dict(spec, depths=dict(spec["depths"], pmax=int(pmax)))
        raised = list(attrs.get(L.DEPTHS_RAISED, [])) + [{"from": old, "to": int(pmax), "utc": utc or utc_now()}]
        changes = {"spec": spec, "spec_toml": spec_toml, L.DEPTHS_RAISED: raised}
        record = attrs.get(I.RECORD)
        if isinstance(record, dict) and isinstance(record.get("identity"), dict):
            identity = dict(record["identity"])
            for key, value in (("spec", spec), ("spec_toml", spec_toml)):
                if key in identity:
                    identity[key] = I.digest(value)
            changes[I.RECORD] = dict(I.current_record(record), identity=identity)
        self.lock.verify()
        self.root.attrs.update(changes)
        return True

    def ensure_ensembles(self, ensembles: list[dict]) -> None:
        """Create the ensemble groups that are missing (idempotent, kill-safe)."""
        self.lock.verify()
        top = self.root.require_group(L.ENSEMBLES)
        for desc in ensembles:
            label = desc["label"]
            if label in top and dict(top[label].attrs).get("label") == label:
                continue
            top.create_group(label, attributes=dict(desc), overwrite=True)

    def _ensemble_group(self, label: str) -> zarr.Group:
        return self.root[f"{L.ENSEMBLES}/{label}"]

    def save_references(self, label: str, references: dict) -> None:
        """Cache computed reference energies (kernels.reference.References.to_json())
        in the ensemble's attribute ``computed_reference``."""
        self.lock.verify()
        self.root.require_group(L.ENSEMBLES)
        group = self.root.require_group(f"{L.ENSEMBLES}/{label}")
        group.attrs[L.COMPUTED_REFERENCE] = references

    def finished_depth(self, label: str, p: int) -> dict | None:
        """The stored result of depth p (attrs "result"), or None if not done."""
        try:
            attrs = I.read_attrs(self.path / L.ENSEMBLES / label / L.depth_name(p))
        except I.Unreadable:  # not started, or an unfinished depth whose metadata is damaged
            return None
        if attrs.get("state") != "done" or "result" not in attrs:
            return None
        return attrs["result"]

    def depth(self, label: str, p: int, plan=None) -> "DepthStore":
        """The working record of depth p (created on first use; sessions counted).

        ``plan`` (optional) is recorded in the depth's attribute "plan" for
        information only: every saved pass and ledger carries its own plan
        (each step of an evaluation may have its own).
        """
        self.lock.verify()
        ens = self._ensemble_group(label)
        name = L.depth_name(p)
        group = None
        folder = self.path / L.ENSEMBLES / label / name
        if folder.is_dir():
            try:
                I.read_attrs(folder)  # the metadata of an unfinished depth may be damaged: start it again
                group = ens[name]
            except (I.Unreadable, KeyError, TypeError, ValueError):
                group = None
        if group is None:
            group = ens.create_group(
                name,
                attributes={
                    "p": p,
                    "plan": L.plan_json(plan) if plan is not None else None,
                    "state": "running",
                    "started_utc": utc_now(),
                    "sessions": 0,
                    "repairs": [],
                },
                overwrite=True,
            )
        group.attrs.update({"sessions": int(group.attrs.get("sessions", 0)) + 1})
        return DepthStore(group, p, self.path / group.path, self.policy, guard=self.lock.verify)

    def finish_depth(self, label: str, p: int, result: dict, timings: dict) -> None:
        """Record a finished depth: angle arrays first, then result + done flag in one write.

        The depth's pass batches and ledger are deleted afterwards (nothing asks
        for them again) unless the policy keeps them.
        """
        self.lock.verify()
        group = self._ensemble_group(label)[L.depth_name(p)]
        group.create_array("gamma", data=np.asarray(result["gamma"], dtype=np.float64), overwrite=True)
        group.create_array("beta", data=np.asarray(result["beta"], dtype=np.float64), overwrite=True)
        crash_point("depth-arrays-written")
        self.lock.verify()
        group.attrs.update(
            {"state": "done", "result": result, "timings": timings, "finished_utc": utc_now()}
        )
        crash_point("depth-done")
        self._record_finished(label, p, self.path / group.path)
        shutil.rmtree(self.path / group.path / L.INFLIGHT, ignore_errors=True)
        if not self.policy.keep_passes:
            shutil.rmtree(self.path / group.path / L.PASSES, ignore_errors=True)


class _Entry:
    """Index entry of one saved pass: which batch, where in it, and its record."""

    __slots__ = ("batch", "record")

    def __init__(self, batch: str, record: dict):
        self.batch = batch
        self.record = record


class DepthStore:
    """Pass batches, pending passes and in-flight ledger of one depth of one ensemble.

    Saved passes are written in batches (one array per batch); computed passes
    wait in memory until :meth:`flush` (called by the checkpoint layer when the
    policy says so).  The index of the batches on disk is read once, at open.
    """

    def __init__(self, group: zarr.Group, p: int, directory: Path, policy: CheckpointPolicy | None = None,
                 guard=None):
        #: called before every write (the writer lock's verify: raises if the lock was lost)
        self.guard = guard or (lambda: None)
        self.group = group
        self.p = p
        self.directory = Path(directory)
        self.policy = policy or CheckpointPolicy()
        self.repairs: list[dict] = []
        self._seen: dict[str, tuple[float, float]] = {}  # pass key -> (compute seconds, paths) of passes used
        self._index: dict[str, _Entry] = {}
        self._batches: list[str] = []
        self._batch_data: tuple[str, np.ndarray] | None = None  # the last batch read, decoded
        self._pending: dict[str, tuple[np.ndarray, dict, tuple]] = {}
        self._recent: collections.OrderedDict[str, np.ndarray] = collections.OrderedDict()
        self.pending_seconds = 0.0
        self._inflight_state = None
        self._passes_group = None
        self._load_index()

    def pass_seconds(self) -> float:
        """Compute seconds of the distinct passes used so far (including earlier sessions' work)."""
        return float(sum(s for s, _ in self._seen.values()))

    def paths_used(self) -> float:
        """Path visits of the distinct passes used so far."""
        return float(sum(n for _, n in self._seen.values()))

    def passes_used(self) -> int:
        return len(self._seen)

    def _remove(self, relative: str) -> None:
        """Delete a subtree of this depth's folder (plain rmtree: zarr keeps no index of it)."""
        shutil.rmtree(self.directory / relative, ignore_errors=True)

    def note_repair(self, what: str, key: str, chunk: int | None = None, detail: str = "") -> None:
        event = {"what": what, "key": key, "chunk": chunk, "detail": detail[:200], "utc": utc_now()}
        self.repairs.append(event)
        self.guard()
        old = list(self.group.attrs.get("repairs", []))
        self.group.attrs.update({"repairs": old + [event]})

    # ------------------------------------------------------------ pass batches
    def _passes(self) -> zarr.Group:
        if self._passes_group is None:
            self._passes_group = self.group.require_group(L.PASSES)
        return self._passes_group

    def _load_index(self) -> None:
        folder = self.directory / L.PASSES
        if not folder.is_dir():
            return
        for entry in sorted(folder.iterdir()):
            n = L.parse_batch_name(entry.name)
            if n is None or not entry.is_dir():
                continue
            try:
                attrs = self._passes()[entry.name].attrs.asdict()
                records = list(attrs["entries"])
            except Exception as exc:  # noqa: BLE001 - metadata of a killed write, or damaged
                self.note_repair("pass batch dropped", entry.name, detail=f"unreadable metadata ({type(exc).__name__})")
                self._remove(f"{L.PASSES}/{entry.name}")
                continue
            self._batches.append(entry.name)
            for record in records:
                self._index[record["key"]] = _Entry(entry.name, record)

    def _read_batch(self, name: str) -> np.ndarray:
        if self._batch_data is None or self._batch_data[0] != name:
            self._batch_data = (name, np.asarray(self._passes()[name][...]))
        return self._batch_data[1]

    def cached_pass(self, key: str, backward: bool) -> np.ndarray | None:
        """The verified summed result of pass ``key``, or None (damaged entries are dropped)."""
        if key in self._recent:
            self._recent.move_to_end(key)
            return self._recent[key]
        if key in self._pending:
            return self._pending[key][0]
        entry = self._index.get(key)
        if entry is None:
            return None
        record = entry.record
        try:
            flat = self._read_batch(entry.batch)
            shape = tuple(record["shape"])
            size = int(np.prod(shape))
            total = np.array(flat[int(record["offset"]) : int(record["offset"]) + size]).reshape(shape)
            problem = self._verify_sum(total, record, backward)
        except Exception as exc:  # noqa: BLE001 - unreadable chunk or metadata
            problem = f"unreadable ({type(exc).__name__}: {exc})"
        if problem is None:
            self._seen[key] = (float(record.get("wall_s", 0.0)), float(record.get("paths", 0.0)))
            return total
        self.note_repair("saved pass dropped", key, detail=problem)
        del self._index[key]
        return None

    @staticmethod
    def _verify_sum(total: np.ndarray, record: dict, backward: bool) -> str | None:
        if total.dtype != np.complex128 or total.shape != tuple(record["shape"]):
            return f"shape {total.shape} dtype {total.dtype}, expected {record['shape']} complex128"
        if L.checksum(total) != record.get("crc32"):
            return "crc32 mismatch"
        completions = record.get("completions", [])
        if len(completions) != int(record.get("n_chunks", -1)) or min(completions, default=0) < 1:
            return "chunk accounting: not every chunk was completed"
        if not backward and record.get("kind") not in L.EVALUATION_KINDS:  # an evaluation has no path weights
            m = int(record["step"])
            dev = float(np.max(np.abs(np.diag(total[: 2 * m + 1]) - 1.0)))
            if not dev <= float(record.get("sum_w_allowed", sum_w_tolerance(m))):
                return f"sum of path weights deviates from 1 by {dev:.3e}"
        return None

    def add_pass(self, key: str, total: np.ndarray, meta: dict, chunks_to_witness=()) -> None:
        """A verified pass sum: kept in memory, written with the next :meth:`flush`.

        ``meta`` has kind, step, plan, n_chunks, completions, paths, wall_s.
        ``chunks_to_witness``: chunks that have no ledger row of their own
        (a pass computed whole); they count as finished when the batch is written.
        """
        total = np.ascontiguousarray(total, dtype=np.complex128)
        record = dict(meta, key=key, shape=list(total.shape), crc32=L.checksum(total))
        self._seen[key] = (float(record.get("wall_s", 0.0)), float(record.get("paths", 0.0)))
        self._pending[key] = (total, record, tuple(chunks_to_witness))
        self.pending_seconds += float(record.get("wall_s", 0.0))
        self._recent[key] = total
        while len(self._recent) > _RECENT_PASSES:
            self._recent.popitem(last=False)

    def flush(self) -> int:
        """Write the pending passes as one batch array (data and index in one create); returns how many."""
        if not self._pending:
            return 0
        self.guard()
        names = [L.parse_batch_name(b) for b in self._batches]
        name = L.batch_name(max(names, default=0) + 1)
        parts, records, offset = [], [], 0
        for total, record, _ in self._pending.values():
            records.append(dict(record, offset=offset))
            parts.append(total.ravel())
            offset += total.size
        flat = np.concatenate(parts)
        self._passes().create_array(
            name,
            data=flat,
            chunks=flat.shape,
            attributes={"entries": records, "crc32": L.checksum(flat), "stored_utc": utc_now()},
            overwrite=True,
            chunk_key_encoding=_FLAT_KEYS,
        )
        self._batches.append(name)
        for record in records:
            self._index[record["key"]] = _Entry(name, record)
        for key, (_, _, chunks) in self._pending.items():
            witness(f"{self.group.path}/{key}", chunks)
        count = len(self._pending)
        self._pending.clear()
        self.pending_seconds = 0.0
        crash_point("pass-cached")
        return count

    def cached_pass_count(self) -> int:
        return len(self._index)

    def pass_records(self) -> list[dict]:
        """Records of every pass in the batches on disk (for timings)."""
        return [e.record for e in self._index.values()]

    # ------------------------------------------------------------ in flight
    def inflight(self, key: str, meta: dict, n_chunks: int, shape: tuple[int, int]) -> "InflightPass":
        """The ledger of pass ``key``: resumed if it is the pass in flight, else started.

        One ledger per depth; its arrays are recreated only when a pass has
        another number of chunks or another matrix shape.  Starting a pass
        writes one attribute update (key and a new serial), which invalidates
        every row of the previous pass at once.
        """
        self.guard()
        state = self._inflight_arrays(n_chunks, tuple(shape))
        attrs = state.group.attrs.asdict()
        if attrs.get("key") == key and attrs.get("fingerprint") == meta.get("fingerprint"):
            return InflightPass(self, key, int(attrs["serial"]), state)
        serial = max(int(attrs.get("serial", 0)), int(state.rows[:, L.SERIAL].max(initial=0))) + 1
        state.group.attrs.update(dict(meta, key=key, serial=serial, n_chunks=n_chunks, started_utc=utc_now()))
        return InflightPass(self, key, serial, state)

    def restart_inflight(self, inflight: "InflightPass") -> "InflightPass":
        """Invalidate every chunk of ``inflight`` (new serial) to recompute the pass from scratch."""
        self.guard()
        state = inflight.state
        serial = inflight.serial + 1
        state.group.attrs.update({"serial": serial, "started_utc": utc_now()})
        return InflightPass(self, inflight.key, serial, state)

    def _inflight_arrays(self, n: int, shape: tuple[int, int]) -> "_InflightArrays":
        state = self._inflight_state
        if state is not None and state.partials.shape == (n, *shape):
            return state
        serial = 0
        if state is None and (self.directory / L.INFLIGHT).exists():
            try:
                g = self.group[L.INFLIGHT]
                partials, ledger = g[L.PARTIALS], g[L.LEDGER]
                state = _InflightArrays(self, g, partials, ledger)
            except Exception:  # noqa: BLE001 - half-created by a killed run: start it again
                self.note_repair("in-flight ledger recreated", "", detail="incomplete or unreadable")
                state = None
            if state is not None and state.partials.shape == (n, *shape) and state.ledger.shape == (n, len(L.LEDGER_COLUMNS)):
                self._inflight_state = state
                return state
        if state is not None:
            serial = max(int(state.group.attrs.get("serial", 0)), int(np.abs(state.rows[:, L.SERIAL]).max(initial=0)))
        self._remove(L.INFLIGHT)
        g = self.group.create_group(L.INFLIGHT, attributes={"key": None, "serial": serial, "n_chunks": n}, overwrite=True)
        partials = g.create_array(
            L.PARTIALS,
            shape=(n, *shape),
            chunks=(1, *shape),
            dtype="complex128",
            fill_value=0,
            compressors=_compressor(),
            chunk_key_encoding=_FLAT_KEYS,
        )
        ledger = g.create_array(
            L.LEDGER,
            shape=(n, len(L.LEDGER_COLUMNS)),
            chunks=(1, len(L.LEDGER_COLUMNS)),
            dtype="int64",
            fill_value=0,
            attributes={"columns": list(L.LEDGER_COLUMNS)},
            chunk_key_encoding=_FLAT_KEYS,
        )
        state = _InflightArrays(self, g, partials, ledger)
        self._inflight_state = state
        return state


class _InflightArrays:
    """The in-flight group of one depth and an in-memory copy of its ledger rows."""

    def __init__(self, depth: DepthStore, group, partials, ledger):
        self.depth = depth
        self.group = group
        self.partials = partials
        self.ledger = ledger
        self.rows = self._read_rows()

    def _read_rows(self) -> np.ndarray:
        n = self.ledger.shape[0]
        try:
            return np.array(self.ledger[...], dtype=np.int64)
        except Exception:  # noqa: BLE001 - one damaged row: read row by row
            rows = np.zeros((n, len(L.LEDGER_COLUMNS)), dtype=np.int64)
            for k in range(n):
                try:
                    rows[k] = self.ledger[k]
                except Exception as exc:  # noqa: BLE001
                    self.depth.note_repair("ledger row unreadable", str(self.group.attrs.get("key")), k, str(exc))
            return rows


class InflightPass:
    """Per-chunk partials and ledger rows of the pass being computed.

    Chunk k is finished iff ledger[k, serial] equals this pass's serial and
    its partial matches the recorded CRC-32.
    """

    def __init__(self, depth: DepthStore, key: str, serial: int, state: _InflightArrays):
        self.depth = depth
        self.key = key
        self.serial = serial
        self.state = state
        self.n_chunks = state.rows.shape[0]

    @property
    def rows(self) -> np.ndarray:
        return self.state.rows

    def _mine(self) -> np.ndarray:
        return self.rows[:, L.SERIAL] == self.serial

    def verified_partials(self) -> dict[int, np.ndarray]:
        """Partials of the chunks the ledger marks finished whose data match the recorded CRC-32.

        A chunk that fails (unreadable, wrong checksum, not finite) is dropped
        from the finished set and will be recomputed; the event is recorded in
        the depth's "repairs" attribute.
        """
        done = np.flatnonzero(self._mine())
        out: dict[int, np.ndarray] = {}
        if done.size == 0:
            return out
        try:
            block = np.asarray(self.state.partials[...])
        except Exception:  # noqa: BLE001 - read chunk by chunk to isolate the damage
            block = None
        for k in done:
            k = int(k)
            try:
                part = block[k] if block is not None else np.asarray(self.state.partials[k])
            except Exception as exc:  # noqa: BLE001
                self._reject(k, f"unreadable: {type(exc).__name__}: {exc}")
                continue
            if L.checksum(part) != int(self.rows[k, L.CRC]):
                self._reject(k, "crc32 mismatch")
                continue
            if not np.all(np.isfinite(part)):
                self._reject(k, "not finite")
                continue
            out[k] = np.array(part)
        return out

    def _reject(self, k: int, why: str) -> None:
        self.rows[k, L.SERIAL] = -self.serial  # not finished; completions still counted
        self.depth.note_repair("chunk recomputed", self.key, k, why)

    def record(self, k: int, partial: np.ndarray, wall_us: int) -> None:
        """Persist one finished chunk: its partial first, then its ledger row.

        Both writes run in one trip to zarr's event loop (one thread hand-off
        instead of two), strictly one after the other.
        """
        same_pass = abs(int(self.rows[k, L.SERIAL])) == self.serial
        completions = int(self.rows[k, L.COMPLETIONS]) + 1 if same_pass else 1
        row = np.array([self.serial, L.checksum(partial), completions, int(wall_us)], dtype=np.int64)
        partials, ledger = self.state.partials, self.state.ledger
        self.depth.guard()

        async def write_in_order() -> None:
            await partials.async_array.setitem(k, partial)
            crash_point("chunk-partial-written")
            await ledger.async_array.setitem(k, row)

        _run_async(write_in_order())
        self.rows[k] = row
        witness(f"{self.depth.group.path}/{self.key}", [k])
        crash_point("chunk-recorded")

    def completions(self) -> list[int]:
        return [int(x) if abs(s) == self.serial else 0 for s, x in zip(self.rows[:, L.SERIAL], self.rows[:, L.COMPLETIONS])]

    def wall_seconds(self) -> float:
        mine = np.abs(self.rows[:, L.SERIAL]) == self.serial
        return float(self.rows[mine, L.WALL_US].sum()) / 1e6


def inflight_summary(depth_group: zarr.Group) -> dict | None:
    """{"key", "kind", "step", "serial", "chunks_done", "n_chunks", "wall_s"} of the pass in flight, or None."""
    try:
        g = depth_group[L.INFLIGHT]
        attrs = g.attrs.asdict()
        if not attrs.get("key"):
            return None
        rows = np.asarray(g[L.LEDGER][...])
    except Exception:  # noqa: BLE001 - missing, or being written
        return None
    mine = rows[:, L.SERIAL] == int(attrs.get("serial", 0))
    if mine.all():
        return None  # finished (its sum is in a batch, or about to be)
    return {
        "key": attrs["key"],
        "kind": attrs.get("kind"),
        "step": attrs.get("step"),
        "serial": int(attrs.get("serial", 0)),
        "chunks_done": int(mine.sum()),
        "n_chunks": int(rows.shape[0]),
        "wall_s": float(rows[mine, L.WALL_US].sum()) / 1e6,
    }


def write_cost_probe(folder: Path, *, repeats: int, median, rng) -> dict:
    """Median seconds of the store's checkpoint writes (benchmarks/bench_store.py).

    ``batch_of_N_p8``: one batch of N pass sums of depth 8 ((18, 17) complex each);
    ``chunk_record_p8`` / ``_p16``: one chunk partial plus its ledger row.
    """
    out = {}
    group = zarr.create_group(store=str(folder / "probe.zarr"), zarr_format=3, attributes={"p": 8, "repairs": []})
    depth = DepthStore(group, 8, folder / "probe.zarr")
    for n in (1, 64):
        times = []
        for _ in range(max(3, repeats // 10)):
            for i in range(n):
                depth.add_pass(f"k{rng.integers(1 << 62)}", rng.standard_normal((18, 17)) + 0j,
                               {"kind": "forward", "step": 8, "n_chunks": 1, "completions": [1], "wall_s": 0.0})
            t0 = time.perf_counter()
            depth.flush()
            times.append(time.perf_counter() - t0)
        out[f"batch_of_{n}_p8_s"] = median(times)
    for p in (8, 16):
        shape = (2 * p + 2, 2 * p + 1)
        inflight = depth.inflight(f"probe{p}", {"fingerprint": "probe"}, repeats, shape)
        times = []
        for k in range(repeats):
            part = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
            t0 = time.perf_counter()
            inflight.record(k, part, 0)
            times.append(time.perf_counter() - t0)
        out[f"chunk_record_p{p}_s"] = median(times)
    return out
