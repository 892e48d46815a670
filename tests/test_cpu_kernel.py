"""The compiled CPU kernel (method="cpu") against the pure-JAX path (method="scan").

The scan path is the oracle: both solve the same normal equations, so states
and gradients must agree to rounding. The fused gradient kernel is also
checked against the JAX autodiff of the stationarity pairing fed with the
kernel's own factor, and one case against the textbook Kalman filter + RTS
smoother of tests/reference.py (Särkkä, "Bayesian Filtering and Smoothing",
2013, §4.3 and §8.2).

Tolerances are common practice: float64 comparisons allow 1e-9..1e-7 relative
(the two paths round differently; gradients go through one more solve), a few
orders above the rounding of these well-conditioned random problems; float32
is checked against the float64 oracle at 2e-4 (states) and 2e-3 (gradients).
"""

import os
import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src import blocktri
from kalmax._src.backends import cpu as cpu_backend, registry
from kalmax._src.backends.scan import SCAN
from kalmax._src.checks import canonicalize

from helpers import to_model
from reference import random_data, random_model, rts_smoother

pytestmark = pytest.mark.skipif(
    bool(os.environ.get("KALMAX_NO_KERNEL")), reason="kernel build disabled by KALMAX_NO_KERNEL"
)


FIELDS = ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov")


def _loss(method):
    # Nonlinear in the states so that the cotangent differs from step to step.
    def loss(model, y):
        x = kx.smooth(model, y, method=method).states
        return jnp.sum(jnp.sin(x) * jnp.arange(1, x.shape[-1] + 1)) + 0.1 * jnp.sum(x**2)

    return loss


_VG = {}
_states = jax.jit(lambda model, y, method: kx.smooth(model, y, method=method).states, static_argnums=2)


def _value_and_grads(model, y, method):
    # One jitted function per method: a single compilation per problem shape.
    if method not in _VG:
        _VG[method] = jax.jit(jax.value_and_grad(_loss(method), argnums=(0, 1)))
    val, (gm, gy) = _VG[method](model, jnp.asarray(y))
    return val, gm, gy


def _assert_tree_close(a, b, rtol, atol, what):
    for name in FIELDS:
        fa, fb = getattr(a, name), getattr(b, name)
        assert (fa is None) == (fb is None), f"{what}.{name}: one side is None"
        if fa is None:
            continue
        assert np.shape(fa) == np.shape(fb), f"{what}.{name}: shapes differ"
        if np.size(fb) == 0:
            continue
        scale = max(1.0, float(np.max(np.abs(np.asarray(fb)))))
        np.testing.assert_allclose(np.asarray(fa), np.asarray(fb), rtol=rtol, atol=atol * scale, err_msg=f"{what}.{name}")


def _problem(rng, *, n=3, p=2, T=7, time_varying=True, prior=True, offsets=True, full_R=True):
    md = random_model(rng, n, p, T, time_varying=time_varying, full_R=full_R, prior=prior, offsets=offsets)
    y, mask = random_data(rng, md, T, missing=0.3, n_empty=2)
    return to_model(md), y, mask


# ---------------------------------------------------------------------------
# registration and dispatch


def _api_version(include_dir):
    text = open(os.path.join(include_dir, "xla", "ffi", "api", "c_api.h")).read()
    major = int(re.search(r"#define XLA_FFI_API_MAJOR (\d+)", text).group(1))
    minor = int(re.search(r"#define XLA_FFI_API_MINOR (\d+)", text).group(1))
    return major, minor


def test_kernel_registered_against_installed_jaxlib():
    assert cpu_backend.LOAD_ERROR is None, cpu_backend.LOAD_ERROR
    assert cpu_backend.available() and cpu_backend.library_path() is not None
    # The vendored headers the kernel is built against must not be newer than
    # the installed jaxlib's FFI API (a newer handler is refused at registration).
    vendored = os.path.join(os.path.dirname(os.path.dirname(cpu_backend.__file__)), "cpu", "include")
    built, installed = _api_version(vendored), _api_version(jax.ffi.include_dir())
    assert built[0] == installed[0] and built[1] <= installed[1], (built, installed)
    # Registration went through at import (LOAD_ERROR is None); every other
    # test here then calls the registered targets.
    assert "cpu" in registry.available()


