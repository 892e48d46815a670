r"""``fit``: a small training loop over any Optax optimiser, and standard errors.

The loop is deliberately plain so that it is easy to copy and change::

    opt_state = optimizer.init(params)
    for step in range(steps):
        loss, grads = jax.value_and_grad(loss_fn)(params)
        updates, opt_state = optimizer.update(grads, opt_state, params)
        params = optax.apply_updates(params, updates)

``fit`` adds a ``jit``-compiled step, a history, optional early stopping on a
validation function, a progress display, checkpoints to resume from and, on
request, standard errors.

**Several processes** (``jax.distributed``). Every process runs the same
loop. The loss of :func:`kalmax.data_parallel` carries a batch spread over
all processes' devices; the step receives that batch as an *argument* (JAX
refuses to compile a function that closes over arrays of other processes), so
its value and gradient are global sums that XLA reduces across processes and
hands back fully replicated. Every process therefore reads the same loss,
appends the same history and takes the same stopping decision, without any
further communication; only process 0 shows progress and writes checkpoints.
A ``callback`` must decide the same way on every process (a stop on one
process alone would leave the others waiting in the next collective).

**Determinism of a resumed run.** The state saved after k updates is
exactly what the loop holds before evaluating step k (see
:class:`kalmax.FitState`); the resumed run compiles the same step and feeds it
the same numbers, so on one machine it repeats the uninterrupted run's
arithmetic exactly.
"""

from __future__ import annotations

import math
import os
import sys
import time
from typing import Any, Callable, Dict, NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np
import optax
from jax.flatten_util import ravel_pytree

from .checkpoint import FitState, load_if_present, save_fit_state
from .sharding import DataParallelLoss, replicate


class FitResult(NamedTuple):
    """Result of :func:`fit`.

    Attributes:
        params: the best parameters by validation loss when ``validation_fn``
            was given, else the last parameters (with a finite loss).
        history: dict of NumPy arrays indexed by the number of updates made
            (entry k: after k updates; entry 0: the initial params):
            ``"loss"`` and, with ``validation_fn``, ``"validation"``.
        best_step: number of updates behind ``params``.
        steps_run: number of updates made (≤ ``steps``).
        stop_reason: ``"steps"``, ``"patience"``, ``"callback"``, ``"non-finite"``, or the string a callback returned.
        opt_state: optimiser state after the last update (to resume).
        standard_errors: pytree like ``params`` (see :func:`standard_errors`)
            when ``neg_log_lik_fn`` was given, else None.
    """

    params: Any
    history: Dict[str, np.ndarray]
    best_step: int
    steps_run: int
    stop_reason: str = "steps"
    opt_state: Any = None
    standard_errors: Any = None


class FitStep(NamedTuple):
    """What the ``callback`` of :func:`fit` receives after each evaluation."""

    step: int  # updates made so far
    params: Any
    loss: float
    validation: Optional[float]


