"""``ModelSpec``: a named continuous-time model tied to the columns of a table.

This is what the command line fits, saves and applies: which builder
(``kind``), how many spatial axes, which state each measurement column
measures, and the parameter values in natural units. It turns into a
:class:`ContinuousModel` (and so into a discrete :class:`StateSpace` for any
timestamps), and its positive parameters map to and from an unconstrained
vector of logarithms for gradient-based fitting.
"""

from __future__ import annotations

import dataclasses
from typing import Callable, Dict, Mapping, Optional, Tuple

import jax.numpy as jnp
import numpy as np

from .. import continuous
from ..continuous import ContinuousModel
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

    def __post_init__(self):
        if self.time_format == "iso8601" and self.time_unit is None:
            object.__setattr__(self, "time_unit", "s")  # date-times: rates per second unless told otherwise
        check_spec(self)

    @property
    def kind_info(self) -> Kind:
        return KINDS[self.kind]

    def state_names(self) -> Tuple[str, ...]:
        return self.kind_info.state_names(self.dims)

    def measured_indices(self) -> Tuple[int, ...]:
        names = self.state_names()
        return tuple(names.index(s) for s in self.measured)

    def replace(self, **changes) -> "ModelSpec":
        return dataclasses.replace(self, **changes)

    # -- unconstrained parametrisation ------------------------------------
    def free_names(self, fixed=()) -> Tuple[str, ...]:
        """Names of the fitted parameters: the process parameters, then ``noise``."""
        return tuple(k for k in list(self.kind_info.params) + ["noise"] if k not in fixed)

    def to_unconstrained(self, fixed=()) -> Dict[str, np.ndarray]:
        """{name: log(value)} for every parameter not in ``fixed`` (all are positive)."""
        out = {}
        for k in self.free_names(fixed):
            v = self.noise if k == "noise" else self.params[k]
            out[k] = np.log(np.asarray(v, dtype=np.float64))
        return out

    def continuous_model(self, theta: Optional[Mapping] = None, dtype=None) -> ContinuousModel:
        """The :class:`ContinuousModel`; ``theta`` (from :meth:`to_unconstrained`,
        possibly traced) overrides the stored values of the parameters it names."""
        theta = theta or {}
        kind = self.kind_info

        def value(name, stored):
            if name in theta:
                return jnp.exp(theta[name])
            return jnp.asarray(np.asarray(stored, dtype=np.float64), dtype)

        p = {k: value(k, self.params[k]) for k in kind.params}
        r = value("noise", self.noise)
        if dtype is not None:
            p = {k: v.astype(dtype) for k, v in p.items()}
            r = r.astype(dtype)
        return kind.build(self.dims, p, r, list(self.measured_indices()), self.jitter)

    def state_space(self, times, theta: Optional[Mapping] = None, dtype=None) -> StateSpace:
        """The exact discrete :class:`StateSpace` at ``times`` (T,), increasing."""
        return self.continuous_model(theta, dtype).at_times(times if dtype is None else jnp.asarray(times, dtype))

    def with_unconstrained(self, theta: Mapping) -> "ModelSpec":
        """A copy with the parameters named in ``theta`` set to exp(theta)."""
        params = dict(self.params)
        noise = self.noise
        for k, v in theta.items():
            val = np.exp(np.asarray(v, dtype=np.float64))
            if k == "noise":
                noise = tuple(float(x) for x in val)
            else:
                params[k] = [float(x) for x in val] if val.ndim else float(val)
        return self.replace(params=params, noise=noise)


def check_spec(spec: ModelSpec) -> None:
    """Raise ValueError naming the first inconsistency in a :class:`ModelSpec`."""
    if spec.kind not in KINDS:
        raise ValueError(f"unknown model kind {spec.kind!r}; choose one of {', '.join(KINDS)}.")
    kind = KINDS[spec.kind]
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


def check_columns(time_column: str, columns) -> None:
    """Raise ValueError unless the measurement columns are distinct, at least one, and not the time column."""
    if len(columns) < 1:
        raise ValueError("a model needs at least one measurement column.")
    if len(set(columns)) != len(columns):
        raise ValueError(f"measurement columns must be distinct; got {list(columns)}.")
    if time_column in columns:
        raise ValueError(f"the time column {time_column!r} cannot also be a measurement column.")


def _check_positive(name, value, shape) -> None:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"parameter {name!r} must be a number or a list of numbers; got {value!r}.") from None
    if arr.shape != shape:
        want = "a single number" if shape == () else f"a list of {shape[0]} numbers"
        raise ValueError(f"parameter {name!r} must be {want}; got {value!r}.")
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise ValueError(f"parameter {name!r} must be finite and > 0; got {value!r}.")
