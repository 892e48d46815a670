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
stability for symmetric positive-definite H. log|H| = 2 Σ log diag(L) over
all levels.

What is stored. Each level keeps L_k of its eliminated blocks and S, the
sub-diagonal blocks of the level's own system — not Wl, Wr. Any further solve
(the forward answer, refinement, the adjoint solve of the backward pass)
applies them to vectors, with u_k = D_k⁻¹ g_k = L_k⁻ᵀ L_k⁻¹ g_k:

    g'_i = g_{2i} − S_{2i}ᵀ u_{2i+1} − S_{2i−1} u_{2i−1},
    x_k  = L_k⁻ᵀ L_k⁻¹ (g_k − S_{k−1} x_{k−1} − S_kᵀ x_{k+1})

(Wlᵀz = S_{k−1}ᵀ L⁻ᵀ z and Wl x = L⁻¹ S_{k−1} x): two triangular solves per
eliminated block and sweep instead of one, O(n²) each, against the O(n³)
factorisation. The finest level's S is the model's own sub-diagonal, one
shared (n, n) block when A and Q do not vary in time.

Memory per time step, in units of n² numbers (800 B at n = 10, float64),
with XLA's temporary-buffer estimate per step of the compiled programs
(`benchmarks/RESULTS.md`, "Memory of the parallel path"):

    before  stored L, Wl, Wr (3 per step, T/2 + T/4 + … eliminated blocks)
            + at the first level: the shared S broadcast to T blocks (1),
            [S_even, S_oddᵀ] concatenated (1), the substitution's two loop
            carries for W (2), all four n×n blocks of [Wl Wr]ᵀ[Wl Wr] (2),
            Wl and Wr sliced out of W (1), the Cholesky loop's two carries
            (1), the assembled diagonal kept to the last level by the pivot
            check (1): 8148 B/step forward (T = 4096), 8897 value-and-gradient
            (T = 65536).
    after   stored L (½ at the first level, ¼, …) and S (shared at the first
            level; N_j blocks at level j ≥ 2, ½ + ¼ + …): 2 per step (3 with
            a time-varying A or Q); the whitened couplings are transient
            (½ each at the first level, one loop carry each: the
            substitution and the Cholesky factorisation work in place,
            ``linalg.py``); the next level's S is the product −Wrᵀ Wl itself
            (Wr computed negated, exactly), with one unused last block rather
            than a sliced copy; D' is one fused reduction rather than two
            products and a difference; D is split into its kept and
            eliminated halves at the start of a level: 3218 B/step forward,
            3833 value-and-gradient (T = 4096; "scan": 4522 and 4914).

The sequential factor ("scan") also stores 2 n² per step (L and M).
Why not ``jax.checkpoint`` at level boundaries instead: the backward pass
here is one solve with the stored factor (``primitive.py``), not autodiff
through the levels, so there is no tape to checkpoint; what the program
holds is the factor and the first level's transients, which only a smaller
factor and in-place loops reduce. The price is the extra triangular solve
per block and sweep in every solve (refinement and the adjoint solve
included); see ``benchmarks/RESULTS.md`` for the measured time.

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

from ..linalg import chol, cross, lsolve, lsolve_vec, matvec, mT
from ..tolerances import pivot_tolerance
from .base import Backend, checked_solve


class ReductionLevel(NamedTuple):
    """What one level of cyclic reduction keeps, for N blocks entering it and m = ⌈N/2⌉ eliminated.

    L: (m, n, n) Cholesky factors of the eliminated diagonal blocks (an
    identity for the padding block of an odd N);
    S: the sub-diagonal blocks S_j = H'_{j+1,j} of the level's own system:
    at the finest level the model's, (N − 1, n, n) or one shared (n, n)
    block when time-invariant; at coarser levels (N, n, n), the last block
    unused (it couples the last block to nothing; every reader stops before
    it or multiplies it by zero).
    The whitened couplings Wl, Wr are not kept: the solves apply S and L⁻¹
    to vectors instead (module docstring, "Memory").
    """

    L: object
    S: object


@dataclasses.dataclass(frozen=True)
class ReductionFactor:
    """The cyclic-reduction factor of H: levels from finest (T/2 blocks) to coarsest.

    levels: tuple of :class:`ReductionLevel`; root: (n, n) Cholesky factor of
    the last remaining block; ok: scalar bool, False when a pivot collapsed;
    sizes: (static) number of blocks N entering each level, finest first — an
    eliminated count m may come from 2m or 2m − 1 blocks, so it is recorded.
    """

    levels: Tuple[ReductionLevel, ...]
    root: object
    ok: object
    sizes: Tuple[int, ...]


