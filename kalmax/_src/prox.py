r"""Proximal and projection steps as Optax gradient transformations.

Proximal-gradient fitting of  f(θ) + g(θ)  with f smooth (a held-out error,
a negative log-likelihood) and g a simple penalty or constraint alternates a
gradient step on f with the proximal map of g:

    θ⁺ = prox_{ηg}(θ + Δ),    prox_{ηg}(v) = argmin_x  g(x) + ‖x − v‖² / (2η),

where Δ is the update proposed by any optimiser (−η∇f for plain gradient
descent, which gives the classic proximal-gradient method). Each
transformation here emits the update θ⁺ − θ, so proximal fitting is one
``optax.chain(optimiser, prox...)``; apply it with ``optax.apply_updates``
as usual. ``step_size`` is η: pass the optimiser's learning rate (a number or
an Optax schedule) so that the penalty is weighted consistently with the
gradient step.

Penalties act on every leaf they receive; to act on some leaves only, wrap
them in ``optax.masked(prox, mask_pytree)``. Box constraints reuse
``optax.projections.projection_box``; Optax has no soft-thresholding, ridge
or singular-value shrinkage, so those are written here.

=========================  =====================================  ==================================
transformation             g(x)                                   prox_{ηg}(v)
=========================  =====================================  ==================================
``prox_ridge(λ, η, c)``    (λ/2)‖x − c‖²                          (v + ηλc) / (1 + ηλ)
``prox_l1(λ, η, c)``       λ‖x − c‖₁                              c + sign(v − c)·max(|v − c| − ηλ, 0)
``prox_nuclear(λ, η)``     λ Σ singular values of each matrix     U diag(max(s − ηλ, 0)) Vᵀ
``project_box(lo, hi)``    0 inside [lo, hi], +∞ outside          clip(v, lo, hi)
``project_fixed(m, x₀)``   0 if x = x₀ where m is False, else +∞  where(m, v, x₀)
=========================  =====================================  ==================================
"""

from __future__ import annotations

from typing import Any, Callable, NamedTuple, Optional, Union

import jax
import jax.numpy as jnp
import optax

Schedule = Union[float, Callable[[Any], Any]]


# --- the proximal maps themselves (pure functions on arrays) ---------------


def ridge_map(v, threshold, center=0.0):
    """prox of x ↦ (1/2)·‖x − center‖² scaled by ``threshold`` = ηλ."""
    return (v + threshold * center) / (1 + threshold)


def soft_threshold(v, threshold, center=0.0):
    """prox of x ↦ ‖x − center‖₁ scaled by ``threshold`` = ηλ (elementwise)."""
    z = v - center
    return center + jnp.sign(z) * jnp.maximum(jnp.abs(z) - threshold, 0)


def singular_value_shrink(v, threshold):
    """prox of the nuclear norm scaled by ``threshold`` = ηλ, over the last two axes."""
    if v.ndim < 2:
        raise ValueError(
            f"the nuclear-norm prox acts on matrices (..., m, k); got a leaf of shape {tuple(v.shape)}. "
            "Select matrix leaves with optax.masked."
        )
    U, s, Vt = jnp.linalg.svd(v, full_matrices=False)
    s = jnp.maximum(s - threshold, 0)
    return jnp.einsum("...ik,...k,...kj->...ij", U, s, Vt)


# --- Optax wrappers -------------------------------------------------------------


class ProxState(NamedTuple):
    """Step counter (for step-size schedules)."""

    count: jnp.ndarray


def _step_size(step_size: Schedule, count):
    return step_size(count) if callable(step_size) else step_size


def _need_params(params, name):
    if params is None:
        raise ValueError(f"{name} needs the current parameters: call update(updates, state, params).")


def _is_single(value):
    return value is None or isinstance(value, (int, float)) or hasattr(value, "shape")


def _map_leaves(fn, v, *settings):
    """fn(leaf, *setting_leaves) over the leaves of ``v``.

    Each setting is either one value (scalar or array) used for every leaf,
    or a pytree shaped like the full params. The full-params form also works
    under ``optax.masked``, where ``v`` has ``MaskedNode`` in place of the
    leaves left out: those positions are passed through untouched.
    """
    trees = [s for s in settings if not _is_single(s)]
    if not trees:
        return jax.tree_util.tree_map(lambda x: fn(x, *settings), v)
    pos = [i for i, s in enumerate(settings) if not _is_single(s)]

    def leaf(first, x, *rest):
        if isinstance(x, optax.MaskedNode):
            return x
        vals = list(settings)
        for i, t in zip(pos, (first,) + rest):
            vals[i] = t
        return fn(x, *vals)

    # The first full pytree leads: its leaves line up with v's leaves or with
    # v's MaskedNode subtrees (a leaf of the leading tree may match any subtree).
    return jax.tree_util.tree_map(leaf, trees[0], v, *trees[1:])


