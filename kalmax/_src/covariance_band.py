r"""The band of the posterior covariance Σ = H⁻¹ as a differentiable function of the model.

``smooth(..., covariances=True)`` returns Σ_tt and Σ_{t+1,t}: the block
tridiagonal band of Σ = H⁻¹, where H(θ) is the normal-equation matrix of
``normal_equations.assemble`` (it depends on the model and on which entries
are observed, never on the values of y, the offsets b, d or the prior mean).
The value is the backend's selected inversion over its stored factor. This
module gives it derivatives that never record a tape through time.

Tangent. With F(H) = band(H⁻¹),

    dΣ = dF[dH] = −band(Σ dH Σ),   dH = ∂_θ H · dθ,

where dH is the tangent of the assembly (vectorised over t, no recursion;
``precision_tangent_of_model``) and
dF[dH] is the tangent of the factorisation and the selected inversion, run by
hand over the stored factor and the computed band: one forward and one
backward sweep, O(T n³) (``blocktri.selected_inverse_tangent`` has the
recursions; the compiled kernel runs the same ones, ``cpu/band_tangent.h``).

Reverse mode. In the coordinates of the arrays, (diag blocks D_t, sub blocks
S_t = H_{t+1,t}, the super blocks being S_tᵀ), the transpose of dF is dF
itself up to the weight of the off-diagonal blocks: for a cotangent
(Σ̄_tt, Σ̄_{t+1,t}),

    ⟨Σ̄, dF[dH]⟩ = ⟨−Σ B Σ, dH⟩_F,   B = ½(B̃ + B̃ᵀ), B̃ = Σ̄ placed on the band,

so the cotangent of H's blocks is (dF_D[B], 2 dF_S[B]) with B's diagonal
blocks sym(Σ̄_tt) and sub blocks ½ Σ̄_{t+1,t} (the sub block appears twice in
H, once transposed). The model's cotangent is then the transpose of the
assembly's tangent (vectorised: per-step products, no reverse pass through
the per-step Cholesky factors).
Two sweeps over the factor, no tape, and JAX never differentiates the sweeps.

The assembly's transpose by a backend (``band_pullback``, the compiled
kernel's one pass per step). dH = L(θ)[dθ] is linear in dθ but not square,
and ``custom_linear_solve`` wants a square map; so the map is embedded in
one on the pair (dθ, h), flattened into one vector:

    solve([u; h]) = [u; h + L u],   its inverse  matvec([u; h]) = [u; h − L u],
    transpose     [ū; h̄] ↦ [ū + Lᵀh̄; h̄],

with right-hand side [dθ; 0] and dH the second half of the result. Forward
mode evaluates L (JAX, as without a pull-back); reverse mode evaluates only
the transpose, i.e. the backend's pull-back of h̄ = (D̄, S̄); and the next
order differentiates ``matvec``, which is L in JAX: d(solve)·b =
−solve(d(matvec)(solve b)) = [0; (dL) u], the derivative of L u w.r.t. the
model, as it should be. Backends without ``band_pullback`` keep JAX's
transpose of L (the oracle in the tests).

How JAX is told. JAX 0.10 has no public way to attach a transpose to a linear
map, except through ``lax.custom_linear_solve``: its value is ``solve(b)``,
its transpose is ``transpose_solve``, and its own derivative (the next order)
comes from ``matvec``, the map that ``solve`` inverts, which must then be
exact and differentiable. Here dF is that solve, and its inverse has a closed
form: H is block tridiagonal, so the band of Σ determines H clique by clique
(the precision of a Gaussian Markov chain from its pairwise marginals):

    H = Σ_{t<T-1} E_t K_t⁻¹ E_tᵀ − Σ_{0<t<T-1} e_t Σ_tt⁻¹ e_tᵀ,
    K_t = [[Σ_tt, Σ_{t+1,t}ᵀ], [Σ_{t+1,t}, Σ_{t+1,t+1}]],

(E_t, e_t place a 2n- or n-block at steps t..t+1 or t; Lauritzen (1996),
Graphical Models, §5.3 — from memory), so

    dF⁻¹[X] = −Σ_t E_t K_t⁻¹ X_{K_t} K_t⁻¹ E_tᵀ + Σ_{0<t<T-1} e_t Σ_tt⁻¹ X_tt Σ_tt⁻¹ e_tᵀ,

vectorised over t. It is evaluated only by second-order derivatives (the
JVP of a custom_linear_solve w.r.t. its matvec's inputs, here Σ); first-order
derivatives never form K_t⁻¹.

Why a ``custom_jvp`` and not a ``custom_vjp``: with the tangent rule, forward
mode (jvp, jacfwd) is one band-tangent sweep pair per direction, and reverse
mode is the transpose that JAX derives (the transposed solve above, then the
VJP of the assembly); a ``custom_vjp`` would be refused by forward mode and
by ``jax.hessian`` (forward over reverse). Second derivatives: the rule
computes Σ by calling this function itself, so Σ's tangent at the next order
comes from the same rule, and the solve's derivative from the closed-form
matvec; still no tape through time.

Backends without a ``band_tangent`` (the parallel and recomputing solvers,
whose factors are not block Cholesky factors, and the covariance-form
filter, which is differentiated through its own recursions) keep the
previous route: JAX differentiates their band inverse directly
(:func:`taped_posterior_band`, also the reference in the tests).
"""

