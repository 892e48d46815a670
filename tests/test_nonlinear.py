"""Iterated (Gauss–Newton) smoothing of nonlinear models, and its implicit gradients (float64).

Independent checks:
- a linear model written as a NonlinearModel equals ``kx.smooth`` after one
  step (Gauss–Newton is exact on a linear least-squares problem; Bell (1994),
  SIAM J. Optim. 4(3));
- the MAP path against ``scipy.optimize.least_squares`` on the stacked whitened
  residuals, written out in the test with per-step Cholesky factors of the
  observed block R_KK (not the masked-covariance trick of the library);
- gradients against central finite differences of the converged solution, and
  ``jax.test_util.check_grads`` in reverse mode;
- the Laplace log-likelihood against ``kx.log_likelihood`` (linear model, where
  it is exact) and against a dense Hessian of the test's own objective.
"""

import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.optimize
from jax.test_util import check_grads

import kalmax as kx
import reference as ref
from helpers import to_model

DT = 0.1
# Compilation dominates (each test compiles the iteration loop afresh): the
# default run keeps one check of each kind; KALMAX_SLOW=1 runs the rest.
slow = pytest.mark.skipif(not os.environ.get("KALMAX_SLOW"), reason="KALMAX_SLOW=1")


def pendulum(th, x, u):
    """A damped pendulum, explicit Euler step (angle, angular velocity)."""
    return jnp.array([x[0] + DT * x[1], x[1] - DT * (th["g"] * jnp.sin(x[0]) + th["c"] * x[1])])


def sensors(th, x, v):
    """A range to a fixed point and a product sensor: both nonlinear in the state."""
    return jnp.array([jnp.sqrt((th["s"] * jnp.sin(x[0]) - 2.0) ** 2 + jnp.cos(x[0]) ** 2), x[0] * x[1] + 0.5 * x[1]])


PARAMS = {"g": 9.0, "c": 0.4, "s": 1.2}
T, N, P = 14, 2, 2


MISSING = np.zeros((T, P), bool)
MISSING[3, 0] = MISSING[7, :] = MISSING[10, 1] = True


def make_problem(rng, prior=True, missing=True):
    Q = np.array([[0.01, 0.002], [0.002, 0.04]])
    R = np.array([[0.05, 0.01], [0.01, 0.03]])
    x = np.zeros((T, N))
    x[0] = [0.8, 0.0]
    for t in range(T - 1):
        x[t + 1] = np.asarray(pendulum(PARAMS, x[t], None)) + np.linalg.cholesky(Q) @ rng.standard_normal(N)
    y = np.stack([np.asarray(sensors(PARAMS, x[t], None)) for t in range(T)])
    y = y + rng.standard_normal((T, P)) @ np.linalg.cholesky(R).T
    mask = ~MISSING if missing else np.ones((T, P), bool)
    y[~mask] = np.nan
    model = kx.NonlinearModel(pendulum, sensors, params=dict(PARAMS), Q=Q, R=R,
                              x0_mean=np.array([0.7, 0.1]) if prior else None,
                              x0_cov=0.2 * np.eye(N) if prior else None)
    return model, y, mask, x


# Per-step values and Jacobians of f and h (vmapped over time): the only JAX the
# reference needs; the stacking and whitening below are plain NumPy.
_f_steps = jax.jit(jax.vmap(pendulum, in_axes=(None, 0, None)))
_h_steps = jax.jit(jax.vmap(sensors, in_axes=(None, 0, None)))
_f_jac = jax.jit(jax.vmap(jax.jacfwd(pendulum, argnums=1), in_axes=(None, 0, None)))
_h_jac = jax.jit(jax.vmap(jax.jacfwd(sensors, argnums=1), in_axes=(None, 0, None)))


