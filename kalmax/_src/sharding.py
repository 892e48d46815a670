r"""Data-parallel fitting over a device mesh: thin helpers around ``jax.sharding``.

Nothing here is a distribution layer: a batch of trajectories is placed with
its leading (batch) axis split over a one-dimensional device mesh
(``NamedSharding(mesh, P("batch"))``), the parameters are replicated, and
``jax.jit`` partitions the vmapped smoother and inserts the cross-device sums.
Gradients are "averaged" correctly because the loss itself is a global pooled
quantity — e.g. :func:`kalmax.batch_prediction_error` is
Σ_i sse_i / Σ_i count_i over *all* trajectories on all devices — so its
gradient is exactly the single-device gradient, whatever the split.

The same code runs on one CPU, on many local devices (GPUs, or CPU devices
forced with ``XLA_FLAGS=--xla_force_host_platform_device_count=4``), and on
several processes after ``jax.distributed.initialize()``: :func:`shard_batch`
then takes each process's *local* slice of the batch.

Pattern::

    mesh = kx.batch_mesh()                                   # all devices
    (y, mask, hold), valid = kx.pad_batch((y, mask, hold), mesh.size)
    hold = hold & valid[:, None, None]                       # padding scores nothing
    def batch_loss(params, batch):
        y, mask, hold = batch
        return kx.batch_prediction_error(spec.model(params), y, mask, hold)
    loss_fn = kx.data_parallel(batch_loss, (y, mask, hold), mesh)
    result = kx.fit(loss_fn, spec.init(), optax.adam(0.05), steps=200)

or, in a hand-written loop, ``jax.jit(jax.value_and_grad(batch_loss))(params,
kx.shard_batch(batch, mesh))`` — the batch as an argument is the most
efficient form (no data is embedded in the compiled program).
"""

from __future__ import annotations

from typing import Callable, Optional, Sequence

import jax
import numpy as np
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

BATCH_AXIS = "batch"


def batch_mesh(devices: Optional[Sequence] = None, axis_name: str = BATCH_AXIS) -> Mesh:
    """A one-dimensional device mesh for data parallelism over trajectories.

    Args:
        devices: devices to use (default: ``jax.devices()``, i.e. every device
            of every process).
        axis_name: name of the mesh axis (default ``"batch"``).

    Returns:
        ``jax.sharding.Mesh`` of shape (len(devices),).

    Example:
        >>> import kalmax as kx
        >>> kx.batch_mesh().axis_names
        ('batch',)
    """
    devices = jax.devices() if devices is None else list(devices)
    return Mesh(np.asarray(devices), (axis_name,))


def _mesh(mesh: Optional[Mesh], axis_name: str) -> Mesh:
    return batch_mesh(axis_name=axis_name) if mesh is None else mesh


