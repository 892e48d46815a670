"""Cost of a per-step diagonal R given as variances (T, p) against the same R dense (T, p, p).

Usage: ``python benchmarks/noise_forms_cost.py [--T 100000] [--n 10] [--repeats 5] [--method cpu]``

The workload is the invented coupled-oscillator system of ``run.py`` (n = p),
with a per-step diagonal R whose variances v (T, p) vary in time (as a
network predicting log-variances would give them). Two ways to pass it:

* ``diagonal``: ``R=kx.DiagonalNoise(v)``; the compiled kernel keeps it
  diagonal (variances in, variance gradients out);
* ``dense``: ``R=v[..., None] * eye(p)``, built inside the function, so that
  the gradient also reaches v (what a caller had to do before the noise forms).

Measured, after a warm-up and ahead-of-time compilation: the forward pass
(smoothed states) and value_and_grad of log p(y) w.r.t. v. Prints medians
(seconds) and the dense/diagonal ratios as JSON; float64 (x64 on).
"""

from __future__ import annotations

import argparse
import json
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--T", type=int, default=100_000)
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--method", default="cpu")
    args = ap.parse_args(argv)

    import jax

    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp

    import kalmax as kx
    from run import make_problem, time_it

    md, y, mask = make_problem(args.n, args.n, args.T, 0)
    p = args.n
    rng = np.random.default_rng(1)
    v = jnp.asarray(np.diag(md["R"]) * rng.uniform(0.5, 2.0, size=(args.T, p)))
    yj = jnp.asarray(y)
    base = kx.StateSpace(A=jnp.asarray(md["A"]), C=jnp.asarray(md["C"]), Q=jnp.asarray(md["Q"]),
                         R=jnp.asarray(md["R"]), b=jnp.asarray(md["b"]), d=jnp.asarray(md["d"]),
                         x0_mean=jnp.asarray(md["m0"]), x0_cov=jnp.asarray(md["P0"]))
    forms = {
        "diagonal": lambda v: kx.DiagonalNoise(v),
        "dense": lambda v: v[..., None] * jnp.eye(p, dtype=v.dtype),
    }
    out = {"T": args.T, "n": args.n, "p": p, "method": args.method}
    for name, form in forms.items():
        def states(v, form=form):
            return kx.smooth(base.replace(R=form(v)), yj, method=args.method).states

        def loglik(v, form=form):
            return kx.log_likelihood(base.replace(R=form(v)), yj, method=args.method)

        fwd = jax.jit(states).lower(v).compile()
        vg = jax.jit(jax.value_and_grad(loglik)).lower(v).compile()
        tf, _, _ = time_it(lambda: jax.block_until_ready(fwd(v)), args.repeats, 60)
        tv, _, _ = time_it(lambda: jax.block_until_ready(vg(v)), args.repeats, 60)
        out[name] = {"forward_median_s": tf, "value_and_grad_median_s": tv,
                     "loglik": float(vg(v)[0])}
    out["ratio_dense_over_diagonal"] = {
        "forward": out["dense"]["forward_median_s"] / out["diagonal"]["forward_median_s"],
        "value_and_grad": out["dense"]["value_and_grad_median_s"] / out["diagonal"]["value_and_grad_median_s"],
    }
    out["load_average"] = os.getloadavg()
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
