"""Cost of a per-step diagonal R or Q given as variances against the same covariance dense.

Usage: ``python benchmarks/noise_forms_cost.py [--noise R|Q|both] [--T 100000] [--n 10] [--repeats 5] [--method cpu]``

The workload is the invented coupled-oscillator system of ``run.py`` (n = p),
with a per-step diagonal R whose variances v (T, p) vary in time (as a
network predicting log-variances would give them), or a per-step diagonal
Q with variances (T-1, n) (R then stays the workload's dense R). Two ways to
pass each:

* ``diagonal``: ``kx.DiagonalNoise(v)``; the compiled kernel keeps it
  diagonal (variances in, variance gradients out);
* ``dense``: ``v[..., None] * eye(k)``, built inside the function, so that
  the gradient also reaches v (what a caller had to do before the noise forms).

Measured, after a warm-up and ahead-of-time compilation: the forward pass
(smoothed states) and value_and_grad of log p(y) w.r.t. v. R: each form
timed in turn (the original protocol). Q: the two forms interleaved call by
call in this one process, so that a change in the machine's load meets both
alike. Prints medians (seconds), the dense/diagonal ratios and the load
average as JSON; float64 (x64 on).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))


def _forms(k):
    import jax.numpy as jnp

    import kalmax as kx

    return {
        "diagonal": lambda v: kx.DiagonalNoise(v),
        "dense": lambda v: v[..., None] * jnp.eye(k, dtype=v.dtype),
    }


def _compiled(base, yj, field, form, v, method):
    """(forward, value_and_grad of log p(y)) w.r.t. the variances of ``field``, compiled ahead of time."""
    import jax

    import kalmax as kx

    def states(v):
        return kx.smooth(base.replace(**{field: form(v)}), yj, method=method).states

    def loglik(v):
        return kx.log_likelihood(base.replace(**{field: form(v)}), yj, method=method)

    return jax.jit(states).lower(v).compile(), jax.jit(jax.value_and_grad(loglik)).lower(v).compile()


def _ratios(out):
    return {
        "forward": out["dense"]["forward_median_s"] / out["diagonal"]["forward_median_s"],
        "value_and_grad": out["dense"]["value_and_grad_median_s"] / out["diagonal"]["value_and_grad_median_s"],
    }


def measure_R(base, yj, v, args):
    """Diagonal R (T, p) as variances vs dense, each form timed in turn."""
    import jax

    from run import time_it

    out = {}
    for name, form in _forms(v.shape[-1]).items():
        fwd, vg = _compiled(base, yj, "R", form, v, args.method)
        tf, _, _ = time_it(lambda: jax.block_until_ready(fwd(v)), args.repeats, 60)
        tv, _, _ = time_it(lambda: jax.block_until_ready(vg(v)), args.repeats, 60)
        out[name] = {"forward_median_s": tf, "value_and_grad_median_s": tv, "loglik": float(vg(v)[0])}
    out["ratio_dense_over_diagonal"] = _ratios(out)
    return out


def measure_Q(base, yj, v, args):
    """Diagonal Q (T-1, n) as variances vs dense, interleaved call by call."""
    import jax

    forms = _forms(v.shape[-1])
    fns = {name: _compiled(base, yj, "Q", form, v, args.method) for name, form in forms.items()}
    times = {name: {"forward": [], "value_and_grad": []} for name in forms}
    for name, (fwd, vg) in fns.items():  # warm-up
        jax.block_until_ready(fwd(v))
        jax.block_until_ready(vg(v))
    load_before = os.getloadavg()
    for _ in range(args.repeats):
        for name, (fwd, vg) in fns.items():
            for op, fn in (("forward", fwd), ("value_and_grad", vg)):
                t0 = time.perf_counter()
                jax.block_until_ready(fn(v))
                times[name][op].append(time.perf_counter() - t0)
    out = {}
    for name, (_, vg) in fns.items():
        val, g = vg(v)
        out[name] = {"forward_median_s": float(np.median(times[name]["forward"])),
                     "value_and_grad_median_s": float(np.median(times[name]["value_and_grad"])),
                     "forward_all_s": times[name]["forward"], "value_and_grad_all_s": times[name]["value_and_grad"],
                     "loglik": float(val), "grad_norm": float(np.linalg.norm(np.asarray(g)))}
    out["ratio_dense_over_diagonal"] = _ratios(out)
    out["load_average_before"] = load_before
    return out


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--noise", choices=("R", "Q", "both"), default="both")
    ap.add_argument("--T", type=int, default=100_000)
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--method", default="cpu")
    args = ap.parse_args(argv)

    import jax

    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp

    import kalmax as kx
    from run import make_problem

    md, y, mask = make_problem(args.n, args.n, args.T, 0)
    n = p = args.n
    rng = np.random.default_rng(1)
    yj = jnp.asarray(y)
    base = kx.StateSpace(A=jnp.asarray(md["A"]), C=jnp.asarray(md["C"]), Q=jnp.asarray(md["Q"]),
                         R=jnp.asarray(md["R"]), b=jnp.asarray(md["b"]), d=jnp.asarray(md["d"]),
                         x0_mean=jnp.asarray(md["m0"]), x0_cov=jnp.asarray(md["P0"]))
    out = {"T": args.T, "n": n, "p": p, "method": args.method}
    if args.noise in ("R", "both"):
        v = jnp.asarray(np.diag(md["R"]) * rng.uniform(0.5, 2.0, size=(args.T, p)))
        out["R"] = measure_R(base, yj, v, args)
    if args.noise in ("Q", "both"):
        v = jnp.asarray(np.diag(md["Q"]) * rng.uniform(0.5, 2.0, size=(args.T - 1, n)))
        out["Q"] = measure_Q(base, yj, v, args)
    out["load_average"] = os.getloadavg()
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
