"""The built-in demo (`make demo`): deterministic invented data, a fit that helps, all outputs written."""

import numpy as np

import kalmax as kx
from kalmax import demo


def test_scenario_is_deterministic_and_irregular():
    names, cols, truth = demo.drifter_table()
    names2, cols2, _ = demo.drifter_table()
    assert names == names2 and cols == cols2
    assert names == ["time", "east", "north", "current_east", "current_north"]
    t = truth["t"]
    dt = np.diff(t)
    assert np.all(dt > 0) and dt.min() < 2.0 and dt.max() > 20 * dt.min()  # irregular timestamps
    for name in ("east", "current_east"):  # fog hides the float; a brown-out silences the meter
        seen = t[[c != "" for c in cols[name]]]
        assert np.diff(seen).max() > 300.0, name
    # The two sensors run on their own clocks: rows are mostly partial, and none is empty.
    filled = np.array([[c != "" for c in cols[k]] for k in names[1:]]).T
    assert filled.any(axis=1).all() and filled.all(axis=1).mean() < 0.05
    assert cols["time"][0].startswith("2031-06-14T09:00:") and cols["time"][0].endswith("Z")  # ISO 8601, UTC


def test_demo_fits_from_a_poor_start_and_writes_everything(tmp_path, capsys):
    code = demo.main(["--out", str(tmp_path), "--quiet"])
    out = capsys.readouterr().out
    assert code == 0, out
    for name in ("drifter.csv", "poor_start.json", "drifter_model.json", "drifter_smoothed.csv",
                 "drifter_report.png"):
        assert (tmp_path / name).stat().st_size > 0, name
    assert (tmp_path / "drifter_report.png").read_bytes().startswith(b"\x89PNG")
    assert (tmp_path / "drifter_report.png").stat().st_size > 50_000
    fitted = kx.load_model(tmp_path / "drifter_model.json")
    before, after = fitted.fit["heldout_rmse_before"], fitted.fit["heldout_rmse_after"]
    # Held-out error in sd units falls from ~0.73 to ~0.27 (measured, blocks of 10 rows); demand at least a halving.
    assert after["all"] < 0.5 * before["all"]
    for c in ("current_east", "current_north"):
        assert after[c] < 0.5 * before[c]
    # The scenario's generating values are recovered (q within a factor 2, noise sd within 25 %).
    for q in fitted.params["q"]:
        assert 0.5 < q / demo.TRUE_Q < 2.0
    sds = np.sqrt(fitted.noise)
    np.testing.assert_allclose(sds, [demo.CAMERA_SD] * 2 + [demo.METER_SD] * 2, rtol=0.25)
    assert "Held-out RMSE" not in out  # --quiet
    assert "Demo finished" in out
