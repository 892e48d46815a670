r"""Exact marginal log-likelihood of the observed measurements.

With the smoothed means x* (the maximiser of the joint density) and the
normal-equation matrix H (the precision of p(x | y)),

    log p(y_K) = log p(x*, y_K) − log p(x* | y_K)
               = −J(x*) − ½ log|H| − ½ log|P_0| − ½ Σ_{t<T-1} log|Q_t|
                 − ½ Σ_t log|R_{t,KK}| − (N_K − n_flat)/2 · log 2π,

where N_K counts the observed entries and J is the objective of
``normal_equations``. log|H| = 2 Σ_t Σ_i log (L_t)_ii from the block Cholesky
factor of the forward solve; log|R_{t,KK}| = log|R̃_t| because R̃_t is R_KK
padded with an identity block.

Flat prior convention ("diffuse"): without ``x0_cov`` the first state has the
improper density 1, so p(y_K) = ∫ p(x, y_K) dx; the P_0 term disappears and
n_flat = n fewer 2π factors remain (the prior's normalisation is absent).
With a proper prior, n_flat = 0.

Gradient, from the same factor and no tape through the recursion:
- −J(x*; θ): by the envelope theorem (∇ₓJ = 0 at x*) its total derivative is
  the partial −∂_θ J(x; θ) at fixed x = x*.
- −½ log|H(θ)|: d = −½ tr(H⁻¹ dH), which needs only the block-tridiagonal band
  of Σ = H⁻¹ (selected inversion). As a cotangent on H's blocks that is
  −½ Σ_tt on H_tt and −Σ_{t+1,t} on H_{t+1,t} (the off-diagonal blocks appear
  twice in the trace); pulling it back through the (vectorised, scan-free)
  assembly of H gives the gradient for every model field.
- the log-determinants of Q, R̃ and P_0: ordinary AD of per-step Cholesky factors.

The gradient w.r.t. Q is then assembled from a different, algebraically equal
form (``_process_noise_gradient``). Per transition, the three routes above add
up to Fisher's identity

    Q̄_t = ½ Q_t⁻¹ (r_t r_tᵀ + W_t − Q_t) Q_t⁻¹,
    W_t = Cov[r_t | y] = Σ_{t+1} − A_tΣ_{t+1,t}ᵀ − Σ_{t+1,t}A_tᵀ + A_tΣ_tA_tᵀ,

and when the process noise is small beside the posterior covariances (a
slowly varying signal seen through noisy measurements) W_t − Q_t is
O(|Q|²/|Σ|), a difference of O(|Σ|) numbers: the rounding error eps·|Σ| of
W_t becomes eps·|Σ|/|Q|² in Q̄_t, against a true size of O(1/|Σ|), a
relative error of eps·(|Σ|/|Q|)², the square of the condition of H. (Measured
on ordinary tracking models with q/r ≈ 1e-6: the Q-gradient 10⁵ times off in
double, and still wrong in long double.) Write μ_t = Q_t⁻¹r_t and
Λ_t = Q_t⁻¹(Q_t − W_t)Q_t⁻¹, so Q̄_t = ½ (μ_tμ_tᵀ − Λ_t), and form Λ_t without
the cancellation. Let O_s = C̃_sᵀS_sC̃_s (the measurement's information) and

    Z_t = Q_t⁻¹(Σ_{t+1} − A_tΣ_{t+1,t}ᵀ) = Q_t⁻¹ Cov[w_t, x_{t+1} | y],
    Y_s = Q_s⁻¹(Σ_{s+1,s} − A_sΣ_s)     = Q_s⁻¹ Cov[w_s, x_s | y]      (Y_{T-1} = 0),

w_t = x_{t+1} − A_tx_t − b_t. Split the posterior at x_{t+1} into the
prediction from y_{0..t}, covariance P⁻, and the information Ω that
y_{t+1..T-1} carry about x_{t+1}: Σ_{t+1}⁻¹ = P⁻⁻¹ + Ω. Given x_{t+1} the
noise w_t depends on the past only, E[w_t | x_{t+1}, y] = Q_tP⁻⁻¹(x_{t+1} − m⁻) with
m⁻ the predicted mean,
so Z_t = P⁻⁻¹Σ_{t+1}; and W_t = Q_t − Q_tP⁻⁻¹(P⁻ − Σ_{t+1})P⁻⁻¹Q_t with
P⁻ − Σ_{t+1} = Σ_{t+1}ΩP⁻, so Λ_t = P⁻⁻¹Σ_{t+1}Ω = Z_t Σ_{t+1}⁻¹ (ΩΣ_{t+1})ᵀ.
Block row t+1 of HΣ = I reads Z_t + O_{t+1}Σ_{t+1} − A_{t+1}ᵀY_{t+1} = I, and
I − Z_t = ΩΣ_{t+1}, hence

    Λ_t = Z_t Σ_{t+1}⁻¹ (O_{t+1}Σ_{t+1} − A_{t+1}ᵀY_{t+1})ᵀ.

No O(|Σ|) numbers cancel down to O(|Q|) here beyond the first-order
differences inside Z and Y, whose error eps·|Σ|/|Q| is relative eps·κ(H),
that of the states themselves. μ_t is the same Q⁻¹r_t as before (the
transition residual is O(|Q|·|μ|), formed once). Ā, b̄ and the other fields
keep the envelope/selected-inversion route: their terms cancel to first order
only. A diagonal Q_t = diag(q_t) (``DiagonalNoise``) has as its gradient the
diagonal of Q̄_t, dQ_t = e_ie_iᵀ dq_ti: ½ (μ_ti² − (Λ_t)_ii), with Q_t⁻¹ a
division by q_t and only the diagonal of Λ_t formed.

``method="auto"`` wraps all of this in ``fallback.py``: where the value is
NaN for a finite problem with a prior, the covariance-form filter's
prediction-error decomposition (``backends/covariance_form.py``) and its
derivatives by JAX through that filter replace it, per trajectory.

Derivative rules: a ``custom_jvp`` whose tangent is ⟨∇ log p, dθ⟩, the
gradient coming from the same pass as the value (one compiled call on the
kernel). JAX transposes that into reverse mode (the cotangent times the
gradient: no extra work), and forward mode (jvp, jacfwd) costs one gradient.
Second derivatives differentiate ``value_and_gradient``. On a pure-JAX
backend that is plain JAX on its factor (JAX differentiates the factorisation
and the selected inversion through their recursions over time).

Second derivatives on the compiled kernel, without a tape through time. The
gradient above is a vectorised function of θ, of x* and of the band of Σ:

    g(θ) = G(θ, x*(θ), Σ(θ)),

G = the envelope partials of the explicit terms at x*, plus the cotangent
−½Σ on H's band pulled back through the assembly, with Q̄ in the form without
cancellation (``_gradient``). Its tangent needs dx* and the band of dΣ only,
and both have tangent rules that stay on the stored factor: dx* = H⁻¹r(dθ),
one solve (``primitive.py``), and dΣ = −band(Σ dH Σ), one band-tangent sweep
pair (``covariance_band.py``). The fused value and gradient therefore get the
rule

    d log p = ⟨g, dθ⟩,   dg = jvp of θ ↦ G(θ, x*(θ), band Σ(θ)),

and x*, Σ are recomputed inside by those two differentiable functions (the
value and g themselves stay the kernel's). The band suffices: dH is block
tridiagonal, so only Σ's band meets it. Check on the log-determinant part,
⟨g_H, dθ⟩ = −½ tr(Σ dH) with dH = ∂_θH·dθ: in a second direction dθ',

    d'(−½ tr(Σ dH)) = −½ tr(dΣ' dH) − ½ tr(Σ d'dH)
                    = ½ tr(Σ dH' Σ dH) − ½ tr(Σ d²H[dθ, dθ'])

with dΣ' = −Σ dH' Σ (d(H⁻¹) = −H⁻¹ dH H⁻¹): the first term is the pull-back
of −½dΣ' (its band) through the assembly, the second the derivative of the
pull-back itself at fixed Σ, which is exactly what the JVP of G computes from
the band tangent and JAX's second derivative of the assembly. The explicit
terms at x*: their partial ∂_θE(θ, x*) moves with θ and with x*, and
dx* is the implicit tangent (the envelope theorem removed ∂_xE only, not
∂_x∂_θE). Symmetric in dθ, dθ' (tr(AB) = tr(BA)), as a Hessian must be.
Reverse mode (jacrev of the gradient) is JAX's transpose of the same rule:
the solve and the band tangent are ``custom_linear_solve`` calls that
transpose into the same kernel sweeps. Each further order comes from the
same rules (x* and Σ are computed by the functions that own them).

Which G is differentiated. Any function equal to the gradient along the
solution, G(θ, x*(θ), Σ(θ)) = ∇ log p for all θ, has the same total
derivative, so the tangent may come from a cheaper G than the one above.
Fisher's identity gives one: ∇ log p = ∂_θ ℓ(θ; x*, Σ) with ℓ = E[log p(x, y; θ)]
under the posterior (``expected_joint.py``, used here: ``_fisher_gradient``).
ℓ is linear in the per-step moments, so for time-invariant fields it is a
function of θ and a few sums over time: its tangent is the θ–θ terms on n×n
matrices plus O(T n²) sums of the tangents of x* and of the band per
direction, where the envelope form above differentiates per-step Cholesky
factors (of R̃_t, of Σ_{t+1} in the Q form) and the pull-back through the
assembly in every direction. Measured (T = 10⁴, n = p = 4, k = 20, before
the change): the forward derivative of the envelope form took 3.5 s against
a 0.01 s compiled gradient; with ℓ the Hessian / gradient ratio went from
≈ 180 to 26–36 at T = 10³ and to 34–38 at T = 10⁵ (same process,
interleaved; benchmarks/RESULTS.md).
The value of ∂_θℓ is never used (the kernel's gradient is, with Q̄ in the
form without cancellation); ``_gradient_from_solution`` is kept as the
tests' second route.
"""

