r"""Low-memory sequential backend ("scan-recompute"): recompute factors instead of storing them.

The "scan" backend keeps the block Cholesky factor (L_t and M_t, 2 n² numbers
per step) from the forward pass for the adjoint solve of the backward pass,
and its solve itself materialises them (back-substitution reads them in
reverse order). Here nothing of size O(T n²) survives a solve except the
assembled diagonal blocks H_tt:

* The solve is checkpointed: the steps are cut into ⌈T/K⌉ chunks of
  K ≈ √T steps. A first sweep factors and forward-substitutes, keeping only
  z_t (n numbers per step) and the carry L entering each chunk. A reverse
  sweep recomputes one chunk's L_t from its checkpoint and back-substitutes
  with the identity M_{t+1}ᵀ x_{t+1} = L_t⁻¹ H_{t+1,t}ᵀ x_{t+1}, so M is never
  stored either.
* The backward pass of the primitive re-assembles H from the model (which
  the VJP holds anyway) and runs the same checkpointed solve for the adjoint.

Cost: four factorisation sweeps per value-and-gradient instead of one (two
per solve, two solves). Memory per time step during a solve: the diagonal
blocks (n²), the sub-diagonal blocks only when A or Q vary in time (n²), and a
few n-vectors (right-hand side, z, x) — against 3 n² plus vectors for
"scan" (diagonal blocks, L, M), of which 2 n² stay alive between the forward
and backward passes. The log-determinant is computed in the forward sweep
and kept as a scalar. The band of H⁻¹ (log-likelihood gradients) is computed
with a full factorisation: that step is not low-memory.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import jax.numpy as jnp
from jax import lax

from .. import blocktri, manual_axes
from ..linalg import chol, lsolve, lsolve_vec, mT
from ..normal_equations import assemble
from ..tolerances import pivot_tolerance
from .base import Backend, checked_solve


class RecomputeFactor(NamedTuple):
    """What the low-memory backend keeps: the inputs to re-assemble H, log|H| and ok.

    model, y, w: the canonical problem (already held by the VJP, so no extra
    memory); logdet: scalar log|H|; ok: scalar bool.
    """

    model: object
    y: object
    w: object
    logdet: object
    ok: object


def default_chunk(T: int) -> int:
    """K ≈ √T: checkpoints (T/K of n² each) and one chunk's factors (K n²) balance."""
    return max(1, math.isqrt(max(T - 1, 0)) + 1)


