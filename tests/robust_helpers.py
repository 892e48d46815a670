"""Problem generators and float64 checks shared by the robustness tests
(test_properties, test_conditioning, test_fuzz, test_gradient_health).

Everything here is plain NumPy; the ground truth comes from
``tests/reference.py`` (dense normal equations, textbook Kalman/RTS).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg as sla

import kalmax as kx

try:
    import reference as ref
except ImportError:  # tests/ imported as a package
    from tests import reference as ref

MASK_MODES = ("random", "empty_steps", "all_missing", "one_entry", "all_observed")
FIELD_NAMES = ("A", "Q", "b", "C", "R", "d")


def backends():
    """Names of the registered solvers of the normal equations ("scan", and
    "cpu" when the compiled kernel loaded), so that tests cover each one
    explicitly. The covariance-form filter (``refined=False``) has no
    refinement to drive; tests/test_covariance_form.py covers it."""
    from kalmax._src.backends import registry
    return [name for name in registry.available() if registry.get_backend(name).refined]


def eps(dtype) -> float:
    return float(np.finfo(dtype).eps)


def make_problem(seed, n, p, T, *, dtype=np.float64, prior=True, offsets=True,
                 varying=FIELD_NAMES, mask_mode="random", missing=0.3):
    """A random well-conditioned model, data and mask.

    ``varying`` names the fields that keep a leading time axis; the others
    are collapsed to their first step (time-invariant). ``mask_mode``:

    - "random": entries missing with probability ``missing`` plus some
      fully missing steps (reference.random_data),
    - "empty_steps": about half of the steps fully missing,
    - "all_missing": nothing observed (a prior is forced on),
    - "one_entry": exactly one observed entry (a prior is forced on),
    - "all_observed": nothing missing.

    Returns (model kx.StateSpace in ``dtype``, y (T, p) ``dtype`` with NaN at
    missing entries, mask (T, p) bool, model_dict float64 of the *cast*
    values, so that references see exactly what kalmax sees).
    """
    rng = np.random.default_rng(seed)
    if mask_mode in ("all_missing", "one_entry"):
        prior = True
    md = ref.random_model(rng, n, p, T, time_varying=True, full_R=True,
                          prior=prior, offsets=offsets)
    for f in FIELD_NAMES:
        if f not in varying and md.get(f) is not None:
            arr = np.asarray(md[f])
            if arr.shape[0] == 0:  # T == 1: no transitions; draw one step
                md[f] = ref.random_model(rng, n, p, 2, time_varying=False,
                                         prior=False, offsets=True)[f]
            else:
                md[f] = arr[0]
    y = ref.random_data(rng, md, T, missing=0.0)[0]  # fully simulated
    mask = np.ones((T, p), dtype=bool)
    if mask_mode == "random":
        mask = rng.random((T, p)) >= missing
        if T >= 3:
            mask[rng.choice(T, size=max(1, T // 8), replace=False), :] = False
    elif mask_mode == "empty_steps":
        mask[rng.random(T) < 0.5, :] = False
    elif mask_mode == "all_missing":
        mask[:] = False
    elif mask_mode == "one_entry":
        mask[:] = False
        mask[rng.integers(T), rng.integers(p)] = True
    y = np.where(mask, y, np.nan)
    model = to_model(md, dtype)
    return model, y.astype(dtype), mask, to_dict(model)


def to_model(md, dtype=np.float64):
    cast = lambda a: None if a is None else np.asarray(a, dtype)  # noqa: E731
    return kx.StateSpace(A=cast(md["A"]), C=cast(md["C"]), Q=cast(md["Q"]), R=cast(md["R"]),
                         b=cast(md.get("b")), d=cast(md.get("d")),
                         x0_mean=cast(md.get("m0")), x0_cov=cast(md.get("P0")))


def to_dict(model):
    g = lambda a: None if a is None else np.asarray(a, np.float64)  # noqa: E731
    return dict(A=g(model.A), C=g(model.C), Q=g(model.Q), R=g(model.R), b=g(model.b),
                d=g(model.d), m0=g(model.x0_mean), P0=g(model.x0_cov))


def normal_equations(md, y, mask):
    """Float64 (H, g) of the problem, assembled block by block (dense storage).

    Textbook information-form assembly, independent of kalmax's whitened
    one: with K the observed entries of step t,

        H_tt += C_Kᵀ R_KK⁻¹ C_K,      g_t += C_Kᵀ R_KK⁻¹ (y_K − d_K)
        H_tt += A_tᵀ Q_t⁻¹ A_t,       H_{t+1,t+1} += Q_t⁻¹,   H_{t+1,t} = −Q_t⁻¹ A_t
        g_t  −= A_tᵀ Q_t⁻¹ b_t,       g_{t+1} += Q_t⁻¹ b_t
        H_00 += P_0⁻¹,                g_0 += P_0⁻¹ m_0

    (Gauss–Markov normal equations of the stacked residuals; cross-checked
    against reference.dense_normal_equations in test_properties.)
    Block-by-block assembly keeps it O(T n²) memory traffic beyond the dense
    H itself, unlike the stacked-residual route, which is too slow for the
    largest hypothesis cases.
    """
    y = np.asarray(y, np.float64)
    mask = np.asarray(mask, bool)
    T, p = y.shape
    E = ref.expand(md, T)
    n = E["n"]
    H = np.zeros((T * n, T * n))
    g = np.zeros(T * n)
    blk = lambda t: slice(t * n, (t + 1) * n)  # noqa: E731
    for t in range(T):
        K = np.flatnonzero(mask[t])
        if K.size:
            CK = E["C"][t][K]
            RKi = np.linalg.inv(E["R"][t][np.ix_(K, K)])
            H[blk(t), blk(t)] += CK.T @ RKi @ CK
            g[blk(t)] += CK.T @ RKi @ (y[t, K] - E["d"][t][K])
    for t in range(T - 1):
        A, Qi, b = E["A"][t], np.linalg.inv(E["Q"][t]), E["b"][t]
        H[blk(t), blk(t)] += A.T @ Qi @ A
        H[blk(t + 1), blk(t + 1)] += Qi
        H[blk(t + 1), blk(t)] = -Qi @ A
        H[blk(t), blk(t + 1)] = -A.T @ Qi
        g[blk(t)] -= A.T @ Qi @ b
        g[blk(t + 1)] += Qi @ b
    if E["P0"] is not None:
        P0i = np.linalg.inv(E["P0"])
        H[:n, :n] += P0i
        g[:n] += P0i @ E["m0"]
    return 0.5 * (H + H.T), g


def condition_number(H, n):
    """κ₂(H) of a symmetric block-tridiagonal H with n×n blocks (inf if singular).

    Extreme eigenvalues of the banded matrix (bandwidth 2n − 1) by
    scipy.linalg.eigvals_banded: O(N n²) rather than a dense SVD.
    """
    N = H.shape[0]
    bw = min(2 * n - 1, N - 1)
    ab = np.zeros((bw + 1, N))
    for k in range(bw + 1):
        ab[k, : N - k] = np.diagonal(H, -k)
    lo = sla.eigvals_banded(ab, lower=True, select="i", select_range=(0, 0))[0]
    hi = sla.eigvals_banded(ab, lower=True, select="i", select_range=(N - 1, N - 1))[0]
    return np.inf if lo <= 0 else float(hi / lo)


def check_normal_equations(md, y, mask, x, dtype, *, factor=50.0):
    """Assert that x (T, n) solves H x = g as well as a backward-stable solver can.

    Two checks (Higham (2002), Accuracy and Stability of Numerical
    Algorithms, 2nd ed., §7.1 and Ch. 10 on Cholesky -- sections from
    memory):

    - backward error: |H x − g|_∞ ≤ c·eps·(‖H‖_∞ ‖x‖_∞ + ‖g‖_∞), c = factor·(n + p);
    - forward error:  ‖x − x_ref‖_∞ ≤ c·eps·κ₂(H)·‖x_ref‖_∞, the first-order
      perturbation bound for a linear solve.

    When kalmax returns NaN (its documented "states not identified"), assert
    instead that the problem really is ill-posed: κ₂(H)·eps ≥ 1e-4 (a
    well-conditioned problem must never come back as NaN).

    Returns κ₂(H) for reporting.
    """
    T, p = np.shape(y)
    n = np.shape(x)[-1]
    H, g = normal_equations(md, y, mask)
    x = np.asarray(x, np.float64).reshape(-1)
    e = eps(dtype)
    c = factor * (n + p)
    cond = condition_number(H, n)
    if not np.all(np.isfinite(x)):
        assert np.all(np.isnan(x)), "partly non-finite result: NaN must cover the whole answer"
        assert cond * e >= 1e-4, f"NaN returned for a well-conditioned problem (cond {cond:.3e})"
        return cond
    r = H @ x - g
    scale = np.abs(H).sum(axis=1).max() * np.abs(x).max() + np.abs(g).max()
    assert np.abs(r).max() <= c * e * scale + 1e-300, (
        f"normal-equation residual {np.abs(r).max():.3e} > {c * e * scale:.3e} (cond {cond:.3e})")
    x_ref = np.linalg.solve(H, g)
    err = np.abs(x - x_ref).max()
    bound = c * e * cond * max(np.abs(x_ref).max(), 1e-300)
    # the float64 reference itself carries an error of order cond·eps64.
    bound += c * eps(np.float64) * cond * np.abs(x_ref).max()
    assert err <= bound, f"forward error {err:.3e} > {bound:.3e} (cond {cond:.3e})"
    return cond
