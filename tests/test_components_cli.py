"""Composed models on the command line: `kalmax fit --components`, `kalmax apply`, the version-3 model file.

All data here are invented, generated in code: a greenhouse humidity record
(per cent) with a slowly wandering level, a daily pattern of two harmonics
and the effect of a vent whose opening (0..1) is a known input, sampled at
irregular stamps with an 18 h gap and missing cells. It is simulated exactly
from the closed forms of the components, written out by hand below (a random
walk: variance q·Δ per step; a trigonometric season: harmonic j turns by
2πj·Δ/period with isotropic noise q·Δ per state), not through kalmax.

Independent checks: the command's smoothed means against kalmax's Python API
(``compose_components`` + ``smooth``, the route a library user takes), and
against the dense normal-equation solve of ``tests/reference.py`` on the
discretised model written out by hand (block-diagonal rotations, Q = q·Δ).
Closed forms: A. C. Harvey, "Forecasting, Structural Time Series Models and
the Kalman Filter", CUP 1989, §2.3 (trigonometric seasonal; from memory);
re-derived in ``tests/test_components.py``.

The command runs in this process (``cli_helpers.cli``): the compiled programs
are then shared between the runs, which keeps the file fast.
"""

import datetime as dt
import json
import os
import zlib

import jax.numpy as jnp
import numpy as np
import pytest
from scipy import linalg

import kalmax as kx
from kalmax import cli as kcli
from kalmax._src.tools import model_file as kio

from cli_helpers import cli, read_csv, snapshot, write_csv
from reference import dense_smooth

COMPONENTS = "level + season(period=1 day, harmonics=2) as daily + regression(vent)"
TRUE = {"level.q": 0.02, "daily.q": 0.004, "vent.beta": -4.0, "r": 0.3}  # per hour
START = dt.datetime(2024, 3, 1, tzinfo=dt.timezone.utc)


def _rot(a):
    # exp([[0, a], [−a, 0]]) is the rotation by a (the generator squares to −a² I). [H89] §2.3.
    return np.array([[np.cos(a), np.sin(a)], [-np.sin(a), np.cos(a)]])


def _season_AQ(d, period, K, q):
    return (linalg.block_diag(*[_rot(2 * np.pi * j / period * d) for j in range(1, K + 1)]), q * d * np.eye(2 * K))


def greenhouse(rng, days=24, gap=(240.0, 258.0)):
    """Invented record: (hours (T,), humidity with NaN where missing (T,), vent (T,), noise-free signal (T,)).

    Stamps are whole seconds, 0.5–1.5 h apart; the 18 h gap has no rows, and
    10 % of the other rows have a blank humidity cell (the vent is known at
    every row).
    """
    seconds = np.cumsum(rng.integers(1800, 5400, size=24 * days))
    t = seconds / 3600.0
    keep = (t < gap[0]) | (t > gap[1])
    t = t[keep]
    x = np.array([70.0, 5.0, 0.0, 1.0, 0.5])  # level, daily c1, s1, c2, s2
    xs = [x]
    for d in np.diff(t):
        A_s, Q_s = _season_AQ(d, 24.0, 2, TRUE["daily.q"])
        A, Q = linalg.block_diag(1.0, A_s), linalg.block_diag(TRUE["level.q"] * d, Q_s)
        x = A @ x + np.sqrt(np.diag(Q)) * rng.normal(size=5)  # Q diagonal here
        xs.append(x)
    xs = np.array(xs)
    vent = np.round(np.clip(0.5 + 0.5 * np.sin(2 * np.pi * (t - 8) / 24) + 0.3 * rng.normal(size=t.size), 0, 1), 4)
    signal = xs[:, 0] + xs[:, 1] + xs[:, 3] + TRUE["vent.beta"] * vent
    y = signal + np.sqrt(TRUE["r"]) * rng.normal(size=t.size)
    y[rng.uniform(size=t.size) < 0.1] = np.nan
    return t, y, vent, signal


def _stamp(hours):
    return (START + dt.timedelta(seconds=round(hours * 3600))).isoformat().replace("+00:00", "Z")


def write_greenhouse(path, t, y, vent):
    write_csv(path, ["time", "humidity", "vent"],
              [[_stamp(ti), "" if np.isnan(yi) else repr(float(yi)), repr(float(vi))] for ti, yi, vi in zip(t, y, vent)])


