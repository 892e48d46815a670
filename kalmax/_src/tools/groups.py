r"""Many series in one table: ``kalmax fit --group COL`` (one row per group and time).

The table is split by the values of the group column; each group is a series
of its own (its times strictly increasing, relative to its own first time).
The groups are padded to a common length and fitted in one vmapped program,
either

* ``separate`` (the default): one set of parameters per group. The loss is
  Σ_g ℓ_g(θ_g), ℓ_g = −log p(y_g | θ_g) / n_g, with θ stacked along a leading
  group axis. The groups' terms share no parameter, so ∂loss/∂θ_g = ∇ℓ_g(θ_g),
  and Adam updates every coordinate from its own gradient history: the run
  is, coordinate for coordinate, the same as fitting each group alone with
  the same steps and step size (only the stopping rule is shared: a
  non-finite loss in one group stops them all). Groups may therefore differ
  (stations in different climates) without one dominating the others.
* ``shared``: one set of parameters for all groups, the likelihood summed
  over groups: loss = Σ_g −log p(y_g | θ) / Σ_g n_g. The groups are
  independent given θ (no state is shared), so this is the exact joint
  likelihood. More data per parameter; right when the groups are replicates.

Padding. A group shorter than the longest gets unobserved rows appended
(``kx.pad_series``), at times continuing its own typical step. Unobserved
rows after the last observation add nothing to the likelihood (their
predictive densities are never evaluated) and do not change the smoothed
states of the real rows (they carry no information), so padding changes no
result; it only lets every group run in one vmapped program. The timestamps
of the groups differ, so inside the vmapped program they are traced values:
the exact discretisation then runs its doubling loop for its fixed bound
(continuous.py), with the same results as for concrete times.
"""

from __future__ import annotations

import math
from typing import Dict, List, NamedTuple, Optional, Sequence, Tuple

import jax
import jax.numpy as jnp
import numpy as np

from ..fitting import fit
from ..likelihood import log_likelihood
from ..smoothing import smooth
from ..splits import pad_series
from .errors import DataError, FitError, UsageError
from .series import Series
from .spec import ModelSpec

GROUP_MODES = ("separate", "shared")
MIN_GROUP_ROWS = 2  # a series needs two rows for a step; the fit needs observations besides


def group_cell_text(cell) -> str:
    """A group cell as text: how it is compared, written back and stored in the model file."""
    if cell is None:
        return ""
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))  # Parquet numbers: 3.0 and "3" name the same station
    return str(cell).strip()


def split_rows(names: Sequence[str], cols: Dict[str, list], column: str, source: str,
               forbidden: Sequence[Tuple[str, str]] = ()) -> List[Tuple[str, List[int]]]:
    """[(group value, row indices)] in order of first appearance.

    ``forbidden``: (option, column) pairs the group column may not be (the
    time column, a measured column). Errors name ``--group``: a column the
    table lacks or that plays another role (:class:`UsageError`), a blank
    group cell (:class:`DataError` naming the data row).
    """
    if column not in cols:
        raise UsageError(f"--group {column!r}: {source} has no such column; its columns are "
                         f"{', '.join(map(repr, names))}.")
    for option, other in forbidden:
        if column == other:
            raise UsageError(f"--group {column!r} is also the {option} column; the group column names the series "
                             "each row belongs to, so it must be a column of its own.")
    order: Dict[str, List[int]] = {}
    for i, cell in enumerate(cols[column]):
        text = group_cell_text(cell)
        if not text:
            raise DataError(f"{source}: data row {i + 1} has no value in the group column {column!r} (--group); "
                            "every row must name its group.")
        order.setdefault(text, []).append(i)
    return list(order.items())


def sub_table(cols: Dict[str, list], rows: Sequence[int]) -> Dict[str, list]:
    """The columns of ``cols`` restricted to ``rows`` (the table of one group)."""
    return {k: [v[i] for i in rows] for k, v in cols.items()}


def check_group_rows(groups, column: str, source: str) -> None:
    """DataError naming the first group with fewer than MIN_GROUP_ROWS rows."""
    for value, rows in groups:
        if len(rows) < MIN_GROUP_ROWS:
            raise DataError(f"{source}: group {column}={value!r} (--group) has {len(rows)} row(s); every group "
                            f"needs at least {MIN_GROUP_ROWS} rows with their own times. Drop that group from the "
                            "table or merge it with another.")


