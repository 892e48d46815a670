r"""The smoothing primitive: x* = argmin_x J(x; θ), with an implicit-function VJP.

Forward: assemble the block-tridiagonal normal equations H x = g and solve them
with a block Cholesky factorisation; keep the factor as the residual.

Backward (for a cotangent x̄ = ∂ℓ/∂x*): differentiate the optimality condition
∇ₓJ(x*(θ); θ) = 0,

    H dx* + ∂_θ(∇ₓJ) dθ = 0   ⇒   dx* = −H⁻¹ ∂_θ(∇ₓJ) dθ,

so with the adjoint u = H⁻¹ x̄ (one more solve with the *stored* factor; H is
symmetric) the gradient is

    θ̄ = −∂_θ [uᵀ ∇ₓJ(x; θ)]  evaluated at x = x*, with u and x* held fixed.

That scalar is a sum of per-step terms (``stationarity_pairing``), so its
gradient is formed by ordinary reverse-mode AD over vectorised per-step
operations: no tape through the time recursion, and every input (A, C, Q, R,
b, d, the prior and the measurements y) gets its gradient from the same
expression.

Backends: the solve itself is pluggable so that compiled kernels and
parallel-in-time variants can sit behind the same VJP. Each backend provides
``forward(model, y, w) -> (x, factor)`` and ``adjoint(factor, v) -> H⁻¹ v``.
"""

from __future__ import annotations

from functools import partial
from typing import Callable, Dict, NamedTuple, Optional

import jax
import jax.numpy as jnp

from . import accuracy, blocktri
from .model import StateSpace
from .normal_equations import assemble, stationarity_pairing


class Backend(NamedTuple):
    forward: Callable  # (model, y, w) -> (x (T, n), factor)
    adjoint: Callable  # (factor, v (T, n)) -> H⁻¹ v
    logdet: Callable  # (factor) -> log|H|
    # (factor) -> (Σ_tt (T, n, n), Σ_{t+1,t} (T-1, n, n)), the band of H⁻¹.
    # None: the factor is a blocktri.BlockFactor and blocktri.selected_inverse applies.
    band_inverse: Optional[Callable] = None
    # (model, y, w, x, factor, x_bar) -> (model_bar, y_bar): the whole backward
    # pass in one call (a fused compiled kernel). None: adjoint solve plus JAX
    # autodiff of stationarity_pairing.
    gradients: Optional[Callable] = None


def _scan_forward(model, y, w):
    system = assemble(model, y, w)
    x, factor = blocktri.factor_solve(system.diag, system.sub, system.rhs)
    x, ok = accuracy.refine(model, y, w, x, factor.ok, factor, blocktri.solve)
    return x, factor._replace(ok=ok)


SCAN = Backend(forward=_scan_forward, adjoint=blocktri.solve, logdet=blocktri.logdet)

_BACKENDS: Dict[str, Backend] = {"scan": SCAN}
METHODS = ("auto", "scan", "cpu")


def register_backend(name: str, backend: Backend) -> None:
    """Make a solver backend selectable as ``method=name``."""
    _BACKENDS[name] = backend


def resolve_method(method: str) -> str:
    if method == "auto":
        platform = jax.default_backend()
        # Accelerators: the parallel-in-time solve (O(log T) depth, registered
        # by kalmax._src.parallel) keeps the device busy; a scan would not.
        if platform in ("gpu", "cuda", "rocm", "tpu") and "parallel" in _BACKENDS:
            return "parallel"
        # The compiled kernel registers itself as "cpu" only when its library loaded.
        return "cpu" if "cpu" in _BACKENDS and platform == "cpu" else "scan"
    if method not in _BACKENDS:
        why = ""
        if method == "cpu":
            from . import cpu_backend  # only to explain why the kernel is missing

            why = f" method='cpu' needs the compiled CPU kernel, which is not available: {cpu_backend.LOAD_ERROR}"
        raise ValueError(f"method must be one of {sorted(set(_BACKENDS) | {'auto'})}; got {method!r}.{why}")
    return method


def get_backend(method: str) -> Backend:
    return _BACKENDS[resolve_method(method)]


def band_inverse(backend: Backend, factor):
    """The block-tridiagonal band of H⁻¹ from a backend's factor."""
    if backend.band_inverse is not None:
        return backend.band_inverse(factor)
    return blocktri.selected_inverse(factor)


@partial(jax.custom_vjp, nondiff_argnums=(3,))
def _means(model: StateSpace, y, w, method: str):
    x, _ = get_backend(method).forward(model, y, w)
    return x


def _means_fwd(model, y, w, method):
    x, factor = get_backend(method).forward(model, y, w)
    return x, (model, y, w, x, factor)


def _means_bwd(method, res, x_bar):
    model, y, w, x, factor = res
    backend = get_backend(method)
    if backend.gradients is not None:
        model_bar, y_bar = backend.gradients(model, y, w, x, factor, x_bar)
        return model_bar, y_bar, jnp.zeros_like(w)
    u = backend.adjoint(factor, x_bar)

    def pairing(model_, y_):
        return stationarity_pairing(model_, y_, w, x, u)

    _, pull = jax.vjp(pairing, model, y)
    model_bar, y_bar = pull(-jnp.ones((), x.dtype))
    return model_bar, y_bar, jnp.zeros_like(w)


_means.defvjp(_means_fwd, _means_bwd)


def smoothed_means(model: StateSpace, y, w, method: str = "auto"):
    """x* (T, n) for a canonicalised problem; differentiable in model and y.

    Args:
        model: canonicalised StateSpace (one float dtype).
        y: (T, p) measurements (missing entries arbitrary, NaN allowed).
        w: (T, p) 0/1 mask in the float dtype (1 = observed); not differentiated.
        method: backend name ("auto" picks the default for the platform).
    """
    return _means(model, y, jax.lax.stop_gradient(w), resolve_method(method))
