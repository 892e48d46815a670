"""The command line's tool wing from Python: table parsing, the held-out objective, calibration."""

import math

import jax
import jax.numpy as jnp

import numpy as np
import pytest

import kalmax as kx
from kalmax._src.tools import apply_workflow, fit_workflow, objectives, series as series_mod, starting_values
from kalmax._src.tools.errors import DataError


def test_series_parsing_numbers_dates_and_missing_cells():
    cols = {"t": ["0", "1.5", "4"], "a": ["1", "", "NaN"], "b": ["NA", "2.5", "-3e2"]}
    s = series_mod.series_from_table(["t", "a", "b"], cols, "t", ["a", "b"])
    np.testing.assert_array_equal(s.t, [0.0, 1.5, 4.0])
    np.testing.assert_array_equal(s.mask, [[True, False], [False, True], [False, True]])
    assert s.y[2, 1] == -300.0 and s.time_format == "number"
    iso = {"t": ["2030-01-01T00:00:00Z", "2030-01-01T00:00:02.5+00:00", "2030-01-01T02:00:00+01:00"], "a": ["1", "2", "3"]}
    s = series_mod.series_from_table(["t", "a"], iso, "t", ["a"])
    np.testing.assert_allclose(s.t, [0.0, 2.5, 3600.0])
    assert s.time_format == "iso8601"
    naive = {"t": ["2030-01-01T00:00:00", "2030-01-01T00:00:02.5", "2030-01-01T01:00:00"], "a": ["1", "2", "3"]}
    np.testing.assert_allclose(series_mod.series_from_table(["t", "a"], naive, "t", ["a"]).t, [0.0, 2.5, 3600.0])
    # A column mixing date-times with and without a zone would silently read the unmarked ones as UTC.
    mixed = {"t": ["2030-01-01T00:00:00Z", "2030-01-01T01:00:00"], "a": ["1", "2"]}
    with pytest.raises(DataError, match="data row 2 .* without a time zone"):
        series_mod.series_from_table(["t", "a"], mixed, "t", ["a"])
    with pytest.raises(DataError, match="mixes numbers and date-times"):
        series_mod.series_from_table(["t", "a"], {"t": ["1", "2030-01-01"], "a": ["1", "2"]}, "t", ["a"])
    with pytest.raises(DataError, match="not finite"):
        series_mod.series_from_table(["t", "a"], {"t": ["1", "2"], "a": ["1", "inf"]}, "t", ["a"])
    with pytest.raises(DataError, match="hold no observation"):
        series_mod.series_from_table(["t", "a", "b"], {"t": ["1", "2"], "a": ["1", ""], "b": ["", ""]}, "t", ["a", "b"])
    with pytest.raises(DataError, match="at least 2"):
        series_mod.series_from_table(["t", "a"], {"t": ["1"], "a": ["1"]}, "t", ["a"])


def _random_walk_series(rng, T=120):
    t = np.cumsum(rng.uniform(0.2, 2.0, T))
    level = np.cumsum(np.sqrt(0.5 * np.diff(t, prepend=0.0)) * rng.normal(size=T))
    y = (level + 0.7 * rng.normal(size=T))[:, None]
    y[rng.random(y.shape) < 0.1] = np.nan
    cols = {"t": [repr(float(v)) for v in t], "y": ["" if np.isnan(v) else repr(float(v)) for v in y[:, 0]]}
    return series_mod.series_from_table(["t", "y"], cols, "t", ["y"])


