"""Every JAX transformation, on every registered backend, against a plain-JAX reference.

The table (one jitted program per backend and dtype, so that compilation is
shared): jit, grad, value_and_grad, vmap over data, vmap over models,
vmap of grad, jacrev, jacfwd, jvp, linearize, hessian (forward over
reverse), checkpoint, lax.scan and lax.cond around the call, and AOT
``lower().compile()``. Each entry is compared with the same transformation of
the reference below.

Reference (independent of kalmax's solvers): the smoothed means are the
minimiser of the quadratic objective J written densely, x* = H⁻¹g with
H = ∇²J and g = −∇J(0) by JAX autodiff and ``jnp.linalg.solve`` (the normal
equations; e.g. Särkkä (2013), Bayesian Filtering and Smoothing, §8 —
from memory); the log-likelihood is the Gaussian density of the stacked
measurements, whose mean and covariance are built from the linear map from
the prior draw and the process noises to the states (textbook joint
Gaussian, common practice). Every step is observed; small sizes (T = 5,
n = p = 2) keep the dense reference cheap and exact.

A new backend is picked up through ``registry.available()`` and cannot skip
an entry. The default run covers a core row (jit, grad in θ and y, jvp,
jacfwd, vmap of grad, forward-over-reverse hessian, AOT) for the kernel in
both dtypes and "scan" and "covariance" in float64;
``KALMAX_SLOW=1`` runs the whole table for every backend and dtype (minutes: one large program per
backend and dtype). float32 is compared at 2e-3 relative (float32 rounding of the
inputs times κ of these small problems), float64 at 1e-7.
"""

import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src.backends import registry

T, N, P = 5, 2, 2
BACKENDS = registry.available()
TOL = {np.float32: 2e-3, np.float64: 1e-7}


def _base(dtype):
    rng = np.random.default_rng(18)
    A0 = np.array([[0.9, 0.2], [-0.1, 0.8]])
    C0 = rng.standard_normal((P, N))
    y = rng.standard_normal((T, P))
    ys = rng.standard_normal((3, T, P))
    thetas = 0.2 * rng.standard_normal((3, 3))
    theta = np.array([0.1, -0.2, 0.3])
    weights = rng.standard_normal((T, N))
    c = lambda a: jnp.asarray(a, dtype)  # noqa: E731
    return dict(A0=c(A0), C0=c(C0), y=c(y), ys=c(ys), thetas=c(thetas), theta=c(theta), weights=c(weights))


def _matrices(theta, A0, C0):
    """(A, C, Q, R, m0, P0) for the parameter vector θ (3 entries, every kind of model field)."""
    dt = A0.dtype
    A = A0 * (1 + theta[0])
    C = C0 + theta[1] * jnp.eye(P, N, dtype=dt)
    Q = jnp.exp(theta[2]) * jnp.array([[0.3, 0.1], [0.1, 0.2]], dt)
    R = jnp.exp(-theta[1]) * jnp.array([[0.5, 0.1], [0.1, 0.4]], dt)
    m0 = jnp.array([0.5, -0.5], dt) * theta[0]
    P0 = jnp.eye(N, dtype=dt) * (1 + theta[2] ** 2)
    return A, C, Q, R, m0, P0


def kalmax_functions(method, A0, C0, weights):
    def model(theta):
        A, C, Q, R, m0, P0 = _matrices(theta, A0, C0)
        return kx.StateSpace(A=A, C=C, Q=Q, R=R, x0_mean=m0, x0_cov=P0)

    states = lambda theta, y: kx.smooth(model(theta), y, method=method).states  # noqa: E731
    loglik = lambda theta, y: kx.log_likelihood(model(theta), y, method=method)  # noqa: E731
    return states, loglik


def reference_functions(A0, C0, weights):
    def objective(x, theta, y):
        A, C, Q, R, m0, P0 = _matrices(theta, A0, C0)
        r = x[1:] - x[:-1] @ A.T
        e = y - x @ C.T
        quad = lambda v, S: jnp.sum(v * jnp.linalg.solve(S, v.T).T)  # noqa: E731
        return 0.5 * (quad(r, Q) + quad(e, R) + quad((x[0] - m0)[None], P0))

    def states(theta, y):
        zero = jnp.zeros((T * N,), y.dtype)
        J = lambda v: objective(v.reshape(T, N), theta, y)  # noqa: E731
        H = jax.hessian(J)(zero)
        g = -jax.grad(J)(zero)
        return jnp.linalg.solve(H, g).reshape(T, N)

    def loglik(theta, y):
        A, C, Q, R, m0, P0 = _matrices(theta, A0, C0)
        # x_t = A^t (m0 + s_0) + Σ_{k<t} A^{t-1-k} s_{k+1}, s ~ N(0, blockdiag(P0, Q, ..., Q))
        eye = jnp.eye(N, dtype=y.dtype)
        powers = [eye]
        for _ in range(T - 1):
            powers.append(A @ powers[-1])
        M = jnp.zeros((T * N, T * N), y.dtype)
        for t in range(T):
            for k in range(t + 1):
                M = M.at[t * N:(t + 1) * N, k * N:(k + 1) * N].set(powers[t - k])
        S = jax.scipy.linalg.block_diag(P0, *([Q] * (T - 1)))
        mean_x = jnp.concatenate([powers[t] @ m0 for t in range(T)])
        Cbig = jax.scipy.linalg.block_diag(*([C] * T))
        cov_y = Cbig @ M @ S @ M.T @ Cbig.T + jax.scipy.linalg.block_diag(*([R] * T))
        return jax.scipy.stats.multivariate_normal.logpdf(y.reshape(-1), Cbig @ mean_x, cov_y)

    return states, loglik