def test_auto_dispatches_to_kernel_on_cpu():
    assert jax.default_backend() == "cpu"
    assert registry.resolve_method("auto") == "cpu"
    assert registry.resolve_method("scan") == "scan"


def test_missing_kernel_gives_clear_error(monkeypatch):
    monkeypatch.setitem(registry._TABLE, "cpu", registry.Unavailable("test: library removed"))
    assert registry.resolve_method("auto") == "scan"
    assert registry.unavailable() == {"cpu": "test: library removed"}
    with pytest.raises(ValueError, match="method='cpu' is not available here: test: library removed"):
        registry.resolve_method("cpu")


# ---------------------------------------------------------------------------
# values and gradients against the pure-JAX path (float64)


@pytest.mark.parametrize(
    "time_varying,prior,offsets",
    [(True, True, True), (True, False, False), (False, True, False), (False, False, True)],
)
def test_values_and_gradients_match_scan(rng, time_varying, prior, offsets, temporary_backend):
    model, y, mask = _problem(rng, time_varying=time_varying, prior=prior, offsets=offsets)
    assert (~mask).all(axis=1).any(), "want at least one fully missing step"
    xs = _states(model, y, "scan")
    xc = _states(model, y, "cpu")
    np.testing.assert_allclose(xc, xs, rtol=1e-9, atol=1e-9)

    vs, gs, ys = _value_and_grads(model, y, "scan")
    vc, gc, yc = _value_and_grads(model, y, "cpu")
    np.testing.assert_allclose(vc, vs, rtol=1e-9)
    _assert_tree_close(gc, gs, rtol=1e-7, atol=1e-9, what="grad")
    np.testing.assert_allclose(yc, ys, rtol=1e-7, atol=1e-9)
    # The gradient w.r.t. y vanishes at missing entries (they never enter).
    assert np.all(np.asarray(yc)[~mask] == 0)

    # Fused gradient kernel vs JAX autodiff of the pairing on the same factor.
    temporary_backend("cpu-jax-gradients", cpu_backend.CPU_JAX_GRADIENTS)
    _, gj, yj = _value_and_grads(model, y, "cpu-jax-gradients")
    _assert_tree_close(gc, gj, rtol=1e-9, atol=1e-11, what="fused-vs-jax")
    np.testing.assert_allclose(yc, yj, rtol=1e-9, atol=1e-11)


def test_states_match_textbook_smoother(rng):
    md = random_model(rng, 3, 2, 9, time_varying=True, full_R=True, prior=True, offsets=True)
    y, mask = random_data(rng, md, 9, missing=0.3)
    ref_states, _ = rts_smoother(md, y, mask)
    x = kx.smooth(to_model(md), y, method="cpu").states
    np.testing.assert_allclose(x, ref_states, rtol=1e-8, atol=1e-9)