class _Progress:
    """tqdm, else rich, else a plain line every ~10 % of the run (to stderr)."""

    def __init__(self, total: int, enabled: bool):
        self.total, self.enabled, self.bar, self.kind = total, enabled, None, "plain"
        self.every = max(1, total // 10)
        self.start = time.perf_counter()
        if not enabled:
            return
        try:
            from tqdm.auto import tqdm

            self.bar, self.kind = tqdm(total=total, desc="fit", leave=True), "tqdm"
            return
        except ImportError:
            pass
        try:
            from rich.progress import Progress

            self.bar, self.kind = Progress(transient=False), "rich"
            self.bar.start()
            self.task = self.bar.add_task("fit", total=total)
        except ImportError:
            pass

    def update(self, step: int, loss: float, validation: Optional[float]):
        if not self.enabled:
            return
        text = f"loss {loss:.6g}" + ("" if validation is None else f", validation {validation:.6g}")
        self.last = step
        if self.kind == "tqdm":
            self.bar.n = step
            self.bar.set_postfix_str(text, refresh=True)
        elif self.kind == "rich":
            self.bar.update(self.task, completed=step, description=f"fit: {text}")
        elif step % self.every == 0 or step == self.total:
            elapsed = time.perf_counter() - self.start
            if step == 0:
                self.first = elapsed  # the first step includes compilation: leave it out of the rate
            left = ""
            if 0 < step < self.total:
                rate = (elapsed - getattr(self, "first", 0.0)) / step
                left = f", about {rate * (self.total - step):.0f} s left"
            print(f"fit step {step}/{self.total}  {text}  ({elapsed:.1f} s{left})", file=sys.stderr, flush=True)

    def close(self, reason: str):
        if not self.enabled:
            return
        if self.kind == "tqdm":
            self.bar.close()
        elif self.kind == "rich":
            self.bar.stop()
        if reason != "steps":
            elapsed = time.perf_counter() - self.start
            print(f"fit stopped: {reason} after {getattr(self, 'last', 0)} steps ({elapsed:.1f} s)",
                  file=sys.stderr, flush=True)


def _strongly_typed(leaf):
    """A weakly typed array as a strongly typed one of the same dtype; anything else unchanged."""
    return jnp.asarray(leaf, leaf.dtype) if getattr(leaf, "weak_type", False) else leaf


def fit(
    loss_fn: Callable,
    params,
    optimizer: optax.GradientTransformation,
    *,
    steps: int = 500,
    validation_fn: Optional[Callable] = None,
    patience: Optional[int] = None,
    progress: bool = True,
    jit: bool = True,
    callback: Optional[Callable] = None,
    neg_log_lik_fn: Optional[Callable] = None,
    args: tuple = (),
    checkpoint: Optional[str] = None,
    checkpoint_every: int = 100,
) -> FitResult:
    r"""Minimise ``loss_fn(params)`` with an Optax optimiser.

    Each step evaluates the loss and its gradient at the current params,
    asks the optimiser for an update and applies it. Extra arguments that
    some Optax optimisers need (``value``, ``grad``, ``value_fn`` for the
    line search of ``optax.lbfgs``) are passed along automatically.

    Args:
        loss_fn: params → scalar loss (held-out error, negative
            log-likelihood, or anything differentiable).
        params: initial parameters, any pytree of float arrays (e.g.
            ``Parameterization.init()`` or a :class:`StateSpace`).
        optimizer: any ``optax.GradientTransformation``, including chains
            with the proximal steps of this package.
        steps: maximum number of updates.
        validation_fn: optional params → scalar evaluated after every update
            (e.g. the error on a held-out split). ``FitResult.params`` is then
            the best params by this value.
        patience: stop after this many updates without a new best validation
            value (or, without ``validation_fn``, without a new best loss).
        progress: show progress (tqdm or rich when installed, else a short
            line on stderr every ~10 % of the steps).
        jit: compile the step (and the validation) with ``jax.jit``.
        callback: optional function called with a :class:`FitStep` after each
            evaluation; returning True stops the fit (stop reason
            "callback"), returning a non-empty string stops it with that
            string as the stop reason.
        neg_log_lik_fn: optional params → negative log-likelihood; when given,
            ``FitResult.standard_errors`` holds
            ``standard_errors(neg_log_lik_fn, result.params)``.
        args: extra arguments passed to ``loss_fn`` (and ``validation_fn``)
            after the params: ``loss_fn(params, *args)``. Pass the data this
            way rather than closing over it: under ``jit`` closed-over arrays
            become constants of the compiled program, which XLA may spend
            seconds folding (and a new array means a new compilation), while
            arguments are passed at run time. A :class:`kalmax.DataParallelLoss`
            (from :func:`kalmax.data_parallel`) as ``loss_fn`` or
            ``validation_fn`` has its batch passed the same way.
        checkpoint: optional file name (``.npz``). Every ``checkpoint_every``
            updates the state (params, Optax state, step, history,
            early-stopping counters; :class:`kalmax.FitState`) is written
            there atomically by :func:`kalmax.save_fit_state`. When the file
            already exists the fit *resumes* from it: ``params`` and
            ``optimizer`` then only supply the structure, which must match
            the file (else ValueError). Delete the file to start afresh.
        checkpoint_every: updates between checkpoints (default 100).

    Returns:
        :class:`FitResult`. A non-finite loss stops the fit and returns the
        last params whose loss was finite (``stop_reason="non-finite"``).

    Example:
        >>> import optax
        >>> rng = np.random.default_rng(0)
        >>> y = jnp.asarray(np.cumsum(rng.normal(size=(40, 1)), axis=0) + rng.normal(size=(40, 1)))
        >>> mask = jnp.ones(y.shape, bool)
        >>> hold = kx.holdout_entries(mask, 0.2, seed=0)
        >>> nominal = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> spec = kx.Parameterization(nominal, Q=kx.DiagonalCov(), R=kx.DiagonalCov())
        >>> loss = lambda p, y, mask, hold: kx.prediction_error(spec.model(p), y, mask, hold)
        >>> result = kx.fit(loss, spec.init(), optax.adam(0.05), steps=50, progress=False,
        ...                 args=(y, mask, hold))
        >>> result.stop_reason, result.steps_run
        ('steps', 50)
        >>> fitted = spec.model(result.params)
    """
    if int(steps) < 0:
        raise ValueError(f"steps must be >= 0; got {steps}.")
    if patience is not None and int(patience) < 1:
        raise ValueError(f"patience must be a positive integer or None; got {patience}.")
    steps = int(steps)
    if checkpoint is not None and int(checkpoint_every) < 1:
        raise ValueError(f"checkpoint_every must be a positive integer; got {checkpoint_every}.")
    checkpoint = None if checkpoint is None else os.fspath(checkpoint)
    args = tuple(args)
    opt = optax.with_extra_args_support(optimizer)
    # A data-parallel loss brings its (sharded) batch: it travels as the first
    # of the data arguments, never as a constant closed over by the step.
    loss_call, loss_data = _as_call(loss_fn)
    val_call, val_data = _as_call(validation_fn)
    value_and_grad = jax.value_and_grad(loss_call)

    def step_fn(params, opt_state, loss_data, args):
        loss, grads = value_and_grad(params, *loss_data, *args)
        updates, opt_state = opt.update(grads, opt_state, params, value=loss, grad=grads,
                                        value_fn=lambda p: loss_call(p, *loss_data, *args))
        return optax.apply_updates(params, updates), opt_state, loss

    def loss_only(params, loss_data, args):
        return loss_call(params, *loss_data, *args)

    def val_fn(params, val_data, args):
        return val_call(params, *val_data, *args)

    if jit:
        step_fn, loss_only, val_fn = jax.jit(step_fn), jax.jit(loss_only), jax.jit(val_fn)
    if validation_fn is None:
        val_fn = None

    # Some optimisers start scalars of their state weakly typed (optax.lbfgs:
    # its counter and two values) and the step returns them strongly typed, so
    # the second call of the compiled step would see new argument types and
    # compile it again. Strong from the start: one compilation (the step's own
    # arithmetic on them is the same from the second call on either way).
    opt_state = jax.tree_util.tree_map(_strongly_typed, opt.init(params))
    losses, vals = [], []
    best_value, best_step, best_params, since_best = math.inf, 0, params, 0
    k = 0
    empty_history = {"loss": []} if validation_fn is None else {"loss": [], "validation": []}
    fresh = FitState(0, params, opt_state, params, params, empty_history)
    resumed = load_if_present(checkpoint, fresh)
    if resumed is not None:
        if set(resumed.history) != set(fresh.history):
            raise ValueError(
                f"checkpoint {checkpoint} was written by a fit "
                + ("with" if "validation" in resumed.history else "without")
                + " validation_fn; this one is "
                + ("with" if validation_fn is not None else "without") + " it."
            )
        if resumed.step > steps:
            raise ValueError(f"checkpoint {checkpoint} is at step {resumed.step}, beyond steps={steps}.")
        k, params, opt_state = resumed.step, resumed.params, resumed.opt_state
        losses, vals = list(resumed.history["loss"]), list(resumed.history.get("validation", []))
        best_value, best_step, best_params, since_best = (resumed.best_value, resumed.best_step,
                                                          resumed.best_params, resumed.since_best)
        last_finite = resumed.last_finite_params
    else:
        last_finite = params
    mesh = _mesh_of((loss_fn, validation_fn, args))
    if mesh is not None:
        # Start from the placement the step's outputs will have (replicated on
        # the mesh): otherwise the second call sees new input shardings and
        # compiles the step a second time.
        params, opt_state = replicate((params, opt_state), mesh)
    bar = _Progress(steps, progress and jax.process_index() == 0)
    reason = "steps"
    current = params
    while True:
        # One evaluation per params: the loss comes from the step itself.
        # After the last update only the loss is needed; compiled, the step
        # (its update discarded) is still cheaper than compiling a second
        # program for the loss alone.
        if k < steps or jit:
            new_params, new_state, loss = step_fn(current, opt_state, loss_data, args)
        else:
            loss = loss_only(current, loss_data, args)
        loss = float(loss)
        val = None if val_fn is None else float(val_fn(current, val_data, args))
        losses.append(loss)
        if val is not None:
            vals.append(val)
        if not (math.isfinite(loss) and (val is None or math.isfinite(val))):
            reason = "non-finite"
            break
        last_finite = current
        monitored = loss if val is None else val
        if monitored < best_value:
            best_value, best_step, best_params, since_best = monitored, k, current, 0
        else:
            since_best += 1
        bar.update(k, loss, val)
        said = None if callback is None else callback(FitStep(k, current, loss, val))
        if said:
            reason = said if isinstance(said, str) else "callback"
            break
        if patience is not None and since_best >= patience:
            reason = "patience"
            break
        if k == steps:
            break
        current, opt_state = new_params, new_state
        k += 1
        if checkpoint is not None and k % int(checkpoint_every) == 0:
            history = {"loss": losses} if validation_fn is None else {"loss": losses, "validation": vals}
            save_fit_state(checkpoint, FitState(k, current, opt_state, best_params, last_finite, history,
                                                best_value, best_step, since_best))
    bar.close(reason)

    if validation_fn is None:
        final, final_step = last_finite, (k if reason != "non-finite" else k - 1)
    else:
        final, final_step = best_params, best_step
    history = {"loss": np.asarray(losses)}
    if validation_fn is not None:
        history["validation"] = np.asarray(vals)
    ses = None if neg_log_lik_fn is None else standard_errors(neg_log_lik_fn, final)
    return FitResult(
        params=final,
        history=history,
        best_step=int(max(final_step, 0)),
        steps_run=k,
        stop_reason=reason,
        opt_state=opt_state,
        standard_errors=ses,
    )


def _as_call(fn: Optional[Callable]):
    """(callable(params, *data, *args), data): a data-parallel loss's batch made an argument."""
    if isinstance(fn, DataParallelLoss):
        return fn.fn, (fn.batch,)
    return fn, ()


def _mesh_of(things):
    """The device mesh of the first data-parallel loss or sharded array among ``things``, else None."""
    for leaf in jax.tree_util.tree_leaves(things, is_leaf=lambda x: isinstance(x, DataParallelLoss)):
        if isinstance(leaf, DataParallelLoss):
            return leaf.mesh
        if isinstance(leaf, jax.Array) and isinstance(leaf.sharding, jax.sharding.NamedSharding):
            return leaf.sharding.mesh
    return None


def _hessian(f_flat, x, method: str, eps: Optional[float]):
    if method == "autodiff":
        return jax.jit(jax.hessian(f_flat))(x)
    if method == "finite-difference":
        # Central differences of the exact gradient, one column per parameter.
        g = jax.jit(jax.grad(f_flat))
        h = eps if eps is not None else float(jnp.finfo(x.dtype).eps) ** (1 / 3)
        steps = h * jnp.maximum(1.0, jnp.abs(x))
        cols = [(g(x + s * e) - g(x - s * e)) / (2 * s) for s, e in zip(steps, jnp.eye(x.size, dtype=x.dtype))]
        H = jnp.stack(cols, axis=1)
        return 0.5 * (H + H.T)
    raise ValueError(f"method must be 'autodiff' or 'finite-difference'; got {method!r}.")


def parameter_covariance(neg_log_lik_fn: Callable, params, *, method: str = "autodiff", eps=None):
    r"""Inverse observed information at ``params``, as a flat matrix.

    I(θ̂) = ∇²(−log L)(θ̂) over the flattened params (``ravel_pytree`` order);
    returns (cov = I⁻¹ of shape (k, k), unravel) where ``unravel`` maps a flat
    vector back to the params pytree. Entries are NaN when I is not positive
    definite (``params`` is not a strict local minimum of the negative
    log-likelihood, or the model is not identified in these coordinates).

    ``method="autodiff"`` differentiates the exact gradient by forward-over-
    reverse AD (``jax.hessian``); ``"finite-difference"`` takes central
    differences of the exact gradient (step ``eps``·max(1, |θ|), default
    eps^(1/3) of the dtype), for losses that forward-mode AD cannot trace.
    """
    flat, unravel = ravel_pytree(params)
    f_flat = lambda x: neg_log_lik_fn(unravel(x))  # noqa: E731
    H = _hessian(f_flat, flat, method, eps)
    H = 0.5 * (H + H.T)
    evals, evecs = jnp.linalg.eigh(H)
    pd = jnp.min(evals) > 0
    cov = (evecs / evals) @ evecs.T
    return jnp.where(pd, cov, jnp.nan), unravel


def standard_errors(neg_log_lik_fn: Callable, params, *, of: Optional[Callable] = None, method: str = "autodiff",
                    eps=None):
    r"""Asymptotic standard errors from the observed information.

    With θ̂ a (local) maximum-likelihood estimate and I(θ̂) the Hessian of the
    negative log-likelihood there, the standard error of θ̂_i is
    sqrt([I(θ̂)⁻¹]_ii). With ``of`` (a function of the params, e.g.
    ``lambda p: spec.model(p).Q``) the standard errors of the derived
    quantity g(θ̂) come from the delta method: sqrt(diag(J I⁻¹ Jᵀ)), J = ∂g/∂θ.

    Args:
        neg_log_lik_fn: params → −log L (e.g. ``lambda p: -kx.log_likelihood(spec.model(p), y)``).
        params: the estimate (any pytree of float arrays).
        of: optional params → pytree of quantities of interest.
        method: ``"autodiff"`` or ``"finite-difference"`` (see
            :func:`parameter_covariance`).

    Returns:
        pytree like ``params`` (or like ``of(params)``) of standard errors;
        NaN everywhere when the information is not positive definite.

    Example:
        >>> rng = np.random.default_rng(0)
        >>> y = np.cumsum(rng.normal(size=(60, 1)), axis=0) + rng.normal(size=(60, 1))
        >>> nominal = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> spec = kx.Parameterization(nominal, Q=kx.DiagonalCov(), R=kx.DiagonalCov())
        >>> mle, _ = kx.em(nominal, y, iterations=50, fixed=("A", "C"))
        >>> fitted = spec.unconstrained(mle)
        >>> nll = lambda p: -kx.log_likelihood(spec.model(p), y)
        >>> se_Q = kx.standard_errors(nll, fitted, of=lambda p: spec.model(p).Q)
        >>> print(mle.Q.round(3), se_Q.round(3))
        [[1.367]] [[0.524]]
    """
    cov, unravel = parameter_covariance(neg_log_lik_fn, params, method=method, eps=eps)
    if of is None:
        return unravel(jnp.sqrt(jnp.diagonal(cov)))
    flat, _ = ravel_pytree(params)
    out, unravel_out = ravel_pytree(of(params))
    J = jax.jacrev(lambda x: ravel_pytree(of(unravel(x)))[0])(flat)
    var = jnp.einsum("ij,jk,ik->i", J, cov, J)
    return unravel_out(jnp.sqrt(var))
