"""The compiled pull-back of a cotangent on H's blocks to the model (``kalmax_cpu_band_pullback``).

References:
- JAX's VJP of the vectorised assembly ``normal_equations.assemble`` (the
  route of the pure-JAX backends), on the same cotangents;
- central finite differences of the dense normal-equation matrix of
  tests/reference.py (H = FᵀWF, built without block formulas; common
  practice);
- end to end, gradients of a loss of the covariances on "cpu" (this
  pull-back) against "scan" (JAX's pull-back) and against central finite
  differences of the textbook RTS smoother's covariances (tests/reference.py:
  Särkkä (2013), Bayesian Filtering and Smoothing, ch. 8).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model
from kalmax._src.backends import cpu as cpu_backend
from kalmax._src.backends import registry
from kalmax._src.checks import canonicalize
from kalmax._src.normal_equations import assemble

pytestmark = pytest.mark.skipif(not registry.is_available("cpu"), reason="compiled kernel not built")

FIELDS = ("A", "Q", "C", "R", "x0_cov")


def _model_dict(rng, T, n, p, *, tv, prior=True):
    return ref.random_model(rng, n, p, T, time_varying=tv, full_R=True, prior=prior)


def _diag_noise(M):
    return kx.DiagonalNoise(np.diagonal(np.asarray(M), axis1=-2, axis2=-1).copy())


def _canonical(md, y, mask, *, diag_Q, diag_R, dtype=np.float64, prior=True):
    model = to_model(md, dtype, prior=prior)
    if diag_Q:
        model = model.replace(Q=_diag_noise(model.Q))
    if diag_R:
        model = model.replace(R=_diag_noise(model.R))
    model, y, mask, _, _ = canonicalize(model, jnp.asarray(y, dtype), jnp.asarray(mask),
                                        keep_diagonal_R=True, keep_diagonal_Q=True)
    return model.replace(b=None, d=None, x0_mean=None), y, mask.astype(y.dtype)


def _diagonalised(md, diag_Q, diag_R):
    """The reference model with Q, R replaced by their diagonals where the model keeps variances."""
    md = dict(md)
    for key, on in (("Q", diag_Q), ("R", diag_R)):
        if on:
            M = np.asarray(md[key])
            md[key] = np.diagonal(M, axis1=-2, axis2=-1)[..., None] * np.eye(M.shape[-1])
    return md


def _cotangents(rng, T, n, dtype=np.float64):
    # Not symmetric: the pull-back must read D̄ through its symmetric part, as the assembly does.
    return (jnp.asarray(rng.standard_normal((T, n, n)), dtype),
            jnp.asarray(rng.standard_normal((max(T - 1, 0), n, n)), dtype))


def _jax_pullback(model, y, w, D_bar, S_bar):
    T, n = D_bar.shape[0], D_bar.shape[-1]

    def blocks(m):
        system = assemble(m, jnp.zeros_like(y), w)
        return system.diag, jnp.broadcast_to(system.sub, (max(T - 1, 0), n, n))

    _, pull = jax.vjp(blocks, model)
    return pull((D_bar, S_bar))[0]


def _leaf(g, field):
    v = getattr(g, field)
    return np.asarray(v.variances if isinstance(v, kx.DiagonalNoise) else v)


def _assert_fields_close(got, want, tol, dtype=None):
    """Max abs difference per field, relative to max(1, max |want|), below tol; got's dtype checked when given."""
    for field in FIELDS:
        a, b = _leaf(got, field), _leaf(want, field)
        if dtype is not None:
            assert a.dtype == dtype, field
        assert float(np.max(np.abs(a - b))) / max(1.0, float(np.max(np.abs(b)))) < tol, field


CASES = [  # (tv, diag_Q, diag_R, prior, missing)
    (False, False, False, True, 0.3),
    (True, False, False, True, 0.3),
    (False, True, True, True, 0.3),
    (True, True, True, False, 0.4),
    (True, False, True, True, 0.0),
    (False, True, False, False, 0.5),
]


@pytest.mark.parametrize("tv, diag_Q, diag_R, prior, missing", CASES)
def test_pullback_equals_jax_vjp_of_assembly(rng, tv, diag_Q, diag_R, prior, missing):
    T, n, p = 9, 3, 4
    md = _model_dict(rng, T, n, p, tv=tv, prior=prior)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    mask[2] = False  # a step with nothing observed
    cm, yy, w = _canonical(md, y, mask, diag_Q=diag_Q, diag_R=diag_R, prior=prior)
    D_bar, S_bar = _cotangents(rng, T, n)
    got = jax.jit(cpu_backend.band_pullback)(cm, w, D_bar, S_bar)
    want = _jax_pullback(cm, yy, w, D_bar, S_bar)
    for field in FIELDS:
        if getattr(cm, field) is None:
            assert getattr(got, field) is None
            continue
        a, b = _leaf(got, field), _leaf(want, field)
        assert a.shape == b.shape, field
        scale = max(1.0, float(np.max(np.abs(b))))
        assert float(np.max(np.abs(a - b))) / scale < 1e-12, field
    assert got.b is None and got.d is None and got.x0_mean is None


