r"""Baselines the compiled kernel is compared against (benchmarks only).

(3) ``scan_smoother``: what a JAX user would write without kalmax — a
    covariance-form Kalman filter and Rauch–Tung–Striebel smoother in
    ``lax.scan``, differentiated by plain reverse-mode autodiff (the tape keeps
    every step's covariances).
(4) ``KKTSystem``: the equality-constrained least-squares form of the same
    problem, solved by a general sparse LU (SciPy ``splu``), with the adjoint
    solve reusing the factors.

Both handle the benchmark models: time-invariant A, C, Q, R (dense), offsets
optional, a proper Gaussian prior on x_0, and missing measurement entries with
a full R.
"""

from __future__ import annotations

import numpy as np
import jax
import jax.numpy as jnp
from jax import lax
import scipy.sparse as sp
import scipy.sparse.linalg as spla


# ---------------------------------------------------------------------------
# (3) covariance-form Kalman filter + RTS smoother under lax.scan


def _masked_update_terms(C, R, d, y_t, w_t):
    """Measurement model restricted to the observed entries without ragged shapes.

    Missing rows of C are zeroed and R is replaced by (w wᵀ)∘R + diag(1 − w):
    the missing entries then carry a unit-variance pseudo-measurement of 0 that
    is independent of the state, which leaves the update unchanged.
    """
    Cw = w_t[:, None] * C
    Rw = (w_t[:, None] * w_t[None, :]) * R + jnp.diag(1 - w_t)
    innov_target = jnp.where(w_t > 0, y_t - d, 0.0)
    return Cw, Rw, innov_target


class _Lapack:
    """Cholesky and solves as a JAX user would write them (jaxlib's LAPACK on CPU)."""

    cho_factor = staticmethod(lambda S: jax.scipy.linalg.cho_factor(S, lower=True))
    cho_solve = staticmethod(jax.scipy.linalg.cho_solve)
    tri_solve = staticmethod(lambda L, v: jax.scipy.linalg.solve_triangular(L, v, lower=True))


class _WrittenOut:
    """The same through kalmax's written-out decompositions.

    jaxlib 0.10.2's batched CPU LAPACK deadlocks the thread pool when vmap
    makes the per-step factorisations a large batch (observed here for this
    baseline at B = 256, n = 16: two ``lapack_strsm_ffi`` calls blocked in
    ``ParallelBatchMap``); the ML-regime cells use this variant so that the
    baseline finishes at all.
    """

    @staticmethod
    def cho_factor(S):
        from kalmax._src.linalg import chol
        return chol(S), True

    @staticmethod
    def cho_solve(c, B):
        from kalmax._src.linalg import lsolve
        L = c[0]
        return lsolve(L, lsolve(L, B), transpose=True)

    @staticmethod
    def tri_solve(L, v):
        from kalmax._src.linalg import lsolve_vec
        return lsolve_vec(L, v)


SOLVERS = {"lapack": _Lapack, "written-out": _WrittenOut}


def scan_smoother(A, C, Q, R, b, d, m0, P0, y, w, solver="lapack"):
    """Smoothed means (T, n) by Kalman filter + RTS smoother (covariance form)."""
    la = SOLVERS[solver]
    def filter_step(carry, inputs):
        m_pred, P_pred = carry
        y_t, w_t = inputs
        Cw, Rw, target = _masked_update_terms(C, R, d, y_t, w_t)
        S = Cw @ P_pred @ Cw.T + Rw
        cS = la.cho_factor(S)
        K = la.cho_solve(cS, Cw @ P_pred).T  # P Cᵀ S⁻¹
        m_f = m_pred + K @ (target - Cw @ m_pred)
        P_f = P_pred - K @ S @ K.T
        P_f = 0.5 * (P_f + P_f.T)
        m_next = A @ m_f + b
        P_next = A @ P_f @ A.T + Q
        return (m_next, P_next), (m_f, P_f, m_next, P_next)

    _, (m_f, P_f, m_p, P_p) = lax.scan(filter_step, (m0, P0), (y, w))

    def smooth_step(carry, inputs):
        m_s_next, P_s_next = carry
        m_f_t, P_f_t, m_p_next, P_p_next = inputs
        cP = la.cho_factor(P_p_next)
        G = la.cho_solve(cP, A @ P_f_t).T  # P_f Aᵀ P_pred⁻¹
        m_s = m_f_t + G @ (m_s_next - m_p_next)
        P_s = P_f_t + G @ (P_s_next - P_p_next) @ G.T
        return (m_s, P_s), m_s

    last = (m_f[-1], P_f[-1])
    _, m_s = lax.scan(smooth_step, last, (m_f[:-1], P_f[:-1], m_p[:-1], P_p[:-1]), reverse=True)
    return jnp.concatenate([m_s, m_f[-1:]], axis=0)