def stacked_residuals(model, y, mask):
    """(residuals, jacobian): the whitened residual vector of the whole problem over flat x, and its
    Jacobian, stacked plainly with per-step Cholesky factors of the observed blocks R_KK."""
    inv_chol = lambda S: np.linalg.inv(np.linalg.cholesky(np.asarray(S)))  # noqa: E731
    Wq = inv_chol(model.Q)
    blocks = [(k, inv_chol(np.asarray(model.R)[np.ix_(k, k)])) for k in (np.flatnonzero(m) for m in mask)]
    Wp = None if model.x0_cov is None else inv_chol(model.x0_cov)
    params = {k: jnp.asarray(v) for k, v in model.params.items()}

    def residuals(flat):
        x = np.asarray(flat).reshape(T, N)
        fx, hx = np.asarray(_f_steps(params, x[:-1], None)), np.asarray(_h_steps(params, x, None))
        out = [Wq @ (x[t + 1] - fx[t]) for t in range(T - 1)]
        out += [W @ (y[t, k] - hx[t, k]) for t, (k, W) in enumerate(blocks) if k.size]
        if Wp is not None:
            out.append(Wp @ (x[0] - model.x0_mean))
        return np.concatenate(out)

    def jacobian(flat):
        x = np.asarray(flat).reshape(T, N)
        A, C = np.asarray(_f_jac(params, x[:-1], None)), np.asarray(_h_jac(params, x, None))
        rows = []
        for t in range(T - 1):
            r = np.zeros((N, T * N))
            r[:, (t + 1) * N:(t + 2) * N], r[:, t * N:(t + 1) * N] = Wq, -Wq @ A[t]
            rows.append(r)
        for t, (k, W) in enumerate(blocks):
            if k.size:
                r = np.zeros((k.size, T * N))
                r[:, t * N:(t + 1) * N] = -W @ C[t][k]
                rows.append(r)
        if Wp is not None:
            r = np.zeros((N, T * N))
            r[:, :N] = Wp
            rows.append(r)
        return np.vstack(rows)

    return residuals, jacobian


@pytest.mark.parametrize("method", [pytest.param("scan", marks=slow), "cpu"])
def test_linear_model_equals_smooth_in_one_step(rng, method):
    # A user-written linear f, h; the StateSpace form (the robust losses' linear
    # path) is checked against kx.smooth in test_robust.py, and here with KALMAX_SLOW=1.
    n, p, Tl = 3, 2, 10
    md = ref.random_model(rng, n, p, Tl, time_varying=False)
    y, mask = ref.random_data(rng, md, Tl, missing=0.3)
    model = to_model(md)
    nl = kx.NonlinearModel(lambda th, x, u: th[0] @ x + th[1], lambda th, x, v: th[2] @ x + th[3],
                           params=(model.A, model.b, model.C, model.d), Q=model.Q, R=model.R,
                           x0_mean=model.x0_mean, x0_cov=model.x0_cov)
    want = np.asarray(kx.smooth(model, y, mask).states)
    for m in (nl, model) if os.environ.get("KALMAX_SLOW") else (nl,):
        out = kx.smooth_nonlinear(m, y, mask, method=method)
        assert bool(out.converged) and int(out.iterations) == 1
        np.testing.assert_allclose(out.states, want, rtol=0, atol=1e-10)


@pytest.mark.parametrize("prior", [True, pytest.param(False, marks=slow)])
def test_map_path_equals_least_squares(rng, prior):
    model, y, mask, x_true = make_problem(rng, prior=prior)
    out = kx.smooth_nonlinear(model, y, mask, init=x_true + 0.05)
    assert bool(out.converged), int(out.iterations)
    residuals, jac = stacked_residuals(model, y, mask)
    sol = scipy.optimize.least_squares(lambda v: np.asarray(residuals(v)), (x_true + 0.05).ravel(),
                                       jac=lambda v: np.asarray(jac(v)), method="lm",
                                       xtol=1e-15, ftol=1e-15, gtol=1e-15)
    # SciPy's relative-decrease test (ftol) stops at ~1e-8 from the minimum here:
    # polish with dense Gauss–Newton steps on the same residuals (dense lstsq).
    x_ref = sol.x
    for _ in range(3):
        x_ref = x_ref + np.linalg.lstsq(np.asarray(jac(x_ref)), -np.asarray(residuals(x_ref)), rcond=None)[0]
    Jr = np.asarray(jac(x_ref))
    grad = Jr.T @ np.asarray(residuals(x_ref))
    assert grad @ np.linalg.solve(Jr.T @ Jr, grad) < 1e-16  # squared Newton decrement: at the minimum
    np.testing.assert_allclose(out.states, x_ref.reshape(T, N), rtol=0, atol=1e-8)


def _loss_of_states(x):
    weights = jnp.linspace(0.5, 1.5, x.size).reshape(x.shape)
    return jnp.sum(weights * jnp.sin(x))


