"""The `kalmax` command, end to end through the installed entry point in a subprocess.

Every test writes its own input files into a temporary folder, runs the real
command, and checks the exit code, the messages, the outputs — and, for every
failure, that no output file (nor a temporary leftover) was created and that
existing files were left untouched.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path
from statistics import NormalDist

import numpy as np
import pytest

import kalmax as kx
from kalmax._src.tools import atomic_outputs, model_file as kio

import reference
from cli_helpers import cli, read_csv, snapshot, write_csv

_SCRIPT = Path(sys.executable).parent / "kalmax"
# The installed console script is the real entry point; `python -m kalmax` runs the same main().
COMMAND = [str(_SCRIPT)] if _SCRIPT.exists() else [sys.executable, "-m", "kalmax"]


def run(*args, cwd, env_extra=None):
    env = dict(os.environ)
    env.pop("JAX_ENABLE_X64", None)
    env.update(env_extra or {})
    return subprocess.run(COMMAND + [str(a) for a in args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=300)


def assert_failed_cleanly(result, code, folder, before, *words):
    assert result.returncode == code, (result.returncode, result.stdout, result.stderr)
    for w in words:
        assert w.lower() in result.stderr.lower(), result.stderr
    assert "Traceback" not in result.stderr
    assert snapshot(folder) == before, "a failed command created or changed files"


@pytest.fixture
def cv_csv(tmp_path, rng):
    """A constant-velocity track on irregular numeric times: position and a sparser velocity sensor."""
    t = np.cumsum(rng.uniform(0.2, 1.5, size=70))
    vel = 0.5 + np.cumsum(0.1 * rng.normal(size=t.size))
    pos = np.cumsum(vel * np.diff(t, prepend=t[0]))
    rows = []
    for k in range(t.size):
        p = "" if rng.random() < 0.2 else f"{pos[k] + 0.3 * rng.normal():.5f}"
        v = f"{vel[k] + 0.05 * rng.normal():.5f}" if k % 3 == 0 else ""
        rows.append([f"{t[k]:.4f}", p, v])
    path = tmp_path / "track.csv"
    write_csv(path, ["t", "pos", "vel"], rows)
    return path


FIT_ARGS = ["--time", "t", "--model", "constant-velocity", "--measure", "pos", "--measure", "vel=velocity0",
            "--steps", "15", "--quiet"]


def test_fit_writes_table_model_and_report(cv_csv, tmp_path):
    r = run("fit", cv_csv, *FIT_ARGS[:-1], cwd=tmp_path)  # not quiet: the summary is printed
    assert r.returncode == 0, r.stderr
    assert "Held-out RMSE of the starting model" in r.stdout and "Held-out RMSE of the fitted model" in r.stdout
    assert "fit step" in r.stderr  # progress display
    table, model, report = (tmp_path / "track_smoothed.csv", tmp_path / "track_model.json",
                            tmp_path / "track_report.png")
    header, rows = read_csv(table)
    assert header == ["t", "pos", "pos_smoothed", "pos_lower", "pos_upper", "pos_status",
                      "vel", "vel_smoothed", "vel_lower", "vel_upper", "vel_status"]
    assert len(rows) == 70
    for row in rows:
        for first in (2, 7):  # pos_smoothed, vel_smoothed: lower < smoothed < upper, missing rows too
            mid, lo, hi = (float(row[first + k]) for k in range(3))
            assert math.isfinite(mid) and lo < mid < hi
    spec = kx.load_model(model)
    assert spec.kind == "constant-velocity" and spec.columns == ("pos", "vel")
    assert spec.measured == ("position0", "velocity0")
    assert spec.fit["objective"] == "likelihood" and spec.fit["heldout_rmse_after"]["pos"] > 0
    doc = json.loads(model.read_text())
    assert doc["format"] == "kalmax-model" and doc["format_version"] == 3
    png = report.read_bytes()
    assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 20_000
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]


def test_apply_matches_textbook_rts_smoother(tmp_path, rng):
    """`kalmax apply` against an independent RTS smoother (tests/reference.py) on Q_t = q Δ_t.

    Random walk: A = 1, Q(Δ) = q Δ (Brownian motion, common practice). The
    command's flat prior is matched by a very wide proper prior in the
    reference (variance 1e10; its influence is ~r/1e10, far below the tolerance).
    """
    q, r = 0.3, 0.5
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="when", columns=("level",),
                        measured=("level0",), params={"q": [q]}, noise=(r,))
    kx.save_model(tmp_path / "rw.json", spec)
    t = np.cumsum(rng.uniform(0.1, 2.0, size=40))
    y = np.cumsum(rng.normal(size=40))
    y[[3, 4, 5, 20]] = np.nan
    write_csv(tmp_path / "new.csv", ["when", "level"],
              [[f"{a:.6f}", "" if np.isnan(b) else f"{b:.6f}"] for a, b in zip(t, y)])
    res = run("apply", "rw.json", "new.csv", "--output", "out.csv", "--no-report", "--level", "0.9",
              "--with-states", "--quiet", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    header, rows = read_csv(tmp_path / "out.csv")
    assert header == ["when", "level", "level_smoothed", "level_lower", "level_upper", "level_status",
                      "state_level0"]
    got = np.array([[float(c) for c in row[2:5]] for row in rows])
    tt = np.array([float(row[0]) for row in rows])
    md = dict(A=np.ones((1, 1)), C=np.ones((1, 1)), Q=(q * np.diff(tt))[:, None, None], R=np.array([[r]]),
              m0=np.zeros(1), P0=np.array([[1e10]]))
    yy = y[:, None].copy()
    means, covs = reference.rts_smoother(md, np.nan_to_num(yy), ~np.isnan(yy))
    z = NormalDist().inv_cdf(0.95)
    np.testing.assert_allclose(got[:, 0], means[:, 0], rtol=1e-6, atol=1e-6)
    half = z * np.sqrt(covs[:, 0, 0] + r)  # interval for a new noisy measurement
    np.testing.assert_allclose(got[:, 2] - got[:, 0], half, rtol=1e-5)
    np.testing.assert_allclose(got[:, 0] - got[:, 1], half, rtol=1e-5)
    assert rows[3][1] == ""  # missing input cells stay blank


def test_parquet_in_and_out(tmp_path, rng):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    t = np.arange(30.0) + rng.uniform(0, 0.5, 30)
    y = np.sin(t / 4) + 0.1 * rng.normal(size=30)
    y[5:8] = np.nan
    pq.write_table(pa.table({"time": t, "signal": [None if np.isnan(v) else v for v in y]}),
                   tmp_path / "in.parquet")
    spec = kx.ModelSpec(kind="local-linear-trend", dims=1, time_column="time", columns=("signal",),
                        measured=("level",), params={"q_level": 0.01, "q_slope": 0.01}, noise=(0.01,))
    kx.save_model(tmp_path / "m.json", spec)
    res = run("apply", "m.json", "in.parquet", "-o", "out.parquet", "--no-report", "-q", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    out = pq.read_table(tmp_path / "out.parquet").to_pydict()
    assert out["signal"][6] is None and np.isfinite(out["signal_smoothed"][6])
    assert len(out["time"]) == 30


def test_iso_timestamps(tmp_path):
    rows = [[f"2030-01-01T00:{m:02d}:00Z", "" if m == 3 else f"{m * 0.5:.2f}"] for m in range(0, 20)]
    write_csv(tmp_path / "iso.csv", ["stamp", "depth"], rows)
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="stamp", columns=("depth",),
                        measured=("level0",), params={"q": [1e-3]}, noise=(0.01,), time_format="iso8601")
    kx.save_model(tmp_path / "m.json", spec)
    res = run("apply", "m.json", "iso.csv", "--quiet", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    header, out = read_csv(tmp_path / "iso_smoothed.csv")
    assert out[0][0] == "2030-01-01T00:00:00Z" and abs(float(out[3][2]) - 1.5) < 0.1
    assert (tmp_path / "iso_report.png").stat().st_size > 10_000


def _bad_inputs(folder: Path):
    """(name, args, exit code, words expected in the message) for every error case."""
    write_csv(folder / "ok.csv", ["t", "pos", "vel"], [[str(i), str(0.5 * i), "0.5"] for i in range(10)])
    write_csv(folder / "backwards.csv", ["t", "pos", "vel"], [["0", "1", ""], ["2", "2", ""], ["1", "3", ""]])
    write_csv(folder / "repeated.csv", ["t", "pos", "vel"], [["0", "1", ""], ["1", "2", ""], ["1", "3", ""]])
    write_csv(folder / "empty_obs.csv", ["t", "pos", "vel"], [[str(i), "", "NaN"] for i in range(5)])
    write_csv(folder / "badcell.csv", ["t", "pos", "vel"], [["0", "1", ""], ["1", "abc", ""]])
    write_csv(folder / "badtime.csv", ["t", "pos", "vel"], [["0", "1", ""], ["yesterday", "2", ""]])
    (folder / "ragged.csv").write_text("t,pos,vel\n0,1,2\n1,2\n")
    (folder / "binary.csv").write_bytes(b"\xff\xfe\x00\x81garbage\x00\x9f")
    (folder / "blank.csv").write_text("")
    (folder / "bad.parquet").write_bytes(b"PAR1 this is not parquet")
    doc = kio.spec_to_dict(kx.ModelSpec(kind="constant-velocity", dims=1, time_column="t",
                                        columns=("pos", "vel"), measured=("position0", "velocity0"),
                                        params={"q": [0.1]}, noise=(0.1, 0.01)))
    (folder / "good.json").write_text(json.dumps(doc))
    doc["format_version"] = 6
    (folder / "v6.json").write_text(json.dumps(doc))
    doc["format_version"] = 2
    doc["model"]["measurements"][0]["noise_variance"] = -1.0
    (folder / "negative.json").write_text(json.dumps(doc))
    (folder / "nan.json").write_text(json.dumps(doc).replace("-1.0", "NaN"))
    (folder / "notjson.json").write_text("{ this is not json")
    (folder / "huge.json").write_text(" " * (kio.MAX_MODEL_FILE_BYTES + 1))
    (folder / "a_folder").mkdir()
    write_csv(folder / "numbers.csv", ["stamp", "depth"], [["1", "2"], ["2", "3"]])
    iso = kx.ModelSpec(kind="random-walk", dims=1, time_column="stamp", columns=("depth",),
                       measured=("level0",), params={"q": [1e-3]}, noise=(0.01,), time_format="iso8601")
    kx.save_model(folder / "iso.json", iso)
    blocker = folder / "blocker" / "pyarrow"
    blocker.mkdir(parents=True)
    (blocker / "__init__.py").write_text("raise ImportError('pyarrow blocked by the test')\n")
    no_pyarrow = {"PYTHONPATH": str(folder / "blocker")}
    fit = ["fit"]
    S, P = True, False  # S: installed command in a subprocess; P: cli.main in this process (same code, faster)
    return [
        # name, how, args, exit code, words in the message[, extra environment]
        ("missing column", S, fit + ["ok.csv", *FIT_ARGS[:4], "--measure", "speed"], 3, ["no column named 'speed'"]),
        ("non-monotone", S, fit + ["backwards.csv", *FIT_ARGS], 3, ["strictly increasing", "goes back"]),
        ("no observations", S, fit + ["empty_obs.csv", *FIT_ARGS], 3, ["no observations"]),
        ("no such file", P, fit + ["nowhere.csv", *FIT_ARGS], 3, ["no such file"]),
        ("binary file", S, fit + ["binary.csv", *FIT_ARGS], 3, ["not UTF-8"]),
        ("corrupt parquet", P, fit + ["bad.parquet", *FIT_ARGS], 3, ["bad.parquet"]),
        ("parquet without pyarrow", S, ["apply", "iso.json", "bad.parquet"], 3,
         ["pyarrow", "not installed"], no_pyarrow),
        ("report path is a folder", P, fit + ["ok.csv", *FIT_ARGS, "--report", "a_folder"], 3, ["is a folder"]),
        ("model from another version", S, ["apply", "v6.json", "ok.csv"], 4,
         ["format version 6", "reads format versions 1, 2, 3, 4 and 5"]),
        ("model file missing", P, ["apply", "none.json", "ok.csv"], 4, ["no such file"]),
        ("missing options", S, fit + ["ok.csv", "--measure", "pos"], 2, ["--time", "--model"]),
        ("axis never measured", S, fit + ["ok.csv", "--time", "t", "--model", "constant-velocity", "--dims", "2",
                                          "--measure", "pos", "--measure", "vel=velocity0", "--steps", "3", "-q",
                                          "--test-fraction", "0"], 5, ["cannot be determined"]),
        ("missing time column", P, fit + ["ok.csv", "--time", "clock", "--model", "random-walk", "--measure", "pos"],
         3, ["'clock'"]),
        ("repeated time", P, fit + ["repeated.csv", *FIT_ARGS], 3, ["strictly increasing", "repeats"]),
        ("non-numeric cell", P, fit + ["badcell.csv", *FIT_ARGS], 3, ["'abc' is not a number", "row 2"]),
        ("bad timestamp", P, fit + ["badtime.csv", *FIT_ARGS], 3, ["'yesterday'", "ISO 8601"]),
        ("numbers for a date-time model", P, ["apply", "iso.json", "numbers.csv"], 3, ["iso8601"]),
        ("data is a folder", P, fit + ["a_folder", *FIT_ARGS], 3, ["folder"]),
        ("ragged csv", P, fit + ["ragged.csv", *FIT_ARGS], 3, ["line 3"]),
        ("empty file", P, fit + ["blank.csv", *FIT_ARGS], 3, ["empty"]),
        ("output folder missing", P, fit + ["ok.csv", *FIT_ARGS, "-o", "no/such/dir/out.csv"], 3,
         ["does not exist"]),
        ("start from another version", P, fit + ["ok.csv", "--start", "v6.json", "--quiet"], 4,
         ["format version 6"]),
        ("invalid model values", P, ["apply", "negative.json", "ok.csv"], 4, ["noise", "> 0"]),
        ("NaN in model file", P, ["apply", "nan.json", "ok.csv"], 4, ["invalid JSON"]),
        ("model not json", P, ["apply", "notjson.json", "ok.csv"], 4, ["invalid JSON"]),
        ("model file too large", P, ["apply", "huge.json", "ok.csv"], 4, ["too large"]),
        ("unknown model kind", P, fit + ["ok.csv", "--time", "t", "--model", "spline", "--measure", "pos"], 2,
         ["not a model kind"]),
        ("unknown state", P, fit + ["ok.csv", *FIT_ARGS[:4], "--measure", "vel=speed0"], 2, ["has states"]),
        ("bad level", P, ["apply", "good.json", "ok.csv", "--level", "1.5"], 2, ["--level"]),
        ("output over input", P, ["apply", "good.json", "ok.csv", "-o", "ok.csv"], 2, ["overwrite"]),
        ("unknown --set", P, fit + ["ok.csv", *FIT_ARGS, "--set", "omega=3"], 2, ["unknown parameter"]),
        ("unknown option", P, ["apply", "good.json", "ok.csv", "--bogus"], 2, ["unrecognized arguments"]),
    ]


class _Completed:
    def __init__(self, returncode, stdout, stderr):
        self.returncode, self.stdout, self.stderr = returncode, stdout, stderr


def _in_process(args, cwd, capsys):
    return _Completed(*cli(args, cwd, capsys))


def test_every_error_case_has_its_exit_code_and_leaves_no_output(tmp_path, capsys):
    from concurrent.futures import ThreadPoolExecutor

    cases = _bad_inputs(tmp_path)
    # An existing output file must survive a failed run unchanged.
    (tmp_path / "ok_smoothed.csv").write_text("precious earlier result\n")
    before = snapshot(tmp_path)
    # The subprocess cases run a few at a time: they spend most of their time starting Python.
    sub = [c for c in cases if c[1]]
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(lambda c: run(*c[2], cwd=tmp_path, env_extra=c[5] if len(c) > 5 else None), sub))
    results += [_in_process(c[2], tmp_path, capsys) for c in cases if not c[1]]
    ordered = sub + [c for c in cases if not c[1]]
    failures = []
    for case, res in zip(ordered, results):
        name, _, _, code, words = case[:5]
        try:
            assert_failed_cleanly(res, code, tmp_path, before, *words)
        except AssertionError as e:
            failures.append(f"{name}: {e}\nstdout: {res.stdout[-500:]}\nstderr: {res.stderr[-800:]}")
    assert not failures, "\n\n".join(failures)
    assert (tmp_path / "ok_smoothed.csv").read_text() == "precious earlier result\n"


def test_help_explains_and_carries_the_safety_note(tmp_path, capsys):
    r = run("--help", cwd=tmp_path)
    assert r.returncode == 0
    text = " ".join(r.stdout.split())
    for phrase in ("no guarantee", "safety-critical", "Validate", "codes and practices of your field",
                   "exit codes", "kalmax fit", "kalmax apply"):
        assert phrase in text, phrase
    fit_help = _in_process(["fit", "--help"], tmp_path, capsys)
    assert fit_help.returncode == 0
    fit_help = " ".join(fit_help.stdout.split())
    for phrase in ("--measure", "constant-velocity", "damped-oscillator", "strictly increasing",
                   "no guarantee", "COL_lower", "measurement noise"):
        assert phrase in fit_help, phrase
    assert "no guarantee" in " ".join(_in_process(["apply", "--help"], tmp_path, capsys).stdout.split())
    r = _in_process([], tmp_path, capsys)
    assert r.returncode == 2 and "COMMAND" in r.stdout
    r = _in_process(["models"], tmp_path, capsys)
    assert r.returncode == 0 and "position0, velocity0" in r.stdout


def test_failure_while_writing_rolls_back_every_output(tmp_path, capsys, monkeypatch):
    """The table and model are written before the report; a report failure must remove them too."""
    from kalmax._src.tools import report

    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="t", columns=("y",), measured=("level0",),
                        params={"q": [0.1]}, noise=(0.1,))
    kx.save_model(tmp_path / "m.json", spec)
    write_csv(tmp_path / "d.csv", ["t", "y"], [[str(i), str(i % 3)] for i in range(8)])
    (tmp_path / "out.csv").write_text("earlier\n")
    before = snapshot(tmp_path)

    def broken(*args, **kwargs):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(report, "write_report", broken)
    res = _in_process(["apply", "m.json", "d.csv", "-o", "out.csv"], tmp_path, capsys)
    assert res.returncode == 1 and "internal error" in res.stderr and "disk full" in res.stderr
    assert snapshot(tmp_path) == before  # no new file, no .part leftover, out.csv unchanged
    with pytest.raises(RuntimeError):
        with atomic_outputs.AtomicOutputs() as out:
            out.temp_for(tmp_path / "a.txt").write_text("a")
            out.temp_for(tmp_path / "b.txt").write_text("b")
            raise RuntimeError("fail after both were written")
    assert snapshot(tmp_path) == before
    with atomic_outputs.AtomicOutputs() as out:
        out.temp_for(tmp_path / "a.txt").write_text("a")
        out.temp_for(tmp_path / "out.csv").write_text("new")
    assert (tmp_path / "a.txt").read_text() == "a" and (tmp_path / "out.csv").read_text() == "new"


def test_model_file_round_trip_in_python(tmp_path):
    spec = kx.ModelSpec(kind="damped-oscillator", dims=1, time_column="day", columns=("temp",),
                        measured=("displacement",), params={"frequency": 1 / 365.25, "damping": 0.05, "q": 1e-6},
                        noise=(0.25,), fit={"note": "by hand"})
    kx.save_model(tmp_path / "m.json", spec)
    back = kx.load_model(tmp_path / "m.json")
    assert back.kind == spec.kind and back.columns == spec.columns and back.fit == {"note": "by hand"}
    assert back.params == spec.params and back.noise == spec.noise
    model = back.state_space(np.array([0.0, 1.0, 3.0]))
    assert model.A.shape == (2, 2, 2)
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]
    with pytest.raises(kx.ModelFileError, match="not a kalmax model file"):
        (tmp_path / "x.json").write_text('{"format": "something-else"}')
        kx.load_model(tmp_path / "x.json")
    with pytest.raises(ValueError, match="has states"):
        spec.replace(measured=("velocity0",))
