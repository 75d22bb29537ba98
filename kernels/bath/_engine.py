"""The bath form of V_p: one spin driven by a Gaussian bosonic bath built from its own past.

Two forms of one computation (Z_t: the spin's z during phase layer t, Z_{p+1} after the
last mixer; W(t, s) = <Z_t Z_s>, later time on the left):

* sweep (``basis="cholesky"``): one forward pass.  Before layer t the correlations W(t, s),
  s < t, are final (causality), so row t of the bath xi'(W) and row t of its Cholesky factor
  are known; layer t couples the spin to modes 1..t.
* step-by-step (``basis="principal"``): step m couples the spin to the bath xi'(W_{m-1}) of
  the previous step (W_0: the free spin), factored as C = U sqrt(Lambda) over its eigenmodes,
  largest eigenvalue first.  W_m agrees with the sweep at every time <= m+1, so p steps give
  the exact W; the iteration also stops early once W changes by less than ``step_tol``.

In both, each layer is exp(-i g_t Z (x) B_t) (a spin-controlled displacement of every mode)
followed by the mixer exp(-i b_t X) on the spin, and W(t, s) = <psi_t| Z |chi_s> with
chi_s = U(s -> t) Z psi_s carried along.  Finally

    V_p = 2 sum_t g_t Im xi(W(p+1, t)).

The equivalence with the path-sum iteration of Farhi, Goldstone, Gutmann, Zhou, Quantum 6,
759 (2022) and Basso, Gamarnik, Mei, Zhou, FOCS 2022 (arXiv:2204.10306): the path weight
exp(-a^T M a / 2) with M = Gamma Gamma^T o xi'(G) is the influence functional of a Gaussian
field whose contour two-point function is xi'(G) (for SK the spin-boson mapping of
Boulebnane et al., arXiv:2505.07929, 2025).  The tests check it against that iteration.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from ..exact import check_angles
from ._dense import DenseState
from ._modes import bath_matrix, cholesky_row, fock_levels, layer_unitaries, mode_amplitudes, principal_factor
from ._mps import MPSState
from ._parity import ParityMPS

__all__ = ["BathBreakdown", "BathLimitError", "BathRun", "bath_correlations", "readout_sweep", "run_bath", "BASES"]

BASES = ("cholesky", "principal")


@dataclass
class BathRun:
    """One bath evaluation at one truncation.

    value       : V_p
    correlations: (p+1, p+1) spin correlations W(t, s), times 1..p+1
    fock        : Fock levels per mode (of the last step)
    chi         : bond cap (None: no cap)
    largest_bond: largest bond dimension reached (JSON "largest_bond"; the cap is "bond_cap")
    discarded   : total discarded squared norm summed over every truncation of every state
    steps       : sweeps run (1 for the Cholesky sweep)
    step_change : max|W_m - W_{m-1}| of the last step (principal basis)
    """

    value: float
    p: int
    basis: str
    engine: str
    correlations: np.ndarray = field(repr=False)
    fock: list
    chi: int | None
    largest_bond: int
    discarded: float
    steps: int
    step_change: float
    wall_time: float
    eigenvalues: list | None = None
    reverse: bool = False
    readout: str = "carried"
    carried: list = field(default_factory=list)
    top_population: float = 0.0
    cutoff: float = 0.0

    def to_json(self) -> dict:
        return {
            "value": float(self.value),
            "p": self.p,
            "basis": self.basis,
            "mode_order": _order_label(self.basis, self.reverse),
            "engine": self.engine,
            "fock_levels": [int(d) for d in self.fock],
            "bond_cap": self.chi,
            "cutoff": float(self.cutoff),
            "largest_bond": int(self.largest_bond),
            "discarded_weight": float(self.discarded),
            "steps": int(self.steps),
            "step_change": float(self.step_change),
            "readout": self.readout,
            "carried_times": [int(s) + 1 for s in self.carried],
            "top_level_population": float(self.top_population),
            "wall_time_s": float(self.wall_time),
        }


def _order_label(basis: str, reverse: bool) -> str:
    if basis == "cholesky":
        return "newest-first" if reverse else "oldest-first"
    return "smallest-first" if reverse else "largest-first"


ENGINES = ("mps", "dense-mps", "dense")


def _make_state(engine: str, dims, chi, cutoff, parity=False):
    """engine "mps": block-sparse by parity where the caller supports it (parity=True), else the
    dense-tensor MPS; "dense-mps": always the dense-tensor MPS; "dense": the Fock-space array."""
    if engine == "dense":
        return DenseState.initial(list(dims))
    if engine == "mps" and parity:
        return ParityMPS.initial(list(dims), chi=chi, cutoff=cutoff)
    if engine in ("mps", "dense-mps"):
        return MPSState.initial(list(dims), chi=chi, cutoff=cutoff)
    raise ValueError(f"unknown engine {engine!r}: use one of {', '.join(ENGINES)}")


def _mixer(b: float) -> np.ndarray:
    c, s = np.cos(b), np.sin(b)
    return np.array([[c, -1j * s], [-1j * s, c]])


def bath_correlations(mixture, g, b, *, C=None, dims=None, engine="mps", chi=None, cutoff=1e-16, fock=None,
                      reverse=False):
    """Spin correlations W (p+1 x p+1) of one spin coupled to a bath.

    C given (p x K): the bath B_t = sum_k C[t,k] b_k + h.c. with modes cut to dims[k] levels.
    C None: the causal Cholesky sweep, modes 1..p cut to ``fock`` levels each.
    reverse: chain order spin, mode K, ..., mode 1 instead of spin, mode 1, ..., mode K (the
    result is the same; the MPS bonds needed are not).
    Returns (W, states) where states lists the final psi and chi_s (for bonds and discarded weight).
    """
    p = len(g)
    causal = C is None
    if causal:
        dims = [int(fock)] * p
        C = np.zeros((p, p), complex)
    chain = (lambda xs: list(xs)[::-1]) if reverse else list
    psi = _make_state(engine, chain(dims), chi, cutoff)
    chis = []
    W = np.eye(p + 1, dtype=complex)
    for t in range(p):
        for s, ch in enumerate(chis):
            W[t, s] = psi.z_overlap(ch)
            W[s, t] = np.conj(W[t, s])
        if causal:
            row = mixture.dxi(W[t, : t + 1])
            row[t] = np.real(row[t])
            cholesky_row(C, t, row)
        ops = chain(layer_unitaries(g[t], C[t], dims))
        U = _mixer(b[t])
        chis.append(psi.copy().apply_z())
        for st in [psi, *chis]:
            st.apply_layer(ops)
            st.apply_spin(U)
    for s, ch in enumerate(chis):
        W[p, s] = psi.z_overlap(ch)
        W[s, p] = np.conj(W[p, s])
    return W, [psi, *chis]


def levels_needed(pops, x, d: int, d_max: int, tol: float) -> int:
    """Fock levels (d..d_max) a mode needs so that after the displacement exp(-i x b - i x* b^+)
    its top two levels hold at most ``tol`` of the norm.

    pops are the mode's level populations now; the populations after the displacement are
    estimated level by level (|<m|U|n>|^2 pops[n], interference ignored), with U on d_max levels.
    """
    if x == 0 or d >= d_max:
        return d
    e, V = _quadrature(d_max)
    U = (V * np.exp(-1j * abs(x) * e)[None, :]) @ V.T
    after = (np.abs(U[:, : len(pops)]) ** 2) @ np.asarray(pops, float)
    tail = np.cumsum(after[::-1])[::-1]  # tail[m] = population of levels >= m
    for dn in range(d, d_max + 1):
        if tail[max(dn - 2, 0)] <= tol:
            return dn
    return d_max


_QUAD: dict = {}


def _quadrature(d: int):
    """Eigenvectors of b + b^+ on d levels (cached): the displacement generator up to a phase."""
    if d not in _QUAD:
        a = np.diag(np.sqrt(np.arange(1, d, dtype=float)), 1)
        _QUAD[d] = np.linalg.eigh(a + a.T)
    return _QUAD[d]


def _back_substitute(W, t, zb, g, C, known) -> None:
    """Row t of W from a_k = <psi_t| Z b_k |psi_t>, k < t (the modes' memory of the spin).

    Heisenberg picture of exp(-i g_s Z B_s): b_k -> b_k - i g_s conj(C[s, k]) Z_s, and b_k
    annihilates the vacuum, so a_k = -i sum_{s=k}^{t-1} g_s conj(C[s, k]) W(t, s): triangular
    with diagonal g_k C[k, k].  Entries in ``known`` (s -> value, from carried states) are used
    as given and their equation is skipped.
    """
    for k in range(t - 1, -1, -1):
        if k in known:
            W[t, k] = known[k]
        else:
            acc = 1j * zb[k] - np.dot(g[k + 1:t] * np.conj(C[k + 1:t, k]), W[t, k + 1:t])
            W[t, k] = acc / (g[k] * C[k, k].real)
        W[k, t] = np.conj(W[t, k])


class BathLimitError(ValueError):
    """The engine cannot reach what was asked within the limits it was given (one-line message)."""


class BathBreakdown(ArithmeticError):
    """A run's correlations W became inconsistent: the bath row xi'(W(t, .)) it gives is not that of
    a positive semidefinite bath (Schur remainder clearly negative), so the run's cut-off is too
    loose for this depth.  The readout's back substitution amplifies truncation errors with the
    number of layers (measured for SK at INTERP angles, p = 40: breakdown at layer 13 at cut-off
    1e-5, layer 27 at 1e-6, none to layer 40 at 1e-7); the ladder abandons such a run and goes
    on with a tighter cut-off.  ``layer``: 1-based layer at which it was detected."""

    def __init__(self, layer: int, remainder: float, bond: int = 0):
        super().__init__(f"bath not positive semidefinite at layer {layer} (relative Schur remainder {remainder:.1e})")
        self.layer = layer
        self.remainder = remainder
        self.bond = bond  # largest bond of the state when it was detected


def breakdown_threshold(discarded: float) -> float:
    """How negative the relative Schur remainder of a bath row may be before the run is abandoned:
    rounding and truncation noise (W is off by about the square root of the discarded weight)
    give small negative values where the true remainder is zero (a zero angle); a breakdown gives
    values of order -1 (measured -1.8 at its onset, SK p = 40, cut-off 1e-5)."""
    return -max(1e-6, 10.0 * float(np.sqrt(max(discarded, 0.0))))


def readout_sweep(mixture, g, b, *, engine="mps", chi=None, cutoff=1e-16, fock=8, fock_max=None,
                  fock_tol=None, reverse=True, pivot_tol=1e-3, deadline=None, progress=None, trace=None,
                  check_psd=False):
    """Spin correlations W (p+1 x p+1) of the causal Cholesky sweep, read from ONE state.

    Before layer t, W(t, s) for s < t follows by back substitution (:func:`_back_substitute`)
    from <psi_t| Z b_k |psi_t>, one left-to-right sweep of the state.  Where the pivot
    |g_s C[s, s]| is below ``pivot_tol`` times the largest possible one (max|g| sqrt(xi'(1))),
    dividing by it would amplify truncation errors: for those s alone chi_s = U(s -> now) Z psi_s
    is carried and W(t, s) = <psi_t| Z |chi_s> is used instead.
    Fock levels start at ``fock`` per mode; with ``fock_tol`` set (MPS), before each layer every
    mode it drives gets the levels :func:`levels_needed` asks for (up to ``fock_max``).
    deadline: time.perf_counter() value after which the sweep stops with BathLimitError;
    progress(t, p, largest_bond) is called after every layer; trace (a list) gets one dict per
    layer (bond, pivot, row norm, discarded weight so far, most Fock levels, carried states,
    relative Schur remainder of the bath row).  check_psd: raise :class:`BathBreakdown` when a
    bath row's relative Schur remainder falls below :func:`breakdown_threshold`.
    Returns (W, info) with info: states (psi and carried), fock levels, carried times, top-level
    population (largest seen), pivots.
    """
    p = len(g)
    dims = [int(fock)] * p
    fock_max = int(fock) if fock_max is None else int(fock_max)
    C = np.zeros((p, p), complex)
    site = (lambda k: p - k) if reverse else (lambda k: k + 1)  # tensor index of mode k
    chain = (lambda xs: list(xs)[::-1]) if reverse else list
    psi = _make_state(engine, chain(dims), chi, cutoff, parity=True)
    carried: dict[int, object] = {}
    W = np.eye(p + 1, dtype=complex)
    scale = float(np.max(np.abs(g))) * float(np.sqrt(max(np.real(mixture.dxi(1.0)), 0.0)))
    top_max = 0.0
    pivots = np.zeros(p)
    layers: list[dict] = [] if trace is None else trace
    for t in range(p + 1):
        if t > 0:
            zb_sites, pop_sites = psi.mode_readout()
            zb = np.array([zb_sites[site(k) - 1] for k in range(p)])
            pops = [pop_sites[site(k) - 1] for k in range(p)]
            top_max = max(top_max, max(float(pops[k][-1]) for k in range(t)))
            known = {s: psi.z_overlap(ch) for s, ch in carried.items()}
            _back_substitute(W, t, zb, g, C, known)
        if t == p:
            break
        row = mixture.dxi(W[t, : t + 1])
        row[t] = np.real(row[t])
        rest = cholesky_row(C, t, row)
        rel_rest = rest / max(float(np.real(row[t])), 1e-300)
        if check_psd and rel_rest < breakdown_threshold(psi.discarded):
            raise BathBreakdown(t + 1, rel_rest, max(psi.bond_dimensions(), default=1))
        if fock_tol is not None and engine != "dense":
            for k in range(t + 1):
                need = levels_needed(pops[k] if k < t else np.ones(1), g[t] * C[t, k], dims[k], fock_max, fock_tol)
                if need > dims[k]:
                    dims[k] = need
                    for st in [psi, *carried.values()]:
                        st.pad_site(site(k), need)
        pivots[t] = abs(g[t] * C[t, t].real)
        if pivots[t] <= pivot_tol * scale:
            carried[t] = psi.copy().apply_z()
        ops = chain(layer_unitaries(g[t], C[t], dims))
        for st in [psi, *carried.values()]:
            st.apply_layer(ops)
            st.apply_mixer(b[t])
        bond = max(psi.bond_dimensions(), default=1)
        layers.append({"bond": int(bond), "pivot": float(pivots[t]), "row_norm": float(np.linalg.norm(C[t, : t + 1])),
                       "discarded": float(psi.discarded), "max_fock": int(max(dims[: t + 1])),
                       "carried": len(carried), "remainder": float(rel_rest)})
        if progress is not None:
            progress(t + 1, p, bond)
        if deadline is not None and time.perf_counter() > deadline:
            raise BathLimitError(f"time limit reached at layer {t + 1} of {p}")
    info = {"states": [psi, *carried.values()], "fock": dims, "carried": sorted(carried), "top": top_max,
            "pivots": pivots, "layers": layers, "C": C}
    return W, info


def _value(mixture, g, W) -> float:
    p = len(g)
    return float(2.0 * np.sum(np.asarray(g) * np.imag(mixture.xi(W[p, :p]))))


def run_bath(
    mixture,
    gamma,
    beta,
    *,
    fock: int = 8,
    tail: int = 2,
    chi: int | None = 32,
    basis: str = "cholesky",
    engine: str = "mps",
    cutoff: float = 1e-16,
    max_steps: int | None = None,
    step_tol: float = 1e-12,
    guess: np.ndarray | None = None,
    reverse: bool | None = None,
    readout: str = "modes",
    fock_max: int | None = None,
    fock_tol: float | None = None,
    pivot_tol: float = 1e-3,
    deadline: float | None = None,
    progress=None,
    check_psd: bool = False,
) -> BathRun:
    """V_p(gamma, beta) from the bath form at one truncation.

    fock  : Fock levels of the most driven mode (principal basis) or of every mode (Cholesky)
    tail  : fewest levels of any mode in the principal basis (``tail = fock``: uniform)
    chi   : bond cap of the MPS (None: exact up to ``cutoff``); ignored by the dense engine
    basis : "principal" (step-by-step, eigenmodes) or "cholesky" (one causal sweep)
    guess : starting W for the step-by-step form (default: the free spin); any guess gives
            the exact W after p steps
    reverse : MPS chain order.  Default: Cholesky modes newest first (spin, mode p, ..., mode 1:
            the spin sits beside the modes it is creating, measured to need about half the
            bond of the creation order); principal modes largest first (spin, largest, ...).
    readout : Cholesky sweep only. "modes" (default): one state, W read from the modes'
            memory (:func:`readout_sweep`, O(p^2 chi^3 d)); "carried": psi and every chi_s
            carried through every layer (O(p^3 chi^3 d), the reference).
    engine : "mps" (the parity block-sparse MPS in the readout; dense tensors elsewhere),
            "dense-mps" (dense tensors always: the reference) or "dense" (the Fock-space array)
    fock_max, fock_tol : readout only: a mode whose top Fock level holds more than fock_tol
            gets two more levels, up to fock_max (default: fixed ``fock`` levels).
    pivot_tol : readout only: relative size of g_s C[s, s] below which chi_s is carried.
    check_psd : readout only: raise :class:`BathBreakdown` when the run's W stops giving a
            positive semidefinite bath (its cut-off is too loose for the depth).
    """
    t0 = time.perf_counter()
    g, b = check_angles(gamma, beta)
    p = g.size
    if basis not in BASES:
        raise ValueError(f"unknown basis {basis!r}: use one of {', '.join(BASES)}")
    if fock < 1:
        raise ValueError("fock must be >= 1")
    if reverse is None:
        reverse = basis == "cholesky"
    if readout not in ("modes", "carried"):
        raise ValueError(f"unknown readout {readout!r}: use 'modes' or 'carried'")
    if basis == "cholesky" and readout == "modes":
        W, info = readout_sweep(mixture, g, b, engine=engine, chi=chi, cutoff=cutoff, fock=fock, fock_max=fock_max,
                                fock_tol=fock_tol, reverse=reverse, pivot_tol=pivot_tol, deadline=deadline,
                                progress=progress, check_psd=check_psd)
        states = info["states"]
        return BathRun(_value(mixture, g, W), p, basis, engine, W, list(info["fock"]), chi,
                       max(max(s.bond_dimensions(), default=1) for s in states),
                       sum(s.discarded for s in states), 1, 0.0, time.perf_counter() - t0, reverse=reverse,
                       readout="modes", carried=info["carried"], top_population=info["top"], cutoff=cutoff)
    if basis == "cholesky":
        W, states = bath_correlations(mixture, g, b, engine=engine, chi=chi, cutoff=cutoff, fock=fock, reverse=reverse)
        run = BathRun(_value(mixture, g, W), p, basis, engine, W, [fock] * p, chi,
                      max(max(s.bond_dimensions(), default=1) for s in states),
                      sum(s.discarded for s in states), 1, 0.0, 0.0, reverse=reverse)
        run.wall_time = time.perf_counter() - t0
        return run
    if guess is None:
        W, _ = bath_correlations(mixture, g, b, C=np.zeros((p, 0)), dims=[], engine="dense")
    else:
        W = np.asarray(guess, complex)
    steps = 0
    change = np.inf
    max_steps = p if max_steps is None else max_steps
    largest_bond = 1
    discarded = 0.0
    while steps < max_steps and change > step_tol:
        WB = bath_matrix(mixture, W[:p, :p])
        C, lam = principal_factor(WB)
        dims = fock_levels(mode_amplitudes(g, C), fock, tail)
        Wn, states = bath_correlations(mixture, g, b, C=C, dims=dims, engine=engine, chi=chi, cutoff=cutoff,
                                       reverse=reverse)
        change = float(np.max(np.abs(Wn - W)))
        W = Wn
        steps += 1
        largest_bond = max(max(s.bond_dimensions(), default=1) for s in states)
        discarded = sum(s.discarded for s in states)
    return BathRun(_value(mixture, g, W), p, basis, engine, W, dims, chi, largest_bond, discarded, steps,
                   change, time.perf_counter() - t0, [float(x) for x in lam], reverse)
