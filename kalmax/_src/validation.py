"""``validate``: value checks that cannot run at trace time (call it outside jit)."""

from __future__ import annotations

import numpy as np

from .checks import canonicalize
from .model import StateSpace


def _cov_problems(name: str, S, rtol: float) -> list:
    S = np.asarray(S, dtype=np.float64)
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


def validate(model: StateSpace, y, mask=None, *, rtol: float = 1e-6) -> None:
    """Check a model and data for problems that shapes alone cannot reveal.

    Call it outside ``jit`` (it reads values). It raises one ``ValueError``
    listing every problem found, or returns None when all is well:

    - shape/dtype problems (the same checks ``smooth`` makes at trace time),
    - non-finite observed measurements (NaN/inf where ``mask`` is True),
    - non-finite A, C, b, d or prior mean,
    - Q, R or x0_cov not symmetric (relative tolerance ``rtol``) or not
      positive definite,
    - a flat prior with no observed entry at all (states not identified).

    Args:
        model: :class:`StateSpace`.
        y: (T, p) measurements.
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        rtol: relative tolerance for the symmetry check.
    """
    model, y, mask, dims, _ = canonicalize(model, y, mask)
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
    if problems:
        raise ValueError("invalid smoothing problem:\n  - " + "\n  - ".join(problems))
