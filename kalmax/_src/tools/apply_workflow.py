"""Smooth a series with a :class:`ModelSpec`: means, intervals, held-out errors, the result table."""

from __future__ import annotations

import math
import statistics
from typing import Dict, NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np

from ..nonlinear import prepare, smooth_nonlinear
from ..nonlinear_model import linearised_problem
from ..smoothing import smooth
from .errors import DataError, FitError
from .robust_columns import RobustColumns
from .series import Series, column_scales
from .spec import ModelSpec
from .transforms import inverse


# One compiled function for every call (a new lambda per call would recompile each time).
_smooth_with_covariances = jax.jit(lambda model, y, mask: smooth(model, y, mask, covariances=True))


class Smoothing(NamedTuple):
    mean: np.ndarray  # (T, p) smoothed measurement means
    sd: np.ndarray  # (T, p) predictive sd of a new noisy measurement (measurement_cov + R)
    states: np.ndarray  # (T, n)


@jax.jit
def _smooth_robust(model, y, mask, loss):
    """Robust smoothing (``robust_columns.py``): x* by kx.smooth_nonlinear, covariances of the IRLS fixed point."""
    # Started from the ordinary smoother's path: the Student-t objective may have several minima,
    # and the one near the squared-loss answer is the one that down-weights the outliers.
    out = smooth_nonlinear(model, y, mask, loss=loss, init=smooth(model, y, mask).states)
    canonical, loss_c, y_c, w, _ = prepare(model, y, mask, loss, None)
    lin = linearised_problem(canonical, loss_c, y_c, w, out.states)
    P = smooth(lin.problem, lin.y, mask, covariances=True).state_cov
    C = jnp.broadcast_to(model.C, (y.shape[0],) + model.C.shape[-2:])
    return out.measurements, C @ P @ jnp.swapaxes(C, -1, -2), out.states, out.converged


def smooth_series(spec: ModelSpec, series: Series, mask=None, robust: Optional[RobustColumns] = None) -> Smoothing:
    """Smoothed means and predictive standard deviations of every measurement column.

    The sd is that of a *new noisy measurement* at each timestamp: the
    smoother's uncertainty about C x_t (``measurement_cov``) plus the
    measurement noise R. Raises :class:`FitError` when the states are not
    identified (NaN from the smoother). ``robust``: robust losses on some
    columns (``robust_columns.py``; the sd is then approximate).
    """
    mask = series.mask if mask is None else mask
    model = spec.state_space(jnp.asarray(series.t), inputs=series.inputs)
    y = jnp.asarray(np.where(mask, series.y, 0.0))
    if robust is None:
        out = _smooth_with_covariances(model, y, jnp.asarray(mask))
        mean, mcov, states = out.measurements, out.measurement_cov, out.states
    else:
        mean, mcov, states, converged = _smooth_robust(model, y, jnp.asarray(mask),
                                                       robust.loss(spec.columns, np.dtype(y.dtype)))
        if not bool(converged):
            raise FitError(f"--robust {robust.describe()}: the robust smoother did not converge on this data.")
    mean = np.asarray(mean)
    var = np.diagonal(np.asarray(mcov), axis1=-2, axis2=-1) + np.diag(np.asarray(model.R))
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(var))):
        raise FitError("the smoother could not determine the states (too few observations for this model, "
                       "or a numerically singular model); the result would be meaningless.")
    return Smoothing(mean=mean, sd=np.sqrt(np.maximum(var, 0.0)), states=np.asarray(states))


class HeldoutScores(NamedTuple):
    rmse: Dict[str, float]  # per column and "all" (in sd units); see :func:`heldout_rmse`
    coverage: Dict  # {"level", "cells", "all", "columns": {col: fraction}, "column_cells": {col: count}};
    # a fraction is None where there are no test cells


