"""Independent NumPy/SciPy reference implementations for linear-Gaussian
state-space smoothing, used by the test-suite as ground truth.

Model (t = 0..T-1, n states, p measurements)::

    x_{t+1} = A_t x_t + b_t + w_t,   w_t ~ N(0, Q_t)    t = 0..T-2
    y_t     = C_t x_t + d_t + v_t,   v_t ~ N(0, R_t)    t = 0..T-1
    x_0 ~ N(m0, P0)                                      (optional prior)

``R_t`` may be a full covariance. ``mask`` is a boolean (T, p) array, True
where an entry of ``y`` is observed. Missing entries of ``y`` may hold NaN and
are never read: at step t only the observed sub-vector ``y_{t,K}`` enters,
with map ``C_t[K, :]``, offset ``d_t[K]`` and covariance ``R_t[K, K]`` (the
marginal of a Gaussian over a subset of its coordinates).

Everything here is deliberately simple, float64, and loops in Python. Several
functions reach the same quantity by different routes (sequential filtering,
dense normal equations, dense joint Gaussian) so that they can check each
other; see ``tests/test_reference.py``.

Model dictionaries
------------------
A ``model_dict`` has keys ``A, C, Q, R, b, d, m0, P0``. ``b, d, m0, P0`` may
be ``None`` (or absent). Shapes, time-invariant or time-varying:

    A: (n, n) or (T-1, n, n)      C: (p, n) or (T, p, n)
    Q: (n, n) or (T-1, n, n)      R: (p, p) or (T, p, p)
    b: (n,)   or (T-1, n)         d: (p,)   or (T, p)
    m0: (n,)                      P0: (n, n)

State vectors of the whole trajectory are flattened time-major:
index ``t * n + i`` holds component i of x_t.
"""

from __future__ import annotations

from pathlib import Path
from typing import NamedTuple

import numpy as np
from scipy import linalg as sla
from scipy.stats import multivariate_normal

__all__ = [
    "expand",
    "kalman_filter",
    "FilterResult",
    "rts_smoother",
    "dense_normal_equations",
    "dense_smooth",
    "dense_objective",
    "dense_log_likelihood",
    "dense_posterior",
    "random_model",
    "random_data",
    "local_level_steady_state",
    "load_nile",
]

_LOG_2PI = float(np.log(2.0 * np.pi))


# ---------------------------------------------------------------------------
# model handling
# ---------------------------------------------------------------------------


def _per_step(value, count, core_ndim, name, core_shape):
    """Broadcast a time-invariant array to ``count`` steps, or check the
    leading dimension of a time-varying one. ``value=None`` gives zeros."""
    if value is None:
        return np.zeros((count,) + core_shape, dtype=np.float64)
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == core_ndim:
        if arr.shape != core_shape:
            raise ValueError(f"{name}: expected shape {core_shape}, got {arr.shape}")
        return np.broadcast_to(arr, (count,) + core_shape).copy()
    if arr.ndim == core_ndim + 1:
        if arr.shape != (count,) + core_shape:
            raise ValueError(
                f"{name}: expected shape {(count,) + core_shape}, got {arr.shape}"
            )
        return arr.copy()
    raise ValueError(f"{name}: bad number of dimensions {arr.ndim}")


