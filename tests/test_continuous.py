"""Continuous-time models: exact discretisation (Van Loan) and the model builders.

References used below:
- [BLK] Y. Bar-Shalom, X. R. Li, T. Kirubarajan, "Estimation with Applications
  to Tracking and Navigation", Wiley 2001: Sec. 6.2.2 (continuous white noise
  acceleration model, Q = q[[Δ³/3, Δ²/2], [Δ²/2, Δ]]) and Sec. 6.2.3
  (Wiener process acceleration model, the 3×3 Q with Δ⁵/20, Δ⁴/8, ...).
  Section numbers from memory; the matrices are also re-derived by hand in
  the comments.
- [VL] C. F. Van Loan, "Computing integrals involving the matrix exponential",
  IEEE Trans. Automatic Control 23(3), 1978 — the construction under test; the
  tests check it against independent routes (a closed form, an ODE integration
  of dP/ds = F P + P Fᵀ + G with SciPy, and SciPy's Lyapunov solver).
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from scipy import linalg

from reference import discretise_by_ode

import kalmax as kx


def _cv_closed_form(q, d):
    # [BLK] 6.2.2; by hand: Q = ∫₀^Δ [s, 1]ᵀ q [s, 1] ds.
    return q * np.array([[d**3 / 3, d**2 / 2], [d**2 / 2, d]])


def _ca_closed_form(q, d):
    # [BLK] 6.2.3; by hand: Q = ∫₀^Δ g gᵀ q ds with g = [s²/2, s, 1].
    return q * np.array([[d**5 / 20, d**4 / 8, d**3 / 6], [d**4 / 8, d**3 / 3, d**2 / 2], [d**3 / 6, d**2 / 2, d]])


_ode_reference = discretise_by_ode


def test_constant_velocity_matches_closed_form():
    dts = np.array([0.01, 0.37, 1.0, 4.5, 600.0])
    cm = kx.constant_velocity(dims=1, q=0.7, r=1.0)
    A, Q = kx.discretize(cm.drift, cm.diffusion, dts)
    for k, d in enumerate(dts):
        np.testing.assert_allclose(A[k], [[1.0, d], [0.0, 1.0]], rtol=1e-13, atol=1e-13)
        np.testing.assert_allclose(Q[k], _cv_closed_form(0.7, d), rtol=1e-12)


def test_constant_velocity_axes_are_independent_and_derivative_major():
    cm = kx.constant_velocity(dims=2, q=jnp.array([0.5, 2.0]), r=1.0)
    A, Q = kx.discretize(cm.drift, cm.diffusion, 1.5)
    # state [pos0, pos1, vel0, vel1]
    for axis, q in ((0, 0.5), (1, 2.0)):
        idx = np.ix_([axis, 2 + axis], [axis, 2 + axis])
        np.testing.assert_allclose(Q[idx], _cv_closed_form(q, 1.5), rtol=1e-12)
    assert float(Q[0, 1]) == 0.0 and float(Q[0, 3]) == 0.0
    np.testing.assert_array_equal(cm.C, np.eye(4)[:2])


def test_constant_acceleration_matches_closed_form():
    cm = kx.constant_acceleration(dims=1, q=0.3)
    for d in (0.05, 2.0, 30.0):
        A, Q = kx.discretize(cm.drift, cm.diffusion, d)
        np.testing.assert_allclose(A, [[1, d, d * d / 2], [0, 1, d], [0, 0, 1]], rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(Q, _ca_closed_form(0.3, d), rtol=1e-11)


def test_random_walk_and_local_linear_trend():
    A, Q = kx.discretize(kx.random_walk(q=0.4).drift, kx.random_walk(q=0.4).diffusion, np.array([2.5]))
    np.testing.assert_allclose(Q[0], [[1.0]], rtol=1e-14)  # q Δ: common practice (Brownian motion)
    np.testing.assert_allclose(A[0], [[1.0]])
    cm = kx.local_linear_trend(q_level=0.2, q_slope=0.05)
    _, Q = kx.discretize(cm.drift, cm.diffusion, 3.0)
    # level noise adds q_level·Δ to the level variance only; the slope part is the CV matrix
    np.testing.assert_allclose(Q, np.diag([0.2 * 3.0, 0.0]) + _cv_closed_form(0.05, 3.0), rtol=1e-12)


@pytest.mark.parametrize("d", [0.013, 0.8, 7.0])
def test_van_loan_against_ode_integration_full_matrices(rng, d):
    n = 3
    F = rng.normal(size=(n, n)) - 1.0 * np.eye(n)
    L = rng.normal(size=(n, n))
    G = L @ L.T
    A, Q = kx.discretize(F, G, d)
    A_ref, Q_ref = _ode_reference(F, G, d)
    np.testing.assert_allclose(A, A_ref, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(Q, Q_ref, rtol=1e-8, atol=1e-12)


def test_damped_oscillator_against_ode_and_stationary_limit():
    cm = kx.damped_oscillator(frequency=0.5, damping=0.3, q=2.0)
    F, G = np.asarray(cm.drift), np.asarray(cm.diffusion)
    for d in (0.1, 1.7):
        A, Q = kx.discretize(cm.drift, cm.diffusion, d)
        A_ref, Q_ref = _ode_reference(F, G, d)
        np.testing.assert_allclose(A, A_ref, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(Q, Q_ref, rtol=1e-8, atol=1e-13)
    # A very long gap (‖F‖Δ ≈ 1e4: the splitting-and-doubling path) reaches the
    # stationary covariance P∞ solving F P + P Fᵀ + G = 0 (SciPy's Lyapunov solver);
    # for the displacement P∞ = q / (4 ζ ω³) (common practice, from memory).
    A, Q = kx.discretize(cm.drift, cm.diffusion, 1000.0)
    P_inf = linalg.solve_continuous_lyapunov(F, -G)
    np.testing.assert_allclose(Q, P_inf, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(P_inf[0, 0], 2.0 / (4 * 0.3 * np.pi**3), rtol=1e-12)
    assert np.all(np.abs(np.asarray(A)) < 1e-100)


def test_long_gap_float32_stays_finite_and_accurate():
    # Without the splitting, exp(−F Δ) in Van Loan's block overflows float32 here (‖F‖Δ ≈ 2500).
    cm = kx.damped_oscillator(frequency=np.float32(2.0), damping=np.float32(0.7), q=np.float32(1.0))
    A, Q = kx.discretize(cm.drift, cm.diffusion, np.array([100.0], np.float32))
    assert Q.dtype == jnp.float32 and A.dtype == jnp.float32
    P_inf = linalg.solve_continuous_lyapunov(np.asarray(cm.drift, np.float64), -np.asarray(cm.diffusion, np.float64))
    np.testing.assert_allclose(Q[0], P_inf, rtol=1e-4, atol=1e-8)


def test_traced_drift_equals_concrete_drift():
    # A drift known only at run time takes the fixed-length doubling loop; same answer.
    cm = kx.damped_oscillator(frequency=0.2, damping=0.05, q=1.0)
    dts = np.array([0.1, 3.0, 250.0])
    eager = kx.discretize(cm.drift, cm.diffusion, dts)
    jitted = jax.jit(lambda F, G: kx.discretize(F, G, dts))(cm.drift, cm.diffusion)
    for a, b in zip(eager, jitted):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("builder", ["random_walk", "constant_velocity", "constant_acceleration", "local_linear_trend"])
def test_nilpotent_closed_form_equals_the_series_route(builder, rng):
    # A concrete nilpotent drift takes the polynomial closed form; the same drift
    # passed traced takes the Taylor-series-and-doubling route of [VL]. Two
    # different computations: values and gradients (w.r.t. G and the steps) agree.
    cm = getattr(kx, builder)(q=0.7) if builder != "local_linear_trend" else kx.local_linear_trend(0.3, 0.05)
    F = np.asarray(cm.drift)
    dts = np.array([1e-3, 0.37, 2.0, 45.0, 900.0])
    # Weights scaled by the size of each step's Q (Δ^(2o−1) grows to 1e15) so that every step counts.
    W = rng.normal(size=(len(dts),) + F.shape) / (1.0 + dts[:, None, None] ** (2 * F.shape[0] - 1))

    def loss(G, d, traced):
        A, Q = kx.discretize(traced if traced is not None else F, G, d)
        return jnp.sum(W * Q) + jnp.sum(W * A)

    closed = jax.value_and_grad(lambda G, d: loss(G, d, None), argnums=(0, 1))(cm.diffusion, dts)
    series = jax.jit(jax.value_and_grad(loss, argnums=(0, 1)))(cm.diffusion, dts, jnp.asarray(F))
    np.testing.assert_allclose(closed[0], series[0], rtol=1e-10)
    for a, b in zip(closed[1], series[1]):
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-10 * np.max(np.abs(b)))
    A, Q = kx.discretize(F, cm.diffusion, dts)
    ref = [_ode_reference(F, np.asarray(cm.diffusion), d) for d in dts[:3]]
    for k, (Ar, Qr) in enumerate(ref):
        np.testing.assert_allclose(A[k], Ar, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(Q[k], Qr, rtol=1e-7, atol=1e-12)


def test_gradients_match_finite_differences(rng):
    dts = np.array([0.3, 2.0, 40.0])
    W = rng.normal(size=(3, 2, 2))

    def f(theta, dts):
        freq, damp, q = jnp.exp(theta)
        cm = kx.damped_oscillator(freq, damp, q)
        A, Q = kx.discretize(cm.drift, cm.diffusion, dts)
        return jnp.sum(W * Q) + jnp.sum(W * A)

    theta = np.log(np.array([0.15, 0.4, 1.3]))
    g = jax.grad(f)(theta, dts)
    g_dt = jax.grad(f, argnums=1)(theta, dts)
    eps = 1e-6
    for i in range(3):
        e = np.zeros(3)
        e[i] = eps
        fd = (f(theta + e, dts) - f(theta - e, dts)) / (2 * eps)
        np.testing.assert_allclose(g[i], fd, rtol=1e-6, atol=1e-9)
        fd_dt = (f(theta, dts + e) - f(theta, dts - e)) / (2 * eps)
        np.testing.assert_allclose(g_dt[i], fd_dt, rtol=1e-6, atol=1e-9)


def test_at_times_builds_time_varying_model_and_vmaps():
    t = np.array([0.0, 0.5, 0.6, 3.0])
    model = kx.constant_velocity(dims=1, q=0.2, r=0.5).at_times(t)
    assert model.A.shape == (3, 2, 2) and model.Q.shape == (3, 2, 2) and model.C.shape == (1, 2)
    np.testing.assert_allclose(model.Q[2], _cv_closed_form(0.2, 2.4), rtol=1e-12)
    qs = jnp.array([0.1, 1.0])
    Qs = jax.vmap(lambda q: kx.constant_velocity(q=q).at_times(t).Q)(qs)
    np.testing.assert_allclose(Qs[1], 10 * Qs[0], rtol=1e-12)
    model32 = kx.constant_velocity(q=np.float32(0.2), r=np.float32(0.5)).at_times(t.astype(np.float32))
    assert model32.Q.dtype == jnp.float32 and model32.A.dtype == jnp.float32


def test_builder_errors_name_the_problem():
    with pytest.raises(ValueError, match="out of range"):
        kx.constant_velocity(dims=1, measured=[2])
    with pytest.raises(ValueError, match="r must be a scalar or have shape"):
        kx.random_walk(dims=2, r=np.ones(3))
    with pytest.raises(ValueError, match="one per axis"):
        kx.constant_velocity(dims=2, q=np.ones(3))
    with pytest.raises(ValueError, match="diffusion must have shape"):
        kx.discretize(np.eye(2), np.eye(3), 1.0)


def _simulate_cv(rng, t, q, r):
    """Exact simulation with the closed-form Q of [BLK] 6.2.2 (independent of kx.discretize)."""
    x = np.array([0.0, 1.0])
    xs = [x]
    for d in np.diff(t):
        x = np.array([[1, d], [0, 1]]) @ x + np.linalg.cholesky(_cv_closed_form(q, d)) @ rng.normal(size=2)
        xs.append(x)
    xs = np.array(xs)
    return xs, xs[:, :1] + np.sqrt(r) * rng.normal(size=(t.size, 1))


def test_round_trip_recovers_continuous_parameters(rng):
    """Simulate on random irregular timestamps, fit q and r by likelihood, recover them.

    Tolerance (stated): q within a factor 1.5 and r within a factor 1.25 of the
    truth. With T = 400 steps the standard errors of log q and log r are about
    0.15 and 0.08 (common practice: ~1/sqrt(effective sample size)), so these
    bounds are roughly three standard errors.
    """
    t = np.cumsum(rng.exponential(0.5, size=400))
    q_true, r_true = 0.8, 0.3
    _, y = _simulate_cv(rng, t, q_true, r_true)
    y[rng.random(y.shape) < 0.15] = np.nan  # some missing measurements

    def loss(theta):
        model = kx.constant_velocity(q=jnp.exp(theta["q"]), r=jnp.exp(theta["r"])).at_times(t)
        return -kx.log_likelihood(model, y) / y.size

    theta0 = {"q": jnp.log(5.0), "r": jnp.log(3.0)}  # a poor start
    result = kx.fit(loss, theta0, optax.adam(0.1), steps=150, progress=False)
    q_hat, r_hat = float(jnp.exp(result.params["q"])), float(jnp.exp(result.params["r"]))
    print(f"recovered q {q_hat:.4g} (true {q_true}), r {r_hat:.4g} (true {r_true}), steps {result.steps_run}")
    assert abs(np.log(q_hat / q_true)) < np.log(1.5), q_hat
    assert abs(np.log(r_hat / r_true)) < np.log(1.25), r_hat


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_huge_steps_of_a_stable_drift_reach_the_stationary_answer(dtype):
    # For a stable drift, A = exp(FΔ) → 0 and Q → the stationary covariance P_inf,
    # the solution of F P + P Fᵀ + G = 0 (SciPy's Lyapunov solver, independent of
    # the doubling route). The steps go up to the largest the dtype holds.
    cm = kx.damped_oscillator(frequency=0.3, damping=0.2, q=1.5)
    F, G = np.asarray(cm.drift, np.float64), np.asarray(cm.diffusion, np.float64)
    P_inf = linalg.solve_continuous_lyapunov(F, -G)
    big = [1e6, 1e12, 1e20, 1e30] + ([1e300] if dtype == np.float64 else [3e38])
    A, Q = kx.discretize(F.astype(dtype), G.astype(dtype), np.array(big, dtype))
    tol = 1e-9 if dtype == np.float64 else 1e-4
    assert np.all(np.isfinite(np.asarray(A))) and np.all(np.isfinite(np.asarray(Q)))
    np.testing.assert_array_equal(np.asarray(A), 0.0)
    for k in range(len(big)):
        np.testing.assert_allclose(Q[k], P_inf, rtol=tol, atol=tol * np.max(np.abs(P_inf)))


def test_traced_drift_beyond_the_doubling_cap_is_nan_not_wrong():
    cm = kx.damped_oscillator(frequency=0.3, damping=0.2, q=1.5)
    dts = np.array([1.0, 1e12])
    A, Q = jax.jit(lambda F, G: kx.discretize(F, G, dts))(cm.drift, cm.diffusion)
    assert np.all(np.isfinite(np.asarray(A[0]))) and np.all(np.isnan(np.asarray(A[1])))
    assert np.all(np.isnan(np.asarray(Q[1])))
    A_ok, Q_ok = kx.discretize(cm.drift, cm.diffusion, dts)  # concrete drift: exact at both
    np.testing.assert_allclose(A[0], A_ok[0], rtol=1e-12)
    assert np.all(np.isfinite(np.asarray(Q_ok)))
