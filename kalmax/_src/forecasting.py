r"""Forecasts past the end of a record: states and measurements k = 1..h steps ahead.

Given the measurements y_0..y_{T-1}, the state at the last step has the
filtered distribution N(m, P) (``filtering.py``; at the last step the
filtered and smoothed distributions coincide). No measurement arrives after
T−1, so the forecast distribution of x_{T-1+k} follows from the transitions
alone, one prediction step at a time (the prediction step of the Kalman
filter, e.g. Särkkä (2013), Bayesian Filtering and Smoothing, Ch. 4 — from
memory): with A_k, b_k, Q_k the transition x_{T-2+k} → x_{T-1+k},

    μ_0 = m,  Σ_0 = P,
    μ_k = A_k μ_{k-1} + b_k,   Σ_k = A_k Σ_{k-1} A_kᵀ + Q_k,      k = 1..h,

and the measurement y_{T-1+k} = C_k x_{T-1+k} + d_k + v_k, v_k ~ N(0, R_k), has

    mean C_k μ_k + d_k,   Cov of the mean C_k Σ_k C_kᵀ,   Cov of a new measurement C_k Σ_k C_kᵀ + R_k.

Each Σ_k is a sum of positive semi-definite terms: nothing is subtracted.
The recursion is a ``lax.scan`` over the h steps, differentiated by ordinary
AD together with the filter that supplies (m, P).

The future model. The transitions after the record are not in the model
(its A, Q, b end at step T−1), so the caller says what they are, as a
:class:`StateSpace` ``future`` whose transition fields (A, Q, b) hold the h
future transitions and whose measurement fields (C, R, d) hold the h future
measurement maps, each either time-invariant or with a leading axis of
length h (row k−1 belongs to forecast step k). Its prior fields are ignored.
A time-invariant model repeats itself (``future=None``, give ``steps``); a
``ContinuousModel`` gives it for future timestamps ``s_1 < .. < s_h`` as
``cm.at_times(concatenate([times[-1:], s]))``: h+1 timestamps starting at
the last observed one give exactly h transitions.
"""

from __future__ import annotations

from functools import partial
from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from .checks import _require_float, _shape_str, canonicalize
from .filtering import filtered_moments
from .linalg import matvec, mT
from .model import StateSpace


class Forecast(NamedTuple):
    """Result of :func:`forecast`; row k−1 is step T−1+k, k = 1..h.

    Attributes:
        states: (h, n) forecast state means E[x_{T-1+k} | y].
        state_cov: (h, n, n) forecast state covariances Cov[x_{T-1+k} | y].
        measurements: (h, p) C_k states_k + d_k, the forecast measurement mean.
        measurement_cov: (h, p, p) C_k state_cov_k C_kᵀ, covariance of the
            mean measurement (an interval for the noise-free signal).
        predictive_cov: (h, p, p) measurement_cov + R_k, covariance of a new
            noisy measurement (what a prediction interval for future data
            must cover).
    """

    states: jnp.ndarray
    state_cov: jnp.ndarray
    measurements: jnp.ndarray
    measurement_cov: jnp.ndarray
    predictive_cov: jnp.ndarray


_FUTURE_CORE = {"A": "nn", "Q": "nn", "b": "n", "C": "pn", "R": "pp", "d": "p"}


def _future_steps(model: StateSpace, future: Optional[StateSpace], steps: Optional[int], n: int, p: int):
    """Check ``future`` (or build it from a time-invariant ``model``) and find h. Trace time only."""
    if steps is not None and (isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 1):
        raise ValueError(f"steps must be a positive int (the forecast horizon h); got {steps!r}.")
    if future is None:
        if steps is None:
            raise ValueError("steps is required when future is None (the horizon h of a time-invariant model).")
        for name, core in _FUTURE_CORE.items():
            x = getattr(model, name)
            if x is not None and np.ndim(x) != len(core):
                raise ValueError(
                    f"model.{name} is time-varying (shape {_shape_str(np.shape(x))}), so the model does not "
                    "say what comes after the record: pass the future steps as future=StateSpace(...) "
                    "(for a ContinuousModel: cm.at_times(times including the last observed one))."
                )
        return model, int(steps)
    if not isinstance(future, StateSpace):
        raise TypeError(f"future must be a kalmax.StateSpace (the h future steps); got {type(future).__name__}.")
    size = {"n": n, "p": p}
    lengths = {}
    for name, core in _FUTURE_CORE.items():
        x = getattr(future, name)
        if x is None:
            if name in ("A", "Q", "C", "R"):
                raise ValueError(f"future.{name} is required; got None.")
            continue
        _require_float(f"future.{name}", x)
        shape = tuple(np.shape(x))
        inv = tuple(size[c] for c in core)
        if shape == inv:
            continue
        if len(shape) == len(inv) + 1 and shape[1:] == inv and shape[0] >= 1:
            lengths[name] = shape[0]
            continue
        raise ValueError(
            f"future.{name} must have shape {_shape_str(inv)} (time-invariant) or "
            f"{_shape_str(('h',) + inv)} (one per forecast step); got {_shape_str(shape)}."
        )
    if steps is not None:
        lengths = dict(lengths, steps=int(steps))
    if len(set(lengths.values())) > 1:
        found = ", ".join(f"{k}: {v}" for k, v in lengths.items())
        raise ValueError(f"the leading axes of future's fields and steps must agree on the horizon h; got {found}.")
    if not lengths:
        raise ValueError("steps is required when every field of future is time-invariant.")
    return future, next(iter(lengths.values()))