def expand(model_dict, T):
    """Expand a model dictionary to explicit per-step arrays.

    Parameters
    ----------
    model_dict : dict with keys A, C, Q, R and optionally b, d, m0, P0
        (see the module docstring for accepted shapes).
    T : int, number of time steps (T >= 1).

    Returns
    -------
    dict with keys
        ``A`` (T-1, n, n), ``b`` (T-1, n), ``Q`` (T-1, n, n),
        ``C`` (T, p, n), ``d`` (T, p), ``R`` (T, p, p),
        ``m0`` (n,) or None, ``P0`` (n, n) or None,
        ``n``, ``p``, ``T`` (ints).
    Missing ``b``/``d`` become zeros. ``m0``/``P0`` are None unless both are
    given. All arrays are fresh float64 copies.

    Source: plain bookkeeping, no textbook content.
    """
    T = int(T)
    if T < 1:
        raise ValueError("T must be >= 1")
    A = np.asarray(model_dict["A"], dtype=np.float64)
    C = np.asarray(model_dict["C"], dtype=np.float64)
    n = A.shape[-1]
    p = C.shape[-2]
    out = {
        "A": _per_step(A, T - 1, 2, "A", (n, n)),
        "Q": _per_step(model_dict["Q"], T - 1, 2, "Q", (n, n)),
        "b": _per_step(model_dict.get("b"), T - 1, 1, "b", (n,)),
        "C": _per_step(C, T, 2, "C", (p, n)),
        "R": _per_step(model_dict["R"], T, 2, "R", (p, p)),
        "d": _per_step(model_dict.get("d"), T, 1, "d", (p,)),
        "n": n,
        "p": p,
        "T": T,
    }
    m0 = model_dict.get("m0")
    P0 = model_dict.get("P0")
    if (m0 is None) != (P0 is None):
        raise ValueError("give both m0 and P0, or neither")
    if m0 is None:
        out["m0"] = None
        out["P0"] = None
    else:
        out["m0"] = np.array(m0, dtype=np.float64).reshape(n)
        out["P0"] = np.array(P0, dtype=np.float64).reshape(n, n)
    return out


def _prepare(model_dict, y, mask):
    """Return (expanded model, y as (T, p) float64, mask as (T, p) bool)."""
    y = np.asarray(y, dtype=np.float64)
    if y.ndim == 1:
        y = y[:, None]
    T = y.shape[0]
    E = expand(model_dict, T)
    if y.shape != (T, E["p"]):
        raise ValueError(f"y: expected shape {(T, E['p'])}, got {y.shape}")
    if mask is None:
        mask = np.ones((T, E["p"]), dtype=bool)
    else:
        mask = np.asarray(mask, dtype=bool)
        if mask.ndim == 1:
            mask = mask[:, None]
        if mask.shape != y.shape:
            raise ValueError(f"mask: expected shape {y.shape}, got {mask.shape}")
    return E, y, mask


def _sym(M):
    return 0.5 * (M + M.T)


def _gauss_logpdf_chol(e, S):
    """log N(e; 0, S) through a Cholesky factor of S."""
    L = np.linalg.cholesky(S)
    z = sla.solve_triangular(L, e, lower=True)
    return -0.5 * (e.size * _LOG_2PI + 2.0 * np.sum(np.log(np.diag(L))) + z @ z)


# ---------------------------------------------------------------------------
# sequential route: Kalman filter + RTS smoother
# ---------------------------------------------------------------------------


class FilterResult(NamedTuple):
    """Output of :func:`kalman_filter` (unpacks as a 5-tuple in this order)."""

    filtered_means: np.ndarray  # (T, n)    E[x_t | y_{0:t}]
    filtered_covs: np.ndarray  # (T, n, n)  Cov[x_t | y_{0:t}]
    predicted_means: np.ndarray  # (T, n)   E[x_t | y_{0:t-1}], [0] = m0
    predicted_covs: np.ndarray  # (T, n, n) Cov[x_t | y_{0:t-1}], [0] = P0
    log_likelihood: float  # log p(observed y)


