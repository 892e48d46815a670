"""Derivatives of the posterior covariances without a tape (``covariance_band.py``).

References:
- the band tangent dΣ = −band(Σ dH Σ) against a dense inverse of the dense
  normal-equation matrix (tests/reference.py; the derivative of a matrix
  inverse, d(H⁻¹) = −H⁻¹ dH H⁻¹, e.g. Magnus & Neudecker (2019), Matrix
  Differential Calculus, ch. 8 — from memory);
- gradients of a loss of state_cov, state_cross_cov and measurement_cov
  against central finite differences of the textbook RTS smoother's
  covariances and lag-one cross-covariances (tests/reference.py: Särkkä
  (2013), Bayesian Filtering and Smoothing, ch. 8; finite differences:
  common practice);
- the previous route (JAX differentiating the selected inversion,
  ``taped_posterior_band``), in every mode and at second order;
- the compiled kernel's sweep against the portable JAX sweep on the same
  inputs.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model
from kalmax._src import blocktri, covariance_band
from kalmax._src.backends import cpu as cpu_backend
from kalmax._src.backends import registry
from kalmax._src.checks import canonicalize

METHODS = [m for m in ("cpu", "scan") if registry.is_available(m)]


def _problem(rng, T, n, p, *, tv, diag_R, missing=0.3, dtype=np.float64):
    md = ref.random_model(rng, n, p, T, time_varying=tv, full_R=not diag_R)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    model = to_model(md, dtype)
    if diag_R:
        model = model.replace(R=kx.DiagonalNoise(jnp.asarray(np.diagonal(md["R"], axis1=-2, axis2=-1), dtype)))
    return md, jnp.asarray(y, dtype), jnp.asarray(mask), model


def _dense_band(M, T, n):
    diag = np.stack([M[t * n:(t + 1) * n, t * n:(t + 1) * n] for t in range(T)])
    sub = np.stack([M[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n] for t in range(T - 1)]) if T > 1 \
        else np.zeros((0, n, n))
    return diag, sub


def _dense_from_band(D, S):
    T, n = D.shape[0], D.shape[-1]
    M = np.zeros((T * n, T * n))
    for t in range(T):
        M[t * n:(t + 1) * n, t * n:(t + 1) * n] = D[t]
    for t in range(T - 1):
        M[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n] = S[t]
        M[t * n:(t + 1) * n, (t + 1) * n:(t + 2) * n] = S[t].T
    return M


def _direction(rng, T, n):
    D = rng.standard_normal((T, n, n))
    return D + np.swapaxes(D, -1, -2), rng.standard_normal((max(T - 1, 0), n, n))


def _canonical(model, y, mask):
    model, y, mask, _, _ = canonicalize(model, y, mask, keep_diagonal_R=True)
    return model, mask.astype(y.dtype)


@pytest.mark.parametrize("T", [1, 2, 7])
@pytest.mark.parametrize("tv", [False, True])
@pytest.mark.parametrize("diag_R", [False, True])
def test_band_tangent_equals_dense(rng, T, tv, diag_R):
    """Both sweeps (portable; kernel) give −band(Σ B Σ) of the dense H⁻¹ for a random band direction B."""
    n, p = 3, 2
    md, y, mask, model = _problem(rng, T, n, p, tv=tv, diag_R=diag_R)
    H, _ = ref.dense_normal_equations(md, np.asarray(y), np.asarray(mask))
    Sigma = np.linalg.inv(H)
    dD, dS = _direction(rng, T, n)
    want = _dense_band(-Sigma @ _dense_from_band(dD, dS) @ Sigma, T, n)

    cm, w = _canonical(model, y, mask)
    _, factor = registry.get_backend("scan").forward(cm, jnp.zeros_like(y), w)
    S = blocktri.selected_inverse(factor)
    got = blocktri.selected_inverse_tangent(factor, *S, jnp.asarray(dD), jnp.asarray(dS))
    for g, e in zip(got, want):
        np.testing.assert_allclose(g, e, atol=1e-10, rtol=1e-10)
    if registry.is_available("cpu"):
        _, cf = cpu_backend.forward(cm, jnp.zeros_like(y), w)
        S = cpu_backend.band_inverse(cf)
        got = cpu_backend.band_tangent(cf, *S, jnp.asarray(dD), jnp.asarray(dS))
        for g, e in zip(got, want):
            np.testing.assert_allclose(g, e, atol=1e-10, rtol=1e-10)


@pytest.mark.parametrize("tv", [False, True])
def test_kernel_sweep_equals_portable_sweep(rng, tv):
    if not registry.is_available("cpu"):
        pytest.skip("compiled kernel not built")
    T, n, p = 40, 4, 3
    md, y, mask, model = _problem(rng, T, n, p, tv=tv, diag_R=False)
    cm, w = _canonical(model, y, mask)
    _, cf = cpu_backend.forward(cm, jnp.zeros_like(y), w)
    S = cpu_backend.band_inverse(cf)
    dD, dS = _direction(rng, T, n)
    dD = dD + rng.standard_normal(dD.shape)  # not symmetric: both read its symmetric part
    kernel = cpu_backend.band_tangent(cf, *S, jnp.asarray(dD), jnp.asarray(dS))
    portable = cpu_backend._jax_band_tangent(cf, *S, jnp.asarray(dD), jnp.asarray(dS))
    for k, j in zip(kernel, portable):
        scale = max(1.0, float(np.max(np.abs(j))))
        assert float(np.max(np.abs(k - j))) / scale < 1e-10


def test_precision_tangent_inverts_band_tangent(rng):
    """The closed-form inverse (clique formula) undoes the sweep: what second derivatives rely on."""
    T, n, p = 6, 3, 2
    md, y, mask, model = _problem(rng, T, n, p, tv=True, diag_R=False)
    cm, w = _canonical(model, y, mask)
    _, factor = registry.get_backend("scan").forward(cm, jnp.zeros_like(y), w)
    S = blocktri.selected_inverse(factor)
    dD, dS = _direction(rng, T, n)
    X = blocktri.selected_inverse_tangent(factor, *S, jnp.asarray(dD), jnp.asarray(dS))
    back = covariance_band.precision_tangent(*S, *X)
    np.testing.assert_allclose(back[0], dD, atol=1e-9)
    np.testing.assert_allclose(back[1], dS, atol=1e-9)


def _weights(rng, T, n, p):
    return (rng.standard_normal((T, n, n)), rng.standard_normal((T - 1, n, n)), rng.standard_normal((T, p, p)))


def _loss(model, y, mask, W, method):
    out = kx.smooth(model, y, mask, covariances=True, method=method)
    return (jnp.sum(W[0] * out.state_cov) + jnp.sum(W[1] * out.state_cross_cov)
            + jnp.sum(W[2] * out.measurement_cov))


def _reference_loss(md, y, mask, W):
    _, P, X = ref.rts_smoother(md, y, mask, return_cross=True)
    C = ref.expand(md, P.shape[0])["C"]
    return np.sum(W[0] * P) + np.sum(W[1] * X) + np.sum(W[2] * np.einsum("tpi,tij,tqj->tpq", C, P, C))


def _sym_dir(rng, shape):
    V = rng.standard_normal(shape)
    return 0.5 * (V + np.swapaxes(V, -1, -2))


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("tv, diag_R", [(False, False), (True, False), (False, True), (True, True)])
def test_gradients_match_finite_differences(rng, method, tv, diag_R):
    T, n, p = 9, 3, 2
    md, y, mask, model = _problem(rng, T, n, p, tv=tv, diag_R=diag_R)
    W = _weights(rng, T, n, p)
    g = jax.jit(jax.grad(_loss), static_argnums=4)(model, y, mask, W, method)
    yn, kn = np.asarray(y), np.asarray(mask)
    h = 1e-5
    fields = {
        "A": ("A", rng.standard_normal(np.shape(md["A"]))),
        "Q": ("Q", _sym_dir(rng, np.shape(md["Q"]))),
        "C": ("C", rng.standard_normal(np.shape(md["C"]))),
        "x0_cov": ("P0", _sym_dir(rng, np.shape(md["P0"]))),
    }
    for field, (key, V) in fields.items():
        fd = (_reference_loss(dict(md, **{key: md[key] + h * V}), yn, kn, W)
              - _reference_loss(dict(md, **{key: md[key] - h * V}), yn, kn, W)) / (2 * h)
        got = float(np.sum(np.asarray(getattr(g, field)) * V))
        assert abs(got - fd) < 1e-6 * (1 + abs(fd)), (field, got, fd)
    if diag_R:
        v = rng.standard_normal(np.shape(np.diagonal(md["R"], axis1=-2, axis2=-1)))
        V = v[..., None] * np.eye(p)
        got = float(np.sum(np.asarray(g.R.variances) * v))
    else:
        V = _sym_dir(rng, np.shape(md["R"]))
        got = float(np.sum(np.asarray(g.R) * V))
    fd = (_reference_loss(dict(md, R=md["R"] + h * V), yn, kn, W)
          - _reference_loss(dict(md, R=md["R"] - h * V), yn, kn, W)) / (2 * h)
    assert abs(got - fd) < 1e-6 * (1 + abs(fd)), ("R", got, fd)
    # y, the offsets and the prior mean do not enter the covariances.
    for field in ("b", "d", "x0_mean"):
        assert float(np.max(np.abs(np.asarray(getattr(g, field))))) == 0.0


def _band_loss(fn, W):
    def loss(model, w, method):
        D, S = fn(model, w, method)
        return jnp.sum(W[0] * D) + jnp.sum(W[1] * S)

    return loss


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("diag_R", [False, True])
def test_gradients_equal_taped_route(rng, method, diag_R):
    T, n, p = 12, 3, 3
    _, y, mask, model = _problem(rng, T, n, p, tv=True, diag_R=diag_R)
    cm, w = _canonical(model, y, mask)
    W = _weights(rng, T, n, p)
    new = jax.jit(jax.grad(_band_loss(covariance_band.posterior_band, W)), static_argnums=2)(cm, w, method)
    old = jax.jit(jax.grad(_band_loss(covariance_band.taped_posterior_band, W)), static_argnums=2)(cm, w, method)
    for a, b in zip(jax.tree_util.tree_leaves(new), jax.tree_util.tree_leaves(old)):
        scale = max(1.0, float(np.max(np.abs(b))))
        assert float(np.max(np.abs(a - b))) / scale < 1e-10


def _theta_model(model):
    """A 3-parameter family through A, Q and R (every kind of entry H depends on)."""
    def make(theta):
        R = model.R
        R = kx.DiagonalNoise(R.variances * jnp.exp(theta[2])) if isinstance(R, kx.DiagonalNoise) \
            else R * jnp.exp(theta[2])
        return model.replace(A=model.A * (1 + theta[0]), Q=model.Q * jnp.exp(theta[1]), R=R)

    return make


@pytest.mark.parametrize("method", METHODS)
def test_forward_mode_and_hessian_equal_taped_route(rng, method):
    T, n, p = 8, 2, 2
    _, y, mask, model = _problem(rng, T, n, p, tv=False, diag_R=False)
    cm, w = _canonical(model, y, mask)
    W = _weights(rng, T, n, p)
    make = _theta_model(cm)
    theta = jnp.array([0.1, -0.2, 0.3])
    direction = jnp.array([0.3, -0.7, 0.5])

    def results(fn):
        loss = lambda th: _band_loss(fn, W)(make(th), w, method)  # noqa: E731
        band = lambda th: fn(make(th), w, method)  # noqa: E731
        return {"jvp": jax.jvp(band, (theta,), (direction,))[1],
                "jacfwd": jax.jacfwd(loss)(theta),
                "hessian": jax.hessian(loss)(theta),
                "hessian_rev": jax.jacrev(jax.jacrev(loss))(theta)}

    new = jax.jit(lambda: results(covariance_band.posterior_band))()
    old = jax.jit(lambda: results(covariance_band.taped_posterior_band))()
    for key in new:
        for a, b in zip(jax.tree_util.tree_leaves(new[key]), jax.tree_util.tree_leaves(old[key])):
            scale = max(1.0, float(np.max(np.abs(b))))
            assert float(np.max(np.abs(a - b))) / scale < 1e-9, key


@pytest.mark.parametrize("method", METHODS)
def test_vmap_of_grad(rng, method):
    T, n, p, B = 10, 3, 2, 3
    md, _, _, model = _problem(rng, T, n, p, tv=False, diag_R=False)
    data = [ref.random_data(rng, md, T, missing=0.3) for _ in range(B)]
    ys = jnp.asarray(np.stack([d[0] for d in data]))
    masks = jnp.asarray(np.stack([d[1] for d in data]))
    W = _weights(rng, T, n, p)
    grad = jax.grad(lambda m, y, k: _loss(m, y, k, W, method))
    batched = jax.jit(jax.vmap(grad, in_axes=(None, 0, 0)))(model, ys, masks)
    for i in range(B):
        one = grad(model, ys[i], masks[i])
        for a, b in zip(jax.tree_util.tree_leaves(batched), jax.tree_util.tree_leaves(one)):
            np.testing.assert_allclose(a[i], b, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("method", METHODS)
def test_float32_agrees_with_float64(rng, method):
    T, n, p = 20, 3, 2
    md, y, mask, model = _problem(rng, T, n, p, tv=False, diag_R=False)
    W = _weights(rng, T, n, p)
    grad = jax.jit(jax.grad(_loss), static_argnums=4)
    g64 = grad(model, y, mask, W, method)
    W32 = tuple(jnp.asarray(x, jnp.float32) for x in W)
    g32 = grad(to_model(md, np.float32), jnp.asarray(y, jnp.float32), mask, W32, method)
    for field in ("A", "Q", "C", "R", "x0_cov"):
        a, b = np.asarray(getattr(g32, field)), np.asarray(getattr(g64, field))
        assert a.dtype == np.float32
        err = float(np.max(np.abs(a - b))) / max(1.0, float(np.max(np.abs(b))))
        assert err < 1e-4, (field, err)


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("field", ["R", "x0_cov", "C"])
def test_gradient_of_one_field(rng, method, field):
    """Only one field moves, so some blocks of dH are constant (zero): reverse mode must still transpose."""
    T, n, p = 7, 2, 2
    _, y, mask, model = _problem(rng, T, n, p, tv=False, diag_R=False)
    cm, w = _canonical(model, y, mask)
    W = _weights(rng, T, n, p)

    def grad(fn):
        loss = lambda v: _band_loss(fn, W)(cm.replace(**{field: v}), w, method)  # noqa: E731
        return jax.jit(jax.grad(loss))(getattr(cm, field))

    new, old = grad(covariance_band.posterior_band), grad(covariance_band.taped_posterior_band)
    scale = max(1.0, float(np.max(np.abs(old))))
    assert float(np.max(np.abs(new - old))) / scale < 1e-10


@pytest.mark.parametrize("tv, diag_R, prior", [(False, False, True), (True, False, False), (True, True, True)])
def test_precision_tangent_of_model_equals_jvp_of_assembly(rng, tv, diag_R, prior):
    """The hand-split tangent of H (dynamics by JAX, measurements by formula) equals JAX's JVP of ``assemble``."""
    from kalmax._src.normal_equations import assemble

    T, n, p = 6, 3, 3
    _, y, mask, model = _problem(rng, T, n, p, tv=tv, diag_R=diag_R)
    if not prior:
        model = model.replace(x0_cov=None, x0_mean=None)
    cm, w = _canonical(model, y, mask)
    cm = cm.replace(b=None, d=None, x0_mean=None)
    direction = jax.tree_util.tree_map(lambda a: jnp.asarray(rng.standard_normal(a.shape)), cm)
    got = covariance_band.precision_tangent_of_model(cm, w, direction, T)
    _, want = jax.jvp(lambda m: tuple(assemble(m, jnp.zeros_like(y), w)[:2]), (cm,), (direction,))
    np.testing.assert_allclose(0.5 * (got[0] + np.swapaxes(got[0], -1, -2)), want[0], atol=1e-10)
    np.testing.assert_allclose(got[1], want[1], atol=1e-10)