def test_holdout_objective_fits_ratio_and_calibration_makes_standardised_errors_one(rng):
    series = _random_walk_series(rng)
    start = starting_values.default_spec("random-walk", 1, "t", ["y"], ["level0"], series)
    start = start.replace(params={"q": [50.0]}, noise=(0.01,))  # far too wiggly
    train = series.mask
    loss_fn, data = objectives.make_loss(start, series, train, "holdout", folds=3, seed=1)
    loss = lambda theta: loss_fn(theta, *data)  # noqa: E731
    out = fit_workflow.fit_spec(start, series, train, objective="holdout", steps=60, learning_rate=0.2,
                            folds=3, seed=1, progress=False)
    assert out.history[-1] < out.history[0]
    print("holdout loss", out.history[0], "->", out.history[-1], "ratio", out.spec.params["q"][0] / out.spec.noise[0])
    # Smoothed means depend only on the variance ratio: the fitted ratio must give the
    # same loss as the calibrated model (calibration only rescales both).
    theta_fit = out.spec.to_unconstrained()
    ratio = out.spec.params["q"][0] / out.spec.noise[0]
    assert 0.1 < ratio < 10.0  # truth 0.5 / 0.49 ≈ 1; the start was 5000
    scaled = out.spec.replace(params={"q": [3.0 * out.spec.params["q"][0]]}, noise=(3.0 * out.spec.noise[0],))
    np.testing.assert_allclose(loss(scaled.to_unconstrained()), loss(theta_fit), rtol=1e-9)
    # After calibration the cross-validated standardised squared errors average 1
    # (calibrating again changes nothing: the factor is 1).
    again = objectives.calibrate_scale(out.spec, series, train, folds=3, seed=1)
    np.testing.assert_allclose(again.noise, out.spec.noise, rtol=1e-8)
    np.testing.assert_allclose(again.params["q"], out.spec.params["q"], rtol=1e-8)


def test_heldout_rmse_uses_only_the_hidden_cells(rng):
    series = _random_walk_series(rng, T=60)
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="t", columns=("y",), measured=("level0",),
                        params={"q": [0.5]}, noise=(0.5,))
    test = np.zeros_like(series.mask)
    idx = np.nonzero(series.mask[:, 0])[0][::5]
    test[idx, 0] = True
    got = apply_workflow.heldout_rmse(spec, series, test)
    # Independent: kx.prediction_error hides the same cells and averages their squared errors.
    mse = kx.prediction_error(spec.state_space(series.t), np.nan_to_num(series.y), series.mask, test)
    assert math.isclose(got["y"], math.sqrt(float(mse)), rel_tol=1e-9)


@pytest.mark.parametrize("kind,dims,measured", [
    ("random-walk", 2, ["level0", "level1"]),
    ("constant-velocity", 2, ["position0", "position1", "velocity0"]),  # axes of unequal width
    ("constant-acceleration", 3, ["position0", "position1", "position2"]),
])
def test_likelihood_split_by_axis_equals_the_joint_likelihood(kind, dims, measured, rng):
    # The per-axis batch is a different computation (dims small problems, padded
    # columns) from the joint model; both are the exact likelihood, so values and
    # gradients agree to rounding.
    T = 120
    t = np.cumsum(rng.uniform(0.3, 2.0, T))
    t -= t[0]
    y = rng.normal(size=(T, len(measured))).cumsum(axis=0)
    y[rng.random(y.shape) < 0.25] = np.nan
    cols = [f"c{j}" for j in range(len(measured))]
    series = series_mod.Series(list(t), t, y, "number")
    spec = starting_values.default_spec(kind, dims, "t", cols, measured, series)
    assert objectives.independent_axes(spec) is not None
    theta = {k: jnp.asarray(v) for k, v in spec.to_unconstrained().items()}
    split, data = objectives.make_loss(spec, series, series.mask, "likelihood")
    model_joint = lambda th: spec.state_space(series.t, th)  # noqa: E731
    n_obs = float(series.mask.sum())
    joint = lambda th: -kx.log_likelihood(model_joint(th), np.nan_to_num(y), series.mask) / n_obs  # noqa: E731
    v_split, g_split = jax.value_and_grad(split)(theta, *data)
    v_joint, g_joint = jax.value_and_grad(joint)(theta)
    np.testing.assert_allclose(v_split, v_joint, rtol=1e-10)
    for k in theta:
        np.testing.assert_allclose(g_split[k], g_joint[k], rtol=1e-7, atol=1e-10)


def test_an_axis_without_columns_keeps_the_joint_model():
    spec = kx.ModelSpec(kind="constant-velocity", dims=2, time_column="t", columns=("a",), measured=("position0",),
                        params={"q": [1.0, 1.0]}, noise=(1.0,))
    assert objectives.independent_axes(spec) is None
