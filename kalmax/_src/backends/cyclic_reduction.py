r"""Parallel-in-time solve of the block-tridiagonal normal equations: block cyclic reduction.

The sequential block Cholesky (``blocktri``) walks the T steps one after the
other. Cyclic reduction instead eliminates every other block at once, which
leaves a block-tridiagonal system of half the size, and repeats: ⌈log₂ T⌉
levels, each a handful of *batched* n×n operations, so the depth is O(log T)
while the total work stays O(T n³) (about twice the sequential flop count).

One level, on blocks D_i = H_ii, S_i = H_{i+1,i} and right-hand side g (blocks
padded with an identity block to an even count, which couples to nothing).
Odd blocks k are eliminated; their neighbours k−1, k+1 are kept:

    L_k L_kᵀ = D_k,   Wl_k = L_k⁻¹ S_{k-1},   Wr_k = L_k⁻¹ S_kᵀ,   z_k = L_k⁻¹ g_k

    kept system (block j = 2i):
        D'_i = D_{2i} − Wl_{2i+1}ᵀ Wl_{2i+1} − Wr_{2i-1}ᵀ Wr_{2i-1}
        S'_i = −Wr_{2i+1}ᵀ Wl_{2i+1}                       (couples 2i and 2i+2)
        g'_i = g_{2i} − Wl_{2i+1}ᵀ z_{2i+1} − Wr_{2i-1}ᵀ z_{2i-1}

    back-substitution:  x_k = L_k⁻ᵀ (z_k − Wl_k x_{k-1} − Wr_k x_{k+1}).

D' is the Schur complement of the (block-diagonal) odd part, so this is an
ordinary block Cholesky factorisation of H in odd–even order and inherits its
stability for symmetric positive-definite H. The stored factor (L, Wl, Wr of
every level) makes any further solve O(T n²) work at O(log T) depth; the
backward pass of the smoothing primitive reuses it for the adjoint solve, and
log|H| = 2 Σ log diag(L) over all levels.

Memory: the levels hold T/2 + T/4 + … < T eliminated blocks, three n×n
matrices each: about 3 n² numbers per time step (the sequential factor
stores 2 n²).

Selected inversion (the band of Σ = H⁻¹, for log-likelihood gradients and
posterior covariances) runs the levels backwards: with Σ known on the kept
blocks, for an eliminated k between kept blocks a = k−1, c = k+1 and
F = [Wl_k, Wr_k], P = [[Σ_aa, Σ_ca ᵀ], [Σ_ca, Σ_cc]]:

    Σ_kk = L_k⁻ᵀ (I + F P Fᵀ) L_k⁻¹,
    Σ_ka = −L_k⁻ᵀ (Wl_k Σ_aa + Wr_k Σ_ca),   Σ_ck = −(Wl_k Σ_caᵀ + Wr_k Σ_cc)ᵀ L_k⁻¹

(from x_k = D_k⁻¹ g_k − L_k⁻ᵀ F x_kept and Σ_kept = inverse of the kept system).

Reference: block cyclic reduction is textbook material, e.g. Golub & Van Loan,
Matrix Computations (4th ed.), §4.5.4 (from memory).
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple, Tuple

import jax
import jax.numpy as jnp

from ..linalg import chol, lsolve, lsolve_vec, matvec, mT
from ..tolerances import pivot_tolerance
from .base import Backend, checked_solve


class ReductionLevel(NamedTuple):
    """What one level of cyclic reduction keeps, for m eliminated blocks.

    L: (m, n, n) Cholesky factors of the eliminated diagonal blocks;
    Wl, Wr: (m, n, n) their whitened couplings to the left/right kept block
    (Wr is zero for a last eliminated block without right neighbour).
    """

    L: object
    Wl: object
    Wr: object


@dataclasses.dataclass(frozen=True)
class ReductionFactor:
    """The cyclic-reduction factor of H: levels from finest (T/2 blocks) to coarsest.

    levels: tuple of :class:`ReductionLevel`; root: (n, n) Cholesky factor of
    the last remaining block; ok: scalar bool, False when a pivot collapsed;
    sizes: (static) number of blocks entering each level, finest first — an
    eliminated count m may come from 2m or 2m − 1 blocks, so it is recorded.
    """

    levels: Tuple[ReductionLevel, ...]
    root: object
    ok: object
    sizes: Tuple[int, ...]


jax.tree_util.register_dataclass(ReductionFactor, data_fields=["levels", "root", "ok"], meta_fields=["sizes"])


def _pad_even(a, fill):
    """Append one block `fill` to a stack of an odd number of blocks."""
    if a.shape[0] % 2 == 0:
        return a
    return jnp.concatenate([a, jnp.broadcast_to(fill, (1,) + a.shape[1:]).astype(a.dtype)], axis=0)


def _pad_to(a, size):
    """Zero-pad a stack of blocks at the end to `size` blocks."""
    extra = size - a.shape[0]
    if extra == 0:
        return a
    return jnp.concatenate([a, jnp.zeros((extra,) + a.shape[1:], a.dtype)], axis=0)


def _shift_right(a):
    """b[0] = 0, b[i] = a[i-1]: the contribution of eliminated block 2i−1 to kept block 2i."""
    return jnp.concatenate([jnp.zeros_like(a[:1]), a[:-1]], axis=0)


def _pivot_ratios(L, h):
    # As in blocktri: squared pivots relative to the *original* diagonal of H,
    # so a Schur complement that cancelled to rounding level is caught.
    d = jnp.diagonal(L, axis1=-2, axis2=-1)
    return jnp.min(d * d / jnp.where(h > 0, h, 1))


def factor_solve(diag, sub, rhs, pivot_tol=None):
    """Factor H by cyclic reduction and solve H x = rhs.

    Args:
        diag: (T, n, n) diagonal blocks of H (symmetric positive definite H).
        sub: (T-1, n, n) or (n, n) sub-diagonal blocks H_{t+1,t}.
        rhs: (T, n).
        pivot_tol: as in ``blocktri.factor_solve``.

    Returns:
        (x (T, n), ReductionFactor); x is NaN when a pivot collapsed, as in
        ``blocktri.factor_solve``.
    """
    T, n = rhs.shape
    dtype = rhs.dtype
    eye = jnp.eye(n, dtype=dtype)
    if sub.ndim == 2:
        sub = jnp.broadcast_to(sub, (max(T - 1, 0), n, n))
    # Original diagonal entries of H per block (padding blocks: 1, identity).
    h = jnp.diagonal(diag, axis1=-2, axis2=-1)
    D, S, g = diag, sub, rhs
    levels, zs = [], []
    ratio = jnp.asarray(jnp.inf, dtype)
    while D.shape[0] > 1:
        N = D.shape[0]
        D = _pad_even(D, eye)
        g = _pad_even(g, jnp.zeros((n,), dtype))
        h = _pad_even(h, jnp.ones((n,), dtype))
        S = _pad_to(S, D.shape[0])  # S[N'-1] couples the last block to nothing
        Do, go = D[1::2], g[1::2]
        Lo = chol(Do)
        ratio = jnp.minimum(ratio, _pivot_ratios(Lo, h[1::2]))
        # One batched triangular solve for both couplings: L⁻¹ [S_{k-1}, S_kᵀ].
        W = lsolve(Lo, jnp.concatenate([S[0::2], mT(S[1::2])], axis=-1))
        Wl, Wr = W[..., :n], W[..., n:]
        G = jnp.einsum("mki,mkj->mij", W, W)  # [[WlᵀWl, WlᵀWr], [WrᵀWl, WrᵀWr]]
        z = lsolve_vec(Lo, go)
        D = D[0::2] - G[:, :n, :n] - _shift_right(G[:, n:, n:])
        S = -G[:-1, n:, :n]  # −Wr_kᵀ Wl_k couples kept 2i and 2i+2
        g = g[0::2] - matvec(mT(Wl), z) - _shift_right(matvec(mT(Wr), z))
        h = h[0::2]
        levels.append(ReductionLevel(Lo, Wl, Wr))
        zs.append((N, z))
    root = chol(D[0])
    ratio = jnp.minimum(ratio, _pivot_ratios(root, h[0]))
    ok = ratio > (pivot_tolerance(dtype, n) if pivot_tol is None else pivot_tol)
    factor = ReductionFactor(levels=tuple(levels), root=root, ok=ok, sizes=tuple(N for N, _ in zs))
    x = _back_substitute(factor, [z for _, z in zs], g[0])
    return jnp.where(ok, x, jnp.nan), factor


def _back_substitute(factor: ReductionFactor, zs, g_root):
    x = lsolve_vec(factor.root, lsolve_vec(factor.root, g_root), transpose=True)[None]
    for level, N, z in zip(reversed(factor.levels), reversed(factor.sizes), reversed(zs)):
        x_right = jnp.concatenate([x[1:], jnp.zeros_like(x[:1])], axis=0)
        xo = lsolve_vec(level.L, z - matvec(level.Wl, x) - matvec(level.Wr, x_right), transpose=True)
        x = jnp.stack([x, xo], axis=1).reshape((-1,) + x.shape[1:])[:N]
    return x


def solve(factor: ReductionFactor, rhs):
    """Solve H x = rhs with a stored cyclic-reduction factor: O(T n²) work, O(log T) depth."""
    n = rhs.shape[-1]
    g, zs = rhs, []
    for level in factor.levels:
        g = _pad_even(g, jnp.zeros((n,), g.dtype))
        z = lsolve_vec(level.L, g[1::2])
        g = g[0::2] - matvec(mT(level.Wl), z) - _shift_right(matvec(mT(level.Wr), z))
        zs.append(z)
    x = _back_substitute(factor, zs, g[0])
    return jnp.where(factor.ok, x, jnp.nan)


def logdet(factor: ReductionFactor):
    """log|H| = 2 Σ log diag of every eliminated block's factor and of the root."""
    total = jnp.sum(jnp.log(jnp.diagonal(factor.root)))
    for level in factor.levels:
        total = total + jnp.sum(jnp.log(jnp.diagonal(level.L, axis1=-2, axis2=-1)))
    return 2 * total