def _run(args, cwd):
    """Exit code of the command run in this process (for module fixtures, which have no capsys)."""
    old = os.getcwd()
    os.chdir(cwd)
    try:
        return kcli.main([str(a) for a in args])
    finally:
        os.chdir(old)


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """One fit of the invented greenhouse record (likelihood, 20 % of the cells held out)."""
    seed = int(os.environ.get("KALMAX_TEST_SEED", "0")) + zlib.crc32(b"greenhouse") % 10_000
    print(f"[seed] greenhouse: {seed}")
    rng = np.random.default_rng(seed)
    folder = tmp_path_factory.mktemp("greenhouse")
    t, y, vent, signal = greenhouse(rng)
    write_greenhouse(folder / "gh.csv", t, y, vent)
    code = _run(["fit", "gh.csv", "--time", "time", "--time-unit", "h", "--measure", "humidity",
                 "--components", COMPONENTS.replace("regression(vent)", "regression(vent) as vent"),
                 "--no-report", "-q"], folder)
    assert code == 0
    return {"folder": folder, "t": t, "y": y, "vent": vent, "signal": signal}


def _column(path, name):
    header, rows = read_csv(path)
    j = header.index(name)
    return np.array([float(r[j]) if r[j] else np.nan for r in rows])


def _python_api(doc, t, vent):
    """The fitted model rebuilt through the library API from the model file's numbers."""
    p = doc["model"]["parameters"]
    cm = kx.compose_components(kx.level_component("level"), kx.seasonal_component("daily", 24.0, 2),
                               kx.regression_component("vent", 1))
    params = {"level.q": p["level.q"], "daily.q": p["daily.q"], "vent.beta": jnp.asarray(p["vent.beta"]),
              "r": jnp.asarray([doc["model"]["measurements"][0]["noise_variance"]])}
    return cm.model(params, inputs={"vent": vent[:, None]}).at_times(t), params


def _dense_by_hand(doc, t, vent):
    """The discretised model written out by hand: A = blockdiag(1, R(ωΔ), R(2ωΔ)), Q = blockdiag(q Δ, q_d Δ I)."""
    p = doc["model"]["parameters"]
    A, Q = [], []
    for d in np.diff(t):
        A_s, Q_s = _season_AQ(d, 24.0, 2, p["daily.q"])
        A.append(linalg.block_diag(1.0, A_s))
        Q.append(linalg.block_diag(p["level.q"] * d, Q_s))
    r = doc["model"]["measurements"][0]["noise_variance"]
    return {"A": np.array(A), "Q": np.array(Q), "C": np.array([[1.0, 1.0, 0.0, 1.0, 0.0]]), "R": np.array([[r]]),
            "d": (p["vent.beta"][0] * vent)[:, None], "b": None, "m0": None, "P0": None}


# ---------------------------------------------------------------------------
# Fit, recovery, agreement with the library and the dense reference
# ---------------------------------------------------------------------------


def test_fit_recovers_the_generating_parameters(fitted):
    """Stated tolerances, set from the spread over 10 seeds of this invented set-up (24 days, ~560 stamps,
    80 % of the observed cells used by the fit): β within 0.5 of −4 (seen: within 0.22), r within a factor
    1.5 (seen: 0.85–1.11 of the truth), the daily pattern's q within a factor 2.5 (seen: 0.56–1.49) and the
    level's q within a factor 3 (seen: 0.58–1.60; the level's wandering is the least certain quantity)."""
    doc = json.loads((fitted["folder"] / "gh_model.json").read_text())
    assert doc["format_version"] == 3 and doc["model"]["kind"] == "composed"
    p = doc["model"]["parameters"]
    r = doc["model"]["measurements"][0]["noise_variance"]
    print(f"fitted: {p}, r {r:.4g}; true {TRUE}")
    assert abs(p["vent.beta"][0] - TRUE["vent.beta"]) < 0.5
    assert abs(np.log(r / TRUE["r"])) < np.log(1.5)
    assert abs(np.log(p["daily.q"] / TRUE["daily.q"])) < np.log(2.5)
    assert abs(np.log(p["level.q"] / TRUE["level.q"])) < np.log(3.0)
    fit = doc["fit"]
    assert fit["heldout_rmse_after"]["humidity"] < fit["heldout_rmse_before"]["humidity"]
    assert fit["components"].startswith("level + season(period=1 day")


