r"""The smoothing objective, its normal equations, and the stationarity pairing.

The smoothed means maximise the joint Gaussian density, i.e. minimise

    J(x) = ½ Σ_{t<T-1} r_tᵀ Q_t⁻¹ r_t + ½ Σ_t e_tᵀ S_t e_t + ½ (x_0 − m_0)ᵀ P_0⁻¹ (x_0 − m_0)

with r_t = x_{t+1} − A_t x_t − b_t and e_t = y_t − C_t x_t − d_t. S_t is the
precision of the *observed* part of y_t: with K the observed entries,
S_t = E (R_{t,KK})⁻¹ Eᵀ padded with zeros — the Gaussian marginal of the observed
sub-vector, which is not R_t⁻¹ with rows zeroed when R_t is full.

We get S_t without gathering a ragged K: with w the 0/1 mask of step t,

    R̃_t = (w wᵀ) ∘ R_t + diag(1 − w)

is, up to a permutation, blockdiag(R_KK, I); so w ∘ R̃_t⁻¹ (w ∘ ·) applies S_t
exactly, and R̃_t is SPD whenever R_KK is. Entries of R at missing positions
never reach the result (nor its derivative).

The stationarity condition ∇J = 0 is the block-tridiagonal system H x = g with

    H_tt      = C_tᵀS_tC_t + [t<T-1] A_tᵀQ_t⁻¹A_t + [t≥1] Q_{t-1}⁻¹ + [t=0] P_0⁻¹
    H_{t+1,t} = −Q_t⁻¹ A_t
    g_t       = C_tᵀS_t(y_t − d_t) − [t<T-1] A_tᵀQ_t⁻¹b_t + [t≥1] Q_{t-1}⁻¹b_{t-1} + [t=0] P_0⁻¹m_0

Every precision-weighted product is formed from whitened factors (Lq⁻¹A,
Lr⁻¹C, ...) so that the diagonal blocks are sums of Gram matrices: symmetric
positive semi-definite by construction, even when Q or R is ill-conditioned.
"""

from __future__ import annotations

from typing import NamedTuple

import jax.numpy as jnp

from .linalg import chol, cross, gram, lsolve, lsolve_vec, matvec
from .model import StateSpace
from .noise import DiagonalNoise, dense


class BlockSystem(NamedTuple):
    """H x = g with H symmetric block tridiagonal.

    diag: (T, n, n) blocks H_tt; sub: (T-1, n, n) or (n, n) blocks H_{t+1,t}
    (time-invariant when A and Q are); rhs: (T, n).
    """

    diag: object
    sub: object
    rhs: object


def masked_measurement_cov(R, w):
    """R̃_t = (w wᵀ)∘R_t + diag(1 − w): (T, p, p) from R (p,p)|(T,p,p) and w (T, p).

    R may also be a ``DiagonalNoise`` (variances (p,) or (T, p), ``noise.py``):
    then R̃_t = diag(w∘r_t + 1 − w), formed directly (w² = w for a 0/1 mask).
    """
    if isinstance(R, DiagonalNoise):
        return (w * R.variances + (1 - w))[:, :, None] * jnp.eye(w.shape[-1], dtype=w.dtype)
    ww = w[:, :, None] * w[:, None, :]
    return ww * R + (1 - w)[:, :, None] * jnp.eye(w.shape[-1], dtype=w.dtype)


def transition_cov(model: StateSpace):
    """Q_t as dense blocks, (n, n) or (T-1, n, n).

    Q may also be a ``DiagonalNoise`` (variances (n,) or (T-1, n),
    ``noise.py``), which the compiled kernel keeps diagonal; the JAX code
    expands it here, the one place that reads Q, so its gradient (by
    autodiff through the expansion) is the diagonal of the dense one.
    """
    return dense(model.Q, model.A.shape[-1])


def observed_residual(model: StateSpace, y, w, x):
    """e_t = y_t − C_t x_t − d_t at observed entries, 0 at missing ones (NaN-safe)."""
    pred = matvec(model.C, x)
    if model.d is not None:
        pred = pred + model.d
    return jnp.where(w > 0, y - pred, 0)


def _prior_terms(model: StateSpace):
    Wp = lsolve(chol(model.x0_cov), jnp.eye(model.x0_cov.shape[-1], dtype=model.x0_cov.dtype))
    P0inv = gram(Wp)
    m0 = model.x0_mean if model.x0_mean is not None else jnp.zeros(P0inv.shape[-1], P0inv.dtype)
    return P0inv, P0inv @ m0


