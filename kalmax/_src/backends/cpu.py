r"""The compiled CPU backend of the smoothing primitive (``method="cpu"``).

A C++ library (sources in ``kalmax/_src/cpu``, built by ``pip install``)
provides seven XLA FFI targets:

* ``kalmax_cpu_forward``: assembles the block-tridiagonal normal equations
  H x = g from the model, the measurements and the mask, factorises H = L Lᵀ
  and solves, in one sweep over time. Returns x (T, n) and a :class:`CpuFactor`:
  the inverses L_t⁻¹ (T, n, n) of the diagonal blocks (so that later solves are
  matrix-vector products, not chains of triangular substitutions), and the
  sub-diagonal blocks M (T-1, n, n) only when A or Q varies in time. For a
  time-invariant transition every M_t follows from L_{t-1} and the one block
  H_{t+1,t} (kept as ``subT``), so M is not stored: half the memory, and half
  the memory traffic of each later sweep over the factor.
* ``kalmax_cpu_solve``: H⁻¹ v with a stored factor, O(T n²).
* ``kalmax_cpu_gradients``: the whole backward pass of the implicit-function
  VJP: the adjoint u = H⁻¹ x̄ and then, for every input θ (A, Q, b, C, R, d,
  x0_mean, x0_cov, y), θ̄ = −∂_θ[uᵀ∇ₓJ(x; θ)] at x = x*, fused with the back
  substitution so that u is used as soon as it is known. The formulas are in
  ``cpu/smoother.h``; the JAX path (``stationarity_pairing``) is the oracle.
* ``kalmax_cpu_band``: the band of H⁻¹ (Σ_tt, Σ_{t+1,t}) by selected
  inversion over the stored factor (``cpu/likelihood.h``).
* ``kalmax_cpu_band_tangent``: −band(Σ dH Σ) for a band direction dH, from
  the stored factor and the band of Σ, in one forward and one backward sweep
  (``cpu/band_tangent.h``): the derivatives of the covariances, in both
  directions (``covariance_band.py``); ``blocktri.selected_inverse_tangent``
  is the oracle.
* ``kalmax_cpu_loglik``: log p(y) and its gradient w.r.t. every input, in one
  pass over the stored factor (``cpu/likelihood.h``).
* ``kalmax_cpu_band_pullback``: a cotangent on the blocks of H pulled back to
  the model (A, Q, C, R, x0_cov), per step, no factor needed
  (``cpu/band_pullback.h``, terms shared with the log-likelihood pass in
  ``cpu/precision_terms.h``): the last step of the covariances' reverse mode;
  JAX's VJP of ``normal_equations.dynamics_blocks`` and
  ``measurement_precision_tangent`` is the oracle.

The numerical settings of the forward pass (pivot tolerance, trusted error,
refinement steps, stall ratio) come from ``tolerances.py`` and travel as FFI
attributes on every call: the kernel has no copies of them.

float32: accurate answers from float32 inputs, computed in double
-----------------------------------------------------------------
A float32 call converts its operands to double on entry, runs the same
double-precision factorisation, refinement, solves, gradients and
likelihood as a float64 call, and rounds each result to float32 once
(``cpu/widen.h``). The factor, which lives between calls, keeps its double
precision as two float32 arrays per field: ``Linv`` = fl32(v) and
``Linv_lo`` = fl32(v − Linv) (likewise ``M``/``M_lo``, ``subT``/``subT_lo``);
the kernel adds them back (2⁻⁴⁸ relative). JAX code that reads the factor
(second-order derivatives, ``block_factor``, ``logdet``) uses the high part,
the float32 rounding of the double factor. A float64 call passes the low
parts as empty (0,) arrays. None of this depends on JAX's x64 switch.

Why: the normal equations H = FᵀF square the condition number of the
whitened least-squares problem, and ordinary tracking models are
ill-conditioned in exactly that way. The reported case (2-D constant
velocity, Q = diag(1e-5, 1e-5, 1e-2, 1e-2), R = I, prior N(0, 10 I), T = 60)
has κ₁(H) ≈ 1.1e6, so κ·eps ≈ 0.13 in float32: a float32 factor loses its
digits where H_tt = Q⁻¹ + AᵀQ⁻¹A + CᵀR⁻¹C adds a measurement precision of 1
to transition precisions of 1e5, and again in the Schur complements, whose
pivots (pivot² ≈ 4.5e-5·H_ii) are real information but only ~2 digits above
float32 rounding. The same factorisation in double keeps ~11 digits.
Measured on 200 ordinary tracking models (random walk / constant velocity /
constant acceleration, 1–3 axes, Δt 1e-3..10, q/r 1e-8..1e4;
``benchmarks/float32_sweep.py``), answers within 1e-3 of a float64 reference:
a float32 factor with refinement 42 % before and 46.5 % after the pivot
monitor change of ``tolerances.py`` (46.5 % with no pivot check at all), a
float32 square-root information (QR) factor with refinement 73.5 % (NumPy
prototype), this double factor 92 %, and a textbook float32 covariance
Kalman filter + RTS smoother 96 % (``benchmarks/float32_alternatives.py``).
Equilibration (symmetric diagonal scaling D H D, D = diag(H)^(-1/2), before a float32 factorisation
with the same refinement) measured 46.5 % against 46.5 % without it
(46.0 % with D rounded to powers of two): Cholesky is nearly invariant under
diagonal scaling (van der Sluis; Higham (2002), Accuracy and Stability of
Numerical Algorithms, §10.1 -- from memory), and so is the pivot ratio
pivot²/H_ii, so the digits lost to cancellation stay lost. The remaining cases are beyond
the normal equations in any precision: all were constant-acceleration
models with Δt ≤ 0.022 and q·Δ⁵/r ≤ 5e-12 (transition precisions 1e11 and
more times the measurement precisions); those come back NaN, never finite
and wrong.
Cost: double arithmetic plus O(T n²) conversions against the O(T n³)
factorisation, and the factor of a float32 call takes the memory of a
float64 one. At T = 10⁵, n = p = 10 (``benchmarks/float32_cost.py``) the
float32 forward went from 0.144 s to 0.241 s and value-and-gradient from
0.224 s to 0.32 s, against 0.19 s and 0.285 s for float64.

Time-invariant fields are passed once (their rank tells the kernel); absent
optional fields are passed as zero-size arrays. A diagonal R
(``noise.DiagonalNoise``) is passed as its variances, (p,) or (T, p), with
the attribute ``r_diagonal=1`` (the rank cannot say it: (T, p) and (p, p)
coincide when T = p); the kernel keeps it diagonal and returns its gradient
as variances too. A diagonal Q the same way: its variances (n,) or (T-1, n)
with ``q_diagonal=1``; the kernel uses Q⁻¹ = diag(1/q) and log|Q| = Σ log q
(no Cholesky factorisation per step of a time-varying Q) and returns Q̄ as
the gradient w.r.t. the variances, the diagonal of the dense Q̄. Every
call goes through ``kernel_calls.call``: under ``jax.vmap`` the kernel
receives the batched operands with a leading batch axis (size 1 where not
batched) and loops over the batch itself, so ``vmap``, ``grad`` and ``vmap``
of ``grad`` all reach one kernel call; on a batch sharded over devices each
device runs its own trajectories; and under ``jax.shard_map`` the results are
typed as varying like the operands.

If the library is missing or refused (e.g. built against a newer XLA FFI than
the installed jaxlib), ``LOAD_ERROR`` says why, the backend is registered as
unavailable with that reason (``backends/__init__.py``), ``method="auto"`` falls back to the pure-JAX ``"scan"`` path, and
``method="cpu"`` raises a ValueError quoting the reason.

Derivatives of the kernel calls themselves (needed only for second-order AD,
e.g. ``jax.hessian`` of a loss) come from pure-JAX equivalents of the same
computations (``_jax_forward`` etc.); first-order gradients never use them.

The kernel runs on the CPU backend only: with another default backend,
``"auto"`` picks ``"scan"``.
"""

