r"""Solves with a stored factor, and the implicit-function tangent map with a fused transpose.

``primitive.py`` explains the derivative of x*: its tangent is
dx = H⁻¹ r(dθ), with r(dθ) = −∂_θ(∇ₓJ)·dθ the JVP of the model's residual in
θ at fixed x. This module holds the two pieces that make that rule cheap.

:func:`solve_with_factor` is H⁻¹ v with the stored factor as a
``lax.custom_linear_solve`` (matvec: H v from the model's whitened blocks;
``symmetric=True``). JAX transposes it into the same solve and differentiates
it into more solves with the factor, never through the solver: so the
compiled kernel, whose FFI calls have no derivative rules, is differentiated
to any order with kernel solves.

:func:`tangent` is dx for a tangent (dθ) of the model and y. For a pure-JAX
backend it is plain JAX code, and reverse mode is JAX's transpose of it: the
adjoint solve u = H⁻¹ x̄ followed by the VJP of the stationarity pairing,
the classical implicit-function backward pass. A backend with a fused
backward pass (``Backend.gradients``: the compiled kernel's
``kalmax_cpu_gradients``, adjoint solve and all per-step gradient formulas in
one C++ sweep) would lose it to that derived transpose — measured 3–10×
slower (``benchmarks/RESULTS.md``, "Forward mode"). For those the tangent is
the primitive ``kalmax_implicit_tangent``: linear in dθ, evaluated as above,
and transposed into the fused call. JAX 0.10 has no public
``custom_transpose``; a ``custom_vjp`` cannot be evaluated in forward mode.
Its rules:

* evaluation and lowering: the plain JAX tangent (``mlir.lower_fun``);
* transpose: the fused backward pass, made differentiable again (its JVP is
  the JVP of the portable backward pass, whose solves are
  :func:`solve_with_factor`), so forward-over-reverse Hessians work;
* JVP: the JVP of the plain JAX tangent;
* batching: each ``vmap`` level is recorded (``in_axes``, ``sizes``) and
  evaluation/transposition ``vmap`` the unbatched rules over them, so the
  transpose under ``vmap`` is still one (batched) kernel call;
* abstract evaluation: x's aval with the batch sizes in front (under
  ``shard_map`` x is typed like every input, ``primitive.smoothed_means``).
"""

from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from jax._src import dispatch  # prim_requires_devices_during_lowering: bottom of the module
from jax.extend.core import Primitive
from jax.interpreters import ad, batching, mlir

from . import accuracy
from .backends.base import Backend, arithmetic_dtype
from .backends.registry import get_backend
from .model import StateSpace
from .normal_equations import stationarity_pairing

ADJOINT_CORRECTIONS = 2


def adjoint(backend: Backend, model: StateSpace, w, factor, v):
    """u = H⁻¹ v with the stored factor; refined when the factor is float32 (``primitive.py``)."""
    u = backend.adjoint(factor, v)
    if arithmetic_dtype(backend, v.dtype) != np.float32:
        return u
    # H u = −(the residual of the problem with no data and no offsets at u).
    bare = model.replace(b=None, d=None, x0_mean=None)
    zeros = jnp.zeros(w.shape, v.dtype)
    for _ in range(ADJOINT_CORRECTIONS):
        u = u + backend.adjoint(factor, v + accuracy.residual(bare, zeros, w, u))
    return u


def solve_with_factor(backend: Backend, model: StateSpace, w, factor, v):
    """H⁻¹ v with the stored factor, differentiable to any order (module docstring)."""
    bare = model.replace(b=None, d=None, x0_mean=None)
    zeros = jnp.zeros(w.shape, v.dtype)

    def matvec(u):  # H u = −(the residual of the problem with no data and no offsets, at u)
        return -accuracy.residual(bare, zeros, w, u)

    def solve(_, b):
        return adjoint(backend, model, w, factor, b)

    return jax.lax.custom_linear_solve(matvec, v, solve, symmetric=True)


def plain_tangent(backend: Backend, model, y, w, x, factor, model_dot, y_dot):
    """dx = H⁻¹ r(dθ) in plain JAX (module docstring)."""
    _, rhs = jax.jvp(lambda m, yy: accuracy.residual(m, yy, w, x), (model, y), (model_dot, y_dot))
    return solve_with_factor(backend, model, w, factor, rhs)


def _portable_backward(backend: Backend, model, y, w, x, factor, x_bar):
    """(model_bar, y_bar): u = H⁻¹ x̄, then −∂_θ[uᵀ∇ₓJ] (the transpose of plain_tangent)."""
    u = solve_with_factor(backend, model, w, factor, x_bar)
    _, pull = jax.vjp(lambda m, yy: stationarity_pairing(m, yy, w, x, u), model, y)
    return pull(-jnp.ones((), x.dtype))


def _fused_backward(backend: Backend):
    """backend.gradients, with the portable backward pass's derivatives."""
    fn = jax.custom_jvp(lambda *a: backend.gradients(*a))
    fn.defjvp(lambda primals, tangents: jax.jvp(partial(_portable_backward, backend), primals, tangents))
    return fn


_FUSED = {}