def test_gradients_equal_central_differences(rng):
    """d loss(x*) / dθ, Q, R, y against central differences of re-solved problems (step 1e-5)."""
    model, y, mask, x_true = make_problem(rng)
    y0 = np.where(mask, y, 0.0)
    init = x_true

    def loss(params, Q, R, yy):
        m = model.replace(params=params, Q=Q, R=R)
        return _loss_of_states(kx.smooth_nonlinear(m, yy, mask, init=init).states)

    args = (model.params, jnp.asarray(model.Q), jnp.asarray(model.R), jnp.asarray(y0))
    grads = jax.grad(loss, argnums=(0, 1, 2, 3))(*args)
    sym = lambda a: a + a.T  # noqa: E731  (symmetric perturbations keep Q, R covariances)
    directions = (
        {"g": 1.0, "c": -0.7, "s": 0.4},
        sym(rng.standard_normal((N, N))) * 1e-2,
        sym(rng.standard_normal((P, P))) * 1e-2,
        rng.standard_normal((T, P)) * np.where(mask, 1.0, 0.0),
    )
    h = 1e-5
    for i, d in enumerate(directions):
        plus = [a for a in args]
        minus = [a for a in args]
        plus[i] = jax.tree_util.tree_map(lambda a, b: a + h * b, args[i], d)
        minus[i] = jax.tree_util.tree_map(lambda a, b: a - h * b, args[i], d)
        fd = (loss(*plus) - loss(*minus)) / (2 * h)
        an = sum(jnp.sum(g * b) for g, b in zip(jax.tree_util.tree_leaves(grads[i]), jax.tree_util.tree_leaves(d)))
        assert np.isclose(float(an), float(fd), rtol=1e-6, atol=1e-8), (i, float(an), float(fd))


@slow
def test_check_grads_reverse_mode(rng):
    model, y, mask, x_true = make_problem(rng, missing=False)

    def loss(g, c, yy):
        m = model.replace(params={"g": g, "c": c, "s": PARAMS["s"]})
        return _loss_of_states(kx.smooth_nonlinear(m, yy, init=x_true).states)

    check_grads(loss, (9.0, 0.4, jnp.asarray(y)), order=1, modes=["rev"], atol=1e-6, rtol=1e-6)


def test_unconverged_is_nan_with_flag(rng):
    model, y, mask, x_true = make_problem(rng)
    out = kx.smooth_nonlinear(model, y, mask, max_iterations=1, init=x_true + 0.3)
    assert not bool(out.converged) and int(out.iterations) == 1
    assert np.all(np.isnan(out.states))
    full = kx.smooth_nonlinear(model, y, mask, init=x_true + 0.3)
    assert bool(full.converged) and int(full.iterations) > 1


@slow
def test_jit_and_vmap(rng):
    model, y, mask, x_true = make_problem(rng, missing=False)
    ys = np.stack([y, y + 0.01])
    batched = jax.jit(jax.vmap(lambda yy: kx.smooth_nonlinear(model, yy, init=x_true).states))(ys)
    for b in range(2):
        np.testing.assert_allclose(batched[b], kx.smooth_nonlinear(model, ys[b], init=x_true).states,
                                   rtol=0, atol=1e-10)


@slow
def test_float32_runs_and_is_close(rng):
    model, y, mask, x_true = make_problem(rng)
    m32 = model.replace(params={k: np.float32(v) for k, v in PARAMS.items()},
                        Q=np.float32(model.Q), R=np.float32(model.R),
                        x0_mean=np.float32(model.x0_mean), x0_cov=np.float32(model.x0_cov))
    out32 = kx.smooth_nonlinear(m32, y.astype(np.float32), mask, init=x_true.astype(np.float32))
    out64 = kx.smooth_nonlinear(model, y, mask, init=x_true)
    assert out32.states.dtype == jnp.float32 and bool(out32.converged)
    np.testing.assert_allclose(out32.states, out64.states, atol=1e-3)


def test_linearize_then_smooth_is_one_gauss_newton_step(rng):
    """kx.linearize about the true path and kx.smooth: the 'linearised once' smoother.

    Its answer is one full Gauss–Newton step: the minimiser of the quadratic
    model of the test's stacked residuals, r(x̄) + Jr (x − x̄) (dense lstsq).
    """
    model, y, mask, x_true = make_problem(rng)
    once = kx.smooth(kx.linearize(model, x_true, mask=mask), y, mask).states
    residuals, jac = stacked_residuals(model, y, mask)
    r0 = np.asarray(residuals(x_true.ravel()))
    Jr = np.asarray(jac(x_true.ravel()))
    step = np.linalg.lstsq(Jr, -r0, rcond=None)[0]
    np.testing.assert_allclose(once, x_true + step.reshape(T, N), rtol=0, atol=1e-10)


