"""Numbers for people, one way everywhere: `show`, the report (HTML and Markdown) and other text outputs.

Plain Python (`tillite show` imports no numpy).  Counts get thousands separators; a column's values (centroids,
segment means, quartiles) get as many significant digits as it takes to tell the segments apart, chosen per
column by ``digits_to_tell_apart``, so data shifted far from zero (timestamps, money in cents, 1e13 + a spread
of a few units) does not print the same figure for every segment.
"""

from __future__ import annotations

import math
from typing import Any, Iterable

__all__ = ["fmt", "digits_to_tell_apart", "column_text", "LEAST_DIGITS", "MOST_DIGITS"]

#: Significant digits a column's values get at least, and at most (a double's round-trip digits).
LEAST_DIGITS = 4
MOST_DIGITS = 17


def fmt(v: Any, digits: int = LEAST_DIGITS) -> str:
    """A number for people: thousands separators for counts, ``digits`` significant digits otherwise."""
    if v is None:
        return "–"
    if isinstance(v, int) or (isinstance(v, float) and v.is_integer() and abs(v) < 1e15):
        return f"{int(v):,}"
    if v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-3):
        return f"{v:.{digits - 1}e}"
    return f"{v:,.{max(digits - 1 - int(math.floor(math.log10(abs(v)))), 0) if v else 0}f}"


def digits_to_tell_apart(values: Iterable[float | None], least: int = LEAST_DIGITS) -> int:
    """Significant digits that show each of ``values`` (one column's centroids or segment means) apart from
    the others: the decimal exponent of the largest magnitude less that of the smallest gap between two
    values, plus 2 (two digits of the gap itself); at least ``least``, at most MOST_DIGITS.

    1e13 + 0.05, 1e13 + 1.05, 1e13 + 2.05: 13 - 0 + 2 = 15 digits (10,000,000,000,001.0).
    """
    xs = sorted({float(v) for v in values if v is not None and math.isfinite(float(v))})
    if len(xs) < 2:
        return least
    gap = min(b - a for a, b in zip(xs, xs[1:]))
    top = max(abs(xs[0]), abs(xs[-1]))
    if not (gap > 0 and top > 0 and math.isfinite(gap)):
        return least
    need = math.floor(math.log10(top)) - math.floor(math.log10(gap)) + 2
    return max(least, min(MOST_DIGITS, need))


def column_text(v: Any, digits: int = LEAST_DIGITS) -> str:
    """A column's value with ``digits`` significant digits: positional with thousands separators from 1e-3
    up to 1e15, in exponent form outside that range.  A whole number is written like any other value of its
    column (10,000,000,000,002.0 beside 10,000,000,000,001.1), not as a count."""
    if v is None:
        return "–"
    v = float(v)
    if not math.isfinite(v):
        return str(v)
    if v == 0:
        return "0"
    exponent = math.floor(math.log10(abs(v)))
    if exponent >= 15 or exponent < -3:
        return f"{v:.{digits - 1}e}"
    return f"{v:,.{max(digits - 1 - exponent, 0)}f}"
