r"""Block Cholesky factorisation and solves for SPD block-tridiagonal systems.

H = L Lᵀ with L block lower bidiagonal: diagonal blocks L_t (lower triangular)
and sub-diagonal blocks M_t (t ≥ 1):

    L_0 L_0ᵀ = H_00,   M_t = H_{t,t-1} L_{t-1}⁻ᵀ,   L_t L_tᵀ = H_tt − M_t M_tᵀ.

Forward substitution  z_t = L_t⁻¹ (g_t − M_t z_{t-1}),
back substitution     x_t = L_t⁻ᵀ (z_t − M_{t+1}ᵀ x_{t+1}).

The recursions run under ``lax.scan``: O(T n³) work for the factor, O(T n²)
for each further solve, O(T n²) memory for the stored factors.

Pivot monitoring: a Schur complement that has lost (almost) all of its
significant digits to cancellation means the states are not identified by the
data and prior (e.g. a flat prior and nothing observed). Rather than return a
finite but meaningless answer we report such a factorisation as failed and the
callers turn the result into NaN.
"""

from __future__ import annotations

from typing import NamedTuple

import jax.numpy as jnp
from jax import lax

from .tolerances import pivot_tolerance
from .linalg import chol, lsolve, lsolve_vec, matvec, mT


class BlockFactor(NamedTuple):
    """The block Cholesky factor of H.

    L: (T, n, n) lower-triangular diagonal blocks; M: (T-1, n, n) sub-diagonal
    blocks (M[t-1] is M_t in the formulas); ok: scalar bool, False when a pivot
    collapsed (the system is singular to working precision).
    """

    L: object
    M: object
    ok: object


def _pivot_ratio(Lt, Ht):
    d = jnp.diagonal(Lt, axis1=-2, axis2=-1)
    h = jnp.diagonal(Ht, axis1=-2, axis2=-1)
    return jnp.min(d * d / jnp.where(h > 0, h, 1))


def factor_solve(diag, sub, rhs, pivot_tol=None):
    """Factor H and solve H x = rhs in one forward and one backward sweep.

    Args:
        diag: (T, n, n) diagonal blocks of H.
        sub: (T-1, n, n) or (n, n) sub-diagonal blocks H_{t+1,t}.
        rhs: (T, n).
        pivot_tol: smallest accepted (pivot)²/H_ii; default
            ``tolerances.pivot_tolerance(dtype, n)`` (the flat-prior value).

    Returns:
        (x, BlockFactor): x of shape (T, n); NaN everywhere if the factorisation
        failed (non-positive or collapsed pivot).
    """
    T, n = rhs.shape
    tol = pivot_tolerance(rhs.dtype, n) if pivot_tol is None else pivot_tol
    L0 = chol(diag[0])
    z0 = lsolve_vec(L0, rhs[0])
    r0 = _pivot_ratio(L0, diag[0])

    sub_varies = sub.ndim == 3

    def step(carry, xs):
        L_prev, z_prev = carry
        if sub_varies:
            H_tt, H_sub, g_t = xs
        else:
            (H_tt, g_t), H_sub = xs, sub
        # M_t = H_{t,t-1} L_{t-1}⁻ᵀ, computed as (L_{t-1}⁻¹ H_{t,t-1}ᵀ)ᵀ.
        M_t = mT(lsolve(L_prev, mT(H_sub)))
        S_t = H_tt - M_t @ mT(M_t)
        L_t = chol(S_t)
        z_t = lsolve_vec(L_t, g_t - M_t @ z_prev)
        return (L_t, z_t), (L_t, M_t, z_t, _pivot_ratio(L_t, H_tt))

    xs = (diag[1:], sub, rhs[1:]) if sub_varies else (diag[1:], rhs[1:])
    _, (Ls, Ms, zs, ratios) = lax.scan(step, (L0, z0), xs)
    L = jnp.concatenate([L0[None], Ls], axis=0)
    z = jnp.concatenate([z0[None], zs], axis=0)
    ok = jnp.minimum(r0, jnp.min(ratios, initial=jnp.inf)) > tol
    factor = BlockFactor(L=L, M=Ms, ok=ok)
    x = back_substitute(factor, z)
    return jnp.where(ok, x, jnp.nan), factor


