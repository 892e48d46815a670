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
above (a truncated Taylor series is accurate to rounding at that size), and
the pieces are joined by s doublings

    A(2h) = A(h)²,   Q(2h) = A(h) Q(h) A(h)ᵀ + Q(h),

which follow from running the recursion for two steps of length h. Both
formulas are exact, so the result is too (up to rounding), and every operation
is differentiable: ``jax.grad`` flows to F, G and the timestamps.

Nilpotent drifts (the integrator chains: random walk, constant velocity and
acceleration, the local linear trend) have a closed form that costs a few
multiply-adds per step instead of the block exponential. If F^o = 0, both
exponential series stop after o terms, e^{Fs} = Σ_{j<o} s^j F^j/j!, and

    A(h) = Σ_{j<o} h^j F^j/j!,
    Q(h) = ∫_0^h e^{Fs} G e^{Fᵀs} ds = Σ_{m=0}^{2o−2} h^{m+1}/(m+1) · S_m,
    S_m = Σ_{j+l=m} (F^j/j!) G (F^l/l!)ᵀ,

a polynomial in h with matrix coefficients: exact for every step length, no
splitting needed, and G (traced, fitted) enters only through the 2o−1 small
matrices S_m. It is used when F is known while tracing (the builders keep it
a NumPy array) and F^n = 0 holds exactly; at T = 10⁶ it made the likelihood
gradient of a fitted random walk several times faster than the series.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Optional, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from .model import StateSpace

Array = Any

# Cap on the doublings when the drift is only known at run time (traced): enough
# for ‖F‖Δ up to 2^30. The loop has this static length, so the cap is a cost
# paid on every call; steps beyond it come back NaN (never a wrong number).
_MAX_DOUBLINGS = 30
# With a concrete drift and concrete steps the loop is as long as the longest
# step needs; 1100 doublings cover every ‖F‖Δ a float64 can hold (2^1024).
_MAX_DOUBLINGS_CONCRETE = 1100


def _taylor_terms(dtype) -> int:
    # With ‖F h‖ ≤ 1 the k-th Taylor term of the block exponential is at most
    # ‖G h‖/(k−1)! relative to Q ≈ G h, so 18 terms reach float64 rounding
    # (1/17! ≈ 3e-15) and 11 terms float32 rounding (1/10! ≈ 3e-7).
    return 18 if jnp.finfo(dtype).bits > 32 else 11


def _van_loan(F, G, h, terms):
    """(A, Q) for steps h (K,) by a truncated Taylor series of the block exponential.

    Horner's scheme, E = I + Mh(I + Mh/2(I + Mh/3(...))), with a fixed number of
    terms: no data-dependent branches, so it vectorises over the steps and
    differentiates cheaply (unlike a general-purpose expm with its own scaling).
    Valid because the caller has cut the steps so that ‖F h‖ ≤ 1.
    """
    n = F.shape[-1]
    top = jnp.concatenate([-F, G], axis=1)
    bottom = jnp.concatenate([jnp.zeros_like(F), F.T], axis=1)
    Mh = jnp.concatenate([top, bottom], axis=0)[None] * h[:, None, None]  # (K, 2n, 2n)
    eye = jnp.eye(2 * n, dtype=F.dtype)
    E = eye + Mh / terms
    for k in range(terms - 1, 0, -1):
        E = eye + (Mh / k) @ E
    A = jnp.swapaxes(E[:, n:, n:], -1, -2)
    Q = A @ E[:, :n, n:]
    return A, Q


def _concrete(x):
    """x as a NumPy array when its value is known while tracing, else None."""
    try:
        return np.asarray(x)
    except (jax.errors.TracerArrayConversionError, jax.errors.ConcretizationTypeError):
        return None


def _norm1inf(M, xp):
    return xp.maximum(xp.max(xp.sum(xp.abs(M), axis=1)), xp.max(xp.sum(xp.abs(M), axis=0)))


def _doublings(F, dts, F_np, dts_np):
    """(per-step doubling counts s_k with ‖F‖ Δ_k / 2^s_k ≤ 1, static loop length).

    When F and the steps are concrete (the usual case: fixed timestamps and a
    drift with no fitted parameters) the counts are computed in NumPy and the
    loop is exactly as long as the longest step needs; a traced drift or
    traced steps get the fixed cap. The counts are piecewise constant in the
    parameters, so they carry no gradient.
    """
    if F_np is not None and dts_np is not None:
        with np.errstate(over="ignore"):
            ratio = _norm1inf(F_np.astype(np.float64), np) * np.abs(dts_np.astype(np.float64))
            counts = np.clip(np.ceil(np.log2(np.maximum(ratio, 1.0))), 0, _MAX_DOUBLINGS_CONCRETE).astype(np.int32)
        return jnp.asarray(counts), int(counts.max()) if counts.size else 0
    ratio = jax.lax.stop_gradient(_norm1inf(F, jnp) * jnp.abs(dts))
    counts = jnp.clip(jnp.ceil(jnp.log2(jnp.maximum(ratio, 1.0))), 0, _MAX_DOUBLINGS).astype(jnp.int32)
    return counts, _MAX_DOUBLINGS


