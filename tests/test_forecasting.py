"""Forecasts past the end of the record: kx.forecast.

References:
- repeated prediction steps of the textbook Kalman filter, m ← A m + b,
  P ← A P Aᵀ + Q (Särkkä (2013), Bayesian Filtering and Smoothing, Ch. 4,
  theorem number from memory), started from the filtered state at the last
  step of tests/reference.py's covariance-form filter, or, for a flat
  prior, from the last block of the dense normal equations' solution and
  inverse (tests/reference.py);
- a future step is a step with nothing observed, so the forecast equals the
  smoother's marginal at unobserved steps appended to the record (common
  practice): checked with kx.smooth on a ContinuousModel's timestamps.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import field_difference, to_model

T, N, P, H = 9, 3, 2, 4


def _predict(m, Pm, fut):
    """Textbook prediction steps from N(m, Pm); fut: expanded future (A, Q, b, C, R, d per step)."""
    out = {k: [] for k in ("states", "state_cov", "measurements", "measurement_cov", "predictive_cov")}
    for k in range(len(fut["A"])):
        m = fut["A"][k] @ m + fut["b"][k]
        Pm = fut["A"][k] @ Pm @ fut["A"][k].T + fut["Q"][k]
        C = fut["C"][k]
        out["states"].append(m)
        out["state_cov"].append(Pm)
        out["measurements"].append(C @ m + fut["d"][k])
        out["measurement_cov"].append(C @ Pm @ C.T)
        out["predictive_cov"].append(C @ Pm @ C.T + fut["R"][k])
    return {k: np.stack(v) for k, v in out.items()}


def _repeat(md, h):
    """The future of a time-invariant model dict: its own fields, h times (absent offsets are zero)."""
    n, p = md["A"].shape[0], md["C"].shape[0]
    fields = dict(A=md["A"], Q=md["Q"], C=md["C"], R=md["R"],
                  b=np.zeros(n) if md.get("b") is None else md["b"],
                  d=np.zeros(p) if md.get("d") is None else md["d"])
    return {k: np.broadcast_to(v, (h,) + np.shape(v)) for k, v in fields.items()}


def _check(fc, expected, atol=1e-10):
    for name, value in expected.items():
        np.testing.assert_allclose(getattr(fc, name), value, atol=atol, err_msg=name)


def test_time_invariant_model_equals_repeated_textbook_predictions(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    fc = kx.forecast(to_model(md), y, mask, steps=H)
    mf, Pf, *_ = ref.kalman_filter(md, y, mask)
    _check(fc, _predict(mf[-1], Pf[-1], _repeat(md, H)))
    assert fc.states.shape == (H, N) and fc.predictive_cov.shape == (H, P, P)


def test_time_varying_future_with_flat_prior_equals_textbook_predictions(rng):
    md = ref.random_model(rng, N, P, T, time_varying=True, prior=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    fmd = ref.random_model(rng, N, P, H + 1, time_varying=True)  # A, Q, b: (H, ...); C, R, d: (H+1, ...)
    future = kx.StateSpace(A=fmd["A"], Q=fmd["Q"], b=fmd["b"], C=fmd["C"][1:], R=fmd["R"][1:], d=fmd["d"][1:])
    fc = kx.forecast(to_model(md, prior=False), y, mask, future=future)
    Hm, g = ref.dense_normal_equations(md, y, mask)
    S = np.linalg.inv(Hm)
    fut = dict(A=fmd["A"], Q=fmd["Q"], b=fmd["b"], C=fmd["C"][1:], R=fmd["R"][1:], d=fmd["d"][1:])
    _check(fc, _predict((S @ g)[-N:], S[-N:, -N:], fut), atol=1e-9)


def test_continuous_model_future_times_equal_smoother_on_unobserved_steps(rng):
    cm = kx.constant_velocity(dims=1, q=0.7, r=0.2)
    times = np.cumsum(rng.uniform(0.2, 1.0, size=T))
    future_times = times[-1] + np.cumsum(rng.uniform(0.2, 2.0, size=H))
    y = np.sin(times)[:, None] + 0.3 * rng.standard_normal((T, 1))
    fc = kx.forecast(cm.at_times(times), y, future=cm.at_times(np.concatenate([times[-1:], future_times])))
    # The same record with H unobserved steps appended, smoothed: its marginals there are the forecast.
    y_ext = np.concatenate([y, np.full((H, 1), np.nan)])
    sm = kx.smooth(cm.at_times(np.concatenate([times, future_times])), y_ext, covariances=True)
    np.testing.assert_allclose(fc.states, sm.states[T:], atol=1e-9)
    np.testing.assert_allclose(fc.state_cov, sm.state_cov[T:], atol=1e-9)
    np.testing.assert_allclose(fc.measurements, sm.measurements[T:], atol=1e-9)
    np.testing.assert_allclose(fc.measurement_cov, sm.measurement_cov[T:], atol=1e-9)
    np.testing.assert_allclose(fc.predictive_cov, sm.measurement_cov[T:] + 0.2, atol=1e-9)


def _loss_ref(md, y, mask):
    mf, Pf, *_ = ref.kalman_filter(md, y, mask)
    e = _predict(mf[-1], Pf[-1], _repeat(md, H))
    return np.sum(e["measurements"] ** 2) + np.sum(np.log(np.diagonal(e["predictive_cov"], axis1=1, axis2=2)))


def test_jit_vmap_grad_match_finite_differences_of_textbook_predictions(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    data = [ref.random_data(rng, md, T, missing=0.3) for _ in range(2)]
    ys, masks = np.stack([d[0] for d in data]), np.stack([d[1] for d in data])

    def loss(m, yy, k):
        fc = kx.forecast(m, yy, k, steps=H)
        return jnp.sum(fc.measurements ** 2) + jnp.sum(jnp.log(jnp.diagonal(fc.predictive_cov, axis1=1, axis2=2)))

    values, (g_model, g_y) = jax.jit(jax.vmap(jax.value_and_grad(loss, argnums=(0, 1)), in_axes=(None, 0, 0)))(
        to_model(md), ys, masks)
    h = 1e-6  # central differences (common practice)
    for i, (field, idx) in enumerate([("A", (0, 2)), ("Q", (0, 1)), ("R", (1, 1)), ("C", (1, 0)), ("b", (2,)),
                                      ("d", (1,)), ("P0", (1, 2))]):
        k = i % 2
        if i < 2:
            assert abs(float(values[k]) - _loss_ref(md, ys[k], masks[k])) < 1e-9 * (1 + abs(float(values[k])))
        fd, E = field_difference(lambda d: _loss_ref(d, ys[k], masks[k]), md, field, idx, h)
        ad = float(np.sum(np.asarray(getattr(g_model, {"P0": "x0_cov"}.get(field, field)))[k] * E))
        assert abs(ad - fd) < 1e-6 * (1 + abs(fd)), (field, ad, fd)
    t, j = np.argwhere(masks[1])[-1]
    E = np.zeros_like(ys[1])
    E[t, j] = 1.0
    fd = (_loss_ref(md, ys[1] + h * E, masks[1]) - _loss_ref(md, ys[1] - h * E, masks[1])) / (2 * h)
    assert abs(float(g_y[1, t, j]) - fd) < 1e-6 * (1 + abs(fd))
    assert np.all(np.asarray(g_y)[~masks] == 0)


def test_argument_errors_name_the_argument():
    model = kx.StateSpace(A=jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1))
    y = jnp.zeros((5, 1))
    fut = lambda **kw: kx.StateSpace(**dict(dict(A=jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1)), **kw))  # noqa: E731
    cases = [
        (dict(), ValueError, "steps is required when future is None"),
        (dict(steps=0), ValueError, "steps must be a positive int"),
        (dict(steps=2.0), ValueError, "steps must be a positive int"),
        (dict(future=fut()), ValueError, "steps is required when every field of future is time-invariant"),
        (dict(future=fut(A=jnp.ones((3, 2, 3)))), ValueError, r"future.A must have shape \(2, 2\) \(time-invariant\) or \(h, 2, 2\)"),
        (dict(future=fut(R=jnp.ones((3, 2, 2)))), ValueError, r"future.R must have shape \(1, 1\)"),
        (dict(future=fut(A=jnp.ones((3, 2, 2)), C=jnp.ones((4, 1, 2)))), ValueError, "must agree on the horizon h; got A: 3, C: 4"),
        (dict(future=fut(A=jnp.ones((3, 2, 2))), steps=2), ValueError, "A: 3, steps: 2"),
        (dict(future=fut(Q=None), steps=2), ValueError, "future.Q is required"),
        (dict(future=fut(b=jnp.ones(2, jnp.int32)), steps=2), TypeError, "future.b must be a real floating-point"),
        (dict(future={"A": 1}), TypeError, "future must be a kalmax.StateSpace"),
    ]
    for kwargs, err, pattern in cases:
        with pytest.raises(err, match=pattern):
            jax.jit(lambda m, yy: kx.forecast(m, yy, **kwargs))(model, y)
    with pytest.raises(ValueError, match=r"model.A is time-varying \(shape \(4, 2, 2\)\).*future="):
        kx.forecast(model.replace(A=jnp.ones((4, 2, 2))), y, steps=3)
    with pytest.raises(ValueError, match=r"y must have shape \(T, p\)"):
        kx.forecast(model, y[:, 0], steps=3)
