"""Held-out masks and pooled prediction error (kalmax/_src/splits.py)."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx

import reference as ref


def _mask(rng, T=40, p=3, missing=0.25):
    return jnp.asarray(rng.random((T, p)) >= missing)


def test_entries_subset_count_and_reproducible():
    rng = np.random.default_rng(0)
    mask = _mask(rng)
    n_obs = int(mask.sum())
    hold = kx.holdout_entries(mask, 0.3, seed=7)
    assert hold.dtype == jnp.bool_ and hold.shape == mask.shape
    assert not bool(jnp.any(hold & ~mask))  # only observed entries are held out
    assert int(hold.sum()) == round(0.3 * n_obs)
    # Same seed -> same split (int seed and the equivalent key); another seed differs.
    np.testing.assert_array_equal(hold, kx.holdout_entries(mask, 0.3, seed=7))
    np.testing.assert_array_equal(hold, kx.holdout_entries(mask, 0.3, jax.random.key(7)))
    assert not np.array_equal(hold, kx.holdout_entries(mask, 0.3, seed=8))
    # Edge fractions.
    assert int(kx.holdout_entries(mask, 0.0, 1).sum()) == 0
    np.testing.assert_array_equal(kx.holdout_entries(mask, 1.0, 1), mask)


def test_entries_uniform_over_seeds_under_jit_and_vmap():
    # Every observed entry should be held out with probability = fraction.
    # 4000 draws: binomial s.d. sqrt(.3*.7/4000) ~ 0.0072; allow 5 s.d. (common practice).
    mask = jnp.ones((6, 2), bool).at[2, 1].set(False)
    keys = jax.random.split(jax.random.key(3), 4000)
    draws = jax.jit(jax.vmap(lambda k: kx.holdout_entries(mask, 0.3, k)))(keys)
    freq = np.asarray(draws.mean(axis=0))
    # 11 observed entries, round(3.3) = 3 held out each time: frequency 3/11.
    expected = 3 / 11
    assert np.all(np.abs(freq[np.asarray(mask)] - expected) < 5 * np.sqrt(expected * (1 - expected) / 4000))
    assert freq[2, 1] == 0.0


def test_blocks_are_whole_blocks():
    rng = np.random.default_rng(1)
    mask = _mask(rng, T=53, p=2)
    hold = np.asarray(kx.holdout_blocks(mask, 10, 0.4, seed=0))
    assert not np.any(hold & ~np.asarray(mask))
    rows = np.zeros(53, bool)
    blocks = [np.arange(s, min(s + 10, 53)) for s in range(0, 53, 10)]  # 6 blocks, last of 3 steps
    chosen = []
    for i, idx in enumerate(blocks):
        if hold[idx].any():
            chosen.append(i)
            rows[idx] = True
    assert len(chosen) == round(0.4 * 6)
    # Inside a chosen block every observed entry is held out; outside, none.
    np.testing.assert_array_equal(hold, np.asarray(mask) & rows[:, None])


@pytest.mark.parametrize("block_length", [None, 4])
def test_folds_partition_observed_entries(block_length):
    rng = np.random.default_rng(2)
    mask = _mask(rng, T=30, p=3)
    holds = np.asarray(kx.holdout_folds(mask, 4, seed=5, block_length=block_length))
    assert holds.shape == (4, 30, 3)
    # Disjoint, and together exactly the observed entries.
    np.testing.assert_array_equal(holds.sum(axis=0), np.asarray(mask).astype(int))
    if block_length is None:
        sizes = holds.sum(axis=(1, 2))
        assert sizes.max() - sizes.min() <= 1
    else:
        for s in range(0, 30, block_length):
            folds_here = {k for k in range(4) if holds[k, s : s + block_length].any()}
            assert len(folds_here) <= 1


def test_argument_errors():
    mask = jnp.ones((5, 1), bool)
    with pytest.raises(ValueError, match="fraction"):
        kx.holdout_entries(mask, 1.5, 0)
    with pytest.raises(TypeError, match="boolean"):
        kx.holdout_entries(jnp.ones((5, 1)), 0.5, 0)
    with pytest.raises(ValueError, match="folds"):
        kx.holdout_folds(mask, 1, 0)
    with pytest.raises(ValueError, match="block_length"):
        kx.holdout_blocks(mask, 0, 0.5, 0)
    with pytest.raises(TypeError, match="seed"):
        kx.holdout_entries(mask, 0.5, jnp.ones(3))


def test_pad_series_shapes():
    y, mask = kx.pad_series([np.ones((3, 2)), np.full((5, 2), np.nan), np.zeros((4, 2))])
    assert y.shape == (3, 5, 2) and mask.shape == (3, 5, 2)
    assert mask[0, :3].all() and not mask[0, 3:].any()
    assert not mask[1].any()
    assert np.isnan(y[2, 4]).all()
    with pytest.raises(ValueError, match="series\\[1\\]"):
        kx.pad_series([np.ones((3, 2)), np.ones((3, 1))])


def test_batch_error_pools_entries_like_a_numpy_smoother():
    """Pooled error over trajectories of different lengths (pad + mask).

    Reference: per-trajectory Rauch-Tung-Striebel smoother in NumPy
    (tests/reference.py; Rauch, Tung & Striebel 1965) on the *unpadded*
    trajectory, errors pooled entry by entry.
    """
    rng = np.random.default_rng(4)
    n, p = 2, 2
    md = ref.random_model(rng, n, p, 1, time_varying=False, full_R=True, prior=True, offsets=True)
    model = kx.StateSpace(A=md["A"], C=md["C"], Q=md["Q"], R=md["R"], b=md["b"], d=md["d"],
                          x0_mean=md["m0"], x0_cov=md["P0"])
    lengths = [7, 18, 12]
    series, masks = [], []
    for T in lengths:
        y, m = ref.random_data(rng, md, T, missing=0.2, n_empty=0)
        series.append(y)
        masks.append(m)
    y, mask = kx.pad_series(series, masks)
    keys = jax.random.split(jax.random.key(0), len(lengths))
    hold = jax.vmap(lambda m, k: kx.holdout_entries(m, 0.3, k))(jnp.asarray(mask), keys)
    got = float(kx.batch_prediction_error(model, y, mask, hold))

    sse, count, per_traj = 0.0, 0, []
    for i, T in enumerate(lengths):
        h = np.asarray(hold[i, :T])
        assert not np.asarray(hold[i, T:]).any()  # padding is never held out
        fit_mask = masks[i] & ~h
        xs, _ = ref.rts_smoother(md, series[i], fit_mask)
        pred = xs @ md["C"].T + md["d"]
        err = np.where(h, series[i] - pred, 0.0)
        sse += np.sum(err**2)
        count += int(h.sum())
        per_traj.append(np.sum(err**2) / h.sum())
    np.testing.assert_allclose(got, sse / count, rtol=1e-10)
    # The pooled mean differs from the unweighted mean of per-trajectory errors.
    assert abs(got - np.mean(per_traj)) > 1e-6
