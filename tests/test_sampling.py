"""Posterior samples of the state path: kx.sample_states.

References:
- the posterior p(x | y) = N(x̂, H⁻¹): its mean and marginal covariances
  from kx.smooth(..., covariances=True) (checked elsewhere against the RTS
  smoother), and its whole covariance, lag-one blocks included, from a dense
  inverse of the normal-equation matrix of tests/reference.py;
- Monte-Carlo error bars for S independent draws (standard results, from
  memory): the sample mean of a coordinate has standard error sqrt(Σ_ii / S),
  and a sample covariance entry of a Gaussian has variance
  (Σ_ii Σ_jj + Σ_ij²) / S (e.g. Anderson (2003), An Introduction to
  Multivariate Statistical Analysis, Ch. 3 — from memory). The checks allow
  5 standard errors;
- gradients: central finite differences with common random numbers (the
  same key, so the same z; common practice).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model

T, N, P = 6, 2, 2
S = 20_000


@pytest.mark.parametrize("prior", [True, False])
def test_moments_of_many_draws_match_the_posterior(rng, prior):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True, prior=prior)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md, prior=prior)
    xs = np.asarray(kx.sample_states(jax.random.key(int(rng.integers(1 << 30))), model, y, mask, num_samples=S))
    assert xs.shape == (S, T, N) and np.all(np.isfinite(xs))
    est = kx.smooth(model, y, mask, covariances=True)
    Hm, _ = ref.dense_normal_equations(md, y, mask)
    Sigma = np.linalg.inv(Hm)  # the whole posterior covariance, time-major

    mean = xs.mean(axis=0)
    se_mean = np.sqrt(np.diagonal(np.asarray(est.state_cov), axis1=1, axis2=2) / S)
    assert np.all(np.abs(mean - est.states) < 5 * se_mean), np.abs(mean - est.states) / se_mean

    flat = xs.reshape(S, T * N)
    emp = np.cov(flat, rowvar=False)
    d = np.diag(Sigma)
    se_cov = np.sqrt((np.outer(d, d) + Sigma ** 2) / S)
    assert np.all(np.abs(emp - Sigma) < 5 * se_cov), np.max(np.abs(emp - Sigma) / se_cov)
    # The marginal blocks against the smoother's selected inversion, and one lag-one block by name.
    for t in range(T):
        blk = slice(t * N, (t + 1) * N)
        assert np.all(np.abs(emp[blk, blk] - est.state_cov[t]) < 5 * se_cov[blk, blk])
    t = 2
    lag = emp[(t + 1) * N:(t + 2) * N, t * N:(t + 1) * N]
    dense_lag = Sigma[(t + 1) * N:(t + 2) * N, t * N:(t + 1) * N]
    assert np.all(np.abs(lag - dense_lag) < 5 * se_cov[(t + 1) * N:(t + 2) * N, t * N:(t + 1) * N])
    assert np.abs(dense_lag).max() > 10 * se_cov.max()  # the lag-one covariance is not ~0: the check has teeth


def test_pathwise_gradient_matches_finite_differences_with_common_random_numbers(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md)
    keys = jax.random.split(jax.random.key(7), 2)

    def loss(key, m, yy):
        xs = kx.sample_states(key, m, yy, mask, num_samples=64)
        return jnp.mean(jnp.sin(xs)) + jnp.mean(xs[..., 0] ** 2 * xs[..., 1])

    grads = jax.jit(jax.vmap(jax.grad(loss, argnums=(1, 2)), in_axes=(0, None, None)))(keys, model, jnp.asarray(y))
    h = 1e-6  # central differences (common practice), with the same key on both sides
    f = jax.jit(loss)
    t, j = np.argwhere(mask)[2]
    for k in range(2):
        for field, idx in [("Q", (0, 1)), ("R", (1, 1)), ("A", (1, 0)), ("x0_cov", (0, 0)), ("b", (0,))]:
            base = np.asarray(getattr(model, field))
            E = np.zeros_like(base)
            E[idx] = 1.0
            if field in ("Q", "R", "x0_cov"):
                E[idx[::-1]] = 1.0
            fd = (float(f(keys[k], model.replace(**{field: base + h * E}), y))
                  - float(f(keys[k], model.replace(**{field: base - h * E}), y))) / (2 * h)
            ad = float(np.sum(np.asarray(getattr(grads[0], field))[k] * E))
            assert abs(ad - fd) < 1e-6 * (1 + abs(fd)), (k, field, ad, fd)
        E = np.zeros_like(y)
        E[t, j] = 1.0
        fd = (float(f(keys[k], model, np.where(mask, y, 0) + h * E))
              - float(f(keys[k], model, np.where(mask, y, 0) - h * E))) / (2 * h)
        assert abs(float(grads[1][k, t, j]) - fd) < 1e-6 * (1 + abs(fd))
        assert np.all(np.asarray(grads[1][k])[~mask] == 0)


def test_keys_vmap_jit_method_and_dtypes(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md)
    keys = jax.random.split(jax.random.key(3), 3)
    per_key = jax.jit(jax.vmap(lambda k: kx.sample_states(k, model, y, mask)))(keys)
    assert per_key.shape == (3, T, N)
    for i in range(3):
        one = kx.sample_states(keys[i], model, y, mask)
        np.testing.assert_allclose(per_key[i], one, atol=1e-12)
    assert not np.allclose(per_key[0], per_key[1])  # different keys, different draws
    # The same draws whichever backend computes the means (the factor is always the JAX one).
    np.testing.assert_allclose(kx.sample_states(keys[0], model, y, mask, method="scan"),
                               per_key[0], atol=1e-10)
    raw = kx.sample_states(jax.random.PRNGKey(0), model, y, mask, num_samples=2)
    assert raw.shape == (2, T, N) and np.all(np.isfinite(raw))
    # float32: dtype kept, and the draws centre on the float64 smoother mean (4000 draws, 5 standard errors).
    x32 = kx.sample_states(keys[0], to_model(md, np.float32), y.astype(np.float32), mask, num_samples=4000)
    assert x32.dtype == jnp.float32
    est = kx.smooth(model, y, mask, covariances=True)
    se = np.sqrt(np.diagonal(np.asarray(est.state_cov), axis1=1, axis2=2) / 4000)
    assert np.all(np.abs(np.asarray(x32, np.float64).mean(axis=0) - est.states) < 5 * se)


def test_unidentified_states_give_nan(rng):
    # Flat prior, one scalar measurement of a two-dimensional state: not identified.
    model = kx.StateSpace(A=jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1))
    y = jnp.ones((3, 1)).at[1:].set(jnp.nan)
    xs = kx.sample_states(jax.random.key(0), model, y, num_samples=5)
    assert xs.shape == (5, 3, 2) and np.all(np.isnan(xs))


def test_argument_errors_name_the_argument():
    model = kx.StateSpace(A=jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1))
    y = jnp.zeros((5, 1))
    key = jax.random.key(0)
    with pytest.raises(ValueError, match=r"key must be a single PRNG key, shape \(\); got shape \(2,\)"):
        kx.sample_states(jax.random.split(key, 2), model, y)
    with pytest.raises(ValueError, match="key must be a single PRNG key"):
        kx.sample_states(jnp.zeros(3, jnp.uint32), model, y)
    with pytest.raises(TypeError, match="key must be a JAX PRNG key"):
        kx.sample_states(0, model, y)
    with pytest.raises(ValueError, match="num_samples must be None or a positive int"):
        kx.sample_states(key, model, y, num_samples=0)
    with pytest.raises(ValueError, match=r"model.Q must have shape \(2, 2\)"):
        jax.jit(lambda k, m: kx.sample_states(k, m, y))(key, model.replace(Q=jnp.eye(3)))
    with pytest.raises(ValueError, match=r"y must have shape \(T, p\)"):
        kx.sample_states(key, model, y[:, 0])
