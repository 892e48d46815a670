"""Data-driven starting values for a model kind (rough on purpose: the fit refines them)."""

from __future__ import annotations

import math
import statistics
from typing import Dict, Sequence

import numpy as np

from .series import Series
from .spec import KINDS, ModelSpec


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
