"""Cost of method="auto"'s per-trajectory fallback (kalmax/_src/fallback.py).

Usage::

    python benchmarks/auto_fallback_cost.py [--T 10000] [--batch 32] [--repeats 7]

float32, x64 off, constant acceleration in 2 axes (n = 6, p = 2), invented
data simulated from the model. A batch of trajectories under ``jax.vmap``,
value and gradient of the summed log-likelihood with respect to every
trajectory's model (and the forward states of ``kx.smooth``):

* ordinary batch (Δt = 0.1, q/r = 1): nothing fails, auto against "cpu",
  interleaved call by call in one process (the overhead of the check);
* the same batch with trajectory 0 replaced by a model beyond the normal
  equations (Δt = 5e-3, q/r = 1e-7: the kernel returns NaN): auto runs the
  covariance-form filter on the whole batch and takes its answer for that
  trajectory (the cost of the fallback). "cpu" is NaN there.

Medians of ``--repeats`` after a warm-up call.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np


def trajectories(T, batch, failing, seed=0):
    import kalmax as kx

    rng = np.random.default_rng(seed)
    times = np.arange(T, dtype=np.float64)
    models, ys = [], []
    for k in range(batch):
        dt, ratio = (5e-3, 1e-7) if (failing and k == 0) else (0.1, 1.0)
        sm = kx.constant_acceleration(dims=2, q=ratio, r=1.0).at_times(times * dt)
        A, Q, C, R = (np.asarray(a, np.float64) for a in (sm.A, sm.Q, sm.C, sm.R))
        n = A.shape[-1]
        vals, vecs = np.linalg.eigh(Q[0])  # a regular grid: one Q; a square root that tolerates rounding
        L = vecs * np.sqrt(np.clip(vals, 0, None))
        noise = rng.standard_normal((T, n)) @ L.T
        x = rng.standard_normal(n)
        xs = np.empty((T, n))
        for t in range(T):
            if t:
                x = A[0] @ x + noise[t]
            xs[t] = x
        y = xs @ np.asarray(C).T + rng.standard_normal((T, C.shape[-2]))
        models.append(dict(A=A, Q=Q, C=C, R=R, x0_mean=np.zeros(n), x0_cov=np.eye(n)))
        ys.append(y)
    stack = {k: np.stack([m[k] for m in models]).astype(np.float32) for k in models[0]}
    return kx.StateSpace(**stack), np.stack(ys).astype(np.float32)


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--T", type=int, default=10_000)
    ap.add_argument("--batch", type=int, default=32)
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args(argv)

    import jax
    import jax.numpy as jnp

    import kalmax as kx

    def programs(method):
        def ll(m, y):
            return kx.log_likelihood(m, y, method=method)

        vg = jax.jit(jax.vmap(jax.value_and_grad(ll)))
        fw = jax.jit(jax.vmap(lambda m, y: kx.smooth(m, y, method=method).states))
        return vg, fw

    progs = {m: programs(m) for m in ("auto", "cpu")}
    print(f"T = {args.T}, batch {args.batch}, n = 6, p = 2, float32; load {os.getloadavg()}")
    for failing in (False, True):
        model, y = trajectories(args.T, args.batch, failing)
        model, y = jax.tree_util.tree_map(jnp.asarray, model), jnp.asarray(y)
        times = {(m, k): [] for m in progs for k in ("value+grad", "forward")}
        for m, (vg, fw) in progs.items():  # warm-up (compilation)
            jax.block_until_ready(vg(model, y))
            jax.block_until_ready(fw(model, y))
        for _ in range(args.repeats):
            for m, (vg, fw) in progs.items():
                t0 = time.perf_counter()
                jax.block_until_ready(vg(model, y))
                times[(m, "value+grad")].append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                jax.block_until_ready(fw(model, y))
                times[(m, "forward")].append(time.perf_counter() - t0)
        val = {m: np.asarray(progs[m][0](model, y)[0]) for m in progs}
        label = "one failing trajectory" if failing else "nothing fails"
        for k in ("value+grad", "forward"):
            med = {m: statistics.median(times[(m, k)]) for m in progs}
            print(f"{label:24s} {k:10s} auto {med['auto']:.4f} s  cpu {med['cpu']:.4f} s  "
                  f"ratio {med['auto'] / med['cpu']:.3f}")
        print(f"{label:24s} finite log-likelihoods: auto {int(np.isfinite(val['auto']).sum())}/{args.batch}, "
              f"cpu {int(np.isfinite(val['cpu']).sum())}/{args.batch}")


if __name__ == "__main__":
    main()
