"""Gradients of the smoothing primitive (float64).

Three independent checks of the implicit-function VJP:
- central finite differences of the loss, for every input including y;
- jax.test_util.check_grads in reverse mode;
- plain autodiff through an unrolled reference: the same objective J written
  here from its definition, its Hessian and gradient by jax, and a dense solve.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax.test_util import check_grads

import kalmax as kx
import reference as ref
from helpers import to_model

FIELDS = ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov")


def _problem(rng, T=6, n=3, p=2, tv=True, prior=True):
    md = ref.random_model(rng, n, p, T, time_varying=tv, full_R=True, prior=prior)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    return to_model(md, prior=prior), jnp.asarray(y), jnp.asarray(mask)


def _loss(model, y, mask, weights):
    est = kx.smooth(model, y, mask)
    return jnp.sum(weights * est.states) + 0.3 * jnp.sum(jnp.where(mask, est.measurements, 0) ** 2)


def _dense_J(model, y, mask, x):
    """J(x) written directly from its definition, gathering observed sub-blocks."""
    T = y.shape[0]
    val = 0.0
    A = model.A if model.A.ndim == 3 else jnp.broadcast_to(model.A, (T - 1,) + model.A.shape)
    Q = model.Q if model.Q.ndim == 3 else jnp.broadcast_to(model.Q, (T - 1,) + model.Q.shape)
    b = jnp.zeros((T - 1, x.shape[1])) if model.b is None else jnp.broadcast_to(model.b, (T - 1, x.shape[1]))
    for t in range(T - 1):
        r = x[t + 1] - A[t] @ x[t] - b[t]
        val += 0.5 * r @ jnp.linalg.solve(Q[t], r)
    m = np.asarray(mask)
    for t in range(T):
        K = np.nonzero(m[t])[0]
        if K.size == 0:
            continue
        C = model.C if model.C.ndim == 2 else model.C[t]
        R = model.R if model.R.ndim == 2 else model.R[t]
        d = 0.0 if model.d is None else (model.d if model.d.ndim == 1 else model.d[t])
        e = (y[t] - C @ x[t] - d)[K]
        val += 0.5 * e @ jnp.linalg.solve(R[np.ix_(K, K)], e)
    if model.x0_cov is not None:
        e0 = x[0] - model.x0_mean
        val += 0.5 * e0 @ jnp.linalg.solve(model.x0_cov, e0)
    return val


def _unrolled_states(model, y, mask):
    T, n = y.shape[0], model.A.shape[-1]
    yz = jnp.where(mask, y, 0.0)
    f = lambda v: _dense_J(model, yz, mask, v.reshape(T, n))  # noqa: E731
    z = jnp.zeros(T * n)
    H = jax.hessian(f)(z)
    g = -jax.grad(f)(z)
    return jnp.linalg.solve(H, g).reshape(T, n)


def _sym(model):
    """Symmetrise covariance fields (the library reads symmetric parts only)."""
    s = lambda S: None if S is None else 0.5 * (S + jnp.swapaxes(S, -1, -2))  # noqa: E731
    return model.replace(Q=s(model.Q), R=s(model.R), x0_cov=s(model.x0_cov))


@pytest.mark.parametrize("tv,prior", [(True, True), (False, True), (True, False)])
def test_matches_autodiff_through_unrolled_reference(rng, tv, prior):
    # without a prior, observe enough (p = n) that the flat-prior problem is well conditioned
    model, y, mask = _problem(rng, tv=tv, prior=prior, p=2 if prior else 3)
    W = jnp.asarray(rng.normal(size=(y.shape[0], model.A.shape[-1])))

    def ref_loss(m, yy):
        m = _sym(m)
        x = _unrolled_states(m, yy, mask)
        meas = jnp.einsum("...pi,...i->...p", m.C, x) + (0 if m.d is None else m.d)
        return jnp.sum(W * x) + 0.3 * jnp.sum(jnp.where(mask, meas, 0) ** 2)

    want_m, want_y = jax.grad(ref_loss, argnums=(0, 1))(model, jnp.where(mask, y, 0.0))
    got_m, got_y = jax.grad(_loss, argnums=(0, 1))(model, y, mask, W)
    assert np.isclose(float(_loss(model, y, mask, W)), float(ref_loss(model, jnp.where(mask, y, 0.0))), atol=1e-10)
    for f in FIELDS:
        a, b = getattr(got_m, f), getattr(want_m, f)
        if b is None:
            assert a is None
            continue
        np.testing.assert_allclose(a, b, atol=1e-9 * (1 + np.abs(b).max()), err_msg=f)
    np.testing.assert_allclose(jnp.where(mask, got_y, 0), want_y, atol=1e-9)
    # measurements that were never observed get exactly zero gradient (and no NaN)
    assert np.all(np.asarray(got_y)[~np.asarray(mask)] == 0)


def test_finite_differences_every_input(rng):
    model, y, mask = _problem(rng, T=5, n=2, p=2)
    W = jnp.asarray(rng.normal(size=(5, 2)))
    loss = lambda m, yy: _loss(m, yy, mask, W)  # noqa: E731
    gm, gy = jax.grad(loss, argnums=(0, 1))(model, y)
    h = 1e-6
    for f in FIELDS:
        a = np.asarray(getattr(model, f))
        for _ in range(3):
            idx = tuple(int(rng.integers(0, s)) for s in a.shape)
            E = np.zeros_like(a)
            E[idx] = 1.0
            if f in ("Q", "R", "x0_cov"):  # perturb symmetrically
                E[idx[:-2] + (idx[-1], idx[-2])] = 1.0
            fd = (loss(model.replace(**{f: a + h * E}), y) - loss(model.replace(**{f: a - h * E}), y)) / (2 * h)
            got = float(jnp.sum(getattr(gm, f) * E))
            assert abs(fd - got) <= 1e-6 * (1 + abs(fd)), (f, idx, fd, got)
    yv = np.asarray(y)
    for t, j in np.argwhere(np.asarray(mask))[:6]:
        E = np.zeros_like(yv)
        E[t, j] = 1.0
        fd = (loss(model, yv + h * E) - loss(model, yv - h * E)) / (2 * h)
        assert abs(fd - float(gy[t, j])) <= 1e-6 * (1 + abs(fd))


def test_check_grads_reverse_mode(rng):
    model, y, mask = _problem(rng, T=4, n=2, p=2)
    W = jnp.asarray(rng.normal(size=(4, 2)))
    y0 = jnp.where(mask, y, 0.0)

    def f(A, C, b, d, yy):
        return _loss(model.replace(A=A, C=C, b=b, d=d), yy, mask, W)

    check_grads(f, (model.A, model.C, model.b, model.d, y0), order=1, modes=["rev"], atol=1e-6, rtol=1e-6)

    def g(Lq, Lr):  # covariances through Cholesky-like factors keep them SPD under perturbation
        Q = Lq @ jnp.swapaxes(Lq, -1, -2) + 0.5 * jnp.eye(Lq.shape[-1])
        R = Lr @ jnp.swapaxes(Lr, -1, -2) + 0.5 * jnp.eye(Lr.shape[-1])
        return _loss(model.replace(Q=Q, R=R), y0, mask, W)

    check_grads(g, (jnp.asarray(rng.normal(size=(3, 2, 2))), jnp.asarray(rng.normal(size=(2, 2)))),
                order=1, modes=["rev"], atol=1e-6, rtol=1e-6)


def test_nan_at_missing_entries_does_not_poison_gradients(rng):
    model, y, mask = _problem(rng)
    W = jnp.ones((y.shape[0], model.A.shape[-1]))
    assert np.isnan(np.asarray(y)[~np.asarray(mask)]).all()
    gm, gy = jax.grad(_loss, argnums=(0, 1))(model, y, mask, W)
    for leaf in jax.tree_util.tree_leaves((gm, gy)):
        assert np.all(np.isfinite(leaf))


def test_prediction_error_gradient_matches_fd(rng):
    model, y, mask = _problem(rng, T=8)
    holdout = jnp.asarray(rng.random(y.shape) < 0.3)
    loss = lambda m: kx.prediction_error(m, y, mask, holdout)  # noqa: E731
    g = jax.grad(loss)(model)
    a = np.asarray(model.A)
    E = np.zeros_like(a)
    E[(1, 0, 1)] = 1.0
    h = 1e-6
    fd = (loss(model.replace(A=a + h * E)) - loss(model.replace(A=a - h * E))) / (2 * h)
    assert abs(fd - float(jnp.sum(g.A * E))) < 1e-6 * (1 + abs(fd))
    # value: an independent mean of squared errors from the reference smoother
    md = dict(A=a, C=np.asarray(model.C), Q=np.asarray(model.Q), R=np.asarray(model.R), b=np.asarray(model.b),
              d=np.asarray(model.d), m0=np.asarray(model.x0_mean), P0=np.asarray(model.x0_cov))
    fit = np.asarray(mask) & ~np.asarray(holdout)
    mu, _ = ref.rts_smoother(md, np.asarray(y), fit)
    E2 = ref.expand(md, y.shape[0])
    pred = np.einsum("tpi,ti->tp", E2["C"], mu) + E2["d"]
    scored = np.asarray(mask) & np.asarray(holdout)
    want = np.mean((np.asarray(y)[scored] - pred[scored]) ** 2)
    assert np.isclose(float(loss(model)), want, rtol=1e-10)


_LONG_SCRIPT = """
import jax, jax.numpy as jnp
jax.config.update("jax_enable_x64", True)
import kalmax as kx
T = 70_000
m = kx.StateSpace(A=0.9 * jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1), x0_cov=jnp.eye(2))
y = jnp.sin(jnp.arange(T) / 50.0)[:, None]
g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y, method="scan").states ** 2))(m)
print("finite", all(bool(jnp.all(jnp.isfinite(l))) for l in jax.tree_util.tree_leaves(g)))
"""


def test_long_series_gradient_completes():
    """Value-and-gradient past 2**16 steps on the pure-JAX path: jaxlib 0.10 on CPU can
    deadlock on large batched triangular-solve gradients, which linalg.lsolve works around
    by chunking. Run in a subprocess so that a hang fails this test instead of stalling CI."""
    import subprocess
    import sys

    proc = subprocess.run([sys.executable, "-c", _LONG_SCRIPT], capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "finite True" in proc.stdout


@pytest.mark.parametrize("method", ["auto", "scan"])
def test_grad_of_vmap_over_numpy_data(rng, method):
    """A common way to write a batched loss: close over NumPy arrays and vmap
    over them. jax.vmap keeps the NumPy array inside its tracer, which used to
    crash the primitive's differentiation rules ("non-canonical constant");
    the result must equal the same loss written with JAX arrays."""
    n, p, T, B = 2, 2, 8, 3
    model = kx.StateSpace(A=0.9 * np.eye(n), C=rng.standard_normal((p, n)), Q=0.5 * np.eye(n), R=np.eye(p))
    ys = rng.standard_normal((B, T, p))

    def loss(m, data):
        return jnp.sum(jax.vmap(lambda y: kx.smooth(m, y, method=method).states)(data) ** 2)

    # Under jit the NumPy array is still closed over (a constant of the trace), which is
    # the case that used to fail; compiled, the check costs seconds instead of most of a minute.
    val_np, g_np = jax.jit(jax.value_and_grad(lambda m: loss(m, ys)))(model)
    val_j, g_j = jax.jit(jax.value_and_grad(lambda m: loss(m, jnp.asarray(ys))))(model)
    np.testing.assert_allclose(val_np, val_j, rtol=1e-12)
    for a, b in zip(jax.tree_util.tree_leaves(g_np), jax.tree_util.tree_leaves(g_j)):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-14)