from __future__ import annotations

import ctypes
import importlib.machinery
import os
from typing import NamedTuple, Optional

import jax
import jax.numpy as jnp
import numpy as np

from .. import blocktri, manual_axes, tolerances
from ..blocktri import BlockFactor
from ..linalg import lsolve, mT
from ..model import StateSpace
from ..noise import DiagonalNoise
from ..normal_equations import stationarity_pairing
from .base import Backend, checked_solve
from .kernel_calls import call as _call

LIBRARY_STEM = "_cpu_kernel"
# Where the build puts the library: kalmax/_src (setup.py, ``kalmax._src._cpu_kernel``).
LIBRARY_DIR = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# FFI target name -> exported C symbol.
_TARGETS = {
    "kalmax_cpu_forward": "KalmaxCpuForward",
    "kalmax_cpu_solve": "KalmaxCpuSolve",
    "kalmax_cpu_gradients": "KalmaxCpuGradients",
    "kalmax_cpu_band": "KalmaxCpuBand",
    "kalmax_cpu_band_tangent": "KalmaxCpuBandTangent",
    "kalmax_cpu_loglik": "KalmaxCpuLoglik",
    "kalmax_cpu_band_pullback": "KalmaxCpuBandPullback",
}
# The custom-call targets an exported program names (``exporting.kernel_export_checks``).
FFI_TARGETS = tuple(_TARGETS)

