"""Fractions of ordinary tracking models that kalmax solves in float32 (accuracy sweep).

Usage::

    python benchmarks/float32_sweep.py [--count 200] [--T 200] [--seed 7]
        [--methods cpu,scan,parallel,scan-recompute] [--grad-methods cpu,scan] [--json out.json]

Draws ``count`` seeded cases from ``tests/float32_sweep.py`` (random walk,
constant velocity, constant acceleration in 1–3 axes; Δt 1e-3..10, q/r
1e-8..1e4, prior variance 1e-2..1e4, 0–50 % missing; invented data
simulated from each model), solves each in float32 with every method, and
prints, against a float64 textbook Kalman filter + RTS smoother (NumPy):
the fraction where a float32 Kalman filter + RTS is within 1e-3, the fraction
where kalmax is, and the gradient fractions (within 1e-2 of float64 central
differences, along the log-scales of Q, R and the prior covariance).

To measure another version of the package, put it first on PYTHONPATH: the
sweep uses the public API only.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests"))


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--count", type=int, default=200)
    ap.add_argument("--T", type=int, default=200)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--methods", default="cpu,scan,parallel,scan-recompute")
    ap.add_argument("--grad-methods", default="cpu,scan")
    ap.add_argument("--json", default=None)
    args = ap.parse_args(argv)

    import jax

    jax.config.update("jax_enable_x64", True)  # for the float64 confirmation; the solves are float32
    import numpy as np

    import float32_sweep as fs
    import kalmax as kx

    methods = [m for m in args.methods.split(",") if m]
    grad_methods = [m for m in args.grad_methods.split(",") if m]
    t0 = time.time()
    outcomes = fs.run(fs.draw_cases(args.seed, args.count, args.T), methods, gradients=bool(grad_methods),
                      grad_methods=grad_methods)
    print(f"kalmax from {os.path.dirname(kx.__file__)}; seed {args.seed}, {args.count} cases, T = {args.T}; "
          f"{time.time() - t0:.0f} s")
    print(fs.summary(outcomes))
    if args.json:
        rows = [dict(case=o.case.label(), kf32=o.kf32, k64=o.k64, kalmax=o.kalmax, grad1=o.grad1, grad2=o.grad2,
                     grad_trusted=o.grad_trusted) for o in outcomes]
        with open(args.json, "w") as f:
            json.dump(rows, f, indent=0, default=lambda v: None if not np.isfinite(v) else float(v))


if __name__ == "__main__":
    main()
