"""The practitioner's pipeline: table → series → fitted ModelSpec → smoothed table.

Used by the command line and the demo; each step is a plain function so it can
be called from Python too. Data problems raise :class:`DataError` with a
message that names the file, row and column.
"""

from __future__ import annotations

import datetime as _dt
import math
import statistics
from typing import Dict, List, NamedTuple, Optional, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from . import splits
from .io import DataError
from .fitting import fit
from .likelihood import log_likelihood
from .smoothing import holdout_sums, smooth
from .spec import KINDS, ModelSpec, param_shape

_MISSING = {"", "nan", "na", "n/a", "null", "none", "-"}


class FitError(Exception):
    """Fitting or smoothing failed numerically (non-finite loss or states)."""


class Series(NamedTuple):
    """Measurements read from a table.

    times_raw: the time cells as read (written back unchanged).
    t: (T,) float64 model times, relative to the first timestamp (seconds
       for ISO 8601 date-times, file units for numbers).
    y: (T, p) float64 measurements, NaN where missing.
    time_format: "number" or "iso8601".
    """

    times_raw: list
    t: np.ndarray
    y: np.ndarray
    time_format: str

    @property
    def mask(self) -> np.ndarray:
        return ~np.isnan(self.y)


# ----------------------------------------------------------------------------
# Reading
# ----------------------------------------------------------------------------


def _parse_time(cell):
    """(value in seconds or file units, format) of one time cell; None if unparseable."""
    if isinstance(cell, _dt.datetime):
        dt = cell if cell.tzinfo else cell.replace(tzinfo=_dt.timezone.utc)
        return dt.timestamp(), "iso8601"
    if isinstance(cell, _dt.date):
        return _dt.datetime(cell.year, cell.month, cell.day, tzinfo=_dt.timezone.utc).timestamp(), "iso8601"
    if isinstance(cell, (int, float)) and not isinstance(cell, bool):
        return float(cell), "number"
    if isinstance(cell, str):
        s = cell.strip()
        try:
            return float(s), "number"
        except ValueError:
            pass
        try:
            dt = _dt.datetime.fromisoformat(s)
        except ValueError:
            return None
        dt = dt if dt.tzinfo else dt.replace(tzinfo=_dt.timezone.utc)
        return dt.timestamp(), "iso8601"
    return None


def _parse_value(cell, col, row, source):
    if cell is None:
        return math.nan
    if isinstance(cell, (int, float)) and not isinstance(cell, bool):
        v = float(cell)
    elif isinstance(cell, str):
        s = cell.strip()
        if s.lower() in _MISSING:
            return math.nan
        try:
            v = float(s)
        except ValueError:
            raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not a number "
                            "(leave the cell blank for a missing value).") from None
    else:
        raise DataError(f"{source}: column {col!r}, data row {row}: cannot use a value of type "
                        f"{type(cell).__name__} as a measurement.")
    if math.isnan(v):
        return v
    if not math.isfinite(v):
        raise DataError(f"{source}: column {col!r}, data row {row}: {cell!r} is not finite.")
    return v