FULL = os.environ.get("KALMAX_SLOW") == "1"


def core_table(states, loglik, weights, theta, thetas, y, ys):
    """The default row: one program per backend and dtype."""
    score = lambda th, yy: jnp.sum(weights * states(th, yy))  # noqa: E731
    direction = jnp.array([0.3, -0.7, 0.5], theta.dtype)
    return {
        "jit_states": states(theta, y),
        "grad_loglik": jax.grad(loglik)(theta, y),
        "grad_score_y": jax.grad(score, argnums=1)(theta, y),
        "jvp_states": jax.jvp(lambda th: states(th, y), (theta,), (direction,))[1],
        "jacfwd_loglik": jax.jacfwd(loglik)(theta, y),
        "vmap_of_grad": jax.vmap(jax.grad(score))(thetas, ys),
        "hessian_score": jax.hessian(score)(theta, y),
    }


def table(states, loglik, weights, theta, thetas, y, ys):
    """Every transformation of the two functions, as one dict (one program)."""
    score = lambda th, yy: jnp.sum(weights * states(th, yy))  # noqa: E731
    out = {}
    out["jit_states"] = states(theta, y)
    out["jit_loglik"] = loglik(theta, y)
    out["grad_score"] = jax.grad(score)(theta, y)
    out["grad_score_y"] = jax.grad(score, argnums=1)(theta, y)
    out["grad_loglik"] = jax.grad(loglik)(theta, y)
    v, g = jax.value_and_grad(loglik)(theta, y)
    out["value_and_grad"] = jnp.concatenate([v[None], g])
    out["vmap_data"] = jax.vmap(loglik, in_axes=(None, 0))(theta, ys)
    out["vmap_models"] = jax.vmap(states, in_axes=(0, None))(thetas, y)
    out["vmap_both"] = jax.vmap(loglik)(thetas, ys)
    out["vmap_of_grad"] = jax.vmap(jax.grad(score))(thetas, ys)
    out["jacrev_states"] = jax.jacrev(states)(theta, y)
    out["jacfwd_states"] = jax.jacfwd(states)(theta, y)
    out["jacfwd_loglik"] = jax.jacfwd(loglik)(theta, y)
    direction = jnp.array([0.3, -0.7, 0.5], theta.dtype)
    out["jvp_states"] = jax.jvp(lambda th: states(th, y), (theta,), (direction,))[1]
    out["jvp_loglik"] = jax.jvp(lambda th: loglik(th, y), (theta,), (direction,))[1]
    _, lin = jax.linearize(lambda th: score(th, y), theta)
    out["linearize_score"] = lin(direction)
    out["hessian_loglik"] = jax.hessian(loglik)(theta, y)
    out["hessian_score"] = jax.hessian(score)(theta, y)
    out["checkpoint_grad"] = jax.grad(jax.checkpoint(loglik))(theta, y)

    def body(carry, th):
        return carry + loglik(th, y), None

    out["scan_grad"] = jax.grad(lambda ths: jax.lax.scan(body, jnp.zeros((), y.dtype), ths)[0])(thetas)
    pick = lambda th, flag: jax.lax.cond(flag, lambda t: loglik(t, y), lambda t: score(t, y), th)  # noqa: E731
    out["cond_grad"] = jnp.stack([jax.grad(pick)(theta, True), jax.grad(pick)(theta, False)])
    return out


_REFERENCE = {}
TABLE = table if FULL else core_table


def _reference():
    if not _REFERENCE:
        b64 = _base(np.float64)  # the reference always in float64
        states, loglik = reference_functions(b64["A0"], b64["C0"], b64["weights"])
        fn = jax.jit(lambda *a: TABLE(states, loglik, b64["weights"], *a))
        _REFERENCE.update({k: np.asarray(v) for k, v in
                           fn(b64["theta"], b64["thetas"], b64["y"], b64["ys"]).items()})
    return _REFERENCE


# Default run: the compiled kernel in both dtypes and the two portable solvers
# users reach first in float64 (each case compiles one large program, 10-50 s
# here); KALMAX_SLOW=1 runs every registered backend in both dtypes.
_DEFAULT = {("cpu", np.float64), ("cpu", np.float32), ("scan", np.float64), ("covariance", np.float64)}
CASES = [pytest.param(m, d, id=f"{m}-{np.dtype(d).name}",
                      marks=[] if FULL or (m, d) in _DEFAULT else pytest.mark.skip("KALMAX_SLOW=1 runs it"))
         for m in BACKENDS for d in (np.float64, np.float32)]


@pytest.mark.parametrize("method, dtype", CASES)
def test_transformation_table(method, dtype):
    b = _base(dtype)
    states, loglik = kalmax_functions(method, b["A0"], b["C0"], b["weights"])
    fn = lambda *a: TABLE(states, loglik, b["weights"], *a)  # noqa: E731
    args = (b["theta"], b["thetas"], b["y"], b["ys"])
    # AOT: lower and compile explicitly, then call the compiled program.
    compiled = jax.jit(fn).lower(*args).compile()
    got = compiled(*args)
    ref = _reference()
    assert set(got) == set(ref)
    for key, value in got.items():
        value = np.asarray(value)
        assert value.dtype == dtype, key
        expect = ref[key]
        scale = max(1.0, float(np.max(np.abs(expect))))
        err = float(np.max(np.abs(value - expect))) / scale
        assert err < TOL[dtype], f"{method} {np.dtype(dtype).name} {key}: relative error {err:.2e}"
