"""Finite-size cross-check: exact instance sampling and a statevector QAOA.

The model is the one of :mod:`leadline.kernels.mixture`, sampled exactly as
defined, repeated indices included:

    H(z) = sum_q c_q n^{-(q-1)/2} sum_{i1..iq} J_{i1..iq} z_i1 ... z_iq,
    J iid N(0, 1),  w_q = c_q^2,  so that  E[H(z) H(z')] = n xi(R)  exactly.

Exact sampler.  Since z_i^2 = 1, an ordered tuple contributes the product of
z over the set S of indices occurring an odd number of times.  Tuples with
different S use disjoint (independent) couplings, so

    H(z) = sum_{S subset [n]} K_S prod_{i in S} z_i,
    K_S  ~ N(0, v_|S|) independent,
    v_s  = sum_q w_q n^{-(q-1)} N(q, s, n),

where N(q, s, n) is the number of length-q sequences over n letters in which
exactly a given set of s letters occurs an odd number of times,
N(q, s, n) = q! [x^q] sinh(x)^s cosh(x)^(n-s).  Expanding sinh and cosh in
exponentials gives the integer formula used here,

    N(q, s, n) = 2^{-n} sum_{i=0..s} sum_{l=0..n-s} (-1)^i C(s,i) C(n-s,l) (n - 2i - 2l)^q.

The diagonal of H over all 2^n basis states is then the (unnormalized)
Walsh-Hadamard transform of K, O(n 2^n).

State convention: basis index x in [0, 2^n), bit j of x is qubit j, and a set
bit means spin z_j = -1 (the same "set bit = -1" rule as
:func:`leadline.kernels.exact.sign_patterns`).  The QAOA state is

    |g, b> = prod_{t=1..p} exp(-i b_t B) exp(-i g_t H) |+>^n,  B = sum_j X_j,

with t = 1 acting first, and the reported energy density is <g,b|H|g,b> / n,
whose n -> infinity limit (averaged over instances) is V_p of
:func:`leadline.kernels.exact.evaluate` (Farhi, Goldstone, Gutmann, Zhou,
Quantum 6, 759 (2022); Basso, Gamarnik, Mei, Zhou, FOCS 2022).

Pure numerics: the caller passes a seeded ``numpy.random.Generator``; there is
no I/O here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..mixture import Mixture

__all__ = [
    "MAX_SPINS",
    "odd_set_count",
    "subset_variances",
    "walsh_hadamard",
    "sample_couplings",
    "sample_diagonal",
    "qaoa_state",
    "apply_phase",
    "mix_qubit",
    "energy_density",
    "FiniteSizeEstimate",
    "estimate_energy_density",
]

#: Largest n the statevector routines accept (2^24 complex128 = 256 MiB per state).
MAX_SPINS = 24


def odd_set_count(q: int, s: int, n: int) -> int:
    """N(q, s, n): length-q sequences over n letters whose odd-multiplicity letters are a given s-set.

    Exact integer, q! [x^q] sinh(x)^s cosh(x)^(n-s).  Zero unless s <= q,
    s <= n and s = q (mod 2).
    """
    if not (0 <= s <= n) or q < 0:
        raise ValueError(f"need 0 <= s <= n and q >= 0, got q={q}, s={s}, n={n}")
    if s > q or (q - s) % 2:
        return 0
    total = 0
    for i in range(s + 1):
        ci = math.comb(s, i) * (-1 if i % 2 else 1)
        for l in range(n - s + 1):
            total += ci * math.comb(n - s, l) * (n - 2 * i - 2 * l) ** q
    count, remainder = divmod(total, 2**n)
    assert remainder == 0, "sinh/cosh expansion must give an integer count"
    return count


def subset_variances(mixture: Mixture, n: int) -> np.ndarray:
    """Variance v_s of the coefficient K_S for each subset size s = 0..n.

    Returns
    -------
    ndarray, shape (n+1,), float64
        v_s = sum_q w_q n^{-(q-1)} N(q, s, n); zero for s > qmax.
    """
    v = np.zeros(n + 1)
    for q, w in mixture.terms:
        for s in range(min(q, n) + 1):
            count = odd_set_count(q, s, n)
            if count:
                v[s] += w * count / float(n) ** (q - 1)
    return v


def walsh_hadamard(values: np.ndarray) -> np.ndarray:
    """Unnormalized Walsh-Hadamard transform along the last axis.

    out[..., x] = sum_S values[..., S] (-1)^{popcount(S & x)}.  The last axis
    must have length 2^n.  Returns a new array (float64 or complex128 as input).
    """
    out = np.array(values, copy=True)
    size = out.shape[-1]
    n = size.bit_length() - 1
    if size != 1 << n:
        raise ValueError(f"last axis must have length 2^n, got {size}")
    lead = out.shape[:-1]
    for j in range(n):
        view = out.reshape(*lead, size >> (j + 1), 2, 1 << j)
        low = view[..., 0, :].copy()
        view[..., 0, :] += view[..., 1, :]
        view[..., 1, :] = low - view[..., 1, :]
    return out


def _popcounts(n: int) -> np.ndarray:
    return np.bitwise_count(np.arange(1 << n, dtype=np.uint32)).astype(np.intp)


def _check_spins(n: int) -> None:
    if not isinstance(n, (int, np.integer)) or not 1 <= n <= MAX_SPINS:
        raise ValueError(f"number of spins must be an integer in 1..{MAX_SPINS}, got {n!r}")


def sample_couplings(mixture: Mixture, n: int, rng: np.random.Generator) -> np.ndarray:
    """One instance as its Walsh coefficients K_S, S encoded as an n-bit mask.

    Returns
    -------
    ndarray, shape (2^n,), float64
        K[S] ~ N(0, v_popcount(S)) independent; zero where v vanishes.
    """
    _check_spins(n)
    sd = np.sqrt(subset_variances(mixture, n))[_popcounts(n)]
    support = np.flatnonzero(sd)
    K = np.zeros(1 << n)
    K[support] = rng.standard_normal(support.size) * sd[support]
    return K


def sample_diagonal(mixture: Mixture, n: int, rng: np.random.Generator) -> np.ndarray:
    """One instance's cost H(z) on all 2^n basis states.

    Returns
    -------
    ndarray, shape (2^n,), float64
        H[x] with z_j = -1 where bit j of x is set; E[H[x] H[y]] = n xi(R(x, y)).
    """
    return walsh_hadamard(sample_couplings(mixture, n, rng))


def _angles(gamma, beta) -> tuple[np.ndarray, np.ndarray]:
    g = np.asarray(gamma, dtype=float)
    b = np.asarray(beta, dtype=float)
    if g.shape != b.shape or g.ndim not in (1, 2) or g.shape[-1] < 1:
        raise ValueError(f"gamma and beta must have equal shape (p,) or (m, p), got {g.shape} and {b.shape}")
    if not (np.all(np.isfinite(g)) and np.all(np.isfinite(b))):
        raise ValueError("angles must be finite")
    return g, b


def qaoa_state(diagonal: np.ndarray, gamma, beta) -> np.ndarray:
    """The QAOA statevector prod_t exp(-i b_t B) exp(-i g_t H) |+>^n (t = 1 first).

    Parameters
    ----------
    diagonal : ndarray, shape (2^n,), float64
        H on the computational basis (see :func:`sample_diagonal`).
    gamma, beta : array_like, shape (p,) or (m, p), float, radians
        One angle set, or m angle sets evaluated together (vectorized).

    Returns
    -------
    ndarray, complex128, shape (2^n,) or (m, 2^n)
    """
    g, b = _angles(gamma, beta)
    batched = g.ndim == 2
    g2 = g if batched else g[None, :]
    b2 = b if batched else b[None, :]
    size = diagonal.shape[-1]
    n = size.bit_length() - 1
    if diagonal.ndim != 1 or size != 1 << n:
        raise ValueError("diagonal must be a 1-d array of length 2^n")
    m, p = g2.shape
    psi = np.full((m, size), 2.0 ** (-n / 2), dtype=complex)
    for t in range(p):
        apply_phase(psi, diagonal, g2[:, t])
        for j in range(n):
            mix_qubit(psi, j, b2[:, t])
    return psi if batched else psi[0]


#: elements touched per numpy call in the in-place layer routines (bounds their temporaries)
LAYER_BLOCK = 1 << 18


def apply_phase(psi: np.ndarray, diagonal: np.ndarray, gamma, block: int = LAYER_BLOCK) -> None:
    """In place: psi <- exp(-i gamma H) psi, H diagonal; temporaries bounded by ``block`` amplitudes.

    psi : complex128, shape (2^n,) or (m, 2^n); gamma : scalar, or shape (m,) for batched psi.
    """
    g = np.atleast_1d(np.asarray(gamma, dtype=float))[:, None]
    rows = psi if psi.ndim == 2 else psi[None, :]
    size = rows.shape[-1]
    step = max(1, block // rows.shape[0])
    for k in range(0, size, step):
        rows[:, k : k + step] *= np.exp(-1j * g * diagonal[k : k + step])


def mix_qubit(psi: np.ndarray, j: int, beta, block: int = LAYER_BLOCK) -> None:
    """In place: psi <- exp(-i beta X_j) psi = (cos beta - i sin beta X_j) psi on qubit j (bit j).

    psi : complex128, shape (2^n,) or (m, 2^n); beta : scalar, or shape (m,) for batched psi.
    Temporaries are bounded by ``block`` amplitudes, so a 2^26 state needs no second copy.
    """
    b = np.atleast_1d(np.asarray(beta, dtype=float))[:, None, None]
    c, s = np.cos(b), -1j * np.sin(b)
    rows = psi if psi.ndim == 2 else psi[None, :]
    m, size = rows.shape
    inner = 1 << j
    view = rows.reshape(m, size >> (j + 1), 2, inner)
    row_step = max(1, block // (m * inner))
    col_step = inner if m * inner <= block else max(1, block // m)
    for k in range(0, view.shape[1], row_step):
        for l in range(0, inner, col_step):
            low = view[:, k : k + row_step, 0, l : l + col_step]
            high = view[:, k : k + row_step, 1, l : l + col_step]
            saved = low.copy()
            low *= c
            low += s * high
            high *= c
            high += s * saved


def energy_density(diagonal: np.ndarray, gamma, beta) -> np.ndarray | float:
    """<g,b|H|g,b> / n for one instance; float, or shape (m,) for (m, p) angles."""
    n = diagonal.shape[-1].bit_length() - 1
    psi = qaoa_state(diagonal, gamma, beta)
    values = (np.abs(psi) ** 2) @ diagonal / n
    return float(values) if np.ndim(values) == 0 else values


@dataclass
class FiniteSizeEstimate:
    """Instance average of the energy density at one n.

    mean       : float, or (m,) for m angle sets -- average of <H>/n over instances
    std_error  : same shape -- sample standard deviation / sqrt(instances)
    values     : (instances,) or (instances, m) -- the per-instance energy densities
    """

    n: int
    instances: int
    mean: float | np.ndarray
    std_error: float | np.ndarray
    values: np.ndarray = field(repr=False)


def estimate_energy_density(
    mixture: Mixture,
    n: int,
    gamma,
    beta,
    instances: int,
    rng: np.random.Generator,
    *,
    keep_constant: bool = False,
) -> FiniteSizeEstimate:
    """Average <H>/n over independent instances drawn with ``rng``.

    Parameters
    ----------
    mixture : Mixture
    n : int, 1..MAX_SPINS
    gamma, beta : array_like, shape (p,) or (m, p), radians
    instances : int >= 2
    rng : numpy.random.Generator (seeded by the caller)
    keep_constant : bool
        Even powers q give H a constant term K_empty (the tuples in which
        every index occurs an even number of times), with mean 0 and
        variance sum_{q even} w_q n^{-(q-1)} N(q, 0, n) = O(1).  It is
        independent of every other coupling and only changes the global
        phase of the state, so dropping it (the default) leaves the
        expectation of the estimator unchanged and removes its O(1/n)
        contribution to the spread between instances.  With True, the
        per-instance values are the plain <H>/n of the sampled instance.
        Each instance is sampled in full either way (same random stream).
    """
    _check_spins(n)
    if instances < 2:
        raise ValueError("need at least 2 instances for a standard error")
    _angles(gamma, beta)
    values = []
    for _ in range(instances):
        couplings = sample_couplings(mixture, n, rng)
        if not keep_constant:
            couplings[0] = 0.0
        values.append(energy_density(walsh_hadamard(couplings), gamma, beta))
    values = np.array(values)
    mean = values.mean(axis=0)
    err = values.std(axis=0, ddof=1) / math.sqrt(instances)
    if values.ndim == 1:
        mean, err = float(mean), float(err)
    return FiniteSizeEstimate(n=n, instances=instances, mean=mean, std_error=err, values=values)
