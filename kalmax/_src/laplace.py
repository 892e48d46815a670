r"""Laplace-approximate log-likelihood of a nonlinear and/or robust state-space model.

With x* the MAP path (``nonlinear.py``) and H = ∇²ₓJ(x*) the exact Hessian
(``nonlinear_model.hessian_blocks``), the Laplace approximation of
p(y) = ∫ p(x, y) dx is (Tierney & Kadane (1986), JASA 81(393) — from memory)

    log p(y) ≈ log p(x*, y) + (Tn/2) log 2π − ½ log|H|,

and −log p(x, y) = J(x) + ½ Σ_{t<T-1} log|2πQ_t| + Σ_t (½ log|R̃_t| + N_t log Z_ρ)
+ ½ log|2πP_0| (N_t observed entries at step t, Z_ρ the loss's normaliser,
``robust.py``; the P_0 term is absent for a flat prior, as in
``likelihood.py``). Collecting the 2π factors:

    log p(y) ≈ −J(x*) − ½ log|H| − ½ Σ log|Q_t| − ½ Σ log|R̃_t| − N_K log Z_ρ
               − ½ log|P_0| + (n − n_prior)/2 · log 2π,

n_prior = n with a prior, 0 without. For a linear model and squared loss this
is exact and equals ``kx.log_likelihood`` (Z = √(2π)); otherwise it is an
approximation. log|H| comes from the block Cholesky factor of H
(``blocktri``); NaN when H is not positive definite or the solve did not
converge.

Gradient: ordinary reverse-mode AD of this expression, with x*(θ) from the
solver's implicit VJP (by the envelope theorem ∇ₓJ(x*) = 0, so J needs only
its partial derivative, which AD finds by itself) and log|H| differentiated
through the per-step Hessians (third derivatives of f and h) and the block
Cholesky recursion. With a Huber loss, log|H| jumps where a residual
crosses the threshold (ρ'' does), so the approximation is only piecewise
smooth in θ.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Optional

import jax
import jax.numpy as jnp

from . import blocktri, tolerances
from .linalg import chol
from .nonlinear import _solve, prepare, settings
from .nonlinear_model import _chol_R, hessian_blocks, objective
from .primitive import resolve_method
from .robust import SquaredLoss


def _logdet_chol(L):
    return 2 * jnp.sum(jnp.log(jnp.diagonal(L, axis1=-2, axis2=-1)))


def laplace_log_likelihood(model, y, mask=None, *, loss=None, init=None, tol: Optional[float] = None,
                           max_iterations: int = 100, method: str = "auto"):
    """Laplace approximation of log p(observed y) (module docstring); differentiable.

    Arguments as :func:`smooth_nonlinear`. Returns a scalar: NaN when the
    smoother did not converge or the exact Hessian at the solution is not
    positive definite.

    Example:
        >>> import jax, jax.numpy as jnp, kalmax as kx
        >>> m = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> y = jnp.array([[0.5], [1.0], [0.7]])
        >>> ll = kx.laplace_log_likelihood(m, y, loss=kx.HuberLoss(1.0))
        >>> g = jax.grad(lambda k: kx.laplace_log_likelihood(m, y, loss=kx.HuberLoss(k)))(1.0)
    """
    loss = SquaredLoss() if loss is None else loss
    model, loss, y, w, init = prepare(model, y, mask, loss, init)
    tol, max_iterations = settings(y.dtype, tol, max_iterations)
    return _laplace_canonical(model, loss, y, jax.lax.stop_gradient(w), init, resolve_method(method), tol,
                              max_iterations)


@partial(jax.jit, static_argnums=(5,))
def _laplace_canonical(model, loss, y, w, init, method, tol, max_iterations):
    dtype = y.dtype
    x, _, converged = _solve(model, loss, y, w, init, method, tol, max_iterations)
    T, n = x.shape
    diag, sub = hessian_blocks(model, loss, y, w, x)
    pivot_tol = tolerances.pivot_tolerance(dtype, n, flat_prior=model.x0_cov is None)
    _, factor = blocktri.factor_solve(diag, sub, jnp.zeros_like(x), pivot_tol)
    val = -objective(model, loss, y, w, x) - 0.5 * blocktri.logdet(factor)
    ld_q = _logdet_chol(chol(model.Q))
    val = val - 0.5 * (ld_q * (T - 1) if model.Q.ndim == 2 else ld_q)
    # w * log Z: a loss with a (p,) parameter has one normaliser per column.
    val = val - 0.5 * _logdet_chol(_chol_R(model, w)) - jnp.sum(w * loss.log_normalizer(dtype))
    n_flat = n
    if model.x0_cov is not None:
        val = val - 0.5 * _logdet_chol(chol(model.x0_cov))
        n_flat = 0
    val = val + 0.5 * n_flat * math.log(2 * math.pi)
    return jnp.where(converged & factor.ok, val, jnp.nan)