def series_from_table(names: Sequence[str], cols: Dict[str, list], time_column: str,
                      columns: Sequence[str], *, source: str = "input",
                      time_format: Optional[str] = None) -> Series:
    """Pick and check the time and measurement columns of a table.

    Errors (all :class:`DataError`): a missing column, an unparseable or blank
    timestamp, timestamps that are not strictly increasing, a non-numeric
    measurement cell, fewer than two rows, a measurement column with no
    observation at all, and (when ``time_format`` is given) timestamps of the
    other kind than the model was fitted on.
    """
    wanted = [time_column] + list(columns)
    missing = [c for c in wanted if c not in cols]
    if missing:
        raise DataError(f"{source}: no column named {', '.join(repr(c) for c in missing)}; "
                        f"the file has columns {', '.join(repr(c) for c in names)}.")
    raw = cols[time_column]
    T = len(raw)
    if T < 2:
        raise DataError(f"{source}: {T} data row(s); at least 2 are needed.")
    t = np.empty(T)
    fmt = None
    for i, cell in enumerate(raw):
        parsed = _parse_time(cell)
        if parsed is None or (isinstance(cell, str) and not cell.strip()) or cell is None:
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is neither a "
                            "number nor an ISO 8601 date-time (e.g. 2024-05-01T12:00:00Z).")
        value, f = parsed
        if fmt is None:
            fmt = f
        elif f != fmt:
            raise DataError(f"{source}: time column {time_column!r} mixes numbers and date-times "
                            f"(data row {i + 1}: {cell!r}).")
        if not math.isfinite(value):
            raise DataError(f"{source}: time column {time_column!r}, data row {i + 1}: {cell!r} is not finite.")
        t[i] = value
    if time_format is not None and fmt != time_format:
        raise DataError(f"{source}: the model was fitted on {time_format} timestamps, but time column "
                        f"{time_column!r} holds {fmt} values.")
    dt = np.diff(t)
    bad = np.nonzero(dt <= 0)[0]
    if bad.size:
        i = int(bad[0]) + 1
        what = "repeats" if dt[bad[0]] == 0 else "goes back before"
        raise DataError(f"{source}: timestamps must be strictly increasing, but data row {i + 1} ({raw[i]!r}) "
                        f"{what} data row {i} ({raw[i - 1]!r}); {bad.size} such place(s). Sort the rows by "
                        "time and merge rows that share a timestamp.")
    y = np.empty((T, len(columns)))
    for j, c in enumerate(columns):
        y[:, j] = [_parse_value(cell, c, i + 1, source) for i, cell in enumerate(cols[c])]
    counts = np.sum(~np.isnan(y), axis=0)
    if counts.sum() == 0:
        raise DataError(f"{source}: no observations: every cell of {', '.join(repr(c) for c in columns)} "
                        "is blank or missing.")
    empty = [c for c, k in zip(columns, counts) if k == 0]
    if empty:
        raise DataError(f"{source}: column(s) {', '.join(repr(c) for c in empty)} hold no observation at all; "
                        "drop them from the measured columns.")
    return Series(times_raw=list(raw), t=t - t[0], y=y, time_format=fmt)


# ----------------------------------------------------------------------------
# Starting values
# ----------------------------------------------------------------------------


def _col_stats(t, y):
    """(increment variance per unit time, half mean squared increment) of one column's observed samples."""
    ok = ~np.isnan(y)
    tt, yy = t[ok], y[ok]
    if yy.size < 3:
        v = float(np.var(yy)) if yy.size > 1 else 1.0
        return max(v, 1e-12), max(v, 1e-12)
    dy, dt = np.diff(yy), np.diff(tt)
    rate = float(np.median(dy**2 / dt)) + 1e-12 * (float(np.var(yy)) + 1.0)
    half_msi = 0.25 * float(np.mean(dy**2)) + 1e-12 * (float(np.var(yy)) + 1.0)
    return rate, half_msi