from __future__ import annotations

import math
from functools import partial

import jax
import jax.numpy as jnp

from . import fallback, manual_axes
from .backends import covariance_form
from .checks import canonicalize
from .linalg import chol, gram, lsolve, mT
from .model import StateSpace
from .noise import DiagonalNoise
from .normal_equations import assemble, masked_measurement_cov, objective, transition_cov, weighted_residuals
from .covariance_band import posterior_band
from .expected_joint import expected_log_joint
from .primitive import band_inverse, fallback_method, get_backend, resolve_method, smoothed_means


def _logdet_spd(S):
    return 2 * jnp.sum(jnp.log(jnp.diagonal(chol(S), axis1=-2, axis2=-1)))


def _explicit_terms(model: StateSpace, y, w, x):
    """Every term of log p(y_K) except −½ log|H|, as a function of (model, y) at fixed x."""
    T, _ = y.shape
    n = model.A.shape[-1]
    val = -objective(model, y, w, x)
    val = val - 0.5 * _logdet_spd(masked_measurement_cov(model.R, w))
    if T > 1:
        Q = transition_cov(model)
        ld_q = _logdet_spd(Q)
        val = val - 0.5 * (ld_q * (T - 1) if Q.ndim == 2 else ld_q)
    n_flat = 0
    if model.x0_cov is not None:
        val = val - 0.5 * _logdet_spd(model.x0_cov)
    else:
        n_flat = n
    return val - 0.5 * (jnp.sum(w) - n_flat) * math.log(2 * math.pi)