def library_path() -> Optional[str]:
    """Path of the compiled kernel library (in :data:`LIBRARY_DIR`), or None."""
    for suffix in importlib.machinery.EXTENSION_SUFFIXES:
        path = os.path.join(LIBRARY_DIR, LIBRARY_STEM + suffix)
        if os.path.exists(path):
            return path
    return None


def _load() -> Optional[str]:
    """Load the library and register its FFI targets; return None or the reason it failed."""
    if os.environ.get("KALMAX_DISABLE_CPU_KERNEL"):
        return "disabled by the KALMAX_DISABLE_CPU_KERNEL environment variable"
    path = library_path()
    if path is None:
        return (
            f"no compiled library {LIBRARY_STEM}*.so in {LIBRARY_DIR}; "
            "build it with `pip install --no-build-isolation -e .` (or `make venv`)"
        )
    try:
        lib = ctypes.CDLL(path)
        for target, symbol in _TARGETS.items():
            jax.ffi.register_ffi_target(target, jax.ffi.pycapsule(getattr(lib, symbol)), platform="cpu")
    except Exception as err:  # a broken or incompatible build must not break `import kalmax`
        return f"loading {path} failed: {type(err).__name__}: {err}"
    return None


def _absent(dtype):
    return jnp.zeros((0,), dtype)


def _operands(model: StateSpace, y, w):
    """The ten model/data operands in kernel order; absent fields as (0,) arrays."""
    dt = y.dtype

    def opt(a):
        return _absent(dt) if a is None else a

    return (
        model.A,
        _noise_operand(model.Q),
        opt(model.b),
        model.C,
        _noise_operand(model.R),
        opt(model.d),
        opt(model.x0_mean),
        opt(model.x0_cov),
        y,
        w,
    )


def _noise_operand(cov):
    """Q or R as the kernel reads it: the variances of a DiagonalNoise, else the dense blocks."""
    return cov.variances if isinstance(cov, DiagonalNoise) else cov


def _noise_attributes(model: StateSpace) -> dict:
    """The kernel's r_diagonal and q_diagonal attributes: 1 where R or Q comes as variances."""
    return dict(r_diagonal=np.int32(isinstance(model.R, DiagonalNoise)),
                q_diagonal=np.int32(isinstance(model.Q, DiagonalNoise)))


def _as_model_form(cov, g):
    """A kernel gradient of Q or R in the form of ``cov`` (a DiagonalNoise of the variances' gradients)."""
    return DiagonalNoise(g) if isinstance(cov, DiagonalNoise) else g


def _transition_is_invariant(model: StateSpace) -> bool:
    """A and Q time-invariant: the factor is then stored compactly (no M blocks)."""
    q = _noise_operand(model.Q)
    return model.A.ndim == 2 and q.ndim == (1 if isinstance(model.Q, DiagonalNoise) else 2)


def _sds(shape, dtype):
    return jax.ShapeDtypeStruct(tuple(shape), dtype)


class CpuFactor(NamedTuple):
    """Block Cholesky factor H = L Lᵀ as stored by the kernel.

    Linv: (T, n, n) the inverses L_t⁻¹ of the lower-triangular diagonal blocks
    (stored inverted so that every later solve is a matrix-vector product).
    M: (T-1, n, n) sub-diagonal blocks (M[t-1] = M_t = H_{t,t-1} L_{t-1}⁻ᵀ)
    when the transition varies in time, else shape (0, n, n). subT: (n, n)
    H_{t+1,t}ᵀ = −AᵀQ⁻¹ when the transition is time-invariant (else unused).
    ok: bool, False when the factorisation failed.
    Linv_lo, M_lo, subT_lo: for float32, the low parts of the kernel's double
    factor (each field is Linv + Linv_lo etc. to ~2⁻⁴⁸; module docstring);
    (0,) arrays for float64.
    x_lo: for float32, x_double − x (T, n), the low part of the forward's
    answer: the gradient and log-likelihood kernels form the transition
    residuals x_{t+1} − A x_t from x + x_lo, since float32 rounding of x can be
    larger than those residuals when Q is small. (0,) for float64.
    """

    Linv: object
    M: object
    subT: object
    ok: object
    Linv_lo: object
    M_lo: object
    subT_lo: object
    x_lo: object


