r"""Small batched linear algebra: the one place that issues matrix decompositions.

Every Cholesky factorisation and triangular solve of the package goes through
:func:`chol` and :func:`lsolve` (and the helpers built on them). Time-invariant
operands are (k, k) while time-varying ones carry a leading time axis; these
helpers accept either mix without broadcasting the time-invariant operand T
times where that can be avoided.

Why the decompositions of small blocks are written out here
-----------------------------------------------------------
The blocks of this package are small (k = state or measurement size, usually
≤ 16) and come in batches of T (10³–10⁶). jaxlib's CPU LAPACK kernels for a
batch (``lapack_?potrf_ffi``, ``lapack_?trsm_ffi``, and ``getrf`` behind
``inv``/``solve``) split a large batch into chunks, schedule every chunk on
XLA's intra-op thread pool and then *block the pool thread they run on* until
the chunks are done. XLA's CPU runtime runs independent operations of one
program concurrently on that same pool. When as many batched LAPACK calls run
at once as the pool has threads (2 on a 2-core machine), every pool thread
waits for chunks that no thread is free to run: the program hangs forever, at
0 % CPU. Observed here with jaxlib 0.10.2 (``gdb``: two pool threads in
``jax::ParallelBatchMap`` → ``absl::BlockingCounter::Wait``, one from
``lapack_dpotrf_ffi`` and one from ``lapack_dtrsm_ffi``; the main thread in
``BlockUntilReady``). The kernels stay inline (no scheduling) while
batch × k³/3 < 2·10⁵, which is why small tests never saw it and the
likelihood gradient at n = 10 hung from T ≈ 10³, and at n = 1 from T ≈ 10⁵.
Whether it hangs depends on how the runtime happens to overlap the calls, so
another process loading the CPU makes it far more likely.

The cure at the root is not to issue batched LAPACK calls for small blocks at
all. On CPU, for k ≤ :data:`WRITTEN_OUT_MAX`, the factorisation and the
substitutions are written as a loop of k column (row) steps, each one
elementwise arithmetic over the whole batch: plain XLA operations that never
call LAPACK and never block a thread, and that ``jit`` and ``vmap`` (which
would otherwise turn even a single matrix into a LAPACK batch) handle
natively. Their derivatives are closed-form rules (``custom_jvp``: dL = L
Φ(L⁻¹dS L⁻ᵀ) for the factor, dX = L⁻¹(dB − dL X) for a solve), linear in the
tangents, so forward mode, reverse mode and second derivatives all work.
Run time is on a par with LAPACK for these block sizes; the price is
compilation: a program full of them compiles 2–3× slower than with one
LAPACK call each (the pure-JAX "scan" path; the compiled kernel's paths
barely use them). GPU and TPU keep the vendor solvers. Larger blocks (rare: k > 32) keep LAPACK, issued in chunks that each
stay below the inline bound, so no call ever schedules work on the pool; under
``vmap`` such a chunk gains the batch axis, which is the one remaining way to
reach the jaxlib bug (documented in the README's limits).

Numerics: the column-by-column Cholesky is the textbook algorithm (Golub &
Van Loan, *Matrix Computations*, 4th ed., Alg. 4.2.1), backward stable like
LAPACK's blocked version; substitutions are Alg. 3.1.1/3.1.2 of the same book.
A matrix that is not positive definite gives NaN in the whole factor, as
``jnp.linalg.cholesky`` does.
"""

from __future__ import annotations

import math
from functools import partial

import jax
import jax.numpy as jnp
from jax import lax

from . import manual_axes

# Blocks up to this size are factorised and solved by the elementwise code
# below: a loop over the k columns (rows), or straight-line code for one small
# block (STRAIGHT_MAX). Larger blocks (rare) stay on LAPACK, in chunks.
WRITTEN_OUT_MAX = 32

# jaxlib's batched LAPACK kernels run a batch inline (no thread-pool
# scheduling) while batch × (work per matrix) stays below 2·10⁵ (read off the
# kernels of jaxlib 0.10.2); chunks are sized to stay under half of that.
_INLINE_WORK = 100_000


def _written_out(k: int) -> bool:
    # Only the CPU runtime has the thread-pool hang; on GPU/TPU the vendor
    # solvers are kept (they compile faster than the loops here). The platform
    # is the default backend at trace time.
    return k <= WRITTEN_OUT_MAX and jax.default_backend() == "cpu"


