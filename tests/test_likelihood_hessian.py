"""Second derivatives of the compiled log-likelihood (``method="cpu"``) against independent routes.

The kernel's value and gradient come from one compiled pass; their
derivatives come from the tangents of x* and of the band of Σ = H⁻¹
(``likelihood.py``). Checked here, on the Hessian w.r.t. a small parameter
vector θ (offsets of diag A and diag C, log-scales of Q and R, the prior
mean: the parameters of ``benchmarks/hessian_cost.py``):

- against the same Hessian on the portable route (``method="scan"``: JAX
  autodiff through the factorisation and the selected inversion), the
  previous route of the kernel's second derivatives;
- against central differences of the kernel's gradient (itself checked
  against a textbook Kalman filter in tests/test_kernel_likelihood.py);
- against central second differences of the prediction-error decomposition
  of a textbook Kalman filter in plain NumPy (tests/reference.py; Harvey
  (1989), Forecasting, Structural Time Series Models and the Kalman Filter,
  Ch. 3, chapter from memory);

with dense and diagonal (``DiagonalNoise``) Q and R, flat and proper priors,
missing entries and a step with nothing observed; and that jit, vmap,
jacfwd-over-jacfwd, reverse-over-reverse and float32 work.

Tolerances (relative to the largest Hessian entry, common practice): 1e-8
between two float64 routes that round differently on these well-conditioned
problems; 1e-6 for central differences of the gradient with step 1e-5
(truncation h²|g'''|/6 ≈ 1e-9, rounding eps·|g|/h ≈ 1e-10); 1e-5 for second
differences of the NumPy filter with step 2e-4 (truncation (2h)²|f''''|/12 ≈
1e-7 here, rounding eps·|f|/h² ≈ 1e-7); 1e-3 for float32 (κ(H)·eps32 with
κ(H) ≈ 10²).
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx
from kalmax._src.backends import cpu as cpu_backend

from reference import kalman_filter, random_data, random_model

pytestmark = pytest.mark.skipif(not cpu_backend.available(), reason="compiled kernel not built")

N, P, T = 2, 2, 10


def _fields(theta, base, xp):
    """Model matrices at θ = (a, c, log q, log r, m0), each of length N (P = N)."""
    a, c, lq, lr, m0 = (theta[i * N:(i + 1) * N] for i in range(5))
    sq, sr = xp.exp(0.5 * lq), xp.exp(0.5 * lr)
    return dict(A=base["A"] + xp.diag(a), C=base["C"] + xp.diag(c),
                Q=sq[:, None] * base["Q"] * sq[None, :], R=sr[:, None] * base["R"] * sr[None, :],
                m0=base["m0"] + m0)


def _problem(rng, *, noise, prior, missing=0.3):
    """(base model dict, θ0, y, mask, the log-likelihood as a function of θ and y for a method)."""
    base = random_model(rng, N, P, T, time_varying=False, full_R=noise == "dense", offsets=True)
    if noise == "diagonal":
        base["Q"] = np.diag(rng.uniform(0.2, 0.5, N))
    y, mask = random_data(rng, base, T, missing=missing)
    theta0 = 0.1 * rng.standard_normal(5 * N)

    def model(theta, dtype):
        f = _fields(theta, {k: jnp.asarray(v, dtype) for k, v in base.items()}, jnp)
        Q, R = f["Q"], f["R"]
        if noise == "diagonal":
            Q, R = kx.DiagonalNoise(jnp.diagonal(Q)), kx.DiagonalNoise(jnp.diagonal(R))
        return kx.StateSpace(A=f["A"], C=f["C"], Q=Q, R=R, b=jnp.asarray(base["b"], dtype),
                             d=jnp.asarray(base["d"], dtype), x0_mean=f["m0"] if prior else None,
                             x0_cov=jnp.asarray(base["P0"], dtype) if prior else None)

    def loglik(theta, yy, method):
        return kx.log_likelihood(model(theta, theta.dtype), yy, jnp.asarray(mask), method=method)

    return base, theta0, y, mask, loglik


def _hessian(loglik, method):
    return jax.jit(jax.hessian(lambda th, yy: loglik(th, yy, method)))


def _close(h, ref, rel):
    h, ref = np.asarray(h, np.float64), np.asarray(ref, np.float64)
    np.testing.assert_allclose(h, ref, rtol=0, atol=rel * np.max(np.abs(ref)))


@pytest.mark.parametrize("noise", ["dense", "diagonal"])
@pytest.mark.parametrize("prior", [True, False])
def test_hessian_matches_the_portable_route_and_differences_of_the_gradient(rng, noise, prior):
    _, theta0, y, _, loglik = _problem(rng, noise=noise, prior=prior)
    th, yj = jnp.asarray(theta0), jnp.asarray(y)
    h_cpu = _hessian(loglik, "cpu")(th, yj)
    _close(h_cpu, _hessian(loglik, "scan")(th, yj), 1e-8)

    grad = jax.jit(jax.grad(lambda t: loglik(t, yj, "cpu")))
    step = 1e-5
    columns = [(grad(th.at[j].add(step)) - grad(th.at[j].add(-step))) / (2 * step) for j in range(th.size)]
    _close(h_cpu, np.stack(columns, axis=1), 1e-6)


def test_hessian_matches_second_differences_of_a_textbook_kalman_filter(rng):
    base, theta0, y, mask, loglik = _problem(rng, noise="dense", prior=True)
    h_cpu = _hessian(loglik, "cpu")(jnp.asarray(theta0), jnp.asarray(y))

    def f(theta):
        fields = _fields(theta, base, np)
        md = dict(base, A=fields["A"], C=fields["C"], Q=fields["Q"], R=fields["R"], m0=fields["m0"])
        return kalman_filter(md, y, mask).log_likelihood

    h, k = 2e-4, theta0.size
    E = np.eye(k) * h
    ref = np.empty((k, k))
    for i in range(k):
        for j in range(i, k):
            ref[i, j] = ref[j, i] = (f(theta0 + E[i] + E[j]) - f(theta0 + E[i] - E[j])
                                     - f(theta0 - E[i] + E[j]) + f(theta0 - E[i] - E[j])) / (4 * h * h)
    _close(h_cpu, ref, 1e-5)


def test_hessian_in_every_mode_order_and_under_vmap(rng):
    """jacfwd∘jacfwd and jacrev∘grad equal jax.hessian (jacfwd∘jacrev); the
    Hessian vmapped over two datasets equals each one's on the portable route."""
    _, theta0, y, _, loglik = _problem(rng, noise="diagonal", prior=True)
    th = jnp.asarray(theta0)
    ys = jnp.stack([jnp.asarray(y), jnp.asarray(y) + 0.5])
    ref = [_hessian(loglik, "scan")(th, yy) for yy in ys]
    f = lambda t, yy: loglik(t, yy, "cpu")  # noqa: E731
    _close(jax.jit(jax.jacfwd(jax.jacfwd(f)))(th, ys[0]), ref[0], 1e-8)
    _close(jax.jit(jax.jacrev(jax.grad(f)))(th, ys[0]), ref[0], 1e-8)
    batched = jax.jit(jax.vmap(jax.hessian(f), in_axes=(None, 0)))(th, ys)
    for b in range(2):
        _close(batched[b], ref[b], 1e-8)