def _lo_shapes(T: int, n: int, m_blocks: int, dtype):
    """Shapes of (Linv_lo, M_lo, subT_lo, x_lo): their fields' own for float32, (0,) for float64."""
    if np.dtype(dtype) == np.float32:
        return (T, n, n), (m_blocks, n, n), (n, n), (T, n)
    return (0,), (0,), (0,), (0,)


def settings_attributes(dtype, n: int, flat_prior: bool = True) -> dict:
    """The forward kernel's FFI attributes, read from ``tolerances`` (at trace time).

    The kernel's arithmetic is double for both dtypes, so the pivot tolerance
    is float64's; the trusted error is that of the interface dtype (a float32
    answer needs three correct digits, not six).
    """
    return dict(
        pivot_tolerance=np.float64(tolerances.pivot_tolerance(np.float64, n, flat_prior=flat_prior)),
        trusted_error=np.float64(tolerances.trusted_error(dtype)),
        max_refine_steps=np.int32(tolerances.max_refine_steps()),
        stall_ratio=np.float64(tolerances.stall_ratio()),
    )


def _kernel_forward(model: StateSpace, y, w):
    T, _ = y.shape
    n = model.A.shape[-1]
    dt = y.dtype
    compact = _transition_is_invariant(model)
    m_blocks = 0 if compact else T - 1
    out = (
        _sds((T, n), dt),
        _sds((T, n, n), dt),
        _sds((m_blocks, n, n), dt),
        _sds((n, n), dt),
        _sds((), jnp.int32),
    ) + tuple(_sds(s, dt) for s in _lo_shapes(T, n, m_blocks, dt))
    x, Linv, M, subT, ok, Linv_lo, M_lo, subT_lo, x_lo = _call(
        "kalmax_cpu_forward", out, *_operands(model, y, w),
        **settings_attributes(dt, n, flat_prior=model.x0_cov is None), **_noise_attributes(model))
    return x, CpuFactor(Linv=Linv, M=M, subT=subT, ok=ok != 0, Linv_lo=Linv_lo, M_lo=M_lo, subT_lo=subT_lo,
                        x_lo=x_lo)


def _factor_operands(factor: CpuFactor):
    return (factor.Linv, factor.M, factor.subT, factor.ok.astype(jnp.int32), factor.Linv_lo, factor.M_lo,
            factor.subT_lo)


def _kernel_adjoint(factor: CpuFactor, v):
    (x,) = _call("kalmax_cpu_solve", (_sds(v.shape, v.dtype),), *_factor_operands(factor), v)
    return x


def block_factor(factor: CpuFactor) -> BlockFactor:
    """The same factor as the pure-JAX path keeps it: L_t and every M_t.

    L_t = (L_t⁻¹)⁻¹ is one batched triangular solve; for the compact form
    M_t = H_{t,t-1} L_{t-1}⁻ᵀ = (L_{t-1}⁻¹ subT)ᵀ, one batched product. No
    recursion over time.
    """
    Linv = factor.Linv
    n = Linv.shape[-1]
    L = lsolve(Linv, jnp.broadcast_to(jnp.eye(n, dtype=Linv.dtype), Linv.shape))
    if factor.M.shape[-3] == Linv.shape[-3] - 1:
        M = factor.M
    else:
        M = mT(Linv[:-1] @ factor.subT)
    return BlockFactor(L=L, M=M, ok=factor.ok)


def logdet(factor: CpuFactor):
    """log|H| = 2 Σ_t Σ_i log (L_t)_ii = −2 Σ_t Σ_i log (L_t⁻¹)_ii."""
    d = jnp.diagonal(factor.Linv, axis1=-2, axis2=-1)
    return -2 * jnp.sum(jnp.log(d))


def _kernel_band(factor: CpuFactor):
    T, n = factor.Linv.shape[-3], factor.Linv.shape[-1]
    dt = factor.Linv.dtype
    out = (_sds((T, n, n), dt), _sds((max(T - 1, 0), n, n), dt))
    return _call("kalmax_cpu_band", out, *_factor_operands(factor))


