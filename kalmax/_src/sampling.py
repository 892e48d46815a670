r"""Posterior samples of the whole state path, drawn from the smoothing factor.

The posterior of the stacked states given the observed measurements is
Gaussian, p(x | y) = N(x̂, H⁻¹), with x̂ the smoothed means and H the
normal-equation matrix (``normal_equations.py``). With the block Cholesky
factor H = L Lᵀ (``blocktri.py``) and z ~ N(0, I) of the same size as x,

    x = x̂ + L⁻ᵀ z   has   E[x] = x̂,  Cov[x] = L⁻ᵀ E[z zᵀ] L⁻¹ = L⁻ᵀ L⁻¹ = (L Lᵀ)⁻¹ = H⁻¹,

a draw from the posterior (the usual way to sample a Gaussian given a
Cholesky factor of its precision; e.g. Rue & Held (2005), Gaussian Markov
Random Fields, §2.4 — section number from memory). Lᵀ is block upper
bidiagonal with diagonal blocks L_tᵀ and super-diagonal blocks M_{t+1}ᵀ, so
u = L⁻ᵀ z is the back substitution of the block Cholesky solve, backwards
from the last step:

    u_{T-1} = L_{T-1}⁻ᵀ z_{T-1},   u_t = L_t⁻ᵀ (z_t − M_{t+1}ᵀ u_{t+1}),

O(T n²) per sample after the O(T n³) factorisation, which all samples share
(each step solves with every sample as one more right-hand side).

Reparameterised: x is a differentiable function of the model and y for a
fixed z, so ``jax.grad`` of a loss of the samples, with the key held fixed,
is the pathwise gradient — through x̂ (the smoother's implicit-function VJP)
and through L (ordinary AD of the factorisation).

The factor. The compiled CPU backend keeps its factor in its own layout,
and no backend's factor is differentiable, so the samples always use the
portable JAX block Cholesky of ``blocktri.factor_solve`` (the ``"scan"``
backend's factorisation) for L, whatever ``method`` computes x̂.
"""

from __future__ import annotations

from functools import partial
from typing import Optional

import jax
import jax.numpy as jnp
import numpy as np

from . import blocktri
from .checks import canonicalize
from .model import StateSpace
from .normal_equations import assemble
from .primitive import resolve_method, smoothed_means


def _check_key(key) -> None:
    if not hasattr(key, "dtype"):
        raise TypeError(f"key must be a JAX PRNG key (jax.random.key(seed)); got {type(key).__name__}.")
    if jax.dtypes.issubdtype(key.dtype, jax.dtypes.prng_key):
        if key.shape != ():
            raise ValueError(
                f"key must be a single PRNG key, shape (); got shape {tuple(key.shape)}. "
                "For one sample per key, use jax.vmap over the keys."
            )
        return
    if key.dtype != jnp.uint32 or key.shape != (2,):
        raise ValueError(
            f"key must be a single PRNG key: jax.random.key(seed), or a raw uint32 key of shape (2,); "
            f"got dtype {key.dtype} and shape {tuple(key.shape)}. For one sample per key, use jax.vmap."
        )


def sample_states(key, model: StateSpace, y, mask=None, *, num_samples: Optional[int] = None,
                  method: str = "auto"):
    r"""Draw state paths x_0..x_{T-1} from the smoothing posterior p(x | observed y).

    x = x̂ + L⁻ᵀ z with z ~ N(0, I), where x̂ are the smoothed means and
    H = L Lᵀ the block Cholesky factor of the posterior precision (derivation
    in the module docstring of ``kalmax/_src/sampling.py``). Joint draws: the
    samples carry the correlations between time steps, not only the
    marginal covariances.

    Args:
        key: a JAX PRNG key (``jax.random.key(seed)``; raw uint32 keys of
            shape (2,) work too). For one sample per key, ``jax.vmap`` over
            a batch of keys.
        model: a :class:`StateSpace`; fields may carry a leading time axis.
        y: (T, p) measurements. Missing entries may hold any value, NaN too.
        mask: (T, p) bool, True where y is observed. Default: ``~isnan(y)``.
        num_samples: None for one path, shape (T, n); an int S for S paths
            from one factorisation, shape (S, T, n).
        method: the solver backend for the smoothed means x̂, as in
            :func:`smooth`. The factor L is always the portable JAX block
            Cholesky (the compiled CPU kernel stores its factor in another
            layout).

    Returns:
        (T, n) or (num_samples, T, n) samples, in the dtype of the model and
        y. NaN when the states are not identified (flat prior and too
        little observed).

    Reparameterised: with the key held fixed the samples are a
    differentiable function of ``model`` and ``y``, so ``jax.grad`` of a
    Monte-Carlo loss gives its pathwise gradient. ``jit`` and ``vmap`` (over
    keys, data or models) compose. Shapes are checked at trace time.

    Example:
        >>> model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=0.1 * jnp.eye(1), R=jnp.eye(1))
        >>> y = jnp.array([[1.0], [jnp.nan], [3.0]])
        >>> xs = kx.sample_states(jax.random.key(0), model, y, num_samples=1000)
        >>> xs.shape
        (1000, 3, 1)
        >>> one_per_key = jax.vmap(lambda k: kx.sample_states(k, model, y))(jax.random.split(jax.random.key(1), 4))
        >>> one_per_key.shape
        (4, 3, 1)
    """
    _check_key(key)
    if num_samples is not None and (
        isinstance(num_samples, bool) or not isinstance(num_samples, (int, np.integer)) or num_samples < 1
    ):
        raise ValueError(f"num_samples must be None or a positive int; got {num_samples!r}.")
    model, y, mask, _, dtype = canonicalize(model, y, mask)
    x = _sample(key, model, y, mask.astype(dtype), 1 if num_samples is None else int(num_samples),
                resolve_method(method))
    return x[0] if num_samples is None else x


@partial(jax.jit, static_argnums=(4, 5))  # compiled once per shape
def _sample(key, model: StateSpace, y, w, num_samples: int, method: str):
    T, n = y.shape[0], model.A.shape[-1]
    dtype = y.dtype
    x_hat = smoothed_means(model, y, w, method)

    # H does not depend on the values of y, the offsets or the prior mean: drop
    # them, so that a non-finite one cannot reach the factor.
    system = assemble(model.replace(b=None, d=None, x0_mean=None), jnp.zeros_like(y), w)
    _, factor = blocktri.factor_solve(system.diag, system.sub, jnp.zeros((T, n), dtype))

    z = jax.random.normal(key, (num_samples, T, n), dtype)
    u = blocktri.back_substitute(factor, jnp.moveaxis(z, 0, -1))  # (T, n, S)
    x = x_hat[None] + jnp.moveaxis(u, -1, 0)
    return jnp.where(factor.ok, x, jnp.nan)
