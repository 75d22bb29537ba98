"""The chunked sparse recursion's vector stores: Zarr arrays in a scratch folder, worked on in
this process (out of core) or by Dask workers.

Both stores (kernels.sparse ``evaluate_chunked`` drives them; the protocol is in
kernels/sparse/_chunked.py) keep every vector as an uncompressed Zarr v3 array in the scratch
folder, tiled (rows of a band x a block of columns), and read and write its chunk files
themselves (:class:`VectorFiles`: whole chunks, page-aligned buffers, O_DIRECT where the file
system allows).  Measured on the development machine: writing through the page cache cost 5x
the time of direct I/O, most of it CPU, and zarr's own chunk I/O added its event-loop thread;
plain zarr still reads every array (tests/test_sparse_chunked.py).

* :class:`LocalBandStore`, out of core (no Dask): a transform's row pass streams the bands
  through this process and writes them as chunk files, the column pass reads column blocks,
  transforms them and writes them back in place -- the exchange goes through the disk; I/O
  threads read ahead and write behind while this thread computes.
* :class:`ZarrBandStore`, on Dask workers (a distributed Client: local cluster, scheduler
  address, SLURM/PBS): the row tasks read their bands from the folder; the row-transformed
  bands stay in worker memory and Dask's own ``rechunk`` turns them into column blocks (the
  exchange between the halves of the transform); the column tasks write their blocks to the
  folder, which must be on a file system every worker sees.  A transform whose vector would not
  fit twice in half the workers' memory exchanges through the folder instead.  A killed
  worker's tasks are recomputed by Dask from the arrays on disk.

On workers every task is a pure function of its input blocks and writes whole chunks of a
vector no other task of the transform reads, so a task run twice (a retry, a lost worker)
writes the same bytes.
"""

from __future__ import annotations

import os

import numpy as np

from leadline.kernels.sparse import band_bits, rows_bits
from leadline.storage.faults import crash_point

__all__ = ["ZarrBandStore", "LocalBandStore", "VectorFiles"]

#: a chunk file holds at least 2^MIN_TILE_BITS points (512 KiB) where the vector allows
MIN_TILE_BITS = 15
#: ... but a column block at most 2^MAX_BLOCK_BITS points (256 MiB)
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


