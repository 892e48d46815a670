"""The standard errors of `kalmax fit --objective likelihood`, against independent routes.

The command line's standard errors (``fit_workflow.log_standard_errors``) invert
the observed information, the Hessian of −log L in the log-parameters, taken by
central differences of the exact gradient. Two independent checks:

* the Hessian by JAX autodiff (``kx.standard_errors``' default method) on the
  same loss: the two routes share only the loss function;
* a plain NumPy reference for a random walk plus noise with irregular
  timestamps: −log L from the textbook Kalman filter of ``tests/reference.py``
  (prediction-error decomposition; Harvey 1989, ch. 3 / Durbin & Koopman 2012,
  ch. 7 — chapter numbers from memory), its Hessian by central differences of
  the *value* (no gradient code at all), the standard errors
  sqrt(diag(I⁻¹)) and the delta method SE(v) = v·SE(log v) (Casella & Berger,
  Statistical Inference, 2nd ed., §5.5.4).

The command line's prior on the first state is flat (a diffuse prior). For a
random walk with the first row observed, integrating the first state out
against a flat density gives exactly the filter started from x_0 | y_0 ~
N(y_0, r): ∫ N(y_0; x_0, r) p(y_1.. | x_0) dx_0 = E[p(y_1.. | x_0)] under that
density (the diffuse likelihood of Durbin & Koopman 2012, §7.2, conditioning on
the first observation; common practice). So the reference filter runs on rows
1.. with m0 = y_0 and P0 = r + q Δt_0 for the state at row 1; the test checks
the value of the likelihood too, which pins that convention.
"""

import json

import jax.numpy as jnp
import numpy as np
from scipy import optimize

import kalmax as kx
from kalmax._src.tools import fit_workflow, objectives, series as series_mod

import reference as ref
from cli_helpers import cli, write_csv


def _simulate(rng, T=150, q=0.4, r=0.6):
    """Irregular stamps, a continuous random walk (increment variance q·Δt; Särkkä 2013, §6.1 / common
    practice) plus white noise of variance r; about 8 % of rows missing, never the first."""
    dt = rng.uniform(0.3, 1.7, T - 1)
    t = np.concatenate([[0.0], np.cumsum(dt)])
    x = np.cumsum(np.concatenate([[0.0], rng.normal(0.0, np.sqrt(q * dt))]))
    y = x + rng.normal(0.0, np.sqrt(r), T)
    observed = rng.random(T) > 0.08
    observed[0] = True
    return t, y, observed


def _numpy_neg_log_lik(log_q, log_r, t, y, observed):
    """−log p(y) under a flat prior on the first state, by the reference Kalman filter (see the docstring)."""
    q, r = np.exp(log_q), np.exp(log_r)
    dt = np.diff(t)
    model = {"A": np.ones((len(dt) - 1, 1, 1)), "C": np.ones((1, 1)), "Q": (q * dt[1:])[:, None, None],
             "R": np.array([[r]]), "m0": np.array([y[0]]), "P0": np.array([[r + q * dt[0]]])}
    return -ref.kalman_filter(model, y[1:, None], observed[1:, None]).log_likelihood


def _numpy_hessian(f, theta, h=1e-3):
    """Central second differences of a scalar function (Nocedal & Wright, Numerical Optimization,
    2nd ed., §8.1, from memory); error O(h²)."""
    k = len(theta)
    H = np.empty((k, k))
    E = np.eye(k) * h
    for i in range(k):
        for j in range(k):
            H[i, j] = (f(theta + E[i] + E[j]) - f(theta + E[i] - E[j]) - f(theta - E[i] + E[j])
                       + f(theta - E[i] - E[j])) / (4 * h * h)
    return 0.5 * (H + H.T)