def _nilpotent_powers(F_np):
    """[F^j/j! for j < o] (float64 NumPy) if F^o = 0 for some o ≤ n exactly, else None."""
    F = np.asarray(F_np, dtype=np.float64)
    n = F.shape[0]
    powers = [np.eye(n)]
    for j in range(1, n + 1):
        nxt = powers[-1] @ F / j
        if not np.any(nxt):
            return powers
        powers.append(nxt)
    return None


def _polynomial(powers, G, h):
    """(A, Q) for steps h (K,) of a nilpotent drift (module docstring: the closed form)."""
    dtype = G.dtype
    o = len(powers)
    P = jnp.asarray(np.stack(powers), dtype)  # (o, n, n)
    hp = h[:, None] ** jnp.arange(2 * o, dtype=dtype)  # h^0 .. h^(2o-1)
    A = jnp.einsum("kj,jab->kab", hp[:, :o], P)
    PG = jnp.einsum("jab,bc->jac", P, G)  # (F^j/j!) G
    S = [sum(PG[j] @ P[m - j].T for j in range(max(0, m - o + 1), min(m, o - 1) + 1)) for m in range(2 * o - 1)]
    weights = hp[:, 1:] / jnp.arange(1, 2 * o, dtype=dtype)  # h^(m+1)/(m+1), m = 0..2o-2
    Q = jnp.einsum("km,mab->kab", weights, jnp.stack(S))
    return A, Q


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
    F_np, dt_np = _concrete(drift), _concrete(dt)
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
    powers = None if F_np is None else _nilpotent_powers(F_np)
    if powers is not None:
        A, Q = _polynomial(powers, G, dts)
        Q = 0.5 * (Q + jnp.swapaxes(Q, -1, -2)) + jitter * jnp.eye(n, dtype=dtype)
        return (A[0], Q[0]) if scalar else (A, Q)
    counts, loop = _doublings(F, dts, F_np, None if dt_np is None else np.atleast_1d(dt_np))
    # h = Δ / 2^s in two halves: 2^s alone overflows (float32 beyond s = 127) for
    # the longest steps, and a power of two scales exactly.
    half = counts // 2
    h = dts * jnp.exp2(-half.astype(dtype)) * jnp.exp2(-(counts - half).astype(dtype))
    A, Q = _van_loan(F, G, h, _taylor_terms(dtype))
    # Join the 2^s pieces: x(t+2h) = A(h)[A(h) x + w1] + w2 gives
    # A(2h) = A(h)², Q(2h) = A(h) Q(h) A(h)ᵀ + Q(h).
    def double(i, AQ):
        A, Q = AQ
        keep = (i >= counts)[:, None, None]
        A2 = A @ A
        Q2 = A @ Q @ jnp.swapaxes(A, -1, -2) + Q
        return jnp.where(keep, A, A2), jnp.where(keep, Q, Q2)

    # A rolled loop with a static trip count: reverse-differentiable, and it
    # compiles in a fraction of the time of an unrolled one at the 30-step cap.
    A, Q = jax.lax.fori_loop(0, loop, double, (A, Q))
    # A step that needed more doublings than the loop ran (a traced drift past the
    # cap, or a step of inf) has no exact answer here: NaN, not a wrong number.
    short = (counts >= loop) & (jnp.abs(dts) * jax.lax.stop_gradient(_norm1inf(F, jnp)) > jnp.exp2(
        jnp.asarray(loop, dtype))) | ~jnp.isfinite(dts)
    A = jnp.where(short[:, None, None], jnp.nan, A)
    Q = jnp.where(short[:, None, None], jnp.nan, Q)
    Q = 0.5 * (Q + jnp.swapaxes(Q, -1, -2))
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
        if np.ndim(times) != 1 or np.shape(times)[0] < 1:
            raise ValueError(f"times must have shape (T,) with T >= 1; got {tuple(np.shape(times))}.")
        # Keep concrete timestamps concrete (NumPy) so that discretize can size its loop statically.
        t_np = _concrete(times)
        dt = np.diff(t_np) if t_np is not None else jnp.diff(jnp.asarray(times))
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
    # F stays a NumPy array: a concrete drift lets discretize size its loop statically.
    return ContinuousModel(drift=F.astype(dtype), diffusion=G, C=C, R=R, jitter=jitter)


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
        >>> print(kx.random_walk(q=0.1, r=1.0).at_times(jnp.array([0.0, 2.0])).Q)
        [[[0.2]]]
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
        >>> print(kx.local_linear_trend(0.1, 0.01, 1.0).C)
        [[1. 0.]]
    """
    dtype = _dtype(q_level, q_slope, r)
    F = np.asarray([[0.0, 1.0], [0.0, 0.0]], dtype)
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
