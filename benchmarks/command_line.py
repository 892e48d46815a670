"""The command line at scale: `python benchmarks/command_line.py [--rows N] [--steps K] [--models ...]`.

Invented data (simulated here, seeded): irregular timestamps with steps
uniform in [0.5, 1.5], 10 % of the cells missing;
  random-walk         one column, level diffusion q = 0.2 per unit time, noise sd 0.5;
  constant-velocity   two columns (east, north), velocity diffusion q = 0.01, noise sd 0.5;
both sampled exactly from the continuous-time model at the irregular stamps.

Each model is fitted with each optimiser (--optimizer adam: --steps steps;
lbfgs: until the loss stalls, at most --steps) twice by `python -m kalmax fit` in a fresh process with
an empty compilation cache folder: the first run compiles everything, the
second finds the compiled programs on disk. Reported per run: wall time, the
fitting time (the progress line of the last step, which counts from the
start of the fit, compilation of the step included), the time to the first
step (mostly compilation), and the CPU time of the child process (user +
system; on a shared machine the wall time can be much longer than this).

Writes benchmarks/command_line_results.json.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def write_data(folder: Path, model: str, rows: int) -> Path:
    rng = np.random.default_rng(1)
    t = np.cumsum(rng.uniform(0.5, 1.5, rows))
    t -= t[0]
    path = folder / f"{model}.csv"
    dt = np.diff(t)
    if model == "random-walk":
        # Exact sampling of the continuous-time model: increments N(0, q Δ).
        level = np.concatenate([[0.0], np.cumsum(rng.normal(0, 1, rows - 1) * np.sqrt(0.2 * dt))])
        y = level[:, None] + rng.normal(0, 0.5, (rows, 1))
        header = "t,y"
    else:
        # Exact sampling per axis: (Δpos, Δvel) ~ N(0, q [[Δ³/3, Δ²/2], [Δ²/2, Δ]]) through its
        # Cholesky factor, plus the drift vel·Δ of the position.
        q = 0.01
        y = np.empty((rows, 2))
        for k in range(2):
            z1, z2 = rng.normal(size=(2, rows - 1))
            l11 = np.sqrt(q * dt**3 / 3)
            l21 = (q * dt**2 / 2) / l11
            l22 = np.sqrt(q * dt - l21**2)
            vel = np.concatenate([[0.0], np.cumsum(l21 * z1 + l22 * z2)])
            pos = np.concatenate([[0.0], np.cumsum(vel[:-1] * dt + l11 * z1)])
            y[:, k] = pos + rng.normal(0, 0.5, rows)
        header = "t,east,north"
    y[rng.random(y.shape) < 0.1] = np.nan
    with open(path, "w") as f:
        f.write(header + "\n")
        for k in range(rows):
            cells = ["" if np.isnan(v) else f"{v:.6f}" for v in y[k]]
            f.write(f"{t[k]:.6f}," + ",".join(cells) + "\n")
    return path


def run_fit(data: Path, model: str, steps: int, cache: Path, optimizer: str = "adam") -> dict:
    measures = ["--measure", "y"] if model == "random-walk" else ["--measure", "east", "--measure", "north"]
    dims = [] if model == "random-walk" else ["--dims", "2"]
    cmd = [sys.executable, "-m", "kalmax", "fit", str(data), "--time", "t", "--model", model, *dims, *measures,
           "--steps", str(steps), "--optimizer", optimizer, "--no-report", "-o", str(data.with_suffix(".out.csv")),
           "--model-file", str(data.with_suffix(".model.json"))]
    env = dict(os.environ, KALMAX_CACHE_DIR=str(cache))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(f"kalmax fit failed ({proc.returncode}):\n{proc.stderr}")
    steps_seen = re.findall(r"fit step (\d+)/\d+ .*?\(([\d.]+) s", proc.stderr)  # progress goes to stderr
    first = float(steps_seen[0][1]) if steps_seen else float("nan")
    last = float(steps_seen[-1][1]) if steps_seen else float("nan")
    # A fit that stops early (lbfgs: converged) says so, with its step count and time.
    stopped = re.findall(r"fit stopped: \w+ after (\d+) steps \(([\d.]+) s\)", proc.stderr)
    if stopped:
        last = float(stopped[-1][1])
    return {"wall_s": wall, "fit_s": last, "first_step_s": first,
            "steps_run": int(stopped[-1][0]) if stopped else steps,
            "cpu_s": (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime),
            "summary": [line for line in proc.stdout.splitlines() if line.startswith("Fitted parameters")]}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10**6)
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--models", nargs="+", default=["random-walk", "constant-velocity"])
    ap.add_argument("--optimizers", nargs="+", default=["adam", "lbfgs"], choices=["adam", "lbfgs"])
    args = ap.parse_args(argv)
    results = {"rows": args.rows, "steps": args.steps, "cores": os.cpu_count(),
               "load_before": os.getloadavg()[0], "runs": {}}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for model in args.models:
            data = write_data(tmp, model, args.rows)
            for optimizer in args.optimizers:
                cache = tmp / f"cache-{model}-{optimizer}"
                runs = [run_fit(data, model, args.steps, cache, optimizer) for _ in range(2)]
                results["runs"][f"{model} {optimizer}"] = {"cold": runs[0], "cached": runs[1]}
                for label, r in zip(("cold", "cached"), runs):
                    print(f"{model:18s} {optimizer:5s} {label:6s} wall {r['wall_s']:7.1f} s  fit {r['fit_s']:7.1f} s"
                          f"  steps {r['steps_run']}  first step {r['first_step_s']:5.1f} s  cpu {r['cpu_s']:7.1f} s  "
                          f"{r['summary']}", flush=True)
    results["load_after"] = os.getloadavg()[0]
    (HERE / "command_line_results.json").write_text(json.dumps(results, indent=2) + "\n")


if __name__ == "__main__":
    main()
