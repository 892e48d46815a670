"""The covariance-form backend (``method="covariance"``) against independent references.

References: the plain NumPy Kalman filter and RTS smoother of
``tests/reference.py`` (Särkkä (2013), Bayesian Filtering and Smoothing,
Algs 4.3 and 8.2), the dense normal equations and dense Gaussian density of
the same file, central finite differences, and the normal-equation backend
"scan" (a different algorithm: block Cholesky with the implicit-function
gradient). The float32 checks use the tracking sweep's high-rate
constant-acceleration cases, where the normal equations fail even in double.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import float32_sweep as fs
import kalmax as kx
import reference as ref
from helpers import to_model
from kalmax._src.backends.covariance_form import adjoint, forward, logdet

M = "covariance"


def _problem(seed, n=3, p=2, T=9, time_varying=True, full_R=True, missing=0.3):
    rng = np.random.default_rng(seed)
    md = ref.random_model(rng, n, p, T, time_varying=time_varying, full_R=full_R)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    return md, y, mask


@pytest.mark.parametrize("time_varying", [True, False])
def test_moments_and_likelihood_match_the_reference_filter(time_varying):
    md, y, mask = _problem(1, time_varying=time_varying)
    model = to_model(md)
    out = kx.smooth(model, y, mask, covariances=True, method=M)
    ms, Ps, cross = ref.rts_smoother(md, np.where(mask, y, 0.0), mask, return_cross=True)
    np.testing.assert_allclose(out.states, ms, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(out.state_cov, Ps, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(out.state_cross_cov, cross, rtol=1e-10, atol=1e-10)
    ll = kx.log_likelihood(model, y, mask, method=M)
    np.testing.assert_allclose(ll, ref.dense_log_likelihood(md, np.where(mask, y, 0.0), mask), rtol=1e-10)


def test_logdet_and_adjoint_solve_match_dense_normal_equations():
    """log|H| from the innovations and H⁻¹v from the stored gains, against a
    dense H (reference.dense_normal_equations) and NumPy's slogdet/solve."""
    md, y, mask = _problem(2, n=3, p=2, T=7)
    y0 = np.where(mask, y, 0.0)
    H, g = ref.dense_normal_equations(md, y0, mask)
    model = to_model(md)
    x, factor = forward(model, jnp.asarray(y0), jnp.asarray(mask, jnp.float64))
    np.testing.assert_allclose(np.asarray(x).ravel(), np.linalg.solve(H, g), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(logdet(factor), np.linalg.slogdet(H)[1], rtol=1e-11)
    v = np.random.default_rng(3).standard_normal(x.shape)
    u = adjoint(factor, jnp.asarray(v))
    np.testing.assert_allclose(np.asarray(u).ravel(), np.linalg.solve(H, v.ravel()), rtol=1e-9, atol=1e-10)


def test_one_step_and_everything_missing():
    md, y, mask = _problem(4, T=1)
    np.testing.assert_allclose(kx.smooth(to_model(md), y, mask, method=M).states,
                               ref.rts_smoother(md, np.where(mask, y, 0.0), mask)[0], rtol=1e-12)
    md, y, mask = _problem(5, T=6, missing=0.0)
    mask[:] = False
    ms, _ = ref.rts_smoother(md, np.zeros_like(y), mask)  # the prior propagated
    np.testing.assert_allclose(kx.smooth(to_model(md), y, mask, method=M).states, ms, rtol=1e-12, atol=1e-12)


def test_gradients_match_the_normal_equation_backend_and_differences():
    """d/dθ of a loss through smooth and of log_likelihood: the covariance
    form's reverse mode against "scan"'s implicit-function gradient (another
    algorithm) on every model field, and against central differences."""
    md, y, mask = _problem(6, n=2, p=2, T=8)
    model = to_model(md)
    v = jnp.asarray(np.random.default_rng(7).standard_normal((8, 2)))

    def loss(m, yy, method):
        return jnp.sum(kx.smooth(m, yy, mask, method=method).states * v) + kx.log_likelihood(m, yy, mask,
                                                                                            method=method)

    # Compiled once per method: run op by op, the covariance form's reverse
    # pass costs over a minute of dispatch on this tiny problem. The same
    # program gives the loss values of the differences below (a model of the
    # same shapes): no second compilation of the covariance form.
    value_and_grad = jax.jit(jax.value_and_grad(loss, argnums=(0, 1)), static_argnums=2)
    _, g_cov = value_and_grad(model, jnp.asarray(y), M)
    _, g_scan = value_and_grad(model, jnp.asarray(y), "scan")
    for a, b in zip(jax.tree_util.tree_leaves(g_cov), jax.tree_util.tree_leaves(g_scan)):
        np.testing.assert_allclose(np.nan_to_num(a), np.nan_to_num(b), rtol=1e-8, atol=1e-9)
    # Central differences along the log-scale of Q (an independent check of the pair).
    f = lambda s: float(value_and_grad(model.replace(Q=model.Q * np.exp(s)), jnp.asarray(y), M)[0])  # noqa: E731
    h = 1e-5
    fd = (f(h) - f(-h)) / (2 * h)
    np.testing.assert_allclose(float(jnp.sum(g_cov[0].Q * model.Q)), fd, rtol=1e-6)


def test_flat_prior_is_nan():
    md, y, mask = _problem(8)
    model = to_model(md, prior=False)
    assert np.all(np.isnan(kx.smooth(model, y, mask, method=M).states))
    assert np.isnan(kx.log_likelihood(model, y, mask, method=M))


def test_jit_and_vmap_compose():
    md, y, mask = _problem(9, time_varying=False, missing=0.0)
    model = to_model(md)
    ys = jnp.stack([jnp.asarray(y), 2 * jnp.asarray(y)])
    f = jax.jit(jax.vmap(lambda yy: kx.smooth(model, yy, method=M).states))
    out = f(ys)
    for k in range(2):
        np.testing.assert_allclose(out[k], ref.rts_smoother(md, np.asarray(ys[k]))[0], rtol=1e-10, atol=1e-10)


# ---------------------------------------------------------------------------
# where the normal equations cannot go: high-rate constant acceleration


def _high_rate_cases():
    """Cases of the tracking sweep (tests/float32_sweep.py, seed 7) where
    the compiled kernel returns NaN even in float64 (κ(H) beyond double)
    while a float32 covariance-form filter is within 1e-3: constant
    acceleration sampled every 1–20 ms."""
    return [
        fs.Case("ca", 1, 1e-2, False, 1e-7, 1.0, 1.0, 0.1, 100, 5),
        fs.Case("ca", 2, 2.1e-3, False, 9e-2, 0.2, 3e-2, 0.38, 100, 11),
        fs.Case("ca", 3, 1.3e-3, False, 2e-1, 2e-2, 10.0, 0.02, 100, 12),
    ]


@pytest.mark.parametrize("case", _high_rate_cases(), ids=lambda c: c.label())
def test_float32_where_the_normal_equations_fail(case):
    b = fs.build(case)
    md = b["md"]
    args = [md[k][None] for k in ("A", "Q", "C", "R", "m0", "P0")]
    x64, _ = fs.kf_rts(*args, b["y"][None], b["mask"][None], np.float64)
    x32_textbook, _ = fs.kf_rts(*args, b["y"][None], b["mask"][None], np.float32)
    assert fs.rel_err(x32_textbook[0], x64[0]) <= 1e-3  # the premise: the float32 filter is fine
    model = fs.kalmax_model(md, np.float32)
    y = b["y"].astype(np.float32)
    x = np.asarray(kx.smooth(model, y, b["mask"], method=M).states)
    assert x.dtype == np.float32
    assert fs.rel_err(x, x64[0]) <= 1e-3, fs.rel_err(x, x64[0])
    # validate on the normal-equation path says NaN and points here.
    x_ne = np.asarray(kx.smooth(model, y, b["mask"], method="scan").states)
    if np.all(np.isnan(x_ne)):
        with pytest.raises(ValueError, match=r"method='covariance'"):
            kx.validate(model, y, b["mask"], method="scan")
    kx.validate(model, y, b["mask"], method=M)  # passes: the filter's factors are fine
