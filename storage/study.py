"""Writing a study store: spec, ensembles, per-depth results, pass cache, in-flight ledger.

Only one process writes a store at a time (:class:`~leadline.storage.lock.StoreLock`).
Every write is ordered so that a SIGKILL at any instant leaves a store that
resume can use: data first, then the record that vouches for it (a ledger row
with the data's CRC-32, a pass's CRC-32 attribute, a depth's ``state = "done"``).
Zarr's local store replaces files atomically (temporary file + rename), and
whatever a half-finished write leaves behind fails its checksum and is
recomputed, never trusted.
"""

from __future__ import annotations

import datetime as _dt
import os
import re
import shutil
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import ZstdCodec

from leadline.kernels.iteration import sum_w_tolerance
from leadline.kernels.plan import ChunkPlan

from . import layout as L
from .errors import NotAStudyError, SchemaVersionError, StoreError
from .faults import crash_point, witness
from .lock import StoreLock

__all__ = ["StudyStore", "DepthStore", "InflightPass", "check_study", "utc_now", "inflight_summary"]

#: leftovers of writes a kill interrupted: zarr's temporary files, and lock files not yet linked
_ZARR_TEMP = re.compile(r"(\.[0-9a-f]{32}\.partial|^\.leadline\.lock\.[0-9a-f]{32}\.tmp)$")


#: chunk files named c.<k>.0.0 side by side (no folder per chunk: cheaper to create and delete)
_FLAT_KEYS = {"name": "default", "separator": "."}


def _run_async(coro) -> None:
    """Run a coroutine of zarr's async API on zarr's own event loop (as its sync API does)."""
    from zarr.core.sync import sync

    sync(coro)


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _compressor():
    # zstd's own frame checksum makes most damaged chunk files fail to decode at all
    return ZstdCodec(level=1, checksum=True)


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
        raise NotAStudyError(f"{path} is a folder without zarr.json, not a study store ({looks_like})")
    try:
        root = zarr.open_group(str(path), mode="r", zarr_format=3)
        attrs = root.attrs.asdict()
    except Exception as exc:  # noqa: BLE001 - zarr raises many kinds
        raise NotAStudyError(f"{path} is not a readable Zarr v3 group: {exc}") from None
    if attrs.get("format") != L.FORMAT:
        raise NotAStudyError(f"{path} is a Zarr group but not a leadline study store (format {attrs.get('format')!r})")
    version = attrs.get("schema_version")
    if version != L.SCHEMA_VERSION:
        raise SchemaVersionError(
            f"store {path} has schema version {version!r}, this leadline reads version "
            f"{L.SCHEMA_VERSION}; use the leadline release that wrote it"
        )
    return attrs


