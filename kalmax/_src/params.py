r"""Parameterisations: unconstrained arrays ↔ valid :class:`StateSpace` models.

Gradient-based fitting works best on unconstrained real numbers, while a
model needs positive-definite covariances, entries that stay inside known
bounds and entries that must not move at all. A *transform* maps one
unconstrained array to one model field and back; a :class:`Parameterization`
assigns transforms to fields of a nominal model and holds every other field
at its nominal value.

Transforms (each works on a single field value and on a leading time axis):

=====================  ==========================================  ======================
transform              value                                       unconstrained u
=====================  ==========================================  ======================
``Identity()``         u                                           same shape
``Positive()``         exp(u), elementwise                         same shape
``Bounded(lo, hi)``    lo + (hi − lo)·sigmoid(u); lo + eᵘ; hi − eᵘ  same shape
``LogScale()``         exp(u) · nominal                            scalar (or per step)
``DiagonalCov()``      diag(exp(u))                                (..., k)
``CholeskyCov()``      L Lᵀ, L lower with diag exp(·)              (..., k(k+1)/2)
``FreeEntries(m, f)``  nominal, with entries where m is True       (number of True,)
                       replaced by the elementwise transform f
=====================  ==========================================  ======================

The unconstrained representation is *minimal* (no entry is ignored), so the
Hessian of a negative log-likelihood in these coordinates is non-singular
when the model is identified — which :func:`kalmax.standard_errors` needs.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Dict, Mapping, Optional

import jax
import jax.numpy as jnp
import numpy as np

from .linalg import chol
from .model import FIELDS, StateSpace

Array = Any


def _tril_indices(k: int):
    return np.tril_indices(k)


def _packed_size_to_k(m: int) -> int:
    k = int(round((np.sqrt(8 * m + 1) - 1) / 2))
    if k * (k + 1) // 2 != m:
        raise ValueError(f"a packed Cholesky factor needs k(k+1)/2 entries; {m} is not of that form.")
    return k


@dataclasses.dataclass(frozen=True)
class Identity:
    """value = u (no constraint)."""

    def forward(self, u, nominal):
        return u

    def inverse(self, value, nominal):
        return value


@dataclasses.dataclass(frozen=True)
class Positive:
    """value = exp(u) elementwise; for scales, variances of scalar models, rates."""

    def forward(self, u, nominal):
        return jnp.exp(u)

    def inverse(self, value, nominal):
        return jnp.log(value)


@dataclasses.dataclass(frozen=True)
class Bounded:
    """Entries kept inside bounds.

    Both bounds: value = lo + (hi − lo)·sigmoid(u); only ``lower``: lo + exp(u);
    only ``upper``: hi − exp(u). Bounds are scalars or arrays broadcastable to
    the field. The bounds themselves are never reached (open interval).
    """

    lower: Optional[Array] = None
    upper: Optional[Array] = None

    def __post_init__(self):
        if self.lower is None and self.upper is None:
            raise ValueError("Bounded needs lower, upper or both; use Identity() for no bounds.")
        if self.lower is not None and self.upper is not None:
            if np.any(np.asarray(self.lower) >= np.asarray(self.upper)):
                raise ValueError("Bounded needs lower < upper everywhere.")

    def forward(self, u, nominal):
        if self.upper is None:
            return self.lower + jnp.exp(u)
        if self.lower is None:
            return self.upper - jnp.exp(u)
        return self.lower + (self.upper - self.lower) * jax.nn.sigmoid(u)

    def inverse(self, value, nominal):
        if self.upper is None:
            return jnp.log(value - self.lower)
        if self.lower is None:
            return jnp.log(self.upper - value)
        s = (value - self.lower) / (self.upper - self.lower)
        return jnp.log(s) - jnp.log1p(-s)


@dataclasses.dataclass(frozen=True)
class LogScale:
    """value = exp(u)·nominal: one positive multiplier for the whole field.

    The shape of the field is kept (e.g. the correlation structure of a
    nominal covariance) and only its overall size is learned: u is a scalar
    for a time-invariant field, or (T', ) with ``per_step=True`` for a field
    with a leading time axis.
    """

    per_step: bool = False

    def forward(self, u, nominal):
        u = jnp.asarray(u)
        return jnp.exp(u).reshape(u.shape + (1,) * (nominal.ndim - u.ndim)) * nominal

    def inverse(self, value, nominal):
        # Least-squares multiplier: exact when value is a positive multiple of nominal.
        axes = tuple(range(1 if self.per_step else 0, nominal.ndim))
        scale = jnp.sum(value * nominal, axis=axes) / jnp.sum(nominal * nominal, axis=axes)
        return jnp.log(scale)


@dataclasses.dataclass(frozen=True)
class DiagonalCov:
    """Diagonal covariance diag(exp(u)) from the log-variances u of shape (..., k)."""

    def forward(self, u, nominal):
        return jnp.exp(u)[..., :, None] * jnp.eye(u.shape[-1], dtype=u.dtype)

    def inverse(self, value, nominal):
        return jnp.log(jnp.diagonal(value, axis1=-2, axis2=-1))


@dataclasses.dataclass(frozen=True)
class CholeskyCov:
    """Full covariance L Lᵀ from a packed lower-triangular factor with positive diagonal.

    u (..., k(k+1)/2) lists the lower triangle row by row (``numpy.tril_indices``
    order) with the diagonal entries stored as logs, so every u gives a
    symmetric positive-definite matrix and every SPD matrix has exactly one u.
    """

    def forward(self, u, nominal):
        k = _packed_size_to_k(u.shape[-1])
        rows, cols = _tril_indices(k)
        L = jnp.zeros(u.shape[:-1] + (k, k), u.dtype).at[..., rows, cols].set(u)
        diag = jnp.diagonal(L, axis1=-2, axis2=-1)
        L = L + (jnp.exp(diag) - diag)[..., :, None] * jnp.eye(k, dtype=u.dtype)
        return L @ jnp.swapaxes(L, -1, -2)

    def inverse(self, value, nominal):
        k = value.shape[-1]
        L = chol(value)
        L = L + (jnp.log(jnp.diagonal(L, axis1=-2, axis2=-1)) - jnp.diagonal(L, axis1=-2, axis2=-1))[
            ..., :, None
        ] * jnp.eye(k, dtype=L.dtype)
        rows, cols = _tril_indices(k)
        return L[..., rows, cols]


_ELEMENTWISE = (Identity, Positive, Bounded)


@dataclasses.dataclass(frozen=True)
class FreeEntries:
    """Only the entries where ``free`` is True are parameters; the rest stay nominal.

    ``free`` is a concrete boolean array of the field's shape (or
    broadcastable to it). The free entries go through ``inner`` (an
    elementwise transform: ``Identity``, ``Positive`` or ``Bounded``; bounds
    may be full-shape arrays), so e.g. ``FreeEntries(mask, Bounded(-1, 1))``
    learns some entries of a dynamics matrix inside (−1, 1) and fixes the
    others. u has shape (number of free entries,).
    """

    free: Array
    inner: Any = dataclasses.field(default_factory=Identity)

    def __post_init__(self):
        if not isinstance(self.inner, _ELEMENTWISE):
            raise TypeError(
                "FreeEntries(inner=...) must be an elementwise transform (Identity, Positive or "
                f"Bounded); got {type(self.inner).__name__}."
            )
        if np.asarray(self.free).dtype != np.bool_:
            raise TypeError("FreeEntries(free=...) must be a boolean array (True = may change).")

    def _index(self, shape):
        return np.nonzero(np.broadcast_to(np.asarray(self.free), shape))

    def forward(self, u, nominal):
        idx = self._index(nominal.shape)
        # Fixed entries are filled with 0 before the elementwise map, so the
        # discarded branch is always finite (no 0·inf in the gradient).
        full_u = jnp.zeros(nominal.shape, u.dtype).at[idx].set(u)
        free = jnp.asarray(np.broadcast_to(np.asarray(self.free), nominal.shape))
        return jnp.where(free, self.inner.forward(full_u, nominal), nominal)

    def inverse(self, value, nominal):
        return self.inner.inverse(value, nominal)[self._index(value.shape)]


class Parameterization:
    """A map from a pytree of unconstrained arrays to a :class:`StateSpace`.

    Fields given a transform are learned; every other field stays at its
    value in ``nominal``. The unconstrained parameters are a ``dict`` from
    field name to array — an ordinary pytree for ``jax.grad``, Optax and
    :func:`kalmax.fit`.

    Args:
        nominal: the :class:`StateSpace` supplying fixed fields, shapes and
            the starting point.
        **transforms: field name → transform (``A=Identity()``,
            ``Q=DiagonalCov()``, ...). ``b``, ``d`` and ``x0_mean`` may be
            learned even when ``nominal`` leaves them None (they start at 0);
            ``x0_cov`` may not (a flat prior has no covariance to start from).

    Methods:
        ``init()``: unconstrained values of the nominal model (the inverse map).
        ``unconstrained(model)``: unconstrained values of any model.
        ``model(params)``: the :class:`StateSpace` for unconstrained ``params``.

    Example:
        >>> import jax.numpy as jnp, kalmax as kx
        >>> nominal = kx.StateSpace(A=jnp.eye(2), C=jnp.eye(2), Q=0.1 * jnp.eye(2), R=jnp.eye(2))
        >>> spec = kx.Parameterization(nominal, Q=kx.DiagonalCov(), R=kx.CholeskyCov())
        >>> params = spec.init()
        >>> {name: value.shape for name, value in params.items()}
        {'Q': (2,), 'R': (3,)}
        >>> model = spec.model(params)      # equals nominal
        >>> bool(jnp.allclose(model.Q, nominal.Q) and jnp.allclose(model.R, nominal.R))
        True
        >>> y = jnp.asarray(np.random.default_rng(0).normal(size=(6, 2)))
        >>> mask = jnp.ones((6, 2), bool)
        >>> hold = kx.holdout_entries(mask, 0.25, seed=0)
        >>> loss = lambda p: kx.prediction_error(spec.model(p), y, mask, hold)
        >>> sorted(jax.grad(loss)(params))
        ['Q', 'R']
    """

    def __init__(self, nominal: StateSpace, **transforms):
        if not isinstance(nominal, StateSpace):
            raise TypeError(f"nominal must be a kalmax.StateSpace; got {type(nominal).__name__}.")
        for name in transforms:
            if name not in FIELDS:
                raise ValueError(f"unknown model field {name!r}; fields are {FIELDS}.")
        if "x0_cov" in transforms and nominal.x0_cov is None:
            raise ValueError("cannot learn x0_cov of a model with a flat prior (nominal.x0_cov is None).")
        self.nominal = nominal
        self.transforms: Dict[str, Any] = dict(transforms)

    def _nominal_value(self, name):
        value = getattr(self.nominal, name)
        if value is not None:
            return jnp.asarray(value)
        n, p = self.nominal.state_size, self.nominal.measurement_size
        shape = {"b": (n,), "d": (p,), "x0_mean": (n,)}[name]
        return jnp.zeros(shape, jnp.result_type(self.nominal.A))

    def unconstrained(self, model: StateSpace) -> Dict[str, Array]:
        """Unconstrained values (a dict) that :meth:`model` maps back to ``model``'s learned fields."""
        out = {}
        for name, tr in self.transforms.items():
            value = getattr(model, name)
            value = self._nominal_value(name) if value is None else jnp.asarray(value)
            out[name] = tr.inverse(value, self._nominal_value(name))
        return out

    def init(self) -> Dict[str, Array]:
        """Unconstrained values of the nominal model."""
        return self.unconstrained(self.nominal)

    def model(self, params: Mapping[str, Array]) -> StateSpace:
        """The :class:`StateSpace` for unconstrained ``params`` (a dict field → array)."""
        missing = set(self.transforms) - set(params)
        extra = set(params) - set(self.transforms)
        if missing or extra:
            raise ValueError(
                f"params must have exactly the keys {sorted(self.transforms)}; "
                f"missing {sorted(missing)}, unexpected {sorted(extra)}."
            )
        changes = {}
        for name, tr in self.transforms.items():
            changes[name] = tr.forward(jnp.asarray(params[name]), self._nominal_value(name))
        return self.nominal.replace(**changes)

    __call__ = model

    def __repr__(self):
        inner = ", ".join(f"{k}={v!r}" for k, v in self.transforms.items())
        return f"Parameterization({inner})"

