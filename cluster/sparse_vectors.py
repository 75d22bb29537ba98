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

__all__ = ["ZarrBandStore", "LocalBandStore"]


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

    def state(self):
        return self.scratch.state()

    def finish(self, m, residual, state=None):
        self.scratch.finish(m, residual, state)

    def rewind(self, m, residual):
        self.scratch.rewind(m, residual)


# --------------------------------------------------------------------------- out of core, direct I/O
#: the smallest chunk file of :class:`LocalBandStore` (2^15 points, 512 KiB) where the vector allows
MIN_TILE_BITS = 15
#: ... but a column block of at most 2^MAX_BLOCK_BITS points (256 MiB)
MAX_BLOCK_BITS = 24
#: O_DIRECT needs buffers, offsets and sizes aligned to the device's block; 4096 covers the usual ones
_ALIGN = 4096


def _aligned(n: int) -> np.ndarray:
    """An uninitialized complex buffer of n points, aligned to ``_ALIGN`` bytes.  From numpy's own
    allocator (it asks for transparent huge pages): a fresh anonymous mmap of 4 KiB pages cost
    about 1 s of system time per GiB on first touch on the development machine, this about 0.15 s."""
    raw = np.empty(16 * max(n, 1) + _ALIGN, dtype=np.uint8)
    off = (-raw.ctypes.data) % _ALIGN
    return raw[off : off + 16 * max(n, 1)].view(complex)[:n]


class _Chunks:
    """Whole-chunk reads and writes of the uncompressed Zarr arrays of a scratch folder, with
    O_DIRECT where the file system and the chunk size allow it (else ordinary buffered I/O)."""

    def __init__(self):
        import os

        self.direct = getattr(os, "O_DIRECT", 0)

    def _open(self, path, flags, nbytes):
        import os

        if self.direct and nbytes % _ALIGN == 0:
            try:
                return os.open(path, flags | self.direct, 0o644)
            except OSError:  # tmpfs and some network file systems refuse O_DIRECT
                self.direct = 0
        return os.open(path, flags, 0o644)

    def write(self, path, buf: np.ndarray) -> None:
        import os

        fd = self._open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, buf.nbytes)
        try:
            view = memoryview(buf).cast("B")
            done = 0
            while done < buf.nbytes:
                done += os.pwrite(fd, view[done:], done)
        finally:
            os.close(fd)

    def read(self, path, buf: np.ndarray) -> np.ndarray:
        import os

        fd = self._open(path, os.O_RDONLY, buf.nbytes)
        try:
            view = memoryview(buf).cast("B")
            done = 0
            while done < buf.nbytes:
                got = os.preadv(fd, [view[done:]], done)
                if got <= 0:
                    raise OSError(f"{path}: chunk file shorter than {buf.nbytes} bytes")
                done += got
        finally:
            os.close(fd)
        return buf


