"""Model settings written as text (command-line items): measurement maps and starting values.

``COL=STATE`` says which state a measurement column measures; ``NAME=VALUE``
sets a starting value. Both are checked here, against the model kinds of
:mod:`.spec`, and fail with :class:`UsageError` naming the item.
"""

from __future__ import annotations

import math
from typing import Optional, Sequence

import numpy as np

from .errors import UsageError
from .spec import KINDS, ModelSpec


def parse_measures(items: Sequence[str], kind_name: str, dims: Optional[int]):
    """(columns, state names, dims) from ``COL`` / ``COL=STATE`` items.

    A plain ``COL`` measures the next position/level state (the k-th plain
    column the k-th axis); ``dims`` defaults to the number of plain columns.
    Raises :class:`UsageError` naming the item.
    """
    cols, states = [], []
    for item in items:
        col, sep, state = item.partition("=")
        col, state = col.strip(), state.strip()
        if not col or (sep and not state):
            raise UsageError(f"--measure {item!r}: write COL or COL=STATE.")
        cols.append(col)
        states.append(state or None)
    kind = KINDS[kind_name]
    if kind.fixed_dims is not None:
        if dims not in (None, kind.fixed_dims):
            raise UsageError(f"--dims does not apply to model kind {kind_name!r} (it has {kind.fixed_dims} axis).")
        dims = kind.fixed_dims
    elif dims is None:
        dims = max(1, sum(s is None for s in states))
    if dims < 1:
        raise UsageError(f"--dims must be a positive integer; got {dims}.")
    names = kind.state_names(dims)
    firsts = [names[k] for k in range(dims)] if kind.fixed_dims is None else [names[0]] * len(cols)
    k = 0
    for i, s in enumerate(states):
        if s is None:
            if k >= len(firsts):
                raise UsageError(f"--measure {cols[i]}: more plain columns than the {dims} position/level states; "
                                 "name the state with COL=STATE or raise --dims.")
            states[i] = firsts[k]
            k += 1 if kind.fixed_dims is None else 0
        elif s not in names:
            raise UsageError(f"--measure {cols[i]}={s}: model kind {kind_name!r} with dims={dims} has states "
                             f"{', '.join(names)}.")
    return cols, states, dims


def apply_settings(spec: ModelSpec, sets: Sequence[str]) -> ModelSpec:
    """``spec`` with starting values from ``NAME=VALUE`` items.

    ``q=0.1`` (every axis) or ``q=0.1,0.2`` (per axis), ``noise=4`` (every
    column), ``noise.COL=4`` (one column); a composed model's parameters by
    their full names (``daily.q=0.01``, ``heat.beta=0.5,-0.2``). Values are
    variances or rates in natural units, finite and > 0 (a regression
    coefficient may have any sign). Raises :class:`UsageError` naming the item.
    """
    params = dict(spec.params)
    noise = list(spec.noise)
    for item in sets:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep:
            raise UsageError(f"--set {item!r}: write NAME=VALUE.")
        try:
            values = [float(v) for v in value.split(",")]
        except ValueError:
            raise UsageError(f"--set {item!r}: {value!r} is not a number or a comma-separated list.") from None
        if name not in params and name != "noise" and not name.startswith("noise."):
            raise UsageError(f"--set {name}: unknown parameter; this model has "
                             f"{', '.join(list(params) + ['noise', 'noise.COL'])}.")
        signed = name in params and not spec.is_positive(name)  # a regression coefficient
        if not all(math.isfinite(v) and (v > 0 or signed) for v in values):
            raise UsageError(f"--set {item!r}: values must be finite" + ("." if signed else " and > 0."))
        if name == "noise":
            if len(values) == 1:
                noise = values * len(noise)
            elif len(values) == len(noise):
                noise = values
            else:
                raise UsageError(f"--set noise: give 1 value or {len(noise)} (one per column).")
        elif name.startswith("noise."):
            col = name[len("noise."):]
            if col not in spec.columns or len(values) != 1:
                raise UsageError(f"--set {item!r}: no measured column {col!r} (or more than one value).")
            noise[spec.columns.index(col)] = values[0]
        else:  # a process parameter (unknown names were refused above)
            shape = np.shape(params[name])
            if shape == ():
                if len(values) != 1:
                    raise UsageError(f"--set {name}: takes one value.")
                params[name] = values[0]
            else:
                if len(values) == 1:
                    values = values * shape[0]
                if len(values) != shape[0]:
                    each = "one per input column" if spec.is_composed else "one per axis"
                    raise UsageError(f"--set {name}: give 1 value or {shape[0]} ({each}).")
                params[name] = values
    return spec.replace(params=params, noise=tuple(noise))