@partial(jax.custom_jvp, nondiff_argnums=(3,))
def _log_likelihood(model, y, w, method):
    return value_and_gradient(model, y, w, method)[0]


def _pairing(model_bar, y_bar, model_dot, y_dot):
    """⟨∇ log p, dθ⟩: the gradient paired with a tangent of (model, y)."""
    pairs = jax.tree_util.tree_leaves(jax.tree_util.tree_map(lambda g, d: jnp.sum(g * d), model_bar, model_dot))
    return sum(pairs, jnp.sum(y_bar * y_dot))


@_log_likelihood.defjvp
def _log_likelihood_jvp(method, primals, tangents):
    # d log p = ⟨∇ log p, dθ⟩ with the gradient of the same pass (module
    # docstring): linear in the tangents, so reverse mode is its transpose,
    # the gradient scaled by the cotangent. A fused backend therefore keeps
    # its one-call value and gradient in reverse mode; the gradient's own
    # derivatives (Hessians) come from value_and_gradient.
    model, y, w = primals
    model_dot, y_dot, _ = tangents
    val, model_bar, y_bar = value_and_gradient(model, y, w, method)
    return val, _pairing(model_bar, y_bar, model_dot, y_dot)


@partial(jax.custom_jvp, nondiff_argnums=(3,))
def _fused_value_and_gradient(model, y, w, method):
    """The backend's one-pass (log p(y), model_bar, y_bar); derivatives: module docstring."""
    backend = get_backend(method)
    x, factor = backend.forward(model, y, w)
    return backend.log_likelihood(model, y, w, x, factor)


