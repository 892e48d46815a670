"""Every kind of bad input, and what the user gets (docs/bad_input.md).

Each test id below is cited by the table in docs/bad_input.md. Shape and
dtype problems must raise at trace time (also under jit) with a message that
names the argument; value problems (NaN, non-PD covariances, unidentified
states) must give NaN from the smoother -- never a finite answer -- and a
ValueError from ``kx.validate`` that names the problem.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx

T, N, P = 6, 2, 2


def good():
    """A small well-posed problem (prior on x_0, everything observed)."""
    rng = np.random.default_rng(0)
    model = kx.StateSpace(
        A=np.array([[0.9, 0.1], [0.0, 0.8]]), C=np.array([[1.0, 0.0], [0.5, 1.0]]),
        Q=0.2 * np.eye(N), R=np.array([[0.5, 0.1], [0.1, 0.4]]),
        b=np.zeros(N), d=np.zeros(P), x0_mean=np.zeros(N), x0_cov=np.eye(N))
    return model, rng.standard_normal((T, P)), np.ones((T, P), bool)


def _smooth(m, y, k):
    return kx.smooth(m, y, k).states


def _loglik(m, y, k):
    return kx.log_likelihood(m, y, k)


def _holdout(m, y, k):
    h = np.zeros(np.shape(y), bool)
    if h.ndim == 2 and h.size:
        h[0, 0] = True  # score one entry so that invalid input shows in the sum
    return kx.holdout_sums(m, y, k, h)[0]


def _covs(m, y, k):
    return kx.smooth(m, y, k, covariances=True).state_cov


ENTRY_POINTS = {"smooth": _smooth, "log_likelihood": _loglik, "holdout_sums": _holdout,
                "smooth_covariances": _covs}
TRACED = {name: jax.jit(f) for name, f in ENTRY_POINTS.items()}
ALL = list(ENTRY_POINTS) + ["validate", "condition_estimate"]
VALUE_DEPENDENT = ("smooth", "log_likelihood", "holdout_sums")


def _call(name, model, y, mask, jit=False):
    if name == "validate":
        return kx.validate(model, y, mask)
    if name == "condition_estimate":
        return kx.condition_estimate(model, y, mask)
    return (TRACED if jit else ENTRY_POINTS)[name](model, y, mask)


def _raises_everywhere(exc, pattern, model, y, mask, names=ALL):
    for name in names:
        with pytest.raises(exc, match=pattern):
            _call(name, model, y, mask)
        if name in TRACED:  # the same error at trace time under jit
            with pytest.raises(exc, match=pattern):
                _call(name, model, y, mask, jit=True)


# ---------------------------------------------------------------------------
# shapes
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("bad_y", [np.zeros(T), np.zeros((2, T, P)), np.float64(1.0)], ids=["1d", "3d_batch", "scalar"])
def test_y_wrong_rank(bad_y):
    model, _, _ = good()
    _raises_everywhere(ValueError, r"y must have shape \(T, p\)", model, bad_y, None)


def test_empty_series():
    model, _, _ = good()
    _raises_everywhere(ValueError, r"at least one time step", model, np.zeros((0, P)), np.zeros((0, P), bool))


FIELD_SHAPES = [
    ("A", np.eye(3), r"model\.(A|Q|C|b|x0_mean|x0_cov) must have shape"),
    ("C", np.ones((3, N)), r"model\.C must have shape \(2, 2\) \(time-invariant\) or \(6, 2, 2\)"),
    ("Q", np.eye(3), r"model\.Q must have shape \(2, 2\)"),
    ("R", np.eye(3), r"model\.R must have shape \(2, 2\)"),
    ("b", np.zeros(3), r"model\.b must have shape \(2,\)"),
    ("d", np.zeros((T, 3)), r"model\.d must have shape \(2,\) \(time-invariant\) or \(6, 2\)"),
    ("x0_mean", np.zeros(3), r"model\.x0_mean must have shape \(2,\)"),
    ("x0_cov", np.eye(3), r"model\.x0_cov must have shape \(2, 2\)"),
]


@pytest.mark.parametrize("field,bad,pattern", FIELD_SHAPES, ids=[f[0] for f in FIELD_SHAPES])
def test_model_field_wrong_shape(field, bad, pattern):
    model, y, mask = good()
    _raises_everywhere(ValueError, pattern, model.replace(**{field: bad}), y, mask)


MISMATCHED_T = [
    ("A", np.stack([np.eye(N)] * T), r"model\.A must have shape \(2, 2\) \(time-invariant\) or \(5, 2, 2\)"),
    ("Q", np.stack([np.eye(N)] * (T - 2)), r"model\.Q must have shape .* or \(5, 2, 2\)"),
    ("b", np.zeros((T, N)), r"model\.b must have shape .* or \(5, 2\)"),
    ("C", np.stack([np.eye(N)] * (T - 1)), r"model\.C must have shape .* or \(6, 2, 2\)"),
    ("R", np.stack([np.eye(P)] * (T + 1)), r"model\.R must have shape .* or \(6, 2, 2\)"),
    ("d", np.zeros((T - 1, P)), r"model\.d must have shape .* or \(6, 2\)"),
]


@pytest.mark.parametrize("field,bad,pattern", MISMATCHED_T, ids=[f[0] for f in MISMATCHED_T])
def test_time_varying_field_with_mismatched_T(field, bad, pattern):
    model, y, mask = good()
    _raises_everywhere(ValueError, pattern, model.replace(**{field: bad}), y, mask)


def test_A_not_square():
    model, y, mask = good()
    _raises_everywhere(ValueError, r"model\.A must have shape \(n, n\)", model.replace(A=np.ones((2, 3))), y, mask)


def test_mask_wrong_shape():
    model, y, mask = good()
    _raises_everywhere(ValueError, r"mask must have the same shape as y, \(6, 2\)", model, y, mask[:, :1])


def test_holdout_wrong_shape_and_dtype():
    model, y, mask = good()
    with pytest.raises(ValueError, match=r"holdout must have the same shape as y"):
        kx.prediction_error(model, y, mask, np.zeros((T, 1), bool))
    with pytest.raises(TypeError, match=r"holdout must be a boolean array"):
        kx.prediction_error(model, y, mask, np.zeros((T, P), np.int32))


def test_p_zero_is_a_model_without_measurements():
    """p = 0 is allowed: the states follow the prior (E[x_t] = A^t m0 here);
    with a flat prior they are not identified and come back NaN."""
    model, _, _ = good()
    model = model.replace(C=np.zeros((0, N)), R=np.zeros((0, 0)), d=None)
    m0 = np.array([1.0, -1.0])
    x = np.asarray(TRACED["smooth"](model.replace(x0_mean=m0), np.zeros((T, 0)), np.zeros((T, 0), bool)))
    expect = [np.linalg.matrix_power(np.asarray(model.A), t) @ m0 for t in range(T)]
    np.testing.assert_allclose(x, expect, atol=1e-12)
    flat = model.replace(x0_mean=None, x0_cov=None)
    assert np.all(np.isnan(np.asarray(TRACED["smooth"](flat, np.zeros((T, 0)), np.zeros((T, 0), bool)))))


def test_zero_state_size_is_rejected_with_a_clear_message():
    model = kx.StateSpace(A=np.zeros((0, 0)), C=np.zeros((P, 0)), Q=np.zeros((0, 0)), R=np.eye(P))
    with pytest.raises(ValueError, match=r"model\.A"):
        kx.smooth(model, np.zeros((T, P)))


# ---------------------------------------------------------------------------
# dtypes
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [np.int32, np.int64, np.uint8, np.bool_, np.complex64, np.complex128])
def test_non_real_float_y(dtype):
    model, y, mask = good()
    _raises_everywhere(TypeError, r"y must be a real floating-point array", model, y.astype(dtype), mask)


@pytest.mark.parametrize("field", ["A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov"])
def test_integer_model_field(field):
    model, y, mask = good()
    bad = np.asarray(getattr(model, field)).astype(np.int64)
    _raises_everywhere(TypeError, rf"model\.{field} must be a real floating-point array", model.replace(**{field: bad}), y, mask)


@pytest.mark.parametrize("dtype", [np.int64, np.uint8, np.float32, np.float64])
def test_mask_of_wrong_dtype(dtype):
    model, y, mask = good()
    _raises_everywhere(TypeError, r"mask must be a boolean array \(True = observed\)", model, y, mask.astype(dtype))


@pytest.mark.parametrize("dtype", [object, str])
def test_mask_or_y_of_object_or_string_dtype(dtype):
    """Object and string arrays are refused by name before JAX sees them (called directly: jax.jit
    itself refuses such arguments before any kalmax code runs)."""
    model, y, mask = good()
    for name in ALL:
        with pytest.raises(TypeError, match=r"mask must be a boolean array \(True = observed\); got dtype"):
            _call(name, model, y, mask.astype(dtype))
        with pytest.raises(TypeError, match=r"y must be a real floating-point array"):
            _call(name, model, y.astype(dtype), mask)


@pytest.mark.parametrize("dtype", [jnp.float16, jnp.bfloat16], ids=["float16", "bfloat16"])
def test_half_precision_is_rejected(dtype):
    model, y, mask = good()
    model = jax.tree.map(lambda a: jnp.asarray(a, dtype), model)
    with pytest.raises(TypeError, match=r"float32 or float64"):
        kx.smooth(model, jnp.asarray(y, dtype), mask)


def test_mixed_float32_float64_is_promoted():
    """Not an error: arrays are cast to their common type (float64 here)."""
    model, y, mask = good()
    m32 = jax.tree.map(lambda a: np.asarray(a, np.float32), model)
    assert TRACED["smooth"](m32, y, mask).dtype == jnp.float64
    assert TRACED["smooth"](m32, y.astype(np.float32), mask).dtype == jnp.float32


def test_python_lists_are_accepted():
    model, y, mask = good()
    a = np.asarray(kx.smooth(model, y.tolist(), mask.tolist()).states)
    np.testing.assert_array_equal(a, np.asarray(kx.smooth(model, y, mask).states))


# ---------------------------------------------------------------------------
# structure
# ---------------------------------------------------------------------------


def test_model_not_a_statespace():
    model, y, mask = good()
    with pytest.raises(TypeError, match=r"model must be a kalmax\.StateSpace"):
        kx.smooth(dict(A=model.A, C=model.C, Q=model.Q, R=model.R), y, mask)


def test_model_field_as_python_list():
    model, y, mask = good()
    try:
        out = kx.smooth(model.replace(C=np.asarray(model.C).tolist()), y, mask).states
    except (TypeError, ValueError) as exc:  # a clear rejection is fine too
        assert "model.C" in str(exc)
    else:
        np.testing.assert_allclose(np.asarray(out), np.asarray(kx.smooth(model, y, mask).states))


@pytest.mark.parametrize("field", ["C", "Q", "R"])
def test_required_field_missing(field):
    model, y, mask = good()
    _raises_everywhere(ValueError, rf"model\.{field} is required", model.replace(**{field: None}), y, mask)


def test_required_A_missing():
    model, y, mask = good()
    with pytest.raises(ValueError, match=r"model\.A is required"):
        kx.smooth(model.replace(A=None), y, mask)


def test_prior_mean_without_covariance():
    model, y, mask = good()
    _raises_everywhere(ValueError, r"x0_mean is given without model\.x0_cov", model.replace(x0_cov=None), y, mask)


def test_unknown_method():
    model, y, mask = good()
    with pytest.raises(ValueError, match=r"method must be one of"):
        kx.smooth(model, y, mask, method="nope")
    with pytest.raises(ValueError, match=r"method must be one of"):
        kx.log_likelihood(model, y, mask, method="nope")


def test_validate_under_jit_is_a_clear_error():
    model, y, mask = good()
    with pytest.raises(TypeError, match=r"validate reads the values .* cannot run under jit"):
        jax.jit(kx.validate)(model, y, mask)
    with pytest.raises(TypeError, match=r"cannot run under jit, vmap or grad"):
        jax.vmap(lambda yy: kx.validate(model, yy, mask))(np.stack([y, y]))


# ---------------------------------------------------------------------------
# values: NaN from the smoother, a named problem from validate
# ---------------------------------------------------------------------------


def _all_nan_outputs(model, y, mask, names=tuple(ENTRY_POINTS)):
    """Every numeric entry point returns NaN (never a finite answer)."""
    for name in names:
        out = np.asarray(_call(name, model, y, mask, jit=True))
        assert np.all(np.isnan(out)), f"{name} returned a finite value for invalid input"


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_non_finite_observed_value(value):
    model, y, mask = good()
    y = y.copy()
    y[3, 1] = value
    if np.isnan(value):  # with the default mask NaN means "missing": fine
        assert np.all(np.isfinite(np.asarray(kx.smooth(model, y).states)))
    # Posterior covariances do not depend on the values of y: they stay finite.
    _all_nan_outputs(model, y, mask, VALUE_DEPENDENT)
    assert np.all(np.isfinite(np.asarray(_call("smooth_covariances", model, y, mask, jit=True))))
    with pytest.raises(ValueError, match=r"y has 1 non-finite value\(s\) at observed entries \(first at t=3, column 1\)"):
        kx.validate(model, y, mask)


@pytest.mark.parametrize("field", ["A", "C", "b", "d", "x0_mean", "Q", "R", "x0_cov"])
def test_non_finite_model_value(field):
    model, y, mask = good()
    bad = np.array(getattr(model, field), dtype=np.float64)
    bad.flat[0] = np.nan
    model = model.replace(**{field: bad})
    # Posterior covariances do not depend on b, d or the prior mean.
    if field in ("b", "d", "x0_mean"):
        _all_nan_outputs(model, y, mask, VALUE_DEPENDENT)
        assert np.all(np.isfinite(np.asarray(_call("smooth_covariances", model, y, mask, jit=True))))
    else:
        _all_nan_outputs(model, y, mask)
    with pytest.raises(ValueError, match=rf"model\.{field} has non-finite entries"):
        kx.validate(model, y, mask)


@pytest.mark.parametrize("field", ["Q", "R", "x0_cov"])
def test_covariance_not_positive_definite(field):
    model, y, mask = good()
    bad = np.diag([1.0, -0.5])
    model = model.replace(**{field: bad})
    _all_nan_outputs(model, y, mask)
    # "semidefinite" since method="auto" accepts a singular covariance (fallback.py).
    with pytest.raises(ValueError, match=rf"model\.{field} is not positive (semi)?definite"):
        kx.validate(model, y, mask)


def test_time_varying_covariance_not_positive_definite_names_the_step():
    """A singular Q at step 3: the normal equations (method="scan") return NaN and
    validate names the step; method="auto" falls back to the covariance form,
    which takes a singular Q exactly (tests/test_singular_noise.py)."""
    model, y, mask = good()
    Q = np.stack([0.2 * np.eye(N)] * (T - 1))
    Q[3] = np.diag([0.2, 0.0])
    model = model.replace(Q=Q)
    assert np.all(np.isnan(np.asarray(kx.smooth(model, y, mask, method="scan").states)))
    with pytest.raises(ValueError, match=r"model\.Q is not positive definite at time index 3"):
        kx.validate(model, y, mask, method="scan")
    np.testing.assert_array_equal(np.asarray(kx.smooth(model, y, mask).states),
                                  np.asarray(kx.smooth(model, y, mask, method="covariance").states))
    Q[3] = np.diag([0.2, -0.1])  # indefinite: NaN under auto too
    _all_nan_outputs(model.replace(Q=Q), y, mask)


def test_covariance_not_symmetric():
    """The smoother uses the symmetric part (documented); validate flags it."""
    model, y, mask = good()
    Q = np.array([[0.2, 0.05], [0.0, 0.2]])
    sym = 0.5 * (Q + Q.T)
    a = np.asarray(kx.smooth(model.replace(Q=Q), y, mask).states)
    b = np.asarray(kx.smooth(model.replace(Q=sym), y, mask).states)
    np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12)
    with pytest.raises(ValueError, match=r"model\.Q is not symmetric"):
        kx.validate(model.replace(Q=Q), y, mask)


def test_states_not_identified():
    """Flat prior and nothing observed, or a direction never observed: NaN."""
    model, y, mask = good()
    flat = model.replace(x0_mean=None, x0_cov=None)
    # (holdout_sums is an honest 0 here: nothing observed, nothing scored)
    _all_nan_outputs(flat, y, np.zeros_like(mask), ("smooth", "log_likelihood", "smooth_covariances"))
    with pytest.raises(ValueError, match=r"not identified"):
        kx.validate(flat, y, np.zeros_like(mask))
    # Only x¹ + x² observed, A = I: x¹ − x² is never identified.
    blind = flat.replace(A=np.eye(N), C=np.ones((P, N)))
    assert np.all(np.isnan(np.asarray(kx.smooth(blind, y, mask).states)))
    assert kx.condition_estimate(blind, y, mask) == np.inf
    # validate runs the solve it checks, so it names this case too.
    with pytest.raises(ValueError, match=r"smooth returns NaN .*the states are not identified"):
        kx.validate(blind, y, mask)


def test_too_ill_conditioned_for_the_dtype():
    """A float32 problem close to the limit of float32 arithmetic (κ·eps32 ≈ 0.5):
    validate says so for a backend that factors in float32 ("scan"); the
    compiled kernel factors float32 problems in double (κ·eps64 ≈ 1e-9) and
    passes, as does the same problem in float64."""
    q, r = 1e-3, 1e3
    model = kx.StateSpace(A=np.eye(1, dtype=np.float32), C=np.eye(1, dtype=np.float32),
                          Q=np.full((1, 1), q, np.float32), R=np.full((1, 1), r, np.float32))
    y = np.random.default_rng(1).standard_normal((200, 1)).astype(np.float32)
    with pytest.raises(ValueError, match=r"too ill-conditioned for float32 arithmetic \(method='scan'.*\): "
                                         r"estimated condition number 4\.0"):
        kx.validate(model, y, method="scan")
    if "cpu" in _backends():
        kx.validate(model, y, method="cpu")
    kx.validate(jax.tree.map(lambda a: np.asarray(a, np.float64), model), y.astype(np.float64), method="scan")
    kx.validate(model, y, max_error_bound=None, method="scan")  # check switched off


def _backends():
    from kalmax._src.backends import registry
    return registry.available()


def test_condition_estimate_matches_dense():
    """Hager–Higham estimate of κ₁(H) against NumPy's dense 1-norm condition
    number of the same H (assembled independently in robust_helpers)."""
    try:
        import robust_helpers as rh
    except ImportError:
        from tests import robust_helpers as rh
    for seed, prior in [(0, True), (1, False), (2, True)]:
        model, y, mask, md = rh.make_problem(seed, 3, 2, 15, prior=prior)
        H, _ = rh.normal_equations(md, y, mask)
        exact = np.linalg.cond(H, 1)
        est = kx.condition_estimate(model, y, mask)
        assert exact / 3 <= est <= exact * (1 + 1e-8)  # a lower bound, within a factor 3


def test_negative_time_step():
    """Timestamps that go backwards give a negative step, whose discrete Q is
    negative semi-definite: the smoother returns NaN and validate names the
    step's Q."""
    cm = kx.constant_velocity(dims=1, q=0.5, r=0.1)
    model = cm.at_times(jnp.array([0.0, 1.0, 0.5, 2.0]))
    y = np.ones((4, 1))
    assert np.all(np.isnan(np.asarray(kx.smooth(model, y).states)))
    with pytest.raises(ValueError, match=r"model\.Q is not positive definite at time index 1"):
        kx.validate(model, y)
