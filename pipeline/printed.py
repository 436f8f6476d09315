"""Numbers as messages print them: short (a few significant digits), and with as many more as it
takes to tell a value from the limit it was held against. No numpy and no stage: the filter's
drop sentences and ``explain`` both print through it."""
from __future__ import annotations

import math
from typing import Any, Iterable

#: Significant digits that tell any two doubles apart (IEEE 754 binary64: 17).
ALL_DIGITS = 17


def number(value: Any, digits: int = 3) -> str:
    """A float with ``digits`` significant digits (``:g``: trailing zeros dropped), its whole
    part in full when that has more digits (1500, not 1.5e+03: an audit found limits printed
    so); any other value as ``str`` gives it (an int is exact)."""
    if not isinstance(value, float):
        return str(value)
    if math.isfinite(value) and abs(value) >= 10 ** digits:
        return f"{value:.0f}"
    return f"{value:.{digits}g}"


def digits_apart(value: Any, limits: Iterable[Any], digits: int = 3) -> int:
    """The fewest significant digits, ``digits`` or more, at which ``value`` prints unlike every
    number of ``limits`` it differs from, so a sentence never reads "8 s < 8 s" for 7.999992 s
    against 8 s. Values that are not numbers are left out."""
    def numeric(v: Any) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool)

    if not numeric(value):
        return digits
    others = [x for x in limits if numeric(x) and x != value]
    d = digits
    while d < ALL_DIGITS and any(number(value, d) == number(x, d) for x in others):
        d += 1
    return d


def compared(value: Any, limit: Any, digits: int = 3) -> tuple[str, str]:
    """``value`` and ``limit`` printed for a sentence that compares them (``number`` at
    ``digits_apart``): they print alike only when they are equal."""
    d = digits_apart(value, (limit,), digits)
    return number(value, d), number(limit, d)
