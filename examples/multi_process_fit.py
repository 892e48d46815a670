"""Fitting one model to many trajectories with several processes (``jax.distributed``).

Invented scenario (simulated below, no real data): a fleet of weather buoys
drifts on an imaginary sea; each buoy logs its barometer and a second,
coarser pressure sensor once an hour, with gaps. The pressure follows a
drifting level and a slowly decaying tendency (a two-state model). The buoys
were at sea for different numbers of hours, so the trajectories are ragged.
We learn the tendency's persistence and the noise levels by minimising the
held-out prediction error pooled over *all* buoys.

How the work is split:

- JAX's own multi-controller runtime: every process calls
  ``jax.distributed.initialize`` (coordinator on 127.0.0.1 here) with CPU
  collectives over gloo, and sees the devices of all processes;
- ``kx.batch_mesh()`` is one mesh over all those devices;
- each process simulates (in real use: loads) only *its* buoys, pads them to
  a common length and count (``kx.pad_series(..., length=)``,
  ``kx.pad_to_mesh``: the copies added as padding score nothing), and
  ``kx.data_parallel`` assembles the global sharded batch;
- ``kx.fit`` compiles one step over the global batch; XLA sums the pooled
  error and its gradient across devices and processes, so every process holds
  the same replicated parameters. Only process 0 prints and writes files.

Run it:

    python examples/multi_process_fit.py
        launcher: starts 2 processes on this machine over loopback (a free
        port), 2 CPU devices each, waits for both (and stops both if one fails).

    python examples/multi_process_fit.py --process-id I --num-processes N \\
            --coordinator HOST:PORT [--devices-per-process D]
        one process of N (start one per machine, or per process slot, with
        the same coordinator address, that of process 0).

Options: ``--buoys`` (total, default 10), ``--hours`` (longest record,
default 200), ``--steps`` (default 150), ``--checkpoint FILE`` and
``--checkpoint-every K`` (the fit resumes from FILE when it exists; kill the
run and start it again to see), ``--out FILE`` (process 0 writes the fitted
parameters and the loss history as JSON). About 30 s of CPU time in all (measured
on a shared 2-core machine: 72 s wall-clock while it was heavily loaded).
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import time

import numpy as np

A_TRUE_PHI = 0.8  # tendency persistence
Q_TRUE = (0.3, 0.1)  # level and tendency noise s.d. (hPa)
R_TRUE = (0.4, 1.0)  # barometer and coarse sensor noise s.d. (hPa)
C = np.array([[1.0, 0.0], [1.0, 0.5]])  # the coarse sensor also feels the tendency


def buoy_record(i: int, hours: int):
    """Buoy i's record (invented): (y of shape (T_i, 2) with NaN gaps, held-out mask (T_i, 2)).

    Seeded by the buoy's number alone, so any process can produce any buoy
    without the others.
    """
    rng = np.random.default_rng([2025, i])
    T = int(rng.integers(hours // 2, hours + 1))  # ragged: at sea for T hours
    x = np.zeros((T, 2))
    x[0] = [1013.0 + 5 * rng.standard_normal(), 0.0]
    A = np.array([[1.0, 1.0], [0.0, A_TRUE_PHI]])
    for t in range(1, T):
        x[t] = A @ x[t - 1] + np.array(Q_TRUE) * rng.standard_normal(2)
    y = x @ C.T + np.array(R_TRUE) * rng.standard_normal((T, 2))
    y[rng.random((T, 2)) < 0.15] = np.nan  # logger gaps
    hold = (rng.random((T, 2)) < 0.25) & ~np.isnan(y)  # entries kept back for scoring
    return y - 1013.0, hold  # anomalies about a standard atmosphere


def buoys_of_process(process_id: int, num_processes: int, buoys: int):
    """The buoys one process handles: contiguous blocks, as even as possible (ragged when not)."""
    return [int(b) for b in np.array_split(np.arange(buoys), num_processes)[process_id]]


def local_batch(process_id: int, num_processes: int, buoys: int, hours: int):
    """(y, mask, hold) of this process's buoys, padded in time to ``hours`` (not yet to the mesh)."""
    import kalmax as kx

    records = [buoy_record(i, hours) for i in buoys_of_process(process_id, num_processes, buoys)]
    y, mask = kx.pad_series([r[0] for r in records], length=hours)
    hold = np.zeros_like(mask)
    for k, (_, h) in enumerate(records):
        hold[k, : len(h)] = h
    return y, mask, hold


def initial_params():
    import jax.numpy as jnp

    # phi = 0 would make A singular: a record whose first hour is all gaps would
    # leave the first tendency undetermined (the smoother answers NaN there).
    return {"phi": jnp.array(0.5), "log_q": jnp.array([-1.0, -1.0]), "log_r": jnp.array([0.0, 0.0])}


def model_of(params):
    import jax.numpy as jnp

    import kalmax as kx

    A = jnp.array([[1.0, 1.0], [0.0, 0.0]]) + jnp.array([[0.0, 0.0], [0.0, 1.0]]) * jnp.tanh(params["phi"])
    return kx.StateSpace(A=A, C=jnp.asarray(C), Q=jnp.diag(jnp.exp(2 * params["log_q"])),
                         R=jnp.diag(jnp.exp(2 * params["log_r"])))


