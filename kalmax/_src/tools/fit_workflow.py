"""Fit the free parameters of a :class:`ModelSpec` to a series (the work of ``kalmax fit``)."""

from __future__ import annotations

import math
from typing import List, NamedTuple

import jax.numpy as jnp
import numpy as np

from ..fitting import fit
from .errors import FitError
from .objectives import calibrate_scale, make_loss
from .series import Series
from .spec import ModelSpec


class FitOutcome(NamedTuple):
    spec: ModelSpec
    history: List[float]  # loss after k updates, k = 0..steps_run (entry 0: the start)
    best_step: int  # index into history of the returned parameters
    steps_run: int
    stop_reason: str = "steps"  # as kx.fit reports it


OPTIMIZERS = ("adam", "lbfgs")

# lbfgs stops once the loss has improved by less than this, relative to its
# size, in this many updates in a row (common practice for quasi-Newton fits
# of a likelihood; the loss is per observation, so ~1e-10 relative is far below
# what moves a parameter by a visible fraction of its standard error, and two
# updates in a row guard against one short line-search step).
CONVERGED_RTOL = 1e-10
CONVERGED_UPDATES = 2


class _Converged:
    """A ``kx.fit`` callback: the stop reason "converged" once the loss has stalled (see CONVERGED_RTOL)."""

    def __init__(self):
        self.previous, self.stalled = math.inf, 0

    def __call__(self, step):
        gain = self.previous - step.loss
        self.stalled = self.stalled + 1 if gain <= CONVERGED_RTOL * max(1.0, abs(step.loss)) else 0
        self.previous = min(self.previous, step.loss)
        return "converged" if self.stalled >= CONVERGED_UPDATES else None


def fit_spec(spec: ModelSpec, series: Series, train_mask, *, objective: str = "likelihood",
             steps: int = 300, learning_rate: float = 0.05, fixed=(), folds: int = 4, seed: int = 0,
             progress: bool = True, block_length=None, optimizer: str = "adam") -> FitOutcome:
    """Fit the free parameters of ``spec`` (in log space) to the training entries.

    ``optimizer``: "adam" takes ``steps`` first-order steps of size
    ``learning_rate``; "lbfgs" takes quasi-Newton steps with a line search
    (``optax.lbfgs``) and stops early once the loss stalls (stop reason
    "converged"), at most ``steps`` of them: on a smooth likelihood with few
    parameters it needs about ten, each a few evaluations.

    ``block_length``: for objective "holdout", deal the cross-validation folds
    as blocks of that many rows (None: single cells)."""
    import optax

    if optimizer not in OPTIMIZERS:
        raise ValueError(f"optimizer must be one of {OPTIMIZERS}; got {optimizer!r}.")
    theta0 = {k: jnp.asarray(v) for k, v in spec.to_unconstrained(fixed).items()}
    if not theta0:  # everything fixed: nothing to fit
        return FitOutcome(spec, [], 0, 0)
    loss, data = make_loss(spec, series, train_mask, objective, fixed=fixed, folds=folds, seed=seed,
                           block_length=block_length)
    opt, stop = (optax.lbfgs(), _Converged()) if optimizer == "lbfgs" else (optax.adam(learning_rate), None)
    result = fit(loss, theta0, opt, steps=steps, progress=progress, args=data, callback=stop)
    first = float(result.history["loss"][0])
    if not math.isfinite(first):
        raise FitError(f"the {objective} loss of the starting model is not finite. Either some state cannot be "
                       "determined from the measured columns (e.g. an axis that no column measures), or the "
                       "starting values are extreme; check the --measure mapping, or set starting values "
                       "with --set.")
    theta = {k: np.asarray(v) for k, v in result.params.items()}
    fitted = spec.with_unconstrained(theta)
    if objective == "holdout":
        fitted = calibrate_scale(fitted, series, train_mask, folds=folds, seed=seed,
                                 block_length=block_length)
    history = [float(h) for h in np.asarray(result.history["loss"])]
    return FitOutcome(fitted, history, int(result.best_step), int(result.steps_run), str(result.stop_reason))


def log_standard_errors(spec: ModelSpec, series: Series, train_mask, *, fixed=()):
    """Standard errors of the free log-parameters of ``spec`` (a regression coefficient: of itself) from the
    observed information of the training cells' likelihood (``kx.standard_errors``, by central differences
    of the exact gradient); None when it is not
    positive definite (the estimate is not a strict local maximum: too few steps, a parameter not identified).
    """
    from ..fitting import standard_errors

    theta = {k: jnp.asarray(v) for k, v in spec.to_unconstrained(fixed).items()}
    if not theta:
        return None
    loss, data = make_loss(spec, series, train_mask, "likelihood", fixed=fixed)
    n_obs = float(np.sum(train_mask))
    # Central differences of the exact gradient (2k compiled-kernel gradients): forward-over-reverse
    # runs the portable tangent of the factorisation per direction, which took ~50 s at 10⁶ rows
    # against seconds for this; relative accuracy ~eps^(2/3), far beyond what a standard error needs.
    se = standard_errors(lambda th: loss(th, *data) * n_obs, theta, method="finite-difference")
    se = {k: np.asarray(v) for k, v in se.items()}
    return se if all(np.all(np.isfinite(v)) for v in se.values()) else None
