"""Shape/dtype errors at trace time, and kx.validate's value checks."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx


def _ok(T=5, n=2, p=3):
    # C of full column rank: with a flat prior, C = ones would leave the direction
    # (1, -1) unobserved (H singular), which validate rightly reports.
    C = jnp.ones((p, n)).at[jnp.arange(n), jnp.arange(n)].set(2.0)
    model = kx.StateSpace(A=jnp.eye(n), C=C, Q=jnp.eye(n), R=jnp.eye(p))
    return model, jnp.zeros((T, p)), jnp.ones((T, p), bool)


@pytest.mark.parametrize("field,bad,pattern", [
    ("A", jnp.eye(3), r"model.Q must have shape \(3, 3\)"),
    ("C", jnp.ones((2, 2)), r"model.C must have shape \(3, 2\) \(time-invariant\) or \(5, 3, 2\)"),
    ("Q", jnp.ones((5, 2, 2)), r"model.Q must have shape \(2, 2\) \(time-invariant\) or \(4, 2, 2\)"),
    ("R", jnp.eye(2), r"model.R must have shape \(3, 3\)"),
    ("b", jnp.ones(3), r"model.b must have shape \(2,\)"),
    ("d", jnp.ones((4, 3)), r"model.d must have shape \(3,\) \(time-invariant\) or \(5, 3\)"),
    ("x0_mean", jnp.ones(2), r"x0_mean is given without model.x0_cov"),
])
def test_shape_errors_name_argument_and_shape(field, bad, pattern):
    model, y, mask = _ok()
    with pytest.raises(ValueError, match=pattern):
        kx.smooth(model.replace(**{field: bad}), y, mask)
    with pytest.raises(ValueError, match=pattern):  # at trace time, under jit
        jax.jit(kx.smooth)(model.replace(**{field: bad}), y, mask)


def test_y_and_mask_errors():
    model, y, mask = _ok()
    with pytest.raises(ValueError, match=r"y must have shape \(T, p\)"):
        kx.smooth(model, y[0], mask[0])
    with pytest.raises(ValueError, match="at least one time step"):
        kx.smooth(model, jnp.zeros((0, 3)), jnp.zeros((0, 3), bool))
    with pytest.raises(ValueError, match=r"mask must have the same shape as y, \(5, 3\)"):
        kx.smooth(model, y, mask[:4])
    with pytest.raises(TypeError, match="mask must be a boolean array"):
        kx.smooth(model, y, mask.astype(jnp.float32))
    with pytest.raises(TypeError, match="y must be a real floating-point array"):
        kx.smooth(model, jnp.zeros((5, 3), jnp.int32), mask)
    with pytest.raises(TypeError, match="model.A must be a real floating-point array"):
        kx.smooth(model.replace(A=jnp.eye(2, dtype=jnp.int32)), y, mask)
    with pytest.raises(TypeError, match="holdout must be a boolean"):
        kx.prediction_error(model, y, mask, jnp.zeros((5, 3)))
    with pytest.raises(ValueError, match="method must be one of"):
        kx.smooth(model, y, mask, method="nope")


def test_validate_reports_each_problem():
    model, y, mask = _ok()
    kx.validate(model, y, mask)  # fine: no error
    y_bad = y.at[2, 1].set(jnp.nan)
    with pytest.raises(ValueError, match=r"non-finite value\(s\) at observed entries \(first at t=2, column 1\)"):
        kx.validate(model, y_bad, mask)
    kx.validate(model, y_bad, mask.at[2, 1].set(False))  # NaN at a missing entry is fine
    with pytest.raises(ValueError, match="model.Q is not symmetric"):
        kx.validate(model.replace(Q=jnp.array([[1.0, 0.5], [0.0, 1.0]])), y, mask)
    with pytest.raises(ValueError, match="model.R is not positive definite"):
        kx.validate(model.replace(R=jnp.diag(jnp.array([1.0, -1.0, 1.0]))), y, mask)
    with pytest.raises(ValueError, match=r"model.Q is not positive definite at time index 1"):
        Qs = jnp.stack([jnp.eye(2), -jnp.eye(2), jnp.eye(2), jnp.eye(2)])
        kx.validate(model.replace(Q=Qs), y, mask)
    with pytest.raises(ValueError, match="not identified"):
        kx.validate(model, y, jnp.zeros_like(mask))
    # several problems are listed together
    with pytest.raises(ValueError) as info:
        kx.validate(model.replace(A=jnp.full((2, 2), jnp.inf), R=-jnp.eye(3)), y_bad, mask)
    msg = str(info.value)
    assert "model.A has non-finite" in msg and "model.R is not positive definite" in msg and "y has 1" in msg
