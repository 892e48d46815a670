"""The table of solver backends: names to :class:`~.base.Backend` (or why one is unavailable).

This module imports no backend. ``backends/__init__.py`` is the one place
that fills the table; tests add temporary entries with :func:`temporary`,
which removes them again on exit.
"""

from __future__ import annotations

import contextlib
from typing import Dict, Iterator, Tuple, Union

import jax

from .base import Backend, Unavailable

_TABLE: Dict[str, Union[Backend, Unavailable]] = {}

# Platforms whose default solve is the parallel-in-time one: O(log T) depth
# keeps an accelerator busy, a scan over time would not.
_ACCELERATORS = ("gpu", "cuda", "rocm", "tpu")


def register(name: str, backend: Union[Backend, Unavailable]) -> None:
    """Make ``backend`` selectable as ``method=name`` (or record why it cannot be)."""
    if name == "auto":
        raise ValueError("'auto' is reserved: it picks a backend for the platform")
    _TABLE[name] = backend


def unregister(name: str) -> None:
    _TABLE.pop(name, None)


@contextlib.contextmanager
def temporary(name: str, backend: Backend) -> Iterator[None]:
    """Register ``backend`` as ``name`` inside the block only (restoring what was there)."""
    before = _TABLE.get(name)
    register(name, backend)
    try:
        yield
    finally:
        if before is None:
            unregister(name)
        else:
            _TABLE[name] = before


def available() -> Tuple[str, ...]:
    """Names of the backends usable here, sorted."""
    return tuple(sorted(k for k, v in _TABLE.items() if isinstance(v, Backend)))


def unavailable() -> Dict[str, str]:
    """Backends registered as unavailable, with the reason for each."""
    return {k: v.reason for k, v in _TABLE.items() if isinstance(v, Unavailable)}


def is_available(name: str) -> bool:
    return isinstance(_TABLE.get(name), Backend)


def resolve_method(method: str) -> str:
    """The backend name for ``method``; ``"auto"`` picks the default for the platform.

    auto: "parallel" on accelerators, the compiled kernel "cpu" on CPU when it
    loaded, otherwise the portable "scan". (The public entry points also give
    "auto" a per-trajectory fallback, :func:`fallback_method`.)
    """
    if method == "auto":
        platform = jax.default_backend()
        if platform in _ACCELERATORS and is_available("parallel"):
            return "parallel"
        if platform == "cpu" and is_available("cpu"):
            return "cpu"
        return "scan"
    entry = _TABLE.get(method)
    if isinstance(entry, Backend):
        return method
    why = ""
    if isinstance(entry, Unavailable):
        why = f" method={method!r} is not available here: {entry.reason}"
    raise ValueError(f"method must be one of {sorted(available() + ('auto',))}; got {method!r}.{why}")


# The backend that ``method="auto"`` falls back to, per trajectory, where the
# platform's backend returns NaN for a finite problem (``fallback.py``).
FALLBACK = "covariance"


def fallback_method(method: str, flat_prior: bool, p: int):
    """The backend that ``method`` falls back to where its answer is NaN, or None.

    Only ``"auto"`` falls back (an explicit method is taken at its word), and
    only with a prior on x_0 (the covariance-form filter needs one) and at
    least one measurement column (p > 0; it factors p×p innovation covariances).
    """
    if method != "auto" or flat_prior or p == 0 or not is_available(FALLBACK) or resolve_method(method) == FALLBACK:
        return None
    return FALLBACK


def get_backend(method: str) -> Backend:
    return _TABLE[resolve_method(method)]
