"""The Zarr checkpoint store of a study: spec, per-depth results, pass batches, ledger, lock.

Imports only ``leadline.kernels``.  Layout: :mod:`.layout` (and docs/store.md); when what
is written: :mod:`.policy`.
"""

from .checkpoint import CheckpointedPasses, CheckpointStats, InProcessChunks, as_chunk_runner
from .errors import NotAStudyError, SchemaVersionError, StoreError, StoreLockedError
from .layout import FORMAT, SCHEMA_VERSION
from .policy import CheckpointPolicy
from .lock import StoreLock
from .reader import StudyReader, open_study
from .study import DepthStore, StudyStore, check_study

__all__ = [
    "CheckpointedPasses",
    "CheckpointStats",
    "CheckpointPolicy",
    "InProcessChunks",
    "as_chunk_runner",
    "StoreError",
    "StoreLockedError",
    "SchemaVersionError",
    "NotAStudyError",
    "FORMAT",
    "SCHEMA_VERSION",
    "StoreLock",
    "StudyReader",
    "open_study",
    "StudyStore",
    "DepthStore",
    "check_study",
]