def _prox_transformation(name: str, apply: Callable, step_size: Optional[Schedule]):
    """GradientTransformation emitting prox(params + updates) − params.

    ``apply(v, params, eta)`` returns the pytree prox_{eta g}(v).
    """

    def init_fn(params):
        del params
        return ProxState(count=jnp.zeros([], jnp.int32))

    def update_fn(updates, state, params=None):
        _need_params(params, name)
        eta = None if step_size is None else _step_size(step_size, state.count)
        v = jax.tree_util.tree_map(lambda p, u: p + u, params, updates)
        new = apply(v, params, eta)
        out = jax.tree_util.tree_map(lambda n, p: (n - p).astype(p.dtype), new, params)
        return out, ProxState(count=optax.safe_int32_increment(state.count))

    return optax.GradientTransformation(init_fn, update_fn)


def prox_ridge(strength: float, step_size: Schedule, center=None) -> optax.GradientTransformation:
    r"""Proximal step of the ridge penalty (λ/2)‖θ − c‖² toward a nominal value c.

    Args:
        strength: λ ≥ 0.
        step_size: η, the optimiser's learning rate (number or Optax schedule).
        center: c, a pytree like the params (e.g. ``spec.init()``) or a
            scalar; default 0.

    Example:
        >>> import optax
        >>> params = {"log_q": jnp.array([1.0, -2.0])}
        >>> nominal_params = {"log_q": jnp.zeros(2)}
        >>> opt = optax.chain(optax.sgd(0.1), kx.prox_ridge(1.0, 0.1, center=nominal_params))
        >>> state = opt.init(params)
        >>> zero_grads = {"log_q": jnp.zeros(2)}
        >>> updates, state = opt.update(zero_grads, state, params)
        >>> print(optax.apply_updates(params, updates)["log_q"].round(4))  # shrunk by 1 / (1 + 0.1)
        [ 0.9091 -1.8182]
    """

    def apply(v, params, eta):
        c = 0.0 if center is None else center
        return _map_leaves(lambda x, c_: ridge_map(x, eta * strength, c_), v, c)

    return _prox_transformation("prox_ridge", apply, step_size)


def prox_l1(strength: float, step_size: Schedule, center=None) -> optax.GradientTransformation:
    r"""Proximal step of the L1 penalty λ‖θ − c‖₁ (soft-thresholding): sparse entries.

    With plain gradient descent, ``optax.chain(optax.sgd(η), prox_l1(λ, η))``
    is the iterative shrinkage-thresholding algorithm; e.g. for sparse
    dynamics wrap it as ``optax.masked(prox_l1(λ, η), {"A": True, ...})``.

    Args:
        strength: λ ≥ 0.
        step_size: η (number or Optax schedule).
        center: optional pytree/scalar c (default 0: shrink toward zero).
    """

    def apply(v, params, eta):
        c = 0.0 if center is None else center
        return _map_leaves(lambda x, c_: soft_threshold(x, eta * strength, c_), v, c)

    return _prox_transformation("prox_l1", apply, step_size)


def prox_nuclear(strength: float, step_size: Schedule) -> optax.GradientTransformation:
    r"""Proximal step of the nuclear norm λ‖Θ‖_* (sum of singular values): low rank.

    Shrinks the singular values of every matrix leaf (over its last two
    axes) by ηλ; apply it to a measurement map with ``optax.masked``.

    Args:
        strength: λ ≥ 0.
        step_size: η (number or Optax schedule).
    """

    def apply(v, params, eta):
        return _map_leaves(lambda x: singular_value_shrink(x, eta * strength), v)

    return _prox_transformation("prox_nuclear", apply, step_size)


def project_box(lower, upper) -> optax.GradientTransformation:
    r"""Projection onto the box lower ≤ θ ≤ upper (``optax.projections.projection_box``).

    Args:
        lower, upper: scalars or pytrees like the params (use ±inf for no bound).
    """

    def apply(v, params, eta):
        return _map_leaves(lambda x, lo, hi: optax.projections.projection_box(x, lo, hi), v, lower, upper)

    return _prox_transformation("project_box", apply, None)


def project_fixed(free, values) -> optax.GradientTransformation:
    r"""Projection onto {θ : θ = values where ``free`` is False}: hold entries fixed.

    Args:
        free: pytree of boolean arrays like the params (True = may change).
        values: pytree like the params with the values to hold.
    """

    def apply(v, params, eta):
        return _map_leaves(lambda x, m, c: jnp.where(m, x, c), v, free, values)

    return _prox_transformation("project_fixed", apply, None)
