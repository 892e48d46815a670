"""`kalmax fit --group COL` / `kalmax apply` on a long table (one row per station and time), and the
standard errors in natural units.

Independent routes:
* separate parameters per group: the same as fitting that group's rows alone
  through the command (Adam is coordinate-wise, so a summed loss over
  disjoint parameters is the separate fits side by side; tools/groups.py);
* shared parameters: a plain Python loop of ``kx.log_likelihood`` over the
  unpadded groups at their own concrete times, minimised here with
  ``kx.fit`` and Adam from the same start;
* the delta method SE(v) ≈ |dv/dθ| SE(θ) for v = exp(θ) against a central
  finite difference of exp (Casella & Berger, Statistical Inference, 2nd ed.,
  §5.5.4; finite differences: common practice).
"""

import json
import math

import jax.numpy as jnp
import numpy as np
import optax
import pytest

import kalmax as kx
from kalmax._src.tools import model_file as kio

from cli_helpers import cli, read_csv, snapshot, write_csv

FIT = ["fit", "--time", "time", "--model", "random-walk", "--measure", "level", "--no-report", "-q"]
STEPS = "12"


def _stations(rng, spec=(("north", 0.1, 0.05, 36), ("south", 1.0, 0.3, 28))):
    """Rows (station, time, level) of invented random walks, interleaved like a real long table."""
    data = {}
    for name, q, r, T in spec:
        x = np.cumsum(rng.normal(scale=math.sqrt(q), size=T))
        y = x + rng.normal(scale=math.sqrt(r), size=T)
        y[rng.choice(T, 3, replace=False)] = np.nan
        data[name] = y
    rows = []
    for i in range(max(len(v) for v in data.values())):
        for name, y in data.items():
            if i < len(y):
                rows.append([name, i * 0.5, "" if np.isnan(y[i]) else f"{y[i]:.6f}"])
    return data, rows


def _columns(path):
    header, rows = read_csv(path)
    return {h: [r[i] for r in rows] for i, h in enumerate(header)}


def test_separate_groups_equal_fitting_each_group_alone(tmp_path, capsys, rng):
    data, rows = _stations(rng)
    write_csv(tmp_path / "long.csv", ["station", "time", "level"], rows)
    south = [[r[1], r[2]] for r in rows if r[0] == "south"]  # the shorter group: padded in the batch
    write_csv(tmp_path / "south.csv", ["time", "level"], south)
    code, _, err = cli(FIT + ["long.csv", "--group", "station", "--steps", STEPS, "--test-block", "4"],
                       tmp_path, capsys)
    assert code == 0, err
    # Alone, the likelihood would default to lbfgs; the grouped fit runs Adam, which is per coordinate.
    code, _, err = cli(FIT + ["south.csv", "--steps", STEPS, "--test-block", "4", "--optimizer", "adam"],
                       tmp_path, capsys)
    assert code == 0, err
    grouped = kx.load_model(tmp_path / "long_model.json")
    alone = kx.load_model(tmp_path / "south_model.json")
    assert grouped.group_values() == ("north", "south") and grouped.group_column == "station"
    mine = grouped.for_group("south")
    np.testing.assert_allclose(mine.params["q"], alone.params["q"], rtol=1e-6)
    np.testing.assert_allclose(mine.noise, alone.noise, rtol=1e-6)
    assert not np.allclose(grouped.for_group("north").params["q"], mine.params["q"], rtol=1e-2)
    doc = json.loads((tmp_path / "long_model.json").read_text())
    assert doc["format_version"] == kio.GROUPS_VERSION
    # The table keeps the group column and each group's rows, smoothed as alone.
    out, ref = _columns(tmp_path / "long_smoothed.csv"), _columns(tmp_path / "south_smoothed.csv")
    assert list(out)[:2] == ["station", "time"]
    rows_south = [i for i, s in enumerate(out["station"]) if s == "south"]
    assert [out["time"][i] for i in rows_south] == ref["time"]
    for c in ("level_smoothed", "level_lower", "level_upper"):
        np.testing.assert_allclose([float(out[c][i]) for i in rows_south], np.asarray(ref[c], float), rtol=1e-6)
    assert [out["level_status"][i] for i in rows_south] == ref["level_status"]
    # The model file round-trips; apply smooths a new table group by group (forecast rows per group).
    assert kio.spec_from_dict(doc) == grouped
    sub = [r for r in rows if r[0] == "south"][:10] + [r for r in rows if r[0] == "north"][:8]
    write_csv(tmp_path / "new.csv", ["station", "time", "level"], sub)
    code, _, err = cli(["apply", "long_model.json", "new.csv", "--no-report", "-q", "--forecast", "2"],
                       tmp_path, capsys)
    assert code == 0, err
    new = _columns(tmp_path / "new_smoothed.csv")
    assert new["station"] == ["south"] * 12 + ["north"] * 10
    assert new["level_status"][10:12] == ["forecast", "forecast"]


