"""A concrete cost function on n spins: parsing, its empirical mixture, and the exact QAOA on it.

An instance is

    C(z) = constant + sum_S w_S prod_{i in S} z_i,     z in {+1,-1}^n,

a weighted sum over distinct, non-empty index sets S (the terms), to be
MAXIMIZED.  Two spellings are read, both pure text handed in by the caller
(no file access here):

* plain text, one term per line: the weight, then the 0-based spin indices of
  the term; ``#`` starts a comment; a weight alone is a constant;
* JSON (version 1)::

      {"format": "leadline.instance", "version": 1,
       "n": 4,                                   # optional, >= 1 + largest index
       "terms": [{"weight": 1.0, "spins": [0, 1]},
                 {"weight": -0.5, "spins": []}]}   # empty spins: a constant

Terms with the same index set (in any order) are merged; a term whose weights
cancel is dropped.

Empirical mixture.  Flip the sign of every term independently at random:
E_sign[C(z) C(z')] = sum_S w_S^2 prod_{i in S} z_i z'_i.  When the terms of
order q spread over the spins, the average of prod_{i in S} z_i z'_i over them
is about R^q (R the overlap of z and z'), so the instance looks like the
ensemble with E[H(z) H(z')] = n xi(R) for

    xi(x) = sum_q w_q x^q,     w_q = (1/n) sum_{|S| = q} w_S^2,

the normalization of :mod:`leadline.kernels.mixture` (exact at R = 1).

Statevector.  Basis index x in [0, 2^n), bit j set means z_j = -1 (as in
:mod:`leadline.kernels.finite_size`), and

    |g, b> = prod_{t=1..p} exp(-i b_t sum_j X_j) exp(-i g_t C) |+>^n,   t = 1 first.
"""

from __future__ import annotations

import json
import math
import time
from collections import deque
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ._statevector import apply_phase, mix_qubit, walsh_hadamard
from ..mixture import WEIGHT_MAX, WEIGHT_MIN, Mixture, MixtureError
from ..numtext import parse_float, parse_int

__all__ = [
    "FORMAT",
    "VERSION",
    "MAX_STATEVECTOR_SPINS",
    "DEFAULT_STATEVECTOR_SPINS",
    "MAX_INDEX",
    "InstanceError",
    "Instance",
    "SparseStructure",
    "parse_instance",
    "parse_instance_text",
    "parse_instance_json",
    "empirical_mixture",
    "shape_distance",
    "girth",
    "instance_diagonal",
    "statevector_bytes",
    "StatevectorCheck",
    "statevector_check",
    "evolve",
    "Rescaling",
    "rescale_angles",
    "sparse_reference",
    "sparse_prediction",
]

FORMAT = "leadline.instance"
VERSION = 1
#: hard limit of the exact check (2^26 complex128 = 1 GiB state, 1.5 GiB with the diagonal)
MAX_STATEVECTOR_SPINS = 26
#: default limit of the exact check (2^24: 384 MiB)
DEFAULT_STATEVECTOR_SPINS = 24
#: largest spin index accepted (an index sets n, and the mixture divides by n)
MAX_INDEX = 100_000_000


class InstanceError(ValueError):
    """An instance that cannot be used; the message says where and why (one line)."""


@dataclass(frozen=True)
class SparseStructure:
    """Every spin in exactly ``degree`` terms, all of order ``q``, all weights +-``magnitude``."""

    q: int
    degree: int
    magnitude: float
    terms: int


