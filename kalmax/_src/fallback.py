r"""Per-trajectory fallback: a fast route's answer, or a slow route's where the fast one failed.

``method="auto"`` solves with the fast backend of the platform (the compiled
kernel on CPU) and, for a trajectory whose answer came back non-finite
although its problem is finite, takes the covariance-form filter's answer
instead (``backends/covariance_form.py``: it never forms Q⁻¹, so it handles
the models beyond the normal equations, and singular Q exactly). This module
is that choice, written once for the means, the covariance band and the
log-likelihood, with their derivatives.

What must hold.

1. No cost when nothing fails. ``lax.cond`` on an unbatched predicate runs
   one branch; under ``vmap`` a batched predicate turns it into a select that
   runs both (the covariance form costs 17–83× the kernel). So the predicate
   of the cond is not "this trajectory failed" but "some trajectory of the
   batch failed": :func:`batch_any` is the identity on one trajectory, and its
   batching rule (``jax.custom_batching.custom_vmap``) reduces the flags over
   the batch axis and returns an *unbatched* flag. Under ``vmap`` the cond
   then stays a cond: when nothing failed only the fast answer is computed;
   when something did, the slow route runs on the whole batch and each
   trajectory picks its own answer (``jnp.where``). The rule calls
   :func:`batch_any` again on its result, so nested ``vmap`` reduces over
   every batch axis.

2. Derivatives of the route that was taken. ``custom_vmap`` has a JVP rule
   but no transpose (reverse mode fails through it), so it is applied to the
   boolean flags only: their tangents are zero, and JAX passes a primitive
   whose tangents are all zero straight through, in every mode and order.
   Everything else is ordinary JAX (cond, where), inside a ``custom_jvp``
   whose rule linearises the fast route (``jax.linearize``: its own
   derivative rule, one kernel pass for the likelihood's value and
   gradient), reads the failure flags from its primal output, and only then
   forms the tangent. Reverse mode is the transpose that JAX derives (of the
   cond, the selects and the fast route's tangent map), forward mode the rule
   itself; jit, grad, value_and_grad, vmap, vmap of grad, nested vmap,
   jacfwd, jacrev, hessian and shard_map compose (tests/test_auto_fallback.py,
   tests/test_shard_map.py). Second derivatives of a fallen-back trajectory
   are JAX's through the filter (checked against differences of the gradient).

3. No NaN leaks from the route that was not taken. A failed fast route has a
   NaN factor, and its tangent map turns even a zero tangent into NaN
   (0·NaN); under reverse mode the select's zero cotangent would be pulled
   back through it into the gradient (of a shared model summed over a batch,
   too). So each route's tangent *inputs* are zeroed where its answer is not
   used (the "double where"), and the slow route's primal inputs carry
   derivatives only where it is used (``stop_gradient`` elsewhere), which
   keeps the same guarantee at the next order.

When it applies (``registry.fallback_method``): ``method="auto"`` only (an
explicit method is taken at its word), in every dtype (float64 models beyond
the normal equations, such as constant acceleration sampled at 100 Hz–1 kHz,
are NaN from the kernel too, and the filter handles them), with a prior on
x_0 (the filter needs one: with a flat prior auto stays the kernel, NaN
included) and p ≥ 1. The filter takes everything else ``auto`` receives:
time-varying fields, ``DiagonalNoise`` Q and R (expanded by
``transition_cov``/``masked_measurement_cov``), and singular Q or x0_cov,
which it handles exactly where the normal equations, holding their inverses,
return NaN.

Cost. When nothing fails: the finiteness check of the answer; in the
derivative rule also the finiteness of the inputs and a select on their
tangents; under reverse mode the slow route's inputs pass through the cond's
outputs (``jax.checkpoint`` keeps its other residuals inside, at the price
of one more filter sweep when it does run). Measured in
``benchmarks/auto_fallback_cost.py`` (RESULTS.md, "method=auto fallback").

Validity. The covariance form is not certified by a residual and would return
finite numbers for an indefinite Q, R or prior covariance, where the normal
equations (which factor them) return NaN. Its answer is therefore taken only
where the problem is finite and those covariances are positive semidefinite
to working precision (:func:`covariances_valid`, computed inside the branch
that runs the slow route); elsewhere the result stays NaN ("accurate or NaN").
"""

from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
from jax import lax

from .linalg import psd_within
from .model import StateSpace
from .noise import DiagonalNoise
from .normal_equations import transition_cov


@jax.custom_batching.custom_vmap
def batch_any(flag):
    """``flag`` for one trajectory; under ``vmap``, whether any trajectory's flag is set (unbatched)."""
    return flag


@batch_any.def_vmap
def _batch_any_rule(axis_size, in_batched, flag):
    if in_batched[0]:
        flag = jnp.any(flag, axis=0)
    return batch_any(flag), False  # again, for an enclosing vmap