def test_shared_group_fit_matches_a_python_loop_over_the_groups(tmp_path, capsys, rng):
    _, rows = _stations(rng)
    write_csv(tmp_path / "long.csv", ["station", "time", "level"], rows)
    code, _, err = cli(FIT + ["long.csv", "--group", "station", "--group-fit", "shared", "--steps", STEPS,
                              "--test-fraction", "0", "--set", "q=0.4", "--set", "noise=0.2"], tmp_path, capsys)
    assert code == 0, err
    got = kx.load_model(tmp_path / "long_model.json")
    assert got.groups == () and got.fit["group_fit"] == "shared"
    assert json.loads((tmp_path / "long_model.json").read_text())["format_version"] == kio.FORMAT_VERSION
    # The same fit, written out: one scalar random walk per group (A = 1, Q = q Δt, C = 1, R = r),
    # likelihood summed over the groups at their own times, per observed cell.
    groups = {}
    for name, t, v in rows:
        groups.setdefault(name, ([], []))
        groups[name][0].append(float(t))
        groups[name][1].append(float(v) if v else np.nan)
    n_obs = sum(int(np.sum(~np.isnan(np.asarray(y)))) for _, y in groups.values())

    def loss(theta):
        q, r = jnp.exp(theta["q"]), jnp.exp(theta["noise"])
        total = 0.0
        for t, y in groups.values():
            y = np.asarray(y)[:, None]
            dt = np.diff(np.asarray(t))
            model = kx.StateSpace(A=jnp.ones((len(dt), 1, 1)), C=jnp.ones((1, 1)),
                                  Q=(q[0] * jnp.asarray(dt))[:, None, None], R=r.reshape(1, 1))
            total = total - kx.log_likelihood(model, jnp.asarray(np.nan_to_num(y)), jnp.asarray(~np.isnan(y)))
        return total / n_obs

    start = {"q": jnp.log(jnp.array([0.4])), "noise": jnp.log(jnp.array([0.2]))}
    ref = kx.fit(loss, start, optax.adam(0.1), steps=int(STEPS), progress=False)
    np.testing.assert_allclose(got.params["q"], np.exp(np.asarray(ref.params["q"])), rtol=1e-6)
    np.testing.assert_allclose(got.noise, np.exp(np.asarray(ref.params["noise"])), rtol=1e-6)


def test_group_errors_name_the_option_and_leave_no_output(tmp_path, capsys, rng):
    _, rows = _stations(rng)
    write_csv(tmp_path / "long.csv", ["station", "time", "level"], rows)
    write_csv(tmp_path / "lonely.csv", ["station", "time", "level"], rows + [["east", 0, "1.0"]])
    write_csv(tmp_path / "blank.csv", ["station", "time", "level"], rows[:5] + [["", 9, "1.0"]] + rows[5:])
    before = snapshot(tmp_path)
    cases = [
        (["long.csv", "--group", "site"], 2, ["--group", "'site'", "no such column"]),
        (["long.csv", "--group", "time"], 2, ["--group", "--time"]),
        (["lonely.csv", "--group", "station"], 3, ["station='east'", "1 row", "--group"]),
        (["blank.csv", "--group", "station"], 3, ["data row 6", "--group"]),
        (["long.csv", "--group", "station", "--objective", "holdout"], 2, ["--objective holdout", "--group"]),
        (["long.csv", "--report-group", "north"], 2, ["--report-group", "--group"]),
        (["long.csv", "--group", "station", "--report-group", "west"], 2, ["--report-group", "'west'"]),
    ]
    for args, want, words in cases:
        code, _, err = cli(FIT + args, tmp_path, capsys)
        assert code == want, (args, err)
        for w in words:
            assert w in err, (args, w, err)
    assert snapshot(tmp_path) == before  # nothing written, no temporary left