def heldout_scores(spec: ModelSpec, series: Series, test_mask, level: float = 0.95) -> HeldoutScores:
    """Held-out RMSE and interval coverage of the test entries, from one smoothing that does not see them.

    The smoother sees every observed entry except the test entries, so each
    test cell is scored as a new measurement inside a gap. Coverage: the
    fraction of test cells whose measured value lies inside the ``level``
    interval of a new noisy measurement (mean ± z·sd with the sd of
    :func:`smooth_series`, measurement noise included, because a held-out
    cell is a measurement, not a state), pooled over columns and per column.
    With column transforms the check is made on the transformed scale, which
    is the same as on the natural one: the interval's ends are transformed
    back by the same increasing function (``tools/transforms.py``).

    RMSE: per column and overall ("all", in sd units). For a model with
    column transforms (``series`` then on the transformed scale) the errors
    are on the natural scale: measured value minus the back-transformed
    smoothed median, and "all" divides them by the natural scale's column sds.
    """
    mask = series.mask
    test_mask = np.asarray(test_mask, bool)
    sm = smooth_series(spec, series, mask & ~test_mask)
    z = statistics.NormalDist().inv_cdf(0.5 + level / 2)
    inside = np.abs(np.where(test_mask, series.y, 0.0) - sm.mean) <= z * sm.sd  # missing cells are NaN
    coverage = {"level": float(level), "cells": int(test_mask.sum()),
                "all": float(np.mean(inside[test_mask])) if test_mask.any() else None,
                "columns": {c: float(np.mean(inside[:, j][test_mask[:, j]])) if test_mask[:, j].any()
                            else None for j, c in enumerate(spec.columns)},  # None, not NaN: JSON
                "column_cells": {c: int(test_mask[:, j].sum()) for j, c in enumerate(spec.columns)}}
    mean, y = sm.mean, series.y
    if spec.transforms:
        mean, y = inverse(mean, spec.columns, spec.transforms), inverse(y, spec.columns, spec.transforms)
        series = series._replace(y=y)
    err = np.where(test_mask, y - mean, np.nan)
    rmse = {}
    for j, c in enumerate(spec.columns):
        e = err[:, j][test_mask[:, j]]
        rmse[c] = float(np.sqrt(np.mean(e**2))) if e.size else math.nan
    s = column_scales(series, mask & ~test_mask)
    zs = (err / s)[test_mask]
    rmse["all"] = float(np.sqrt(np.mean(zs**2))) if zs.size else math.nan
    return HeldoutScores(rmse, coverage)


def heldout_rmse(spec: ModelSpec, series: Series, test_mask) -> Dict[str, float]:
    """Root mean squared error on the test entries, per column and overall ("all", in sd units).

    The smoother sees every observed entry except the test entries (see
    :func:`heldout_scores`, which also gives the interval coverage).
    """
    return heldout_scores(spec, series, test_mask).rmse


# The kinds of cell in the status columns of the result table.
STATUS_WORDS = {
    "observed": "measured, and seen by the smoother",
    "imputed": "missing in the input: the smoothed value fills it in",
    "held-out": "measured, but hidden from the fit of the parameters (kalmax fit's test cells; the final "
                "smoothing sees them)",
    "forecast": "a forecast row past the last timestamp (--forecast)",
}


def padded(test_mask, series: Series):
    """A (T_record, p) test mask padded with False for the forecast rows of ``series`` (None stays None)."""
    if test_mask is None:
        return None
    test_mask = np.asarray(test_mask, bool)
    extra = series.y.shape[0] - test_mask.shape[0]
    return np.concatenate([test_mask, np.zeros((extra, test_mask.shape[1]), bool)]) if extra else test_mask


def cell_status(series: Series, test_mask=None) -> np.ndarray:
    """(T, p) array of the words of :data:`STATUS_WORDS`, one per measurement cell."""
    mask = series.mask
    status = np.where(mask, "observed", "imputed").astype(object)
    test = padded(test_mask, series)
    if test is not None:
        status[test & mask] = "held-out"
    if series.forecast:
        status[-series.forecast:] = "forecast"
    return status


def output_table(spec: ModelSpec, series: Series, sm: Smoothing, *, level: float = 0.95,
                 with_states: bool = False, test_mask=None):
    """(names, columns) of the result table: time, then per measurement column
    the observed value, ``_smoothed`` mean, ``_lower``/``_upper`` interval bounds
    and ``_status`` (observed, imputed, held-out or forecast; see :func:`cell_status`).
    Forecast rows (``series.forecast``) come last, with blank measurements.

    With column transforms, ``series`` holds the values as read and ``sm``
    the smoothing on the transformed scale: the ends of the interval and the
    mean (the median on that scale) are transformed back, see
    ``tools/transforms.py``."""
    z = statistics.NormalDist().inv_cdf(0.5 + level / 2)
    names = [spec.time_column]
    cols = {spec.time_column: series.times_raw}
    status = cell_status(series, test_mask)
    back = (lambda x: inverse(x, spec.columns, spec.transforms)) if spec.transforms else (lambda x: x)
    lower, upper, centre = back(sm.mean - z * sm.sd), back(sm.mean + z * sm.sd), back(sm.mean)
    for j, c in enumerate(spec.columns):
        for suffix, values in (("", series.y[:, j]), ("_smoothed", centre[:, j]),
                               ("_lower", lower[:, j]), ("_upper", upper[:, j])):
            names.append(c + suffix)
            cols[c + suffix] = np.asarray(values, dtype=np.float64).tolist()
        names.append(c + "_status")
        cols[c + "_status"] = status[:, j].tolist()
    if with_states:
        for k, s in enumerate(spec.state_names()):
            name = f"state_{s}"
            names.append(name)
            cols[name] = np.asarray(sm.states[:, k], dtype=np.float64).tolist()
    clash = len(set(names)) != len(names)
    if clash:
        raise DataError("the output column names collide (a measurement column is already called like "
                        "another column plus _smoothed/_lower/_upper/_status); rename the input columns.")
    return names, cols
