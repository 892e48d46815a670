"""Robust measurement losses (Huber, Student-t) on a linear model with injected outliers (float64).

Independent checks:
- the losses' normalisers against numerical integration (Huber) and SciPy's
  Student-t log-density (Aravkin, Burke & Pillonetto (2014), SIAM J. Control
  Optim. 52(5): the unit-scale Student-t measurement model);
- the robust MAP path against a dense iteratively reweighted least-squares
  loop written here in NumPy (stacked whitened residuals; common practice);
- Huber with a threshold above every whitened residual equals ``kx.smooth``;
- gradients (threshold, degrees of freedom, R, y) against central differences.
"""

import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.integrate
import scipy.stats

import kalmax as kx
import reference as ref
from helpers import to_model

T, N, P = 12, 2, 2
slow = pytest.mark.skipif(not os.environ.get("KALMAX_SLOW"), reason="KALMAX_SLOW=1")


def problem(rng):
    md = ref.random_model(rng, N, P, T, time_varying=False, full_R=True, offsets=False)
    y, mask = ref.random_data(rng, md, T, missing=0.15)
    observed = np.argwhere(mask)
    for t, i in observed[rng.choice(len(observed), 3, replace=False)]:
        y[t, i] += rng.choice([-1, 1]) * 12.0  # gross outliers, ~12/√R standard deviations
    return md, to_model(md), y, mask


def dense_system(md, y, mask):
    """(F, g, rows): whitened residual r(x) = F x − g over flat x; rows = indices of measurement rows."""
    E = ref.expand(md, T)
    F, g, meas, meas_cols = [], [], [], []
    Wq = np.linalg.inv(np.linalg.cholesky(E["Q"][0]))
    for t in range(T - 1):
        row = np.zeros((N, T * N))
        row[:, (t + 1) * N:(t + 2) * N] = Wq
        row[:, t * N:(t + 1) * N] = -Wq @ E["A"][t]
        F.append(row), g.append(np.zeros(N))
    for t in range(T):
        k = np.flatnonzero(mask[t])
        if not k.size:
            continue
        Wr = np.linalg.inv(np.linalg.cholesky(E["R"][t][np.ix_(k, k)]))
        row = np.zeros((k.size, T * N))
        row[:, t * N:(t + 1) * N] = Wr @ E["C"][t][k]
        meas.extend(range(sum(len(a) for a in g), sum(len(a) for a in g) + k.size))
        meas_cols.extend(k)  # whitened row j of step t belongs to column k[j] (R_KK's Cholesky order)
        F.append(row), g.append(Wr @ y[t, k])
    Wp = np.linalg.inv(np.linalg.cholesky(E["P0"]))
    row = np.zeros((N, T * N))
    row[:, :N] = Wp
    F.append(row), g.append(Wp @ E["m0"])
    dense_system.columns = np.array(meas_cols)  # column of each measurement row
    return np.vstack(F), np.concatenate(g), np.array(meas)


def dense_irls(F, g, rows, weight, x):
    """Iteratively reweighted least squares on the stacked residuals (plain NumPy)."""
    for _ in range(500):
        z = F @ x - g
        w = np.ones(len(g))
        w[rows] = weight(z[rows])
        x_new = np.linalg.solve(F.T @ (w[:, None] * F), F.T @ (w * g))
        if np.max(np.abs(x_new - x)) < 1e-15:
            return x_new
        x = x_new
    return x


def test_normalisers_are_the_densities_normalising_constants():
    huber_rho = jax.jit(lambda d, z: kx.HuberLoss(d).rho(z))  # one compile for every quadrature point
    for delta in (0.7, 1.345, 2.5):
        integral = scipy.integrate.quad(lambda z: np.exp(-float(huber_rho(delta, z))),
                                        -np.inf, np.inf, epsabs=1e-13, epsrel=1e-12)[0]
        assert np.isclose(float(kx.HuberLoss(delta).log_normalizer(jnp.float64)), np.log(integral), rtol=1e-10)
    z = np.linspace(-6, 6, 13)
    for nu in (1.5, 4.0, 30.0):
        loss = kx.StudentTLoss(nu)
        got = -np.asarray(loss.rho(jnp.asarray(z))) - float(loss.log_normalizer(jnp.float64))
        np.testing.assert_allclose(got, scipy.stats.t.logpdf(z, nu), rtol=1e-12, atol=1e-12)
    assert np.isclose(float(kx.SquaredLoss().log_normalizer(jnp.float64)), 0.5 * np.log(2 * np.pi))


# Student-t (a second compiled solve) behind KALMAX_SLOW=1; its default-run check is
# none: the Huber case exercises the same IRLS weights path.
# One threshold per column (a (P,) parameter, as the command line's --robust uses), 1.5 and 2.5.
@pytest.mark.parametrize("loss", [kx.HuberLoss(np.array([1.5, 2.5])),
                                  pytest.param(kx.StudentTLoss(4.0), marks=slow)], ids=["huber", "student"])
