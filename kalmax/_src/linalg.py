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
barely use them). GPU and TPU keep the vendor solvers.

Larger blocks (rare: k > 32), and every block on GPU/TPU, go to LAPACK (or
the vendor solver) through two primitives, ``kalmax_lapack_cholesky`` and
``kalmax_lapack_triangular_solve`` (bottom of this module): the only calls of
a decomposition library in the package. Their CPU lowering issues the batch in
chunks that each stay below the inline bound (:func:`_lapack_in_chunks`), so
no call ever schedules work on the pool. They are primitives, not functions,
because of ``vmap``: a chunk loop written in JAX gains the vmapped axis inside
every chunk, so a vmapped caller handed LAPACK (vmap size × chunk) matrices
per call and hung again (T = 66,000, batch 4, the parallel path's
gradient). The primitives' batching rule instead folds the mapped axis into
the leading batch, so the chunking sees the whole batch at any vmap depth;
their own JVP and transpose rules keep jit, grad, jvp and second derivatives.
(``jax.custom_batching.custom_vmap`` would give the batching but has no
reverse mode, and a ``custom_vjp`` around it no forward mode, which the
observed information of ``fitting.py`` needs.)

Outside this module only two decompositions remain, each of one small
parameter-space matrix and never of a time-indexed batch: the eigenvalues of
the observed information (``fitting.py``) and the SVD of the nuclear-norm
prox (``prox.py``). Under a user's ``vmap`` their batch is the vmap size.
``tests/test_linalg.py`` checks that no other module calls one.

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
from jax import core, lax
from jax.extend.core import Primitive
from jax.interpreters import ad, batching, mlir

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
    L = _lapack_cholesky_p.bind(0.5 * (S + mT(S)))
    # LAPACK leaves zeros above the diagonal of a failed factor: NaN throughout,
    # as the written-out factor.
    good = jnp.all(jnp.isfinite(jnp.diagonal(L, axis1=-2, axis2=-1)), axis=-1)
    return jnp.where(good[..., None, None], L, jnp.nan)


def _column(X, j):
    """X[..., :, j] for a traced j."""
    return lax.dynamic_index_in_dim(X, j, axis=X.ndim - 1, keepdims=False)


def _row(X, i):
    """X[..., i, :] for a traced i."""
    return lax.dynamic_index_in_dim(X, i, axis=X.ndim - 2, keepdims=False)


@jax.custom_jvp
def _chol_columns(S):
    if _straight(S.ndim, S.shape[-1]):
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


# A batch of small blocks (the per-step whitening factors of T steps, and
# their tangents under jax.hessian's batch of directions) is also straight-line
# code up to this size: one fused elementwise program over the batch, where
# the column loop would run k iterations, each re-reading and re-writing the
# whole batch-sized carry (measured: the prediction-error Hessian at
# T = 10⁴, n = 4 spent most of its time in such loops).
BATCH_STRAIGHT_MAX = 8


def _straight(ndim: int, k: int) -> bool:
    return k <= (STRAIGHT_MAX if ndim == 2 else BATCH_STRAIGHT_MAX)


def _chol_straight(S):
    # Column j of L from column j of A minus the earlier columns' outer
    # products (Golub & Van Loan Alg. 4.2.1, left-looking), over a batch.
    k = S.shape[-1]
    A = 0.5 * (S + mT(S))
    cols = []
    rows = jnp.arange(k)
    good = jnp.ones(S.shape[:-2], bool)
    for j in range(k):
        v = A[..., :, j]
        for m in range(j):
            v = v - cols[m] * cols[m][..., j:j + 1]
        d = jnp.sqrt(v[..., j])
        good = good & (d > 0)
        cols.append(jnp.where(rows > j, v / d[..., None], jnp.where(rows == j, d[..., None], 0)))
    return jnp.where(good[..., None, None], jnp.stack(cols, axis=-1), jnp.nan)