def test_shape_errors_name_the_argument(rng):
    model, y, mask, _ = make_problem(rng)
    bad = model.replace(transition=lambda th, x, u: x[:1])
    with pytest.raises(ValueError, match="model.transition"):
        kx.smooth_nonlinear(bad, y, mask)
    with pytest.raises(ValueError, match="init must have shape"):
        kx.smooth_nonlinear(model, y, mask, init=np.zeros((T + 1, N)))
    with pytest.raises(TypeError, match="loss must be"):
        kx.smooth_nonlinear(model, y, mask, loss="huber")


@slow
def test_laplace_equals_exact_likelihood_for_linear_models(rng):
    n, p, Tl = 2, 2, 9
    md = ref.random_model(rng, n, p, Tl, time_varying=False)
    y, mask = ref.random_data(rng, md, Tl, missing=0.2)
    for prior in (True, False):
        model = to_model(md, prior=prior)
        got = kx.laplace_log_likelihood(model, y, mask)
        assert np.isclose(float(got), ref.dense_log_likelihood(md, y, mask) if prior
                          else float(kx.log_likelihood(model, y, mask)), rtol=1e-10, atol=1e-10)
    g_exact = jax.grad(lambda m: kx.log_likelihood(m, y, mask))(model)
    g_laplace = jax.grad(lambda m: kx.laplace_log_likelihood(m, y, mask))(model)
    for a, b in zip(jax.tree_util.tree_leaves(g_exact), jax.tree_util.tree_leaves(g_laplace)):
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-10)


@slow
def test_laplace_nonlinear_against_dense_hessian(rng):
    """−½ log|∇²J| from a dense Hessian of the test's own objective ½‖r(x)‖², plus the constants."""
    model, y, mask, x_true = make_problem(rng)
    out = kx.smooth_nonlinear(model, y, mask, init=x_true)
    inv_chol = lambda S: np.linalg.inv(np.linalg.cholesky(np.asarray(S)))  # noqa: E731
    Wq, Wp = inv_chol(model.Q), inv_chol(model.x0_cov)
    blocks = [(k, inv_chol(np.asarray(model.R)[np.ix_(k, k)])) for k in (np.flatnonzero(m) for m in mask)]

    def J(flat):  # ½‖r(x)‖², the stacked residuals of stacked_residuals written in JAX
        x_ = flat.reshape(T, N)
        val = sum(jnp.sum((Wq @ (x_[t + 1] - pendulum(PARAMS, x_[t], None))) ** 2) for t in range(T - 1))
        val += sum(jnp.sum((W @ (y[t, k] - sensors(PARAMS, x_[t], None)[k])) ** 2)
                   for t, (k, W) in enumerate(blocks) if k.size)
        return 0.5 * (val + jnp.sum((Wp @ (x_[0] - model.x0_mean)) ** 2))

    x = np.asarray(out.states).ravel()
    sign, logdet_H = np.linalg.slogdet(np.asarray(jax.hessian(J)(x)))
    assert sign > 0
    R = np.asarray(model.R)
    logdet_R = sum(np.linalg.slogdet(R[np.ix_(k, k)])[1] for k in (np.flatnonzero(m) for m in mask) if k.size)
    n_obs = mask.sum()
    want = (-float(J(x)) - 0.5 * logdet_H - 0.5 * (T - 1) * np.linalg.slogdet(model.Q)[1] - 0.5 * logdet_R
            - 0.5 * np.linalg.slogdet(model.x0_cov)[1] - 0.5 * n_obs * np.log(2 * np.pi))
    got = kx.laplace_log_likelihood(model, y, mask, init=x_true)
    assert np.isclose(float(got), want, rtol=1e-10, atol=1e-9)
    # Its gradient in a parameter, against central differences.
    ll = lambda g: kx.laplace_log_likelihood(model.replace(params={**PARAMS, "g": g}), y, mask, init=x_true)  # noqa: E731
    fd = (ll(9.0 + 1e-5) - ll(9.0 - 1e-5)) / 2e-5
    assert np.isclose(float(jax.grad(ll)(9.0)), float(fd), rtol=1e-6)
