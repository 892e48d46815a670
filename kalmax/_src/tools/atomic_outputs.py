"""All-or-nothing outputs: a command's files all appear, or none is touched.

Each output is written to a temporary file in its destination folder and
renamed into place only after *all* outputs of a command were written, so a
failure never leaves a partial or half-updated set of files behind (a rename
within one folder is atomic on POSIX and Windows file systems).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import List, Tuple

from .errors import DataError


class AtomicOutputs:
    """Collect outputs in temporary files; rename them all into place on success.

    Usage::

        with AtomicOutputs() as out:
            write_something(out.temp_for("result.csv"))
            write_other(out.temp_for("report.png"))
        # both exist now, or (after an exception) neither was touched
    """

    def __init__(self):
        self._pending: List[Tuple[Path, Path]] = []

    def temp_for(self, final) -> Path:
        final = Path(final)
        folder = final.parent if str(final.parent) else Path(".")
        if not folder.is_dir():
            raise DataError(f"cannot write {final}: folder {folder} does not exist.")
        if final.is_dir():
            raise DataError(f"cannot write {final}: it is a folder.")
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".part", dir=folder)
        except OSError as e:
            raise DataError(f"cannot write {final}: {e.strerror}.") from None
        os.close(fd)
        self._pending.append((Path(tmp), final))
        return Path(tmp)

    def __enter__(self) -> "AtomicOutputs":
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            for tmp, final in self._pending:
                os.replace(tmp, final)
        else:
            for tmp, _ in self._pending:
                try:
                    tmp.unlink()
                except FileNotFoundError:
                    pass
        return False
