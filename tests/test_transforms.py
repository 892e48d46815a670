"""jit, vmap, grad, vmap-of-grad and Optax composition of the public API."""

import jax
import jax.numpy as jnp
import numpy as np
import optax

import kalmax as kx
import reference as ref
from helpers import to_model


def _batch(rng, B=3, T=7, n=2, p=2):
    md = ref.random_model(rng, n, p, T, time_varying=False)
    ys, masks = zip(*[ref.random_data(rng, md, T, missing=0.3) for _ in range(B)])
    return to_model(md), jnp.asarray(np.stack(ys)), jnp.asarray(np.stack(masks))


def test_jit_equals_eager(rng):
    model, ys, masks = _batch(rng)
    eager = kx.smooth(model, ys[0], masks[0])
    jitted = jax.jit(kx.smooth)(model, ys[0], masks[0])
    np.testing.assert_allclose(jitted.states, eager.states, atol=1e-13)


def test_vmap_equals_loop(rng):
    model, ys, masks = _batch(rng)
    batched = jax.vmap(kx.smooth, in_axes=(None, 0, 0))(model, ys, masks)
    for i in range(ys.shape[0]):
        np.testing.assert_allclose(batched.states[i], kx.smooth(model, ys[i], masks[i]).states, atol=1e-13)


def test_vmap_over_models(rng):
    _, ys, masks = _batch(rng, B=2)
    mds = [ref.random_model(rng, 2, 2, 7, time_varying=False) for _ in range(2)]
    models = jax.tree_util.tree_map(lambda *a: jnp.stack(a), *[to_model(m) for m in mds])
    out = jax.vmap(kx.smooth)(models, ys, masks)
    for i, md in enumerate(mds):
        mu, _ = ref.rts_smoother(md, np.asarray(ys[i]), np.asarray(masks[i]))
        np.testing.assert_allclose(out.states[i], mu, atol=1e-10)


def test_vmap_of_grad_equals_loop(rng):
    model, ys, masks = _batch(rng)
    loss = lambda m, y, k: jnp.sum(kx.smooth(m, y, k).states ** 2)  # noqa: E731
    per = jax.vmap(jax.grad(loss), in_axes=(None, 0, 0))(model, ys, masks)
    for i in range(ys.shape[0]):
        one = jax.grad(loss)(model, ys[i], masks[i])
        for a, b in zip(jax.tree_util.tree_leaves(per), jax.tree_util.tree_leaves(one)):
            np.testing.assert_allclose(a[i], b, atol=1e-12)


def test_value_and_grad_and_jit_of_grad(rng):
    model, ys, masks = _batch(rng)
    holdout = jnp.asarray(rng.random(ys.shape[1:]) < 0.3)
    f = lambda m: kx.prediction_error(m, ys[0], masks[0], holdout)  # noqa: E731
    v, g = jax.value_and_grad(f)(model)
    v2, g2 = jax.jit(jax.value_and_grad(f))(model)
    assert np.isclose(v, v2)
    for a, b in zip(jax.tree_util.tree_leaves(g), jax.tree_util.tree_leaves(g2)):
        np.testing.assert_allclose(a, b, atol=1e-12)


def test_optax_training_reduces_holdout_error(rng):
    """Learn log noise scales with Adam: held-out error must go down from a poor start."""
    T, n, p = 60, 2, 1
    md = dict(A=np.array([[1.0, 1.0], [0.0, 1.0]]), C=np.array([[1.0, 0.0]]),
              Q=np.diag([1e-4, 1e-2]), R=np.array([[0.05]]), b=None, d=None,
              m0=np.zeros(2), P0=np.eye(2))
    y, mask = ref.random_data(rng, md, T, missing=0.1)
    holdout = jnp.asarray(rng.random((T, p)) < 0.3)

    def build(theta):
        return kx.StateSpace(A=jnp.asarray(md["A"]), C=jnp.asarray(md["C"]),
                             Q=jnp.diag(jnp.exp(theta["log_q"])), R=jnp.exp(theta["log_r"]) * jnp.eye(1),
                             x0_mean=jnp.zeros(2), x0_cov=jnp.eye(2))

    loss = lambda th: kx.prediction_error(build(th), y, mask, holdout)  # noqa: E731
    truth = {"log_q": jnp.log(jnp.array([1e-4, 1e-2])), "log_r": jnp.log(jnp.array(0.05))}
    # poor start: far too little process noise, so the smoother over-smooths
    theta = {"log_q": jnp.array([-14.0, -14.0]), "log_r": jnp.array(2.0)}
    opt = optax.adam(0.1)
    state = opt.init(theta)

    @jax.jit
    def step(th, st):
        v, g = jax.value_and_grad(loss)(th)
        up, st = opt.update(g, st, th)
        return optax.apply_updates(th, up), st, v

    first = float(loss(theta))
    for _ in range(100):
        theta, state, _ = step(theta, state)
    final, best = float(loss(theta)), float(loss(truth))
    assert final < 0.7 * first, (first, final)
    assert final < 1.2 * best, (final, best)
