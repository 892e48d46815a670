"""A diagonal Q inside the compiled kernel (``kx.DiagonalNoise`` Q on ``method="cpu"``).

The kernel receives Q's variances, (n,) or (T-1, n), with the FFI attribute
``q_diagonal = 1``, uses Q⁻¹ = diag(1/q) and log|Q| = Σ log q, and returns
the gradient w.r.t. the variances. Oracles:

* the dense-Q route: the same model with Q expanded to a dense matrix in
  NumPy, through the kernel's dense-Q code (a Cholesky factorisation of every
  block). Since dQ = e_i e_iᵀ dq_i, the gradient w.r.t. the variances is the
  diagonal of the dense gradient (common practice);
* the NumPy references of ``tests/reference.py``: the Kalman filter + RTS
  smoother (Särkkä (2013), Bayesian Filtering and Smoothing, Alg 4.1 and
  8.2) for the means, the dense joint Gaussian for log p(y), and central
  finite differences of those (common practice) for one gradient per case.

Cases: Q time-invariant with A and b time-invariant too (the kernel's
raw-sum gradient path and compact factor), Q time-invariant with per-step A
and b, and Q per step; R diagonal (variances) or dense; float64 and float32.
Tolerances: float64 1e-9 relative between the two kernel routes and against
the references (the routes differ only in rounding of well-conditioned
problems); float32 calls compute in double inside (``backends/cpu.py``), so
the two routes agree to float32 rounding of the outputs (1e-5) and the
references to 1e-3.
"""

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import central_differences
from kalmax._src.backends.registry import available

pytestmark = pytest.mark.skipif("cpu" not in available(), reason="the compiled kernel is not built")

T, N, P = 9, 3, 4
Q_CASES = ("invariant", "invariant_q_per_step_a", "per_step")


def _problem(seed, q_case, r_dense):
    """(model dict with dense Q and R, the variances of Q, y (NaN where missing), mask)."""
    rng = np.random.default_rng(seed)
    md = ref.random_model(rng, N, P, T, time_varying=q_case != "invariant", full_R=r_dense)
    shape = (T - 1, N) if q_case == "per_step" else (N,)
    qv = rng.uniform(0.2, 1.0, size=shape)
    md["Q"] = qv[..., :, None] * np.eye(N)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    return md, qv, y, mask


def _model(md, dtype, r_dense):
    c = lambda a: jnp.asarray(a, dtype)  # noqa: E731
    R = c(md["R"]) if r_dense else kx.DiagonalNoise(c(np.diagonal(md["R"], axis1=-2, axis2=-1)))
    return kx.StateSpace(A=c(md["A"]), C=c(md["C"]), Q=c(md["Q"]), R=R, b=c(md["b"]), d=c(md["d"]),
                         x0_mean=c(md["m0"]), x0_cov=c(md["P0"]))


def _runner(base, y, mask, weights, as_q):
    """Jitted (states, log p(y), ∇ of a loss on the states, ∇ log p(y)) w.r.t. Q's argument."""

    def states(q):
        return kx.smooth(base.replace(Q=as_q(q)), y, mask, method="cpu").states

    def loss(q):
        return jnp.sum(weights * jnp.sin(states(q)))

    def loglik(q):
        return kx.log_likelihood(base.replace(Q=as_q(q)), y, mask, method="cpu")

    return jax.jit(lambda q: (states(q), loglik(q), jax.grad(loss)(q), jax.grad(loglik)(q)))


def _diag(g):
    return jnp.diagonal(g, axis1=-2, axis2=-1)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("r_dense", [False, True], ids=["R_diagonal", "R_dense"])
