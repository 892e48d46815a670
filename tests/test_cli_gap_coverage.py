"""`kalmax fit`'s 95 % intervals cover measurements hidden in gaps, for both objectives, end to end.

Data: simulated exactly from the model the command fits, a continuous random
walk (increment variance q·Δt over a step Δt; Särkkä, Bayesian Filtering and
Smoothing, 2013, §6.1 / common practice) measured with white noise of
variance r, at irregular stamps in hours. Two kinds of gap, both hidden from
the smoother that makes the interval scored there:

* our gaps, 6 to 12 h long (12 to 24 rows), written as blank cells: the fit
  never sees them and its result table imputes them (status "imputed");
* the command's own held-out blocks (``--test-block 6h``, status "held-out"),
  which the fit does not see but its final smoothing does; their intervals
  are taken from ``kalmax apply`` with the fitted model file on the table with
  those cells blanked as well, and compared with the coverage the command
  reports (fit.heldout_coverage), which must be the same count.

Coverage is counted here from the table's COL_lower/COL_upper columns and the
simulated values: hidden *measurements*, so the interval must include the
measurement noise (the table's intervals are for a new noisy measurement).

The Monte-Carlo bound. With the true parameters, each hidden cell's indicator
B_i = [y_i inside its interval] is Bernoulli(0.95) exactly (the hidden value
minus the smoothed mean is Gaussian with the predictive variance). Cells of
one gap are correlated, but the coverage fraction F_g of a gap is a mean of
equally distributed Bernoullis, so Var F_g ≤ 0.95·0.05 (Cauchy–Schwarz:
Cov(B_i, B_j) ≤ Var B): as if the gap were one cell. Gaps separated by ≥ 12 h
of measurements (≥ 24 rows) are independent up to a correlation that decays
geometrically with the measurements between them (the smoother's error
correlation; from memory), here below 1e-3. The pooled coverage
Σ n_g F_g / N then has sd ≤ sqrt(0.0475 Σ n_g² ) / N = sqrt(0.0475 / G_eff),
G_eff = N² / Σ n_g² (≈ the number of gaps), and by the central limit theorem
over the independent gaps |coverage − 0.95| ≤ 3.5 sd fails with probability
≤ 5e-4, less since the sd is an upper bound (common practice). With the
fitted instead of the true parameters the coverage moves by O(1/N_obs), far
inside the bound at 20,000 rows. With about 400 gaps the bound is ±0.04:
it catches intervals that leave out the measurement noise or are calibrated
on single cells instead of gaps (coverage on gaps of 0.7 to 0.85), not a
shift of a point or two, and its upper side is nearly vacuous.
"""

import json
import statistics

import numpy as np
import pytest

from cli_helpers import cli, read_csv, write_csv

Q, R = 0.2, 0.5  # per hour; variance
LEVEL = 0.95


def _simulate(rng, T=20_000):
    dt = rng.uniform(0.25, 0.75, T - 1)  # hours: typical step 0.5 h, so --test-block 6h is 12 rows
    t = np.concatenate([[0.0], np.cumsum(dt)])
    x = np.cumsum(np.concatenate([[0.0], rng.normal(0.0, np.sqrt(Q * dt))]))
    y = x + rng.normal(0.0, np.sqrt(R), T)
    ours = np.zeros(T, bool)
    i = 30
    while i < T - 60:
        n = int(rng.integers(12, 25))
        ours[i:i + n] = True
        i += n + int(rng.integers(24, 37))
    return t, y, ours


def _columns(path):
    header, rows = read_csv(path)
    return {h: [r[i] for r in rows] for i, h in enumerate(header)}


def _runs(hidden):
    """Lengths of the maximal runs of True (the gaps)."""
    edges = np.flatnonzero(np.diff(np.concatenate([[0], hidden.astype(int), [0]])))
    return edges[1::2] - edges[0::2]


def _coverage_and_bound(y, lower, upper, hidden):
    inside = (y >= lower) & (y <= upper)
    n = _runs(hidden)
    g_eff = n.sum() ** 2 / np.sum(n.astype(float) ** 2)
    return float(np.mean(inside[hidden])), 3.5 * np.sqrt(LEVEL * (1 - LEVEL) / g_eff), int(inside[hidden].sum())


def _write(path, t, y, blank):
    write_csv(path, ["time", "y"], [[repr(float(t[i])), "" if blank[i] else repr(float(y[i]))]
                                    for i in range(len(t))])


@pytest.mark.parametrize("objective", ["likelihood", "holdout"])
def test_intervals_cover_hidden_gap_measurements(objective, tmp_path, capsys, rng):
    t, y, ours = _simulate(rng)
    _write(tmp_path / "rw.csv", t, y, ours)
    code, out, err = cli(["fit", "rw.csv", "--time", "time", "--time-unit", "h", "--model", "random-walk",
                          "--measure", "y", "--objective", objective, "--test-block", "6h", "--level", str(LEVEL),
                          "--no-report"], tmp_path, capsys)
    assert code == 0, err
    cols = _columns(tmp_path / "rw_smoothed.csv")
    status = np.array(cols["y_status"])
    assert np.array_equal(status == "imputed", ours)
    lower, upper = (np.array(cols[k], float) for k in ("y_lower", "y_upper"))

    # Our gaps: the fit and its smoothing never saw them.
    cov_ours, bound_ours, _ = _coverage_and_bound(y, lower, upper, ours)

    # The command's held-out blocks, smoothed without them by `kalmax apply` with the fitted model.
    held = status == "held-out"
    _write(tmp_path / "blanked.csv", t, y, ours | held)
    code, _, err = cli(["apply", "rw_model.json", "blanked.csv", "--level", str(LEVEL), "--no-report"],
                       tmp_path, capsys)
    assert code == 0, err
    applied = _columns(tmp_path / "blanked_smoothed.csv")
    lower, upper = (np.array(applied[k], float) for k in ("y_lower", "y_upper"))
    cov, bound, inside = _coverage_and_bound(y, lower, upper, held)
    print(f"{objective}: coverage of our gaps {cov_ours:.4f} ± {bound_ours:.4f} ({ours.sum()} cells, "
          f"{len(_runs(ours))} gaps); of the held-out blocks {cov:.4f} ± {bound:.4f} ({held.sum()} cells, "
          f"{len(_runs(held))} gaps)")
    assert abs(cov_ours - LEVEL) <= bound_ours
    assert abs(cov - LEVEL) <= bound

    # The reported coverage counts the same cells with the same verdict (one cell of slack for an
    # interval end that rounds differently after the model file's round trip).
    reported = json.loads((tmp_path / "rw_model.json").read_text())["fit"]["heldout_coverage"]
    assert reported["cells"] == held.sum() and reported["level"] == LEVEL
    assert abs(reported["all"] * held.sum() - inside) <= 1
    assert abs(reported["columns"]["y"] - reported["all"]) < 1e-12
    assert f"{reported['all']:.3f}" in out and "Held-out coverage of the 95% intervals" in out

    # For orientation: the z value behind the interval columns is the normal quantile of the level.
    z = statistics.NormalDist().inv_cdf(0.5 + LEVEL / 2)
    mean = np.array(applied["y_smoothed"], float)
    np.testing.assert_allclose((upper - mean)[held], (mean - lower)[held], rtol=1e-9)
    assert np.all((upper - mean)[held] / z > np.sqrt(R) * 0.8)  # includes the noise sd (r fitted, ±20 %)
