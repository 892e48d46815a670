"""Expectation–maximisation (kalmax/_src/em.py), after Shumway & Stoffer (1982),
"An approach to time series smoothing and forecasting using the EM algorithm",
J. Time Series Analysis 3(4), 253-264.

Independent checks:
- the M-step maximises the expected complete-data log-likelihood, written
  here in NumPy from the dense joint posterior of all states
  (tests/reference.py::dense_posterior) rather than from the smoother;
- EM's fixed point is a stationary point of the log-likelihood of an
  independent NumPy Kalman filter (finite-difference gradient), with missing
  data and a full R;
- the log-likelihood never decreases (Dempster, Laird & Rubin 1977, JRSS-B
  39(1), Theorem 1), with a prior and with a flat (diffuse) prior.
"""

import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src.em import m_step

import reference as ref
from helpers import to_dict, to_model


def _monotone(ll):
    # Rounding only: a drop larger than 1e-9 relative would be a real decrease.
    return np.all(np.diff(ll) >= -1e-9 * np.abs(ll[1:]))


def _q_function(md, mean, cov, y):
    """E[log p(x, y; θ) | y] (fully observed y) from dense posterior moments.

    Quadratic forms via E[u vᵀ] = Cov(u, v) + E[u] E[v]ᵀ, term by term in loops.
    """
    E = ref.expand(md, y.shape[0])
    T, n = mean.shape

    def Exx(t, s):
        return cov[t * n:(t + 1) * n, s * n:(s + 1) * n] + np.outer(mean[t], mean[s])

    def gauss(S, second_moment):
        k = S.shape[0]
        return -0.5 * (np.trace(np.linalg.solve(S, second_moment)) + np.linalg.slogdet(S)[1] + k * np.log(2 * np.pi))

    val = 0.0
    for t in range(T - 1):
        A, b = E["A"][t], E["b"][t]
        mr = mean[t + 1] - A @ mean[t]
        Err = Exx(t + 1, t + 1) - A @ Exx(t, t + 1) - Exx(t + 1, t) @ A.T + A @ Exx(t, t) @ A.T
        Err = Err - np.outer(mr, b) - np.outer(b, mr) + np.outer(b, b)
        val += gauss(E["Q"][t], Err)
    for t in range(T):
        C, d = E["C"][t], E["d"][t]
        me = y[t] - C @ mean[t]
        Eee = np.outer(y[t], y[t]) - C @ np.outer(mean[t], y[t]) - np.outer(y[t], mean[t]) @ C.T + C @ Exx(t, t) @ C.T
        Eee = Eee - np.outer(me, d) - np.outer(d, me) + np.outer(d, d)
        val += gauss(E["R"][t], Eee)
    m0 = E["m0"]
    E00 = Exx(0, 0) - np.outer(m0, mean[0]) - np.outer(mean[0], m0) + np.outer(m0, m0)
    return val + gauss(E["P0"], E00)


def _directions(md, names):
    """Unit perturbations of every free entry (symmetric pairs for covariances)."""
    out = []
    for name in names:
        key = {"x0_mean": "m0", "x0_cov": "P0"}.get(name, name)
        shape = np.shape(md[key])
        if name in ("Q", "R", "x0_cov"):
            for i in range(shape[0]):
                for j in range(i + 1):
                    D = np.zeros(shape)
                    D[i, j] = D[j, i] = 1.0
                    out.append((key, D))
        else:
            for idx in np.ndindex(shape):
                D = np.zeros(shape)
                D[idx] = 1.0
                out.append((key, D))
    return out


def test_m_step_maximises_the_expected_complete_data_log_likelihood():
    rng = np.random.default_rng(0)
    T, n, p = 14, 2, 3
    md = ref.random_model(rng, n, p, 1, time_varying=False, full_R=True, prior=True, offsets=True)
    y, mask = ref.random_data(rng, md, T, missing=0.0)
    mean, cov = ref.dense_posterior(md, y, mask)
    means, covs, cross = ref.rts_smoother(md, y, mask, return_cross=True)
    names = ("A", "b", "Q", "C", "d", "R", "x0_mean")
    model = to_model(md)
    new = m_step(model, jnp.asarray(y), jnp.ones((T, p)), jnp.asarray(means), jnp.asarray(covs),
                 jnp.asarray(cross), names)
    md_new = to_dict(new)
    q_new = _q_function(md_new, mean, cov, y)
    assert q_new > _q_function(md, mean, cov, y)
    h = 1e-5
    for key, D in _directions(md_new, names):
        plus, minus = dict(md_new), dict(md_new)
        plus[key] = md_new[key] + h * D
        minus[key] = md_new[key] - h * D
        slope = (_q_function(plus, mean, cov, y) - _q_function(minus, mean, cov, y)) / (2 * h)
        assert abs(slope) < 1e-6 * max(1.0, abs(q_new)), (key, D, slope)
    # The E-step moments em() uses (kalmax.smooth) agree with the NumPy smoother's.
    sm = kx.smooth(model, jnp.asarray(y), covariances=True)
    np.testing.assert_allclose(sm.state_cross_cov, cross, rtol=1e-9, atol=1e-12)


