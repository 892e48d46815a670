"""The Nile series and the local level model: checks against published values.

Data: annual flow of the Nile at Aswan 1871-1970 (Cobb 1978, Biometrika 65,
Table 1; R's datasets::Nile), see tests/data/README.md.

Model: y_t = x_t + ε_t, ε_t ~ N(0, σ²_ε);  x_{t+1} = x_t + η_t, η_t ~ N(0, σ²_η),
with a flat (diffuse) prior on the first level.

Published maximum-likelihood estimates: Durbin & Koopman, Time Series
Analysis by State Space Methods, 2nd ed. (2012), §2.10: σ²_ε ≈ 15099 and
σ²_η ≈ 1469.1. We require agreement within 0.1 %.

Log-likelihood constant convention (kalmax.log_likelihood without a prior):
the value is ∫ p(x, y) dx with the flat density 1 on the first state, which
for this model equals log p(y_2, ..., y_100 | y_1): the sum of the 99
prediction-error terms log N(v_t; 0, F_t) for t = 2..100, 2π constant
−(100 − 1)/2 · log 2π. The first observation contributes nothing (it only
fixes the initial level). Checked below against a NumPy Kalman filter started
exactly from x_1 | y_1.
"""

import jax.numpy as jnp
import numpy as np
import optax

import kalmax as kx

import reference as ref

PUBLISHED_OBS_VAR = 15099.0  # σ²_ε, Durbin & Koopman (2012) §2.10
PUBLISHED_LEVEL_VAR = 1469.1  # σ²_η, Durbin & Koopman (2012) §2.10


def _nile():
    years, flow = ref.load_nile()
    assert len(flow) == 100 and flow.sum() == 91935  # provenance check (tests/data/README.md)
    return jnp.asarray(flow[:, None])


def _local_level(level_var, obs_var):
    return kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.reshape(level_var, (1, 1)),
                         R=jnp.reshape(obs_var, (1, 1)))


def _diffuse_reference_loglik(flow, level_var, obs_var):
    """log p(y_2..y_T | y_1): with a flat prior, x_1 | y_1 ~ N(y_1, σ²_ε), so the
    filter for y_2.. starts from the predicted level N(y_1, σ²_ε + σ²_η)."""
    md = {"A": np.eye(1), "C": np.eye(1), "Q": level_var * np.eye(1), "R": obs_var * np.eye(1),
          "m0": flow[:1], "P0": (obs_var + level_var) * np.eye(1)}
    return ref.kalman_filter(md, flow[1:, None]).log_likelihood


def test_maximum_likelihood_matches_published_estimates():
    y = _nile()
    spec = kx.Parameterization(_local_level(1000.0, 10000.0), Q=kx.DiagonalCov(), R=kx.DiagonalCov())
    nll = lambda p: -kx.log_likelihood(spec.model(p), y)  # noqa: E731
    res = kx.fit(nll, spec.init(), optax.lbfgs(), steps=80, progress=False, neg_log_lik_fn=nll)
    fitted = spec.model(res.params)
    obs_var, level_var = float(fitted.R[0, 0]), float(fitted.Q[0, 0])
    assert abs(obs_var / PUBLISHED_OBS_VAR - 1) < 1e-3, obs_var
    assert abs(level_var / PUBLISHED_LEVEL_VAR - 1) < 1e-3, level_var

    # The constant convention, checked against an independent NumPy filter.
    ll = -float(res.history["loss"][res.best_step])
    np.testing.assert_allclose(ll, _diffuse_reference_loglik(np.asarray(y)[:, 0], level_var, obs_var), rtol=1e-10)
    # Standard errors of the variances (delta method through the parameterisation).
    se = kx.standard_errors(nll, res.params, of=lambda p: (spec.model(p).R[0, 0], spec.model(p).Q[0, 0]))
    assert all(0 < float(s) < v for s, v in zip(se, (obs_var, level_var)))
    assert np.all(np.isfinite(np.asarray(res.standard_errors["Q"])))


def test_em_reaches_the_published_estimates():
    y = _nile()
    fitted, ll = kx.em(_local_level(5000.0, 5000.0), y, iterations=3000, fixed=("A", "C"), tol=1e-12)
    assert np.all(np.diff(ll) >= -1e-9 * np.abs(ll[1:]))
    assert abs(float(fitted.R[0, 0]) / PUBLISHED_OBS_VAR - 1) < 1e-3
    assert abs(float(fitted.Q[0, 0]) / PUBLISHED_LEVEL_VAR - 1) < 1e-3


def test_steady_state_variance_and_gain():
    """Scalar Riccati equation of the local level model: the predicted variance
    P solves P² − qP − qr = 0, P = (q + √(q² + 4qr))/2, gain K = P/(P + r)
    (Durbin & Koopman 2012, §2.11, steady state -- section from memory;
    tests/reference.py::local_level_steady_state). After 100 steps the filter
    is at its steady state (error shrinks like (1 − K)^t ≈ 0.73^t here)."""
    y = _nile()
    q, r = PUBLISHED_LEVEL_VAR, PUBLISHED_OBS_VAR
    P, K = ref.local_level_steady_state(q, r)
    model = _local_level(q, r)
    sm = kx.smooth(model, y, covariances=True)
    # The last smoothed state is the filtered one: variance (1 − K) P.
    np.testing.assert_allclose(sm.state_cov[-1, 0, 0], (1 - K) * P, rtol=1e-9)
    # The gain from the means: filtered level at T−1 is the prediction for T
    # (random walk); the new observation moves it by K times the innovation.
    pred = kx.smooth(model, y[:-1]).states[-1, 0]
    innovation = y[-1, 0] - pred
    np.testing.assert_allclose((sm.states[-1, 0] - pred) / innovation, K, rtol=1e-9)
