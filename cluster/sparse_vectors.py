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
  sees.  A transform whose vector would not fit twice in half the workers' memory exchanges
  through the folder instead (the workers run the same tasks).  A killed worker's tasks are
  recomputed by Dask from the arrays on disk.

Every task is a pure function of its input blocks and writes whole Zarr chunks, so a task
run twice (a retry, a lost worker) writes the same bytes.
"""

from __future__ import annotations

import numpy as np

from leadline.kernels.sparse import rows_bits
from leadline.storage.faults import crash_point

__all__ = ["ZarrBandStore"]


def _band_task(row_func, width, i, *blocks):
    """Band i of a transform's row pass: (2-D band of the output, partial result or None)."""
    crash_point("sparse-band-task")
    out = row_func(*[np.ascontiguousarray(b).reshape(-1) for b in blocks], i)
    band, part = out if isinstance(out, tuple) else (out, None)
    return band.reshape(-1, width), part


def _band(result):
    return result[0]


def _partial(result):
    return result[1]


def _reduce_task(block, func, i):
    return func(np.ascontiguousarray(block).reshape(-1), i)


class ZarrBandStore:
    """Vector store of a chunked sparse evaluation in a :class:`~leadline.storage.sparse_scratch.SparseScratch`.

    client : a distributed Client (vectors computed on its workers, exchange by rechunk), or
        None (out of core in this process, exchange through the disk)
    target_bits : column blocks of about 2^target_bits points
    exchange : "rechunk" or "disk"; default: without a client "disk"; with one "rechunk" for every
        transform whose vector, twice (row bands and their rechunked copy), fits in half of the
        workers' memory limits, else "disk" (the workers then exchange through DIR)
    """

    def __init__(self, scratch, *, target_bits: int, client=None, exchange: str | None = None):
        self.scratch = scratch
        self.client = client
        self.target_bits = int(target_bits)
        self.exchange = exchange
        if self.exchange not in (None, "rechunk", "disk"):
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

    def exchange_for(self, n: int) -> str:
        """How a transform of 2^n points exchanges its halves (see the class docstring)."""
        if self.exchange is not None:
            return self.exchange
        if self.client is None:
            return "disk"
        workers = self.client.scheduler_info().get("workers", {})
        limits = [w.get("memory_limit") or 0 for w in workers.values()]
        if not limits or min(limits) <= 0:
            return "rechunk"
        return "rechunk" if 2 * 16 * 2.0**n / len(limits) <= 0.5 * min(limits) else "disk"

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

    def transform(self, out, row_func, srcs, out_n, bands, col_func=None):
        import dask
        import dask.array as da

        srcs = [srcs] if isinstance(srcs, str) else list(srcs)
        mode = self.exchange_for(out_n)
        inputs = []
        for name in srcs:
            z = self.scratch.array(name)
            inputs.append(da.from_zarr(z, chunks=(z.shape[0] // bands, z.shape[1])).to_delayed().ravel())
        shape, chunks = self._layout(out_n, bands)
        R, W = shape
        results = [dask.delayed(_band_task, pure=True)(row_func, W, i, *[blocks[i] for blocks in inputs])
                   for i in range(bands)]
        rows = da.concatenate([da.from_delayed(dask.delayed(_band)(r), shape=(R // bands, W), dtype=complex)
                               for r in results], axis=0)
        partials = [dask.delayed(_partial)(r) for r in results]
        if col_func is None:
            result = rows
        elif mode == "rechunk":
            result = rows.rechunk((R, chunks[1]))
        else:
            tmp = self.scratch.create(out + ".rows", shape, chunks)
            partials = self._compute(da.store(rows, tmp, lock=False, compute=False), *partials)[1:]
            result = da.from_zarr(tmp, chunks=(R, chunks[1]))
            self.passes += 1
        if col_func is not None:
            result = result.map_blocks(col_func, dtype=complex, meta=np.empty((0, 0), dtype=complex))
        target = self.scratch.create(out, shape, chunks)
        if col_func is not None and mode == "disk":
            self._compute(da.store(result, target, lock=False, compute=False))
        else:
            partials = self._compute(da.store(result, target, lock=False, compute=False), *partials)[1:]
        self.scratch.delete(out + ".rows")
        self.passes += 1
        return list(partials)

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