@dataclass
class Instance:
    """C(z) = constant + sum over ``terms`` {sorted index tuple: weight} (no zero weights).

    n : number of spins (indices 0..n-1; a spin in no term is allowed, it stays in |+>)
    """

    n: int
    terms: dict
    constant: float = 0.0

    def scaled(self, c: float) -> "Instance":
        """Every weight (and the constant) times c."""
        return Instance(self.n, {S: c * w for S, w in self.terms.items()}, c * self.constant)

    def orders(self) -> dict:
        """{q: number of terms of order q}."""
        out: dict = {}
        for S in self.terms:
            out[len(S)] = out.get(len(S), 0) + 1
        return dict(sorted(out.items()))

    def sparse_structure(self) -> SparseStructure | None:
        """The (q, D, |w|) of a sparse instance, or None (see :class:`SparseStructure`)."""
        orders = self.orders()
        if len(orders) != 1:
            return None
        (q,) = orders
        weights = np.abs(np.fromiter(self.terms.values(), dtype=float))
        magnitude = float(weights[0])
        if not np.allclose(weights, magnitude, rtol=1e-12, atol=0):
            return None
        counts = np.zeros(self.n, dtype=np.int64)
        for S in self.terms:
            counts[list(S)] += 1
        if counts.min() != counts.max() or counts[0] == 0:
            return None
        return SparseStructure(q=q, degree=int(counts[0]), magnitude=magnitude, terms=len(self.terms))

    def edges(self) -> list:
        """Index pairs of the order-2 terms."""
        return [S for S in self.terms if len(S) == 2]

    def to_json(self) -> dict:
        terms = [{"weight": float(w), "spins": list(S)} for S, w in self.terms.items()]
        if self.constant:
            terms.append({"weight": float(self.constant), "spins": []})
        return {"format": FORMAT, "version": VERSION, "n": int(self.n), "terms": terms}


# --------------------------------------------------------------------------- parsing
def _weight(value, where: str) -> float:
    """A weight: ASCII decimal text (plain-text files) or a JSON number (never a JSON string)."""
    if isinstance(value, bool):
        raise InstanceError(f"{where}: weight {value!r} is not a number")
    try:
        w = parse_float(value) if isinstance(value, str) else float(value)
    except (TypeError, ValueError, OverflowError):
        raise InstanceError(f"{where}: weight {value!r} is not a number (ASCII decimal notation such as 1.5 or -2e-3)") from None
    if not math.isfinite(w):
        raise InstanceError(f"{where}: weight {value!r} is not finite")
    return w


def _index(value, where: str) -> int:
    if isinstance(value, bool):
        raise InstanceError(f"{where}: spin index {value!r} is not a whole number")
    if isinstance(value, str):
        try:
            i = parse_int(value)
        except ValueError:
            raise InstanceError(f"{where}: spin index {value!r} is not a whole number (ASCII digits)") from None
    elif isinstance(value, (int, np.integer)):
        i = int(value)
    else:
        raise InstanceError(f"{where}: spin index {value!r} is not a whole number")
    if i < 0:
        raise InstanceError(f"{where}: spin index {i} is negative (indices start at 0)")
    if i > MAX_INDEX:
        raise InstanceError(f"{where}: spin index {i} is larger than {MAX_INDEX}")
    return i


def _build(entries, n_declared, source: str) -> Instance:
    """entries: iterable of (where, weight, [indices]) -> merged Instance."""
    terms: dict = {}
    constant = 0.0
    seen_any = False
    largest = -1
    for where, w, indices in entries:
        seen_any = True
        if len(set(indices)) != len(indices):
            dup = next(i for i in indices if indices.count(i) > 1)
            raise InstanceError(f"{where}: spin {dup} appears twice in one term (z_i^2 = 1: remove the pair)")
        if not indices:
            constant += w
            continue
        key = tuple(sorted(indices))
        largest = max(largest, key[-1])
        terms[key] = terms.get(key, 0.0) + w
    if not seen_any:
        raise InstanceError(f"{source}: the instance is blank (no terms)")
    terms = {S: w for S, w in terms.items() if w != 0.0}
    if not terms:
        raise InstanceError(f"{source}: the instance has no term with spins (only constants, or weights that cancel)")
    n = largest + 1
    if n_declared is not None:
        if n_declared < n:
            raise InstanceError(f"{source}: \"n\" is {n_declared} but spin index {largest} occurs")
        n = n_declared
    return Instance(n=n, terms=terms, constant=constant)


def parse_instance_text(text: str, source: str = "instance") -> Instance:
    """Plain-text instance (see the module docstring); InstanceError names file and line."""

    def entries():
        for number, line in enumerate(text.splitlines(), start=1):
            body = line.split("#", 1)[0].split()
            if not body:
                continue
            where = f"{source}, line {number}"
            yield where, _weight(body[0], where), [_index(tok, where) for tok in body[1:]]

    return _build(entries(), None, source)


