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
several processes after ``jax.distributed.initialize()`` (JAX's own
multi-controller runtime; on CPUs set
``jax.config.update("jax_cpu_collectives_implementation", "gloo")`` before it,
so that the cross-process sums have a transport). With several processes:

- every process runs the same program on its *own* trajectories: the data
  functions here take the process-local slice, and the global batch is the
  concatenation of the slices in process order
  (``jax.make_array_from_process_local_data``);
- the slices must have the same shape on every process (a collective cannot
  add arrays of different sizes): :func:`pad_to_mesh` pads each process's
  slice to the common size, and :func:`shard_batch` compares the shapes
  across processes and refuses a mismatch with a message instead of hanging;
- a jitted function may not close over an array that lives on other
  processes' devices, so :func:`data_parallel` returns a
  :class:`DataParallelLoss` that carries its batch, and :func:`kalmax.fit`
  passes that batch to the compiled step as an argument;
- losses and gradients of replicated parameters come back fully replicated,
  so every process reads the same scalars and makes the same decisions.

Pattern::

    mesh = kx.batch_mesh()                                   # all devices
    (y, mask, hold), valid = kx.pad_to_mesh((y, mask, hold), mesh)
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

import zlib
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


def _local_device_count(mesh: Mesh) -> int:
    """Devices of the mesh that belong to this process."""
    return sum(d.process_index == jax.process_index() for d in np.asarray(mesh.devices).ravel())


def _leading_size(batch) -> int:
    leaves = jax.tree_util.tree_leaves(batch)
    sizes = {np.shape(x)[0] if np.ndim(x) else None for x in leaves}
    if len(sizes) != 1 or None in sizes:
        raise ValueError(
            "batch must be a pytree of arrays sharing one leading (batch) axis; "
            f"got leading sizes {sorted(s for s in sizes if s is not None)}"
            + (" and scalars" if None in sizes else "") + "."
        )
    (B,) = sizes
    return B


def _gather_across_processes(values: Sequence[int]) -> np.ndarray:
    """(processes, len(values)) int32 table of every process's ``values``; one collective."""
    from jax.experimental import multihost_utils

    return np.asarray(multihost_utils.process_allgather(np.asarray(values, np.int32)))


def _layout_fingerprint(batch) -> int:
    """A checksum of the pytree structure and of each leaf's dtype and trailing shape.

    Processes compare this (a fixed-size number, so that the comparison itself
    cannot hang on differently shaped inputs) before assembling a global array.
    """
    leaves, treedef = jax.tree_util.tree_flatten(batch)
    text = repr((str(treedef), [(np.asarray(x).dtype.str, np.shape(x)[1:]) for x in leaves]))
    return zlib.crc32(text.encode()) & 0x7FFFFFFF