def _where(cond, a, b):
    return jax.tree_util.tree_map(lambda u, v: jnp.where(cond, u, v), a, b)


def _zero_where(cond, tree):
    return jax.tree_util.tree_map(lambda t: jnp.where(cond, jnp.zeros_like(t), t), tree)


def not_finite(tree):
    """True when any entry of ``tree`` is NaN or infinite."""
    flags = [jnp.all(jnp.isfinite(a)) for a in jax.tree_util.tree_leaves(tree)]
    return jnp.logical_not(jnp.all(jnp.stack(flags))) if flags else jnp.asarray(False)


def finite_problem(model: StateSpace, y, w):
    """Every model entry finite, and every observed measurement (``w`` > 0)."""
    ok = jnp.logical_not(not_finite(model))
    if y is not None:
        ok = ok & jnp.all(jnp.isfinite(y) | (w == 0))
    return ok


def _psd(S):
    """Positive semidefinite to working precision, every block of S (…, n, n): no eigenvalue
    below −10·n·eps·max|S_ij| (``linalg.psd_within``). ``validation._cov_problems`` puts its
    bar at the largest eigenvalue's magnitude instead, which is between max|S_ij| and
    n·max|S_ij|: the two agree except within a factor n of eps·|S|. The smallest positive
    number is added to the slack so that a zero block (no noise) counts as semidefinite."""
    if S.shape[-1] == 0:  # p = 0: no measurement noise to check
        return jnp.asarray(True)
    finfo = jnp.finfo(S.dtype)
    slack = 10 * S.shape[-1] * finfo.eps * jnp.max(jnp.abs(S), axis=(-2, -1)) + finfo.tiny
    return jnp.all(psd_within(S, slack))


def covariances_valid(model: StateSpace):
    """Q, R and the prior covariance positive semidefinite (what the covariance form silently assumes)."""
    ok = _psd(transition_cov(model))
    ok = ok & (jnp.all(model.R.variances >= 0) if isinstance(model.R, DiagonalNoise) else _psd(model.R))
    if model.x0_cov is not None:
        ok = ok & _psd(model.x0_cov)
    return ok


def with_fallback(fast, slow, eligible, *args):
    """``fast(*args)``, or ``slow(*args)`` for a trajectory whose fast answer is not finite.

    Args:
        fast, slow: functions of ``args`` with the same output structure,
            differentiable by JAX (any custom rules of their own are used);
            ``slow`` returns NaN where its own answer is not to be trusted.
        eligible: ``(*args) -> bool``, whether a failed trajectory may use
            ``slow`` (a finite, valid problem).
        args: arrays and pytrees of arrays (one trajectory; ``vmap`` batches).
    """
    return _fallback(fast, slow, eligible, args)


def _choose(failed, fast_out, use_slow):
    """``fast_out``, or ``use_slow()`` under a cond on "some trajectory failed" (module docstring, 1.)."""
    return lax.cond(batch_any(failed), use_slow, lambda: fast_out)


@partial(jax.custom_jvp, nondiff_argnums=(0, 1, 2))
def _fallback(fast, slow, eligible, args):
    out = fast(*args)
    failed = lax.stop_gradient(not_finite(out))

    def check_eligible():  # the inputs are read only when some answer failed
        bad = failed & eligible(*args)
        return _choose(bad, out, lambda: _where(bad, slow(*args), out))

    return _choose(failed, out, check_eligible)


@_fallback.defjvp
def _fallback_jvp(fast, slow, eligible, primals, tangents):
    (args,), (args_dot,) = primals, tangents
    out, fast_tangent = jax.linearize(lambda *a: fast(*a), *args)
    failed = lax.stop_gradient(not_finite(out))
    bad = failed & lax.stop_gradient(eligible(*args))
    # Double where (module docstring, 3.): the tangent inputs of a trajectory that takes the
    # slow answer are zeroed before the fast route's tangent map (outside the cond: inside
    # it, every residual of that map would pass through the cond's outputs). A failed,
    # ineligible one keeps its NaN value and derivatives.
    out_dot = fast_tangent(*_zero_where(bad, args_dot))

    def use_slow():
        # Derivatives reach the slow route's inputs only where its answer is used.
        primal = _where(bad, args, lax.stop_gradient(args))
        # Rematerialised: reverse mode splits this cond into a primal and a tangent cond, and
        # every residual of the slow route would pass between them, zeros included when
        # nothing failed; with jax.checkpoint only its inputs do.
        s, s_dot = jax.jvp(jax.checkpoint(lambda *a: slow(*a)), tuple(primal),
                           tuple(_zero_where(jnp.logical_not(bad), args_dot)))
        return _where(bad, s, out), _where(bad, s_dot, out_dot)

    return _choose(bad, (out, out_dot), use_slow)
