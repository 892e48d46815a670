r"""Cheaper forms of the noise covariances Q and R: a diagonal, or a scalar variance.

``StateSpace.Q`` and ``StateSpace.R`` are dense covariance matrices by
default, (k, k) or one per step. Two small pytree wrappers say that a
covariance is simpler:

* ``DiagonalNoise(variances)``: diag(variances), with variances (k,) or
  one row per step, (steps, k);
* ``ScalarNoise(variance)``: variance · I, with variance () or (steps,).

Why wrappers and not bare arrays: a per-step diagonal (T, p) and a dense
time-invariant (p, p) have the same rank, and the same shape when T = p, so
no rule on shapes could tell them apart. The wrapper says which it is, and
``jax.grad`` of a loss w.r.t. a model returns the same wrapper holding the
gradient w.r.t. the variances (a network that predicts per-step
log-variances passes ``DiagonalNoise(jnp.exp(logvar))`` straight in).

How each backend uses them (``checks.canonicalize`` decides):

* a ``ScalarNoise`` becomes a ``DiagonalNoise`` by broadcasting (O(T k));
* R stays diagonal where the public entry points allow it (``smooth``,
  ``log_likelihood``, ``prediction_error``): the compiled kernel keeps it
  diagonal throughout (``cpu/patterns.h``: the observed block's Cholesky
  factor is √r_K, whitening C is a row scaling, and the kernel returns
  the gradient w.r.t. the variances, R̄_ii, because dR = e_i e_iᵀ dr_i);
  the JAX backends expand it to diag(w∘r + 1 − w) where they mask R
  (``normal_equations.masked_measurement_cov``), an O(T p²) array, the size a
  dense per-step R would have had anyway;
* Q stays diagonal on the same entry points: the compiled kernel keeps it
  diagonal (``cpu/smoother.h``: Lq = diag(√q), Q⁻¹ = diag(1/q) and
  log|Q| = Σ log q, so a per-step Q costs no Cholesky factorisation per
  step, and the kernel returns Q̄_ii, the gradient w.r.t. the variances);
  the JAX backends expand it to dense where they read it
  (``normal_equations.transition_cov``);
* every other entry point (filtering, EM, sampling, forecasting, validation)
  expands both to dense, so it sees the ordinary model.

Gradients flow through each expansion by ordinary autodiff, so the
gradient w.r.t. the variances is always the diagonal of the dense gradient
(summed for a scalar).
"""

from __future__ import annotations

import dataclasses
from typing import Any

import jax
import jax.numpy as jnp

Array = Any


@dataclasses.dataclass(frozen=True)
class DiagonalNoise:
    """A diagonal noise covariance diag(variances), for ``StateSpace.Q`` or ``.R``.

    variances: (k,) time-invariant, or (steps, k) one diagonal per step
    (steps = T for R, T-1 for Q). Entries must be positive.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> logvar = jnp.zeros((5, 2))  # e.g. predicted by a network, one row per step
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.ones((2, 1)), Q=kx.ScalarNoise(0.1),
        ...                       R=kx.DiagonalNoise(jnp.exp(logvar)))
        >>> kx.smooth(model, jnp.zeros((5, 2))).states.shape
        (5, 1)
    """

    variances: Array


@dataclasses.dataclass(frozen=True)
class ScalarNoise:
    """An isotropic noise covariance variance · I, for ``StateSpace.Q`` or ``.R``.

    variance: () time-invariant, or (steps,) one per step (steps = T for R,
    T-1 for Q). Must be positive.
    """

    variance: Array


jax.tree_util.register_dataclass(DiagonalNoise, data_fields=["variances"], meta_fields=[])
jax.tree_util.register_dataclass(ScalarNoise, data_fields=["variance"], meta_fields=[])

NOISE_FORMS = (DiagonalNoise, ScalarNoise)


def is_noise_form(x) -> bool:
    return isinstance(x, NOISE_FORMS)


def as_diagonal(x, k: int):
    """A ``ScalarNoise`` as the equivalent ``DiagonalNoise`` (k entries per block); others unchanged."""
    if isinstance(x, ScalarNoise):
        v = jnp.asarray(x.variance)
        return DiagonalNoise(jnp.broadcast_to(v[..., None], v.shape + (k,)))
    return x


def dense(x, k: int):
    """The dense covariance (k, k) or (steps, k, k) of any accepted form."""
    x = as_diagonal(x, k)
    if isinstance(x, DiagonalNoise):
        v = jnp.asarray(x.variances)
        return v[..., :, None] * jnp.eye(k, dtype=v.dtype)
    return x
