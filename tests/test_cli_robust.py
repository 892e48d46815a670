"""``--robust COL=KIND:VALUE`` of ``kalmax apply``: the robust column against the Python API.

The model is written out by hand here (random walk, Q_t = q Δ_t, flat
prior; common practice), not taken from the command's model file, and
smoothed with ``kx.smooth_nonlinear`` and a Huber loss; the command must give
the same smoothed column. An injected outlier must pull the squared-loss
answer and barely move the robust one.
"""

import numpy as np

import kalmax as kx
from cli_helpers import cli, read_csv, snapshot, write_csv


def test_apply_robust_column_equals_python_api(tmp_path, rng, capsys):
    q, r, delta = 0.3, 0.5, 1.5
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="when", columns=("level",),
                        measured=("level0",), params={"q": [q]}, noise=(r,))
    kx.save_model(tmp_path / "rw.json", spec)
    T = 25
    t = np.cumsum(rng.uniform(0.5, 1.5, size=T))
    y = np.cumsum(rng.normal(size=T))
    y[12] += 15.0  # a wild value, ~20 noise sds
    y[[4, 5]] = np.nan
    write_csv(tmp_path / "new.csv", ["when", "level"],
              [[f"{a:.9f}", "" if np.isnan(b) else f"{b:.9f}"] for a, b in zip(t, y)])
    args = ["apply", "rw.json", "new.csv", "--no-report", "--quiet"]
    code, _, err = cli(args + ["--output", "robust.csv", "--robust", f"level=huber:{delta}"],
                       tmp_path, capsys)
    assert code == 0, err
    code, _, err = cli(args + ["--output", "plain.csv"], tmp_path, capsys)
    assert code == 0, err
    robust = np.array([float(row[2]) for row in read_csv(tmp_path / "robust.csv")[1]])
    plain = np.array([float(row[2]) for row in read_csv(tmp_path / "plain.csv")[1]])

    tt = np.array([float(f"{a:.9f}") for a in t])
    yy = np.array([np.nan if np.isnan(b) else float(f"{b:.9f}") for b in y])[:, None]
    model = kx.StateSpace(A=np.ones((1, 1)), C=np.ones((1, 1)), Q=(q * np.diff(tt))[:, None, None],
                          R=np.array([[r]]))
    mask = ~np.isnan(yy)
    want = kx.smooth_nonlinear(model, np.nan_to_num(yy), mask, loss=kx.HuberLoss(delta))
    assert bool(want.converged)
    np.testing.assert_allclose(robust, want.measurements[:, 0], rtol=0, atol=1e-6)
    np.testing.assert_allclose(plain, kx.smooth(model, np.nan_to_num(yy), mask).measurements[:, 0], atol=1e-6)
    # The outlier pulls the squared-loss estimate far more than the robust one.
    assert abs(plain[12] - y[12]) + 1.0 < abs(robust[12] - y[12])


def test_robust_option_errors_name_the_option_and_write_nothing(tmp_path, capsys):
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="when", columns=("level",),
                        measured=("level0",), params={"q": [0.3]}, noise=(0.5,))
    kx.save_model(tmp_path / "rw.json", spec)
    write_csv(tmp_path / "new.csv", ["when", "level"], [[i, i * 0.1] for i in range(6)])
    before = snapshot(tmp_path)
    for bad in ("level=huber", "level=cauchy:2", "speed=huber:2", "level=huber:-1", "level=student:x"):
        code, _, err = cli(["apply", "rw.json", "new.csv", "--robust", bad], tmp_path, capsys)
        assert code == 2 and "--robust" in err, (bad, code, err)
    assert snapshot(tmp_path) == before