def tangent(method: str, model, y, w, x, factor, model_dot, y_dot):
    """dx for the tangent (model_dot, y_dot); transposed into the backend's fused pass when it has one."""
    backend = get_backend(method)
    if backend.gradients is None:
        return plain_tangent(backend, model, y, w, x, factor, model_dot, y_dot)
    res_leaves, res_tree = jax.tree_util.tree_flatten((model, y, w, x, factor))
    dot_leaves, dot_tree = jax.tree_util.tree_flatten((model_dot, y_dot))
    x_index = len(jax.tree_util.tree_leaves((model, y, w)))
    return _tangent_p.bind(*res_leaves, *dot_leaves, method=method, res_tree=res_tree, dot_tree=dot_tree,
                           x_index=x_index, in_axes=(), sizes=())


# --- the primitive ---------------------------------------------------------

_tangent_p = Primitive("kalmax_implicit_tangent")


def _vmapped(fn, in_axes, out_axes=0):
    """fn under one vmap per recorded level (outermost first in in_axes)."""
    for axes in reversed(in_axes):
        fn = jax.vmap(fn, in_axes=axes, out_axes=out_axes)
    return fn


def _unbatched_tangent(method, res_tree, dot_tree, *operands):
    n_res = res_tree.num_leaves
    model, y, w, x, factor = jax.tree_util.tree_unflatten(res_tree, operands[:n_res])
    model_dot, y_dot = jax.tree_util.tree_unflatten(dot_tree, operands[n_res:])
    return plain_tangent(get_backend(method), model, y, w, x, factor, model_dot, y_dot)


def _evaluate(*operands, method, res_tree, dot_tree, x_index, in_axes, sizes):
    fn = partial(_unbatched_tangent, method, res_tree, dot_tree)
    return _vmapped(fn, in_axes)(*operands)


def _abstract_eval(*avals, method, res_tree, dot_tree, x_index, in_axes, sizes):
    x_aval = avals[x_index]
    x_batched = sum(axes[x_index] is not None for axes in in_axes)
    return x_aval.update(shape=tuple(sizes) + tuple(x_aval.shape[x_batched:]))


def _jvp(primals, tangents, **params):
    out = _tangent_p.bind(*primals, **params)
    tangents = [ad.instantiate_zeros(t) for t in tangents]
    _, out_dot = jax.jvp(partial(_evaluate, **params), primals, tangents)
    return out, out_dot


def _transpose(ct, *operands, method, res_tree, dot_tree, x_index, in_axes, sizes):
    n_res = res_tree.num_leaves
    res, dots = operands[:n_res], operands[n_res:]
    if any(ad.is_undefined_primal(r) for r in res):
        raise NotImplementedError("kalmax_implicit_tangent is linear in its tangent operands only")
    if type(ct) is ad.Zero:
        return [None] * len(operands)
    backend = get_backend(method)
    fused = _FUSED.setdefault(method, _fused_backward(backend))

    def one(res_leaves, x_bar):
        model, y, w, x, factor = jax.tree_util.tree_unflatten(res_tree, res_leaves)
        return jax.tree_util.tree_leaves(fused(model, y, w, x, factor, x_bar.astype(x.dtype)))

    level_axes = tuple((list(axes[:n_res]), 0) for axes in in_axes)
    bars = _vmapped(one, level_axes)(list(res), ct)
    out = []
    for j, (bar, dot) in enumerate(zip(bars, dots)):
        # Levels at which this tangent operand was not batched: its cotangent is the sum over them.
        summed = tuple(i for i, axes in enumerate(in_axes) if axes[n_res + j] is None)
        if summed:
            bar = jnp.sum(bar, axis=summed)
        out.append(bar.astype(dot.aval.dtype))
    return [None] * n_res + out


def _batch(args, dims, *, method, res_tree, dot_tree, x_index, in_axes, sizes):
    size = next(a.shape[d] for a, d in zip(args, dims) if d is not None)
    args = [a if d is None else jnp.moveaxis(a, d, 0) for a, d in zip(args, dims)]
    level = tuple(None if d is None else 0 for d in dims)
    out = _tangent_p.bind(*args, method=method, res_tree=res_tree, dot_tree=dot_tree, x_index=x_index,
                          in_axes=(level,) + tuple(in_axes), sizes=(size,) + tuple(sizes))
    return out, 0


_tangent_p.def_impl(_evaluate)
_tangent_p.def_abstract_eval(_abstract_eval)
ad.primitive_jvps[_tangent_p] = _jvp
ad.primitive_transposes[_tangent_p] = _transpose
batching.primitive_batchers[_tangent_p] = _batch
mlir.register_lowering(_tangent_p, mlir.lower_fun(_evaluate, multiple_results=False))

# Evaluated under vmap, the tangent lowers to batched kernel calls, which are
# custom_partitioning calls (``kernel_calls.py``) and need the devices while
# lowering. JAX gives a jit its devices only when it sees such a primitive in
# the program, and it cannot see inside this one's lowering: say so here
# (without it, jit of jacfwd of the means, or of a Hessian in y, failed in
# custom_partitioning's lowering). JAX has no public hook for this.
dispatch.prim_requires_devices_during_lowering.add(_tangent_p)