def test_cli_standard_errors_match_a_numpy_hessian_and_autodiff(tmp_path, capsys, rng):
    t, y, observed = _simulate(rng)
    write_csv(tmp_path / "rw.csv", ["time", "y"],
              [[repr(float(t[i])), repr(float(y[i])) if observed[i] else ""] for i in range(len(t))])
    code, out, err = cli(["fit", "rw.csv", "--time", "time", "--model", "random-walk", "--measure", "y",
                          "--no-report", "--test-fraction", "0", "--steps", "200"], tmp_path, capsys)
    assert code == 0, err
    doc = json.loads((tmp_path / "rw_model.json").read_text())
    q_hat = doc["model"]["parameters"]["q"][0]
    r_hat = doc["model"]["measurements"][0]["noise_variance"]
    se_cli = doc["fit"]["standard_errors"]
    assert doc["fit"]["optimizer"] == "lbfgs"  # the default (auto) for the likelihood objective

    # The reference likelihood agrees with the command line's loss at the fitted values (value check,
    # which pins the flat-prior convention of the docstring).
    nll = lambda th: _numpy_neg_log_lik(th[0], th[1], t, y, observed)  # noqa: E731
    theta_hat = np.log([q_hat, r_hat])
    series = series_mod.series_from_table(
        ["time", "y"], {"time": [repr(float(v)) for v in t],
                        "y": [repr(float(v)) if o else "" for v, o in zip(y, observed)]}, "time", ["y"])
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="time", columns=("y",), measured=("level0",),
                        params={"q": [q_hat]}, noise=(r_hat,))
    loss, data = objectives.make_loss(spec, series, series.mask, "likelihood")
    n_obs = float(observed.sum())
    theta = {k: jnp.asarray(v) for k, v in spec.to_unconstrained().items()}
    np.testing.assert_allclose(float(loss(theta, *data)) * n_obs, nll(theta_hat), rtol=1e-10)

    # The CLI's point is (close to) the maximum: the reference, started from the truth, finds the same one.
    best = optimize.minimize(nll, np.log([0.4, 0.6]), method="Nelder-Mead",
                             options={"xatol": 1e-7, "fatol": 1e-10})
    np.testing.assert_allclose(best.x, theta_hat, atol=2e-3)

    # Standard errors at the CLI's fitted values: NumPy Hessian of the value, delta method to natural units.
    H = _numpy_hessian(nll, theta_hat)
    se_log = np.sqrt(np.diag(np.linalg.inv(H)))
    np.testing.assert_allclose([se_cli["q"][0], se_cli["noise"][0]], np.exp(theta_hat) * se_log, rtol=1e-4)

    # The CLI's route (central differences of the exact gradient) against the autodiff Hessian.
    se_fd = fit_workflow.log_standard_errors(spec, series, series.mask)
    se_ad = kx.standard_errors(lambda th: loss(th, *data) * n_obs, theta)
    for k in ("q", "noise"):
        np.testing.assert_allclose(np.asarray(se_fd[k]), np.asarray(se_ad[k]), rtol=1e-3)


def test_lbfgs_reaches_the_numpy_maximum_and_stops_when_converged(tmp_path, capsys, rng):
    """`--optimizer lbfgs` against the maximum of the NumPy reference likelihood (Nelder–Mead on the
    value alone, started from the truth): same point to 1e-5 in the log-parameters, reached with the
    stop reason "converged" well before the step cap. With --group it is a usage error."""
    t, y, observed = _simulate(rng)
    write_csv(tmp_path / "rw.csv", ["time", "y"],
              [[repr(float(t[i])), repr(float(y[i])) if observed[i] else ""] for i in range(len(t))])
    code, out, err = cli(["fit", "rw.csv", "--time", "time", "--model", "random-walk", "--measure", "y",
                          "--no-report", "--test-fraction", "0", "--steps", "200", "--optimizer", "lbfgs"],
                         tmp_path, capsys)
    assert code == 0, err
    doc = json.loads((tmp_path / "rw_model.json").read_text())
    assert doc["fit"]["optimizer"] == "lbfgs"
    assert doc["fit"]["stop_reason"] == "converged" and doc["fit"]["steps_run"] < 60
    theta_hat = np.log([doc["model"]["parameters"]["q"][0], doc["model"]["measurements"][0]["noise_variance"]])
    nll = lambda th: _numpy_neg_log_lik(th[0], th[1], t, y, observed)  # noqa: E731
    best = optimize.minimize(nll, np.log([0.4, 0.6]), method="Nelder-Mead",
                             options={"xatol": 1e-9, "fatol": 1e-12, "maxiter": 4000})
    np.testing.assert_allclose(theta_hat, best.x, atol=1e-5)

    write_csv(tmp_path / "two.csv", ["time", "site", "y"],
              [[repr(float(t[i])), "a" if i % 2 else "b", repr(float(y[i]))] for i in range(len(t))])
    code, out, err = cli(["fit", "two.csv", "--time", "time", "--model", "random-walk", "--measure", "y",
                          "--group", "site", "--optimizer", "lbfgs", "--no-report"], tmp_path, capsys)
    assert code != 0 and "--optimizer lbfgs" in err