def test_apply_refuses_a_group_the_model_was_not_fitted_on(tmp_path, capsys):
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="time", columns=("level",), measured=("level0",),
                        params={"q": [0.1]}, noise=(0.05,), group_column="station",
                        groups=(("north", {"q": [0.1]}, (0.05,)), ("south", {"q": [1.0]}, (0.3,))))
    kx.save_model(tmp_path / "m.json", spec)
    assert kx.load_model(tmp_path / "m.json") == spec
    write_csv(tmp_path / "d.csv", ["station", "time", "level"], [["west", 0, 1], ["west", 1, 2], ["north", 0, 1],
                                                                  ["north", 1, 1.5]])
    before = snapshot(tmp_path)
    code, _, err = cli(["apply", "m.json", "d.csv", "--no-report"], tmp_path, capsys)
    assert code == 3 and "station='west'" in err and "not one of the model file's groups" in err
    code, _, err = cli(["apply", "m.json", "d.csv", "--group", "site", "--no-report"], tmp_path, capsys)
    assert code == 2 and "--group site" in err
    doc = json.loads((tmp_path / "m.json").read_text())
    doc["model"]["groups"]["members"][1]["noise_variance"] = [-1.0]
    (tmp_path / "neg.json").write_text(json.dumps(doc))
    doc["format_version"] = 4
    doc["model"]["groups"]["members"][1]["noise_variance"] = [0.3]
    (tmp_path / "v4.json").write_text(json.dumps(doc))
    for name, words in (("neg.json", ["group 'south'", "noise"]), ("v4.json", ["'groups'", "format version 5"])):
        with pytest.raises(kx.ModelFileError) as e:
            kio.load_model(tmp_path / name)
        for w in words:
            assert w in str(e.value), (name, w, str(e.value))
    assert snapshot(tmp_path) == {**before, "neg.json": (tmp_path / "neg.json").read_bytes(),
                                  "v4.json": (tmp_path / "v4.json").read_bytes()}


def test_natural_standard_errors_follow_the_delta_method():
    from kalmax.cli import _natural_standard_errors, _parameter_text

    spec = kx.ModelSpec(kind="local-linear-trend", dims=1, time_column="t", columns=("a", "b"),
                        measured=("level", "slope"), params={"q_level": 0.3, "q_slope": 2e-3}, noise=(0.5, 4.0))
    se_log = {"q_level": np.array(0.2), "q_slope": np.array(0.05), "noise": np.array([0.1, 0.3])}
    got = _natural_standard_errors(spec, se_log)
    h = 1e-6
    for name, value in (("q_level", 0.3), ("q_slope", 2e-3)):
        theta = math.log(value)
        slope = (math.exp(theta + h) - math.exp(theta - h)) / (2 * h)  # d exp / d theta, numerically
        assert got[name] == pytest.approx(slope * float(se_log[name]), rel=1e-6)
    for j, r in enumerate((0.5, 4.0)):
        theta = math.log(r)
        slope = (math.exp(theta + h) - math.exp(theta - h)) / (2 * h)
        assert got["noise"][j] == pytest.approx(slope * se_log["noise"][j], rel=1e-6)
    # The summary shows the noise as a standard deviation: SE(sqrt r) by a finite difference of sqrt.
    text = _parameter_text(spec, got)
    d_sqrt = (math.sqrt(4.0 + 1e-6) - math.sqrt(4.0 - 1e-6)) / 2e-6
    assert f"b 2 ± {d_sqrt * got['noise'][1]:.2g}" in text


