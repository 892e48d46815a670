r"""How a call of the compiled kernel meets ``vmap``, a sharded batch, and ``shard_map``.

:func:`call` is ``jax.ffi.ffi_call`` for one trajectory, plus three things an
FFI call does not know by itself:

Batches (``jax.vmap``). The kernel loops over any number of leading batch
dimensions itself, each either full-size or 1 (broadcast; ``cpu/kernel.cc``).
A ``custom_vmap`` rule gives the call exactly that: every vmap adds one
leading dimension — size 1 for operands that are not batched, so a model
shared by the batch is passed once — and ``vmap``, ``grad`` and ``vmap`` of
``grad`` all reach one kernel call. (This is what ``vmap_method=
"expand_dims"`` did; the rule is ours so that the next point can see the
batch dimensions.)

Sharded batches (``jax.jit`` over a device mesh). XLA cannot look inside a
custom call, so by default it gathers every operand onto every device and
each device runs the whole batch. The batched call is therefore wrapped in
``jax.experimental.custom_partitioning`` with the obvious rule: trajectories
are independent, so the leading batch dimensions keep the sharding of the
operands that carry the full batch (the measurements, typically), every other
dimension — time, state, the model passed once — is replicated, and the
results are sharded like the batch. Each device then runs the kernel on its
own trajectories, and no collective is needed. The rule is given both as a
Shardy sharding rule (batch factors shared by operands and results, every
other factor ``need_replication``) and as the GSPMD callbacks. A leading
dimension whose size the mesh axes do not divide is replicated instead.

``shard_map`` (``check_vma=True``). An FFI call types its results from the
shapes it is given, which vary over no mesh axis; under ``shard_map`` they
vary over the axes its operands vary over (``manual_axes.py``), so the results
are typed so, and the operands cast to that common type.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
from jax.custom_batching import custom_vmap
from jax.experimental.custom_partitioning import custom_partitioning
from jax.sharding import NamedSharding
from jax.sharding import PartitionSpec as P

from .. import manual_axes


def call(target: str, results, *operands, **attributes):
    """``target(*operands, **attributes)`` for one trajectory.

    Args:
        target: a registered FFI target.
        results: ``ShapeDtypeStruct`` per result, for one trajectory.
        operands: arrays, for one trajectory.
        attributes: the FFI attributes (NumPy scalars).

    Returns:
        tuple of results; under ``vmap`` each gains the batch dimensions.
    """
    axes = manual_axes.varying_axes(operands)
    operands = manual_axes.cast_varying(operands, axes)
    return _batched(target, tuple(results), attributes, 0)(*operands)


def _lead(operands, rank):
    """The batch shape: the broadcast of the operands' leading ``rank`` dimensions."""
    return tuple(max(op.shape[j] for op in operands) for j in range(rank)) if operands else (1,) * rank


def _ffi(target, results, attributes, rank, operands):
    """The FFI call on operands with ``rank`` leading batch dimensions."""
    lead = _lead(operands, rank)
    axes = manual_axes.varying_axes(operands)
    if axes:  # a manual axis type needs a sharding: the current mesh, replicated over auto axes
        extra = dict(sharding=NamedSharding(jax.sharding.get_abstract_mesh(), P()),
                     manual_axis_type=jax.sharding.ManualAxisType(varying=axes))
    else:
        extra = {}
    shapes = tuple(jax.ShapeDtypeStruct(lead + tuple(r.shape), r.dtype, **extra) for r in results)
    # vmap never reaches the ffi_call itself (custom_vmap below); the method is moot.
    return tuple(jax.ffi.ffi_call(target, shapes, vmap_method="expand_dims")(*operands, **attributes))


def _batched(target, results, attributes, rank):
    """The call on operands with ``rank`` leading batch dimensions, closed under vmap."""

    @custom_vmap
    def batched(*operands):
        if rank == 0:
            return _ffi(target, results, attributes, 0, operands)
        return _partitioned(target, results, attributes, rank, operands)

    @batched.def_vmap
    def rule(axis_size, in_batched, *operands):
        del axis_size
        operands = tuple(op if b else jnp.expand_dims(op, 0) for op, b in zip(operands, in_batched))
        out = _batched(target, results, attributes, rank + 1)(*operands)
        return out, tuple(True for _ in out)

    return batched


def _batch_axes(mesh, arg_shapes, lead):
    """Per leading dimension: the mesh axes it is split over, from the operands with the full batch."""
    spec, used = [], set()
    for j, size in enumerate(lead):
        entry = None
        for a in arg_shapes:
            a_spec = getattr(a.sharding, "spec", None)
            if size > 1 and a.shape[j] == size and a_spec is not None and j < len(a_spec) and a_spec[j] is not None:
                entry = a_spec[j]
                break
        names = () if entry is None else (entry if isinstance(entry, tuple) else (entry,))
        if names and (size % math.prod(mesh.shape[n] for n in names) or used.intersection(names)):
            names = ()  # does not divide, or an axis already used: replicate this dimension
        used.update(names)
        spec.append(None if not names else names[0] if len(names) == 1 else names)
    return tuple(spec)


def _shardings(mesh, arg_shapes, lead, n_results):
    spec = _batch_axes(mesh, arg_shapes, lead)
    args = tuple(
        NamedSharding(mesh, P(*[spec[j] if lead[j] > 1 and a.shape[j] == lead[j] else None for j in range(len(lead))]))
        for a in arg_shapes)
    return args, tuple(NamedSharding(mesh, P(*spec)) for _ in range(n_results))


def _sharding_rule(operands, lead, results):
    """Shardy rule: batch factors ``b<j>`` shared by full-batch operands and results; the rest replicated."""
    rank = len(lead)
    replicated = []

    def dims(prefix, shape, full):
        names = []
        for d in range(len(shape)):
            if d < rank and full(d):
                names.append(f"b{d}")
            else:
                names.append(f"{prefix}_{d}")
                replicated.append(names[-1])
        return " ".join(names)

    ins = [dims(f"i{i}", op.shape, lambda d, op=op: lead[d] > 1 and op.shape[d] == lead[d])
           for i, op in enumerate(operands)]
    outs = [dims(f"o{k}", lead + tuple(r.shape), lambda d: lead[d] > 1) for k, r in enumerate(results)]
    return ", ".join(ins) + " -> " + ", ".join(outs), tuple(replicated)


def _partitioned(target, results, attributes, rank, operands):
    """The batched call, partitioned over the devices along its batch dimensions."""
    lead = _lead(operands, rank)

    def local(*ops):  # the same call on each device's shard (shapes from the shard)
        return _ffi(target, results, attributes, rank, ops)

    fn = custom_partitioning(local)

    def partition(mesh, arg_shapes, result_shape):
        del result_shape
        args, outs = _shardings(mesh, arg_shapes, lead, len(results))
        return mesh, local, outs, args

    def infer(mesh, arg_shapes, result_shape):
        del result_shape
        return _shardings(mesh, arg_shapes, lead, len(results))[1]

    rule, replicated = _sharding_rule(operands, lead, results)
    fn.def_partition(partition=partition, infer_sharding_from_operands=infer, sharding_rule=rule,
                     need_replication_factors=replicated)
    return fn(*operands)