@_fused_value_and_gradient.defjvp
def _fused_value_and_gradient_jvp(method, primals, tangents):
    # The value's tangent is ⟨∇ log p, dθ⟩; the gradient's is the JVP of the
    # gradient as a function of (θ, x*(θ), band of Σ(θ)), whose two implicit
    # inputs bring their own tape-free tangent rules (module docstring).
    # Calling this function itself for the primal keeps every higher order on
    # the same rule.
    model, y, w = primals
    model_dot, y_dot, _ = tangents
    val, model_bar, y_bar = _fused_value_and_gradient(model, y, w, method)
    _, (model_bar_dot, y_bar_dot) = jax.jvp(lambda m, yy: _GRADIENT_TANGENT_SOURCE(m, yy, w, method),
                                            (model, y), (model_dot, y_dot))
    return (val, model_bar, y_bar), (_pairing(model_bar, y_bar, model_dot, y_dot), model_bar_dot, y_bar_dot)


def _fisher_gradient(model, y, w, method):
    """(model_bar, y_bar) as the partial gradient of E[log p(x, y_K; θ)] at the posterior (``expected_joint``).

    Equal to ``_gradient_from_solution`` on the solution (Fisher's identity);
    its tangent costs O(T n²) per direction beyond the tangents of x* and of
    the band (module docstring).
    """
    x = smoothed_means(model, y, w, method)
    S_diag, S_sub = posterior_band(model, w, method)
    return jax.grad(expected_log_joint, argnums=(0, 1))(model, y, w, x, S_diag, S_sub)


def _gradient_from_solution(model, y, w, method):
    """(model_bar, y_bar) from x* and the band of Σ as differentiable functions of the model.

    x* by the smoothing primitive (tangent: one solve with the stored factor),
    the band by ``covariance_band`` (tangent: one band-tangent sweep pair over
    the stored factor); neither tapes through time.
    """
    x = smoothed_means(model, y, w, method)
    band = posterior_band(model, w, method)
    return _gradient(model, y, w, x, band)[1:]


# The differentiable function whose tangent is the gradient's tangent (module
# docstring); ``_gradient_from_solution`` is kept as the tests' oracle.
_GRADIENT_TANGENT_SOURCE = _fisher_gradient