def assemble(model: StateSpace, y, w) -> BlockSystem:
    """Build the block-tridiagonal normal equations (see module docstring).

    Args:
        model: canonicalised StateSpace (arrays of one float dtype).
        y: (T, p) measurements; missing entries may hold anything, even NaN.
        w: (T, p) 0/1 float mask, 1 = observed.
    """
    T, p = y.shape
    n = model.A.shape[-1]
    dtype = y.dtype

    # Measurement blocks, whitened by the Cholesky factor of R̃_t.
    Lr = chol(masked_measurement_cov(model.R, w))  # (T, p, p)
    WC = lsolve(Lr, w[:, :, None] * model.C)  # (T, p, n)
    ey = jnp.where(w > 0, y - (0 if model.d is None else model.d), 0)
    Wy = lsolve_vec(Lr, ey)  # (T, p)
    diag = gram(WC)  # C_tᵀ S_t C_t
    rhs = jnp.einsum("tpi,tp->ti", WC, Wy)  # C_tᵀ S_t (y_t − d_t)

    # Transition blocks, whitened by the Cholesky factor of Q_t.
    Lq = chol(transition_cov(model))
    Wi = lsolve(Lq, jnp.eye(n, dtype=dtype))  # Lq⁻¹: Q⁻¹ = Wiᵀ Wi
    WA = lsolve(Lq, model.A)  # Lq⁻¹ A
    diag = diag.at[:-1].add(gram(WA))  # A_tᵀ Q_t⁻¹ A_t
    diag = diag.at[1:].add(gram(Wi))  # Q_{t-1}⁻¹
    sub = -cross(Wi, WA)  # −Q_t⁻¹ A_t
    if model.b is not None:
        Wb = lsolve_vec(Lq, model.b)
        rhs = rhs.at[:-1].add(-jnp.einsum("...ki,...k->...i", WA, Wb))
        rhs = rhs.at[1:].add(jnp.einsum("...ki,...k->...i", Wi, Wb))

    if model.x0_cov is not None:
        P0inv, P0inv_m0 = _prior_terms(model)
        diag = diag.at[0].add(P0inv)
        rhs = rhs.at[0].add(P0inv_m0)
    return BlockSystem(diag, sub, rhs)


def objective(model: StateSpace, y, w, x):
    """J(x): the negative log joint density up to constants (see module docstring)."""
    e = observed_residual(model, y, w, x)
    Lr = chol(masked_measurement_cov(model.R, w))
    val = 0.5 * jnp.sum(lsolve_vec(Lr, e) ** 2)
    if x.shape[0] > 1:
        r = transition_residual(model, x)
        val = val + 0.5 * jnp.sum(lsolve_vec(chol(transition_cov(model)), r) ** 2)
    if model.x0_cov is not None:
        d0 = x[0] - (0 if model.x0_mean is None else model.x0_mean)
        val = val + 0.5 * jnp.sum(lsolve_vec(chol(model.x0_cov), d0) ** 2)
    return val


def transition_residual(model: StateSpace, x):
    """r_t = x_{t+1} − A_t x_t − b_t: (T-1, n)."""
    r = x[1:] - matvec(model.A, x[:-1])
    if model.b is not None:
        r = r - model.b
    return r


def stationarity_pairing(model: StateSpace, y, w, x, u):
    r"""uᵀ ∇ₓJ(x; θ) as a function of the model and y, for fixed x and u.

        uᵀ∇ₓJ = Σ_{t<T-1} (u_{t+1} − A_t u_t)ᵀ Q_t⁻¹ r_t − Σ_t (C_t u_t)ᵀ S_t e_t
                + u_0ᵀ P_0⁻¹ (x_0 − m_0)

    Implicit differentiation of ∇ₓJ(x*(θ); θ) = 0 gives, for a loss ℓ(x*) with
    adjoint u = H⁻¹ ∂ℓ/∂x*,

        dℓ/dθ = −∂/∂θ [uᵀ ∇ₓJ(x; θ)]  at x = x*, with x and u held fixed,

    so the reverse pass is one solve (for u) plus the gradient of this scalar,
    which is a sum of per-step terms: O(T (n² + p²)) work plus O(T p³) for the
    per-step Cholesky factors of R̃_t, and no recursion over time.
    """
    Se, Qr, P0d = weighted_residuals(model, y, w, x)
    val = -jnp.sum(matvec(model.C, u) * Se)
    if Qr is not None:
        du = u[1:] - matvec(model.A, u[:-1])
        val = val + jnp.sum(du * Qr)
    if P0d is not None:
        val = val + jnp.dot(u[0], P0d)
    return val


