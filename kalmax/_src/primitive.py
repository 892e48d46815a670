r"""The smoothing primitive: x* = argmin_x J(x; θ), with an implicit-function VJP.

Forward: assemble the block-tridiagonal normal equations H x = g and solve them
with a block Cholesky factorisation; keep the factor as the residual.

Backward (for a cotangent x̄ = ∂ℓ/∂x*): differentiate the optimality condition
∇ₓJ(x*(θ); θ) = 0,

    H dx* + ∂_θ(∇ₓJ) dθ = 0   ⇒   dx* = −H⁻¹ ∂_θ(∇ₓJ) dθ,

so with the adjoint u = H⁻¹ x̄ (one more solve with the *stored* factor; H is
symmetric) the gradient is

    θ̄ = −∂_θ [uᵀ ∇ₓJ(x; θ)]  evaluated at x = x*, with u and x* held fixed.

That scalar is a sum of per-step terms (``stationarity_pairing``), so its
gradient is formed by ordinary reverse-mode AD over vectorised per-step
operations: no tape through the time recursion, and every input (A, C, Q, R,
b, d, the prior and the measurements y) gets its gradient from the same
expression.

Adjoint refinement (float32 arithmetic): the adjoint solve uses the stored
factor of H, which in float32 carries the same rounding as the forward
solve's first answer (up to κ(H)·eps32 relative; ~1e-2 on the constant-
velocity tracking model of tests/test_float32_ordinary.py). The forward
answer is refined (``accuracy.refine``); the adjoint gets the same treatment
without a verdict: two corrections u ← u + H̃⁻¹(x̄ − H u), with H u formed from
the model's whitened blocks like the forward residual (−∇J of the problem
with zero data and offsets), so H is never formed. Each correction multiplies
the error by about κ(H)·eps, as in the forward pass. Backends that compute
in double (the compiled kernel) and float64 problems skip it.

Backends: the solve itself is pluggable so that compiled kernels and
parallel-in-time variants can sit behind the same VJP (``backends/``: what a
backend is in ``base.py``, the table in ``registry.py``).
"""

from __future__ import annotations

from functools import partial
import jax
import jax.numpy as jnp
import numpy as np

from . import accuracy, blocktri, manual_axes
from .backends.base import Backend, arithmetic_dtype
from .backends.registry import get_backend, resolve_method
from .model import StateSpace
from .normal_equations import stationarity_pairing


def band_inverse(backend: Backend, factor):
    """The block-tridiagonal band of H⁻¹ from a backend's factor."""
    if backend.band_inverse is not None:
        return backend.band_inverse(factor)
    return blocktri.selected_inverse(factor)


@partial(jax.custom_vjp, nondiff_argnums=(3,))
def _means(model: StateSpace, y, w, method: str):
    x, _ = get_backend(method).forward(model, y, w)
    return x


def _means_fwd(model, y, w, method):
    x, factor = get_backend(method).forward(model, y, w)
    return x, (model, y, w, x, factor)


def _means_bwd(method, res, x_bar):
    model, y, w, x, factor = res
    backend = get_backend(method)
    if backend.gradients is not None:
        model_bar, y_bar = backend.gradients(model, y, w, x, factor, x_bar)
        return model_bar, y_bar, jnp.zeros_like(w)
    u = _adjoint(backend, model, w, factor, x_bar)

    def pairing(model_, y_):
        return stationarity_pairing(model_, y_, w, x, u)

    _, pull = jax.vjp(pairing, model, y)
    model_bar, y_bar = pull(manual_axes.like(-jnp.ones((), x.dtype), x))
    return model_bar, y_bar, jnp.zeros_like(w)


_means.defvjp(_means_fwd, _means_bwd)

ADJOINT_CORRECTIONS = 2


def _adjoint(backend: Backend, model: StateSpace, w, factor, v):
    """u = H⁻¹ v with the stored factor; refined when the factor is float32 (module docstring)."""
    u = backend.adjoint(factor, v)
    if arithmetic_dtype(backend, v.dtype) != np.float32:
        return u
    # H u = −(the residual of the problem with no data and no offsets at u).
    bare = model.replace(b=None, d=None, x0_mean=None)
    zeros = jnp.zeros(w.shape, v.dtype)
    for _ in range(ADJOINT_CORRECTIONS):
        u = u + backend.adjoint(factor, v + accuracy.residual(bare, zeros, w, u))
    return u


def smoothed_means(model: StateSpace, y, w, method: str = "auto"):
    """x* (T, n) for a canonicalised problem; differentiable in model and y.

    Args:
        model: canonicalised StateSpace (one float dtype).
        y: (T, p) measurements (missing entries arbitrary, NaN allowed).
        w: (T, p) 0/1 mask in the float dtype (1 = observed); not differentiated.
        method: backend name ("auto" picks the default for the platform).
    """
    # One varying-axes type for all inputs under shard_map, so that the VJP's
    # cotangents can be typed like them (manual_axes.py).
    model, y, w = manual_axes.like((model, y, jax.lax.stop_gradient(w)))
    return _means(model, y, w, resolve_method(method))
