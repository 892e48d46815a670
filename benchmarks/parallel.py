"""Parallel-in-time versus sequential solves on CPU, and memory of very long series.

    python benchmarks/parallel.py            # T = 10³, 10⁴, 10⁵; n = 4 and 10
    python benchmarks/parallel.py --quick    # T = 10³, 10⁴ only
    python benchmarks/parallel.py --memory   # also T = 10⁶, n = 10 peak memory per method

Workload (invented, simulated here): n slowly rotating, lightly damped state
components observed through p = 2 sensors that each mix all states, dense Q
and R, 20 % of the readings missing, a Gaussian prior on x_0.

Methods: "parallel" (block cyclic reduction, O(log T) depth), "scan" (the
sequential pure-JAX block Cholesky), "scan-recompute" (sequential, factors
recomputed instead of stored) and, when built, "cpu" (the compiled kernel).
For each: the forward smooth and the value-and-gradient of a scalar loss
(squared smoothed measurements on the observed entries) with respect to A,
C, Q, R. Medians over repeats after a warm-up call.

The process is pinned to ONE core, so times measure total work — the
quantity the parallel path's CPU target is stated in (it is built for
accelerators, where the levels run in parallel). (Pinning was also how this
benchmark once sidestepped jaxlib 0.10.2's batched-LAPACK thread-pool hang;
``kalmax/_src/linalg.py`` now avoids that hang at its root.)

Memory (--memory): each method runs in a fresh subprocess: compile ahead of
time, reset the kernel's peak-RSS counter (/proc/self/clear_refs), run the
value-and-gradient once and report VmHWM − VmRSS-before (the extra resident
memory of the computation, inputs excluded, outputs included), plus XLA's
own estimate of the program's temporary buffers.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time

from memory import measure_call
from pathlib import Path

if __name__ == "__main__" and hasattr(os, "sched_setaffinity"):
    os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})  # one core: total work (see docstring)

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent


def make_problem(n, p, T, seed=0, missing=0.2):
    import jax.numpy as jnp

    import kalmax as kx

    rng = np.random.default_rng(seed)
    # Block-diagonal rotations with radius 0.97, mixed by a random orthogonal basis.
    A = np.zeros((n, n))
    for i in range(0, n - 1, 2):
        th = 0.05 * (i + 1)
        A[i:i + 2, i:i + 2] = 0.97 * np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    if n % 2:
        A[-1, -1] = 0.95
    U, _ = np.linalg.qr(rng.standard_normal((n, n)))
    A = U @ A @ U.T
    G = rng.standard_normal((n, n))
    Q = 0.05 * (G @ G.T / n + np.eye(n))
    H = rng.standard_normal((p, p))
    R = 0.2 * (H @ H.T / p + np.eye(p))
    C = rng.standard_normal((p, n)) / np.sqrt(n)
    x = np.zeros(n)
    ys = np.empty((T, p))
    Lq, Lr = np.linalg.cholesky(Q), np.linalg.cholesky(R)
    noise_x = rng.standard_normal((T, n)) @ Lq.T
    noise_y = rng.standard_normal((T, p)) @ Lr.T
    for t in range(T):
        ys[t] = C @ x + noise_y[t]
        x = A @ x + noise_x[t]
    mask = rng.random((T, p)) >= missing
    model = kx.StateSpace(A=jnp.asarray(A), C=jnp.asarray(C), Q=jnp.asarray(Q), R=jnp.asarray(R),
                          x0_mean=jnp.zeros(n), x0_cov=jnp.eye(n))
    return model, jnp.asarray(np.where(mask, ys, 0.0)), jnp.asarray(mask)


def build(method, model, y, mask):
    """(forward, value_and_grad) compiled functions of (model, y)."""
    import jax
    import jax.numpy as jnp

    import kalmax as kx

    def states(m, yy):
        return kx.smooth(m, yy, mask, method=method).measurements

    def loss(m, yy):
        return jnp.sum(jnp.where(mask, states(m, yy), 0.0) ** 2)

    fwd = jax.jit(states).lower(model, y).compile()
    vg = jax.jit(jax.value_and_grad(loss)).lower(model, y).compile()
    return fwd, vg


def time_it(fn, args, repeats=5, budget_s=20.0):
    import jax

    jax.block_until_ready(fn(*args))  # warm-up
    times = []
    for i in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(fn(*args))
        times.append(time.perf_counter() - t0)
        if i >= 1 and sum(times) > budget_s:
            break
    return float(np.median(times))


def available_methods():
    from kalmax._src.backends import registry

    return [m for m in ("parallel", "scan", "scan-recompute", "cpu") if registry.is_available(m)]


def timing_table(Ts, ns, p=2):
    import jax

    jax.config.update("jax_enable_x64", True)
    rows = []
    for n in ns:
        for T in Ts:
            model, y, mask = make_problem(n, p, T)
            row = dict(n=n, p=p, T=T)
            for m in available_methods():
                fwd, vg = build(m, model, y, mask)
                row[m] = dict(forward_s=time_it(fwd, (model, y)), value_and_grad_s=time_it(vg, (model, y)))
            for seq in ("scan", "cpu"):
                if seq in row:
                    row[f"parallel_over_{seq}"] = {
                        k: row["parallel"][k] / row[seq][k] for k in ("forward_s", "value_and_grad_s")
                    }
            rows.append(row)
            print(json.dumps(row), flush=True)
    return rows


def memory_case(method, T, n, p=2):
    """In a fresh subprocess: extra resident memory of one value-and-gradient call."""
    import jax

    jax.config.update("jax_enable_x64", True)
    model, y, mask = make_problem(n, p, T)
    _, vg = build(method, model, y, mask)
    ma = vg.memory_analysis()
    xla_temp = None if ma is None else getattr(ma, "temp_size_in_bytes", None)
    m = measure_call(lambda: jax.block_until_ready(vg(model, y)))
    seconds, how = m["seconds"], m["how"]
    extra = m["extra_kb"] * 1024
    print(json.dumps(dict(method=method, T=T, n=n, p=p, extra_mb=extra / 2**20, bytes_per_step=extra / T,
                          xla_temp_mb=None if xla_temp is None else xla_temp / 2**20,
                          seconds=seconds, how=how)))


def measure_memory(method, T, n, timeout=1800):
    cmd = [sys.executable, str(Path(__file__).resolve()), "--memory-case", method, str(T), str(n)]
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=True)
        return json.loads(out.stdout.strip().splitlines()[-1])
    except subprocess.CalledProcessError as err:
        return dict(method=method, T=T, n=n, error=err.stderr[-500:])
    except Exception as err:  # report, do not abort the run
        return dict(method=method, T=T, n=n, error=f"{type(err).__name__}: {str(err)[:300]}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--memory", action="store_true", help="also T = 10⁶, n = 10 peak memory")
    ap.add_argument("--memory-only", action="store_true")
    ap.add_argument("--memory-case", nargs=3, metavar=("METHOD", "T", "N"), help=argparse.SUPPRESS)
    ap.add_argument("--out", default=str(HERE / "parallel_results.json"))
    args = ap.parse_args(argv)
    if args.memory_case:
        m, T, n = args.memory_case
        memory_case(m, int(T), int(n))
        return
    import jax

    result = dict(machine=platform.processor() or platform.machine(), cores_used=1,
                  jax=jax.__version__, dtype="float64")
    if not args.memory_only:
        Ts = [1_000, 10_000] if args.quick else [1_000, 10_000, 100_000]
        result["timing"] = timing_table(Ts, [4, 10])
    if args.memory or args.memory_only:
        methods = [m for m in ("scan", "scan-recompute", "parallel") if m in available_methods()]
        result["memory"] = []
        for m in methods:
            r = measure_memory(m, 1_000_000, 10)
            print(json.dumps(r), flush=True)
            result["memory"].append(r)
    Path(args.out).write_text(json.dumps(result, indent=1))
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
