"""Trace-time shape/dtype checks and canonicalisation of user inputs.

Everything here looks only at static shapes and dtypes, so it runs under
``jit``/``vmap``/``grad`` and fails at trace time with a message that names the
argument and the shape it should have.
"""

from __future__ import annotations

from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np

from .model import StateSpace
from .noise import DiagonalNoise, ScalarNoise, as_diagonal, dense, is_noise_form


class Dims(NamedTuple):
    T: int  # time steps
    n: int  # state size
    p: int  # measurement size


def _shape_str(shape) -> str:
    return "(" + ", ".join(str(s) for s in shape) + ("," if len(shape) == 1 else "") + ")"


def _dtype_of(name: str, x):
    if hasattr(x, "dtype"):
        return x.dtype
    try:
        return np.asarray(x).dtype
    except Exception as err:  # ragged nested lists and the like
        raise TypeError(f"{name} could not be read as an array: {err}") from None


def _require_float(name: str, x) -> None:
    dt = _dtype_of(name, x)
    # Only single and double precision: the factorisations have no half-precision kernels,
    # and half precision could not hold the normal equations' dynamic range anyway.
    if dt not in (np.dtype(np.float32), np.dtype(np.float64)):
        raise TypeError(
            f"{name} must be a real floating-point array of float32 or float64; got dtype {dt}. "
            f"Convert it with .astype(np.float32) or .astype(np.float64) first."
        )


def _check_field(name: str, x, invariant: tuple, varying: Optional[tuple]) -> None:
    shape = tuple(np.shape(x))
    if shape == invariant or (varying is not None and shape == varying):
        return
    expected = _shape_str(invariant)
    if varying is not None:
        expected += f" (time-invariant) or {_shape_str(varying)} (time-varying)"
    raise ValueError(f"model.{name} must have shape {expected}; got {_shape_str(shape)}.")


def _noise_forms_str(k: str, steps: str) -> str:
    return (f"a dense covariance ({k}, {k}) or ({steps}, {k}, {k}), "
            f"kx.DiagonalNoise(variances) with variances ({k},) or ({steps}, {k}), "
            f"or kx.ScalarNoise(variance) with variance () or ({steps},)")


def _check_noise(name: str, x, k: int, steps: int, k_name: str, steps_name: str) -> None:
    """Q or R: a dense array, a DiagonalNoise or a ScalarNoise of fitting shape (see noise.py)."""
    steps_shown = f"{steps_name} = {steps}"
    forms = _noise_forms_str(k_name, steps_name)
    if isinstance(x, DiagonalNoise):
        arg, leaf, shapes = f"model.{name}.variances", x.variances, ((k,), (steps, k))
    elif isinstance(x, ScalarNoise):
        arg, leaf, shapes = f"model.{name}.variance", x.variance, ((), (steps,))
    else:
        arg, leaf, shapes = f"model.{name}", x, ((k, k), (steps, k, k))
    if leaf is None:
        raise ValueError(f"{arg} is required; got None.")
    _require_float(arg, leaf)
    shape = tuple(np.shape(leaf))
    if shape in shapes:
        return
    hint = ""
    if not is_noise_form(x) and shape in ((k,), (steps, k)):
        hint = (f" A shape {_shape_str(shape)} array looks like variances: wrap them as "
                f"kx.DiagonalNoise(variances) to say so (a bare array is read as a dense covariance).")
    raise ValueError(
        f"{arg} must have shape {_shape_str(shapes[0])} (time-invariant) or {_shape_str(shapes[1])} "
        f"(time-varying); got {_shape_str(shape)}. The accepted forms of model.{name} "
        f"({k_name} = {k}, {steps_shown}): {forms}.{hint}"
    )


def dims_of(model: StateSpace, y) -> Dims:
    """Read T, n, p from the shapes of ``y`` and ``model.A``, checking both."""
    y_shape = tuple(np.shape(y))
    if len(y_shape) != 2:
        raise ValueError(
            f"y must have shape (T, p) (one row per time step); got {_shape_str(y_shape)}. "
            "For a batch of trajectories, use jax.vmap over the leading axis."
        )
    T, p = y_shape
    if T < 1:
        raise ValueError("y must have at least one time step (T >= 1); got an empty series.")
    if not isinstance(model, StateSpace):
        raise TypeError(f"model must be a kalmax.StateSpace; got {type(model).__name__}.")
    if model.A is None:
        raise ValueError("model.A is required; got None.")
    a_shape = tuple(np.shape(model.A))
    if len(a_shape) not in (2, 3) or a_shape[-1] != a_shape[-2]:
        raise ValueError(
            f"model.A must have shape (n, n) or (T-1, n, n) = ({T - 1}, n, n) with square "
            f"blocks; got {_shape_str(a_shape)}."
        )
    if a_shape[-1] < 1:
        raise ValueError(f"model.A must describe at least one state (n >= 1); got shape {_shape_str(a_shape)}.")
    return Dims(T=T, n=a_shape[-1], p=p)