class Batch(NamedTuple):
    """Groups padded to a common length T (see the module docstring)."""

    t: np.ndarray  # (G, T) model times; the padding continues each group's typical step
    y: np.ndarray  # (G, T, p) zeros where not used
    mask: np.ndarray  # (G, T, p) bool: the cells the objective sees (False in the padding)
    inputs: Optional[Dict[str, np.ndarray]]  # column -> (G, T) regression inputs (0 in the padding)
    lengths: Tuple[int, ...]  # the real rows of each group


def pad_groups(series_list: Sequence[Series], masks: Sequence[np.ndarray], length: int = None) -> Batch:
    """The groups as one :class:`Batch` (``masks``: the cells to use, one (T_g, p) per group)."""
    y, mask = pad_series([np.where(m, s.y, np.nan) for s, m in zip(series_list, masks)],
                         [np.asarray(m, bool) for m in masks], length)
    T = y.shape[1]
    t = np.empty((len(series_list), T))
    for g, s in enumerate(series_list):
        n = len(s.t)
        step = float(np.median(np.diff(s.t))) if n > 1 else 1.0
        t[g, :n] = s.t
        t[g, n:] = s.t[-1] + step * np.arange(1, T - n + 1)
    inputs = None
    if series_list[0].inputs:
        inputs = {}
        for c in series_list[0].inputs:
            a = np.zeros((len(series_list), T))
            for g, s in enumerate(series_list):
                a[g, :len(s.t)] = s.inputs[c]
            inputs[c] = a
    return Batch(t=t, y=np.where(mask, np.nan_to_num(y), 0.0), mask=mask, inputs=inputs,
                 lengths=tuple(len(s.t) for s in series_list))


def group_neg_log_likelihood(template: ModelSpec, theta, t, y, mask, inputs):
    """−log p(y | θ) of one (padded) group: the summand of both objectives, vmapped over groups."""
    model = template.state_space(t, theta, inputs=inputs)
    return -log_likelihood(model, y, mask)


def _stack(dicts):
    return {k: np.stack([np.asarray(d[k], np.float64) for d in dicts]) for k in dicts[0]}


def fit_groups(specs: Sequence[ModelSpec], batch: Batch, *, mode: str = "separate", steps: int = 300,
               learning_rate: float = 0.1, fixed=(), progress: bool = True, standard_errors: bool = False):
    """Fit the groups of ``batch`` (their starting models ``specs``); see the module docstring.

    Returns (fitted specs, one per group (all alike for ``shared``), loss
    history, FitResult, standard errors of the log-parameters per group or
    None). The fixed parameters keep each group's starting value
    (``separate``) or the geometric mean of the groups' (``shared``).
    """
    import optax

    from .. import fitting

    if mode not in GROUP_MODES:
        raise ValueError(f"mode must be one of {GROUP_MODES}; got {mode!r}.")
    template = specs[0]
    free = template.free_names(fixed)
    every = _stack([s.to_unconstrained(()) for s in specs])  # (G, ...) per name
    n_obs = batch.mask.reshape(len(specs), -1).sum(axis=1).astype(np.float64)
    if not np.all(n_obs > 0):
        raise FitError("a group has no training observation.")
    data = (jnp.asarray(batch.t), jnp.asarray(batch.y), jnp.asarray(batch.mask),
            None if batch.inputs is None else {k: jnp.asarray(v) for k, v in batch.inputs.items()})
    per_group = jax.vmap(group_neg_log_likelihood, in_axes=(None, 0, 0, 0, 0, 0))
    if mode == "separate":
        held = {k: jnp.asarray(v) for k, v in every.items() if k not in free}
        theta0 = {k: jnp.asarray(every[k]) for k in free}
        weights = jnp.asarray(1.0 / n_obs)

        def loss(theta, t, y, mask, inputs):
            return jnp.sum(per_group(template, {**theta, **held}, t, y, mask, inputs) * weights)
    else:
        start = {k: v.mean(axis=0) for k, v in every.items()}  # mean of logs: the geometric mean
        held = {k: jnp.asarray(v) for k, v in start.items() if k not in free}
        theta0 = {k: jnp.asarray(start[k]) for k in free}
        total = float(n_obs.sum())
        shared = jax.vmap(group_neg_log_likelihood, in_axes=(None, None, 0, 0, 0, 0))

        def loss(theta, t, y, mask, inputs):
            return jnp.sum(shared(template, {**theta, **held}, t, y, mask, inputs)) / total
    if not theta0:
        raise UsageError("--fix leaves no parameter to fit.")
    result = fit(lambda th, *d: loss(th, *d), theta0, optax.adam(learning_rate), steps=steps,
                 progress=progress, args=data)
    history = [float(h) for h in np.asarray(result.history["loss"])]
    if not math.isfinite(history[0]):
        raise FitError("the likelihood of the starting model is not finite in at least one group; check the "
                       "--measure mapping and the groups' data, or set starting values with --set.")
    theta = {k: np.asarray(v) for k, v in result.params.items()}
    fitted = []
    for g, s in enumerate(specs):
        mine = {k: (v[g] if mode == "separate" else v) for k, v in theta.items()}
        fixed_values = {k: (np.asarray(held[k])[g] if mode == "separate" else np.asarray(held[k])) for k in held}
        fitted.append(s.with_unconstrained({**mine, **fixed_values}))
    ses = None
    if standard_errors:
        ses = _group_standard_errors(template, theta, held, data, mode, fitting)
    return fitted, history, result, ses


