"""The chunk kernel: one pass over the paths of one chunk, forward or backward.

A pass at depth p with exponent matrix M (complex symmetric, (2p+1)x(2p+1))
weighs each path a in {+1,-1}^{2p+1} by

    w(a) = f(a) * exp(-1/2 a^T M a)                (contour layout: contour.py)

and returns moments of w.  The *forward* pass returns G[j,k] = sum_a w a_j a_k.
The *backward* (adjoint) pass, given an adjoint matrix Gbar, returns
Q[j,k] = sum_a w(a) s(a) a_j a_k with s(a) = a^T Gbar a, and for every link t
of the chain the sum D_t = sum_a (d f / d b at link t)(a) exp(...) s(a),
computed without dividing by a link factor (so it stays exact where sin b or
cos b vanishes).

Splitting (see plan.py): the exponent splits into a high-high part, a cross
term sum_k v_k(aH) aL_k whose exponential is a Kronecker product of l
two-vectors, and a low-low part computed once per pass; f splits into the
high chain, the boundary link and the low chain.  A chunk's contribution is a
(2p+2) x (2p+1) complex array: rows 0..2p are the partial moment matrix, row
2p+1 holds D_0..D_{2p-1} (zero in the forward pass).  Partials of all chunks
sum, in any order, to the full pass; callers sum them in chunk order so the
result is bit-for-bit independent of scheduling.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._blocked import chunk_partial_blocked
from ._contour import link_derivative_table, link_table
from ._patterns import chain_derivative_sums, chain_split, high_chain, high_rows, quadratic_split, split_low
from ._plan import ChunkPlan

__all__ = [
    "PassInput",
    "LowSide",
    "prepare_low_side",
    "chunk_partial",
    "pass_partials",
    "run_pass_inprocess",
    "CHUNK_KERNELS",
    "IMPLEMENTATIONS",
    "DEFAULT_IMPLEMENTATION",
    "resolve_implementation",
]


@dataclass(frozen=True, eq=False)
class PassInput:
    """Everything a pass needs; small and picklable (shipped to workers).

    Attributes
    ----------
    p : depth
    M : (2p+1, 2p+1) complex, exponent matrix (Gamma_j Gamma_k xi'(G[j,k]))
    beta : (p,) float, mixing angles (enter through f)
    adjoint : (2p+1, 2p+1) complex or None; None means a forward pass
    """

    p: int
    M: np.ndarray
    beta: np.ndarray
    adjoint: np.ndarray | None = None

    @property
    def backward(self) -> bool:
        return self.adjoint is not None

    def fingerprint(self) -> str:
        """Stable hash of the inputs, used to match checkpointed partial sums."""
        import hashlib

        h = hashlib.sha256()
        h.update(np.int64(self.p).tobytes())
        for arr in (self.M, self.beta, self.adjoint):
            if arr is None:
                h.update(b"none")
            else:
                h.update(np.ascontiguousarray(arr).tobytes())
        return h.hexdigest()[:32]


@dataclass(eq=False)
class LowSide:
    """Per-pass quantities of the low sites, shared by every chunk of the pass.

    All vectors have shape (2^l,), pattern order of contour.sign_patterns.
    """

    plan: ChunkPlan
    exp_ll: np.ndarray  # exp(-1/2 aL^T M_LL aL)
    f_low: np.ndarray  # product of the links inside the low block
    s_ll: np.ndarray | None  # aL^T Gsym_LL aL (backward only)
    links: np.ndarray  # (2p, 2) link table
    dlinks: np.ndarray  # (2p, 2) link derivative table
    extra: dict = field(default_factory=dict)


# --------------------------------------------------------------------------- helpers
def _linear_rows(V: np.ndarray, out: np.ndarray, op: str) -> np.ndarray:
    """Fill ``out`` (c, 2^l) with the Kronecker structure of per-row 2-vectors.

    op == "mul": out[y, x] = prod_k exp(V[y,k] * s_k(x))   (V already holds exp(+v), exp(-v))
    op == "add": out[y, x] = sum_k V[y,k] * s_k(x)
    For "mul", V is a pair (Ep, Em) of (c, l) arrays; for "add", V is (c, l).
    Sites are added last to first so that site 0 ends as the MSB.
    """
    if op == "mul":
        ep, em = V
        c, l = ep.shape
        out[:, 0] = 1.0
        n = 1
        for k in range(l - 1, -1, -1):
            np.multiply(out[:, :n], em[:, k : k + 1], out=out[:, n : 2 * n])
            out[:, :n] *= ep[:, k : k + 1]
            n *= 2
    else:
        c, l = V.shape
        out[:, 0] = 0.0
        n = 1
        for k in range(l - 1, -1, -1):
            np.subtract(out[:, :n], V[:, k : k + 1], out=out[:, n : 2 * n])
            out[:, :n] += V[:, k : k + 1]
            n *= 2
    return out


def bit_sums(W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row totals and signed first moments over the bits of the column index.

    W : (c, 2^l).  Returns total (c,) = sum_x W[:, x] and mom (c, l) with
    mom[:, k] = sum_x W[:, x] s_k(x), s_k = spin of site k (site 0 = MSB).
    Pairwise reduction, about 2 * 2^l additions per row.
    """
    c, N = W.shape
    l = N.bit_length() - 1
    mom = np.empty((c, l), dtype=W.dtype)
    T = W
    for k in range(l - 1, -1, -1):
        Tr = T.reshape(c, 2**k, 2)
        even, odd = Tr[:, :, 0], Tr[:, :, 1]
        mom[:, k] = even.sum(axis=1) - odd.sum(axis=1)
        T = even + odd
    return T[:, 0], mom


def second_moments(u: np.ndarray) -> np.ndarray:
    """S[j,k] = sum_x u(x) s_j(x) s_k(x) for a vector over 2^l patterns; (l, l)."""
    N = u.shape[0]
    l = N.bit_length() - 1
    S = np.empty((l, l), dtype=u.dtype)
    for j in range(l):
        uj = u.reshape(2**j, 2, N // 2 ** (j + 1)).copy()
        uj[:, 1, :] *= -1
        total, mom = bit_sums(uj.reshape(1, N))
        S[j, :] = mom[0]
    return S


# --------------------------------------------------------------------------- low side
def prepare_low_side(inp: PassInput, plan: ChunkPlan) -> LowSide:
    """Quantities of the low sites for one pass; O(2^l) memory and time (plus O(l^2)).

    The quadratic forms and the low chain are built as (2^l1, 2^l2) matrices
    (kernels/exact/_blocked.py: the two halves of the low block plus one small matrix
    product for their coupling); the vectors here are flat views of them.
    """
    p, h = inp.p, plan.n_high
    l1, l2 = split_low(plan.n_low)
    links = link_table(p, inp.beta)
    dlinks = link_derivative_table(p, inp.beta)
    M_ll = np.asarray(inp.M, dtype=complex)[h:, h:]
    q = quadratic_split(M_ll, l1)
    q *= -0.5
    exp_ll = np.exp(q, out=q).reshape(-1)
    f_low = chain_split(links[h:], l1, l2).reshape(-1)
    s_ll = None
    if inp.adjoint is not None:
        Gs = 0.5 * (inp.adjoint + inp.adjoint.T)
        s_ll = quadratic_split(np.asarray(Gs, dtype=complex)[h:, h:], l1).reshape(-1)
    return LowSide(plan, exp_ll, f_low, s_ll, links, dlinks)


# --------------------------------------------------------------------------- chunk kernel
def _high_chain_derivatives(AH: np.ndarray, links: np.ndarray, dlinks: np.ndarray) -> np.ndarray:
    """(c, h-1): 1/2 * prod of high links with link t differentiated (no division)."""
    c, h = AH.shape
    out = np.empty((c, max(h - 1, 0)), dtype=complex)
    same = [AH[:, t] == AH[:, t + 1] for t in range(h - 1)]
    for t in range(h - 1):
        v = np.full(c, 0.5, dtype=complex)
        for k in range(h - 1):
            table = dlinks if k == t else links
            v *= np.where(same[k], table[k, 0], table[k, 1])
        out[:, t] = v
    return out


def _chunk_partial_rowwise(inp: PassInput, plan: ChunkPlan, chunk: int, low: LowSide) -> np.ndarray:
    """Row-by-row kernel: the (c, 2^l) weight array built and reduced elementwise.

    Rows are taken in blocks of at most ``plan.ROWWISE_BLOCK_ENTRIES / 2^l`` so the
    work arrays stay bounded whatever plan it is given; block partials are summed
    in row order.
    """
    from ._plan import ROWWISE_BLOCK_ENTRIES

    AH = high_rows(plan, chunk)  # (c, h)
    step = max(1, ROWWISE_BLOCK_ENTRIES // 2**plan.n_low)
    if AH.shape[0] <= step:
        return _rowwise_block(inp, plan, AH, low)
    out = _rowwise_block(inp, plan, AH[:step], low)
    for start in range(step, AH.shape[0], step):
        out += _rowwise_block(inp, plan, AH[start : start + step], low)
    return out


def _rowwise_block(inp: PassInput, plan: ChunkPlan, AH: np.ndarray, low: LowSide) -> np.ndarray:
    p, h, l = inp.p, plan.n_high, plan.n_low
    n = 2 * p + 1
    N = 2**l
    half = N // 2
    M = np.asarray(inp.M)
    links, dlinks = low.links, low.dlinks
    c = AH.shape[0]
    v = -(AH @ M[:h, h:])  # (c, l) cross coefficients
    # exp(v_k s) = exp(|Re v_k|) * exp(v_k s - |Re v_k|): the two factors of each
    # Kronecker pair then have modulus <= 1 and the row scale is carried in e_hh,
    # so partial products cannot overflow where the full weight does not
    shift = np.abs(v.real)
    e_hh = -0.5 * np.einsum("yi,ij,yj->y", AH, M[:h, :h], AH) + shift.sum(axis=1)
    row = high_chain(AH, links) * np.exp(e_hh)  # (c,)
    last = AH[:, h - 1]
    # boundary link between site h-1 and h: x = aH_last * aL_0
    lb_plus = np.where(last > 0, links[h - 1, 0], links[h - 1, 1])  # aL_0 = +1
    lb_minus = np.where(last > 0, links[h - 1, 1], links[h - 1, 0])  # aL_0 = -1

    W = np.empty((c, N), dtype=complex)
    _linear_rows((np.exp(v - shift), np.exp(-v - shift)), W, "mul")
    W *= low.exp_ll

    out = np.zeros((n + 1, n), dtype=complex)
    if inp.adjoint is None:
        W *= low.f_low
        W[:, :half] *= (row * lb_plus)[:, None]
        W[:, half:] *= (row * lb_minus)[:, None]
        u = W.sum(axis=0)
        total, mom = bit_sums(W)
    else:
        Gs = 0.5 * (inp.adjoint + inp.adjoint.T)
        s_h = np.einsum("yi,ij,yj->y", AH, Gs[:h, :h], AH)
        S = np.empty((c, N), dtype=complex)
        _linear_rows(2.0 * (AH @ Gs[:h, h:]), S, "add")
        S += s_h[:, None]
        S += low.s_ll
        W *= S  # exp parts times s, no chain factors yet
        del S
        # column sums without the low chain (for the low-link derivatives)
        u0 = np.empty(N, dtype=complex)
        u0[:half] = (row * lb_plus) @ W[:, :half]
        u0[half:] = (row * lb_minus) @ W[:, half:]
        W *= low.f_low
        z_plus = W[:, :half].sum(axis=1)
        z_minus = W[:, half:].sum(axis=1)
        W[:, :half] *= lb_plus[:, None]
        W[:, half:] *= lb_minus[:, None]
        total0, mom0 = bit_sums(W)
        total = row * total0
        mom = row[:, None] * mom0
        u = low.f_low * u0
        # link derivatives: high links, boundary link, low links
        D = np.zeros(2 * p, dtype=complex)
        if h > 1:
            dfh = _high_chain_derivatives(AH, links, dlinks)  # (c, h-1)
            D[: h - 1] = (dfh * (np.exp(e_hh) * total0)[:, None]).sum(axis=0)
        dlb_plus = np.where(last > 0, dlinks[h - 1, 0], dlinks[h - 1, 1])
        dlb_minus = np.where(last > 0, dlinks[h - 1, 1], dlinks[h - 1, 0])
        D[h - 1] = (row * (dlb_plus * z_plus + dlb_minus * z_minus)).sum()
        if l > 1:
            D[h:] = chain_derivative_sums(u0, links[h:], dlinks[h:])
        out[n, : 2 * p] = D

    out[:h, :h] = AH.T @ (total[:, None] * AH)
    hl = AH.T @ mom
    out[:h, h:n] = hl
    out[h:n, :h] = hl.T
    out[h:n, h:n] = second_moments(u)
    return out


def _chunk_partial_blocked(inp: PassInput, plan: ChunkPlan, chunk: int, low: LowSide) -> np.ndarray:
    return chunk_partial_blocked(inp, plan, chunk, low)


# --------------------------------------------------------------------------- implementations
#: chunk kernels by name, each ``(inp, plan, chunk, low) -> (2p+2, 2p+1)``; all return the
#: same partials to rounding (tests/test_kernel_impls.py checks every one against the
#: dense reference and against each other).
CHUNK_KERNELS = {
    "rowwise": _chunk_partial_rowwise,  # elementwise numpy over a (rows, 2^l) array
    "blocked": _chunk_partial_blocked,  # three complex GEMMs per path visit (kernels/exact/_blocked.py)
}
#: used when no implementation is named; the environment variable overrides it
DEFAULT_IMPLEMENTATION = "blocked"
#: environment variable naming the implementation (also seen by Dask workers it is set for)
IMPLEMENTATION_ENV = "LEADLINE_KERNEL"


def resolve_implementation(impl: str | None = None) -> str:
    """Name of the chunk kernel to use: ``impl``, else $LEADLINE_KERNEL, else the default."""
    import os

    name = impl or os.environ.get(IMPLEMENTATION_ENV) or DEFAULT_IMPLEMENTATION
    if name not in CHUNK_KERNELS:
        raise ValueError(f"unknown kernel implementation {name!r}; choose one of {sorted(CHUNK_KERNELS)}")
    return name


def chunk_partial(
    inp: PassInput, plan: ChunkPlan, chunk: int, low: LowSide | None = None, impl: str | None = None
) -> np.ndarray:
    """Contribution of one chunk to a pass: (2p+2, 2p+1) complex (see module docstring).

    ``impl`` names the kernel (:data:`CHUNK_KERNELS`); see :func:`resolve_implementation`.
    """
    if low is None:
        low = prepare_low_side(inp, plan)
    return _scaled(CHUNK_KERNELS[resolve_implementation(impl)](inp, plan, int(chunk), low), plan)


def _scaled(partial: np.ndarray, plan: ChunkPlan) -> np.ndarray:
    """A chunk's partial as its share of the whole pass: doubled under the global flip.

    w(-a) = w(a), and every moment the pass returns (a_j a_k, s(a), the link
    derivatives) is even in a, so the unvisited mirrored half contributes the
    same again.  Multiplying by 2 is exact, so results do not depend on where
    it happens.
    """
    if plan.flip:
        partial *= 2.0
    return partial


def pass_partials(inp: PassInput, plan: ChunkPlan, chunks, impl: str | None = None) -> list[np.ndarray]:
    """Partials of several chunks of one pass, sharing one low-side computation.

    This is the unit of work an executor ships to a worker.
    """
    kernel = CHUNK_KERNELS[resolve_implementation(impl)]
    low = prepare_low_side(inp, plan)
    return [_scaled(kernel(inp, plan, int(k), low), plan) for k in chunks]


def run_pass_inprocess(inp: PassInput, plan: ChunkPlan, progress=None, impl: str | None = None) -> np.ndarray:
    """Whole pass in this process; partials summed in chunk order."""
    kernel = CHUNK_KERNELS[resolve_implementation(impl)]
    low = prepare_low_side(inp, plan)
    n = 2 * inp.p + 1
    acc = np.zeros((n + 1, n), dtype=complex)
    for k in range(plan.n_chunks):
        acc += _scaled(kernel(inp, plan, k, low), plan)
        if progress is not None:
            progress(1)
    return acc


def _run_pass_with(name: str):
    def run_pass(inp: PassInput, plan: ChunkPlan, progress=None) -> np.ndarray:
        return run_pass_inprocess(inp, plan, progress, impl=name)

    run_pass.__name__ = f"run_pass_{name}"
    run_pass.__qualname__ = run_pass.__name__
    return run_pass


#: in-process ``run_pass(inp, plan)`` callables, one per implementation (for tests and benchmarks)
IMPLEMENTATIONS = {name: _run_pass_with(name) for name in CHUNK_KERNELS}