def test_smoothed_means_equal_the_python_api_and_the_dense_reference(fitted):
    folder, t, vent = fitted["folder"], fitted["t"], fitted["vent"]
    doc = json.loads((folder / "gh_model.json").read_text())
    cli_mean = _column(folder / "gh_smoothed.csv", "humidity_smoothed")
    y = _column(folder / "gh_smoothed.csv", "humidity")[:, None]
    mask = ~np.isnan(y)
    model, _ = _python_api(doc, t, vent)
    est = kx.smooth(model, np.where(mask, y, 0.0), mask)
    # The CSV holds repr() of float64, so the numbers agree to rounding of the last digit.
    np.testing.assert_allclose(cli_mean, np.asarray(est.measurements)[:, 0], rtol=0, atol=1e-9)
    ref = _dense_by_hand(doc, t, vent)
    np.testing.assert_allclose(np.asarray(model.A), ref["A"], rtol=0, atol=1e-12)
    x = dense_smooth(ref, np.where(mask, y, 0.0), mask)
    np.testing.assert_allclose(cli_mean, x @ ref["C"][0] + ref["d"][:, 0], rtol=0, atol=1e-7)
    # and the smoothed signal is close to the invented noise-free truth (also across the 18 h gap)
    err = cli_mean - fitted["signal"]
    print(f"RMSE against the noise-free truth: {np.sqrt(np.mean(err ** 2)):.3g} (noise sd {np.sqrt(TRUE['r']):.3g})")
    assert np.sqrt(np.mean(err ** 2)) < np.sqrt(TRUE["r"])
    status = read_csv(folder / "gh_smoothed.csv")[1]
    assert {r[-1] for r in status} == {"observed", "imputed", "held-out"}


def test_apply_with_the_version_3_file_reproduces_the_fit(fitted, capsys):
    folder = fitted["folder"]
    code, out, err = cli(["apply", "gh_model.json", "gh.csv", "-o", "applied.csv", "--no-report", "-q"], folder,
                         capsys)
    assert code == 0, err
    for col in ("humidity_smoothed", "humidity_lower", "humidity_upper"):
        np.testing.assert_allclose(_column(folder / "applied.csv", col), _column(folder / "gh_smoothed.csv", col),
                                   rtol=0, atol=1e-10)
    spec = kx.load_model(folder / "gh_model.json")
    assert spec.is_composed and spec.input_columns() == ("vent",) and spec.measured == ("level+daily+vent",)
    assert spec.state_names() == ("level.level", "daily.c1", "daily.s1", "daily.c2", "daily.s2")
    again = folder / "again.json"
    kx.save_model(again, spec)
    assert kx.load_model(again) == spec


def test_forecast_with_future_inputs_equals_the_python_api(fitted, capsys):
    """Forecast rows from --future-inputs: means and intervals equal the library's smoother over the record
    plus the future stamps (unobserved), with the future vent values in the offset."""
    folder, t, vent = fitted["folder"], fitted["t"], fitted["vent"]
    t_future = t[-1] + np.array([0.5, 2.0, 5.0, 9.0])
    v_future = np.array([0.0, 0.25, 1.0, 0.5])
    write_csv(folder / "future.csv", ["time", "vent"], [[_stamp(a), str(b)] for a, b in zip(t_future, v_future)])
    code, out, err = cli(["apply", "gh_model.json", "gh.csv", "-o", "fc.csv", "--no-report", "-q",
                          "--future-inputs", "future.csv"], folder, capsys)
    assert code == 0, err
    header, rows = read_csv(folder / "fc.csv")
    assert [r[header.index("humidity_status")] for r in rows[-4:]] == ["forecast"] * 4
    assert [r[0] for r in rows[-4:]] == [_stamp(a) for a in t_future]
    doc = json.loads((folder / "gh_model.json").read_text())
    tt = np.concatenate([t, np.round(t_future * 3600) / 3600])
    model, params = _python_api(doc, tt, np.concatenate([vent, v_future]))
    y = np.concatenate([_column(folder / "gh_smoothed.csv", "humidity"), np.full(4, np.nan)])[:, None]
    mask = ~np.isnan(y)
    est = kx.smooth(model, np.where(mask, y, 0.0), mask, covariances=True)
    sd = np.sqrt(np.asarray(est.measurement_cov)[:, 0, 0] + params["r"][0])
    np.testing.assert_allclose(_column(folder / "fc.csv", "humidity_smoothed"), np.asarray(est.measurements)[:, 0],
                               rtol=0, atol=1e-9)
    upper = np.asarray(est.measurements)[:, 0] + 1.959963984540054 * sd
    np.testing.assert_allclose(_column(folder / "fc.csv", "humidity_upper")[-4:], upper[-4:], rtol=0, atol=1e-8)
    assert np.all(np.diff(sd[-4:]) > 0)  # the further ahead, the wider


