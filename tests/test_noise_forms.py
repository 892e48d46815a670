"""Diagonal and scalar noise forms of Q and R (kx.DiagonalNoise, kx.ScalarNoise).

Every form is checked against the same model with its dense covariances
built in NumPy and run through the plain references of ``tests/reference.py``:
the RTS smoother (Särkkä (2013), Bayesian Filtering and Smoothing, Alg 8.2)
for the means and covariances, the dense joint Gaussian for log p(y).
Gradients w.r.t. the variances are checked against central finite
differences of those references (common practice), on every backend.

Compile time dominates here, so each backend sees few distinct shapes: four
combinations cover the eight forms (Q and R, each diagonal or scalar, each
time-invariant or per step), and T = p, so that a per-step diagonal (T, p)
has the very shape of a dense (p, p): the wrapper, not the shape, says which.
The compiled kernel (cheap to compile; separate code for per-step and
memoised time-invariant R) runs every combination; the JAX backends share
all of their noise-form code (``checks.canonicalize``,
``normal_equations.masked_measurement_cov`` and ``transition_cov``), so by default each runs one or
two combinations, chosen so that every form meets a JAX backend; the
others, and the vmap and means-gradient checks of the slower JAX backends,
run with ``KALMAX_SLOW=1``.
"""

import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import central_differences
from kalmax._src.backends.registry import available

SLOW = bool(os.environ.get("KALMAX_SLOW"))
BACKENDS = [m for m in ("cpu", "scan", "parallel", "covariance") if m in available()]
T, N, P = 5, 3, 5  # T = p on purpose (see the module docstring)

# (name, Q form, R form): each form once as time-invariant, once per step.
COMBOS = {
    "R per-step diagonal, Q per-step scalar": ("scalar_tv", "diag_tv"),
    "R scalar, Q diagonal": ("diag", "scalar"),
    "R per-step scalar, Q per-step diagonal": ("diag_tv", "scalar_tv"),
    "R diagonal, Q scalar": ("scalar", "diag"),
}
_NAMES = list(COMBOS)
# Combinations each backend runs by default (all of them with KALMAX_SLOW=1).
_DEFAULT = {"cpu": _NAMES, "scan": _NAMES[:2], "parallel": _NAMES[:1], "covariance": _NAMES[2:3]}
FORM_CASES = [pytest.param(m, c, marks=[] if SLOW or c in _DEFAULT[m] else pytest.mark.skip("KALMAX_SLOW=1"))
              for m in BACKENDS for c in _NAMES]
# Backends of the vmap and means-gradient checks by default.
FAST_BACKENDS = [pytest.param(m, marks=[] if SLOW or m in ("cpu", "scan") else pytest.mark.skip("KALMAX_SLOW=1"))
                 for m in BACKENDS]


def _values(rng, form, k, steps):
    """Positive variances for a form: the wrapper's leaf."""
    shape = {"diag": (k,), "diag_tv": (steps, k), "scalar": (), "scalar_tv": (steps,)}[form]
    return rng.uniform(0.3, 1.2, size=shape)


def _wrap(form, v):
    return kx.DiagonalNoise(v) if form.startswith("diag") else kx.ScalarNoise(v)


def _dense(form, v, k):
    """The dense NumPy covariance of a form's values: (k, k) or (steps, k, k)."""
    v = np.asarray(v, np.float64)
    if form.startswith("scalar"):
        v = v[..., None] * np.ones(k)
    return v[..., :, None] * np.eye(k)


def _problem(seed, q_form, r_form):
    rng = np.random.default_rng(seed)
    md = ref.random_model(rng, N, P, T, time_varying=True, full_R=False)
    qv, rv = _values(rng, q_form, N, T - 1), _values(rng, r_form, P, T)
    md["Q"], md["R"] = _dense(q_form, qv, N), _dense(r_form, rv, P)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    return md, qv, rv, y, mask


def _model(md, q, r, dtype=np.float64):
    c = lambda a: jnp.asarray(a, dtype)  # noqa: E731
    return kx.StateSpace(A=c(md["A"]), C=c(md["C"]), Q=q, R=r, b=c(md["b"]), d=c(md["d"]),
                         x0_mean=c(md["m0"]), x0_cov=c(md["P0"]))


