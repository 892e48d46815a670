r"""A nonlinear state-space model, its MAP objective, linearisation and exact Hessian.

Model (t = 0..T-1):

    x_{t+1} = f(θ, x_t, u_t) + w_t,   w_t ~ N(0, Q_t)
    y_t     = h(θ, x_t, v_t) + L_t ε_t,   ε_ti i.i.d. with density ∝ exp(−ρ(ε_ti))

with L_t L_tᵀ = R̃_t the masked measurement covariance (``normal_equations``),
ρ a loss of ``robust.py`` (½ε² is the Gaussian model), θ a pytree of
parameters, u_t / v_t optional per-step inputs. The MAP path minimises

    J(x) = ½ Σ_{t<T-1} ‖L_{Q,t}⁻¹ (x_{t+1} − f(θ, x_t, u_t))‖²
           + Σ_t Σ_i ρ(z_ti),   z_t = L_t⁻¹ [w_t ∘ (y_t − h(θ, x_t, v_t))]
           + ½ ‖L_P⁻¹ (x_0 − m_0)‖²        (absent for a flat prior).

Missing entries have z = 0 (L_t is block diagonal after permuting observed
entries first, see ``normal_equations``), and ρ(0) = 0: they add nothing.

Every term couples at most x_t and x_{t+1}, so the Hessian of J is symmetric
block tridiagonal whatever f, h and ρ are. ``hessian_blocks`` forms it
*exactly* (the Gauss–Newton part plus the second-order terms
Σ_i (L_Q⁻ᵀL_Q⁻¹ r)_i ∇²f_i, Σ_i ρ'(z_i) ∇²z_i, and ρ''), from per-step
Hessians of the per-step terms (``jax.hessian`` on 2n-vectors, vmapped over
time): O(T n² · cost(f, h)) work, no recursion over time.

``linearised_problem`` builds the linear-Gaussian problem whose solution is
one Gauss–Newton / IRLS step from a path x̄ (Bell (1994), "The iterated
Kalman smoother as a Gauss–Newton method", SIAM J. Optim. 4(3)):

    A_t = ∂f/∂x(x̄_t),  b_t = f(x̄_t) − A_t x̄_t,
    C_t = ∂h/∂x(x̄_t),  y_t − h(x̄_t) + C_t x̄_t = C_t x_t + noise,

with the measurement rows whitened by L_t⁻¹ and scaled by √ω (the IRLS
weights ω = ρ'(z)/z of ``robust.py``), so that the measurement covariance
of the linear problem is the identity. Its objective is the quadratic model
of J at x̄ whose gradient equals ∇J(x̄) and whose Hessian is the
(reweighted) Gauss–Newton matrix, positive definite whenever the states are
identified: its minimiser minus x̄ is a descent direction.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Callable, NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np

from .linalg import chol, lsolve, lsolve_vec, matvec
from .model import StateSpace
from .noise import DiagonalNoise, dense, is_noise_form
from .normal_equations import masked_measurement_cov
from .robust import SquaredLoss

Array = Any


@dataclasses.dataclass(frozen=True)
class NonlinearModel:
    r"""A state-space model with nonlinear dynamics and measurements.

    .. math::

        x_{t+1} = f(\theta, x_t, u_t) + w_t,\ w_t \sim N(0, Q_t),\qquad
        y_t = h(\theta, x_t, v_t) + v_t,\ v_t \sim N(0, R_t)

    (a robust loss replaces the Gaussian measurement density, see
    :func:`smooth_nonlinear`).

    Attributes:
        transition: ``f(params, x, u) -> (n,)``, a JAX function of one state
            x (n,); ``u`` is step t of ``transition_inputs`` (None without).
        measure: ``h(params, x, v) -> (p,)``; ``v`` is step t of
            ``measurement_inputs`` (None without).
        params: any pytree θ (arrays, a neural network's weights, ...);
            gradients with respect to it come back in the same structure.
        Q: (n, n) or (T-1, n, n), or a ``kx.DiagonalNoise`` / ``kx.ScalarNoise``.
        R: (p, p) or (T, p, p), or a noise form.
        x0_mean, x0_cov: prior of x_0, (n,) and (n, n); both None: flat prior.
        transition_inputs: optional pytree whose leaves have a leading axis
            of length T-1 (controls, time steps, per-step matrices).
        measurement_inputs: optional pytree with leading axis T.

    The functions are static (part of the pytree structure, not leaves): use
    module-level functions or ``functools.partial``, not a new lambda per
    call, so that ``jit`` does not recompile.
    """

    transition: Callable
    measure: Callable
    params: Any
    Q: Array
    R: Array
    x0_mean: Optional[Array] = None
    x0_cov: Optional[Array] = None
    transition_inputs: Any = None
    measurement_inputs: Any = None

    def replace(self, **changes) -> "NonlinearModel":
        return dataclasses.replace(self, **changes)


jax.tree_util.register_dataclass(
    NonlinearModel,
    data_fields=["params", "Q", "R", "x0_mean", "x0_cov", "transition_inputs", "measurement_inputs"],
    meta_fields=["transition", "measure"],
)


# ----------------------------------------------------------------------------
# A linear model as a nonlinear one (robust losses on kx.StateSpace).


def _linear_transition(params, x, u):
    A, b = u
    return A @ x + b


def _linear_measure(params, x, v):
    C, d = v
    return C @ x + d


def from_state_space(model: StateSpace, T: int) -> NonlinearModel:
    """The same model with f(x) = A_t x + b_t and h(x) = C_t x + d_t, per-step matrices as inputs.

    A differentiable function of the StateSpace: gradients of anything
    computed from the result flow back to A, b, C, d (summed over time for
    time-invariant fields by the transpose of the broadcast).
    """
    n, p = model.A.shape[-1], model.C.shape[-2]
    dtype = jnp.result_type(model.A, model.C)
    A = jnp.broadcast_to(model.A, (T - 1, n, n))
    C = jnp.broadcast_to(model.C, (T, p, n))
    b = jnp.broadcast_to(jnp.zeros(n, dtype) if model.b is None else model.b, (T - 1, n))
    d = jnp.broadcast_to(jnp.zeros(p, dtype) if model.d is None else model.d, (T, p))
    return NonlinearModel(_linear_transition, _linear_measure, params=None, Q=model.Q, R=model.R,
                          x0_mean=model.x0_mean, x0_cov=model.x0_cov,
                          transition_inputs=(A, b), measurement_inputs=(C, d))


# ----------------------------------------------------------------------------
# Checks and canonical form.


def _state_size(model: NonlinearModel, init) -> int:
    if init is not None:
        return int(np.shape(init)[-1])
    if model.x0_mean is not None:
        return int(np.shape(model.x0_mean)[-1])
    Q = model.Q
    if isinstance(Q, DiagonalNoise):
        return int(np.shape(Q.variances)[-1])
    if not is_noise_form(Q):
        return int(np.shape(Q)[-1])
    raise ValueError("the state size n cannot be read from a kx.ScalarNoise Q alone: pass init (T, n) "
                     "or x0_mean (n,).")


def _check_time_axis(name, tree, steps):
    for leaf in jax.tree_util.tree_leaves(tree):
        if np.ndim(leaf) < 1 or np.shape(leaf)[0] != steps:
            raise ValueError(f"every leaf of model.{name} must have a leading time axis of length {steps}; "
                             f"got a leaf of shape {tuple(np.shape(leaf))}.")


def _step(tree, t):
    return None if tree is None else jax.tree_util.tree_map(lambda a: a[t], tree)


def canonicalize(model: NonlinearModel, y, mask, init):
    """Check shapes at trace time; return (model with dense Q and R, y, w, init, dtype).

    Q comes back (n, n) or (T-1, n, n), R (p, p) or (T, p, p); y and the float
    0/1 mask w in one float dtype; init (T, n) (default: x0_mean at every
    step, or zeros with a flat prior).
    """
    if not isinstance(model, NonlinearModel):
        raise TypeError(f"model must be a kx.NonlinearModel or a kx.StateSpace; got {type(model).__name__}.")
    y = jnp.asarray(y)
    if y.ndim != 2:
        raise ValueError(f"y must have shape (T, p); got {tuple(y.shape)}. Batch with jax.vmap.")
    if not jnp.issubdtype(y.dtype, jnp.floating):
        raise TypeError(f"y must be a float32 or float64 array; got dtype {y.dtype}.")
    T, p = y.shape
    if T < 2:
        raise ValueError(f"y must have at least two time steps; got T = {T}.")
    n = _state_size(model, init)
    dtype = y.dtype
    if mask is None:
        mask = ~jnp.isnan(y)
    mask = jnp.asarray(mask)
    if mask.dtype != jnp.bool_ or mask.shape != y.shape:
        raise ValueError(f"mask must be a boolean array of shape {tuple(y.shape)}; got {mask.dtype} "
                         f"{tuple(mask.shape)}.")
    cast = lambda a: None if a is None else jnp.asarray(a, dtype)  # noqa: E731
    Q = dense(jax.tree_util.tree_map(cast, model.Q), n)
    R = dense(jax.tree_util.tree_map(cast, model.R), p)
    if Q.shape not in ((n, n), (T - 1, n, n)):
        raise ValueError(f"model.Q must have shape ({n}, {n}) or ({T - 1}, {n}, {n}); got {Q.shape}.")
    if R.shape not in ((p, p), (T, p, p)):
        raise ValueError(f"model.R must have shape ({p}, {p}) or ({T}, {p}, {p}); got {R.shape}.")
    if (model.x0_mean is None) != (model.x0_cov is None) and model.x0_cov is None:
        raise ValueError("model.x0_mean is given without model.x0_cov (leave both None for a flat prior).")
    x0_mean, x0_cov = cast(model.x0_mean), cast(model.x0_cov)
    if x0_mean is not None and x0_mean.shape != (n,):
        raise ValueError(f"model.x0_mean must have shape ({n},); got {x0_mean.shape}.")
    if x0_cov is not None and x0_cov.shape != (n, n):
        raise ValueError(f"model.x0_cov must have shape ({n}, {n}); got {x0_cov.shape}.")
    if model.transition_inputs is not None:
        _check_time_axis("transition_inputs", model.transition_inputs, T - 1)
    if model.measurement_inputs is not None:
        _check_time_axis("measurement_inputs", model.measurement_inputs, T)
    params = jax.tree_util.tree_map(
        lambda a: jnp.asarray(a, dtype) if jnp.issubdtype(jnp.asarray(a).dtype, jnp.floating) else a,
        model.params)
    model = model.replace(params=params, Q=Q, R=R, x0_mean=x0_mean, x0_cov=x0_cov)

    x_probe = jax.ShapeDtypeStruct((n,), dtype)
    f_out = jax.eval_shape(lambda x: model.transition(model.params, x, _step(model.transition_inputs, 0)), x_probe)
    h_out = jax.eval_shape(lambda x: model.measure(model.params, x, _step(model.measurement_inputs, 0)), x_probe)
    if getattr(f_out, "shape", None) != (n,):
        raise ValueError(f"model.transition(params, x, u) must return shape ({n},); got {getattr(f_out, 'shape', f_out)}.")
    if getattr(h_out, "shape", None) != (p,):
        raise ValueError(f"model.measure(params, x, v) must return shape ({p},) (p = y.shape[1]); "
                         f"got {getattr(h_out, 'shape', h_out)}.")

    if init is None:
        start = jnp.zeros(n, dtype) if x0_mean is None else x0_mean
        init = jnp.broadcast_to(start, (T, n))
    init = jnp.asarray(init, dtype)
    if init.shape != (T, n):
        raise ValueError(f"init must have shape (T, n) = ({T}, {n}); got {tuple(init.shape)}.")
    w = mask.astype(dtype)
    return model, y, w, init, dtype


# ----------------------------------------------------------------------------
# Vectorised evaluation over time.


def _map_f(model: NonlinearModel, xs):
    fn = lambda x, u: model.transition(model.params, x, u)  # noqa: E731
    return jax.vmap(fn, in_axes=(0, None if model.transition_inputs is None else 0))(xs, model.transition_inputs)


def _map_h(model: NonlinearModel, xs):
    fn = lambda x, v: model.measure(model.params, x, v)  # noqa: E731
    return jax.vmap(fn, in_axes=(0, None if model.measurement_inputs is None else 0))(xs, model.measurement_inputs)


def _chol_R(model, w):
    return chol(masked_measurement_cov(model.R, w))


class Whitening(NamedTuple):
    """Inverse Cholesky factors W = L⁻¹ that whiten the residuals of J; they do not depend on x.

    Wq: (n, n) or (T-1, n, n) for Q; Wr: (T, p, p) for the masked R̃_t;
    Wp: (n, n) for the prior covariance, or None (flat prior).
    """

    Wq: Array
    Wr: Array
    Wp: Optional[Array]


def _inverse_factor(S):
    # A single matrix goes through the batched (looped) code as a batch of one:
    # the straight-line code for one block compiles k² operations (2 s at k = 10).
    single = S.ndim == 2
    S = S[None] if single else S
    W = lsolve(chol(S), jnp.broadcast_to(jnp.eye(S.shape[-1], dtype=S.dtype), S.shape))
    return W[0] if single else W


def whitening(model: NonlinearModel, w) -> Whitening:
    """The :class:`Whitening` of a canonical model (dense Q, R) and mask.

    The solver forms it once per solve: Q, R and the mask stay fixed while x
    moves, so every objective evaluation and linearisation is then a batched
    matrix-vector product instead of T triangular solves (the CPU kernel keeps
    inverse diagonal factors for the same reason, ``backends/cpu.py``). For
    the symmetric positive-definite covariances here, multiplying by L⁻¹
    instead of substituting with L changes the result at rounding level.
    Differentiable in Q, R and the prior (the implicit VJP differentiates J
    through it).
    """
    Wp = None if model.x0_cov is None else _inverse_factor(model.x0_cov)
    return Whitening(Wq=_inverse_factor(model.Q), Wr=_inverse_factor(masked_measurement_cov(model.R, w)), Wp=Wp)


def whitened_measurement_residual(model, y, w, x, white: Optional[Whitening] = None):
    """z_t = L_t⁻¹ [w_t ∘ (y_t − h(x_t))]: (T, p), zero at missing entries."""
    white = whitening(model, w) if white is None else white
    e = jnp.where(w > 0, y - _map_h(model, x), 0)
    return matvec(white.Wr, e)


def _prior_residual(model, white, x0):
    return matvec(white.Wp, x0 - (0 if model.x0_mean is None else model.x0_mean))


def objective(model: NonlinearModel, loss, y, w, x, white: Optional[Whitening] = None):
    """J(x; θ) of the module docstring (a scalar); vectorised, no recursion over time.

    ``white``: the factors of :func:`whitening`, when the caller already has
    them (the solver's loop); by default formed here, so that J is a
    differentiable function of Q, R and the prior.
    """
    white = whitening(model, w) if white is None else white
    r = x[1:] - _map_f(model, x[:-1])
    val = 0.5 * jnp.sum(matvec(white.Wq, r) ** 2)
    val = val + jnp.sum(loss.rho(whitened_measurement_residual(model, y, w, x, white)))
    if model.x0_cov is not None:
        val = val + 0.5 * jnp.sum(_prior_residual(model, white, x[0]) ** 2)
    return val


def _value_and_jacobian(fn):
    """x ↦ (fn(x), ∂fn/∂x(x)) by one forward-mode pass (the value comes with the Jacobian)."""
    def both(x, *rest):
        def twice(s):
            out = fn(s, *rest)
            return out, out
        jac, value = jax.jacfwd(twice, has_aux=True)(x)
        return value, jac
    return both


class Linearisation(NamedTuple):
    """What one Gauss–Newton / IRLS step needs from a path x̄ (``linearised_problem``)."""

    problem: StateSpace  # the linear-Gaussian problem whose solution is the step's target
    y: Array  # (T, p) its whitened measurements
    value: Array  # J(x̄)
    gradient: Array  # ∇J(x̄), (T, n)


def linearised_problem(model: NonlinearModel, loss, y, w, x, white: Optional[Whitening] = None) -> Linearisation:
    """The linear-Gaussian problem whose solution is one GN/IRLS step from x, with J(x) and ∇J(x).

    See the module docstring. The StateSpace is canonical for the backends:
    dense Q, R = DiagonalNoise(ones (p,)), time-varying A (T-1, n, n),
    b (T-1, n), C (T, p, n); its y (T, p) is zero at missing entries.

    f, h and their Jacobians are evaluated once (forward mode, vmapped over
    time), and J and ∇J are assembled from them rather than by a separate
    reverse pass through f and h: with q_t = Q_t⁻¹ (x_{t+1} − f(x_t)) and
    ψ = ρ'(z) = ω z,

        ∇_{x_t} J = q_{t−1} − A_tᵀ q_t − (L_t⁻¹ w_t∘C_t)ᵀ ψ_t  (+ P₀⁻¹(x₀ − m₀) at t = 0),

    missing terms at the ends dropped (chain rule on the module docstring's J).
    """
    T, p = y.shape
    white = whitening(model, w) if white is None else white
    u_axis = None if model.transition_inputs is None else 0
    v_axis = None if model.measurement_inputs is None else 0
    fx, A = jax.vmap(_value_and_jacobian(lambda s, u: model.transition(model.params, s, u)),
                     in_axes=(0, u_axis))(x[:-1], model.transition_inputs)
    hx, C = jax.vmap(_value_and_jacobian(lambda s, v: model.measure(model.params, s, v)),
                     in_axes=(0, v_axis))(x, model.measurement_inputs)
    b = fx - matvec(A, x[:-1])
    rq = matvec(white.Wq, x[1:] - fx)  # whitened transition residuals
    z = matvec(white.Wr, jnp.where(w > 0, y - hx, 0))
    omega = loss.weight(z)  # 1 at missing entries (z = 0)
    s = jnp.sqrt(omega)
    WC = white.Wr @ (w[:, :, None] * C)
    C_white = s[:, :, None] * WC
    # W(w∘(y − h + C x̄)) = z + (W w∘C) x̄ for a 0/1 mask.
    y_white = s * (z + matvec(WC, x))
    lin = StateSpace(A=A, C=C_white, Q=model.Q, R=DiagonalNoise(jnp.ones(p, y.dtype)), b=b,
                     x0_mean=model.x0_mean, x0_cov=model.x0_cov)

    value = 0.5 * jnp.sum(rq ** 2) + jnp.sum(loss.rho(z))
    q = matvec(jnp.swapaxes(white.Wq, -1, -2), rq)
    grad = -matvec(jnp.swapaxes(WC, -1, -2), omega * z)
    grad = grad.at[1:].add(q).at[:-1].add(-matvec(jnp.swapaxes(A, -1, -2), q))
    if model.x0_cov is not None:
        rp = _prior_residual(model, white, x[0])
        value = value + 0.5 * jnp.sum(rp ** 2)
        grad = grad.at[0].add(white.Wp.T @ rp)
    return Linearisation(problem=lin, y=y_white, value=value, gradient=grad)


def linearize(model, path, *, mask=None):
    """The linear-Gaussian StateSpace obtained by linearising ``model`` about ``path`` (T, n).

    A_t = ∂f/∂x(path_t), b_t = f(path_t) − A_t path_t, C_t = ∂h/∂x(path_t),
    d_t = h(path_t) − C_t path_t; Q, R and the prior unchanged. Smoothing it
    with :func:`smooth` is the "linearised once" smoother (one Gauss–Newton
    step with a squared loss); differentiable in the model and the path.
    """
    path = jnp.asarray(path)
    T = path.shape[0]
    p = jax.eval_shape(lambda x: model.measure(model.params, x, _step(model.measurement_inputs, 0)),
                       jax.ShapeDtypeStruct(path.shape[1:], path.dtype)).shape[0]
    model, _, _, path, _ = canonicalize(model, jnp.zeros((T, p), path.dtype), mask, path)
    jac_f = lambda x_, u: jax.jacfwd(lambda s: model.transition(model.params, s, u))(x_)  # noqa: E731
    jac_h = lambda x_, v: jax.jacfwd(lambda s: model.measure(model.params, s, v))(x_)  # noqa: E731
    A = jax.vmap(jac_f, in_axes=(0, None if model.transition_inputs is None else 0))(path[:-1], model.transition_inputs)
    C = jax.vmap(jac_h, in_axes=(0, None if model.measurement_inputs is None else 0))(path, model.measurement_inputs)
    b = _map_f(model, path[:-1]) - matvec(A, path[:-1])
    d = _map_h(model, path) - matvec(C, path)
    return StateSpace(A=A, C=C, Q=model.Q, R=model.R, b=b, d=d, x0_mean=model.x0_mean, x0_cov=model.x0_cov)


# ----------------------------------------------------------------------------
# The exact Hessian, block by block.


def hessian_blocks(model: NonlinearModel, loss, y, w, x):
    """(diag (T, n, n), sub (T-1, n, n)): the exact Hessian ∇²ₓJ at x, by per-step Hessians.

    sub[t] is the block H_{t+1,t}. See the module docstring.
    """
    T, n = x.shape
    Lq = jnp.broadcast_to(chol(model.Q), (T - 1, n, n))
    Lr = _chol_R(model, w)

    def transition_term(pair, u, Lq_t):
        r = pair[n:] - model.transition(model.params, pair[:n], u)
        return 0.5 * jnp.sum(lsolve_vec(Lq_t, r) ** 2)

    def measurement_term(x_t, v, y_t, w_t, Lr_t):
        e = jnp.where(w_t > 0, y_t - model.measure(model.params, x_t, v), 0)
        return jnp.sum(loss.rho(lsolve_vec(Lr_t, e)))

    u_axis = None if model.transition_inputs is None else 0
    v_axis = None if model.measurement_inputs is None else 0
    pairs = jnp.concatenate([x[:-1], x[1:]], axis=1)
    Ht = jax.vmap(jax.hessian(transition_term), in_axes=(0, u_axis, 0))(pairs, model.transition_inputs, Lq)
    Hm = jax.vmap(jax.hessian(measurement_term), in_axes=(0, v_axis, 0, 0, 0))(
        x, model.measurement_inputs, y, w, Lr)
    diag = Hm.at[:-1].add(Ht[:, :n, :n]).at[1:].add(Ht[:, n:, n:])
    if model.x0_cov is not None:
        Wp = lsolve(chol(model.x0_cov), jnp.eye(n, dtype=x.dtype))
        diag = diag.at[0].add(Wp.T @ Wp)
    diag = 0.5 * (diag + jnp.swapaxes(diag, -1, -2))
    return diag, Ht[:, n:, :n]


def default_loss():
    return SquaredLoss()