def parse_instance_json(data, source: str = "instance") -> Instance:
    """JSON instance (already decoded); checks format, version and every key."""
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise InstanceError(f"{source}: JSON instance needs \"format\": \"{FORMAT}\"")
    if data.get("version") != VERSION:
        raise InstanceError(f"{source}: instance version {data.get('version')!r}; this leadline reads version {VERSION}")
    unknown = set(data) - {"format", "version", "n", "terms", "name"}
    if unknown:
        raise InstanceError(f"{source}: unknown keys {', '.join(sorted(unknown))}")
    n = data.get("n")
    if n is not None:
        if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= MAX_INDEX + 1:
            raise InstanceError(f"{source}: \"n\" must be a whole number >= 1, got {n!r}")
    terms = data.get("terms")
    if not isinstance(terms, list):
        raise InstanceError(f"{source}: \"terms\" must be a list of {{\"weight\": w, \"spins\": [i, ...]}}")

    def entries():
        for k, term in enumerate(terms):
            where = f"{source}, term {k}"
            if not isinstance(term, dict) or set(term) != {"weight", "spins"} or not isinstance(term["spins"], list):
                raise InstanceError(f"{where}: each term is {{\"weight\": w, \"spins\": [i, ...]}}")
            weight, spins = term["weight"], term["spins"]
            if isinstance(weight, str) or any(isinstance(i, str) for i in spins):
                raise InstanceError(f"{where}: weights and spin indices are JSON numbers, not strings (got {json.dumps(term)})")
            yield where, _weight(weight, where), [_index(i, where) for i in spins]

    return _build(entries(), n, source)


def parse_instance(text: str, source: str = "instance") -> Instance:
    """JSON when the first non-blank character is '{', plain text otherwise."""
    if text.lstrip().startswith("{"):
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InstanceError(f"{source}: not valid JSON ({exc.msg}, line {exc.lineno})") from None
        return parse_instance_json(data, source)
    return parse_instance_text(text, source)


# --------------------------------------------------------------------------- mixture
def empirical_mixture(instance: Instance) -> Mixture:
    """xi(x) = sum_q w_q x^q with w_q = (1/n) sum over terms of order q of weight^2."""
    groups: dict = {}
    for S, w in instance.terms.items():
        groups.setdefault(len(S), []).append(abs(w))
    weights = {}
    for q, ws in groups.items():
        # sum of squares relative to the largest, so that weights near 1e200 do not overflow w^2
        top = max(ws)
        log_w = 2.0 * math.log(top) + math.log(math.fsum((w / top) ** 2 for w in ws)) - math.log(instance.n)
        if log_w > 709.0 or log_w < -745.0:
            raise MixtureError(f"weight for q = {q} is about 1e{log_w / math.log(10.0):+.0f}, outside "
                               f"{WEIGHT_MIN:g}..{WEIGHT_MAX:g}")
        weights[q] = math.exp(log_w)
    return Mixture.from_weights(weights)


def shape_distance(a: Mixture, b: Mixture) -> float:
    """Total-variation distance between the normalized weights w_q / xi(1) of two mixtures (0..1)."""
    wa, wb = a.weights(), b.weights()
    ta, tb = sum(wa.values()), sum(wb.values())
    return 0.5 * sum(abs(wa.get(q, 0.0) / ta - wb.get(q, 0.0) / tb) for q in set(wa) | set(wb))