def checkpointed_solve(diag, sub, rhs, chunk: int | None = None, pivot_tol=None):
    """Solve H x = rhs by block Cholesky without storing the factor.

    Args:
        diag: (T, n, n) diagonal blocks; sub: (T-1, n, n) or (n, n) blocks
            H_{t+1,t}; rhs: (T, n).
        chunk: steps per checkpoint (default ≈ √T).
        pivot_tol: as in ``blocktri.factor_solve``.

    Returns:
        (x (T, n), log|H|, ok): x is NaN when a pivot collapsed, as in
        ``blocktri.factor_solve``.
    """
    T, n = rhs.shape
    dtype = rhs.dtype
    K = default_chunk(T) if chunk is None else int(chunk)
    C = -(-T // K)
    tol = pivot_tolerance(dtype, n) if pivot_tol is None else pivot_tol
    zero_nn = jnp.zeros((n, n), dtype)

    def coupling(t):
        """H_{t,t-1} (zero for t = 0 and for padding steps t ≥ T)."""
        if sub.ndim == 2:
            Hs = sub
        else:
            Hs = lax.dynamic_index_in_dim(sub, jnp.clip(t - 1, 0, max(T - 2, 0)), keepdims=False) if T > 1 else zero_nn
        return jnp.where((t > 0) & (t < T), Hs, zero_nn)

    def factor_step(L_prev, t):
        # One block Cholesky step; padding steps (t ≥ T) leave the carry as is.
        tt = jnp.minimum(t, T - 1)
        D = lax.dynamic_index_in_dim(diag, tt, keepdims=False)
        M = mT(lsolve(L_prev, mT(coupling(t))))
        L = chol(D - M @ mT(M))
        return L, M, D

    def fwd_chunk(carry, c):
        def step(carry, i):
            L_prev, z_prev, ld, ratio = carry
            t = c * K + i
            active = t < T
            L, M, D = factor_step(L_prev, t)
            g = lax.dynamic_index_in_dim(rhs, jnp.minimum(t, T - 1), keepdims=False)
            z = lsolve_vec(L, g - M @ z_prev)
            d = jnp.diagonal(L)
            h = jnp.diagonal(D)
            r = jnp.min(d * d / jnp.where(h > 0, h, 1))
            new = (L, z, ld + 2 * jnp.sum(jnp.log(d)), jnp.minimum(ratio, r))
            carry = tuple(jnp.where(active, a, b) for a, b in zip(new, carry))
            return carry, z

        checkpoint = carry[0]
        carry, zs = lax.scan(step, carry, jnp.arange(K))
        return carry, (checkpoint, zs)

    init = (jnp.eye(n, dtype=dtype), jnp.zeros((n,), dtype), jnp.zeros((), dtype), jnp.asarray(jnp.inf, dtype))
    init = manual_axes.like(init, diag, sub, rhs)  # typed like the data under shard_map
    (_, _, ld, ratio), (checkpoints, zs) = lax.scan(fwd_chunk, init, jnp.arange(C))

    def bwd_chunk(v_next, xs):
        c, L_start, z_chunk = xs

        def refactor(L_prev, i):
            t = c * K + i
            L, _, _ = factor_step(L_prev, t)
            L = jnp.where(t < T, L, L_prev)
            return L, L

        _, Ls = lax.scan(refactor, L_start, jnp.arange(K))

        def back(v, xs):
            i, L, z = xs
            t = c * K + i
            # x_t = L_t⁻ᵀ (z_t − L_t⁻¹ H_{t+1,t}ᵀ x_{t+1}); v carries H_{t+1,t}ᵀ x_{t+1}.
            x = lsolve_vec(L, z - lsolve_vec(L, v), transpose=True)
            x = jnp.where(t < T, x, jnp.zeros_like(x))
            v_new = jnp.where(t < T, mT(coupling(t)) @ x, v)
            return v_new, x

        v, xs_chunk = lax.scan(back, v_next, (jnp.arange(K), Ls, z_chunk), reverse=True)
        return v, xs_chunk

    v_last = manual_axes.like(jnp.zeros((n,), dtype), zs)
    _, xs = lax.scan(bwd_chunk, v_last, (jnp.arange(C), checkpoints, zs), reverse=True)
    x = xs.reshape(C * K, n)[:T]
    ok = ratio > tol
    return jnp.where(ok, x, jnp.nan), ld, ok


def forward(model, y, w):
    """Backend forward: assemble, checkpointed solve; keep only the inputs, log|H| and ok."""
    x, blocks, _ = checked_solve(model, y, w, _blocks_factor_solve, _blocks_solve)
    return x, RecomputeFactor(model=model, y=y, w=w, logdet=blocks.logdet, ok=blocks.ok)


class _Blocks(NamedTuple):
    """What the forward pass's refinement solves with: H's blocks (alive anyway), log|H|, ok."""

    diag: object
    sub: object
    logdet: object
    ok: object


def _blocks_factor_solve(diag, sub, rhs, pivot_tol=None):
    x, ld, ok = checkpointed_solve(diag, sub, rhs, pivot_tol=pivot_tol)
    return x, _Blocks(diag, sub, ld, ok)


# Solves with a factor whose verdict is already known (blocks.ok, factor.ok)
# re-factor without a pivot check of their own (pivot_tol = −1 accepts every
# pivot) and take the stored verdict instead.


def _blocks_solve(blocks: _Blocks, v):
    x = checkpointed_solve(blocks.diag, blocks.sub, v, pivot_tol=-1.0)[0]
    return jnp.where(blocks.ok, x, jnp.nan)


def adjoint(factor: RecomputeFactor, v):
    """H⁻¹ v with H re-assembled and re-factored (the second factorisation)."""
    system = assemble(factor.model, factor.y, factor.w)
    x, _, _ = checkpointed_solve(system.diag, system.sub, v, pivot_tol=-1.0)
    return jnp.where(factor.ok, x, jnp.nan)


def logdet(factor: RecomputeFactor):
    return factor.logdet


def band_inverse(factor: RecomputeFactor):
    """The band of H⁻¹ via a full (stored) factorisation: O(T n²) memory."""
    system = assemble(factor.model, factor.y, factor.w)
    _, full = blocktri.factor_solve(system.diag, system.sub, system.rhs, pivot_tol=-1.0)
    return blocktri.selected_inverse(full._replace(ok=factor.ok))


RECOMPUTE = Backend(forward=forward, adjoint=adjoint, logdet=logdet, band_inverse=band_inverse)