@pytest.mark.parametrize("tv, diag_Q, diag_R", [(False, False, False), (True, True, True)])
def test_pullback_equals_finite_differences_of_dense_H(rng, tv, diag_Q, diag_R):
    """⟨model_bar, V⟩ = d/dε ⟨(D̄, S̄), blocks of H(θ + εV)⟩ with H the dense reference matrix."""
    T, n, p = 6, 2, 3
    md = _diagonalised(_model_dict(rng, T, n, p, tv=tv), diag_Q, diag_R)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    cm, _, w = _canonical(md, y, mask, diag_Q=diag_Q, diag_R=diag_R)
    D_bar, S_bar = _cotangents(rng, T, n)
    g = cpu_backend.band_pullback(cm, w, D_bar, S_bar)
    Dn, Sn = np.asarray(D_bar), np.asarray(S_bar)

    def pairing(mdict):
        H, _ = ref.dense_normal_equations(mdict, y, mask)
        val = 0.0
        for t in range(T):
            val += np.sum(Dn[t] * H[t * n:(t + 1) * n, t * n:(t + 1) * n])
        for t in range(T - 1):
            val += np.sum(Sn[t] * H[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n])
        return val

    h = 1e-6
    keys = {"A": "A", "Q": "Q", "C": "C", "R": "R", "x0_cov": "P0"}
    for field, key in keys.items():
        M = np.asarray(md[key])
        diag = (field == "Q" and diag_Q) or (field == "R" and diag_R)
        if diag:  # a direction in the variances
            v = rng.standard_normal(M.shape[:-1])
            V, dot_with = v[..., None] * np.eye(M.shape[-1]), v
        elif field in ("Q", "R", "x0_cov"):
            V = rng.standard_normal(M.shape)
            V = 0.5 * (V + np.swapaxes(V, -1, -2))
            dot_with = V
        else:
            V = dot_with = rng.standard_normal(M.shape)
        fd = (pairing(dict(md, **{key: M + h * V})) - pairing(dict(md, **{key: M - h * V}))) / (2 * h)
        got = float(np.sum(_leaf(g, field) * dot_with))
        assert abs(got - fd) < 1e-7 * (1 + abs(fd)), (field, got, fd)