jax.tree_util.register_dataclass(ReductionFactor, data_fields=["levels", "root", "ok"], meta_fields=["sizes"])


def _pad_to(a, size, fill=0):
    """Append blocks (or vectors) equal to `fill` to a stack, up to `size` of them."""
    extra = size - a.shape[0]
    if extra == 0:
        return a
    pad = jnp.broadcast_to(jnp.asarray(fill, a.dtype), (extra,) + a.shape[1:])
    return jnp.concatenate([a, pad], axis=0)


def _shift_right(a):
    """b[0] = 0, b[i] = a[i-1]: the contribution of eliminated block 2i−1 to kept block 2i."""
    return jnp.concatenate([jnp.zeros_like(a[:1]), a[:-1]], axis=0)


def _interleave(kept, odd, N):
    """Blocks 0..N−1 from the kept (even) and eliminated (odd) ones."""
    return jnp.stack([kept, odd], axis=1).reshape((-1,) + kept.shape[1:])[:N]


def _couplings(S, parity, m):
    """S_{2i+parity} for i < m, zero past the end of S: (m, n, n), or the shared (n, n) block."""
    if S.ndim == 2:
        return S
    return _pad_to(S[parity::2], m)


def _apply(S, parity, v, *, transpose):
    """S_{2i+parity} v_i (or S_{2i+parity}ᵀ v_i) for i < len(v), zero past the end of S.

    Per-block S: written as a product and a sum rather than a dot, so that XLA
    fuses the strided slice of S into the reduction and no stack of blocks is
    copied (module docstring, "Memory").
    """
    if S.ndim == 2:
        return matvec(mT(S) if transpose else S, v)
    Ss = S[parity::2][: v.shape[0]]
    vs = v[: Ss.shape[0]]
    out = jnp.sum(Ss * vs[:, :, None], axis=-2) if transpose else jnp.sum(Ss * vs[:, None, :], axis=-1)
    return _pad_to(out, v.shape[0])


def _pivot_ratios(L, h):
    # As in blocktri: squared pivots relative to the *original* diagonal of H,
    # so a Schur complement that cancelled to rounding level is caught.
    d = jnp.diagonal(L, axis1=-2, axis2=-1)
    return jnp.min(d * d / jnp.where(h > 0, h, 1))


def reduce(diag, sub, pivot_tol=None):
    """The cyclic-reduction factor of H, without a solve.

    Args:
        diag: (T, n, n) diagonal blocks of H (symmetric positive definite H).
        sub: (T-1, n, n) or (n, n) sub-diagonal blocks H_{t+1,t}.
        pivot_tol: as in ``blocktri.factor_solve``.
    """
    n, dtype = diag.shape[-1], diag.dtype
    eye = jnp.eye(n, dtype=dtype)
    # Original diagonal entries of H per block (padding blocks: 1, identity).
    # Materialised here: fused into every level's pivot check it would keep all of diag alive to the end.
    h = jax.lax.optimization_barrier(jnp.diagonal(diag, axis1=-2, axis2=-1))
    D, S = diag, sub
    levels, sizes = [], []
    ratio = jnp.asarray(jnp.inf, dtype)
    while D.shape[0] > 1:
        N = D.shape[0]
        m = (N + 1) // 2  # eliminated blocks (with a padding block when N is odd) = kept blocks
        # Split D into its own two halves now, so that the whole of D is not
        # held until the kept half is consumed at the end of the level.
        D_kept, D_odd = jax.lax.optimization_barrier((D[0::2], _pad_to(D[1::2], m, eye)))
        Lo = chol(D_odd)
        ratio = jnp.minimum(ratio, _pivot_ratios(Lo, _pad_to(h[1::2], m, 1)))
        levels.append(ReductionLevel(Lo, S))
        sizes.append(N)
        # The whitened couplings are transient: Wl_k = L_k⁻¹ S_{k-1} and
        # Wr_k = L_k⁻¹ S_kᵀ, the latter computed negated (exactly: a
        # substitution commutes with the sign) so that −Wr_kᵀ Wl_k, the next
        # level's S, is a product's own output and not a copy of one.
        Wl = lsolve(Lo, _couplings(S, 0, m))
        neg_Wr = lsolve(Lo, -mT(_couplings(S, 1, m)))
        # A padding block (odd N) couples to nothing: mask its term, since a
        # shared S (or the unused last block of S, below) is not zero there.
        # S'_i couples kept 2i and 2i+2 for i < m − 1; the last block
        # (eliminated block without a right neighbour) is carried along
        # unused: every reader stops before it, or multiplies it by zero.
        S = cross(neg_Wr, Wl)
        # D' = D_kept − Σ_r (Wl_r Wl_rᵀ + Wr_r Wr_rᵀ) over the rows r of the
        # couplings (the next eliminated block's Wl, the previous one's Wr),
        # as one reduction: two products and their difference would each be
        # a stack of blocks in memory.
        Wl_kept = Wl * (jnp.arange(m) < m - 1).astype(dtype)[:, None, None] if N % 2 else Wl
        Wr_prev = _shift_right(neg_Wr)
        D = D_kept - jnp.sum(Wl_kept[:, :, :, None] * Wl_kept[:, :, None, :]
                             + Wr_prev[:, :, :, None] * Wr_prev[:, :, None, :], axis=1)
        h = h[0::2]
    root = chol(D[0])
    ratio = jnp.minimum(ratio, _pivot_ratios(root, h[0]))
    ok = ratio > (pivot_tolerance(dtype, n) if pivot_tol is None else pivot_tol)
    return ReductionFactor(levels=tuple(levels), root=root, ok=ok, sizes=tuple(sizes))


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
    factor = reduce(diag, sub, pivot_tol)
    return solve(factor, rhs), factor


