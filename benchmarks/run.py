"""Benchmarks of the smoothing primitive: `python benchmarks/run.py [--quick] [--large]`.

Workloads (invented data, simulated here): a system of ten coupled damped
oscillators read by ten noisy sensors that each mix all states (n = p = 10,
dense Q and R, 20 % of the readings missing at random, a Gaussian prior on
x_0), for T = 10³, 10⁴, 10⁵ (and 10⁶ with --large); the same with 64
trajectories of T = 1,000 (vmap); and a small state (n = 2, p = 1, T = 10⁵).

Methods:
  (1) kernel    kx.smooth(method="cpu"): the compiled CPU kernel
  (2) jax       kx.smooth(method="scan"): the pure-JAX block-Cholesky path
  (3) scan_kf   a plain lax.scan Kalman filter + RTS smoother, jax.grad through it
  (4) splu      SciPy sparse LU of the KKT system of the equality-constrained form

For each: the forward smooth and the value-and-gradient of a scalar loss (mean
squared error of the smoothed measurements on the observed entries) with
respect to A, C, Q, R. For (4) "forward" is factor + solve and
"value-and-gradient" is factor + solve + the adjoint solve with the same
factors (no gradient formation: a lower bound on its cost). Times are medians
over repeats after a warm-up call (which includes compilation).

Peak memory: each case runs once more in a fresh subprocess: the function is
compiled ahead of time (not run), the kernel's peak-RSS counter is reset
(`echo 5 > /proc/self/clear_refs`), the function runs once (its first
execution, so no buffers are recycled from an earlier call), and we report
VmHWM after it minus VmRSS before it: the extra resident memory the
computation needed, outputs included. (Without clear_refs support we fall
back to ru_maxrss minus the RSS before the call, which can include
compile-time peaks.)

Writes benchmarks/results.json and benchmarks/RESULTS.md.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from memory import measure_call

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

METHODS = ("kernel", "jax", "scan_kf", "splu")
LABELS = {
    "kernel": "(1) compiled kernel",
    "jax": "(2) pure-JAX path",
    "scan_kf": "(3) lax.scan KF+RTS, autodiff",
    "splu": "(4) SciPy splu on KKT",
}


# ---------------------------------------------------------------------------
# workloads


def workloads(quick: bool, large: bool):
    if quick:
        out = {
            "n10_T1e3": dict(n=10, p=10, T=1_000, batch=0),
            "n10_T1e4": dict(n=10, p=10, T=10_000, batch=0),
            "batch8_T1e3": dict(n=10, p=10, T=1_000, batch=8),
            "n2p1_T1e4": dict(n=2, p=1, T=10_000, batch=0),
        }
    else:
        out = {
            "n10_T1e3": dict(n=10, p=10, T=1_000, batch=0),
            "n10_T1e4": dict(n=10, p=10, T=10_000, batch=0),
            "n10_T1e5": dict(n=10, p=10, T=100_000, batch=0),
            "batch64_T1e3": dict(n=10, p=10, T=1_000, batch=64),
            "n2p1_T1e5": dict(n=2, p=1, T=100_000, batch=0),
        }
        if large:
            out["n10_T1e6"] = dict(n=10, p=10, T=1_000_000, batch=0)
    return out


def make_problem(n, p, T, batch, seed=0, missing=0.2):
    """Invented system: coupled damped oscillators, sensors mixing all states."""
    rng = np.random.default_rng(seed)
    # Block-rotation dynamics (damped oscillators), then a random orthogonal
    # change of basis couples them.
    A0 = np.zeros((n, n))
    for k in range(0, n - 1, 2):
        th = rng.uniform(0.05, 0.3)
        A0[k : k + 2, k : k + 2] = 0.98 * np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    if n % 2:
        A0[-1, -1] = 0.95
    U = np.linalg.qr(rng.standard_normal((n, n)))[0]
    A = U @ A0 @ U.T
    B = rng.standard_normal((n, n))
    Q = 0.05 * (B @ B.T / n + 0.5 * np.eye(n))
    C = rng.standard_normal((p, n)) / np.sqrt(n)
    B = rng.standard_normal((p, p))
    R = 0.2 * (B @ B.T / p + 0.5 * np.eye(p))
    b = 0.01 * rng.standard_normal(n)
    d = 0.5 * rng.standard_normal(p)
    m0, P0 = np.zeros(n), np.eye(n)
    nb = max(batch, 1)
    # Simulate nb trajectories at once.
    Lq, Lr = np.linalg.cholesky(Q), np.linalg.cholesky(R)
    x = np.empty((nb, T, n))
    x[:, 0] = rng.standard_normal((nb, n))
    wq = rng.standard_normal((nb, T, n)) @ Lq.T
    for t in range(T - 1):
        x[:, t + 1] = x[:, t] @ A.T + b + wq[:, t]
    y = x @ C.T + d + rng.standard_normal((nb, T, p)) @ Lr.T
    mask = rng.random((nb, T, p)) >= missing
    y[~mask] = np.nan
    model = dict(A=A, C=C, Q=Q, R=R, b=b, d=d, m0=m0, P0=P0)
    if not batch:
        y, mask = y[0], mask[0]
    return model, y, mask


# ---------------------------------------------------------------------------
# the functions under test


def build(method, model, y, mask, batch):
    """(forward(), value_and_grad()) zero-argument callables returning host-ready results.

    The arrays keep their dtype (float32 model and data give a float32 problem)."""
    if method == "splu":
        return _build_splu(model, y, mask, batch)
    import jax
    import jax.numpy as jnp

    import kalmax as kx
    from baselines import scan_smoother

    yj = jnp.asarray(y)
    wj = jnp.asarray(mask, yj.dtype)
    fixed = {k: jnp.asarray(model[k]) for k in ("b", "d", "m0", "P0")}
    params = tuple(jnp.asarray(model[k]) for k in ("A", "C", "Q", "R"))

    # "kernel" and "jax" are this table's names for kalmax's "cpu" and "scan";
    # any other kalmax backend may be named directly ("scan_kf" is the plain
    # JAX baseline of baselines.py).
    kmethod = {"kernel": "cpu", "jax": "scan"}.get(method, method)
    if method != "scan_kf":

        def states_one(params, y1):
            A, C, Q, R = params
            m = kx.StateSpace(A=A, C=C, Q=Q, R=R, b=fixed["b"], d=fixed["d"], x0_mean=fixed["m0"], x0_cov=fixed["P0"])
            return kx.smooth(m, y1, method=kmethod).states

    else:

        def states_one(params, y1):
            A, C, Q, R = params
            w1 = (~jnp.isnan(y1)).astype(y1.dtype)
            return scan_smoother(A, C, Q, R, fixed["b"], fixed["d"], fixed["m0"], fixed["P0"], y1, w1)

    def states(params):
        return jax.vmap(states_one, in_axes=(None, 0))(params, yj) if batch else states_one(params, yj)

    def loss(params):
        x = states(params)
        pred = x @ params[1].T + fixed["d"]
        err = jnp.where(wj > 0, jnp.nan_to_num(yj) - pred, 0.0)
        return jnp.sum(err**2) / jnp.sum(wj)

    # Compiled ahead of time, so that a first call measures execution only.
    fwd = jax.jit(states).lower(params).compile()
    vg = jax.jit(jax.value_and_grad(loss)).lower(params).compile()
    return (lambda: jax.block_until_ready(fwd(params))), (lambda: jax.block_until_ready(vg(params)))


def _build_splu(model, y, mask, batch):
    from baselines import KKTSystem

    ys = y if batch else y[None]
    ms = mask if batch else mask[None]
    n = model["A"].shape[0]
    args = [model[k] for k in ("A", "C", "Q", "R", "b", "d", "m0", "P0")]

    def run(adjoint):
        out = []
        for y1, m1 in zip(ys, ms):
            kkt = KKTSystem(*args, y1, m1)
            kkt.factor()
            x = kkt.solve()
            if adjoint:
                kkt.adjoint(np.ones((x.shape[0], n)))
            out.append(x)
        return out

    return (lambda: run(False)), (lambda: run(True))


def splu_phases(model, y, mask, batch):
    """Seconds spent in assembly, factor, solve and adjoint solve (one run)."""
    from baselines import KKTSystem

    ys = y if batch else y[None]
    ms = mask if batch else mask[None]
    n = model["A"].shape[0]
    args = [model[k] for k in ("A", "C", "Q", "R", "b", "d", "m0", "P0")]
    ph = dict(assemble=0.0, factor=0.0, solve=0.0, adjoint=0.0)
    for y1, m1 in zip(ys, ms):
        t0 = time.perf_counter()
        kkt = KKTSystem(*args, y1, m1)
        t1 = time.perf_counter()
        kkt.factor()
        t2 = time.perf_counter()
        x = kkt.solve()
        t3 = time.perf_counter()
        kkt.adjoint(np.ones((x.shape[0], n)))
        t4 = time.perf_counter()
        ph["assemble"] += t1 - t0
        ph["factor"] += t2 - t1
        ph["solve"] += t3 - t2
        ph["adjoint"] += t4 - t3
    return ph


# ---------------------------------------------------------------------------
# timing and memory


def time_it(fn, repeats, budget_s):
    """(median, all times, warm-up time): warm-up call first, then repeats (fewer if slow)."""
    t0 = time.perf_counter()
    fn()
    warm = time.perf_counter() - t0
    times = []
    for i in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
        if i >= 2 and sum(times) > budget_s:
            break
    return float(np.median(times)), times, warm


def memory_case(workload, method, op):
    """Runs in a fresh subprocess: extra resident memory of one call, in MB."""
    cfg = workloads(False, True)[workload] if workload in workloads(False, True) else workloads(True, False)[workload]
    if method != "splu":
        import jax

        jax.config.update("jax_enable_x64", True)
    model, y, mask = make_problem(**cfg)
    fwd, vg = build(method, model, y, mask, cfg["batch"])
    fn = vg if op == "vg" else fwd  # already compiled: the call below is its first execution
    m = measure_call(fn)
    peak, before = m["peak_kb"], m["before_kb"]
    print(json.dumps(dict(peak_mb=peak / 1024, before_mb=before / 1024, extra_mb=(peak - before) / 1024, how=m["how"])))


def measure_memory(workload, method, op, timeout):
    cmd = [sys.executable, str(Path(__file__).resolve()), "--memory-case", workload, method, op]
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=True)
        return json.loads(out.stdout.strip().splitlines()[-1])
    except Exception as err:  # report, do not abort the run
        return dict(error=f"{type(err).__name__}: {str(err)[:200]}")


# ---------------------------------------------------------------------------


def loglog_slope(Ts, ts):
    Ts, ts = np.asarray(Ts, float), np.asarray(ts, float)
    if len(Ts) < 2:
        return None
    return float(np.polyfit(np.log(Ts), np.log(ts), 1)[0])


def agreement(model, y, mask):
    """Max |states − kernel states| of each method on one small problem."""
    ref = None
    out = {}
    for m in METHODS:
        fwd, _ = build(m, model, y, mask, 0)
        x = np.asarray(fwd()[0] if m == "splu" else fwd())
        if ref is None:
            ref = x
        out[m] = float(np.max(np.abs(x - ref)))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small smoke run (T up to 10^4)")
    ap.add_argument("--large", action="store_true", help="add T = 10^6 (kernel and pure-JAX path only)")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--methods", default=",".join(METHODS))
    ap.add_argument("--no-memory", action="store_true")
    ap.add_argument("--out", default=str(HERE))
    ap.add_argument("--memory-case", nargs=3, metavar=("WORKLOAD", "METHOD", "OP"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.memory_case:
        memory_case(*args.memory_case)
        return

    import jax

    jax.config.update("jax_enable_x64", True)
    import kalmax as kx  # noqa: F401  (registers the kernel)
    from kalmax._src.backends import cpu as cpu_backend

    if not cpu_backend.available():
        sys.exit(f"the compiled kernel is not available: {cpu_backend.LOAD_ERROR}")
    methods = [m for m in args.methods.split(",") if m]
    wl = workloads(args.quick, args.large)
    repeats = 3 if args.quick else args.repeats
    results = {}
    load_before = os.getloadavg()
    t_start = time.perf_counter()

    for name, cfg in wl.items():
        print(f"== {name}: {cfg}", flush=True)
        model, y, mask = make_problem(**cfg)
        results[name] = {}
        for m in methods:
            if cfg["T"] >= 1_000_000 and m in ("scan_kf", "splu"):
                continue  # too slow / too much memory for this machine at 10^6
            fwd, vg = build(m, model, y, mask, cfg["batch"])
            budget = 15.0 if cfg["T"] < 1_000_000 else 30.0
            rec = {}
            if m == "splu":
                # factor + solve and factor + solve + adjoint from the same runs
                runs = [splu_phases(model, y, mask, cfg["batch"]) for _ in range(2 if cfg["T"] >= 100_000 else 3)]
                f = [r["factor"] + r["solve"] for r in runs]
                v = [r["factor"] + r["solve"] + r["adjoint"] for r in runs]
                rec.update(forward_s=float(np.median(f)), forward_all=f, vg_s=float(np.median(v)), vg_all=v,
                           assemble_s=float(np.median([r["assemble"] for r in runs])))
            else:
                rec["forward_s"], rec["forward_all"], rec["forward_warmup_s"] = time_it(fwd, repeats, budget)
                rec["vg_s"], rec["vg_all"], rec["vg_warmup_s"] = time_it(vg, repeats, budget)
            rec["vg_over_forward"] = rec["vg_s"] / rec["forward_s"]
            if not args.no_memory:
                rec["memory_vg"] = measure_memory(name, m, "vg", timeout=600)
            results[name][m] = rec
            mem = rec.get("memory_vg", {}).get("extra_mb")
            print(
                f"   {m:8s} forward {rec['forward_s']:.4f} s   value+grad {rec['vg_s']:.4f} s"
                + (f"   extra memory {mem:.0f} MB" if mem is not None else ""),
                flush=True,
            )
        base = results[name].get("kernel")
        if base:
            for m, rec in results[name].items():
                rec["forward_ratio_to_kernel"] = rec["forward_s"] / base["forward_s"]
                rec["vg_ratio_to_kernel"] = rec["vg_s"] / base["vg_s"]
                mk, mb = rec.get("memory_vg", {}).get("extra_mb"), base.get("memory_vg", {}).get("extra_mb")
                if mk is not None and mb:
                    rec["memory_ratio_to_kernel"] = mk / mb

    # Slopes of time against T over the n = p = 10 single-trajectory workloads.
    scaling = {}
    series = sorted((cfg["T"], name) for name, cfg in wl.items() if cfg["n"] == 10 and not cfg["batch"])
    for m in methods:
        pts = [(T, results[nm][m]) for T, nm in series if m in results[nm]]
        if len(pts) >= 2:
            scaling[m] = dict(
                T=[T for T, _ in pts],
                forward_slope=loglog_slope([T for T, _ in pts], [r["forward_s"] for _, r in pts]),
                vg_slope=loglog_slope([T for T, _ in pts], [r["vg_s"] for _, r in pts]),
            )

    small = make_problem(10, 10, 300, 0, seed=1)
    agree = agreement(*small)

    out = dict(
        command=" ".join([Path(sys.argv[0]).name] + (argv if argv is not None else sys.argv[1:])),
        machine=dict(
            platform=platform.platform(),
            python=platform.python_version(),
            cpu_count=os.cpu_count(),
            cpu=_cpu_name(),
            loadavg_before=load_before,
            loadavg_after=os.getloadavg(),
        ),
        versions=_versions(),
        dtype="float64",
        workloads=wl,
        results=results,
        scaling=scaling,
        agreement_max_abs_state_diff_T300=agree,
        memory_method=(
            "fresh subprocess per case; compile ahead of time, reset the peak RSS (clear_refs=5), "
            "run once (first execution), report VmHWM − VmRSS-before"
        ),
        total_seconds=time.perf_counter() - t_start,
    )
    out["targets"] = _targets(results, scaling)
    outdir = Path(args.out)
    (outdir / "results.json").write_text(json.dumps(out, indent=2))
    (outdir / "RESULTS.md").write_text(render_markdown(out))
    print(f"wrote {outdir / 'results.json'} and {outdir / 'RESULTS.md'} ({out['total_seconds']:.0f} s)")


def _cpu_name():
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor()


def _versions():
    import jax
    import jaxlib
    import scipy

    return dict(jax=jax.__version__, jaxlib=jaxlib.__version__, numpy=np.__version__, scipy=scipy.__version__)


def _targets(results, scaling):
    t = {}
    big = results.get("n10_T1e5")
    if big and "kernel" in big:
        k = big["kernel"]
        if "scan_kf" in big:
            t["vg_speedup_vs_scan_kf_at_1e5"] = dict(value=big["scan_kf"]["vg_s"] / k["vg_s"], target=">= 50")
        if "splu" in big:
            t["vg_speedup_vs_splu_at_1e5"] = dict(value=big["splu"]["vg_s"] / k["vg_s"], target=">= 100")
        t["vg_over_forward_at_1e5"] = dict(value=k["vg_s"] / k["forward_s"], target="<= 1.6")
        mk = k.get("memory_vg", {}).get("extra_mb")
        ms = big.get("scan_kf", {}).get("memory_vg", {}).get("extra_mb")
        if mk is not None and ms:
            t["vg_memory_fraction_of_scan_kf_at_1e5"] = dict(value=mk / ms, target="<= 0.2")
    if "kernel" in scaling:
        t["kernel_forward_slope"] = dict(value=scaling["kernel"]["forward_slope"], target="0.9 .. 1.1",
                                         T=scaling["kernel"]["T"])
        t["kernel_vg_slope"] = dict(value=scaling["kernel"]["vg_slope"], target="0.9 .. 1.1", T=scaling["kernel"]["T"])
    return t


def _fmt(x, digits=4):
    if x is None:
        return "–"
    if isinstance(x, float):
        return f"{x:.{digits}g}" if abs(x) < 1e4 else f"{x:.3e}"
    return str(x)


def render_markdown(out):
    lines = ["# Benchmark results", ""]
    m = out["machine"]
    lines += [
        f"Command: `python benchmarks/{out['command']}` · {m['cpu']} · {m['cpu_count']} cores · "
        f"load average before/after: {m['loadavg_before'][0]:.1f} / {m['loadavg_after'][0]:.1f} · "
        f"jax {out['versions']['jax']} · float64 · total {out['total_seconds']:.0f} s.",
        "",
        "Medians of wall-clock seconds after a warm-up call; ratios are to (1). "
        "(4): forward = factor + solve, value+grad = factor + solve + adjoint solve (no gradient formation). "
        f"Memory: {out['memory_method']}.",
        "",
    ]
    for name, per in out["results"].items():
        cfg = out["workloads"][name]
        desc = f"n = {cfg['n']}, p = {cfg['p']}, T = {cfg['T']:,}" + (f", batch of {cfg['batch']}" if cfg["batch"] else "")
        lines += [f"## {name} ({desc})", ""]
        lines += [
            "| method | forward (s) | × (1) | value+grad (s) | × (1) | value+grad / forward | extra memory, value+grad (MB) | × (1) |",
            "|---|---|---|---|---|---|---|---|",
        ]
        for meth, r in per.items():
            mem = r.get("memory_vg", {})
            lines.append(
                f"| {LABELS[meth]} | {_fmt(r['forward_s'])} | {_fmt(r.get('forward_ratio_to_kernel'), 3)} | "
                f"{_fmt(r['vg_s'])} | {_fmt(r.get('vg_ratio_to_kernel'), 3)} | {_fmt(r['vg_over_forward'], 3)} | "
                f"{_fmt(mem.get('extra_mb'), 4) if 'extra_mb' in mem else mem.get('error', '–')} | "
                f"{_fmt(r.get('memory_ratio_to_kernel'), 3)} |"
            )
        lines.append("")
    if out["scaling"]:
        lines += ["## Scaling (log-log slope of time against T, n = p = 10)", ""]
        lines += ["| method | T | forward slope | value+grad slope |", "|---|---|---|---|"]
        for meth, s in out["scaling"].items():
            lines.append(
                f"| {LABELS[meth]} | {', '.join(f'{T:,}' for T in s['T'])} | {_fmt(s['forward_slope'], 3)} | "
                f"{_fmt(s['vg_slope'], 3)} |"
            )
        lines.append("")
    if out["targets"]:
        lines += ["## Targets", "", "| target | measured | wanted |", "|---|---|---|"]
        for k, v in out["targets"].items():
            lines.append(f"| {k} | {_fmt(v['value'], 3)} | {v['target']} |")
        lines.append("")
    lines += [
        "Agreement check (T = 300, max |states − kernel states|): "
        + ", ".join(f"{LABELS[k]} {v:.1e}" for k, v in out["agreement_max_abs_state_diff_T300"].items()),
        "",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    main()
