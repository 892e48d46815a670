"""The compiled log-likelihood (value and gradient) and band of H⁻¹ against independent routes.

- The kernel's log-likelihood value against the prediction-error decomposition
  of a textbook Kalman filter in plain NumPy (tests/reference.py, sources
  there: Harvey 1989, Ch. 3, chapter from memory), and its gradient against central finite differences of that filter.
- The kernel's gradient against the pure-JAX route (``method="scan"``: band of
  H⁻¹ by the JAX selected inversion, then autodiff of per-step terms), for
  every model field and y, time-invariant and time-varying fields, with and
  without a prior.
- The kernel's band Σ_tt, Σ_{t+1,t} against the blocks of a dense inverse of H.

Tolerances are common practice: 1e-8 relative between two float64 routes
that round differently, 1e-5 against finite differences with step 1e-6.
"""

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src.backends import cpu as cpu_backend
from kalmax._src.checks import canonicalize
from kalmax._src.normal_equations import assemble

from helpers import to_model
from reference import kalman_filter, random_data, random_model

def kalman_log_likelihood(md, y, mask):
    return kalman_filter(md, y, mask).log_likelihood


pytestmark = pytest.mark.skipif(not cpu_backend.available(), reason="compiled kernel not built")

FIELDS = ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov")


def _problem(rng, *, n=3, p=2, T=9, time_varying=False, prior=True, offsets=True):
    md = random_model(rng, n, p, T, time_varying=time_varying, full_R=True, prior=prior, offsets=offsets)
    y, mask = random_data(rng, md, T, missing=0.3, n_empty=2)
    return md, to_model(md), y, mask


_VG = {m: jax.jit(jax.value_and_grad(lambda model, y, mask, m=m: kx.log_likelihood(model, y, mask, method=m),
                                      argnums=(0, 1))) for m in ("cpu", "scan")}


@pytest.mark.parametrize("time_varying", [False, True])
@pytest.mark.parametrize("prior", [True, False])
def test_kernel_gradient_matches_the_portable_route(rng, time_varying, prior):
    _, model, y, mask = _problem(rng, time_varying=time_varying, prior=prior)
    (v_k, (g_k, gy_k)), (v_s, (g_s, gy_s)) = (_VG[m](model, jnp.asarray(y), jnp.asarray(mask)) for m in ("cpu", "scan"))
    np.testing.assert_allclose(float(v_k), float(v_s), rtol=1e-10)
    for name in FIELDS:
        a, b = getattr(g_k, name), getattr(g_s, name)
        assert (a is None) == (b is None), name
        if a is not None:
            scale = max(1.0, float(np.max(np.abs(b))))
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-8, atol=1e-9 * scale, err_msg=name)
    np.testing.assert_allclose(np.asarray(gy_k), np.asarray(gy_s), rtol=1e-8, atol=1e-10)


def test_kernel_value_and_gradient_match_a_numpy_kalman_filter(rng):
    md, model, y, mask = _problem(rng, time_varying=False, prior=True)
    val, (g, _) = _VG["cpu"](model, jnp.asarray(y), jnp.asarray(mask))
    np.testing.assert_allclose(float(val), kalman_log_likelihood(md, y, mask), rtol=1e-10)
    # Finite differences of the NumPy filter for a few entries of Q, R and A.
    h = 1e-6
    for field, idx in (("Q", (0, 1)), ("R", (1, 1)), ("A", (2, 0)), ("C", (0, 2))):
        plus, minus = dict(md), dict(md)
        for sign, m in ((1, plus), (-1, minus)):
            arr = np.array(md[field], dtype=float)
            arr[idx] += sign * h
            if field in ("Q", "R") and idx[0] != idx[1]:
                arr[idx[::-1]] += sign * h  # a symmetric perturbation: the gradient is read as symmetric
            m[field] = arr
        fd = (kalman_log_likelihood(plus, y, mask) - kalman_log_likelihood(minus, y, mask)) / (2 * h)
        got = float(np.asarray(getattr(g, field))[idx])
        if field in ("Q", "R") and idx[0] != idx[1]:
            got *= 2
        np.testing.assert_allclose(got, fd, rtol=1e-5, atol=1e-7, err_msg=field)


