"""From a table to a :class:`Series`: the time column and the measured columns, checked.

Data problems raise :class:`DataError` with a message that names the file,
row and column.
"""

from __future__ import annotations

import datetime as _dt
import math
from typing import Dict, NamedTuple, Optional, Sequence

import numpy as np

from .errors import DataError

_MISSING = {"", "nan", "na", "n/a", "null", "none", "-"}


class Series(NamedTuple):
    """Measurements read from a table.

    times_raw: the time cells as read (written back unchanged).
    t: (T,) float64 model times, relative to the first timestamp (seconds
       for ISO 8601 date-times, file units for numbers).
    y: (T, p) float64 measurements, NaN where missing.
    time_format: "number" or "iso8601".
    """

    times_raw: list
    t: np.ndarray
    y: np.ndarray
    time_format: str

    @property
    def mask(self) -> np.ndarray:
        return ~np.isnan(self.y)


def _parse_time(cell):
    """(value in seconds or file units, format) of one time cell; None if unparseable."""
    if isinstance(cell, _dt.datetime):
        dt = cell if cell.tzinfo else cell.replace(tzinfo=_dt.timezone.utc)
        return dt.timestamp(), "iso8601"
    if isinstance(cell, _dt.date):
        return _dt.datetime(cell.year, cell.month, cell.day, tzinfo=_dt.timezone.utc).timestamp(), "iso8601"
    if isinstance(cell, (int, float)) and not isinstance(cell, bool):
        return float(cell), "number"
    if isinstance(cell, str):
        s = cell.strip()
        try:
            return float(s), "number"
        except ValueError:
            pass
        try:
            dt = _dt.datetime.fromisoformat(s)
        except ValueError:
            return None
        dt = dt if dt.tzinfo else dt.replace(tzinfo=_dt.timezone.utc)
        return dt.timestamp(), "iso8601"
    return None


def _parse_value(cell, col, row, source):
    if cell is None:
        return math.nan
    if isinstance(cell, (int, float)) and not isinstance(cell, bool):
        v = float(cell)
    elif isinstance(cell, str):
        s = cell.strip()
        if s.lower() in _MISSING:
            return math.nan
        try:
            v = float(s)
        except ValueError:
            raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not a number "
                            "(leave the cell blank for a missing value).") from None
    else:
        raise DataError(f"{source}: column {col!r}, data row {row}: cannot use a value of type "
                        f"{type(cell).__name__} as a measurement.")
    if math.isnan(v):
        return v
    if not math.isfinite(v):
        raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not finite.")
    return v


def series_from_table(names: Sequence[str], cols: Dict[str, list], time_column: str,
                      columns: Sequence[str], *, source: str = "input",
                      time_format: Optional[str] = None) -> Series:
    """Pick and check the time and measurement columns of a table.

    Errors (all :class:`DataError`): a missing column, an unparseable or blank
    timestamp, timestamps that are not strictly increasing, a non-numeric
    measurement cell, fewer than two rows, a measurement column with no
    observation at all, and (when ``time_format`` is given) timestamps of the
    other kind than the model was fitted on.
    """
    wanted = [time_column] + list(columns)
    missing = [c for c in wanted if c not in cols]
    if missing:
        raise DataError(f"{source}: no column named {', '.join(repr(c) for c in missing)}; "
                        f"the file has columns {', '.join(repr(c) for c in names)}.")
    raw = cols[time_column]
    T = len(raw)
    if T < 2:
        raise DataError(f"{source}: {T} data row(s); at least 2 are needed.")
    t = np.empty(T)
    fmt = None
    for i, cell in enumerate(raw):
        parsed = _parse_time(cell)
        if parsed is None or (isinstance(cell, str) and not cell.strip()) or cell is None:
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is neither a "
                            "number nor an ISO 8601 date-time (e.g. 2024-05-01T12:00:00Z).")
        value, f = parsed
        if fmt is None:
            fmt = f
        elif f != fmt:
            raise DataError(f"{source}: time column {time_column!r} mixes numbers and date-times "
                            f"(data row {i + 1}: {cell!r}).")
        if not math.isfinite(value):
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is not finite.")
        t[i] = value
    if time_format is not None and fmt != time_format:
        raise DataError(f"{source}: the model was fitted on {time_format} timestamps, but time column "
                        f"{time_column!r} holds {fmt} values.")
    dt = np.diff(t)
    bad = np.nonzero(dt <= 0)[0]
    if bad.size:
        i = int(bad[0]) + 1
        what = "repeats" if dt[bad[0]] == 0 else "goes back before"
        raise DataError(f"{source}: timestamps must be strictly increasing, but data row {i + 1} ({raw[i]!r}) "
                        f"{what} data row {i} ({raw[i - 1]!r}); {bad.size} such place(s). Sort the rows by "
                        "time and merge rows that share a timestamp.")
    y = np.empty((T, len(columns)))
    for j, c in enumerate(columns):
        y[:, j] = [_parse_value(cell, c, i + 1, source) for i, cell in enumerate(cols[c])]
    counts = np.sum(~np.isnan(y), axis=0)
    if counts.sum() == 0:
        raise DataError(f"{source}: no observations: every cell of {', '.join(repr(c) for c in columns)} "
                        "is blank or missing.")
    empty = [c for c, k in zip(columns, counts) if k == 0]
    if empty:
        raise DataError(f"{source}: column(s) {', '.join(repr(c) for c in empty)} hold no observation at all; "
                        "drop them from the measured columns.")
    return Series(times_raw=list(raw), t=t - t[0], y=y, time_format=fmt)


def column_scales(series: Series, mask):
    """Per-column scale s_j (std of observed values): losses weight columns by 1/s_j²."""
    y = np.where(mask, series.y, np.nan)
    s = np.nanstd(y, axis=0)
    return np.where(np.isfinite(s) & (s > 0), s, 1.0)
