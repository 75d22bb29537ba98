"""The store's record of itself, and the check every open runs against it.

A store keeps, in its root attribute ``integrity`` (schema 3 and later), a record written when it
was created and extended by every finished depth::

    {"format_version": 1,
     "identity": {"name": "<digest>", "spec": "<digest>", "spec_toml": ..., "kernel": ..., "created_utc": ...},
     "ensembles": {"<label>": "<digest of the ensemble group's attributes without 'computed_reference'>"},
     "finished": {"<label>": {"<p>": "<digest of the depth's 'result' attribute>"}}}

(digest: the first 16 hex digits of SHA-256 of the canonical JSON).  A depth is recorded
after its ``state = "done"`` is on disk, so a kill between the two leaves a finished
depth the record does not list yet (never the reverse); the next writer adds it.

:func:`inspect` compares what is on disk with the record and the layout, and returns
what it read (attributes of the ensembles and depths) with a list of findings.  A fatal
finding is damage that loses or falsifies results (a finished depth, the spec, an
ensemble group missing, unreadable, edited; angle arrays that disagree with their
result); every open refuses such a store with one line naming the parts
(:class:`~leadline.storage.errors.StoreDamagedError`).  A non-fatal finding is the
metadata of an unfinished depth that cannot be read: the writer starts that depth again.

Attributes are read from the ``zarr.json`` files directly (plain JSON), so the check
names the file and the reason (missing, permission denied, not JSON) and never depends
on how zarr reports it.
"""

from __future__ import annotations

import hashlib
import json
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import layout as L

__all__ = ["RECORD", "IDENTITY", "current_record", "Finding", "Contents", "Unreadable", "digest", "read_attrs", "new_record", "inspect",
           "describe_findings", "ensemble_digest"]

#: root attribute holding the record
RECORD = "integrity"
RECORD_VERSION = 1
#: the key of the record's layout version, named like every layout version (the first records
#: of schema 3 called it "version"; the next write of the record renames it, :func:`current_record`)
RECORD_VERSION_KEY = "format_version"

#: root attributes fixed at creation (covered by the record when present)
IDENTITY = ("name", "spec", "spec_toml", "kernel", "created_utc")
#: how many parts one error line names before "and N more"
_NAMED = 4


