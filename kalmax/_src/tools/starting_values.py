"""Data-driven starting values for a model kind or a composed model (rough on purpose: the fit refines them)."""

from __future__ import annotations

import math
import statistics
from typing import Dict, Sequence

import numpy as np

from . import composed
from .series import Series
from .spec import COMPOSED, KINDS, ModelSpec


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
# Composed models (kalmax fit --components)
# ----------------------------------------------------------------------------


def _regression_start(part, series: Series, columns: Sequence[str]) -> np.ndarray:
    """Least-squares β of the columns that read ``part`` on its inputs, one intercept per column."""
    X = np.stack([series.inputs[c] for c in part.inputs], axis=1)
    rows, targets = [], []
    for j, c in enumerate(columns):
        if c not in part.columns:
            continue
        ok = ~np.isnan(series.y[:, j])
        onehot = np.zeros((int(ok.sum()), len(columns)))
        onehot[:, j] = 1.0
        rows.append(np.concatenate([X[ok], onehot], axis=1))
        targets.append(series.y[ok, j])
    coef = np.linalg.lstsq(np.concatenate(rows), np.concatenate(targets), rcond=None)[0]
    return coef[:X.shape[1]]


# kind → (share of the signal variance s, span of the record, period) → starting values of its
# parameters. s is that component's share of its columns' variance beyond the noise; each kind turns
# it into its own scale: a level wanders by about s over the record, a season's pattern drifts by a
# twentieth of s per period, a cycle or oscillator has stationary variance s (module docstring of
# kalmax/_src/components.py: q/(2ρ) and q/(4ζω³)), damped over about 1.6 periods (ρ = ω/10, ζ = 0.1).
_PART_STARTS = {
    "level": lambda s, span, period: {"q": s / span},
    "trend": lambda s, span, period: {"q_level": s / span, "q_slope": 3.0 * s / span**3},
    "season": lambda s, span, period: {"q": 0.05 * s / period},
    "cycle": lambda s, span, period: {"period": period, "damping": 0.2 * math.pi / period,
                                      "q": 2.0 * (0.2 * math.pi / period) * s},
    "oscillation": lambda s, span, period: {"period": period, "damping": 0.1,
                                            "q": 4.0 * 0.1 * (2.0 * math.pi / period) ** 3 * s},
}


def composed_spec(drafts, time_column: str, columns: Sequence[str], reads, series: Series) -> ModelSpec:
    """A data-driven starting model for the components ``drafts`` (rough on purpose: the fit refines it).

    The regressions start at least squares (inputs plus one intercept per
    column). On what the regressions leave, each column's noise variance
    starts at a quarter of its mean squared increment (at most half its
    variance), and the rest of its variance, s (at least a tenth of the
    variance), is shared equally among the other components it reads, each
    of which turns its share into starting values (``_PART_STARTS``).
    Periods are converted to the model's time unit (:func:`composed.bind`,
    which also checks the harmonics against the typical step).
    """
    step = float(np.median(np.diff(series.t)))
    parts, periods = composed.bind(drafts, columns, reads, series.unit, step)
    starts: Dict[str, object] = {}
    resid = series.y.copy()
    for p in parts:
        if p.inputs:
            beta = _regression_start(p, series, columns)
            starts[f"{p.name}.beta"] = [float(b) for b in beta]
            X = np.stack([series.inputs[c] for c in p.inputs], axis=1)
            for j, c in enumerate(columns):
                if c in p.columns:
                    resid[:, j] -= X @ beta
    noise, signal = [], []
    for j in range(len(columns)):
        var = float(np.nanvar(resid[:, j])) + 1e-12
        r = min(_col_stats(series.t, resid[:, j])[1], 0.5 * var)
        noise.append(r)
        states = sum(1 for p in parts if p.kind in _PART_STARTS and columns[j] in p.columns)
        signal.append(max(var - r, 0.1 * var) / max(states, 1))
    span = max(float(series.t[-1] - series.t[0]), step)
    for p in parts:
        if p.kind in _PART_STARTS:
            s = statistics.fmean(signal[columns.index(c)] for c in p.columns)
            start = _PART_STARTS[p.kind](s, span, periods.get(p.name))
            starts.update({f"{p.name}.{k}": float(v) for k, v in start.items()})
    order = [p.name for p in parts]  # the parameters in the components' order (a stable sort)
    params = dict(sorted(starts.items(), key=lambda item: order.index(item[0].split(".")[0])))
    return ModelSpec(kind=COMPOSED, dims=1, time_column=time_column, columns=tuple(columns),
                     measured=tuple(composed.reads_text(parts, c) for c in columns), params=params,
                     noise=tuple(noise), time_format=series.time_format, components=parts)
