"""Smoothed means against independent references (float64).

References (tests/reference.py, plain NumPy):
- the Rauch–Tung–Striebel smoother on top of a covariance-form Kalman filter
  (Rauch, Tung & Striebel 1965, AIAA J. 3(8); Särkkä 2013, Bayesian Filtering
  and Smoothing, ch. 8), handling missing entries by sub-selecting observed rows;
- a dense solve of the normal equations assembled by a different route
  (stacked residual map F, H = Fᵀ W F).
"""

import numpy as np
import pytest

import kalmax as kx
import reference as ref
from helpers import to_model

CASES = [
    # n, p, T, time_varying, full_R, offsets, missing
    (3, 2, 9, True, True, True, 0.3),
    (2, 3, 12, False, True, True, 0.4),
    (4, 4, 6, True, False, False, 0.2),
    (1, 1, 10, False, False, True, 0.5),
    (3, 5, 8, True, True, False, 0.0),
]


@pytest.mark.parametrize("n,p,T,tv,full_R,offsets,missing", CASES)
def test_means_equal_rts_with_prior(rng, n, p, T, tv, full_R, offsets, missing):
    md = ref.random_model(rng, n, p, T, time_varying=tv, full_R=full_R, offsets=offsets)
    y, mask = ref.random_data(rng, md, T, missing=missing)
    est = kx.smooth(to_model(md), y, mask)
    mu, _ = ref.rts_smoother(md, y, mask)
    np.testing.assert_allclose(est.states, mu, rtol=0, atol=1e-9 * (1 + np.abs(mu).max()))
    # measurements impute every entry: C_t x_t + d_t
    E = ref.expand(md, T)
    want = np.einsum("tpi,ti->tp", E["C"], mu) + E["d"]
    np.testing.assert_allclose(est.measurements, want, atol=1e-9 * (1 + np.abs(want).max()))


@pytest.mark.parametrize("prior", [True, False])
def test_means_equal_dense_normal_equations(rng, prior):
    T, n, p = 7, 3, 3
    md = ref.random_model(rng, n, p, T, time_varying=True, full_R=True)
    if not prior:
        md = dict(md, m0=None, P0=None)
    y, mask = ref.random_data(rng, md, T, missing=0.25)
    est = kx.smooth(to_model(md), y, mask)
    want = ref.dense_smooth(md, y, mask)
    np.testing.assert_allclose(est.states, want, atol=1e-9 * (1 + np.abs(want).max()))


def test_full_R_uses_observed_subblock_not_zeroed_rows(rng):
    """With a correlated R and one entry missing, the naive 'zero the rows of R⁻¹'
    answer differs from the correct marginal; we must match the marginal."""
    T, n, p = 5, 2, 2
    md = ref.random_model(rng, n, p, T, time_varying=False, full_R=True)
    md["R"] = np.array([[1.0, 0.9], [0.9, 1.0]])
    y, mask = ref.random_data(rng, md, T, missing=0.0)
    mask[2, 1] = False
    y[2, 1] = np.nan
    est = kx.smooth(to_model(md), y, mask)
    mu, _ = ref.rts_smoother(md, y, mask)
    np.testing.assert_allclose(est.states, mu, atol=1e-10)
    # the wrong answer (R⁻¹ with the missing row/column zeroed) is measurably different
    wrong = _zeroed_rows_smooth(md, y, mask)
    assert np.abs(wrong - mu).max() > 1e-3


def _zeroed_rows_smooth(md, y, mask):
    # dynamics and prior part from the reference (C = 0 removes the measurements),
    # then the measurement part with the rows/columns of R⁻¹ zeroed
    E = ref.expand(md, y.shape[0])
    T, n = y.shape[0], E["n"]
    Hm, gm = ref.dense_normal_equations(dict(md, C=np.zeros_like(np.asarray(md["C"]))), np.zeros_like(y), mask)
    Ri = np.linalg.inv(E["R"][0])
    for t in range(T):
        w = mask[t].astype(float)
        S = (w[:, None] * Ri) * w[None, :]
        C = E["C"][t]
        Hm[t * n:(t + 1) * n, t * n:(t + 1) * n] += C.T @ S @ C
        gm[t * n:(t + 1) * n] += C.T @ S @ np.where(mask[t], y[t] - E["d"][t], 0)
    return np.linalg.solve(Hm, gm).reshape(T, n)


def test_missing_values_never_read(rng):
    T, n, p = 8, 2, 3
    md = ref.random_model(rng, n, p, T)
    y, mask = ref.random_data(rng, md, T, missing=0.4)
    model = to_model(md)
    base = kx.smooth(model, y, mask).states
    for fill in (0.0, np.inf, -1e300, 1e300):
        y2 = np.where(mask, y, fill)
        np.testing.assert_array_equal(kx.smooth(model, y2, mask).states, base)


def test_default_mask_is_not_nan(rng):
    T, n, p = 6, 2, 2
    md = ref.random_model(rng, n, p, T)
    y, mask = ref.random_data(rng, md, T, missing=0.3)
    model = to_model(md)
    np.testing.assert_array_equal(kx.smooth(model, y).states, kx.smooth(model, y, mask).states)


def test_single_step(rng):
    md = ref.random_model(rng, 2, 2, 1)
    y, mask = ref.random_data(rng, md, 1, missing=0.0)
    est = kx.smooth(to_model(md), y, mask)
    mu, _ = ref.rts_smoother(md, y, mask)
    np.testing.assert_allclose(est.states, mu, atol=1e-12)


def test_unidentified_flat_prior_gives_nan(rng):
    """Flat prior and nothing observed: the states are not identified, so NaN, not a number."""
    T, n, p = 6, 2, 2
    md = ref.random_model(rng, n, p, T, prior=False)
    y = np.full((T, p), np.nan)
    est = kx.smooth(to_model(md, prior=False), y, np.zeros((T, p), bool))
    assert np.all(np.isnan(est.states))
    # one scalar observation cannot pin down a 2-d state either
    mask = np.zeros((T, p), bool)
    mask[3, 0] = True
    y[3, 0] = 1.0
    est = kx.smooth(to_model(md, prior=False), y, mask)
    assert np.all(np.isnan(est.states))


def test_inputs_not_mutated_and_deterministic(rng):
    T, n, p = 6, 2, 2
    md = ref.random_model(rng, n, p, T)
    y, mask = ref.random_data(rng, md, T)
    model = to_model(md)
    copies = {k: None if getattr(model, k) is None else np.array(getattr(model, k)) for k in ("A", "C", "Q", "R", "b", "d")}
    y0, m0 = y.copy(), mask.copy()
    a = kx.smooth(model, y, mask).states
    b = kx.smooth(model, y, mask).states
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(y, y0)
    np.testing.assert_array_equal(mask, m0)
    for k, v in copies.items():
        if v is not None:
            np.testing.assert_array_equal(getattr(model, k), v)
