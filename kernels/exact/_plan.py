"""The one place where a pass over the 2^(2p+1) paths is cut into chunks.

A path a = (aH, aL) is split into h "high" contour sites (positions 0..h-1)
and l = 2p+1-h "low" sites (positions h..2p).  A chunk is a contiguous block
of ``rows_per_chunk`` high patterns; within a chunk every high pattern meets
all 2^l low patterns.

Global flip (``flip=True``, the default of :func:`plan_chunks`): the path
weight and every moment a pass returns are even under a -> -a, so only the
high patterns whose first site is +1 (pattern index below 2^(h-1)) are
enumerated and each chunk's partial is doubled (exact: a power of two).  The
chunk count halves and each chunk is still a whole contribution of its own.  Work per chunk is ~rows * 2^l complex multiply-adds,
memory ~ MATRICES_PER_CHUNK * rows * 2^l * 16 bytes plus a few low-side
vectors of 2^l entries.

The same :class:`ChunkPlan` is used by the in-process loop, the Dask executor,
the checkpoint ledger and resume, so it is a frozen, JSON-able value.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

__all__ = [
    "ChunkPlan",
    "plan_chunks",
    "DEFAULT_MEMORY_BUDGET",
    "estimate_chunk_bytes",
    "evaluation_path_visits",
    "step_plans",
]

#: default memory budget for one chunk task, bytes (fits a laptop worker)
DEFAULT_MEMORY_BUDGET = 256 * 2**20

#: complex (c x 2^l) work arrays alive at once in the backward row kernel
MATRICES_PER_CHUNK = 5
#: complex 2^l vectors alive at once on the low side (context + temporaries)
LOW_VECTORS = 10
#: the row kernel works on at most this many complex entries (rows x 2^l) at a time
ROWWISE_BLOCK_ENTRIES = 2**22
#: blocked kernel: complex 2^l vectors alive at once (low side E, F, B, B s, s and the
#: per-chunk column sums and their temporaries; measured with tracemalloc, see
#: benchmarks/bench_kernel.py)
BLOCKED_LOW_VECTORS = 12
#: blocked kernel: complex (rows x (2^l1 + 2^l2)) arrays alive at once (Kronecker
#: factors, products, marginals; backward pass)
BLOCKED_ROW_ARRAYS = 14
#: blocked kernel: rows per chunk the planner aims at.  Rows are the shared dimension
#: of the column-sum product (R^T K2) and the row count of the two others; 256 keeps
#: zgemm near its peak while a pass still splits into several tasks (benchmarks)
BLOCKED_ROWS_TARGET = 256
#: bytes of one complex128 number
_C16 = 16


def _default_impl(impl: str | None) -> str:
    if impl is not None:
        return impl
    import os

    return os.environ.get("LEADLINE_KERNEL") or "blocked"


@dataclass(frozen=True)
class ChunkPlan:
    """How one pass is split: ``n_high`` high sites, blocks of ``rows_per_chunk`` rows.

    ``p`` is the depth of the contour the pass runs on (2p+1 sites); in the
    growing-contour iteration that is the step m, not the depth of the
    evaluation.  ``flip``: only half of the high patterns are enumerated
    (module docstring).
    """

    p: int
    n_high: int
    rows_per_chunk: int
    flip: bool = False

    def __post_init__(self) -> None:
        n = 2 * self.p + 1
        if self.p < 1:
            raise ValueError("depth p must be >= 1")
        if not 1 <= self.n_high <= n - 1:
            raise ValueError(f"n_high must be in 1..{n - 1} for p = {self.p}, got {self.n_high}")
        r = self.rows_per_chunk
        top = 2 ** self.n_rows_bits
        if r < 1 or r & (r - 1) or r > top:
            raise ValueError(
                f"rows_per_chunk must be a power of two <= {top} "
                f"(2^n_high{' / 2 with the flip' if self.flip else ''}), got {r}"
            )

    @property
    def n_rows_bits(self) -> int:
        """log2 of the number of high patterns enumerated (n_high, one less with the flip)."""
        return self.n_high - 1 if self.flip else self.n_high

    @property
    def n_sites(self) -> int:
        return 2 * self.p + 1

    @property
    def n_low(self) -> int:
        return self.n_sites - self.n_high

    @property
    def n_chunks(self) -> int:
        return 2**self.n_rows_bits // self.rows_per_chunk

    @property
    def n_paths(self) -> int:
        """Paths of the contour, 2^(2p+1)."""
        return 2**self.n_sites

    @property
    def path_visits(self) -> int:
        """Paths the pass actually enumerates (half of them with the flip)."""
        return self.n_paths >> 1 if self.flip else self.n_paths

    @property
    def partial_scale(self) -> float:
        """Factor on every chunk partial: 2 with the flip (the mirrored half), else 1."""
        return 2.0 if self.flip else 1.0

    def rows(self, chunk: int) -> tuple[int, int]:
        """Half-open range [start, stop) of high-pattern indices in ``chunk``."""
        if not 0 <= chunk < self.n_chunks:
            raise IndexError(f"chunk {chunk} out of range 0..{self.n_chunks - 1}")
        start = chunk * self.rows_per_chunk
        return start, start + self.rows_per_chunk

    def chunk_bytes(self, impl: str | None = None) -> int:
        return estimate_chunk_bytes(self.n_low, self.rows_per_chunk, impl=impl)

    def to_json(self) -> dict:
        return asdict(self)

    @classmethod
    def from_json(cls, data: dict) -> "ChunkPlan":
        """Inverse of :meth:`to_json`; a plan written before the flip existed has none."""
        return cls(int(data["p"]), int(data["n_high"]), int(data["rows_per_chunk"]), bool(data.get("flip", False)))


def estimate_chunk_bytes(n_low: int, rows: int, impl: str | None = None) -> int:
    """Peak bytes of one chunk kernel call (backward pass, the larger one).

    ``impl`` is the kernel implementation (default: $LEADLINE_KERNEL or "blocked").
    """
    N = 2**n_low
    if _default_impl(impl) == "rowwise":
        rows_at_once = min(rows, max(1, ROWWISE_BLOCK_ENTRIES // N))
        return _C16 * N * (MATRICES_PER_CHUNK * rows_at_once + LOW_VECTORS)
    l2 = n_low // 2
    l1 = n_low - l2
    return _C16 * (BLOCKED_LOW_VECTORS * N + BLOCKED_ROW_ARRAYS * rows * (2**l1 + 2**l2))


def plan_chunks(
    p: int,
    memory_budget: int = DEFAULT_MEMORY_BUDGET,
    *,
    n_high: int | None = None,
    rows_per_chunk: int | None = None,
    min_rows: int = 16,
    max_low: int = 20,
    impl: str | None = None,
    flip: bool = True,
) -> ChunkPlan:
    """Pick the high/low split and chunk size for depth ``p`` within ``memory_budget`` bytes.

    Blocked kernel (default): the path index is cut in three nearly equal parts
    (high rows, and the two halves of the low block), so the three matrix
    products of a chunk are as square as possible; chunks of
    ``BLOCKED_ROWS_TARGET`` rows.  Row kernel: the low side is made as large
    as the budget allows while a chunk keeps at least ``min_rows`` rows.  In
    both, never more than ``max_low`` low sites.  Explicit ``n_high`` /
    ``rows_per_chunk`` override the choice (tests use the smallest and largest
    plans).  ``flip`` (default) enumerates half of the high patterns.
    """
    n = 2 * p + 1
    if p < 1:
        raise ValueError("depth p must be >= 1")
    kind = _default_impl(impl)

    def fits(n_low: int, rows: int) -> bool:
        return estimate_chunk_bytes(n_low, rows, impl=kind) <= memory_budget

    if kind == "rowwise":
        if n_high is None:
            n_low = min(n - 1, max_low)
            while n_low > 1 and not fits(n_low, min(min_rows, 2 ** (n - n_low))):
                n_low -= 1
            n_high = n - n_low
        n_low = n - n_high
        if rows_per_chunk is None:
            rows = 2 ** (n_high - flip)
            while rows > 1 and not fits(n_low, rows):
                rows //= 2
            rows_per_chunk = rows
        return ChunkPlan(p, n_high, rows_per_chunk, flip)

    if n_high is None:
        h = max(1, n - max_low, -(-n // 3))
        h = min(h, n - 1)
        while h < n - 1 and not fits(n - h, min(BLOCKED_ROWS_TARGET, 2**h)):
            h += 1
        n_high = h
    n_low = n - n_high
    if rows_per_chunk is None:
        rows = min(2 ** (n_high - flip), BLOCKED_ROWS_TARGET)
        while rows > 1 and not fits(n_low, rows):
            rows //= 2
        rows_per_chunk = rows
    return ChunkPlan(p, n_high, rows_per_chunk, flip)


def step_plans(final: ChunkPlan, impl: str | None = None):
    """Chunk plans of the steps m = 1..p of a growing-contour evaluation, as ``plan_for(m)``.

    Step p (the full contour) uses ``final``; a smaller step m gets
    :func:`plan_chunks` for depth m with ``final``'s flip, under a budget of
    ``final``'s own per-chunk bytes, so no step needs more memory per chunk
    than the last one.
    """
    budget = final.chunk_bytes(impl)

    def plan_for(m: int) -> ChunkPlan:
        if m == final.p:
            return final
        return plan_chunks(m, budget, impl=impl, flip=final.flip)

    return plan_for


def evaluation_path_visits(p: int, method: str = "growing") -> int:
    """Path visits of one forward evaluation of V_p (the cost users are shown).

    ``"growing"``: step m = 1..p is a pass over the 2^(2m+1) paths of a depth-m
    contour, and the global flip a -> -a halves each pass:
    sum_m 2^(2m) = (4/3)(4^p - 1) ~ (2/3) 2^(2p+1).
    ``"full"``: the baseline, p passes over all 2^(2p+1) paths.
    A gradient adds about the same again (one adjoint pass per step).
    """
    if p < 1:
        raise ValueError("depth p must be >= 1")
    if method == "full":
        return p * 2 ** (2 * p + 1)
    if method == "growing":
        return sum(2 ** (2 * m) for m in range(1, p + 1))
    raise ValueError(f"unknown method {method!r} (growing or full)")
