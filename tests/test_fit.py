"""The fitting loop and standard errors (kalmax/_src/fitting.py)."""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from scipy import optimize

import kalmax as kx

import reference as ref


def _quadratic(target):
    return lambda p: jnp.sum((p["w"] - target) ** 2) + 0.5 * jnp.sum(p["b"] ** 2)


def test_fit_equals_the_plain_loop():
    target = jnp.array([1.0, -2.0, 0.5])
    loss = _quadratic(target)
    params = {"w": jnp.zeros(3), "b": jnp.ones(2)}
    opt = optax.adam(0.05)
    res = kx.fit(loss, params, opt, steps=40, progress=False)
    # The loop in the module docstring, by hand.
    p, state, losses = params, opt.init(params), []
    for _ in range(40):
        value, grads = jax.value_and_grad(loss)(p)
        losses.append(float(value))
        updates, state = opt.update(grads, state, p)
        p = optax.apply_updates(p, updates)
    losses.append(float(loss(p)))
    for k in p:
        np.testing.assert_allclose(res.params[k], p[k], rtol=1e-12)
    np.testing.assert_allclose(res.history["loss"], losses, rtol=1e-12)
    assert res.steps_run == 40 and res.best_step == 40 and res.stop_reason == "steps"
    assert "validation" not in res.history
    # jit=False gives the same numbers.
    res2 = kx.fit(loss, params, opt, steps=40, progress=False, jit=False)
    np.testing.assert_allclose(res2.history["loss"], losses, rtol=1e-10)


def test_early_stopping_keeps_the_best_validation_params():
    # Training pulls w to 1 while validation is best at 0.5: it starts rising
    # half-way and patience stops the run.
    loss = lambda w: (w - 1.0) ** 2  # noqa: E731
    val = lambda w: (w - 0.5) ** 2  # noqa: E731
    res = kx.fit(loss, jnp.array(0.0), optax.sgd(0.02), steps=500, validation_fn=val, patience=10,
                 progress=False)
    v = res.history["validation"]
    assert res.stop_reason == "patience"
    assert res.steps_run < 500 and len(v) == res.steps_run + 1 == len(res.history["loss"])
    assert res.best_step == int(np.argmin(v)) == res.steps_run - 10
    np.testing.assert_allclose(val(res.params), v.min())
    assert abs(float(res.params) - 0.5) < 0.02


def test_non_finite_loss_and_callback_stop():
    # -log(w) at w <= 0 is inf or NaN: stop and keep the last finite params.
    res = kx.fit(lambda w: -jnp.log(w) + 3 * w, jnp.array(1.0), optax.sgd(0.5), steps=50, progress=False)
    assert res.stop_reason == "non-finite"
    assert not np.isfinite(res.history["loss"][-1]) and np.all(np.isfinite(res.history["loss"][:-1]))
    assert float(res.params) > 0 and res.best_step == res.steps_run - 1
    seen = []
    res = kx.fit(lambda w: w**2, jnp.array(3.0), optax.sgd(0.1), steps=50, progress=False,
                 callback=lambda s: seen.append(s.step) or s.step == 4)
    assert res.stop_reason == "callback" and res.steps_run == 4 and seen == [0, 1, 2, 3, 4]
    res = kx.fit(lambda w: w**2, jnp.array(3.0), optax.sgd(0.1), steps=50, progress=False,
                 callback=lambda s: "small enough" if abs(float(s.params)) < 1.0 else None)
    assert res.stop_reason == "small enough" and abs(float(res.params)) < 1.0 <= 3.0 * 0.8 ** (res.steps_run - 1)


def test_progress_display(capsys):
    kx.fit(lambda w: w**2, jnp.array(3.0), optax.sgd(0.1), steps=20, progress=True)
    shown = capsys.readouterr()
    assert "fit" in (shown.err + shown.out)
    kx.fit(lambda w: w**2, jnp.array(3.0), optax.sgd(0.1), steps=20, progress=False)
    shown = capsys.readouterr()
    assert shown.err == "" and shown.out == ""


def test_lbfgs_extra_arguments_and_argument_errors():
    loss = _quadratic(jnp.array([3.0, 1.0, -1.0]))
    res = kx.fit(loss, {"w": jnp.zeros(3), "b": jnp.ones(2)}, optax.lbfgs(), steps=30, progress=False)
    np.testing.assert_allclose(res.params["w"], [3.0, 1.0, -1.0], atol=1e-8)
    with pytest.raises(ValueError, match="steps"):
        kx.fit(loss, {"w": jnp.zeros(3), "b": jnp.ones(2)}, optax.sgd(0.1), steps=-1)
    with pytest.raises(ValueError, match="patience"):
        kx.fit(loss, {"w": jnp.zeros(3), "b": jnp.ones(2)}, optax.sgd(0.1), patience=0)


def test_compiled_step_is_traced_once_with_lbfgs():
    # optax.lbfgs starts with weakly typed scalars in its state; the step
    # returns them strongly typed. A fit must not compile its step again on
    # the second call: the loss is traced as often in a 4-call fit (steps=3,
    # plus the final loss) as in a 1-call fit (steps=0).
    quadratic = _quadratic(jnp.array([3.0, 1.0, -1.0]))
    traces = []

    def loss(p):
        traces.append(1)  # runs only while JAX traces the step
        return quadratic(p)

    counts = []
    for steps in (0, 3):
        traces.clear()
        kx.fit(loss, {"w": jnp.zeros(3), "b": jnp.ones(2)}, optax.lbfgs(), steps=steps, progress=False)
        counts.append(len(traces))
    assert counts[0] > 0 and counts[1] == counts[0], counts