def _lsolve_straight(L, B, transpose):
    k = L.shape[-1]
    X = [None] * k
    for i in (range(k - 1, -1, -1) if transpose else range(k)):
        r = B[..., i, :]
        for j in (range(i + 1, k) if transpose else range(i)):
            r = r - (L[..., j, i] if transpose else L[..., i, j])[..., None] * X[j]
        X[i] = r / L[..., i, i][..., None]
    return jnp.stack(X, axis=-2)


def _chol_loop(S):
    # Outer-product (right-looking) form: step j takes column j of the
    # trailing Schur complement as column j of L and subtracts its outer
    # product. Each step is a few elementwise operations over the whole batch
    # (one loop body, so compile time does not grow with k), and reverse mode
    # keeps only the columns, because the update is linear in A.
    # In place: the update leaves row and column j alone (c_j = 0), and no
    # later step reads column j, so L's column j (zeros above the diagonal)
    # overwrites it. One batch-sized loop carry instead of two: the batched
    # factorisations of the parallel path are memory-bound at large T.
    k = S.shape[-1]
    A = 0.5 * (S + mT(S))
    rows = jnp.arange(k)

    def step(j, carry):
        A, good = carry
        a = _column(A, j)
        d = jnp.sqrt(jnp.take(a, j, axis=-1))
        good = good & (d > 0)  # NaN and non-positive pivots both fail
        c = jnp.where(rows > j, a / d[..., None], 0)
        A = A - c[..., :, None] * c[..., None, :]
        A = lax.dynamic_update_index_in_dim(A, jnp.where(rows == j, d[..., None], c), j, axis=A.ndim - 1)
        return A, good

    good = manual_axes.like(jnp.ones(S.shape[:-2], bool), A)  # typed like the data under shard_map
    L, good = lax.fori_loop(0, k, step, (A, good))
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
        X = _lapack_triangular_solve_p.bind(L, cols, transpose=transpose)
        return jnp.moveaxis(X.reshape((k,) + B.shape[:-2] + B.shape[-1:]), 0, -2)
    batch = jnp.broadcast_shapes(L.shape[:-2], B.shape[:-2])
    L = jnp.broadcast_to(L, batch + L.shape[-2:])
    B = jnp.broadcast_to(B, batch + B.shape[-2:])
    return _lapack_triangular_solve_p.bind(L, B, transpose=transpose)


@partial(jax.custom_jvp, nondiff_argnums=(2,))
def _lsolve_columns(L, B, transpose):
    if _straight(max(L.ndim, B.ndim), L.shape[-1]):
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

    # In place: the update leaves row i of B alone (col_i = 0) and no later
    # step reads it, so x_i overwrites it; one batch-sized loop carry.
    def step(s, B):
        i = k - 1 - s if transpose else s
        Lii = jnp.take(jnp.diagonal(L, axis1=-2, axis2=-1), i, axis=-1)
        x = _row(B, i) / Lii[..., None]
        if transpose:  # Lᵀ's column i is L's row i; rows above i remain
            col = jnp.where(rows < i, _row(L, i), 0)
        else:
            col = jnp.where(rows > i, _column(L, i), 0)
        B = B - col[..., :, None] * x[..., None, :]
        return lax.dynamic_update_index_in_dim(B, x, i, axis=B.ndim - 2)

    return lax.fori_loop(0, k, step, B)


# --- LAPACK for blocks above WRITTEN_OUT_MAX (and on GPU/TPU) -----------------
#
# Two primitives, a batched Cholesky factorisation and a batched lower-
# triangular solve, are the only way this package reaches a decomposition
# library. Operands carry equal leading batch shapes (the wrappers above
# broadcast them). What makes them primitives rather than plain functions is
# vmap: their batching rule moves the vmapped axis into the leading batch and
# binds the same primitive again, so the lowering always sees the whole batch
# — vmap size × inner batch, for nested vmaps the product of all of them — and
# on CPU issues it through _lapack_in_chunks. A plain function chunked with
# lax.map gains the vmap axis inside every chunk, so a vmapped caller would
# hand LAPACK B × chunk matrices at once, and did, and hung
# (seen at T = 66,000, B = 4, n = 2 with the written-out code switched off:
# two pool threads in lapack_dtrsm_ffi → ParallelBatchMap →
# BlockingCounter::Wait, the main thread in BlockUntilReady).
#
# Why not jax.custom_batching.custom_vmap: it has no reverse mode, and the
# custom_vjp that would have to wrap it has no forward mode, which the
# observed-information Hessian (fitting.py, forward-over-reverse) needs. A
# primitive carries its own JVP (written with the two primitives, so second
# derivatives follow) and the transpose of the solve in its right-hand side
# (the solve with the other transpose flag), so jit, vmap, grad, jvp and
# their compositions all reach the chunked lowering.
#
# Only the CPU lowering chunks: the deadlock is the CPU runtime's, and on
# GPU/TPU a loop over chunks would only serialise the vendor solvers.

