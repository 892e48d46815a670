"""Parameterisations (kalmax/_src/params.py): validity, invertibility, fixed entries, bounds."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx


def _spd(rng, k, lead=()):
    B = rng.standard_normal(lead + (k, k))
    return B @ np.swapaxes(B, -1, -2) + k * np.eye(k)


def _numpy_cholesky_cov(u, k):
    """Textbook construction, written with loops: L lower triangular, row-major
    packing of the lower triangle, diagonal stored as logs; S = L Lᵀ."""
    L = np.zeros((k, k))
    pos = 0
    for i in range(k):
        for j in range(i + 1):
            L[i, j] = np.exp(u[pos]) if i == j else u[pos]
            pos += 1
    return L @ L.T


def test_cholesky_cov_matches_numpy_and_is_spd():
    rng = np.random.default_rng(0)
    k = 3
    u = rng.standard_normal(6)
    S = np.asarray(kx.CholeskyCov().forward(jnp.asarray(u), None))
    np.testing.assert_allclose(S, _numpy_cholesky_cov(u, k), rtol=1e-13)
    np.testing.assert_array_equal(S, S.T)
    assert np.linalg.eigvalsh(S).min() > 0
    # Inverse: the unique packed factor of an SPD matrix (Cholesky uniqueness,
    # Golub & Van Loan, Matrix Computations, 4th ed., Thm 4.2.7 -- number from memory).
    np.testing.assert_allclose(kx.CholeskyCov().inverse(jnp.asarray(S), None), u, rtol=1e-12, atol=1e-12)
    # Batched (time-varying) fields.
    Ss = _spd(rng, k, (4,))
    back = kx.CholeskyCov().forward(kx.CholeskyCov().inverse(jnp.asarray(Ss), None), None)
    np.testing.assert_allclose(back, Ss, rtol=1e-12)
    with pytest.raises(ValueError, match="k\\(k\\+1\\)/2"):
        kx.CholeskyCov().forward(jnp.zeros(5), None)


@pytest.mark.parametrize(
    "transform, value",
    [
        (kx.Identity(), np.array([[0.3, -2.0], [1.0, 4.0]])),
        (kx.Positive(), np.array([0.1, 2.0, 30.0])),
        (kx.Bounded(-1.0, 1.0), np.array([[-0.99, 0.0], [0.5, 0.999]])),
        (kx.Bounded(lower=2.0), np.array([2.001, 5.0])),
        (kx.Bounded(upper=0.0), np.array([-3.0, -1e-3])),
        (kx.DiagonalCov(), np.diag([0.5, 2.0, 7.0])),
    ],
)
def test_round_trips(transform, value):
    value = jnp.asarray(value)
    u = transform.inverse(value, value)
    np.testing.assert_allclose(transform.forward(u, value), value, rtol=1e-10, atol=1e-12)
    u2 = jnp.asarray(np.random.default_rng(1).standard_normal(u.shape))
    np.testing.assert_allclose(transform.inverse(transform.forward(u2, value), value), u2, rtol=1e-9, atol=1e-9)


def test_bounds_hold_for_extreme_unconstrained_values():
    u = jnp.linspace(-30.0, 30.0, 61)
    v = kx.Bounded(-2.0, 3.0).forward(u, None)
    assert bool(jnp.all((v > -2.0) & (v < 3.0)))
    assert bool(jnp.all(kx.Bounded(lower=1.0).forward(u, None) > 1.0))
    assert bool(jnp.all(kx.Bounded(upper=1.0).forward(u, None) < 1.0))
    with pytest.raises(ValueError):
        kx.Bounded(1.0, 1.0)
    with pytest.raises(ValueError):
        kx.Bounded()


def test_free_entries_hold_the_rest_at_nominal():
    nominal = jnp.array([[0.9, 0.2], [5.0, 0.7]])  # 5.0 lies outside the bounds but is fixed
    free = np.array([[True, False], [False, True]])
    tr = kx.FreeEntries(free, kx.Bounded(-1.0, 1.0))
    u = tr.inverse(nominal, nominal)
    assert u.shape == (2,)  # minimal: one number per free entry
    np.testing.assert_allclose(tr.forward(u, nominal), nominal, rtol=1e-12)
    out = tr.forward(jnp.array([10.0, -10.0]), nominal)
    assert out[0, 1] == 0.2 and out[1, 0] == 5.0
    assert -1 < out[0, 0] < 1 and -1 < out[1, 1] < 1
    g = jax.grad(lambda v: jnp.sum(tr.forward(v, nominal) ** 2))(u)
    assert bool(jnp.all(jnp.isfinite(g))) and bool(jnp.all(g != 0))
    with pytest.raises(TypeError):
        kx.FreeEntries(free, kx.CholeskyCov())
    with pytest.raises(TypeError):
        kx.FreeEntries(free.astype(int))


def test_log_scale():
    nominal = jnp.array([[2.0, 0.5], [0.5, 1.0]])
    tr = kx.LogScale()
    np.testing.assert_allclose(tr.forward(jnp.log(3.0), nominal), 3 * nominal)
    np.testing.assert_allclose(tr.inverse(3 * nominal, nominal), np.log(3.0))
    trs = kx.LogScale(per_step=True)
    nom_tv = jnp.stack([nominal, 2 * nominal])
    np.testing.assert_allclose(trs.inverse(trs.forward(jnp.array([0.1, -0.4]), nom_tv), nom_tv), [0.1, -0.4])


def _nominal():
    rng = np.random.default_rng(2)
    return kx.StateSpace(
        A=jnp.asarray([[0.9, 0.1], [0.0, 0.8]]),
        C=jnp.asarray(rng.standard_normal((3, 2))),
        Q=jnp.asarray(np.diag([0.2, 0.1])),
        R=jnp.asarray(_spd(rng, 3) / 3),
        x0_mean=jnp.zeros(2),
        x0_cov=jnp.eye(2),
    )


def test_parameterization_inverse_jit_grad_vmap():
    nominal = _nominal()
    spec = kx.Parameterization(
        nominal,
        A=kx.FreeEntries(np.array([[True, True], [False, True]]), kx.Bounded(-1.0, 1.0)),
        Q=kx.DiagonalCov(),
        R=kx.CholeskyCov(),
        d=kx.Identity(),  # None in the nominal: starts at zero
    )
    params = spec.init()
    assert sorted(params) == ["A", "Q", "R", "d"]
    assert params["A"].shape == (3,) and params["R"].shape == (6,) and params["d"].shape == (3,)
    m = spec.model(params)
    for f in ("A", "C", "Q", "R", "x0_mean", "x0_cov"):
        np.testing.assert_allclose(getattr(m, f), getattr(nominal, f), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(m.d, 0.0)
    # The inverse of any model built by spec is its params.
    p2 = jax.tree_util.tree_map(lambda x: x + 0.1, params)
    back = spec.unconstrained(spec.model(p2))
    for k in params:
        np.testing.assert_allclose(back[k], p2[k], rtol=1e-10, atol=1e-12)

    # Compose with the smoother: jit, grad against central differences.
    rng = np.random.default_rng(3)
    y = jnp.asarray(rng.standard_normal((12, 3)))
    mask = jnp.ones((12, 3), bool)
    hold = kx.holdout_entries(mask, 0.3, 0)
    loss = jax.jit(lambda p: kx.prediction_error(spec.model(p), y, mask, hold))
    g = jax.grad(loss)(params)
    flat, unravel = jax.flatten_util.ravel_pytree(params)
    gflat, _ = jax.flatten_util.ravel_pytree(g)
    eps = 1e-6
    fd = np.array([(loss(unravel(flat + eps * e)) - loss(unravel(flat - eps * e))) / (2 * eps)
                   for e in np.eye(flat.size)])
    np.testing.assert_allclose(gflat, fd, rtol=1e-5, atol=1e-8)
    # vmap over a batch of parameter pytrees.
    batch = jax.tree_util.tree_map(lambda x: jnp.stack([x, x + 0.05]), params)
    assert jax.vmap(loss)(batch).shape == (2,)


def test_parameterization_float32_and_errors():
    nominal = jax.tree_util.tree_map(lambda x: jnp.asarray(x, jnp.float32), _nominal())
    spec = kx.Parameterization(nominal, R=kx.CholeskyCov(), Q=kx.LogScale())
    params = spec.init()
    assert all(v.dtype == jnp.float32 for v in params.values())
    assert spec.model(params).R.dtype == jnp.float32
    with pytest.raises(ValueError, match="unknown model field"):
        kx.Parameterization(nominal, Z=kx.Identity())
    with pytest.raises(ValueError, match="flat prior"):
        kx.Parameterization(nominal.replace(x0_mean=None, x0_cov=None), x0_cov=kx.CholeskyCov())
    with pytest.raises(ValueError, match="missing"):
        spec.model({"R": params["R"]})
