"""Numbers as text: strict parsing of what a user types, and one way of printing values.

Parsing.  Python's ``float`` and ``int`` accept more than a number written in a file or on a
command line should be: digit-group underscores (``1_000``), digits of other scripts
(``"\\u0661"``, Arabic-Indic one) and surrounding whitespace of any kind.  A typo such as
``2:0_5`` would then silently mean 2:5.  :func:`parse_float` and :func:`parse_int` accept only
ASCII decimal notation (and the words inf/nan, so that callers can say "not finite").

Printing.  A fixed number of decimals hides a value that is small (``0.000000`` for 3.5e-101)
and spells out hundreds of digits of a large one; :func:`fmt` writes fixed point where that
shows the value and scientific notation where it does not.  Every report uses it.
"""

from __future__ import annotations

import math
import re

__all__ = ["parse_float", "parse_int", "fmt", "fmt_list"]

_FLOAT = re.compile(r"[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|inf|infinity|nan)", re.IGNORECASE)
_INT = re.compile(r"[+-]?[0-9]+")


def parse_float(text) -> float:
    """ASCII decimal text -> float; ValueError on anything else (``1_000``, non-ASCII digits, '')."""
    if not isinstance(text, str):
        raise ValueError(f"{text!r} is not text")
    body = text.strip(" \t")
    if not body.isascii() or _FLOAT.fullmatch(body) is None:
        raise ValueError(f"{text!r} is not a decimal number")
    return float(body)


def parse_int(text) -> int:
    """ASCII decimal integer text -> int; ValueError on anything else."""
    if not isinstance(text, str):
        raise ValueError(f"{text!r} is not text")
    body = text.strip(" \t")
    if not body.isascii() or _INT.fullmatch(body) is None:
        raise ValueError(f"{text!r} is not a whole number")
    return int(body)


def fmt(x, decimals: int = 6, *, signed: bool = False) -> str:
    """``x`` with ``decimals`` decimals when fixed point shows it, else in scientific notation.

    Fixed point is used for 0 and for 10^-(decimals // 2) <= |x| < 10^9 (so that at least
    decimals/2 significant digits show and no number runs to more than nine digits before
    the point); otherwise scientific notation with ``decimals`` digits after the point of the
    mantissa (``3.500000e-101``).  Non-finite values print as inf/nan.
    """
    x = float(x)
    sign = "+" if signed else ""
    if not math.isfinite(x):
        return f"{x:{sign}}"
    if x == 0.0 or 10.0 ** -(decimals // 2) <= abs(x) < 1e9:
        return f"{x:{sign}.{decimals}f}"
    return f"{x:{sign}.{decimals}e}"


def fmt_list(values, decimals: int = 6) -> str:
    """Comma-separated :func:`fmt` of each value."""
    return ", ".join(fmt(x, decimals) for x in values)
