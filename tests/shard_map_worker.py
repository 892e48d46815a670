"""Worker for tests/test_shard_map.py: run in a fresh process with four forced host
CPU devices (XLA_FLAGS must be set before JAX starts) and print one JSON line.

Two things are measured, for the test to compare:

1. every registered backend under ``jax.shard_map`` (default ``check_vma``) over a
   four-device mesh, batch split over the mesh: smoothed states,
   log-likelihoods, and the gradient of a pooled loss w.r.t. the model
   (replicated) and the measurements (split) — next to the same quantities
   computed without sharding in this process;
2. the compiled kernel under ``jax.jit`` on a batch placed with
   ``kx.shard_batch``: the custom calls of the compiled program (their targets
   and the shapes of their results) and whether it gathers anything, for a
   vmapped smooth and for value-and-gradient of a pooled loss; and the values,
   next to the unsharded ones.

Both also for the compiled kernel with a per-step diagonal Q and a diagonal R
(``kx.DiagonalNoise``: variances and the r_diagonal / q_diagonal attributes
pass through the vmap, shard_map and partitioning wrappers of
``backends/kernel_calls.py``).
"""

import json
import os
import re
import sys

os.environ["XLA_FLAGS"] = " ".join(
    [f for f in os.environ.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
    + ["--xla_force_host_platform_device_count=4"])
os.environ["JAX_PLATFORMS"] = "cpu"

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
from jax.sharding import PartitionSpec as P  # noqa: E402

import kalmax as kx  # noqa: E402
from kalmax._src.backends import registry  # noqa: E402

B, T = 8, 25


def problem(dtype, diagonal=False):
    # An invented two-state model seen through two sensors, with a proper prior
    # and about 20 % of the entries missing. diagonal: Q per step and R as
    # kx.DiagonalNoise variances.
    rng = np.random.default_rng(3)
    model = kx.StateSpace(A=jnp.array([[0.95, 0.1], [0.0, 0.9]], dtype), C=jnp.array([[1.0, 0.0], [0.5, 1.0]], dtype),
                          Q=jnp.diag(jnp.array([0.2, 0.05], dtype)), R=jnp.diag(jnp.array([0.4, 0.3], dtype)),
                          x0_mean=jnp.array([0.1, -0.2], dtype), x0_cov=jnp.eye(2, dtype=dtype))
    y = rng.standard_normal((B, T, 2)).astype(dtype)
    mask = rng.random((B, T, 2)) > 0.2
    if diagonal:
        q = np.array([0.2, 0.05]) * rng.uniform(0.5, 2.0, size=(T - 1, 2))
        model = model.replace(Q=kx.DiagonalNoise(jnp.asarray(q, dtype)),
                              R=kx.DiagonalNoise(jnp.array([0.4, 0.3], dtype)))
    return model, y, mask


def per_trajectory(method):
    def one(model, y, mask):
        return kx.smooth(model, y, mask, method=method).states, kx.log_likelihood(model, y, mask, method=method)
    return jax.vmap(one, in_axes=(None, 0, 0))


def pooled(method):
    # Σ over the batch of log-likelihood plus a data-fit term of the smoothed
    # states; the per-trajectory values come along as the auxiliary output.
    fn = per_trajectory(method)

    def loss(model, y, mask):
        states, ll = fn(model, y, mask)
        return jnp.sum(ll) - 0.5 * jnp.sum(states ** 2), (states, ll)
    return loss


def tolist(tree):
    return [np.asarray(a, np.float64).ravel().tolist() for a in jax.tree_util.tree_leaves(tree)]


def under_shard_map(method, dtype, mesh, diagonal=False):
    # One compiled program each way (sharded, plain): compilation dominates the run time.
    model, y, mask = problem(dtype, diagonal)
    loss = pooled(method)

    def local(model, y, mask):  # per-device sums added over the mesh: the pooled loss
        def total(m, yy):
            value, aux = loss(m, yy, mask)
            return jax.lax.psum(value, "batch"), aux
        return jax.value_and_grad(total, argnums=(0, 1), has_aux=True)(model, y)

    sharded = jax.jit(jax.shard_map(local, mesh=mesh, in_specs=(P(), P("batch"), P("batch")),
                                    out_specs=((P(), P("batch")), (P(), P("batch")))))
    plain = jax.jit(jax.value_and_grad(loss, argnums=(0, 1), has_aux=True))
    (value, forward), grads = sharded(model, y, mask)
    (plain_value, plain_forward), plain_grads = plain(model, y, mask)
    return {
        "forward": tolist(forward), "plain_forward": tolist(plain_forward),  # states, log-likelihoods
        "value": float(value), "plain_value": float(plain_value),
        "grads": tolist(grads), "plain_grads": tolist(plain_grads),
    }


def custom_calls(hlo):
    """(target, shape of the first result) for every kalmax custom call of a compiled program."""
    out = []
    for line in hlo.splitlines():
        target = re.search(r'custom_call_target="(kalmax_[a-z_]+)"', line)
        if target:
            shape = re.search(r"=\s*\(?\s*[a-z0-9]+\[([0-9,]*)\]", line)
            out.append((target.group(1), [int(s) for s in shape.group(1).split(",") if s]))
    return out


def partitioned_kernel(mesh, diagonal=False):
    model, y, mask = problem(np.float64, diagonal)
    ys, ms = kx.shard_batch((y, mask), mesh)
    smooth = jax.jit(jax.vmap(lambda yy, mm: kx.smooth(model, yy, mm, method="cpu").states))
    vg = jax.jit(jax.value_and_grad(lambda *a: pooled("cpu")(*a)[0], argnums=(0, 1)))
    smooth_hlo = smooth.lower(ys, ms).compile().as_text()
    vg_hlo = vg.lower(model, ys, ms).compile().as_text()
    value, grads = vg(model, ys, ms)
    plain_value, plain_grads = vg(model, y, mask)
    return {
        "smooth_calls": custom_calls(smooth_hlo),
        "smooth_gathers": "all-gather" in smooth_hlo or "all-to-all" in smooth_hlo,
        "vg_calls": custom_calls(vg_hlo),
        "vg_gathers": "all-gather" in vg_hlo or "all-to-all" in vg_hlo,
        "vg_sums": "all-reduce" in vg_hlo,
        "states": tolist(smooth(ys, ms)), "plain_states": tolist(smooth(y, mask)),
        "output_devices": len(smooth(ys, ms).sharding.device_set),
        "value": float(value), "plain_value": float(plain_value),
        "grads": tolist(grads), "plain_grads": tolist(plain_grads),
    }


def main():
    # Cases "method/dtype" from the command line (compiling each takes seconds).
    cases = sys.argv[1].split(",") if len(sys.argv) > 1 else [f"{m}/float64" for m in registry.available()]
    mesh = kx.batch_mesh()
    out = {"devices": len(jax.devices()), "batch": B, "backends": registry.available(), "shard_map": {}}
    for case in cases:
        method, dtype = case.split("/")
        out["shard_map"][case] = under_shard_map(method, np.dtype(dtype), mesh)
    if registry.is_available("cpu"):
        out["kernel"] = partitioned_kernel(mesh)
        out["diagonal_noise"] = {"shard_map": under_shard_map("cpu", np.dtype("float64"), mesh, diagonal=True),
                                 "kernel": partitioned_kernel(mesh, diagonal=True)}
    print(json.dumps(out))


if __name__ == "__main__":
    sys.exit(main())
