"""jax.export of code that uses kalmax: portable path with a symbolic T, and the kernel with its checks disabled.

Each case exports the log-likelihood and its gradient, (de)serialises them
when ``flatbuffers`` is installed (the ``export`` extra), calls them on a T
other than any traced one and compares with the original function
(equality to rounding: the same program). The original is itself checked
against the NumPy textbook filter of tests/reference.py (Kalman filter
prediction-error decomposition; Durbin & Koopman (2012), Time Series
Analysis by State Space Methods, §7.2 — from memory).
"""

import importlib.util

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax import export

import kalmax as kx
from kalmax._src.backends import registry
from reference import kalman_filter
from helpers import to_dict

HAVE_FLATBUFFERS = importlib.util.find_spec("flatbuffers") is not None


def _problem():
    rng = np.random.default_rng(7)
    model = kx.StateSpace(A=jnp.array([[0.9, 0.1], [0.0, 0.7]]), C=jnp.array([[1.0, 0.5]]), Q=0.2 * jnp.eye(2),
                          R=jnp.eye(1) * 0.5, x0_mean=jnp.zeros(2), x0_cov=jnp.eye(2))
    y = jnp.asarray(rng.standard_normal((37, 1)))
    return model, y


def _roundtrip(exp, serialise):
    return export.deserialize(exp.serialize(vjp_order=1)) if serialise else exp


@pytest.mark.parametrize("serialise", [
    False, pytest.param(True, marks=pytest.mark.skipif(not HAVE_FLATBUFFERS, reason="needs flatbuffers (kalmax[export])"))])
@pytest.mark.parametrize("method", ["scan", "cpu"])
def test_export_call_and_gradient(method, serialise):
    if not registry.is_available(method):
        pytest.skip(f"{method} not available here")
    model, y = _problem()
    f = jax.jit(lambda A, yy: kx.log_likelihood(model.replace(A=A), yy, method=method))
    g = jax.jit(jax.grad(f))
    (T,) = export.symbolic_shape("T", constraints=("T >= 2",))
    shapes = (jax.ShapeDtypeStruct((2, 2), jnp.float64), jax.ShapeDtypeStruct((T, 1), jnp.float64))
    checks = kx.kernel_export_checks() if method == "cpu" else []
    value = _roundtrip(export.export(f, disabled_checks=checks)(*shapes), serialise)
    grad = _roundtrip(export.export(g, disabled_checks=checks)(*shapes), serialise)

    # the original against the textbook filter
    ref = kalman_filter(to_dict(model), np.asarray(y))
    np.testing.assert_allclose(float(f(model.A, y)), ref.log_likelihood, rtol=1e-10)
    for T_call in (37, 5):
        yy = y[:T_call]
        np.testing.assert_allclose(value.call(model.A, yy), f(model.A, yy), rtol=1e-12)
        np.testing.assert_allclose(grad.call(model.A, yy), g(model.A, yy), rtol=1e-12)
    if serialise:  # the deserialised value's own VJP (serialised with vjp_order=1)
        np.testing.assert_allclose(jax.grad(value.call)(model.A, y), g(model.A, y), rtol=1e-12)


def test_kernel_export_refused_without_the_checks():
    if not registry.is_available("cpu"):
        pytest.skip("compiled kernel not available")
    model, y = _problem()
    f = lambda yy: kx.log_likelihood(model, yy, method="cpu")  # noqa: E731
    with pytest.raises(ValueError, match="custom call"):
        export.export(jax.jit(f))(jax.ShapeDtypeStruct((10, 1), jnp.float64))