@pytest.mark.parametrize("method, combo", FORM_CASES)
def test_forms_match_the_dense_reference(method, combo):
    """Smoothed means and covariances, log p(y) and its gradient w.r.t. the
    variances of Q and R, against the references with the dense model."""
    q_form, r_form = COMBOS[combo]
    md, qv, rv, y, mask = _problem(len(combo) + 7, q_form, r_form)
    y0 = np.where(mask, y, 0.0)

    def loglik(q, r):
        return kx.log_likelihood(_model(md, _wrap(q_form, q), _wrap(r_form, r)), y, mask, method=method)

    @jax.jit  # one compilation for all of it
    def run(q, r):
        out = kx.smooth(_model(md, _wrap(q_form, q), _wrap(r_form, r)), y, mask, covariances=True, method=method)
        return out.states, out.state_cov, jax.value_and_grad(loglik, argnums=(0, 1))(q, r)

    states, state_cov, (val, (gq, gr)) = run(jnp.asarray(qv), jnp.asarray(rv))
    ms, Ps = ref.rts_smoother(md, y0, mask)
    np.testing.assert_allclose(states, ms, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(state_cov, Ps, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(val, ref.dense_log_likelihood(md, y0, mask), rtol=1e-10)

    def ref_loglik(q=qv, r=rv):
        return ref.dense_log_likelihood(dict(md, Q=_dense(q_form, q, N), R=_dense(r_form, r, P)), y0, mask)

    np.testing.assert_allclose(gq, central_differences(lambda q: ref_loglik(q=q), qv), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(gr, central_differences(lambda r: ref_loglik(r=r), rv), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("method", FAST_BACKENDS)
def test_gradient_of_smoothed_means_wrt_per_step_variances(method):
    """The implicit-function gradient of a loss on the smoothed means w.r.t.
    per-step diagonal R (the kernel's fused backward pass on "cpu"), against
    finite differences of the reference smoother."""
    md, qv, rv, y, mask = _problem(3, "scalar_tv", "diag_tv")
    y0 = np.where(mask, y, 0.0)
    weights = np.random.default_rng(4).standard_normal((T, N))
    q = kx.ScalarNoise(jnp.asarray(qv))

    def loss(r):
        states = kx.smooth(_model(md, q, kx.DiagonalNoise(r)), y, mask, method=method).states
        return jnp.sum(weights * states)

    g = jax.jit(jax.grad(loss))(jnp.asarray(rv))
    ref_loss = lambda r: float(np.sum(weights * ref.rts_smoother(dict(md, R=_dense("diag_tv", r, P)), y0, mask)[0]))  # noqa: E731
    np.testing.assert_allclose(g, central_differences(ref_loss, rv), rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("method", FAST_BACKENDS)
def test_vmap_over_a_batch_of_per_step_diagonals(method):
    """A network's per-step variances for a batch of series: vmap of the
    log-likelihood and its gradient, element by element against the reference."""
    md, qv, _, y, mask = _problem(5, "diag", "diag_tv")
    y0 = np.where(mask, y, 0.0)
    logvar = np.random.default_rng(6).normal(-0.5, 0.3, size=(3, T, P))
    q = kx.DiagonalNoise(jnp.asarray(qv))

    def loglik(lv):
        return kx.log_likelihood(_model(md, q, kx.DiagonalNoise(jnp.exp(lv))), y, mask, method=method)

    vals, grads = jax.jit(jax.vmap(jax.value_and_grad(loglik)))(jnp.asarray(logvar))
    for b in range(logvar.shape[0]):
        ref_ll = lambda lv: ref.dense_log_likelihood(dict(md, Q=_dense("diag", qv, N), R=_dense("diag_tv", np.exp(lv), P)), y0, mask)  # noqa: E731
        np.testing.assert_allclose(vals[b], ref_ll(logvar[b]), rtol=1e-10)
        np.testing.assert_allclose(grads[b], central_differences(ref_ll, logvar[b]), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("method", [m for m in ("cpu", "scan") if m in BACKENDS])
def test_float32(method):
    """float32 inputs stay float32 and agree with the float64 reference to float32 accuracy."""
    md, qv, rv, y, mask = _problem(8, "scalar", "diag_tv")
    f32 = lambda a: jnp.asarray(a, jnp.float32)  # noqa: E731
    model = _model(md, kx.ScalarNoise(f32(qv)), kx.DiagonalNoise(f32(rv)), dtype=np.float32)
    y32 = f32(np.where(mask, y, 0.0))

    @jax.jit
    def run(r):
        states = kx.smooth(model.replace(R=kx.DiagonalNoise(r)), y32, mask, method=method).states
        return states, jax.grad(lambda r: kx.log_likelihood(model.replace(R=kx.DiagonalNoise(r)), y32, mask,
                                                            method=method))(r)

    states, g = run(f32(rv))
    assert states.dtype == jnp.float32 and g.dtype == jnp.float32
    np.testing.assert_allclose(states, ref.rts_smoother(md, np.where(mask, y, 0.0), mask)[0], rtol=1e-3, atol=1e-3)
    ref_ll = lambda r: ref.dense_log_likelihood(dict(md, R=_dense("diag_tv", r, P)), np.where(mask, y, 0.0), mask)  # noqa: E731
    np.testing.assert_allclose(g, central_differences(ref_ll, rv), rtol=2e-3, atol=2e-3)


def test_the_wrapper_not_the_shape_decides():
    """With T = p a per-step diagonal and a dense (p, p) have the same shape;
    a bare array is read as the dense covariance, the wrapper as variances.
    The values are chosen to be valid both ways (positive entries, and SPD as
    a matrix), and each reading is checked against its reference."""
    rng = np.random.default_rng(9)
    md = ref.random_model(rng, N, P, T, time_varying=True, full_R=False)
    v = 0.3 * np.ones((T, P)) + np.diag(rng.uniform(0.5, 1.2, P))  # symmetric, diagonally dominant
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    y0 = np.where(mask, y, 0.0)
    method = BACKENDS[0]  # the compiled kernel where it is built: the check is about the interface
    q = jnp.asarray(md["Q"])
    as_dense = kx.smooth(_model(md, q, jnp.asarray(v)), y, mask, method=method).states
    as_wrapped = kx.smooth(_model(md, q, kx.DiagonalNoise(v)), y, mask, method=method).states
    np.testing.assert_allclose(as_dense, ref.rts_smoother(dict(md, R=v), y0, mask)[0], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(as_wrapped, ref.rts_smoother(dict(md, R=_dense("diag_tv", v, P)), y0, mask)[0],
                               rtol=1e-9, atol=1e-10)
    assert not np.allclose(as_dense, as_wrapped)


@pytest.mark.parametrize(
    "field, value, words",
    [
        ("R", np.ones((T + 1, P)), ["model.R must have shape (5, 5)", "got (6, 5)", "kx.DiagonalNoise(variances)"]),
        ("R", kx.DiagonalNoise(np.ones((T, P + 1))),
         ["model.R.variances must have shape (5,) (time-invariant) or (5, 5)", "got (5, 6)", "(p,) or (T, p)"]),
        ("R", kx.ScalarNoise(np.ones((T - 1,))), ["model.R.variance must have shape () ", "got (4,)", "() or (T,)"]),
        ("Q", kx.DiagonalNoise(np.ones((T, N))), ["model.Q.variances must have shape (3,) (time-invariant) or (4, 3)",
                                                  "(n,) or (T-1, n)"]),
        ("Q", kx.ScalarNoise(np.ones((2, 2))), ["model.Q.variance", "got (2, 2)", "kx.ScalarNoise(variance)"]),
        ("Q", np.ones(N), ["model.Q must have shape (3, 3)", "got (3,)", "wrap them as kx.DiagonalNoise"]),
        ("R", kx.DiagonalNoise(np.ones(P, np.int32)), ["model.R.variances must be a real floating-point"]),
    ],
)
def test_shape_errors_name_the_argument_and_the_forms(field, value, words):
    md, qv, rv, y, mask = _problem(10, "diag", "diag")
    model = _model(md, kx.DiagonalNoise(qv), kx.DiagonalNoise(rv)).replace(**{field: value})
    with pytest.raises((ValueError, TypeError)) as err:
        kx.smooth(model, y, mask, method="scan")
    for w in words:
        assert w in str(err.value), str(err.value)


def test_a_python_float_variance_keeps_a_float32_problem_float32():
    """kx.ScalarNoise(0.1) is weakly typed, like a Python scalar in JAX (x64 is on in the suite)."""
    md, _, rv, y, mask = _problem(11, "scalar", "diag")
    f32 = lambda a: jnp.asarray(a, jnp.float32)  # noqa: E731
    model = _model(md, kx.ScalarNoise(0.4), kx.DiagonalNoise(f32(rv)), dtype=np.float32)
    states = kx.smooth(model, f32(np.where(mask, y, 0.0)), mask, method=BACKENDS[0]).states
    assert states.dtype == jnp.float32
    md = dict(md, Q=0.4 * np.eye(N), R=_dense("diag", rv, P))
    np.testing.assert_allclose(states, ref.rts_smoother(md, np.where(mask, y, 0.0), mask)[0], rtol=1e-3, atol=1e-3)
