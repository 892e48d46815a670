r"""The numerical settings of every solver backend, in one place.

Three numbers decide what a solve returns, and the pure-JAX backends and the
compiled CPU kernel must use the same ones. They are defined here and only
here: the JAX paths read them from this module, and the kernel receives them
as XLA FFI attributes on every call (``backends/cpu.py``), so there is no
second copy to drift.

* ``pivot_tolerance(dtype, n)``: a block Cholesky pivot whose square falls
  below this fraction of the matching diagonal entry of H has lost nearly
  all of its digits to cancellation, and the factor is reported as failed.
  Common practice for rank detection in Cholesky-type factorisations is a
  small multiple of n·eps; we also keep a floor of eps^(2/3), because the
  rounding of the Schur-complement recursion on a truly singular system was
  measured at ~1e4·eps in float64 (2e-12 after six steps with the compiled
  kernel's operation order), above 100·n·eps.
* ``trusted_error(dtype)``: the largest estimated relative forward error
  ‖δ‖∞/‖x‖∞ of an answer we return (``accuracy.py``). A design choice, not a
  published value: 1e-6 keeps six significant digits in float64; float32
  carries only about seven in all, so 1e-3 keeps three.
* ``MAX_REFINE_STEPS`` and ``STALL_RATIO``: refinement takes at most this
  many corrections, and stops early once an estimate fails to shrink below
  ``STALL_RATIO`` times the previous one (each step shrinks the error by
  about κ(H)·eps, so a problem that stops shrinking is too ill-conditioned
  for the dtype). The verdict is then made on the last estimate alone: an
  estimate that stalled inside the tolerance is accepted, one that stalled
  above it is not.

``overridden(...)`` changes the settings inside a ``with`` block. It exists
so that tests can drive every backend, the compiled one included, through a
chosen case of the refinement rule; the values are read when a function is
traced, so use it around un-jitted calls or functions traced inside it.
"""

from __future__ import annotations

import contextlib
from typing import Dict, Iterator, Optional

import numpy as np

_TRUSTED: Dict[np.dtype, float] = {np.dtype(np.float64): 1e-6, np.dtype(np.float32): 1e-3}
MAX_REFINE_STEPS = 4
STALL_RATIO = 0.5

_overrides: Dict[str, object] = {}


def pivot_tolerance(dtype, n: int) -> float:
    """Smallest accepted ratio (pivot)² / H_ii in a block Cholesky step, for ``dtype`` and block size n."""
    if "pivot_tolerance" in _overrides:
        return float(_overrides["pivot_tolerance"])
    eps = float(np.finfo(np.dtype(dtype)).eps)
    return max(100 * n * eps, eps ** (2 / 3))


def trusted_error(dtype) -> float:
    """The largest estimated relative error of a returned answer, for ``dtype``."""
    if "trusted_error" in _overrides:
        return float(_overrides["trusted_error"])
    return _TRUSTED[np.dtype(dtype)]


def max_refine_steps() -> int:
    """At most this many refinement corrections per solve."""
    return int(_overrides.get("max_refine_steps", MAX_REFINE_STEPS))


def stall_ratio() -> float:
    """Refinement stops once an estimate is not below this multiple of the previous one."""
    return float(_overrides.get("stall_ratio", STALL_RATIO))


@contextlib.contextmanager
def overridden(*, pivot_tolerance: Optional[float] = None, trusted_error: Optional[float] = None,
               max_refine_steps: Optional[int] = None, stall_ratio: Optional[float] = None) -> Iterator[None]:
    """Use other settings inside the block (tests and diagnostics; read at trace time)."""
    given = dict(pivot_tolerance=pivot_tolerance, trusted_error=trusted_error,
                 max_refine_steps=max_refine_steps, stall_ratio=stall_ratio)
    saved = dict(_overrides)
    _overrides.update({k: v for k, v in given.items() if v is not None})
    try:
        yield
    finally:
        _overrides.clear()
        _overrides.update(saved)