def test_pullback_float32_computes_in_double(rng):
    T, n, p = 12, 3, 2
    md = _model_dict(rng, T, n, p, tv=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    cm64, y64, w64 = _canonical(md, y, mask, diag_Q=False, diag_R=True)
    cm32, _, w32 = _canonical(md, y, mask, diag_Q=False, diag_R=True, dtype=np.float32)
    D_bar, S_bar = _cotangents(rng, T, n)
    g32 = cpu_backend.band_pullback(cm32, w32, D_bar.astype(jnp.float32), S_bar.astype(jnp.float32))
    want = _jax_pullback(cm64, y64, w64, D_bar.astype(jnp.float32).astype(jnp.float64),
                         S_bar.astype(jnp.float32).astype(jnp.float64))
    # Inputs rounded to float32 (relative 6e-8) and one rounding of the result.
    _assert_fields_close(g32, want, 1e-5, np.float32)


def _small_problem(rng, T=5, n=2, p=2):
    md = _model_dict(rng, T, n, p, tv=False)
    y, mask = ref.random_data(rng, md, T, missing=0.0)
    cm, _, w = _canonical(md, y, mask, diag_Q=False, diag_R=False)
    return (cm, w) + _cotangents(rng, T, n)


def test_pullback_reports_bad_shapes(rng):
    T, n = 5, 2
    cm, w, D_bar, S_bar = _small_problem(rng, T, n)
    with pytest.raises(Exception, match="D_bar has shape"):
        cpu_backend.band_pullback(cm, w, jnp.zeros((T, n, n + 1)), S_bar)
    with pytest.raises(Exception, match="S_bar has shape"):
        cpu_backend.band_pullback(cm, w, D_bar, jnp.zeros((T, n, n)))
    with pytest.raises(Exception, match="y must have shape"):
        cpu_backend.band_pullback(cm, w, jnp.zeros((T + 1, n, n)), jnp.zeros((T, n, n)))
    with pytest.raises(Exception, match="A has shape"):
        cpu_backend.band_pullback(cm.replace(A=jnp.zeros((n + 1, n + 1))), w, D_bar, S_bar)


def test_pullback_is_nan_for_a_bad_noise(rng):
    cm, w, D_bar, S_bar = _small_problem(rng)
    g = cpu_backend.band_pullback(cm.replace(R=-cm.R), w, D_bar, S_bar)
    assert all(np.all(np.isnan(_leaf(g, f))) for f in FIELDS)


# ---------------------------------------------------------------------------
# End to end: gradients of a loss of the covariances.


def _loss(model, y, mask, W, method):
    out = kx.smooth(model, y, mask, covariances=True, method=method)
    return (jnp.sum(jnp.trace(out.state_cov, axis1=-2, axis2=-1))
            + jnp.sum(W * out.state_cross_cov))


def _problem_model(md, diag_Q, diag_R, dtype=np.float64):
    model = to_model(md, dtype)
    if diag_Q:
        model = model.replace(Q=_diag_noise(model.Q))
    if diag_R:
        model = model.replace(R=_diag_noise(model.R))
    return model


@pytest.mark.parametrize("tv, diag_Q, diag_R", [(False, False, False), (True, False, False),
                                                (False, True, True), (True, True, True)])
def test_covariance_gradients_on_cpu_equal_jax_pullback(rng, tv, diag_Q, diag_R):
    if not registry.is_available("scan"):
        pytest.skip("scan not available")
    T, n, p = 11, 3, 3
    md = _diagonalised(_model_dict(rng, T, n, p, tv=tv), diag_Q, diag_R)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = _problem_model(md, diag_Q, diag_R)
    W = jnp.asarray(rng.standard_normal((T - 1, n, n)))
    grad = jax.jit(jax.grad(_loss), static_argnums=4)
    _assert_fields_close(grad(model, y, mask, W, "cpu"), grad(model, y, mask, W, "scan"), 1e-9)


def test_covariance_gradients_with_diagonal_noise_match_finite_differences(rng):
    T, n, p = 8, 2, 3
    md = _diagonalised(_model_dict(rng, T, n, p, tv=True), True, True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    W = rng.standard_normal((T - 1, n, n))
    g = jax.grad(_loss)(_problem_model(md, True, True), y, mask, jnp.asarray(W), "cpu")

    def reference_loss(mdict):
        _, P, X = ref.rts_smoother(mdict, y, mask, return_cross=True)
        return np.sum(np.trace(P, axis1=-2, axis2=-1)) + np.sum(W * X)

    h = 1e-5
    for field in ("Q", "R"):
        M = np.asarray(md[field])
        v = rng.standard_normal(M.shape[:-1])
        V = v[..., None] * np.eye(M.shape[-1])
        fd = (reference_loss(dict(md, **{field: M + h * V})) - reference_loss(dict(md, **{field: M - h * V}))) / (2 * h)
        got = float(np.sum(_leaf(g, field) * v))
        assert abs(got - fd) < 1e-6 * (1 + abs(fd)), (field, got, fd)


def test_covariance_gradients_vmap_and_float32(rng):
    T, n, p, B = 10, 3, 2, 3
    md = _model_dict(rng, T, n, p, tv=False)
    data = [ref.random_data(rng, md, T, missing=0.3) for _ in range(B)]
    ys = jnp.asarray(np.stack([d[0] for d in data]))
    masks = jnp.asarray(np.stack([d[1] for d in data]))
    W = jnp.asarray(rng.standard_normal((T - 1, n, n)))
    model = _problem_model(md, True, False)
    grad = jax.grad(lambda m, y, k: _loss(m, y, k, W, "cpu"))
    batched = jax.jit(jax.vmap(grad, in_axes=(None, 0, 0)))(model, ys, masks)
    for i in range(B):
        one = jax.grad(lambda m: _loss(m, ys[i], masks[i], W, "scan"))(model) \
            if registry.is_available("scan") else grad(model, ys[i], masks[i])
        _assert_fields_close(jax.tree_util.tree_map(lambda a: a[i], batched), one, 1e-9)
    model32 = _problem_model(md, True, False, np.float32)
    g32 = jax.jit(jax.grad(lambda m: _loss(m, ys[0].astype(jnp.float32), masks[0], W.astype(jnp.float32), "cpu")))(
        model32)
    _assert_fields_close(g32, grad(model, ys[0], masks[0]), 1e-4, np.float32)


def test_reverse_mode_on_cpu_calls_the_pullback(rng):
    T, n, p = 6, 2, 2
    md = _model_dict(rng, T, n, p, tv=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    W = jnp.asarray(rng.standard_normal((T - 1, n, n)))
    model = to_model(md)
    text = str(jax.make_jaxpr(jax.grad(_loss), static_argnums=4)(model, y, mask, W, "cpu"))
    assert "kalmax_cpu_band_pullback" in text
