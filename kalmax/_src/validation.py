"""``validate``: value checks that cannot run at trace time (call it outside jit)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from . import blocktri
from .checks import canonicalize
from .model import StateSpace
from .normal_equations import assemble


def _cov_problems(name: str, S, rtol: float) -> list:
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
    min_eig = np.linalg.eigvalsh(sym)[:, 0]
    bad = np.nonzero(min_eig <= 0)[0]
    if bad.size:
        where = "" if S.ndim == 2 else f" at time index {int(bad[0])} (and {bad.size - 1} more)"
        problems.append(
            f"model.{name} is not positive definite{where}: smallest eigenvalue {min_eig[bad[0]]:.3g}."
        )
    return problems


def _is_traced(tree) -> bool:
    return any(isinstance(leaf, jax.core.Tracer) for leaf in jax.tree_util.tree_leaves(tree))


@jax.jit
def _factor(model, y, w):
    system = assemble(model, y, w)
    x, factor = blocktri.factor_solve(system.diag, system.sub, system.rhs)
    return system, factor


_solve = jax.jit(blocktri.solve)


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
    the smoothed means solve H x = g, so κ₁(H)·eps bounds their relative
    error to first order. Computed in float64 when ``jax_enable_x64`` is on
    (else in the input dtype); inf when H is singular to working precision
    (the states are not identified). O(T n³) once plus a few O(T n²) solves.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> float(kx.condition_estimate(model, jnp.zeros((4, 1)))) > 1
        True
    """
    model, y, mask, dims, dtype = canonicalize(model, y, mask)
    work = jnp.float64 if jax.config.jax_enable_x64 else dtype
    model = jax.tree_util.tree_map(lambda a: jnp.asarray(a, work), model)
    y = jnp.where(mask, y, 0).astype(work)
    system, factor = _factor(model, y, mask.astype(work))
    if not bool(factor.ok):
        return float("inf")
    est = _one_norm(system) * _inverse_one_norm(factor, (dims.T, dims.n), work)
    return est if np.isfinite(est) else float("inf")


def validate(model: StateSpace, y, mask=None, *, rtol: float = 1e-6,
             max_error_bound: float = 0.1) -> None:
    """Check a model and data for problems that shapes alone cannot reveal.

    Call it outside ``jit`` (it reads values). It raises one ``ValueError``
    listing every problem found, or returns None when all is well:

    - shape/dtype problems (the same checks ``smooth`` makes at trace time),
    - non-finite observed measurements (NaN/inf where ``mask`` is True),
    - non-finite A, C, b, d or prior mean,
    - Q, R or x0_cov not symmetric (relative tolerance ``rtol``) or not
      positive definite,
    - a flat prior with no observed entry at all (states not identified),
    - a problem too ill-conditioned for its dtype: when the estimated
      condition number of the normal equations times the dtype's machine
      epsilon, κ₁(H)·eps — a first-order bound on the relative error of the
      smoothed means of a plain solve — exceeds ``max_error_bound``.
      (``smooth`` refines its answer and returns NaN when the estimated error
      stays above its bar, 1e-6 in float64 and 1e-3 in float32; this check
      says in advance, and in words, why such a problem may come back NaN.
      When H is singular to working precision smooth returns NaN itself,
      which validate leaves alone.)

    Args:
        model: :class:`StateSpace`.
        y: (T, p) measurements.
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        rtol: relative tolerance for the symmetry check.
        max_error_bound: largest acceptable κ₁(H)·eps; None skips the
            conditioning check (it costs one factorisation and a few solves).

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
    for name in ("Q", "R", "x0_cov"):
        x = getattr(model, name)
        if x is not None:
            problems.extend(_cov_problems(name, x, rtol))
    if model.x0_cov is None and not mask.any():
        problems.append(
            "nothing is observed and the first state has a flat prior: the states are not identified "
            "(give model.x0_mean/x0_cov or observe something)."
        )
    if not problems and max_error_bound is not None:
        # Only for otherwise valid problems: NaN/non-PD inputs make the estimate meaningless.
        cond = condition_estimate(model, y, mask)
        eps = float(np.finfo(dtype).eps)
        # cond = inf (H singular to working precision, states not identified) is
        # left alone: smooth reports it itself by returning NaN.
        if np.isfinite(cond) and cond * eps > max_error_bound:
            problems.append(
                f"the problem is too ill-conditioned for {np.dtype(dtype).name}: estimated condition number "
                f"{cond:.2e} times eps {eps:.2e} = {cond * eps:.2e} > max_error_bound={max_error_bound:g}, so "
                "smooth may return NaN (it does when refinement cannot bring its estimated error under "
                "its bar); use float64, rescale, or add prior information."
            )
    if problems:
        raise ValueError("invalid smoothing problem:\n  - " + "\n  - ".join(problems))