def shard_batch(batch, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Place a pytree of arrays with their leading axis split over the mesh.

    With several processes each one passes its own local slice; the global
    array is their concatenation along the leading axis (in process order).

    Args:
        batch: pytree of arrays, all with the same leading size B (per process).
        mesh: from :func:`batch_mesh` (default: all devices).
        axis_name: the mesh axis to split over.

    Returns:
        the same pytree of ``jax.Array`` sharded as ``P(axis_name)``.

    Raises:
        ValueError: when B is not a multiple of the number of local devices
            on that axis (pad first with :func:`pad_batch`).

    Example:
        >>> import numpy as np, kalmax as kx
        >>> y = kx.shard_batch(np.zeros((4, 10, 2)))
        >>> y.shape
        (4, 10, 2)
    """
    mesh = _mesh(mesh, axis_name)
    sharding = NamedSharding(mesh, P(axis_name))
    local = len([d for d in np.asarray(mesh.devices).ravel() if d.process_index == jax.process_index()])
    leaves = jax.tree_util.tree_leaves(batch)
    sizes = {np.shape(x)[0] if np.ndim(x) else None for x in leaves}
    if len(sizes) != 1 or None in sizes:
        raise ValueError(
            "batch must be a pytree of arrays sharing one leading (batch) axis; "
            f"got leading sizes {sorted(s for s in sizes if s is not None)}"
            + (" and scalars" if None in sizes else "") + "."
        )
    (B,) = sizes
    if B % local:
        raise ValueError(
            f"the batch size ({B}) must be a multiple of the number of devices on mesh axis "
            f"{axis_name!r} in this process ({local}); pad it with kx.pad_batch(batch, {local})."
        )
    return jax.tree_util.tree_map(
        lambda x: jax.make_array_from_process_local_data(sharding, np.asarray(x)), batch
    )


def replicate(tree, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Place a pytree (e.g. parameters) fully replicated on every device of the mesh.

    Every process must pass the same values.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> p = kx.replicate({"log_q": jnp.zeros(2)})
    """
    mesh = _mesh(mesh, axis_name)
    sharding = NamedSharding(mesh, P())
    return jax.tree_util.tree_map(
        lambda x: jax.make_array_from_process_local_data(sharding, np.asarray(x), np.shape(x)), tree
    )


def pad_batch(batch, multiple: int):
    """Pad the leading axis to a multiple of ``multiple`` by repeating the first example.

    Repeats (rather than empty trajectories) keep every smoothing problem
    well posed, so the padding adds exact zeros to pooled losses and their
    gradients once nothing in it is scored: combine the returned ``valid``
    with the held-out mask, ``holdout & valid[:, None, None]``.

    Args:
        batch: pytree of arrays with a common leading size B.
        multiple: e.g. the number of devices (``mesh.size``).

    Returns:
        (padded batch, valid): valid is a (B',) bool NumPy array, False on
        the added examples.

    Example:
        >>> import numpy as np, kalmax as kx
        >>> (y,), valid = kx.pad_batch((np.zeros((3, 5, 1)),), 4)
        >>> y.shape, valid.tolist()
        ((4, 5, 1), [True, True, True, False])
    """
    multiple = int(multiple)
    if multiple < 1:
        raise ValueError(f"multiple must be a positive integer; got {multiple}.")
    leaves = jax.tree_util.tree_leaves(batch)
    B = np.shape(leaves[0])[0]
    extra = (-B) % multiple

    def pad(x):
        x = np.asarray(x)
        if x.shape[0] != B:
            raise ValueError(f"every leaf of batch must have leading size {B}; got {x.shape[0]}.")
        return np.concatenate([x, np.repeat(x[:1], extra, axis=0)], axis=0) if extra else x

    valid = np.arange(B + extra) < B
    return jax.tree_util.tree_map(pad, batch), valid


def data_parallel(loss_fn: Callable, batch, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Turn ``loss_fn(params, batch)`` into ``params -> loss`` with the batch sharded over the mesh.

    The returned function is what :func:`kalmax.fit` (or ``jax.grad``) takes.
    The loss must pool over the whole batch (e.g.
    :func:`kalmax.batch_prediction_error`, or Σ log-likelihoods); XLA then
    computes per-device partial sums and adds them across devices, so value
    and gradient equal the single-device ones up to summation order.

    Called with concrete params (e.g. ``kx.fit(..., jit=False)``) the batch
    stays a sharded argument of the compiled program. Traced inside another
    ``jax.jit`` (``kx.fit``'s default) JAX embeds the closed-over batch in that
    program; a sharding constraint keeps the work split over the devices, but
    for batches of many megabytes prefer ``jit=False`` or a loop that passes
    the batch as an argument.

    Args:
        loss_fn: (params, batch) -> scalar.
        batch: pytree of arrays with a leading batch axis (a multiple of the
            number of devices; see :func:`pad_batch`).
        mesh: from :func:`batch_mesh` (default: all devices).

    Returns:
        params -> scalar.

    Example:
        >>> import optax
        >>> nominal = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> spec = kx.Parameterization(nominal, Q=kx.DiagonalCov(), R=kx.DiagonalCov())
        >>> y, mask = kx.pad_series([np.sin(np.arange(8.0))[:, None], np.cos(np.arange(6.0))[:, None]])
        >>> hold = np.zeros_like(mask)
        >>> hold[:, 3] = True
        >>> (y, mask, hold), valid = kx.pad_batch((y, mask, hold), len(jax.devices()))
        >>> hold = hold & valid[:, None, None]  # copies added as padding are not scored
        >>> f = kx.data_parallel(lambda p, b: kx.batch_prediction_error(spec.model(p), *b),
        ...                      (y, mask, hold))
        >>> result = kx.fit(f, spec.init(), optax.adam(0.05), steps=20, progress=False)
        >>> bool(result.history["loss"][-1] < result.history["loss"][0])
        True
    """
    mesh = _mesh(mesh, axis_name)
    sharded = shard_batch(batch, mesh, axis_name)
    spec = NamedSharding(mesh, P(axis_name))

    @jax.jit
    def pooled(params, b):
        b = jax.tree_util.tree_map(lambda x: jax.lax.with_sharding_constraint(x, spec), b)
        return loss_fn(params, b)

    def loss(params):
        return pooled(params, sharded)

    return loss

