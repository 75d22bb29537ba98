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

from .numtext import parse_float

__all__ = ["Mixture", "MixtureError", "parse_mixture", "MAX_POWER", "WEIGHT_MIN", "WEIGHT_MAX"]

#: largest power q accepted in a mixture (the closed forms used for range checks sum binomials
#: C(q, k) over k <= q, and nothing in the literature this tool is checked against goes near it)
MAX_POWER = 1000
#: range of every weight w_q.  V_p scales exactly, V_p(c xi; gamma, beta) = sqrt(c) V_p(xi; sqrt(c) gamma, beta)
#: (H -> sqrt(c) H), and leadline computes on the mixture divided by a power of 4 near xi(1)
#: (:meth:`Mixture.normal_form`); the limits keep the weights' ratios (up to 1e300) and the
#: gradient dV/dgamma (of size xi(1)) inside the double range.
WEIGHT_MIN = 1e-150
WEIGHT_MAX = 1e150
#: mixtures with xi(1) in [2^-6, 2^6] are computed as given (normal_form's exponent is 0)
_NORMAL_BAND = 6.0


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
            if q > MAX_POWER:
                raise MixtureError(f"power q = {q} is beyond {MAX_POWER}, the largest this tool accepts")
            if q in seen:
                raise MixtureError(f"power q = {q} appears twice in the mixture")
            seen.add(q)
            if not math.isfinite(w):
                raise MixtureError(f"weight for q = {q} is not finite ({w!r})")
            if w <= 0:
                raise MixtureError(f"weight for q = {q} must be > 0, got {w!r}")
            if not WEIGHT_MIN <= w <= WEIGHT_MAX:
                raise MixtureError(
                    f"weight for q = {q} is {w:.3g}, outside {WEIGHT_MIN:g}..{WEIGHT_MAX:g}; V_p scales exactly, "
                    "V_p(c xi; gamma, beta) = sqrt(c) V_p(xi; sqrt(c) gamma, beta): divide the weights by c and "
                    "multiply gamma by sqrt(c)"
                )

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

    def scale_exponent(self) -> int:
        """k such that xi / 4^k has xi(1) near 1: 0 when xi(1) is within [2^-6, 2^6], else round(log_4 xi(1))."""
        top = max(w for _, w in self.terms)
        log2_total = math.log2(top) + math.log2(sum(w / top for _, w in self.terms))
        if abs(log2_total) <= _NORMAL_BAND:
            return 0
        return int(math.floor(log2_total / 2.0 + 0.5))

    def normal_form(self) -> tuple[int, "Mixture"]:
        """(k, xi / 4^k) with k = :meth:`scale_exponent`; the division by a power of 4 is exact.

        The energy scales exactly with the mixture (the cost H of c xi is sqrt(c) H):

            V_p(xi; gamma, beta) = 2^k V_p(xi / 4^k; 2^k gamma, beta),
            dV/dgamma = 4^k dV'/dgamma',  dV/dbeta = 2^k dV'/dbeta',

        and multiplying by powers of 2 is exact in binary floating point, so computing on the
        normal form gives the same digits as computing on xi wherever the latter stays in the
        double range, and keeps every intermediate product of size 1 where it would not.
        """
        k = self.scale_exponent()
        if k == 0:
            return 0, self
        factor = math.ldexp(1.0, -2 * k)
        # built without __post_init__: the scaled weights may lie below WEIGHT_MIN (their ratios
        # to the largest, which is about 1 now, are what WEIGHT_MIN/WEIGHT_MAX bound)
        normal = object.__new__(Mixture)
        object.__setattr__(normal, "terms", tuple((q, w * factor) for q, w in self.terms))
        return k, normal

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
            qf = parse_float(qs)
        except ValueError:
            raise MixtureError(f"power q in {item!r} is not a number (ASCII digits)") from None
        if not math.isfinite(qf) or qf != int(qf) or not _looks_integer(qs):
            raise MixtureError(f"power q in {item!r} must be an integer, got {qs!r}")
        q = int(qf)
        if q < 1:
            raise MixtureError(f"power q must be >= 1, got {q} in {item!r}")
        try:
            w = parse_float(ws)
        except ValueError:
            raise MixtureError(f"weight w in {item!r} is not a number (ASCII decimal notation such as 0.5 or 1e-3)") from None
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
    return text.isascii() and text.isdigit()
