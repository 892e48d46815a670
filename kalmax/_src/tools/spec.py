"""``ModelSpec``: a named continuous-time model tied to the columns of a table.

This is what the command line fits, saves and applies: which builder
(``kind``), how many spatial axes, which state each measurement column
measures, and the parameter values in natural units. It turns into a
:class:`ContinuousModel` (and so into a discrete :class:`StateSpace` for any
timestamps), and its positive parameters map to and from an unconstrained
vector of logarithms for gradient-based fitting.

A *composed* model (kind ``"composed"``, ``kalmax fit --components``) is a sum
of components (:mod:`.composed`): ``components`` lists them with the columns
that read each, its parameters are named ``COMPONENT.PARAMETER``, and a
regression's coefficients (``NAME.beta``, any sign) are fitted as they are,
not as logarithms. Its model needs the regression input columns of the table
(``inputs``: column name → (T,) values).
"""

from __future__ import annotations

import dataclasses
from typing import Callable, Dict, Mapping, Optional, Tuple

import jax.numpy as jnp
import numpy as np

from .. import continuous
from ..components import NOISE
from ..continuous import ContinuousModel
from . import composed
from ..model import StateSpace
from .time_units import UNITS, check_pattern, unit_names


@dataclasses.dataclass(frozen=True)
class Kind:
    """A model builder as the command line sees it."""

    name: str
    summary: str
    state_names: Callable[[int], Tuple[str, ...]]
    # parameter name -> shape as a function of dims ("axis" = one per axis, "scalar")
    params: Dict[str, str]
    build: Callable  # (dims, params: dict of arrays, r (p,), measured indices) -> ContinuousModel
    fixed_dims: Optional[int] = None  # kinds that have no spatial axes


def _chain_names(prefixes):
    def names(dims):
        return tuple(f"{pre}{k}" for pre in prefixes for k in range(dims))
    return names


def _chain_build(builder):
    def build(dims, p, r, measured, jitter):
        return builder(dims, q=p["q"], r=r, measured=measured, jitter=jitter)
    return build


KINDS: Dict[str, Kind] = {
    "random-walk": Kind(
        "random-walk", "local level: each measured quantity wanders freely (state: level0..)",
        _chain_names(["level"]), {"q": "axis"}, _chain_build(continuous.random_walk)),
    "constant-velocity": Kind(
        "constant-velocity", "Wiener velocity in DIMS axes (state: position0.., velocity0..)",
        _chain_names(["position", "velocity"]), {"q": "axis"}, _chain_build(continuous.constant_velocity)),
    "constant-acceleration": Kind(
        "constant-acceleration", "Wiener acceleration in DIMS axes (state: position.., velocity.., acceleration..)",
        _chain_names(["position", "velocity", "acceleration"]), {"q": "axis"},
        _chain_build(continuous.constant_acceleration)),
    "local-linear-trend": Kind(
        "local-linear-trend", "level with a wandering slope (state: level, slope)",
        lambda dims: ("level", "slope"), {"q_level": "scalar", "q_slope": "scalar"},
        lambda dims, p, r, measured, jitter: continuous.local_linear_trend(
            p["q_level"], p["q_slope"], r, measured=measured, jitter=jitter),
        fixed_dims=1),
    "damped-oscillator": Kind(
        "damped-oscillator", "noisy damped oscillation, vibration or seasonal cycle (state: displacement, rate)",
        lambda dims: ("displacement", "rate"), {"frequency": "scalar", "damping": "scalar", "q": "scalar"},
        lambda dims, p, r, measured, jitter: continuous.damped_oscillator(
            p["frequency"], p["damping"], p["q"], r, measured=measured, jitter=jitter),
        fixed_dims=1),
}


# The kind of a sum of components (``kalmax fit --components``); not one of KINDS.
COMPOSED = "composed"


def param_shape(kind: Kind, name: str, dims: int) -> tuple:
    return (dims,) if kind.params[name] == "axis" else ()


