"""The Fisher-identity route of the log-likelihood's second derivatives (``expected_joint.py``).

The compiled log-likelihood's Hessian differentiates the partial gradient of
ℓ(θ; x, Σ) = E[log p(x, y_K; θ)] at the posterior moments (Fisher's
identity: the score is the posterior mean of the complete-data score; e.g.
Cappé, Moulines & Rydén (2005), Inference in Hidden Markov Models, §10.1 —
section from memory). Checked here, on models whose fields are time-invariant
(the summed statistics) and per-step (the per-step terms), dense and diagonal
(``DiagonalNoise``) Q and R, every entry observed (the dense-R summed branch)
and missing entries with an empty step (the per-pattern branch), flat and
proper priors:

- the partial gradient of ℓ at the posterior equals the gradient of the
  log-likelihood: against a directional central difference of the
  prediction-error decomposition of a textbook Kalman filter in NumPy
  (tests/reference.py; Harvey (1989), Forecasting, Structural Time Series
  Models and the Kalman Filter, Ch. 3, chapter from memory) with a prior, and
  against JAX autodiff through the portable route (``method="scan"``) for
  the flat prior, which that filter does not cover;
- the kernel's Hessian (now from this route) against the portable route's
  Hessian (JAX through its recursions) and central differences of the
  kernel's gradient; in float32 and under vmap.

Tolerances relative to the largest entry (common practice): 1e-8 between two
float64 routes; 1e-6 for central differences of a gradient (step 1e-5) and
for a directional difference of the NumPy filter (step 1e-5: truncation
h²|f'''|/6 ≈ 1e-10, rounding eps·|f|/h ≈ 1e-10); 1e-3 for float32.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src import likelihood
from kalmax._src.backends import cpu as cpu_backend
from kalmax._src.checks import canonicalize
from kalmax._src.covariance_band import posterior_band
from kalmax._src.expected_joint import expected_log_joint
from kalmax._src.primitive import smoothed_means

from reference import kalman_filter, random_data, random_model

pytestmark = pytest.mark.skipif(not cpu_backend.available(), reason="compiled kernel not built")

N, P, T = 2, 3, 8
K = 7  # θ: shifts of A, C, b, d, m0 along fixed directions, log-scales of Q and R


def _problem(rng, *, time_varying, noise, prior, missing):
    base = random_model(rng, N, P, T, time_varying=time_varying, full_R=noise == "dense", prior=prior)
    if noise == "diagonal":  # diagonal Q as well
        Q = base["Q"]
        base["Q"] = np.diagonal(Q, axis1=-2, axis2=-1)[..., None] * np.eye(N)
    y, mask = random_data(rng, base, T, missing=missing)
    dirs = {k: rng.standard_normal(np.shape(base[k])) for k in ("A", "C", "b", "d")}
    theta0 = 0.1 * rng.standard_normal(K)

    def fields(theta, xp):
        a, c, lq, lr, sb, sd, m = (theta[i] for i in range(K))
        f = dict(base, A=base["A"] + 0.1 * a * dirs["A"], C=base["C"] + c * dirs["C"],
                 Q=xp.exp(lq) * base["Q"], R=xp.exp(lr) * base["R"],
                 b=base["b"] + sb * dirs["b"], d=base["d"] + sd * dirs["d"])
        if prior:
            f["m0"] = base["m0"] + m
        return f

    def model(theta, dtype):
        f = {k: (None if v is None else jnp.asarray(v, dtype)) for k, v in fields(theta, jnp).items()}
        Q, R = f["Q"], f["R"]
        if noise == "diagonal":
            Q = kx.DiagonalNoise(jnp.diagonal(Q, axis1=-2, axis2=-1))
            R = kx.DiagonalNoise(jnp.diagonal(R, axis1=-2, axis2=-1))
        return kx.StateSpace(A=f["A"], C=f["C"], Q=Q, R=R, b=f["b"], d=f["d"], x0_mean=f["m0"], x0_cov=f["P0"])

    def loglik(theta, yy, method):
        return kx.log_likelihood(model(theta, theta.dtype), yy, jnp.asarray(mask), method=method)

    def numpy_loglik(theta):
        return kalman_filter(fields(theta, np), y, mask).log_likelihood

    return theta0, y, mask, model, loglik, numpy_loglik


def _close(h, ref, rel):
    h, ref = np.asarray(h, np.float64), np.asarray(ref, np.float64)
    np.testing.assert_allclose(h, ref, rtol=0, atol=rel * np.max(np.abs(ref)))


CASES = [  # (time_varying, noise, prior, missing)
    (False, "dense", True, 0.0),     # dense R, every entry observed: the summed branch
    (False, "dense", False, 0.3),    # dense R, missing entries and an empty step: per pattern
    (False, "diagonal", True, 0.3),  # per-component sums with missing entries
    (True, "dense", True, 0.3),      # per-step fields
    (True, "diagonal", False, 0.3),
]


@pytest.mark.parametrize("time_varying,noise,prior,missing", CASES)
def test_partial_gradient_of_the_expected_joint_is_the_score(rng, time_varying, noise, prior, missing):
    theta0, y, mask, model, loglik, numpy_loglik = _problem(rng, time_varying=time_varying, noise=noise,
                                                            prior=prior, missing=missing)
    th = jnp.asarray(theta0)
    m, yc, mk, _, _ = canonicalize(model(th, jnp.float64), jnp.asarray(y), jnp.asarray(mask),
                                   keep_diagonal_R=True, keep_diagonal_Q=True)
    w = mk.astype(yc.dtype)
    x = smoothed_means(m, yc, w, "scan")
    band = posterior_band(m, w, "scan")
    # The score w.r.t. θ: the partial gradient of ℓ in the model, pulled back through θ ↦ model.
    _, pull = jax.vjp(lambda t: canonicalize(model(t, jnp.float64), yc, mk, keep_diagonal_R=True,
                                             keep_diagonal_Q=True)[0], th)
    model_bar = jax.grad(expected_log_joint)(m, yc, w, x, *band)
    (score,) = pull(model_bar)
    if prior:
        u = np.random.default_rng(1).standard_normal(K)
        step = 1e-5
        ref = (numpy_loglik(theta0 + step * u) - numpy_loglik(theta0 - step * u)) / (2 * step)
        _close(np.dot(score, u), ref, 1e-6)
    _close(score, jax.grad(lambda t: loglik(t, jnp.asarray(y), "scan"))(th), 1e-8)


@pytest.mark.parametrize("time_varying,noise,prior,missing", CASES)
def test_kernel_hessian_against_the_portable_route_and_differences(rng, time_varying, noise, prior, missing):
    assert likelihood._GRADIENT_TANGENT_SOURCE is likelihood._fisher_gradient  # the route under test
    theta0, y, _, _, loglik, _ = _problem(rng, time_varying=time_varying, noise=noise, prior=prior,
                                          missing=missing)
    th, yj = jnp.asarray(theta0), jnp.asarray(y)
    h_cpu = jax.jit(jax.hessian(lambda t: loglik(t, yj, "cpu")))(th)
    _close(h_cpu, jax.jit(jax.hessian(lambda t: loglik(t, yj, "scan")))(th), 1e-8)
    grad = jax.jit(jax.grad(lambda t: loglik(t, yj, "cpu")))
    step = 1e-5
    columns = [(grad(th.at[j].add(step)) - grad(th.at[j].add(-step))) / (2 * step) for j in range(K)]
    _close(h_cpu, np.stack(columns, axis=1), 1e-6)


def test_float32_and_vmap(rng):
    """float32 close to float64; the Hessian vmapped over two datasets (a batched
    mask too: the dense-R branch is then a select) equals each one's."""
    theta0, y, mask, model, _, _ = _problem(rng, time_varying=False, noise="dense", prior=True, missing=0.0)
    th = jnp.asarray(theta0)

    def loglik(t, yy, mk):
        return kx.log_likelihood(model(t, t.dtype), yy, mk, method="cpu")

    hess = jax.jit(jax.hessian(loglik))
    yj, mk = jnp.asarray(y), jnp.asarray(mask)
    h64 = hess(th, yj, mk)
    h32 = hess(th.astype(jnp.float32), yj.astype(jnp.float32), mk)
    assert h32.dtype == jnp.float32 and np.all(np.isfinite(np.asarray(h32)))
    _close(h32, h64, 1e-3)
    masks = jnp.stack([mk, mk.at[2, 1].set(False)])  # all observed; one entry missing
    ys = jnp.stack([yj, yj + 0.5])
    batched = jax.jit(jax.vmap(jax.hessian(loglik), in_axes=(None, 0, 0)))(th, ys, masks)
    for b in range(2):
        _close(batched[b], jax.jit(jax.hessian(lambda t: kx.log_likelihood(
            model(t, t.dtype), ys[b], masks[b], method="scan")))(th), 1e-8)
