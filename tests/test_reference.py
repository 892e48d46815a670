"""Cross-checks of the NumPy references in ``tests/reference.py`` against each
other, so that they can be trusted as ground truth for the library.

Three independent routes are compared: the sequential Kalman filter / RTS
smoother, the dense normal equations of the negative log joint density, and
conditioning of the dense joint Gaussian of states and observations.
"""

import numpy as np
import pytest

try:
    import reference as ref
except ImportError:  # tests/ imported as a package
    from tests import reference as ref


SEEDS = [0, 1, 2, 3]

# (n, p, T, time_varying, full_R, offsets, missing)
CONFIGS = [
    (3, 2, 25, True, True, True, 0.3),
    (2, 3, 30, True, True, True, 0.5),
    (4, 1, 20, True, False, False, 0.2),
    (3, 2, 15, False, True, True, 0.3),
    (1, 1, 12, True, True, True, 0.3),
    (2, 2, 10, True, True, True, 0.0),
]
CONFIG_IDS = [
    "n3p2_tv_fullR",
    "n2p3_tv_fullR_halfmissing",
    "n4p1_tv_diagR_nooffsets",
    "n3p2_invariant",
    "n1p1",
    "n2p2_nomissing",
]


def make_problem(seed, n, p, T, time_varying, full_R, offsets, missing,
                 prior=True):
    print(f"seed={seed} n={n} p={p} T={T} time_varying={time_varying} "
          f"full_R={full_R} offsets={offsets} missing={missing} prior={prior}")
    rng = np.random.default_rng(seed)
    model = ref.random_model(rng, n, p, T, time_varying=time_varying,
                             full_R=full_R, prior=prior, offsets=offsets)
    y, mask = ref.random_data(rng, model, T, missing=missing)
    return model, y, mask


def assert_close(a, b, tol=1e-9, what=""):
    a = np.asarray(a)
    b = np.asarray(b)
    scale = max(1.0, float(np.max(np.abs(b))) if b.size else 1.0)
    err = float(np.max(np.abs(a - b))) if a.size else 0.0
    assert err <= tol * scale, f"{what}: max abs err {err:.3e} (scale {scale:.3e})"


# ---------------------------------------------------------------------------


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("cfg", CONFIGS, ids=CONFIG_IDS)
def test_rts_means_match_dense_smooth(seed, cfg):
    model, y, mask = make_problem(seed, *cfg)
    ms, _ = ref.rts_smoother(model, y, mask)
    xd = ref.dense_smooth(model, y, mask)
    assert ms.shape == xd.shape == (cfg[2], cfg[0])
    assert_close(ms, xd, 1e-9, "RTS mean vs dense normal equations")


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("cfg", CONFIGS, ids=CONFIG_IDS)
def test_rts_covariances_match_dense_posterior(seed, cfg):
    n, T = cfg[0], cfg[2]
    model, y, mask = make_problem(seed, *cfg)
    ms, Ps, cross = ref.rts_smoother(model, y, mask, return_cross=True)
    mean, cov = ref.dense_posterior(model, y, mask)
    assert_close(ms, mean, 1e-9, "RTS mean vs Gaussian conditioning")
    blocks = np.stack([cov[t * n:(t + 1) * n, t * n:(t + 1) * n]
                       for t in range(T)])
    assert_close(Ps, blocks, 1e-9, "RTS covariance vs Gaussian conditioning")
    lag1 = np.stack([cov[(t + 1) * n:(t + 2) * n, t * n:(t + 1) * n]
                     for t in range(T - 1)])
    assert_close(cross, lag1, 1e-9, "RTS lag-one cross-covariance")
    # the posterior precision is the Hessian of J
    H, _ = ref.dense_normal_equations(model, y, mask)
    assert_close(np.linalg.inv(H), cov, 1e-8, "inv(H) vs posterior covariance")


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("cfg", CONFIGS, ids=CONFIG_IDS)
def test_filter_loglik_matches_dense(seed, cfg):
    model, y, mask = make_problem(seed, *cfg)
    ll_kf = ref.kalman_filter(model, y, mask).log_likelihood
    ll_dense = ref.dense_log_likelihood(model, y, mask)
    assert np.isfinite(ll_kf)
    assert abs(ll_kf - ll_dense) <= 1e-9 * max(1.0, abs(ll_dense)), (
        ll_kf, ll_dense)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("prior", [True, False])
