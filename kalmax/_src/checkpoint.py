r"""Saving and restoring the state of :func:`kalmax.fit`, in a plain format.

A fit's state is a few pytrees of arrays (current parameters, the Optax
state, the best and the last finite parameters so far) and a few numbers (updates made, the loss
history, the early-stopping counters). It is written as **one NumPy ``.npz``
file** (a zip archive of ``.npy`` arrays, readable by any NumPy, no pickle):

- ``leaf_00000``, ``leaf_00001``, …: every array leaf, in the order of
  ``jax.tree_util.tree_flatten_with_path`` over (params, opt_state,
  best_params, last_finite_params);
- ``description``: a JSON text (a 0-d Unicode array) with the format name and
  version, the numbers above, and for every leaf its group, its path
  (``jax.tree_util.keystr``), dtype and shape.

The pytree *structure* is not stored (a treedef is code, not data); it comes
from the caller, who initialises the state afresh (the same params and
optimiser) and hands it over as ``like``. Restoring matches the stored leaf
descriptions against ``like`` and refuses any difference with a message that
names the first mismatching leaf, so a checkpoint of another model or
optimiser is never loaded silently into the wrong slots.

**Atomic writes.** The file is written to a temporary name in the same
directory, flushed and ``fsync``-ed, then renamed over the target
(``os.replace``, atomic on POSIX within one file system), and the directory
is ``fsync``-ed so that the rename itself survives a crash. A reader sees the
old checkpoint or the new one, never a torn one. With several processes
(``jax.distributed``) only process 0 writes; every process calls
:func:`save_fit_state` (arrays spread over processes are gathered
collectively first) and they meet at a barrier afterwards, so no process runs
ahead of a checkpoint that does not yet exist.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from typing import Any, Dict, List, NamedTuple, Optional

import jax
import numpy as np

FORMAT = "kalmax-fit-state"
VERSION = 1
_GROUPS = ("params", "opt_state", "best_params", "last_finite_params")


class FitState(NamedTuple):
    """Everything :func:`kalmax.fit` needs to continue a run where it stopped.

    Attributes:
        step: updates made so far; ``params`` and ``opt_state`` are the ones
            after ``step`` updates, not yet evaluated.
        params: current parameters.
        opt_state: Optax state after ``step`` updates.
        best_params: parameters with the best monitored value so far.
        last_finite_params: parameters after ``step − 1`` updates (the last
            ones evaluated, all of whose values were finite): what the fit
            returns if the loss at ``params`` is not finite.
        history: ``{"loss": [...]}`` (and ``"validation"``), entries 0 … step−1.
        best_value: best monitored value so far (``inf`` before any).
        best_step: updates behind ``best_params``.
        since_best: evaluations since the best one (for ``patience``).
    """

    step: int
    params: Any
    opt_state: Any
    best_params: Any
    last_finite_params: Any
    history: Dict[str, List[float]]
    best_value: float = math.inf
    best_step: int = 0
    since_best: int = 0


def _to_host(x) -> np.ndarray:
    """A NumPy copy of a leaf; arrays spread over processes are gathered (a collective)."""
    if isinstance(x, jax.Array) and not (x.is_fully_addressable or x.is_fully_replicated):
        from jax.experimental import multihost_utils

        return np.asarray(multihost_utils.process_allgather(x, tiled=True))
    return np.asarray(x)


def _leaves(state: FitState):
    """[(group, path string, leaf)] over the three pytrees, in a fixed order."""
    out = []
    for group in _GROUPS:
        flat, _ = jax.tree_util.tree_flatten_with_path(getattr(state, group))
        out.extend((group, jax.tree_util.keystr(path), leaf) for path, leaf in flat)
    return out


def _finite_or_none(v: float):
    # JSON has no infinity; the only non-finite value stored is "no best yet".
    return float(v) if math.isfinite(v) else None


def save_fit_state(path: str, state: FitState) -> None:
    """Write ``state`` to ``path`` atomically (see the module notes).

    Every process must call it; only process 0 writes.

    Args:
        path: file name (``.npz`` is the natural suffix; none is added).
        state: a :class:`FitState`.

    Example:
        >>> import optax, tempfile, os
        >>> params = {"w": jnp.zeros(3)}
        >>> opt = optax.adam(0.1)
        >>> state = kx.FitState(step=0, params=params, opt_state=opt.init(params),
        ...                     best_params=params, last_finite_params=params, history={"loss": []})
        >>> path = os.path.join(tempfile.mkdtemp(), "fit.npz")
        >>> kx.save_fit_state(path, state)
        >>> kx.load_fit_state(path, like=state).step
        0
    """
    leaves = [(g, p, _to_host(x)) for g, p, x in _leaves(state)]  # every process: may be collective
    if jax.process_index() == 0:
        description = {
            "format": FORMAT,
            "version": VERSION,
            "step": int(state.step),
            "history": {k: [float(v) for v in vs] for k, vs in state.history.items()},
            "best_value": _finite_or_none(state.best_value),
            "best_step": int(state.best_step),
            "since_best": int(state.since_best),
            "leaves": [{"group": g, "path": p, "dtype": a.dtype.str, "shape": list(a.shape)} for g, p, a in leaves],
        }
        arrays = {f"leaf_{i:05d}": a for i, (_, _, a) in enumerate(leaves)}
        arrays["description"] = np.asarray(json.dumps(description, allow_nan=False))
        _atomic_savez(path, arrays)
    if jax.process_count() > 1:
        from jax.experimental import multihost_utils

        multihost_utils.sync_global_devices(f"kalmax checkpoint {os.path.abspath(path)} step {int(state.step)}")


def _atomic_savez(path: str, arrays: Dict[str, np.ndarray]) -> None:
    directory = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=os.path.basename(path) + ".", suffix=".tmp", dir=directory)
    try:
        with os.fdopen(fd, "wb") as f:
            np.savez(f, **arrays)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    try:  # make the rename durable; not every platform can open a directory
        dfd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


def load_fit_state(path: str, like: FitState) -> FitState:
    """Read a state written by :func:`save_fit_state` into the structure of ``like``.

    Args:
        path: the checkpoint file.
        like: a :class:`FitState` built afresh for the same fit (same params
            pytree and optimiser), e.g. ``FitState(0, params, opt.init(params),
            params, params, {"loss": []})``; only its structure, paths, dtypes and
            shapes are used.

    Returns:
        :class:`FitState` whose arrays are NumPy arrays in ``like``'s pytrees.

    Raises:
        ValueError: the file is not a kalmax fit checkpoint, or its leaves
            differ from ``like``'s in number, path, dtype or shape.
    """
    with np.load(path, allow_pickle=False) as data:
        if "description" not in data.files:
            raise ValueError(f"{path} is not a kalmax fit checkpoint (no 'description' entry).")
        description = json.loads(str(data["description"]))
        if description.get("format") != FORMAT or description.get("version") != VERSION:
            raise ValueError(
                f"{path} is not a kalmax fit checkpoint of version {VERSION} "
                f"(format {description.get('format')!r}, version {description.get('version')!r})."
            )
        stored = description["leaves"]
        expected = [(g, p, np.asarray(x)) for g, p, x in _leaves(like)]
        if len(stored) != len(expected):
            raise ValueError(
                f"checkpoint {path} does not match this fit: it holds {len(stored)} arrays, "
                f"this fit's parameters and optimiser state have {len(expected)} "
                "(another model or optimiser?)."
            )
        arrays = []
        for i, (entry, (group, p, x)) in enumerate(zip(stored, expected)):
            here = {"group": group, "path": p, "dtype": x.dtype.str, "shape": list(x.shape)}
            if entry != here:
                raise ValueError(
                    f"checkpoint {path} does not match this fit at array {i}: stored "
                    f"{entry['group']}{entry['path']} {entry['dtype']} {tuple(entry['shape'])}, "
                    f"expected {group}{p} {x.dtype.str} {tuple(x.shape)} (another model or optimiser?)."
                )
            arrays.append(data[f"leaf_{i:05d}"])
    trees = {}
    start = 0
    for group in _GROUPS:
        treedef = jax.tree_util.tree_structure(getattr(like, group))
        trees[group] = jax.tree_util.tree_unflatten(treedef, arrays[start:start + treedef.num_leaves])
        start += treedef.num_leaves
    best = description["best_value"]
    return FitState(
        step=int(description["step"]),
        params=trees["params"],
        opt_state=trees["opt_state"],
        best_params=trees["best_params"],
        last_finite_params=trees["last_finite_params"],
        history={k: list(v) for k, v in description["history"].items()},
        best_value=math.inf if best is None else float(best),
        best_step=int(description["best_step"]),
        since_best=int(description["since_best"]),
    )


def load_if_present(path: Optional[str], like: FitState) -> Optional[FitState]:
    """:func:`load_fit_state` when ``path`` names an existing file, else None."""
    if path is None or not os.path.exists(path):
        return None
    return load_fit_state(path, like)
