"""The writer lock of a study store: one writer at a time, stale locks taken over safely.

The lock is the file ``<store>/leadline.lock`` holding one JSON object::

    {"pid": 4242, "host": "node17", "process_start": 1733091234.52,
     "started_utc": "2026-12-01T22:40:11Z", "command": "sweep", "token": "<uuid hex>"}

Acquire
  1. Write that JSON to a private temporary file, then ``os.link`` it to
     ``leadline.lock``: the link is created atomically and fails if the lock
     exists (the same exclusive-create guarantee as ``O_CREAT | O_EXCL``, but the
     lock never exists half-written).
  2. If the lock exists, read the holder.  A holder on another host, or a live
     process on this host, refuses us with a message naming it.  A holder on
     this host whose pid is gone (or whose pid now belongs to a process started
     at another time: the pid was reused) is stale and is taken over.
  3. Takeover replaces the stale file atomically (``os.replace``).  To make two
     processes that both saw the same stale lock safe, steps 1-3 run while
     holding ``fcntl.flock`` on the store directory itself; the kernel drops
     that flock when its holder dies, so the guard can never go stale.

Release removes the file only if it still carries our token.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import json
import os
import socket
import uuid
from pathlib import Path

from .errors import StoreLockedError, StoreLockLostError, StoreReadOnlyError

__all__ = ["StoreLock", "LOCK_NAME", "read_lock", "holder_alive", "describe_holder"]

LOCK_NAME = "leadline.lock"


def _process_start(pid: int) -> float | None:
    """Start time of process ``pid`` (seconds since the epoch), None if it does not exist."""
    try:
        import psutil

        return float(psutil.Process(pid).create_time())
    except Exception:  # noqa: BLE001 - psutil.NoSuchProcess, AccessDenied, or psutil missing
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return None
        except PermissionError:
            return -1.0  # alive, owned by someone else
        return -1.0


def read_lock(path: str | os.PathLike) -> dict | None:
    """Holder recorded in the lock file of store ``path``; None if unlocked.

    An unreadable lock file is returned as {"unreadable": True}, and so is one that is not
    the object this module writes (a pid that is not an integer, a host or token that is not
    a string, an empty object): nobody can be waiting behind such a lock.
    """
    lock = Path(path) / LOCK_NAME
    try:
        text = lock.read_text()
    except FileNotFoundError:
        return None
    except OSError:
        return {"unreadable": True}
    try:
        data = json.loads(text)
    except ValueError:
        return {"unreadable": True}
    return data if _well_formed(data) else {"unreadable": True}


def _well_formed(data) -> bool:
    """The fields a lock written by :class:`StoreLock` has, with their types."""
    if not isinstance(data, dict):
        return False
    pid = data.get("pid")
    if not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
        return False
    if not all(isinstance(data.get(k), str) and data.get(k) for k in ("host", "token")):
        return False
    start = data.get("process_start")
    return start is None or (isinstance(start, (int, float)) and not isinstance(start, bool))


def holder_alive(holder: dict) -> bool:
    """True unless ``holder`` is provably dead (same host, pid gone or reused)."""
    if holder.get("unreadable"):
        return False  # written by link(), so a lock is never half-written by us
    if holder.get("host") != socket.gethostname():
        return True  # cannot check a process on another host: assume alive
    try:
        pid = int(holder["pid"])
    except (KeyError, TypeError, ValueError):
        return False
    start = _process_start(pid)
    if start is None:
        return False
    recorded = holder.get("process_start")
    if start >= 0 and isinstance(recorded, (int, float)) and abs(start - recorded) > 1.0:
        return False  # the pid was reused by a newer process
    return True


def describe_holder(holder: dict) -> str:
    if holder.get("unreadable"):
        return "an unreadable lock file"
    return (
        f"pid {holder.get('pid')} on host {holder.get('host')} "
        f"({holder.get('command', 'a leadline process')}, since {holder.get('started_utc')})"
    )


@contextlib.contextmanager
def _guard(directory: Path):
    import fcntl

    fd = os.open(directory, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing drops the flock


class StoreLock:
    """Exclusive writer lock of the store directory ``path`` (see module docstring).

    Use as a context manager or call :meth:`acquire` / :meth:`release`.
    ``took_over`` is the stale holder replaced by :meth:`acquire`, if any.
    """

    def __init__(self, path: str | os.PathLike, command: str = "leadline"):
        self.directory = Path(path)
        self.command = command
        self.token = uuid.uuid4().hex
        self.held = False
        self.took_over: dict | None = None
        self.lost: StoreLockLostError | None = None  # set when verify() found the lock gone

    @property
    def lock_path(self) -> Path:
        return self.directory / LOCK_NAME

    def _content(self) -> str:
        pid = os.getpid()
        start = _process_start(pid)
        return json.dumps(
            {
                "pid": pid,
                "host": socket.gethostname(),
                "process_start": start,
                "started_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
                "command": self.command,
                "token": self.token,
            }
        )

    def acquire(self) -> "StoreLock":
        if self.held:
            return self
        tmp = self.directory / f".{LOCK_NAME}.{self.token}.tmp"
        try:
            tmp.write_text(self._content())
        except OSError as exc:
            if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
                raise StoreReadOnlyError(
                    f"store {self.directory} is read-only ({exc.strerror.lower()}): it can be read "
                    "(leadline status, table, plot) but not written; copy it to a writable place to continue"
                ) from None
            raise
        try:
            with _guard(self.directory):
                try:
                    os.link(tmp, self.lock_path)
                except FileExistsError:
                    holder = read_lock(self.directory) or {"unreadable": True}
                    if holder_alive(holder):
                        raise StoreLockedError(
                            f"store {self.directory} is in use by {describe_holder(holder)}; "
                            "wait for it to finish (or stop it) and try again"
                        ) from None
                    os.replace(tmp, self.lock_path)
                    self.took_over = holder
        finally:
            tmp.unlink(missing_ok=True)
        self.held = True
        return self

    def verify(self) -> None:
        """Raise StoreLockLostError unless the lock file still carries our token.

        Called before every write of a writer: a lock deleted (or replaced) while this
        process runs may have let a second writer in, so this one stops before it writes
        anything more.  Costs one small file read (tens of microseconds; a store write
        costs milliseconds).
        """
        if self.lost is not None:
            raise self.lost  # every later write is refused too (the flush on the way out included)
        if not self.held:
            return
        holder = read_lock(self.directory)
        if holder is not None and holder.get("token") == self.token:
            return
        if holder is None:
            what = "was deleted"
        elif holder.get("unreadable"):
            what = "was replaced by an unreadable file"
        else:
            what = f"now names {describe_holder(holder)}"
        self.held = False  # not ours any more: never remove it
        self.lost = StoreLockLostError(
            f"the writer lock of store {self.directory} ({LOCK_NAME}) {what} while this process was writing it; "
            "stopped before its next write so that two writers never mix. Everything written before is kept: "
            f"make sure no other leadline writes the store, then `leadline resume {self.directory}`"
        )
        raise self.lost

    def release(self) -> None:
        if not self.held:
            return
        with _guard(self.directory):
            holder = read_lock(self.directory)
            if holder is not None and holder.get("token") == self.token:
                self.lock_path.unlink(missing_ok=True)
        self.held = False

    def __enter__(self) -> "StoreLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()