def back_substitute(factor: BlockFactor, z):
    """L⁻ᵀ z for the block Cholesky factor: z (T, n) one right-hand side, or (T, n, S) S at once.

    The backward half of a solve with H = L Lᵀ (and, on its own, the map
    that turns white noise into a draw with covariance H⁻¹).
    """
    L, M = factor.L, factor.M
    solve = lsolve_vec if z.ndim == 2 else lsolve
    x_last = solve(L[-1], z[-1], transpose=True)

    def step(x_next, xs):
        L_t, M_next, z_t = xs
        x_t = solve(L_t, z_t - mT(M_next) @ x_next, transpose=True)
        return x_t, x_t

    _, xs = lax.scan(step, x_last, (L[:-1], M, z[:-1]), reverse=True)
    return jnp.concatenate([xs, x_last[None]], axis=0)


def solve(factor: BlockFactor, rhs):
    """Solve H x = rhs with a stored factor: O(T n²). rhs: (T, n)."""
    L, M = factor.L, factor.M
    z0 = lsolve_vec(L[0], rhs[0])

    def step(z_prev, xs):
        L_t, M_t, g_t = xs
        z_t = lsolve_vec(L_t, g_t - M_t @ z_prev)
        return z_t, z_t

    _, zs = lax.scan(step, z0, (L[1:], M, rhs[1:]))
    z = jnp.concatenate([z0[None], zs], axis=0)
    x = back_substitute(factor, z)
    return jnp.where(factor.ok, x, jnp.nan)


def logdet(factor: BlockFactor):
    """log|H| = 2 Σ_t Σ_i log (L_t)_ii."""
    d = jnp.diagonal(factor.L, axis1=-2, axis2=-1)
    return 2 * jnp.sum(jnp.log(d))


def matvec_blocks(diag, sub, x):
    """H x for a block-tridiagonal H given by its blocks (for checks). x: (T, n)."""
    y = matvec(diag, x)
    if x.shape[0] > 1:
        y = y.at[1:].add(matvec(sub, x[:-1]))
        y = y.at[:-1].add(matvec(mT(sub), x[1:]))
    return y


def selected_inverse(factor: BlockFactor):
    r"""The block-tridiagonal part of Σ = H⁻¹ from the Cholesky factor: O(T n³).

    From Σ L = L⁻ᵀ (block upper triangular with diagonal blocks L_t⁻ᵀ), reading
    block rows t+1 and t of block column t, backwards from the last step:

        Σ_{T-1,T-1} = L_{T-1}⁻ᵀ L_{T-1}⁻¹
        Σ_{t+1,t}   = −Σ_{t+1,t+1} M_{t+1} L_t⁻¹
        Σ_tt        = L_t⁻ᵀ L_t⁻¹ − Σ_{t+1,t}ᵀ M_{t+1} L_t⁻¹

    Returns:
        (diag (T, n, n), sub (T-1, n, n)) with diag[t] = Σ_tt and
        sub[t] = Σ_{t+1,t}. NaN when the factorisation failed.
    """
    L, M = factor.L, factor.M
    n = L.shape[-1]
    eye = jnp.eye(n, dtype=L.dtype)
    Linv = lsolve(L, jnp.broadcast_to(eye, L.shape))  # L_t⁻¹, (T, n, n)
    last = mT(Linv[-1]) @ Linv[-1]

    def step(S_next, xs):
        Linv_t, M_next = xs
        ML = M_next @ Linv_t  # M_{t+1} L_t⁻¹
        S_sub = -S_next @ ML
        S_t = mT(Linv_t) @ Linv_t - mT(S_sub) @ ML
        S_t = 0.5 * (S_t + mT(S_t))  # keep exact symmetry against rounding
        return S_t, (S_t, S_sub)

    _, (diags, subs) = lax.scan(step, last, (Linv[:-1], M), reverse=True)
    diag = jnp.concatenate([diags, last[None]], axis=0)
    nan_if_bad = jnp.where(factor.ok, 1.0, jnp.nan).astype(L.dtype)
    return diag * nan_if_bad, subs * nan_if_bad


def _sym(X):
    return 0.5 * (X + mT(X))


