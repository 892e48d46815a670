r"""Held-out evaluation: training/held-out masks and pooled prediction error.

Every split is a boolean array shaped like ``y`` that selects *observed*
entries to hide from the smoother and score (the ``holdout`` argument of
:func:`kalmax.prediction_error`). Splits are drawn with ``jax.random`` from a
seed, so the same seed gives the same split on every machine and the helpers
run under ``jit``/``vmap`` (pass a key per trajectory to ``vmap``).
"""

from __future__ import annotations

from typing import Sequence

import jax
import jax.numpy as jnp
import numpy as np

from .model import StateSpace
from .smoothing import holdout_sums


def _as_key(seed):
    """An int seed becomes a typed PRNG key; a key (typed or raw uint32) passes through."""
    if isinstance(seed, (int, np.integer)):
        return jax.random.key(int(seed))
    seed = jnp.asarray(seed) if not hasattr(seed, "dtype") else seed
    if jnp.issubdtype(seed.dtype, jax.dtypes.prng_key):
        return seed
    if seed.dtype == jnp.uint32 and seed.shape == (2,):
        return jax.random.wrap_key_data(seed)
    raise TypeError(
        "seed must be a Python int or a jax.random key (jax.random.key(...)); "
        f"got an array of dtype {seed.dtype} and shape {seed.shape}."
    )


def _check_mask(mask):
    mask = jnp.asarray(mask)
    if mask.dtype != jnp.bool_:
        raise TypeError(f"mask must be a boolean array (True = observed); got dtype {mask.dtype}.")
    if mask.ndim != 2:
        raise ValueError(f"mask must have shape (T, p); got shape {tuple(mask.shape)}.")
    return mask


def _check_fraction(fraction):
    if not 0.0 <= float(fraction) <= 1.0:
        raise ValueError(f"fraction must lie in [0, 1]; got {fraction}.")
    return float(fraction)


def _ranks(key, eligible):
    """Random ranks 0, 1, ... of the eligible items (flat bool array); ineligible rank last."""
    scores = jax.random.uniform(key, eligible.shape)
    # Ineligible items get a score above every eligible one so they rank last.
    scores = jnp.where(eligible, scores, 2.0)
    order = jnp.argsort(scores)
    return jnp.zeros(eligible.shape, jnp.int32).at[order].set(jnp.arange(eligible.size, dtype=jnp.int32))


def holdout_entries(mask, fraction: float, seed):
    """Hold out a random ``fraction`` of the observed entries.

    Exactly ``round(fraction · N)`` of the N observed entries are chosen,
    uniformly at random without replacement.

    Args:
        mask: (T, p) bool, True = observed.
        fraction: in [0, 1].
        seed: Python int or ``jax.random`` key.

    Returns:
        (T, p) bool held-out mask (a subset of ``mask``). Train on
        ``mask & ~holdout``, score on ``holdout``.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> hold = kx.holdout_entries(jnp.ones((50, 2), bool), 0.2, seed=0)
        >>> int(hold.sum())
        20
    """
    mask = _check_mask(mask)
    fraction = _check_fraction(fraction)
    flat = mask.reshape(-1)
    k = jnp.round(fraction * jnp.sum(flat)).astype(jnp.int32)
    rank = _ranks(_as_key(seed), flat)
    return ((rank < k) & flat).reshape(mask.shape)