def value_and_gradient(model, y, w, method):
    """(log p(y), model_bar, y_bar): the value and its gradient, differentiable again.

    A backend with a fused ``log_likelihood`` (the compiled kernel) returns
    both from one pass over its factor, and its second derivatives come from
    the tangents of x* and of Σ's band (module docstring). Otherwise the
    gradient is formed as in the module docstring (envelope theorem for −J,
    selected inversion for −½ log|H|) from plain JAX operations on the
    backend's factor; those are differentiated directly for second
    derivatives (the forward pass of a pure-JAX backend, and so its factor,
    is differentiable: ``accuracy.refine``).
    """
    backend = get_backend(method)
    if backend.log_likelihood is not None:
        return _fused_value_and_gradient(model, y, w, method)
    x, factor = backend.forward(model, y, w)
    explicit, model_bar, y_bar = _gradient(model, y, w, x, band_inverse(backend, factor))
    val = explicit - 0.5 * backend.logdet(factor)
    val = jnp.where(jnp.all(jnp.isfinite(x)), val, jnp.nan)
    return val, model_bar, y_bar


def _gradient(model, y, w, x, band):
    """(the explicit terms at x, model_bar, y_bar) from x = x* and band = (Σ_tt, Σ_{t+1,t}).

    Plain, vectorised JAX (no recursion over time): the envelope-theorem
    partials of the explicit terms, the cotangent −½ Σ on H's band pulled
    back through the assembly, and Q̄ in the form without cancellation.
    """
    explicit, pull = jax.vjp(lambda m, yy: _explicit_terms(m, yy, w, x), model, y)
    model_bar, y_bar = pull(jnp.ones_like(explicit))

    # −½ log|H|: the cotangent −½ Σ on H's band, pulled back through the assembly.
    S_diag, S_sub = band
    blocks = lambda m: assemble(m, y, w)[:2]  # noqa: E731  (diag, sub) of H; y does not enter H
    (diag, sub), pull_h = jax.vjp(blocks, model)
    sub_bar = -(S_sub if sub.ndim == 3 else jnp.sum(S_sub, axis=0))
    (model_bar_h,) = pull_h((-0.5 * S_diag, sub_bar.astype(sub.dtype)))
    model_bar = jax.tree_util.tree_map(jnp.add, model_bar, model_bar_h)
    if y.shape[0] > 1:  # Q̄ in the form without cancellation (module docstring)
        model_bar = model_bar.replace(Q=_process_noise_gradient(model, y, w, x, S_diag, S_sub))
    return explicit, model_bar, y_bar


def _process_noise_gradient(model: StateSpace, y, w, x, S_diag, S_sub):
    """Q̄ = ½ (μ_tμ_tᵀ − Λ_t) per step (summed for a time-invariant Q): module docstring.

    A diagonal Q (``DiagonalNoise``, variances q_t) gets the gradient w.r.t.
    its variances, the diagonal ½ (μ_ti² − (Λ_t)_ii); Q_t⁻¹ is then a division
    by q_t and only the diagonal of Λ_t is formed.
    """
    n = model.A.shape[-1]
    if isinstance(model.Q, DiagonalNoise):
        q = jnp.asarray(model.Q.variances)

        def qsolve(B):  # Q_t⁻¹ B = B / q_t by rows
            return B / q[..., :, None]
    else:
        Lq = chol(transition_cov(model))

        def qsolve(B):  # Q_t⁻¹ B for (T-1, n, m) B
            return lsolve(Lq, lsolve(Lq, B), transpose=True)

    A = jnp.broadcast_to(model.A, S_sub.shape)
    mu = weighted_residuals(model, y, w, x)[1]  # Q_t⁻¹ r_t
    Z = qsolve(S_diag[1:] - A @ mT(S_sub))
    Y = qsolve(S_sub - A @ S_diag[:-1])
    # O_s Σ_s, O_s = C̃ᵀS C̃ from the whitened rows (as in normal_equations.assemble).
    C = jnp.broadcast_to(model.C, (y.shape[0],) + model.C.shape[-2:])
    WC = lsolve(chol(masked_measurement_cov(model.R, w)), w[:, :, None] * C)
    OS = gram(WC) @ S_diag
    AtY = jnp.concatenate([mT(A[1:]) @ Y[1:], jnp.zeros((1, n, n), Y.dtype)])
    JS = OS[1:] - AtY  # Ω_{t+1} Σ_{t+1}
    Ls = chol(S_diag[1:])
    E = lsolve(Ls, lsolve(Ls, mT(JS)), transpose=True)  # Σ_{t+1}⁻¹ (Ω_{t+1}Σ_{t+1})ᵀ
    if isinstance(model.Q, DiagonalNoise):
        lam = jnp.einsum("tij,tji->ti", Z, E)  # diagonal of Λ_t = Z_t E_t
        qbar = 0.5 * (mu * mu - lam)
        return DiagonalNoise(qbar if q.ndim == 2 else jnp.sum(qbar, axis=0))
    Lam = Z @ E
    Qbar = 0.5 * (mu[:, :, None] * mu[:, None, :] - 0.5 * (Lam + mT(Lam)))
    return Qbar if model.Q.ndim == 3 else jnp.sum(Qbar, axis=0)