@pytest.mark.parametrize("method", ["cpu", "scan"])
def test_diagonal_process_noise_gives_the_dense_routes_gradient(method):
    # A per-step diagonal Q passed as variances (kept diagonal by the kernel)
    # against the same Q as dense matrices: the variances' gradient is the
    # diagonal of the dense one (chain rule through Q = diag(q)).
    if not registry.is_available(method):
        pytest.skip(f"{method} not available")
    rng = np.random.default_rng(1)
    T, n, p = 30, 3, 2
    A, C = 0.9 * np.eye(n), rng.standard_normal((p, n))
    q = 0.1 * np.exp(0.3 * rng.standard_normal((T - 1, n)))
    y, mask = rng.standard_normal((T, p)), rng.random((T, p)) > 0.2

    def loss(Q):
        m = kx.StateSpace(A=A, C=C, Q=Q, R=0.5 * np.eye(p), x0_cov=np.eye(n))
        s = kx.smooth(m, y, mask, covariances=True, method=method)
        return jnp.sum(jnp.trace(s.state_cov, axis1=1, axis2=2)) + jnp.sum(s.state_cross_cov ** 2)

    v_diag, g_diag = jax.value_and_grad(lambda qv: loss(kx.DiagonalNoise(qv)))(jnp.asarray(q))
    v_dense, g_dense = jax.value_and_grad(loss)(jnp.asarray(np.stack([np.diag(r) for r in q])))
    np.testing.assert_allclose(v_diag, v_dense, rtol=1e-12)
    np.testing.assert_allclose(g_diag, np.diagonal(np.asarray(g_dense), axis1=1, axis2=2), rtol=1e-9, atol=1e-12)