def check_model(model: StateSpace, dims: Dims) -> None:
    """Raise ValueError/TypeError naming the first badly shaped or typed field."""
    if not isinstance(model, StateSpace):
        raise TypeError(f"model must be a kalmax.StateSpace; got {type(model).__name__}.")
    T, n, p = dims
    for name in ("Q", "R"):
        if getattr(model, name) is None:
            raise ValueError(f"model.{name} is required; got None.")
    _check_noise("Q", model.Q, n, T - 1, "n", "T-1")
    _check_noise("R", model.R, p, T, "p", "T")
    spec = {
        "A": ((n, n), (T - 1, n, n)),
        "b": ((n,), (T - 1, n)),
        "C": ((p, n), (T, p, n)),
        "d": ((p,), (T, p)),
        "x0_mean": ((n,), None),
        "x0_cov": ((n, n), None),
    }
    for name, (inv, var) in spec.items():
        x = getattr(model, name)
        if x is None:
            if name in ("A", "C", "Q", "R"):
                raise ValueError(f"model.{name} is required; got None.")
            continue
        _require_float(f"model.{name}", x)
        _check_field(name, x, inv, var)
    if model.x0_mean is not None and model.x0_cov is None:
        raise ValueError(
            "model.x0_mean is given without model.x0_cov: a prior needs a covariance "
            "(leave both None for a flat prior on the first state)."
        )


def canonicalize(model: StateSpace, y, mask, *, keep_diagonal_R: bool = False, keep_diagonal_Q: bool = False):
    """Check shapes/dtypes; return (model, y, mask, dims, dtype) with arrays cast to one dtype.

    ``mask`` of None means "observed wherever y is not NaN".

    Noise forms (``noise.py``): Q and R come back dense, unless
    ``keep_diagonal_R`` / ``keep_diagonal_Q``: then a diagonal or scalar R
    (Q) comes back as a ``DiagonalNoise`` with variances (p,) or (T, p)
    ((n,) or (T-1, n)), which every backend accepts (the compiled kernel
    keeps it diagonal; the JAX code reads it through
    ``normal_equations.masked_measurement_cov`` / ``transition_cov``). Only
    entry points whose whole path handles that form pass them.
    """
    dims = dims_of(model, y)
    _require_float("y", y)
    check_model(model, dims)
    y = jnp.asarray(y)
    if mask is None:
        mask = ~jnp.isnan(y)
    else:
        mask_dtype = _dtype_of("mask", mask)
        if not (mask_dtype == np.bool_ or np.issubdtype(mask_dtype, np.number)):
            # Object and string arrays would fail inside JAX without naming the argument.
            raise TypeError(
                f"mask must be a boolean array (True = observed); got dtype {mask_dtype}. "
                "Build it with dtype=bool (for example mask = ~np.isnan(y))."
            )
        mask = jnp.asarray(mask)
        if mask.dtype != jnp.bool_:
            raise TypeError(
                f"mask must be a boolean array (True = observed); got dtype {mask.dtype}. "
                "Use mask.astype(bool) if it holds 0/1."
            )
        if mask.shape != y.shape:
            raise ValueError(
                f"mask must have the same shape as y, {_shape_str(y.shape)}; got {_shape_str(mask.shape)}."
            )
    # Plain Python lists become arrays before dtype promotion looks at them.
    # A Python float (kx.ScalarNoise(0.1)) stays weakly typed: it takes the
    # problem's dtype instead of promoting a float32 problem to float64.
    as_array = lambda x: x if x is None or hasattr(x, "dtype") or type(x) is float else np.asarray(x)  # noqa: E731
    # Lists and tuples are values here, not pytree nodes to descend into.
    model = jax.tree_util.tree_map(as_array, model, is_leaf=lambda x: isinstance(x, (list, tuple)))
    leaves = jax.tree_util.tree_leaves(model)
    dtype = jnp.result_type(*leaves, y)
    model = jax.tree_util.tree_map(lambda x: _materialised(jnp.asarray(x, dtype)), model)
    R, Q = as_diagonal(model.R, dims.p), as_diagonal(model.Q, dims.n)
    model = model.replace(Q=Q if keep_diagonal_Q else dense(Q, dims.n), R=R if keep_diagonal_R else dense(R, dims.p))
    return model, _materialised(y.astype(dtype)), _materialised(mask), dims, dtype


def _materialised(x):
    """x, with any NumPy array held inside a JAX tracer turned into a JAX array.

    ``jax.vmap`` over a NumPy array keeps that array as the batched value, and
    jax 0.10 then fails inside the differentiation rules of the primitive
    ("non-canonical constant of type ndarray"; seen with value_and_grad of a
    vmapped smooth over NumPy data). One elementwise operation makes it a JAX
    array; outside of tracing nothing changes.
    """
    if x is None or not isinstance(x, jax.core.Tracer):
        return x
    return x | False if x.dtype == jnp.bool_ else x + jnp.zeros((), x.dtype)
