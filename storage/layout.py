"""Every path and attribute name of a study store, in one place.

A study store is a Zarr (format 3) directory hierarchy; docs/store.md
documents it for readers without leadline::

    <store>/                                 root group
        attrs: format, schema_version, name, spec, spec_toml, created_utc, writer
    <store>/ensembles/<label>/               one group per ensemble of the spec
        attrs: label, kind, xi, q, degree, reference
    <store>/ensembles/<label>/p003/          one group per depth started (3 digits)
        attrs: p, plan, state ("running" | "done"), started_utc, sessions, repairs,
               result (when done), timings (when done)
        gamma, beta                          float64 (p,) optimal angles (when done)
        passes/<key>                         complex128 (2p+2, 2p+1) summed pass
            attrs: fingerprint, plan, kind, crc32, n_chunks, completions, wall_s, stored_utc
        inflight/                            the pass being computed (reused pass after pass)
            attrs: key, fingerprint, kind, serial, n_chunks, started_utc
            partials                         complex128 (n_chunks, 2p+2, 2p+1), one zarr chunk per plan chunk
            ledger                           int64 (n_chunks, 4): serial, crc32, completions, wall_us
                                             chunk k is finished iff ledger[k, 0] == attrs serial
    <store>/leadline.lock                    JSON writer lock (only while a writer runs or after a kill)
"""

from __future__ import annotations

import zlib

import numpy as np

from leadline.kernels.chunks import PassInput
from leadline.kernels.plan import ChunkPlan

__all__ = [
    "FORMAT",
    "SCHEMA_VERSION",
    "ENSEMBLES",
    "PASSES",
    "INFLIGHT",
    "LEDGER_COLUMNS",
    "depth_name",
    "parse_depth_name",
    "pass_key",
    "checksum",
]

#: value of the root attribute "format"
FORMAT = "leadline.study"
#: layout version; readers refuse any other value
SCHEMA_VERSION = 1

ENSEMBLES = "ensembles"
PASSES = "passes"
INFLIGHT = "inflight"
PARTIALS = "partials"
LEDGER = "ledger"
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


def pass_key(inp: PassInput, plan: ChunkPlan) -> str:
    """Name of a pass in the store: input fingerprint plus the chunk plan.

    The plan is part of the key because the chunk-order sum of the partials
    (and so the last bits of the result) depends on where chunks are cut.
    """
    return f"{inp.fingerprint()}-h{plan.n_high}r{plan.rows_per_chunk}"


def checksum(array: np.ndarray) -> int:
    """CRC-32 of the raw little-endian bytes of a complex128 array."""
    a = np.ascontiguousarray(array, dtype="<c16")
    return zlib.crc32(a.tobytes()) & 0xFFFFFFFF
