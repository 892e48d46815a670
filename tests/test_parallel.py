"""The parallel-in-time backend (block cyclic reduction, method="parallel") and the
low-memory sequential backend (method="scan-recompute").

Ground truth: dense NumPy solves of the normal equations built by stacking
residuals (tests/reference.py, weighted least squares: Björck 1996, Ch. 4,
from memory), the textbook Kalman filter + Rauch–Tung–Striebel smoother
(Särkkä, Bayesian Filtering and Smoothing, 2013, §8.2, from memory), the dense
joint-Gaussian log-likelihood, central finite differences, and the sequential
"scan" path (for agreement of values *and* gradients).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model
from kalmax._src import blocktri
from kalmax._src.backends import cyclic_reduction as parallel, recompute, registry
from kalmax._src.backends.base import Backend
from kalmax._src.normal_equations import assemble

N, P = 3, 2
T0 = 7  # odd: a padding block at the first level (7 -> 4 -> 2 -> 1)

# Compile once per method and shape; eager op-by-op dispatch would compile
# every small operation of every reduction level separately.
_smooth = jax.jit(kx.smooth, static_argnames=("method", "covariances"))
_loglik = jax.jit(kx.log_likelihood, static_argnames=("method",))
_pfactor = jax.jit(parallel.factor_solve)


@jax.jit
def _pall(diag, sub, rhs, v):
    """Everything the parallel backend offers, in one compilation."""
    x, factor = parallel.factor_solve(diag, sub, rhs)
    return x, parallel.logdet(factor), parallel.solve(factor, v), parallel.band_inverse(factor)


_csolve = jax.jit(recompute.checkpointed_solve, static_argnames=("chunk",))


def _problem(rng, T, *, time_varying=True, prior=True, dtype=np.float64, missing=0.3):
    md = ref.random_model(rng, N, P, T, time_varying=time_varying, prior=prior)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    return md, to_model(md, dtype), y.astype(dtype), mask


def _blocks(model, y, mask):
    return assemble(model, jnp.asarray(y), jnp.asarray(mask, y.dtype))


def _dense_band(Hinv, T, n):
    """Diagonal and sub-diagonal n×n blocks of a dense (T n, T n) matrix."""
    blk = lambda i, j: Hinv[i * n:(i + 1) * n, j * n:(j + 1) * n]  # noqa: E731
    diag = np.stack([blk(t, t) for t in range(T)])
    sub = np.stack([blk(t + 1, t) for t in range(T - 1)]) if T > 1 else np.zeros((0, n, n))
    return diag, sub


# T = 1 (no level), 2 (one level, no padding), 11 (padding blocks at two
# levels: 11 -> 6 -> 3 -> 2 -> 1).
@pytest.mark.parametrize("T", [1, 2, 11])
@pytest.mark.parametrize("solver", ["parallel", "recompute"])
def test_solver_matches_dense_linear_algebra(rng, T, solver):
    md, model, y, mask = _problem(rng, T)
    H, g = ref.dense_normal_equations(md, y, mask)
    sys_ = _blocks(model, y, mask)
    x_ref = np.linalg.solve(H, g).reshape(T, N)
    _, logdet_ref = np.linalg.slogdet(H)
    v = rng.standard_normal((T, N))
    if solver == "parallel":
        x, ld, Hv, (diag, sub) = _pall(*sys_, jnp.asarray(v))
        d_ref, s_ref = _dense_band(np.linalg.inv(H), T, N)
        np.testing.assert_allclose(diag, d_ref, rtol=1e-9, atol=1e-11)
        np.testing.assert_allclose(sub, s_ref, rtol=1e-9, atol=1e-11)
    else:
        # Chunks of 1, 3 (T not a multiple: padding steps) and the default √T.
        for chunk in (1, 3, None):
            x, ld, ok = _csolve(*sys_, chunk=chunk)
            assert bool(ok)
            np.testing.assert_allclose(x, x_ref, rtol=1e-9, atol=1e-11)
            np.testing.assert_allclose(ld, logdet_ref, rtol=1e-11, atol=1e-10)
        Hv, _, _ = _csolve(sys_.diag, sys_.sub, jnp.asarray(v))
    np.testing.assert_allclose(x, x_ref, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(ld, logdet_ref, rtol=1e-11, atol=1e-10)
    np.testing.assert_allclose(Hv, np.linalg.solve(H, v.ravel()).reshape(T, N), rtol=1e-9, atol=1e-11)


def test_time_invariant_blocks_and_no_prior(rng):
    T = T0
    md, model, y, mask = _problem(rng, T, time_varying=False, prior=False)
    sys_ = _blocks(model, y, mask)
    assert sys_.sub.ndim == 2  # the time-invariant sub-diagonal path
    x_ref = np.linalg.solve(*ref.dense_normal_equations(md, y, mask)).reshape(T, N)
    np.testing.assert_allclose(_pfactor(*sys_)[0], x_ref, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(_csolve(*sys_)[0], x_ref, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("method", ["parallel", "scan-recompute"])
def test_smooth_matches_rts_and_scan(rng, method):
    T = T0
    md, model, y, mask = _problem(rng, T)
    ours = _smooth(model, y, jnp.asarray(mask), method=method).states
    np.testing.assert_allclose(ours, ref.rts_smoother(md, y, mask)[0], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(ours, _smooth(model, y, jnp.asarray(mask), method="scan").states,
                               rtol=1e-10, atol=1e-12)


def _loss_fn(model, yy, mask, method):
    x = kx.smooth(model, yy, mask, method=method).states
    return jnp.sum(jnp.linspace(0.5, 1.5, N) * jnp.sin(x)) + 0.1 * kx.log_likelihood(model, yy, mask, method=method)


_loss = jax.jit(_loss_fn, static_argnames=("method",))
_loss_grad = jax.jit(jax.grad(_loss_fn, argnums=(0, 1)), static_argnames=("method",))


def _sin_sum(model, yy, mask, method):
    x = kx.smooth(model, yy, mask, method=method).states
    return jnp.sum(jnp.sin(x)), x


_sin_sum_grad = jax.jit(jax.grad(_sin_sum, has_aux=True), static_argnames=("method",))


@pytest.mark.parametrize("method", ["parallel", "scan-recompute"])
def test_gradients_match_scan_and_finite_differences(rng, method):
    T = T0
    md, model, y, mask = _problem(rng, T)
    mask = jnp.asarray(mask)
    y = jnp.asarray(np.where(np.asarray(mask), y, 0.0))
    # The finite differences use the values of the sequential path (one
    # compilation for both parametrisations): the function is the same.
    f = lambda m, yy: _loss(m, yy, mask, method="scan")  # noqa: E731
    g_ours = _loss_grad(model, y, mask, method=method)
    g_scan = _loss_grad(model, y, mask, method="scan")
    for a, b in zip(jax.tree_util.tree_leaves(g_ours), jax.tree_util.tree_leaves(g_scan)):
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-10)
    # Independent check: central differences along one random direction
    # (common practice; step 1e-5 gives ~1e-10 truncation error in float64).
    direction = jax.tree_util.tree_map(lambda a: jnp.asarray(rng.standard_normal(a.shape)), model)
    direction = direction.replace(Q=None, R=None, x0_cov=None)  # keep the covariances SPD
    step = lambda s: jax.tree_util.tree_map(  # noqa: E731
        lambda a, d: a if d is None else a + s * d, model, direction, is_leaf=lambda v: v is None)
    h = 1e-5
    fd = (f(step(h), y) - f(step(-h), y)) / (2 * h)
    analytic = sum(jnp.vdot(g, d) for g, d in zip(
        jax.tree_util.tree_leaves(g_ours[0].replace(Q=None, R=None, x0_cov=None)),
        jax.tree_util.tree_leaves(direction)))
    np.testing.assert_allclose(analytic, fd, rtol=1e-6)


@pytest.mark.parametrize("method", ["parallel", "scan-recompute"])
def test_log_likelihood_matches_dense_gaussian(rng, method):
    T = T0
    md, model, y, mask = _problem(rng, T)
    ll = _loglik(model, y, jnp.asarray(mask), method=method)
    np.testing.assert_allclose(ll, ref.dense_log_likelihood(md, y, mask), rtol=1e-10)


@pytest.mark.parametrize("method", ["parallel", "scan-recompute"])
def test_float32_agrees_with_scan(rng, method):
    T = T0
    _, model, y, mask = _problem(rng, T, dtype=np.float32)
    mask = jnp.asarray(mask)
    y = jnp.asarray(np.where(np.asarray(mask), y, 0.0), jnp.float32)
    g, x = _sin_sum_grad(model, y, mask, method=method)
    g_scan, x_scan = _sin_sum_grad(model, y, mask, method="scan")
    assert x.dtype == jnp.float32
    np.testing.assert_allclose(x, x_scan, rtol=2e-4, atol=2e-4)
    for a, b in zip(jax.tree_util.tree_leaves(g), jax.tree_util.tree_leaves(g_scan)):
        assert a.dtype == jnp.float32
        np.testing.assert_allclose(a, b, rtol=2e-3, atol=2e-3)


@pytest.mark.parametrize("method", ["parallel", "scan-recompute"])
def test_unidentified_states_give_nan(method):
    # Flat prior on x_0 and nothing observed: every state is unidentified.
    model = kx.StateSpace(A=jnp.eye(2), C=jnp.eye(2), Q=0.1 * jnp.eye(2), R=jnp.eye(2))
    y = jnp.full((6, 2), jnp.nan)
    assert bool(jnp.all(jnp.isnan(_smooth(model, y, method=method).states)))


def test_vmap_and_jit_compose(rng):
    T = T0
    _, model, _, _ = _problem(rng, T)
    ys = jnp.asarray(rng.standard_normal((3, T, P)))
    batched = jax.jit(jax.vmap(lambda yy: kx.smooth(model, yy, method="parallel").states))(ys)
    for i in range(3):
        np.testing.assert_allclose(batched[i], _smooth(model, ys[i], method="scan").states, rtol=1e-10, atol=1e-12)


def test_auto_is_parallel_on_accelerators(monkeypatch):
    monkeypatch.setattr(registry.jax, "default_backend", lambda: "gpu")
    assert registry.resolve_method("auto") == "parallel"
    monkeypatch.setattr(registry.jax, "default_backend", lambda: "tpu")
    assert registry.resolve_method("auto") == "parallel"
    monkeypatch.setattr(registry.jax, "default_backend", lambda: "cpu")
    assert registry.resolve_method("auto") != "parallel"


def test_parallel_factor_is_reused_in_the_backward_pass(rng, monkeypatch, temporary_backend):
    # The VJP must call the backend's adjoint on the stored factor and must
    # not factor again: count factorisations while differentiating.
    T = T0
    _, model, y, mask = _problem(rng, T)
    # Counted when the compiled program runs (a host callback beside each
    # call), not when it is traced: tracing may visit a function more than
    # once (the implicit tangent's solve is traced for the solve and its
    # transpose) while the program runs it once.
    calls = {"factor": 0, "adjoint": 0}
    real_factor, real_solve = parallel.factor_solve, parallel.solve

    def bump(key):
        def count():
            calls[key] += 1
        jax.debug.callback(count)

    def counting_factor(*a):
        bump("factor")
        return real_factor(*a)

    def counting_solve(*a):
        bump("adjoint")
        return real_solve(*a)

    monkeypatch.setattr(parallel, "factor_solve", counting_factor)
    temporary_backend("parallel-counted", Backend(
        forward=lambda m, yy, w: counting_factor(*assemble(m, yy, w)), adjoint=counting_solve,
        logdet=parallel.logdet, band_inverse=parallel.band_inverse))
    g = jax.jit(jax.grad(lambda m: jnp.sum(kx.smooth(m, y, jnp.asarray(mask), method="parallel-counted").states)))(model)
    jax.block_until_ready(g)
    jax.effects_barrier()
    assert calls == {"factor": 1, "adjoint": 1}


def test_recompute_keeps_no_per_step_matrices(rng):
    # What survives from the forward to the backward pass is the factor
    # object: for "scan-recompute" it holds the inputs and two scalars only.
    T = T0
    _, model, y, mask = _problem(rng, T)
    w = jnp.asarray(mask, jnp.float64)
    _, factor = jax.eval_shape(recompute.forward, model, jnp.asarray(y), w)
    assert factor.logdet.shape == () and factor.ok.shape == ()
    assert set(jax.tree_util.tree_leaves(factor.model)) == set(jax.tree_util.tree_leaves(jax.eval_shape(lambda m: m, model)))
    _, scan_factor = jax.eval_shape(lambda m, yy: blocktri.factor_solve(*assemble(m, yy, w)), model, jnp.asarray(y))
    assert scan_factor.L.shape == (T, N, N)  # what "scan" would keep instead


def test_parallel_value_and_grad_needs_no_more_memory_than_scan():
    # The parallel path's stored factor and level transients (module
    # docstring of cyclic_reduction.py, "Memory per time step") against the
    # sequential path, both measured here by XLA's own estimate of the
    # compiled program's temporary buffers (an independent accounting of
    # every buffer, not a number this package computes).
    T, n = 2 ** 10, 8  # at n = 4 the per-step vectors dominate and the old layout passed too
    rng = np.random.default_rng(5)
    md = ref.random_model(rng, n, 2, T, time_varying=False, prior=True)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    model = to_model(md, np.float64)
    y = jnp.asarray(np.where(mask, y, 0.0))
    mask = jnp.asarray(mask)

    def temp_bytes(method):
        loss = lambda m, yy: jnp.sum(kx.smooth(m, yy, mask, method=method).states ** 2)  # noqa: E731
        compiled = jax.jit(jax.value_and_grad(loss)).lower(model, y).compile()
        analysis = compiled.memory_analysis()
        if analysis is None:
            pytest.skip("no memory analysis on this platform")
        return analysis.temp_size_in_bytes

    assert temp_bytes("parallel") <= temp_bytes("scan")
