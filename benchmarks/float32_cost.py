"""Cost of a float32 solve: forward and value+grad at T = 10⁵, n = p = 10 (compiled kernel).

Usage: ``python benchmarks/float32_cost.py [--T 100000] [--repeats 7] [--x64] [--methods cpu,scan,covariance]``

The workload is the invented coupled-oscillator system of ``run.py`` cast to
float32. Prints the medians (seconds) of repeated calls after a warm-up, for
each ``--methods`` entry (default ``"cpu"``; ``"scan"`` is the pure-JAX path,
``"covariance"`` the covariance-form filter). JAX's
x64 switch is off unless ``--x64`` is given (float32 users usually leave it
off; the kernel's arithmetic does not depend on it).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--T", type=int, default=100_000)
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--x64", action="store_true")
    ap.add_argument("--methods", default="cpu", help="comma-separated backends, e.g. cpu,scan,covariance")
    ap.add_argument("--float64", action="store_true", help="the same in float64 (needs --x64), for comparison")
    args = ap.parse_args(argv)

    import jax

    jax.config.update("jax_enable_x64", bool(args.x64))
    import jax.numpy as jnp

    from run import build, make_problem, time_it

    md, y, mask = make_problem(args.n, args.n, args.T, 0)
    dt = jnp.float64 if args.float64 else jnp.float32
    f32 = {k: jnp.asarray(v, dt) for k, v in md.items()}
    y32 = jnp.asarray(y, dt)
    out = {"T": args.T, "n": args.n, "p": args.n, "x64": bool(args.x64), "dtype": str(np.dtype(dt))}
    for method in [m for m in args.methods.split(",") if m]:
        fwd, vg = build(method, f32, y32, mask, 0)
        ok = bool(np.all(np.isfinite(np.asarray(fwd()))))
        tf, times_f, _ = time_it(fwd, args.repeats, 60)
        tv, times_v, _ = time_it(vg, args.repeats, 60)
        out[method] = {"forward_median_s": tf, "value_and_grad_median_s": tv, "finite": ok,
                       "forward_all": times_f, "value_and_grad_all": times_v}
    out["load_average"] = os.getloadavg()
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
