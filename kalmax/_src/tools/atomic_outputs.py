"""All-or-nothing outputs: a command's files all appear, or none is touched.

Each output is written to a temporary file in its destination folder, named
``.NAME.kalmax-XXXXXXXX.part`` (NAME: the output's file name; XXXXXXXX:
random letters, digits and underscores). Only after *all* outputs of a
command were written:

1. each temporary file gets its final permissions (an existing file's mode,
   else the usual mode for a new file under the process umask) and is
   flushed to the disk (``fsync``);
2. each one is renamed over its destination (a rename within one folder is
   atomic on POSIX and Windows file systems), with SIGINT and SIGTERM held
   back until the last rename is done;
3. each destination folder is flushed (``fsync`` of the folder, where the
   operating system allows it), so the renames themselves survive a crash.

An error or a stop signal before step 2 removes every temporary file and
leaves every destination as it was. What a crash can leave: a power cut or
SIGKILL between two renames of step 2 leaves some outputs new and the others
old, but never a partially written file, since each destination is either
the complete old file or the complete new one; one killed before step 2
leaves its temporary files behind. Those carry the name above, are never
mistaken for outputs, and can be deleted; a later run that writes the same
output removes the ones older than a day (only regular files of the current
user whose name has exactly that form).
"""

from __future__ import annotations

import os
import re
import stat
import tempfile
import threading
import time
from pathlib import Path
from typing import List, Tuple

from . import signals
from .errors import DataError

TEMP_MARK = ".kalmax-"
TEMP_SUFFIX = ".part"
STALE_AFTER_S = 24 * 3600  # a temporary file older than this is left over from a killed run

_umask_lock = threading.Lock()


def temporary_name_pattern(name: str) -> "re.Pattern[str]":
    """The names of the temporary files for an output called ``name`` (and nothing else)."""
    return re.compile("^" + re.escape(f".{name}{TEMP_MARK}") + "[a-z0-9_]+" + re.escape(TEMP_SUFFIX) + "$")


def _umask() -> int:
    try:
        with open("/proc/self/status", encoding="ascii", errors="replace") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    with _umask_lock:  # no way to read it without setting it
        old = os.umask(0o022)
        os.umask(old)
    return old


def _mode_for(final: Path) -> int:
    """The mode ``final`` should have: that of the file it replaces, else 0666 less the umask."""
    try:
        st = os.stat(final)
        if stat.S_ISREG(st.st_mode):
            return stat.S_IMODE(st.st_mode)
    except OSError:
        pass
    return 0o666 & ~_umask()


def remove_stale_temporaries(folder: Path, name: str, now: float = None) -> List[str]:
    """Delete temporary files for output ``name`` in ``folder`` left by a run killed over a day ago.

    Only regular files (not links, not folders) owned by the current user
    whose name matches :func:`temporary_name_pattern` exactly. Returns the
    names removed; never raises.
    """
    pattern = temporary_name_pattern(name)
    now = time.time() if now is None else now
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        if not pattern.match(entry.name):
            continue
        try:
            st = entry.stat(follow_symlinks=False)
            if not stat.S_ISREG(st.st_mode) or now - st.st_mtime < STALE_AFTER_S:
                continue
            if hasattr(os, "getuid") and st.st_uid != os.getuid():
                continue
            os.unlink(entry.path)
            removed.append(entry.name)
        except OSError:
            continue
    return removed


def _fsync_path(path, flags) -> None:
    fd = os.open(path, flags)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_folder(folder: Path) -> None:
    if os.name == "nt":  # folders cannot be opened for fsync there; NTFS journals the renames
        return
    try:
        _fsync_path(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # some file systems refuse fsync on a folder; the renames are done anyway
        pass


class AtomicOutputs:
    """Collect outputs in temporary files; rename them all into place on success.

    Usage::

        with AtomicOutputs() as out:
            write_something(out.temp_for("result.csv"))
            write_other(out.temp_for("report.png"))
        # both exist now, or (after an exception) neither was touched
    """

    def __init__(self):
        self._pending: List[Tuple[Path, Path, int]] = []

    def temp_for(self, final) -> Path:
        final = Path(final)
        folder = final.parent if str(final.parent) else Path(".")
        if not folder.is_dir():
            raise DataError(f"cannot write {final}: folder {folder} does not exist.")
        if final.is_dir():
            raise DataError(f"cannot write {final}: it is a folder.")
        remove_stale_temporaries(folder, final.name)
        mode = _mode_for(final)
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{final.name}{TEMP_MARK}", suffix=TEMP_SUFFIX, dir=folder)
        except OSError as e:
            raise DataError(f"cannot write {final}: {e.strerror}.") from None
        self._pending.append((Path(tmp), final, mode))
        try:
            if hasattr(os, "fchmod"):
                os.fchmod(fd, mode)
        except OSError:
            pass
        finally:
            os.close(fd)
        return Path(tmp)

    def __enter__(self) -> "AtomicOutputs":
        return self

    def _discard(self) -> None:
        for tmp, _, _ in self._pending:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass
            except OSError:
                pass

    def _commit(self) -> None:
        for tmp, final, mode in self._pending:
            try:
                if os.name == "nt":
                    _fsync_path(tmp, os.O_RDWR)
                    os.chmod(tmp, mode)
                else:
                    os.chmod(tmp, mode)  # writers may have made the file anew
                    _fsync_path(tmp, os.O_RDONLY)
            except OSError as e:
                raise DataError(f"cannot write {final}: {e.strerror}.") from None
        with signals.held():
            for tmp, final, _ in self._pending:
                try:
                    os.replace(tmp, final)
                except OSError as e:
                    raise DataError(f"cannot write {final}: {e.strerror}.") from None
            for folder in dict.fromkeys(final.parent for _, final, _ in self._pending):
                _fsync_folder(folder if str(folder) else Path("."))
            signals.note_commit()

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is not None:
            self._discard()
            return False
        try:
            self._commit()
        except BaseException:
            self._discard()  # the ones not renamed yet
            raise
        return False