def _block_ids(T: int, block_length: int):
    if int(block_length) < 1:
        raise ValueError(f"block_length must be a positive integer; got {block_length}.")
    block_length = int(block_length)
    n_blocks = -(-T // block_length)
    return jnp.arange(T) // block_length, n_blocks


def holdout_blocks(mask, block_length: int, fraction: float, seed):
    """Hold out whole stretches of time.

    The T steps are cut into consecutive blocks of ``block_length`` steps
    (the last may be shorter); ``round(fraction · number of blocks)`` blocks
    are chosen at random and every observed entry in them is held out. Use it
    to score how well the smoother bridges gaps, which random single entries
    (with observed neighbours on both sides) do not test.

    Args:
        mask: (T, p) bool, True = observed.
        block_length: steps per block (≥ 1).
        fraction: fraction of blocks to hold out, in [0, 1].
        seed: Python int or ``jax.random`` key.

    Returns:
        (T, p) bool held-out mask (a subset of ``mask``).

    Example:
        >>> hold = kx.holdout_blocks(jnp.ones((100, 1), bool), 10, 0.3, seed=1)
        >>> int(hold.sum())  # three blocks of ten steps
        30
    """
    mask = _check_mask(mask)
    fraction = _check_fraction(fraction)
    block_of, n_blocks = _block_ids(mask.shape[0], block_length)
    k = int(round(fraction * n_blocks))
    rank = _ranks(_as_key(seed), jnp.ones(n_blocks, bool))
    rows = (rank < k)[block_of]
    return mask & rows[:, None]


def holdout_folds(mask, folds: int, seed, *, block_length=None):
    """K-fold cross-validation masks: every observed entry is held out exactly once.

    Without ``block_length`` the observed entries are dealt at random into
    ``folds`` folds whose sizes differ by at most one. With ``block_length``
    whole blocks of consecutive steps (see :func:`holdout_blocks`) are dealt
    instead.

    Args:
        mask: (T, p) bool, True = observed.
        folds: number of folds K ≥ 2.
        seed: Python int or ``jax.random`` key.
        block_length: optional steps per block.

    Returns:
        (K, T, p) bool; ``holdouts[k]`` is the held-out mask of fold k. The K
        masks are disjoint and their union is ``mask``.

    Example:
        >>> mask = jnp.ones((20, 1), bool)
        >>> holds = kx.holdout_folds(mask, 5, seed=0)
        >>> holds.shape, int(holds.sum())
        ((5, 20, 1), 20)
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.1 * jnp.eye(1), R=0.1 * jnp.eye(1))
        >>> y = jnp.asarray(np.sin(np.arange(20.0))[:, None])
        >>> cv = sum(kx.prediction_error(model, y, mask, h) for h in holds) / 5
        >>> print(f"{cv:.3f}")
        0.395
    """
    mask = _check_mask(mask)
    if int(folds) < 2:
        raise ValueError(f"folds must be an integer >= 2; got {folds}.")
    folds = int(folds)
    key = _as_key(seed)
    if block_length is None:
        flat = mask.reshape(-1)
        fold_of = (_ranks(key, flat) % folds).reshape(mask.shape)
    else:
        block_of, n_blocks = _block_ids(mask.shape[0], block_length)
        fold_of = ((_ranks(key, jnp.ones(n_blocks, bool)) % folds)[block_of])[:, None]
    return mask[None] & (fold_of[None] == jnp.arange(folds)[:, None, None])


def pad_series(series: Sequence, masks: Sequence = None, length: int = None):
    """Stack trajectories of different lengths into one padded batch.

    Padding goes at the end and is marked missing, which leaves the smoothed
    states of the real steps unchanged: unobserved steps after the last
    observation carry no information about earlier states.

    Args:
        series: sequence of B arrays of shape (T_i, p) (NaN = missing).
        masks: optional sequence of (T_i, p) bool masks (default ``~isnan``).
        length: pad to this many steps (≥ every T_i; default the longest
            T_i). Processes of a multi-process fit each pad their own
            trajectories and must agree on the length.

    Returns:
        (y, mask) as NumPy arrays of shapes (B, T_max, p): ``y`` is NaN and
        ``mask`` False in the padding. Feed them to ``jax.vmap`` or to
        :func:`batch_prediction_error`.

    Example:
        >>> y, mask = kx.pad_series([np.ones((3, 1)), np.ones((5, 1))])
        >>> y.shape, int(mask.sum())
        ((2, 5, 1), 8)
    """
    arrays = [np.asarray(s) for s in series]
    if not arrays:
        raise ValueError("series must hold at least one trajectory.")
    for i, a in enumerate(arrays):
        if a.ndim != 2 or a.shape[1] != arrays[0].shape[1]:
            raise ValueError(
                f"series[{i}] must have shape (T_i, {arrays[0].shape[1]}); got {a.shape}."
            )
    if masks is not None and len(masks) != len(arrays):
        raise ValueError(f"masks must hold one mask per trajectory ({len(arrays)}); got {len(masks)}.")
    B, T, p = len(arrays), max(a.shape[0] for a in arrays), arrays[0].shape[1]
    if length is not None:
        if int(length) < T:
            raise ValueError(f"length ({length}) must be at least the longest series ({T} steps).")
        T = int(length)
    dtype = np.result_type(*arrays, np.float32)
    y = np.full((B, T, p), np.nan, dtype=dtype)
    mask = np.zeros((B, T, p), dtype=bool)
    for i, a in enumerate(arrays):
        y[i, : a.shape[0]] = a
        m = ~np.isnan(a) if masks is None else np.asarray(masks[i], dtype=bool)
        if m.shape != a.shape:
            raise ValueError(f"masks[{i}] must have shape {a.shape}; got {m.shape}.")
        mask[i, : a.shape[0]] = m
    return y, mask


def batch_prediction_error(model: StateSpace, y, mask, holdout, *, method: str = "auto"):
    """Held-out mean squared error pooled over a batch of trajectories.

    Every held-out entry of every trajectory counts once:

        error = Σ_i sse_i / Σ_i count_i

    which is *not* the mean of the per-trajectory errors when trajectories
    hold different numbers of held-out entries.

    Args:
        model: one :class:`StateSpace` shared by all trajectories (its
            time-varying fields, if any, must span the padded length).
        y: (B, T, p) padded measurements (see :func:`pad_series`).
        mask: (B, T, p) bool, True = observed (False in the padding).
        holdout: (B, T, p) bool held-out entries.

    Returns:
        scalar, differentiable in ``model``.

    Example:
        >>> trajectories = [np.sin(np.arange(12.0))[:, None], np.cos(np.arange(8.0))[:, None]]
        >>> y, mask = kx.pad_series(trajectories)
        >>> hold = jax.vmap(lambda m, k: kx.holdout_entries(m, 0.2, k))(
        ...     mask, jax.random.split(jax.random.key(0), len(trajectories)))
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.1 * jnp.eye(1), R=0.1 * jnp.eye(1))
        >>> print(f"{kx.batch_prediction_error(model, y, mask, hold):.3f}")
        0.622
    """
    y = jnp.asarray(y)
    if y.ndim != 3:
        raise ValueError(f"y must have shape (B, T, p) (a padded batch); got shape {tuple(y.shape)}.")
    sse, count = jax.vmap(lambda yi, mi, hi: holdout_sums(model, yi, mi, hi, method=method))(
        y, jnp.asarray(mask), jnp.asarray(holdout)
    )
    return jnp.sum(sse) / jnp.sum(count)
