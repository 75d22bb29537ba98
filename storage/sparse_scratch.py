"""The scratch folder of one chunked sparse evaluation: its step vectors and its progress.

A chunked evaluation (kernels.sparse ``evaluate_chunked``) keeps the vectors of the step it
works on as Zarr arrays in a folder (on local disk out of core; on a file system every Dask
worker sees when the vectors live on workers), and records each finished step in
``progress.json`` -- written to a temporary file and renamed, after the step's vector is
complete -- so a run killed at any instant resumes at the step after the last recorded one
and computes no finished step again.  ``fingerprint.json`` names the evaluation (problem,
angles, band layout); a folder of another evaluation is refused, never mixed.

The folder is removed after a successful evaluation (:meth:`SparseScratch.remove`) and kept
after a failure, for the resume.

Only persists; never runs a kernel.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import zarr

from .errors import StoreError
from .faults import crash_point, witness

__all__ = ["SparseScratch", "SCRATCH_MARK", "PROGRESS", "FINGERPRINT"]

#: the file that marks a folder as a sparse scratch folder (and names its evaluation)
FINGERPRINT = "fingerprint.json"
PROGRESS = "progress.json"
SCRATCH_MARK = "leadline-sparse-scratch"


def _write_json(path: Path, obj) -> None:
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w") as f:
        json.dump(obj, f)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


class SparseScratch:
    """Step vectors (Zarr arrays) and progress of one chunked evaluation in ``path``."""

    def __init__(self, path: Path, fingerprint: dict):
        self.path = Path(path)
        self.fingerprint = fingerprint
        self.resumed = False

    @classmethod
    def open(cls, path, fingerprint: dict) -> "SparseScratch":
        """Create the folder, or reopen it for a resume if it holds the same evaluation.

        Raises StoreError (one line) for a folder that holds anything else."""
        path = Path(path)
        fingerprint = {"kind": SCRATCH_MARK, **fingerprint}
        self = cls(path, fingerprint)
        mark = path / FINGERPRINT
        if path.exists():
            if not path.is_dir():
                raise StoreError(f"scratch {path} is a file, not a folder")
            if mark.is_file():
                try:
                    old = json.loads(mark.read_text())
                except (OSError, ValueError):
                    old = None
                if old != fingerprint:
                    raise StoreError(f"scratch {path} holds another sparse evaluation (other depth, angles or "
                                     "layout); give another folder or delete it")
                self.resumed = (path / PROGRESS).is_file()
                return self
            if any(path.iterdir()):
                raise StoreError(f"scratch {path} is a folder with other files in it; give an empty or new folder")
        path.mkdir(parents=True, exist_ok=True)
        _write_json(mark, fingerprint)
        return self

    # ---------------------------------------------------------------- vectors
    def _group(self) -> zarr.Group:
        return zarr.open_group(str(self.path / "vectors.zarr"), mode="a", zarr_format=3)

    def create(self, name: str, shape: tuple[int, int], chunks: tuple[int, int]) -> zarr.Array:
        """A new complex array (replacing one of that name), uncompressed (the numbers are noise
        to a compressor)."""
        return self._group().create_array(name, shape=shape, chunks=chunks, dtype="complex128", compressors=None,
                                          fill_value=0j, overwrite=True)

    def array(self, name: str) -> zarr.Array:
        return zarr.open_array(str(self.path / "vectors.zarr" / name), mode="r+", zarr_format=3)

    def chunk_path(self, name: str, i: int, j: int) -> Path:
        """The file of chunk (i, j) of array ``name``: Zarr v3's default chunk key ("c/i/j"); an
        uncompressed chunk is its raw little-endian bytes in C order, so a process may read and
        write it directly (``cluster.sparse_vectors.LocalBandStore``) and plain zarr still reads the array."""
        return self.path / "vectors.zarr" / name / "c" / str(int(i)) / str(int(j))

    def delete(self, name: str) -> None:
        shutil.rmtree(self.path / "vectors.zarr" / name, ignore_errors=True)

    # ---------------------------------------------------------------- progress
    def finished(self) -> tuple[int, float]:
        """(last finished step, residual max so far), (0, 0.0) for a new evaluation."""
        try:
            rec = json.loads((self.path / PROGRESS).read_text())
        except FileNotFoundError:
            return 0, 0.0
        return int(rec["step"]), float(rec["sum_fH"])

    def state(self):
        """The ``state`` recorded with the last finished step (None if none)."""
        try:
            return json.loads((self.path / PROGRESS).read_text()).get("state")
        except FileNotFoundError:
            return None

    def finish(self, step: int, residual: float, state=None) -> None:
        """Record step ``step`` as finished (its vector is complete on disk), with ``state``
        (JSON: what the evaluation needs beyond the vectors to go on from there)."""
        _write_json(self.path / PROGRESS, {"step": int(step), "sum_fH": float(residual), "state": state})
        witness("sparse-step", [step])
        crash_point("sparse-step-finished")

    def rewind(self, step: int, residual: float) -> None:
        """Record ``step`` as the last finished one again (its vector is still complete; the next
        step's is about to be overwritten in place), without counting it as a newly finished step."""
        _write_json(self.path / PROGRESS, {"step": int(step), "sum_fH": float(residual), "state": None})

    def remove(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)