def kalman_filter(model_dict, y, mask=None):
    """Covariance-form Kalman filter with per-step sub-selection of observed
    entries, and the exact Gaussian log-likelihood.

    Sources: Kalman (1960), "A new approach to linear filtering and prediction
    problems", J. Basic Engineering 82(1), 35-45; prediction/update equations
    as in Särkkä (2013), Bayesian Filtering and Smoothing, Cambridge UP,
    Ch. 4 (Kalman filter theorem; theorem number from memory). The
    log-likelihood is the prediction-error decomposition
    (e.g. Harvey (1989), Forecasting, Structural Time Series Models and the
    Kalman Filter, Ch. 3; Durbin & Koopman (2012), Time Series Analysis by
    State Space Methods, 2nd ed., Ch. 7 -- chapter numbers from memory).
    Missing observations: only the observed sub-vector is used, its
    covariance being the marginal R_t[K, K]; a step with nothing observed is a
    pure prediction (standard; e.g. Durbin & Koopman (2012) §4.10, section
    number from memory).

    Parameters
    ----------
    model_dict : model dictionary; must contain a prior (m0, P0).
    y : (T, p) observations (or (T,) when p == 1); missing entries may be NaN.
    mask : (T, p) bool, True = observed; None means everything is observed.

    Returns
    -------
    FilterResult(filtered_means (T, n), filtered_covs (T, n, n),
                 predicted_means (T, n), predicted_covs (T, n, n),
                 log_likelihood float)
    with predicted_means[0] = m0, predicted_covs[0] = P0, and
    log_likelihood = sum_t log N(y_{t,K}; C_K m_pred + d_K,
                                  C_K P_pred C_K^T + R_KK)
    (steps with nothing observed contribute 0).
    """
    E, y, mask = _prepare(model_dict, y, mask)
    if E["m0"] is None:
        raise ValueError("kalman_filter needs a prior (m0, P0)")
    T, n = E["T"], E["n"]
    mf = np.empty((T, n))
    Pf = np.empty((T, n, n))
    mp = np.empty((T, n))
    Pp = np.empty((T, n, n))
    loglik = 0.0

    m = E["m0"].copy()
    P = E["P0"].copy()
    for t in range(T):
        if t > 0:
            A = E["A"][t - 1]
            m = A @ m + E["b"][t - 1]
            P = _sym(A @ P @ A.T + E["Q"][t - 1])
        mp[t] = m
        Pp[t] = P

        idx = np.flatnonzero(mask[t])
        if idx.size > 0:
            CK = E["C"][t][idx, :]
            dK = E["d"][t][idx]
            RK = E["R"][t][np.ix_(idx, idx)]
            yK = y[t, idx]  # reads observed entries only
            innov = yK - CK @ m - dK
            S = _sym(CK @ P @ CK.T + RK)
            PCt = P @ CK.T
            cho = sla.cho_factor(S, lower=True)
            gain = sla.cho_solve(cho, PCt.T).T  # P C^T S^{-1}
            m = m + gain @ innov
            P = _sym(P - gain @ S @ gain.T)
            loglik += _gauss_logpdf_chol(innov, S)
        mf[t] = m
        Pf[t] = P
    return FilterResult(mf, Pf, mp, Pp, float(loglik))


def rts_smoother(model_dict, y, mask=None, *, return_cross=False):
    """Rauch-Tung-Striebel fixed-interval smoother on top of
    :func:`kalman_filter`.

    Sources: Rauch, Tung & Striebel (1965), "Maximum likelihood estimates of
    linear dynamic systems", AIAA Journal 3(8); Särkkä (2013), Bayesian
    Filtering and Smoothing, Ch. 8 (RTS smoother theorem; theorem number from
    memory). Backward recursion, with G_t = Pf_t A_t^T (Pp_{t+1})^{-1}:

        ms_t = mf_t + G_t (ms_{t+1} - mp_{t+1})
        Ps_t = Pf_t + G_t (Ps_{t+1} - Pp_{t+1}) G_t^T

    The lag-one smoothed cross-covariance Cov(x_{t+1}, x_t | all data) =
    Ps_{t+1} G_t^T (standard consequence of the same Gaussian conditioning;
    stated from memory, and checked in the tests against the dense posterior).

    Returns
    -------
    (means (T, n), covs (T, n, n)), or with ``return_cross=True``
    (means, covs, cross (T-1, n, n)) where cross[t] = Cov(x_{t+1}, x_t | y).
    """
    mf, Pf, mp, Pp, _ = kalman_filter(model_dict, y, mask)
    E = expand(model_dict, mf.shape[0])
    T, n = mf.shape
    ms = np.empty((T, n))
    Ps = np.empty((T, n, n))
    cross = np.empty((max(T - 1, 0), n, n))
    ms[-1] = mf[-1]
    Ps[-1] = Pf[-1]
    for t in range(T - 2, -1, -1):
        A = E["A"][t]
        # G = Pf A^T Pp^{-1}  <=>  G^T = Pp^{-1} A Pf   (Pp, Pf symmetric)
        G = np.linalg.solve(Pp[t + 1], A @ Pf[t]).T
        ms[t] = mf[t] + G @ (ms[t + 1] - mp[t + 1])
        Ps[t] = _sym(Pf[t] + G @ (Ps[t + 1] - Pp[t + 1]) @ G.T)
        cross[t] = Ps[t + 1] @ G.T
    if return_cross:
        return ms, Ps, cross
    return ms, Ps