from __future__ import annotations

from functools import partial

import jax
from jax.flatten_util import ravel_pytree
import jax.numpy as jnp
from jax import lax

from . import fallback
from .linalg import mT, spd_inverse
from .model import StateSpace
from .normal_equations import dynamics_blocks, measurement_precision_tangent
from .primitive import _instantiate, _zero_tangents, band_inverse
from .backends.registry import fallback_method, get_backend, resolve_method


def _sym(X):
    return 0.5 * (X + mT(X))


def _factor_and_band(model: StateSpace, w, method: str):
    backend = get_backend(method)
    _, factor = backend.forward(model, jnp.zeros(w.shape, w.dtype), w)
    return band_inverse(backend, factor), factor


@partial(jax.custom_jvp, nondiff_argnums=(2,))
def _band(model: StateSpace, w, method: str):
    """((Σ_tt, Σ_{t+1,t}), factor); the factor's tangent is declared zero (it only feeds the solve)."""
    return _factor_and_band(model, w, method)


@partial(_band.defjvp, symbolic_zeros=True)
def _band_jvp(method, primals, tangents):
    model, w = primals
    model_dot = _instantiate(tangents[0], model)
    # The function itself, so that Σ's tangent at the next order comes from this rule too.
    (S_diag, S_sub), factor = _band(model, w, method)
    T, n = S_diag.shape[0], S_diag.shape[-1]
    backend = get_backend(method)
    if backend.band_pullback is None:
        dD, dS = precision_tangent_of_model(model, w, model_dot, T)
        dS = jnp.broadcast_to(dS, (max(T - 1, 0), n, n))  # time-invariant transition: one block
    else:
        dD, dS = precision_tangent_with_pullback(backend.band_pullback, model, w, model_dot, T)
    dSigma = band_tangent(backend.band_tangent, factor, S_diag, S_sub, dD, dS)
    return ((S_diag, S_sub), factor), (dSigma, _zero_tangents(factor))


def precision_tangent_of_model(model: StateSpace, w, model_dot, T: int):
    """dH = ∂_θH · dθ as (dH_tt (T, n, n), dH_{t+1,t} (T-1, n, n) or (n, n)).

    The transition and prior terms by JAX's JVP of ``dynamics_blocks`` (n×n
    blocks); the measurement terms by ``measurement_precision_tangent``,
    whose transpose needs no reverse pass through the per-step factors of R
    (measured at T = 10⁵, n = p = 10: JAX's VJP of the whole assembly cost
    several times the band-tangent sweeps themselves).
    """
    names = [f for f in ("A", "Q", "x0_cov") if getattr(model, f) is not None]
    dyn = lambda *v: dynamics_blocks(model.replace(**dict(zip(names, v))), T)  # noqa: E731
    _, (dD, dS) = jax.jvp(dyn, tuple(getattr(model, f) for f in names), tuple(getattr(model_dot, f) for f in names))
    return dD + measurement_precision_tangent(model, w, model_dot.C, model_dot.R), dS


