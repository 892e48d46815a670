"""Data-parallel fitting over a device mesh (kalmax._src.sharding).

The multi-device run needs XLA_FLAGS set before JAX starts, so both runs go
to fresh processes (tests/sharding_worker.py): one with the default single
CPU device, one with four forced host devices. The issue's target: the
sharded result equals the single-device one to 1e-10 in float64.
"""

import json
import os
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax as kx

HERE = os.path.dirname(os.path.abspath(__file__))
TOL = 1e-10


def _start(devices):
    env = dict(os.environ)
    flags = [f for f in env.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
    if devices > 1:
        flags.append(f"--xla_force_host_platform_device_count={devices}")
    env["XLA_FLAGS"] = " ".join(flags)
    env["JAX_PLATFORMS"] = "cpu"
    return subprocess.Popen([sys.executable, os.path.join(HERE, "sharding_worker.py")], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.fixture(scope="module")
def runs():
    procs = {d: _start(d) for d in (1, 4)}  # both at once: they are independent
    out = {}
    for d, proc in procs.items():
        stdout, stderr = proc.communicate(timeout=600)
        assert proc.returncode == 0, stderr[-3000:]
        out[d] = json.loads(stdout.strip().splitlines()[-1])
    return out


def _close(a, b):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=TOL, atol=TOL)


def test_four_devices_really_split_the_batch(runs):
    assert runs[1]["devices"] == 1 and runs[4]["devices"] == 4
    assert runs[4]["batch_devices"] == 4
    # The compiled programs sum partial results across devices.
    assert runs[4]["partitioned"] and runs[4]["fit_partitioned"]
    assert runs[4]["indivisible_refused"]


def test_value_and_gradient_equal_single_device(runs):
    _close(runs[4]["value"], runs[1]["value"])
    for k in runs[1]["grads"]:
        _close(runs[4]["grads"][k], runs[1]["grads"][k])


@pytest.mark.parametrize("jit", [0, 1])
def test_fit_equals_single_device(runs, jit):
    _close(runs[4][f"fit_loss_jit{jit}"], runs[1][f"fit_loss_jit{jit}"])
    for k in runs[1][f"fit_jit{jit}"]:
        _close(runs[4][f"fit_jit{jit}"][k], runs[1][f"fit_jit{jit}"][k])
    # The optimiser moved the parameters (a fit that did nothing would pass trivially).
    assert runs[1][f"fit_loss_jit{jit}"][-1] < runs[1][f"fit_loss_jit{jit}"][0]


def test_padding_adds_exact_zeros(rng):
    # Pooled held-out error and its gradient are unchanged by padding repeats
    # that score nothing (one device; the multi-device runs use the same padding).
    T, B = 12, 3
    model = kx.StateSpace(A=0.9 * jnp.eye(2), C=jnp.eye(2), Q=0.2 * jnp.eye(2), R=0.5 * jnp.eye(2))
    y = rng.standard_normal((B, T, 2))
    mask = rng.random((B, T, 2)) > 0.2
    hold = (rng.random((B, T, 2)) < 0.3) & mask
    (yp, mp, hp), valid = kx.pad_batch((y, mask, hold), 4)
    assert yp.shape == (4, T, 2) and valid.tolist() == [True, True, True, False]
    np.testing.assert_array_equal(yp[3], y[0])
    hp = hp & valid[:, None, None]

    def loss(m, y_, m_, h_):
        return kx.batch_prediction_error(m, y_, m_, h_, method="scan")

    vg = jax.jit(jax.value_and_grad(loss))
    v0, g0 = vg(model, y, mask, hold)
    v1, g1 = vg(model, yp, mp, hp)
    assert float(v0) == pytest.approx(float(v1), rel=1e-14)
    for a, b in zip(jax.tree_util.tree_leaves(g0), jax.tree_util.tree_leaves(g1)):
        np.testing.assert_allclose(a, b, rtol=1e-13, atol=1e-15)


def test_pad_batch_rejects_bad_input():
    with pytest.raises(ValueError, match="multiple"):
        kx.pad_batch((np.zeros((3, 2)),), 0)
    with pytest.raises(ValueError, match="leading size"):
        kx.pad_batch((np.zeros((3, 2)), np.zeros((4, 2))), 2)


def test_shard_batch_single_device_keeps_values():
    x = np.arange(12.0).reshape(4, 3)
    (xs,) = kx.shard_batch((x,))
    np.testing.assert_array_equal(np.asarray(xs), x)
    with pytest.raises(ValueError, match="leading"):
        kx.shard_batch((np.zeros((4, 3)), np.zeros((5, 3))))
