"""`kalmax fit`'s gap-shaped held-out blocks, its warning when a fit worsens the held-out error,
and per-column transforms (--transform COL=log), end to end through the command run in this process.

The independent routes: held-out blocks are recomputed from the definition in
``splits.holdout_blocks``' docstring (consecutive blocks of L rows from row 0,
round(fraction · blocks) of them); the log-transformed output is compared
with ``kx.smooth`` run here on the logged column with a hand-built
random-walk model (continuous random walk on unit steps: A = 1, Q = q·Δt;
Särkkä, Bayesian Filtering and Smoothing, 2013, §6.1 / common practice).
"""

import json
import math
from statistics import NormalDist

import jax.numpy as jnp
import numpy as np

import kalmax as kx
from kalmax._src.tools import model_file as kio

from cli_helpers import cli, read_csv, snapshot, write_csv

FIT = ["fit", "--time", "time", "--model", "random-walk", "--no-report"]


def _columns(path):
    header, rows = read_csv(path)
    return {h: [r[i] for r in rows] for i, h in enumerate(header)}


def test_held_out_cells_are_whole_blocks_of_the_given_length(tmp_path, capsys, rng):
    T, L, fraction = 120, 8, 0.25
    a = np.cumsum(rng.normal(size=T))
    b = a + rng.normal(size=T)
    missing_b = set(rng.choice(T, 15, replace=False).tolist())
    write_csv(tmp_path / "two.csv", ["time", "a", "b"],
              [[i, f"{a[i]:.5f}", "" if i in missing_b else f"{b[i]:.5f}"] for i in range(T)])
    code, out, err = cli(FIT + ["two.csv", "--measure", "a", "--measure", "b", "--steps", "0",
                                "--test-block", str(L), "--test-fraction", str(fraction), "--seed", "3"],
                         tmp_path, capsys)
    assert code == 0, err
    assert "warning" not in err  # no steps: the fitted model is the start, so the error is not worse
    cols = _columns(tmp_path / "two_smoothed.csv")
    held = {c: np.array([s == "held-out" for s in cols[c + "_status"]]) for c in ("a", "b")}
    rows = held["a"] | held["b"]
    # Runs of held-out rows: each starts on a block boundary and spans whole blocks.
    starts = [i for i in range(T) if rows[i] and (i == 0 or not rows[i - 1])]
    ends = [i + 1 for i in range(T) if rows[i] and (i == T - 1 or not rows[i + 1])]
    assert starts, "no held-out rows"
    for s, e in zip(starts, ends):
        assert s % L == 0 and (e - s) % L == 0, (s, e)
    blocks = sorted({i // L for i in np.flatnonzero(rows)})
    assert len(blocks) == round(fraction * math.ceil(T / L))
    for k in blocks:  # every measured cell of a chosen block is held out, in both columns; missing stay imputed
        for i in range(k * L, min((k + 1) * L, T)):
            assert held["a"][i]
            assert held["b"][i] == (i not in missing_b)
            if i in missing_b:
                assert cols["b_status"][i] == "imputed"
    doc = json.loads((tmp_path / "two_model.json").read_text())
    assert doc["fit"]["test_block"] == L and doc["fit"]["warnings"] == []
    assert doc["format_version"] == 3  # no transform: still written as version 3

    code, _, err = cli(FIT + ["two.csv", "--measure", "a", "--test-block", "0"], tmp_path, capsys)
    assert code == 2 and "--test-block" in err


def test_warning_when_the_fit_worsens_the_held_out_error(tmp_path, capsys, rng):
    # Training cells are white noise, so the likelihood wants a flat, heavily smoothed level. Each
    # held-out block repeats the value just before it, and so does the row just after it: a random
    # walk started with tiny noise bridges such a gap exactly, the fitted one does not.
    T = 200
    y = rng.normal(size=T)
    held = np.asarray(kx.holdout_blocks(jnp.ones((T, 1), bool), 10, 0.2, 0))[:, 0]  # the CLI's default split
    i = 0
    while i < T:
        if not held[i]:
            i += 1
            continue
        j = i
        while j < T and held[j]:
            j += 1
        c = y[i - 1] if i > 0 else y[j]
        y[i:j] = c
        if j < T:
            y[j] = c
        i = j
    write_csv(tmp_path / "wn.csv", ["time", "level"], [[k, f"{y[k]:.6f}"] for k in range(T)])
    code, out, err = cli(FIT + ["wn.csv", "--measure", "level", "--set", "q=100", "--set", "noise=0.0001",
                                "--steps", "60", "--learning-rate", "0.2", "--seed", "0"], tmp_path, capsys)
    assert code == 0, err  # documented: a warning, the exit code is unchanged
    assert "warning: fitting made the held-out error worse" in err
    fit = json.loads((tmp_path / "wn_model.json").read_text())["fit"]
    assert fit["heldout_rmse_after"]["all"] > fit["heldout_rmse_before"]["all"]
    assert len(fit["warnings"]) == 1 and "worse" in fit["warnings"][0]
    # The start bridges the held-out gaps exactly (by construction, checked from the table).
    cols = _columns(tmp_path / "wn_smoothed.csv")
    assert [s == "held-out" for s in cols["level_status"]] == held.tolist()


def _positive_series(rng, T=150):
    x = np.cumsum(0.15 * rng.normal(size=T)) + 0.05 * rng.normal(size=T)
    gaps = set(range(40, 60)) | set(range(100, 108)) | {5, 77}
    return np.exp(x), gaps


def test_log_transform_keeps_intervals_positive_and_matches_smoothing_the_logs(tmp_path, capsys, rng):
    y, gaps = _positive_series(rng)
    T = y.size
    write_csv(tmp_path / "ozone.csv", ["time", "ozone"],
              [[k, "" if k in gaps else f"{y[k]:.6f}"] for k in range(T)])
    code, _, err = cli(FIT + ["ozone.csv", "--measure", "ozone", "--transform", "ozone=log", "--steps", "15",
                              "--forecast", "10"], tmp_path, capsys)
    assert code == 0, err
    cols = _columns(tmp_path / "ozone_smoothed.csv")
    lower, upper, mid = (np.array(cols["ozone_" + s], float) for s in ("lower", "upper", "smoothed"))
    assert lower.size == T + 10 and np.all(lower > 0) and np.all(lower < mid) and np.all(mid < upper)
    as_read = [math.nan if k in gaps else float(f"{y[k]:.6f}") for k in range(T)]
    written = [float(v) if v.strip() else math.nan for v in cols["ozone"][:T]]
    np.testing.assert_array_equal(written, as_read)  # the measured values exactly as read, not exp(log(y))

    doc = json.loads((tmp_path / "ozone_model.json").read_text())
    assert doc["format_version"] == 4 and doc["model"]["transforms"] == {"ozone": "log"}
    q, r = doc["model"]["parameters"]["q"][0], doc["model"]["measurements"][0]["noise_variance"]
    # Independent route: the same random walk built by hand, smoothed on log(y) (flat prior, unit steps).
    obs = np.array([k not in gaps for k in range(T)] + [False] * 10)[:, None]
    logy = np.where(obs[:, 0], np.log(np.concatenate([np.round(y, 6), np.ones(10)])), 0.0)[:, None]
    model = kx.StateSpace(A=jnp.eye(1), C=jnp.eye(1), Q=q * jnp.eye(1), R=r * jnp.eye(1))
    sm = kx.smooth(model, jnp.asarray(logy), jnp.asarray(obs), covariances=True)
    m = np.asarray(sm.measurements)[:, 0]
    s = np.sqrt(np.asarray(sm.measurement_cov)[:, 0, 0] + r)
    z = NormalDist().inv_cdf(0.975)
    np.testing.assert_allclose(mid, np.exp(m), rtol=1e-6)
    np.testing.assert_allclose(lower, np.exp(m - z * s), rtol=1e-6)
    np.testing.assert_allclose(upper, np.exp(m + z * s), rtol=1e-6)

    # Round trip: `apply` with the saved model uses the transform and reproduces the fit's table.
    code, _, err = cli(["apply", "ozone_model.json", "ozone.csv", "-o", "again.csv", "--no-report",
                        "--forecast", "10"], tmp_path, capsys)
    assert code == 0, err
    again = _columns(tmp_path / "again.csv")
    np.testing.assert_allclose(np.array(again["ozone_lower"], float), lower, rtol=1e-9)
    np.testing.assert_allclose(np.array(again["ozone_smoothed"], float), mid, rtol=1e-9)


def test_values_outside_the_transform_are_refused_without_output(tmp_path, capsys):
    rows = [[k, f"{1.0 + 0.1 * k:.3f}"] for k in range(20)]
    rows[3][1] = ""  # missing cells are fine
    rows[6][1] = "0"
    rows[9][1] = "-2"
    write_csv(tmp_path / "bad.csv", ["time", "flow"], rows)
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="time", columns=("flow",), measured=("level0",),
                        params={"q": [0.05]}, noise=(0.01,), transforms=(("flow", "log"),))
    kio.save_model(tmp_path / "m.json", spec)
    assert kio.load_model(tmp_path / "m.json") == spec  # the file keeps the transform
    before = snapshot(tmp_path)
    for args in (FIT + ["bad.csv", "--measure", "flow", "--transform", "flow=log"],
                 ["apply", "m.json", "bad.csv"]):
        code, _, err = cli(args, tmp_path, capsys)
        assert code == 3, err
        assert "'flow'" in err and "data row 7" in err and "(time 6)" in err and "2 value(s)" in err
        assert snapshot(tmp_path) == before
    code, _, err = cli(FIT + ["bad.csv", "--measure", "flow", "--transform", "flow=sqrt"], tmp_path, capsys)
    assert code == 2 and "unknown transform" in err
    code, _, err = cli(FIT + ["bad.csv", "--measure", "flow", "--transform", "other=log"], tmp_path, capsys)
    assert code == 2 and "not a measured column" in err
    # A version-3 file cannot carry a transform (a version-3 reader would ignore it).
    doc = kio.spec_to_dict(spec)
    doc["format_version"] = 3
    (tmp_path / "v3.json").write_text(json.dumps(doc))
    code, _, err = cli(["apply", "v3.json", "bad.csv"], tmp_path, capsys)
    assert code == 4 and "version 4" in err
    assert snapshot(tmp_path) == dict(before, **{"v3.json": (tmp_path / "v3.json").read_bytes()})


def test_transforms_are_their_textbook_functions_and_invert():
    from kalmax._src.tools import transforms

    y = np.array([[0.02, 0.5, 3.0], [0.5, 0.97, 0.0], [np.nan, 0.3, 12.0]])
    cols = ("a", "b", "c")
    pairs = (("a", "log"), ("b", "logit"), ("c", "log1p"))
    x = transforms.forward(y, cols, pairs)
    with np.errstate(invalid="ignore"):
        want = np.stack([np.log(y[:, 0]), np.log(y[:, 1] / (1 - y[:, 1])), np.log(1 + y[:, 2])], axis=1)
    np.testing.assert_allclose(x, want, rtol=1e-12)
    np.testing.assert_allclose(transforms.inverse(x, cols, pairs), y, rtol=1e-12)
    # Monotone: interval ends map to interval ends, inside the range.
    lo, hi = transforms.inverse(x - 50.0, cols, pairs), transforms.inverse(x + 50.0, cols, pairs)
    assert np.all(lo[:2, 0] >= 0) and np.all(lo[:, 1] >= 0) and np.all(hi[:, 1] <= 1) and np.all(lo[:, 2] >= -1)