def chol(S):
    """Lower Cholesky factor of a (batch of) symmetric positive-definite matrices.

    The input is symmetrised first, so derivatives are symmetric too. A matrix
    that is not positive definite yields NaN in the whole factor.
    S: (..., k, k).
    """
    k = S.shape[-1]
    if _written_out(k):
        return _chol_columns(S)
    return _lapack_in_chunks(lambda s: jnp.linalg.cholesky(s), (S,), k**3 // 3)


def _column(X, j):
    """X[..., :, j] for a traced j."""
    return lax.dynamic_index_in_dim(X, j, axis=X.ndim - 1, keepdims=False)


def _row(X, i):
    """X[..., i, :] for a traced i."""
    return lax.dynamic_index_in_dim(X, i, axis=X.ndim - 2, keepdims=False)


@jax.custom_jvp
def _chol_columns(S):
    if S.ndim == 2 and S.shape[-1] <= STRAIGHT_MAX:
        return _chol_straight(S)
    return _chol_loop(S)


@_chol_columns.defjvp
def _chol_columns_jvp(primals, tangents):
    # dL = L Φ(L⁻¹ dS L⁻ᵀ), Φ = lower triangle with half the diagonal (dS
    # symmetrised, as S is). Written with the solves below, so autodiff never
    # traces through the column loop: shorter programs, and the transpose of
    # this linear map is again two triangular solves.
    (S,), (dS,) = primals, tangents
    L = _chol_columns(S)
    dS = 0.5 * (dS + mT(dS))
    X = _lsolve_columns(L, mT(_lsolve_columns(L, dS, False)), False)  # L⁻¹ dS L⁻ᵀ
    k = S.shape[-1]
    phi = jnp.tril(X) - 0.5 * X * jnp.eye(k, dtype=X.dtype)
    return L, L @ phi


# One small block (a step inside a scan over time, typically) is factorised
# by straight-line code instead of a loop: a loop iteration costs more at run
# time than the few flops of a column of a tiny block.
STRAIGHT_MAX = 16


def _chol_straight(S):
    k = S.shape[-1]
    A = 0.5 * (S + S.T)
    cols = []
    rows = jnp.arange(k)
    good = jnp.ones((), bool)
    for j in range(k):
        v = A[:, j]
        for m in range(j):
            v = v - cols[m] * cols[m][j]
        d = jnp.sqrt(v[j])
        good = good & (d > 0)
        cols.append(jnp.where(rows > j, v / d, jnp.where(rows == j, d, 0)))
    return jnp.where(good, jnp.stack(cols, axis=1), jnp.nan)


def _lsolve_straight(L, B, transpose):
    k = L.shape[-1]
    X = [None] * k
    for i in (range(k - 1, -1, -1) if transpose else range(k)):
        r = B[i]
        for j in (range(i + 1, k) if transpose else range(i)):
            r = r - (L[j, i] if transpose else L[i, j]) * X[j]
        X[i] = r / L[i, i]
    return jnp.stack(X)


def _chol_loop(S):
    # Outer-product (right-looking) form: step j takes column j of the
    # trailing Schur complement as column j of L and subtracts its outer
    # product. Each step is a few elementwise operations over the whole batch
    # (one loop body, so compile time does not grow with k), and reverse mode
    # keeps only the columns, because the update is linear in A.
    k = S.shape[-1]
    A = 0.5 * (S + mT(S))
    rows = jnp.arange(k)

    def step(j, carry):
        A, L, good = carry
        a = _column(A, j)
        d = jnp.sqrt(jnp.take(a, j, axis=-1))
        good = good & (d > 0)  # NaN and non-positive pivots both fail
        c = jnp.where(rows > j, a / d[..., None], 0)
        A = A - c[..., :, None] * c[..., None, :]
        L = lax.dynamic_update_index_in_dim(L, jnp.where(rows == j, d[..., None], c), j, axis=L.ndim - 1)
        return A, L, good

    good = manual_axes.like(jnp.ones(S.shape[:-2], bool), A)  # typed like the data under shard_map
    _, L, good = lax.fori_loop(0, k, step, (A, jnp.zeros_like(A), good))
    return jnp.where(good[..., None, None], L, jnp.nan)


def lsolve(L, B, *, transpose: bool = False):
    """Solve L X = B (or Lᵀ X = B) for lower-triangular L and matrix right-hand sides.

    L: (k, k) or (..., k, k); B: (..., k, m). Batch axes broadcast.
    """
    k = L.shape[-1]
    if _written_out(k):
        batch = jnp.broadcast_shapes(L.shape[:-2], B.shape[:-2])
        return _lsolve_columns(L, jnp.broadcast_to(B, batch + B.shape[-2:]), transpose)
    if L.ndim == 2 and B.ndim > 2:
        # One L against a batch: all right-hand sides as columns of one solve (batch 1).
        cols = jnp.moveaxis(B, -2, 0).reshape(k, -1)
        X = lax.linalg.triangular_solve(L, cols, left_side=True, lower=True, transpose_a=transpose)
        return jnp.moveaxis(X.reshape((k,) + B.shape[:-2] + B.shape[-1:]), 0, -2)
    if L.ndim > B.ndim:
        B = jnp.broadcast_to(B, L.shape[:-2] + B.shape[-2:])
    elif B.ndim > L.ndim:
        L = jnp.broadcast_to(L, B.shape[:-2] + L.shape[-2:])
    solve = lambda l, b: lax.linalg.triangular_solve(  # noqa: E731
        l, b, left_side=True, lower=True, transpose_a=transpose)
    return _lapack_in_chunks(solve, (L, B), k * k * B.shape[-1])


@partial(jax.custom_jvp, nondiff_argnums=(2,))
def _lsolve_columns(L, B, transpose):
    if B.ndim == 2 and L.shape[-1] <= STRAIGHT_MAX:
        return _lsolve_straight(L, B, transpose)
    return _lsolve_loop(L, B, transpose)


@_lsolve_columns.defjvp
def _lsolve_columns_jvp(transpose, primals, tangents):
    # X = L⁻¹B (or L⁻ᵀB): dX = L⁻¹(dB − dL X) (or L⁻ᵀ(dB − dLᵀ X)); linear in
    # (dL, dB), so reverse mode transposes it into solves of the same kind.
    (L, B), (dL, dB) = primals, tangents
    X = _lsolve_columns(L, B, transpose)
    dLX = (mT(dL) if transpose else dL) @ X
    return X, _lsolve_columns(L, dB - dLX, transpose)


def _lsolve_loop(L, B, transpose):
    # Column-oriented substitution: once row i of X is known, its share is
    # removed from every row still to be solved (rows below for L X = B,
    # rows above for Lᵀ X = B), as one elementwise update over the batch.
    k = L.shape[-1]
    rows = jnp.arange(k)
    batch = jnp.broadcast_shapes(L.shape[:-2], B.shape[:-2])
    B = manual_axes.like(jnp.broadcast_to(B, batch + B.shape[-2:]), L)  # the carry is typed like L

    def step(s, carry):
        B, X = carry
        i = k - 1 - s if transpose else s
        Lii = jnp.take(jnp.diagonal(L, axis1=-2, axis2=-1), i, axis=-1)
        x = _row(B, i) / Lii[..., None]
        if transpose:  # Lᵀ's column i is L's row i; rows above i remain
            col = jnp.where(rows < i, _row(L, i), 0)
        else:
            col = jnp.where(rows > i, _column(L, i), 0)
        B = B - col[..., :, None] * x[..., None, :]
        X = lax.dynamic_update_index_in_dim(X, x, i, axis=X.ndim - 2)
        return B, X

    _, X = lax.fori_loop(0, k, step, (B, jnp.zeros_like(B)))
    return X


def _lapack_in_chunks(fn, operands, cost):
    """fn over the leading batch of the operands, in chunks small enough to stay inline.

    cost: jaxlib's work estimate per matrix (k³/3 for Cholesky, k²m for a solve
    with m right-hand sides, read off the jaxlib 0.10.2 kernels).
    """
    lead = operands[0].shape[:-2]
    batch = math.prod(lead)
    chunk = max(1, _INLINE_WORK // max(1, cost))
    if batch <= chunk:
        return fn(*operands)
    n_chunks = -(-batch // chunk)
    pad = n_chunks * chunk - batch
    flat = []
    for i, op in enumerate(operands):
        f = op.reshape((batch,) + op.shape[-2:])
        if pad:
            # Identity blocks for factors and matrices, zeros for right-hand sides:
            # well posed, and dropped after the loop.
            if i == 0:
                filler = jnp.broadcast_to(jnp.eye(op.shape[-1], dtype=op.dtype), (pad,) + op.shape[-2:])
            else:
                filler = jnp.zeros((pad,) + op.shape[-2:], op.dtype)
            f = jnp.concatenate([f, filler], axis=0)
        flat.append(f.reshape((n_chunks, chunk) + op.shape[-2:]))
    out = lax.map(lambda ops: fn(*ops), tuple(flat))
    out = out.reshape((n_chunks * chunk,) + out.shape[-2:])[:batch]
    return out.reshape(lead + out.shape[-2:])


def lsolve_vec(L, v, *, transpose: bool = False):
    """As :func:`lsolve` for vector right-hand sides v of shape (..., k)."""
    return lsolve(L, v[..., None], transpose=transpose)[..., 0]


def spd_inverse(S):
    """S⁻¹ for a (batch of) symmetric positive-definite matrices, through :func:`chol`."""
    L = chol(S)
    eye = jnp.broadcast_to(jnp.eye(S.shape[-1], dtype=S.dtype), L.shape)
    Linv = lsolve(L, eye)
    return gram(Linv)


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
