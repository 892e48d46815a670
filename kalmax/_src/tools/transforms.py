r"""Per-column transforms of the command line: positive and bounded series.

A column that can only be positive (a concentration, a flow) or only lie in
(0, 1) (a fraction) is modelled on a scale where it is unbounded: the model
is linear-Gaussian in g(y), with

    log:    g(y) = log y          (y > 0)
    log1p:  g(y) = log(1 + y)     (y > -1; counts with zeros)
    logit:  g(y) = log(y/(1 − y)) (0 < y < 1)

Back to the natural scale. Each g is strictly increasing, so the interval
[m − z s, m + z s] of g(y) (m the smoothed mean, s the predictive sd on the
transformed scale) maps to the interval [g⁻¹(m − z s), g⁻¹(m + z s)] of y
with the same coverage, and it stays inside the range of g⁻¹ (never below
zero for log). The point value is g⁻¹(m): g(y) is Gaussian, so m is its
median, and a monotone map sends the median to the median of y. It is *not*
the mean of y: for log, E[y] = exp(m + s²/2) > exp(m) (the log-normal mean,
e.g. Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions
vol. 1, ch. 14).
"""

from __future__ import annotations

from typing import Sequence, Tuple

import numpy as np

from .errors import DataError, UsageError

# name → (forward g, inverse g⁻¹, domain test, domain in words)
_KINDS = {
    "log": (np.log, np.exp, lambda y: y > 0, "positive (> 0)"),
    "log1p": (np.log1p, np.expm1, lambda y: y > -1, "greater than -1"),
    "logit": (lambda y: np.log(y) - np.log1p(-y), lambda x: 0.5 * (1.0 + np.tanh(0.5 * x)),
              lambda y: (y > 0) & (y < 1), "strictly between 0 and 1"),
}
TRANSFORM_NAMES = tuple(_KINDS)

Transforms = Tuple[Tuple[str, str], ...]  # ((column, transform name), ...), in column order


def parse(texts: Sequence[str], columns: Sequence[str]) -> Transforms:
    """``COL=NAME`` texts (the ``--transform`` option) as ((column, name), ...) in column order."""
    chosen = {}
    for text in texts or ():
        col, sep, name = text.partition("=")
        col, name = col.strip(), name.strip().lower()
        if not sep or not col or not name:
            raise UsageError(f"--transform {text!r}: write COL=NAME, e.g. ozone=log; NAME is one of "
                             f"{', '.join(TRANSFORM_NAMES)}.")
        if name not in _KINDS:
            raise UsageError(f"--transform {text!r}: unknown transform {name!r}; choose one of "
                             f"{', '.join(TRANSFORM_NAMES)}.")
        if col not in columns:
            raise UsageError(f"--transform {text!r}: {col!r} is not a measured column; the measured columns are "
                             f"{', '.join(columns)}.")
        if col in chosen and chosen[col] != name:
            raise UsageError(f"--transform: column {col!r} is given two transforms ({chosen[col]}, {name}).")
        chosen[col] = name
    return tuple((c, chosen[c]) for c in columns if c in chosen)


def check(transforms, columns) -> Transforms:
    """ValueError unless ``transforms`` is ((column, name), ...) over distinct measured columns."""
    out = []
    for entry in transforms:
        if not (isinstance(entry, (tuple, list)) and len(entry) == 2):
            raise ValueError("each transform must be a (column, name) pair.")
        col, name = entry
        if col not in columns:
            raise ValueError(f"transform of {col!r}: not a measured column.")
        if name not in _KINDS:
            raise ValueError(f"transform {name!r} of {col!r}: choose one of {', '.join(TRANSFORM_NAMES)}.")
        out.append((col, name))
    if len({c for c, _ in out}) != len(out):
        raise ValueError("a column has two transforms.")
    return tuple(out)


def forward(y, columns, transforms: Transforms, *, source="DATA", times=None) -> np.ndarray:
    """g(y) per column (NaN stays NaN). A measured value outside a transform's domain is a
    :class:`DataError` naming the column and its first such data row (1 = the first row after
    the header) and, given ``times``, that row's time cell."""
    y = np.array(y, dtype=np.float64, copy=True)
    for col, name in transforms:
        j = list(columns).index(col)
        g, _, ok, words = _KINDS[name]
        v = y[:, j]
        observed = ~np.isnan(v)
        bad = np.flatnonzero(observed & ~ok(np.where(observed, v, 0.5)))
        if bad.size:
            i = int(bad[0])
            when = "" if times is None else f" (time {times[i]})"
            raise DataError(f"{source}: column {col!r} holds {v[i]:g} on data row {i + 1}{when}, but "
                            f"--transform {col}={name} needs values {words}; {bad.size} value(s) "
                            "are outside. Drop or correct them, or choose another transform.")
        with np.errstate(divide="ignore", invalid="ignore"):
            y[:, j] = np.where(observed, g(np.where(observed, v, 0.5)), np.nan)
    return y


def inverse(x, columns, transforms: Transforms) -> np.ndarray:
    """g⁻¹(x) per column: back to the natural scale (monotone, so interval ends map to interval ends)."""
    x = np.array(x, dtype=np.float64, copy=True)
    for col, name in transforms:
        j = list(columns).index(col)
        x[:, j] = _KINDS[name][1](x[:, j])
    return x
