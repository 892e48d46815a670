r"""The smoothing primitive: x* = argmin_x J(x; θ), with an implicit-function JVP.

Forward: assemble the block-tridiagonal normal equations H x = g and solve them
with a block Cholesky factorisation (the backend's; ``backends/``); keep the
factor.

Tangent (forward mode). Differentiate the optimality condition
∇ₓJ(x*(θ); θ) = 0:

    H dx* + ∂_θ(∇ₓJ) dθ = 0   ⇒   dx* = H⁻¹ r,   r = −∂_θ(∇ₓJ)·dθ,

where r is the JVP in θ of the model's residual −∇ₓJ(x; θ) = g − H x at
fixed x = x* (``accuracy.residual``: per-step, vectorised, no recursion over
time), and H⁻¹ r is one more solve with the *stored* factor.

Reverse mode is the transpose of that tangent map, which JAX derives: the
solve is a ``lax.custom_linear_solve`` with ``symmetric=True`` (H is
symmetric), so its transpose is the same solve with the stored factor,
u = H⁻¹ x̄, and the transpose of r(dθ) is the VJP of θ ↦ −uᵀ∇ₓJ(x; θ) (the
"stationarity pairing" of ``normal_equations.py``):

    θ̄ = −∂_θ [uᵀ ∇ₓJ(x; θ)]  at x = x*, with u and x* held fixed,

exactly the implicit-function VJP. One rule therefore serves jvp, vjp,
jacfwd, jacrev, linearize and every composition.

Higher derivatives. ``custom_linear_solve`` differentiates a solve through
its matvec only, d(H⁻¹b) = H⁻¹(db − dH·H⁻¹b), never through the solver: so
every tangent of a solve is more solves with the same stored factor, and the
matvec H v is formed from the model's whitened blocks (−residual of the
problem with zero data and offsets, so H is never formed). The rule computes
x* by calling the primitive itself, so a second-order tangent of x* comes from
the same rule. The compiled kernel, whose FFI calls have no derivative rules,
is thus differentiated to any order with kernel solves alone; forward-over-
reverse Hessians cost a few solves and vectorised per-step work per
direction. The factor is an internal output whose tangent is declared zero:
it is consumed only as the solver of ``custom_linear_solve``, which is never
differentiated (the likelihood, which does differentiate log|H| and the band
of H⁻¹, has its own rule in ``likelihood.py``).

Why this design. The alternative was to keep a ``custom_vjp`` (which JAX
refuses to differentiate in forward mode) and add a linear tangent map with a
hand-written transpose (the old backward pass). JAX 0.10 has no public
``custom_transpose``, and a hand-made primitive would need its own batching,
lowering, sharding and shard_map typing rules. The transpose that JAX derives
here is the same computation as the old backward pass (one adjoint solve plus
the VJP of the pairing) for every pure-JAX backend. For the compiled kernel
it replaces the fused C++ backward pass (``kalmax_cpu_gradients``) by the
kernel's adjoint solve plus the vectorised JAX pairing VJP; that costs
measured time on the smoothing-loss path only (``benchmarks/RESULTS.md``,
"Forward mode"), while the likelihood keeps its fused kernel gradient
(``likelihood.py``: its tangent is ⟨∇ log p, dθ⟩, which JAX transposes into
the gradient the kernel already computed).

``method="auto"``: the platform's backend, and per trajectory the
covariance-form filter where that returns NaN for a finite problem with a
prior (``fallback.py``: a ``custom_jvp`` around both routes whose rule
linearises the fast one, so its derivatives are this module's).

Backends whose ``implicit_derivatives`` is False (the covariance-form filter)
are differentiated through their own forward recursions instead: their
point is to avoid Q⁻¹, which the residual r contains.

Adjoint refinement (float32 arithmetic): solves use the stored factor of H,
which in float32 carries the same rounding as the forward solve's first
answer (up to κ(H)·eps32 relative; ~1e-2 on the constant-velocity tracking
model of tests/test_float32_ordinary.py). The forward answer is refined
(``accuracy.refine``); every later solve gets the same treatment without a
verdict: two corrections u ← u + H̃⁻¹(v − H u), with H u formed from the
model's whitened blocks like the forward residual. Each correction
multiplies the error by about κ(H)·eps, as in the forward pass. Backends that
compute in double (the compiled kernel) and float64 problems skip it.
"""

