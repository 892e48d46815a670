"""The log-likelihood gradient w.r.t. a process noise that is small beside the posterior.

Regression for the Fisher-identity gradient Q̄_t = ½ Q⁻¹(r rᵀ + W − Q)Q⁻¹
(kalmax/_src/likelihood.py, module docstring): with q/r between 1e-7 and
1e-4, W − Q cancelled down to O(|Q|²/|Σ|) and the float64 gradient was
wrong by factors (along a random direction E = Q∘N: 0.2–4 times the
largest of the derivative and the typical size of its terms; along log q:
0.3 % – 26×). The cases are three constant-velocity models of the float32
sweep (tests/float32_sweep.py, seed 2024) that the sweep had to leave out
of its gradient check.

Reference: central differences of a textbook covariance-form Kalman filter
(``float32_sweep.kf_rts``: Kalman (1960); log p(y) by the prediction-error
decomposition, e.g. Harvey (1989), Forecasting, Structural Time Series
Models and the Kalman Filter, §3.4 -- section from memory) run in long
double (64-bit significand), where the noise of the difference quotient is
~1e-15 relative. Steps 8e-3 and 2e-3 relative to every entry of Q with one
Richardson step (the error of a central difference is even in the step);
along these directions the long-double quotient is constant to 1e-9 from
steps 3e-2 to 1e-4 (measured), and the test checks the Richardson
correction. The covariance-form backend (reverse mode through the same
filter, another independent route) agreed with this reference to 1e-8 in
the investigation.

Tolerances: 1e-3 of max(|reference|, typical term) along Q∘N (the float32
sweep's measure, ``float32_sweep.grad_err``) and 2e-3 relative along log q;
the remaining error is that of the band of H⁻¹ in double (κ(H) up to
~1e12 here), measured at most 3e-4 and 1e-3.

The same cases with Q replaced by its diagonal, given as variances
(``kx.DiagonalNoise``), check the diagonal form, whose gradient w.r.t. the
variances is the diagonal of the dense one (same reference, with Q = diag(q)
in the long-double filter; directions diag(q) and diag(q∘N)).
"""

import jax
import numpy as np
import pytest

import float32_sweep as fs
import kalmax as kx
import robust_helpers as rh

# Constant velocity in 3 axes, T = 100 (tests/float32_sweep.py, draw_cases(2024, 36, 100)).
CASES = [
    fs.Case("cv", 3, 0.010124531699344633, False, 0.00010145527968470172, 0.5039543151113755,
            0.16277167614029117, 0.25257983547593127, 100, 592363753),
    fs.Case("cv", 3, 0.011037334641557496, True, 4.147881161780102e-07, 6.47984523519564,
            0.04012048606501947, 0.13975887436013096, 100, 1215091582),
    fs.Case("cv", 3, 0.087866138179014, False, 2.225942034712388e-06, 0.05809938513173121,
            147.04912055359722, 0.48324626873063914, 100, 38083376),
]
LONG_DOUBLE = np.finfo(np.longdouble).eps < 1e-18


def _long_double_derivatives(g, E, md=None):
    """d log p(y) / dh of Q + hE per case, and the size of the Richardson correction."""
    LD = np.longdouble
    md = {k: np.asarray(v, LD) for k, v in (g.md if md is None else md).items()}
    E = np.asarray(E, LD)
    y = np.asarray(np.where(g.mask, g.y, 0.0), LD)
    D = []
    for h in (LD(8e-3), LD(2e-3)):
        ll = [fs.kf_rts(md["A"], md["Q"] + s * h * E, md["C"], md["R"], md["m0"], md["P0"], y, g.mask, LD)[1]
              for s in (1, -1)]
        D.append((ll[0] - ll[1]) / (2 * h))
    R = (16 * D[1] - D[0]) / 15
    return np.asarray(R, np.float64), np.asarray(np.abs(R - D[1]), np.float64)


def _compare(method, grad_Q, directions, ref):
    """kalmax's Q-gradient along each direction against the long-double derivative."""
    B = len(CASES)
    for name, E in directions.items():
        R, correction = ref[name]
        assert np.all(correction <= 1e-6 * np.abs(R)), (name, correction / np.abs(R))  # reference converged
        terms = (grad_Q * E).reshape(B, -1)
        got = terms.sum(axis=1)
        if name == "log q":
            err, tol = np.abs(got - R) / np.abs(R), 2e-3
        else:
            typical = np.abs(terms).sum(axis=1) / np.sqrt(terms.shape[1])
            err, tol = np.abs(got - R) / np.maximum(np.abs(R), typical), 1e-3
        assert np.all(err <= tol), (method, name, err)


@pytest.fixture(scope="module")
def problem():
    if not LONG_DOUBLE:
        pytest.skip("numpy.longdouble is not extended precision here")
    (g,) = fs.group(CASES)
    directions = {"log q": g.md["Q"], "Q∘N": fs._directions(g)["Q"]}
    ref = {name: _long_double_derivatives(g, E) for name, E in directions.items()}
    return g, directions, ref


@pytest.mark.parametrize("method", [m for m in ("cpu", "scan") if m in rh.backends()])
def test_loglik_gradient_wrt_a_small_process_noise(problem, method):
    g, directions, ref = problem
    model = fs.kalmax_model(g.md, np.float64)
    y = np.where(g.mask, g.y, 0.0)
    grad = jax.jit(jax.vmap(jax.grad(lambda m, yy, k: kx.log_likelihood(m, yy, k, method=method))))
    Qbar = np.asarray(grad(model, y, g.mask).Q)
    _compare(method, Qbar, directions, ref)


def _diag(v):
    return v[..., :, None] * np.eye(v.shape[-1])


@pytest.fixture(scope="module")
def diagonal_problem():
    if not LONG_DOUBLE:
        pytest.skip("numpy.longdouble is not extended precision here")
    (g,) = fs.group(CASES)
    q = np.diagonal(g.md["Q"], axis1=-2, axis2=-1)  # (B, T-1, n)
    md = dict(g.md, Q=_diag(q))
    N = np.random.default_rng(4321).standard_normal(q.shape)
    directions = {"log q": q, "q∘N": q * N}
    ref = {name: _long_double_derivatives(g, _diag(E), md) for name, E in directions.items()}
    return g, q, directions, ref


@pytest.mark.parametrize("method", [m for m in ("cpu", "scan") if m in rh.backends()])
def test_loglik_gradient_wrt_small_diagonal_process_noise(diagonal_problem, method):
    g, q, directions, ref = diagonal_problem
    model = fs.kalmax_model(g.md, np.float64).replace(Q=kx.DiagonalNoise(q))
    y = np.where(g.mask, g.y, 0.0)
    grad = jax.jit(jax.vmap(jax.grad(lambda m, yy, k: kx.log_likelihood(m, yy, k, method=method))))
    qbar = np.asarray(grad(model, y, g.mask).Q.variances)
    assert qbar.shape == q.shape
    _compare(method, qbar, directions, ref)