def _congruence_recurrence(N, c, reverse: bool):
    """Y_t = c_t + N_{t-1} Y_{t-1} N_{t-1}ᵀ (forward) or Y_t = c_t + N_tᵀ Y_{t+1} N_t (reverse).

    N: (T-1, n, n) with N[t] = N_{t+1} of :func:`selected_inverse_tangent`;
    c: (T, n, n). One n³ congruence per step: the only sequential part of the
    band tangent (everything else there is vectorised over t).
    """
    if reverse:
        def step(Y_next, xs):
            N_t, c_t = xs
            Y = c_t + mT(N_t) @ Y_next @ N_t
            return Y, Y

        _, Ys = lax.scan(step, c[-1], (N, c[:-1]), reverse=True)
        return jnp.concatenate([Ys, c[-1][None]], axis=0)

    def step(Y_prev, xs):
        N_prev, c_t = xs
        Y = c_t + N_prev @ Y_prev @ mT(N_prev)
        return Y, Y

    _, Ys = lax.scan(step, c[0], (N, c[1:]))
    return jnp.concatenate([c[0][None], Ys], axis=0)


def selected_inverse_tangent(factor: BlockFactor, S_diag, S_sub, dH_diag, dH_sub):
    r"""The tangent of :func:`selected_inverse` in the direction dH: −band(Σ dH Σ), O(T n³).

    Σ = H⁻¹ and dΣ = −Σ dH Σ; only its block-tridiagonal band is formed, by
    differentiating the factorisation and the selected inversion by hand, with
    the stored factor and the already computed band of Σ (no tape).

    Write P_t = (L_t L_tᵀ)⁻¹ (the inverse Schur complement S_t⁻¹) and
    N_{t+1} = M_{t+1} L_t⁻¹ = H_{t+1,t} P_t. Then

        S_t = H_tt − N_t H_{t,t-1}ᵀ          (S_t = L_t L_tᵀ)
        Σ_{t+1,t} = −Σ_{t+1} N_{t+1},   Σ_tt = P_t + N_{t+1}ᵀ Σ_{t+1} N_{t+1}

    and their tangents, with dP_t = −P_t dS_t P_t:

        dS_0 = dH_00,
        dS_t = dH_tt − dH_{t,t-1} N_tᵀ − N_t dH_{t,t-1}ᵀ + N_t dS_{t-1} N_tᵀ        (forward)
        dN_{t+1} = dH_{t+1,t} P_t − N_{t+1} dS_t P_t
        dΣ_{T-1} = dP_{T-1},
        dΣ_tt = dP_t − dN_{t+1}ᵀ Σ_{t+1,t} − Σ_{t+1,t}ᵀ dN_{t+1} + N_{t+1}ᵀ dΣ_{t+1} N_{t+1}   (backward)
        dΣ_{t+1,t} = −dΣ_{t+1} N_{t+1} − Σ_{t+1} dN_{t+1}

    Both recursions are congruences plus terms known beforehand, so each
    sweep carries one n×n block and costs two n³ products per step; the rest
    is vectorised over t.

    Args:
        factor: the BlockFactor of H.
        S_diag, S_sub: the band of Σ (``selected_inverse(factor)``).
        dH_diag: (T, n, n) tangent of H_tt (its symmetric part is used, as the
            factorisation reads only that); dH_sub: (T-1, n, n) tangent of
            H_{t+1,t}.

    Returns:
        (dΣ_tt (T, n, n), dΣ_{t+1,t} (T-1, n, n)); NaN when the factor failed.
    """
    L, M = factor.L, factor.M
    n = L.shape[-1]
    Linv = lsolve(L, jnp.broadcast_to(jnp.eye(n, dtype=L.dtype), L.shape))
    P = mT(Linv) @ Linv
    nan_if_bad = jnp.where(factor.ok, 1.0, jnp.nan).astype(L.dtype)
    dD = _sym(dH_diag)
    if L.shape[0] == 1:  # no coupling: dΣ_00 = dP_0
        return _sym(-P @ dD @ P) * nan_if_bad, jnp.zeros((0, n, n), L.dtype)
    N = M @ Linv[:-1]  # N[t] = N_{t+1}
    E = dH_sub @ mT(N)  # dH_{t+1,t} N_{t+1}ᵀ
    c = dD.at[1:].add(-(E + mT(E)))
    dS = _congruence_recurrence(N, c, reverse=False)
    G = dS @ P  # dS_t P_t
    dP = _sym(-P @ G)
    dN = dH_sub @ P[:-1] - N @ G[:-1]
    F = mT(dN) @ S_sub
    c2 = dP.at[:-1].add(-(F + mT(F)))
    dSig = _sym(_congruence_recurrence(N, c2, reverse=True))
    dSig_sub = -(dSig[1:] @ N) - S_diag[1:] @ dN
    return dSig * nan_if_bad, dSig_sub * nan_if_bad
