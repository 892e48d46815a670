"""Public smoothing entry points: ``smooth`` and ``prediction_error``."""

from __future__ import annotations

from functools import partial
from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp

from .checks import canonicalize
from .linalg import matvec
from .model import StateSpace
from . import covariance_band
from .primitive import smoothed_means


class Smoothed(NamedTuple):
    """Result of :func:`smooth`.

    Attributes:
        states: (T, n) smoothed state means E[x_t | observed y].
        measurements: (T, p) C_t states_t + d_t — the smoothed mean of every
            measurement, observed or not (so it imputes missing entries).
        state_cov: (T, n, n) marginal covariances Cov[x_t | observed y], or
            None unless requested with ``covariances=True``.
        measurement_cov: (T, p, p) C_t state_cov_t C_tᵀ — covariance of the
            mean measurement (add R_t for a new noisy measurement), or None.
        state_cross_cov: (T-1, n, n) Cov[x_{t+1}, x_t | observed y] (the
            lag-one blocks that expectation–maximisation needs), or None.
    """

    states: jnp.ndarray
    measurements: jnp.ndarray
    state_cov: Optional[jnp.ndarray] = None
    measurement_cov: Optional[jnp.ndarray] = None
    state_cross_cov: Optional[jnp.ndarray] = None


def predict_measurements(model: StateSpace, x):
    """C_t x_t + d_t for x of shape (T, n); returns (T, p)."""
    out = matvec(model.C, x)
    return out if model.d is None else out + model.d


def smooth(model: StateSpace, y, mask=None, *, covariances: bool = False, method: str = "auto") -> Smoothed:
    r"""Smoothed state and measurement means of a linear-Gaussian state-space model.

    The states are the maximiser of the joint density p(x, y_observed), which
    for this model equals the Rauch–Tung–Striebel smoother mean. They are found
    by one block-Cholesky solve of the block-tridiagonal normal equations, and
    gradients (``jax.grad``) come from the same factorisation by implicit
    differentiation — with respect to every model field and to ``y``.

    Args:
        model: a :class:`StateSpace`; fields may carry a leading time axis.
        y: (T, p) measurements. Missing entries may hold any value, NaN too.
        mask: (T, p) bool, True where y is observed. Default: ``~isnan(y)``.
        covariances: also return the marginal posterior covariances
            (``state_cov``, ``measurement_cov``, ``state_cross_cov``), from a
            selected inversion of the normal-equation matrix: O(T n³). They are
            differentiable in any mode and order, by a tangent sweep pair over
            the same factor (``covariance_band.py``): no tape through time.
        method: solver backend for the means: ``"auto"`` (the compiled
            kernel ``"cpu"`` on CPU when it is built, ``"parallel"`` on
            GPU/TPU; with a prior on x_0, a trajectory for which that returns
            NaN although the problem is finite and its covariances positive
            semidefinite gets the ``"covariance"`` filter's answer instead —
            models beyond the normal equations, singular Q — with the matching
            derivatives; under ``vmap`` the filter runs only when some
            trajectory of the batch failed: ``fallback.py``),
            ``"scan"`` (the portable pure-JAX block-Cholesky scan),
            ``"cpu"``, ``"parallel"`` (block cyclic reduction, O(log T) depth)
            or ``"scan-recompute"`` (re-factorises in the backward pass instead
            of storing factors). Covariances use the same backend's factor
            and band inverse (a compiled sweep with ``"cpu"``), and their
            derivatives the band tangent (compiled with ``"cpu"``, two
            ``lax.scan`` sweeps with ``"scan"``; the other backends
            differentiate their band inverse directly).

    Returns:
        :class:`Smoothed` with ``states`` (T, n) and ``measurements`` (T, p).
        When the states are not identified (flat prior on x_0 and too little
        observed), the states are NaN: never a finite but arbitrary answer.

    Shapes are checked at trace time (ValueError/TypeError naming the
    argument). Single trajectory: batch with ``jax.vmap``.

    Example:
        >>> import jax, jax.numpy as jnp, kalmax as kx
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1) * 0.1,
        ...                       R=jnp.eye(1))
        >>> y = jnp.array([[1.0], [jnp.nan], [3.0]])
        >>> kx.smooth(model, y).measurements.shape
        (3, 1)
    """
    model, y, mask, _, dtype = canonicalize(model, y, mask, keep_diagonal_R=True, keep_diagonal_Q=True)
    return _smooth_checked(model, y, mask, covariances=covariances, method=method)


