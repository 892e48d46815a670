r"""Types under ``jax.shard_map``: which mesh axes a value varies over.

Inside ``jax.shard_map`` (with its default ``check_vma=True``) every value
carries the set of manual mesh axes along which it *varies* from device to
device: a trajectory's measurements split over the ``"batch"`` axis vary
over it, parameters passed replicated (``P()``) do not. JAX insists on
agreement in three places this package meets:

* a loop carry (``lax.scan``, ``while_loop``, ``fori_loop``) must have the
  same type before and after the body; an initial value built from
  constants (a ``False`` flag, zeros) does not vary, but the body mixes it
  with the data and returns a varying one;
* the backward rule of a ``custom_vjp`` must return cotangents typed like
  the primal inputs;
* a foreign call (``jax.ffi.ffi_call``) types its results from the shapes it
  is given, which carry no axes unless we say so.

The remedy in each case is the same: cast a value to "varying" over the
axes it lacks (``jax.lax.pcast(..., to="varying")``). The cast is the
identity on values; its transpose is a sum over the axes, which is exactly
the gradient of a replicated parameter used by every device. Outside
``shard_map`` no value varies and every function here returns its input.
"""

from __future__ import annotations

import jax


def _varying(x) -> frozenset:
    # ``ShapedArray.mat.varying`` (jax 0.10); absent on older avals -> nothing varies.
    return frozenset(getattr(getattr(jax.typeof(x), "mat", None), "varying", ()))


def varying_axes(*trees) -> frozenset:
    """The manual mesh axes along which any leaf of ``trees`` varies (empty outside shard_map)."""
    axes = frozenset()
    for leaf in jax.tree_util.tree_leaves(trees):
        axes = axes | _varying(leaf)
    return axes


def cast_varying(tree, axes: frozenset):
    """``tree`` with every leaf made to vary over ``axes`` (those it already varies over kept)."""
    if not axes:
        return tree

    def cast(x):
        missing = tuple(a for a in axes if a not in _varying(x))
        return jax.lax.pcast(x, missing, to="varying") if missing else x

    return jax.tree_util.tree_map(cast, tree)


def like(tree, *others):
    """``tree`` varying over every axis any leaf of ``tree`` or ``others`` varies over.

    ``like(init, data)`` types a loop's initial carry like the data its body
    mixes in; ``like((model, y, w))`` gives the inputs of a custom-derivative
    function one common type.
    """
    return cast_varying(tree, varying_axes(tree, *others))
