"""method="auto" falls back, per trajectory, to the covariance-form filter where the kernel is NaN.

The cases are constant-acceleration models of the seeded float32 sweep
(``float32_sweep.py``, seed 7, 200 cases, T = 200) on which the compiled
kernel returns NaN (κ(H) beyond double), and two ordinary ones of the same
shape. References, all independent of kalmax: the textbook float64 Kalman
filter + RTS smoother of ``reference.py`` (Kalman (1960); Rauch, Tung &
Striebel (1965); equations as in Särkkä (2013), chs. 4 and 8 -- chapter
numbers from memory) for means and log-likelihood, and float64 central
differences of the NumPy filter with Richardson extrapolation
(``float32_sweep.reference_gradients``) for gradients.

The mechanism (``kalmax/_src/fallback.py``) is checked too: nothing of the
covariance form runs when no trajectory fails, batched or not (a counter in
the filter's sweep), and a problem with a NaN parameter or an indefinite
covariance stays NaN.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import float32_sweep as fs
import kalmax as kx
import reference as ref
from kalmax._src.backends import covariance_form
from kalmax._src.backends.registry import is_available

pytestmark = pytest.mark.skipif(not is_available("cpu"), reason="the fallback is measured against the kernel")

TOL, GTOL = 1e-3, 1e-2
FAILING = (49, 115, 159)   # ca1, Δt 5e-3..2e-2, q/r 3e-8..7e-5: the kernel is NaN (asserted below)
ORDINARY = (38, 121)       # ca1 of the same shape: the kernel succeeds


@pytest.fixture(scope="module")
def group():
    cases = fs.draw_cases(7, 200, 200)
    (g,) = fs.group([cases[i] for i in FAILING + ORDINARY])
    return g


def _one(g, i, dtype=np.float32):
    model = fs.kalmax_model(g.md, dtype, i)
    y = np.where(g.mask[i], g.y[i], 0.0).astype(dtype)
    return model, jnp.asarray(y), jnp.asarray(g.mask[i])


def _reference(g, i):
    md = {k: g.md[k][i] for k in ("A", "Q", "C", "R", "m0", "P0")}
    y = np.where(g.mask[i], g.y[i], np.nan)
    means, _ = ref.rts_smoother(md, y, g.mask[i])
    return means, ref.kalman_filter(md, y, g.mask[i]).log_likelihood


@pytest.fixture
def sweep_calls(monkeypatch):
    """Counts the covariance-form sweeps that run (a debug callback inside the traced sweep)."""
    calls = []
    inner = covariance_form.sweep

    def counted(model, y, w):
        jax.debug.callback(lambda: calls.append(1))
        return inner(model, y, w)

    monkeypatch.setattr(covariance_form, "sweep", counted)
    jax.clear_caches()  # programs compiled before the patch would not count
    yield calls
    jax.clear_caches()


def test_single_trajectory_means_and_log_likelihood(group):
    for k in range(len(FAILING) + len(ORDINARY)):
        model, y, mask = _one(group, k)
        means, ll = _reference(group, k)
        cpu = np.asarray(kx.smooth(model, y, mask, method="cpu").states)
        assert np.all(np.isnan(cpu)) == (k < len(FAILING))  # the kernel's verdict that auto replaces
        auto = np.asarray(kx.smooth(model, y, mask).states)
        assert fs.rel_err(auto, means) <= TOL, k
        val = float(kx.log_likelihood(model, y, mask))
        assert abs(val - ll) <= 1e-4 * abs(ll), (k, val, ll)


def test_batched_gradients_against_float64_differences(group):
    """vmap of grad over the mixed batch: finite, and within 1e-2 of float64 central
    differences along every direction where the difference ladder converged."""
    (g1, t1), (g2, t2), finite = fs.kalmax_gradients(group, "auto")
    assert finite.all()
    r1, r2, e1, e2 = fs.reference_gradients(group)
    c1 = e1 <= 1e-4 * np.maximum(np.abs(r1), t1)
    c2 = e2 <= 1e-4 * np.maximum(np.abs(r2), t2)
    assert np.all(c1.sum(-1) >= 4) and np.all(c2.sum(-1) >= 4)  # most directions are determined
    assert np.all(fs.grad_err(g1, r1, t1, c1) <= GTOL)
    assert np.all(fs.grad_err(g2, r2, t2, c2) <= GTOL)


def test_mixed_batch_ordinary_trajectories_equal_the_kernel(group):
    """Under vmap the ordinary trajectories get exactly the kernel's numbers
    (states, log-likelihood and its gradient), the failing ones the filter's."""
    model = fs.kalmax_model(group.md, np.float32)
    y = jnp.asarray(np.where(group.mask, group.y, 0.0).astype(np.float32))
    mask = jnp.asarray(group.mask)
    states = {m: np.asarray(jax.vmap(lambda a, b, c: kx.smooth(a, b, c, method=m).states)(model, y, mask))
              for m in ("auto", "cpu")}
    vg = {m: jax.vmap(jax.value_and_grad(lambda a, b, c: kx.log_likelihood(a, b, c, method=m)))(model, y, mask)
          for m in ("auto", "cpu")}
    nf = len(FAILING)
    np.testing.assert_array_equal(states["auto"][nf:], states["cpu"][nf:])
    np.testing.assert_array_equal(np.asarray(vg["auto"][0])[nf:], np.asarray(vg["cpu"][0])[nf:])
    for a, c in zip(jax.tree_util.tree_leaves(vg["auto"][1]), jax.tree_util.tree_leaves(vg["cpu"][1])):
        np.testing.assert_array_equal(np.asarray(a)[nf:], np.asarray(c)[nf:])
    for k in range(nf):
        assert fs.rel_err(states["auto"][k], _reference(group, k)[0]) <= TOL


