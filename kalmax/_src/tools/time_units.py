"""Time units of the command line: what a model's rates are "per", and durations written as text.

Every unit is an exact number of seconds (a :class:`fractions.Fraction`), so
converting between units never rounds: a time difference is formed exactly
(``series.py``), divided exactly by the unit, and rounded to float64 once.

A year is the Julian year of 365.25 days (31 557 600 s), a fixed length: a
calendar year has 365 or 366 days, which no single rate unit can follow.
"""

from __future__ import annotations

import decimal
import re
from fractions import Fraction
from typing import Optional, Tuple

# Seconds in one unit, exactly.
UNITS = {
    "ns": Fraction(1, 1_000_000_000),
    "us": Fraction(1, 1_000_000),
    "ms": Fraction(1, 1000),
    "s": Fraction(1),
    "min": Fraction(60),
    "h": Fraction(3600),
    "day": Fraction(86400),
    "week": Fraction(7 * 86400),
    "year": Fraction(31_557_600),  # 365.25 days
}

UNIT_WORDS = {
    "ns": "nanosecond", "us": "microsecond", "ms": "millisecond", "s": "second", "min": "minute",
    "h": "hour", "day": "day", "week": "week", "year": "365.25 days",
}

MAX_PATTERN_CHARS = 200

_DURATION = re.compile(r"^\s*(?P<amount>[0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?|[0-9]+\.)\s*(?P<unit>[A-Za-z]*)\s*$")


def unit_names() -> str:
    """The unit names as a comma-separated text (for messages and help)."""
    return ", ".join(UNITS)


def seconds(unit: str) -> Fraction:
    return UNITS[unit]


def parse_duration(text: str, what: str) -> Tuple[Fraction, Optional[str]]:
    """(amount, unit or None) of a positive duration written ``NUMBER`` or ``NUMBER UNIT``.

    ``1.5h``, ``30 min``, ``2day`` and ``0.25`` (no unit: the model's time
    unit) are durations; the amount is kept exactly. Raises ValueError with a
    sentence naming ``what`` (the option).
    """
    m = _DURATION.match(text or "")
    if not m:
        raise ValueError(f"{what} {text!r}: write a positive number, optionally followed by a unit "
                         f"({unit_names()}), e.g. 30min or 1.5.")
    unit = m.group("unit") or None
    if unit is not None and unit not in UNITS:
        raise ValueError(f"{what} {text!r}: unknown time unit {unit!r}; use one of {unit_names()}.")
    try:
        amount = Fraction(decimal.Decimal(m.group("amount")))
    except (decimal.InvalidOperation, ValueError, OverflowError):
        raise ValueError(f"{what} {text!r}: not a number.") from None
    if amount <= 0:
        raise ValueError(f"{what} {text!r}: must be greater than 0.")
    if amount > 10**15:
        raise ValueError(f"{what} {text!r}: too large.")
    return amount, unit


def check_pattern(pattern) -> None:
    """Raise ValueError unless ``pattern`` is a usable strptime pattern for a time column.

    It must be a text of at most MAX_PATTERN_CHARS characters with at least
    one ``%`` directive that Python's ``datetime.strptime`` knows, and it
    must not use ``%Z``: strptime accepts a zone *name* there but returns a
    time without a zone, so the name would be ignored (use ``%z``, a numeric
    offset such as +0200, instead).
    """
    import datetime as _dt

    if not isinstance(pattern, str) or not pattern.strip():
        raise ValueError("the time pattern must be a non-empty text such as '%d/%m/%Y %H:%M'.")
    if len(pattern) > MAX_PATTERN_CHARS:
        raise ValueError(f"the time pattern is longer than {MAX_PATTERN_CHARS} characters.")
    if "%" not in pattern.replace("%%", ""):
        raise ValueError(f"the time pattern {pattern!r} has no % directive (e.g. %Y, %m, %d, %H, %M, %S).")
    if "%Z" in pattern.replace("%%", ""):
        raise ValueError(f"the time pattern {pattern!r} uses %Z, a zone name that strptime does not turn into "
                         "an offset; use %z (a numeric offset such as +0200 or Z).")
    # A round trip through a known instant finds unknown directives and stray '%' signs.
    probe = _dt.datetime(2001, 2, 3, 4, 5, 6, 789000, tzinfo=_dt.timezone(_dt.timedelta(hours=2)))
    try:
        _dt.datetime.strptime(probe.strftime(pattern), pattern)
    except ValueError as e:
        why = " ".join(str(e).split()).rstrip(".")  # one line, whatever the pattern holds
        raise ValueError(f"the time pattern {pattern!r} cannot be used: {why}.") from None
