"""The PNG report: measurements, smoothed values with bands, held-out cells, forecasts, residuals, loss curve.

matplotlib is imported lazily with the non-interactive Agg backend, so the
report works on servers without a display and never opens a window.

Long series. A panel is about 1100 pixels wide, so a record of 10⁶ rows puts
hundreds of rows on each pixel column. Above ``FULL_DETAIL_ROWS`` rows the
time axis is cut into ``BUCKETS`` equal buckets (about two per pixel) and
each bucket is drawn by what shows at that width:

* the smoothed line by its first, last, lowest and highest point (so every
  peak and trough stays, and the line keeps its shape between buckets);
* the interval band by its envelope: the lowest lower bound and the highest
  upper bound of the bucket, over the whole bucket;
* measured, held-out and residual points by the lowest and the highest of
  the bucket (an outlier is never dropped; dense clouds are thinned).

Drawing then costs a few thousand points per panel whatever the length of
the record (measured: about 2 s for 10⁶ rows and one column, most of it
spent rasterising). Below the threshold every row is drawn as it is.
"""

from __future__ import annotations

import datetime as _dt
from typing import Optional, Sequence

import numpy as np

MAX_PANELS = 8  # more measurement columns than this are summarised by the first 8
BUCKETS = 2000  # about two per pixel of a panel's width
FULL_DETAIL_ROWS = 4 * BUCKETS  # up to this many rows, every row is drawn


# ----------------------------------------------------------------------------
# Decimation (pure NumPy, O(T))
# ----------------------------------------------------------------------------


def bucket_ids(x: np.ndarray, buckets: int = BUCKETS) -> np.ndarray:
    """The bucket (0..buckets−1) of each of the increasing values ``x``: equal widths from x[0] to x[-1]."""
    x = np.asarray(x, dtype=np.float64)
    span = x[-1] - x[0] if x.size else 0.0
    if not span > 0:
        return np.zeros(x.shape, np.int64)
    return np.minimum(((x - x[0]) / span * buckets).astype(np.int64), buckets - 1)


def _run_starts(b: np.ndarray) -> np.ndarray:
    return np.flatnonzero(np.r_[True, b[1:] != b[:-1]]) if b.size else np.empty(0, np.int64)


def extreme_rows(b: np.ndarray, v: np.ndarray, rows: Optional[np.ndarray] = None, *, ends: bool = False):
    """The rows to draw for values ``v`` in sorted buckets ``b``: per bucket the lowest and highest.

    ``rows``: the candidate rows (increasing; default every row with a
    finite value). ``ends``: also each bucket's first and last row (for a
    line). Returns increasing row indices.
    """
    v = np.asarray(v, dtype=np.float64)
    if rows is None:
        rows = np.flatnonzero(np.isfinite(v))
    if rows.size == 0:
        return rows
    bb, vv = b[rows], v[rows]
    starts = _run_starts(bb)
    lengths = np.diff(np.r_[starts, vv.size])
    keep = []
    for reduce in (np.minimum, np.maximum):
        target = np.repeat(reduce.reduceat(vv, starts), lengths)
        pos = np.flatnonzero(vv == target)
        keep.append(pos[_run_starts(bb[pos])])  # the first such row of each bucket
    if ends:
        keep += [starts, np.r_[starts[1:], vv.size] - 1]
    return rows[np.unique(np.concatenate(keep))]


