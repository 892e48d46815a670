"""Every backend under ``jax.shard_map``, and the compiled kernel on a sharded batch.

Four host devices need XLA_FLAGS set before JAX starts, so one fresh process
(tests/shard_map_worker.py) computes everything and prints it; the tests here
compare. The reference for every sharded number is the same quantity computed
without sharding (plain ``vmap`` on one device), which the rest of the suite
checks against dense solves, the textbook filter and finite differences.
Splitting a batch of independent trajectories changes nothing but summation
order, so they agree to rounding (common practice: 1e-10 relative in float64).
"""

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from kalmax._src.backends import registry

HERE = os.path.dirname(os.path.abspath(__file__))
TOL = {"float64": 1e-10, "float32": 2e-5}


# Compiling a backend's sharded and plain programs takes several seconds each,
# so by default the two backends that run on CPU by default ("cpu", "scan")
# are checked; KALMAX_SLOW=1 adds every other backend and float32 (the
# refined adjoint of the portable path).
SLOW = bool(os.environ.get("KALMAX_SLOW"))
CASES = ([f"{m}/float64" for m in registry.available()] + ["scan/float32"] if SLOW
         else [f"{m}/float64" for m in ("cpu", "scan") if registry.is_available(m)])


@pytest.fixture(scope="module")
def run():
    env = dict(os.environ, JAX_PLATFORMS="cpu")
    proc = subprocess.run([sys.executable, os.path.join(HERE, "shard_map_worker.py"), ",".join(CASES)], env=env,
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-4000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _close(got, want, tol):
    assert len(got) == len(want)
    for a, b in zip(got, want):
        a, b = np.asarray(a), np.asarray(b)
        assert np.all(np.isfinite(b))  # a NaN reference would make the comparison vacuous
        np.testing.assert_allclose(a, b, rtol=tol, atol=tol * max(1.0, float(np.max(np.abs(b)))))


def test_every_backend_ran(run):
    assert run["devices"] == 4
    assert set(run["backends"]) >= {"scan", "parallel", "covariance"}
    assert set(run["backends"]) == set(registry.available())  # the worker covers every registered backend
    assert set(run["shard_map"]) == set(CASES)


@pytest.mark.parametrize("key", CASES)
def test_shard_map_forward_and_gradient(run, key):
    r = run["shard_map"][key]
    dtype = key.split("/")[1]
    tol = TOL[dtype]
    _close(r["forward"], r["plain_forward"], tol)  # states, log-likelihoods
    assert r["value"] == pytest.approx(r["plain_value"], rel=tol)
    _close(r["grads"], r["plain_grads"], tol)  # every model field, then y


@pytest.mark.parametrize("form", ["dense", "diagonal"])
def test_sharded_batch_runs_the_kernel_per_shard(run, form):
    """The kernel on a sharded batch; "diagonal": per-step diagonal Q and
    diagonal R given as variances (their attributes pass through the wrappers)."""
    if "kernel" not in run:
        pytest.skip("compiled kernel unavailable")
    k = run["kernel"] if form == "dense" else run["diagonal_noise"]["kernel"]
    per_device = run["batch"] // run["devices"]
    for calls, gathers in ((k["smooth_calls"], k["smooth_gathers"]), (k["vg_calls"], k["vg_gathers"])):
        assert calls, "no kernel call in the compiled program"
        # Each device's kernel call sees its own trajectories only ...
        assert all(shape[0] == per_device for _, shape in calls), calls
        # ... and nothing is gathered onto every device first.
        assert not gathers
    targets = {t for t, _ in k["vg_calls"]}
    assert {"kalmax_cpu_forward", "kalmax_cpu_loglik", "kalmax_cpu_gradients"} <= targets
    assert k["vg_sums"]  # the model's gradient is summed across devices
    assert k["output_devices"] == run["devices"]
    _close(k["states"], k["plain_states"], TOL["float64"])
    assert k["value"] == pytest.approx(k["plain_value"], rel=TOL["float64"])
    _close(k["grads"], k["plain_grads"], TOL["float64"])


def test_shard_map_with_diagonal_noise_on_the_kernel(run):
    """shard_map of the kernel with a per-step diagonal Q and a diagonal R
    (variances and the q_diagonal / r_diagonal attributes), against the same
    without sharding."""
    if "diagonal_noise" not in run:
        pytest.skip("compiled kernel unavailable")
    r = run["diagonal_noise"]["shard_map"]
    tol = TOL["float64"]
    _close(r["forward"], r["plain_forward"], tol)
    assert r["value"] == pytest.approx(r["plain_value"], rel=tol)
    _close(r["grads"], r["plain_grads"], tol)