def solve(factor: ReductionFactor, rhs):
    """Solve H x = rhs with a stored cyclic-reduction factor: O(T n²) work, O(log T) depth.

    Per level (u = D_o⁻¹ g_o = L⁻ᵀL⁻¹ g_o on the eliminated blocks):
        g'_i = g_{2i} − S_{2i}ᵀ u_i − S_{2i−1} u_{i−1},
        x_{2i+1} = L⁻ᵀL⁻¹ (g_{2i+1} − S_{2i} x_{2i} − S_{2i+1}ᵀ x_{2i+2}),
    the formulas of the module docstring with Wl, Wr written out.
    """
    g, odds = rhs, []
    for level, N in zip(factor.levels, factor.sizes):
        m = level.L.shape[0]
        go = _pad_to(g[1::2], m)
        u = lsolve_vec(level.L, lsolve_vec(level.L, go), transpose=True)
        g = g[0::2] - _apply(level.S, 0, u, transpose=True) - _shift_right(_apply(level.S, 1, u, transpose=False))
        odds.append(go)
    x = lsolve_vec(factor.root, lsolve_vec(factor.root, g[0]), transpose=True)[None]
    for level, N, go in zip(reversed(factor.levels), reversed(factor.sizes), reversed(odds)):
        x_right = _pad_to(x[1:], x.shape[0])
        r = go - _apply(level.S, 0, x, transpose=False) - _apply(level.S, 1, x_right, transpose=True)
        xo = lsolve_vec(level.L, lsolve_vec(level.L, r), transpose=True)
        x = _interleave(x, xo, N)
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
        # F = [Wl, Wr], recomputed from the stored S (a padding block's rows are cut below).
        Wl = lsolve(level.L, _couplings(level.S, 0, m))
        Wr = lsolve(level.L, mT(_couplings(level.S, 1, m)))
        left = Wl @ S_aa + Wr @ S_ca  # F P[:, a]
        right = Wl @ mT(S_ca) + Wr @ S_cc  # F P[:, c]
        FPF = left @ mT(Wl) + right @ mT(Wr)
        eye = jnp.eye(n, dtype=Sd.dtype)
        S_kk = mT(Linv) @ (eye + FPF) @ Linv
        S_kk = 0.5 * (S_kk + mT(S_kk))  # exact symmetry against rounding
        S_ka = -mT(Linv) @ left  # Σ_{k, k-1}: sub block at row k
        S_ck = -mT(right) @ Linv  # Σ_{k+1, k}: sub block at row k+1
        Sd, Ss = _interleave(S_aa, S_kk, N), _interleave(S_ka, S_ck, N - 1)
    nan_if_bad = jnp.where(factor.ok, 1.0, jnp.nan).astype(Sd.dtype)
    return Sd * nan_if_bad, Ss * nan_if_bad


def forward(model, y, w):
    """Backend forward: assemble H x = g and solve it by cyclic reduction."""
    x, factor, _ = checked_solve(model, y, w, factor_solve, solve)
    return x, factor


PARALLEL = Backend(forward=forward, adjoint=solve, logdet=logdet, band_inverse=band_inverse)
