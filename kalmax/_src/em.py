r"""Expectation–maximisation for the linear-Gaussian state-space model.

The classic baseline (Shumway & Stoffer 1982, J. Time Series Analysis 3(4),
253–264): alternate

E-step: the smoothed moments of the states under the current model,
    μ_t = E[x_t | y],  P_t = Cov[x_t | y],  P_{t+1,t} = Cov[x_{t+1}, x_t | y],
from :func:`kalmax.smooth` with ``covariances=True`` (the same block
factorisation as everything else in this package);

M-step: maximise the expected complete-data log-likelihood, which for this
model is a set of least-squares problems in closed form:

    [A b] = (Σ_t E[(x_{t+1} − o_t) z_tᵀ]) (Σ_t E[z_t z_tᵀ])⁻¹,   z_t = [x_t; 1]
    Q     = mean_t E[r_t r_tᵀ],   r_t = x_{t+1} − A x_t − b
    [C d] = (Σ_t E[y_t z_tᵀ]) (Σ_t E[z_t z_tᵀ])⁻¹
    R     = mean_t E[e_t e_tᵀ],   e_t = y_t − C x_t − d
    m_0   = μ_0

Missing measurements are part of the complete data, as in Shumway & Stoffer:
given the state and the observed entries K of y_t, the missing entries M are
Gaussian with mean C_M x + d_M + R_MK R_KK⁻¹ (y_K − C_K x − d_K) and
covariance R_MM − R_MK R_KK⁻¹ R_KM (under the current model), so every
expectation above stays in closed form, also with a full R.

Each EM iteration cannot decrease the log-likelihood (the diffuse one when the
first state has a flat prior): ``em`` returns the history so that this can be
checked.
"""

from __future__ import annotations

from typing import Iterable, Optional, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from .checks import canonicalize
from .likelihood import log_likelihood
from .linalg import chol, lsolve, mT, spd_inverse
from .model import StateSpace
from .normal_equations import masked_measurement_cov
from .smoothing import smooth

UPDATABLE = ("A", "b", "Q", "C", "d", "R", "x0_mean", "x0_cov")


def _outer(u, v):
    return u[..., :, None] * v[..., None, :]


def _solve_right(S_uz, S_zz):
    """S_uz S_zz⁻¹ for symmetric positive-definite S_zz."""
    L = chol(S_zz)
    return mT(lsolve(L, lsolve(L, mT(S_uz)), transpose=True))


def _regression(mu_x, E_xx, E_ux, E_u, with_intercept: bool):
    """Closed-form [F g] minimising Σ_t E‖u_t − F x_t − g‖² (g only if with_intercept).

    mu_x (N, n) = E[x_t]; E_xx (N, n, n) = E[x_t x_tᵀ]; E_ux (N, m, n) = E[u_t x_tᵀ];
    E_u (N, m) = E[u_t]. Returns (F (m, n), g (m,) or None).
    """
    N, n = mu_x.shape
    S_xx, S_ux = jnp.sum(E_xx, 0), jnp.sum(E_ux, 0)
    if not with_intercept:
        return _solve_right(S_ux, S_xx), None
    s_x, s_u = jnp.sum(mu_x, 0), jnp.sum(E_u, 0)
    S_zz = jnp.block([[S_xx, s_x[:, None]], [s_x[None, :], jnp.full((1, 1), N, S_xx.dtype)]])
    S_uz = jnp.concatenate([S_ux, s_u[:, None]], axis=1)
    F = _solve_right(S_uz, S_zz)
    return F[:, :n], F[:, n]


def _sym(S):
    return 0.5 * (S + mT(S))


def _residual_second_moment(mu_a, P_a, mu_b, P_b, P_ab, M, c):
    """E[r rᵀ] for r = a − M b − c, with Cov(a, b) = P_ab (all per step)."""
    mean = mu_a - jnp.einsum("...ij,...j->...i", M, mu_b) - c
    MPab = jnp.einsum("...ij,...kj->...ik", M, P_ab)  # M P_abᵀ
    cov = P_a - MPab - mT(MPab) + jnp.einsum("...ij,...jk,...lk->...il", M, P_b, M)
    return cov + _outer(mean, mean)


