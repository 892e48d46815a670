"""Property-based tests (hypothesis) of the public smoothing functions.

Random sizes (n, p in 1..8, T in 1..200), random per-field time variation,
random masks (fully missing steps, a fully missing series with a prior, a
single observed entry), float32 and float64. Properties:

1. the smoothed means solve the normal equations of the model, to a
   tolerance scaled by eps and the condition number of H (and NaN only for
   genuinely ill-posed problems);
2. permuting the measurement channels changes nothing (up to rounding);
3. values stored at missing entries of y (NaN, inf, huge) change nothing,
   gradients included (bit for bit);
4. vmap over a batch equals a Python loop;
5. jit equals no jit.

Hypothesis runs derandomized with a bounded number of examples so the file
is deterministic and fast; every distinct shape costs one XLA compile, which
dominates the run time. Counts of cases run are printed (pytest -s).
"""

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

import kalmax as kx  # noqa: E402

try:
    import robust_helpers as rh
except ImportError:  # tests/ imported as a package
    from tests import robust_helpers as rh

BOUNDED = dict(
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
CASES = {"normal_equations": 0, "permutation": 0, "missing_values": 0, "vmap": 0, "jit": 0}


@st.composite
def problems(draw, max_T=200):
    n = draw(st.integers(1, 8))
    p = draw(st.integers(1, 8))
    T = draw(st.integers(1, max_T))
    return dict(
        n=n, p=p, T=T,
        dtype=draw(st.sampled_from([np.float32, np.float64])),
        prior=draw(st.booleans()),
        offsets=draw(st.booleans()),
        varying=tuple(f for f in rh.FIELD_NAMES if draw(st.booleans())),
        mask_mode=draw(st.sampled_from(rh.MASK_MODES)),
        seed=draw(st.integers(0, 2**31 - 1)),
    )


def _build(spec, seed_offset=0):
    spec = dict(spec)
    seed = spec.pop("seed") + seed_offset
    n, p, T = spec.pop("n"), spec.pop("p"), spec.pop("T")
    return rh.make_problem(seed, n, p, T, **spec)


def _loss_weights(T, n, p, dtype):
    # Fixed, non-trivial cotangents for states and measurements.
    wx = np.cos(np.arange(T * n)).reshape(T, n).astype(dtype)
    wm = np.sin(np.arange(T * p) + 0.5).reshape(T, p).astype(dtype)
    return wx, wm


def _smooth_and_grad(model, y, mask, wx, wm):
    def loss(model, y):
        out = kx.smooth(model, y, mask)
        return jnp.sum(wx * out.states) + jnp.sum(wm * out.measurements), out

    (val, out), grads = jax.value_and_grad(loss, argnums=(0, 1), has_aux=True)(model, y)
    return out.states, out.measurements, grads


smooth_and_grad = jax.jit(_smooth_and_grad)


def _tree_max(tree):
    leaves = [np.abs(np.asarray(a, np.float64)).max() for a in jax.tree.leaves(tree) if np.size(a)]
    return max(leaves, default=0.0)


def _finite(tree):
    return all(bool(np.all(np.isfinite(np.asarray(a)))) for a in jax.tree.leaves(tree))


def _big(dtype):
    # A finite value far beyond any data scale: 1e300 in float64, near max in float32.
    return 1e300 if dtype == np.float64 else 3e38


@settings(max_examples=24, **BOUNDED)
@given(problems())
def test_solution_is_invariant_and_solves_normal_equations(spec):
    model, y, mask, md = _build(spec)
    T, p = y.shape
    n = spec["n"]
    dtype = spec["dtype"]
    wx, wm = _loss_weights(T, n, p, dtype)
    x, meas, grads = smooth_and_grad(model, y, mask, wx, wm)
    x = np.asarray(x)
    assert x.dtype == dtype and x.shape == (T, n) and meas.shape == (T, p)

    # 1. normal equations, tolerance scaled by eps and cond(H)
    cond = rh.check_normal_equations(md, y, mask, x, dtype)
    CASES["normal_equations"] += 1
    finite = bool(np.all(np.isfinite(x)))
    if finite:
        # gradient health in property form: a finite answer has finite gradients
        assert _finite(grads), "finite smoothed means but non-finite gradients"

    # 3. values at missing entries never matter, gradients included
    for fill in (np.nan, np.inf, -np.inf, _big(dtype), 0.0):
        y_fill = np.where(mask, y, np.asarray(fill, dtype)).astype(dtype)
        x2, meas2, grads2 = smooth_and_grad(model, y_fill, mask, wx, wm)
        np.testing.assert_array_equal(np.asarray(x2), x, err_msg=f"fill={fill}")
        np.testing.assert_array_equal(np.asarray(meas2), np.asarray(meas))
        for a, b in zip(jax.tree.leaves(grads2), jax.tree.leaves(grads)):
            np.testing.assert_array_equal(np.asarray(a), np.asarray(b), err_msg=f"gradient, fill={fill}")
        if finite:
            assert np.all(np.asarray(grads2[1])[~mask] == 0), "gradient at a missing entry of y"
    CASES["missing_values"] += 1

    # 2. permuting measurement channels
    perm = np.random.default_rng(spec["seed"]).permutation(p)
    mp = model.replace(
        C=np.asarray(model.C)[..., perm, :],
        R=np.asarray(model.R)[..., perm, :][..., :, perm],
        d=None if model.d is None else np.asarray(model.d)[..., perm],
    )
    xp, measp, gradsp = smooth_and_grad(mp, y[:, perm], mask[:, perm], wx, wm[:, perm])
    if not finite:
        assert np.all(np.isnan(np.asarray(xp)))
    else:
        c = 50 * (n + p) * rh.eps(dtype) * max(cond, 1.0)
        tol = c * max(np.abs(x).max(), 1.0)
        np.testing.assert_allclose(np.asarray(xp), x, rtol=0, atol=tol)
        np.testing.assert_allclose(np.asarray(measp), np.asarray(meas)[:, perm], rtol=0,
                                   atol=c * max(np.abs(np.asarray(meas)).max(), 1.0))
        gm, gy = grads
        gmp, gyp = gradsp
        gtol = c * max(_tree_max(grads), 1.0)
        np.testing.assert_allclose(np.asarray(gyp), np.asarray(gy)[:, perm], rtol=0, atol=gtol)
        for f in ("A", "Q", "b", "x0_mean", "x0_cov"):
            if getattr(gm, f) is not None:
                np.testing.assert_allclose(np.asarray(getattr(gmp, f)), np.asarray(getattr(gm, f)),
                                           rtol=0, atol=gtol, err_msg=f)
        np.testing.assert_allclose(np.asarray(gmp.C), np.asarray(gm.C)[..., perm, :], rtol=0, atol=gtol)
        # R's gradient is symmetric-part only; compare symmetrised blocks
        sym = lambda G: 0.5 * (G + np.swapaxes(G, -1, -2))  # noqa: E731
        np.testing.assert_allclose(sym(np.asarray(gmp.R)), sym(np.asarray(gm.R))[..., perm, :][..., :, perm],
                                   rtol=0, atol=gtol)
    CASES["permutation"] += 1


def _batched_fn(model, y, mask):
    out = kx.smooth(model, y, mask)
    g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y, mask).states ** 2))(model)
    return out.states, g


