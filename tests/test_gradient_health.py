"""Gradient health: no NaN or inf gradients for well-posed inputs at the edges.

Edges covered: a whole trajectory missing inside a vmapped batch, R at the
floor of a bounded parameterisation, T = 1, a fully missing series with a
prior, NaN/inf stored at missing entries, a channel that is never observed.
Where the gradient is finite it is also checked against central finite
differences (float64), so "finite" never hides "wrong".
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx

try:
    import robust_helpers as rh
except ImportError:  # tests/ imported as a package
    from tests import robust_helpers as rh


def _finite(tree):
    return all(bool(np.all(np.isfinite(np.asarray(a)))) for a in jax.tree.leaves(tree))


def _states(m, y, mask, method="auto"):
    return jnp.sum(jnp.sin(kx.smooth(m, y, mask, method=method).states))


def _measurements(m, y, mask, method="auto"):
    return jnp.sum(kx.smooth(m, y, mask, method=method).measurements ** 2)


def _loglik(m, y, mask, method="auto"):
    return kx.log_likelihood(m, y, mask, method=method)


def _covs(m, y, mask, method="auto"):
    out = kx.smooth(m, y, mask, covariances=True, method=method)
    return jnp.sum(out.state_cov) + jnp.sum(out.state_cross_cov) + jnp.sum(out.states)


# Scalar losses through every differentiable public entry point. The mask is
# an argument (not closed over) so that one compiled function serves every
# test with the same shapes.
LOSSES = {"states": _states, "measurements": _measurements, "log_likelihood": _loglik, "covariances": _covs}
METHODS = rh.backends()
VALUE_AND_GRAD = {k: jax.jit(jax.value_and_grad(f, argnums=(0, 1))) for k, f in LOSSES.items()}
VALUE = {k: jax.jit(f) for k, f in LOSSES.items()}
_VG_BY = {(k, m): jax.jit(jax.value_and_grad(lambda a, b, c, f=f, m=m: f(a, b, c, m), argnums=(0, 1)))
          for k, f in LOSSES.items() for m in METHODS}


def _grads_all(model, y, mask, names=tuple(LOSSES), method="auto"):
    if method == "auto":
        return {name: VALUE_AND_GRAD[name](model, y, mask) for name in names}
    return {name: _VG_BY[name, method](model, y, mask) for name in names}


def _fd_check(name, model, y, mask, field, rtol, h=1e-6, k=2):
    """Central differences of a loss along k random directions of one model
    field (or of y when field is 'y') against the AD gradient (common
    practice; h is chosen per problem so that rounding noise, of order
    κ·eps/h, stays below the truncation error)."""
    rng = np.random.default_rng(0)
    f = VALUE[name]
    _, (g_model, g_y) = VALUE_AND_GRAD[name](model, y, mask)
    base = np.asarray(y if field == "y" else getattr(model, field), np.float64)
    grad = np.asarray(g_y if field == "y" else getattr(g_model, field))
    for _ in range(k):
        v = rng.standard_normal(base.shape)
        if field in ("Q", "R", "x0_cov"):
            v = v + np.swapaxes(v, -1, -2)  # stay symmetric

        def at(s):
            val = base + s * v
            return float(f(model, val, mask) if field == "y" else f(model.replace(**{field: val}), y, mask))

        fd = (at(h) - at(-h)) / (2 * h)
        ad = float(np.sum(grad * v))
        assert abs(fd - ad) <= rtol * max(1.0, abs(fd)), f"{name}/{field}: AD {ad:.8e} vs FD {fd:.8e}"


# ---------------------------------------------------------------------------


def test_whole_trajectory_missing_in_a_batch(method="auto"):
    """Three trajectories, the middle one entirely missing (with a prior):
    batch gradients are finite and equal the sum of per-trajectory ones."""
    items = [rh.make_problem(s, 2, 2, 10) for s in range(3)]
    ys = np.stack([it[1] for it in items])
    masks = np.stack([it[2] for it in items])
    masks[1] = False
    ys[1] = np.nan
    bmodel = jax.tree.map(lambda *a: np.stack(a), *[it[0] for it in items])

    for name in ("states", "log_likelihood"):
        loss = LOSSES[name]
        batch_loss = lambda M, Y: jnp.sum(jax.vmap(lambda a, b, c: loss(a, b, c, method))(M, Y, masks))  # noqa: E731
        gM, gY = jax.jit(jax.grad(batch_loss, argnums=(0, 1)))(bmodel, ys)
        assert _finite((gM, gY)), name
        assert np.all(np.asarray(gY)[1] == 0)  # nothing observed: y cannot matter
        for k, (m, y, mask, _) in enumerate(items):
            _, (gm, gy) = _grads_all(m, ys[k], masks[k], (name,), method)[name]
            for a, b in zip(jax.tree.leaves(gm), jax.tree.leaves(jax.tree.map(lambda t: t[k], gM))):
                np.testing.assert_allclose(np.asarray(b), np.asarray(a), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("method", METHODS)
def test_unidentified_member_does_not_contaminate_the_batch(method):
    """vmap over three flat-prior trajectories, the middle one with nothing
    observed (not identified: NaN). The others' values, log-likelihoods and
    per-trajectory gradients are finite and equal their unbatched results."""
    items = [rh.make_problem(s, 2, 2, 8, prior=False) for s in range(3)]
    ys = np.stack([it[1] for it in items])
    masks = np.stack([it[2] for it in items])
    masks[1] = False
    bmodel = jax.tree.map(lambda *a: np.stack(a), *[it[0] for it in items])
    vg = jax.jit(jax.vmap(lambda m, y, k: _grads_all(m, y, k, ("states", "log_likelihood"), method)))
    res = vg(bmodel, ys, masks)
    for name in ("states", "log_likelihood"):
        vals, grads = res[name]
        assert np.isnan(vals[1]), name
        for k in (0, 2):
            val_k, g_k = _grads_all(items[k][0], ys[k], masks[k], (name,), method)[name]
            assert np.isfinite(vals[k]) and np.isclose(vals[k], val_k, rtol=1e-12), name
            gb = jax.tree.map(lambda t: t[k], grads)
            assert _finite(gb), name
            for a, b in zip(jax.tree.leaves(gb), jax.tree.leaves(g_k)):
                np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("prior", [True, False], ids=["prior", "flat"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=["float32", "float64"])
def test_single_time_step(dtype, prior):
    """T = 1 (no transitions; A, Q unused). With a flat prior p ≥ n and C of
    full column rank keep it identified."""
    model, y, mask, _ = rh.make_problem(7, 2, 3, 1, dtype=dtype, prior=prior, mask_mode="all_observed")
    names = tuple(LOSSES) if (dtype, prior) == (np.float64, True) else ("states", "log_likelihood")
    for name, (val, g) in _grads_all(model, y, mask, names).items():
        assert np.isfinite(val) and _finite(g), name
        gm, _ = g
        assert np.all(np.asarray(gm.A) == 0) and np.all(np.asarray(gm.Q) == 0), name
    if dtype == np.float64:
        for name in ("states", "log_likelihood"):
            for field in ("C", "R", "y") + (("x0_cov",) if prior else ()):
                _fd_check(name, model, y, mask, field, rtol=1e-6)


def test_single_time_step_nothing_observed_with_prior(method="auto"):
    model, y, mask, _ = rh.make_problem(8, 2, 3, 1, mask_mode="all_missing")
    for name, (val, g) in _grads_all(model, y, mask, method=method).items():
        assert np.isfinite(val) and _finite(g), name


def test_fully_missing_series_with_prior(method="auto"):
    """Nothing observed at all: the smoother returns the prior propagation;
    gradients w.r.t. A, b, prior are finite, w.r.t. y and R exactly zero."""
    model, y, mask, _ = rh.make_problem(9, 2, 2, 10, mask_mode="all_missing")
    res = _grads_all(model, y, mask, method=method)
    for name, (val, g) in res.items():
        gm, gy = g
        assert np.isfinite(val) and _finite(g), name
        assert np.all(np.asarray(gy) == 0) and np.all(np.asarray(gm.R) == 0), name
    _fd_check("states", model, y, mask, "A", rtol=1e-6)
    _fd_check("log_likelihood", model, y, mask, "Q", rtol=1e-6)


@pytest.mark.parametrize("method", METHODS)
def test_channel_never_observed(method):
    """Channel 1 is missing at every step and holds NaN: gradients w.r.t. its
    entries of y, C, d and R are exactly zero, everything is finite."""
    model, y, mask, _ = rh.make_problem(10, 2, 2, 10, mask_mode="all_observed")
    mask[:, 1] = False
    y = np.where(mask, y, np.nan)
    for name, (val, g) in _grads_all(model, y, mask, method=method).items():
        gm, gy = g
        assert np.isfinite(val) and _finite(g), name
        assert np.all(np.asarray(gy)[:, 1] == 0)
        assert np.all(np.asarray(gm.R)[..., 1, :] == 0) and np.all(np.asarray(gm.R)[..., :, 1] == 0)
        if name != "measurements":  # the imputed channel-1 measurements do depend on C[1], d[1]
            assert np.all(np.asarray(gm.C)[..., 1, :] == 0)
            assert np.all(np.asarray(gm.d)[..., 1] == 0)


def _floor_problem(dtype, n, p, floor):
    model, y, mask, _ = rh.make_problem(11, n, p, 10, dtype=dtype)
    bounded = kx.Bounded(lower=dtype(floor))

    def with_u(u):
        R = jnp.eye(p, dtype=dtype) * bounded.forward(u, None)
        return model.replace(R=R)

    return with_u, y, mask


FLOORS = [(np.float64, 3, 2, 1e-6), (np.float64, 2, 1, 1e-8), (np.float32, 2, 2, 1e-4)]


@pytest.mark.parametrize("dtype,n,p,floor", FLOORS, ids=[f"{np.dtype(d).name}-n{n}-p{p}-floor{f:g}" for d, n, p, f in FLOORS])
@pytest.mark.parametrize("u", [-40.0, -1e3], ids=["u-40", "u-1e3"])
def test_measurement_noise_at_the_floor_of_a_bounded_parameterisation(dtype, n, p, floor, u):
    """R = (floor + exp(u))·I: as u → −∞ (exp(-1e3) underflows to 0) R sits
    exactly at its floor. Value and gradient w.r.t. u must stay finite."""
    with_u, y, mask = _floor_problem(dtype, n, p, floor)
    for name in ("states", "log_likelihood"):
        val, g = FLOOR_VG[name](jnp.asarray(u, dtype), with_u, y, mask)
        assert np.isfinite(val) and np.isfinite(g), f"{name}: value {val}, gradient {g}"


def _floor_vg(name):
    def f(u, with_u, y, mask):
        return LOSSES[name](with_u(u), y, mask)
    return jax.jit(jax.value_and_grad(f), static_argnums=1)


FLOOR_VG = {name: _floor_vg(name) for name in ("states", "log_likelihood")}


def _float32_arithmetic(method):
    from kalmax._src.backends.base import arithmetic_dtype
    from kalmax._src.backends.registry import get_backend
    return arithmetic_dtype(get_backend(method), np.float32) == np.float32


_FLOOR_LIMIT = pytest.mark.xfail(strict=True, reason=(
    "documented limit of float32 arithmetic (the pure-JAX backends): float32 normal equations with "
    "R = 1e-6·I beside Q ≈ 0.3 (5.5 orders apart) lose the measurement information when H is formed, "
    "so values and gradients are NaN (loud, not wrong). The compiled kernel factors float32 problems "
    "in double and passes; float64, or a floor of 1e-4 in float32, is fine (tests above)"))


@pytest.mark.parametrize("method", [pytest.param(m, marks=_FLOOR_LIMIT) if _float32_arithmetic(m) else m
                                    for m in METHODS])
@pytest.mark.parametrize("n", [2, 3])
def test_float32_floor_1e_6(n, method):
    """Finite, and equal to the float64 value (the same rounded problem) within 1e-4."""
    with_u, y, mask = _floor_problem(np.float32, n, 2, 1e-6)
    vg = jax.jit(jax.value_and_grad(lambda u: _states(with_u(u), y, mask, method)))
    val, g = vg(jnp.asarray(-40.0, np.float32))
    assert np.isfinite(val) and np.isfinite(g)
    m64 = jax.tree_util.tree_map(lambda a: np.asarray(a, np.float64), with_u(jnp.asarray(-40.0, np.float32)))
    val64 = _states(m64, np.asarray(y, np.float64), mask, "scan")
    assert abs(float(val) - float(val64)) <= 1e-4 * max(1.0, abs(float(val64)))


def test_gradient_at_the_floor_matches_finite_differences():
    """float64, R = 1e-6·I exactly (u = −1e3): gradients w.r.t. R itself and C
    are finite and agree with central differences."""
    with_u, y, mask = _floor_problem(np.float64, 3, 2, 1e-6)
    model = with_u(jnp.asarray(-1e3))
    # κ(H) ≈ 1e7 here: forward values carry ~1e-9 relative noise, so h is
    # large and the tolerance loose (truncation error ~h²).
    for name in ("states", "log_likelihood"):
        _fd_check(name, model, y, mask, "C", rtol=1e-3, h=1e-5)
        # R through the parameter u at R = 2·floor (u = log floor): a relative
        # step of 1e-4 in R keeps rounding noise far below the derivative.
        u0, h = np.log(1e-6), 1e-4
        val, g = FLOOR_VG[name](jnp.asarray(u0), with_u, y, mask)
        f = lambda uu: float(FLOOR_VG[name](jnp.asarray(uu), with_u, y, mask)[0])  # noqa: E731
        fd = (f(u0 + h) - f(u0 - h)) / (2 * h)
        assert abs(fd - float(g)) <= 1e-4 * max(1.0, abs(fd)), (name, float(g), fd)


@pytest.mark.parametrize("fill", [np.nan, 1e300])
def test_garbage_at_missing_entries_gives_finite_gradients(fill, method="auto"):
    model, y, mask, _ = rh.make_problem(12, 2, 2, 10)
    y = np.where(mask, y, fill)
    for name, (val, g) in _grads_all(model, y, mask, ("states", "log_likelihood", "covariances"), method).items():
        assert np.isfinite(val) and _finite(g), name


def test_prediction_error_gradient_with_empty_fit_steps():
    """Held-out entries include whole steps; gradients of the held-out error
    are finite (and the held-out y entries do get a gradient)."""
    model, y, mask, _ = rh.make_problem(13, 2, 2, 10, mask_mode="all_observed")
    holdout = np.zeros_like(mask)
    holdout[4:7] = True  # three whole steps held out
    f = jax.jit(lambda m, yy, k: kx.prediction_error(m, yy, k, holdout))
    gm, gy = jax.jit(jax.grad(f, argnums=(0, 1)))(model, y, mask)
    assert _finite((gm, gy))
    assert np.all(np.asarray(gy)[4:7] != 0)
    rng = np.random.default_rng(1)
    v = rng.standard_normal(np.shape(model.Q))
    v = v + np.swapaxes(v, -1, -2)
    h = 1e-6
    Q = np.asarray(model.Q)
    fd = (float(f(model.replace(Q=Q + h * v), y, mask)) - float(f(model.replace(Q=Q - h * v), y, mask))) / (2 * h)
    assert abs(fd - float(np.sum(np.asarray(gm.Q) * v))) <= 1e-6 * max(1.0, abs(fd))
