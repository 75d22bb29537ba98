"""Fault injection for the kill tests: SIGKILL this process at a named point.

``LEADLINE_CRASH_AT="chunk-written:7"`` makes the 7th arrival at the point
named ``chunk-written`` kill the process with SIGKILL (no cleanup, no flush),
exactly like ``kill -9`` at that instant; ``"chunk-written:7:TERM"`` sends
SIGTERM instead (what a batch system sends at its time limit), and
``"pass-cached:3:ENOSPC"`` (any errno name) raises ``OSError`` with that errno
there, as a write that fails on a full disk would.  Several points may be
listed, comma-separated.  Unset (the normal case) the check is one dict lookup.

``LEADLINE_CHUNK_AUDIT=/path/file`` appends one line per chunk recorded as
finished (see :func:`witness`), written right after the record and before
the crash point that follows it.

``LEADLINE_HOLD_AT="chunk-recorded:7"`` with ``LEADLINE_HOLD_FILE=/path/file``
makes the 7th arrival at that point write ``/path/file`` (JSON: pid, point,
count; written whole by a rename) and then wait there until the file is
deleted.  A test waits for the file (an event, not a delay), looks at the
process in that state (or kills it), then deletes the file to let it go on.

Points (see storage/study.py, cluster/checkpointed.py and jobs/sweep.py):
  store-built             a new store is complete under its temporary name, not yet renamed
  chunk-partial-written   a chunk's partial is on disk, its ledger row is not
  chunk-recorded          a chunk's ledger row is on disk
  pass-computed           a pass is computed and verified, not yet written (it waits for its batch)
  pass-cached             a batch of pass sums is on disk (between passes)
  depth-arrays-written    a depth's angle arrays are on disk, its done flag is not
  depth-done              a depth's done flag is on disk
  depth-started           a depth is marked running, its optimizer not yet started
  chunk-task              a worker has started a task of chunks (cluster/mapreduce.py), not computed it yet
  sparse-step-finished    a chunked sparse evaluation recorded a finished step (storage/sparse_scratch.py)
  sparse-band-task        a row-band task of a chunked sparse transform starts (cluster/sparse_vectors.py)
  bath-evaluations-cached a batch of bath evaluations of a depth is on disk (jobs/bath.py)
  sparse-evaluations-cached a batch of a sparse depth's evaluations is on disk (jobs/evaluations.py)
"""

from __future__ import annotations

import errno
import json
import os
import signal
import time

__all__ = ["crash_point", "witness", "rearm", "ENV_VAR", "AUDIT_ENV", "HOLD_ENV", "HOLD_FILE_ENV"]

ENV_VAR = "LEADLINE_CRASH_AT"
#: if set, every chunk recorded as finished appends "<depth group>/<pass key> <chunk>" to this file
#: (an independent witness for the kill tests that no finished chunk is computed twice)
AUDIT_ENV = "LEADLINE_CHUNK_AUDIT"
#: "point:n": hold at the n-th arrival at point until $LEADLINE_HOLD_FILE is deleted
HOLD_ENV = "LEADLINE_HOLD_AT"
HOLD_FILE_ENV = "LEADLINE_HOLD_FILE"

_targets: dict[str, tuple[int, int]] | None = None
_holds: dict[str, int] = {}
_counts: dict[str, int] = {}


def _parse(var: str = ENV_VAR) -> dict[str, tuple[int, int]]:
    """{point: (count, signal)} from "point:count[:TERM|:ERRNO],..." in $var (an errno as its negative)."""
    out: dict[str, tuple[int, int]] = {}
    for item in os.environ.get(var, "").split(","):
        item = item.strip()
        if not item:
            continue
        name, _, rest = item.partition(":")
        count, _, sig = rest.partition(":")
        sig = sig.strip().upper()
        signum = signal.SIGTERM if sig == "TERM" else -getattr(errno, sig) if sig.startswith("E") else signal.SIGKILL
        out[name.strip()] = (int(count or 1), signum)
    return out


def crash_point(name: str) -> None:
    """Hold or signal this process (SIGKILL unless armed with TERM) if ``name`` is armed and reached its count."""
    global _targets, _holds
    if _targets is None:
        _targets = _parse()
        _holds = {k: c for k, (c, _) in _parse(HOLD_ENV).items()} if os.environ.get(HOLD_FILE_ENV) else {}
    if name not in _targets and name not in _holds:
        return
    _counts[name] = _counts.get(name, 0) + 1
    if _counts[name] == _holds.get(name):
        _hold(name, _counts[name])
    if name in _targets:
        count, signum = _targets[name]
        if _counts[name] == count:
            if signum < 0:
                raise OSError(-signum, os.strerror(-signum))
            os.kill(os.getpid(), signum)


def rearm(**env: str | None) -> int:
    """Set (or with None remove) these variables in this process and read the points afresh.

    For tests that arm a process that is already running (a Dask worker, through
    ``client.run``); returns the pid.
    """
    global _targets
    for key, value in env.items():
        if value is None:
            os.environ.pop(key, None)
        else:
            os.environ[key] = value
    _targets = None
    _counts.clear()
    return os.getpid()


def _hold(name: str, count: int) -> None:
    """Announce the arrival in $LEADLINE_HOLD_FILE, then wait until someone deletes it."""
    path = os.environ[HOLD_FILE_ENV]
    tmp = f"{path}.{os.getpid()}.tmp"
    with open(tmp, "w") as f:
        json.dump({"pid": os.getpid(), "point": name, "count": count}, f)
    os.replace(tmp, path)
    while os.path.exists(path):
        time.sleep(0.01)


def witness(key: str, chunks) -> None:
    """Append "<key> <k>" lines to $LEADLINE_CHUNK_AUDIT (one O_APPEND write; no-op if unset)."""
    path = os.environ.get(AUDIT_ENV)
    if not path:
        return
    text = "".join(f"{key} {int(k)}\n" for k in chunks)
    if not text:
        return
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, text.encode())
    finally:
        os.close(fd)
