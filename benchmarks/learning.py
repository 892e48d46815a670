"""The learning path, side by side in one process: `python benchmarks/learning.py [--quick]`.

Invented data (simulated here): ten coupled damped oscillators read by ten
sensors that each mix all states (n = p = 10, dense Q and R, 20 % of readings
missing, a Gaussian prior), and for the ML regime batches of random stable
models of size n = p ∈ {4, 16}.

Part 1, one trajectory, T = 10⁵, float64:
  smooth forward (kernel)                       kx.smooth(method="cpu").states
  log-likelihood value+grad (kernel, scan)      jax.value_and_grad(kx.log_likelihood) w.r.t. the model
  log-likelihood value+grad, plain JAX          a covariance-form Kalman filter under lax.scan,
                                                differentiated by autodiff (benchmarks/baselines.py)
  covariances forward and value+grad (kernel, scan)
                                                kx.smooth(covariances=True); loss = Σ tr Cov[x_t|y];
                                                value+grad also of the band alone, by the band
                                                tangent and by the previous route (JAX through the
                                                selected inversion); `--part cov` runs only these
Part 2, the ML regime: B = 256 trajectories (vmap), T ∈ {100, 1000},
n ∈ {4, 16}, float32 with x64 off, value+grad of a held-out loss w.r.t. the
model and y: kernel, pure-JAX scan backend, and the plain-JAX Kalman filter +
RTS smoother differentiated by autodiff. First-call time (compilation
included) is reported too.

Times are medians of repeats after a warm-up call. Writes
benchmarks/learning_results.json; the table goes in benchmarks/RESULTS.md.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))


def _median_time(fn, repeats):
    ts = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return float(np.median(ts))


def _first_and_median(fn, repeats):
    t = time.perf_counter()
    fn()
    first = time.perf_counter() - t
    return first, _median_time(fn, repeats)


def _oscillators(T):
    """The part-1 workload: (model, y, mask) of run.make_problem, n = p = 10, float64."""
    import jax.numpy as jnp

    import kalmax as kx
    from run import make_problem

    md, y, mask = make_problem(10, 10, T, 0, seed=0)
    model = kx.StateSpace(A=jnp.asarray(md["A"]), C=jnp.asarray(md["C"]), Q=jnp.asarray(md["Q"]),
                          R=jnp.asarray(md["R"]), b=jnp.asarray(md["b"]), d=jnp.asarray(md["d"]),
                          x0_mean=jnp.asarray(md["m0"]), x0_cov=jnp.asarray(md["P0"]))
    return model, jnp.asarray(y), jnp.asarray(mask)


def covariance_rows(model, y, mask, repeats, out):
    """Covariances forward and value+grad (loss Σ tr Cov[x_t|y]) on the kernel and on scan.

    Three value+grad rows per method: through ``kx.smooth`` (the band-tangent
    derivatives of ``covariance_band.py``), the same band alone, and the band
    differentiated by JAX through the selected inversion (the previous route,
    ``taped_posterior_band``), all in this process so that they share the load.
    """
    import jax
    import jax.numpy as jnp

    import kalmax as kx
    from kalmax._src import covariance_band
    from kalmax._src.checks import canonicalize

    block = lambda r: jax.block_until_ready(r)  # noqa: E731
    cm, _, cmask, _, _ = canonicalize(model, y, mask, keep_diagonal_R=True)
    w = cmask.astype(y.dtype)
    for method in ("cpu", "scan"):
        cov = jax.jit(lambda m, y, k, method=method: kx.smooth(m, y, k, covariances=True, method=method).state_cov)
        out[f"cov_forward_{method}"] = _first_and_median(lambda: block(cov(model, y, mask)), repeats)

        def cov_loss(m, y, k, method=method):
            S = kx.smooth(m, y, k, covariances=True, method=method).state_cov
            return jnp.sum(jnp.trace(S, axis1=-2, axis2=-1))

        cvg = jax.jit(jax.value_and_grad(cov_loss))
        out[f"cov_vg_{method}"] = _first_and_median(lambda: block(cvg(model, y, mask)), repeats)
        out[f"cov_value_{method}"] = float(cvg(model, y, mask)[0])

        grads = {}
        for name, band in (("band", covariance_band.posterior_band),
                           ("taped", covariance_band.taped_posterior_band)):
            def band_loss(m, band=band, method=method):
                return jnp.sum(jnp.trace(band(m, w, method)[0], axis1=-2, axis2=-1))

            bvg = jax.jit(jax.value_and_grad(band_loss))
            last = {}
            out[f"cov_vg_{method}_{name}"] = _first_and_median(lambda: last.update(r=block(bvg(cm))), repeats)
            val, grad = last["r"]
            out[f"cov_value_{method}_{name}"] = float(val)
            grads[name] = jax.tree_util.tree_leaves(grad)
        out[f"cov_grad_rel_diff_{method}"] = max(
            float(jnp.max(jnp.abs(a - b)) / jnp.maximum(1.0, jnp.max(jnp.abs(b))))
            for a, b in zip(grads["band"], grads["taped"]))
    return out


def part1(T, repeats):
    import jax

    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp

    import kalmax as kx
    from baselines import scan_log_likelihood

    model, y, mask = _oscillators(T)
    out = {"T": T, "n": 10, "p": 10}
    block = lambda r: jax.block_until_ready(r)  # noqa: E731

    fwd = jax.jit(lambda m, y, k: kx.smooth(m, y, k, method="cpu").states)
    out["smooth_forward_kernel"] = _first_and_median(lambda: block(fwd(model, y, mask)), repeats)
    for method in ("cpu", "scan"):
        vg = jax.jit(jax.value_and_grad(lambda m, y, k, method=method: kx.log_likelihood(m, y, k, method=method)))
        out[f"loglik_vg_{method}"] = _first_and_median(lambda: block(vg(model, y, mask)), repeats)
        vals = vg(model, y, mask)
        out[f"loglik_value_{method}"] = float(vals[0])
    covariance_rows(model, y, mask, repeats, out)

    w = mask.astype(y.dtype)
    yz = jnp.where(mask, y, 0.0)

    def kf(m, yz, w):
        return scan_log_likelihood(m.A, m.C, m.Q, m.R, m.b, m.d, m.x0_mean, m.x0_cov, yz, w)

    kvg = jax.jit(jax.value_and_grad(kf))
    out["loglik_vg_plain_jax"] = _first_and_median(lambda: block(kvg(model, yz, w)), repeats)
    out["loglik_value_plain_jax"] = float(kvg(model, yz, w)[0])
    return out


COV_KEYS = ("cov_forward_cpu", "cov_forward_scan", "cov_vg_cpu", "cov_vg_scan", "cov_vg_cpu_band",
            "cov_vg_scan_band", "cov_vg_cpu_taped", "cov_vg_scan_taped")


def print_covariance_rows(p1):
    for k in COV_KEYS:
        print(f"  {k:24s} {p1[k][1]:8.3f}  ({p1[k][0]:.1f})")
    for method in ("cpu", "scan"):
        print(f"  {method}: previous route / band tangent (value+grad of the band): "
              f"{p1[f'cov_vg_{method}_taped'][1] / p1[f'cov_vg_{method}_band'][1]:.1f}x; "
              f"gradients agree to {p1[f'cov_grad_rel_diff_{method}']:.1e} (max relative, per field)")


def part2(B, T, n, repeats):
    import jax  # x64 stays off: float32, as ML users run

    import jax.numpy as jnp

    import kalmax as kx
    from baselines import scan_smoother

    # jaxlib's LAPACK as a user would call it, except where it deadlocks
    # (B·n³ large enough for jaxlib to use its thread pool: n = 16 here).
    baseline_solver = "lapack" if B * n**3 < 200_000 else "written-out"
    rng = np.random.default_rng(n * 1000 + T)
    A = np.linalg.qr(rng.standard_normal((n, n)))[0] * 0.95
    C = rng.standard_normal((n, n)) / np.sqrt(n)
    f32 = lambda a: jnp.asarray(a, jnp.float32)  # noqa: E731
    model = kx.StateSpace(A=f32(A), C=f32(C), Q=f32(0.1 * np.eye(n)), R=f32(np.eye(n)),
                          x0_mean=f32(np.zeros(n)), x0_cov=f32(np.eye(n)))
    x = np.zeros((B, T, n))
    for t in range(1, T):
        x[:, t] = x[:, t - 1] @ A.T + 0.3 * rng.standard_normal((B, n))
    y = f32(x @ C.T + rng.standard_normal((B, T, n)))
    mask = jnp.asarray(rng.random((B, T, n)) > 0.2)
    holdout = jnp.asarray(rng.random((B, T, n)) < 0.1) & mask

    def kalmax_loss(method):
        def loss(m, y):
            s, c = jax.vmap(lambda yy, mm, hh: kx.holdout_sums(m, yy, mm, hh, method=method))(y, mask, holdout)
            return jnp.sum(s) / jnp.sum(c)

        return loss

    def plain_loss(m, y):
        fit = (mask & ~holdout).astype(jnp.float32)
        zero = jnp.zeros(n, jnp.float32)

        def one(yy, ww):
            xs = scan_smoother(m.A, m.C, m.Q, m.R, zero, zero, m.x0_mean, m.x0_cov, jnp.where(ww > 0, yy, 0.0), ww,
                               solver=baseline_solver)
            return xs @ m.C.T

        pred = jax.vmap(one)(y, fit)
        err = jnp.where(holdout, y - pred, 0.0)
        return jnp.sum(err**2) / jnp.sum(holdout)

    out = {"B": B, "T": T, "n": n, "baseline_solver": baseline_solver}
    block = lambda r: jax.block_until_ready(r)  # noqa: E731
    for name, loss in (("kernel", kalmax_loss("cpu")), ("scan", kalmax_loss("scan")), ("plain_jax", plain_loss)):
        vg = jax.jit(jax.value_and_grad(loss, argnums=(0, 1)))
        out[name] = _first_and_median(lambda: block(vg(model, y)), repeats)
        out[name + "_value"] = float(vg(model, y)[0])
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="T = 10^4 in part 1, T = 100 only in part 2")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--part", choices=("1", "2", "cov", "all"), default="all",
                    help="cov: only the covariance rows of part 1 (forward, value+grad new and previous route)")
    ap.add_argument("--one", nargs=4, type=int, metavar=("B", "T", "n", "repeats"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    sys.path.insert(0, HERE)
    if args.one:  # a part-2 cell in its own process (x64 off there, on in part 1)
        print(json.dumps(part2(*args.one)))
        return
    results = {}
    if args.part == "cov":
        import jax

        jax.config.update("jax_enable_x64", True)
        T = 10_000 if args.quick else 100_000
        p1 = covariance_rows(*_oscillators(T), args.repeats, {"T": T, "n": 10, "p": 10})
        print(f"T={T} n=p=10 float64 (median s; first call in brackets)")
        print_covariance_rows(p1)
        with open(os.path.join(HERE, "learning_cov_results.json"), "w") as fh:
            json.dump(p1, fh, indent=1)
        return
    if args.part in ("1", "all"):
        p1 = part1(10_000 if args.quick else 100_000, args.repeats)
        results["part1"] = p1
        med = lambda k: p1[k][1]  # noqa: E731
        print(f"T={p1['T']} n=p=10 float64 (median s; first call in brackets)")
        for k in ("smooth_forward_kernel", "loglik_vg_cpu", "loglik_vg_scan", "loglik_vg_plain_jax"):
            print(f"  {k:24s} {p1[k][1]:8.3f}  ({p1[k][0]:.1f})")
        print_covariance_rows(p1)
        print(f"  loglik value+grad / smooth forward (kernel): {med('loglik_vg_cpu') / med('smooth_forward_kernel'):.2f}")
        print(f"  plain-JAX KF value+grad / kernel value+grad: {med('loglik_vg_plain_jax') / med('loglik_vg_cpu'):.1f}")
        print(f"  values: kernel {p1['loglik_value_cpu']:.6f} scan {p1['loglik_value_scan']:.6f} "
              f"plain {p1['loglik_value_plain_jax']:.6f}")
    if args.part in ("2", "all"):
        cells = [(256, T, n) for T in ((100,) if args.quick else (100, 1000)) for n in (4, 16)]
        results["part2"] = []
        print("B=256 float32, value+grad of a held-out loss w.r.t. model and y (median s; first call)")
        for B, T, n in cells:
            proc = subprocess.run([sys.executable, __file__, "--one", str(B), str(T), str(n), str(args.repeats)],
                                  capture_output=True, text=True, env={**os.environ, "JAX_ENABLE_X64": "0"})
            if proc.returncode:
                print(proc.stderr[-3000:])
                continue
            r = json.loads(proc.stdout.strip().splitlines()[-1])
            results["part2"].append(r)
            print(f"  T={T:5d} n={n:2d}: kernel {r['kernel'][1]:.4f} ({r['kernel'][0]:.1f})  scan {r['scan'][1]:.4f} "
                  f"({r['scan'][0]:.1f})  plain {r['plain_jax'][1]:.4f} ({r['plain_jax'][0]:.1f})  "
                  f"plain/kernel {r['plain_jax'][1] / r['kernel'][1]:.1f}x  plain/scan "
                  f"{r['plain_jax'][1] / r['scan'][1]:.2f}x  (baseline: {r['baseline_solver']})", flush=True)
    with open(os.path.join(HERE, "learning_results.json"), "w") as fh:
        json.dump(results, fh, indent=1)


if __name__ == "__main__":
    main()