def envelope(x: np.ndarray, b: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """(x, lower, upper) of the band's envelope: per bucket min(lo) and max(hi) from its first to its last x."""
    starts = _run_starts(b)
    last = np.r_[starts[1:], b.size] - 1
    lo_b = np.minimum.reduceat(lo, starts)
    hi_b = np.maximum.reduceat(hi, starts)
    xs = np.column_stack([x[starts], x[last]]).ravel()
    return xs, np.repeat(lo_b, 2), np.repeat(hi_b, 2)


# ----------------------------------------------------------------------------
# The time axis
# ----------------------------------------------------------------------------


def _offset_text(offset: _dt.timedelta) -> str:
    total = int(offset.total_seconds())
    sign = "-" if total < 0 else "+"
    h, rest = divmod(abs(total), 3600)
    return f"UTC{sign}{h:02d}:{rest // 60:02d}"


def time_axis(spec, series):
    """(x values, axis label, is_date): numbers as in the column, date-times as matplotlib day numbers.

    Date-times are drawn in the zone their rows state: one shared UTC offset
    (e.g. all +02:00) is kept, so the tick labels read like the data; rows
    whose offsets differ (a change to summer time) are drawn in UTC; times
    without a zone are drawn as written (read as UTC, shown unshifted), and
    the label says which.
    """
    from .time_units import UNITS

    clock = series.clock
    unit = series.unit
    if series.time_format == "iso8601":
        import matplotlib.dates as mdates

        from .series import first_datetime

        start = first_datetime(series).replace(tzinfo=None)  # UTC wall clock
        style = clock.style if clock is not None else "zoned"
        offset = clock.offset if clock is not None else _dt.timedelta(0)
        if style == "zoned" and offset:
            start = start + offset
        x = mdates.date2num(start) + series.t * float(UNITS[unit or "s"] / 86400)
        if style == "date":
            label = "date (no time zone)"
        elif style == "unzoned":
            label = "time (as written; the timestamps carry no time zone)"
        elif offset is None:
            label = "time (UTC; the rows' UTC offsets differ)"
        elif offset:
            label = f"time ({_offset_text(offset)}, the offset of every row)"
        else:
            label = "time (UTC)"
        return x, label, True
    if clock is not None:
        first = float(clock.first)
        x = first + series.t * float(clock.native_per_unit)
    else:
        x = series.t + _first_number(series)
    numbers_unit = None
    if clock is not None and clock.unit is not None:
        numbers_unit = clock.unit if clock.native_per_unit == 1 else None
        if numbers_unit is None:
            ratio = UNITS[clock.unit] / clock.native_per_unit
            numbers_unit = next((k for k, v in UNITS.items() if v == ratio), None)
    return x, f"{spec.time_column}" + (f" ({numbers_unit})" if numbers_unit else ""), False


def _first_number(series) -> float:
    try:
        return float(series.times_raw[0])
    except (TypeError, ValueError):
        return 0.0


# ----------------------------------------------------------------------------
# The figure
# ----------------------------------------------------------------------------


def draw_report(spec, series, smoothing, *, level: float = 0.95, test_mask=None,
                history: Optional[Sequence[float]] = None, loss_label: str = "fit loss",
                title: str = "", summary: str = ""):
    """The report's matplotlib figure (see :func:`write_report`)."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    from statistics import NormalDist

    from .apply_workflow import padded

    z = NormalDist().inv_cdf(0.5 + level / 2)
    cols = list(spec.columns)[:MAX_PANELS]
    n_panels = len(cols) + 1 + (1 if history else 0)
    fig, axes = plt.subplots(n_panels, 1, figsize=(11, 2.6 * n_panels + 0.9), squeeze=False,
                             constrained_layout=True)
    axes = axes[:, 0]
    x, xlabel, is_date = time_axis(spec, series)
    T = x.size
    f = int(series.forecast)
    rec = T - f  # rows of the record; the last f rows are forecast rows
    mask = series.mask
    test = padded(test_mask, series)
    test = np.zeros_like(mask) if test is None else test
    decimate = T > FULL_DETAIL_ROWS
    b = bucket_ids(x) if decimate else None
    rec_rows = np.arange(rec)
    fc_rows = np.arange(rec - 1, T) if f else None  # from the last observed row, so the two parts join

    def line(ax, rows, values, **kw):
        keep = extreme_rows(b, values, rows, ends=True) if decimate else rows
        ax.plot(x[keep], values[keep], **kw)

    def band(ax, rows, lo, hi, **kw):
        if decimate:
            xs, l, h = envelope(x[rows], b[rows], lo[rows], hi[rows])
            ax.fill_between(xs, l, h, **kw)
        else:
            ax.fill_between(x[rows], lo[rows], hi[rows], **kw)

    def points(ax, rows, values, *args, **kw):
        keep = extreme_rows(b, values, rows) if decimate else rows
        ax.plot(x[keep], values[keep], *args, **kw)

    def shade_forecast(ax, label=None):
        if f:
            ax.axvspan(x[rec - 1], x[-1], facecolor="0.5", alpha=0.12, linewidth=0, label=label)

    # Columns modelled on a transformed scale (--transform) are drawn back on the natural scale: the
    # transforms are increasing, so interval ends map to interval ends and the mean on the model's scale
    # to the median (tools/transforms.py). The residual panel stays on the model's scale, where
    # (measured − smoothed) / sd is standard normal.
    if spec.transforms:
        from .transforms import inverse

        def natural(a):
            return inverse(a, spec.columns, spec.transforms)
    else:
        def natural(a):
            return a
    ys = natural(series.y)
    means = natural(smoothing.mean)
    lows, highs = natural(smoothing.mean - z * smoothing.sd), natural(smoothing.mean + z * smoothing.sd)
    scale_of = dict(spec.transforms)
    for j, c in enumerate(cols):
        ax = axes[j]
        m, lo, hi = means[:, j], lows[:, j], highs[:, j]
        shade_forecast(ax, "forecast span" if f else None)
        band(ax, rec_rows, lo, hi, color="tab:blue", alpha=0.18, linewidth=0,
             label=f"{level:.0%} interval (new measurement)")
        line(ax, rec_rows, m, color="tab:blue", linewidth=1.3, label="smoothed", zorder=4)
        if f:
            band(ax, fc_rows, lo, hi, color="tab:orange", alpha=0.22, linewidth=0)
            line(ax, fc_rows, m, color="tab:orange", linewidth=1.3, linestyle="--", label="forecast", zorder=4)
        seen = np.flatnonzero(mask[:, j] & ~test[:, j])
        points(ax, seen, ys[:, j], ".", color="0.25", markersize=2.5 if decimate else 3.5, label="measured")
        held = np.flatnonzero(mask[:, j] & test[:, j])
        if held.size:
            points(ax, held, ys[:, j], "o", markerfacecolor="none", markeredgecolor="tab:red",
                   markersize=3 if decimate else 5, markeredgewidth=0.7 if decimate else 1.0,
                   label="held out (not seen by the fit)")
        n_missing = int((~mask[:rec, j]).sum())
        ax.set_ylabel(f"{c}\n({spec.measured[j]}"
                      + (f"; modelled as {scale_of[c]}({c}), drawn back" if c in scale_of else "") + ")")
        ax.grid(alpha=0.3)
        ax.set_title(f"{c}: {int(mask[:, j].sum())} measured, {n_missing} missing or imputed"
                     + (f", {f} forecast rows" if f else ""), fontsize=9, loc="left")
    # Standardised residuals of the measured cells: (measured - smoothed) / predictive sd.
    ax = axes[len(cols)]
    shade_forecast(ax)
    resid = (series.y[:, :len(cols)] - smoothing.mean[:, :len(cols)]) / smoothing.sd[:, :len(cols)]
    colours = plt.get_cmap("tab10").colors
    for j, c in enumerate(cols):
        seen = np.flatnonzero(mask[:, j] & ~test[:, j])
        points(ax, seen, resid[:, j], ".", color=colours[j % len(colours)], markersize=4, label=c)
        held = np.flatnonzero(mask[:, j] & test[:, j])
        if held.size:
            points(ax, held, resid[:, j], "o", markerfacecolor="none", markeredgecolor="tab:red",
                   markersize=3 if decimate else 4.5, markeredgewidth=0.7 if decimate else 1.0,
                   label="held out" if j == 0 else None)
    for level_line in (-z, z):
        ax.axhline(level_line, color="0.4", linewidth=0.8, linestyle=":")
    ax.axhline(0.0, color="0.4", linewidth=0.8)
    ax.set_ylabel("standardised\nresidual")
    ax.grid(alpha=0.3)
    ax.set_title(f"standardised residuals: (measured − smoothed) / sd of a new measurement; dotted: ±{z:.3g} "
                 f"(the {level:.0%} interval)" + ("; on the model's (transformed) scale" if spec.transforms else ""),
                 fontsize=9, loc="left")
    if len(cols) > 1:
        ax.legend(loc="upper right", fontsize=7, ncol=min(len(cols) + 1, 5), frameon=False)
    for k in range(len(cols) + 1):
        if T > 1:
            axes[k].set_xlim(x[0], x[-1])
        if is_date:
            import matplotlib.dates as mdates

            locator = mdates.AutoDateLocator()
            axes[k].xaxis.set_major_locator(locator)
            axes[k].xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    axes[len(cols)].set_xlabel(xlabel + (f"; rates per {spec.time_unit}" if spec.time_unit else ""))
    if history:
        ax = axes[-1]
        h = np.asarray(history, dtype=float)
        ax.plot(np.arange(h.size), h, color="tab:green")
        ax.set_xlabel("optimisation step (0 = starting model)")
        ax.set_ylabel(loss_label)
        ax.set_title("loss curve", fontsize=9, loc="left")
        if np.all(h > 0) and h.max() / h.min() > 50:
            ax.set_yscale("log")
        ax.grid(alpha=0.3)
    notes = []
    if len(spec.columns) > MAX_PANELS:
        notes.append(f"first {MAX_PANELS} of {len(spec.columns)} columns shown")
    if decimate:
        notes.append(f"{T} rows drawn by their extremes in {BUCKETS} time buckets")
    if notes:
        summary = (summary + "\n" if summary else "") + "(" + "; ".join(notes) + ")"
    fig.suptitle((title or f"kalmax: {spec.kind} model") + ("\n" + summary if summary else ""), fontsize=10)
    # One legend for every panel, under the panels, so that it never hides data.
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncol=min(len(labels), 7), fontsize=8, frameon=False)
    return fig


def write_report(path, spec, series, smoothing, *, level: float = 0.95, test_mask=None,
                 history: Optional[Sequence[float]] = None, loss_label: str = "fit loss",
                 title: str = "", summary: str = "") -> None:
    """Write the PNG report to ``path`` (any file name; the format is always PNG).

    One panel per measurement column (at most 8): measured values (dots),
    held-out values (open red circles, when ``test_mask`` is given), the
    smoothed mean (line) and the ``level`` interval for a new noisy
    measurement (band); forecast rows (``series.forecast``) in a shaded span
    with a dashed orange mean and an orange band. Then a panel of
    standardised residuals, (measured − smoothed) / predictive sd, and, when
    ``history`` is given, the fit's loss curve (labelled ``loss_label``).
    The time axis names its zone (see :func:`time_axis`); long records are
    decimated (module docstring).
    """
    import matplotlib.pyplot as plt

    fig = draw_report(spec, series, smoothing, level=level, test_mask=test_mask, history=history,
                      loss_label=loss_label, title=title, summary=summary)
    try:
        fig.savefig(path, format="png", dpi=100)
    finally:
        plt.close(fig)