class StudyStore:
    """A study store opened for writing (holds the writer lock until :meth:`close`)."""

    def __init__(self, path: Path, root: zarr.Group, lock: StoreLock):
        self.path = path
        self.root = root
        self.lock = lock

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
        """
        path = Path(path)
        try:
            os.mkdir(path)
        except FileExistsError:
            raise StoreError(f"{path} already exists; continue it with `leadline resume {path}` or choose a new store path") from None
        lock = StoreLock(path, command).acquire()
        try:
            attrs = {
                "format": L.FORMAT,
                "schema_version": L.SCHEMA_VERSION,
                "name": name,
                "spec": spec,
                "spec_toml": spec_toml,
                "created_utc": utc_now(),
                "writer": writer,
                **(extra or {}),
            }
            root = zarr.create_group(store=str(path), zarr_format=3, attributes=attrs)
            store = cls(path, root, lock)
            store.ensure_ensembles(ensembles)
            return store
        except BaseException:
            lock.release()
            raise

    @classmethod
    def open(cls, path: str | os.PathLike, *, command: str = "resume") -> "StudyStore":
        """Open an existing store for writing: schema check, lock, cleanup of temp files."""
        path = Path(path)
        check_study(path)
        lock = StoreLock(path, command).acquire()
        try:
            root = zarr.open_group(str(path), mode="r+", zarr_format=3)
            store = cls(path, root, lock)
            store._remove_temp_files()
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
        import time

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

    # ------------------------------------------------------------ contents
    @property
    def attrs(self) -> dict:
        return self.root.attrs.asdict()

    @property
    def spec(self) -> dict:
        return self.attrs["spec"]

    def ensure_ensembles(self, ensembles: list[dict]) -> None:
        """Create the ensemble groups that are missing (idempotent, kill-safe)."""
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
        in the ensemble's attribute ``references``."""
        self.root.require_group(L.ENSEMBLES)
        group = self.root.require_group(f"{L.ENSEMBLES}/{label}")
        group.attrs["references"] = references

    def finished_depth(self, label: str, p: int) -> dict | None:
        """The stored result of depth p (attrs "result"), or None if not done."""
        try:
            g = self._ensemble_group(label)[L.depth_name(p)]
            attrs = g.attrs.asdict()
        except KeyError:
            return None
        if attrs.get("state") != "done" or "result" not in attrs:
            return None
        return attrs["result"]

    def depth(self, label: str, p: int, plan: ChunkPlan) -> "DepthStore":
        """The working record of depth p (created on first use; sessions counted).

        A depth already started keeps the chunk plan it was started with (its
        pass keys and ledger depend on it); ``plan`` is used for a new depth.
        """
        ens = self._ensemble_group(label)
        name = L.depth_name(p)
        group = None
        if name in ens:
            try:
                group = ens[name]
                plan = ChunkPlan.from_json(group.attrs["plan"])
            except (KeyError, TypeError, ValueError):
                group = None
        if group is None:
            group = ens.create_group(
                name,
                attributes={
                    "p": p,
                    "plan": plan.to_json(),
                    "state": "running",
                    "started_utc": utc_now(),
                    "sessions": 0,
                    "repairs": [],
                },
                overwrite=True,
            )
        group.attrs.update({"sessions": int(group.attrs.get("sessions", 0)) + 1})
        return DepthStore(group, p, plan, self.path / group.path)

    def finish_depth(self, label: str, p: int, result: dict, timings: dict) -> None:
        """Record a finished depth: angle arrays first, then result + done flag in one write.

        The in-flight ledger of the depth is deleted afterwards (its last pass is cached).
        """
        group = self._ensemble_group(label)[L.depth_name(p)]
        group.create_array("gamma", data=np.asarray(result["gamma"], dtype=np.float64), overwrite=True)
        group.create_array("beta", data=np.asarray(result["beta"], dtype=np.float64), overwrite=True)
        crash_point("depth-arrays-written")
        group.attrs.update(
            {"state": "done", "result": result, "timings": timings, "finished_utc": utc_now()}
        )
        crash_point("depth-done")
        # the last pass's partials are in the pass cache now; they can be large (n_chunks matrices)
        shutil.rmtree(self.path / group.path / L.INFLIGHT, ignore_errors=True)