def digest(value) -> str:
    """16 hex digits of SHA-256 of the canonical JSON of ``value``."""
    text = json.dumps(value, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def ensemble_digest(attrs: dict) -> str:
    """Digest of an ensemble group's attributes; the computed reference energies (added later by
    `leadline reference --store`: 'computed_reference', 'references' before schema 4) excluded."""
    return digest({k: v for k, v in attrs.items() if k not in ("references", "computed_reference")})


class Unreadable(Exception):
    """A zarr.json that cannot be used; the message says why (missing, permission denied, not JSON)."""


def read_attrs(folder: Path) -> dict:
    """The attributes in ``folder/zarr.json`` (raises Unreadable with the reason)."""
    meta = Path(folder) / "zarr.json"
    try:
        text = meta.read_bytes()
    except FileNotFoundError:
        if not Path(folder).exists():
            raise Unreadable("is missing") from None
        raise Unreadable("has no zarr.json (its metadata is missing)") from None
    except PermissionError:
        raise Unreadable("cannot be read (permission denied)") from None
    except OSError as exc:
        raise Unreadable(f"cannot be read ({exc.strerror or exc})") from None
    try:
        data = json.loads(text)
    except (ValueError, UnicodeDecodeError):
        raise Unreadable("has damaged metadata (zarr.json is truncated or not JSON)") from None
    if not isinstance(data, dict) or not isinstance(data.get("attributes", {}), dict):
        raise Unreadable("has damaged metadata (zarr.json is not a Zarr group description)")
    return data.get("attributes", {})


def new_record(root_attrs: dict, ensembles: dict[str, dict]) -> dict:
    """The record of a store whose root and ensemble attributes are as given (read back from disk)."""
    return {
        RECORD_VERSION_KEY: RECORD_VERSION,
        "identity": {k: digest(root_attrs[k]) for k in IDENTITY if k in root_attrs},
        "ensembles": {label: ensemble_digest(attrs) for label, attrs in ensembles.items()},
        "finished": {label: {} for label in ensembles},
    }


def current_record(record: dict) -> dict:
    """A copy of a record with this release's key names."""
    record = dict(record)
    if "version" in record:
        record.setdefault(RECORD_VERSION_KEY, record.pop("version"))
    return record


@dataclass
class Finding:
    part: str  # path inside the store, e.g. "ensembles/sk/p002"
    problem: str  # what is wrong, completing "<part> <problem>"
    fatal: bool = True

    @property
    def permission(self) -> bool:
        """Only unreadable for this user (nothing lost): fixed by permissions, not by a backup."""
        return "permission denied" in self.problem

    def text(self) -> str:
        return f"{self.part} {self.problem}"


@dataclass
class Contents:
    """What the check read: attributes of the ensembles and depths, and what it found wrong."""

    record: dict | None
    ensembles: dict[str, dict] = field(default_factory=dict)  # label -> attributes
    depths: dict[str, dict[int, dict | None]] = field(default_factory=dict)  # label -> p -> attributes (None: unreadable)
    findings: list[Finding] = field(default_factory=list)

    @property
    def fatal(self) -> list[Finding]:
        return [f for f in self.findings if f.fatal]

    def done(self, label: str) -> dict[int, dict]:
        """Finished depths of ``label`` (attributes with state "done" and a result), by p."""
        return {p: a for p, a in sorted(self.depths.get(label, {}).items())
                if a is not None and a.get("state") == "done" and "result" in a}


def describe_findings(findings: list[Finding]) -> str:
    parts = [f.text() for f in findings[:_NAMED]]
    if len(findings) > _NAMED:
        parts.append(f"and {len(findings) - _NAMED} more")
    return "; ".join(parts)


def _ranges(ps) -> str:
    ps = sorted(ps)
    out, i = [], 0
    while i < len(ps):
        j = i
        while j + 1 < len(ps) and ps[j + 1] == ps[j] + 1:
            j += 1
        out.append(str(ps[i]) if i == j else f"{ps[i]}..{ps[j]}")
        i = j + 1
    return ", ".join(out)


def _record_ok(record) -> bool:
    return (isinstance(record, dict) and isinstance(record.get("identity"), dict)
            and isinstance(record.get("ensembles"), dict) and isinstance(record.get("finished"), dict)
            and all(isinstance(v, dict) and all(isinstance(p, str) and p.isdigit() for p in v)
                    for v in record["finished"].values()))


def _spec_labels(spec) -> list[str] | None:
    """Ensemble labels of a stored spec, or None if the spec is not usable."""
    try:
        d = spec["depths"]
        if not all(isinstance(d[k], int) and not isinstance(d[k], bool) for k in ("pmin", "pmax")):
            return None
        labels = [e["label"] for e in spec["ensembles"]]
    except (KeyError, TypeError):
        return None
    if not labels or not all(isinstance(x, str) and x and "/" not in x for x in labels):
        return None
    return labels


#: the layout of the angle arrays as leadline writes them (one chunk, little-endian float64, zstd)
_PLAIN_CODECS = ("bytes", "zstd")


def _read_plain_vector(folder: Path) -> np.ndarray | None:
    """A 1-D float64 array of one chunk in the layout leadline writes, decoded directly (about 30x
    cheaper than opening it through zarr); None when the array is laid out otherwise."""
    meta = json.loads((folder / "zarr.json").read_bytes())
    shape = meta.get("shape")
    codecs = meta.get("codecs") or []
    plain = (
        meta.get("data_type") == "float64" and isinstance(shape, list) and len(shape) == 1
        and meta.get("chunk_grid", {}).get("configuration", {}).get("chunk_shape") == shape
        and meta.get("chunk_key_encoding") == {"name": "default", "configuration": {"separator": "/"}}
        and tuple(c.get("name") for c in codecs) == _PLAIN_CODECS
        and codecs[0].get("configuration", {}).get("endian", "little") == "little"
        and not meta.get("storage_transformers")
    )
    if not plain:
        return None
    try:
        data = (folder / "c" / "0").read_bytes()
    except FileNotFoundError:  # a chunk never written (or lost) reads as the fill value
        return np.full(shape, float(meta.get("fill_value", 0.0)))
    from numcodecs import Zstd

    return np.frombuffer(Zstd().decode(data), dtype="<f8").reshape(shape)


def _angles_problem(folder: Path, name: str, expected) -> str | None:
    """Why the angle array ``folder/name`` disagrees with the result's JSON angles, or None."""
    import zarr

    try:
        stored = _read_plain_vector(folder / name)
        if stored is None:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                stored = np.asarray(zarr.open_array(str(folder / name), mode="r")[...])
    except PermissionError:
        return "cannot be read (permission denied)"
    except FileNotFoundError:
        return "is missing"
    except json.JSONDecodeError:
        return "has damaged metadata (zarr.json is truncated or not JSON)"
    except Exception as exc:  # noqa: BLE001 - zarr/numcodecs raise many kinds for a damaged chunk
        return f"cannot be decoded (a damaged chunk: {type(exc).__name__})"
    try:
        want = np.asarray(expected, dtype=np.float64)
    except (TypeError, ValueError):
        return None  # the result itself is checked by its digest
    if stored.shape != want.shape or not np.array_equal(stored, want):
        return "does not match the angles of the depth's result (a chunk is missing or altered)"
    return None


def inspect(path: Path, attrs: dict, schema: int) -> Contents:
    """Check the store at ``path`` (root attributes ``attrs``) against its record and its layout."""
    path = Path(path)
    record = attrs.get(RECORD)
    out = Contents(record=record if _record_ok(record) else None)
    add = out.findings.append
    if schema >= 3 and out.record is None:
        add(Finding("root attribute 'integrity'", "(the store's record of its spec and finished depths) is missing or malformed"))
    rec = out.record
    if rec is not None:
        for key, want in rec["identity"].items():
            if key not in attrs:
                add(Finding(f"root attribute {key!r}", "is missing"))
            elif digest(attrs[key]) != want:
                add(Finding(f"root attribute {key!r}", "differs from the one the store was created with"))
    labels = _spec_labels(attrs.get("spec"))
    if labels is None:
        if not any(f.part == "root attribute 'spec'" for f in out.findings):
            add(Finding("root attribute 'spec'", "is missing or malformed"))
        return out
    finished_rec = {label: {int(p) for p in (rec["finished"].get(label) or {})} for label in labels} if rec else {}

    def lost(*labels: str) -> str:
        listed = [f"{label} p = {_ranges(finished_rec[label])}" for label in labels if finished_rec.get(label)]
        return f" (finished depths in the record: {', '.join(listed)})" if listed else ""

    top = path / L.ENSEMBLES
    try:
        read_attrs(top)
    except Unreadable as exc:
        add(Finding(f"{L.ENSEMBLES}/", f"{exc}{lost(*labels)}"))
        return out
    for label in labels:
        folder = top / label
        part = f"{L.ENSEMBLES}/{label}"
        try:
            ens_attrs = read_attrs(folder)
        except Unreadable as exc:
            add(Finding(part, f"{exc}{lost(label)}"))
            continue
        if ens_attrs.get("label") != label:
            add(Finding(part, "has attributes of another ensemble"))
            continue
        if rec is not None and label in rec["ensembles"] and ensemble_digest(ens_attrs) != rec["ensembles"][label]:
            add(Finding(part, "attributes differ from the ones it was created with"))
        out.ensembles[label] = ens_attrs
        depths: dict[int, dict | None] = {}
        out.depths[label] = depths
        try:
            entries = sorted(e for e in os.listdir(folder))
        except OSError as exc:
            add(Finding(part, f"cannot be listed ({(exc.strerror or str(exc)).lower()})"))
            continue
        for name in entries:
            p = L.parse_depth_name(name)
            if p is None or not (folder / name).is_dir():
                continue
            dpart = f"{part}/{name}"
            recorded = p in finished_rec.get(label, set())
            try:
                a = read_attrs(folder / name)
            except Unreadable as exc:
                depths[p] = None
                # the metadata of an unfinished depth is repairable (the writer starts the depth again).
                # Without a record nobody can tell whether it was finished, except for a folder
                # without metadata: what a kill leaves between creating a depth's folder and its
                # zarr.json (every zarr.json is written whole, by a rename)
                fatal = recorded or "permission" in str(exc) or (rec is None and (folder / name / "zarr.json").exists())
                add(Finding(dpart, f"{exc}" + (" (finished in the record)" if recorded else ""), fatal))
                continue
            depths[p] = a
            done = a.get("state") == "done" and "result" in a
            if recorded and not done:
                add(Finding(dpart, "is no longer marked finished (the record lists it as finished)"))
                continue
            if not done:
                continue
            result = a["result"]
            if recorded and digest(result) != rec["finished"][label][str(p)]:
                add(Finding(dpart, "result differs from the one recorded when the depth finished"))
                continue
            if not isinstance(result, dict):
                add(Finding(dpart, "result is malformed"))
                continue
            for angle in ("gamma", "beta"):
                problem = _angles_problem(folder / name, angle, result.get(angle))
                if problem:
                    add(Finding(f"{dpart}/{angle}", problem))
        for p in sorted(finished_rec.get(label, set()) - set(depths)):
            add(Finding(f"{part}/{L.depth_name(p)}", "is missing (finished in the record)"))
    return out