def _jax_band(factor: CpuFactor):
    return blocktri.selected_inverse(block_factor(factor))


def band_tangent(factor: CpuFactor, S_diag, S_sub, dH_diag, dH_sub):
    """(dΣ_tt, dΣ_{t+1,t}) = −band(Σ dH Σ): one compiled forward and backward sweep over the factor.

    Linear in (dH_diag, dH_sub); ``covariance_band.py`` gives it its
    transpose and its derivatives, so it needs no derivative rule. float32
    operands are computed in double like every other kernel pass.
    """
    dt = factor.Linv.dtype
    ops = tuple(a.astype(dt) for a in (S_diag, S_sub, dH_diag, dH_sub))
    out = (_sds(S_diag.shape[-3:], dt), _sds(S_sub.shape[-3:], dt))
    return _call("kalmax_cpu_band_tangent", out, *_factor_operands(factor), *ops)


def band_pullback(model: StateSpace, w, D_bar, S_bar):
    """The model's cotangent for a cotangent (D̄ (T, n, n), S̄ (T-1, n, n)) on H's blocks, one compiled pass.

    Returns a StateSpace with A, Q, C, R (in the model's own forms: a
    DiagonalNoise of the variances' cotangents) and x0_cov (None for a flat
    prior); the offsets and the prior mean, which H does not depend on, are
    None. Linear in (D̄, S̄); ``covariance_band.py`` uses it as the transpose
    of the assembly's tangent and never differentiates it. float32 in double.
    """
    dt = w.dtype
    bare = model.replace(b=None, d=None, x0_mean=None)
    ops = _operands(bare, w, w)  # w stands in for y: only its shape is read
    out = tuple(_sds(o.shape, o.dtype) for o in ops[:9])
    gA, gQ, _, gC, gR, _, _, gP0, _ = _call(
        "kalmax_cpu_band_pullback", out, *ops, D_bar.astype(dt), S_bar.astype(dt), **_noise_attributes(model))
    return StateSpace(A=gA, C=gC, Q=_as_model_form(model.Q, gQ), R=_as_model_form(model.R, gR),
                      x0_cov=None if model.x0_cov is None else gP0)


def _jax_band_tangent(factor: CpuFactor, S_diag, S_sub, dH_diag, dH_sub):
    return blocktri.selected_inverse_tangent(block_factor(factor), S_diag, S_sub, dH_diag, dH_sub)


def _kernel_gradients(model: StateSpace, y, w, x, factor: CpuFactor, x_bar):
    ops = _operands(model, y, w)
    out = tuple(_sds(o.shape, o.dtype) for o in ops[:9])
    gA, gQ, gb, gC, gR, gd, gm0, gP0, gy = _call(
        "kalmax_cpu_gradients", out, *_factor_operands(factor), x, factor.x_lo, x_bar.astype(x.dtype), *ops,
        **_noise_attributes(model)
    )

    def keep(g, field):
        return None if getattr(model, field) is None else g

    model_bar = StateSpace(
        A=gA,
        C=gC,
        Q=_as_model_form(model.Q, gQ),
        R=_as_model_form(model.R, gR),
        b=keep(gb, "b"),
        d=keep(gd, "d"),
        x0_mean=keep(gm0, "x0_mean"),
        x0_cov=keep(gP0, "x0_cov"),
    )
    return model_bar, gy


def _kernel_log_likelihood(model: StateSpace, y, w, x, factor: CpuFactor):
    ops = _operands(model, y, w)
    out = (_sds((), y.dtype),) + tuple(_sds(o.shape, o.dtype) for o in ops[:9])
    val, gA, gQ, gb, gC, gR, gd, gm0, gP0, gy = _call(
        "kalmax_cpu_loglik", out, *_factor_operands(factor), x, factor.x_lo, *ops, **_noise_attributes(model)
    )

    def keep(g, field):
        return None if getattr(model, field) is None else g

    model_bar = StateSpace(A=gA, C=gC, Q=_as_model_form(model.Q, gQ), R=_as_model_form(model.R, gR),
                           b=keep(gb, "b"), d=keep(gd, "d"),
                           x0_mean=keep(gm0, "x0_mean"), x0_cov=keep(gP0, "x0_cov"))
    return val, model_bar, gy