def default_spec(kind: str, dims: int, time_column: str, columns: Sequence[str],
                 measured: Sequence[str], series: Series) -> ModelSpec:
    """A data-driven starting model (rough on purpose: the fit refines it).

    Measurement noise variance: a quarter of the mean squared increment of
    each column (the increments of densely sampled noisy data are mostly
    noise). Process noise: from the median squared increment per unit time,
    divided by the typical step to the power of the chain's order (an
    overestimate when the data are noisy: the fit then shrinks it). The
    oscillator's frequency starts at the periodogram peak.
    """
    info = KINDS[kind]
    stats = [_col_stats(series.t, series.y[:, j]) for j in range(len(columns))]
    noise = tuple(s[1] for s in stats)
    span = float(series.t[-1] - series.t[0])
    step = span / max(len(series.t) - 1, 1)
    names = info.state_names(dims)
    params: Dict[str, object] = {}
    if kind in ("random-walk", "constant-velocity", "constant-acceleration"):
        order = {"random-walk": 1, "constant-velocity": 2, "constant-acceleration": 3}[kind]
        q = []
        for k in range(dims):
            rates = [stats[j][0] for j, s in enumerate(measured) if names.index(s) % dims == k
                     and names.index(s) // dims == 0]
            rate = statistics.fmean(rates) if rates else statistics.fmean(s[0] for s in stats)
            q.append(rate / step ** (2 * (order - 1)))
        params["q"] = q
    elif kind == "local-linear-trend":
        rate = stats[0][0]
        params["q_level"] = 0.1 * rate
        params["q_slope"] = rate / step**2
    elif kind == "damped-oscillator":
        params["frequency"] = _peak_frequency(series.t, series.y[:, 0])
        params["damping"] = 0.1
        var = float(np.nanvar(series.y[:, 0])) + 1e-12
        omega = 2 * math.pi * params["frequency"]
        params["q"] = 4 * 0.1 * omega**3 * var
    return ModelSpec(kind=kind, dims=dims, time_column=time_column, columns=tuple(columns),
                     measured=tuple(measured), params=params, noise=noise, time_format=series.time_format)


def _peak_frequency(t, y):
    ok = ~np.isnan(y)
    tt, yy = t[ok], y[ok]
    if yy.size < 4:
        return 1.0 / max(float(t[-1] - t[0]), 1e-12)
    grid = np.linspace(tt[0], tt[-1], 4 * yy.size)
    yi = np.interp(grid, tt, yy - yy.mean())
    power = np.abs(np.fft.rfft(yi)) ** 2
    freqs = np.fft.rfftfreq(grid.size, d=grid[1] - grid[0])
    k = 1 + int(np.argmax(power[1:]))
    return float(freqs[k])


# ----------------------------------------------------------------------------
# Losses
# ----------------------------------------------------------------------------


def _standardiser(series: Series, mask):
    """Per-column scale s_j (std of observed values): losses weight columns by 1/s_j²."""
    y = np.where(mask, series.y, np.nan)
    s = np.nanstd(y, axis=0)
    return np.where(np.isfinite(s) & (s > 0), s, 1.0)


def _scaled(model, y, s):
    """The same model in standardised units y_j / s_j (smoothed states are unchanged)."""
    inv = 1.0 / s
    return model.replace(C=model.C * inv[:, None], R=model.R * inv[:, None] * inv[None, :]), y * inv


def make_loss(spec: ModelSpec, series: Series, train_mask, objective: str, *,
              fixed=(), folds: int = 4, seed: int = 0):
    """(loss, data): loss(theta, *data) for ``theta`` = spec.to_unconstrained(fixed).

    The measurements and masks are returned separately so that they reach
    the compiled step as arguments, not as constants baked into it (XLA can
    spend seconds folding a large closed-over mask). The timestamps stay
    concrete: the exact discretisation sizes its loop from them.

    objective "likelihood": −log p(y_train) / N_train (exact, diffuse prior).
    objective "holdout": pooled K-fold cross-validated squared error of the
    smoother on the training entries, each column in units of its standard
    deviation (so columns in different units weigh alike).
    """
    t = np.asarray(series.t)
    y = jnp.asarray(np.where(train_mask, series.y, 0.0))
    mask = jnp.asarray(train_mask)
    n_obs = float(np.sum(train_mask))
    if objective == "likelihood":
        def loss(theta, y, mask):
            model = spec.state_space(t, theta)
            return -log_likelihood(model, y, mask) / n_obs
        return loss, (y, mask)
    if objective == "holdout":
        s = jnp.asarray(_standardiser(series, train_mask))
        holds = splits.holdout_folds(mask, folds, seed)

        def loss(theta, y, mask, s, holds):
            model, ys = _scaled(spec.state_space(t, theta), y, s)
            sse, cnt = jax.vmap(lambda h: holdout_sums(model, ys, mask, h))(holds)
            return jnp.sum(sse) / jnp.sum(cnt)
        return loss, (y, mask, s, holds)
    raise ValueError(f"objective must be 'likelihood' or 'holdout'; got {objective!r}.")


def calibrate_scale(spec: ModelSpec, series: Series, train_mask, *, folds: int = 4, seed: int = 0) -> ModelSpec:
    """Rescale every variance so that cross-validated standardised errors average 1.

    The smoothed means depend only on the *ratios* of the variances, so the
    held-out error cannot tell their overall scale c. Multiplying all of them
    by c multiplies every predictive variance (posterior plus noise) by c, so
    c = mean over held-out entries of e² / v, with v the predictive variance
    of that entry for a new noisy measurement (measurement_cov + R) from the
    fold that hid it.
    """
    t = jnp.asarray(series.t)
    y = jnp.asarray(np.where(train_mask, series.y, 0.0))
    mask = jnp.asarray(train_mask)
    holds = splits.holdout_folds(mask, folds, seed)
    model = spec.state_space(t)
    R = np.diag(np.asarray(model.R))

    def one(h):
        out = smooth(model, y, mask & ~h, covariances=True)
        v = jnp.diagonal(out.measurement_cov, axis1=-2, axis2=-1) + R
        return jnp.where(h, (y - out.measurements) ** 2 / v, 0.0)

    z2 = np.asarray(jax.jit(jax.vmap(one))(holds))
    c = float(z2.sum() / np.asarray(holds).sum())
    if not (math.isfinite(c) and c > 0):
        raise FitError("could not calibrate the noise scale (non-finite held-out errors).")
    kind = spec.kind_info
    params = {}
    for k, v in spec.params.items():
        scale = c if k.startswith("q") else 1.0  # q, q_level, q_slope are variances per unit time
        params[k] = [scale * float(x) for x in v] if param_shape(kind, k, spec.dims) else scale * float(v)
    return spec.replace(params=params, noise=tuple(c * r for r in spec.noise))


# ----------------------------------------------------------------------------
# Fitting
# ----------------------------------------------------------------------------


class FitOutcome(NamedTuple):
    spec: ModelSpec
    history: List[float]  # loss after k updates, k = 0..steps_run (entry 0: the start)
    best_step: int  # index into history of the returned parameters
    steps_run: int
    stop_reason: str = "steps"  # as kx.fit reports it


def fit_spec(spec: ModelSpec, series: Series, train_mask, *, objective: str = "likelihood",
             steps: int = 300, learning_rate: float = 0.05, fixed=(), folds: int = 4, seed: int = 0,
             progress: bool = True) -> FitOutcome:
    """Fit the free parameters of ``spec`` (in log space, Adam) to the training entries."""
    import optax

    theta0 = {k: jnp.asarray(v) for k, v in spec.to_unconstrained(fixed).items()}
    if not theta0:  # everything fixed: nothing to fit
        return FitOutcome(spec, [], 0, 0)
    loss, data = make_loss(spec, series, train_mask, objective, fixed=fixed, folds=folds, seed=seed)
    result = fit(loss, theta0, optax.adam(learning_rate), steps=steps, progress=progress, args=data)
    first = float(result.history["loss"][0])
    if not math.isfinite(first):
        raise FitError(f"the {objective} loss of the starting model is not finite. Either some state cannot be "
                       "determined from the measured columns (e.g. an axis that no column measures), or the "
                       "starting values are extreme; check the --measure mapping, or set starting values "
                       "with --set.")
    theta = {k: np.asarray(v) for k, v in result.params.items()}
    fitted = spec.with_unconstrained(theta)
    if objective == "holdout":
        fitted = calibrate_scale(fitted, series, train_mask, folds=folds, seed=seed)
    history = [float(h) for h in np.asarray(result.history["loss"])]
    return FitOutcome(fitted, history, int(result.best_step), int(result.steps_run), str(result.stop_reason))


# ----------------------------------------------------------------------------
# Applying
# ----------------------------------------------------------------------------


# One compiled function for every call (a new lambda per call would recompile each time).
_smooth_with_covariances = jax.jit(lambda model, y, mask: smooth(model, y, mask, covariances=True))


class Smoothing(NamedTuple):
    mean: np.ndarray  # (T, p) smoothed measurement means
    sd: np.ndarray  # (T, p) predictive sd of a new noisy measurement (measurement_cov + R)
    states: np.ndarray  # (T, n)


def smooth_series(spec: ModelSpec, series: Series, mask=None) -> Smoothing:
    """Smoothed means and predictive standard deviations of every measurement column.

    The sd is that of a *new noisy measurement* at each timestamp: the
    smoother's uncertainty about C x_t (``measurement_cov``) plus the
    measurement noise R. Raises :class:`FitError` when the states are not
    identified (NaN from the smoother).
    """
    mask = series.mask if mask is None else mask
    model = spec.state_space(jnp.asarray(series.t))
    y = jnp.asarray(np.where(mask, series.y, 0.0))
    out = _smooth_with_covariances(model, y, jnp.asarray(mask))
    mean = np.asarray(out.measurements)
    var = np.diagonal(np.asarray(out.measurement_cov), axis1=-2, axis2=-1) + np.diag(np.asarray(model.R))
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(var))):
        raise FitError("the smoother could not determine the states (too few observations for this model, "
                       "or a numerically singular model); the result would be meaningless.")
    return Smoothing(mean=mean, sd=np.sqrt(np.maximum(var, 0.0)), states=np.asarray(out.states))


