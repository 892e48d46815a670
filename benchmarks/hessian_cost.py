"""Cost of a Hessian against one gradient: `python benchmarks/hessian_cost.py [--quick] [--method cpu]`.

Invented model (simulated here): n = p = 4, k = 20 parameters (diagonals of
A, C, log Q, log R and the prior mean). For the log-likelihood and for the
held-out prediction error, times jax.grad and jax.hessian (forward over
reverse: jacfwd of the gradient, k tangent directions batched), both jitted,
median of repeats after a warm-up, and prints the ratio Hessian / gradient
(target ≤ 2k = 40). T = 10³ and 10⁵ (--quick: 10³ only).
"""

from __future__ import annotations

import argparse
import time

import numpy as np


def _median(fn, repeats):
    fn()
    ts = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return float(np.median(ts))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--method", default="cpu")
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)
    import jax

    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp

    import kalmax as kx

    n = 4
    rng = np.random.default_rng(0)
    for T in ((1000,) if args.quick else (1000, 100_000)):
        y = jnp.asarray(rng.standard_normal((T, n)))
        mask = jnp.ones((T, n), bool)
        holdout = jnp.asarray(rng.random((T, n)) < 0.1)

        def model(theta):
            a, c, lq, lr, m0 = theta.reshape(5, n)
            return kx.StateSpace(A=jnp.diag(0.5 + 0.4 * jnp.tanh(a)), C=jnp.eye(n) + jnp.diag(c),
                                 Q=jnp.diag(jnp.exp(lq)), R=jnp.diag(jnp.exp(lr)), x0_mean=m0,
                                 x0_cov=jnp.eye(n))

        losses = {
            "loglik": lambda th: -kx.log_likelihood(model(th), y, mask, method=args.method),
            "prediction_error": lambda th: kx.prediction_error(model(th), y, mask, holdout, method=args.method),
        }
        theta = jnp.asarray(0.1 * rng.standard_normal(5 * n))
        for name, loss in losses.items():
            g = jax.jit(jax.grad(loss))
            h = jax.jit(jax.hessian(loss))
            tg = _median(lambda: jax.block_until_ready(g(theta)), args.repeats)
            th = _median(lambda: jax.block_until_ready(h(theta)), args.repeats)
            print(f"T={T:6d} {name:17s} k={theta.size}: grad {tg:.4f} s, hessian {th:.4f} s, "
                  f"ratio {th / tg:.1f} (target <= {2 * theta.size})", flush=True)


if __name__ == "__main__":
    main()