def _columns(n: int, rows: int, target_bits: int) -> int:
    """Columns of a chunk of a vector of 2^n points cut into row bands of ``rows`` rows: column blocks
    of 2^target_bits points, widened (up to 2^MAX_BLOCK_BITS points) so that a chunk holds
    2^MIN_TILE_BITS points where possible: at p = 16 the root's bands would otherwise cut it into
    2^18 files of 128 KiB."""
    B = rows_bits(n)
    base = (1 << target_bits) >> B
    want = max(base, (1 << MIN_TILE_BITS) // rows)
    return max(1, min(1 << (n - B), want, max(base, (1 << MAX_BLOCK_BITS) >> B)))


def largest_block(p: int, target_bits: int) -> int:
    """Points of the largest band or column block an evaluation at depth p holds (the root's)."""
    n = 2 * p - 1
    B = rows_bits(n)
    rows = (1 << B) >> band_bits(n, p + 1, target_bits)
    return max(1 << target_bits, _columns(n, rows, target_bits) << B)


class VectorFiles:
    """The vectors of a scratch folder as chunk files: layout, whole-chunk reads and writes.
    Picklable (a scratch folder and two numbers), so Dask tasks carry it to the workers."""

    def __init__(self, scratch, target_bits: int):
        self.scratch = scratch
        self.target_bits = int(target_bits)
        self.direct = getattr(os, "O_DIRECT", 0)

    # ---------------------------------------------------------------- layout
    def layout(self, n: int, bands: int):
        """(shape, chunks) of a vector of 2^n points cut into ``bands`` row bands."""
        B = rows_bits(n)
        R, W = 1 << B, 1 << (n - B)
        rows = R // bands
        return (R, W), (rows, _columns(n, rows, self.target_bits))

    def create(self, name, n, bands):
        shape, chunks = self.layout(n, bands)
        self.scratch.create(name, shape, chunks)
        for i in range(shape[0] // chunks[0]):
            self.scratch.chunk_path(name, i, 0).parent.mkdir(parents=True, exist_ok=True)
        return shape, chunks

    def meta(self, name):
        arr = self.scratch.array(name)
        return arr.shape, arr.chunks

    # ---------------------------------------------------------------- one chunk file
    def _open(self, path, flags, nbytes):
        if self.direct and nbytes % _ALIGN == 0:
            try:
                return os.open(path, flags | self.direct, 0o644)
            except OSError:  # tmpfs and some network file systems refuse O_DIRECT
                self.direct = 0
        return os.open(path, flags, 0o644)

    def write_chunk(self, path, buf: np.ndarray) -> None:
        direct = buf.ctypes.data % _ALIGN == 0
        fd = self._open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, buf.nbytes if direct else 1)
        try:
            view = memoryview(np.ascontiguousarray(buf)).cast("B")
            done = 0
            while done < buf.nbytes:
                done += os.pwrite(fd, view[done:], done)
        finally:
            os.close(fd)

    def read_chunk(self, path, buf: np.ndarray) -> np.ndarray:
        fd = self._open(path, os.O_RDONLY, buf.nbytes if buf.ctypes.data % _ALIGN == 0 else 1)
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

    # ---------------------------------------------------------------- bands and column blocks
    def read_rows(self, name, meta, r0, r1) -> np.ndarray:
        """Rows r0..r1-1 of array ``name`` (whole row-chunks read, then sliced), flat."""
        (R, W), (rc, cc) = meta
        i0, i1 = r0 // rc, -(-r1 // rc)
        nc = W // cc
        buf = _aligned((i1 - i0) * rc * W).reshape(i1 - i0, nc, rc, cc)
        for i in range(i0, i1):
            for j in range(nc):
                self.read_chunk(self.scratch.chunk_path(name, i, j), buf[i - i0, j])
        rows = buf.transpose(0, 2, 1, 3).reshape((i1 - i0) * rc, W)
        return rows[r0 - i0 * rc : r1 - i0 * rc].reshape(-1)

    def read_band(self, name, meta, i, bands) -> np.ndarray:
        """Band i of array ``name`` cut into ``bands`` bands (contiguous ranges of the index), flat."""
        (R, W), _ = meta
        S = R * W // bands
        a, b = i * S, (i + 1) * S
        r0, r1 = a // W, -(-b // W)
        return self.read_rows(name, meta, r0, r1)[a - r0 * W : b - r0 * W]

    def write_band(self, name, meta, i, band):
        """Band i (whole row-chunks: band i of the array cut into bands of ``band.size`` points) of
        array ``name``, as its chunk files."""
        (R, W), (rc, cc) = meta
        per = band.size // (rc * W)  # row-chunks per band
        b3 = band.reshape(per, rc, W)
        tile = _aligned(rc * cc).reshape(rc, cc)
        for ii in range(per):
            for j in range(W // cc):
                tile[...] = b3[ii, :, j * cc : (j + 1) * cc]
                self.write_chunk(self.scratch.chunk_path(name, i * per + ii, j), tile)

    def read_column(self, name, meta, j) -> np.ndarray:
        (R, W), (rc, cc) = meta
        buf = _aligned(R * cc).reshape(R, cc)
        for i in range(R // rc):
            self.read_chunk(self.scratch.chunk_path(name, i, j), buf[i * rc : (i + 1) * rc])
        return buf

    def write_column(self, name, meta, j, block):
        (R, W), (rc, cc) = meta
        if not (block.flags.c_contiguous and block.ctypes.data % _ALIGN == 0):
            out = _aligned(block.size).reshape(block.shape)
            out[...] = block
            block = out
        for i in range(R // rc):
            self.write_chunk(self.scratch.chunk_path(name, i, j), block[i * rc : (i + 1) * rc])


class _Protocol:
    """The parts of the store protocol both stores share (vectors as chunk files in ``self.io``)."""

    io: VectorFiles

    @property
    def scratch(self):
        return self.io.scratch

    def put(self, name, flat):
        flat = np.asarray(flat, dtype=complex).reshape(-1)
        meta = self.io.create(name, flat.size.bit_length() - 1, 1)
        self.io.write_band(name, meta, 0, flat)

    def get(self, name):
        meta = self.io.meta(name)
        return self.io.read_rows(name, meta, 0, meta[0][0]).copy()

    def values(self, name, idx):
        arr = self.scratch.array(name)  # a few points: through zarr itself
        W = arr.shape[1]
        return np.array([arr[int(i) // W, int(i) % W] for i in idx], dtype=complex)

    def drop(self, name):
        self.scratch.delete(name)

    def finished(self):
        return self.scratch.finished()

    def state(self):
        return self.scratch.state()

    def finish(self, m, residual, state=None):
        self.scratch.finish(m, residual, state)

    def rewind(self, m, residual):
        self.scratch.rewind(m, residual)


# --------------------------------------------------------------------------- Dask tasks
def _band_task(io, row_func, srcs, metas, i, bands, out, meta):
    """Band i of a transform's row pass, its inputs read from the folder: (2-D band of the output,
    partial result or None); with ``out`` the band is written there instead (None returned)."""
    crash_point("sparse-band-task")
    parts = [io.read_band(s, m, i, bands) for s, m in zip(srcs, metas)]
    res = row_func(*parts, i)
    band, part = res if isinstance(res, tuple) else (res, None)
    if out is not None:
        io.write_band(out, meta, i, band)
        return None, part
    return band.reshape(-1, meta[0][1]), part


def _band(result):
    return result[0]


def _partial(result):
    return result[1]


def _write_block(block, io, out, meta, block_info=None):
    """A transformed column block written as its chunk files; a 1 x 1 marker for the graph."""
    j = block_info[0]["chunk-location"][1]
    io.write_column(out, meta, j, np.ascontiguousarray(block))
    return np.zeros((1, 1))


def _column_task(io, src, out, meta, j, col_func):
    """Column block j read from ``src``, transformed, written to ``out`` (another array: a rerun
    reads the same input)."""
    io.write_column(out, meta, j, col_func(io.read_column(src, meta, j)))


def _reduce_task(io, func, src, meta, i, bands):
    return func(io.read_band(src, meta, i, bands), i)


def _on_this_machine(host) -> bool:
    """Is a worker's host address this machine (loopback, or one of its own names and addresses)?"""
    import ipaddress
    import socket

    if not host:
        return False
    try:
        if ipaddress.ip_address(host).is_loopback:
            return True
    except ValueError:
        pass
    name = socket.gethostname()
    try:
        own = {name, socket.getfqdn(), *socket.gethostbyname_ex(name)[2]}
    except OSError:
        own = {name}
    return host in own or host == "localhost"


class ZarrBandStore(_Protocol):
    """Vector store of a chunked sparse evaluation on Dask workers (module docstring), in a
    :class:`~leadline.storage.sparse_scratch.SparseScratch`.

    client : a distributed Client, or None (the same graph in this process with Dask's synchronous
        scheduler: tests)
    target_bits : column blocks of about 2^target_bits points
    exchange : "rechunk" or "disk"; default: without a client, and with workers that all run on
        this machine (a local cluster), "disk": the workers share this machine's disk, and
        through it the exchange cost half the workers' CPU time of Dask's rechunk (MaxCut p = 13,
        2 workers: 10.1 s against 21.9 s, docs/performance.md); across machines "rechunk" for every
        transform whose vector, twice (row bands and their rechunked copy), fits in half of the
        workers' memory limits, else "disk" (the workers then exchange through the folder)
    """

    def __init__(self, scratch, *, target_bits: int, client=None, exchange: str | None = None):
        self.io = VectorFiles(scratch, target_bits)
        self.client = client
        self.target_bits = int(target_bits)
        self.exchange = exchange
        if self.exchange not in (None, "rechunk", "disk"):
            raise ValueError(f"exchange must be 'rechunk' or 'disk', got {self.exchange!r}")
        self.passes = 0

    def _compute(self, *things):
        import dask

        if self.client is not None:
            futures = self.client.compute(list(things), retries=3)
            return self.client.gather(futures)
        return list(dask.compute(*things, scheduler="sync"))

    def exchange_for(self, n: int) -> str:
        """How a transform of 2^n points exchanges its halves (see the class docstring)."""
        if self.exchange is not None:
            return self.exchange
        if self.client is None:
            return "disk"
        workers = self.client.scheduler_info().get("workers", {})
        if workers and all(_on_this_machine(w.get("host")) for w in workers.values()):
            return "disk"
        limits = [w.get("memory_limit") or 0 for w in workers.values()]
        if not limits or min(limits) <= 0:
            return "rechunk"
        return "rechunk" if 2 * 16 * 2.0**n / len(limits) <= 0.5 * min(limits) else "disk"

    def transform(self, out, row_func, srcs, out_n, bands, col_func=None):
        import dask
        import dask.array as da

        srcs = [srcs] if isinstance(srcs, str) else list(srcs)
        metas = [self.io.meta(s) for s in srcs]
        mode = self.exchange_for(out_n)
        meta = self.io.create(out, out_n, bands)
        (R, W), (rc, cc) = meta
        task = dask.delayed(_band_task, pure=True)
        if col_func is None or mode == "disk":
            rows_to = out if col_func is None else out + ".rows"
            if col_func is not None:
                self.io.create(rows_to, out_n, bands)
            results = [task(self.io, row_func, srcs, metas, i, bands, rows_to, meta) for i in range(bands)]
            partials = self._compute(*[dask.delayed(_partial)(r) for r in results])
            self.passes += 1
            if col_func is not None:
                col = dask.delayed(_column_task, pure=True)
                self._compute(*[col(self.io, rows_to, out, meta, j, col_func) for j in range(W // cc)])
                self.scratch.delete(rows_to)
                self.passes += 1
            return list(partials)
        results = [task(self.io, row_func, srcs, metas, i, bands, None, meta) for i in range(bands)]
        rows = da.concatenate([da.from_delayed(dask.delayed(_band)(r), shape=(R // bands, W), dtype=complex)
                               for r in results], axis=0)
        cols = rows.rechunk((R, cc)).map_blocks(col_func, dtype=complex, meta=np.empty((0, 0), dtype=complex))
        written = cols.map_blocks(_write_block, self.io, out, meta, chunks=(1, 1), dtype=float,
                                  meta=np.empty((0, 0)))
        partials = self._compute(written, *[dask.delayed(_partial)(r) for r in results])[1:]
        self.passes += 1
        return list(partials)

    def reduce(self, func, src, bands):
        import dask

        meta = self.io.meta(src)
        task = dask.delayed(_reduce_task, pure=True)
        return self._compute(*[task(self.io, func, src, meta, i, bands) for i in range(bands)])


class LocalBandStore(_Protocol):
    """Vector store of a chunked sparse evaluation out of core, in this process, without Dask
    (module docstring): a few I/O threads read the next band and write the previous one while
    this thread computes (the transform's arithmetic and the file I/O overlap).  The column pass
    transforms the output array in place (column blocks are disjoint), so a transform needs no
    second copy on disk; a transform whose output has its source's name overwrites the source
    band by band (``in_place``: the root's transform, which then needs no room beside the largest
    vector).
    """

    in_place = True

    def __init__(self, scratch, *, target_bits: int, io_threads: int = 2):
        from concurrent.futures import ThreadPoolExecutor

        self.io = VectorFiles(scratch, target_bits)
        self.target_bits = int(target_bits)
        self.pool = ThreadPoolExecutor(max_workers=io_threads, thread_name_prefix="sparse-io")
        self.passes = 0

    def close(self):
        self.pool.shutdown(wait=True)

    largest_block = staticmethod(largest_block)

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

    def transform(self, out, row_func, srcs, out_n, bands, col_func=None):
        io = self.io
        srcs = [srcs] if isinstance(srcs, str) else list(srcs)
        metas = [io.meta(s) for s in srcs]
        if out in srcs:  # in place: band i is read before it is overwritten, and no other band reads it
            meta = metas[0]
            (R, W), (rc, cc) = meta
            if srcs != [out] or R * W != 1 << out_n or (R // bands) % rc:
                raise ValueError(f"transform of {out!r} in place needs it as the only source, cut into whole row-chunks")
        else:
            meta = io.create(out, out_n, bands)
        partials = [None] * bands

        def load(i):
            return [io.read_band(s, m, i, bands) for s, m in zip(srcs, metas)]

        def work(i, parts):
            res = row_func(*parts, i)
            band, partials[i] = res if isinstance(res, tuple) else (res, None)
            return band

        def store(i, band):
            io.write_band(out, meta, i, band)
            crash_point("sparse-band-written")

        self._pipeline(bands, load, work, store)
        self.passes += 1
        if col_func is not None:
            (R, W), (rc, cc) = meta
            self._pipeline(W // cc, lambda j: io.read_column(out, meta, j), lambda j, blk: col_func(blk),
                           lambda j, blk: io.write_column(out, meta, j, blk))
            self.passes += 1
        return partials

    def reduce(self, func, src, bands):
        meta = self.io.meta(src)
        out = [None] * bands

        def work(i, x):
            out[i] = func(x, i)

        self._pipeline(bands, lambda i: self.io.read_band(src, meta, i, bands), work, lambda i, r: None)
        return out