# ---------------------------------------------------------------------------
# Pure-JAX equivalents. They define the derivatives of the kernel calls: an
# FFI call has no derivative rule, so second-order AD (jax.hessian of a loss,
# or of the log-likelihood) differentiates these instead. First-order
# gradients never get here: the custom VJP of the primitive calls the
# kernels directly.


def _jax_forward(model: StateSpace, y, w):
    x, bf, system = checked_solve(model, y, w, blocktri.factor_solve, blocktri.solve)
    n = model.A.shape[-1]
    if _transition_is_invariant(model):
        M, subT = jnp.zeros((0, n, n), y.dtype), mT(system.sub)
    else:
        M, subT = bf.M, jnp.zeros((n, n), y.dtype)
    n_eye = jnp.broadcast_to(jnp.eye(n, dtype=y.dtype), bf.L.shape)
    lo = tuple(jnp.zeros(s, y.dtype) for s in _lo_shapes(y.shape[0], n, M.shape[0], y.dtype))
    return x, CpuFactor(Linv=lsolve(bf.L, n_eye), M=M, subT=subT, ok=bf.ok, Linv_lo=lo[0], M_lo=lo[1],
                        subT_lo=lo[2], x_lo=lo[3])


def _jax_adjoint(factor: CpuFactor, v):
    return blocktri.solve(block_factor(factor), v)


def _jax_gradients(model: StateSpace, y, w, x, factor: CpuFactor, x_bar):
    u = _jax_adjoint(factor, x_bar)
    _, pull = jax.vjp(lambda m, yy: stationarity_pairing(m, yy, w, x, u), model, y)
    return pull(manual_axes.like(-jnp.ones((), x.dtype), x))


def _differentiable(kernel_fn, jax_fn):
    """kernel_fn for values; the JVP (hence every higher derivative) of jax_fn."""
    fn = jax.custom_jvp(kernel_fn)
    fn.defjvp(lambda primals, tangents: jax.jvp(jax_fn, primals, tangents))
    return fn


_forward = _differentiable(_kernel_forward, _jax_forward)
_adjoint = _differentiable(_kernel_adjoint, _jax_adjoint)
_gradients = _differentiable(_kernel_gradients, _jax_gradients)
_band = _differentiable(_kernel_band, _jax_band)


def forward(model: StateSpace, y, w):
    """(x (T, n), CpuFactor) for a canonicalised problem; x is NaN when the factor failed."""
    return _forward(model, y, w)


def adjoint(factor: CpuFactor, v):
    """H⁻¹ v (T, n) with the stored factor; NaN when the factor failed."""
    return _adjoint(factor, v)


def gradients(model: StateSpace, y, w, x, factor: CpuFactor, x_bar):
    """(model_bar, y_bar) of the smoothed means for the cotangent x_bar, in one kernel call."""
    return _gradients(model, y, w, x, factor, x_bar)


def band_inverse(factor: CpuFactor):
    """(Σ_tt (T, n, n), Σ_{t+1,t} (T-1, n, n)): the band of H⁻¹, one compiled backward sweep.

    Covariance derivatives come from :func:`band_tangent` (``covariance_band.py``);
    the JVP declared here (the JAX selected inversion's) serves only callers
    that differentiate this function directly (``taped_posterior_band``).
    """
    return _band(factor)


def log_likelihood(model: StateSpace, y, w, x, factor: CpuFactor):
    """(log p(y), model_bar, y_bar): the value and its full gradient in one compiled sweep.

    No derivative rule of its own: ``likelihood.py`` differentiates the
    gradient through the tangents of x* (kernel solves) and of the band of
    Σ (kernel band-tangent sweeps) for second-order AD.
    """
    return _kernel_log_likelihood(model, y, w, x, factor)


CPU = Backend(forward=forward, adjoint=adjoint, logdet=logdet, band_inverse=band_inverse, band_tangent=band_tangent,
              band_pullback=band_pullback, gradients=gradients, log_likelihood=log_likelihood, float32_in_double=True)

# Same kernels, but the backward pass goes through the adjoint solve plus JAX
# autodiff of the stationarity pairing: the reference for `gradients`.
CPU_JAX_GRADIENTS = CPU._replace(gradients=None, log_likelihood=None, band_inverse=_jax_band,
                                 band_tangent=_jax_band_tangent, band_pullback=None)

LOAD_ERROR: Optional[str] = _load()


def available() -> bool:
    """True when the compiled kernel loaded (and so is registered as ``method="cpu"``)."""
    return LOAD_ERROR is None
