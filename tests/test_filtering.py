"""Filtered (causal) state moments: kx.filter_states.

References:
- the covariance-form Kalman filter of tests/reference.py (prediction and
  update steps as in Särkkä (2013), Bayesian Filtering and Smoothing, Ch. 4,
  theorem number from memory), for models with a prior;
- for a flat prior, where that filter has no starting point: the filtered
  distribution of x_t is the marginal of the posterior of the problem cut
  after step t, so its moments are the last block of H⁽ᵗ⁾⁻¹g⁽ᵗ⁾ and of
  H⁽ᵗ⁾⁻¹ for the dense normal equations of tests/reference.py (generalised
  least squares, Björck (1996), Ch. 4, from memory), and x_t is identified
  exactly when H⁽ᵗ⁾ is nonsingular;
- at the last step the filtered and smoothed distributions coincide (both
  condition on all of y; common practice): checked against kx.smooth.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import field_difference, to_model

T, N, P = 9, 3, 2


def _cut(md, t):
    """The reference model dict of the problem cut after step t, with a flat prior."""
    out = {}
    for k, core in (("A", 2), ("Q", 2), ("b", 1)):
        v = md.get(k)
        out[k] = v[:t] if v is not None and np.ndim(v) > core else v
    for k, core in (("C", 2), ("R", 2), ("d", 1)):
        v = md.get(k)
        out[k] = v[: t + 1] if v is not None and np.ndim(v) > core else v
    out["m0"] = out["P0"] = None
    return out


def _dense_filter(md, y, mask, n):
    """Filtered moments from dense normal equations of every cut problem; NaN where H⁽ᵗ⁾ is singular."""
    steps = y.shape[0]
    means = np.full((steps, n), np.nan)
    covs = np.full((steps, n, n), np.nan)
    for t in range(steps):
        H, g = ref.dense_normal_equations(_cut(md, t), y[: t + 1], mask[: t + 1])
        ev = np.linalg.eigvalsh(H)
        if ev.min() > 1e-9 * ev.max():  # common practice: a relative rank threshold
            S = np.linalg.inv(H)
            means[t] = (S @ g)[-n:]
            covs[t] = S[-n:, -n:]
    return means, covs


def _check_against_textbook(out, md, y, mask):
    mf, Pf, *_ = ref.kalman_filter(md, y, mask)
    np.testing.assert_allclose(out.states, mf, atol=1e-10)
    np.testing.assert_allclose(out.state_cov, Pf, atol=1e-10)
    E = ref.expand(md, y.shape[0])
    np.testing.assert_allclose(out.measurements, np.einsum("tpi,ti->tp", E["C"], mf) + E["d"], atol=1e-10)
    np.testing.assert_allclose(out.measurement_cov, np.einsum("tpi,tij,tqj->tpq", E["C"], Pf, E["C"]), atol=1e-10)
    assert np.all(out.identified)


def test_time_varying_model_equals_textbook_filter_and_smoother_at_the_end(rng):
    md = ref.random_model(rng, N, P, T, time_varying=True, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)  # includes fully missing steps
    assert (~mask).all(axis=1).any() and ((~mask).sum(axis=1) == 1).any()
    model = to_model(md)
    out = kx.filter_states(model, y, mask)
    _check_against_textbook(out, md, y, mask)
    sm = kx.smooth(model, y, mask, covariances=True)
    np.testing.assert_allclose(out.states[-1], sm.states[-1], atol=1e-10)
    np.testing.assert_allclose(out.state_cov[-1], sm.state_cov[-1], atol=1e-10)


def test_jit_vmap_equal_textbook_and_missing_entries_are_never_read(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    y2, mask2 = ref.random_data(rng, md, T, missing=0.3)
    # Rows 0 and 1: the same data, NaN or huge values at the missing entries; row 2: other data, default mask.
    ys = np.stack([y, np.where(mask, y, 1e6), y2])
    masks = np.stack([mask, mask, ~np.isnan(y2)])
    out = jax.jit(jax.vmap(kx.filter_states, in_axes=(None, 0, 0)))(to_model(md), ys, masks)
    for i in range(3):
        _check_against_textbook(jax.tree_util.tree_map(lambda a: a[i], out), md, ys[i], masks[i])
    np.testing.assert_array_equal(out.states[0], out.states[1])


def test_flat_prior_equals_dense_cut_problems(rng):
    # One scalar measurement of a three-dimensional state: the first steps are not identified.
    n, p = 3, 1
    md = ref.random_model(rng, n, p, T, time_varying=False, prior=False)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md, prior=False)
    out = kx.filter_states(model, y, mask)
    means, covs = _dense_filter(md, y, mask, n)
    defined = np.isfinite(means[:, 0])
    assert 1 <= (~defined).sum() and defined.sum() >= 3, defined
    np.testing.assert_array_equal(np.asarray(out.identified), defined)
    np.testing.assert_allclose(out.states, means, atol=1e-9)  # NaN where the reference is NaN
    np.testing.assert_allclose(out.state_cov, covs, atol=1e-9)
    assert np.all(np.isnan(out.measurements[~defined])) and np.all(np.isfinite(out.measurements[defined]))
    sm = kx.smooth(model, y, mask, covariances=True)
    np.testing.assert_allclose(out.states[-1], sm.states[-1], atol=1e-9)
    np.testing.assert_allclose(out.state_cov[-1], sm.state_cov[-1], atol=1e-9)


def test_float32_close_to_textbook_on_a_long_record_far_from_zero(rng):
    # A constant-velocity track (the README's quick-start model) drifting far from 0: float32
    # must keep the means within a small fraction of their posterior standard deviation.
    steps = 2000
    md = dict(A=np.array([[1.0, 1.0], [0.0, 1.0]]), C=np.array([[1.0, 0.0]]), Q=np.diag([1e-4, 1e-2]),
              R=np.array([[0.05]]), m0=np.zeros(2), P0=np.eye(2))
    y, mask = ref.random_data(rng, md, steps, missing=0.3)
    out = kx.filter_states(to_model(md, np.float32), y.astype(np.float32), mask)
    assert out.states.dtype == jnp.float32 and out.state_cov.dtype == jnp.float32
    mf, Pf, *_ = ref.kalman_filter(md, y, mask)
    sd = np.sqrt(np.diagonal(Pf, axis1=1, axis2=2))
    assert np.abs(mf).max() > 1e3 * sd.max()  # the regime where float32 digits are scarce
    # Loose bounds for float32 (common practice); measured: 0.0024 sd and 6e-5.
    assert np.max(np.abs(np.asarray(out.states, np.float64) - mf) / sd) < 0.02
    rel = np.abs(np.asarray(out.state_cov, np.float64) - Pf) / np.einsum("ti,tj->tij", sd, sd)
    assert rel.max() < 1e-3
    # Flat prior: float32 against float64 (whose route is checked against the dense reference above).
    flat64 = kx.filter_states(to_model(md, prior=False), y, mask)
    flat32 = kx.filter_states(to_model(md, np.float32, prior=False), y.astype(np.float32), mask)
    np.testing.assert_array_equal(flat32.identified, flat64.identified)
    sd = np.sqrt(np.diagonal(np.asarray(flat64.state_cov), axis1=1, axis2=2))
    assert np.nanmax(np.abs(np.asarray(flat32.states, np.float64) - flat64.states) / sd) < 0.02


def _loss_ref(md, y, mask):
    mf, Pf, *_ = ref.kalman_filter(md, y, mask)
    return np.sum(mf ** 2) + np.sum(np.trace(Pf, axis1=1, axis2=2) ** 2)


def test_jit_vmap_grad_match_finite_differences_of_textbook_filter(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True)
    data = [ref.random_data(rng, md, T, missing=0.3) for _ in range(2)]
    ys, masks = np.stack([d[0] for d in data]), np.stack([d[1] for d in data])  # NaN at missing entries
    model = to_model(md)

    def loss(m, yy, k):
        out = kx.filter_states(m, yy, k)
        return jnp.sum(out.states ** 2) + jnp.sum(jnp.trace(out.state_cov, axis1=1, axis2=2) ** 2)

    g_model, g_y = jax.jit(jax.vmap(jax.grad(loss, argnums=(0, 1)), in_axes=(None, 0, 0)))(model, ys, masks)
    assert np.all(np.isfinite(g_y)) and np.all(np.asarray(g_y)[~masks] == 0)  # missing entries: no gradient
    h = 1e-6  # central differences (common practice)
    # Symmetric perturbations of Q, R and P0 (they are symmetric), single entries otherwise.
    for i, (field, idx) in enumerate([("Q", (0, 1)), ("R", (0, 1)), ("Q", (2, 2)), ("A", (1, 0)), ("C", (1, 2)),
                                      ("b", (1,)), ("d", (0,)), ("m0", (2,)), ("P0", (0, 2))]):
        k = i % 2  # alternate between the two trajectories of the batch
        fd, E = field_difference(lambda d: _loss_ref(d, ys[k], masks[k]), md, field, idx, h)
        name = {"m0": "x0_mean", "P0": "x0_cov"}.get(field, field)
        ad = float(np.sum(np.asarray(getattr(g_model, name))[k] * E))
        assert abs(ad - fd) < 1e-6 * (1 + abs(fd)), (field, idx, ad, fd)
    for k in range(2):
        t, j = np.argwhere(masks[k])[3 + k]
        E = np.zeros_like(ys[k])
        E[t, j] = 1.0
        fd = (_loss_ref(md, ys[k] + h * E, masks[k]) - _loss_ref(md, ys[k] - h * E, masks[k])) / (2 * h)
        assert abs(float(g_y[k, t, j]) - fd) < 1e-6 * (1 + abs(fd))


def test_gradient_with_unidentified_steps_is_finite_and_correct(rng):
    n, p = 3, 1
    md = ref.random_model(rng, n, p, T, time_varying=False, prior=False)
    y, mask = ref.random_data(rng, md, T, missing=0.2)
    model = to_model(md, prior=False)

    def loss(R):
        out = kx.filter_states(model.replace(R=R), y, mask)
        return jnp.nansum(out.states ** 2) + jnp.nansum(out.state_cov ** 2)

    ident = np.asarray(kx.filter_states(model, y, mask).identified)
    assert not ident.all() and ident.any()
    g = jax.grad(loss)(model.R)
    assert np.all(np.isfinite(g))
    # Reference: the same loss from the dense cut problems (NaN steps left out), central differences.
    ref_loss = lambda r: np.nansum(_dense_filter(dict(md, R=r), y, mask, n)[0] ** 2) + np.nansum(  # noqa: E731
        _dense_filter(dict(md, R=r), y, mask, n)[1] ** 2)
    h = 1e-6
    fd = (ref_loss(md["R"] + h) - ref_loss(md["R"] - h)) / (2 * h)
    assert abs(float(g[0, 0]) - fd) < 1e-6 * (1 + abs(fd)), (g, fd)


def test_shape_errors_name_the_argument():
    model = kx.StateSpace(A=jnp.eye(2), C=jnp.ones((1, 2)), Q=jnp.eye(2), R=jnp.eye(1))
    y = jnp.zeros((5, 1))
    with pytest.raises(ValueError, match=r"y must have shape \(T, p\)"):
        jax.jit(kx.filter_states)(model, y[:, 0])
    with pytest.raises(ValueError, match=r"model.C must have shape \(1, 2\)"):
        jax.jit(kx.filter_states)(model.replace(C=jnp.ones((2, 2))), y)
    with pytest.raises(ValueError, match=r"mask must have the same shape as y, \(5, 1\)"):
        kx.filter_states(model, y, jnp.ones((4, 1), bool))
    with pytest.raises(TypeError, match="mask must be a boolean array"):
        kx.filter_states(model, y, jnp.ones((5, 1)))
