"""Every path and attribute name of a study store, in one place.

A study store is a Zarr (format 3) directory hierarchy, documented for readers
without leadline in docs/store.md::

    <store>/                                 root group
        attrs: format, format_version, name, spec, spec_toml, created_utc, writer,
               kernel, integrity (the store's record of itself: storage/integrity.py),
               migrated (list of layout upgrades, when any),
               depths_raised (list of raises of pmax by `leadline resume --pmax`, when any)
    <store>/ensembles/<label>/               one group per ensemble of the spec
        attrs: label, kind, xi, q, degree, reference (as the spec gives it)
               [, computed_reference (written by `leadline reference --store`)]
    <store>/ensembles/<label>/p003/          one group per depth started (3 digits)
        attrs: p, plan, state ("running" | "done"), started_utc, sessions, repairs,
               result, timings, finished_utc (when done)
        gamma, beta                          float64 (p,) optimal angles (when done)
        passes/b000001                       one batch of summed passes: complex128 (n,), the
                                             entries' matrices flattened one after the other
            attrs: entries (list of {key, step, kind, plan, shape, offset, crc32, n_chunks,
                   completions, paths, wall_s}), crc32 (of the whole batch), stored_utc
        inflight/                            the chunk ledger of the pass in flight (only for
                                             passes long enough to checkpoint chunk by chunk)
            attrs: key, fingerprint, kind, step, plan, serial, n_chunks, started_utc
            partials                         complex128 (n_chunks, 2m+2, 2m+1), one zarr chunk per plan chunk
            ledger                           int64 (n_chunks, 4): serial, crc32, completions, wall_us
                                             chunk k is finished iff ledger[k, 0] == attrs serial
    <store>/leadline.lock                    JSON writer lock (only while a writer runs or after a kill)

``passes`` and ``inflight`` are dropped once the depth is done (unless the spec
keeps them).  Schema version 1 (before the growing-contour iteration) stored one
array per pass, ``passes/<fingerprint>-h<n_high>r<rows>``; its finished depths
read unchanged, its pass caches are dropped when the store is resumed.  Schema 2
had no integrity record (storage/integrity.py).  Schemas 1-3 named the version attribute ``schema_version``, the computed reference energies
``references``, the stored spec's keys ``gtol``, ``maxiter``, ``memory_mb``,
``cluster_config`` (and ``spec_version``) and a session's reused passes
``passes_from_cache``: read under both names, renamed in place when the store is
opened for writing (:data:`RENAMED_IN_4`).
"""

from __future__ import annotations

import hashlib
import json
import zlib

import numpy as np

__all__ = [
    "FORMAT",
    "VERSION",
    "OLD_VERSION",
    "SCHEMA_VERSION",
    "COMPUTED_REFERENCE",
    "RENAMED_IN_4",
    "store_version",
    "current_spec",
    "READABLE_SCHEMAS",
    "ENSEMBLES",
    "PASSES",
    "INFLIGHT",
    "LEDGER_COLUMNS",
    "depth_name",
    "parse_depth_name",
    "batch_name",
    "parse_batch_name",
    "plan_json",
    "pass_key",
    "checksum",
]

#: value of the root attribute "format"
FORMAT = "leadline.study"
#: root attribute holding the layout version (schema 1 and 2 called it OLD_VERSION)
VERSION = "format_version"
OLD_VERSION = "schema_version"
#: layout version this release writes
SCHEMA_VERSION = 4
#: layout versions this release reads (1: one array per saved pass; 2: no integrity record;
#: 3: old attribute names; all upgraded when the store is opened for writing)
READABLE_SCHEMAS = (1, 2, 3, 4)
#: ensemble attribute with the GS/ALG computed by `leadline reference --store`
COMPUTED_REFERENCE = "computed_reference"
#: root attribute listing the raises of the study's deepest depth by `leadline resume --pmax`
#: ([{"from": 32, "to": 40, "utc": ...}, ...]; absent when never raised)
DEPTHS_RAISED = "depths_raised"

#: names schema 4 changed: (where, old name) -> new name
RENAMED_IN_4 = {
    ("root", "schema_version"): VERSION,
    ("ensemble", "references"): COMPUTED_REFERENCE,
    ("spec", "spec_version"): "format_version",
    ("spec.optimizer", "gtol"): "gradient_tol",
    ("spec.optimizer", "maxiter"): "max_iterations",
    ("spec.compute", "memory_mb"): "memory_mib",
    ("spec.compute", "cluster_config"): "batch_file",
    ("session", "passes_from_cache"): "passes_reused",
}
#: version of the stored spec's layout (its key "format_version")
SPEC_FORMAT_VERSION = 2