from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
from jax.custom_derivatives import SymbolicZero
import numpy as np

from . import blocktri, fallback, implicit, manual_axes
from .backends.base import Backend
from .backends.registry import fallback_method, get_backend, resolve_method
from .model import StateSpace


def band_inverse(backend: Backend, factor):
    """The block-tridiagonal band of H⁻¹ from a backend's factor."""
    if backend.band_inverse is not None:
        return backend.band_inverse(factor)
    return blocktri.selected_inverse(factor)


def _zero_tangents(tree):
    """Symbolic zero tangents typed like ``tree``'s leaves.

    Typed from each leaf's own type, so that under ``shard_map`` they carry
    its varying axes too (a NumPy float0 zero for the boolean ``ok`` flag
    does not, and JAX then rejects the rule); symbolic, so no zero array is
    ever formed.
    """
    return jax.tree_util.tree_map(lambda a: SymbolicZero(jax.typeof(a).to_tangent_aval()), tree)


@partial(jax.custom_jvp, nondiff_argnums=(3,))
def _solution(model: StateSpace, y, w, method: str):
    """(x*, factor); the factor's tangent is declared zero (module docstring)."""
    return get_backend(method).forward(model, y, w)


def _instantiate(tangent, primal):
    """A tangent the rule was handed as a symbolic zero, as zeros typed like its primal."""
    return jax.tree_util.tree_map(lambda t, p: jnp.zeros_like(p) if type(t) is SymbolicZero else t,
                                  tangent, primal, is_leaf=lambda t: type(t) is SymbolicZero)


# symbolic_zeros: so that the factor's zero tangent can be returned symbolically (_zero_tangents).
@partial(_solution.defjvp, symbolic_zeros=True)
def _solution_jvp(method, primals, tangents):
    model, y, w = primals
    model_dot, y_dot = _instantiate(tangents[0], model), _instantiate(tangents[1], y)
    # The primitive itself, so that a tangent of x* at the next order comes from this rule too.
    x, factor = _solution(model, y, w, method)
    x_dot = implicit.tangent(method, model, y, w, x, factor, model_dot, y_dot)
    return (x, factor), (x_dot, _zero_tangents(factor))


def _means(model: StateSpace, y, w, method: str):
    backend = get_backend(method)
    if not backend.implicit_derivatives:  # differentiated through its own recursions
        return backend.forward(model, y, w)[0]
    return _solution(model, y, w, method)[0]


def smoothed_means(model: StateSpace, y, w, method: str = "auto"):
    """x* (T, n) for a canonicalised problem; differentiable in model and y, in any mode and order.

    Args:
        model: canonicalised StateSpace (one float dtype).
        y: (T, p) measurements (missing entries arbitrary, NaN allowed).
        w: (T, p) 0/1 mask in the float dtype (1 = observed); not differentiated.
        method: backend name ("auto" picks the default for the platform and
            falls back to the covariance-form filter, per trajectory, where
            that returns NaN for a finite problem with a prior: ``fallback.py``).
    """
    # One varying-axes type for all inputs under shard_map, so that tangents
    # and cotangents can be typed like them (manual_axes.py).
    model, y, w = manual_axes.like((model, y, jax.lax.stop_gradient(w)))
    primary = resolve_method(method)
    slow = fallback_method(method, flat_prior=model.x0_cov is None, p=y.shape[-1])
    if slow is None:
        return _means(model, y, w, primary)
    return fallback.with_fallback(partial(_means, method=primary), partial(_checked_means, method=slow),
                                  fallback.finite_problem, model, y, w)


def _checked_means(model: StateSpace, y, w, method: str):
    """A fallback's means, NaN unless Q, R and x0_cov are valid covariances (``fallback.py``)."""
    x = _means(model, y, w, method)
    return jnp.where(jax.lax.stop_gradient(fallback.covariances_valid(model)), x, jnp.nan)