def shard_batch(batch, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Place a pytree of arrays with their leading axis split over the mesh.

    With several processes each one passes its own local slice; the global
    array is their concatenation along the leading axis (in process order).
    The processes first compare their slices' sizes, dtypes and trailing
    shapes (one small collective), so that a mismatch is an error here rather
    than a hang or a wrong global array later.

    Args:
        batch: pytree of arrays, all with the same leading size B (per process).
        mesh: from :func:`batch_mesh` (default: all devices).
        axis_name: the mesh axis to split over.

    Returns:
        the same pytree of ``jax.Array`` sharded as ``P(axis_name)``.

    Raises:
        ValueError: when B is not a multiple of the number of devices this
            process has on the mesh (pad first with :func:`pad_to_mesh`), or
            when the processes' slices differ in size, dtype or trailing shape.

    Example:
        >>> import numpy as np, kalmax as kx
        >>> y = kx.shard_batch(np.zeros((4, 10, 2)))
        >>> y.shape
        (4, 10, 2)
    """
    mesh = _mesh(mesh, axis_name)
    sharding = NamedSharding(mesh, P(axis_name))
    local = _local_device_count(mesh)
    B = _leading_size(batch)
    if B % local:
        raise ValueError(
            f"the batch size ({B}) must be a multiple of the number of devices on mesh axis "
            f"{axis_name!r} in this process ({local}); pad it with kx.pad_to_mesh(batch, mesh)."
        )
    if jax.process_count() > 1:
        table = _gather_across_processes([B, _layout_fingerprint(batch)])
        if len(set(table[:, 0].tolist())) > 1:
            raise ValueError(
                "every process must pass the same number of trajectories to shard_batch; got "
                + ", ".join(f"{int(b)} on process {i}" for i, b in enumerate(table[:, 0]))
                + ". Pad each process's slice with kx.pad_to_mesh(batch, mesh)."
            )
        if len(set(table[:, 1].tolist())) > 1:
            raise ValueError(
                "the processes' batches differ in structure, dtype or trailing shape (e.g. series "
                "padded to different lengths); every process must pass arrays of the same layout."
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


def _pad_to(batch, size: int):
    """Pad the leading axis to ``size`` with copies of the first example; (padded, valid)."""
    B = _leading_size(batch)
    if B < 1:
        raise ValueError("batch must hold at least one example to pad from; got an empty batch.")
    extra = size - B

    def pad(x):
        x = np.asarray(x)
        return np.concatenate([x, np.repeat(x[:1], extra, axis=0)], axis=0) if extra else x

    valid = np.arange(size) < B
    return jax.tree_util.tree_map(pad, batch), valid


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
    for x in leaves:
        if np.shape(x)[0] != B:
            raise ValueError(f"every leaf of batch must have leading size {B}; got {np.shape(x)[0]}.")
    return _pad_to(batch, B + (-B) % multiple)


def pad_to_mesh(batch, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Pad this process's slice of the batch so that :func:`shard_batch` accepts it.

    One process: the same as ``pad_batch(batch, mesh.size)``. Several
    processes: each passes its own (possibly ragged) slice; the processes
    agree on the largest slice (one small collective), round it up to a
    multiple of the devices each process has on the mesh, and pad every
    slice to that size by repeating its first example. As with
    :func:`pad_batch`, make the copies score nothing: ``hold & valid[:, None, None]``.

    Every process must call it (it is a collective when there are several).

    Args:
        batch: pytree of arrays with a common leading size (≥ 1) on this process.
        mesh: from :func:`batch_mesh` (default: all devices).

    Returns:
        (padded batch, valid) as in :func:`pad_batch`; ``valid`` covers this
        process's slice.

    Example:
        >>> import numpy as np, kalmax as kx
        >>> (y,), valid = kx.pad_to_mesh((np.zeros((3, 5, 1)),))
        >>> y.shape[0] % len(jax.devices()) == 0, int(valid.sum())
        (True, 3)
    """
    mesh = _mesh(mesh, axis_name)
    local = _local_device_count(mesh)
    B = _leading_size(batch)
    largest = B if jax.process_count() == 1 else int(_gather_across_processes([B])[:, 0].max())
    return _pad_to(batch, largest + (-largest) % local)


class DataParallelLoss:
    """``params -> loss`` over a batch sharded on a mesh (what :func:`data_parallel` returns).

    Calling it evaluates ``fn(params, batch)``. :func:`kalmax.fit` instead
    passes ``batch`` to its compiled step as an argument: with several
    processes a jitted function may not close over an array spread over
    other processes' devices, and with one process this keeps the data out
    of the compiled program. Write the same in a hand-made loop:
    ``jax.jit(jax.value_and_grad(loss.fn))(params, loss.batch)``.

    Attributes:
        fn: (params, batch) -> scalar, jitted, with the batch kept split over the mesh.
        batch: the sharded pytree of global ``jax.Array``.
        mesh: the device mesh.
    """

    def __init__(self, fn: Callable, batch, mesh: Mesh):
        self.fn, self.batch, self.mesh = fn, batch, mesh

    def __call__(self, params):
        return self.fn(params, self.batch)


def data_parallel(loss_fn: Callable, batch, mesh: Optional[Mesh] = None, axis_name: str = BATCH_AXIS):
    """Turn ``loss_fn(params, batch)`` into ``params -> loss`` with the batch sharded over the mesh.

    The returned :class:`DataParallelLoss` is what :func:`kalmax.fit` (or
    ``jax.grad``) takes. The loss must pool over the whole batch (e.g.
    :func:`kalmax.batch_prediction_error`, or Σ log-likelihoods); XLA then
    computes per-device partial sums and adds them across devices (and
    processes), so value and gradient equal the single-device ones up to
    summation order.

    With several processes, ``batch`` is this process's slice (padded with
    :func:`pad_to_mesh`), and the loss is meant for :func:`kalmax.fit` or for
    a loop that passes ``loss.batch`` as an argument (see
    :class:`DataParallelLoss`); calling it inside your own ``jax.jit`` would
    close over arrays of other processes, which JAX refuses.

    Args:
        loss_fn: (params, batch) -> scalar.
        batch: pytree of arrays with a leading batch axis (on this process a
            multiple of its devices on the mesh; see :func:`pad_to_mesh`).
        mesh: from :func:`batch_mesh` (default: all devices).

    Returns:
        :class:`DataParallelLoss`, a callable params -> scalar.

    Example:
        >>> import optax
        >>> nominal = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> spec = kx.Parameterization(nominal, Q=kx.DiagonalCov(), R=kx.DiagonalCov())
        >>> y, mask = kx.pad_series([np.sin(np.arange(8.0))[:, None], np.cos(np.arange(6.0))[:, None]])
        >>> hold = np.zeros_like(mask)
        >>> hold[:, 3] = True
        >>> (y, mask, hold), valid = kx.pad_to_mesh((y, mask, hold))
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

    return DataParallelLoss(pooled, sharded, mesh)