def test_test_block_as_a_duration_holds_out_that_many_hours(tmp_path, capsys, rng):
    T = 60  # hourly ISO timestamps: --test-block 6h is 6 rows
    y = np.exp(0.1 * np.cumsum(rng.normal(size=T)))
    write_csv(tmp_path / "hourly.csv", ["time", "level"],
              [[f"2024-03-{1 + i // 24:02d}T{i % 24:02d}:00:00Z", f"{y[i]:.6f}"] for i in range(T)])
    code, out, err = cli(["fit", "hourly.csv", "--time", "time", "--model", "random-walk", "--measure", "level",
                          "--time-unit", "h", "--no-report", "--steps", "0", "--test-block", "6h",
                          "--test-fraction", "0.3", "--transform", "level=log"], tmp_path, capsys)
    assert code == 0, err
    assert "6 rows" in out
    status = _columns(tmp_path / "hourly_smoothed.csv")["level_status"]
    held = np.array([s == "held-out" for s in status])
    starts = [i for i in range(T) if held[i] and (i == 0 or not held[i - 1])]
    ends = [i + 1 for i in range(T) if held[i] and (i == T - 1 or not held[i + 1])]
    assert starts and all(s % 6 == 0 and (e - s) % 6 == 0 for s, e in zip(starts, ends))
    assert kx.load_model(tmp_path / "hourly_model.json").fit["test_block"] == 6
    # A duration on numbers without a named unit cannot be converted: the error names the option.
    write_csv(tmp_path / "plain.csv", ["time", "level"], [[i, f"{y[i]:.6f}"] for i in range(T)])
    code, _, err = cli(["fit", "plain.csv", "--time", "time", "--model", "random-walk", "--measure", "level",
                        "--no-report", "--test-block", "6h"], tmp_path, capsys)
    assert code == 2 and "--test-block '6h'" in err and "--time-unit" in err


def test_report_draws_transformed_columns_back_on_the_natural_scale():
    from kalmax._src.tools.apply_workflow import Smoothing
    from kalmax._src.tools.report import draw_report
    from kalmax._src.tools.series import Series

    import matplotlib.pyplot as plt

    T = 12
    t = np.arange(T, dtype=float)
    y_log = np.log(np.linspace(1.0, 3.0, T))[:, None]
    mean, sd = y_log + 0.01, np.full((T, 1), 0.2)
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="t", columns=("ozone",), measured=("level0",),
                        params={"q": [0.1]}, noise=(0.01,), transforms=(("ozone", "log"),))
    series = Series(times_raw=list(t), t=t, y=y_log, time_format="number")
    fig = draw_report(spec, series, Smoothing(mean=mean, sd=sd, states=mean), level=0.95)
    try:
        ax = fig.axes[0]
        smoothed = [ln for ln in ax.lines if ln.get_label() == "smoothed"][0]
        measured = [ln for ln in ax.lines if ln.get_label() == "measured"][0]
        np.testing.assert_allclose(smoothed.get_ydata(), np.exp(mean[:, 0]), rtol=1e-12)
        np.testing.assert_allclose(measured.get_ydata(), np.exp(y_log[:, 0]), rtol=1e-12)
        band = ax.collections[0].get_paths()[0].vertices[:, 1]  # the interval band's outline
        z = 1.959963984540054
        assert band.min() == pytest.approx(np.exp(mean[:, 0] - z * sd[:, 0]).min(), rel=1e-9)
        assert band.max() == pytest.approx(np.exp(mean[:, 0] + z * sd[:, 0]).max(), rel=1e-9)
        resid = fig.axes[1].lines[0].get_ydata()  # residuals stay on the model's scale
        np.testing.assert_allclose(resid, (y_log[:, 0] - mean[:, 0]) / sd[:, 0], rtol=1e-12)
    finally:
        plt.close(fig)