def test_fit_with_forecast_and_holdout_objective(tmp_path, capsys, rng):
    """A composed model without regression: --forecast rows (status 'forecast', widening intervals) from
    `kalmax fit`; the holdout objective runs on it and calibrates the noise scale."""
    t, y, vent, _ = greenhouse(rng, days=10, gap=(100.0, 101.0))
    write_greenhouse(tmp_path / "gh.csv", t, y, vent)
    code, out, err = cli(["fit", "gh.csv", "--time", "time", "--time-unit", "h", "--measure", "humidity",
                          "--components", "level + season(period=24h) as daily", "--objective", "holdout",
                          "--steps", "30", "--forecast", "6", "--forecast-step", "2h", "--no-report", "-q",
                          "--with-states"], tmp_path, capsys)
    assert code == 0, err
    header, rows = read_csv(tmp_path / "gh_smoothed.csv")
    assert len(rows) == t.size + 6 and [r[header.index("humidity_status")] for r in rows[-6:]] == ["forecast"] * 6
    assert header[-3:] == ["state_level.level", "state_daily.c1", "state_daily.s1"]
    width = _column(tmp_path / "gh_smoothed.csv", "humidity_upper") - _column(tmp_path / "gh_smoothed.csv",
                                                                               "humidity_lower")
    assert np.all(np.diff(width[-6:]) > 0)
    spec = kx.load_model(tmp_path / "gh_model.json")
    assert spec.fit["objective"] == "holdout" and spec.components[1].period == 24.0


# ---------------------------------------------------------------------------
# Errors: exit code 2, the option named, nothing written
# ---------------------------------------------------------------------------

_ERRORS = {
    "unknown component": ("level + seasonal(period=1 day)", "unknown component 'seasonal'"),
    "period missing": ("level + season(harmonics=2)", "needs a period"),
    "period zero": ("level + season(period=0 day)", "greater than 0"),
    "period negative": ("level + cycle(period=-3 h)", "positive number"),
    "bad unit": ("level + season(period=1 fortnight)", "unknown time unit 'fortnight'"),
    "harmonics not an integer": ("level + season(period=1 day, harmonics=2.5)", "positive whole number"),
    "harmonics zero": ("level + season(period=1 day, harmonics=0)", "positive whole number"),
    "harmonics past half the samples": ("level + season(period=1 day, harmonics=12)", "samples per period"),
    "regression column missing": ("level + regression(heater)", "input column 'heater'"),
    "regression on a measured column": ("level + regression(humidity)", "not the measured"),
    "two levels on one column": ("level + trend", "tell them apart"),
    "regression alone": ("regression(vent)", "no states"),
    "unclosed parenthesis": ("level + season(period=1 day", "not closed"),
    "unknown setting": ("level(period=1 day)", "unknown setting 'period'"),
}


@pytest.fixture(scope="module")
def small_csv(tmp_path_factory):
    folder = tmp_path_factory.mktemp("errors")
    t, y, vent, _ = greenhouse(np.random.default_rng(7), days=3, gap=(30.0, 31.0))
    write_greenhouse(folder / "gh.csv", t, y, vent)
    return folder


@pytest.mark.parametrize("case", list(_ERRORS))
def test_bad_components_exit_2_naming_the_option(small_csv, capsys, case):
    text, words = _ERRORS[case]
    before = snapshot(small_csv)
    code, out, err = cli(["fit", "gh.csv", "--time", "time", "--time-unit", "h", "--measure", "humidity",
                          "--components", text, "--no-report"], small_csv, capsys)
    assert code == 2, (code, err)
    assert "--components" in err and words in err, err
    assert snapshot(small_csv) == before


