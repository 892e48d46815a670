"""The linear-Gaussian state-space model as a JAX pytree."""

from __future__ import annotations

import dataclasses
from typing import Any, Optional

import jax

Array = Any

# Fields that may carry a leading time axis, with the length of that axis
# expressed relative to the number of time steps T.
TRANSITION_FIELDS = ("A", "Q", "b")  # one per step between states: T - 1
MEASUREMENT_FIELDS = ("C", "R", "d")  # one per time step: T
PRIOR_FIELDS = ("x0_mean", "x0_cov")
FIELDS = ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov")


@dataclasses.dataclass(frozen=True)
class StateSpace:
    r"""A linear-Gaussian state-space model.

    .. math::

        x_{t+1} = A_t x_t + b_t + w_t,\quad w_t \sim N(0, Q_t),\qquad t = 0..T-2
        y_t = C_t x_t + d_t + v_t,\quad v_t \sim N(0, R_t),\qquad t = 0..T-1

    Every field is either time-invariant or carries a leading time axis:

    ========  ================  =====================
    field     time-invariant    time-varying
    ========  ================  =====================
    A         (n, n)            (T-1, n, n)
    Q         (n, n)            (T-1, n, n)
    b         (n,)              (T-1, n)
    C         (p, n)            (T, p, n)
    R         (p, p)            (T, p, p)
    d         (p,)              (T, p)
    x0_mean   (n,)              --
    x0_cov    (n, n)            --
    ========  ================  =====================

    ``Q`` and ``R`` may instead be ``kx.DiagonalNoise(variances)`` (variances
    (n,)/(T-1, n) for Q, (p,)/(T, p) for R) or ``kx.ScalarNoise(variance)``
    (()/(T-1,) for Q, ()/(T,) for R): see ``noise.py``.

    ``b``, ``d`` default to zero. Without ``x0_cov`` the first state has a flat
    (improper) prior; ``x0_mean`` alone means a prior mean with no covariance,
    which is rejected. ``Q``, ``R`` and ``x0_cov`` must be symmetric positive
    definite (only their lower triangles are read after symmetrising).

    The model is a pytree: ``jax.grad`` of a loss with respect to a
    ``StateSpace`` returns a ``StateSpace`` of gradients, and ``jax.vmap`` can
    batch models. Fields left as ``None`` have no leaves.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> model = kx.StateSpace(A=jnp.eye(2), C=jnp.ones((1, 2)),
        ...                       Q=0.1 * jnp.eye(2), R=jnp.eye(1))
    """

    A: Array
    C: Array
    Q: Array
    R: Array
    b: Optional[Array] = None
    d: Optional[Array] = None
    x0_mean: Optional[Array] = None
    x0_cov: Optional[Array] = None

    def replace(self, **changes) -> "StateSpace":
        """A copy with some fields replaced (the original is unchanged)."""
        return dataclasses.replace(self, **changes)

    @property
    def state_size(self) -> int:
        return self.A.shape[-1]

    @property
    def measurement_size(self) -> int:
        return self.C.shape[-2]


jax.tree_util.register_dataclass(StateSpace, data_fields=list(FIELDS), meta_fields=[])
