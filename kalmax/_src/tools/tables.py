"""Measurement tables: read and write CSV (built in) and Parquet (needs pyarrow).

A table is (column names, {name: list of cells}). CSV cells are strings
('' for blank); Parquet cells are Python values (None for null), except that
a timestamp column gives :class:`Instant` cells (exact integer nanoseconds,
whatever the column's resolution) and a column of a type that cannot be
turned into Python values gives :class:`Unreadable` cells (an error only if
the column is used). Writers go through :class:`~.atomic_outputs.AtomicOutputs`.
"""

from __future__ import annotations

import csv
import datetime as _dt
import math
from collections import Counter
from pathlib import Path
from typing import Dict, List, NamedTuple, Optional, Sequence, Tuple

from .atomic_outputs import AtomicOutputs
from .errors import DataError

_NS_PER = {"s": 1_000_000_000, "ms": 1_000_000, "us": 1_000, "ns": 1}
_DIGITS = {"s": 0, "ms": 3, "us": 6, "ns": 9}
_EPOCH = _dt.datetime(1970, 1, 1)
# Instants that datetime can show (years 1 to 9999).
_MIN_NS = (_dt.datetime(1, 1, 1) - _EPOCH) // _dt.timedelta(microseconds=1) * 1000
_MAX_NS = (_dt.datetime(9999, 12, 31, 23, 59, 59) - _EPOCH) // _dt.timedelta(microseconds=1) * 1000


class Instant(NamedTuple):
    """A timestamp from a Parquet timestamp column, kept exactly.

    ns: integer nanoseconds since 1970-01-01T00:00:00 (UTC when ``zone`` is
        set; for a column without a time zone, the wall-clock time read as UTC).
    unit: the column's resolution, "s", "ms", "us" or "ns" (kept when written back).
    zone: the column's time zone name, None for a column without one.

    ``str()`` gives ISO 8601 with the digits of the resolution, in UTC with a
    ``Z`` when the column has a zone.
    """

    ns: int
    unit: str = "ns"
    zone: Optional[str] = None

    def __str__(self) -> str:
        seconds, frac = divmod(self.ns, 1_000_000_000)
        text = (_EPOCH + _dt.timedelta(seconds=seconds)).isoformat(timespec="seconds")
        digits = _DIGITS.get(self.unit, 9)
        if digits:
            text += "." + f"{frac:09d}"[:digits]
        return text + ("Z" if self.zone else "")


class Unreadable(NamedTuple):
    """A cell of a Parquet column whose type cannot be turned into Python values."""

    type: str
    why: str


def _check_names(path, names: Sequence[str]) -> None:
    counts = Counter(names)  # one pass: headers may have hundreds of thousands of columns
    dupes = sorted(h for h, k in counts.items() if k > 1)
    if dupes:
        shown = ", ".join(repr(h) for h in dupes[:20]) + (f", ... ({len(dupes)} in all)" if len(dupes) > 20 else "")
        raise DataError(f"{path}: the header names these columns more than once: {shown}.")


def _parquet_cells(column, pa) -> list:
    """The cells of one Parquet column (see the module docstring)."""
    typ = column.type
    if pa.types.is_timestamp(typ):
        factor = _NS_PER[typ.unit]
        out = []
        for v in column.cast(pa.int64()).to_pylist():
            if v is None:
                out.append(None)
                continue
            ns = v * factor
            if not _MIN_NS <= ns <= _MAX_NS:
                return [Unreadable(str(typ), "a timestamp outside the years 1 to 9999")] * len(column)
            out.append(Instant(ns, typ.unit, typ.tz or None))
        return out
    if pa.types.is_duration(typ):
        # Refused by type, not by what to_pylist returns: that is a timedelta
        # or, when pandas is installed, a pandas Timedelta.
        return [Unreadable(str(typ), "a duration (a length of time), neither a time stamp nor a number")] * len(column)
    try:
        return column.to_pylist()
    except (ValueError, TypeError, OverflowError, NotImplementedError, pa.ArrowException) as e:
        return [Unreadable(str(typ), str(e).split("\n")[0][:200])] * len(column)