# Compiled once per shape, method and flag. The checks above stay outside,
# where they see concrete arrays and name the argument; inside a caller's own
# jit/vmap/grad this is an ordinary nested jit (inlined). Called op by op
# instead, the portable backends re-trace and re-compile every scan on every
# call (measured: a second eager call of a T = 9 problem took 2.6 s on
# "covariance" and 6.5 s on "scan"; compiled, a few milliseconds).
@partial(jax.jit, static_argnames=("covariances", "method"))
def _smooth_checked(model: StateSpace, y, mask, *, covariances: bool, method: str) -> Smoothed:
    w = mask.astype(y.dtype)
    x = smoothed_means(model, y, w, method)
    out = Smoothed(states=x, measurements=predict_measurements(model, x))
    if covariances:
        state_cov, cross = posterior_band(model, w, method)
        spec = "pi,tij,qj->tpq" if model.C.ndim == 2 else "tpi,tij,tqj->tpq"
        meas_cov = jnp.einsum(spec, model.C, state_cov, model.C)
        out = out._replace(state_cov=state_cov, measurement_cov=meas_cov, state_cross_cov=cross)
    return out


def posterior_band(model: StateSpace, w, method: str = "auto"):
    """(Cov[x_t | y] (T, n, n), Cov[x_{t+1}, x_t | y] (T-1, n, n)) for a canonical problem.

    The posterior precision H does not depend on the values of y, only on
    which entries are observed. The backend's own factor and band inverse
    are used (one compiled sweep each with ``method="cpu"``), and the
    derivatives come from ``covariance_band.py`` (two sweeps over the same
    factor, no tape through time); the result is NaN when the factor failed.
    """
    return covariance_band.posterior_band(model, w, method)


def prediction_error(model: StateSpace, y, mask, holdout, *, method: str = "auto"):
    """Mean squared error of the smoother on held-out measurement entries.

    The smoother sees the entries with ``mask & ~holdout``; the error is the
    mean of (y − measurements)² over the entries with ``mask & holdout``
    (held-out entries that were never observed are ignored). NaN when no
    entry is held out.

    Args:
        model: :class:`StateSpace`.
        y: (T, p) measurements.
        mask: (T, p) bool, True = observed (None: ``~isnan(y)``).
        holdout: (T, p) bool, True = hide this entry from the smoother and
            score the prediction there.

    Returns:
        scalar mean squared error, differentiable in ``model`` and ``y``.

    Example:
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.1 * jnp.eye(1), R=jnp.eye(1))
        >>> y = jnp.array([[1.0], [1.2], [0.9], [1.4], [1.1]])
        >>> mask = jnp.ones((5, 1), bool)
        >>> holdout = jnp.zeros((5, 1), bool).at[2].set(True)  # score step 2 only
        >>> loss = lambda m: kx.prediction_error(m, y, mask, holdout)
        >>> print(f"{loss(model):.4f}")
        0.0789
        >>> grads = jax.grad(loss)(model)  # a StateSpace of gradients
        >>> grads.Q.shape
        (1, 1)
    """
    sse, count = holdout_sums(model, y, mask, holdout, method=method)
    return sse / count


def holdout_sums(model: StateSpace, y, mask, holdout, *, method: str = "auto"):
    """(sum of squared held-out errors, number of held-out entries).

    Use these to average over many trajectories (vmap, then sum each part)
    so that every held-out entry counts once, whatever the trajectory length.
    """
    model, y, mask, _, dtype = canonicalize(model, y, mask, keep_diagonal_R=True, keep_diagonal_Q=True)
    holdout = jnp.asarray(holdout)
    if holdout.dtype != jnp.bool_:
        raise TypeError(f"holdout must be a boolean array (True = held out); got dtype {holdout.dtype}.")
    if holdout.shape != y.shape:
        raise ValueError(f"holdout must have the same shape as y, {tuple(y.shape)}; got {tuple(holdout.shape)}.")
    return _holdout_sums_checked(model, y, mask, holdout, method=method)


@partial(jax.jit, static_argnames=("method",))  # compiled once, as _smooth_checked
def _holdout_sums_checked(model: StateSpace, y, mask, holdout, *, method: str):
    dtype = y.dtype
    fit_mask = mask & ~holdout
    scored = mask & holdout
    x = smoothed_means(model, y, fit_mask.astype(dtype), method)
    err = jnp.where(scored, y - predict_measurements(model, x), 0)
    return jnp.sum(err**2), jnp.sum(scored).astype(dtype)