def log_likelihood(model: StateSpace, y, mask=None, *, method: str = "auto"):
    r"""Exact log-likelihood log p(observed y) of a linear-Gaussian state-space model.

    Computed from the block Cholesky factor of the smoothing solve (see the
    module docstring for the formula); its gradient uses the same factor plus
    a selected inversion — O(T n³) — rather than differentiating through the
    time recursion.

    With a prior (``x0_cov`` given) this is the ordinary Gaussian
    log-likelihood of the observed entries, equal to the Kalman filter's
    prediction-error decomposition. Without one it is the *diffuse*
    log-likelihood ∫ p(x, y_K) dx with a flat density 1 on x_0, whose 2π
    constant is −(N_K − n)/2 · log 2π (N_K observed entries).

    Args:
        model: :class:`StateSpace`.
        y: (T, p) measurements (NaN allowed at missing entries).
        mask: (T, p) bool, True = observed; default ``~isnan(y)``.
        method: solver backend, as in :func:`smooth` (``"auto"`` falls back to
            the covariance-form filter's log-likelihood per trajectory where
            the normal equations return NaN; its gradient is then reverse
            mode through that filter).

    Returns:
        scalar log-likelihood; NaN when the states are not identified.

    Example:
        >>> import jax, jax.numpy as jnp, kalmax as kx
        >>> m = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=jnp.eye(1), R=jnp.eye(1))
        >>> y = jnp.array([[0.5], [1.0], [0.7]])
        >>> g = jax.grad(lambda m: kx.log_likelihood(m, y))(m)
    """
    model, y, mask, _, dtype = canonicalize(model, y, mask, keep_diagonal_R=True, keep_diagonal_Q=True)
    slow = fallback_method(method, flat_prior=model.x0_cov is None, p=y.shape[-1])
    return _log_likelihood_checked(model, y, mask, resolve_method(method), slow)


# Compiled once per shape and method, after the checks (smoothing._smooth_checked says why).
@partial(jax.jit, static_argnums=(3, 4))
def _log_likelihood_checked(model: StateSpace, y, mask, method: str, slow=None):
    # One varying-axes type for all inputs under shard_map (manual_axes.py).
    model, y, w = manual_axes.like((model, y, jax.lax.stop_gradient(mask.astype(y.dtype))))
    if slow is None:
        return _log_likelihood(model, y, w, method)
    return fallback.with_fallback(partial(_log_likelihood, method=method), _filter_log_likelihood,
                                  fallback.finite_problem, model, y, w)


def _filter_log_likelihood(model: StateSpace, y, w):
    """log p(y) from the covariance-form filter's innovations, differentiated by JAX through the filter.

    The fallback of ``method="auto"`` (``fallback.py``); NaN unless its
    factors succeeded and Q, R and x0_cov are valid covariances.
    """
    _, f = covariance_form.sweep(model, y, w)
    ok = f.ok & jax.lax.stop_gradient(fallback.covariances_valid(model))
    return jnp.where(ok, f.log_lik, jnp.nan)
