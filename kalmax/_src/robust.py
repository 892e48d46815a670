r"""Measurement losses on whitened residuals: squared, Huber and Student-t.

A loss ρ acts on each entry z of the whitened measurement residual
z_t = L_t⁻¹ (y_t − h(x_t)) (L_t L_tᵀ = R̃_t, the masked measurement covariance
of ``normal_equations.py``; missing entries give z = 0 and ρ(0) = 0), so the
measurement part of the smoothing objective is Σ_t Σ_i ρ(z_ti). Read as a
density, the unit-scale noise ε = L⁻¹v has i.i.d. entries with density
exp(−ρ(ε))/Z_ρ; ``log_normalizer`` is log Z_ρ, needed by the Laplace
log-likelihood (``laplace.py``) so that the loss's own setting can be learned.

* ``SquaredLoss``: ρ = ½ z², Z = √(2π) — the Gaussian case.
* ``HuberLoss(threshold δ)``: ρ = ½ z² for |z| ≤ δ, δ|z| − ½δ² beyond;
  Z = √(2π) (2Φ(δ) − 1) + (2/δ) e^{−δ²/2} (∫ of the Gaussian core plus the
  two exponential tails). Convex: the robust smoother has one minimum.
  (Huber (1964), Ann. Math. Statist. 35(1); the Huber smoother of Aravkin,
  Burke & Pillonetto, "Optimization viewpoint on Kalman smoothing",
  IEEE CDC 2011 — from memory.)
* ``StudentTLoss(dof ν)``: ρ = (ν+1)/2 · log(1 + z²/ν),
  Z = Γ(ν/2) √(νπ) / Γ((ν+1)/2) — the unit-scale Student-t density.
  Not convex: redescending, so a gross outlier has almost no influence, but
  the objective may have several local minima (Aravkin, Burke & Pillonetto,
  "Robust and trend-following Student's t Kalman smoothers", SIAM J. Control
  Optim. 52(5), 2014).

Iteratively reweighted least squares (IRLS). ``weight(z) = ρ'(z)/z`` is the
weight of the quadratic ½ ω z² whose gradient at the current residual equals
ρ's: ω = 1 (squared), min(1, δ/|z|) (Huber), (ν+1)/(ν+z²) (Student-t). With
ω fixed, the measurement term is Gaussian with covariance L diag(1/ω) Lᵀ, so
one reweighted step is one linear-Gaussian smoothing solve; ρ(√s) is concave
in s for both robust losses, which makes that quadratic a majoriser of ρ
(the majorise–minimise reading of IRLS; Huber (1981), Robust Statistics,
§7.8 — from memory). The weights are finite and positive everywhere,
ω(0) = 1 included.

The parameter may be a scalar or a (p,) vector, one value per measurement
entry (broadcast against z's last axis; ``log_normalizer`` then returns (p,)).
Each loss is a pytree whose one leaf (δ or ν) is differentiable: gradients
of a smoothed quantity with respect to it come from the implicit VJP of the
nonlinear solver like any other parameter.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import jax
import jax.numpy as jnp
from jax.scipy.special import gammaln, ndtr

Array = Any


@dataclasses.dataclass(frozen=True)
class SquaredLoss:
    """ρ(z) = ½ z²: the Gaussian measurement model (no parameter)."""

    def rho(self, z):
        return 0.5 * z * z

    def weight(self, z):
        return jnp.ones_like(z)

    def log_normalizer(self, dtype):
        return jnp.asarray(0.5 * math.log(2 * math.pi), dtype)


@dataclasses.dataclass(frozen=True)
class HuberLoss:
    """ρ(z) = ½z² for |z| ≤ threshold, threshold·|z| − ½threshold² beyond.

    Args:
        threshold: δ > 0, in units of the measurement noise's standard
            deviation (the residual is whitened); 1.345 gives 95 % efficiency
            at Gaussian data (Huber (1981), Robust Statistics — from memory).
    """

    threshold: Array = 1.345

    def rho(self, z):
        d = jnp.asarray(self.threshold, z.dtype)
        a = jnp.abs(z)
        return jnp.where(a <= d, 0.5 * z * z, d * a - 0.5 * d * d)

    def weight(self, z):
        d = jnp.asarray(self.threshold, z.dtype)
        a = jnp.abs(z)
        # d / max(a, d): equal to min(1, d/|z|), and never a division by zero.
        return d / jnp.maximum(a, d)

    def log_normalizer(self, dtype):
        d = jnp.asarray(self.threshold, dtype)
        core = math.sqrt(2 * math.pi) * (2 * ndtr(d) - 1)
        return jnp.log(core + 2 * jnp.exp(-0.5 * d * d) / d)


@dataclasses.dataclass(frozen=True)
class StudentTLoss:
    """ρ(z) = (dof+1)/2 · log(1 + z²/dof): the unit-scale Student-t density.

    Args:
        dof: degrees of freedom ν > 0 (small ν: heavy tails; ν → ∞: squared).
    """

    dof: Array = 4.0

    def rho(self, z):
        nu = jnp.asarray(self.dof, z.dtype)
        return 0.5 * (nu + 1) * jnp.log1p(z * z / nu)

    def weight(self, z):
        nu = jnp.asarray(self.dof, z.dtype)
        return (nu + 1) / (nu + z * z)

    def log_normalizer(self, dtype):
        nu = jnp.asarray(self.dof, dtype)
        return gammaln(0.5 * nu) + 0.5 * jnp.log(nu * math.pi) - gammaln(0.5 * (nu + 1))


jax.tree_util.register_dataclass(SquaredLoss, data_fields=[], meta_fields=[])
jax.tree_util.register_dataclass(HuberLoss, data_fields=["threshold"], meta_fields=[])
jax.tree_util.register_dataclass(StudentTLoss, data_fields=["dof"], meta_fields=[])

LOSSES = (SquaredLoss, HuberLoss, StudentTLoss)


def check_loss(loss) -> None:
    if not isinstance(loss, LOSSES):
        raise TypeError(
            f"loss must be kx.SquaredLoss(), kx.HuberLoss(threshold) or kx.StudentTLoss(dof); "
            f"got {type(loss).__name__}."
        )
