r"""The expected log joint density E[log p(x, y_K; θ)] under a Gaussian posterior, for second derivatives.

Fisher's identity: differentiating log p(y_K; θ) = log ∫ p(x, y_K; θ) dx
under the integral,

    ∇_θ log p(y_K; θ) = E_{x ~ p(x | y_K; θ)} [∇_θ log p(x, y_K; θ)],

so the gradient is the partial gradient, at fixed posterior moments, of

    ℓ(θ; x, Σ) = E[log p(x, y_K; θ)]   (x ~ N(x, Σ), the smoothed moments).

The same holds for y (another argument of the joint density) and with a
flat prior (the density 1 on x_0 has no θ). Written out, with the posterior
mean x_t, the band of Σ (Σ_tt, Σ_{t+1,t}), r̄_t = x_{t+1} − A_tx_t − b_t and
ē_t = y_t − C_tx_t − d_t (observed entries):

    ℓ = − ½ Σ_{t<T-1} [tr(Q_t⁻¹ M_t) + log|Q_t|]
        − ½ Σ_t [tr(S_t V_t) + log|R̃_t|]
        − ½ [tr(P_0⁻¹((x_0 − m_0)(x_0 − m_0)ᵀ + Σ_00)) + log|P_0|]   (proper prior only)
    M_t = r̄_t r̄_tᵀ + Σ_{t+1} − A_tΣ_{t+1,t}ᵀ − Σ_{t+1,t}A_tᵀ + A_tΣ_tA_tᵀ   (= E[r_t r_tᵀ])
    V_t = ē_t ē_tᵀ + C_t Σ_tt C_tᵀ                                         (= E[e_t e_tᵀ])

up to the 2π constants (S_t, R̃_t as in ``normal_equations``: S_t applies
R_KK⁻¹ on the observed entries). Every term is linear in the per-step
moments, so where a field does not vary over time the sum over t is taken
before θ enters: for a time-invariant Q the transition terms are
−½ tr(Q⁻¹ Σ_t M_t) − ½(T−1) log|Q|, and Σ_t M_t with time-invariant A, b
is a function of θ and five sums (Σ_t x_tx_tᵀ + Σ_tt over t < T−1 and over
t ≥ 1, Σ_t x_{t+1}x_tᵀ + Σ_{t+1,t}, Σ_t x_t over both ranges). The
measurement terms likewise: with a diagonal R (``DiagonalNoise``) per
component i, Σ_t w_ti E[e_ti²] needs c_iᵀ(Σ_t w_tiΣ_tt)c_i and the
residuals; with a dense R, time-invariant C, d, R and every entry observed,
−½ tr(R⁻¹ Σ_t V_t) − ½ T log|R|; a dense R with missing entries (S_t then
depends on the step's pattern) or any time-varying field keeps its terms
per step.

Why this form for the Hessian (``likelihood.py``): the gradient's tangent in
a direction dθ is d/dθ of ∂_θℓ(θ; x*(θ), Σ(θ)), i.e. ∂_θ²ℓ·dθ (the θ–θ
terms, on n×n and p×p matrices when the fields are time-invariant) plus
∂_x∂_θℓ·dx* + ∂_Σ∂_θℓ·dΣ, which are sums over t of elementwise products of
the tangents of x* and of Σ's band: O(T n²) per direction and no per-step
factorisation to differentiate. (The envelope form of ``likelihood._gradient``
differentiates per-step Cholesky factors of R̃_t, of Σ_{t+1} and the pull-back
through the assembly in every direction: at T = 10⁵, n = p = 4, 20 directions, ≈ 45 s
against ≈ 0.5 s here, by difference; benchmarks/RESULTS.md.)

Rounding: for the process noise the value of ∂_Qℓ is the Fisher form
½Q⁻¹(Σ_tM_t − (T−1)Q)Q⁻¹ whose cancellation ``likelihood.py`` documents; the
value here is never used (the kernel's gradient is), only its tangent, whose
Q–Q terms carry ½Q⁻¹ dQ Q⁻¹(Σ_tM_t − (T−1)Q)Q⁻¹, absolute error
eps·T·|Σ|·|dQ|/|Q|³; on models whose process noise is tiny beside the
posterior covariances (q/r ≪ 1) the Q-block of the Hessian loses accuracy
accordingly (not measured; the other blocks are first-order differences).
"""

from __future__ import annotations

import jax.numpy as jnp
from jax import lax

from .linalg import chol, lsolve, mT
from .model import StateSpace
from .noise import DiagonalNoise
from .normal_equations import masked_measurement_cov


def _gauss_terms(cov, M, count):
    """−½ tr(cov⁻¹ M) − ½ count·log|cov|, summed over a leading batch axis if any.

    cov: a dense SPD (k, k) or (B, k, k) (read symmetrised, as the factor
    reads it) or a ``DiagonalNoise`` with variances (k,) or (B, k); M the
    matching second moments.
    """
    if isinstance(cov, DiagonalNoise):
        v = jnp.asarray(cov.variances)
        diag = jnp.diagonal(M, axis1=-2, axis2=-1)
        return -0.5 * jnp.sum(diag / v) - 0.5 * jnp.sum(count * jnp.log(v))
    L = chol(cov)
    Li = lsolve(L, jnp.broadcast_to(jnp.eye(L.shape[-1], dtype=L.dtype), L.shape))  # L⁻¹
    # tr(L⁻ᵀL⁻¹M) = Σ (L⁻¹M) ∘ L⁻¹ (rows of L⁻¹M L⁻ᵀ's diagonal)
    quad = jnp.sum((Li @ M) * Li)
    logdet = 2 * jnp.sum(count * jnp.sum(jnp.log(jnp.diagonal(L, axis1=-2, axis2=-1)), axis=-1))
    return -0.5 * quad - 0.5 * logdet