def test_adjoint_solve_and_log_likelihood_match(rng):
    model, y, mask = _problem(rng, time_varying=False, prior=True, offsets=True)
    m, yy, msk, _, dt = canonicalize(model, y, None)
    w = msk.astype(dt)
    _, fac_c = cpu_backend.forward(m, yy, w)
    _, fac_s = SCAN.forward(m, yy, w)
    v = jnp.asarray(rng.standard_normal(yy.shape[:1] + (m.A.shape[-1],)))
    np.testing.assert_allclose(cpu_backend.adjoint(fac_c, v), blocktri.solve(fac_s, v), rtol=1e-9, atol=1e-10)
    # The compact factor (no stored M) expands to the scan path's factor.
    full = cpu_backend.block_factor(fac_c)
    np.testing.assert_allclose(full.L, fac_s.L, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(full.M, fac_s.M, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(cpu_backend.logdet(fac_c), blocktri.logdet(fac_s), rtol=1e-11)

    ll = jax.jit(jax.value_and_grad(lambda mm, meth: kx.log_likelihood(mm, y, method=meth)), static_argnums=1)
    vc, gc = ll(model, "cpu")
    vs, gs = ll(model, "scan")
    np.testing.assert_allclose(vc, vs, rtol=1e-10)
    _assert_tree_close(gc, gs, rtol=1e-7, atol=1e-9, what="loglik-grad")


def test_diagonal_R_and_time_varying_measurement_only(rng):
    # Mixed: A, Q fixed (compact factor) while C, R vary (no pattern cache).
    md = random_model(rng, 2, 3, 6, time_varying=True, full_R=False, prior=True, offsets=True)
    md["A"], md["Q"], md["b"] = md["A"][0], md["Q"][0], md["b"][0]
    y, mask = random_data(rng, md, 6, missing=0.3)
    model = to_model(md)
    _, gs, ys = _value_and_grads(model, y, "scan")
    _, gc, yc = _value_and_grads(model, y, "cpu")
    _assert_tree_close(gc, gs, rtol=1e-7, atol=1e-9, what="grad")
    np.testing.assert_allclose(yc, ys, rtol=1e-7, atol=1e-9)


def test_general_size_fallback(rng):
    # n = 7 has no fixed-size specialisation: the general-size code runs.
    model, y, _ = _problem(rng, n=7, p=9, T=4, time_varying=False)
    _, gs, ys = _value_and_grads(model, y, "scan")
    _, gc, yc = _value_and_grads(model, y, "cpu")
    _assert_tree_close(gc, gs, rtol=1e-7, atol=1e-9, what="grad")
    np.testing.assert_allclose(yc, ys, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("T", [1, 2])
def test_short_series(rng, T):
    model, y, _ = _problem(rng, T=T, time_varying=True, prior=True)
    y = np.where(np.isnan(y), 0.3, y)  # keep the states identified
    np.testing.assert_allclose(_states(model, y, "cpu"), _states(model, y, "scan"), rtol=1e-10, atol=1e-12)
    _, gs, ys = _value_and_grads(model, y, "scan")
    _, gc, yc = _value_and_grads(model, y, "cpu")
    _assert_tree_close(gc, gs, rtol=1e-8, atol=1e-10, what="grad")
    np.testing.assert_allclose(yc, ys, rtol=1e-8, atol=1e-10)


# ---------------------------------------------------------------------------
# float32


def test_float32_matches_float64_oracle(rng):
    model, y, _ = _problem(rng, time_varying=True, prior=True, offsets=True)
    m32 = jax.tree_util.tree_map(lambda a: jnp.asarray(a, jnp.float32), model)
    y32 = np.asarray(y, np.float32)
    x32 = kx.smooth(m32, y32, method="cpu").states
    assert x32.dtype == jnp.float32
    np.testing.assert_allclose(x32, kx.smooth(model, y, method="scan").states, rtol=2e-4, atol=2e-4)
    _, g32, y32g = _value_and_grads(m32, y32, "cpu")
    _, g64, y64g = _value_and_grads(model, y, "scan")
    assert g32.A.dtype == jnp.float32 and y32g.dtype == jnp.float32
    _assert_tree_close(g32, g64, rtol=2e-3, atol=2e-3, what="grad32")
    np.testing.assert_allclose(y32g, y64g, rtol=2e-3, atol=2e-3)


# ---------------------------------------------------------------------------
# vmap: the kernel loops over batch axes itself


def test_vmap_and_vmap_of_grad(rng):
    model, y, _ = _problem(rng, time_varying=False, prior=True, offsets=True)
    B = 3
    ys = np.stack([y + 0.1 * k for k in range(B)])  # NaN entries stay NaN
    models = jax.tree_util.tree_map(lambda a: jnp.stack([a * (1 + 0.02 * k) for k in range(B)]), model)

    def states(m, yy, meth):
        return kx.smooth(m, yy, method=meth).states

    # Batched models with a shared y: the kernel broadcasts y over the batch.
    xs = jax.vmap(lambda m: states(m, y, "scan"))(models)
    xc = jax.jit(jax.vmap(lambda m: states(m, y, "cpu")))(models)
    np.testing.assert_allclose(xc, xs, rtol=1e-9, atol=1e-10)

    # vmap of grad, with a model shared across the batch and with batched models.
    for in_axes, m_arg in [((None, 0), model), ((0, 0), models)]:
        gs = jax.jit(jax.vmap(jax.grad(_loss("scan"), argnums=(0, 1)), in_axes=in_axes))(m_arg, ys)
        gc = jax.jit(jax.vmap(jax.grad(_loss("cpu"), argnums=(0, 1)), in_axes=in_axes))(m_arg, ys)
        _assert_tree_close(gc[0], gs[0], rtol=1e-7, atol=1e-9, what="vmap-grad")
        np.testing.assert_allclose(gc[1], gs[1], rtol=1e-7, atol=1e-9)

    # Two nested vmaps: two leading batch axes reach the kernel.
    y4 = np.stack([ys[:2], ys[1:]])  # (2, 2, T, p)
    x4 = jax.jit(jax.vmap(jax.vmap(lambda yy: states(model, yy, "cpu"))))(y4)
    np.testing.assert_allclose(x4[1, 0], states(model, ys[1], "scan"), rtol=1e-9, atol=1e-10)


# ---------------------------------------------------------------------------
# failures: NaN, never a crash


def test_unidentified_states_give_nan(rng):
    model, y, _ = _problem(rng, T=5, time_varying=False, prior=False, offsets=False)
    y_all_missing = np.full_like(y, np.nan)
    x = kx.smooth(model, y_all_missing, method="cpu").states
    assert np.all(np.isnan(x))
    g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y_all_missing, method="cpu").states))(model)
    assert np.all(np.isnan(np.asarray(g.A)))


