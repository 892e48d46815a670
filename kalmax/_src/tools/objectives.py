"""The fitting objectives of the command line, as functions of log-parameters.

"likelihood": the exact negative log-likelihood of the training cells per
cell. "holdout": the pooled K-fold cross-validated squared error of the
smoother, in units of each column's sd, followed by :func:`calibrate_scale`
(the held-out error cannot see the overall scale of the variances).
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np

from .. import splits
from ..continuous import ContinuousModel
from ..likelihood import log_likelihood
from ..smoothing import holdout_sums, smooth
from .errors import FitError
from .series import Series, column_scales
from .spec import ModelSpec


def _scaled(model, y, s):
    """The same model in standardised units y_j / s_j (smoothed states are unchanged)."""
    inv = 1.0 / s
    d = None if model.d is None else model.d * inv
    return model.replace(C=model.C * inv[:, None], R=model.R * inv[:, None] * inv[None, :], d=d), y * inv


def series_inputs(series: Series):
    """The regression inputs of ``series`` as JAX arrays (None when it has none): a data argument of the loss."""
    return None if not series.inputs else {k: jnp.asarray(v) for k, v in series.inputs.items()}


_CHAIN_KINDS = ("random-walk", "constant-velocity", "constant-acceleration")


def independent_axes(spec: ModelSpec):
    """[(state indices, column indices) per axis] when the likelihood splits by axis, else None.

    The chain kinds in ``dims`` axes are ``dims`` independent chains: the
    drift and the diffusion are block-diagonal by axis (states are stored
    derivative-major, so axis k holds states k, k + dims, ...), every column
    measures one state, and the noise is one variance per column (R
    diagonal). With the flat prior of the command line, the joint density of
    the measurements is then the product of the axes' densities, so

        log p(y) = Σ_k log p(y_k)

    exactly, the 2π constants included (Σ_k (N_k − n_k) = N − n). Each term is
    a problem of size n/dims, a (dims/1)³-fold smaller factorisation, and the
    axes run as one batch (vmap), which the compiled kernel spreads over the
    CPU cores. An axis that no column measures is not identified; then the
    whole model is kept (its likelihood is NaN either way, with the message
    that goes with it).
    """
    if spec.kind not in _CHAIN_KINDS or spec.dims == 1:
        return None
    dims, n = spec.dims, len(spec.state_names())
    measured = spec.measured_indices()
    axes = []
    for k in range(dims):
        cols = [j for j, i in enumerate(measured) if i % dims == k]
        if not cols:
            return None
        axes.append(([i for i in range(n) if i % dims == k], cols))
    return axes


def _axis_likelihood_loss(spec: ModelSpec, t, axes, y, mask, n_obs):
    """The likelihood objective as a batch of per-axis problems (see :func:`independent_axes`).

    Axes with fewer columns than the widest are padded with columns that are
    never observed (mask False), which add nothing to the likelihood.
    """
    width = max(len(cols) for _, cols in axes)
    rows = np.arange(y.shape[0])[:, None]
    y_np, mask_np = np.asarray(y), np.asarray(mask)
    y_axes = np.zeros((len(axes), y.shape[0], width), y_np.dtype)
    mask_axes = np.zeros((len(axes), y.shape[0], width), bool)
    for k, (_, cols) in enumerate(axes):
        y_axes[k, :, :len(cols)] = y_np[rows, cols]
        mask_axes[k, :, :len(cols)] = mask_np[rows, cols]

    def loss(theta, y_axes, mask_axes):
        cm = spec.continuous_model(theta)
        drift = np.asarray(cm.drift)  # concrete: keeps the closed-form discretisation
        # Every axis of a chain has the same drift block, hence the same A_t = exp(F Δ_t) (a function of
        # the drift and the timestamps only): one copy serves the whole batch (the kernel broadcasts an
        # operand that is not batched) instead of a stacked (axes, T-1, n, n) array per step of the fit.
        first = drift[np.ix_(axes[0][0], axes[0][0])]
        shared_A = all(np.array_equal(drift[np.ix_(states, states)], first) for states, _ in axes)
        models = []
        for states, cols in axes:
            pad = width - len(cols)
            C = cm.C[np.ix_(cols, states)]
            R = cm.R[np.ix_(cols, cols)]
            if pad:
                C = jnp.concatenate([C, jnp.zeros((pad, len(states)), C.dtype)])
                R = jax.scipy.linalg.block_diag(R, jnp.eye(pad, dtype=R.dtype))
            sub = ContinuousModel(drift=drift[np.ix_(states, states)],
                                  diffusion=cm.diffusion[np.ix_(states, states)], C=C, R=R, jitter=cm.jitter)
            models.append(sub.at_times(t))
        if not shared_A:
            stacked = jax.tree_util.tree_map(lambda *leaves: jnp.stack(leaves), *models)
            return -jnp.sum(jax.vmap(log_likelihood)(stacked, y_axes, mask_axes)) / n_obs
        A = models[0].A
        stacked = jax.tree_util.tree_map(lambda *leaves: jnp.stack(leaves), *[m.replace(A=None) for m in models])
        per_axis = jax.vmap(lambda m, y_k, mask_k: log_likelihood(m.replace(A=A), y_k, mask_k))
        return -jnp.sum(per_axis(stacked, y_axes, mask_axes)) / n_obs

    return loss, (jnp.asarray(y_axes), jnp.asarray(mask_axes))


def make_loss(spec: ModelSpec, series: Series, train_mask, objective: str, *,
              fixed=(), folds: int = 4, seed: int = 0, block_length=None):
    """(loss, data): loss(theta, *data) for ``theta`` = spec.to_unconstrained(fixed).

    The measurements and masks are returned separately so that they reach
    the compiled step as arguments, not as constants baked into it (XLA can
    spend seconds folding a large closed-over mask). The timestamps stay
    concrete: the exact discretisation sizes its loop from them.

    objective "likelihood": −log p(y_train) / N_train (exact, diffuse prior).
    objective "holdout": pooled K-fold cross-validated squared error of the
    smoother on the training entries, each column in units of its standard
    deviation (so columns in different units weigh alike). With
    ``block_length`` the folds are dealt as whole blocks of that many rows
    (``splits.holdout_folds``), so the error is that of bridging gaps.
    """
    t = np.asarray(series.t)
    y = jnp.asarray(np.where(train_mask, series.y, 0.0))
    mask = jnp.asarray(train_mask)
    inputs = series_inputs(series)
    n_obs = float(np.sum(train_mask))
    if objective == "likelihood":
        axes = independent_axes(spec)
        if axes is not None:
            return _axis_likelihood_loss(spec, t, axes, y, mask, n_obs)

        def loss(theta, y, mask, inputs):
            model = spec.state_space(t, theta, inputs=inputs)
            return -log_likelihood(model, y, mask) / n_obs
        return loss, (y, mask, inputs)
    if objective == "holdout":
        s = jnp.asarray(column_scales(series, train_mask))
        holds = splits.holdout_folds(mask, folds, seed, block_length=block_length)

        def loss(theta, y, mask, s, holds, inputs):
            model, ys = _scaled(spec.state_space(t, theta, inputs=inputs), y, s)
            sse, cnt = jax.vmap(lambda h: holdout_sums(model, ys, mask, h))(holds)
            return jnp.sum(sse) / jnp.sum(cnt)
        return loss, (y, mask, s, holds, inputs)
    raise ValueError(f"objective must be 'likelihood' or 'holdout'; got {objective!r}.")


def calibrate_scale(spec: ModelSpec, series: Series, train_mask, *, folds: int = 4, seed: int = 0,
                    block_length=None) -> ModelSpec:
    """Rescale every variance so that cross-validated standardised errors average 1.

    The smoothed means depend only on the *ratios* of the variances, so the
    held-out error cannot tell their overall scale c. Multiplying all of them
    by c multiplies every predictive variance (posterior plus noise) by c, so
    c = mean over held-out entries of e² / v, with v the predictive variance
    of that entry for a new noisy measurement (measurement_cov + R) from the
    fold that hid it.
    """
    t = jnp.asarray(series.t)
    y = jnp.asarray(np.where(train_mask, series.y, 0.0))
    mask = jnp.asarray(train_mask)
    holds = splits.holdout_folds(mask, folds, seed, block_length=block_length)
    model = spec.state_space(t, inputs=series.inputs)
    R = np.diag(np.asarray(model.R))

    def one(h):
        out = smooth(model, y, mask & ~h, covariances=True)
        v = jnp.diagonal(out.measurement_cov, axis1=-2, axis2=-1) + R
        return jnp.where(h, (y - out.measurements) ** 2 / v, 0.0)

    z2 = np.asarray(jax.jit(jax.vmap(one))(holds))
    c = float(z2.sum() / np.asarray(holds).sum())
    if not (math.isfinite(c) and c > 0):
        raise FitError("could not calibrate the noise scale (non-finite held-out errors).")
    variances = spec.variance_names()  # q, q_level, q_slope, ...: variances per unit time
    params = {}
    for k, v in spec.params.items():
        scale = c if k in variances else 1.0
        params[k] = [scale * float(x) for x in v] if np.ndim(v) else scale * float(v)
    return spec.replace(params=params, noise=tuple(c * r for r in spec.noise))
