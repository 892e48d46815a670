"""The built-in demo: an invented drifting-float scenario, fitted end to end.

Run it with ``make demo`` or ``python -m kalmax.demo [--out DIR]``.

The scenario is invented for this demo and generated deterministically here
(no real place, instrument or data set): a small surface float drifts on an
imaginary fjord for two hours.

- A camera mast on the shore triangulates the float's position (``east``,
  ``north``, metres) every 20–60 s, with noise of 4 m standard deviation; fog
  banks hide the float for two long stretches.
- The float's own paddle-wheel current meter reports its velocity through the
  water (``current_east``, ``current_north``, m/s) every 8–20 s, with noise of
  0.03 m/s; a battery brown-out silences it for a quarter of an hour.

The two sensors run on their own clocks, so the table has irregular
timestamps (ISO 8601), and each row holds only what reported at that moment.
The true motion is a constant-velocity (Wiener velocity) model with
acceleration noise q = 2e-5 m²/s³.

The demo then runs the same job as ``kalmax fit`` on that table, starting from
a deliberately poor model (every noise variance 1 in its own units, and
process noise 50 000 times too large), and prints the held-out error before
and after fitting. Outputs: the table, the poor starting model, the fitted
model file, the smoothed table with 95 % intervals, and a PNG report.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import sys
import time
from pathlib import Path

import numpy as np

TRUE_Q = 2e-5  # m²/s³, acceleration noise spectral density per axis
CAMERA_SD = 4.0  # m
METER_SD = 0.03  # m/s
DURATION = 7200.0  # s
START = _dt.datetime(2031, 6, 14, 9, 0, 0, tzinfo=_dt.timezone.utc)  # an invented morning


def _sensor_times(rng, low, high, gaps):
    times, t = [], float(rng.uniform(0, low))
    while t < DURATION:
        if not any(a <= t < b for a, b in gaps):
            times.append(round(t, 3))
        t += float(rng.uniform(low, high))
    return np.array(times)


def drifter_table(seed: int = 20310614):
    """The invented scenario as a table: (column names, {name: list of cells}, truth dict).

    Deterministic for a given seed. Times are ISO 8601 strings (UTC, ms).
    """
    rng = np.random.default_rng(seed)
    cam = _sensor_times(rng, 20.0, 60.0, gaps=[(1500.0, 2100.0), (4800.0, 5250.0)])
    met = _sensor_times(rng, 8.0, 20.0, gaps=[(3000.0, 3900.0)])
    t = np.union1d(cam, met)
    # Exact simulation of the Wiener-velocity model on the irregular grid:
    # per axis A = [[1, Δ], [0, 1]], Q = q [[Δ³/3, Δ²/2], [Δ²/2, Δ]].
    x = np.zeros((t.size, 4))
    x[0] = [0.0, 0.0, 0.25, -0.08]  # start at the mast's origin, drifting east-south-east
    for k in range(1, t.size):
        d = t[k] - t[k - 1]
        Q1 = TRUE_Q * np.array([[d**3 / 3, d**2 / 2], [d**2 / 2, d]])
        L = np.linalg.cholesky(Q1 + 1e-15 * np.eye(2))
        for a in range(2):
            pos, vel = x[k - 1, a], x[k - 1, 2 + a]
            w = L @ rng.standard_normal(2)
            x[k, a] = pos + d * vel + w[0]
            x[k, 2 + a] = vel + w[1]
    n = t.size
    east = np.full(n, np.nan)
    north = np.full(n, np.nan)
    ce = np.full(n, np.nan)
    cn = np.full(n, np.nan)
    on_cam = np.isin(t, cam)
    on_met = np.isin(t, met)
    east[on_cam] = x[on_cam, 0] + CAMERA_SD * rng.standard_normal(on_cam.sum())
    north[on_cam] = x[on_cam, 1] + CAMERA_SD * rng.standard_normal(on_cam.sum())
    ce[on_met] = x[on_met, 2] + METER_SD * rng.standard_normal(on_met.sum())
    cn[on_met] = x[on_met, 3] + METER_SD * rng.standard_normal(on_met.sum())
    stamps = [(START + _dt.timedelta(seconds=float(s))).isoformat(timespec="milliseconds").replace("+00:00", "Z")
              for s in t]

    def cells(v, digits):
        return ["" if np.isnan(a) else f"{a:.{digits}f}" for a in v]

    names = ["time", "east", "north", "current_east", "current_north"]
    cols = {"time": stamps, "east": cells(east, 2), "north": cells(north, 2),
            "current_east": cells(ce, 4), "current_north": cells(cn, 4)}
    truth = {"t": t, "states": x, "q": TRUE_Q, "noise": [CAMERA_SD**2] * 2 + [METER_SD**2] * 2}
    return names, cols, truth


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m kalmax.demo",
        description="Fit kalmax to an invented drifting-float scenario and write the outputs.")
    parser.add_argument("--out", default="demo-out", help="output folder (created; default: %(default)s)")
    parser.add_argument("--steps", type=int, default=300, help="optimisation steps (default: %(default)s)")
    parser.add_argument("--quiet", action="store_true", help="no progress display")
    args = parser.parse_args(argv)

    from . import cli
    from ._src.tools.atomic_outputs import AtomicOutputs
    from ._src.tools.model_file import load_model, save_model
    from ._src.tools.spec import ModelSpec
    from ._src.tools.tables import write_table

    started = time.perf_counter()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    names, cols, truth = drifter_table()
    data = out / "drifter.csv"
    with AtomicOutputs() as files:
        write_table(data, names, cols, files)
        columns = ("east", "north", "current_east", "current_north")
        poor = ModelSpec(kind="constant-velocity", dims=2, time_column="time", columns=columns,
                         measured=("position0", "position1", "velocity0", "velocity1"),
                         params={"q": [1.0, 1.0]}, noise=(1.0, 1.0, 1.0, 1.0), time_format="iso8601",
                         fit={"note": "deliberately poor starting model for the demo"})
        save_model(out / "poor_start.json", poor, files)
    n_rows = len(cols["time"])
    print(f"Invented scenario: surface float on an imaginary fjord, {n_rows} rows over 2 h "
          f"(written to {data}).")
    print("Fitting a constant-velocity model in 2 axes from a deliberately poor start ...")
    argv_fit = ["fit", str(data), "--time", "time", "--model", "constant-velocity", "--dims", "2",
                "--measure", "east", "--measure", "north",
                "--measure", "current_east=velocity0", "--measure", "current_north=velocity1",
                "--start", str(out / "poor_start.json"), "--steps", str(args.steps),
                "--output", str(out / "drifter_smoothed.csv"), "--model-file", str(out / "drifter_model.json"),
                "--report", str(out / "drifter_report.png")]
    if args.quiet:
        argv_fit.append("--quiet")
    code = cli.main(argv_fit)
    if code != 0:
        return code
    fitted = load_model(out / "drifter_model.json")
    print("\nFitted versus the values the scenario was generated with:")
    print(f"  acceleration noise q (east, north): {fitted.params['q'][0]:.3g}, {fitted.params['q'][1]:.3g}"
          f"   (true {TRUE_Q:.3g})")
    for c, v, tv in zip(fitted.columns, fitted.noise, truth["noise"]):
        print(f"  noise sd of {c:<14} {np.sqrt(v):.4g}   (true {np.sqrt(tv):.4g})")
    print(f"\nDemo finished in {time.perf_counter() - started:.1f} s; outputs in {out}/")
    return 0


if __name__ == "__main__":
    sys.exit(main())