# ---------------------------------------------------------------------------
# dense route: whole-trajectory linear algebra
# ---------------------------------------------------------------------------


def _observed_stack(E, y, mask):
    """Stack every observed scalar measurement of the whole series.

    Builds the block-diagonal (T p, T n) map, (T p,) offset and (T p, T p)
    noise covariance for all entries of y, then keeps the rows/columns of the
    observed entries with a selection. Returns (Cobs (N, T n), dobs (N,),
    Robs (N, N), yobs (N,)); N = number of observed entries.
    """
    T, n, p = E["T"], E["n"], E["p"]
    Cbig = sla.block_diag(*E["C"])
    Rbig = sla.block_diag(*E["R"])
    dbig = E["d"].reshape(T * p)
    keep = np.flatnonzero(mask.reshape(T * p))  # time-major, like y.reshape
    Cobs = Cbig[keep, :]
    Robs = Rbig[np.ix_(keep, keep)]
    dobs = dbig[keep]
    yobs = y.reshape(T * p)[keep]  # reads observed entries only
    assert Cobs.shape == (keep.size, T * n)
    return Cobs, dobs, Robs, yobs


def dense_normal_equations(model_dict, y, mask=None):
    """Dense normal equations H x = g of the negative log joint density.

    J(x) = 1/2 sum_{t<T-1} r_t^T Q_t^{-1} r_t
         + 1/2 sum_t e_{t,K}^T R_{t,KK}^{-1} e_{t,K}
         + 1/2 (x_0 - m0)^T P0^{-1} (x_0 - m0)        [only with a prior]
    with r_t = x_{t+1} - A_t x_t - b_t and e_t = y_t - C_t x_t - d_t.

    Built NOT from block-tridiagonal formulas but by stacking every residual
    into one linear map: residual = F x - h with block-diagonal weight W, so
    that J(x) = 1/2 (F x - h)^T W (F x - h) and

        H = F^T W F,   g = F^T W h.

    This is generalised (weighted) least squares, e.g. Björck (1996),
    Numerical Methods for Least Squares Problems, SIAM, Ch. 4 (from memory);
    its minimiser equals the posterior mean of the linear-Gaussian model
    (standard Gauss-Markov / MAP equivalence).

    Returns
    -------
    (H (T n, T n), g (T n,)), state index ``t * n + i`` (time-major).
    Without a prior, H may be singular when the series is not observable.
    """
    E, y, mask = _prepare(model_dict, y, mask)
    T, n = E["T"], E["n"]
    N = T * n
    F_blocks, h_blocks, W_blocks = [], [], []

    if E["m0"] is not None:
        F0 = np.zeros((n, N))
        F0[:, :n] = np.eye(n)
        F_blocks.append(F0)
        h_blocks.append(E["m0"])
        W_blocks.append(np.linalg.inv(E["P0"]))

    if T > 1:
        # dynamics residual x_{t+1} - A_t x_t - b_t for all t at once
        Fd = np.zeros(((T - 1) * n, N))
        for t in range(T - 1):
            rows = slice(t * n, (t + 1) * n)
            Fd[rows, t * n:(t + 1) * n] = -E["A"][t]
            Fd[rows, (t + 1) * n:(t + 2) * n] = np.eye(n)
        F_blocks.append(Fd)
        h_blocks.append(E["b"].reshape(-1))
        W_blocks.append(sla.block_diag(*[np.linalg.inv(Qt) for Qt in E["Q"]]))

    Cobs, dobs, Robs, yobs = _observed_stack(E, y, mask)
    if yobs.size > 0:
        # measurement residual (C x + d - y) = Cobs x - (yobs - dobs)
        F_blocks.append(Cobs)
        h_blocks.append(yobs - dobs)
        W_blocks.append(np.linalg.inv(Robs))

    F = np.vstack(F_blocks) if F_blocks else np.zeros((0, N))
    h = np.concatenate(h_blocks) if h_blocks else np.zeros(0)
    W = sla.block_diag(*W_blocks) if W_blocks else np.zeros((0, 0))
    W = _sym(W)
    H = _sym(F.T @ W @ F)
    g = F.T @ W @ h
    return H, g