def scan_log_likelihood(A, C, Q, R, b, d, m0, P0, y, w, solver="lapack"):
    """log p(observed y) by a covariance-form Kalman filter under lax.scan.

    The prediction-error decomposition: Σ_t log N(y_K,t; C_K m_t|t-1 + d_K,
    C_K P_t|t-1 C_Kᵀ + R_KK). Missing entries enter as the unit-variance
    pseudo-measurements of ``_masked_update_terms``, whose log-density terms
    (−½ log 2π each, no dependence on the state) are removed again.
    """
    la = SOLVERS[solver]

    def step(carry, inputs):
        m, P, ll = carry
        y_t, w_t = inputs
        Cw, Rw, target = _masked_update_terms(C, R, d, y_t, w_t)
        S = Cw @ P @ Cw.T + Rw
        cS = la.cho_factor(S)
        v = target - Cw @ m
        K = la.cho_solve(cS, Cw @ P).T
        alpha = la.tri_solve(cS[0], v)
        ll = ll - 0.5 * jnp.sum(alpha**2) - jnp.sum(jnp.log(jnp.diagonal(cS[0]))) \
            - 0.5 * jnp.sum(w_t) * jnp.log(2 * jnp.pi)
        m_f = m + K @ v
        P_f = P - K @ S @ K.T
        P_f = 0.5 * (P_f + P_f.T)
        return (A @ m_f + b, A @ P_f @ A.T + Q, ll), None

    (_, _, ll), _ = lax.scan(step, (m0, P0, jnp.zeros((), y.dtype)), (y, w))
    return ll


# ---------------------------------------------------------------------------
# (4) KKT system of the equality-constrained form, sparse LU


def _inv_chol(S):
    L = np.linalg.cholesky(0.5 * (S + S.T))
    return np.linalg.solve(L, np.eye(S.shape[0]))  # L⁻¹: S⁻¹ = L⁻ᵀL⁻¹


def _block_rows(blocks_per_row, row0, col0s, B):
    """COO pieces placing the same dense block B at (row0 + k·r, col0s[k])."""
    r, c = B.shape
    ii, jj = np.nonzero(B)
    vals = B[ii, jj]
    K = len(col0s)
    rows = (row0 + np.arange(K)[:, None] * r + ii[None, :]).ravel()
    cols = (np.asarray(col0s)[:, None] + jj[None, :]).ravel()
    return rows, cols, np.tile(vals, K)


class KKTSystem:
    r"""min ½‖D z − c‖² subject to B z = y_K, with z = (x, y_all).

    D stacks P_0^{-½}(x_0), Q^{-½}(x_{t+1} − A x_t) and R^{-½}(y_t − C x_t)
    (whitened by inverse Cholesky factors; offsets move into c), and B
    selects the observed entries of y_all. Optimality:

        [[0, Dᵀ, Bᵀ], [D, −I, 0], [B, 0, 0]] [z; v; η] = [0; c; y_K].

    ``assemble`` builds the matrix (SciPy CSC), ``factor`` runs ``splu``,
    ``solve``/``adjoint`` reuse the factors (the KKT matrix is symmetric, so
    the adjoint system has the same matrix).
    """

    def __init__(self, A, C, Q, R, b, d, m0, P0, y, mask):
        A, C, Q, R = (np.asarray(a, float) for a in (A, C, Q, R))
        T, p = y.shape
        n = A.shape[0]
        self.T, self.n, self.p = T, n, p
        Wq, Wr, Wp = _inv_chol(Q), _inv_chol(R), _inv_chol(P0)
        nx, ny = T * n, T * p
        nz = nx + ny
        obs = np.flatnonzero(np.asarray(mask).ravel())
        self.obs = obs
        rows, cols, vals = [], [], []

        def add(piece):
            rows.append(piece[0])
            cols.append(piece[1])
            vals.append(piece[2])

        # D: prior rows [0, n), transition rows [n, n + (T-1)n), measurement rows after.
        add(_block_rows(1, 0, [0], Wp))
        r0 = n
        if T > 1:
            add(_block_rows(1, r0, np.arange(1, T) * n, Wq))
            add(_block_rows(1, r0, np.arange(0, T - 1) * n, -Wq @ A))
        r1 = n + (T - 1) * n
        add(_block_rows(1, r1, nx + np.arange(T) * p, Wr))
        add(_block_rows(1, r1, np.arange(T) * n, -Wr @ C))
        nd = r1 + T * p
        D = sp.csr_matrix(
            (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(nd, nz)
        )
        Bsel = sp.csr_matrix((np.ones(len(obs)), (np.arange(len(obs)), nx + obs)), shape=(len(obs), nz))
        self.K = sp.bmat(
            [[None, D.T, Bsel.T], [D, -sp.identity(nd), None], [Bsel, None, None]], format="csc"
        )
        c = np.zeros(nd)
        c[:n] = Wp @ np.asarray(m0, float)
        if b is not None and T > 1:
            c[r0:r1] = np.tile(Wq @ np.asarray(b, float), T - 1)
        if d is not None:
            c[r1:] = np.tile(Wr @ np.asarray(d, float), T)
        yk = np.asarray(y, float).ravel()[obs]
        self.rhs = np.concatenate([np.zeros(nz), c, yk])
        self.nx, self.nz, self.nd = nx, nz, nd
        self.lu = None

    def factor(self):
        self.lu = spla.splu(self.K)
        return self.lu

    def solve(self):
        """Smoothed means (T, n)."""
        sol = self.lu.solve(self.rhs)
        return sol[: self.nx].reshape(self.T, self.n)

    def adjoint(self, x_bar):
        """Solve with the same factors for a cotangent on the states."""
        rhs = np.zeros_like(self.rhs)
        rhs[: self.nx] = np.asarray(x_bar).ravel()
        return self.lu.solve(rhs)