class LocalBandStore:
    """Vector store of a chunked sparse evaluation out of core, in this process, without Dask.

    Every vector is an uncompressed Zarr v3 array in the scratch folder (the same layout as
    :class:`ZarrBandStore`: rows of a band x a block of columns per chunk, readable with plain
    zarr), but this class reads and writes the chunk files itself: whole chunks, page-aligned
    buffers, O_DIRECT (measured on the development machine: writing through the page cache cost
    5x the time and most of it CPU; docs/performance.md), and a few I/O threads that read the
    next band and write the previous one while this thread computes (the transform's arithmetic
    and the file I/O overlap).  The column pass transforms the output array in place (column
    blocks are disjoint), so a transform needs no second copy on disk; a transform whose output
    has its source's name overwrites the source band by band (``in_place``: the root's transform,
    which then needs no room beside the largest vector).
    """

    in_place = True

    def __init__(self, scratch, *, target_bits: int, io_threads: int = 2):
        from concurrent.futures import ThreadPoolExecutor

        self.scratch = scratch
        self.target_bits = int(target_bits)
        self.files = _Chunks()
        self.pool = ThreadPoolExecutor(max_workers=io_threads, thread_name_prefix="sparse-io")
        self.passes = 0

    def close(self):
        self.pool.shutdown(wait=True)

    @staticmethod
    def largest_block(p: int, target_bits: int) -> int:
        """Points of the largest band or column block an evaluation at depth p holds (the root's)."""
        from leadline.kernels.sparse import band_bits

        n = 2 * p - 1
        B = rows_bits(n)
        rows = (1 << B) >> band_bits(n, p + 1, target_bits)
        return max(1 << target_bits, LocalBandStore._columns(n, rows, target_bits) << B)

    @staticmethod
    def _columns(n: int, rows: int, target_bits: int) -> int:
        """Columns of a chunk: column blocks of 2^target_bits points, widened up to 2^MAX_BLOCK_BITS
        points so that a chunk holds 2^MIN_TILE_BITS points where possible."""
        B = rows_bits(n)
        want = max((1 << target_bits) >> B, (1 << MIN_TILE_BITS) // rows)
        return max(1, min(1 << (n - B), want, max((1 << target_bits) >> B, (1 << MAX_BLOCK_BITS) >> B)))

    # ---------------------------------------------------------------- layout
    def _layout(self, n: int, bands: int):
        """As :class:`ZarrBandStore`'s, but a chunk (one file, one system call) holds at least
        2^MIN_TILE_BITS points where the vector allows (:meth:`_columns`): at p = 16 the root's bands would
        otherwise cut it into 2^18 files of 128 KiB (its column blocks grow to 2^24 points instead of 2^22)."""
        B = rows_bits(n)
        R, W = 1 << B, 1 << (n - B)
        rows = R // bands
        return (R, W), (rows, self._columns(n, rows, self.target_bits))

    def _create(self, name, n, bands):
        shape, chunks = self._layout(n, bands)
        self.scratch.create(name, shape, chunks)
        for i in range(shape[0] // chunks[0]):
            self.scratch.chunk_path(name, i, 0).parent.mkdir(parents=True, exist_ok=True)
        return shape, chunks

    def _meta(self, name):
        arr = self.scratch.array(name)
        return arr.shape, arr.chunks

    def _read_rows(self, name, meta, r0, r1) -> np.ndarray:
        """Rows r0..r1-1 of array ``name`` (whole row-chunks read, then sliced), flat."""
        (R, W), (rc, cc) = meta
        i0, i1 = r0 // rc, -(-r1 // rc)
        nc = W // cc
        buf = _aligned((i1 - i0) * rc * W).reshape(i1 - i0, nc, rc, cc)
        for i in range(i0, i1):
            for j in range(nc):
                self.files.read(self.scratch.chunk_path(name, i, j), buf[i - i0, j])
        rows = buf.transpose(0, 2, 1, 3).reshape((i1 - i0) * rc, W)
        return rows[r0 - i0 * rc : r1 - i0 * rc].reshape(-1)

    def _read_flat(self, name, meta, a, b) -> np.ndarray:
        (R, W), _ = meta
        r0, r1 = a // W, -(-b // W)
        rows = self._read_rows(name, meta, r0, r1)
        return rows[a - r0 * W : b - r0 * W]

    def _write_band(self, name, meta, i, band):
        """Band i (whole row-chunks: band i of the array cut into bands of ``band.size`` points) of
        array ``name``, as its chunk files."""
        (R, W), (rc, cc) = meta
        per = band.size // (rc * W)  # row-chunks per band
        b3 = band.reshape(per, rc, W)
        tile = _aligned(rc * cc).reshape(rc, cc)
        for ii in range(per):
            for j in range(W // cc):
                tile[...] = b3[ii, :, j * cc : (j + 1) * cc]
                self.files.write(self.scratch.chunk_path(name, i * per + ii, j), tile)

    def _read_column(self, name, meta, j) -> np.ndarray:
        (R, W), (rc, cc) = meta
        buf = _aligned(R * cc).reshape(R, cc)
        for i in range(R // rc):
            self.files.read(self.scratch.chunk_path(name, i, j), buf[i * rc : (i + 1) * rc])
        return buf

    def _write_column(self, name, meta, j, block):
        (R, W), (rc, cc) = meta
        block = block if block.flags.c_contiguous and block.ctypes.data % _ALIGN == 0 else self._copy_aligned(block)
        for i in range(R // rc):
            self.files.write(self.scratch.chunk_path(name, i, j), block[i * rc : (i + 1) * rc])

    @staticmethod
    def _copy_aligned(block):
        out = _aligned(block.size).reshape(block.shape)
        out[...] = block
        return out

    def _pipeline(self, count, load, work, store) -> None:
        """for t in range(count): store(t, work(t, load(t))), with load(t + 1) and store(t - 1)
        running on the I/O threads while work(t) runs here; an error anywhere stops the loop and
        is raised after the writes in flight have ended (a failed store is never silent)."""
        pending = []  # writes in flight (at most two: bounded memory)
        nxt = self.pool.submit(load, 0) if count else None
        try:
            for t in range(count):
                data = nxt.result()
                nxt = self.pool.submit(load, t + 1) if t + 1 < count else None
                out = work(t, data)
                del data
                pending.append(self.pool.submit(store, t, out))
                del out
                while len(pending) > 1:
                    pending.pop(0).result()
        finally:
            for f in pending + ([nxt] if nxt is not None else []):
                f.exception()  # wait for it
        for f in pending:
            f.result()

    # ---------------------------------------------------------------- protocol
    def put(self, name, flat):
        flat = np.asarray(flat, dtype=complex).reshape(-1)
        n = flat.size.bit_length() - 1
        meta = self._create(name, n, 1)
        self._write_band(name, meta, 0, flat)

    def get(self, name):
        meta = self._meta(name)
        return self._read_rows(name, meta, 0, meta[0][0]).copy()

    def values(self, name, idx):
        arr = self.scratch.array(name)
        W = arr.shape[1]
        return np.array([arr[int(i) // W, int(i) % W] for i in idx], dtype=complex)

    def drop(self, name):
        self.scratch.delete(name)

    def transform(self, out, row_func, srcs, out_n, bands, col_func=None):
        srcs = [srcs] if isinstance(srcs, str) else list(srcs)
        metas = [self._meta(s) for s in srcs]
        sizes = [m[0][0] * m[0][1] for m in metas]
        if out in srcs:  # in place: band i is read before it is overwritten, and no other band reads it
            meta = metas[0]
            (R, W), (rc, cc) = meta
            if srcs != [out] or sizes[0] != 1 << out_n or (R // bands) % rc:
                raise ValueError(f"transform of {out!r} in place needs it as the only source, cut into whole row-chunks")
        else:
            meta = self._create(out, out_n, bands)
        partials = [None] * bands

        def load(i):
            return [self._read_flat(s, m, i * (S // bands), (i + 1) * (S // bands)) for s, m, S in zip(srcs, metas, sizes)]

        def work(i, parts):
            band, part = (lambda r: r if isinstance(r, tuple) else (r, None))(row_func(*parts, i))
            partials[i] = part
            return band

        def store(i, band):
            self._write_band(out, meta, i, band)
            crash_point("sparse-band-written")

        self._pipeline(bands, load, work, store)
        self.passes += 1
        if col_func is not None:
            (R, W), (rc, cc) = meta
            self._pipeline(W // cc, lambda j: self._read_column(out, meta, j), lambda j, blk: col_func(blk),
                           lambda j, blk: self._write_column(out, meta, j, blk))
            self.passes += 1
        return partials

    def reduce(self, func, src, bands):
        meta = self._meta(src)
        S = meta[0][0] * meta[0][1]
        out = [None] * bands

        def work(i, x):
            out[i] = func(x, i)

        self._pipeline(bands, lambda i: self._read_flat(src, meta, i * (S // bands), (i + 1) * (S // bands)), work,
                       lambda i, r: None)
        return out

    def finished(self):
        return self.scratch.finished()

    def state(self):
        return self.scratch.state()

    def finish(self, m, residual, state=None):
        self.scratch.finish(m, residual, state)

    def rewind(self, m, residual):
        self.scratch.rewind(m, residual)