def test_gradient_of_objective_vanishes_at_dense_smooth(seed, prior):
    n, p, T = 3, 2, 12
    model, y, mask = make_problem(seed, n, p, T, True, True, True, 0.3,
                                  prior=prior)
    H, g = ref.dense_normal_equations(model, y, mask)
    xhat = ref.dense_smooth(model, y, mask).reshape(-1)
    f = lambda z: ref.dense_objective(model, y, mask, z)  # noqa: E731

    def fd_grad(z, step=1e-4):
        out = np.empty_like(z)
        for i in range(z.size):
            e = np.zeros_like(z)
            e[i] = step
            out[i] = (f(z + e) - f(z - e)) / (2 * step)  # exact for quadratics
        return out

    grad_hat = fd_grad(xhat)
    assert np.max(np.abs(grad_hat)) < 1e-6, np.max(np.abs(grad_hat))

    # at a random point the FD gradient equals H x - g, and J is exactly the
    # quadratic J(xhat) + 1/2 (x - xhat)^T H (x - xhat)
    rng = np.random.default_rng(1000 + seed)
    z = xhat + rng.standard_normal(xhat.size)
    gz = fd_grad(z)
    assert_close(gz, H @ z - g, 1e-6, "FD gradient vs H x - g")
    dz = z - xhat
    assert abs(f(z) - (f(xhat) + 0.5 * dz @ H @ dz)) <= 1e-9 * max(1.0, f(z))


def test_local_level_converges_to_steady_state():
    seed = 7
    print(f"seed={seed}")
    rng = np.random.default_rng(seed)
    for q, r in [(1.0, 1.0), (0.1, 2.0), (1469.1, 15099.0), (5.0, 0.01)]:
        T = 300
        model = {"A": np.eye(1), "Q": np.array([[q]]), "C": np.eye(1),
                 "R": np.array([[r]]), "m0": np.zeros(1), "P0": np.array([[1e7]])}
        y = rng.standard_normal((T, 1)) * np.sqrt(r)
        res = ref.kalman_filter(model, y)
        P, K = ref.local_level_steady_state(q, r)
        # predicted variance P_t satisfies the Riccati recursion and converges
        Pp = res.predicted_covs[:, 0, 0]
        assert abs(Pp[-1] - P) <= 1e-9 * P, (q, r, Pp[-1], P)
        # steady-state filtered variance is P - K P = P r / (P + r)
        Pf = res.filtered_covs[-1, 0, 0]
        assert abs(Pf - (1 - K) * P) <= 1e-9 * P
        # fixed point of P -> P - P^2/(P+r) + q
        assert abs(P - P ** 2 / (P + r) + q - P) <= 1e-12 * max(P, q)


def test_missing_entries_are_never_read():
    seed = 11
    model, y, mask = make_problem(seed, 3, 3, 20, True, True, True, 0.4)
    assert np.all(np.isnan(y[~mask])) and np.all(np.isfinite(y[mask]))
    assert (~mask).all(axis=1).any(), "expected a fully missing step"
    y2 = y.copy()
    y2[~mask] = 1e300  # any garbage must give identical results
    for fn in (ref.dense_smooth, ref.dense_log_likelihood):
        a, b = fn(model, y, mask), fn(model, y2, mask)
        assert np.all(np.isfinite(a)) and np.array_equal(a, b)
    ra, rb = ref.rts_smoother(model, y, mask), ref.rts_smoother(model, y2, mask)
    for a, b in zip(ra, rb):
        assert np.all(np.isfinite(a)) and np.array_equal(a, b)
    H, g = ref.dense_normal_equations(model, y, mask)
    assert np.all(np.isfinite(H)) and np.all(np.isfinite(g))
    xhat = ref.dense_smooth(model, y, mask)
    assert ref.dense_objective(model, y, mask, xhat) == \
        ref.dense_objective(model, y2, mask, xhat)


