"""From a table to a :class:`Series`: the time column and the measured columns, checked.

Data problems raise :class:`DataError` with a message that names the file,
row and column.
"""

from __future__ import annotations

import datetime as _dt
import decimal
import math
import re
from fractions import Fraction
from typing import Dict, Iterable, NamedTuple, Optional, Sequence

import numpy as np

from .errors import DataError
from .tables import Instant, Unreadable
from .time_units import UNITS

# Words read as a missing measurement (compared without case and surrounding
# spaces). A blank cell is always missing. The command line's --missing
# replaces this set.
DEFAULT_MISSING = ("nan", "na", "n/a", "null", "none", "-")

# Time differences are formed exactly (decimal arithmetic, 60 significant
# digits: enough for epoch nanoseconds with many more digits to spare) and
# rounded to float64 once, relative to the first time.
_EXACT = decimal.Context(prec=60, rounding=decimal.ROUND_HALF_EVEN)
_MAX_FRACTION_DIGITS = 30  # digits after the decimal point of an ISO 8601 time
_EPOCH = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)
# "YYYY-MM-DD" (or another ISO 8601 date), one separator, "HH:MM:SS", a fraction, an optional zone.
# datetime.fromisoformat reads at most microseconds, so the fraction is read here.
_ISO_FRACTION = re.compile(r"^(?P<head>[0-9W-]+[^0-9W:+.,-][0-9]{2}:?[0-9]{2}:?[0-9]{2})[.,](?P<digits>[0-9]+)"
                           r"(?P<tail>(?:[Zz]|[+-][0-9:.,]*)?)$", re.ASCII)

# The styles of a time column; one column holds one style.
_STYLE_WORDS = {
    "number": "a number",
    "date": "a date without a time of day",
    "zoned": "a date-time with a time zone",
    "unzoned": "a date-time without a time zone",
}


class Clock(NamedTuple):
    """How the model's time axis was made from the time column (read by forecasts and the report).

    unit: the time unit of ``Series.t`` (a name of ``time_units.UNITS``), or
        None for numbers in the column's own, unnamed unit.
    native_per_unit: exact number of *native* units in one unit of ``t``:
        seconds for date-times, the column's numbers for numbers.
    first, last: the exact first and last timestamps in native units
        (seconds since 1970-01-01 UTC for date-times, the numbers themselves).
    style: "number", "date", "zoned" or "unzoned" (see ``_STYLE_WORDS``).
    pattern: the strptime pattern the date-times were read with (None: ISO 8601).
    offset: the UTC offset that every row shares (date-times with a zone),
        None when the rows carry different offsets or none at all.
    """

    unit: Optional[str]
    native_per_unit: Fraction
    first: decimal.Decimal
    last: decimal.Decimal
    style: str
    pattern: Optional[str] = None
    offset: Optional[_dt.timedelta] = None


class Series(NamedTuple):
    """Measurements read from a table.

    times_raw: the time cells as read (written back unchanged).
    t: (T,) float64 model times, relative to the first timestamp, in the
       time unit of ``clock`` (seconds for date-times unless another unit was
       asked for; the file's own units for numbers). Each t[i] is the exact
       difference time[i] - time[0], divided exactly by the unit and rounded
       once to float64.
    y: (T, p) float64 measurements, NaN where missing.
    time_format: "number" or "iso8601" (date-times, however they were written).
    clock: how ``t`` was made (None for a series built by hand: numbers, no unit).
    forecast: the last ``forecast`` rows are forecast rows appended past the
       record (no measurements; see ``horizon.py``).
    inputs: the regression input columns of a composed model, column name →
       (T,) float64 values (known at every row; None when the model has none).
    """

    times_raw: list
    t: np.ndarray
    y: np.ndarray
    time_format: str
    clock: Optional[Clock] = None
    forecast: int = 0
    inputs: Optional[Dict[str, np.ndarray]] = None

    @property
    def mask(self) -> np.ndarray:
        return ~np.isnan(self.y)

    @property
    def unit(self) -> Optional[str]:
        """The time unit of ``t`` (None: the numbers' own unit)."""
        if self.clock is not None:
            return self.clock.unit
        return "s" if self.time_format == "iso8601" else None


def _epoch_seconds(dt: _dt.datetime) -> decimal.Decimal:
    """Exact seconds since 1970-01-01 UTC (a datetime without a zone is read as UTC)."""
    aware = dt if dt.tzinfo else dt.replace(tzinfo=_dt.timezone.utc)
    d = aware - _EPOCH
    micro = (d.days * 86400 + d.seconds) * 1_000_000 + d.microseconds
    return decimal.Decimal(micro).scaleb(-6, context=_EXACT)