batched = jax.jit(jax.vmap(_batched_fn))
single = jax.jit(_batched_fn)


@settings(max_examples=8, **BOUNDED)
@given(problems(max_T=60))
def test_vmap_equals_loop(spec):
    items = [_build(spec, k) for k in range(3)]
    models = [it[0] for it in items]
    ys = np.stack([it[1] for it in items])
    masks = np.stack([it[2] for it in items])
    bmodel = jax.tree.map(lambda *a: np.stack(a), *models)
    bx, bg = batched(bmodel, ys, masks)
    dtype = spec["dtype"]
    for k, (model, y, mask, md) in enumerate(items):
        x, g = single(model, y, mask)
        x = np.asarray(x)
        if not np.all(np.isfinite(x)):
            assert np.all(np.isnan(np.asarray(bx[k])))
            continue
        H, _ = rh.normal_equations(md, y, mask)
        cond = np.linalg.cond(H)
        c = 50 * (spec["n"] + spec["p"]) * rh.eps(dtype) * cond
        np.testing.assert_allclose(np.asarray(bx[k]), x, rtol=0, atol=c * max(np.abs(x).max(), 1.0))
        gk = jax.tree.map(lambda a: a[k], bg)
        for a, b in zip(jax.tree.leaves(gk), jax.tree.leaves(g)):
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=0,
                                       atol=c * cond * max(_tree_max(g), 1.0))
    CASES["vmap"] += 1


@settings(max_examples=5, **BOUNDED)
@given(problems(max_T=40))
def test_jit_equals_no_jit(spec):
    model, y, mask, md = _build(spec)
    x_jit, g_jit = single(model, y, mask)
    x_eager, g_eager = _batched_fn(model, y, mask)  # op by op, no outer jit
    x_jit = np.asarray(x_jit)
    if not np.all(np.isfinite(x_jit)):
        assert np.all(np.isnan(np.asarray(x_eager)))
    else:
        H, _ = rh.normal_equations(md, y, mask)
        cond = np.linalg.cond(H)
        c = 50 * (spec["n"] + spec["p"]) * rh.eps(spec["dtype"]) * cond
        np.testing.assert_allclose(np.asarray(x_eager), x_jit, rtol=0,
                                   atol=c * max(np.abs(x_jit).max(), 1.0))
        for a, b in zip(jax.tree.leaves(g_eager), jax.tree.leaves(g_jit)):
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=0,
                                       atol=c * cond * max(_tree_max(g_jit), 1.0))
    CASES["jit"] += 1


def test_report_property_case_counts():
    # Runs last in file order; prints the counts for the issue note.
    print("\n[property cases run]", CASES, "total", sum(CASES.values()))