def girth(n: int, edges, limit: int | None = None) -> int | None:
    """Length of the shortest cycle of a simple graph, or None if it has none (or none <= limit).

    Breadth-first search from every vertex, each stopped at depth (best so far)/2:
    O(n (n + m)) at worst, much less when short cycles exist.
    """
    adjacency = [[] for _ in range(n)]
    for u, v in edges:
        adjacency[u].append(v)
        adjacency[v].append(u)
    best = math.inf if limit is None else limit + 1
    dist = np.full(n, -1, dtype=np.int64)
    parent = np.full(n, -1, dtype=np.int64)
    for root in range(n):
        if not adjacency[root]:
            continue
        touched = [root]
        dist[root] = 0
        queue = deque([root])
        while queue:
            u = queue.popleft()
            if 2 * dist[u] + 1 >= best:
                break
            for v in adjacency[u]:
                if dist[v] < 0:
                    dist[v] = dist[u] + 1
                    parent[v] = u
                    touched.append(v)
                    queue.append(v)
                elif v != parent[u]:
                    best = min(best, dist[u] + dist[v] + 1)
        dist[touched] = -1
        parent[touched] = -1
        if best == 3:
            break
    return None if (best == math.inf or (limit is not None and best > limit)) else int(best)


# --------------------------------------------------------------------------- statevector
def statevector_bytes(n: int) -> int:
    """Peak memory of :func:`statevector_check`: the state (16 B) and the diagonal (8 B) per amplitude.

    Building the diagonal needs 20 B per amplitude before the state exists, and the
    in-place layers add at most a few MiB of temporaries.
    """
    return 24 * (1 << n) + 32 * 2**20


def instance_diagonal(instance: Instance) -> np.ndarray:
    """C(x) for all 2^n basis states (float64), by one Walsh-Hadamard transform of the weights."""
    n = instance.n
    if not 1 <= n <= MAX_STATEVECTOR_SPINS:
        raise ValueError(f"statevector needs 1 <= n <= {MAX_STATEVECTOR_SPINS}, got {n}")
    coefficients = np.zeros(1 << n)
    coefficients[0] = instance.constant
    for S, w in instance.terms.items():
        coefficients[sum(1 << i for i in S)] += w
    return walsh_hadamard(coefficients)


def evolve(diagonal: np.ndarray, gamma, beta, *, progress: Callable[[int, int], None] | None = None) -> np.ndarray:
    """prod_t exp(-i b_t B) exp(-i g_t C) |+>^n (t = 1 first) for C given by its diagonal (2^n,).

    One complex128 state of 2^n amplitudes, updated in place layer by layer
    (:func:`leadline.kernels.finite_size.apply_phase` and ``mix_qubit``).
    progress : called as progress(done, total) after each of the p (n + 1) layer steps.
    """
    g = np.asarray(gamma, dtype=float).reshape(-1)
    b = np.asarray(beta, dtype=float).reshape(-1)
    if g.size != b.size or g.size < 1:
        raise ValueError("gamma and beta need the same length p >= 1")
    n = diagonal.size.bit_length() - 1
    psi = np.full(1 << n, 2.0 ** (-n / 2), dtype=complex)
    total = g.size * (n + 1)
    done = 0
    for t in range(g.size):
        apply_phase(psi, diagonal, g[t])
        done += 1
        if progress:
            progress(done, total)
        for j in range(n):
            mix_qubit(psi, j, b[t])
            done += 1
            if progress:
                progress(done, total)
    return psi


@dataclass
class StatevectorCheck:
    """Exact QAOA on one instance.

    expectation : <g,b| C |g,b> (None without angles)
    best        : max over all 2^n strings of C
    worst       : min over all 2^n strings of C
    ratio       : expectation / best (None without angles or when best <= 0)
    p_best      : probability of measuring a string with C = best (None without angles)
    best_string : one maximizing string as '+-' characters, spin 0 first
    """

    n: int
    expectation: float | None
    best: float
    worst: float
    ratio: float | None
    p_best: float | None
    best_string: str
    wall_time: float = 0.0