def _completed_measurements(model: StateSpace, y, w):
    """Missing entries of y as linear functions of the state (current model).

    Returns (G (T, p, n), h (T, p), Sigma (T, p, p)) such that, given the
    observed data and x_t, y_t ~ N(G_t x_t + h_t, Sigma_t): observed rows are
    G = 0, h = y, no variance; missing rows follow the conditional Gaussian.
    """
    T, p = y.shape
    R = jnp.broadcast_to(model.R, (T, p, p))
    C = jnp.broadcast_to(model.C, (T, p, model.C.shape[-1]))
    d = jnp.zeros((T, p), y.dtype) if model.d is None else jnp.broadcast_to(model.d, (T, p))
    ww = _outer(w, w)
    # S_t = R_KK⁻¹ padded with zeros, through the SPD stand-in R̃_t of the core.
    S = ww * spd_inverse(masked_measurement_cov(R, w))
    miss = 1 - w
    y0 = jnp.where(w > 0, y, 0)
    RS = R @ S  # rows M: R_MK R_KK⁻¹ (columns outside K are zero)
    G = miss[..., None] * (C - RS @ C)
    h = w * y0 + miss * (d + jnp.einsum("tij,tj->ti", RS, y0 - d))
    Sigma = _outer(miss, miss) * _sym(R - RS @ R)
    return G, h, Sigma


def m_step(model: StateSpace, y, w, means, covs, cross, fields: Sequence[str]) -> StateSpace:
    """One M-step from smoothed moments (canonicalised inputs).

    Args:
        model: current canonicalised model (used to complete missing y and
            for the fields that are not updated).
        y: (T, p); w: (T, p) 0/1 float mask.
        means: (T, n) E[x_t | y]; covs: (T, n, n) Cov[x_t | y];
        cross: (T-1, n, n) Cov[x_{t+1}, x_t | y].
        fields: names of the fields to update.
    """
    T, n = means.shape
    E_xx = covs + _outer(means, means)
    changes = {}

    # --- transition: A, b, then Q given the new A, b --------------------------
    A, b = model.A, model.b
    if T > 1 and ("A" in fields or "b" in fields):
        if "A" in fields:
            offset = jnp.zeros((T - 1, n), means.dtype) if ("b" in fields or b is None) else jnp.broadcast_to(b, (T - 1, n))
            E_ux = cross + _outer(means[1:], means[:-1]) - _outer(offset, means[:-1])
            E_u = means[1:] - offset
            A, b_new = _regression(means[:-1], E_xx[:-1], E_ux, E_u, "b" in fields)
            if "b" in fields:
                b = b_new
        else:  # b alone, A held (possibly time-varying)
            b = jnp.mean(means[1:] - jnp.einsum("...ij,...j->...i", A, means[:-1]), axis=0)
        changes.update(A=A, b=b)
    if T > 1 and "Q" in fields:
        c = jnp.zeros((n,), means.dtype) if b is None else b
        EQ = _residual_second_moment(means[1:], covs[1:], means[:-1], covs[:-1], cross, A, c)
        changes["Q"] = _sym(jnp.mean(EQ, axis=0))

    # --- measurement: C, d, then R given the new C, d ---------------------------
    C, d = model.C, model.d
    if {"C", "d", "R"} & set(fields):
        G, h, Sigma = _completed_measurements(model, y, w)
        mu_y = jnp.einsum("tij,tj->ti", G, means) + h
        E_yx = jnp.einsum("tij,tjk->tik", G, E_xx) + _outer(h, means)
        p = y.shape[1]
        if "C" in fields:
            offset = jnp.zeros((T, p), means.dtype) if ("d" in fields or d is None) else jnp.broadcast_to(d, (T, p))
            C, d_new = _regression(means, E_xx, E_yx - _outer(offset, means), mu_y - offset, "d" in fields)
            if "d" in fields:
                d = d_new
        elif "d" in fields:
            d = jnp.mean(mu_y - jnp.einsum("...ij,...j->...i", C, means), axis=0)
        changes.update(C=C, d=d)
        if "R" in fields:
            c = jnp.zeros((p,), means.dtype) if d is None else d
            Cb = jnp.broadcast_to(C, (T,) + C.shape[-2:])
            D = G - Cb  # e_t = (G − C) x_t + (h − d) + noise
            mean_e = mu_y - jnp.einsum("tij,tj->ti", Cb, means) - c
            cov_e = jnp.einsum("tij,tjk,tlk->til", D, covs, D) + Sigma
            changes["R"] = _sym(jnp.mean(cov_e + _outer(mean_e, mean_e), axis=0))

    # --- prior -----------------------------------------------------------------
    if "x0_mean" in fields:
        changes["x0_mean"] = means[0]
    if "x0_cov" in fields:
        m0 = changes.get("x0_mean", model.x0_mean)
        m0 = jnp.zeros((n,), means.dtype) if m0 is None else m0
        changes["x0_cov"] = _sym(covs[0] + _outer(means[0] - m0, means[0] - m0))
    return model.replace(**{k: v for k, v in changes.items() if k in fields})