@pytest.mark.parametrize("q_case", Q_CASES)
def test_variances_match_the_dense_route_and_the_references(q_case, r_dense, dtype):
    md, qv, y, mask = _problem(Q_CASES.index(q_case) + 10 * r_dense, q_case, r_dense)
    y0 = np.where(mask, y, 0.0)
    base = _model(md, dtype, r_dense)
    yj = jnp.asarray(y0, dtype)
    weights = jnp.asarray(np.random.default_rng(3).standard_normal((T, N)), dtype)
    q32 = jnp.asarray(qv, dtype)

    s_d, ll_d, gl_d, gll_d = _runner(base, yj, mask, weights, kx.DiagonalNoise)(q32)
    s_m, ll_m, gl_m, gll_m = _runner(base, yj, mask, weights, lambda q: q)(q32[..., :, None] * jnp.eye(N, dtype=dtype))

    assert gl_d.shape == qv.shape and gll_d.shape == qv.shape
    assert gl_d.dtype == dtype and s_d.dtype == dtype
    f64 = dtype == np.float64
    tol = dict(rtol=1e-9, atol=1e-10) if f64 else dict(rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(s_d, s_m, **tol)
    np.testing.assert_allclose(ll_d, ll_m, **tol)
    np.testing.assert_allclose(gl_d, _diag(gl_m), **tol)
    np.testing.assert_allclose(gll_d, _diag(gll_m), **tol)

    # The references (float64 NumPy, the same variances).
    md_ref = dict(md, Q=np.asarray(q32, np.float64)[..., :, None] * np.eye(N))
    rtol = 1e-9 if f64 else 1e-3
    np.testing.assert_allclose(s_d, ref.rts_smoother(md_ref, y0, mask)[0], rtol=rtol, atol=rtol)
    np.testing.assert_allclose(ll_d, ref.dense_log_likelihood(md_ref, y0, mask), rtol=rtol)
    if f64:
        w = np.asarray(weights)

        def ref_loss(q):
            return float(np.sum(w * np.sin(ref.rts_smoother(dict(md, Q=q[..., :, None] * np.eye(N)), y0, mask)[0])))

        def ref_ll(q):
            return ref.dense_log_likelihood(dict(md, Q=q[..., :, None] * np.eye(N)), y0, mask)

        np.testing.assert_allclose(gl_d, central_differences(ref_loss, qv), rtol=1e-5, atol=1e-7)
        np.testing.assert_allclose(gll_d, central_differences(ref_ll, qv), rtol=1e-5, atol=1e-6)


def _call_signature(text, target):
    """(attributes, operand types) of the custom call of ``target`` in a lowered program."""
    line = next(ln for ln in text.splitlines() if f"@{target}(" in ln)
    attrs = re.search(r"mhlo.backend_config = \{([^}]*)\}", line).group(1)
    operands = re.search(r"\} : \((.*?)\) ->", line).group(1)
    return attrs, re.findall(r"tensor<[^>]*>", operands)


def test_the_kernel_gets_the_variances():
    """Every kernel call that reads Q gets its (T-1, n) variances with
    q_diagonal = 1 (no expansion on the way), a dense Q its (T-1, n, n) blocks
    with q_diagonal = 0. Q is the second model operand: after the factor, x
    and x_lo (and x̄ for the gradients) where those come first."""
    md, qv, y, mask = _problem(20, "per_step", False)
    base = _model(md, np.float64, False)
    yj = jnp.asarray(np.where(mask, y, 0.0))

    def text(q):
        def f(q):
            model = base.replace(Q=q)
            return kx.log_likelihood(model, yj, mask, method="cpu") + jnp.sum(
                kx.smooth(model, yj, mask, method="cpu").states)

        return jax.jit(jax.grad(f)).lower(q).as_text()

    first_model_operand = {"kalmax_cpu_forward": 0, "kalmax_cpu_loglik": 9, "kalmax_cpu_gradients": 10}
    for q, flag, shape in ((kx.DiagonalNoise(jnp.asarray(qv)), 1, f"{T - 1}x{N}"),
                           (jnp.asarray(md["Q"]), 0, f"{T - 1}x{N}x{N}")):
        program = text(q)
        for target, first in first_model_operand.items():
            attrs, types = _call_signature(program, target)
            assert f"q_diagonal = {flag} : i32" in attrs, (target, attrs)
            assert types[first + 1] == f"tensor<{shape}xf64>", (target, types)


def test_the_wrapper_not_the_shape_decides():
    """With T-1 = n a per-step diagonal (T-1, n) has the shape of a dense (n, n):
    the attribute tells the kernel which it is. Each reading against its reference."""
    rng = np.random.default_rng(21)
    n, p, steps = 3, 2, 4
    md = ref.random_model(rng, n, p, steps, time_varying=False, full_R=True)
    v = 0.2 * np.ones((n, n)) + np.diag(rng.uniform(0.5, 1.0, n))  # SPD as a matrix, positive entries
    y, mask = ref.random_data(rng, dict(md, Q=v), steps, missing=0.2)
    y0 = np.where(mask, y, 0.0)
    base = kx.StateSpace(A=md["A"], C=md["C"], Q=v, R=md["R"], b=md["b"], d=md["d"], x0_mean=md["m0"],
                         x0_cov=md["P0"])
    as_dense = kx.smooth(base, y0, mask, method="cpu").states
    as_wrapped = kx.smooth(base.replace(Q=kx.DiagonalNoise(v)), y0, mask, method="cpu").states
    np.testing.assert_allclose(as_dense, ref.rts_smoother(dict(md, Q=v), y0, mask)[0], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(as_wrapped, ref.rts_smoother(dict(md, Q=v[:, :, None] * np.eye(n)), y0, mask)[0],
                               rtol=1e-9, atol=1e-10)
    assert not np.allclose(as_dense, as_wrapped)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("bad", [0.0, -0.3, np.nan])
@pytest.mark.parametrize("q_case", ["invariant", "per_step"])
def test_a_variance_that_is_not_positive_gives_nan(q_case, bad, dtype):
    """Like a dense Q that is not positive definite (checked alongside): the
    factorisation fails, and states, log p(y) and both gradients are NaN."""
    md, qv, y, mask = _problem(30, q_case, False)
    qv = qv.copy()
    qv[(1,) if q_case == "invariant" else (T // 2, 1)] = bad
    base = _model(md, dtype, False)
    yj = jnp.asarray(np.where(mask, y, 0.0), dtype)
    weights = jnp.ones((T, N), dtype)
    q = jnp.asarray(qv, dtype)
    for out in (_runner(base, yj, mask, weights, kx.DiagonalNoise)(q),
                _runner(base, yj, mask, weights, lambda q: q)(q[..., :, None] * jnp.eye(N, dtype=dtype))):
        for a in jax.tree_util.tree_leaves(out):
            assert np.all(np.isnan(np.asarray(a))), a


def test_vmap_over_a_batch_of_per_step_variances():
    """A batch of per-step variances (e.g. predicted by a network): vmap of the
    states and of value_and_grad of log p(y), one kernel call per pass,
    element by element against the dense route and the reference."""
    md, _, y, mask = _problem(40, "per_step", False)
    y0 = np.where(mask, y, 0.0)
    base = _model(md, np.float64, False)
    yj = jnp.asarray(y0)
    logq = np.random.default_rng(41).normal(-0.7, 0.4, size=(3, T - 1, N))

    def run(as_q):
        def one(lq):
            model = base.replace(Q=as_q(jnp.exp(lq)))
            states = kx.smooth(model, yj, mask, method="cpu").states
            return states, jax.value_and_grad(
                lambda lq: kx.log_likelihood(base.replace(Q=as_q(jnp.exp(lq))), yj, mask, method="cpu"))(lq)

        return jax.jit(jax.vmap(one))(jnp.asarray(logq))

    s_d, (v_d, g_d) = run(kx.DiagonalNoise)
    s_m, (v_m, g_m) = run(lambda q: q[..., :, None] * jnp.eye(N, dtype=q.dtype))
    np.testing.assert_allclose(s_d, s_m, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(v_d, v_m, rtol=1e-10)
    np.testing.assert_allclose(g_d, g_m, rtol=1e-9, atol=1e-10)
    for b in range(logq.shape[0]):
        md_b = dict(md, Q=np.exp(logq[b])[..., :, None] * np.eye(N))
        np.testing.assert_allclose(s_d[b], ref.rts_smoother(md_b, y0, mask)[0], rtol=1e-9, atol=1e-10)
        np.testing.assert_allclose(v_d[b], ref.dense_log_likelihood(md_b, y0, mask), rtol=1e-10)


@pytest.mark.parametrize("q_case", ["invariant", "per_step"])
def test_second_derivatives(q_case):
    """The Hessian of log p(y) w.r.t. the variances (second-order AD goes
    through the pure-JAX twins of the kernel calls, which read a diagonal Q
    through ``normal_equations.transition_cov``) equals that of the dense
    route (Q expanded inside the function: its Hessian's (i,i,j,j) entries)."""
    md, qv, y, mask = _problem(50, q_case, False)
    base = _model(md, np.float64, False)
    yj = jnp.asarray(np.where(mask, y, 0.0))

    def ll(q):
        return kx.log_likelihood(base.replace(Q=q), yj, mask, method="cpu")

    h_d = jax.jit(jax.hessian(lambda v: ll(kx.DiagonalNoise(v))))(jnp.asarray(qv))
    h_m = jax.jit(jax.hessian(lambda v: ll(v[..., :, None] * jnp.eye(N))))(jnp.asarray(qv))
    np.testing.assert_allclose(h_d, h_m, rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("q_case", ["invariant", "per_step"])
def test_one_trajectory_split_over_threads(q_case, monkeypatch):
    """A long trajectory whose gradient and likelihood passes are split over
    threads (their per-part accumulators; T above 2 × 8,192 steps a part):
    the diagonal route equals the dense route with 1 and 3 threads."""
    rng = np.random.default_rng(60)
    steps, n, p = 20_001, 2, 2
    md = ref.random_model(rng, n, p, 3, time_varying=False, full_R=False)
    qv = rng.uniform(0.2, 1.0, size=(steps - 1, n) if q_case == "per_step" else (n,))
    x = np.cumsum(rng.standard_normal((steps, n)), axis=0) * 0.1
    y = x @ md["C"].T + rng.standard_normal((steps, p))
    base = kx.StateSpace(A=md["A"], C=md["C"], Q=np.eye(n), R=kx.DiagonalNoise(np.diagonal(md["R"])), b=md["b"],
                         d=md["d"], x0_mean=md["m0"], x0_cov=md["P0"])
    yj = jnp.asarray(y)
    weights = jnp.asarray(rng.standard_normal((steps, n)))

    def f(as_q):
        def loss(q):
            return jnp.sum(weights * kx.smooth(base.replace(Q=as_q(q)), yj, method="cpu").states)

        def ll(q):
            return kx.log_likelihood(base.replace(Q=as_q(q)), yj, method="cpu")

        return jax.jit(lambda q: (jax.value_and_grad(loss)(q), jax.value_and_grad(ll)(q)))

    diag_fn, dense_fn = f(kx.DiagonalNoise), f(lambda q: q[..., :, None] * jnp.eye(n, dtype=q.dtype))
    q = jnp.asarray(qv)
    for threads in ("1", "3"):
        monkeypatch.setenv("KALMAX_CPU_THREADS", threads)  # read by the kernel on every call
        (l_d, gl_d), (v_d, gv_d) = diag_fn(q)
        (l_m, gl_m), (v_m, gv_m) = dense_fn(q)
        np.testing.assert_allclose(l_d, l_m, rtol=1e-9)
        np.testing.assert_allclose(v_d, v_m, rtol=1e-11)
        for a, b in ((gl_d, gl_m), (gv_d, gv_m)):
            scale = float(np.max(np.abs(b)))
            np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-10 * scale)