def test_equals_dense_irls_with_outliers(rng, loss):
    md, model, y, mask = problem(rng)
    F, g, rows = dense_system(md, y, mask)
    cols = dense_system.columns
    x_sq = np.linalg.lstsq(F, g, rcond=None)[0]
    # The reference weighs each row with its own column's parameter (the loss's formula, per row).
    param = np.broadcast_to(np.asarray(loss.threshold if isinstance(loss, kx.HuberLoss) else loss.dof), (P,))
    one = lambda c: type(loss)(param[c])  # noqa: E731
    weight = lambda z: np.array([float(one(c).weight(jnp.asarray(v))) for v, c in zip(z, cols)])  # noqa: E731
    want = dense_irls(F, g, rows, weight, x_sq).reshape(T, N)
    # IRLS converges linearly, and the default stopping rule (λ² ≤ 1e-18 (1 + J)) leaves ~1e-8 in x
    # along weakly weighted directions: a tighter tol (traced, no recompile) for an 1e-8 comparison.
    out = kx.smooth_nonlinear(model, y, mask, loss=loss, init=x_sq.reshape(T, N), tol=1e-24)
    assert bool(out.converged)
    np.testing.assert_allclose(out.states, want, rtol=0, atol=1e-8)
    # The outliers moved the squared-loss path away from the robust one.
    assert np.max(np.abs(want - x_sq.reshape(T, N))) > 0.1


def test_huber_equals_squared_when_no_residual_exceeds_threshold(rng):
    md, model, y, mask = problem(rng)
    F, g, rows = dense_system(md, y, mask)
    x_sq = np.linalg.lstsq(F, g, rcond=None)[0]
    threshold = 1.01 * np.max(np.abs((F @ x_sq - g)[rows]))
    out = kx.smooth_nonlinear(model, y, mask, loss=kx.HuberLoss(np.full(P, threshold)))  # shape shared above
    assert bool(out.converged)
    np.testing.assert_allclose(out.states, kx.smooth(model, y, mask).states, rtol=0, atol=1e-10)


def test_gradients_in_loss_parameter_R_and_y(rng):
    md, model, y, mask = problem(rng)
    y0 = np.where(mask, y, 0.0)
    weights = jnp.asarray(rng.standard_normal((T, N)))

    def loss(delta, R, yy):
        out = kx.smooth_nonlinear(model.replace(R=R), yy, mask, loss=kx.HuberLoss(delta * jnp.ones(P)))
        return jnp.sum(weights * out.states)

    args = (1.5, jnp.asarray(model.R), jnp.asarray(y0))
    grads = jax.grad(loss, argnums=(0, 1, 2))(*args)
    dR = rng.standard_normal((P, P))
    directions = (1.0, 1e-2 * (dR + dR.T), rng.standard_normal((T, P)) * mask)
    h = 1e-6
    for i, d in enumerate(directions):
        plus, minus = list(args), list(args)
        plus[i], minus[i] = args[i] + h * d, args[i] - h * d
        fd = (loss(*plus) - loss(*minus)) / (2 * h)
        assert np.isclose(float(jnp.sum(grads[i] * d)), float(fd), rtol=1e-6, atol=1e-8), i


@slow
def test_student_dof_gradient(rng):
    md, model, y, mask = problem(rng)
    weights = jnp.asarray(rng.standard_normal((T, N)))
    f = lambda nu: jnp.sum(weights * kx.smooth_nonlinear(model, y, mask, loss=kx.StudentTLoss(nu)).states)  # noqa: E731
    fd = (f(4.0 + 1e-6) - f(4.0 - 1e-6)) / 2e-6
    assert np.isclose(float(jax.grad(f)(4.0)), float(fd), rtol=1e-6, atol=1e-8)


def test_huber_laplace_against_dense_hessian(rng):
    """Laplace log-likelihood with a Huber loss, against a dense Hessian of the stacked objective."""
    md, model, y, mask = problem(rng)
    F, g, rows = dense_system(md, y, mask)
    delta = 1.5
    loss = kx.HuberLoss(delta)
    x = np.asarray(kx.smooth_nonlinear(model, y, mask, loss=loss).states).ravel()
    z = F @ x - g
    rho = 0.5 * z ** 2
    out_rows = np.abs(z[rows]) > delta
    rho[rows] = np.where(out_rows, delta * np.abs(z[rows]) - 0.5 * delta ** 2, rho[rows])
    curvature = np.ones(len(g))
    curvature[rows] = np.where(out_rows, 0.0, 1.0)  # ρ'' of Huber
    H = F.T @ (curvature[:, None] * F)
    E = ref.expand(md, T)
    logdet_R = sum(np.linalg.slogdet(E["R"][t][np.ix_(k, k)])[1] for t, k in
                   ((t, np.flatnonzero(mask[t])) for t in range(T)) if k.size)
    log_z = float(loss.log_normalizer(jnp.float64))
    want = (-rho.sum() - 0.5 * np.linalg.slogdet(H)[1] - 0.5 * (T - 1) * np.linalg.slogdet(E["Q"][0])[1]
            - 0.5 * logdet_R - mask.sum() * log_z - 0.5 * np.linalg.slogdet(E["P0"])[1])
    got = kx.laplace_log_likelihood(model, y, mask, loss=loss)
    assert np.isclose(float(got), want, rtol=1e-10, atol=1e-9)


def test_student_laplace_gradient_in_R_against_central_differences(rng):
    """The path that learns a noise level: d/dR of the Laplace log-likelihood
    with a Student-t loss (through the MAP path's implicit VJP, the Hessian's
    log-determinant and log|R̃|), against central differences of the value
    along a random symmetric direction (step 1e-6, common practice)."""
    md, model, y, mask = problem(rng)
    loss = kx.StudentTLoss(4.0)

    def ll(R):
        return kx.laplace_log_likelihood(model.replace(R=R), y, mask, loss=loss)

    R0 = jnp.asarray(model.R)
    dR = rng.standard_normal((P, P))
    dR = 1e-2 * (dR + dR.T)
    h = 1e-6
    fd = (ll(R0 + h * dR) - ll(R0 - h * dR)) / (2 * h)
    assert np.isclose(float(jnp.sum(jax.grad(ll)(R0) * dR)), float(fd), rtol=1e-6, atol=1e-8)