def _cholesky_plain(S):
    return lax.linalg.cholesky(S, symmetrize_input=False)


def _triangular_solve_plain(L, B, *, transpose):
    return lax.linalg.triangular_solve(L, B, left_side=True, lower=True, transpose_a=transpose)


def _cholesky_cpu(S):
    k = S.shape[-1]
    return _lapack_in_chunks(_cholesky_plain, (S,), k**3 // 3)


def _triangular_solve_cpu(L, B, *, transpose):
    k = L.shape[-1]
    return _lapack_in_chunks(partial(_triangular_solve_plain, transpose=transpose), (L, B), k * k * B.shape[-1])


def _chunk_size(cost: int) -> int:
    # Matrices per LAPACK call on CPU, for a per-matrix work estimate `cost`.
    return max(1, _INLINE_WORK // max(1, cost))


def _lapack_in_chunks(fn, operands, cost):
    """fn over the leading batch of the operands, in chunks small enough to stay inline.

    The one place that issues LAPACK on CPU (the lowering of both primitives).
    cost: jaxlib's work estimate per matrix (k³/3 for Cholesky, k²m for a solve
    with m right-hand sides, read off the jaxlib 0.10.2 kernels). Operands
    share their leading batch shape.
    """
    lead = operands[0].shape[:-2]
    batch = math.prod(lead)
    chunk = _chunk_size(cost)
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


def _eager(cpu_fn, plain_fn):
    # Outside jit the primitives run their implementation op by op.
    return lambda *args, **params: (cpu_fn if jax.default_backend() == "cpu" else plain_fn)(*args, **params)


def _same_shape(x, **_):
    return core.ShapedArray(x.shape, x.dtype)


def _solution_shape(L, B, **_):
    return core.ShapedArray(B.shape, B.dtype)


def _batch_into_lead(primitive):
    # vmap: the mapped axis becomes the first batch axis of every operand
    # (broadcast where an operand is not mapped), then the same primitive again.
    def rule(args, dims, **params):
        size = next(a.shape[d] for a, d in zip(args, dims) if d is not None)
        args = [jnp.broadcast_to(a, (size,) + a.shape) if d is None else jnp.moveaxis(a, d, 0)
                for a, d in zip(args, dims)]
        return primitive.bind(*args, **params), 0
    return rule


_lapack_cholesky_p = Primitive("kalmax_lapack_cholesky")
_lapack_cholesky_p.def_impl(_eager(_cholesky_cpu, _cholesky_plain))
_lapack_cholesky_p.def_abstract_eval(_same_shape)
mlir.register_lowering(_lapack_cholesky_p, mlir.lower_fun(_cholesky_plain, multiple_results=False))
mlir.register_lowering(_lapack_cholesky_p, mlir.lower_fun(_cholesky_cpu, multiple_results=False), platform="cpu")
batching.primitive_batchers[_lapack_cholesky_p] = _batch_into_lead(_lapack_cholesky_p)

_lapack_triangular_solve_p = Primitive("kalmax_lapack_triangular_solve")
_lapack_triangular_solve_p.def_impl(_eager(_triangular_solve_cpu, _triangular_solve_plain))
_lapack_triangular_solve_p.def_abstract_eval(_solution_shape)
mlir.register_lowering(_lapack_triangular_solve_p,
                       mlir.lower_fun(_triangular_solve_plain, multiple_results=False))
mlir.register_lowering(_lapack_triangular_solve_p,
                       mlir.lower_fun(_triangular_solve_cpu, multiple_results=False), platform="cpu")
batching.primitive_batchers[_lapack_triangular_solve_p] = _batch_into_lead(_lapack_triangular_solve_p)


def _cholesky_jvp(primals, tangents):
    # dL = L Φ(L⁻¹ dS L⁻ᵀ), as for the written-out factor; S arrives symmetric.
    (S,), (dS,) = primals, tangents
    L = _lapack_cholesky_p.bind(S)
    if type(dS) is ad.Zero:
        return L, jnp.zeros_like(L)
    dS = 0.5 * (dS + mT(dS))
    solve = partial(_lapack_triangular_solve_p.bind, transpose=False)
    X = solve(L, mT(solve(L, dS)))
    phi = jnp.tril(X) - 0.5 * X * jnp.eye(S.shape[-1], dtype=X.dtype)
    return L, L @ phi


def _triangular_solve_jvp(primals, tangents, *, transpose):
    # X = L⁻¹B (or L⁻ᵀB): dX = L⁻¹(dB − dL X) (or L⁻ᵀ(dB − dLᵀ X)). Only the
    # lower triangle of L is read, so only that of dL counts.
    (L, B), (dL, dB) = primals, tangents
    X = _lapack_triangular_solve_p.bind(L, B, transpose=transpose)
    if type(dL) is ad.Zero and type(dB) is ad.Zero:
        return X, jnp.zeros_like(X)
    rhs = ad.instantiate_zeros(dB)
    if type(dL) is not ad.Zero:
        dL = jnp.tril(dL)
        rhs = rhs - (mT(dL) if transpose else dL) @ X
    return X, _lapack_triangular_solve_p.bind(L, rhs, transpose=transpose)


def _triangular_solve_transpose(ct, L, B, *, transpose):
    # Linear in B only: B̄ = L⁻ᵀ X̄ (or L⁻¹ X̄).
    assert not ad.is_undefined_primal(L), "the solve is linear in its right-hand side only"
    if type(ct) is ad.Zero:
        return None, ad.Zero(B.aval)
    return None, _lapack_triangular_solve_p.bind(L, ct, transpose=not transpose)


ad.primitive_jvps[_lapack_cholesky_p] = _cholesky_jvp
ad.primitive_jvps[_lapack_triangular_solve_p] = _triangular_solve_jvp
ad.primitive_transposes[_lapack_triangular_solve_p] = _triangular_solve_transpose


def lsolve_vec(L, v, *, transpose: bool = False):
    """As :func:`lsolve` for vector right-hand sides v of shape (..., k)."""
    return lsolve(L, v[..., None], transpose=transpose)[..., 0]


def spd_inverse(S):
    """S⁻¹ for a (batch of) symmetric positive-definite matrices, through :func:`chol`."""
    L = chol(S)
    eye = jnp.broadcast_to(jnp.eye(S.shape[-1], dtype=S.dtype), L.shape)
    Linv = lsolve(L, eye)
    return gram(Linv)


def psd_within(S, slack):
    """True for each symmetric block of S (…, k, k) whose smallest eigenvalue exceeds −slack (…,).

    Tested by a Cholesky factorisation of S + slack·I through :func:`chol`
    (the written-out or chunked route, not a batched LAPACK eigensolver):
    S + slack·I is positive definite exactly when λ_min(S) > −slack, and
    :func:`chol` returns NaN where it is not. Rounding moves the verdict only
    for λ_min within a few eps·|S| of −slack.
    """
    k = S.shape[-1]
    sym = 0.5 * (S + mT(S))
    shifted = sym + slack[..., None, None] * jnp.eye(k, dtype=S.dtype)
    return jnp.all(jnp.isfinite(jnp.diagonal(chol(shifted), axis1=-2, axis2=-1)), axis=-1)


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