# The fields H depends on (the offsets and the prior mean do not enter it).
_PRECISION_FIELDS = ("A", "Q", "C", "R", "x0_cov")


def precision_tangent_with_pullback(pullback, model: StateSpace, w, model_dot, T: int):
    """dH as :func:`precision_tangent_of_model` (full (T-1, n, n) sub blocks), transposed by ``pullback``.

    pullback: a backend's ``band_pullback``, ``(model, w, D̄, S̄) -> model_bar``,
    used as the transpose of dθ ↦ dH (module docstring: the embedding in a
    square ``custom_linear_solve``). Never differentiated itself.
    """
    n = model.A.shape[-1]
    names = [f for f in _PRECISION_FIELDS if getattr(model, f) is not None]
    u0, unravel = ravel_pytree([getattr(model_dot, f) for f in names])
    m = u0.shape[0]
    size_D, size_S = T * n * n, max(T - 1, 0) * n * n
    fixed = lax.stop_gradient(model)

    def tangent(mdl, u):  # L u, flattened
        dD, dS = precision_tangent_of_model(mdl, w, model_dot.replace(**dict(zip(names, unravel(u)))), T)
        dS = jnp.broadcast_to(dS, (max(T - 1, 0), n, n))
        return jnp.concatenate([dD.reshape(-1), dS.reshape(-1)])

    def solve(_, v):
        return jnp.concatenate([v[:m], v[m:] + tangent(fixed, v[:m])])

    def matvec(v):  # the model itself (not stopped): it carries the next order
        return jnp.concatenate([v[:m], v[m:] - tangent(model, v[:m])])

    def transpose_solve(_, ct):
        D_bar = ct[m:m + size_D].reshape(T, n, n)
        S_bar = ct[m + size_D:].reshape(max(T - 1, 0), n, n)
        bar = pullback(fixed, w, D_bar, S_bar)
        u_bar, _ = ravel_pytree([getattr(bar, f) for f in names])
        return jnp.concatenate([ct[:m] + u_bar.astype(ct.dtype), ct[m:]])

    rhs = jnp.concatenate([u0, jnp.zeros(size_D + size_S, u0.dtype)])
    x = lax.custom_linear_solve(matvec, rhs, solve, transpose_solve)
    return x[m:m + size_D].reshape(T, n, n), x[m + size_D:].reshape(max(T - 1, 0), n, n)


def band_tangent(sweep, factor, S_diag, S_sub, dD, dS):
    """dΣ = −band(Σ dH Σ) by ``sweep``, with the transpose and inverse JAX needs (module docstring).

    sweep: ``(factor, S_diag, S_sub, dH_diag, dH_sub) -> (dΣ_diag, dΣ_sub)``,
    a backend's ``band_tangent``. Never differentiated itself.
    """
    # The solve's inputs: a custom_linear_solve never differentiates its solve
    # (its derivative comes from the matvec), so nothing is lost by stopping them.
    fixed = lax.stop_gradient((factor, S_diag, S_sub))
    T = S_diag.shape[0]

    # One array (diagonal blocks, then sub blocks): JAX transposes a
    # custom_linear_solve only when every part of its right-hand side is
    # linear, and a part that does not depend on the differentiated inputs
    # (dH_{t+1,t} when only R moves) is not.
    def split(v):
        return v[:T], v[T:]

    def join(parts):
        return jnp.concatenate(parts, axis=0)

    def solve(_, dH):
        return join(sweep(*fixed, *split(dH)))

    def transpose_solve(_, ct):
        ct_diag, ct_sub = split(ct)
        X_diag, X_sub = sweep(*fixed, ct_diag, 0.5 * ct_sub)
        return join((X_diag, 2 * X_sub))

    def matvec(X):
        # Σ itself (not stopped) here: it carries Σ's tangent to the next order.
        return join(precision_tangent(S_diag, S_sub, *split(X)))

    return split(lax.custom_linear_solve(matvec, join((dD, dS)), solve, transpose_solve))


