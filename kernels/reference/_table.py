"""Reference ground-state energies shipped with the tool (a small sourced table).

All values are maximal energy densities lim_n max_z H(z)/n in the tool's
normalization E[H(z)H(z')] = n xi(R) (``kernels/mixture.py``; the SK model with
i<j pairs is xi(x) = x^2/2).  Each entry carries its source and its precision
(an absolute uncertainty in the same units).

Lookup is by mixture: an exact match of the normalized terms, or a scaled
match xi = c * xi_table, using the exact scaling law GS(c xi) = sqrt(c) GS(xi)
(H scales by sqrt(c)).  Where no entry matches, the answer is None: callers
leave ratio columns out rather than guess.

Only the union (first-moment) bound GS <= sqrt(2 ln 2 * xi(1)) holds for every
mixture; for pure q-spin models GS approaches it as q -> infinity (random energy
model, Derrida, Phys. Rev. B 24, 2613 (1981)).  It is a bound, never used as a
value.

Precedence for the reference energies of a table (applied in jobs/report/_references.py):
a value given on the command line, then one given in the study spec, then
values computed by ``kernels.reference`` and cached in the store, then this
table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..mixture import Mixture

__all__ = ["ShippedValue", "GroundStateMatch", "SHIPPED_GROUND_STATES", "lookup_ground_state", "union_bound"]


@dataclass(frozen=True)
class ShippedValue:
    """One row of the shipped table.

    Attributes
    ----------
    terms : tuple of (q, w)
        The mixture xi(x) = sum w x^q, sorted by q.
    ground_state : float
        Maximal energy density per spin (dimensionless).
    uncertainty : float
        Absolute precision of ``ground_state`` (same units).
    source : str
        Where the number comes from; "from memory" when it is recalled, not cited.
    from_memory : bool
        True when the value could not be checked against the cited source.
    """

    terms: tuple[tuple[int, float], ...]
    ground_state: float
    uncertainty: float
    source: str
    from_memory: bool = False

    @property
    def mixture(self) -> Mixture:
        return Mixture(self.terms)

    def to_json(self) -> dict:
        return {
            "xi": self.mixture.spec(),
            "ground_state": self.ground_state,
            "uncertainty": self.uncertainty,
            "source": self.source,
            "from_memory": self.from_memory,
        }


# Parisi ground-state energy of the SK model, xi = x^2/2 (E_0 = -0.763166 per spin in the usual
# i<j normalization with unit-variance couplings): Crisanti, Rizzo, "Analysis of the
# infinite-replica symmetry breaking solution of the Sherrington-Kirkpatrick model",
# Phys. Rev. E 65, 046137 (2002). Precision: the last quoted digit.
_SK_PARISI = 0.763166
_SK_PARISI_UNC = 1e-6
_SK_SOURCE = "Parisi value, Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)"

SHIPPED_GROUND_STATES: tuple[ShippedValue, ...] = (
    ShippedValue(((2, 0.5),), _SK_PARISI, _SK_PARISI_UNC, _SK_SOURCE),
    # xi = x^2 = 2 * (x^2/2): exact scaling law GS(c xi) = sqrt(c) GS(xi).
    ShippedValue(
        ((2, 1.0),),
        _SK_PARISI * math.sqrt(2.0),
        _SK_PARISI_UNC * math.sqrt(2.0),
        _SK_SOURCE + ", times sqrt(2) by the exact scaling law GS(c xi) = sqrt(c) GS(xi)",
    ),
    # Pure 3-spin Ising model, xi = x^3: 1RSB/full-RSB value 0.8132 per spin in the
    # E[HH'] = n R^3 / 2 normalization (Gardner, Nucl. Phys. B 257, 747 (1985); FRSB
    # correction below 1e-3: Montanari, Ricci-Tersenghi, Eur. Phys. J. B 33, 339 (2003)),
    # i.e. 0.8132 * sqrt(2) = 1.1500 here. Recalled, not checked against the papers:
    # from memory, precision +- 0.002.
    ShippedValue(
        ((3, 1.0),),
        1.1500,
        0.002,
        "from memory: pure 3-spin value 0.8132 (xi = x^3/2) of Gardner, Nucl. Phys. B 257, 747 (1985) "
        "and Montanari & Ricci-Tersenghi, Eur. Phys. J. B 33, 339 (2003), times sqrt(2)",
        from_memory=True,
    ),
)


@dataclass(frozen=True)
class GroundStateMatch:
    """Result of a lookup: the value for the asked mixture and how it was obtained.

    ``scale`` is c in xi = c * xi_table (1.0 for an exact match); value and
    uncertainty are already multiplied by sqrt(c).
    """

    ground_state: float
    uncertainty: float
    source: str
    from_memory: bool
    scale: float
    entry: ShippedValue

    def to_json(self) -> dict:
        return {
            "ground_state": self.ground_state,
            "uncertainty": self.uncertainty,
            "source": self.source,
            "from_memory": self.from_memory,
            "scale": self.scale,
            "table_entry": self.entry.to_json(),
        }


def _scale_factor(mixture: Mixture, table: Mixture, rtol: float) -> float | None:
    """c such that mixture = c * table term by term (same powers), else None."""
    mine, theirs = dict(mixture.terms), dict(table.terms)
    if set(mine) != set(theirs):
        return None
    ratios = [mine[q] / theirs[q] for q in mine]
    c = ratios[0]
    if all(abs(r - c) <= rtol * abs(c) for r in ratios):
        return c
    return None


def lookup_ground_state(mixture: Mixture, *, rtol: float = 1e-12) -> GroundStateMatch | None:
    """Ground-state energy density of ``mixture`` from the shipped table, or None.

    An exact match of the normalized terms is preferred; otherwise a table
    entry with the same powers and proportional weights (xi = c * xi_table)
    gives sqrt(c) times its value and uncertainty.

    Parameters
    ----------
    mixture : Mixture
    rtol : float
        Relative tolerance on the weights when comparing mixtures.
    """
    best = None
    for entry in SHIPPED_GROUND_STATES:
        c = _scale_factor(mixture, entry.mixture, rtol)
        if c is None:
            continue
        exact = abs(c - 1.0) <= rtol
        if best is None or (exact and not best[1]):
            best = (entry, exact, c)
    if best is None:
        return None
    entry, exact, c = best
    if exact:
        return GroundStateMatch(entry.ground_state, entry.uncertainty, entry.source, entry.from_memory, 1.0, entry)
    root = math.sqrt(c)
    source = f"{entry.source}; scaled by sqrt({c:g}) (xi = {c:g} x table mixture, exact scaling law)"
    return GroundStateMatch(entry.ground_state * root, entry.uncertainty * root, source, entry.from_memory, c, entry)


def union_bound(mixture: Mixture) -> float:
    """Upper bound sqrt(2 ln 2 * xi(1)) on the ground-state energy density of any mixture.

    The first-moment (union) bound over 2^n configurations of a Gaussian field
    with variance n xi(1); pure q-spin ground states approach it as q grows
    (random energy model, Derrida, Phys. Rev. B 24, 2613 (1981)). A bound,
    not a value.
    """
    return math.sqrt(2.0 * math.log(2.0) * float(mixture.xi(1.0)))
