"""Posterior covariances (selected inversion) and interval calibration.

References: RTS smoother covariances and lag-one cross-covariances (Särkkä 2013,
Bayesian Filtering and Smoothing, Thm 8.2; the cross-covariance formula
Cov(x_{t+1}, x_t | y) = P^s_{t+1} G_tᵀ, e.g. Shumway & Stoffer 2017 Property 6.3
— from memory), and a dense Gaussian posterior (tests/reference.py).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import norm

import kalmax as kx
import reference as ref
from helpers import to_model


@pytest.mark.parametrize("tv", [True, False])
def test_covariances_equal_rts(rng, tv):
    T, n, p = 8, 3, 2
    md = ref.random_model(rng, n, p, T, time_varying=tv, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    est = kx.smooth(to_model(md), y, mask, covariances=True)
    mu, P, cross = ref.rts_smoother(md, y, mask, return_cross=True)
    np.testing.assert_allclose(est.state_cov, P, atol=1e-10)
    np.testing.assert_allclose(est.state_cross_cov, cross, atol=1e-10)
    E = ref.expand(md, T)
    np.testing.assert_allclose(est.measurement_cov, np.einsum("tpi,tij,tqj->tpq", E["C"], P, E["C"]), atol=1e-10)


def test_flat_prior_covariances_equal_dense_inverse(rng):
    T, n, p = 6, 2, 2
    md = ref.random_model(rng, n, p, T, prior=False)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    H, _ = ref.dense_normal_equations(md, y, mask)
    S = np.linalg.inv(H)
    est = kx.smooth(to_model(md, prior=False), y, mask, covariances=True)
    for t in range(T):
        np.testing.assert_allclose(est.state_cov[t], S[t * n:(t + 1) * n, t * n:(t + 1) * n], atol=1e-9)
    for t in range(T - 1):
        np.testing.assert_allclose(est.state_cross_cov[t], S[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n], atol=1e-9)


def test_covariances_are_differentiable(rng):
    T, n, p = 5, 2, 2
    md = ref.random_model(rng, n, p, T, time_varying=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md)
    f = lambda R: jnp.sum(kx.smooth(model.replace(R=R), y, mask, covariances=True).state_cov[2])  # noqa: E731
    g = jax.grad(f)(model.R)
    E = np.zeros((p, p))
    E[0, 1] = E[1, 0] = 1.0
    h = 1e-6
    fd_ref = lambda R: ref.rts_smoother(dict(md, R=R), y, mask)[1][2].sum()  # noqa: E731
    fd = (fd_ref(np.asarray(model.R) + h * E) - fd_ref(np.asarray(model.R) - h * E)) / (2 * h)
    assert abs(float(jnp.sum(g * E)) - fd) < 1e-6 * (1 + abs(fd))


def test_intervals_are_calibrated(rng):
    """Nominal 95% predictive intervals for held-out entries (mean ± 1.96·sqrt(C Σ Cᵀ + R))
    cover 95% ± 1% of ≥ 10⁴ held-out entries on data simulated from the model."""
    T, n, p, B = 400, 2, 2, 32
    md = ref.random_model(rng, n, p, T, time_varying=False, full_R=True)
    model = to_model(md)
    data = [ref.random_data(rng, md, T, missing=0.0, n_empty=0) for _ in range(B)]
    ys = np.stack([d[0] for d in data])
    holdout = rng.random(ys.shape) < 0.4
    fit_masks = ~holdout

    est = jax.jit(jax.vmap(lambda y, m: kx.smooth(model, y, m, covariances=True)))(ys, fit_masks)
    var = np.diagonal(np.asarray(est.measurement_cov), axis1=-2, axis2=-1) + np.diag(md["R"])
    z = (ys - np.asarray(est.measurements)) / np.sqrt(var)
    inside = np.abs(z[holdout]) <= norm.ppf(0.975)
    assert holdout.sum() >= 10_000
    assert abs(inside.mean() - 0.95) <= 0.01, inside.mean()