def _resolve_fields(model: StateSpace, fields: Optional[Iterable[str]], fixed: Iterable[str]):
    fixed = tuple(fixed)
    for name in fixed + tuple(fields or ()):
        if name not in UPDATABLE:
            raise ValueError(f"unknown field {name!r}; EM can update {UPDATABLE}.")
    if fields is None:
        fields = ["A", "C", "Q", "R"]
        fields += [f for f in ("b", "d") if getattr(model, f) is not None]
        if model.x0_cov is not None:
            fields.append("x0_mean")
    fields = tuple(f for f in fields if f not in fixed)
    if ("x0_mean" in fields or "x0_cov" in fields) and model.x0_cov is None:
        raise ValueError("the prior cannot be updated: the first state has a flat prior (model.x0_cov is None).")
    for name in ("A", "b", "Q", "C", "d", "R"):
        value = getattr(model, name)
        if name in fields and value is not None and value.ndim == {"A": 3, "Q": 3, "C": 3, "R": 3, "b": 2, "d": 2}[name]:
            raise ValueError(
                f"model.{name} is time-varying; EM updates only time-invariant fields. "
                f"Hold it fixed with fixed=({name!r},)."
            )
    if ({"A", "b"} & set(fields)) and model.Q.ndim == 3:
        raise ValueError("updating A or b needs a time-invariant Q (the update would not be closed-form).")
    if ({"C", "d"} & set(fields)) and model.R.ndim == 3:
        raise ValueError("updating C or d needs a time-invariant R (the update would not be closed-form).")
    return fields


def em(
    model: StateSpace,
    y,
    mask=None,
    *,
    iterations: int = 100,
    fixed: Iterable[str] = (),
    fields: Optional[Iterable[str]] = None,
    tol: Optional[float] = None,
    method: str = "auto",
    jit: bool = True,
):
    r"""Fit a model by expectation–maximisation (Shumway & Stoffer 1982).

    Each iteration smooths with the current model (state means, covariances
    and lag-one cross-covariances) and replaces the learned fields by their
    closed-form maximisers of the expected complete-data log-likelihood (see
    the module docstring for the formulas). The log-likelihood never
    decreases from one iteration to the next.

    Args:
        model: starting :class:`StateSpace`.
        y: (T, p) measurements (NaN allowed at missing entries).
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        iterations: maximum number of EM iterations.
        fixed: fields to hold at their starting values, e.g. ``("A", "C")``.
        fields: fields to update (default: A, C, Q, R, plus b and d when the
            model has them and x0_mean when it has a prior covariance;
            ``x0_cov`` only on request). ``fixed`` is removed from this set.
            Updated fields must be time-invariant.
        tol: stop when the log-likelihood rises by less than
            ``tol · (1 + |log-likelihood|)`` in one iteration.
        method: smoother backend, as in :func:`kalmax.smooth`.
        jit: compile the iteration.

    Returns:
        (model, history): the fitted model and a NumPy array of the
        log-likelihood of every iterate, starting with the initial model
        (``history[-1]`` belongs to the returned model).

    Example:
        >>> rng = np.random.default_rng(0)
        >>> y = np.cumsum(rng.normal(size=(50, 1)), axis=0) + rng.normal(size=(50, 1))
        >>> start = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.5 * jnp.eye(1), R=0.5 * jnp.eye(1))
        >>> fitted, ll = kx.em(start, y, iterations=20, fixed=("A", "C"))
        >>> ll.shape  # the starting model and 20 iterates
        (21,)
        >>> assert np.all(np.diff(ll) >= -1e-8 * abs(ll[-1]))
    """
    model, y, mask, dims, dtype = canonicalize(model, y, mask)
    names = _resolve_fields(model, fields, fixed)
    w = mask.astype(dtype)

    def step(current):
        sm = smooth(current, y, mask, covariances=True, method=method)
        ll = log_likelihood(current, y, mask, method=method)
        new = m_step(current, y, w, sm.states, sm.state_cov, sm.state_cross_cov, names)
        return new, ll

    def loglik(current):
        return log_likelihood(current, y, mask, method=method)

    if jit:
        step, loglik = jax.jit(step), jax.jit(loglik)
    history = []
    for _ in range(int(iterations)):
        new, ll = step(model)
        history.append(float(ll))
        if tol is not None and len(history) > 1 and history[-1] - history[-2] < tol * (1 + abs(history[-1])):
            return model, np.asarray(history)
        model = new
    history.append(float(loglik(model)))
    return model, np.asarray(history)