def test_non_positive_definite_covariance_gives_nan(rng):
    model, y, _ = _problem(rng, T=5, time_varying=False, prior=True, offsets=False)
    bad = model.replace(Q=-np.eye(model.A.shape[-1]))
    assert np.all(np.isnan(kx.smooth(bad, y, method="cpu").states))
    bad_r = model.replace(R=-np.eye(model.C.shape[-2]))
    assert np.all(np.isnan(kx.smooth(bad_r, y, method="cpu").states))
    g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y, method="cpu").states))(bad)
    assert np.all(np.isnan(np.asarray(g.C)))


def test_kernel_rejects_inconsistent_shapes_through_the_ffi_error_channel(rng):
    # Bypasses the Python shape checks: the kernel's own validation answers.
    model, y, mask = _problem(rng, T=5, time_varying=False)
    m, yy, msk, _, dt = canonicalize(model, y, None)
    bad = m.replace(C=jnp.zeros((m.C.shape[0] + 1, m.C.shape[1]), dt))
    with pytest.raises(Exception, match="kalmax_cpu: C has shape"):
        jax.block_until_ready(cpu_backend.forward(bad, yy, msk.astype(dt)))


def test_second_order_derivatives_fall_back_to_jax_maths(rng):
    # jax.hessian (forward-over-reverse) and reverse-over-reverse differentiate
    # the kernel calls through their pure-JAX equivalents.
    model, y, _ = _problem(rng, T=5, time_varying=False, prior=True, offsets=True)

    def ll(scale, method):
        return kx.log_likelihood(model.replace(Q=model.Q * scale[0], R=model.R * scale[1]), y, method=method)

    def sm(scale, method):
        return jnp.sum(kx.smooth(model.replace(Q=model.Q * scale[0], R=model.R * scale[1]), y, method=method).states ** 3)

    s0 = jnp.array([1.1, 0.9])
    hess = jax.jit(jax.hessian(ll), static_argnums=1)
    np.testing.assert_allclose(hess(s0, "cpu"), hess(s0, "scan"), rtol=1e-8, atol=1e-10)
    rev2 = jax.jit(jax.jacrev(jax.grad(sm)), static_argnums=1)
    np.testing.assert_allclose(rev2(s0, "cpu"), rev2(s0, "scan"), rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("dtype", [np.float64, np.float32], ids=["float64", "float32"])
def test_threaded_batches_equal_one_thread(rng, dtype, monkeypatch):
    """vmapped batches large enough to be split over threads (kernel.cc,
    for_batches) give bit-identical values and gradients to one thread: each
    trajectory is still computed by one thread with the same operation order.
    Three threads are forced so that the split happens on any machine; the
    references are the per-trajectory scan path (independent code)."""
    B, T = 5, 4000  # 20,000 steps: above the 2 × 8,192 threshold for threading
    model = to_model(random_model(rng, 2, 2, T, time_varying=False, full_R=True, prior=True, offsets=True))
    model = jax.tree_util.tree_map(lambda a: np.asarray(a, dtype), model)
    ys = rng.standard_normal((B, T, 2)).astype(dtype)
    masks = rng.random((B, T, 2)) > 0.2

    def loss(m, method):
        states = jax.vmap(lambda y, k: kx.smooth(m, y, k, method=method).states)(ys, masks)
        return jnp.sum(jnp.sin(states)), states

    runs = {}
    for threads in ("1", "3"):
        monkeypatch.setenv("KALMAX_CPU_THREADS", threads)
        f = jax.jit(jax.value_and_grad(lambda m: loss(m, "cpu"), has_aux=True))  # fresh trace each time
        (val, states), g = f(model)
        runs[threads] = (np.asarray(states), jax.tree_util.tree_leaves(g))
    np.testing.assert_array_equal(runs["1"][0], runs["3"][0])
    for a, b in zip(runs["1"][1], runs["3"][1]):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
    tol = 1e-10 if dtype == np.float64 else 1e-3
    ref_states = np.asarray(loss(model, "scan")[1])
    np.testing.assert_allclose(runs["3"][0], ref_states, rtol=0, atol=tol * np.abs(ref_states).max())


@pytest.mark.parametrize("time_varying", [False, True])
def test_one_trajectory_gradient_split_over_threads_matches_one_thread_and_scan(rng, time_varying, monkeypatch):
    """A single long trajectory's gradient pass split over time between threads
    (smoother.h, gradients_one's parts: u = H⁻¹x̄ by both sweeps first, then the
    per-step terms in contiguous ranges, each with its own accumulators) equals
    the one-thread pass up to the order of the sums, and the pure-JAX route
    (independent code). T is above 2 × 8,192 steps per part; 2 and 3 threads
    are forced so the split happens on any machine (3 parts: uneven
    boundaries); the prior's terms live in the first part."""
    T = 30_001
    model = to_model(random_model(rng, 2, 2, T, time_varying=time_varying, full_R=True, prior=True,
                                  offsets=True))
    y = jnp.asarray(rng.standard_normal((T, 2)))
    mask = jnp.asarray(rng.random((T, 2)) > 0.2)

    def loss(m, yy, method):
        return jnp.sum(jnp.sin(kx.smooth(m, yy, mask, method=method).states))

    vg = {m: jax.jit(jax.value_and_grad(lambda mm, yy, m=m: loss(mm, yy, m), argnums=(0, 1))) for m in ("cpu", "scan")}
    runs = {}
    for threads in ("1", "2", "3"):
        monkeypatch.setenv("KALMAX_CPU_THREADS", threads)
        # np.asarray waits for the result: the handler reads the thread cap when it runs.
        runs[threads] = [np.asarray(a) for a in jax.tree_util.tree_leaves(vg["cpu"](model, y))]
    monkeypatch.delenv("KALMAX_CPU_THREADS")
    ref = [np.asarray(a) for a in jax.tree_util.tree_leaves(vg["scan"](model, y))]
    for threads in ("2", "3"):
        for a, b, r in zip(runs["1"], runs[threads], ref):
            scale = max(1.0, float(np.max(np.abs(r))))
            np.testing.assert_allclose(b, a, rtol=1e-11, atol=1e-12 * scale)
            np.testing.assert_allclose(b, r, rtol=1e-8, atol=1e-9 * scale)