def test_covariances_where_the_kernel_is_nan(group):
    """smooth(covariances=True): the failing case's marginal covariances against the
    float64 RTS covariances (relative to each component's largest variance)."""
    md = {k: group.md[k][0] for k in ("A", "Q", "C", "R", "m0", "P0")}
    _, covs = ref.rts_smoother(md, np.where(group.mask[0], group.y[0], np.nan), group.mask[0])
    model, y, mask = _one(group, 0)
    out = kx.smooth(model, y, mask, covariances=True)
    got = np.asarray(out.state_cov, np.float64)
    scale = np.sqrt(np.einsum("tii->ti", covs).max(0))
    assert np.all(np.isfinite(got))
    assert np.max(np.abs(got - covs) / np.outer(scale, scale)) <= TOL
    # and their gradient is finite (the fallback's band, differentiated through the filter)
    g = jax.grad(lambda m: jnp.sum(kx.smooth(m, y, mask, covariances=True).state_cov))(model)
    assert all(np.all(np.isfinite(a)) for a in jax.tree_util.tree_leaves(g))


def test_forward_mode_matches_reverse_mode_on_a_failing_case(group):
    """jacfwd and grad of the log-likelihood along a scale of Q agree, and a float64
    central difference of the NumPy filter confirms them."""
    model, y, mask = _one(group, 2)

    def ll(s):
        return kx.log_likelihood(model.replace(Q=model.Q * jnp.exp(s)), y, mask)

    s0 = jnp.float32(0.0)
    rev, fwd = float(jax.grad(ll)(s0)), float(jax.jacfwd(ll)(s0))
    md = {k: group.md[k][2] for k in ("A", "Q", "C", "R", "m0", "P0")}
    yn = np.where(group.mask[2], group.y[2], np.nan)
    h = 1e-4
    diff = (ref.kalman_filter(dict(md, Q=md["Q"] * np.exp(h)), yn, group.mask[2]).log_likelihood
            - ref.kalman_filter(dict(md, Q=md["Q"] * np.exp(-h)), yn, group.mask[2]).log_likelihood) / (2 * h)
    assert fwd == pytest.approx(rev, rel=1e-4)
    assert rev == pytest.approx(diff, rel=GTOL, abs=1e-3)


def test_float64_beyond_the_normal_equations(group):
    """The fallback applies in float64 too: the kernel is NaN there as well (κ(H)
    beyond double), and auto matches the float64 reference to 1e-6."""
    with jax.enable_x64(True):
        model, y, mask = _one(group, 0, np.float64)
        assert np.all(np.isnan(np.asarray(kx.smooth(model, y, mask, method="cpu").states)))
        auto = np.asarray(kx.smooth(model, y, mask).states)
    assert fs.rel_err(auto, _reference(group, 0)[0]) <= 1e-6


def test_no_fallback_runs_when_nothing_fails(group, sweep_calls):
    """The batched rule runs the covariance form only when a trajectory failed:
    none of its sweeps runs for a batch of ordinary trajectories (value, gradient,
    covariances), and it runs for a batch with one failing trajectory."""
    model = fs.kalmax_model(group.md, np.float32)
    y = jnp.asarray(np.where(group.mask, group.y, 0.0).astype(np.float32))
    mask = jnp.asarray(group.mask)
    vg = jax.jit(jax.vmap(jax.value_and_grad(lambda a, b, c: kx.log_likelihood(a, b, c))))
    sm = jax.jit(jax.vmap(lambda a, b, c: kx.smooth(a, b, c, covariances=True)))
    ordinary = slice(len(FAILING), None)
    take = lambda sl: jax.tree_util.tree_map(lambda a: a[sl], (model, y, mask))  # noqa: E731
    jax.block_until_ready((vg(*take(ordinary)), sm(*take(ordinary))))
    one_model = take(len(FAILING))
    jax.block_until_ready(jax.grad(lambda a: kx.log_likelihood(a, *one_model[1:]))(one_model[0]))
    assert sweep_calls == []
    jax.block_until_ready(vg(*take(slice(len(FAILING) - 1, None))))  # one failing, two ordinary
    assert len(sweep_calls) > 0


