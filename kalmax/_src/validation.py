"""``validate``: value checks that cannot run at trace time (call it outside jit)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from . import blocktri, tolerances
from .backends.base import arithmetic_dtype
from .checks import canonicalize
from .model import StateSpace
from .normal_equations import assemble
from .primitive import fallback_method, get_backend, resolve_method
from .smoothing import _smooth_checked


def _cov_problems(name: str, S, rtol: float, singular_ok: bool = False) -> list:
    """Symmetry and definiteness of a covariance; with ``singular_ok``, positive semidefinite suffices."""
    S = np.asarray(S, dtype=np.float64)
    if S.size == 0:  # p = 0: an empty R has nothing to check
        return []
    mats = S.reshape((-1,) + S.shape[-2:])
    problems = []
    if not np.all(np.isfinite(mats)):
        return [f"model.{name} has non-finite entries."]
    asym = np.abs(mats - np.swapaxes(mats, -1, -2)).max(axis=(-1, -2))
    scale = np.abs(mats).max(axis=(-1, -2)) + np.finfo(np.float64).tiny
    bad = np.nonzero(asym > rtol * scale)[0]
    if bad.size:
        where = "" if S.ndim == 2 else f" at time index {int(bad[0])} (and {bad.size - 1} more)"
        problems.append(f"model.{name} is not symmetric{where}: max |S - Sᵀ| = {asym[bad[0]]:.3g}.")
    sym = 0.5 * (mats + np.swapaxes(mats, -1, -2))
    eig = np.linalg.eigvalsh(sym)
    min_eig = eig[:, 0]
    # An exactly singular covariance (zero rows and columns, a rank-one Q) has
    # eigenvalues of rounding size, of either sign: 10·n·eps relative to the largest.
    zero = 10 * sym.shape[-1] * np.finfo(np.float64).eps * np.maximum(np.abs(eig).max(axis=-1), np.finfo(np.float64).tiny)
    indefinite = np.nonzero(min_eig < -zero)[0]
    singular = np.nonzero(min_eig <= zero)[0]
    if singular_ok and indefinite.size:
        where = "" if S.ndim == 2 else f" at time index {int(indefinite[0])} (and {indefinite.size - 1} more)"
        problems.append(
            f"model.{name} is not positive semidefinite{where}: smallest eigenvalue {min_eig[indefinite[0]]:.3g}."
        )
    elif not singular_ok and singular.size:
        where = "" if S.ndim == 2 else f" at time index {int(singular[0])} (and {singular.size - 1} more)"
        text = f"model.{name} is not positive definite{where}: smallest eigenvalue {min_eig[singular[0]]:.3g}."
        if name in ("Q", "x0_cov") and not indefinite.size:
            text += (" It is singular but positive semidefinite (deterministic directions), which the normal "
                     "equations cannot take (they hold its inverse); method='covariance' takes it exactly "
                     "(with a prior, model.x0_mean/x0_cov).")
        problems.append(text)
    return problems


def _is_traced(tree) -> bool:
    return any(isinstance(leaf, jax.core.Tracer) for leaf in jax.tree_util.tree_leaves(tree))


@jax.jit
def _factor(model, y, w, pivot_tol):
    system = assemble(model, y, w)
    x, factor = blocktri.factor_solve(system.diag, system.sub, system.rhs, pivot_tol)
    return system, factor


_solve = jax.jit(blocktri.solve)


def _smoothed_states(model, y, mask, dtype, method):
    """The states smooth returns, from the very program smooth compiles (cached per shape and method).

    Called op by op instead, a portable backend re-traced and re-compiled
    every scan of the solve on every validate call (measured: ~20 s of a
    float32 T = 100 check under load, most of it compiling single operations),
    and the verdict was that of a differently compiled program.
    """
    mask = jnp.asarray(mask)
    y = jnp.where(mask, y, 0).astype(dtype)
    return np.asarray(_smooth_checked(model, y, mask, covariances=False, method=method).states)


def _one_norm(system) -> float:
    """‖H‖₁ (largest absolute column sum) from the blocks of H."""
    diag = np.abs(np.asarray(system.diag))
    cols = diag.sum(axis=-2)  # (T, n): column sums of the diagonal blocks
    if diag.shape[0] > 1:
        sub = np.abs(np.broadcast_to(np.asarray(system.sub), (diag.shape[0] - 1,) + diag.shape[1:]))
        cols[:-1] += sub.sum(axis=-2)  # H_{t+1,t} sits in block column t
        cols[1:] += sub.sum(axis=-1)  # H_{t,t+1} = H_{t+1,t}ᵀ sits in block column t+1
    return float(cols.max())


def _inverse_one_norm(factor, shape, dtype, iters: int = 5) -> float:
    """Estimate ‖H⁻¹‖₁ from a few solves with the stored factor.

    Hager's method as refined by Higham (the estimator behind LAPACK's
    condition numbers; N. J. Higham, "FORTRAN codes for estimating the
    one-norm of a real or complex matrix", ACM TOMS 14(4), 1988), using that
    H⁻¹ is symmetric. A lower bound, almost always within a factor of 3.
    """
    T, n = shape
    N = T * n
    x = np.full(shape, 1.0 / N)
    est, prev = 0.0, None
    for k in range(iters):
        v = np.asarray(_solve(factor, jnp.asarray(x, dtype)), np.float64)
        est = max(est, float(np.abs(v).sum()))
        xi = np.where(v >= 0, 1.0, -1.0)
        z = np.asarray(_solve(factor, jnp.asarray(xi, dtype)), np.float64)
        j = int(np.argmax(np.abs(z)))
        if (k > 0 and np.abs(z).max() <= float((z * x).sum())) or j == prev:
            break
        prev = j
        x = np.zeros(N)
        x[j] = 1.0
        x = x.reshape(shape)
    # Higham's extra probe against matrices that fool the iteration.
    alt = np.array([(-1) ** i * (1 + i / max(N - 1, 1)) for i in range(N)]).reshape(shape)
    v = np.asarray(_solve(factor, jnp.asarray(alt, dtype)), np.float64)
    return max(est, 2 * float(np.abs(v).sum()) / (3 * N))


def condition_estimate(model: StateSpace, y, mask=None) -> float:
    r"""Estimated 1-norm condition number κ₁(H) of the normal-equation matrix.

    H is the posterior precision of the states (see ``normal_equations``);
    the smoothed means solve H x = g, so κ₁(H)·eps bounds the relative error
    of a plain solve to first order. Always computed in float64 (x64 is
    switched on for this call only), whatever the input dtype, so a float32
    problem gets the condition number of the problem itself, not of its
    float32 factorisation. inf when H is singular to float64 working
    precision with a flat prior (the states are not identified). With a
    proper prior H is positive definite by construction; if even the
    float64 factorisation breaks down, the result is the lower bound
    κ₁(H) ≥ κ₂(H) ≥ 1/min_t,i (pivot²/H_ii) > 1/pivot_tolerance, i.e.
    ≈ 4.5e14/n (``tolerances.pivot_tolerance``). O(T n³) once plus a few
    O(T n²) solves.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> float(kx.condition_estimate(model, jnp.zeros((4, 1)))) > 1
        True
    """
    model, y, mask, dims, dtype = canonicalize(model, y, mask)
    flat = model.x0_cov is None
    tol = tolerances.pivot_tolerance(np.float64, dims.n, flat_prior=flat)
    # Host copies first: under x64 off the arrays are float32 and must be
    # widened before the float64 context builds anything from them.
    model = jax.tree_util.tree_map(lambda a: np.asarray(a, np.float64), model)
    y = np.where(np.asarray(mask), np.asarray(y, np.float64), 0.0)
    w = np.asarray(mask, np.float64)
    with jax.enable_x64(True):
        model = jax.tree_util.tree_map(jnp.asarray, model)
        system, factor = _factor(model, jnp.asarray(y), jnp.asarray(w), jnp.float64(tol))
        if not bool(factor.ok):
            return float("inf") if flat else 1.0 / tol
        est = _one_norm(system) * _inverse_one_norm(factor, (dims.T, dims.n), jnp.float64)
    if not np.isfinite(est):
        return float("inf") if flat else 1.0 / tol
    return est


def validate(model: StateSpace, y, mask=None, *, rtol: float = 1e-6,
             max_error_bound: float = 0.1, method: str = "auto") -> None:
    """Check a model and data for problems that shapes alone cannot reveal.

    Call it outside ``jit`` (it reads values). It raises one ``ValueError``
    listing every problem found, or returns None when all is well:

    - shape/dtype problems (the same checks ``smooth`` makes at trace time),
    - non-finite observed measurements (NaN/inf where ``mask`` is True),
    - non-finite A, C, b, d or prior mean,
    - Q, R or x0_cov not symmetric (relative tolerance ``rtol``) or not
      positive definite (for ``method="covariance"``, Q and x0_cov need only
      be positive semidefinite: that backend takes singular ones exactly, and
      so does ``method="auto"`` with a prior, which falls back to it; for
      the others a singular Q or x0_cov is reported with that advice),
    - a flat prior with no observed entry at all (states not identified),
    - what ``smooth`` itself will do: the check runs the solve (``method``,
      the input dtype) and, when it returns NaN, says why — the states are
      not identified (H singular even in float64, with a flat prior), or the
      problem is too ill-conditioned for the arithmetic of that backend —
      with the estimated condition number and the fixes (float64; for
      float32 on CPU, ``method="cpu"``, which computes float32 problems in
      double; rescaling; more prior information). With ``method="auto"``
      and a prior, a trajectory whose normal-equation solve is NaN gets the
      covariance-form filter's answer instead (``smooth``): nothing is
      reported when that answer is finite;
    - a problem close to the limit of that arithmetic even where ``smooth``
      succeeds: the estimated condition number of the normal equations times
      the machine epsilon of the arithmetic (float64 for ``method="cpu"``,
      whatever the input dtype), κ₁(H)·eps — a first-order bound on the
      relative error of a plain solve — above ``max_error_bound``.
      (``smooth`` refines its answer and returns NaN when the estimated error
      stays above its bar, 1e-6 in float64 and 1e-3 in float32; a finite
      answer passed that check.)

    Args:
        model: :class:`StateSpace`.
        y: (T, p) measurements.
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        rtol: relative tolerance for the symmetry check.
        max_error_bound: largest acceptable κ₁(H)·eps; None skips the
            conditioning checks (they cost one solve, one factorisation and a
            few solves with it).
        method: the solver backend whose verdict is checked, as in ``smooth``.

    Example:
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> kx.validate(model, jnp.array([[0.3], [jnp.nan], [1.2]]))  # no output: no problem found
        >>> kx.validate(model.replace(R=-jnp.eye(1)), jnp.zeros((3, 1)))
        Traceback (most recent call last):
            ...
        ValueError: invalid smoothing problem:
          - model.R is not positive definite: smallest eigenvalue -1.
    """
    if _is_traced((model, y, mask)):
        raise TypeError(
            "validate reads the values of its arguments, so it cannot run under jit, vmap or grad; "
            "call it on concrete arrays before the transformed function (one trajectory at a time)."
        )
    model, y, mask, dims, dtype = canonicalize(model, y, mask)
    if dims.n == 0:
        raise ValueError("model.A has shape (0, 0): the state needs at least one component (n >= 1).")
    y = np.asarray(y)
    mask = np.asarray(mask)
    problems = []
    bad = mask & ~np.isfinite(y)
    if bad.any():
        t, j = np.argwhere(bad)[0]
        problems.append(
            f"y has {int(bad.sum())} non-finite value(s) at observed entries (first at t={t}, column {j}); "
            "mark them missing in mask or fix the data."
        )
    for name in ("A", "C", "b", "d", "x0_mean"):
        x = getattr(model, name)
        if x is not None and not np.all(np.isfinite(np.asarray(x))):
            problems.append(f"model.{name} has non-finite entries.")
    # The covariance-form filter never inverts Q or the prior covariance: singular ones are fine there,
    # and so under method="auto" with a prior, which falls back to it where the normal equations fail.
    singular_ok = (not get_backend(resolve_method(method)).refined
                   or fallback_method(method, flat_prior=model.x0_cov is None, p=dims.p) is not None)
    for name in ("Q", "R", "x0_cov"):
        x = getattr(model, name)
        if x is not None:
            problems.extend(_cov_problems(name, x, rtol, singular_ok=singular_ok and name != "R"))
    if model.x0_cov is None and not mask.any():
        problems.append(
            "nothing is observed and the first state has a flat prior: the states are not identified "
            "(give model.x0_mean/x0_cov or observe something)."
        )
    if not problems and max_error_bound is not None:
        # Only for otherwise valid problems: NaN/non-PD inputs make these meaningless.
        problems.extend(_conditioning_problems(model, y, mask, dtype, max_error_bound, method))
    if problems:
        raise ValueError("invalid smoothing problem:\n  - " + "\n  - ".join(problems))


def _conditioning_problems(model, y, mask, dtype, max_error_bound, method) -> list:
    """What smooth will do with a valid problem, and why, in words (see validate)."""
    name = resolve_method(method)
    if not get_backend(name).refined:
        return _filter_problems(model, y, mask, dtype, name)
    arith = arithmetic_dtype(get_backend(name), dtype)
    eps = float(np.finfo(arith).eps)
    bar = tolerances.trusted_error(dtype)
    x = _smoothed_states(model, y, mask, dtype, name)
    fallback = fallback_method(method, flat_prior=model.x0_cov is None, p=np.shape(y)[-1])
    if fallback is not None and not np.all(np.isfinite(x)):
        # smooth (method="auto") replaces this NaN with the covariance-form filter's answer
        if np.all(np.isfinite(_smoothed_states(model, y, mask, dtype, method))):
            return []
    cond = condition_estimate(model, y, mask)
    where = f"method={name!r}, {np.dtype(dtype).name} input"
    where += f", {arith.name} arithmetic" if arith != np.dtype(dtype) else ""
    if not np.all(np.isfinite(x)):
        if not np.isfinite(cond):
            return [
                f"smooth returns NaN ({where}): the states are not identified (or too nearly so for "
                "float64) — the normal-equation matrix is singular to float64 working precision, as when a "
                "direction of the states is reached by no observation and no prior; give "
                "model.x0_mean/x0_cov or observe more."
            ]
        fixes = []
        if arith != np.dtype(np.float64):
            fixes.append("use float64 (jax.config.update('jax_enable_x64', True) and float64 arrays)")
            if np.dtype(dtype) == np.float32 and jax.default_backend() == "cpu":
                from .backends.registry import is_available
                if is_available("cpu"):
                    fixes.append("or method='cpu' (the compiled kernel computes float32 problems in double)")
        fixes.append("rescale the problem (units in which Q, R and the prior covariance are within a few "
                     "orders of magnitude of one another)")
        fixes.append("or add information (a prior on x_0, a floor on Q)")
        if fallback is not None:
            fixes.append(f"(method={method!r} also tried the covariance-form filter, which never forms Q⁻¹, "
                         "and it failed too: an innovation or predicted covariance is not positive definite "
                         "in this precision)")
        elif model.x0_cov is not None:
            fixes.append("or method='covariance' (the covariance-form Kalman filter and RTS smoother, which "
                         "never forms Q⁻¹: for per-step process noise far below the measurement noise, as "
                         "with high-rate sampling; method='auto' falls back to it by itself)")
        bound = " at least" if model.x0_cov is not None and cond >= 0.99 / tolerances.pivot_tolerance(
            np.float64, np.shape(model.A)[-1], flat_prior=False) else ""
        return [
            f"smooth returns NaN ({where}): its refined answer cannot reach the accuracy bar of {bar:g} "
            f"(estimated relative error) in {arith.name} arithmetic; the estimated condition number of the "
            f"normal equations is{bound} {cond:.2e}, so κ·eps = {cond * eps:.2e}. Fixes: " + "; ".join(fixes) + "."
        ]
    if np.isfinite(cond) and cond * eps > max_error_bound:
        return [
            f"the problem is too ill-conditioned for {arith.name} arithmetic ({where}): estimated condition "
            f"number {cond:.2e} times eps {eps:.2e} = {cond * eps:.2e} > max_error_bound={max_error_bound:g}. "
            "smooth's answer passed its accuracy check here, but a problem this close to the limit may come "
            "back NaN after small changes; use float64, rescale, or add prior information."
        ]
    return []


def _filter_problems(model, y, mask, dtype, name) -> list:
    """validate for the covariance-form filter: it is NaN only when its own factors fail."""
    x = _smoothed_states(model, y, mask, dtype, name)
    if np.all(np.isfinite(x)):
        return []
    if model.x0_cov is None:
        return [f"smooth returns NaN (method={name!r}): the covariance-form filter needs a prior on x_0 "
                "(model.x0_mean/x0_cov); with a flat prior use the normal equations (method='auto')."]
    return [f"smooth returns NaN (method={name!r}, {np.dtype(dtype).name}): an innovation or predicted "
            "covariance is not positive definite in this precision; use float64 or rescale the problem."]