def test_fully_missing_step_is_pure_prediction():
    seed = 12
    model, y, mask = make_problem(seed, 2, 2, 16, True, True, True, 0.3)
    res = ref.kalman_filter(model, y, mask)
    empty = np.flatnonzero(~mask.any(axis=1))
    assert empty.size > 0
    for t in empty:
        assert np.array_equal(res.filtered_means[t], res.predicted_means[t])
        assert np.array_equal(res.filtered_covs[t], res.predicted_covs[t])
    # a model where nothing at all is observed: loglik 0, smoother = prior
    nothing = np.zeros_like(mask)
    assert ref.kalman_filter(model, y, nothing).log_likelihood == 0.0
    assert ref.dense_log_likelihood(model, y, nothing) == 0.0
    ms, Ps = ref.rts_smoother(model, y, nothing)
    mean, cov = ref.dense_posterior(model, y, nothing)
    assert_close(ms, mean, 1e-9, "prior mean")


def test_partial_observation_uses_marginal_of_full_R():
    """One step, one state: the likelihood of a partly observed y_0 is the
    marginal Gaussian of the observed entries, computed here by hand."""
    seed = 13
    print(f"seed={seed}")
    rng = np.random.default_rng(seed)
    n, p = 2, 3
    model = ref.random_model(rng, n, p, 1, time_varying=False)
    y = rng.standard_normal((1, p))
    mask = np.array([[True, False, True]])
    y[~mask] = np.nan
    K = [0, 2]
    C, d, R = model["C"][K], model["d"][K], model["R"][np.ix_(K, K)]
    mean = C @ model["m0"] + d
    cov = C @ model["P0"] @ C.T + R
    from scipy.stats import multivariate_normal
    expected = multivariate_normal.logpdf(y[0, K], mean, cov)
    assert abs(ref.kalman_filter(model, y, mask).log_likelihood - expected) < 1e-12
    assert abs(ref.dense_log_likelihood(model, y, mask) - expected) < 1e-12


def test_expand_shapes_and_defaults():
    seed = 14
    print(f"seed={seed}")
    rng = np.random.default_rng(seed)
    n, p, T = 3, 2, 6
    inv = ref.random_model(rng, n, p, T, time_varying=False, offsets=False,
                           prior=False)
    E = ref.expand(inv, T)
    assert E["A"].shape == (T - 1, n, n) and E["Q"].shape == (T - 1, n, n)
    assert E["b"].shape == (T - 1, n) and not E["b"].any()
    assert E["C"].shape == (T, p, n) and E["R"].shape == (T, p, p)
    assert E["d"].shape == (T, p) and not E["d"].any()
    assert E["m0"] is None and E["P0"] is None
    assert (E["n"], E["p"], E["T"]) == (n, p, T)
    assert np.array_equal(E["A"][3], inv["A"])
    tv = ref.random_model(rng, n, p, T)
    E = ref.expand(tv, T)
    assert np.array_equal(E["A"], tv["A"]) and np.array_equal(E["R"], tv["R"])
    # full R is genuinely non-diagonal and SPD
    assert np.abs(tv["R"][0] - np.diag(np.diag(tv["R"][0]))).max() > 1e-3
    assert np.all(np.linalg.eigvalsh(tv["R"]) > 0)
    assert np.all(np.max(np.abs(np.linalg.eigvals(tv["A"])), axis=-1) < 1)
    # T = 1 works (no transitions)
    one = ref.random_model(rng, n, p, 1)
    y, mask = ref.random_data(rng, one, 1, missing=0.0)
    assert ref.expand(one, 1)["A"].shape == (0, n, n)
    ll = ref.kalman_filter(one, y, mask).log_likelihood
    assert abs(ll - ref.dense_log_likelihood(one, y, mask)) < 1e-10
    with pytest.raises(ValueError):
        ref.expand({"A": np.eye(2), "Q": np.eye(2), "C": np.ones((1, 2)),
                    "R": np.eye(1), "m0": np.zeros(2)}, 4)


def test_diffuse_prior_approaches_no_prior_solution():
    seed = 15
    model, y, mask = make_problem(seed, 3, 2, 20, True, True, True, 0.2,
                                  prior=False)
    x_noprior = ref.dense_smooth(model, y, mask)
    diffuse = dict(model, m0=np.zeros(3), P0=1e8 * np.eye(3))
    ms, _ = ref.rts_smoother(diffuse, y, mask)
    assert_close(ms, x_noprior, 1e-6, "diffuse-prior RTS vs no-prior dense")


def test_nile_csv():
    years, flow = ref.load_nile()
    assert years.shape == flow.shape == (100,)
    assert np.array_equal(years, np.arange(1871, 1971))
    assert int(flow.sum()) == 91935
    assert flow[0] == 1120 and flow[-1] == 740
