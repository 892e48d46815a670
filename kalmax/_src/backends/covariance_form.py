r"""Covariance-form backend (``method="covariance"``): Kalman filter and RTS smoother.

Why a second algorithm. Every other backend solves the normal equations
H x = g, whose blocks hold Q_t⁻¹, R_t⁻¹ and P_0⁻¹ (``normal_equations.py``).
When the process noise over one step is tiny beside the measurement noise,
H is ill-conditioned beyond any arithmetic: a constant-acceleration model
sampled at 1 kHz has Q ∝ diag-ish(Δ⁵/20, Δ³/3, Δ) with Δ = 10⁻³, so Q⁻¹ is
~10¹⁵–10¹⁷ times R⁻¹ and κ(H) > 10¹⁶ — no symmetric diagonal scaling helps
(the ill-conditioning is in Q's correlation structure and in the ratio of the
per-step noise to the measurement noise, not in units). Such models are
ordinary in tracking, and a textbook covariance-form filter handles them even
in float32, because it never forms Q⁻¹: it propagates the covariances
P_t⁻ = A P A ᵀ + Q, which stay well scaled. This backend is that filter,
followed by the Rauch–Tung–Striebel pass, in plain JAX. It needs a proper
prior on x_0 (``x0_cov``); with a flat prior it returns NaN (use the normal
equations there: a flat prior is their strength).

Recursions (Kalman 1960; Rauch, Tung & Striebel 1965; e.g. Särkkä (2013),
Bayesian Filtering and Smoothing, Algs 4.3 and 8.2). The mask enters as in
``normal_equations.py``: C̃_t = W_t C_t, R̃_t = W_t R_t W_t + (I − W_t) with
W_t = diag(w_t), ẽ_t = W_t (y_t − d_t); a missing row has a zero row of C̃,
unit variance and no correlation with the observed rows, so it changes
nothing, and the observed block of R̃ is R_oo (the marginal of full R).

    predict  m⁻_t = A_{t−1} m_{t−1} + b_{t−1},  P⁻_t = A_{t−1} P_{t−1} A_{t−1}ᵀ + Q_{t−1}
             (m⁻_0 = m_0, P⁻_0 = P_0)
    update   S_t = C̃ P⁻_t C̃ᵀ + R̃,  K_t = P⁻_t C̃ᵀ S_t⁻¹,  v_t = ẽ_t − C̃ m⁻_t
             m_t = m⁻_t + K_t v_t,  P_t = (I − K_tC̃) P⁻_t (I − K_tC̃)ᵀ + K_t R̃ K_tᵀ  (Joseph form)
    smooth   G_t = P_t A_tᵀ (P⁻_{t+1})⁻¹
             x_t = m_t + G_t (x_{t+1} − m⁻_{t+1}),  Σ_t = P_t + G_t (Σ_{t+1} − P⁻_{t+1}) G_tᵀ
             Σ_{t+1,t} = Σ_{t+1} G_tᵀ

The smoothed means are the solution of H x = g (the joint density's mode), the
Σ's are the band of H⁻¹, and

    log p(y) = Σ_t −½ (v_tᵀ S_t⁻¹ v_t + log|S_t| + p_t log 2π),   p_t = Σ_i w_ti.

log|H| without H. H = H_p + MᵀR̃⁻¹M, with H_p the precision of the Gauss–Markov
prior (|H_p| = 1/(|P_0| Π_t |Q_t|)) and M = blockdiag(C̃_t). The determinant
lemma gives |H| = |H_p| |R̃ + M Σ_p Mᵀ| / |R̃|, and the prediction-error
decomposition |R̃ + M Σ_p Mᵀ| = Π_t |S_t|, so

    log|H| = −log|P_0| − Σ_t log|Q_t| + Σ_t (log|S_t| − log|R̃_t|).

Solving H u = v with the stored gains (``adjoint``). H does not depend on the
data, offsets or prior mean; the smoother of the problem with data 0 and
offsets (m_0', b_t') returns H⁻¹g' with g'_0 = P_0⁻¹m_0' − A_0ᵀQ_0⁻¹b_0',
g'_t = Q_{t−1}⁻¹b'_{t−1} − A_tᵀQ_t⁻¹b_t', g'_{T−1} = Q_{T−2}⁻¹b'_{T−2}.
Choosing s_{T−1} = v_{T−1}, s_t = v_t + A_tᵀ s_{t+1}, b'_{t−1} = Q_{t−1} s_t and
m_0' = P_0 (v_0 + A_0ᵀ s_1) makes g' = v, again without Q⁻¹; the mean
recursions then reuse the stored gains K_t and G_t (O(T n²)). The sums s_t
grow like the powers of Aᵀ, so this route is for stable or neutral dynamics;
the gradients below do not use it.

Derivatives. ``gradients`` and ``log_likelihood`` differentiate the recursions
above by JAX's reverse mode (a tape of O(T n²) numbers), not the implicit
function of the normal equations: that route forms Q⁻¹(x_{t+1} − A x_t − b_t),
a difference of nearly equal numbers multiplied by Q⁻¹, which is exactly what
this backend exists to avoid.

Accuracy. There is no residual check: the residual of H x = g is meaningless
where H is beyond the arithmetic. The answer is NaN when a Cholesky factor of
S_t or P⁻_{t+1} fails (not positive definite in the working precision) or the
prior is flat; otherwise it carries the textbook filter's rounding, measured
on the tracking sweep of ``tests/test_float32_ordinary.py``.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import jax
import jax.numpy as jnp
from jax import lax

from .. import manual_axes
from ..linalg import chol, lsolve, lsolve_vec, mT
from ..model import StateSpace
from ..normal_equations import masked_measurement_cov
from .base import Backend


def sym(X):
    return 0.5 * (X + mT(X))


def predict_update(m_prev, P_prev, A, b, Q, Ct, Rt, ey):
    """One prediction and Joseph-form update; returns (m, P, m⁻, P⁻, Kᵀ, L_S, v).

    Ct = C̃_t (p, n), Rt = R̃_t (p, p), ey = ẽ_t (p,): missing entries already
    masked. Step 0 passes A = I, b = 0, Q = 0 (the prior is the prediction).
    """
    n = m_prev.shape[-1]
    m_pred = A @ m_prev + b
    P_pred = sym(A @ P_prev @ mT(A) + Q)
    Ls = chol(sym(Ct @ P_pred @ mT(Ct) + Rt))
    Kt = lsolve(Ls, lsolve(Ls, Ct @ P_pred), transpose=True)  # Kᵀ = S⁻¹ C̃ P⁻, (p, n)
    v = ey - Ct @ m_pred
    m = m_pred + mT(Kt) @ v
    IKC = jnp.eye(n, dtype=P_pred.dtype) - mT(Kt) @ Ct
    P = sym(IKC @ P_pred @ mT(IKC) + mT(Kt) @ Rt @ Kt)
    return m, P, m_pred, P_pred, Kt, Ls, v


def transition_inputs(model: StateSpace, T: int, dtype):
    """(A, b, Q) per step t = 0..T-1 for the prediction into step t; step 0 has an identity "prediction"."""
    n = model.A.shape[-1]
    eye = jnp.eye(n, dtype=dtype)
    A = jnp.concatenate([eye[None], jnp.broadcast_to(model.A, (T - 1, n, n))], axis=0)
    Q = jnp.concatenate([jnp.zeros((1, n, n), dtype), jnp.broadcast_to(sym(model.Q), (T - 1, n, n))], axis=0)
    b = jnp.zeros((T, n), dtype)
    if model.b is not None:
        b = b.at[1:].set(jnp.broadcast_to(model.b, (T - 1, n)))
    return A, b, Q


def masked_measurements(model: StateSpace, y, w):
    """(C̃ (T, p, n), R̃ (T, p, p), ẽ (T, p)): the mask applied as in the module docstring."""
    T, p = y.shape
    n = model.A.shape[-1]
    Ct = w[:, :, None] * jnp.broadcast_to(model.C, (T, p, n))
    Rt = sym(masked_measurement_cov(model.R, w))
    ey = jnp.where(w > 0, y - (0 if model.d is None else model.d), 0)  # missing entries never read
    return Ct, Rt, ey


class CovarianceFactor(NamedTuple):
    """What the filter and smoother leave behind: enough to solve with H and read its band inverse."""

    ok: jax.Array           # () bool: every Cholesky factor succeeded
    A: jax.Array            # (T, n, n) prediction into step t (A_0 = I)
    Q: jax.Array            # (T, n, n) (Q_0 = 0)
    P0: jax.Array           # (n, n)
    Ct: jax.Array           # (T, p, n) C̃_t
    Kt: jax.Array           # (T, p, n) Kalman gains, transposed
    G: jax.Array            # (T-1, n, n) smoother gains
    cov: jax.Array          # (T, n, n) Σ_t
    cross: jax.Array        # (T-1, n, n) Σ_{t+1,t}
    log_det: jax.Array      # () log|H|
    log_lik: jax.Array      # () log p(y)


def sweep(model: StateSpace, y, w):
    """(x (T, n), CovarianceFactor): filter, then smoother (module docstring)."""
    T, p = y.shape
    n = model.A.shape[-1]
    dtype = y.dtype
    flat = model.x0_cov is None
    P0 = jnp.eye(n, dtype=dtype) if flat else sym(model.x0_cov)
    m0 = jnp.zeros((n,), dtype) if model.x0_mean is None else model.x0_mean
    A, b, Q = transition_inputs(model, T, dtype)
    Ct, Rt, ey = masked_measurements(model, y, w)

    def forward_step(carry, xs):
        m, P, m_pred, P_pred, Kt, Ls, v = predict_update(*carry, *xs)
        z = lsolve_vec(Ls, v)  # whitened innovation: vᵀS⁻¹v = ‖z‖²
        half_logdet_S = jnp.sum(jnp.log(jnp.diagonal(Ls)))
        return (m, P), (m, P, m_pred, P_pred, Kt, half_logdet_S, jnp.sum(z * z))

    inputs = (A, b, Q, Ct, Rt, ey)
    init = manual_axes.like((m0, P0), inputs)  # typed like the data under shard_map
    _, (m, P, m_pred, P_pred, Kt, half_ld_S, quad) = lax.scan(forward_step, init, inputs)

    def backward_step(carry, xs):
        x_next, S_next = carry
        m_t, P_t, A_t, m_pred_next, P_pred_next = xs
        Lp = chol(P_pred_next)
        G = mT(lsolve(Lp, lsolve(Lp, A_t @ P_t), transpose=True))  # G = P Aᵀ (P⁻)⁻¹
        x_t = m_t + G @ (x_next - m_pred_next)
        S_t = sym(P_t + G @ (S_next - P_pred_next) @ mT(G))
        return (x_t, S_t), (x_t, S_t, S_next @ mT(G), G)

    if T > 1:
        _, (xs, Ss, cross, G) = lax.scan(
            backward_step, (m[-1], P[-1]), (m[:-1], P[:-1], A[1:], m_pred[1:], P_pred[1:]), reverse=True)
        x = jnp.concatenate([xs, m[-1:]], axis=0)
        cov = jnp.concatenate([Ss, P[-1:]], axis=0)
    else:
        x, cov = m, P
        cross = G = jnp.zeros((0, n, n), dtype)

    def logdet_spd(S):
        return 2.0 * jnp.sum(jnp.log(jnp.diagonal(chol(S), axis1=-2, axis2=-1)), axis=-1)

    log_det = -logdet_spd(P0) + 2.0 * jnp.sum(half_ld_S) - jnp.sum(logdet_spd(Rt))
    if T > 1:
        log_det = log_det - jnp.sum(logdet_spd(Q[1:]))
    log_lik = -0.5 * jnp.sum(quad) - jnp.sum(half_ld_S) - 0.5 * math.log(2 * math.pi) * jnp.sum(w)

    ok = jnp.logical_not(flat) & jnp.all(jnp.isfinite(x)) & jnp.all(jnp.isfinite(cov)) & jnp.isfinite(log_lik)
    factor = CovarianceFactor(ok=ok, A=A, Q=Q, P0=P0, Ct=Ct, Kt=Kt, G=G, cov=cov, cross=cross,
                              log_det=log_det, log_lik=log_lik)
    x = jnp.where(ok, x, jnp.nan)
    return x, factor


def forward(model, y, w):
    return sweep(model, y, w)


def adjoint(factor: CovarianceFactor, v):
    """H⁻¹ v with the stored gains (module docstring: offsets that make the right-hand side v)."""
    T, n = v.shape
    A, Q = factor.A, factor.Q  # index t: the transition into step t
    if T > 1:
        def back(s_next, xs):
            v_t, A_next = xs
            s = v_t + mT(A_next) @ s_next
            return s, s
        _, s_mid = lax.scan(back, v[-1], (v[1:-1], A[2:]), reverse=True)  # s_1..s_{T-2}
        s = jnp.concatenate([s_mid, v[-1:]], axis=0)  # s_1..s_{T-1}
        m0 = factor.P0 @ (v[0] + mT(A[1]) @ s[0])
        offsets = jnp.concatenate([jnp.zeros((1, n), v.dtype), jnp.einsum("tij,tj->ti", Q[1:], s)], axis=0)
    else:
        m0 = factor.P0 @ v[0]
        offsets = jnp.zeros((1, n), v.dtype)

    def filter_step(m_prev, xs):
        A_t, b_t, Kt, Ct = xs
        m_pred = A_t @ m_prev + b_t
        m = m_pred - mT(Kt) @ (Ct @ m_pred)
        return m, (m, m_pred)

    _, (m, m_pred) = lax.scan(filter_step, m0, (A, offsets, factor.Kt, factor.Ct))
    if T == 1:
        return jnp.where(factor.ok, m, jnp.nan)

    def smooth_step(x_next, xs):
        m_t, G, m_pred_next = xs
        x_t = m_t + G @ (x_next - m_pred_next)
        return x_t, x_t

    _, xs = lax.scan(smooth_step, m[-1], (m[:-1], factor.G, m_pred[1:]), reverse=True)
    return jnp.where(factor.ok, jnp.concatenate([xs, m[-1:]], axis=0), jnp.nan)


def logdet(factor: CovarianceFactor):
    return jnp.where(factor.ok, factor.log_det, jnp.nan)


def band_inverse(factor: CovarianceFactor):
    nan = jnp.logical_not(factor.ok)
    return jnp.where(nan, jnp.nan, factor.cov), jnp.where(nan, jnp.nan, factor.cross)


def gradients(model, y, w, x, factor, x_bar):
    """(model_bar, y_bar) of ⟨x̄, x(model, y)⟩ by reverse mode through the recursions."""
    _, pull = jax.vjp(lambda m, yy: sweep(m, yy, w)[0], model, y)
    return pull(x_bar)


def log_likelihood(model, y, w, x, factor):
    """(log p(y), model_bar, y_bar) by reverse mode through the filter."""
    def value(m, yy):
        _, f = sweep(m, yy, w)
        return jnp.where(f.ok, f.log_lik, jnp.nan)

    val, (model_bar, y_bar) = jax.value_and_grad(value, argnums=(0, 1))(model, y)
    return val, model_bar, y_bar


COVARIANCE = Backend(forward=forward, adjoint=adjoint, logdet=logdet, band_inverse=band_inverse,
                     gradients=gradients, log_likelihood=log_likelihood, refined=False)
