"""The PNG report: measurements, smoothed values with bands, held-out points, loss curve.

matplotlib is imported lazily with the non-interactive Agg backend, so the
report works on servers without a display and never opens a window.
"""

from __future__ import annotations

import datetime as _dt
from typing import Optional, Sequence

import numpy as np

MAX_PANELS = 8  # more measurement columns than this are summarised by the first 8


def _time_axis(series):
    """x values for plotting and the axis label."""
    if series.time_format == "iso8601":
        from .series import first_datetime

        start = first_datetime(series)  # in UTC; a time without a zone is read as UTC
        return np.array([start + _dt.timedelta(seconds=float(s)) for s in series.t]), "time (UTC)"
    return series.t + _first_number(series), "time"


def _first_number(series) -> float:
    try:
        return float(series.times_raw[0])
    except (TypeError, ValueError):
        return 0.0


def write_report(path, spec, series, smoothing, *, level: float = 0.95, test_mask=None,
                 history: Optional[Sequence[float]] = None, loss_label: str = "fit loss",
                 title: str = "", summary: str = "") -> None:
    """Write the PNG report to ``path`` (any file name; the format is always PNG).

    One panel per measurement column (at most 8): observed values (dots),
    held-out values (open circles, when ``test_mask`` is given), the smoothed
    mean (line) and the ``level`` interval for a new noisy measurement
    (band). A last panel shows the fit's loss curve (labelled ``loss_label``)
    when ``history`` is given.
    """
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    from statistics import NormalDist

    z = NormalDist().inv_cdf(0.5 + level / 2)
    cols = list(spec.columns)[:MAX_PANELS]
    n_panels = len(cols) + (1 if history else 0)
    fig, axes = plt.subplots(n_panels, 1, figsize=(11, 2.6 * n_panels + 0.9), squeeze=False,
                             constrained_layout=True)
    axes = axes[:, 0]
    x, xlabel = _time_axis(series)
    mask = series.mask
    test = np.zeros_like(mask) if test_mask is None else np.asarray(test_mask)
    for j, c in enumerate(cols):
        ax = axes[j]
        m, s = smoothing.mean[:, j], smoothing.sd[:, j]
        ax.fill_between(x, m - z * s, m + z * s, color="tab:blue", alpha=0.18, linewidth=0,
                        label=f"{level:.0%} interval (new measurement)")
        ax.plot(x, m, color="tab:blue", linewidth=1.3, label="smoothed")
        seen = mask[:, j] & ~test[:, j]
        ax.plot(x[seen], series.y[seen, j], ".", color="0.25", markersize=3.5, label="measured")
        held = mask[:, j] & test[:, j]
        if held.any():
            ax.plot(x[held], series.y[held, j], "o", markerfacecolor="none", markeredgecolor="tab:red",
                    markersize=5, label="held out (not seen by the fit)")
        gaps = ~mask[:, j]
        ax.set_ylabel(f"{c}\n({spec.measured[j]})")
        ax.grid(alpha=0.3)
        ax.set_title(f"{c}: {int(mask[:, j].sum())} measured, {int(gaps.sum())} missing or imputed",
                     fontsize=9, loc="left")
        if j == len(cols) - 1:
            ax.set_xlabel(xlabel)
        if series.time_format == "iso8601":
            import matplotlib.dates as mdates

            locator = mdates.AutoDateLocator()
            ax.xaxis.set_major_locator(locator)
            ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
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
    if len(spec.columns) > MAX_PANELS:
        summary = (summary + "\n" if summary else "") + f"(first {MAX_PANELS} of {len(spec.columns)} columns shown)"
    # One legend for every panel, above the first one (right of its title), so that it never hides data.
    axes[0].legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=4, fontsize=8, frameon=False,
                   borderaxespad=0.1)
    fig.suptitle((title or f"kalmax: {spec.kind} model") + ("\n" + summary if summary else ""), fontsize=10)
    fig.savefig(path, format="png", dpi=100)
    plt.close(fig)