@pytest.mark.parametrize("noise", ["dense", "diagonal"])
def test_float32_hessian_is_finite_and_close_to_float64(rng, noise):
    _, theta0, y, _, loglik = _problem(rng, noise=noise, prior=True)
    hess = _hessian(loglik, "cpu")
    h32 = hess(jnp.asarray(theta0, jnp.float32), jnp.asarray(y, jnp.float32))
    assert h32.dtype == jnp.float32 and np.all(np.isfinite(np.asarray(h32)))
    _close(h32, hess(jnp.asarray(theta0), jnp.asarray(y)), 1e-3)


def test_hessian_in_the_measurements_alone(rng):
    """Only y moves: the band of Σ has a zero tangent, so the batched kernel
    calls of the Hessian are all inside the means' tangent (``implicit.py``,
    the devices it asks for while lowering). log p is quadratic in y, so
    central differences of the gradient are exact up to rounding."""
    _, theta0, y, mask, loglik = _problem(rng, noise="dense", prior=False)
    th, y0 = jnp.asarray(theta0), jnp.asarray(np.where(mask, y, 0.0))
    h_cpu = jax.jit(jax.hessian(lambda yy: loglik(th, yy, "cpu")))(y0).reshape(y0.size, y0.size)
    grad = jax.jit(jax.grad(lambda yy: loglik(th, yy, "cpu")))
    step, flat = 1e-3, y0.reshape(-1)
    columns = [(grad((flat.at[j].add(step)).reshape(y0.shape)) - grad((flat.at[j].add(-step)).reshape(y0.shape)))
               .reshape(-1) / (2 * step) for j in range(flat.size)]
    _close(h_cpu, np.stack(columns, axis=1), 1e-6)
