"""Proximal / projection steps as Optax transformations (kalmax/_src/prox.py).

Each proximal map is checked (i) against its closed form written here in
NumPy and (ii) against a numerical minimisation (scipy.optimize) of its
definition prox_{ηg}(v) = argmin_x g(x) + ‖x − v‖²/(2η). Closed forms:
Parikh & Boyd, "Proximal Algorithms", Found. Trends Optim. 1(3), 2014,
§6.1 (ridge / quadratic), §6.5.2 (soft thresholding), §6.7.3 (singular value
thresholding), §6.2 (projections) -- section numbers from memory.
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest
from scipy import optimize

import kalmax as kx

ETA, LAM = 0.3, 1.7


def _apply(tx, params):
    """params⁺ from one application of a transformation with a zero incoming update."""
    state = tx.init(params)
    upd, _ = tx.update(jax.tree_util.tree_map(jnp.zeros_like, params), state, params)
    return optax.apply_updates(params, upd)


def _minimise(F, x0):
    """Numerical minimiser of a strongly convex (possibly non-smooth) function."""
    best = None
    for method, opts in (("Nelder-Mead", {"xatol": 1e-11, "fatol": 1e-14, "maxiter": 40000, "maxfev": 40000}),
                         ("Powell", {"xtol": 1e-11, "ftol": 1e-14, "maxiter": 40000})):
        res = optimize.minimize(F, x0, method=method, options=opts)
        if best is None or res.fun < best.fun:
            best = res
    return best


def _check_against_definition(g, v, closed):
    """closed must minimise F(x) = g(x) + ‖x − v‖²/(2η): no numerical minimiser does
    better, and by 1/η-strong convexity ‖x − closed‖² ≤ 2η (F(x) − F(closed))."""
    shape = v.shape
    F = lambda x: g(x.reshape(shape)) + np.sum((x - v.ravel()) ** 2) / (2 * ETA)  # noqa: E731
    res = _minimise(F, v.ravel() + 0.01)
    assert F(closed.ravel()) <= res.fun + 1e-10
    np.testing.assert_allclose(res.x.reshape(shape), closed, atol=2e-4)


def test_ridge():
    rng = np.random.default_rng(0)
    v, c = rng.standard_normal((3, 2)), rng.standard_normal((3, 2))
    got = np.asarray(_apply(kx.prox_ridge(LAM, ETA, center=jnp.asarray(c)), jnp.asarray(v)))
    closed = (v + ETA * LAM * c) / (1 + ETA * LAM)
    np.testing.assert_allclose(got, closed, rtol=1e-13)
    _check_against_definition(lambda x: 0.5 * LAM * np.sum((x - c) ** 2), v, got)


def test_l1():
    rng = np.random.default_rng(1)
    v = rng.standard_normal(7) * 1.5
    v[0] = 0.2  # inside the threshold ηλ = 0.51: becomes exactly 0
    got = np.asarray(_apply(kx.prox_l1(LAM, ETA), jnp.asarray(v)))
    closed = np.sign(v) * np.maximum(np.abs(v) - ETA * LAM, 0)
    np.testing.assert_allclose(got, closed, rtol=1e-13)
    assert got[0] == 0.0
    _check_against_definition(lambda x: LAM * np.sum(np.abs(x)), v, got)
    # With a centre: shrink toward c instead of 0.
    c = rng.standard_normal(7)
    got_c = np.asarray(_apply(kx.prox_l1(LAM, ETA, center=jnp.asarray(c)), jnp.asarray(v)))
    np.testing.assert_allclose(got_c, c + np.sign(v - c) * np.maximum(np.abs(v - c) - ETA * LAM, 0), rtol=1e-13)


def test_nuclear():
    rng = np.random.default_rng(2)
    v = rng.standard_normal((2, 3)) * 2
    got = np.asarray(_apply(kx.prox_nuclear(LAM, ETA), jnp.asarray(v)))
    U, s, Vt = np.linalg.svd(v, full_matrices=False)
    closed = U @ np.diag(np.maximum(s - ETA * LAM, 0)) @ Vt
    np.testing.assert_allclose(got, closed, rtol=1e-12, atol=1e-13)
    _check_against_definition(lambda x: LAM * np.sum(np.linalg.svd(x, compute_uv=False)), v, got)
    # Batched over a leading (time) axis, and a threshold that lowers the rank.
    vs = rng.standard_normal((4, 3, 3))
    big = np.asarray(_apply(kx.prox_nuclear(1.0, 1.0), jnp.asarray(vs)))
    for k in range(4):
        s_k = np.linalg.svd(vs[k], compute_uv=False)
        assert np.linalg.matrix_rank(big[k], tol=1e-9) == np.sum(s_k > 1.0)
    with pytest.raises(ValueError, match="matrices"):
        _apply(kx.prox_nuclear(1.0, 1.0), jnp.ones(3))


def test_box_and_fixed():
    rng = np.random.default_rng(3)
    v = rng.standard_normal(6) * 2
    lo, hi = -0.5, np.array([1.0, 0.2, 0.3, 2.0, 0.0, 1.0])
    got = np.asarray(_apply(kx.project_box(lo, jnp.asarray(hi)), jnp.asarray(v)))
    np.testing.assert_allclose(got, np.clip(v, lo, hi))
    # Projection = argmin ‖x − v‖² over the box (scipy, bound-constrained).
    res = optimize.minimize(lambda x: np.sum((x - v) ** 2), np.zeros(6), method="L-BFGS-B",
                            bounds=list(zip(np.full(6, lo), hi)), options={"ftol": 1e-15, "gtol": 1e-12})
    np.testing.assert_allclose(res.x, got, atol=1e-6)

    free = np.array([True, False, True, True, False, False])
    held = rng.standard_normal(6)
    got = np.asarray(_apply(kx.project_fixed(jnp.asarray(free), jnp.asarray(held)), jnp.asarray(v)))
    np.testing.assert_allclose(got, np.where(free, v, held))
    # Projection onto the affine set {x: x = held off 'free'} (scipy, equality-constrained).
    cons = {"type": "eq", "fun": lambda x: (x - held)[~free]}
    res = optimize.minimize(lambda x: np.sum((x - v) ** 2), np.zeros(6), method="SLSQP", constraints=[cons],
                            options={"ftol": 1e-14})
    np.testing.assert_allclose(res.x, got, atol=1e-6)


def test_update_is_prox_of_params_plus_incoming_update():
    rng = np.random.default_rng(4)
    params = {"A": jnp.asarray(rng.standard_normal((2, 2))), "C": jnp.asarray(rng.standard_normal((3, 2)))}
    grads = jax.tree_util.tree_map(lambda x: jnp.asarray(rng.standard_normal(x.shape)), params)
    tx = optax.chain(optax.sgd(ETA), kx.prox_l1(LAM, ETA))
    upd, _ = jax.jit(tx.update)(grads, tx.init(params), params)
    for k in params:
        v = np.asarray(params[k] - ETA * grads[k])
        np.testing.assert_allclose(params[k] + upd[k], np.sign(v) * np.maximum(np.abs(v) - ETA * LAM, 0),
                                   rtol=1e-12, atol=1e-14)


def test_masked_with_full_tree_center_and_schedule():
    params = {"A": jnp.array([[1.0, 2.0], [3.0, 4.0]]), "C": jnp.array([[5.0, 6.0]])}
    center = {"A": jnp.ones((2, 2)), "C": jnp.zeros((1, 2))}
    sched = optax.constant_schedule(ETA)
    tx = optax.masked(kx.prox_ridge(LAM, sched, center=center), {"A": True, "C": False})
    out = _apply(tx, params)
    np.testing.assert_allclose(out["A"], (params["A"] + ETA * LAM) / (1 + ETA * LAM))
    np.testing.assert_array_equal(out["C"], params["C"])  # untouched
    with pytest.raises(ValueError, match="parameters"):
        kx.prox_l1(1.0, 1.0).update(params, kx.prox_l1(1.0, 1.0).init(params))


def test_proximal_gradient_solves_a_lasso():
    """optax.chain(sgd(η), prox_l1(λ, η)) is ISTA (Parikh & Boyd 2014, §4.2, from
    memory); at its limit the lasso optimality conditions hold (checked in NumPy):
    Xᵀ(y − Xβ) = λ sign(β) where β ≠ 0, |Xᵀ(y − Xβ)| ≤ λ where β = 0."""
    rng = np.random.default_rng(5)
    X = rng.standard_normal((40, 6))
    beta_true = np.array([2.0, 0.0, 0.0, -1.5, 0.0, 0.5])
    y = X @ beta_true + 0.1 * rng.standard_normal(40)
    lam = 5.0
    eta = 1.0 / np.linalg.norm(X, 2) ** 2
    Xj, yj = jnp.asarray(X), jnp.asarray(y)
    f = lambda b: 0.5 * jnp.sum((yj - Xj @ b) ** 2)  # noqa: E731
    result = kx.fit(f, jnp.zeros(6), optax.chain(optax.sgd(eta), kx.prox_l1(lam, eta)), steps=3000, progress=False)
    b = np.asarray(result.params)
    g = X.T @ (y - X @ b)
    nz = b != 0
    assert nz.sum() >= 2 and (~nz).sum() >= 1
    np.testing.assert_allclose(g[nz], lam * np.sign(b[nz]), atol=1e-6)
    assert np.all(np.abs(g[~nz]) <= lam + 1e-6)
