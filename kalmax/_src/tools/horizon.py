"""Forecast rows past the end of a record: the horizon, the step, and timestamps written like the column's.

``kalmax fit`` and ``kalmax apply`` with ``--forecast N`` append N rows after
the last timestamp, spaced by ``--forecast-step`` (default: the typical step
of the record, the lower median of its time steps, which is always one of the
steps in the data). The rows have no measurements; smoothing the extended
series gives, at each of them, the distribution of the state given every
measurement, which is the forecast distribution (nothing after the record
conditions it). ``apply_workflow`` and the report mark them as forecast rows.

Timestamps. Each new time cell is the exact last timestamp plus k steps,
written as the column writes its cells: numbers as decimal text (or the
Parquet cell's type), ISO 8601 date-times in the last row's style (a date, a
time without a zone, or a time at the last row's UTC offset, ``Z`` kept), text
read with a strptime pattern through the same pattern, Parquet timestamps
with the column's resolution and zone. The model times of the new rows are
then read back from those cells by the same exact route as the record's
(``series.exact_time``), so the smoothed rows and the written timestamps
agree; a step finer than the column can write is refused rather than
rounded into repeated timestamps.

Future inputs. A composed model with a regression needs its input columns at
the forecast rows too, which no step can invent: ``--future-inputs FILE``
gives the forecast rows instead, one per row of FILE (its time column and the
input columns), read by :func:`rows_from_table`.
"""

from __future__ import annotations

import datetime as _dt
import decimal
import math
from fractions import Fraction
from typing import Optional

import numpy as np

from .errors import DataError, UsageError
from .series import Series, _parse_time, exact_time, input_values, missing_words, to_model_time
from .tables import _NS_PER, Instant
from .time_units import UNITS, parse_duration

MAX_FORECAST_ROWS = 1_000_000
_EPOCH_NAIVE = _dt.datetime(1970, 1, 1)
_EPOCH_UTC = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)
_DAY = Fraction(86400)


def parse_steps(text) -> int:
    """The number of forecast rows from the text of ``--forecast``; UsageError unless 1..MAX_FORECAST_ROWS."""
    try:
        steps = int(str(text).strip())
    except ValueError:
        raise UsageError(f"--forecast {text!r}: give the number of forecast rows, a whole number such as 48.") \
            from None
    if not 1 <= steps <= MAX_FORECAST_ROWS:
        raise UsageError(f"--forecast {text!r}: the number of forecast rows must be from 1 to {MAX_FORECAST_ROWS}.")
    return steps


def check_step(text: Optional[str]) -> None:
    """Check the syntax of ``--forecast-step`` before any work (UsageError)."""
    if text is None:
        return
    try:
        parse_duration(text, "--forecast-step")
    except ValueError as e:
        raise UsageError(str(e)) from None


def step_needs_unit(text: Optional[str], time_format: str, time_unit: Optional[str]) -> bool:
    """Whether ``--forecast-step`` names a unit that the model's unnamed numeric time axis cannot convert."""
    if text is None or time_format != "number" or time_unit is not None:
        return False
    try:
        return parse_duration(text, "--forecast-step")[1] is not None
    except ValueError:
        return False