def weighted_residuals(model: StateSpace, y, w, x):
    """The residuals of x weighted by their precisions, each formed before weighting.

    Returns (S_t e_t (T, p), Q_t⁻¹ r_t (T-1, n) or None when T = 1,
    P_0⁻¹(x_0 − m_0) (n,) or None for a flat prior). −∇ₓJ and the
    stationarity pairing are both linear in these.
    """
    e = observed_residual(model, y, w, x)
    Lr = chol(masked_measurement_cov(model.R, w))
    Se = w * lsolve_vec(Lr, lsolve_vec(Lr, e), transpose=True)
    Qr = None
    if x.shape[0] > 1:
        Lq = chol(transition_cov(model))
        Qr = lsolve_vec(Lq, lsolve_vec(Lq, transition_residual(model, x)), transpose=True)
    P0d = None
    if model.x0_cov is not None:
        Lp = chol(model.x0_cov)
        d0 = x[0] - (0 if model.x0_mean is None else model.x0_mean)
        P0d = lsolve_vec(Lp, lsolve_vec(Lp, d0), transpose=True)
    return Se, Qr, P0d


def dynamics_blocks(model: StateSpace, T: int):
    """The transition and prior terms of H: (diag (T, n, n), sub (T-1, n, n) or (n, n)).

    H = (these) + blockdiag(C_tᵀS_tC_t), as in :func:`assemble`, which forms
    the same terms together with the right-hand side. Separate so that the
    covariances' derivatives (``covariance_band.py``) can differentiate the
    cheap n×n part by JAX and the measurement part by
    :func:`measurement_precision_tangent`.
    """
    n = model.A.shape[-1]
    Lq = chol(transition_cov(model))  # a diagonal Q (DiagonalNoise) as its dense matrix
    Wi = lsolve(Lq, jnp.eye(n, dtype=model.A.dtype))
    WA = lsolve(Lq, model.A)
    diag = jnp.zeros((T, n, n), model.A.dtype).at[:-1].add(gram(WA)).at[1:].add(gram(Wi))
    if model.x0_cov is not None:
        diag = diag.at[0].add(_prior_terms(model)[0])
    return diag, -cross(Wi, WA)


def measurement_precision_tangent(model: StateSpace, w, dC, dR):
    r"""The tangent of the measurement blocks C_tᵀS_tC_t of H: (T, n, n), linear in (dC, dR).

    With R̃_t as in :func:`masked_measurement_cov` and U_t = R̃_t⁻¹ (w_t∘C_t)
    (rows of missing entries are zero), C_tᵀS_tC_t = (w∘C_t)ᵀ R̃_t⁻¹ (w∘C_t), so

        d(C_tᵀS_tC_t) = (w∘dC_t)ᵀU_t + U_tᵀ(w∘dC_t) − U_tᵀ dR̃_t U_t,   dR̃_t = (w wᵀ)∘dR_t.

    U_t depends on the model only, so the transpose of this map (the
    pull-back of a cotangent D̄_t: C̄_t = w∘U_t(D̄_t + D̄_tᵀ), R̄_t =
    −(w wᵀ)∘(U_t D̄_t U_tᵀ)) is a few batched products: no reverse pass
    through the per-step Cholesky factors of R̃_t.

    Args:
        model: canonicalised; R dense or a ``DiagonalNoise``.
        w: (T, p) 0/1 mask.
        dC: tangent of C, shaped like C; dR: tangent of R, shaped like R
            (a ``DiagonalNoise`` of variance tangents when R is one).
    """
    Lr = chol(masked_measurement_cov(model.R, w))
    wC = w[:, :, None] * model.C
    U = lsolve(Lr, lsolve(Lr, wC), transpose=True)  # (T, p, n)
    E = jnp.einsum("tpi,tpj->tij", w[:, :, None] * dC, U)
    if isinstance(model.R, DiagonalNoise):
        dRU = (w * dR.variances)[:, :, None] * U
    else:
        dRU = (w[:, :, None] * w[:, None, :] * (0.5 * (dR + jnp.swapaxes(dR, -1, -2)))) @ U  # R̃ is read symmetrised
    return E + jnp.swapaxes(E, -1, -2) - jnp.einsum("tpi,tpj->tij", U, dRU)