def _time_invariant(a, ndim):
    """True when the field (an array or a noise form) has no time axis (None counts as invariant)."""
    if a is None:
        return True
    if isinstance(a, DiagonalNoise):
        return jnp.ndim(a.variances) == ndim - 1
    return jnp.ndim(a) == ndim


def _transition_terms(model: StateSpace, x, S_diag, S_sub):
    T, n = x.shape
    x0, x1 = x[:-1], x[1:]
    A = model.A
    if _time_invariant(A, 2) and _time_invariant(model.b, 1):
        # Σ_t M_t from five sums over time (module docstring).
        S00 = x0.T @ x0 + jnp.sum(S_diag[:-1], axis=0)
        S11 = x1.T @ x1 + jnp.sum(S_diag[1:], axis=0)
        S10 = x1.T @ x0 + jnp.sum(S_sub, axis=0)
        M = S11 - S10 @ A.T - A @ S10.T + A @ S00 @ A.T
        if model.b is not None:
            u = jnp.sum(x1, axis=0) - A @ jnp.sum(x0, axis=0)
            b = model.b
            M = M - jnp.outer(u, b) - jnp.outer(b, u) + (T - 1) * jnp.outer(b, b)
        per_step = None
    else:
        At = jnp.broadcast_to(A, (T - 1, n, n))
        r = x1 - jnp.einsum("tij,tj->ti", At, x0)
        if model.b is not None:
            r = r - model.b
        per_step = (r[:, :, None] * r[:, None, :] + S_diag[1:] - At @ mT(S_sub) - S_sub @ mT(At)
                    + At @ S_diag[:-1] @ mT(At))
        M = jnp.sum(per_step, axis=0)
    if _time_invariant(model.Q, 2):
        return _gauss_terms(model.Q, M, T - 1)
    if per_step is None:  # time-invariant A, b but a per-step Q: the moments per step after all
        At = jnp.broadcast_to(A, (T - 1, n, n))
        r = x1 - x0 @ A.T - (0 if model.b is None else model.b)
        per_step = (r[:, :, None] * r[:, None, :] + S_diag[1:] - At @ mT(S_sub) - S_sub @ mT(At)
                    + At @ S_diag[:-1] @ mT(At))
    return _gauss_terms(model.Q, per_step, 1)


def _measurement_terms(model: StateSpace, y, w, x, S_diag):
    T, p = y.shape
    C, d, R = model.C, model.d, model.R
    invariant = _time_invariant(C, 2) and _time_invariant(d, 1)
    pred = jnp.einsum("...ij,tj->ti", C, x) if C.ndim == 2 else jnp.einsum("tij,tj->ti", C, x)
    e = jnp.where(w > 0, y - pred - (0 if d is None else d), 0)  # ē_t, 0 at missing entries (NaN-safe)
    if isinstance(R, DiagonalNoise):
        r = jnp.asarray(R.variances)
        if invariant and r.ndim == 1:
            # c_iᵀ (Σ_t w_ti Σ_tt) c_i per component.
            SW = jnp.einsum("ti,tjk->ijk", w, S_diag)
            cov = jnp.einsum("ij,ijk,ik->i", C, SW, C)
        else:
            Ct = jnp.broadcast_to(C, (T, p) + C.shape[-1:])
            cov = w * jnp.einsum("tij,tjk,tik->ti", Ct, S_diag, Ct)
        quad = jnp.sum(w * e * e / r) + jnp.sum(cov / r)
        return -0.5 * quad - 0.5 * jnp.sum(w * jnp.log(r))
    ee = e[:, :, None] * e[:, None, :]

    def summed(_):  # every entry observed, time-invariant C, d, R: −½ tr(R⁻¹ Σ_t V_t) − ½ T log|R|
        V = jnp.sum(ee, axis=0) + C @ jnp.sum(S_diag, axis=0) @ C.T
        return _gauss_terms(R, V, T)

    def per_step(_):  # S_t per observed pattern: the padded R̃_t of each step
        Ct = jnp.broadcast_to(C, (T,) + C.shape[-2:])
        ww = w[:, :, None] * w[:, None, :]
        V = ww * (ee + Ct @ S_diag @ mT(Ct))
        return _gauss_terms(masked_measurement_cov(R, w), V, 1)

    if invariant and R.ndim == 2:
        # Whether every entry is observed is known at run time only; a batched
        # mask (vmap) evaluates both branches and selects.
        return lax.cond(jnp.all(w > 0), summed, per_step, None)
    return per_step(None)


def expected_log_joint(model: StateSpace, y, w, x, S_diag, S_sub):
    """ℓ(θ; x, Σ) = E[log p(x, y_K; θ)] up to constants (module docstring).

    Args:
        model: canonical ``StateSpace`` (Q and R dense or ``DiagonalNoise``).
        y: (T, p) measurements (anything at missing entries); w: (T, p) 0/1 mask.
        x: (T, n) posterior mean; S_diag (T, n, n), S_sub (T-1, n, n): the band of Σ.
    """
    T = y.shape[0]
    val = _measurement_terms(model, y, w, x, S_diag)
    if T > 1:
        val = val + _transition_terms(model, x, S_diag, S_sub)
    if model.x0_cov is not None:
        d0 = x[0] - (0 if model.x0_mean is None else model.x0_mean)
        val = val + _gauss_terms(model.x0_cov, jnp.outer(d0, d0) + S_diag[0], 1)
    return val
