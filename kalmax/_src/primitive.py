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

Backends: the solve itself is pluggable so that compiled kernels and
parallel-in-time variants can sit behind the same VJP (``backends/``: what a
backend is in ``base.py``, the table in ``registry.py``).
"""

from __future__ import annotations

from functools import partial
import jax
import jax.numpy as jnp

from . import blocktri
from .backends.base import Backend
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
    u = backend.adjoint(factor, x_bar)

    def pairing(model_, y_):
        return stationarity_pairing(model_, y_, w, x, u)

    _, pull = jax.vjp(pairing, model, y)
    model_bar, y_bar = pull(-jnp.ones((), x.dtype))
    return model_bar, y_bar, jnp.zeros_like(w)


_means.defvjp(_means_fwd, _means_bwd)


def smoothed_means(model: StateSpace, y, w, method: str = "auto"):
    """x* (T, n) for a canonicalised problem; differentiable in model and y.

    Args:
        model: canonicalised StateSpace (one float dtype).
        y: (T, p) measurements (missing entries arbitrary, NaN allowed).
        w: (T, p) 0/1 mask in the float dtype (1 = observed); not differentiated.
        method: backend name ("auto" picks the default for the platform).
    """
    return _means(model, y, jax.lax.stop_gradient(w), resolve_method(method))