def batch_loss(params, batch):
    """Held-out squared error pooled over every buoy of the global batch."""
    import kalmax as kx

    y, mask, hold = batch
    return kx.batch_prediction_error(model_of(params), y, mask, hold, method="scan")


def optimizer():
    import optax

    return optax.adam(0.05)


# --------------------------------------------------------------------- one process
def run_process(a) -> None:
    if a.devices_per_process:
        # Read when JAX starts its CPU backend, i.e. before the first use of a device.
        flags = [f for f in os.environ.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
        os.environ["XLA_FLAGS"] = " ".join(flags + [f"--xla_force_host_platform_device_count={a.devices_per_process}"])
    import jax

    jax.config.update("jax_enable_x64", True)
    # CPU devices of different processes talk through gloo (bundled with jaxlib);
    # this must be set before initialize().
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    jax.distributed.initialize(coordinator_address=a.coordinator, num_processes=a.num_processes,
                               process_id=a.process_id, initialization_timeout=a.timeout)
    import kalmax as kx

    try:
        mesh = kx.batch_mesh()  # all devices of all processes
        y, mask, hold = local_batch(a.process_id, a.num_processes, a.buoys, a.hours)
        (y, mask, hold), valid = kx.pad_to_mesh((y, mask, hold), mesh)
        hold = hold & valid[:, None, None]  # padding copies are never scored
        loss = kx.data_parallel(batch_loss, (y, mask, hold), mesh)
        start = time.perf_counter()
        result = kx.fit(loss, initial_params(), optimizer(), steps=a.steps, progress=a.process_id == 0,
                        checkpoint=a.checkpoint, checkpoint_every=a.checkpoint_every)
        seconds = time.perf_counter() - start
        if jax.process_index() == 0:
            fitted = model_of(result.params)
            print(f"{jax.process_count()} processes, {len(jax.devices())} devices, "
                  f"{a.buoys} buoys ({int(valid.sum())} on process 0, padded to {len(valid)})", flush=True)
            print(f"held-out error {result.history['loss'][0]:.4f} -> {result.history['loss'][-1]:.4f} "
                  f"in {result.steps_run} steps ({seconds:.1f} s)")
            print(f"phi {float(np.tanh(result.params['phi'])):.3f} (simulated with {A_TRUE_PHI}); "
                  f"noise s.d. Q {np.sqrt(np.diag(fitted.Q)).round(3)}, R {np.sqrt(np.diag(fitted.R)).round(3)} "
                  f"(simulated with {Q_TRUE}, {R_TRUE}; held-out error fits are not maximum likelihood)")
            if a.out:
                with open(a.out, "w") as f:
                    json.dump({"params": {k: np.asarray(v).tolist() for k, v in result.params.items()},
                               "loss": np.asarray(result.history["loss"]).tolist(),
                               "steps_run": result.steps_run, "devices": len(jax.devices()),
                               "processes": jax.process_count(),
                               "local_padded": len(valid), "local_valid": int(valid.sum())}, f)
    finally:
        jax.distributed.shutdown()


# ------------------------------------------------------------------------ launcher
def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch(a) -> int:
    """Start ``a.num_processes`` copies of this script over loopback; return their worst exit status."""
    coordinator = f"127.0.0.1:{free_port()}"
    env = dict(os.environ, JAX_PLATFORMS="cpu")
    passed = ["--num-processes", str(a.num_processes), "--coordinator", coordinator,
              "--devices-per-process", str(a.devices_per_process or 2), "--buoys", str(a.buoys),
              "--hours", str(a.hours), "--steps", str(a.steps), "--timeout", str(a.timeout),
              "--checkpoint-every", str(a.checkpoint_every)]
    passed += ["--checkpoint", a.checkpoint] if a.checkpoint else []
    passed += ["--out", a.out] if a.out else []
    procs = [subprocess.Popen([sys.executable, os.path.abspath(__file__), "--process-id", str(i)] + passed, env=env)
             for i in range(a.num_processes)]
    deadline = time.monotonic() + a.timeout
    try:
        while any(p.poll() is None for p in procs):
            if any(p.poll() not in (None, 0) for p in procs):
                break  # one failed: the others would wait for it in a collective
            if time.monotonic() > deadline:
                print(f"launcher: time-out after {a.timeout} s", file=sys.stderr)
                break
            time.sleep(0.1)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.wait()
    return max(abs(p.returncode) for p in procs)


def parse(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--process-id", type=int, help="run as this process (else: launch all on this machine)")
    ap.add_argument("--num-processes", type=int, default=2)
    ap.add_argument("--coordinator", help="HOST:PORT of process 0's coordinator (worker mode)")
    ap.add_argument("--devices-per-process", type=int, help="force this many CPU devices per process")
    ap.add_argument("--buoys", type=int, default=10)
    ap.add_argument("--hours", type=int, default=200)
    ap.add_argument("--steps", type=int, default=150)
    ap.add_argument("--checkpoint")
    ap.add_argument("--checkpoint-every", type=int, default=25)
    ap.add_argument("--out")
    ap.add_argument("--timeout", type=int, default=300, help="seconds before giving up (start-up and launcher)")
    a = ap.parse_args(argv)
    if a.process_id is not None and not a.coordinator:
        ap.error("--process-id needs --coordinator HOST:PORT")
    return a


if __name__ == "__main__":
    args = parse()
    if args.process_id is None:
        sys.exit(launch(args))
    run_process(args)
