"""Exact log-likelihood against independent references (float64).

- Prediction-error decomposition from a textbook Kalman filter written in
  NumPy (Harvey 1989, Forecasting, Structural Time Series Models and the Kalman
  Filter, §3.4; Durbin & Koopman 2012, §7.2 — section numbers from memory).
- A dense multivariate-normal log-density of all observed entries (SciPy).
- Flat-prior ("diffuse") convention: the limit of the proper-prior likelihood
  with x_0 ~ N(0, κI) as κ → ∞, after adding back (n/2) log(2πκ) — the prior's
  normalisation, which the flat density 1 does not have.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax.test_util import check_grads

import kalmax as kx
import reference as ref
from helpers import to_model


@pytest.mark.parametrize("tv,full_R,missing", [(True, True, 0.3), (False, True, 0.5), (True, False, 0.0)])
def test_equals_kalman_filter_and_dense_density(rng, tv, full_R, missing):
    T, n, p = 8, 3, 2
    md = ref.random_model(rng, n, p, T, time_varying=tv, full_R=full_R)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    got = float(kx.log_likelihood(to_model(md), y, mask))
    kf = ref.kalman_filter(md, y, mask).log_likelihood
    dense = ref.dense_log_likelihood(md, y, mask)
    assert np.isclose(got, kf, rtol=1e-10, atol=1e-10)
    assert np.isclose(got, dense, rtol=1e-10, atol=1e-10)


def test_flat_prior_is_the_large_prior_limit(rng):
    T, n, p = 9, 2, 2
    md = ref.random_model(rng, n, p, T)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    flat = float(kx.log_likelihood(to_model(md, prior=False), y, mask))
    kappa = 1e9
    md_k = dict(md, m0=np.zeros(n), P0=kappa * np.eye(n))
    proper = ref.kalman_filter(md_k, y, mask).log_likelihood
    assert np.isclose(flat, proper + 0.5 * n * np.log(2 * np.pi * kappa), atol=1e-5)


def test_gradient_matches_finite_differences(rng):
    T, n, p = 6, 2, 2
    md = ref.random_model(rng, n, p, T, time_varying=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md)
    g = jax.grad(kx.log_likelihood)(model, y, mask)
    h = 1e-6
    for f in ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov"):
        a = np.asarray(getattr(model, f))
        for _ in range(3):
            idx = tuple(int(rng.integers(0, s)) for s in a.shape)
            E = np.zeros_like(a)
            E[idx] = 1.0
            if f in ("Q", "R", "x0_cov"):
                E[idx[:-2] + (idx[-1], idx[-2])] = 1.0
            fd = (ref.kalman_filter(dict(md, **{_key(f): a + h * E}), y, mask).log_likelihood
                  - ref.kalman_filter(dict(md, **{_key(f): a - h * E}), y, mask).log_likelihood) / (2 * h)
            got = float(jnp.sum(getattr(g, f) * E))
            assert abs(fd - got) <= 1e-6 * (1 + abs(fd)), (f, idx, fd, got)


def _key(field):
    return {"x0_mean": "m0", "x0_cov": "P0"}.get(field, field)


def test_gradient_wrt_y_and_check_grads(rng):
    T, n, p = 5, 2, 2
    md = ref.random_model(rng, n, p, T, time_varying=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md, prior=False)
    y0 = jnp.where(mask, y, 0.0)
    gy = jax.grad(kx.log_likelihood, argnums=1)(model, jnp.asarray(y), mask)
    assert np.all(np.asarray(gy)[~mask] == 0) and np.all(np.isfinite(gy))

    def f(A, C, Lq, yy):
        Q = Lq @ Lq.T + 0.3 * jnp.eye(n)
        return kx.log_likelihood(model.replace(A=A, C=C, Q=Q), yy, mask)

    check_grads(f, (model.A, model.C, jnp.asarray(rng.normal(size=(n, n))), y0), order=1, modes=["rev"],
                atol=1e-6, rtol=1e-6)


def test_local_level_steady_state_from_smoother_covariances():
    """Local level model (random walk plus noise) in steady state.

    The closed-form steady state of the scalar Riccati equation
    P = P − P²/(P + r) + q, i.e. P = (q + sqrt(q² + 4qr))/2 and gain
    K = P/(P + r) (standard result; Durbin & Koopman 2012 §2.11 — from memory),
    must show up in the exact likelihood and smoother at the end of a long
    series: the curvature of log p(y) in the newest observation is −1/(P + r)
    (the one-step prediction variance), and the last smoothed state moves by
    K per unit of the newest observation.
    """
    q, r = 1469.1, 15099.0
    P, K = ref.local_level_steady_state(q, r)
    T = 400
    model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.full((1, 1), q), R=jnp.full((1, 1), r))
    y = jnp.zeros((T, 1))
    # Compiled: op by op, the Hessian through 400 steps costs most of a minute of dispatch.
    hess_last = jax.jit(jax.hessian(lambda v: kx.log_likelihood(model, y.at[-1, 0].set(v))))(0.0)
    assert np.isclose(-1.0 / float(hess_last), P + r, rtol=1e-9)
    dx = jax.jit(jax.grad(lambda v: kx.smooth(model, y.at[-1, 0].set(v)).states[-1, 0]))(0.0)
    assert np.isclose(float(dx), K, rtol=1e-9)
