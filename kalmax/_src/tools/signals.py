"""Stop signals during a command: Ctrl-C (SIGINT) and SIGTERM both unwind cleanly.

Python turns SIGINT into KeyboardInterrupt, but SIGTERM (what ``kill``,
``timeout`` and job schedulers send) ends the process on the spot, leaving
temporary output files behind. While :func:`raise_on_stop_signals` is active,
either signal raises :class:`Interrupted` in the main thread instead, so every
``with`` block unwinds (:class:`~.atomic_outputs.AtomicOutputs` deletes its
temporary files) and the command exits with 130 (SIGINT) or 143 (SIGTERM).

While outputs are renamed into place, :func:`held` holds both signals back
and delivers them when the renames are done, so that a stop never leaves a
set of outputs half renamed (unless the process is killed outright, e.g. by
SIGKILL or a power cut).

Signal handlers can only be set from the main thread; elsewhere both
functions do nothing.
"""

from __future__ import annotations

import contextlib
import signal
import threading

STOP_SIGNALS = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM") if hasattr(signal, name))

_commit_done = [False]


class Interrupted(KeyboardInterrupt):
    """Raised by a stop signal while :func:`raise_on_stop_signals` is active.

    ``signum``: the signal; ``after_commit``: True when the signal came while
    or after every output was renamed into place (the outputs are complete).
    """

    def __init__(self, signum: int, after_commit: bool = False):
        super().__init__(signum)
        self.signum = signum
        self.after_commit = after_commit

    @property
    def name(self) -> str:
        try:
            return signal.Signals(self.signum).name
        except ValueError:
            return f"signal {self.signum}"


def _in_main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


def _raise(signum, frame):
    raise Interrupted(signum, after_commit=_commit_done[0])


def note_commit() -> None:
    """Record that a set of outputs was renamed into place (read by the handler of this run)."""
    _commit_done[0] = True


def _restore(previous) -> None:
    for s, handler in previous.items():
        signal.signal(s, signal.SIG_DFL if handler is None else handler)


@contextlib.contextmanager
def raise_on_stop_signals():
    """For the block: SIGINT and SIGTERM raise :class:`Interrupted`; the old handlers come back after."""
    if not _in_main_thread():
        yield
        return
    _commit_done[0] = False
    previous = {s: signal.getsignal(s) for s in STOP_SIGNALS}
    for s in STOP_SIGNALS:
        signal.signal(s, _raise)
    try:
        yield
    finally:
        _restore(previous)


@contextlib.contextmanager
def held():
    """Hold SIGINT and SIGTERM back during the block; deliver them, in order of arrival, after it."""
    if not _in_main_thread():
        yield
        return
    caught = []
    previous = {s: signal.signal(s, lambda signum, frame: caught.append(signum)) for s in STOP_SIGNALS}
    try:
        yield
    finally:
        _restore(previous)
        for s in dict.fromkeys(caught):
            signal.raise_signal(s)  # the handler of the surrounding code runs now
