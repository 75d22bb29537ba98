"""Errors of the checkpoint store; each message says what is wrong and what to do.

The command line (jobs/) turns every :class:`StoreError` into one stderr line
and exit code 2.
"""

from __future__ import annotations

__all__ = ["StoreError", "StoreLockedError", "StoreReadOnlyError", "SchemaVersionError", "NotAStudyError",
           "StoreDamagedError", "StoreLockLostError"]


class StoreError(RuntimeError):
    """A store that cannot be used as asked."""


class StoreLockedError(StoreError):
    """Another live process holds the writer lock of the store."""


class StoreReadOnlyError(StoreError):
    """The store cannot be written (read-only file system or no write permission)."""


class SchemaVersionError(StoreError):
    """The store was written with a layout this version does not read."""


class NotAStudyError(StoreError):
    """The path is not a leadline study store (or was never fully created)."""


class StoreDamagedError(StoreError):
    """Parts of the store are missing, unreadable or differ from the store's own record."""


class StoreLockLostError(StoreError):
    """The writer lock of this process was deleted or replaced while it ran: it stops before its next write."""
