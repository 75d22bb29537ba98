"""The covariance mixture xi of a mixed-spin glass.

Normalization (used everywhere in leadline): spins z in {+1,-1}^n and

    H(z) = sum_q c_q n^{-(q-1)/2} sum_{i1..iq} J_{i1..iq} z_i1 ... z_iq

summed over ALL ordered q-tuples (repeated indices included), J iid with mean 0
and variance 1, so that E[H(z) H(z')] = n xi(R) with R the overlap and

    xi(x) = sum_q w_q x^q,   w_q = c_q^2 >= 0.

The Sherrington-Kirkpatrick model written with i<j pairs is xi(x) = x^2 / 2.
xi and its derivatives are evaluated on complex arguments (the contour
correlations G are complex), elementwise on arrays of any shape.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Mixture", "MixtureError", "parse_mixture"]


class MixtureError(ValueError):
    """A mixture specification that cannot be used; the message says why."""


@dataclass(frozen=True)
class Mixture:
    """xi(x) = sum_q weights[q] x^q with integer q >= 1 and weights >= 0.

    ``terms`` is a tuple of (q, w) pairs sorted by q, with w > 0 (zero weights
    are dropped so that two spellings of one mixture compare equal).
    """

    terms: tuple[tuple[int, float], ...]

    def __post_init__(self) -> None:
        if not self.terms:
            raise MixtureError("the mixture xi is all zero: give at least one q:w with w > 0")
        seen = set()
        for q, w in self.terms:
            if not isinstance(q, int) or isinstance(q, bool) or q < 1:
                raise MixtureError(f"power q must be an integer >= 1, got {q!r}")
            if q in seen:
                raise MixtureError(f"power q = {q} appears twice in the mixture")
            seen.add(q)
            if not math.isfinite(w):
                raise MixtureError(f"weight for q = {q} is not finite ({w!r})")
            if w <= 0:
                raise MixtureError(f"weight for q = {q} must be > 0, got {w!r}")

    @classmethod
    def from_weights(cls, weights: dict[int, float]) -> "Mixture":
        """Build from {q: w}; zero weights are dropped, negative ones rejected."""
        terms = []
        for q, w in weights.items():
            w = float(w)
            if not math.isfinite(w):
                raise MixtureError(f"weight for q = {q} is not finite ({w!r})")
            if w < 0:
                raise MixtureError(f"weight for q = {q} must be >= 0, got {w!r}")
            if w > 0:
                terms.append((q, w))
        if not terms:
            raise MixtureError("the mixture xi is all zero: give at least one q:w with w > 0")
        return cls(tuple(sorted(terms)))

    # ------------------------------------------------------------------ values
    @property
    def qmax(self) -> int:
        return self.terms[-1][0]

    @property
    def has_odd(self) -> bool:
        """True when some odd power is present (breaks the z -> -z symmetry)."""
        return any(q % 2 for q, _ in self.terms)

    @property
    def has_even(self) -> bool:
        return any(q % 2 == 0 for q, _ in self.terms)

    def weights(self) -> dict[int, float]:
        return dict(self.terms)

    def xi(self, x):
        """xi(x), elementwise; x real or complex array or scalar."""
        return self._poly(x, 0)

    def dxi(self, x):
        """xi'(x), elementwise."""
        return self._poly(x, 1)

    def d2xi(self, x):
        """xi''(x), elementwise."""
        return self._poly(x, 2)

    def d3xi(self, x):
        """xi'''(x), elementwise."""
        return self._poly(x, 3)

    def _poly(self, x, order: int):
        x = np.asarray(x)
        out = np.zeros_like(x, dtype=np.result_type(x.dtype, np.float64))
        for q, w in self.terms:
            if q < order:
                continue
            coef = w * math.perm(q, order)
            power = q - order
            out = out + coef * (x**power if power else np.ones_like(out))
        return out if out.ndim else out[()]

    def scaled(self, c: float) -> "Mixture":
        """The mixture c * xi (c > 0)."""
        return Mixture(tuple((q, w * c) for q, w in self.terms))

    # -------------------------------------------------------------- spelling
    def spec(self) -> str:
        """Canonical text form, the inverse of :func:`parse_mixture`."""
        return ",".join(f"{q}:{_weight_text(w)}" for q, w in self.terms)

    def rounded_spec(self, digits: int = 6) -> str:
        """The q:w form with weights to ``digits`` significant digits, for reading (``spec()`` is exact)."""
        return ",".join(f"{q}:{w:.{digits}g}" for q, w in self.terms)

    def label(self) -> str:
        """Human-readable form such as ``0.5 x^2 + x^3``."""
        parts = []
        for q, w in self.terms:
            mono = "x" if q == 1 else f"x^{q}"
            parts.append(mono if w == 1 else f"{w:g} {mono}")
        return " + ".join(parts)

    def to_json(self) -> dict:
        return {"spec": self.spec(), "terms": [[q, w] for q, w in self.terms]}

    def __str__(self) -> str:  # pragma: no cover - cosmetic
        return self.spec()


def parse_mixture(spec: str) -> Mixture:
    """Parse ``"q:w,q:w,..."`` into a :class:`Mixture`.

    ``"2:0.5"`` is the SK model (i<j pairs), ``"3:1"`` the pure 3-spin model,
    ``"2:0.5,4:0.25"`` a mixture.  Rejects q < 1, non-integer q, duplicate q,
    negative or non-finite w, and an all-zero mixture, raising
    :class:`MixtureError` with a one-line explanation.
    """
    if spec is None or not str(spec).strip():
        raise MixtureError("empty mixture: give comma-separated q:w pairs, for example 2:0.5")
    weights: dict[int, float] = {}
    for item in str(spec).split(","):
        item = item.strip()
        if not item:
            raise MixtureError(f"empty term in mixture {spec!r}: write q:w pairs separated by commas")
        if ":" not in item:
            raise MixtureError(f"term {item!r} is not of the form q:w (for example 3:1)")
        qs, ws = (s.strip() for s in item.split(":", 1))
        try:
            qf = float(qs)
        except ValueError:
            raise MixtureError(f"power q in {item!r} is not a number") from None
        if not math.isfinite(qf) or qf != int(qf) or not _looks_integer(qs):
            raise MixtureError(f"power q in {item!r} must be an integer, got {qs!r}")
        q = int(qf)
        if q < 1:
            raise MixtureError(f"power q must be >= 1, got {q} in {item!r}")
        try:
            w = float(ws)
        except ValueError:
            raise MixtureError(f"weight w in {item!r} is not a number") from None
        if not math.isfinite(w):
            raise MixtureError(f"weight w in {item!r} is not finite")
        if w < 0:
            raise MixtureError(f"weight w in {item!r} is negative; xi needs w = c_q^2 >= 0")
        if q in weights:
            raise MixtureError(f"power q = {q} appears twice in mixture {spec!r}")
        weights[q] = w
    return Mixture.from_weights(weights)


def _weight_text(w: float) -> str:
    """Shortest text that reads back as exactly w: "1" for 1.0, "0.5", "1e-06"."""
    if float(w).is_integer() and abs(w) < 2**53:
        return str(int(w))
    return repr(float(w))


def _looks_integer(text: str) -> bool:
    text = text.strip().lstrip("+")
    return text.isdigit()