@dataclasses.dataclass(frozen=True)
class ModelSpec:
    """A continuous-time model bound to the columns of a table.

    Attributes:
        kind: builder name, one of ``KINDS`` (e.g. ``"constant-velocity"``).
        dims: number of spatial axes (1 for the trend and oscillator kinds).
        time_column: name of the timestamp column.
        columns: measurement column names, in order (p of them).
        measured: the state name each column measures (see ``state_names``).
        params: kind-specific process parameters in natural units
            (``q``: diffusion / spectral density, per axis for the chain
            kinds; ``frequency`` in cycles per time unit; ``damping`` ratio).
        noise: measurement noise variance of each column, (p,).
        time_format: ``"number"`` (time column holds numbers) or
            ``"iso8601"`` (date-times: ISO 8601 text, Parquet timestamps, or
            text read with ``time_pattern``).
        jitter: added to the diagonal of every discrete Q (keeps it positive
            definite for very short steps).
        fit: free-form record of how the parameters were obtained (objective,
            steps, errors); informational only.
        time_unit: the unit of time the rates are per (a name of
            ``time_units.UNITS``: ``"s"``, ``"min"``, ``"h"``, ``"day"``, ...).
            Date-times are converted to it (default ``"s"``); numbers are in
            it already unless ``numeric_time_unit`` says otherwise. None
            (numbers only): the numbers' own, unnamed unit.
        numeric_time_unit: what numeric timestamps count in (e.g. ``"ms"``
            for epoch milliseconds); they are then converted exactly to
            ``time_unit``. None: no conversion.
        time_pattern: the strptime pattern that date-times were read with
            (None: ISO 8601); ``kalmax apply`` reads new data with it too.
        components: for kind ``"composed"``, the components
            (:class:`composed.Part`, each with the columns that read it);
            then ``measured`` holds what each column reads, ``NAME+NAME``.
        transforms: ((column, name), ...): columns modelled on a transformed
            scale (``log``, ``log1p``, ``logit``; see ``tools/transforms.py``).
            The model's measurements, noise and parameters are on that scale.
        group_column: the table column that names each row's group
            (``kalmax fit --group``), for a model fitted per group; None
            otherwise.
        groups: ((value, params, noise), ...): the parameters of each group
            of a model fitted separately per group, in the form of
            ``params`` and ``noise``; ``params``/``noise`` then hold those of
            the first group (a template). Empty for one model.
    """

    kind: str
    dims: int
    time_column: str
    columns: Tuple[str, ...]
    measured: Tuple[str, ...]
    params: Mapping[str, object]
    noise: Tuple[float, ...]
    time_format: str = "number"
    jitter: float = 0.0
    fit: Optional[Mapping[str, object]] = None
    time_unit: Optional[str] = None
    numeric_time_unit: Optional[str] = None
    time_pattern: Optional[str] = None
    components: Tuple[composed.Part, ...] = ()
    transforms: Tuple[Tuple[str, str], ...] = ()
    group_column: Optional[str] = None
    groups: Tuple[Tuple[str, Mapping[str, object], Tuple[float, ...]], ...] = ()

    def __post_init__(self):
        if self.time_format == "iso8601" and self.time_unit is None:
            object.__setattr__(self, "time_unit", "s")  # date-times: rates per second unless told otherwise
        check_spec(self)
        from . import transforms as _transforms  # ValueError for a bad entry, like check_spec

        object.__setattr__(self, "transforms", _transforms.check(self.transforms, self.columns))

    def group_values(self) -> Tuple[str, ...]:
        """The groups of a model fitted per group, in order (empty for one model)."""
        return tuple(v for v, _, _ in self.groups)

    def for_group(self, value: str) -> "ModelSpec":
        """The one-group model of group ``value`` (KeyError for a group the model does not know)."""
        for v, params, noise in self.groups:
            if v == value:
                return self.replace(params=dict(params), noise=tuple(noise), groups=(), group_column=None)
        raise KeyError(value)

    @property
    def kind_info(self) -> Kind:
        return KINDS[self.kind]

    @property
    def is_composed(self) -> bool:
        return self.kind == COMPOSED

    @property
    def label(self) -> str:
        """The kind, or for a composed model its components (``level + season as daily + ...``)."""
        if not self.is_composed:
            return self.kind
        return " + ".join(p.name if p.name == p.kind else f"{p.kind} as {p.name}" for p in self.components)

    def composition(self):
        """The :class:`ComposedModel` of a composed model (its structure; values come from ``params``)."""
        cm = self.__dict__.get("_composition")
        if cm is None:  # built once per spec (the spec is frozen); not a field, so not compared
            cm = composed.composition(self.components, self.columns, self.jitter)
            object.__setattr__(self, "_composition", cm)
        return cm

    def state_names(self) -> Tuple[str, ...]:
        if self.is_composed:
            return self.composition().state_names
        return self.kind_info.state_names(self.dims)

    def parameter_names(self) -> Tuple[str, ...]:
        """The process parameters (not the noise), in order."""
        if self.is_composed:
            return tuple(k for k in self.composition().parameter_names if k != NOISE)
        return tuple(self.kind_info.params)

    def is_positive(self, name: str) -> bool:
        """Whether parameter ``name`` (or ``"noise"``) must be positive; only regression coefficients need not."""
        if self.is_composed and name != "noise":
            return name in self.composition().positive
        return True

    def variance_names(self) -> Tuple[str, ...]:
        """The process parameters that are variances (per unit time): they scale with the noise."""
        if self.is_composed:
            return composed.variance_names(self.components)
        return tuple(k for k in self.kind_info.params if k.startswith("q"))

    def input_columns(self) -> Tuple[str, ...]:
        """The table columns a composed model's regressions read (known inputs, not measurements)."""
        return composed.input_columns(self.components)

    def measured_indices(self) -> Tuple[int, ...]:
        names = self.state_names()
        return tuple(names.index(s) for s in self.measured)

    def replace(self, **changes) -> "ModelSpec":
        return dataclasses.replace(self, **changes)

    # -- unconstrained parametrisation ------------------------------------
    def free_names(self, fixed=()) -> Tuple[str, ...]:
        """Names of the fitted parameters: the process parameters, then ``noise``."""
        return tuple(k for k in list(self.parameter_names()) + ["noise"] if k not in fixed)

    def to_unconstrained(self, fixed=()) -> Dict[str, np.ndarray]:
        """{name: log(value)} for every parameter not in ``fixed`` (the value itself for a regression
        coefficient, which may have any sign)."""
        out = {}
        for k in self.free_names(fixed):
            v = np.asarray(self.noise if k == "noise" else self.params[k], dtype=np.float64)
            out[k] = np.log(v) if self.is_positive(k) else v
        return out

    def continuous_model(self, theta: Optional[Mapping] = None, dtype=None, inputs=None) -> ContinuousModel:
        """The :class:`ContinuousModel`; ``theta`` (from :meth:`to_unconstrained`,
        possibly traced) overrides the stored values of the parameters it names.
        ``inputs``: column name → (T,) values of a composed model's regression inputs."""
        theta = theta or {}

        def value(name, stored):
            if name in theta:
                v = jnp.exp(theta[name]) if self.is_positive(name) else jnp.asarray(theta[name])
            else:
                v = jnp.asarray(np.asarray(stored, dtype=np.float64))
            return v if dtype is None else v.astype(dtype)

        p = {k: value(k, self.params[k]) for k in self.parameter_names()}
        r = value("noise", self.noise)
        if self.is_composed:
            X = composed.regression_inputs(self.components, inputs, dtype)
            return self.composition().model({**p, NOISE: r}, inputs=X)
        return self.kind_info.build(self.dims, p, r, list(self.measured_indices()), self.jitter)

    def state_space(self, times, theta: Optional[Mapping] = None, dtype=None, inputs=None) -> StateSpace:
        """The exact discrete :class:`StateSpace` at ``times`` (T,), increasing (``inputs``: see
        :meth:`continuous_model`)."""
        return self.continuous_model(theta, dtype, inputs).at_times(
            times if dtype is None else jnp.asarray(times, dtype))

    def with_unconstrained(self, theta: Mapping) -> "ModelSpec":
        """A copy with the parameters named in ``theta`` set to exp(theta) (theta itself for a
        regression coefficient)."""
        params = dict(self.params)
        noise = self.noise
        for k, v in theta.items():
            val = np.asarray(v, dtype=np.float64)
            val = np.exp(val) if self.is_positive(k) else val
            if k == "noise":
                noise = tuple(float(x) for x in val)
            else:
                params[k] = [float(x) for x in val] if val.ndim else float(val)
        return self.replace(params=params, noise=noise)