def precision_tangent(S_diag, S_sub, X_diag, X_sub):
    """dF⁻¹[X]: the tangent of H when Σ's band moves by X (module docstring), vectorised over t.

    Args:
        S_diag, S_sub: the band of Σ = H⁻¹.
        X_diag: (T, n, n) (its symmetric part is used); X_sub: (T-1, n, n).

    Returns:
        (dH_diag (T, n, n), dH_sub (T-1, n, n)).
    """
    T, n = S_diag.shape[0], S_diag.shape[-1]
    XD = _sym(X_diag)
    if T == 1:
        Si = spd_inverse(S_diag)
        return -(Si @ XD @ Si), X_sub
    K = jnp.concatenate([jnp.concatenate([S_diag[:-1], mT(S_sub)], axis=-1),
                         jnp.concatenate([S_sub, S_diag[1:]], axis=-1)], axis=-2)
    dK = jnp.concatenate([jnp.concatenate([XD[:-1], mT(X_sub)], axis=-1),
                          jnp.concatenate([X_sub, XD[1:]], axis=-1)], axis=-2)
    Ki = spd_inverse(K)
    Z = -(Ki @ dK @ Ki)
    dH_diag = jnp.zeros_like(XD).at[:-1].add(Z[:, :n, :n]).at[1:].add(Z[:, n:, n:])
    if T > 2:
        Si = spd_inverse(S_diag[1:-1])
        dH_diag = dH_diag.at[1:-1].add(Si @ XD[1:-1] @ Si)
    return _sym(dH_diag), Z[:, n:, :n]


def posterior_band(model: StateSpace, w, method: str = "auto"):
    """(Σ_tt (T, n, n), Σ_{t+1,t} (T-1, n, n)) for a canonical problem, differentiable without a tape.

    The result is NaN when the factor failed. ``method="auto"`` falls back to
    the covariance-form filter's band, per trajectory, where the platform's
    backend returns NaN for a finite problem with a prior (``fallback.py``).
    """
    slow = fallback_method(method, flat_prior=model.x0_cov is None, p=w.shape[-1])
    method = resolve_method(method)
    # Offsets and the prior mean do not enter H: drop them, so that a
    # non-finite one cannot fail the factor through the accuracy check.
    model = model.replace(b=None, d=None, x0_mean=None)
    w = lax.stop_gradient(w)
    if slow is None:
        return _posterior_band(model, w, method)

    def filter_band(m, ww):  # the fallback, NaN unless Q, R and x0_cov are valid covariances
        ok = lax.stop_gradient(fallback.covariances_valid(m))
        return jax.tree_util.tree_map(lambda a: jnp.where(ok, a, jnp.nan), taped_posterior_band(m, ww, slow))

    return fallback.with_fallback(partial(_posterior_band, method=method), filter_band,
                                  lambda m, ww: fallback.finite_problem(m, None, ww), model, w)


def _posterior_band(model: StateSpace, w, method: str):
    if get_backend(method).band_tangent is None:
        return taped_posterior_band(model, w, method)
    return _band(model, w, method)[0]


def taped_posterior_band(model: StateSpace, w, method: str = "auto"):
    """The same band, differentiated by JAX through the backend's own recursions (the previous route).

    Kept for backends without a ``band_tangent`` and as the tests' reference.
    """
    model = model.replace(b=None, d=None, x0_mean=None)
    return _factor_and_band(model, lax.stop_gradient(w), resolve_method(method))[0]