def forecast(model: StateSpace, y, mask=None, *, steps: Optional[int] = None,
             future: Optional[StateSpace] = None) -> Forecast:
    r"""Forecast the states and measurements h steps past the end of the record.

    The last state given all of y, N(m, P), is pushed through the future
    transitions: μ_k = A_k μ_{k-1} + b_k, Σ_k = A_k Σ_{k-1} A_kᵀ + Q_k for
    k = 1..h (derivation in the module docstring of
    ``kalmax/_src/forecasting.py``).

    Args:
        model: the :class:`StateSpace` of the record y.
        y: (T, p) measurements. Missing entries may hold any value, NaN too.
        mask: (T, p) bool, True where y is observed. Default: ``~isnan(y)``.
        steps: the horizon h (a Python int). Required with ``future=None``;
            otherwise optional, and it must agree with ``future``.
        future: the h future steps as a :class:`StateSpace`: A (n, n) or
            (h, n, n) — row k−1 maps x_{T-2+k} to x_{T-1+k} — Q likewise,
            optional b (n,) or (h, n), and the measurement maps of the
            forecast steps C (p, n) or (h, p, n), R (p, p) or (h, p, p),
            optional d (p,) or (h, p). Its prior fields are ignored. None:
            the model is time-invariant and repeats itself (an error names
            the field when it is not). For a ``ContinuousModel`` ``cm`` and
            future timestamps ``s`` (h,), use
            ``cm.at_times(jnp.concatenate([times[-1:], s]))``: the last
            observed timestamp first, so there are h transitions.
            Its arrays are cast to the dtype of ``model`` and ``y``.

    Returns:
        :class:`Forecast` with ``states`` (h, n), ``state_cov`` (h, n, n),
        ``measurements`` (h, p), ``measurement_cov`` (h, p, p) and
        ``predictive_cov`` (h, p, p). A 95 % prediction interval for the
        j-th future measurement is measurements[:, j] ± 1.96 ·
        sqrt(predictive_cov[:, j, j]). NaN when the last state is not
        identified (flat prior and too little observed).

    Differentiable w.r.t. ``model``, ``y`` and ``future`` (ordinary AD
    through the filter and the prediction steps); ``jit`` and ``vmap``
    compose. Shapes are checked at trace time.

    Example:
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.1 * jnp.eye(1), R=jnp.eye(1))
        >>> y = jnp.array([[1.0], [jnp.nan], [3.0]])
        >>> fc = kx.forecast(model, y, steps=2)   # a random walk: flat mean, growing variance
        >>> print(np.round(fc.states[:, 0], 3), np.round(fc.state_cov[:, 0, 0], 3))
        [2.091 2.091] [0.645 0.745]
        >>> print(np.round(fc.predictive_cov[:, 0, 0], 3))
        [1.645 1.745]
        >>> cm = kx.constant_velocity(dims=1, q=0.5, r=0.1)   # irregular future timestamps
        >>> times = jnp.array([0.0, 0.5, 1.5])
        >>> fc = kx.forecast(cm.at_times(times), jnp.array([[0.0], [0.4], [1.1]]),
        ...                  future=cm.at_times(jnp.array([1.5, 2.0, 4.0])))
        >>> fc.states.shape
        (2, 2)
    """
    model, y, mask, dims, dtype = canonicalize(model, y, mask)
    future, h = _future_steps(model, future, steps, dims.n, dims.p)
    cast = lambda x: None if x is None else jnp.asarray(x, dtype)  # noqa: E731
    parts = tuple(cast(getattr(future, f)) for f in ("A", "Q", "b", "C", "R", "d"))
    return _forecast(model, y, mask.astype(dtype), parts, h)


@partial(jax.jit, static_argnums=(4,))  # compiled once per shape, like the filter it calls
def _forecast(model: StateSpace, y, w, parts, h: int) -> Forecast:
    A, Q, b, C, R, d = parts
    dtype = y.dtype
    means, covs, _ = filtered_moments(model, y, w)
    n = means.shape[-1]
    per_step = lambda x, core: jnp.broadcast_to(x, (h,) + core)  # noqa: E731
    A_k = per_step(A, (n, n))
    Q_k = per_step(Q, (n, n))
    b_k = jnp.zeros((h, n), dtype) if b is None else per_step(b, (n,))

    def step(carry, xs):
        mu, S = carry
        A_t, Q_t, b_t = xs
        mu = A_t @ mu + b_t
        S = A_t @ S @ A_t.T + Q_t
        S = 0.5 * (S + S.T)  # exact symmetry against rounding
        return (mu, S), (mu, S)

    _, (mus, Sigmas) = lax.scan(step, (means[-1], covs[-1]), (A_k, Q_k, b_k))
    meas = matvec(C, mus) + (0 if d is None else d)
    meas_cov = C @ Sigmas @ mT(C)
    meas_cov = 0.5 * (meas_cov + mT(meas_cov))
    R_sym = 0.5 * (R + mT(R))
    return Forecast(states=mus, state_cov=Sigmas, measurements=meas, measurement_cov=meas_cov,
                    predictive_cov=meas_cov + R_sym)