def dense_smooth(model_dict, y, mask=None):
    """Minimiser of J (= posterior mean with a prior) by a dense solve of the
    normal equations of :func:`dense_normal_equations`.

    Returns (T, n) array.
    """
    H, g = dense_normal_equations(model_dict, y, mask)
    T = np.asarray(y).shape[0]
    return np.linalg.solve(H, g).reshape(T, -1)


def dense_objective(model_dict, y, mask, x):
    """Negative log joint density J(x) up to its additive constant (see
    :func:`dense_normal_equations`), evaluated term by term straight from the
    definition (no stacked matrices).

    ``x`` may be (T, n) or flat (T n,). Returns a float.
    """
    E, y, mask = _prepare(model_dict, y, mask)
    T, n = E["T"], E["n"]
    x = np.asarray(x, dtype=np.float64).reshape(T, n)
    J = 0.0
    if E["m0"] is not None:
        r = x[0] - E["m0"]
        J += 0.5 * r @ np.linalg.solve(E["P0"], r)
    for t in range(T - 1):
        r = x[t + 1] - E["A"][t] @ x[t] - E["b"][t]
        J += 0.5 * r @ np.linalg.solve(E["Q"][t], r)
    for t in range(T):
        idx = np.flatnonzero(mask[t])
        if idx.size == 0:
            continue
        e = y[t, idx] - E["C"][t][idx, :] @ x[t] - E["d"][t][idx]
        J += 0.5 * e @ np.linalg.solve(E["R"][t][np.ix_(idx, idx)], e)
    return float(J)


def _joint_state_prior(E):
    """Mean (T n,) and covariance (T n, T n) of the stacked states under the
    prior dynamics.

    Writes the dynamics as M X = c + eps, where M has identity diagonal
    blocks and -A_t below them, c = (m0, b_0, ..., b_{T-2}) and
    eps ~ N(0, blockdiag(P0, Q_0, ..., Q_{T-2})). Hence
    E[X] = M^{-1} c and Cov[X] = M^{-1} D M^{-T}.
    """
    T, n = E["T"], E["n"]
    N = T * n
    M = np.eye(N)
    for t in range(T - 1):
        M[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n] = -E["A"][t]
    c = np.concatenate([E["m0"], E["b"].reshape(-1)])
    D = sla.block_diag(E["P0"], *E["Q"])
    mean = np.linalg.solve(M, c)
    Minv = np.linalg.solve(M, np.eye(N))
    cov = _sym(Minv @ D @ Minv.T)
    return mean, cov


def dense_log_likelihood(model_dict, y, mask=None):
    """Exact log p(observed y) from the joint Gaussian of all observed
    entries, evaluated with ``scipy.stats.multivariate_normal.logpdf``.

    Independent of the Kalman filter: the stacked states X have the dense
    prior mean/covariance of ``_joint_state_prior``; the stacked observed
    entries are Y = Cobs X + dobs + V with V ~ N(0, Robs), so
    Y ~ N(Cobs mu + dobs, Cobs Sigma Cobs^T + Robs) (linear transformation of
    a Gaussian; e.g. Bishop (2006), Pattern Recognition and Machine Learning,
    §2.3.3 -- section number from memory). Requires a prior.

    Returns a float (0.0 if nothing is observed).
    """
    E, y, mask = _prepare(model_dict, y, mask)
    if E["m0"] is None:
        raise ValueError("dense_log_likelihood needs a prior (m0, P0)")
    mu, Sigma = _joint_state_prior(E)
    Cobs, dobs, Robs, yobs = _observed_stack(E, y, mask)
    if yobs.size == 0:
        return 0.0
    mean_y = Cobs @ mu + dobs
    cov_y = _sym(Cobs @ Sigma @ Cobs.T + Robs)
    return float(multivariate_normal.logpdf(yobs, mean=mean_y, cov=cov_y))


