"""Small batched linear-algebra helpers shared by the solver modules.

Time-invariant operands are (k, k) while time-varying ones carry a leading
time axis; these helpers accept either mix without broadcasting the
time-invariant operand T times where that can be avoided.
"""

from __future__ import annotations

import math

import jax.numpy as jnp
from jax import lax


def chol(S):
    """Lower Cholesky factor of a (batch of) symmetric positive-definite matrices.

    The input is symmetrised first, so derivatives are symmetric too. A matrix
    that is not positive definite yields NaN (JAX's documented behaviour).
    """
    return jnp.linalg.cholesky(S)


def lsolve(L, B, *, transpose: bool = False):
    """Solve L X = B (or Lᵀ X = B) for lower-triangular L and matrix right-hand sides.

    L: (k, k) or (..., k, k); B: (..., k, m). A single L against a batch of
    right-hand sides is done as one solve with all of them as columns.
    """
    if L.ndim == 2 and B.ndim > 2:
        k = L.shape[0]
        cols = jnp.moveaxis(B, -2, 0).reshape(k, -1)
        X = lax.linalg.triangular_solve(L, cols, left_side=True, lower=True, transpose_a=transpose)
        return jnp.moveaxis(X.reshape((k,) + B.shape[:-2] + B.shape[-1:]), 0, -2)
    if L.ndim > B.ndim:
        B = jnp.broadcast_to(B, L.shape[:-2] + B.shape[-2:])
    elif B.ndim > L.ndim:
        L = jnp.broadcast_to(L, B.shape[:-2] + L.shape[-2:])
    batch = math.prod(L.shape[:-2])
    if batch > _MAX_BATCH:
        return _chunked_solve(L, B, transpose)
    return lax.linalg.triangular_solve(L, B, left_side=True, lower=True, transpose_a=transpose)


# jaxlib 0.10 on CPU can deadlock when the gradient of chained batched
# triangular solves runs with a batch above 2**16 (seen with T > 65,536 time
# steps). Batches past this size are solved in chunks under lax.map instead.
_MAX_BATCH = 2**15


def _chunked_solve(L, B, transpose):
    lead = L.shape[:-2]
    batch = math.prod(lead)
    n_chunks = -(-batch // _MAX_BATCH)
    pad = n_chunks * _MAX_BATCH - batch
    Lf = L.reshape((batch,) + L.shape[-2:])
    Bf = B.reshape((batch,) + B.shape[-2:])
    if pad:
        eye = jnp.broadcast_to(jnp.eye(L.shape[-1], dtype=L.dtype), (pad,) + L.shape[-2:])
        Lf = jnp.concatenate([Lf, eye], axis=0)
        Bf = jnp.concatenate([Bf, jnp.zeros((pad,) + B.shape[-2:], B.dtype)], axis=0)
    Lc = Lf.reshape((n_chunks, _MAX_BATCH) + L.shape[-2:])
    Bc = Bf.reshape((n_chunks, _MAX_BATCH) + B.shape[-2:])
    solve = lambda args: lax.linalg.triangular_solve(  # noqa: E731
        args[0], args[1], left_side=True, lower=True, transpose_a=transpose)
    X = lax.map(solve, (Lc, Bc)).reshape((n_chunks * _MAX_BATCH,) + B.shape[-2:])
    return X[:batch].reshape(lead + B.shape[-2:])


def lsolve_vec(L, v, *, transpose: bool = False):
    """As :func:`lsolve` for vector right-hand sides v of shape (..., k)."""
    return lsolve(L, v[..., None], transpose=transpose)[..., 0]


def mT(X):
    """Transpose the last two axes."""
    return jnp.swapaxes(X, -1, -2)


def matvec(M, v):
    """M v for M of shape (..., a, b) and v of shape (..., b), batch axes broadcast."""
    return jnp.einsum("...ij,...j->...i", M, v)


def gram(W):
    """Wᵀ W over the last two axes: positive semi-definite by construction."""
    return jnp.einsum("...ki,...kj->...ij", W, W)


def cross(W, V):
    """Wᵀ V over the last two axes."""
    return jnp.einsum("...ki,...kj->...ij", W, V)
