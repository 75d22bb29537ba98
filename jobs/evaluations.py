"""An optimizer's evaluations kept in its depth's store, so that a killed depth resumes without them.

Bath depths (:class:`leadline.jobs.bath.CheckpointedEvaluations`) and sparse depths
(:class:`CheckpointedSparseEvaluations`) write every finished evaluation into the depth's pass
batches (an entry whose ``kind`` is in ``storage.layout.EVALUATION_KINDS``), following the
checkpoint policy of the spec (``[checkpoint] interval-s``: written once that many seconds of
computing wait in memory; at once with 0).  A resumed depth replays the deterministic optimizer
from its start; every evaluation it asks for again is keyed by a content fingerprint of its
inputs and read back bit for bit (the store checks each entry's CRC-32), so the replay follows
the uninterrupted path and ends with the same bits.
"""

from __future__ import annotations

import hashlib
import json
import time

import numpy as np

__all__ = ["SavedEvaluations", "CheckpointedSparseEvaluations", "evaluation_key"]


def evaluation_key(prefix: str, header: dict, *arrays) -> str:
    """``prefix-<32 hex digits>``: SHA-256 of ``header`` (JSON, sorted keys) and the arrays' float64 bytes."""
    h = hashlib.sha256()
    h.update(json.dumps(header, sort_keys=True).encode())
    for a in arrays:
        h.update(np.ascontiguousarray(a, dtype="<f8").tobytes())
    return f"{prefix}-{h.hexdigest()[:32]}"


class SavedEvaluations:
    """The evaluations of one depth in its store: look up, record, write when the policy says.

    ``kind`` is the entry kind written (one of ``storage.layout.EVALUATION_KINDS``); ``computed``
    counts this session's evaluations, ``reused`` those read back that an earlier session computed
    (not the optimizer asking again for angles of this session), ``seconds`` the computed ones' seconds.
    """

    kind = ""
    #: the fault-injection point after a batch of these evaluations is on disk (storage/faults.py)
    crash_name = ""

    def __init__(self, depth):
        self.depth = depth
        self.computed = 0
        self.reused = 0
        self.seconds = 0.0
        self._mine: set[str] = set()

    def lookup(self, key: str) -> np.ndarray | None:
        """The recorded numbers of evaluation ``key`` (complex128; the values are the real parts), or None."""
        cached = self.depth.cached_pass(key, backward=False)
        if cached is not None and key not in self._mine:
            self.reused += 1
        return cached

    def record(self, key: str, numbers, step: int, seconds: float, **meta) -> None:
        """A finished evaluation: kept in memory until the next write of the depth's batches."""
        entry = {"kind": self.kind, "step": int(step), "plan": None, "n_chunks": 1, "completions": [1],
                 "paths": 0.0, "wall_s": float(seconds), **meta}
        # chunk 0 witnessed when written: the kill tests' audit file lists every evaluation saved
        self.depth.add_pass(key, np.asarray(numbers, dtype=np.complex128), entry, chunks_to_witness=(0,))
        self._mine.add(key)
        self.computed += 1
        self.seconds += float(seconds)

    def write_if_due(self) -> None:
        """Write the waiting evaluations once ``interval-s`` seconds of computing wait (the policy)."""
        from leadline.storage.faults import crash_point

        if self.depth.policy.flush_after(self.depth.pending_seconds):
            self.depth.flush()
            crash_point(self.crash_name)


class CheckpointedSparseEvaluations(SavedEvaluations):
    """``evaluate(gamma, beta) -> (value, grad_gamma, grad_beta)`` of a sparse depth, backed by its store.

    The entry (kind "sparse") holds value, gradient in gamma, gradient in beta (2p + 1 numbers),
    and in its record the value, the gradient's max-norm and the seconds it took (what
    ``leadline status`` shows for the depth in progress).  ``compute(gamma, beta)`` does the work
    (``kernels.sparse.value_and_grad``, in memory or on chunked vectors).
    """

    kind = "sparse"
    crash_name = "sparse-evaluations-cached"

    def __init__(self, depth, q: int, degree: float, compute):
        super().__init__(depth)
        self.q, self.degree = int(q), float(degree)
        self.compute = compute
        self.last_seconds: float | None = None

    def key(self, gamma, beta) -> str:
        return evaluation_key("sparse", {"q": self.q, "degree": self.degree}, gamma, beta)

    def __call__(self, gamma, beta):
        gamma, beta = np.asarray(gamma, dtype=float), np.asarray(beta, dtype=float)
        p = gamma.size
        key = self.key(gamma, beta)
        cached = self.lookup(key)
        if cached is not None:
            real = cached.real.copy()
            return float(real[0]), real[1 : p + 1], real[p + 1 :]
        t0 = time.perf_counter()
        value, grad_gamma, grad_beta = self.compute(gamma, beta)
        seconds = time.perf_counter() - t0
        self.last_seconds = seconds
        numbers = np.concatenate([[float(value)], np.asarray(grad_gamma, dtype=float), np.asarray(grad_beta, dtype=float)])
        self.record(key, numbers, p, seconds, value=float(value),
                    gradient_norm=float(np.max(np.abs(numbers[1:]))))
        self.write_if_due()
        return float(value), numbers[1 : p + 1].copy(), numbers[p + 1 :].copy()