def dense_posterior(model_dict, y, mask=None):
    """Posterior mean and full covariance of all states given the observed
    entries, by conditioning the dense joint Gaussian of (X, Y):

        E[X | Y] = mu + Sigma Cobs^T S^{-1} (yobs - Cobs mu - dobs)
        Cov[X | Y] = Sigma - Sigma Cobs^T S^{-1} Cobs Sigma,
        S = Cobs Sigma Cobs^T + Robs

    (Gaussian conditioning; e.g. Bishop (2006), PRML §2.3.1 -- section
    number from memory). A third route, independent of both the filter and
    the normal equations. Requires a prior.

    Returns (mean (T, n), cov (T n, T n)); cov is time-major, so the block
    cov[t*n:(t+1)*n, s*n:(s+1)*n] = Cov(x_t, x_s | y).
    """
    E, y, mask = _prepare(model_dict, y, mask)
    if E["m0"] is None:
        raise ValueError("dense_posterior needs a prior (m0, P0)")
    T, n = E["T"], E["n"]
    mu, Sigma = _joint_state_prior(E)
    Cobs, dobs, Robs, yobs = _observed_stack(E, y, mask)
    if yobs.size == 0:
        return mu.reshape(T, n), Sigma
    S = _sym(Cobs @ Sigma @ Cobs.T + Robs)
    SC = Sigma @ Cobs.T
    gain = np.linalg.solve(S, SC.T).T
    mean = mu + gain @ (yobs - Cobs @ mu - dobs)
    cov = _sym(Sigma - gain @ SC.T)
    return mean.reshape(T, n), cov


# ---------------------------------------------------------------------------
# random test problems
# ---------------------------------------------------------------------------



def discretise_by_ode(F, G, d):
    """Discretisation of dx = F x dt + dβ (E dβ dβᵀ = G dt) over a step d, by
    routes independent of kalmax's: A = expm(F d) (SciPy's Padé scaling and
    squaring) and Q from integrating the Lyapunov ODE dP/ds = F P + P Fᵀ + G,
    P(0) = 0, to s = d (SciPy's DOP853)."""
    from scipy import integrate

    F = np.asarray(F, float)
    G = np.asarray(G, float)
    n = F.shape[0]

    def rhs(_, p):
        P = p.reshape(n, n)
        return (F @ P + P @ F.T + G).ravel()

    sol = integrate.solve_ivp(rhs, (0.0, d), np.zeros(n * n), method="DOP853", rtol=1e-11, atol=1e-14)
    return sla.expm(F * d), sol.y[:, -1].reshape(n, n)


def _random_spd(rng, k, scale=1.0, floor=0.5):
    """Well-conditioned random SPD matrix (eigenvalues roughly in
    [floor, floor + 4] times ``scale``), generally full (not diagonal)."""
    B = rng.standard_normal((k, k))
    return scale * (_sym(B @ B.T) / k + floor * np.eye(k))


def _random_stable(rng, n):
    """Random square matrix rescaled to spectral radius in [0.5, 0.95]."""
    M = rng.standard_normal((n, n))
    rho = np.max(np.abs(np.linalg.eigvals(M)))
    return M * (rng.uniform(0.5, 0.95) / rho)


