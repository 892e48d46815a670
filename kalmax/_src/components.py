r"""Composed continuous-time models: a sum of components, each its own block of states.

A *component* is a small linear stochastic differential equation on its own
states, dx_c = F_c x_c dt + dβ_c with E[dβ_c dβ_cᵀ] = G_c dt, and an *output*
row h_c: the component's contribution to a measurement at time τ is
h_c x_c(τ). A regression component has no states; its contribution is a known
offset X_τ β. Composing components stacks their states,

    x = [x_1; x_2; ...],   F = blockdiag(F_1, F_2, ...),   G = blockdiag(G_1, G_2, ...),

and measurement column i reads the sum of the outputs of the components that
column lists:

    y_i(τ) = Σ_{c ∈ column i} h_c x_c(τ) + Σ_{regressions r ∈ column i} X_{r,τ} β_r + v_i,
    v ~ N(0, diag(r)).

So C is the block row [h_c or 0 per component] for each column, R = diag(r),
and d_τ = the regressions' offsets. Because F and G are block-diagonal, so are
A = exp(F Δ) and Q = ∫_0^Δ e^{Fs} G e^{Fᵀs} ds: the components evolve
independently and meet only in the measurements. The exact discretisation is
:func:`kalmax.discretize`'s (``ContinuousModel.at_times``).

The components (ω = 2π/period throughout):

- **level**: a random walk, F = 0, G = q; A = 1, Q = q Δ.
- **trend** (local linear trend): state [level, slope], F = [[0, 1], [0, 0]],
  G = diag(q_level, q_slope); A = [[1, Δ], [0, 1]],
  Q = q_level diag(Δ, 0) + q_slope [[Δ³/3, Δ²/2], [Δ²/2, Δ]].
- **seasonal** (trigonometric form), a fixed period and K harmonics: for
  harmonic j = 1..K the pair (γ_j, γ*_j) turns at ω_j = 2πj/period,
  F_j = [[0, ω_j], [−ω_j, 0]], driven by white noise G_j = q I₂; the output is
  Σ_j γ_j. F_j is skew-symmetric, so exp(F_j s) is the rotation

      R(ω_j s) = [[cos ω_j s, sin ω_j s], [−sin ω_j s, cos ω_j s]]

  and, R being orthogonal, Q_j = ∫_0^Δ R(ω_j s) q I R(ω_j s)ᵀ ds = q Δ I₂:
  the exact discretisation over any gap is a rotation by ω_j Δ plus isotropic
  noise growing linearly with Δ. With q = 0 the pattern is a fixed sum of
  sinusoids (then give a ``jitter``: Q would be singular). The amplitude of
  harmonic j at time τ is √(γ_j² + γ*_j²).
  With ``order=2`` each harmonic also has a rate pair (δ_j, δ*_j) turning
  with it, F_j = [[Ω_j, I], [0, Ω_j]] (Ω_j the skew block above),
  G_j = diag(q I₂, q_rate I₂): A_j = [[R, Δ R], [0, R]] with R = R(ω_j Δ)
  and Q_j = [[q Δ + q_rate Δ³/3, q_rate Δ²/2], [q_rate Δ²/2, q_rate Δ]] ⊗ I₂.
  In the turning frame the coefficients are then a local linear trend
  rather than a random walk: a pattern that changes smoothly.
- **cycle** (damped, stochastic): the seasonal rotation with a damping rate
  ρ > 0, F = [[−ρ, ω], [−ω, −ρ]], G = q I₂. F = −ρ I + (skew part) and the
  two commute, so exp(F s) = e^{−ρs} R(ω s) and
  Q = q (1 − e^{−2ρΔ})/(2ρ) I₂; it is stationary, with variance q/(2ρ) per
  state (the solution of F P + P Fᵀ + G = 0). Its period can be fitted.
- **oscillator**: a noise-driven damped harmonic oscillator, state
  [displacement, rate], F = [[0, 1], [−ω², −2ζω]], G = diag(0, q), output the
  displacement (stationary variance q/(4ζω³)). Composed with a level it is an
  oscillation around a wandering level.
- **regression** on known inputs: d_τ = X_τ β (inputs X of shape (T, k)).

Regression: β as parameters, not as states. β enters as a fitted parameter
(in the parameter dict, named ``NAME.beta``) through a time-varying offset d
of shape (T, p), which :class:`StateSpace` accepts per step. The alternative,
β as constant states with zero diffusion, would need a time-varying C
(T, p, n) and k more states (the solve costs O(T n³)), and zero diffusion
makes Q singular so that a jitter would change the model. As parameters, β has
a gradient by ordinary differentiation, the state size and C stay
time-invariant, and ``kx.fit(..., neg_log_lik_fn=...)`` gives β's standard
errors from the observed information. The likelihood is quadratic in β, so the
fit is well posed; scale the input columns to similar magnitudes for the
optimiser's sake. A constant input column duplicates a level under a flat
prior: the likelihood does not change along that direction, so leave the
constant out when the model has a level or a trend.

Flat prior. A composed model has no prior on its first state (a flat prior:
``x0_cov`` None), so every state must be identified by the measurements: a
seasonal component's 2K states (and a cycle's or oscillator's 2) are
identified once the record holds observations at enough distinct phases
(2K plus the other components' states, in general position); the filter's
states are NaN until then, and the smoother's are NaN if the whole record is
too short. Two level-like components read by the same column alone (a level
and a trend; two seasonals of the same period) are never separately
identified, and the smoother returns NaN. A proper prior can be set with
``model.replace(x0_mean=..., x0_cov=...)``.

Parameters are named ``COMPONENT.PARAMETER`` (``"trend.q_slope"``,
``"day.q"``, ``"reg.beta"``) plus ``"r"``, the measurement noise variances
(p,): a flat dict of arrays, so ``jax.grad``, ``jax.vmap`` and Optax work on
it directly. Values are in natural units; :meth:`ComposedModel.to_unconstrained`
and :meth:`ComposedModel.from_unconstrained` take logs of the positive ones
for fitting.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Callable, Dict, Mapping, Optional, Sequence, Tuple, Union

import jax
import jax.numpy as jnp
import numpy as np
import scipy.linalg

from .continuous import ContinuousModel

Array = Any

# Name of the measurement-noise entry of the parameter dict.
NOISE = "r"


def _concrete(x):
    """x as a NumPy array when its value is known while tracing, else None."""
    try:
        return np.asarray(x)
    except (jax.errors.TracerArrayConversionError, jax.errors.ConcretizationTypeError):
        return None


def _check_name(name, what="name"):
    if not isinstance(name, str) or not name or "." in name or name != name.strip():
        raise ValueError(f"{what} must be a non-empty string without '.' or surrounding spaces; got {name!r}.")
    if name == NOISE:
        raise ValueError(f"{what} {name!r} is reserved for the measurement noise; choose another.")


def _positive_static(value, name):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a positive number; got {value!r}.") from None
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"{name} must be a positive finite number; got {value!r}.")
    return v


@dataclasses.dataclass(frozen=True, eq=False)
class Component:
    r"""One block of a composed model: its states, parameters, dynamics and output.

    Made by :func:`level_component`, :func:`trend_component`,
    :func:`seasonal_component`, :func:`cycle_component`,
    :func:`oscillator_component`, :func:`regression_component` (or directly,
    for a kind of your own), and combined by :func:`compose_components`.

    Fields:
        name: the component's name; its parameters are ``name.PARAMETER``.
        kind: a short word for the kind (``"level"``, ``"seasonal"``, ...).
        state_names: names of its states (n_c of them; none for a regression).
        parameter_shapes: local parameter name → shape (``()`` for scalars).
        initial: local parameter name → starting value.
        positive: local names of the parameters that must be positive.
        output: (n_c,) NumPy row h_c; the component adds h_c x_c to every
            measurement column that reads it.
        dynamics: ``dynamics(params, dtype) -> (F_c, G_c)``, both (n_c, n_c),
            from a dict of its local parameters. Return F_c as a NumPy array
            when it does not depend on the parameters: a drift known while
            tracing lets the discretisation size its loop statically.
        offset: for a regression, ``offset(params, inputs, dtype) -> (T,)``.
        inputs: for a regression, the stored (T, k) inputs, or None when they
            are passed to :meth:`ComposedModel.model` instead.
        input_count: for a regression, k.
    """

    name: str
    kind: str
    state_names: Tuple[str, ...]
    parameter_shapes: Mapping[str, Tuple[int, ...]]
    initial: Mapping[str, Any]
    positive: frozenset
    output: np.ndarray
    dynamics: Optional[Callable] = None
    offset: Optional[Callable] = None
    inputs: Optional[Array] = None
    input_count: int = 0

    def __post_init__(self):
        _check_name(self.name, "component name")
        if set(self.initial) != set(self.parameter_shapes):
            raise ValueError(f"component {self.name!r}: initial values {sorted(self.initial)} must name exactly "
                             f"the parameters {sorted(self.parameter_shapes)}.")
        if not set(self.positive) <= set(self.parameter_shapes):
            raise ValueError(f"component {self.name!r}: positive names {sorted(self.positive)} are not parameters.")
        if np.shape(self.output) != (len(self.state_names),):
            raise ValueError(f"component {self.name!r}: output must have shape ({len(self.state_names)},) "
                             f"(one weight per state); got {np.shape(self.output)}.")
        if len(self.state_names) and self.dynamics is None:
            raise ValueError(f"component {self.name!r} has states but no dynamics.")
        if not len(self.state_names) and self.offset is None:
            raise ValueError(f"component {self.name!r} has neither states nor an offset.")
        for k, v in self.initial.items():
            if tuple(np.shape(v)) != tuple(self.parameter_shapes[k]):
                raise ValueError(f"component {self.name!r}: the starting value of {k!r} must have shape "
                                 f"{tuple(self.parameter_shapes[k])}; got {tuple(np.shape(v))}.")
            v_np = _concrete(v)
            if k in self.positive and v_np is not None and not np.all(v_np > 0):
                raise ValueError(f"component {self.name!r}: {k} must be positive; got {v_np.tolist()}.")

    @property
    def state_size(self) -> int:
        return len(self.state_names)


def _scalar(params, key, dtype):
    return jnp.asarray(params[key], dtype)


# ----------------------------------------------------------------------------
# The component kinds.
# ----------------------------------------------------------------------------


def level_component(name: str = "level", *, q=1.0) -> Component:
    r"""A level that wanders as a random walk: dℓ = dβ, E[dβ²] = q dt.

    Discretised over a step Δ: A = 1, Q = q Δ. One state, ``NAME.level``; one
    parameter, ``NAME.q`` (diffusion per unit time, positive), starting at ``q``.

    Example:
        >>> c = kx.level_component("level", q=0.5)
        >>> c.state_names, dict(c.initial)
        (('level',), {'q': 0.5})
    """
    _check_name(name)

    def dynamics(p, dtype):
        return np.zeros((1, 1), dtype), jnp.reshape(_scalar(p, "q", dtype), (1, 1))

    return Component(name=name, kind="level", state_names=("level",), parameter_shapes={"q": ()},
                     initial={"q": q}, positive=frozenset({"q"}), output=np.ones(1), dynamics=dynamics)


def trend_component(name: str = "trend", *, q_level=1.0, q_slope=0.01) -> Component:
    r"""Local linear trend: a level with a wandering slope.

    States [level, slope]: dℓ = s dt + dβ₁, ds = dβ₂, E[dβ₁²] = q_level dt,
    E[dβ₂²] = q_slope dt. Discretised: A = [[1, Δ], [0, 1]],
    Q = q_level diag(Δ, 0) + q_slope [[Δ³/3, Δ²/2], [Δ²/2, Δ]]. The output is
    the level. Parameters ``NAME.q_level`` and ``NAME.q_slope`` (positive).

    Example:
        >>> kx.trend_component("trend").state_names
        ('level', 'slope')
    """
    _check_name(name)

    def dynamics(p, dtype):
        F = np.array([[0.0, 1.0], [0.0, 0.0]], dtype)
        G = jnp.diag(jnp.stack([_scalar(p, "q_level", dtype), _scalar(p, "q_slope", dtype)]))
        return F, G

    return Component(name=name, kind="trend", state_names=("level", "slope"),
                     parameter_shapes={"q_level": (), "q_slope": ()},
                     initial={"q_level": q_level, "q_slope": q_slope},
                     positive=frozenset({"q_level", "q_slope"}), output=np.array([1.0, 0.0]), dynamics=dynamics)


def seasonal_component(name: str, period: float, harmonics: int = 1, *, q=0.01, order: int = 1,
                       q_rate=1e-6) -> Component:
    r"""A seasonal pattern of fixed ``period`` in trigonometric form, on any timestamps.

    Harmonic j = 1..K (K = ``harmonics``) is a pair of states (γ_j, γ*_j)
    turning at ω_j = 2πj/period and driven by white noise of diffusion q:

        d[γ_j, γ*_j]ᵀ = [[0, ω_j], [−ω_j, 0]] [γ_j, γ*_j]ᵀ dt + dβ_j,   E[dβ_j dβ_jᵀ] = q I₂ dt.

    Over a step Δ this is exactly a rotation by ω_j Δ,
    A_j = [[cos ω_jΔ, sin ω_jΔ], [−sin ω_jΔ, cos ω_jΔ]], plus noise
    Q_j = q Δ I₂ (the module docstring derives it). The output is Σ_j γ_j;
    harmonic j has amplitude √(γ_j² + γ*_j²). The period is fixed (it sets
    the shape of the model); the one parameter is ``NAME.q`` (positive), the
    same for every harmonic.

    ``order=2`` makes the pattern change smoothly. Seen from a frame turning
    with the harmonic, the pair's coefficients a_j = R(−ω_j t)[γ_j, γ*_j]ᵀ
    are then a random walk (q) plus an integrated random walk (``q_rate``),
    like a local linear trend, instead of a random walk alone: each harmonic
    gets a second pair of states, its rate (δ_j, δ*_j), turning with it,

        d[γ; δ] = [[Ω_j, I₂], [0, Ω_j]] [γ; δ] dt + dβ,   E[dβ dβᵀ] = diag(q I₂, q_rate I₂) dt,

    with Ω_j = [[0, ω_j], [−ω_j, 0]]. Ω_j commutes with I₂, so over a step Δ

        A_j = [[R(ω_jΔ), Δ R(ω_jΔ)], [0, R(ω_jΔ)]],
        Q_j = [[q Δ + q_rate Δ³/3, q_rate Δ²/2], [q_rate Δ²/2, q_rate Δ]] ⊗ I₂

    (the rotations cancel in e^{F s} G e^{F s}ᵀ because R Rᵀ = I). A random
    walk's uncertainty across a gap grows like Δ, the integrated one's like
    Δ³ with a much smaller q_rate: a pattern that drifts slowly and smoothly
    (a daily temperature curve through the year) is bridged across gaps
    without the random walk's wide intervals. 4K states.

    Args:
        name: the component's name.
        period: the period, in the units of the timestamps (24.0 for a daily
            pattern on hours).
        harmonics: K ≥ 1; the pattern's detail (K harmonics resolve features
            down to about period/(2K)). 2K states (4K with ``order=2``).
            Sampled N times per period, harmonic N/2 is seen only through
            its cosine (its sine state is never identified): keep K < N/2.
        q: starting value of the diffusion of the pattern.
        order: 1 (the coefficients are a random walk) or 2 (plus an
            integrated random walk: a smoothly changing pattern).
        q_rate: for ``order=2``, starting value of the diffusion of the rates
            (parameter ``NAME.q_rate``, positive).

    States ``c1, s1, c2, s2, ...`` (γ_1, γ*_1, ...); with ``order=2``
    ``c1, s1, c1_rate, s1_rate, c2, ...``. With a flat prior the states need
    observations at enough distinct phases and times (module docstring,
    "Flat prior").

    Example:
        >>> day = kx.seasonal_component("day", period=24.0, harmonics=2)
        >>> day.state_names, day.output
        (('c1', 's1', 'c2', 's2'), array([1., 0., 1., 0.]))
        >>> smooth = kx.seasonal_component("day", period=24.0, harmonics=1, order=2)
        >>> smooth.state_names, sorted(smooth.parameter_shapes)
        (('c1', 's1', 'c1_rate', 's1_rate'), ['q', 'q_rate'])
    """
    _check_name(name)
    period = _positive_static(period, "period")
    if isinstance(harmonics, bool) or not isinstance(harmonics, (int, np.integer)) or harmonics < 1:
        raise ValueError(f"harmonics must be a positive integer; got {harmonics!r}.")
    if isinstance(order, bool) or order not in (1, 2):
        raise ValueError(f"order must be 1 (random-walk pattern) or 2 (smoothly changing pattern); got {order!r}.")
    K, order = int(harmonics), int(order)
    m = 2 * order  # states per harmonic
    F = np.zeros((m * K, m * K))
    for j in range(1, K + 1):
        w = 2.0 * np.pi * j / period
        b = m * (j - 1)
        for k in range(0, m, 2):  # the pattern pair, and for order 2 the rate pair, both turn at ω_j
            F[b + k, b + k + 1] = w
            F[b + k + 1, b + k] = -w
        if order == 2:
            F[b:b + 2, b + 2:b + 4] = np.eye(2)

    if order == 1:
        def dynamics(p, dtype):
            return F.astype(dtype), _scalar(p, "q", dtype) * jnp.eye(2 * K, dtype=dtype)

        names = tuple(s for j in range(1, K + 1) for s in (f"c{j}", f"s{j}"))
        shapes, initial = {"q": ()}, {"q": q}
    else:
        def dynamics(p, dtype):
            qq, qr = _scalar(p, "q", dtype), _scalar(p, "q_rate", dtype)
            return F.astype(dtype), jnp.diag(jnp.tile(jnp.stack([qq, qq, qr, qr]), K))

        names = tuple(s for j in range(1, K + 1) for s in (f"c{j}", f"s{j}", f"c{j}_rate", f"s{j}_rate"))
        shapes, initial = {"q": (), "q_rate": ()}, {"q": q, "q_rate": q_rate}
    output = np.tile(np.eye(m)[0], K)
    return Component(name=name, kind="seasonal", state_names=names, parameter_shapes=shapes,
                     initial=initial, positive=frozenset(shapes), output=output, dynamics=dynamics)


def _omega(p, dtype):
    return 2.0 * jnp.pi / _scalar(p, "period", dtype)


def cycle_component(name: str = "cycle", *, period=1.0, damping=0.1, q=1.0) -> Component:
    r"""A damped stochastic cycle: a rotation at 2π/period whose amplitude decays at rate ``damping``.

    States [c, s]: d[c, s]ᵀ = [[−ρ, ω], [−ω, −ρ]] [c, s]ᵀ dt + dβ, E[dβ dβᵀ] = q I₂ dt,
    with ω = 2π/period and ρ = damping (per time unit). Discretised:
    A = e^{−ρΔ} [[cos ωΔ, sin ωΔ], [−sin ωΔ, cos ωΔ]], Q = q (1 − e^{−2ρΔ})/(2ρ) I₂.
    Stationary, with variance q/(2ρ) per state and correlation time 1/ρ.
    The output is c. Parameters ``NAME.period``, ``NAME.damping`` and
    ``NAME.q``, all positive and all fittable.

    Example:
        >>> cyc = kx.cycle_component("cycle", period=12.0, damping=0.05, q=0.1)
        >>> sorted(cyc.parameter_shapes)
        ['damping', 'period', 'q']
    """
    _check_name(name)

    def dynamics(p, dtype):
        w, rho = _omega(p, dtype), _scalar(p, "damping", dtype)
        F = jnp.stack([jnp.stack([-rho, w]), jnp.stack([-w, -rho])])
        return _static_if_possible(F, dtype), _scalar(p, "q", dtype) * jnp.eye(2, dtype=dtype)

    return Component(name=name, kind="cycle", state_names=("c", "s"),
                     parameter_shapes={"period": (), "damping": (), "q": ()},
                     initial={"period": period, "damping": damping, "q": q},
                     positive=frozenset({"period", "damping", "q"}), output=np.array([1.0, 0.0]), dynamics=dynamics)


def oscillator_component(name: str = "oscillator", *, period=1.0, damping=0.1, q=1.0) -> Component:
    r"""A noise-driven damped harmonic oscillator (compose it with a level for an oscillation around a level).

    States [displacement u, rate u']: d²u/dt² = −ω² u − 2ζω du/dt + white noise
    of spectral density q, ω = 2π/period (the undamped natural period) and
    ζ = damping (the damping ratio: ζ < 1 oscillates). Drift
    F = [[0, 1], [−ω², −2ζω]], diffusion G = diag(0, q); the output is u, with
    stationary variance q/(4ζω³). Parameters ``NAME.period``, ``NAME.damping``
    and ``NAME.q``, all positive.

    Example:
        >>> osc = kx.oscillator_component("sway", period=3.0, damping=0.2)
        >>> osc.state_names
        ('displacement', 'rate')
    """
    _check_name(name)

    def dynamics(p, dtype):
        w, zeta = _omega(p, dtype), _scalar(p, "damping", dtype)
        zero, one = jnp.zeros((), dtype), jnp.ones((), dtype)
        F = jnp.stack([jnp.stack([zero, one]), jnp.stack([-w * w, -2.0 * zeta * w])])
        G = jnp.diag(jnp.stack([zero, _scalar(p, "q", dtype)]))
        return _static_if_possible(F, dtype), G

    return Component(name=name, kind="oscillator", state_names=("displacement", "rate"),
                     parameter_shapes={"period": (), "damping": (), "q": ()},
                     initial={"period": period, "damping": damping, "q": q},
                     positive=frozenset({"period", "damping", "q"}), output=np.array([1.0, 0.0]), dynamics=dynamics)


def _static_if_possible(F, dtype):
    """F as NumPy when its value is known (parameters not traced), for a statically sized discretisation."""
    F_np = _concrete(F)
    return F_np.astype(np.dtype(dtype)) if F_np is not None else F


def _check_inputs(name, inputs):
    shape = tuple(np.shape(inputs))
    if len(shape) != 2 or shape[1] < 1:
        raise ValueError(f"inputs of regression component {name!r} must have shape (T, k) with k >= 1 "
                         f"(one row per timestamp, one column per input); got {shape}.")
    X = _concrete(inputs)
    if X is not None:
        if not np.issubdtype(X.dtype, np.number) or np.iscomplexobj(X):
            raise TypeError(f"inputs of regression component {name!r} must be real numbers; got dtype {X.dtype}.")
        if not np.all(np.isfinite(X)):
            raise ValueError(f"inputs of regression component {name!r} must be finite at every timestamp "
                             f"(fill gaps in the inputs first); found {int(np.sum(~np.isfinite(X)))} non-finite.")
    return shape


def regression_component(name: str, inputs, *, beta=None) -> Component:
    r"""Regression on known input columns: a time-varying offset X_τ β.

    Adds d_τ = X_τ β to every measurement column that reads it. β is a fitted
    parameter, ``NAME.beta`` of shape (k,) (any sign), not a state: the module
    docstring gives the reasons. No states.

    Args:
        name: the component's name.
        inputs: (T, k) inputs, one row per timestamp of the model (finite
            everywhere, also where the measurements are missing), or an int k
            to pass the (T, k) array later, as ``inputs={name: X}`` of
            :meth:`ComposedModel.model` (so that it can be a ``jit`` argument
            or be ``vmap``-ed over).
        beta: starting value of β, (k,); default zeros.

    The model's offset then has shape (T, p), so ``at_times`` must be given
    the same T timestamps; a forecast needs the future inputs.

    Example:
        >>> X = np.linspace(0.0, 1.0, 5)[:, None]
        >>> reg = kx.regression_component("temp", X)
        >>> reg.parameter_shapes, reg.state_names
        ({'beta': (1,)}, ())
    """
    _check_name(name)
    if isinstance(inputs, (int, np.integer)) and not isinstance(inputs, bool):
        if inputs < 1:
            raise ValueError(f"inputs of regression component {name!r} must be a (T, k) array or a count k >= 1; "
                             f"got {inputs}.")
        k, stored = int(inputs), None
    else:
        k, stored = _check_inputs(name, inputs)[1], inputs
    beta0 = np.zeros(k) if beta is None else beta
    if tuple(np.shape(beta0)) != (k,):
        raise ValueError(f"beta of regression component {name!r} must have shape ({k},); got {tuple(np.shape(beta0))}.")

    def offset(p, X, dtype):
        return jnp.asarray(X, dtype) @ jnp.asarray(p["beta"], dtype)

    return Component(name=name, kind="regression", state_names=(), parameter_shapes={"beta": (k,)},
                     initial={"beta": beta0}, positive=frozenset(), output=np.zeros(0), offset=offset,
                     inputs=stored, input_count=k)


# ----------------------------------------------------------------------------
# Composition.
# ----------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, eq=False)
class ComposedModel:
    r"""A sum of components as one continuous-time model, with named parameters.

    Made by :func:`compose_components`. :meth:`model` maps a parameter dict
    to a :class:`ContinuousModel`; the other methods name and transform the
    parameters and split a smoothed result back into the components.

    Attributes:
        components: the components, in state order.
        columns: for each measurement column, the names of the components it reads.
        column_names: one name per measurement column.
        jitter: passed to the :class:`ContinuousModel`.
        initial_noise: the starting value of ``r`` (scalar or (p,)).
    """

    components: Tuple[Component, ...]
    columns: Tuple[Tuple[str, ...], ...]
    column_names: Tuple[str, ...]
    jitter: float
    initial_noise: Any

    # -- names and sizes ---------------------------------------------------
    @property
    def state_size(self) -> int:
        return sum(c.state_size for c in self.components)

    @property
    def measurement_size(self) -> int:
        return len(self.columns)

    @property
    def state_names(self) -> Tuple[str, ...]:
        """``COMPONENT.STATE`` for every state, in order (n of them)."""
        return tuple(f"{c.name}.{s}" for c in self.components for s in c.state_names)

    def state_slices(self) -> Dict[str, slice]:
        """Component name → the slice of the state vector that holds its states."""
        out, start = {}, 0
        for c in self.components:
            out[c.name] = slice(start, start + c.state_size)
            start += c.state_size
        return out

    @property
    def parameter_shapes(self) -> Dict[str, Tuple[int, ...]]:
        """Parameter name → shape; ``"r"`` is (p,)."""
        shapes = {f"{c.name}.{k}": tuple(s) for c in self.components for k, s in c.parameter_shapes.items()}
        shapes[NOISE] = (self.measurement_size,)
        return shapes

    @property
    def parameter_names(self) -> Tuple[str, ...]:
        return tuple(self.parameter_shapes)

    @property
    def positive(self) -> frozenset:
        """Names of the parameters that must be positive (all but regression coefficients)."""
        return frozenset({f"{c.name}.{k}" for c in self.components for k in c.positive} | {NOISE})

    def measurement_matrix(self) -> np.ndarray:
        """C (p, n) as NumPy: row i holds each component's output row where column i reads it."""
        C = np.zeros((self.measurement_size, self.state_size))
        slices = self.state_slices()
        for i, names in enumerate(self.columns):
            for name in names:
                C[i, slices[name]] += self._by_name(name).output
        return C

    def _by_name(self, name) -> Component:
        for c in self.components:
            if c.name == name:
                return c
        raise KeyError(name)

    # -- parameters ----------------------------------------------------------
    def initial_params(self, dtype=None) -> Dict[str, Array]:
        """The starting values given to the components (and ``r``), as a dict of arrays in natural units."""
        dtype = jnp.result_type(float) if dtype is None else dtype
        out = {f"{c.name}.{k}": jnp.asarray(v, dtype) for c in self.components for k, v in c.initial.items()}
        out[NOISE] = jnp.broadcast_to(jnp.asarray(self.initial_noise, dtype), (self.measurement_size,))
        return out

    def to_unconstrained(self, params) -> Dict[str, Array]:
        """log of the positive parameters, the others unchanged (the inverse of :meth:`from_unconstrained`).

        ``params`` may hold a subset of the names, to fit some parameters and
        hold the rest: ``model({**held, **from_unconstrained(free)})``.
        """
        self._check_names(params, "params", subset=True)
        return {k: (jnp.log(v) if k in self.positive else jnp.asarray(v)) for k, v in params.items()}

    def from_unconstrained(self, u) -> Dict[str, Array]:
        """exp of the positive parameters, the others unchanged: any real dict gives a valid model."""
        self._check_names(u, "unconstrained params", subset=True)
        return {k: (jnp.exp(v) if k in self.positive else v) for k, v in u.items()}

    def _check_names(self, params, what, subset=False):
        if not isinstance(params, Mapping):
            raise TypeError(f"{what} must be a dict from parameter name to array; got {type(params).__name__}.")
        shapes = self.parameter_shapes
        missing = [] if subset else [k for k in shapes if k not in params]
        unknown = [k for k in params if k not in shapes]
        if unknown:
            raise ValueError(f"{what} has unknown names {unknown}; the parameters are {list(shapes)}.")
        if missing:
            raise ValueError(f"{what} is missing {missing}; the parameters are {list(shapes)} "
                             "(start from initial_params()).")
        for k, shape in shapes.items():
            if k not in params:
                continue
            got = tuple(np.shape(params[k]))
            if got != shape and not (k == NOISE and got == ()):
                raise ValueError(f"{what}[{k!r}] must have shape {shape}; got {got}.")

    def _dtype(self, params):
        leaves = [params[k] for k in self.parameter_shapes]
        dtype = jnp.result_type(*[jnp.asarray(x) if not hasattr(x, "dtype") else x for x in leaves], float)
        if not jnp.issubdtype(dtype, jnp.floating):
            dtype = jnp.result_type(float)
        return dtype

    def _inputs(self, inputs):
        given = {} if inputs is None else dict(inputs)
        regs = {c.name: c for c in self.components if c.state_size == 0}
        unknown = [k for k in given if k not in regs]
        if unknown:
            raise ValueError(f"inputs has unknown names {unknown}; the regression components are {list(regs)}.")
        out = {}
        for name, c in regs.items():
            X = given.get(name, c.inputs)
            if X is None:
                raise ValueError(f"inputs[{name!r}] is required: regression component {name!r} was made without "
                                 f"its (T, {c.input_count}) inputs.")
            shape = _check_inputs(name, X)
            if shape[1] != c.input_count:
                raise ValueError(f"inputs[{name!r}] must have shape (T, {c.input_count}); got {shape}.")
            out[name] = X
        Ts = {np.shape(X)[0] for X in out.values()}
        if len(Ts) > 1:
            raise ValueError(f"the regression inputs must all have the same number of rows T; got {sorted(Ts)}.")
        return out

    def model(self, params, *, inputs: Optional[Mapping[str, Array]] = None) -> ContinuousModel:
        r"""The :class:`ContinuousModel` for parameter values ``params`` (natural units).

        Args:
            params: dict with every name of :attr:`parameter_names` (scalars,
                ``r`` (p,) or a scalar for all columns, ``NAME.beta`` (k,)).
                Positive parameters must be positive (checked when their
                values are known; fit them through :meth:`from_unconstrained`).
            inputs: optional dict regression name → (T, k) inputs, replacing
                (or supplying) the inputs stored in the component.

        Returns:
            ContinuousModel with drift and diffusion (n, n) block-diagonal,
            C (p, n), R = diag(r) (p, p), d (T, p) when there is a regression
            (else None), a flat prior, and this composition's jitter.
            Differentiable with respect to every parameter.
        """
        self._check_names(params, "params")
        for k in sorted(self.positive):
            v = _concrete(params[k])
            if v is not None and not np.all(v > 0):
                raise ValueError(f"params[{k!r}] must be positive; got {v.tolist()}.")
        X_by_name = self._inputs(inputs)
        dtype = self._dtype(params)
        Fs, Gs, all_static = [], [], True
        for c in self.components:
            if c.state_size == 0:
                continue
            local = {k: params[f"{c.name}.{k}"] for k in c.parameter_shapes}
            F, G = c.dynamics(local, dtype)
            all_static = all_static and isinstance(F, np.ndarray)
            Fs.append(F)
            Gs.append(jnp.asarray(G, dtype))
        if all_static:
            F = scipy.linalg.block_diag(*Fs).astype(np.dtype(dtype))
        else:
            F = jax.scipy.linalg.block_diag(*[jnp.asarray(f, dtype) for f in Fs])
        G = jax.scipy.linalg.block_diag(*Gs)
        C = jnp.asarray(self.measurement_matrix(), dtype)
        r = jnp.broadcast_to(jnp.asarray(params[NOISE], dtype), (self.measurement_size,))
        R = jnp.diag(r)
        d = None
        if X_by_name:
            offsets = {}
            for name, X in X_by_name.items():
                c = self._by_name(name)
                offsets[name] = c.offset({k: params[f"{name}.{k}"] for k in c.parameter_shapes}, X, dtype)
            T = next(iter(offsets.values())).shape[0]
            cols = []
            for names in self.columns:
                col = jnp.zeros((T,), dtype)
                for name in names:
                    if name in offsets:
                        col = col + offsets[name]
                cols.append(col)
            d = jnp.stack(cols, axis=1)
        return ContinuousModel(drift=F, diffusion=G, C=C, R=R, d=d, jitter=self.jitter)

    # -- reading results -----------------------------------------------------
    def contributions(self, states, params=None, *, inputs=None) -> Dict[str, Array]:
        r"""Each component's contribution to a measurement, from states (T, n).

        Returns a dict component name → (T,): h_c x_c(τ) for a component with
        states, X_τ β for a regression (which needs ``params``). Column i of
        the smoothed measurements is the sum of the contributions of the
        components it reads.
        """
        states = jnp.asarray(states)
        if states.ndim != 2 or states.shape[1] != self.state_size:
            raise ValueError(f"states must have shape (T, {self.state_size}); got {tuple(states.shape)}.")
        slices = self.state_slices()
        out = {}
        X_by_name = None
        for c in self.components:
            if c.state_size:
                out[c.name] = states[:, slices[c.name]] @ jnp.asarray(c.output, states.dtype)
            else:
                if params is None:
                    raise ValueError(f"params is required: regression component {c.name!r} contributes X β.")
                self._check_names(params, "params")
                if X_by_name is None:
                    X_by_name = self._inputs(inputs)
                out[c.name] = c.offset({k: params[f"{c.name}.{k}"] for k in c.parameter_shapes},
                                       X_by_name[c.name], states.dtype)
        return out

    def contribution_variances(self, state_cov) -> Dict[str, Array]:
        r"""Posterior variance of each state component's contribution, from ``state_cov`` (T, n, n).

        h_cᵀ P_cc h_c per time step (P_cc the component's diagonal block of
        ``kx.smooth(..., covariances=True).state_cov``); a regression's
        contribution has no variance here (β is a parameter) and is left out.
        """
        P = jnp.asarray(state_cov)
        n = self.state_size
        if P.ndim != 3 or P.shape[1:] != (n, n):
            raise ValueError(f"state_cov must have shape (T, {n}, {n}); got {tuple(P.shape)}.")
        out = {}
        for c in self.components:
            if c.state_size:
                s = self.state_slices()[c.name]
                h = jnp.asarray(c.output, P.dtype)
                out[c.name] = jnp.einsum("i,tij,j->t", h, P[:, s, s], h)
        return out


def compose_components(*components: Component, columns: Union[None, Sequence, Mapping] = None,
                       r=1.0, jitter: float = 0.0) -> ComposedModel:
    r"""Combine components into one model: stacked states, block-diagonal dynamics, summed outputs.

    The composed drift and diffusion are blockdiag(F_c) and blockdiag(G_c);
    measurement column i reads Σ_{c ∈ column i} h_c x_c (+ the regression
    offsets), with independent noise of variance r_i (module docstring for
    the maths, the regression choice and the flat prior).

    Args:
        *components: made by the ``*_component`` functions; names must be distinct.
        columns: which components each measurement column reads: a list of
            lists of component names (columns named ``y0``, ``y1``, ...), or a
            dict column name → list of component names. Default: one column
            ``y`` reading every component. Every component must be read by
            some column.
        r: starting value of the measurement noise variances ``r``: a scalar
            or one per column.
        jitter: added to the diagonal of every discrete Q (see
            :class:`ContinuousModel`); needed only for zero diffusions or
            repeated timestamps.

    Returns:
        :class:`ComposedModel`. Its parameter dict has ``COMPONENT.PARAMETER``
        names plus ``r`` (p,); ``.model(params)`` gives the
        :class:`ContinuousModel`.

    Example:
        >>> cm = kx.compose_components(kx.trend_component("trend"),
        ...                            kx.seasonal_component("day", period=24.0, harmonics=2), r=0.5)
        >>> cm.parameter_names
        ('trend.q_level', 'trend.q_slope', 'day.q', 'r')
        >>> params = cm.initial_params()
        >>> times = jnp.array([0.0, 1.0, 2.5, 3.0, 7.0, 8.0, 9.5, 12.0, 13.0])
        >>> y = jnp.sin(2 * jnp.pi * times / 24)[:, None]
        >>> est = kx.smooth(cm.model(params).at_times(times), y)
        >>> parts = cm.contributions(est.states)
        >>> bool(jnp.allclose(parts["trend"] + parts["day"], est.measurements[:, 0]))
        True
        >>> nll = lambda u: -kx.log_likelihood(cm.model(cm.from_unconstrained(u)).at_times(times), y)
        >>> grads = jax.grad(nll)(cm.to_unconstrained(params))
        >>> sorted(grads)
        ['day.q', 'r', 'trend.q_level', 'trend.q_slope']
    """
    if not components:
        raise ValueError("compose_components needs at least one component.")
    for c in components:
        if not isinstance(c, Component):
            raise TypeError(f"components must be Component objects (made by the *_component functions); "
                            f"got {type(c).__name__}.")
    names = [c.name for c in components]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ValueError(f"component names must be distinct; repeated: {dup}.")
    if sum(c.state_size for c in components) == 0:
        raise ValueError("compose_components needs at least one component with states (a regression alone has none).")
    if columns is None:
        column_names, cols = ("y",), (tuple(names),)
    elif isinstance(columns, Mapping):
        column_names = tuple(columns.keys())
        cols = tuple(tuple([v] if isinstance(v, str) else v) for v in columns.values())
    elif isinstance(columns, (list, tuple)):
        column_names = tuple(f"y{i}" for i in range(len(columns)))
        cols = tuple(tuple([v] if isinstance(v, str) else v) for v in columns)
    else:
        raise TypeError(f"columns must be a list of lists of component names or a dict; got {type(columns).__name__}.")
    if not cols:
        raise ValueError("columns must name at least one measurement column.")
    for cname, col in zip(column_names, cols):
        if not isinstance(cname, str) or not cname:
            raise ValueError(f"column names must be non-empty strings; got {cname!r}.")
        if not col:
            raise ValueError(f"column {cname!r} reads no component; columns must each list at least one.")
        unknown = [n for n in col if n not in names]
        if unknown:
            raise ValueError(f"column {cname!r} names unknown components {unknown}; the components are {names}.")
        if len(set(col)) != len(col):
            raise ValueError(f"column {cname!r} lists a component twice: {list(col)}.")
    unread = [n for n in names if not any(n in col for col in cols)]
    if unread:
        raise ValueError(f"components {unread} are read by no column: their states could never be identified.")
    if len(set(column_names)) != len(column_names):
        raise ValueError(f"column names must be distinct; got {list(column_names)}.")
    r_np = _concrete(r)
    if r_np is None or r_np.shape not in ((), (len(cols),)):
        raise ValueError(f"r must be a scalar or have shape ({len(cols)},) (one variance per column); "
                         f"got {tuple(np.shape(r))}.")
    if not np.all(r_np > 0):
        raise ValueError(f"r must be positive; got {r_np.tolist()}.")
    if not (float(jitter) >= 0.0):
        raise ValueError(f"jitter must be a non-negative number; got {jitter!r}.")
    return ComposedModel(components=tuple(components), columns=cols, column_names=column_names,
                         jitter=float(jitter), initial_noise=r_np)
