r"""What a solver backend is, and the one forward pass every JAX backend runs.

A backend solves the block-tridiagonal normal equations H x = g of the
smoothing problem (``normal_equations.py``) and keeps a factor of H for what
follows: the adjoint solve of the implicit-function VJP (``primitive.py``),
log|H| for the likelihood, and the band of H⁻¹ for covariances.

Every forward pass is the same four steps, written once in
:func:`checked_solve` so that no backend can leave one out:

1. assemble H and g from the model, the measurements and the mask;
2. factor H and solve (the backend's own algorithm);
3. refine x with the model's residual and estimate its error
   (``accuracy.refine``, settings from ``tolerances.py``);
4. mark the factor failed (and x NaN) when the factorisation broke down or
   the estimate stayed above the bar.

The compiled CPU kernel performs the same four steps in C++ in one sweep
(``cpu/smoother.h``: ``forward_one`` then ``refine_one``) with the settings
passed in as attributes; its pure-JAX twin, which defines its derivatives,
goes through :func:`checked_solve` like every other backend.
"""

from __future__ import annotations

import dataclasses
from typing import Callable, NamedTuple, Optional

import numpy as np

from .. import accuracy, tolerances
from ..normal_equations import assemble


class Backend(NamedTuple):
    """A solver of the normal equations, selectable as ``method=name``.

    forward: ``(model, y, w) -> (x (T, n), factor)``; x NaN and ``factor.ok``
        False when the answer is not trusted.
    adjoint: ``(factor, v (T, n)) -> H⁻¹ v``, with the stored factor.
    logdet: ``(factor) -> log|H|``.
    band_inverse: ``(factor) -> (Σ_tt (T, n, n), Σ_{t+1,t} (T-1, n, n))``,
        the band of H⁻¹. None: the factor is a ``blocktri.BlockFactor`` and
        ``blocktri.selected_inverse`` applies.
    band_tangent: ``(factor, Σ_tt, Σ_{t+1,t}, dH_tt, dH_{t+1,t}) ->
        (dΣ_tt, dΣ_{t+1,t})``, the band of −Σ dH Σ from the factor and the
        band of Σ (``covariance_band.py``: the covariances' derivatives,
        without a tape). None: JAX differentiates ``band_inverse`` itself.
    band_pullback: ``(model, w, D̄ (T, n, n), S̄ (T-1, n, n)) -> model_bar``,
        a cotangent on the blocks of H (D̄ on H_tt, S̄ on H_{t+1,t}) pulled
        back to the model (A, Q, C, R, x0_cov; the other fields None): the
        last step of the covariances' reverse mode (a compiled kernel).
        None: JAX's VJP of the assembly (``covariance_band.py``).
    gradients: ``(model, y, w, x, factor, x_bar) -> (model_bar, y_bar)``,
        the whole implicit-function backward pass in one call (a fused
        compiled kernel), kept as a reference and for callers that want it;
        the primitive's derivatives do not use it (``primitive.py``: they are
        one tangent rule that JAX transposes).
    log_likelihood: ``(model, y, w, x, factor) -> (value, model_bar, y_bar)``,
        log p(y) and its gradient w.r.t. every model field and y from the
        stored factor, in one pass (a compiled kernel). None: the JAX route
        of ``likelihood.py`` (band of H⁻¹, then autodiff of per-step terms).
    float32_in_double: True when float32 problems are factored and solved
        in double precision (the compiled kernel); False: in float32.
    implicit_derivatives: True when derivatives of x* come from the
        implicit function of the normal equations (``primitive.py``: one
        solve with the stored factor per tangent or cotangent). False: JAX
        differentiates ``forward`` itself (the covariance-form filter, whose
        recursions avoid Q⁻¹, which the implicit function needs).
    refined: True when the answer is certified by refinement with the
        normal equations' residual ("accurate or NaN", ``accuracy.py``);
        False for the covariance-form filter (``covariance_form.py``), which
        never forms H and is NaN only when one of its own factors fails.
    """

    forward: Callable
    adjoint: Callable
    logdet: Callable
    band_inverse: Optional[Callable] = None
    band_tangent: Optional[Callable] = None
    band_pullback: Optional[Callable] = None
    gradients: Optional[Callable] = None
    log_likelihood: Optional[Callable] = None
    float32_in_double: bool = False
    refined: bool = True
    implicit_derivatives: bool = True


def arithmetic_dtype(backend: Backend, dtype):
    """The precision ``backend`` computes a ``dtype`` problem in."""
    if backend.float32_in_double and np.dtype(dtype) == np.float32:
        return np.dtype(np.float64)
    return np.dtype(dtype)


class Unavailable(NamedTuple):
    """A backend that could not be set up here (e.g. its library did not load), and why."""

    reason: str


def with_ok(factor, ok):
    """The factor with its ``ok`` flag replaced (NamedTuple or dataclass factors)."""
    if dataclasses.is_dataclass(factor):
        return dataclasses.replace(factor, ok=ok)
    return factor._replace(ok=ok)


def checked_solve(model, y, w, factor_solve, solve):
    """Assemble, factor and solve, refine, mark: the forward pass of every JAX backend.

    Args:
        model, y, w: the canonicalised problem.
        factor_solve: ``(diag, sub, rhs, pivot_tol) -> (x, factor)`` with
            ``factor.ok`` the scalar verdict of the factorisation (x NaN when
            it failed); ``pivot_tol`` from ``tolerances.pivot_tolerance``,
            which depends on whether x_0 has a prior.
        solve: ``(factor, v) -> H⁻¹ v`` with that factor.

    Returns:
        ``(x, factor, system)``: the refined x (NaN when not trusted), the
        factor with ``ok`` replaced by the final verdict, and the assembled
        ``NormalEquations`` (for backends that keep parts of it).
    """
    system = assemble(model, y, w)
    tol = tolerances.pivot_tolerance(y.dtype, model.A.shape[-1], flat_prior=model.x0_cov is None)
    x, factor = factor_solve(system.diag, system.sub, system.rhs, tol)
    x, ok = accuracy.refine(model, y, w, x, factor.ok, factor, solve)
    return x, with_ok(factor, ok), system