def typical_step(series: Series) -> Fraction:
    """The lower median of the record's time steps, exactly, in native units (seconds or numbers)."""
    d = np.diff(series.t)
    k = int(np.argsort(d, kind="stable")[(d.size - 1) // 2])
    pattern = series.clock.pattern
    return Fraction(exact_time(series.times_raw[k + 1], pattern) - exact_time(series.times_raw[k], pattern))


def native_step(series: Series, text: Optional[str]) -> Fraction:
    """The forecast step in native units: seconds for date-times, the column's numbers for numbers."""
    if text is None:
        return typical_step(series)
    try:
        amount, unit = parse_duration(text, "--forecast-step")
    except ValueError as e:
        raise UsageError(str(e)) from None
    clock = series.clock
    if unit is None:
        return amount * clock.native_per_unit
    if series.time_format == "iso8601":
        return amount * UNITS[unit]
    if clock.unit is None:
        raise UsageError(f"--forecast-step {text!r} names a unit, but the numeric time column has no named unit; "
                         "give the step as a plain number in the column's units, or name the unit with "
                         "--time-unit.")
    return amount * UNITS[unit] * clock.native_per_unit / UNITS[clock.unit]


def duration_rows(series: Series, text: str, option: str) -> int:
    """A duration with a unit (``6h``, ``2 day``) as a number of rows of ``series``: the duration divided
    by the typical step (:func:`typical_step`), rounded, at least 1. On a regular record that is exactly
    the rows the duration spans; on an irregular one, the rows it spans at the typical rate."""
    try:
        amount, unit = parse_duration(text, option)
    except ValueError as e:
        raise UsageError(str(e)) from None
    clock = series.clock
    if series.time_format == "iso8601":
        native = amount * UNITS[unit]
    elif clock is None or clock.unit is None:
        raise UsageError(f"{option} {text!r} names a time unit, but the numeric time column has no named unit; "
                         "give the length in rows, or name the column's unit with --time-unit.")
    else:
        native = amount * UNITS[unit] * clock.native_per_unit / UNITS[clock.unit]
    return max(1, round(native / typical_step(series)))


# ----------------------------------------------------------------------------
# Writing a timestamp like the column writes its cells
# ----------------------------------------------------------------------------


def _decimal_text(v: Fraction, step: Fraction) -> str:
    """``v`` as decimal text: exact when it terminates in at most 30 digits, else to 16 digits of the step."""
    den, twos, fives = v.denominator, 0, 0
    while den % 2 == 0:
        den //= 2
        twos += 1
    while den % 5 == 0:
        den //= 5
        fives += 1
    places = max(twos, fives)
    if den != 1 or places > 30:
        places = max(0, 16 - math.floor(math.log10(step)))
    scaled = round(v * 10**places)
    digits = str(abs(scaled)).rjust(places + 1, "0")
    text = digits if not places else f"{digits[:-places]}.{digits[-places:]}"
    if places:
        text = text.rstrip("0").rstrip(".")
    return ("-" if scaled < 0 else "") + text


def _number_cell(last_cell, value: Fraction, step: Fraction):
    if isinstance(last_cell, bool) or isinstance(last_cell, str):
        return _decimal_text(value, step)
    if isinstance(last_cell, int):
        return int(value) if value.denominator == 1 else float(value)
    if isinstance(last_cell, decimal.Decimal):
        return decimal.Decimal(_decimal_text(value, step))
    return float(value)


def _offset_text(offset: _dt.timedelta) -> str:
    total = int(offset.total_seconds())
    sign = "-" if total < 0 else "+"
    h, rest = divmod(abs(total), 3600)
    m, s = divmod(rest, 60)
    return f"{sign}{h:02d}:{m:02d}" + (f":{s:02d}" if s else "")


def _iso_cell(ns: int, style: str, offset: Optional[_dt.timedelta], zulu: bool) -> str:
    seconds, frac = divmod(ns, 1_000_000_000)
    local = _EPOCH_NAIVE + _dt.timedelta(seconds=seconds) + (offset or _dt.timedelta(0))
    if style == "date":
        return local.date().isoformat()
    text = local.isoformat(timespec="seconds")
    if frac:
        text += "." + f"{frac:09d}".rstrip("0")
    if style == "zoned":
        text += "Z" if zulu and not offset else _offset_text(offset or _dt.timedelta(0))
    return text


def _datetime_cell(last_cell, seconds: Fraction, style: str, pattern: Optional[str]):
    ns = round(seconds * 1_000_000_000)
    if isinstance(last_cell, Instant):
        factor = _NS_PER.get(last_cell.unit, 1)
        return Instant(round(Fraction(ns, factor)) * factor, last_cell.unit, last_cell.zone)
    micro = round(Fraction(ns, 1000))
    if isinstance(last_cell, _dt.datetime):
        if last_cell.tzinfo is not None:
            return (_EPOCH_UTC + _dt.timedelta(microseconds=micro)).astimezone(last_cell.tzinfo)
        return _EPOCH_NAIVE + _dt.timedelta(microseconds=micro)
    if isinstance(last_cell, _dt.date):
        return (_EPOCH_NAIVE + _dt.timedelta(microseconds=micro)).date()
    text = last_cell.strip() if isinstance(last_cell, str) else str(last_cell)
    from .series import _parse_time  # the offset of the last cell

    offset = _parse_time(last_cell, pattern)[3]
    if pattern is not None:
        when = _EPOCH_NAIVE + _dt.timedelta(microseconds=micro) + (offset or _dt.timedelta(0))
        if offset is not None:
            when = when.replace(tzinfo=_dt.timezone(offset))
        return when.strftime(pattern)
    return _iso_cell(ns, style, offset, zulu=text[-1:] in ("Z", "z"))


def future_cells(series: Series, steps: int, step: Fraction) -> list:
    """The time cells of ``steps`` forecast rows, ``step`` (native units) apart after the last row."""
    clock = series.clock
    last = Fraction(clock.last)
    last_cell = series.times_raw[-1]
    if series.time_format == "number":
        return [_number_cell(last_cell, last + k * step, step) for k in range(1, steps + 1)]
    if clock.style == "date" and step % _DAY:
        raise UsageError(f"the time column holds dates, so the forecast step must be a whole number of days; "
                         f"got {float(step / _DAY):.6g} days.")
    try:
        return [_datetime_cell(last_cell, last + k * step, clock.style, clock.pattern) for k in range(1, steps + 1)]
    except (OverflowError, ValueError):
        raise UsageError(f"the forecast runs past the last date a timestamp can hold (the year 9999): {steps} rows "
                         "of the forecast step are too long.") from None


def extend(series: Series, steps: int, step_text: Optional[str] = None) -> Series:
    """``series`` with ``steps`` forecast rows appended (no measurements; ``forecast`` = steps).

    Raises :class:`UsageError` for a step the time column cannot write (the
    new timestamps would repeat or not increase) or a horizon past the
    datetime range.
    """
    clock = series.clock
    step = native_step(series, step_text)
    cells = future_cells(series, steps, step)
    exact = [exact_time(c, clock.pattern) for c in cells]
    prev = clock.last
    for k, v in enumerate(exact):
        if v is None or v <= prev:
            raise UsageError(f"the forecast step is finer than the time column can write: forecast row {k + 1} "
                             f"would be written {cells[k]!s}, not after {series.times_raw[-1] if k == 0 else cells[k - 1]!s}."
                             " Give a larger --forecast-step.")
        prev = v
    return _append(series, cells, exact, None, UsageError, "give a larger --forecast-step or fewer rows")


def _append(series: Series, cells: list, exact: list, inputs, error, remedy: str) -> Series:
    """``series`` with rows at the exact times ``exact`` (written ``cells``) appended as forecast rows.

    ``inputs``: column → values of the new rows for each of ``series.inputs`` (None: unknown, NaN).
    """
    clock = series.clock
    steps = len(cells)
    t_new = np.array([to_model_time(v, clock.first, clock.native_per_unit) for v in exact])
    t = np.concatenate([series.t, t_new])
    if not (np.all(np.isfinite(t_new)) and np.all(np.diff(t) > 0)):
        raise error("the forecast timestamps are too close together (or too far out) to tell apart in "
                    f"float64 at their distance from the first timestamp; {remedy}.")
    y = np.concatenate([series.y, np.full((steps, series.y.shape[1]), np.nan)])
    known = None
    if series.inputs is not None:
        known = {k: np.concatenate([v, np.full(steps, np.nan) if inputs is None else inputs[k]])
                 for k, v in series.inputs.items()}
    return series._replace(times_raw=list(series.times_raw) + cells, t=t, y=y, forecast=steps, inputs=known)


def rows_from_table(series: Series, names, cols, time_column: str, *, source: str, limit: Optional[int] = None,
                    missing=None) -> Series:
    """``series`` with the rows of a future-inputs table appended as forecast rows (``--future-inputs``).

    The table needs ``time_column`` (written like the record's: the same kind
    of timestamps, read with the same pattern) and every input column of
    ``series.inputs``, with a value in every cell; its times must come after
    the record's last one and increase. ``limit``: use only the first rows.
    Raises :class:`DataError` naming the file, row and column.
    """
    wanted = [time_column] + list(series.inputs or ())
    absent = [c for c in wanted if c not in cols]
    if absent:
        raise DataError(f"{source}: no column named {', '.join(repr(c) for c in absent)}; the future inputs need "
                        f"the time column and the input column(s): {', '.join(repr(c) for c in wanted)}.")
    cells = list(cols[time_column])[:limit]
    if not cells or (limit is not None and len(cells) < limit):
        raise DataError(f"{source}: {len(cells)} row(s), but {limit or 1} forecast row(s) were asked for: the future "
                        "inputs give one forecast row per row.")
    clock = series.clock
    exact, prev = [], clock.last
    for i, cell in enumerate(cells):
        parsed = None if cell is None or (isinstance(cell, str) and not cell.strip()) else _parse_time(
            cell, clock.pattern)
        if parsed is None or parsed[1] != series.time_format:
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is not a timestamp "
                            f"like the record's ({series.time_format}" + (f", pattern {clock.pattern!r}"
                                                                            if clock.pattern else "") + ").")
        if parsed[0] <= prev:
            after = series.times_raw[-1] if i == 0 else cells[i - 1]
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is not after "
                            f"{after!r}; forecast rows must follow the record's last timestamp and increase.")
        prev = parsed[0]
        exact.append(parsed[0])
    known = {c: input_values(list(cols[c])[:len(cells)], c, source, missing_words(missing))
             for c in series.inputs or ()}
    return _append(series, cells, exact, known, DataError, "space the future rows further apart")