def test_other_usage_errors(small_csv, capsys):
    base = ["fit", "gh.csv", "--time", "time", "--measure", "humidity", "--no-report"]
    header, rows = read_csv(small_csv / "gh.csv")
    hours = [(dt.datetime.fromisoformat(r[0].replace("Z", "+00:00")) - START).total_seconds() / 3600 for r in rows]
    write_csv(small_csv / "numbers.csv", header, [[repr(h)] + r[1:] for h, r in zip(hours, rows)])
    numbers = ["fit", "numbers.csv", "--time", "time", "--measure", "humidity", "--no-report", "-q"]
    code, out, err = cli(numbers + ["--components", "level + season(period=1 day)"], small_csv, capsys)
    assert code == 2 and "--components" in err and "--time-unit" in err, err  # numbers without a named unit
    cases = [
        (["--components", "level", "--model", "random-walk"], "--components"),
        (["--components", "level", "--measure", "humidity=level+daily"], "--measure"),
        (["--components", "level + regression(vent)", "--forecast", "3"], "--future-inputs"),
        (["--components", "level", "--future-inputs", "gh.csv"], "--future-inputs"),
        (["--components", "level", "--dims", "2"], "--dims"),
        (["--components", "level", "--set", "level.q=-1"], "--set"),
        (["--components", "level", "--fix", "q"], "--fix"),
    ]
    before = snapshot(small_csv)
    for extra, word in cases:
        code, out, err = cli(base + extra, small_csv, capsys)
        assert code == 2 and word in err, (extra, code, err)
    assert snapshot(small_csv) == before


def test_missing_inputs_are_data_errors(tmp_path, capsys):
    """A blank regression input cell (in DATA or in --future-inputs) is refused with the row named (exit 3):
    a regression reads its inputs at every row, so there is nothing to impute them from."""
    t, y, vent, _ = greenhouse(np.random.default_rng(8), days=3, gap=(30.0, 31.0))
    write_greenhouse(tmp_path / "gh.csv", t, y, vent)
    rows = read_csv(tmp_path / "gh.csv")[1]
    rows[5][2] = ""
    write_csv(tmp_path / "holes.csv", ["time", "humidity", "vent"], rows)
    code, out, err = cli(["fit", "holes.csv", "--time", "time", "--time-unit", "h", "--measure", "humidity",
                          "--components", "level + regression(vent)", "--no-report", "--steps", "2"], tmp_path, capsys)
    assert code == 3 and "input column 'vent', data row 6" in err, err
    code, out, err = cli(["fit", "gh.csv", "--time", "time", "--time-unit", "h", "--measure", "humidity",
                          "--components", "level + regression(vent)", "--no-report", "--steps", "2", "-q"],
                         tmp_path, capsys)
    assert code == 0, err
    write_csv(tmp_path / "future.csv", ["time", "vent"], [[_stamp(t[-1] + 1), ""]])
    code, out, err = cli(["apply", "gh_model.json", "gh.csv", "--future-inputs", "future.csv", "--no-report",
                          "-o", "f.csv"], tmp_path, capsys)
    assert code == 3 and "future.csv" in err and "'vent'" in err, err
    code, out, err = cli(["apply", "gh_model.json", "gh.csv", "--forecast", "2", "--no-report", "-o", "f.csv"],
                         tmp_path, capsys)
    assert code == 2 and "--forecast" in err and "--future-inputs" in err, err
    write_csv(tmp_path / "novent.csv", ["time", "humidity"], [r[:2] for r in read_csv(tmp_path / "gh.csv")[1]])
    code, out, err = cli(["apply", "gh_model.json", "novent.csv", "--no-report", "-o", "f.csv"], tmp_path, capsys)
    assert code == 3 and "'vent'" in err, err


# ---------------------------------------------------------------------------
# The model file: version 3, and versions 1 and 2 still load
# ---------------------------------------------------------------------------


def _chain_spec(**changes):
    base = dict(kind="random-walk", dims=1, time_column="t", columns=("depth",), measured=("level0",),
                params={"q": [0.05]}, noise=(0.01,))
    return kx.ModelSpec(**{**base, **changes})


