"""Two truncations and an error estimate for the bath engine.

The value reported is the run at the larger truncation; its error estimate is the
difference to the run at the smaller one, |V(d, chi) - V(d', chi')|.  Truncation errors fall
quickly with (d, chi) (Fock tails of displaced vacua fall faster than exponentially, the
Schmidt spectrum is steep), so the larger run is much closer to the exact value than the
smaller one and the difference bounds its error; the tests check this against the exact
iteration.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ._engine import BathRun, run_bath

__all__ = ["BathEvaluation", "evaluate_bath", "larger_truncation"]


def larger_truncation(fock: int, tail: int, chi: int | None) -> tuple[int, int, int | None]:
    """The second, larger truncation: 1.5x the levels (at least +2), one more tail level, 2x chi."""
    return max(fock + 2, math.ceil(1.5 * fock)), tail + 1, (None if chi is None else 2 * chi)


@dataclass
class BathEvaluation:
    """Value from the larger truncation, the smaller run, and |difference| as error estimate."""

    value: float
    error_estimate: float
    run: BathRun
    check: BathRun

    def to_json(self) -> dict:
        return {
            "value": float(self.value),
            "error_estimate": float(self.error_estimate),
            "truncation": self.run.to_json(),
            "check_truncation": self.check.to_json(),
        }


def evaluate_bath(mixture, gamma, beta, *, fock: int = 8, tail: int = 2, chi: int | None = 32,
                  basis: str = "cholesky", engine: str = "mps") -> BathEvaluation:
    """V_p at (fock, tail, chi) and at :func:`larger_truncation`; value of the larger run.

    The larger run starts its step-by-step iteration from the smaller run's correlations.
    """
    small = run_bath(mixture, gamma, beta, fock=fock, tail=tail, chi=chi, basis=basis, engine=engine)
    f2, t2, c2 = larger_truncation(fock, tail, chi)
    large = run_bath(mixture, gamma, beta, fock=f2, tail=t2, chi=c2, basis=basis, engine=engine)
    return BathEvaluation(large.value, abs(large.value - small.value), large, small)