def test_ordinary_model_identical_to_the_kernel(group):
    """Nothing fails: auto's states, covariances, log-likelihood and gradient are
    the kernel's, bit for bit."""
    model, y, mask = _one(group, len(FAILING))
    a = kx.smooth(model, y, mask, covariances=True)
    c = kx.smooth(model, y, mask, covariances=True, method="cpu")
    for u, v in zip(a, c):
        np.testing.assert_array_equal(np.asarray(u), np.asarray(v))
    va, ga = jax.value_and_grad(lambda m: kx.log_likelihood(m, y, mask))(model)
    vc, gc = jax.value_and_grad(lambda m: kx.log_likelihood(m, y, mask, method="cpu"))(model)
    assert float(va) == float(vc)
    for u, v in zip(jax.tree_util.tree_leaves(ga), jax.tree_util.tree_leaves(gc)):
        np.testing.assert_array_equal(np.asarray(u), np.asarray(v))


def test_bad_problems_stay_nan(group, sweep_calls):
    """NaN in a parameter: NaN, and the fallback does not even run. An indefinite Q
    (not a valid model): the kernel is NaN, and so is auto, although the covariance
    form alone returns finite numbers there."""
    model, y, mask = _one(group, 0)
    bad = model.replace(A=jnp.asarray(model.A).at[3, 0, 0].set(jnp.nan))
    assert np.all(np.isnan(np.asarray(kx.smooth(bad, y, mask).states)))
    assert np.isnan(float(kx.log_likelihood(bad, y, mask)))
    assert sweep_calls == []
    # A random walk with a negative process-noise variance (not a model): the
    # covariance form's innovation variances stay positive for a while, so alone it
    # returns finite numbers; the kernel factors Q and returns NaN.
    rw = kx.StateSpace(A=jnp.ones((1, 1), jnp.float32), C=jnp.ones((1, 1), jnp.float32),
                       Q=jnp.full((1, 1), -0.001, jnp.float32), R=jnp.ones((1, 1), jnp.float32),
                       x0_mean=jnp.zeros(1, jnp.float32), x0_cov=jnp.full((1, 1), 10.0, jnp.float32))
    y = jnp.asarray(np.random.default_rng(0).standard_normal((50, 1)), jnp.float32)
    assert np.all(np.isfinite(np.asarray(kx.smooth(rw, y, method="covariance").states)))
    assert np.all(np.isnan(np.asarray(kx.smooth(rw, y, method="cpu").states)))
    assert np.all(np.isnan(np.asarray(kx.smooth(rw, y).states)))
    assert np.isnan(float(kx.log_likelihood(rw, y)))


def test_flat_prior_has_no_fallback(group):
    """The covariance form needs a prior: with a flat one auto is the kernel, NaN included."""
    model, y, mask = _one(group, 0)
    flat = model.replace(x0_mean=None, x0_cov=None)
    assert np.all(np.isnan(np.asarray(kx.smooth(flat, y, mask).states)))


def test_second_derivatives_through_the_fallback():
    """Hessian (forward over reverse) of the log-likelihood for a singular Q, where
    the kernel is NaN and auto takes the filter: it matches central differences of
    the gradient (float64), and for an ordinary Q it equals the kernel's."""
    with jax.enable_x64(True):
        rng = np.random.default_rng(0)
        m = kx.StateSpace(A=jnp.array([[1.0, 1.0], [0.0, 1.0]]), C=jnp.array([[1.0, 0.0]]),
                          Q=jnp.diag(jnp.array([1e-2, 1e-1])), R=jnp.eye(1), x0_mean=jnp.zeros(2), x0_cov=jnp.eye(2))
        y = jnp.asarray(rng.standard_normal((50, 1)))

        def ll(model, method="auto"):
            return lambda t: kx.log_likelihood(model.replace(R=model.R * jnp.exp(t[0]), Q=model.Q * jnp.exp(t[1])),
                                               y, method=method)

        th = jnp.zeros(2)
        np.testing.assert_array_equal(np.asarray(jax.hessian(ll(m))(th)), np.asarray(jax.hessian(ll(m, "cpu"))(th)))
        singular = m.replace(Q=jnp.diag(jnp.array([0.0, 1e-1])))
        assert np.isnan(float(ll(singular, "cpu")(th)))
        hess = np.asarray(jax.hessian(ll(singular))(th))
        grad, h = jax.grad(ll(singular)), 1e-5
        diff = np.stack([np.asarray(grad(th.at[i].add(h)) - grad(th.at[i].add(-h))) / (2 * h) for i in range(2)])
        np.testing.assert_allclose(hess, diff, rtol=1e-6, atol=1e-8)