def _check_composed(spec: ModelSpec) -> None:
    if spec.dims != 1:
        raise ValueError(f"a composed model has dims = 1; got {spec.dims!r}.")
    check_columns(spec.time_column, spec.columns)
    composed.check_parts(spec.components, spec.columns, spec.time_column)
    want = tuple(composed.reads_text(spec.components, c) for c in spec.columns)
    if tuple(spec.measured) != want:
        raise ValueError(f"measured must say what each column reads ({', '.join(want)}); got {list(spec.measured)}.")
    shapes = {k: s for k, s in spec.composition().parameter_shapes.items() if k != NOISE}
    if set(spec.params) != set(shapes):
        raise ValueError(f"the components take parameters {sorted(shapes)}; got {sorted(spec.params)}.")
    for k, shape in shapes.items():
        if spec.is_positive(k):
            _check_positive(k, spec.params[k], shape)
        else:
            _check_finite(k, spec.params[k], shape)


def check_spec(spec: ModelSpec) -> None:
    """Raise ValueError naming the first inconsistency in a :class:`ModelSpec`."""
    if spec.kind == COMPOSED:
        _check_composed(spec)
    elif spec.kind not in KINDS:
        raise ValueError(f"unknown model kind {spec.kind!r}; choose one of {', '.join(KINDS)} (or {COMPOSED}).")
    else:
        _check_kind(spec)
    _check_positive("noise", spec.noise, (len(spec.columns),))
    if not isinstance(spec.time_format, str) or spec.time_format not in ("number", "iso8601"):
        raise ValueError(f"time_format must be 'number' or 'iso8601'; got {spec.time_format!r}.")
    for name in ("time_unit", "numeric_time_unit"):
        unit = getattr(spec, name)
        if unit is not None and not (isinstance(unit, str) and unit in UNITS):
            raise ValueError(f"{name} must be one of {unit_names()} (or null); got {unit!r}.")
    if spec.numeric_time_unit is not None:
        if spec.time_format != "number":
            raise ValueError("numeric_time_unit applies to numeric timestamps only (time_format 'number'), "
                             f"not to {spec.time_format!r}.")
        if spec.time_unit is None:
            raise ValueError("numeric_time_unit needs a time_unit to convert the numbers to.")
    if spec.time_pattern is not None:
        if spec.time_format != "iso8601":
            raise ValueError("time_pattern applies to date-times only (time_format 'iso8601').")
        check_pattern(spec.time_pattern)
    if not (isinstance(spec.jitter, (int, float)) and np.isfinite(spec.jitter) and spec.jitter >= 0):
        raise ValueError(f"jitter must be a finite number >= 0; got {spec.jitter!r}.")
    _check_groups(spec)