def heldout_rmse(spec: ModelSpec, series: Series, test_mask) -> Dict[str, float]:
    """Root mean squared error on the test entries, per column and overall ("all", in sd units).

    The smoother sees every observed entry except the test entries.
    """
    mask = series.mask
    sm = smooth_series(spec, series, mask & ~test_mask)
    err = np.where(test_mask, series.y - sm.mean, np.nan)
    out = {}
    for j, c in enumerate(spec.columns):
        e = err[:, j][test_mask[:, j]]
        out[c] = float(np.sqrt(np.mean(e**2))) if e.size else math.nan
    s = _standardiser(series, mask & ~test_mask)
    z = (err / s)[test_mask]
    out["all"] = float(np.sqrt(np.mean(z**2))) if z.size else math.nan
    return out


def output_table(spec: ModelSpec, series: Series, sm: Smoothing, *, level: float = 0.95,
                 with_states: bool = False):
    """(names, columns) of the result table: time, then per measurement column
    the observed value, ``_smoothed`` mean, ``_lower``/``_upper`` interval bounds."""
    z = statistics.NormalDist().inv_cdf(0.5 + level / 2)
    names = [spec.time_column]
    cols = {spec.time_column: series.times_raw}
    for j, c in enumerate(spec.columns):
        lo = sm.mean[:, j] - z * sm.sd[:, j]
        hi = sm.mean[:, j] + z * sm.sd[:, j]
        for suffix, values in (("", series.y[:, j]), ("_smoothed", sm.mean[:, j]),
                               ("_lower", lo), ("_upper", hi)):
            names.append(c + suffix)
            cols[c + suffix] = [float(v) for v in values]
    if with_states:
        for k, s in enumerate(spec.state_names()):
            name = f"state_{s}"
            names.append(name)
            cols[name] = [float(v) for v in sm.states[:, k]]
    clash = len(set(names)) != len(names)
    if clash:
        raise DataError("the output column names collide (a measurement column is already called like "
                        "another column plus _smoothed/_lower/_upper); rename the input columns.")
    return names, cols