def test_version_1_and_2_files_written_by_their_code_path_still_load_and_apply(tmp_path, capsys, rng):
    """Files written by the version-1 and version-2 writers (``spec_to_dict(spec, version=...)``, the code
    path that wrote them before version 3) load to the same model, and `kalmax apply` smooths with them
    exactly as with the version-3 file."""
    spec = _chain_spec(time_unit="h")
    t = np.cumsum(rng.uniform(0.5, 1.5, size=30))
    write_csv(tmp_path / "d.csv", ["t", "depth"], [[repr(float(a)), repr(float(b))] for a, b in zip(t, np.cumsum(rng.normal(size=30)))])
    outputs = {}
    for version, s in ((1, _chain_spec()), (2, spec), (3, spec)):
        doc = kio.spec_to_dict(s, version=version)
        assert doc["format_version"] == version and ("time_unit" in doc["model"]) == (version > 1)
        path = tmp_path / f"v{version}.json"
        path.write_text(json.dumps(doc))
        assert kx.load_model(path) == s
        code, out, err = cli(["apply", path.name, "d.csv", "-o", f"out{version}.csv", "--no-report", "-q"],
                             tmp_path, capsys)
        assert code == 0, err
        outputs[version] = _column(tmp_path / f"out{version}.csv", "depth_smoothed")
    np.testing.assert_array_equal(outputs[1], outputs[3])
    np.testing.assert_array_equal(outputs[2], outputs[3])
    with pytest.raises(ValueError, match="composed"):
        kio.spec_to_dict(kx.load_model(_composed_file(tmp_path)), version=2)


def _composed_file(folder):
    spec = kx.ModelSpec(
        kind="composed", dims=1, time_column="t", columns=("a", "b"), measured=("lvl+day+heat", "lvl+day"),
        params={"lvl.q": 0.1, "day.q": 0.01, "heat.beta": [0.5, -2.0]}, noise=(0.2, 0.3), time_unit="h",
        components=(_part("level", "lvl", ("a", "b")), _part("season", "day", ("a", "b"), period=24.0, harmonics=3),
                    _part("regression", "heat", ("a",), inputs=("sun", "fan"))))
    path = folder / "composed.json"
    kx.save_model(path, spec)
    return path


def _part(kind, name, columns, **kw):
    from kalmax._src.tools.composed import Part

    return Part(kind=kind, name=name, columns=columns, **kw)


def test_version_3_round_trip_and_refusals(tmp_path):
    path = _composed_file(tmp_path)
    doc = json.loads(path.read_text())
    spec = kx.load_model(path)
    assert doc["format_version"] == 3 and [c["kind"] for c in doc["model"]["components"]] == [
        "level", "season", "regression"]
    assert doc["model"]["components"][1] == {"name": "day", "kind": "season", "columns": ["a", "b"],
                                             "period": 24.0, "harmonics": 3}
    assert spec.params["heat.beta"] == [0.5, -2.0] and spec.input_columns() == ("sun", "fan")

    def refused(change, word):
        bad = json.loads(path.read_text())
        change(bad)
        p = tmp_path / "bad.json"
        p.write_text(json.dumps(bad))
        with pytest.raises(kx.ModelFileError, match=word):
            kx.load_model(p)

    refused(lambda d: d.update(format_version=2), "version 3")
    refused(lambda d: d["model"]["components"][0].update(kind="wave"), "kind")
    refused(lambda d: d["model"]["components"][1].update(period=-24.0), "period")
    refused(lambda d: d["model"]["components"][1].update(harmonics=1.5), "harmonics")
    refused(lambda d: d["model"]["components"][1].update(harmonics=10**9), "harmonics")
    refused(lambda d: d["model"]["components"][2].update(inputs=["a"]), "input")
    refused(lambda d: d["model"]["components"][0].update(columns=["c"]), "read by")
    refused(lambda d: d["model"]["components"][0].update(colour="red"), "unknown entry")
    refused(lambda d: d["model"]["parameters"].pop("day.q"), "parameters")
    refused(lambda d: d["model"]["parameters"].update({"lvl.q": -1.0}), "lvl.q")
    refused(lambda d: d["model"].update(states=["x"]), "states")
    refused(lambda d: d["model"].pop("components"), "components")