def store_version(attrs: dict):
    """The layout version of a store's root attributes (either attribute name)."""
    return attrs.get(VERSION, attrs.get(OLD_VERSION))


def _renamed(table: dict, where: str) -> dict:
    out = {}
    for key, value in table.items():
        out[RENAMED_IN_4.get((where, key), key)] = value
    return out


def current_spec(spec: dict) -> dict:
    """A stored spec with the key names of this release (older stores wrote gtol, maxiter, ...)."""
    spec = _renamed(dict(spec), "spec")
    for section in ("optimizer", "compute"):
        if isinstance(spec.get(section), dict):
            spec[section] = _renamed(spec[section], f"spec.{section}")
    if spec.get("format_version", 1) < SPEC_FORMAT_VERSION:
        spec["format_version"] = SPEC_FORMAT_VERSION
    return spec


def current_ensemble_attrs(attrs: dict) -> dict:
    """An ensemble group's attributes with this release's names."""
    return _renamed(dict(attrs), "ensemble")


def current_session(stats: dict) -> dict:
    """A depth's per-session pass counts ("this_session" of its timings) with this release's names."""
    return _renamed(dict(stats), "session")

ENSEMBLES = "ensembles"
PASSES = "passes"
INFLIGHT = "inflight"
PARTIALS = "partials"
LEDGER = "ledger"
#: kinds of pass-batch entries that hold an optimizer's evaluation, not a pass (no path weights):
#: "bath" (value, error estimate, CPU seconds) and "sparse" (value, then the gradient in gamma and in beta)
EVALUATION_KINDS = ("bath", "sparse")
#: columns of the ledger array, in order
LEDGER_COLUMNS = ("serial", "crc32", "completions", "wall_us")
SERIAL, CRC, COMPLETIONS, WALL_US = range(4)


def depth_name(p: int) -> str:
    """Group name of depth p: 'p001', 'p012' (zero-padded so names sort by p)."""
    return f"p{int(p):03d}"


def parse_depth_name(name: str) -> int | None:
    if len(name) >= 2 and name[0] == "p" and name[1:].isdigit():
        return int(name[1:])
    return None


def batch_name(n: int) -> str:
    """Array name of the n-th batch of saved passes of a depth: 'b000001'."""
    return f"b{int(n):06d}"


def parse_batch_name(name: str) -> int | None:
    if len(name) == 7 and name[0] == "b" and name[1:].isdigit():
        return int(name[1:])
    return None


def plan_json(plan) -> dict:
    """The JSON form of a chunk plan with every field explicit.

    Plans written before the global flip existed have no "flip" field; they
    enumerate every high pattern, which is ``flip = False``.
    """
    data = dict(plan if isinstance(plan, dict) else plan.to_json())
    data["flip"] = bool(data.get("flip", False))
    return data


_PLAN_TAGS: dict = {}


def _plan_tag(plan) -> str:
    """12 hex digits of SHA-256 of the plan's canonical JSON (memoized per plan value)."""
    try:
        return _PLAN_TAGS[plan]
    except (KeyError, TypeError):
        pass
    text = json.dumps(plan_json(plan), sort_keys=True, separators=(",", ":"))
    tag = hashlib.sha256(text.encode()).hexdigest()[:12]
    try:
        if len(_PLAN_TAGS) < 4096:
            _PLAN_TAGS[plan] = tag
    except TypeError:  # a plan given as a dict
        pass
    return tag


def pass_key(inp, plan) -> str:
    """Name of a pass: content fingerprint of its input (step p, M, beta, adjoint) plus its plan.

    The plan is part of the key because the chunk-order sum of the partials
    (and so the last bits of the result) depends on where chunks are cut, and
    a flipped plan enumerates other paths.  Any plan field (including ones
    added later) changes the key.
    """
    return f"{inp.fingerprint()}-{_plan_tag(plan)}"


def checksum(array: np.ndarray) -> int:
    """CRC-32 of the raw little-endian bytes of a complex128 array."""
    a = np.ascontiguousarray(array, dtype="<c16")
    return zlib.crc32(a.tobytes()) & 0xFFFFFFFF