def test_standard_errors_of_a_gaussian_sample():
    """i.i.d. N(μ, σ²), parameters (μ, log σ): the inverse observed information at
    the MLE gives SE(μ̂) = σ̂/√N and SE(log σ̂) = 1/√(2N); by the delta method
    SE(σ̂²) = σ̂² √(2/N). Textbook results (e.g. Casella & Berger, Statistical
    Inference, 2nd ed., §10.1 -- section from memory)."""
    rng = np.random.default_rng(0)
    x = jnp.asarray(rng.normal(2.0, 3.0, size=400))
    N = x.size
    mu_hat, sig_hat = float(jnp.mean(x)), float(jnp.std(x))
    nll = lambda p: N * p["log_sigma"] + 0.5 * jnp.sum((x - p["mu"]) ** 2) * jnp.exp(-2 * p["log_sigma"])  # noqa: E731
    mle = {"mu": jnp.array(mu_hat), "log_sigma": jnp.array(np.log(sig_hat))}
    se = kx.standard_errors(nll, mle)
    np.testing.assert_allclose(se["mu"], sig_hat / np.sqrt(N), rtol=1e-10)
    np.testing.assert_allclose(se["log_sigma"], 1 / np.sqrt(2 * N), rtol=1e-10)
    se_var = kx.standard_errors(nll, mle, of=lambda p: jnp.exp(2 * p["log_sigma"]))
    np.testing.assert_allclose(se_var, sig_hat**2 * np.sqrt(2 / N), rtol=1e-10)
    se_fd = kx.standard_errors(nll, mle, method="finite-difference")
    np.testing.assert_allclose(se_fd["mu"], se["mu"], rtol=1e-6)
    np.testing.assert_allclose(se_fd["log_sigma"], se["log_sigma"], rtol=1e-6)
    # Not a minimum (a saddle): no standard errors.
    assert np.all(np.isnan(kx.standard_errors(lambda p: p[0] ** 2 - p[1] ** 2, jnp.array([0.0, 0.0]))))
    with pytest.raises(ValueError, match="method"):
        kx.standard_errors(nll, mle, method="magic")


def _local_level_nll(y, prior=True):
    def nll(p):
        model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.exp(p[0]).reshape(1, 1),
                              R=jnp.exp(p[1]).reshape(1, 1),
                              x0_mean=jnp.zeros(1) if prior else None, x0_cov=10.0 * jnp.eye(1) if prior else None)
        return -kx.log_likelihood(model, y)
    return nll


def _ref_nll(y):
    def nll(th):
        md = {"A": np.eye(1), "C": np.eye(1), "Q": np.exp(th[0]) * np.eye(1), "R": np.exp(th[1]) * np.eye(1),
              "m0": np.zeros(1), "P0": 10.0 * np.eye(1)}
        return -ref.kalman_filter(md, y).log_likelihood
    return nll


def _simulate_local_level(rng, T, q, r):
    x = np.cumsum(np.sqrt(q) * rng.standard_normal(T)) + np.sqrt(10.0) * rng.standard_normal()
    return (x + np.sqrt(r) * rng.standard_normal(T))[:, None]


def test_fit_recovers_simulated_parameters_and_matches_an_independent_optimum():
    """Maximum likelihood on data simulated from known (q, r) = (0.5, 2.0).

    Tolerance: each estimate of (log q, log r) lies within 4 of its own
    standard errors of the truth, and those standard errors shrink with T
    (asymptotically like 1/√T: ratio ≈ √10 between T = 100 and T = 1000;
    we require at least 2). At T = 100 the optimum and its standard errors
    agree with scipy's optimisation of an independent NumPy Kalman filter
    log-likelihood (prediction-error decomposition, tests/reference.py) and
    a finite-difference Hessian of it.
    """
    rng = np.random.default_rng(7)
    truth = np.log([0.5, 2.0])
    ses = {}
    for T in (100, 1000):
        y = jnp.asarray(_simulate_local_level(rng, T, 0.5, 2.0))
        nll = _local_level_nll(y)
        res = kx.fit(nll, jnp.array([0.0, 0.0]), optax.lbfgs(), steps=60, progress=False, neg_log_lik_fn=nll)
        est, se = np.asarray(res.params), np.asarray(res.standard_errors)
        assert np.all(np.isfinite(se))
        assert np.all(np.abs(est - truth) < 4 * se), (T, est, truth, se)
        ses[T] = se
        if T == 100:
            ref_nll = _ref_nll(np.asarray(y))
            sp = optimize.minimize(ref_nll, np.zeros(2), method="BFGS", options={"gtol": 1e-9})
            np.testing.assert_allclose(est, sp.x, atol=2e-5)
            h = 1e-4
            H = np.empty((2, 2))
            for i in range(2):
                for j in range(2):
                    ei, ej = h * np.eye(2)[i], h * np.eye(2)[j]
                    H[i, j] = (ref_nll(est + ei + ej) - ref_nll(est + ei - ej) - ref_nll(est - ei + ej)
                               + ref_nll(est - ei - ej)) / (4 * h * h)
            np.testing.assert_allclose(se, np.sqrt(np.diag(np.linalg.inv(H))), rtol=1e-3)
    assert np.all(ses[1000] < ses[100] / 2)
