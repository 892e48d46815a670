"""float32: dtype is kept, and a well-posed long problem (T = 10⁴) stays accurate."""

import jax
import jax.numpy as jnp
import numpy as np

import kalmax as kx
import reference as ref
from helpers import to_model


def test_float32_long_horizon_matches_float64(rng):
    T, n, p = 10_000, 2, 2
    md = ref.random_model(rng, n, p, 2, time_varying=False, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    m64 = to_model(md)
    m32 = to_model(md, np.float32)
    x64 = np.asarray(kx.smooth(m64, y, mask).states)
    est32 = kx.smooth(m32, y.astype(np.float32), mask)
    assert est32.states.dtype == jnp.float32
    err = np.abs(np.asarray(est32.states, np.float64) - x64).max() / np.abs(x64).max()
    assert np.all(np.isfinite(est32.states))
    assert err < 1e-4, err
    g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y.astype(np.float32), mask).states ** 2))(m32)
    for leaf in jax.tree_util.tree_leaves(g):
        assert leaf.dtype == jnp.float32 and np.all(np.isfinite(leaf))


def test_float32_log_likelihood_close_to_float64(rng):
    T = 500
    md = ref.random_model(rng, 3, 2, 2, time_varying=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    l64 = float(kx.log_likelihood(to_model(md), y, mask))
    l32 = kx.log_likelihood(to_model(md, np.float32), y.astype(np.float32), mask)
    assert l32.dtype == jnp.float32
    assert abs(float(l32) - l64) < 1e-4 * abs(l64)