def band_inverse(factor: ReductionFactor):
    """(Σ_tt (T, n, n), Σ_{t+1,t} (T-1, n, n)) of Σ = H⁻¹ (see the module docstring).

    O(T n³) work at O(log T) depth; NaN when the factorisation failed.
    """
    Rinv = lsolve(factor.root, jnp.eye(factor.root.shape[-1], dtype=factor.root.dtype))
    Sd = (mT(Rinv) @ Rinv)[None]  # kept-level diagonal blocks
    Ss = jnp.zeros((0,) + Sd.shape[1:], Sd.dtype)  # kept-level sub-diagonal blocks
    for level, N in zip(reversed(factor.levels), reversed(factor.sizes)):
        m, n = level.L.shape[0], level.L.shape[-1]
        # Kept blocks a = 2i (always present) and c = 2i+2 (zero past the end).
        S_aa = Sd
        S_cc = _pad_to(Sd[1:], m)
        S_ca = _pad_to(Ss, m)
        Linv = lsolve(level.L, jnp.broadcast_to(jnp.eye(n, dtype=Sd.dtype), level.L.shape))
        left = level.Wl @ S_aa + level.Wr @ S_ca  # F P[:, a]
        right = level.Wl @ mT(S_ca) + level.Wr @ S_cc  # F P[:, c]
        FPF = left @ mT(level.Wl) + right @ mT(level.Wr)
        eye = jnp.eye(n, dtype=Sd.dtype)
        S_kk = mT(Linv) @ (eye + FPF) @ Linv
        S_kk = 0.5 * (S_kk + mT(S_kk))  # exact symmetry against rounding
        S_ka = -mT(Linv) @ left  # Σ_{k, k-1}: sub block at row k
        S_ck = -mT(right) @ Linv  # Σ_{k+1, k}: sub block at row k+1
        diag = jnp.stack([S_aa, S_kk], axis=1).reshape((-1, n, n))[:N]
        sub = jnp.stack([S_ka, S_ck], axis=1).reshape((-1, n, n))[: N - 1]
        Sd, Ss = diag, sub
    nan_if_bad = jnp.where(factor.ok, 1.0, jnp.nan).astype(Sd.dtype)
    return Sd * nan_if_bad, Ss * nan_if_bad


def forward(model, y, w):
    """Backend forward: assemble H x = g and solve it by cyclic reduction."""
    x, factor, _ = checked_solve(model, y, w, factor_solve, solve)
    return x, factor


PARALLEL = Backend(forward=forward, adjoint=solve, logdet=logdet, band_inverse=band_inverse)