def _format_of(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    return "csv"


def _need_pyarrow(path):
    try:
        import pyarrow  # noqa: F401
        import pyarrow.parquet  # noqa: F401
    except ImportError:
        raise DataError(
            f"{path}: Parquet files need the optional package pyarrow, which is not installed. "
            "Install it with `pip install pyarrow` (or `pip install kalmax[parquet]`), or use a CSV file."
        ) from None
    import pyarrow.parquet as pq

    return pq


def read_table(path) -> Tuple[List[str], Dict[str, list]]:
    """Read a CSV or Parquet table: (column names, {name: list of cell values}).

    CSV cells are strings ('' for blank); Parquet cells are Python values
    (None for null). The format follows the file extension (.parquet/.pq =
    Parquet, anything else = CSV with a header row).
    """
    path = Path(path)
    if not path.exists():
        raise DataError(f"cannot read {path}: no such file.")
    if path.is_dir():
        raise DataError(f"cannot read {path}: it is a folder, not a file.")
    if _format_of(path) == "parquet":
        pq = _need_pyarrow(path)
        try:
            table = pq.read_table(path)
        except Exception as e:  # pyarrow raises several unrelated types for bad files
            raise DataError(f"cannot read {path} as Parquet: {e}") from None
        import pyarrow as pa

        names = [str(n) for n in table.column_names]
        _check_names(path, names)
        return names, {n: _parquet_cells(c, pa) for n, c in zip(names, table.columns)}
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            rows = list(csv.reader(f))
    except UnicodeDecodeError as e:
        raise DataError(f"cannot read {path} as CSV: it is not UTF-8 text ({e.reason} at byte {e.start}).") from None
    except (OSError, csv.Error) as e:
        raise DataError(f"cannot read {path} as CSV: {e}") from None
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise DataError(f"{path} is empty: a CSV file needs a header row naming its columns.")
    header = [h.strip() for h in rows[0]]
    _check_names(path, header)
    cols: Dict[str, list] = {h: [] for h in header}
    for lineno, row in enumerate(rows[1:], start=2):
        if not row or (len(row) == 1 and not row[0].strip()):
            continue  # blank line
        if len(row) != len(header):
            raise DataError(f"{path}, line {lineno}: {len(row)} cells, but the header has {len(header)} columns.")
        for h, cell in zip(header, row):
            cols[h].append(cell.strip())
    return header, cols


def _csv_cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return "" if math.isnan(v) else repr(v)
    return str(v)


def write_table(path, names: Sequence[str], columns: Dict[str, Sequence], out: AtomicOutputs) -> None:
    """Write a table to ``path`` (CSV or, by extension, Parquet) through ``out``.

    Float NaN is written as a blank CSV cell / a Parquet null.
    """
    path = Path(path)
    if _format_of(path) == "parquet":
        pq = _need_pyarrow(path)
        import pyarrow as pa

        def clean(v):
            return None if isinstance(v, float) and math.isnan(v) else v

        def array(values):
            instants = [v for v in values if v is not None]
            if instants and all(isinstance(v, Instant) for v in instants):
                first = instants[0]
                if all(v.unit == first.unit and v.zone == first.zone for v in instants):
                    factor = _NS_PER[first.unit]
                    ints = pa.array([None if v is None else v.ns // factor for v in values], pa.int64())
                    return ints.cast(pa.timestamp(first.unit, tz=first.zone))
                return pa.array([None if v is None else str(v) for v in values], pa.string())
            return [clean(v) for v in values]

        arrays = {k: array(columns[k]) for k in names}
        tmp = out.temp_for(path)
        pq.write_table(pa.table(arrays), tmp)
        return
    tmp = out.temp_for(path)
    with open(tmp, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(names)
        # Column by column, the plain floats inline (the per-cell call was most of the ~10 s of a
        # 10⁶-row table), then every row in one writerows: the same text as a writerow per row.
        cells = [[("" if v != v else repr(v)) if type(v) is float else _csv_cell(v) for v in columns[k]]
                 for k in names]
        w.writerows(zip(*cells))
