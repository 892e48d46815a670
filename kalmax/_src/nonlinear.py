r"""Iterated smoothing of nonlinear / robust models, with implicit gradients.

Solver: Gauss–Newton (Gauss–Newton–IRLS for a robust loss) with a
backtracking line search. From the current path x̄, one step solves the
linear-Gaussian problem of ``nonlinear_model.linearised_problem`` with the
ordinary smoothing backends (the compiled kernel on CPU, the parallel solve
on accelerators); its solution x̂ gives the direction Δ = x̂ − x̄. That is the
iterated Kalman smoother read as Gauss–Newton (Bell (1994), "The iterated
Kalman smoother as a Gauss–Newton method", SIAM J. Optim. 4(3)).

Safeguard: Armijo backtracking, α = 1, ½, ¼, ... until
J(x̄ + αΔ) ≤ J(x̄) − c α λ² + s with c = 10⁻⁴ (Nocedal & Wright (2006),
Numerical Optimization, §3.1 — from memory) and s = 8 eps (1 + |J(x̄)|), a
rounding allowance: J is evaluated with relative error ~eps, so near the
minimum a strict decrease test would reject a correct step. Plain Gauss–Newton
can diverge when the residuals are large or the model strongly nonlinear;
the line search keeps every accepted step a decrease (up to rounding). At
most 30 halvings; none accepted → the solve has failed.

Stopping rule (the gradient norm, in the metric of the linearised problem):

    λ² = ∇J(x̄)ᵀ G⁻¹ ∇J(x̄) = −∇J(x̄)ᵀ Δ,

G the (reweighted) Gauss–Newton matrix, is the squared G⁻¹-norm of the
gradient (the Newton decrement of Boyd & Vandenberghe (2004), Convex
Optimization, §9.5.1, with G for the Hessian). λ²/2 is the decrease of J
still predicted by the quadratic model, in nats, whatever the units of the
states. The solve stops when λ² ≤ tol · (1 + |J(x̄)|); default tol 1e-18 in
float64 and 1e-8 in float32 (rounding puts λ² near eps² J, far below both).
For a linear model and squared loss the first step is exact, so the test
passes after one iteration. ``iterations`` counts the steps taken. If the
test has not passed after ``max_iterations`` steps, or a linear solve failed,
or the line search failed, ``converged`` is False and the states are NaN:
never an unconverged answer presented as a solution.

Gradients (implicit function theorem at the solution, no tape through the
iterations): x* satisfies ∇ₓJ(x*; θ) = 0, so for a cotangent x̄,

    θ̄ = −∂_θ [uᵀ ∇ₓJ(x; θ)] at x = x*,   H u = x̄,

with H = ∇²ₓJ(x*) the *exact* Hessian (``nonlinear_model.hessian_blocks``,
block tridiagonal; factored by ``blocktri.factor_solve``). uᵀ∇ₓJ is the
directional derivative of J along u, formed by forward-mode AD of the
vectorised objective and then differentiated in reverse w.r.t. θ, Q, R, the
prior, the inputs, the loss's parameter and y: one block-Cholesky
factorisation and solve, plus per-step work. The same rule as the linear
primitive (``primitive.py``), with H no longer the Gauss–Newton matrix. At a
strict local minimum H is positive definite; when it is not (e.g. a
Student-t fit that stopped on a saddle), the factorisation fails and the
gradient is NaN.
"""

from __future__ import annotations

from functools import partial
from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

from . import blocktri, tolerances
from .model import StateSpace
from .nonlinear_model import (NonlinearModel, _map_h, canonicalize, from_state_space, hessian_blocks,
                              linearised_problem, objective, whitening)
from .primitive import get_backend, resolve_method
from .robust import SquaredLoss, check_loss

ARMIJO = 1e-4
MAX_HALVINGS = 30


def default_tolerance(dtype) -> float:
    """The default stopping tolerance on λ² / (1 + |J|) (module docstring)."""
    return 1e-18 if np.dtype(dtype) == np.float64 else 1e-8


class NonlinearSmoothed(NamedTuple):
    """Result of :func:`smooth_nonlinear`.

    Attributes:
        states: (T, n) the MAP path x* (NaN when not converged).
        measurements: (T, p) h(θ, x*_t, v_t).
        iterations: number of Gauss–Newton steps taken (int32).
        converged: bool; False means the states are NaN.
    """

    states: jnp.ndarray
    measurements: jnp.ndarray
    iterations: jnp.ndarray
    converged: jnp.ndarray


def _direction(model, loss, y, w, x, method, white):
    """(x̂, λ², J(x)): one linearised solve from x; J and ∇J come with the linearisation."""
    lin = linearised_problem(model, loss, y, w, x, white)
    x_hat, _ = get_backend(method).forward(lin.problem, lin.y, w)
    return x_hat, -jnp.sum(lin.gradient * (x_hat - x)), lin.value


