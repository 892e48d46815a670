"""Worker for tests/test_sharding.py: run in a fresh process (so that XLA_FLAGS can
set the number of host devices before JAX starts) and print one JSON line.

The same data-parallel code runs whatever the device count; the test runs it
with 1 and with 4 forced CPU devices and compares the printed numbers.
"""

import json
import sys

import jax

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import optax  # noqa: E402

import kalmax as kx  # noqa: E402


def model_of(params):
    # An invented two-state "drifting level and slope" model; the parameters
    # are log standard deviations and the slope's persistence.
    A = jnp.array([[1.0, 1.0], [0.0, 0.0]]) + jnp.array([[0.0, 0.0], [0.0, 1.0]]) * jnp.tanh(params["phi"])
    Q = jnp.diag(jnp.exp(2 * params["log_q"]))
    R = jnp.diag(jnp.exp(2 * params["log_r"]))
    C = jnp.array([[1.0, 0.0], [0.5, 1.0]])
    return kx.StateSpace(A=A, C=C, Q=Q, R=R)


def make_batch(B=6, T=30, seed=0):
    rng = np.random.default_rng(seed)
    ys, holds = [], []
    for _ in range(B):
        x = np.cumsum(rng.standard_normal((T, 2)) * [0.3, 0.1], axis=0)
        y = x @ np.array([[1.0, 0.0], [0.5, 1.0]]).T + 0.5 * rng.standard_normal((T, 2))
        y[rng.random((T, 2)) < 0.2] = np.nan  # missing entries
        ys.append(y)
        holds.append(rng.random((T, 2)) < 0.25)
    y = np.stack(ys)
    mask = ~np.isnan(y)
    return y, mask, np.stack(holds) & mask


def batch_loss(params, batch):
    y, mask, hold = batch
    return kx.batch_prediction_error(model_of(params), y, mask, hold, method=METHOD)


def main():
    global METHOD
    METHOD = sys.argv[1] if len(sys.argv) > 1 else "scan"
    params = {"log_q": jnp.array([-1.0, -2.0]), "log_r": jnp.array([-0.5, -0.7]), "phi": jnp.array(0.5)}
    mesh = kx.batch_mesh()
    (y, mask, hold), valid = kx.pad_batch(make_batch(), mesh.size)
    hold = hold & valid[:, None, None]
    batch = kx.shard_batch((y, mask, hold), mesh)
    out = {"devices": len(jax.devices()), "batch_devices": len(batch[0].sharding.device_set)}

    # 1. value and gradient, batch passed as an argument.
    vg = jax.jit(jax.value_and_grad(batch_loss)).lower(kx.replicate(params, mesh), batch).compile()
    value, grads = vg(kx.replicate(params, mesh), batch)
    out["value"] = float(value)
    out["grads"] = {k: np.asarray(v).ravel().tolist() for k, v in grads.items()}
    out["partitioned"] = "all-reduce" in vg.as_text()

    # A batch that does not split evenly is refused with a clear message.
    try:
        kx.shard_batch(np.zeros((mesh.size + 1, 3)), mesh)
        out["indivisible_refused"] = mesh.size == 1
    except ValueError as err:
        out["indivisible_refused"] = "pad_to_mesh" in str(err)

    # 2. kx.fit with the data-parallel loss, compiled (jit=True) and not.
    loss_fn = kx.data_parallel(batch_loss, (y, mask, hold), mesh)
    hlo = jax.jit(jax.value_and_grad(loss_fn)).lower(params).compile().as_text()
    out["fit_partitioned"] = "all-reduce" in hlo
    for jit in (True, False):
        res = kx.fit(loss_fn, params, optax.sgd(0.2), steps=3, progress=False, jit=jit)
        out[f"fit_jit{int(jit)}"] = {k: np.asarray(v).ravel().tolist() for k, v in res.params.items()}
        out[f"fit_loss_jit{int(jit)}"] = np.asarray(res.history["loss"]).tolist()
    print(json.dumps(out))


if __name__ == "__main__":
    main()