def _parse_iso(s: str):
    """(exact seconds since the epoch, style) of an ISO 8601 text; None if it is not one."""
    try:
        day = _dt.date.fromisoformat(s)
    except ValueError:
        pass
    else:
        return _epoch_seconds(_dt.datetime(day.year, day.month, day.day)), "date", None
    fraction = decimal.Decimal(0)
    text = s
    m = _ISO_FRACTION.match(s)
    if m:
        digits = m.group("digits")
        if len(digits) > _MAX_FRACTION_DIGITS:
            return None
        fraction = decimal.Decimal("0." + digits)  # exact: a Decimal made from text is never rounded
        text = m.group("head") + m.group("tail")
    try:
        dt = _dt.datetime.fromisoformat(text)
    except ValueError:
        return None
    return _EXACT.add(_epoch_seconds(dt), fraction), ("zoned" if dt.tzinfo is not None else "unzoned"), \
        dt.utcoffset()


def _parse_pattern(s: str, pattern: str):
    """(exact seconds since the epoch, style, offset) of a text read with a strptime pattern; None if it does not match."""
    try:
        dt = _dt.datetime.strptime(s, pattern)
    except ValueError:
        return None
    return _epoch_seconds(dt), ("zoned" if dt.tzinfo is not None else "unzoned"), dt.utcoffset()


def _parse_time(cell, pattern: Optional[str] = None):
    """(exact value, format, style, UTC offset or None) of one time cell; None if unparseable.

    The value is a :class:`decimal.Decimal`: seconds since 1970-01-01 for
    date-times (format "iso8601"), the number itself for numbers ("number").
    With a strptime ``pattern``, text cells (and integers, as their digits)
    are read with it and nothing else.
    """
    if isinstance(cell, Instant):
        value = decimal.Decimal(cell.ns).scaleb(-9, context=_EXACT)
        return value, "iso8601", ("zoned" if cell.zone else "unzoned"), (_dt.timedelta(0) if cell.zone else None)
    if isinstance(cell, _dt.datetime):
        return _epoch_seconds(cell), "iso8601", ("zoned" if cell.tzinfo is not None else "unzoned"), cell.utcoffset()
    if isinstance(cell, _dt.date):
        return _epoch_seconds(_dt.datetime(cell.year, cell.month, cell.day)), "iso8601", "date", None
    if isinstance(cell, bool):
        return None
    if pattern is not None:
        if isinstance(cell, int):
            cell = str(cell)
        if not isinstance(cell, str):
            return None
        parsed = _parse_pattern(cell.strip(), pattern)
        return None if parsed is None else (parsed[0], "iso8601", parsed[1], parsed[2])
    if isinstance(cell, (int, float, decimal.Decimal)):
        return decimal.Decimal(cell), "number", "number", None
    if isinstance(cell, str):
        s = cell.strip()
        try:
            return decimal.Decimal(s), "number", "number", None
        except (decimal.InvalidOperation, ValueError):
            pass
        parsed = _parse_iso(s)
        if parsed is None:
            return None
        return parsed[0], "iso8601", parsed[1], parsed[2]
    return None


def exact_time(cell, pattern: Optional[str] = None) -> Optional[decimal.Decimal]:
    """The exact native value of one time cell (epoch seconds or the number); None if unparseable."""
    parsed = _parse_time(cell, pattern)
    return None if parsed is None else parsed[0]


def to_model_time(value, first, native_per_unit: Fraction) -> float:
    """(value − first) / native_per_unit, exact until one final rounding to float64."""
    d = _EXACT.subtract(value, first)
    if native_per_unit == 1:
        return float(d)
    num, den = d.as_integer_ratio()
    try:
        return (num * native_per_unit.denominator) / (den * native_per_unit.numerator)  # int / int: correctly rounded
    except OverflowError:
        return math.inf


def _unreadable(cell: Unreadable, col, source):
    return DataError(f"{source}: column {col!r} has the Parquet type {cell.type}, which kalmax cannot read "
                     f"({cell.why.rstrip('.')}).")


def _parse_value(cell, col, row, source, missing=frozenset(DEFAULT_MISSING)):
    if cell is None:
        return math.nan
    if isinstance(cell, Unreadable):
        raise _unreadable(cell, col, source)
    if isinstance(cell, (int, float, decimal.Decimal)) and not isinstance(cell, bool):
        try:
            v = float(cell)
        except (ValueError, OverflowError):  # a signalling NaN, an integer past the float range
            v = math.inf
    elif isinstance(cell, str):
        s = cell.strip()
        if not s or s.lower() in missing:
            return math.nan
        try:
            v = float(s)
        except ValueError:
            raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not a number "
                            "(leave the cell blank for a missing value, or name the word with --missing).") from None
        if math.isnan(v) and "nan" not in missing:
            raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not a number "
                            "(leave the cell blank for a missing value, or name the word with --missing).")
    else:
        raise DataError(f"{source}: column {col!r}, data row {row}: cannot use a value of type "
                        f"{type(cell).__name__} as a measurement.")
    if math.isnan(v):
        return v
    if not math.isfinite(v):
        raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not finite.")
    return v