def _iterate(model, loss, y, w, init, method, tol, max_iterations):
    """(x, iterations, converged) by the safeguarded Gauss–Newton loop of the module docstring."""
    eps = float(np.finfo(np.dtype(y.dtype)).eps)
    # Q, R and the mask do not change during the solve: whiten with factors formed once.
    white = whitening(model, w)
    J_of = lambda s: objective(model, loss, y, w, s, white)  # noqa: E731

    def line_search(x, J, x_hat, lam2):
        step = x_hat - x
        slack = 8 * eps * (1 + jnp.abs(J))

        def accept(alpha, J_try):
            return J_try <= J - ARMIJO * alpha * lam2 + slack

        def cond(c):
            k, alpha, _, J_try = c
            return (k < MAX_HALVINGS) & ~accept(alpha, J_try)

        def body(c):
            k, alpha, _, _ = c
            alpha = 0.5 * alpha
            x_try = x + alpha * step
            return k + 1, alpha, x_try, J_of(x_try)

        one = jnp.ones((), y.dtype)
        _, alpha, x_new, J_new = lax.while_loop(cond, body, (0, one, x_hat, J_of(x_hat)))
        return x_new, J_new, accept(alpha, J_new)

    def stop(lam2, J):
        return lam2 <= tol * (1 + jnp.abs(J))

    def cond(c):
        k, _, J, _, lam2, failed = c
        # NaN λ² (a failed linear solve) compares False: the loop ends, unconverged.
        return (k < max_iterations) & ~failed & (lam2 > tol * (1 + jnp.abs(J)))

    def body(c):
        k, x, J, x_hat, lam2, _ = c
        x_new, _, ok = line_search(x, J, x_hat, lam2)
        x_hat_new, lam2_new, J_new = _direction(model, loss, y, w, x_new, method, white)
        return k + 1, x_new, J_new, x_hat_new, lam2_new, ~ok

    x_hat, lam2, J = _direction(model, loss, y, w, init, method, white)
    k, x, J, _, lam2, failed = lax.while_loop(cond, body, (jnp.zeros((), jnp.int32), init, J, x_hat, lam2,
                                                           jnp.zeros((), bool)))
    converged = stop(lam2, J) & ~failed & jnp.all(jnp.isfinite(x))
    return jnp.where(converged, x, jnp.nan), k, converged


@partial(jax.custom_vjp, nondiff_argnums=(5,))
def _solve(model, loss, y, w, init, method, tol, max_iterations):
    return _iterate(model, loss, y, w, init, method, tol, max_iterations)


def _solve_fwd(model, loss, y, w, init, method, tol, max_iterations):
    out = _iterate(model, loss, y, w, init, method, tol, max_iterations)
    return out, (model, loss, y, w, init, out[0], tol, max_iterations)


def _zero_cotangent(a):
    if a is None:
        return None
    a = jnp.asarray(a)
    if jnp.issubdtype(a.dtype, jnp.inexact):
        return jnp.zeros_like(a)
    return np.zeros(a.shape, jax.dtypes.float0)


def implicit_vjp(model, loss, y, w, x, x_bar):
    """(model̄, loss̄, ȳ) = −∂_(θ,y)[uᵀ∇ₓJ(x; θ)] with H u = x̄ (module docstring)."""
    T, n = x.shape
    diag, sub = hessian_blocks(model, loss, y, w, x)
    tol = tolerances.pivot_tolerance(x.dtype, n, flat_prior=model.x0_cov is None)
    u, _ = blocktri.factor_solve(diag, sub, x_bar, tol)

    def pairing(model_, loss_, y_):
        return jax.jvp(lambda s: objective(model_, loss_, y_, w, s), (x,), (u,))[1]

    float_part = lambda tree: jax.tree_util.tree_map(  # noqa: E731
        lambda a: a if jnp.issubdtype(jnp.asarray(a).dtype, jnp.inexact) else None, tree)
    # Integer leaves (indices among the inputs) are held fixed: they have no derivative.
    _, pull = jax.vjp(lambda m, l, yy: pairing(_merge(model, m), _merge(loss, l), yy),
                      float_part(model), float_part(loss), y)
    m_bar, l_bar, y_bar = pull(-jnp.ones((), x.dtype))
    return _fill(model, m_bar), _fill(loss, l_bar), y_bar


def _merge(full, floats):
    """``full`` with its float leaves taken from ``floats`` (same structure, None elsewhere)."""
    return jax.tree_util.tree_map(lambda a, b: a if b is None else b, full, floats,
                                  is_leaf=lambda v: v is None)


def _fill(full, bars):
    """Cotangents for every leaf of ``full``: ``bars`` at float leaves, float0 zeros elsewhere."""
    return jax.tree_util.tree_map(lambda a, b: _zero_cotangent(a) if b is None else b, full, bars,
                                  is_leaf=lambda v: v is None)


