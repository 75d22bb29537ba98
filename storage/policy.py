"""When the store writes what: the checkpoint policy of a sweep.

Promise (checked by tests/test_sweep.py and documented in docs/store.md): a
SIGKILL at any moment loses at most about max(one pass, ``interval_s``) of
computing, never a finished depth, and never a finished chunk of a pass that
was checkpointed chunk by chunk.

* Finished passes wait in memory and are written together, one array per
  batch, once ``interval_s`` seconds of computing have piled up (or before a
  pass that would take the pile beyond it).  Small passes therefore cost one
  write per ``interval_s`` instead of one write each.
* A pass expected to take at least ``interval_s`` (and that has more than one
  chunk) keeps a ledger: every finished chunk is written as it arrives, and
  the pass sum is written as soon as the pass is done.
* ``interval_s = 0`` writes everything at once: every pass, every chunk.
* A finished depth drops its pass batches unless ``keep_passes``.

Settings come from the spec's ``[checkpoint]`` table (``interval-s``,
``keep-passes``); the stored spec carries them, so resume uses the same ones.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["CheckpointPolicy", "DEFAULT_INTERVAL_S", "DEFAULT_SECONDS_PER_PATH"]

#: default seconds of computing a kill may lose (the spec's [checkpoint] interval-s)
DEFAULT_INTERVAL_S = 30.0
#: seconds per path visit assumed before any pass of the session is measured (deliberately
#: slow: an overestimate only makes the first large pass keep a ledger it might not need)
DEFAULT_SECONDS_PER_PATH = 2e-8


@dataclass(frozen=True)
class CheckpointPolicy:
    interval_s: float = DEFAULT_INTERVAL_S
    keep_passes: bool = False

    def __post_init__(self) -> None:
        if not self.interval_s >= 0:
            raise ValueError(f"checkpoint interval must be >= 0 seconds, got {self.interval_s!r}")

    @classmethod
    def from_spec(cls, spec: dict | None) -> "CheckpointPolicy":
        """The policy of a stored spec (its "checkpoint" entry; defaults when absent)."""
        data = (spec or {}).get("checkpoint") or {}
        return cls(float(data.get("interval_s", DEFAULT_INTERVAL_S)), bool(data.get("keep_passes", False)))

    def to_json(self) -> dict:
        return {"interval_s": self.interval_s, "keep_passes": self.keep_passes}

    def chunk_ledger(self, expected_s: float, n_chunks: int) -> bool:
        """Whether a pass keeps a per-chunk ledger."""
        return n_chunks > 1 and expected_s >= self.interval_s

    def flush_before(self, pending_s: float, expected_s: float) -> bool:
        """Write the pending passes before a pass expected to take ``expected_s``?"""
        return pending_s > 0 and pending_s + expected_s > self.interval_s

    def flush_after(self, pending_s: float) -> bool:
        return pending_s >= self.interval_s