def _group_standard_errors(template, theta, held, data, mode, fitting):
    """Standard errors of the free log-parameters: per group (separate) or of the shared ones."""
    t, y, mask, inputs = data
    if mode == "shared":
        nll = lambda th: jnp.sum(jax.vmap(group_neg_log_likelihood, in_axes=(None, None, 0, 0, 0, 0))(  # noqa: E731
            template, {**th, **held}, t, y, mask, inputs))
        se = fitting.standard_errors(nll, {k: jnp.asarray(v) for k, v in theta.items()})
        return [{k: np.asarray(v) for k, v in se.items()}] * t.shape[0]

    def one(th, hd, t, y, mask, inputs):
        return fitting.standard_errors(lambda p: group_neg_log_likelihood(template, {**p, **hd}, t, y, mask, inputs),
                                       th)
    se = jax.vmap(one)({k: jnp.asarray(v) for k, v in theta.items()}, held, t, y, mask, inputs)
    return [{k: np.asarray(v)[g] for k, v in se.items()} for g in range(t.shape[0])]


def smooth_groups(specs: Sequence[ModelSpec], series_list: Sequence[Series]):
    """Smoothing (means, predictive sds, states) of every group, in one vmapped program.

    The same quantities as ``apply_workflow.smooth_series`` per group (the
    padding changes none of them, see the module docstring), cut back to
    each group's rows.
    """
    from .apply_workflow import Smoothing

    batch = pad_groups(series_list, [s.mask for s in series_list])
    theta = _stack([s.to_unconstrained(()) for s in specs])

    def one(th, t, y, mask, inputs):
        model = specs[0].state_space(t, th, inputs=inputs)
        out = smooth(model, y, mask, covariances=True)
        var = jnp.diagonal(out.measurement_cov, axis1=-2, axis2=-1) + jnp.diagonal(model.R)
        return out.measurements, var, out.states

    inputs = None if batch.inputs is None else {k: jnp.asarray(v) for k, v in batch.inputs.items()}
    mean, var, states = jax.jit(jax.vmap(one))({k: jnp.asarray(v) for k, v in theta.items()},
                                               jnp.asarray(batch.t), jnp.asarray(batch.y),
                                               jnp.asarray(batch.mask), inputs)
    mean, var, states = np.asarray(mean), np.asarray(var), np.asarray(states)
    out = []
    for g, n in enumerate(batch.lengths):
        m, v = mean[g, :n], var[g, :n]
        if not (np.all(np.isfinite(m)) and np.all(np.isfinite(v))):
            raise FitError(f"the smoother could not determine the states of group {g + 1} (too few observations "
                           "for this model, or a numerically singular model).")
        out.append(Smoothing(mean=m, sd=np.sqrt(np.maximum(v, 0.0)), states=states[g, :n]))
    return out
