"""Data-parallel timing of the compiled kernel: one device against several.

`python benchmarks/sharding.py [--batch 64] [--T 1000] [--n 4] [--devices 1,2] [--threads 1,0]`

A batch of B invented trajectories (a damped n-state oscillator chain read by
n sensors, 20 % of the readings missing) is placed with ``kx.shard_batch`` on
a mesh of d forced host CPU devices (one fresh process per d, since
``XLA_FLAGS=--xla_force_host_platform_device_count=d`` must be set before JAX
starts), and we time, as medians over repeats after a warm-up call:

* forward: ``jax.jit(jax.vmap(smooth))`` on the sharded batch;
* value-and-gradient: ``jax.jit(jax.value_and_grad(Σ log-likelihood))``
  w.r.t. the model.

With the kernel's sharding rule (``backends/kernel_calls.py``) each device runs
the kernel on its own B/d trajectories. The kernel also splits a batch over
threads by itself (``KALMAX_CPU_THREADS``, default: all hardware threads), so
the device count is compared at ``--threads 1`` (one thread per kernel call:
the devices are the only parallelism) and at the default (``0`` here).

Prints a table; the machine's other load is not controlled, so repeat runs
and read ratios, not absolute times.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time


def worker(args):
    import jax

    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp
    import numpy as np

    import kalmax as kx

    rng = np.random.default_rng(0)
    n, T, B = args.n, args.T, args.batch
    A = 0.97 * np.eye(n) + 0.02 * (np.eye(n, k=1) - np.eye(n, k=-1))
    model = kx.StateSpace(A=jnp.asarray(A), C=jnp.eye(n) + 0.1, Q=0.1 * jnp.eye(n), R=0.5 * jnp.eye(n),
                          x0_cov=jnp.eye(n))
    y = rng.standard_normal((B, T, n))
    mask = rng.random((B, T, n)) > 0.2
    mesh = kx.batch_mesh()
    ys, ms = kx.shard_batch((y, mask), mesh)

    smooth = jax.jit(jax.vmap(lambda yy, mm: kx.smooth(model, yy, mm, method="cpu").states))
    loss = lambda m, yy, mm: jnp.sum(jax.vmap(  # noqa: E731
        lambda y1, m1: kx.log_likelihood(m, y1, m1, method="cpu"))(yy, mm))
    vg = jax.jit(jax.value_and_grad(loss))

    def median_time(fn):
        jax.block_until_ready(fn())  # compile and warm up
        times = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            jax.block_until_ready(fn())
            times.append(time.perf_counter() - t0)
        return float(np.median(times))

    hlo = smooth.lower(ys, ms).compile().as_text()
    print(json.dumps({
        "devices": len(jax.devices()),
        "gathers": "all-gather" in hlo,
        "forward_s": median_time(lambda: smooth(ys, ms)),
        "value_and_grad_s": median_time(lambda: vg(model, ys, ms)),
    }))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--T", type=int, default=1000)
    ap.add_argument("--n", type=int, default=4)
    ap.add_argument("--devices", default="1,2")
    ap.add_argument("--threads", default="1,0", help="KALMAX_CPU_THREADS values; 0 = the kernel's default")
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        return worker(args)

    rows = []
    for threads in [int(t) for t in args.threads.split(",")]:
        for d in [int(x) for x in args.devices.split(",")]:
            env = dict(os.environ, JAX_PLATFORMS="cpu")
            flags = [f for f in env.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
            env["XLA_FLAGS"] = " ".join(flags + [f"--xla_force_host_platform_device_count={d}"])
            env.pop("KALMAX_CPU_THREADS", None)
            if threads:
                env["KALMAX_CPU_THREADS"] = str(threads)
            cmd = [sys.executable, __file__, "--worker", "--batch", str(args.batch), "--T", str(args.T),
                   "--n", str(args.n), "--repeats", str(args.repeats)]
            out = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True)
            r = json.loads(out.stdout.strip().splitlines()[-1])
            r["threads"] = threads or "default"
            rows.append(r)

    print(f"B={args.batch}, T={args.T}, n=p={args.n}, float64, {os.cpu_count()} CPUs (shared machine: "
          "other load not controlled), medians of {} repeats".format(args.repeats))
    print(f"{'kernel threads':>14} {'devices':>7} {'forward s':>10} {'val+grad s':>10} {'gathers':>8}")
    for r in rows:
        print(f"{r['threads']!s:>14} {r['devices']:>7} {r['forward_s']:>10.4f} {r['value_and_grad_s']:>10.4f} "
              f"{r['gathers']!s:>8}")
    for threads in sorted({r["threads"] for r in rows}, key=str):
        group = [r for r in rows if r["threads"] == threads]
        base = group[0]
        for r in group[1:]:
            print(f"threads={threads}: {base['devices']} -> {r['devices']} devices: forward x"
                  f"{base['forward_s'] / r['forward_s']:.2f}, value-and-gradient x"
                  f"{base['value_and_grad_s'] / r['value_and_grad_s']:.2f} (speed-up)")


if __name__ == "__main__":
    sys.exit(main())