@pytest.mark.parametrize("time_varying", [False, True])
def test_kernel_band_matches_a_dense_inverse(rng, time_varying):
    _, model, y, mask = _problem(rng, time_varying=time_varying)
    model, yc, maskc, _, dtype = canonicalize(model, jnp.asarray(y), jnp.asarray(mask))
    w = maskc.astype(dtype)
    _, factor = cpu_backend.forward(model, yc, w)
    diag, sub = jax.jit(cpu_backend.band_inverse)(factor)
    system = assemble(model, yc, w)
    T, n = system.rhs.shape
    H = np.zeros((T * n, T * n))
    subs = np.broadcast_to(np.asarray(system.sub), (T - 1, n, n))
    for t in range(T):
        H[t * n:(t + 1) * n, t * n:(t + 1) * n] = np.asarray(system.diag[t])
        if t + 1 < T:
            H[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n] = subs[t]
            H[t * n:(t + 1) * n, (t + 1) * n:(t + 2) * n] = subs[t].T
    S = np.linalg.inv(H)
    for t in range(T):
        np.testing.assert_allclose(np.asarray(diag[t]), S[t * n:(t + 1) * n, t * n:(t + 1) * n], rtol=1e-9, atol=1e-12)
        if t + 1 < T:
            np.testing.assert_allclose(np.asarray(sub[t]), S[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n],
                                       rtol=1e-9, atol=1e-12)


def test_kernel_covariances_and_their_gradient_match_the_portable_route(rng):
    _, model, y, mask = _problem(rng)

    def loss(model, method):
        out = kx.smooth(model, jnp.asarray(y), jnp.asarray(mask), covariances=True, method=method)
        return jnp.sum(out.state_cov ** 2) + jnp.sum(jnp.sin(out.state_cross_cov))

    (v_k, g_k), (v_s, g_s) = (jax.jit(jax.value_and_grad(loss), static_argnums=1)(model, m) for m in ("cpu", "scan"))
    np.testing.assert_allclose(float(v_k), float(v_s), rtol=1e-10)
    for name in ("A", "C", "Q", "R", "x0_cov"):
        np.testing.assert_allclose(np.asarray(getattr(g_k, name)), np.asarray(getattr(g_s, name)), rtol=1e-7,
                                   atol=1e-10, err_msg=name)


def test_kernel_likelihood_is_nan_when_the_states_are_not_identified():
    # Flat prior and nothing observed: H is singular, so value and gradient are NaN.
    m = kx.StateSpace(A=jnp.eye(2), C=jnp.eye(2), Q=jnp.eye(2), R=jnp.eye(2))
    y = jnp.full((5, 2), jnp.nan)
    v, (g, gy) = _VG["cpu"](m, y, jnp.zeros((5, 2), bool))
    assert np.isnan(float(v)) and np.all(np.isnan(np.asarray(g.Q)))


def test_kernel_likelihood_vmaps_and_takes_second_derivatives(rng):
    _, model, y, mask = _problem(rng, n=2, p=2, T=6, offsets=False)
    ys = jnp.stack([jnp.asarray(y), jnp.asarray(y) + 0.3])
    f = lambda s, m_: kx.log_likelihood(dataclasses.replace(model, Q=model.Q * s), ys[0], jnp.asarray(mask),  # noqa: E731
                                        method=m_)
    vm = jax.vmap(lambda yy: kx.log_likelihood(model, yy, jnp.asarray(mask), method="cpu"))(ys)
    vs = jnp.stack([kx.log_likelihood(model, yy, jnp.asarray(mask), method="scan") for yy in ys])
    np.testing.assert_allclose(np.asarray(vm), np.asarray(vs), rtol=1e-10)
    h_k = jax.jit(jax.hessian(lambda s: f(s, "cpu")))(1.3)
    h_s = jax.jit(jax.hessian(lambda s: f(s, "scan")))(1.3)
    np.testing.assert_allclose(float(h_k), float(h_s), rtol=1e-7)


