"""Measurement tables: read and write CSV (built in) and Parquet (needs pyarrow).

A table is (column names, {name: list of cells}). CSV cells are strings
('' for blank); Parquet cells are Python values (None for null). Writers go
through :class:`~.atomic_outputs.AtomicOutputs`.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Dict, List, Sequence, Tuple

from .atomic_outputs import AtomicOutputs
from .errors import DataError


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
        data = table.to_pydict()
        return list(table.column_names), data
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
    dupes = sorted({h for h in header if header.count(h) > 1})
    if dupes:
        raise DataError(f"{path}: the header names these columns more than once: {', '.join(dupes)}.")
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

        arrays = {k: [clean(v) for v in columns[k]] for k in names}
        tmp = out.temp_for(path)
        pq.write_table(pa.table(arrays), tmp)
        return
    tmp = out.temp_for(path)
    with open(tmp, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(names)
        n = len(columns[names[0]]) if names else 0
        for i in range(n):
            w.writerow([_csv_cell(columns[k][i]) for k in names])
