"""The chunked sparse recursion's vector store on Zarr arrays, computed by Dask.

One class for both places the step vectors can live (kernels.sparse ``evaluate_chunked``
drives it; the protocol is in kernels/sparse/_chunked.py):

* out of core (no client): every vector is a Zarr array in the scratch folder on local disk,
  tiled (rows of a band x a block of columns); a transform's row pass streams the row bands
  through this process with Dask's synchronous scheduler and writes them back, and the column
  pass reads them again as column blocks -- the exchange goes through the disk, and a pass
  holds a few bands in memory, never the vector.
* on Dask workers (a distributed Client: local cluster, scheduler address, SLURM/PBS): the
  same graph, but the row-transformed bands stay in worker memory and Dask's own ``rechunk``
  turns them into column blocks (the exchange between the halves of the transform); only the
  results are written to the scratch folder, which must be on a file system every worker
  sees.  A killed worker's tasks are recomputed by Dask from the arrays on disk.

Every task is a pure function of its input blocks and writes whole Zarr chunks, so a task
run twice (a retry, a lost worker) writes the same bytes.
"""

from __future__ import annotations

import numpy as np

from leadline.kernels.sparse import rows_bits
from leadline.storage.faults import crash_point

__all__ = ["ZarrBandStore"]


def _row_task(block, row_func, width, block_info=None):
    crash_point("sparse-band-task")
    i = block_info[0]["chunk-location"][0]
    return row_func(np.ascontiguousarray(block).reshape(-1), i).reshape(-1, width)


def _reduce_task(block, func, i):
    return func(np.ascontiguousarray(block).reshape(-1), i)


class ZarrBandStore:
    """Vector store of a chunked sparse evaluation in a :class:`~leadline.storage.sparse_scratch.SparseScratch`.

    client : a distributed Client (vectors computed on its workers, exchange by rechunk), or
        None (out of core in this process, exchange through the disk)
    target_bits : column blocks of about 2^target_bits points
    exchange : "rechunk" or "disk" (default: rechunk with a client, disk without)
    """

    def __init__(self, scratch, *, target_bits: int, client=None, exchange: str | None = None):
        self.scratch = scratch
        self.client = client
        self.target_bits = int(target_bits)
        self.exchange = exchange or ("rechunk" if client is not None else "disk")
        if self.exchange not in ("rechunk", "disk"):
            raise ValueError(f"exchange must be 'rechunk' or 'disk', got {self.exchange!r}")
        self.passes = 0

    # ---------------------------------------------------------------- running graphs
    def _compute(self, *things):
        import dask

        if self.client is not None:
            futures = self.client.compute(list(things), retries=3)
            return self.client.gather(futures)
        return list(dask.compute(*things, scheduler="sync"))

    def _layout(self, n: int, bands: int) -> tuple[tuple[int, int], tuple[int, int]]:
        """(shape, Zarr chunk) of a vector of 2^n points cut into ``bands`` row bands."""
        B = rows_bits(n)
        R, W = 1 << B, 1 << (n - B)
        cols = max(1, min(W, (1 << self.target_bits) >> B))
        return (R, W), (R // bands, cols)

    # ---------------------------------------------------------------- protocol
    def put(self, name, flat):
        flat = np.asarray(flat, dtype=complex).reshape(-1)
        n = flat.size.bit_length() - 1
        shape, chunks = self._layout(n, 1)
        self.scratch.create(name, shape, chunks)[...] = flat.reshape(shape)

    def get(self, name):
        return np.asarray(self.scratch.array(name)[...]).reshape(-1)

    def values(self, name, idx):
        arr = self.scratch.array(name)
        W = arr.shape[1]
        return np.array([arr[int(i) // W, int(i) % W] for i in idx], dtype=complex)

    def drop(self, name):
        self.scratch.delete(name)

    def transform(self, out, row_func, src, out_n, bands, col_func):
        import dask.array as da

        zs = self.scratch.array(src)
        x = da.from_zarr(zs, chunks=(zs.shape[0] // bands, zs.shape[1]))
        shape, chunks = self._layout(out_n, bands)
        R, W = shape
        rows = da.map_blocks(_row_task, x, row_func=row_func, width=W, chunks=((R // bands,) * bands, (W,)),
                             dtype=complex, meta=np.empty((0, 0), dtype=complex))
        if self.exchange == "rechunk":
            cols = rows.rechunk((R, chunks[1]))
        else:
            tmp = self.scratch.create(out + ".rows", shape, chunks)
            self._compute(da.store(rows, tmp, lock=False, compute=False))
            cols = da.from_zarr(tmp, chunks=(R, chunks[1]))
        result = cols.map_blocks(col_func, dtype=complex, meta=np.empty((0, 0), dtype=complex))
        target = self.scratch.create(out, shape, chunks)
        self._compute(da.store(result, target, lock=False, compute=False))
        self.scratch.delete(out + ".rows")
        self.passes += 2

    def reduce(self, func, src, bands):
        import dask
        import dask.array as da

        zs = self.scratch.array(src)
        x = da.from_zarr(zs, chunks=(zs.shape[0] // bands, zs.shape[1]))
        blocks = x.to_delayed().ravel()
        parts = [dask.delayed(_reduce_task)(blk, func, i) for i, blk in enumerate(blocks)]
        return self._compute(*parts)

    def finished(self):
        return self.scratch.finished()

    def finish(self, m, residual):
        self.scratch.finish(m, residual)