def statevector_check(
    instance: Instance,
    gamma,
    beta,
    *,
    progress: Callable[[int, int], None] | None = None,
) -> StatevectorCheck:
    """The state prod_t exp(-i b_t B) exp(-i g_t C) |+>^n (t = 1 first) and its statistics.

    gamma, beta : shape (p,), radians, in the units of this instance's C; both None: only
        the best and worst values (no state; expectation, ratio and p_best are None).
    progress : called as progress(done, total) after each of the p (n + 1) layer steps.
    """
    t0 = time.perf_counter()
    diagonal = instance_diagonal(instance)
    n = instance.n
    best = float(diagonal.max())
    worst = float(diagonal.min())
    x = int(diagonal.argmax())
    best_string = "".join("-" if (x >> j) & 1 else "+" for j in range(n))
    if gamma is None and beta is None:
        return StatevectorCheck(n=n, expectation=None, best=best, worst=worst, ratio=None, p_best=None,
                                best_string=best_string, wall_time=time.perf_counter() - t0)
    psi = evolve(diagonal, gamma, beta, progress=progress)
    scale = max(1.0, abs(instance.constant) + sum(abs(w) for w in instance.terms.values()))
    tolerance = 1e-9 * scale
    expectation = 0.0
    p_best = 0.0
    block = 1 << 20
    for k in range(0, diagonal.size, block):
        prob = np.abs(psi[k : k + block]) ** 2
        d = diagonal[k : k + block]
        expectation += float(prob @ d)
        p_best += float(prob[d >= best - tolerance].sum())
    return StatevectorCheck(
        n=n,
        expectation=expectation,
        best=best,
        worst=worst,
        ratio=expectation / best if best > 0 else None,
        p_best=p_best,
        best_string=best_string,
        wall_time=time.perf_counter() - t0,
    )


# --------------------------------------------------------------------------- transfer
@dataclass
class Rescaling:
    """Angles of a reference ensemble carried to an instance.

    lam      : lambda = sqrt(xi_instance(1) / xi_reference(1)); xi_instance = lambda^2 xi_reference
               when the shapes agree
    gamma    : (p,) instance-unit phase angles gamma_reference / lambda (beta is unchanged)
    distance : :func:`shape_distance` of the two mixtures (0 when proportional)
    """

    lam: float
    gamma: np.ndarray
    distance: float


def rescale_angles(instance_xi: Mixture, reference_xi: Mixture, gamma) -> Rescaling:
    """gamma / lambda: if C_instance has the statistics of lambda H_reference, then
    exp(-i (gamma/lambda) C_instance) acts like exp(-i gamma H_reference), and
    <C_instance> is lambda times the reference energy (V_p scales the same way:
    V_p(lambda^2 xi; gamma/lambda, beta) = lambda V_p(xi; gamma, beta))."""
    lam = math.sqrt(float(instance_xi.xi(1.0)) / float(reference_xi.xi(1.0)))
    g = np.asarray(gamma, dtype=float) / lam
    return Rescaling(lam=lam, gamma=g, distance=shape_distance(instance_xi, reference_xi))


def sparse_reference(q: int, degree: float, gamma, value: float | None):
    """A sparse-ensemble optimum (Max-q-XORSAT angles g_t on the satisfied count) in instance units.

    The satisfied count is m/2 + (1/2) sum_a s_a z_a over m = nD/q constraints, so
    exp(-i g C_sat) equals exp(-i (g/2) C) up to a phase for C = sum_a s_a z_a, whose
    empirical mixture is (D/q) x^q, and <C>/n = (D/q)(2 nu - 1).
    Returns (mixture (D/q) x^q, gamma g/2, value per spin or None).
    """
    mixture = Mixture.from_weights({int(q): float(degree) / int(q)})
    per_spin = None if value is None else float(degree) / int(q) * (2.0 * float(value) - 1.0)
    return mixture, np.asarray(gamma, dtype=float) / 2.0, per_spin


def sparse_prediction(structure: SparseStructure, n: int, constant: float, gamma, beta) -> float:
    """<C> from the finite-degree recursion for a sparse instance: constant + |w| m (2 nu - 1).

    gamma in instance units; the recursion's angle on the satisfied count is 2 |w| gamma.
    Exact for q = 2 when the girth exceeds 2p + 1 (every radius-p neighbourhood is a tree).
    """
    from ..sparse import evaluate_sparse

    g = 2.0 * structure.magnitude * np.asarray(gamma, dtype=float)
    ev = evaluate_sparse(structure.q, structure.degree, g, np.asarray(beta, dtype=float))
    return constant + structure.magnitude * structure.terms * (2.0 * ev.value - 1.0)