def _names_text(names: Sequence[str], limit: int = 20) -> str:
    shown = ", ".join(repr(c) for c in names[:limit])
    return shown if len(names) <= limit else f"{shown}, ... ({len(names)} in all)"


def missing_words(words: Optional[Iterable[str]]) -> frozenset:
    """The set of missing-value words (lower case, stripped); ``None`` gives :data:`DEFAULT_MISSING`."""
    return frozenset(w.strip().lower() for w in (DEFAULT_MISSING if words is None else words))


def series_from_table(names: Sequence[str], cols: Dict[str, list], time_column: str,
                      columns: Sequence[str], *, source: str = "input",
                      time_format: Optional[str] = None,
                      missing: Optional[Iterable[str]] = None,
                      time_unit: Optional[str] = None,
                      numeric_time_unit: Optional[str] = None,
                      time_pattern: Optional[str] = None,
                      inputs: Sequence[str] = ()) -> Series:
    """Pick and check the time and measurement columns of a table.

    ``missing``: the words read as a missing measurement, compared without
    case and surrounding spaces (default :data:`DEFAULT_MISSING`); a blank
    cell is always missing, and so is a null or NaN number in a Parquet
    column. A text cell that reads as NaN (``nan``, ``+nan``) is missing only
    when ``nan`` is one of the words.

    Errors (all :class:`DataError`): a missing column, an unparseable or blank
    timestamp, a time column that mixes numbers and date-times or date-time
    styles (with and without a time zone, dates and date-times), timestamps
    that are not strictly increasing (compared exactly) or too close together
    to tell apart in float64 relative to the first, a non-numeric
    measurement cell, fewer than two rows, a measurement column with no
    observation at all, and (when ``time_format`` is given) timestamps of the
    other kind than the model was fitted on.

    Time units (``time_units.UNITS``): date-times give ``t`` in ``time_unit``
    (default seconds). Numbers are taken to be in ``time_unit`` already (no
    conversion; None: their own unnamed unit), unless ``numeric_time_unit``
    says what they count in: then they are converted exactly from that unit
    to ``time_unit`` (which defaults to it). ``time_pattern``: a strptime
    pattern that reads every text cell as a date-time (instead of numbers
    and ISO 8601); a time without ``%z`` is read as UTC.

    ``inputs``: regression input columns (known values, not measurements),
    read into ``Series.inputs``; a missing cell in one of them is a
    :class:`DataError` naming the row (an input must be known at every row).
    """
    missing_set = missing_words(missing)
    wanted = [time_column] + list(columns) + list(inputs)
    absent = [c for c in wanted if c not in cols]
    if absent:
        raise DataError(f"{source}: no column named {', '.join(repr(c) for c in absent)}; "
                        f"the file has columns {_names_text(list(names))}.")
    raw = cols[time_column]
    T = len(raw)
    if T < 2:
        raise DataError(f"{source}: {T} data row(s); at least 2 are needed.")
    exact = []
    fmt = style = None
    first_style_row = 0
    offset0, offsets_differ = None, False
    for i, cell in enumerate(raw):
        if isinstance(cell, Unreadable):
            raise _unreadable(cell, time_column, source)
        parsed = _parse_time(cell, time_pattern)
        if parsed is None or (isinstance(cell, str) and not cell.strip()) or cell is None:
            if time_pattern is not None:
                raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} does not match "
                                f"the time pattern {time_pattern!r}.")
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is neither a "
                            "number nor an ISO 8601 date-time (e.g. 2024-05-01T12:00:00Z).")
        value, f, st, offset = parsed
        if fmt is None:
            fmt, style, first_style_row, offset0 = f, st, i, offset
        elif f != fmt:
            raise DataError(f"{source}: time column {time_column!r} mixes numbers and date-times "
                            f"(data row {i + 1}: {cell!r}).")
        elif st != style:
            raise DataError(f"{source}: time column {time_column!r} mixes timestamp styles: data row "
                            f"{first_style_row + 1} ({raw[first_style_row]!r}) is {_STYLE_WORDS[style]}, data row "
                            f"{i + 1} ({cell!r}) is {_STYLE_WORDS[st]}. Write every timestamp the same way "
                            "(e.g. all with a time zone, such as 2024-05-01T12:00:00Z).")
        elif offset != offset0:
            offsets_differ = True
        if not value.is_finite() or not math.isfinite(float(value)):
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is not finite.")
        exact.append(value)
    if time_format is not None and fmt != time_format:
        raise DataError(f"{source}: the model was fitted on {time_format} timestamps, but time column "
                        f"{time_column!r} holds {fmt} values.")
    if fmt == "iso8601":
        if numeric_time_unit is not None:
            raise DataError(f"{source}: a unit for numeric timestamps ({numeric_time_unit}) was given, but time "
                            f"column {time_column!r} holds date-times.")
        unit = time_unit or "s"
        native_per_unit = UNITS[unit]
    elif numeric_time_unit is not None:
        unit = time_unit or numeric_time_unit
        native_per_unit = UNITS[unit] / UNITS[numeric_time_unit]
    else:
        unit, native_per_unit = time_unit, Fraction(1)
    bad = [i for i in range(1, T) if exact[i] <= exact[i - 1]]  # exact comparisons
    if bad:
        i = bad[0]
        what = "repeats" if exact[i] == exact[i - 1] else "goes back before"
        raise DataError(f"{source}: timestamps must be strictly increasing, but data row {i + 1} ({raw[i]!r}) "
                        f"{what} data row {i} ({raw[i - 1]!r}); {len(bad)} such place(s). Sort the rows by "
                        "time and merge rows that share a timestamp.")
    first = exact[0]
    if native_per_unit == 1:
        t = np.array([float(_EXACT.subtract(v, first)) for v in exact])
    else:
        t = np.array([to_model_time(v, first, native_per_unit) for v in exact])
    if not np.all(np.isfinite(t)):
        raise DataError(f"{source}: time column {time_column!r} spans more than the floating-point range.")
    dt = np.diff(t)
    close = np.nonzero(dt <= 0)[0]
    if close.size:
        i = int(close[0]) + 1
        raise DataError(f"{source}: data rows {i} and {i + 1} of time column {time_column!r} ({raw[i - 1]!r}, "
                        f"{raw[i]!r}) are too close together to tell apart in float64 at their distance from the "
                        f"first timestamp ({raw[0]!r}); {close.size} such place(s).")
    clock = Clock(unit=unit, native_per_unit=native_per_unit, first=first, last=exact[-1], style=style,
                  pattern=time_pattern if fmt == "iso8601" else None,
                  offset=None if (offsets_differ or style != "zoned") else offset0)
    y = np.empty((T, len(columns)))
    for j, c in enumerate(columns):
        y[:, j] = [_parse_value(cell, c, i + 1, source, missing_set) for i, cell in enumerate(cols[c])]
    counts = np.sum(~np.isnan(y), axis=0)
    if counts.sum() == 0:
        raise DataError(f"{source}: no observations: every cell of {', '.join(repr(c) for c in columns)} "
                        "is blank or missing.")
    empty = [c for c, k in zip(columns, counts) if k == 0]
    if empty:
        raise DataError(f"{source}: column(s) {', '.join(repr(c) for c in empty)} hold no observation at all; "
                        "drop them from the measured columns.")
    known = {c: input_values(cols[c], c, source, missing_set) for c in inputs} or None
    return Series(times_raw=list(raw), t=t, y=y, time_format=fmt, clock=clock, inputs=known)