def test_fixed_point_is_a_stationary_point_of_the_likelihood():
    """Missing entries and a full R: EM's limit has zero log-likelihood gradient
    (finite differences of the NumPy Kalman filter log-likelihood)."""
    rng = np.random.default_rng(11)
    md = ref.random_model(rng, 1, 2, 1, time_varying=False, full_R=True, prior=True, offsets=True)
    md["b"] = None
    y, mask = ref.random_data(rng, md, 300, missing=0.3)
    start = to_model(md).replace(A=jnp.array([[0.3]]), C=jnp.asarray(md["C"]) * 0.5 + 0.3, R=jnp.eye(2),
                                 d=jnp.zeros(2))
    fitted, ll = kx.em(start, jnp.asarray(y), jnp.asarray(mask), iterations=1000, fixed=("Q",))
    assert len(ll) == 1001 and _monotone(ll)
    assert np.all(fitted.Q == start.Q) and np.all(fitted.x0_cov == start.x0_cov)

    def loglik(theta):
        L = np.array([[np.exp(theta[3]), 0.0], [theta[4], np.exp(theta[5])]])
        m = dict(md, A=theta[:1].reshape(1, 1), C=theta[1:3].reshape(2, 1), R=L @ L.T, d=theta[6:8],
                 m0=theta[8:9])
        return ref.kalman_filter(m, y, mask).log_likelihood

    def theta_of(model):
        L = np.linalg.cholesky(np.asarray(model.R))
        return np.concatenate([np.ravel(model.A), np.ravel(model.C), [np.log(L[0, 0]), L[1, 0], np.log(L[1, 1])],
                               np.asarray(model.d), np.asarray(model.x0_mean)])

    def grad(theta, h=1e-6):
        return np.array([(loglik(theta + h * e) - loglik(theta - h * e)) / (2 * h) for e in np.eye(theta.size)])

    theta = theta_of(fitted)
    np.testing.assert_allclose(ll[-1], loglik(theta), rtol=1e-10)
    assert np.abs(grad(theta_of(start))).max() > 10.0
    assert np.abs(grad(theta)).max() < 1e-4


@pytest.mark.parametrize("prior", [True, False], ids=["prior", "diffuse"])
def test_log_likelihood_never_decreases(prior):
    rng = np.random.default_rng(5 if prior else 6)
    md = ref.random_model(rng, 2, 3, 1, time_varying=False, full_R=True, prior=True, offsets=True)
    y, mask = ref.random_data(rng, md, 60, missing=0.3)
    # Start away from the truth.
    start = to_model(md, prior=prior).replace(A=0.5 * jnp.eye(2), Q=jnp.eye(2), R=2.0 * jnp.eye(3),
                                             C=jnp.asarray(md["C"]) + 0.5)
    extra = ("x0_cov",) if prior else ()
    fields = ("A", "b", "Q", "C", "d", "R") + (("x0_mean",) if prior else ()) + extra
    fitted, ll = kx.em(start, jnp.asarray(y), jnp.asarray(mask), iterations=60, fields=fields)
    assert _monotone(ll) and ll[-1] > ll[0] + 1.0
    if prior:
        # With a proper prior, the value is the ordinary log-likelihood of the NumPy filter.
        np.testing.assert_allclose(ll[-1], ref.kalman_filter(to_dict(fitted), y, mask).log_likelihood, rtol=1e-10)


def test_time_varying_fixed_fields_tolerance_stop_and_errors():
    rng = np.random.default_rng(8)
    T = 40
    md = ref.random_model(rng, 2, 2, T, time_varying=True, full_R=False, prior=True, offsets=False)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    model = to_model(md)
    # A, C, R vary in time and stay fixed; Q (time-invariant start) is learned.
    start = model.replace(Q=jnp.eye(2))
    fitted, ll = kx.em(start, jnp.asarray(y), jnp.asarray(mask), iterations=200, fields=("Q",), tol=1e-4)
    assert _monotone(ll) and len(ll) < 201  # stopped by tol
    for f in ("A", "C", "R", "x0_mean", "x0_cov"):
        np.testing.assert_array_equal(getattr(fitted, f), getattr(start, f))
    with pytest.raises(ValueError, match="time-varying"):
        kx.em(model, jnp.asarray(y), jnp.asarray(mask), iterations=1, fields=("A",))
    with pytest.raises(ValueError, match="time-invariant Q"):
        kx.em(model.replace(A=jnp.eye(2)), jnp.asarray(y), jnp.asarray(mask), iterations=1, fields=("A",))
    with pytest.raises(ValueError, match="flat prior"):
        kx.em(model.replace(x0_mean=None, x0_cov=None), jnp.asarray(y), iterations=1, fields=("x0_mean",))
    with pytest.raises(ValueError, match="unknown field"):
        kx.em(model, jnp.asarray(y), iterations=1, fixed=("Z",))


def test_float32_keeps_dtype_and_climbs():
    rng = np.random.default_rng(5)
    md = ref.random_model(rng, 2, 3, 1, time_varying=False, full_R=True, prior=True, offsets=True)
    y, mask = ref.random_data(rng, md, 60, missing=0.3)
    start = to_model(md, dtype=np.float32).replace(A=0.5 * jnp.eye(2, dtype=jnp.float32))
    fitted, ll = kx.em(start, jnp.asarray(y, jnp.float32), jnp.asarray(mask), iterations=20)
    assert all(getattr(fitted, f).dtype == jnp.float32 for f in ("A", "C", "Q", "R", "b", "d", "x0_mean"))
    # float32 rounding of a log-likelihood of size ~150 is ~1e-5; allow 1e-5 relative.
    assert np.all(np.diff(ll) >= -1e-5 * np.abs(ll[1:])) and ll[-1] > ll[0] + 10
