"""Device check: the parallel-in-time solve versus the sequential scan on this machine's accelerator.

    python benchmarks/device_check.py [--dtype float32|float64] [--budget-s 300] [--out FILE]

One command, no network access. Uses the default JAX device: a GPU (or TPU)
when one is present, else the CPU (then with smaller T). For every T it
times, for method="parallel" and method="scan", the forward smooth and the
value-and-gradient of a scalar loss with respect to the model (A, C, Q, R),
reports XLA's temporary-buffer estimate of the value-and-gradient program,
and checks that both methods agree. Prints one JSON document on stdout
(progress goes to stderr).

Workload: invented — n = 10 slowly rotating, damped state components mixed
into p = 2 sensors, 20 % of readings missing (see benchmarks/parallel.py).

A wall-clock budget keeps the run bounded: once it is spent, remaining cases
are reported as skipped; a case whose warm-up call is slow gets one timed
repeat instead of several. The sequential scan at T = 10⁶ on a GPU runs one
tiny kernel sequence per step and is the slowest case by far.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))


def log(*a):
    print(*a, file=sys.stderr, flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dtype", default="float64", choices=["float32", "float64"])
    ap.add_argument("--budget-s", type=float, default=300.0)
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--T", type=str, default=None, help="comma-separated lengths (default by platform)")
    ap.add_argument("--out", default=None, help="also write the JSON here")
    args = ap.parse_args(argv)
    start = time.perf_counter()

    import jax

    if args.dtype == "float64":
        jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp
    import numpy as np

    import kalmax as kx
    from kalmax._src.backends import registry
    from parallel import make_problem

    platform = jax.default_backend()
    dev = jax.devices()[0]
    on_accel = platform != "cpu"
    if args.T:
        Ts = [int(float(t)) for t in args.T.split(",")]
    else:
        Ts = [1_000, 10_000, 100_000, 1_000_000] if on_accel else [1_000, 10_000]
    dtype = jnp.dtype(args.dtype)
    out = dict(platform=platform, device=str(getattr(dev, "device_kind", dev)), jax=jax.__version__,
               dtype=args.dtype, n=args.n, p=2, auto_method=registry.resolve_method("auto"), cases=[])

    def cast(tree):
        return jax.tree_util.tree_map(lambda a: a.astype(dtype) if jnp.issubdtype(a.dtype, jnp.floating) else a, tree)

    for T in Ts:
        model, y, mask = make_problem(args.n, 2, T)
        model, y = cast(model), cast(y)
        case = dict(T=T)
        states = {}
        for method in ("parallel", "scan"):
            if time.perf_counter() - start > args.budget_s:
                case[method] = "skipped (budget spent)"
                continue

            def fwd_fn(m, yy, method=method):
                return kx.smooth(m, yy, mask, method=method).states

            def loss(m, yy, method=method):
                meas = kx.smooth(m, yy, mask, method=method).measurements
                return jnp.sum(jnp.where(mask, meas, 0.0) ** 2)

            r = {}
            t0 = time.perf_counter()
            fwd = jax.jit(fwd_fn).lower(model, y).compile()
            vg = jax.jit(jax.value_and_grad(loss)).lower(model, y).compile()
            r["compile_s"] = time.perf_counter() - t0
            ma = vg.memory_analysis()
            if ma is not None:
                r["vg_temp_mb"] = ma.temp_size_in_bytes / 2**20
            for name, fn in (("forward_s", fwd), ("value_and_grad_s", vg)):
                t0 = time.perf_counter()
                res = jax.block_until_ready(fn(model, y))
                warm = time.perf_counter() - t0
                if name == "forward_s":
                    states[method] = np.asarray(res)
                reps = 1 if warm > 5 else 5
                times = []
                for _ in range(reps):
                    t0 = time.perf_counter()
                    jax.block_until_ready(fn(model, y))
                    times.append(time.perf_counter() - t0)
                r[name] = float(np.median(times))
            case[method] = r
            log(f"T={T} {method}: {r}")
        if len(states) == 2:
            scale = float(np.max(np.abs(states["scan"]))) or 1.0
            case["max_abs_diff_over_max_abs"] = float(np.max(np.abs(states["parallel"] - states["scan"]))) / scale
            p, s = case["parallel"], case["scan"]
            case["scan_over_parallel"] = {k: s[k] / p[k] for k in ("forward_s", "value_and_grad_s")}
        out["cases"].append(case)
    try:
        stats = dev.memory_stats()
        if stats and "peak_bytes_in_use" in stats:
            out["device_peak_mb"] = stats["peak_bytes_in_use"] / 2**20
    except Exception:  # memory_stats is not offered by every backend
        pass
    out["total_s"] = time.perf_counter() - start
    text = json.dumps(out, indent=1)
    print(text)
    if args.out:
        Path(args.out).write_text(text)


if __name__ == "__main__":
    main()