def input_values(cells, column: str, source: str, missing=frozenset(DEFAULT_MISSING)) -> np.ndarray:
    """(T,) float64 values of a regression input column; a missing or bad cell is a :class:`DataError`."""
    values = np.array([_parse_value(cell, column, i + 1, source, missing) for i, cell in enumerate(cells)],
                      dtype=np.float64)
    gaps = np.nonzero(np.isnan(values))[0]
    if gaps.size:
        raise DataError(f"{source}: input column {column!r}, data row {int(gaps[0]) + 1}: the value is missing "
                        f"({gaps.size} missing in all). A regression reads its inputs at every row: fill the cells "
                        "(e.g. with the last known value, if that is right for your inputs), or drop those rows.")
    return values


def first_datetime(series: Series) -> _dt.datetime:
    """The first timestamp of an ``iso8601`` series as a datetime in UTC (microseconds, truncated)."""
    first = series.clock.first if series.clock is not None else _parse_time(series.times_raw[0])[0]
    micro = int(first.scaleb(6, context=_EXACT).to_integral_value(rounding=decimal.ROUND_FLOOR))
    return _EPOCH + _dt.timedelta(microseconds=micro)


def column_scales(series: Series, mask):
    """Per-column scale s_j (std of observed values): losses weight columns by 1/s_j²."""
    y = np.where(mask, series.y, np.nan)
    s = np.nanstd(y, axis=0)
    return np.where(np.isfinite(s) & (s > 0), s, 1.0)
