"""The Zarr checkpoint store of a study: spec, per-depth results, pass batches, ledger, lock.

This package only persists; it never runs a kernel.  Where a pass is computed and saved at
once (the checkpointing run_pass) is :mod:`leadline.cluster.checkpointed`.

Imports only ``leadline.kernels``.  Layout: :mod:`.layout` (and docs/store.md); when what
is written: :mod:`.policy`.

The names below are imported on first use (PEP 562), so ``import
leadline.storage`` (and the command line's ``--help``) does not load zarr;
``from leadline.storage import StudyStore`` does.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "CheckpointPolicy": "policy",
    "StoreError": "errors",
    "StoreLockedError": "errors",
    "SchemaVersionError": "errors",
    "NotAStudyError": "errors",
    "StoreDamagedError": "errors",
    "StoreLockLostError": "errors",
    "FORMAT": "layout",
    "SCHEMA_VERSION": "layout",
    "StoreLock": "lock",
    "StudyReader": "reader",
    "open_study": "reader",
    "StudyStore": "study",
    "DepthStore": "study",
    "check_study": "study",
}

__all__ = list(_WHERE)


__getattr__, __dir__ = lazy_names(__name__, _WHERE)