def _check_groups(spec: ModelSpec) -> None:
    """Per-group parameters: a group column, distinct values, and each group's parameters valid."""
    if spec.groups and not (isinstance(spec.group_column, str) and spec.group_column.strip()):
        raise ValueError("per-group parameters need the group column's name (group_column).")
    if spec.group_column is not None and spec.group_column in (spec.time_column,) + tuple(spec.columns):
        raise ValueError(f"the group column {spec.group_column!r} cannot be the time or a measurement column.")
    seen = set()
    for entry in spec.groups:
        if not (isinstance(entry, (tuple, list)) and len(entry) == 3 and isinstance(entry[0], str)):
            raise ValueError("each group entry must be (value, parameters, noise).")
        value, params, noise = entry
        if value in seen or not value:
            raise ValueError(f"group values must be distinct and non-empty; got {value!r}.")
        seen.add(value)
        try:  # the group's model must be as valid as the template: same parameters, same shapes
            check_spec(spec.replace(params=dict(params), noise=tuple(noise), groups=(), group_column=None))
        except (ValueError, TypeError) as e:
            raise ValueError(f"group {value!r}: {e}") from None


def _check_kind(spec: ModelSpec) -> None:
    kind = KINDS[spec.kind]
    if spec.components:
        raise ValueError(f"model kind {spec.kind!r} has no components (they belong to kind {COMPOSED!r}).")
    if not isinstance(spec.dims, int) or isinstance(spec.dims, bool) or spec.dims < 1:
        raise ValueError(f"dims must be a positive integer; got {spec.dims!r}.")
    if kind.fixed_dims is not None and spec.dims != kind.fixed_dims:
        raise ValueError(f"model kind {spec.kind!r} has dims = {kind.fixed_dims}; got {spec.dims}.")
    check_columns(spec.time_column, spec.columns)
    if len(spec.measured) != len(spec.columns):
        raise ValueError(f"measured needs one state name per column ({len(spec.columns)}); got {len(spec.measured)}.")
    names = kind.state_names(spec.dims)
    for col, s in zip(spec.columns, spec.measured):
        if s not in names:
            raise ValueError(f"column {col!r} is said to measure state {s!r}, but model kind {spec.kind!r} "
                             f"with dims={spec.dims} has states {', '.join(names)}.")
    if set(spec.params) != set(kind.params):
        raise ValueError(f"model kind {spec.kind!r} takes parameters {sorted(kind.params)}; "
                         f"got {sorted(spec.params)}.")
    for k in kind.params:
        _check_positive(k, spec.params[k], param_shape(kind, k, spec.dims))


def check_columns(time_column: str, columns) -> None:
    """Raise ValueError unless the measurement columns are distinct, at least one, and not the time column."""
    if len(columns) < 1:
        raise ValueError("a model needs at least one measurement column.")
    if len(set(columns)) != len(columns):
        raise ValueError(f"measurement columns must be distinct; got {list(columns)}.")
    if time_column in columns:
        raise ValueError(f"the time column {time_column!r} cannot also be a measurement column.")


def _check_finite(name, value, shape) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"parameter {name!r} must be a number or a list of numbers; got {value!r}.") from None
    if arr.shape != shape:
        want = "a single number" if shape == () else f"a list of {shape[0]} numbers"
        raise ValueError(f"parameter {name!r} must be {want}; got {value!r}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"parameter {name!r} must be finite; got {value!r}.")
    return arr


def _check_positive(name, value, shape) -> None:
    if np.any(_check_finite(name, value, shape) <= 0):
        raise ValueError(f"parameter {name!r} must be finite and > 0; got {value!r}.")