def _solve_bwd(method, res, cotangents):
    model, loss, y, w, init, x, tol, max_iterations = res
    x_bar = cotangents[0]
    m_bar, l_bar, y_bar = implicit_vjp(model, loss, y, w, x, x_bar)
    return (m_bar, l_bar, y_bar, jnp.zeros_like(w), jnp.zeros_like(init), jnp.zeros_like(tol),
            _zero_cotangent(max_iterations))


_solve.defvjp(_solve_fwd, _solve_bwd)


def prepare(model, y, mask, loss, init):
    """Canonical (model, loss, y, w, init) for a NonlinearModel or a StateSpace."""
    check_loss(loss)
    if isinstance(model, StateSpace):
        T = np.shape(y)[0]
        y_arr = jnp.asarray(y)
        model = jax.tree_util.tree_map(lambda a: jnp.asarray(a, y_arr.dtype), model)
        model = from_state_space(model, T)
    model, y, w, init, dtype = canonicalize(model, y, mask, init)
    loss = jax.tree_util.tree_map(lambda a: jnp.asarray(a, dtype), loss)
    return model, loss, y, w, init


def smooth_nonlinear(model, y, mask=None, *, loss=None, init=None, tol: Optional[float] = None,
                     max_iterations: int = 100, method: str = "auto") -> NonlinearSmoothed:
    r"""MAP state path of a nonlinear and/or robust state-space model, by iterated smoothing.

    Minimises J(x) = ½Σ‖Q_t^{-½}(x_{t+1} − f(x_t))‖² + Σ_t Σ_i ρ(z_ti) + prior,
    z_t the whitened measurement residual (``nonlinear_model.py``), by
    Gauss–Newton/IRLS steps, each one linear smoothing solve with the chosen
    backend, safeguarded by a line search (``nonlinear.py``).

    Args:
        model: a :class:`NonlinearModel`, or a :class:`StateSpace` (a linear
            model with a robust loss).
        y: (T, p) measurements (T ≥ 2); NaN allowed at missing entries.
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        loss: ``kx.SquaredLoss()`` (default), ``kx.HuberLoss(threshold)`` or
            ``kx.StudentTLoss(dof)``, on whitened residuals (``robust.py``).
        init: (T, n) starting path; default x0_mean at every step (zeros
            with a flat prior). Nonlinear problems may have several minima:
            start near the one you want.
        tol: stopping tolerance on λ²/(1 + |J|), λ² the squared Newton
            decrement; default 1e-18 (float64), 1e-8 (float32).
        max_iterations: the most Gauss–Newton steps.
        method: backend of the linear solves, as in :func:`smooth`.

    Returns:
        :class:`NonlinearSmoothed` (states, measurements, iterations,
        converged). Unconverged: NaN states and ``converged`` False.

    Gradients (``jax.grad`` of anything computed from ``states``) reach the
    model's params, Q, R, prior, inputs, the loss's parameter and y by
    implicit differentiation at the solution, with the exact Hessian (one
    extra block-tridiagonal solve; no differentiation through iterations).
    ``init`` gets a zero gradient.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> f = lambda th, x, u: jnp.array([x[0] + 0.1 * jnp.sin(x[0])])
        >>> h = lambda th, x, v: x ** 3
        >>> m = kx.NonlinearModel(f, h, params=None, Q=0.1 * jnp.eye(1), R=jnp.eye(1),
        ...                       x0_mean=jnp.ones(1), x0_cov=jnp.eye(1))
        >>> out = kx.smooth_nonlinear(m, jnp.ones((4, 1)), loss=kx.HuberLoss(1.5))
        >>> bool(out.converged)
        True
    """
    loss = SquaredLoss() if loss is None else loss
    model, loss, y, w, init = prepare(model, y, mask, loss, init)
    tol, max_iterations = settings(y.dtype, tol, max_iterations)
    return _smooth_canonical(model, loss, y, jax.lax.stop_gradient(w), init, resolve_method(method), tol,
                             max_iterations)


def settings(dtype, tol, max_iterations):
    """tol and max_iterations as arrays: traced, so that changing them does not recompile."""
    tol = default_tolerance(dtype) if tol is None else tol
    return jnp.asarray(tol, dtype), jnp.asarray(max_iterations, jnp.int32)


@partial(jax.jit, static_argnums=(5,))
def _smooth_canonical(model, loss, y, w, init, method, tol, max_iterations):
    # Compiled once per model structure (its functions), shapes and settings:
    # an eager call would trace and compile the iteration loop on every call.
    x, iterations, converged = _solve(model, loss, y, w, init, method, tol, max_iterations)
    return NonlinearSmoothed(states=x, measurements=_map_h(model, x), iterations=iterations,
                             converged=converged)
