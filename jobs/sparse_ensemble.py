"""What a sparse ensemble (Max-q-XORSAT on D-regular hypergraphs of large girth) may be.

The checks of q and D and the ensemble's JSON record, shared by the `evaluate` and
`optimize` commands (``commands/_sparse.py``), the study spec and the Python API.
"""

from __future__ import annotations

import math

from leadline.kernels.numtext import parse_float

from .errors import InputError

__all__ = ["MAX_DEGREE", "degree_limit_message", "check_sparse", "ensemble_json"]

#: largest degree accepted: the rounding of sum_a f(a) H(a) grows like D x 2.2e-16 (the messages
#: are 1 - O(1/D) raised to the power D - 1), about 2e-7 at D = 1e9, where the integrity check
#: must still tell rounding from a lost transform block (values agree with a 50-digit reference
#: to 1e-14 up to there: tests/test_sparse_ranges.py)
MAX_DEGREE = 10**9


def degree_limit_message(degree) -> str:
    """Why a degree beyond MAX_DEGREE is refused (one line, shared with the study spec)."""
    return (
        f"degree D = {degree:g} is beyond {MAX_DEGREE:.0e}: the recursion's rounding grows like "
        f"D x 2.2e-16 ({2.2e-16 * degree:.0e} here) and its integrity check could no longer tell "
        "rounding from a lost block; the D -> infinity limit is the dense q-spin model (--xi q:1)"
    )


def check_sparse(xorsat, degree, xi) -> tuple[int, int]:
    """Validate --xorsat/--degree (and that --xi is absent); returns (q, D). Raises InputError."""
    if xi is not None:
        raise InputError("--xi and --xorsat are two different ensembles: give one of them")
    if xorsat is None:
        raise InputError("--degree needs --xorsat Q (the constraint size, Q >= 2)")
    try:
        q = int(xorsat)
    except (TypeError, ValueError):
        raise InputError(f"--xorsat must be an integer >= 2, got {xorsat!r}") from None
    if q < 2:
        raise InputError(f"--xorsat must be an integer >= 2 (constraint size), got {q}")
    if degree is None:
        raise InputError("--xorsat needs --degree D (every spin in D constraints, D >= 2)")
    try:
        d = parse_float(str(degree))
    except ValueError:
        raise InputError(f"--degree must be an integer >= 2, got {degree!r}") from None
    if not math.isfinite(d) or not d.is_integer():
        raise InputError(f"--degree must be an integer >= 2, got {degree!r}")
    if d < 2:
        raise InputError(f"--degree must be >= 2, got {degree}")
    if d > MAX_DEGREE:
        raise InputError(f"--degree: {degree_limit_message(d)}")
    return q, int(d)


def ensemble_json(q: int, degree: int) -> dict:
    """The ensemble record used in angle files and JSON output."""
    return {"kind": "sparse", "q": int(q), "degree": int(degree)}