@pytest.mark.parametrize("time_varying", [False, True])
def test_one_trajectory_split_over_threads_matches_one_thread_and_the_portable_route(rng, time_varying,
                                                                                     monkeypatch):
    """A single long trajectory's likelihood pass split over time between
    threads (likelihood.h, loglik_one's parts: each part restarts the
    selected-inversion recursion from Σ at its boundary) equals the one-thread
    pass up to the order of the sums, and the pure-JAX route. T is above the
    2 × 8,192 steps per part that the kernel asks for; 2 and 3 threads are
    forced so that the split happens on any machine (3 parts: boundaries that
    do not divide T evenly). The prior and the time-invariant fields exercise
    the per-part accumulators and the part that holds t = 0."""
    T = 30_001
    _, model, y, mask = _problem(rng, n=2, p=2, T=T, time_varying=time_varying, prior=True)
    y, mask = jnp.asarray(y), jnp.asarray(mask)
    runs = {}
    for threads in ("1", "2", "3"):
        monkeypatch.setenv("KALMAX_CPU_THREADS", threads)
        v, (g, gy) = _VG["cpu"](model, y, mask)  # the handler reads the thread cap on every call
        runs[threads] = [np.asarray(v)] + [np.asarray(a) for a in jax.tree_util.tree_leaves((g, gy))]
    monkeypatch.delenv("KALMAX_CPU_THREADS")
    v_s, (g_s, gy_s) = _VG["scan"](model, y, mask)
    ref = [np.asarray(v_s)] + [np.asarray(a) for a in jax.tree_util.tree_leaves((g_s, gy_s))]
    for threads in ("2", "3"):
        for a, b, r in zip(runs["1"], runs[threads], ref):
            scale = max(1.0, float(np.max(np.abs(r))))
            np.testing.assert_allclose(b, a, rtol=1e-11, atol=1e-12 * scale)
            np.testing.assert_allclose(b, r, rtol=1e-8, atol=1e-9 * scale)


@pytest.mark.parametrize("p", [2, 10])  # 2: mask patterns in the kernel's 2^p table; 10: beyond it (hash map)
@pytest.mark.parametrize("diagonal_q", [False, True])
@pytest.mark.parametrize("scale", [1.0, 1e-20])
def test_kernel_value_with_time_varying_q_and_missing_data_matches_a_numpy_kalman_filter(rng, p, diagonal_q,
                                                                                          scale):
    """Per-step Q (dense or diagonal: the log-determinants the kernel gathers as products), fixed C and
    R (memoised mask patterns), 30 % missing: the value against the textbook filter's prediction-error
    decomposition (tests/reference.py, Harvey 1989, Ch. 3, from memory). scale 1e-20 multiplies every
    covariance (and y by 1e-10): the same conditioning, but the product of the factor's 60·3 diagonal
    entries (~1e10 each) is far outside double range, so only a product kept apart from its exponent
    can give the sum of their logs."""
    n, T = 3, 60
    md = random_model(rng, n, p, T, time_varying=True, full_R=True, prior=True, offsets=True)
    md["C"], md["R"], md["d"] = md["C"][0], md["R"][0], md["d"][0]
    if diagonal_q:
        md["Q"] = np.stack([np.diag(np.diag(q)) for q in md["Q"]])
    y, mask = random_data(rng, md, T, missing=0.3, n_empty=3)
    root = np.sqrt(scale)
    md = dict(md, Q=md["Q"] * scale, R=md["R"] * scale, P0=md["P0"] * scale, b=md["b"] * root,
              d=md["d"] * root, m0=md["m0"] * root)
    y = y * root
    model = to_model(md)
    if diagonal_q:
        model = model.replace(Q=kx.DiagonalNoise(jnp.asarray(np.diagonal(md["Q"], axis1=-2, axis2=-1))))
    ref = kalman_log_likelihood(md, y, mask)
    for dtype, rtol in ((np.float64, 1e-10), (np.float32, 1e-5)):
        if dtype == np.float32 and scale != 1.0:
            continue  # float32 covers the ordinary scale only (1e-20 squared is below its range)
        m = jax.tree_util.tree_map(lambda a: jnp.asarray(a, dtype), model)
        val = kx.log_likelihood(m, jnp.asarray(np.nan_to_num(y), dtype), jnp.asarray(mask), method="cpu")
        assert val.dtype == dtype
        np.testing.assert_allclose(float(val), ref, rtol=rtol)
