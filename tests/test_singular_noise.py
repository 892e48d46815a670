"""Singular (positive-semidefinite) process noise and prior covariance.

Textbook models with deterministic directions — an integrator with noise on
its rate only, a fixed (noise-free) seasonal pattern beside a random-walk
level, a constant offset known exactly from the start — have a singular Q,
and the last also a singular prior covariance (so every predicted covariance
is singular). ``method="covariance"`` takes them exactly; the normal-equation
backends hold Q⁻¹ and must return NaN ("accurate or NaN"), and ``validate``
must say so and point to the backend that works.

References (independent of the filter): ``reference.dense_posterior`` and
``reference.dense_log_likelihood``, which condition the dense joint Gaussian of
all states and observed measurements (Bishop (2006), PRML §2.3.1 and §2.3.3 —
section numbers from memory) and need no inverse of Q or of the prior
covariance; central finite differences of the dense log-density for the
gradients. The models themselves: structural time-series components as in
Harvey (1989), Forecasting, Structural Time Series Models and the Kalman
Filter, ch. 2 (from memory); data are invented.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model

M = "covariance"


def _rate_noise_only(T=30):
    """Position–velocity integrator with noise on the velocity only; proper prior."""
    dt = 0.5
    return dict(A=np.array([[1.0, dt], [0.0, 1.0]]), C=np.array([[1.0, 0.0]]),
                Q=np.diag([0.0, 0.2]), R=np.array([[0.4]]), m0=np.zeros(2), P0=4.0 * np.eye(2)), T


def _fixed_season(T=36):
    """Random-walk level + one noise-free harmonic of period 12 (rotation), 2 sensors with correlated noise."""
    w = 2 * np.pi / 12
    rot = np.array([[np.cos(w), np.sin(w)], [-np.sin(w), np.cos(w)]])
    A = np.zeros((3, 3))
    A[0, 0] = 1.0
    A[1:, 1:] = rot
    C = np.array([[1.0, 1.0, 0.0], [1.0, 0.5, 0.2]])
    return dict(A=A, C=C, Q=np.diag([0.05, 0.0, 0.0]), R=np.array([[0.3, 0.1], [0.1, 0.5]]),
                m0=np.array([10.0, 0.0, 0.0]), P0=np.diag([25.0, 4.0, 4.0])), T


def _known_offset(T=30):
    """Random-walk level plus a constant offset known exactly: Q and P0 both singular,
    so every predicted covariance is singular (the RTS gain's inverse does not exist)."""
    return dict(A=np.eye(2), C=np.array([[1.0, 1.0]]), Q=np.diag([0.3, 0.0]), R=np.array([[0.5]]),
                m0=np.array([0.0, 1.5]), P0=np.diag([4.0, 0.0])), T


MODELS = {"rate-noise-only": _rate_noise_only, "fixed-season": _fixed_season, "known-offset": _known_offset}


def _psd_sqrt(S):
    vals, vecs = np.linalg.eigh(S)
    return vecs * np.sqrt(np.clip(vals, 0.0, None))


def _data(md, T, seed, missing=0.25):
    """Simulated from the model (a square root that allows singular covariances); invented data."""
    rng = np.random.default_rng(seed)
    n, p = md["A"].shape[0], md["C"].shape[0]
    x = md["m0"] + _psd_sqrt(md["P0"]) @ rng.standard_normal(n)
    y = np.empty((T, p))
    for t in range(T):
        y[t] = md["C"] @ x + _psd_sqrt(md["R"]) @ rng.standard_normal(p)
        x = md["A"] @ x + _psd_sqrt(md["Q"]) @ rng.standard_normal(n)
    mask = rng.random((T, p)) >= missing
    mask[rng.choice(T, size=max(1, T // 8), replace=False)] = False
    return np.where(mask, y, 0.0), mask


def _blocks(cov, T, n):
    diag = np.stack([cov[t * n:(t + 1) * n, t * n:(t + 1) * n] for t in range(T)])
    cross = np.stack([cov[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n] for t in range(T - 1)])
    return diag, cross


@pytest.mark.parametrize("name", sorted(MODELS))
def test_moments_and_likelihood_against_the_dense_posterior(name):
    md, T = MODELS[name]()
    y, mask = _data(md, T, seed=1)
    n = md["A"].shape[0]
    mean, cov = ref.dense_posterior(md, y, mask)
    diag, cross = _blocks(cov, T, n)
    out = kx.smooth(to_model(md), y, mask, covariances=True, method=M)
    np.testing.assert_allclose(out.states, mean, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(out.state_cov, diag, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(out.state_cross_cov, cross, rtol=1e-9, atol=1e-9)
    ll = kx.log_likelihood(to_model(md), y, mask, method=M)
    np.testing.assert_allclose(ll, ref.dense_log_likelihood(md, y, mask), rtol=1e-10)


def test_the_deterministic_direction_is_held_exactly():
    """With the offset known, every smoothed offset equals it and has zero variance."""
    md, T = _known_offset()
    y, mask = _data(md, T, seed=2)
    out = kx.smooth(to_model(md), y, mask, covariances=True, method=M)
    np.testing.assert_allclose(out.states[:, 1], 1.5, rtol=0, atol=1e-12)
    np.testing.assert_allclose(out.state_cov[:, 1, :], 0.0, atol=1e-12)


def test_adjoint_solve_is_the_posterior_covariance_times_v():
    """The backend's solve with the stored factor is H⁻¹v where H exists; with a
    singular Q it is its limit, the posterior covariance times v."""
    from kalmax._src.backends.covariance_form import adjoint, forward

    md, T = _fixed_season(T=20)
    y, mask = _data(md, T, seed=3)
    n = md["A"].shape[0]
    _, cov = ref.dense_posterior(md, y, mask)
    x, factor = forward(to_model(md), jnp.asarray(y), jnp.asarray(mask, jnp.float64))
    v = np.random.default_rng(4).standard_normal((T, n))
    u = adjoint(factor, jnp.asarray(v))
    np.testing.assert_allclose(np.asarray(u).ravel(), cov @ v.ravel(), rtol=1e-9, atol=1e-9)


def _dense_ll(md, y, mask, field, E, h):
    plus = dict(md, **{field: md[field] + h * E})
    minus = dict(md, **{field: md[field] - h * E})
    return (ref.dense_log_likelihood(plus, y, mask) - ref.dense_log_likelihood(minus, y, mask)) / (2 * h)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_likelihood_gradient_against_finite_differences(name):
    """Directional derivatives along A, R, C and the non-zero block of Q (perturbations
    that keep Q positive semidefinite), and along y, by central differences of the dense
    log-density (step 1e-6)."""
    md, T = MODELS[name]()
    y, mask = _data(md, T, seed=5)
    rng = np.random.default_rng(6)
    model = to_model(md)
    grads = jax.grad(lambda m, yy: kx.log_likelihood(m, yy, mask, method=M), argnums=(0, 1))(model, jnp.asarray(y))
    g_model, g_y = grads
    keep = np.diag(md["Q"]) > 0
    directions = {
        "A": rng.standard_normal(md["A"].shape),
        "C": rng.standard_normal(md["C"].shape),
        "R": (lambda X: X + X.T)(rng.standard_normal(md["R"].shape)),
        "Q": np.diag(keep * rng.standard_normal(keep.shape)),
    }
    for field, E in directions.items():
        got = float(np.sum(np.asarray(getattr(g_model, field)) * E))
        want = _dense_ll(md, y, mask, field, E, 1e-6)
        np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-6, err_msg=field)
    Ey = rng.standard_normal(y.shape) * mask
    h = 1e-6
    want = (ref.dense_log_likelihood(md, y + h * Ey, mask) - ref.dense_log_likelihood(md, y - h * Ey, mask)) / (2 * h)
    np.testing.assert_allclose(float(np.sum(np.asarray(g_y) * Ey)), want, rtol=1e-6, atol=1e-6)


def test_smoothed_mean_gradient_against_finite_differences():
    """∂⟨c, x̂⟩/∂y and ∂/∂R through the smoother, against central differences of the dense posterior mean."""
    md, T = _known_offset(T=15)
    y, mask = _data(md, T, seed=7)
    c = np.random.default_rng(8).standard_normal((T, 2))
    loss = lambda m, yy: jnp.sum(c * kx.smooth(m, yy, mask, method=M).states)  # noqa: E731
    g_model, g_y = jax.grad(loss, argnums=(0, 1))(to_model(md), jnp.asarray(y))
    h = 1e-6
    ref_loss = lambda d, yy: float(np.sum(c * ref.dense_posterior(d, yy, mask)[0]))  # noqa: E731
    Ey = np.random.default_rng(9).standard_normal(y.shape) * mask
    want = (ref_loss(md, y + h * Ey) - ref_loss(md, y - h * Ey)) / (2 * h)
    np.testing.assert_allclose(float(np.sum(np.asarray(g_y) * Ey)), want, rtol=1e-6, atol=1e-8)
    ER = np.array([[1.0]])
    want = (ref_loss(dict(md, R=md["R"] + h * ER), y) - ref_loss(dict(md, R=md["R"] - h * ER), y)) / (2 * h)
    np.testing.assert_allclose(float(np.sum(np.asarray(g_model.R) * ER)), want, rtol=1e-6, atol=1e-8)


def test_float32_matches_float64_on_a_singular_model():
    md, T = _fixed_season()
    y, mask = _data(md, T, seed=10)
    mean, _ = ref.dense_posterior(md, y, mask)
    out = kx.smooth(to_model(md, np.float32), y.astype(np.float32), mask, method=M)
    err = np.max(np.abs(np.asarray(out.states) - mean), axis=0) / np.max(np.abs(mean), axis=0)
    assert np.all(err < 1e-3), err


def _normal_equation_backends():
    from kalmax._src.backends import registry
    return [name for name in registry.available() if registry.get_backend(name).refined]


@pytest.mark.parametrize("method", _normal_equation_backends())
def test_normal_equation_backends_return_nan_and_validate_says_why(method):
    md, T = _rate_noise_only(T=12)
    y, mask = _data(md, T, seed=11)
    model = to_model(md)
    assert np.all(np.isnan(np.asarray(kx.smooth(model, y, mask, method=method).states)))
    with pytest.raises(ValueError, match="singular but positive semidefinite.*method='covariance'"):
        kx.validate(model, y, mask, method=method)
    kx.validate(model, y, mask, method=M)  # the backend that takes it: no problem found


def test_validate_still_refuses_an_indefinite_q_for_the_covariance_form():
    md, T = _rate_noise_only(T=8)
    y, mask = _data(md, T, seed=12)
    with pytest.raises(ValueError, match="model.Q is not positive semidefinite"):
        kx.validate(to_model(dict(md, Q=np.diag([-0.1, 0.2]))), y, mask, method=M)
