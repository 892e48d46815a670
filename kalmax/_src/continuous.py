r"""Continuous-time models observed at irregular timestamps.

A linear time-invariant stochastic differential equation

    dx(t) = F x(t) dt + dβ(t),    E[dβ dβᵀ] = G dt,

(``F`` the *drift*, ``G`` the symmetric positive semi-definite *diffusion*
matrix: for dβ = L dW with white-noise spectral density Q_c, G = L Q_c Lᵀ)
sampled at times τ_0 < τ_1 < ... < τ_{T-1} is exactly the discrete model

    x_{t+1} = A_t x_t + w_t,   w_t ~ N(0, Q_t),
    A_t = exp(F Δ_t),   Q_t = ∫_0^{Δ_t} exp(F s) G exp(F s)ᵀ ds,   Δ_t = τ_{t+1} − τ_t.

Q_t comes from Van Loan's construction (C. F. Van Loan, "Computing integrals
involving the matrix exponential", IEEE Trans. Automatic Control 23(3), 1978):

    exp([[−F, G], [0, Fᵀ]] Δ) = [[E11, E12], [0, E22]],   A = E22ᵀ,   Q = A E12.

E11 = exp(−F Δ) grows without bound for a strongly stable drift and a long
gap (overflow in float32 once ‖F‖Δ ≳ 88), so each step is first cut into 2^s
equal pieces with ‖F‖Δ/2^s ≤ 1, the pieces are discretised with the formula
above, and the pieces are joined by s doublings

    A(2h) = A(h)²,   Q(2h) = A(h) Q(h) A(h)ᵀ + Q(h),

which follow from running the recursion for two steps of length h. Both
formulas are exact, so the result is too (up to rounding), and every operation
is differentiable: ``jax.grad`` flows to F, G and the timestamps.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Optional, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from .model import StateSpace

Array = Any

# Enough doublings for ‖F‖Δ up to 2^40: far beyond any float64 time range of interest.
_MAX_DOUBLINGS = 40


def _van_loan(F, G, dt):
    """(A, Q) for one step of length dt by the block exponential (no splitting)."""
    n = F.shape[-1]
    top = jnp.concatenate([-F, G], axis=1)
    bottom = jnp.concatenate([jnp.zeros_like(F), F.T], axis=1)
    E = jax.scipy.linalg.expm(jnp.concatenate([top, bottom], axis=0) * dt)
    A = E[n:, n:].T
    Q = A @ E[:n, n:]
    return A, Q


def _discretize_one(F, G, dt, n_doublings):
    h = dt / jnp.exp2(n_doublings.astype(dt.dtype))
    A, Q = _van_loan(F, G, h)

    def double(i, AQ):
        A, Q = AQ
        A2, Q2 = A @ A, A @ Q @ A.T + Q
        keep = i >= n_doublings
        return jnp.where(keep, A, A2), jnp.where(keep, Q, Q2)

    A, Q = jax.lax.fori_loop(0, _MAX_DOUBLINGS, double, (A, Q))
    return A, 0.5 * (Q + Q.T)


def discretize(drift, diffusion, dt, *, jitter=0.0):
    r"""Exact discretisation of dx = F x dt + dβ (E[dβ dβᵀ] = G dt) over steps ``dt``.

    Returns A_k = exp(F Δ_k) and Q_k = ∫_0^{Δ_k} exp(F s) G exp(F s)ᵀ ds
    (Van Loan's block-exponential construction; see the module docstring for
    the splitting that keeps long gaps accurate).

    Args:
        drift: (n, n) drift matrix F.
        diffusion: (n, n) symmetric positive semi-definite diffusion G.
        dt: scalar or (K,) step lengths Δ_k ≥ 0.
        jitter: added to the diagonal of every Q_k. Q_k is singular when
            Δ_k = 0 or when G is rank deficient and the drift does not spread
            the noise to every state; a small jitter keeps it positive
            definite for the smoother.

    Returns:
        (A, Q) of shapes (K, n, n) each (or (n, n) for a scalar ``dt``).
        Differentiable with respect to drift, diffusion and dt.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> F = jnp.array([[0.0, 1.0], [0.0, 0.0]])   # constant velocity
        >>> G = jnp.diag(jnp.array([0.0, 2.0]))        # q = 2 on the velocity
        >>> A, Q = kx.discretize(F, G, jnp.array([0.5, 1.0]))
        >>> A.shape, Q.shape
        ((2, 2, 2), (2, 2, 2))
    """
    F = jnp.asarray(drift)
    G = jnp.asarray(diffusion)
    dt = jnp.asarray(dt)
    dtype = jnp.result_type(F, G, dt, float)
    if not jnp.issubdtype(dtype, jnp.floating):
        dtype = jnp.result_type(float)
    F, G, dt = F.astype(dtype), G.astype(dtype), dt.astype(dtype)
    if F.ndim != 2 or F.shape[0] != F.shape[1]:
        raise ValueError(f"drift must have shape (n, n); got {tuple(F.shape)}.")
    n = F.shape[0]
    if G.shape != (n, n):
        raise ValueError(f"diffusion must have shape ({n}, {n}) like the drift; got {tuple(G.shape)}.")
    if dt.ndim > 1:
        raise ValueError(f"dt must be a scalar or have shape (K,); got {tuple(dt.shape)}.")
    scalar = dt.ndim == 0
    dts = jnp.atleast_1d(dt)
    G = 0.5 * (G + G.T)
    # ‖F‖∞ bounds the growth of exp(±F h); cut each step until ‖F‖∞ h ≤ 1. The
    # count is piecewise constant in the parameters, so it carries no gradient.
    norm = jax.lax.stop_gradient(jnp.max(jnp.sum(jnp.abs(F), axis=1)))
    ratio = jax.lax.stop_gradient(norm * jnp.abs(dts))
    n_doublings = jnp.clip(jnp.ceil(jnp.log2(jnp.maximum(ratio, 1.0))), 0, _MAX_DOUBLINGS).astype(jnp.int32)
    A, Q = jax.vmap(_discretize_one, in_axes=(None, None, 0, 0))(F, G, dts, n_doublings)
    Q = Q + jitter * jnp.eye(n, dtype=dtype)
    if scalar:
        return A[0], Q[0]
    return A, Q


@dataclasses.dataclass(frozen=True)
class ContinuousModel:
    r"""A continuous-time linear-Gaussian model with discrete measurements.

    .. math::

        dx(t) = F x(t) dt + dβ(t),\quad E[dβ dβᵀ] = G dt
        y(τ_t) = C x(τ_t) + d + v_t,\quad v_t \sim N(0, R)

    Fields: ``drift`` F (n, n), ``diffusion`` G (n, n), ``C`` (p, n),
    ``R`` (p, p), optional ``d`` (p,), ``x0_mean`` (n,), ``x0_cov`` (n, n)
    (the prior of the state at the first timestamp; none = flat prior),
    and ``jitter`` (a float added to the diagonal of every discrete Q; a
    pytree leaf so that the whole model can cross ``jit``).

    :meth:`at_times` turns it into the exact time-varying discrete
    :class:`StateSpace` for given timestamps. The model is a pytree, so
    ``jax.grad`` of a loss that calls ``at_times`` reaches the continuous-time
    parameters.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> cm = kx.constant_velocity(dims=1, q=0.5, r=0.1)
        >>> model = cm.at_times(jnp.array([0.0, 0.3, 1.0, 2.5]))
        >>> model.A.shape
        (3, 2, 2)
    """

    drift: Array
    diffusion: Array
    C: Array
    R: Array
    d: Optional[Array] = None
    x0_mean: Optional[Array] = None
    x0_cov: Optional[Array] = None
    jitter: Any = 0.0

    def replace(self, **changes) -> "ContinuousModel":
        """A copy with some fields replaced."""
        return dataclasses.replace(self, **changes)

    def at_times(self, times) -> StateSpace:
        """The exact discrete :class:`StateSpace` at timestamps ``times`` (T,).

        ``times`` must be increasing (checked by the callers that read data:
        a traced array cannot be checked here). A and Q get shape
        (T-1, n, n); C, R, d stay time-invariant.
        """
        times = jnp.asarray(times)
        if times.ndim != 1 or times.shape[0] < 1:
            raise ValueError(f"times must have shape (T,) with T >= 1; got {tuple(times.shape)}.")
        dt = jnp.diff(times)
        if dt.shape[0] == 0:
            n = self.drift.shape[0]
            A = jnp.zeros((0, n, n), jnp.result_type(self.drift, float))
            Q = A
        else:
            A, Q = discretize(self.drift, self.diffusion, dt, jitter=self.jitter)
        return StateSpace(A=A, C=self.C, Q=Q, R=self.R, d=self.d, x0_mean=self.x0_mean, x0_cov=self.x0_cov)


jax.tree_util.register_dataclass(
    ContinuousModel,
    data_fields=["drift", "diffusion", "C", "R", "d", "x0_mean", "x0_cov", "jitter"],
    meta_fields=[],
)


# ----------------------------------------------------------------------------
# Model builders. Every builder takes its variances as traced-friendly scalars
# (so they can be fitted) and its sizes as Python ints (they fix shapes).
# ----------------------------------------------------------------------------


def _measurement(n: int, measured: Optional[Sequence[int]], default: Sequence[int], r, dtype):
    idx = list(default if measured is None else measured)
    if not idx:
        raise ValueError("measured must name at least one state index.")
    for i in idx:
        if not (0 <= int(i) < n):
            raise ValueError(f"measured state index {i} is out of range for a state of size {n}.")
    C = jnp.asarray(np.eye(n)[np.asarray(idx, dtype=int)], dtype)
    r = jnp.asarray(r, dtype)
    if r.ndim == 0:
        R = r * jnp.eye(len(idx), dtype=dtype)
    elif r.shape == (len(idx),):
        R = jnp.diag(r)
    else:
        raise ValueError(f"r must be a scalar or have shape ({len(idx)},) (one variance per measurement); "
                         f"got {tuple(r.shape)}.")
    return C, R


def _dtype(*xs):
    return jnp.result_type(*[jnp.asarray(x) for x in xs], float)


def _per_axis(q, dims: int, dtype, name: str):
    q = jnp.asarray(q, dtype)
    if q.ndim == 0:
        return jnp.full((dims,), q)
    if q.shape != (dims,):
        raise ValueError(f"{name} must be a scalar or have shape ({dims},) (one per axis); got {tuple(q.shape)}.")
    return q


def _integrator_chain(order: int, dims: int, q, r, measured, jitter, name):
    """dims independent chains of `order` integrators driven by white noise on the last one.

    State layout is derivative-major: [x_0..x_{dims-1}, x'_0.., x''_0..], so that
    the first `dims` states are the positions whatever the order.
    """
    if dims < 1:
        raise ValueError(f"dims must be a positive integer; got {dims}.")
    dtype = _dtype(q, r)
    n = order * dims
    F = np.zeros((n, n))
    for k in range(order - 1):
        F[k * dims:(k + 1) * dims, (k + 1) * dims:(k + 2) * dims] = np.eye(dims)
    qv = _per_axis(q, dims, dtype, name)
    G = jnp.zeros((n, n), dtype).at[n - dims:, n - dims:].set(jnp.diag(qv))
    C, R = _measurement(n, measured, range(dims), r, dtype)
    return ContinuousModel(drift=jnp.asarray(F, dtype), diffusion=G, C=C, R=R, jitter=jitter)


def random_walk(dims: int = 1, q=1.0, r=1.0, *, measured=None, jitter=0.0) -> ContinuousModel:
    r"""Random walk (local level) in ``dims`` dimensions: dx = dβ, E[dβ dβᵀ] = diag(q) dt.

    Discretised: A = I, Q(Δ) = q Δ. The level itself is measured.

    Args:
        dims: number of independent levels (state size n = dims).
        q: diffusion per unit time (variance growth rate), scalar or (dims,).
        r: measurement noise variance, scalar or (p,).
        measured: state indices measured, one per measurement (default: all levels).
        jitter: see :class:`ContinuousModel`.

    Example:
        >>> kx.random_walk(q=0.1, r=1.0).at_times(jnp.array([0.0, 2.0])).Q  # doctest: +SKIP
        Array([[[0.2]]], dtype=float32)
    """
    return _integrator_chain(1, dims, q, r, measured, jitter, "q")


def constant_velocity(dims: int = 1, q=1.0, r=1.0, *, measured=None, jitter=0.0) -> ContinuousModel:
    r"""Constant velocity (Wiener velocity) in ``dims`` dimensions.

    State [positions (dims), velocities (dims)]; white-noise acceleration with
    spectral density q per axis: dpos = vel dt, dvel = dβ, E[dβ²] = q dt.
    Discretised per axis: A = [[1, Δ], [0, 1]], Q = q [[Δ³/3, Δ²/2], [Δ²/2, Δ]].

    Args:
        dims: number of spatial axes (n = 2 dims).
        q: acceleration noise spectral density, scalar or (dims,).
        r: measurement noise variance, scalar or (p,).
        measured: state indices measured (default: the positions 0..dims-1;
            velocity of axis k is index dims + k).

    Example:
        >>> cm = kx.constant_velocity(dims=2, q=0.01, r=4.0)
        >>> cm.C.shape
        (2, 4)
    """
    return _integrator_chain(2, dims, q, r, measured, jitter, "q")


def constant_acceleration(dims: int = 1, q=1.0, r=1.0, *, measured=None, jitter=0.0) -> ContinuousModel:
    r"""Constant acceleration (Wiener acceleration) in ``dims`` dimensions.

    State [positions, velocities, accelerations] (dims each); white-noise jerk
    with spectral density q per axis. Discretised per axis:
    A = [[1, Δ, Δ²/2], [0, 1, Δ], [0, 0, 1]],
    Q = q [[Δ⁵/20, Δ⁴/8, Δ³/6], [Δ⁴/8, Δ³/3, Δ²/2], [Δ³/6, Δ²/2, Δ]].

    Args:
        dims: number of spatial axes (n = 3 dims).
        q: jerk noise spectral density, scalar or (dims,).
        r: measurement noise variance, scalar or (p,).
        measured: state indices measured (default: positions; velocity of axis
            k is dims + k, acceleration 2 dims + k).

    Example:
        >>> kx.constant_acceleration(dims=1).drift.shape
        (3, 3)
    """
    return _integrator_chain(3, dims, q, r, measured, jitter, "q")


def local_linear_trend(q_level=1.0, q_slope=1.0, r=1.0, *, measured=None, jitter=0.0) -> ContinuousModel:
    r"""Local linear trend: a level whose slope itself wanders.

    State [level, slope]: dlevel = slope dt + dβ₁, dslope = dβ₂ with
    E[dβ₁²] = q_level dt and E[dβ₂²] = q_slope dt. Discretised:
    A = [[1, Δ], [0, 1]], Q = q_level [[Δ, 0], [0, 0]] + q_slope [[Δ³/3, Δ²/2], [Δ²/2, Δ]].
    With q_level = 0 it is the one-dimensional constant-velocity model.

    Args:
        q_level: level diffusion per unit time.
        q_slope: slope diffusion per unit time.
        r: measurement noise variance, scalar or (p,).
        measured: state indices measured (default: the level, index 0).

    Example:
        >>> kx.local_linear_trend(0.1, 0.01, 1.0).C
        Array([[1., 0.]], dtype=float32)
    """
    dtype = _dtype(q_level, q_slope, r)
    F = jnp.asarray([[0.0, 1.0], [0.0, 0.0]], dtype)
    G = jnp.diag(jnp.stack([jnp.asarray(q_level, dtype), jnp.asarray(q_slope, dtype)]))
    C, R = _measurement(2, measured, [0], r, dtype)
    return ContinuousModel(drift=F, diffusion=G, C=C, R=R, jitter=jitter)


def damped_oscillator(frequency=1.0, damping=0.1, q=1.0, r=1.0, *, measured=None, jitter=0.0) -> ContinuousModel:
    r"""Stochastically driven damped harmonic oscillator (vibration, seasonal cycles).

    State [displacement, rate]:
    d²x/dt² = −ω² x − 2ζω dx/dt + white noise of spectral density q, with
    ω = 2π·frequency. Drift F = [[0, 1], [−ω², −2ζω]], diffusion
    G = diag(0, q). For ζ > 0 the displacement settles to the stationary
    variance q / (4 ζ ω³).

    Args:
        frequency: undamped natural frequency in cycles per time unit.
        damping: damping ratio ζ (0 < ζ < 1 oscillates; ζ ≥ 1 does not).
        q: forcing noise spectral density.
        r: measurement noise variance, scalar or (p,).
        measured: state indices measured (default: the displacement, index 0).

    Example:
        >>> cm = kx.damped_oscillator(frequency=1 / 365.25, damping=0.05, q=1e-6)
        >>> cm.drift.shape
        (2, 2)
    """
    dtype = _dtype(frequency, damping, q, r)
    omega = 2 * jnp.pi * jnp.asarray(frequency, dtype)
    zeta = jnp.asarray(damping, dtype)
    zero, one = jnp.zeros((), dtype), jnp.ones((), dtype)
    F = jnp.stack([jnp.stack([zero, one]), jnp.stack([-omega**2, -2 * zeta * omega])])
    G = jnp.diag(jnp.stack([zero, jnp.asarray(q, dtype)]))
    C, R = _measurement(2, measured, [0], r, dtype)
    return ContinuousModel(drift=F, diffusion=G, C=C, R=R, jitter=jitter)
