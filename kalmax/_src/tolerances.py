r"""The numerical settings of every solver backend, in one place.

Three numbers decide what a solve returns, and the pure-JAX backends and the
compiled CPU kernel must use the same ones. They are defined here and only
here: the JAX paths read them from this module, and the kernel receives them
as XLA FFI attributes on every call (``backends/cpu.py``), so there is no
second copy to drift.

* ``pivot_tolerance(dtype, n, flat_prior=True)``: a block Cholesky pivot
  whose square falls below this fraction of the matching diagonal entry of H
  has lost nearly all of its digits to cancellation, and the factor is
  reported as failed. ``dtype`` is the precision of the *arithmetic* (the
  compiled kernel factors float32 problems in double, so it passes float64).
  Common practice for rank detection in Cholesky-type factorisations is a
  small multiple of n·eps.

  - Flat prior on x_0: H can be exactly singular (states not identified),
    and then the pivot is rounding noise, which refinement cannot see (the
    objective is flat along that direction). That noise was measured at
    ~1e4·eps in float64 (2e-12 after six steps with the compiled kernel's
    operation order), so the tolerance is max(100·n·eps, eps^(2/3)).
  - Proper prior: H ⪰ (prior + transition precision) is positive definite
    whatever the data, so no direction is unidentified; a small pivot is
    small information, not a missing one. Ordinary tracking models make such
    pivots routinely: a quiet position process (Q = 1e-5 beside R = 1,
    tests/test_float32_ordinary.py) gives (pivot)²/H_ii ≈ 4.5e-5, just under
    the flat-prior float32 value 100·n·eps = 4.8e-5. The only question is
    whether the pivot is above its own rounding, about (n + 1)·eps·H_ii for a
    Cholesky step (Higham (2002), Accuracy and Stability of Numerical
    Algorithms, 2nd ed., Thm 10.3 -- from memory); 10·n·eps keeps that
    rounding under ~10 % of the pivot, and the refinement check (below) then
    decides, from the model's own residual, whether the answer is accurate.
    Measured on the tracking sweep of benchmarks/float32_sweep.py (200
    models, float64): 85.5 % → 90 % solved, none finite and wrong.
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


def pivot_tolerance(dtype, n: int, flat_prior: bool = True) -> float:
    """Smallest accepted ratio (pivot)² / H_ii in a block Cholesky step.

    ``dtype``: precision of the arithmetic; n: block size; ``flat_prior``:
    whether x_0 has no prior (then H may be singular; see the module docstring).
    """
    if "pivot_tolerance" in _overrides:
        return float(_overrides["pivot_tolerance"])
    eps = float(np.finfo(np.dtype(dtype)).eps)
    if not flat_prior:
        return 10 * n * eps
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
    """Use other settings inside the block (tests and diagnostics; read at trace time).

    The settings are baked into compiled programs, and the public entry points
    keep theirs compiled per shape: JAX's caches are cleared on entering and
    leaving the block, so that neither side reuses a program built with the
    other settings.
    """
    import jax

    given = dict(pivot_tolerance=pivot_tolerance, trusted_error=trusted_error,
                 max_refine_steps=max_refine_steps, stall_ratio=stall_ratio)
    saved = dict(_overrides)
    _overrides.update({k: v for k, v in given.items() if v is not None})
    jax.clear_caches()
    try:
        yield
    finally:
        _overrides.clear()
        _overrides.update(saved)
        jax.clear_caches()