def random_model(rng, n, p, T, *, time_varying=True, full_R=True, prior=True,
                 offsets=True):
    """Random, well-conditioned model dictionary.

    Parameters
    ----------
    rng : numpy.random.Generator
    n, p, T : state dim, measurement dim, number of steps.
    time_varying : per-step A, Q, b (T-1 of them) and C, R, d (T of them);
        otherwise single time-invariant arrays.
    full_R : full (non-diagonal) SPD R; otherwise diagonal R.
    prior : include m0 (n,) and P0 (n, n); otherwise both are None.
    offsets : include random b and d; otherwise both are None.

    Returns a model dict with keys A, C, Q, R, b, d, m0, P0 (shapes as in the
    module docstring). Each A_t has spectral radius in [0.5, 0.95]; Q, R, P0
    are SPD with condition number below roughly 10.
    """
    def many(make, count):
        if not time_varying:
            return make()
        if count == 0:  # T == 1: no transitions
            return np.zeros((0,) + np.shape(make()))
        return np.stack([make() for _ in range(count)])

    nT = T - 1
    if full_R:
        make_R = lambda: _random_spd(rng, p, scale=0.5)  # noqa: E731
    else:
        make_R = lambda: np.diag(rng.uniform(0.2, 1.0, size=p))  # noqa: E731
    model = {
        "A": many(lambda: _random_stable(rng, n), nT),
        "Q": many(lambda: _random_spd(rng, n, scale=0.3), nT),
        "C": many(lambda: rng.standard_normal((p, n)), T),
        "R": many(make_R, T),
        "b": many(lambda: 0.5 * rng.standard_normal(n), nT) if offsets else None,
        "d": many(lambda: 0.5 * rng.standard_normal(p), T) if offsets else None,
        "m0": rng.standard_normal(n) if prior else None,
        "P0": _random_spd(rng, n, scale=1.0) if prior else None,
    }
    return model


def random_data(rng, model_dict, T, missing=0.3, *, n_empty=None,
                return_states=False):
    """Simulate observations from a model, with missing entries.

    Each entry is missing independently with probability ``missing``; in
    addition ``n_empty`` randomly chosen steps are made fully missing
    (default: max(1, T // 8) when ``missing > 0`` and T >= 3, else 0).
    Every missing entry of y is set to NaN. Without a prior, x_0 ~ N(0, I).

    Returns (y (T, p) with NaN at missing entries, mask (T, p) bool,
    True = observed); with ``return_states=True`` also the simulated states
    (T, n) as a third element.
    """
    E = expand(model_dict, T)
    n, p = E["n"], E["p"]
    x = np.empty((T, n))
    if E["m0"] is None:
        x[0] = rng.standard_normal(n)
    else:
        x[0] = E["m0"] + np.linalg.cholesky(E["P0"]) @ rng.standard_normal(n)
    for t in range(T - 1):
        w = np.linalg.cholesky(E["Q"][t]) @ rng.standard_normal(n)
        x[t + 1] = E["A"][t] @ x[t] + E["b"][t] + w
    y = np.empty((T, p))
    for t in range(T):
        v = np.linalg.cholesky(E["R"][t]) @ rng.standard_normal(p)
        y[t] = E["C"][t] @ x[t] + E["d"][t] + v
    mask = rng.random((T, p)) >= missing
    if n_empty is None:
        n_empty = max(1, T // 8) if (missing > 0 and T >= 3) else 0
    if n_empty > 0:
        empty = rng.choice(T, size=min(n_empty, T), replace=False)
        mask[empty, :] = False
    y[~mask] = np.nan
    if return_states:
        return y, mask, x
    return y, mask


# ---------------------------------------------------------------------------
# closed forms and data
# ---------------------------------------------------------------------------


def local_level_steady_state(q, r):
    """Steady state of the Kalman filter for the scalar local-level model
    x_{t+1} = x_t + w_t (var q), y_t = x_t + v_t (var r).

    The predicted variance obeys P' = P - P^2 / (P + r) + q; its positive
    fixed point solves P^2 - q P - q r = 0, i.e.

        P = (q + sqrt(q^2 + 4 q r)) / 2,    K = P / (P + r).

    Source: standard scalar Riccati result; see Durbin & Koopman (2012), Time
    Series Analysis by State Space Methods, 2nd ed., Ch. 2 (steady-state
    section, §2.11 from memory), where it is written as
    P = r (x + sqrt(x^2 + 4x)) / 2 with x = q / r.

    Returns (P, K) as floats: steady-state predicted variance and gain.
    """
    q = float(q)
    r = float(r)
    P = 0.5 * (q + np.sqrt(q * q + 4.0 * q * r))
    return float(P), float(P / (P + r))


def load_nile():
    """Nile annual flow at Aswan, 1871-1970 (see tests/data/README.md).

    Returns (years (100,) int array, flow (100,) float64 array).
    """
    path = Path(__file__).resolve().parent / "data" / "nile.csv"
    data = np.loadtxt(path, delimiter=",", skiprows=1)
    return data[:, 0].astype(int), data[:, 1].astype(np.float64)