class DepthStore:
    """Pass cache and in-flight ledger of one depth of one ensemble."""

    def __init__(self, group: zarr.Group, p: int, plan: ChunkPlan, directory: Path):
        self.group = group
        self.p = p
        self.plan = plan
        self.directory = Path(directory)
        self.repairs: list[dict] = []
        self._seen: dict[str, float] = {}  # pass key -> compute seconds, passes used in this session

    def pass_seconds(self) -> float:
        """Compute seconds of the distinct passes used so far (including earlier sessions' work)."""
        return float(sum(self._seen.values()))

    def passes_used(self) -> int:
        return len(self._seen)

    def _remove(self, relative: str) -> None:
        """Delete a subtree of this depth's folder (plain rmtree: zarr keeps no index of it)."""
        shutil.rmtree(self.directory / relative, ignore_errors=True)

    @property
    def shape(self) -> tuple[int, int]:
        n = 2 * self.p + 1
        return (n + 1, n)

    def note_repair(self, what: str, key: str, chunk: int | None = None, detail: str = "") -> None:
        event = {"what": what, "key": key, "chunk": chunk, "detail": detail[:200], "utc": utc_now()}
        self.repairs.append(event)
        old = list(self.group.attrs.get("repairs", []))
        self.group.attrs.update({"repairs": old + [event]})

    # ------------------------------------------------------------ pass cache
    def _passes(self) -> zarr.Group:
        if getattr(self, "_passes_group", None) is None:
            self._passes_group = self.group.require_group(L.PASSES)
        return self._passes_group

    def cached_pass(self, key: str, backward: bool) -> np.ndarray | None:
        """The verified summed result of pass ``key``, or None (damaged entries are dropped)."""
        if not (self.directory / L.PASSES / key).exists():
            return None  # the common miss, without asking zarr
        try:
            arr = self._passes()[key]
        except KeyError:
            arr = None
        if arr is None:
            self._remove(f"{L.PASSES}/{key}")  # a folder without metadata: a killed write
            return None
        try:
            attrs = arr.attrs.asdict()
            total = np.asarray(arr[...])
            problem = self._verify_sum(total, attrs, backward)
        except Exception as exc:  # noqa: BLE001 - unreadable chunk or metadata
            problem = f"unreadable ({type(exc).__name__}: {exc})"
        if problem is None:
            self._seen[key] = float(attrs.get("wall_s", 0.0))
            return total
        self.note_repair("pass cache entry dropped", key, detail=problem)
        self._remove(f"{L.PASSES}/{key}")
        return None

    def _verify_sum(self, total: np.ndarray, attrs: dict, backward: bool) -> str | None:
        if total.shape != self.shape or total.dtype != np.complex128:
            return f"shape {total.shape} dtype {total.dtype}, expected {self.shape} complex128"
        if attrs.get("plan") != self.plan.to_json():
            return f"plan {attrs.get('plan')} differs from {self.plan.to_json()}"
        if "crc32" not in attrs:
            return "no crc32 attribute (write interrupted)"
        if L.checksum(total) != attrs["crc32"]:
            return "crc32 mismatch"
        completions = attrs.get("completions", [])
        if len(completions) != self.plan.n_chunks or min(completions, default=0) < 1:
            return "chunk accounting: not every chunk was completed"
        if not backward:
            dev = float(np.max(np.abs(np.diag(total[: 2 * self.p + 1]) - 1.0)))
            if not dev <= sum_w_tolerance(self.p):
                return f"sum of path weights deviates from 1 by {dev:.3e}"
        return None

    def store_pass(self, key: str, total: np.ndarray, meta: dict, chunks_finished_here=()) -> None:
        """Add a verified pass sum to the cache (metadata and crc32 written, then data).

        ``chunks_finished_here``: chunks that had no ledger row of their own
        (a pass computed whole); they count as finished with this write.
        """
        attrs = dict(meta)
        attrs["plan"] = self.plan.to_json()
        attrs["crc32"] = L.checksum(total)
        attrs["stored_utc"] = utc_now()
        self._seen[key] = float(attrs.get("wall_s", 0.0))
        self._passes().create_array(
            key, data=np.asarray(total, dtype=np.complex128), attributes=attrs, overwrite=True, chunk_key_encoding=_FLAT_KEYS
        )
        witness(key, chunks_finished_here)
        crash_point("pass-cached")

    def cached_pass_count(self) -> int:
        try:
            return sum(1 for _ in self.group[L.PASSES].array_keys())
        except KeyError:
            return 0

    def pass_records(self) -> list[dict]:
        """Attributes of every cached pass (for timings)."""
        try:
            passes = self.group[L.PASSES]
        except KeyError:
            return []
        out = []
        for _name, arr in passes.arrays():
            try:
                out.append(arr.attrs.asdict())
            except Exception:  # noqa: BLE001
                continue
        return out

    # ------------------------------------------------------------ in flight
    def inflight(self, key: str, meta: dict) -> "InflightPass":
        """The ledger of pass ``key``: resumed if it is the pass in flight, else started.

        One ledger per depth (arrays created once); starting a pass writes one
        attribute update (key and a new serial), which invalidates every row of
        the previous pass at once.
        """
        state = self._inflight_arrays()
        attrs = state.group.attrs.asdict()
        if attrs.get("key") == key and attrs.get("fingerprint") == meta.get("fingerprint"):
            return InflightPass(self, key, int(attrs["serial"]), state)
        serial = max(int(attrs.get("serial", 0)), int(state.rows[:, L.SERIAL].max(initial=0))) + 1
        state.group.attrs.update(dict(meta, key=key, serial=serial, started_utc=utc_now()))
        return InflightPass(self, key, serial, state)

    def restart_inflight(self, inflight: "InflightPass") -> "InflightPass":
        """Invalidate every chunk of ``inflight`` (new serial) to recompute the pass from scratch."""
        state = inflight.state
        serial = inflight.serial + 1
        state.group.attrs.update({"serial": serial, "started_utc": utc_now()})
        return InflightPass(self, inflight.key, serial, state)

    def _inflight_arrays(self) -> "_InflightArrays":
        if getattr(self, "_inflight_state", None) is not None:
            return self._inflight_state
        n = self.plan.n_chunks
        state = None
        if (self.directory / L.INFLIGHT).exists():
            try:
                g = self.group[L.INFLIGHT]
                partials, ledger = g[L.PARTIALS], g[L.LEDGER]
                if partials.shape == (n, *self.shape) and ledger.shape == (n, len(L.LEDGER_COLUMNS)):
                    state = _InflightArrays(self, g, partials, ledger)
            except Exception:  # noqa: BLE001 - half-created by a killed run: start it again
                state = None
            if state is None:
                self.note_repair("in-flight ledger recreated", "", detail="incomplete or unreadable")
                self._remove(L.INFLIGHT)
        if state is None:
            g = self.group.create_group(L.INFLIGHT, attributes={"key": None, "serial": 0, "n_chunks": n})
            partials = g.create_array(
                L.PARTIALS,
                shape=(n, *self.shape),
                chunks=(1, *self.shape),
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

        async def write_in_order() -> None:
            await partials.async_array.setitem(k, partial)
            crash_point("chunk-partial-written")
            await ledger.async_array.setitem(k, row)

        _run_async(write_in_order())
        self.rows[k] = row
        witness(self.key, [k])
        crash_point("chunk-recorded")

    def completions(self) -> list[int]:
        return [int(x) if abs(s) == self.serial else 0 for s, x in zip(self.rows[:, L.SERIAL], self.rows[:, L.COMPLETIONS])]

    def wall_seconds(self) -> float:
        mine = np.abs(self.rows[:, L.SERIAL]) == self.serial
        return float(self.rows[mine, L.WALL_US].sum()) / 1e6


def inflight_summary(depth_group: zarr.Group) -> dict | None:
    """{"key", "kind", "serial", "chunks_done", "n_chunks", "wall_s"} of the pass in flight, or None."""
    try:
        g = depth_group[L.INFLIGHT]
        attrs = g.attrs.asdict()
        if not attrs.get("key"):
            return None
        try:
            if attrs["key"] in depth_group[L.PASSES]:
                return None  # finished and cached
        except KeyError:
            pass
        rows = np.asarray(g[L.LEDGER][...])
    except Exception:  # noqa: BLE001 - missing, or being written
        return None
    mine = rows[:, L.SERIAL] == int(attrs.get("serial", 0))
    return {
        "key": attrs["key"],
        "kind": attrs.get("kind"),
        "serial": int(attrs.get("serial", 0)),
        "chunks_done": int(mine.sum()),
        "n_chunks": int(rows.shape[0]),
        "wall_s": float(rows[mine, L.WALL_US].sum()) / 1e6,
    }
