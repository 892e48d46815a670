"""Cost of the iterated (Gauss–Newton) smoother, side by side in one process.

1. One Gauss–Newton iteration (linearise with vmapped jacfwd, whiten, J and
   its gradient from the linearisation, one linear smoothing solve with the
   compiled kernel, and the line search's one evaluation of J at the full
   step) against ``kx.smooth`` value+grad on a linear model of the same size.
   The whitening factors of Q and R, formed once per solve, are outside the
   timed iteration. Issue target: within 3x at T = 10^5, n = 10.
2. Whole solve + gradient (implicit VJP) against plain reverse-mode autodiff
   through an unrolled iterated smoother (the same number of Gauss–Newton
   steps, each a differentiable ``kx.smooth`` call; no line search).

Usage: python benchmarks/nonlinear_cost.py [T] [n]   (defaults 10000, 10)
Medians of 5 runs after a compile run; float64.
"""

import sys
import time

import jax
import jax.numpy as jnp
import numpy as np

jax.config.update("jax_enable_x64", True)
import kalmax as kx  # noqa: E402
from kalmax._src.nonlinear import _direction, prepare  # noqa: E402
from kalmax._src.nonlinear_model import objective, whitening  # noqa: E402
from kalmax._src.robust import SquaredLoss  # noqa: E402


def median_time(fn, repeats=5):
    jax.block_until_ready(fn())
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(fn())
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def transition(th, x, u):
    return th["A"] @ x + 0.05 * jnp.sin(x)


def measure(th, x, v):
    return th["C"] @ x + 0.1 * jnp.tanh(x[: th["C"].shape[0]])


def main():
    T = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 10
    p = n
    rng = np.random.default_rng(0)
    A = 0.9 * np.linalg.qr(rng.standard_normal((n, n)))[0]
    C = rng.standard_normal((p, n)) / np.sqrt(n)
    Q, R = 0.1 * np.eye(n), 0.5 * np.eye(p)
    params = {"A": jnp.asarray(A), "C": jnp.asarray(C)}
    model = kx.NonlinearModel(transition, measure, params=params, Q=Q, R=R, x0_mean=np.zeros(n), x0_cov=np.eye(n))
    x = np.zeros((T, n))
    for t in range(T - 1):
        x[t + 1] = np.asarray(transition(params, x[t], None)) + np.sqrt(0.1) * rng.standard_normal(n)
    y = x @ C.T + 0.1 * np.tanh(x[:, :p]) + np.sqrt(0.5) * rng.standard_normal((T, p))

    lin = kx.StateSpace(A=A, C=C, Q=Q, R=R, x0_mean=np.zeros(n), x0_cov=np.eye(n))
    smooth_vg = jax.jit(jax.value_and_grad(lambda m: jnp.sum(kx.smooth(m, y).states ** 2)))
    t_smooth = median_time(lambda: smooth_vg(lin))

    cm, loss, yc, w, init = prepare(model, y, None, SquaredLoss(), jnp.asarray(x))
    white = jax.jit(whitening)(cm, w)

    def iteration(s):
        x_hat, lam2, J = _direction(cm, loss, yc, w, s, "cpu", white)
        return x_hat, lam2, objective(cm, loss, yc, w, x_hat, white)

    one_step = jax.jit(iteration)
    t_step = median_time(lambda: one_step(init))
    print(f"T={T} n={n}: kx.smooth value+grad {t_smooth:.3f} s; one Gauss-Newton iteration {t_step:.3f} s; "
          f"ratio {t_step / t_smooth:.2f}")

    def loss_implicit(th):
        out = kx.smooth_nonlinear(model.replace(params=th), y, init=jnp.asarray(x), method="cpu")
        return jnp.sum(out.states ** 2), out.iterations

    (val, iters), _ = jax.value_and_grad(loss_implicit, has_aux=True)(params)
    vg_implicit = jax.jit(jax.value_and_grad(lambda th: loss_implicit(th)[0]))
    t_implicit = median_time(lambda: vg_implicit(params))
    steps = int(iters)

    def loss_unrolled(th):
        s = jnp.asarray(x)
        for _ in range(steps):  # unrolled Gauss–Newton steps, differentiated by plain autodiff
            s = kx.smooth(kx.linearize(model.replace(params=th), s), y, method="scan").states
        return jnp.sum(s ** 2)

    vg_unrolled = jax.jit(jax.value_and_grad(loss_unrolled))
    t_unrolled = median_time(lambda: vg_unrolled(params))
    print(f"solve+gradient ({steps} Gauss-Newton steps): implicit {t_implicit:.3f} s; "
          f"autodiff through unrolled steps {t_unrolled:.3f} s; ratio {t_unrolled / t_implicit:.2f}")


if __name__ == "__main__":
    main()
