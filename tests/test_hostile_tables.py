"""The command line on hostile tables, timestamps and file paths.

Every table here is invented in the test. Each test checks the tool against
an independent computation (exact integer or fraction arithmetic, file
metadata read back from the operating system, the same data on a shifted
time axis), never against numbers the tool itself produced.

Most runs call ``kalmax.cli.main`` in this process (the same code as the
installed command); a fresh process is used only where a signal has to kill
or stop the command.
"""

import csv
import datetime as dt
import decimal
import os
import re
import stat
import subprocess
import sys
import textwrap
import time
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

import kalmax as kx
from kalmax._src.tools import atomic_outputs, tables
from kalmax._src.tools.errors import DataError
from kalmax._src.tools.series import series_from_table
from cli_helpers import cli, read_csv, snapshot, write_csv

REPO = Path(__file__).resolve().parents[1]


# ----------------------------------------------------------------------------
# Helpers
# ----------------------------------------------------------------------------


def table(names, cols):
    """A table as tables.read_table returns it."""
    return list(names), {k: list(v) for k, v in zip(names, cols)}


RW = dict(kind="random-walk", dims=1, columns=("y",), measured=("level0",), params={"q": [0.3]}, noise=(0.5,))


def rw_model(folder, time_column="t", time_format="number", name="m.json"):
    spec = kx.ModelSpec(time_column=time_column, time_format=time_format, **RW)
    kx.save_model(Path(folder) / name, spec)
    return Path(folder) / name


# ----------------------------------------------------------------------------
# 1. Large integer timestamps and ISO fractions are subtracted exactly
# ----------------------------------------------------------------------------


def test_epoch_nanosecond_numbers_are_subtracted_exactly():
    base = 1_700_000_000_000_000_000
    steps = [0, 1000, 2000, 3000, 4000, 4001, 9999]
    names, cols = table(["t", "y"], [[str(base + s) for s in steps], ["1"] * len(steps)])
    s = series_from_table(names, cols, "t", ["y"], source="ns.csv")
    # Oracle: Python integer arithmetic, then one rounding to float.
    np.testing.assert_array_equal(s.t, np.array([float(k) for k in steps]))
    assert s.times_raw[0] == str(base)  # written back as read


def test_decimal_fraction_numbers_are_subtracted_exactly():
    base = "1700000000.123456789"
    cells = [base, "1700000000.123456790", "1700000000.123457789", "1700000001.000000000"]
    names, cols = table(["t", "y"], [cells, ["1"] * 4])
    s = series_from_table(names, cols, "t", ["y"])
    want = [float(Fraction(c) - Fraction(base)) for c in cells]
    np.testing.assert_array_equal(s.t, np.array(want))


@pytest.mark.parametrize("digits", [6, 9])
def test_iso_fractional_seconds_are_subtracted_exactly(digits):
    """Micro- and nanosecond ISO 8601 times: differences exact to the last digit."""
    steps = [0, 1, 2, 7, 1000, 123456]
    start = dt.datetime(2023, 11, 14, 22, 13, 20)
    cells = []
    for k in steps:
        whole, frac = divmod(k, 10**digits)
        stamp = (start + dt.timedelta(seconds=whole)).strftime("%Y-%m-%dT%H:%M:%S")
        cells.append(f"{stamp}.{frac:0{digits}d}Z")
    names, cols = table(["when", "y"], [cells, ["2"] * len(cells)])
    s = series_from_table(names, cols, "when", ["y"])
    np.testing.assert_array_equal(s.t, np.array([float(Fraction(k, 10**digits)) for k in steps]))
    assert s.time_format == "iso8601"


def test_epoch_nanoseconds_give_the_same_smoothing_as_small_times(tmp_path, capsys):
    """End to end: only time differences matter, so epoch-ns times and 0, 1000, 2000, ... must
    give the same smoothed values (before the fix Δt came out as 768 and 1024: exit 0, wrong)."""
    rw_model(tmp_path)
    base = 1_700_000_000_000_000_000
    rng = np.random.default_rng(5)
    ys = [f"{v:.6f}" for v in np.cumsum(rng.normal(size=12))]
    write_csv(tmp_path / "big.csv", ["t", "y"], [[str(base + 1000 * i), ys[i]] for i in range(12)])
    write_csv(tmp_path / "small.csv", ["t", "y"], [[str(1000 * i), ys[i]] for i in range(12)])
    for name in ("big", "small"):
        code, _, err = cli(["apply", "m.json", f"{name}.csv", "--no-report", "-q"], tmp_path, capsys)
        assert code == 0, err
    _, big = read_csv(tmp_path / "big_smoothed.csv")
    _, small = read_csv(tmp_path / "small_smoothed.csv")
    assert [r[0] for r in big] == [str(base + 1000 * i) for i in range(12)]
    np.testing.assert_allclose(np.array([[float(c) for c in r[2:5]] for r in big]),
                               np.array([[float(c) for c in r[2:5]] for r in small]), rtol=1e-12, atol=1e-12)


def test_times_too_close_for_float64_relative_to_the_first_are_refused():
    """Distinct exact times that round to the same float offset: an error, never a silent repeat."""
    cells = ["0", "100000000000000000000", "100000000000000000001"]
    names, cols = table(["t", "y"], [cells, ["1"] * 3])
    with pytest.raises(DataError, match=r"data rows 2 and 3 .* too close together"):
        series_from_table(names, cols, "t", ["y"], source="close.csv")


# ----------------------------------------------------------------------------
# 2. An output that is one of the inputs, or two outputs that are one file
# ----------------------------------------------------------------------------


def _path_cases(folder: Path):
    rw_model(folder)
    write_csv(folder / "d.csv", ["t", "y"], [[str(i), str(i % 3)] for i in range(6)])
    (folder / "sub").mkdir()
    os.symlink(folder / "m.json", folder / "link_to_model.json")
    os.symlink(folder / "d.csv", folder / "link_to_data.csv")
    os.link(folder / "m.json", folder / "hard_model.json")
    os.symlink(folder, folder / "same_folder")
    apply = ["apply", "m.json", "d.csv", "-q"]
    fit = ["fit", "d.csv", "--start", "m.json", "--steps", "0", "-q"]
    return [
        ("apply -o MODEL", apply + ["-o", "m.json"]),
        ("apply --report MODEL", apply + ["--report", "m.json"]),
        ("apply -o MODEL through ..", apply + ["-o", "sub/../m.json"]),
        ("apply -o symlink to MODEL", apply + ["-o", "link_to_model.json"]),
        ("apply -o hard link to MODEL", apply + ["-o", "hard_model.json"]),
        ("apply -o symlink to DATA", apply + ["-o", "link_to_data.csv"]),
        ("apply -o DATA through a linked folder", apply + ["-o", "same_folder/d.csv"]),
        ("apply table and report one file via a linked folder",
         apply + ["-o", "out.csv", "--report", "same_folder/out.csv"]),
        ("fit --start MODEL -o MODEL", fit + ["-o", "m.json"]),
        ("fit --start MODEL --model-file MODEL", fit + ["--model-file", "m.json"]),
        ("fit --model-file hard link to --start", fit + ["--model-file", "hard_model.json"]),
        ("fit --model-file DATA", ["fit", "d.csv", "--time", "t", "--model", "random-walk", "--measure", "y",
                                   "--steps", "0", "-q", "--model-file", "d.csv"]),
        ("fit --report equal to --model-file", fit + ["--model-file", "new.json", "--report", "./new.json"]),
    ]


def test_output_equal_to_an_input_or_another_output_is_a_usage_error(tmp_path, capsys):
    cases = _path_cases(tmp_path)
    before = snapshot(tmp_path)
    failures = []
    for name, args in cases:
        code, _, err = cli(args, tmp_path, capsys)
        if code != 2 or not re.search(r"same file|overwrite", err) or snapshot(tmp_path) != before:
            failures.append(f"{name}: exit {code}, {err.strip()[-300:]!r}")
            # restore the folder for the next case
            for rel, data in before.items():
                (tmp_path / rel).write_bytes(data)
            for p in list(tmp_path.rglob("*")):
                if p.is_file() and not p.is_symlink() and str(p.relative_to(tmp_path)) not in before:
                    p.unlink()
    assert not failures, "\n".join(failures)
    assert kx.load_model(tmp_path / "m.json").noise == (0.5,)


# ----------------------------------------------------------------------------
# 3. A very wide header is read in linear time
# ----------------------------------------------------------------------------


WIDE_SCRIPT = textwrap.dedent("""
    import sys
    from kalmax._src.tools import tables, series
    from kalmax._src.tools.errors import DataError
    n = int(sys.argv[2])
    names = [f"c{k}" for k in range(n)]
    path = sys.argv[1]
    with open(path, "w") as f:
        f.write(",".join(names) + "\\n")
        for r in range(3):
            f.write(",".join(str(r * 10 + (k % 7)) for k in range(n)) + "\\n")
    got_names, cols = tables.read_table(path)
    s = series.series_from_table(got_names, cols, "c0", [names[-1], "c12345"], source=path)
    print("ok", len(got_names), s.t.tolist(), s.y.tolist())
    names[77777] = "c4"  # one duplicate far apart
    with open(path, "w") as f:
        f.write(",".join(names) + "\\n0" + ",0" * (n - 1) + "\\n")
    try:
        tables.read_table(path)
    except DataError as e:
        print("dup", str(e)[-200:])
""")


def test_wide_header_is_read_in_linear_time(tmp_path):
    n = 100_000
    res = subprocess.run([sys.executable, "-c", WIDE_SCRIPT, str(tmp_path / "wide.csv"), str(n)],
                         capture_output=True, text=True, timeout=60)  # a time-out guard, not a benchmark
    assert res.returncode == 0, res.stderr[-2000:]
    lines = res.stdout.splitlines()
    assert lines[0].startswith(f"ok {n} [0.0, 10.0, 20.0] ")
    # column c99999 holds r*10 + 99999 % 7, column c12345 holds r*10 + 12345 % 7
    assert lines[0].endswith(str([[float(r * 10 + 99999 % 7), float(r * 10 + 12345 % 7)] for r in range(3)]))
    assert lines[1].startswith("dup") and "c4" in lines[1] and "more than once" in lines[1]


# ----------------------------------------------------------------------------
# 4. Parquet: nanosecond timestamps, decimals, types that cannot be read
# ----------------------------------------------------------------------------


@pytest.mark.parametrize("zone", [None, "UTC", "America/Los_Angeles"])
def test_parquet_nanosecond_timestamps_are_read_exactly(tmp_path, zone):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    base = 1_700_000_000_123_456_789
    steps = [0, 1, 1001, 2_000_000_003, 5_000_000_000]
    ts = pa.array([base + s for s in steps], pa.int64()).cast(pa.timestamp("ns", tz=zone))
    values = [decimal.Decimal("1.25"), None, decimal.Decimal("-3.50"), decimal.Decimal("7.75"),
              decimal.Decimal("0.01")]
    pq.write_table(pa.table({"t": ts, "y": pa.array(values, pa.decimal128(5, 2))}), tmp_path / "ns.parquet")
    names, cols = tables.read_table(tmp_path / "ns.parquet")
    s = series_from_table(names, cols, "t", ["y"], source="ns.parquet")
    np.testing.assert_array_equal(s.t, np.array([float(Fraction(k, 10**9)) for k in steps]))
    np.testing.assert_array_equal(s.y[:, 0], np.array([1.25, np.nan, -3.5, 7.75, 0.01]))
    assert s.time_format == "iso8601"


def test_parquet_nanoseconds_round_trip_through_the_command(tmp_path, capsys):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    rw_model(tmp_path, time_format="iso8601")
    stamps = [1_700_000_000_000_000_000 + 1_000_000_007 * k for k in range(6)]
    pq.write_table(pa.table({"t": pa.array(stamps, pa.int64()).cast(pa.timestamp("ns")),
                             "y": [0.5, 1.0, None, 2.0, 2.5, 3.0]}), tmp_path / "d.parquet")
    code, _, err = cli(["apply", "m.json", "d.parquet", "-o", "out.parquet", "--no-report", "-q"], tmp_path, capsys)
    assert code == 0, err
    back = pq.read_table(tmp_path / "out.parquet")
    assert back.schema.field("t").type == pa.timestamp("ns")
    assert back.column("t").cast(pa.int64()).to_pylist() == stamps
    code, _, err = cli(["apply", "m.json", "d.parquet", "-o", "out.csv", "--no-report", "-q"], tmp_path, capsys)
    assert code == 0, err
    _, rows = read_csv(tmp_path / "out.csv")
    assert rows[1][0] == "2023-11-14T22:13:21.000000007"  # 1700000001.000000007 s after 1970-01-01


def test_parquet_epoch_nanosecond_integers_are_subtracted_exactly(tmp_path):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    base = 1_700_000_000_000_000_000
    pq.write_table(pa.table({"t": pa.array([base + 1000 * k for k in range(5)], pa.int64()),
                             "y": [1.0, 2.0, 3.0, 4.0, 5.0]}), tmp_path / "i.parquet")
    s = series_from_table(*tables.read_table(tmp_path / "i.parquet"), "t", ["y"])
    np.testing.assert_array_equal(s.t, 1000.0 * np.arange(5))


def test_parquet_column_of_an_unreadable_type_is_a_data_error(tmp_path, capsys):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    rw_model(tmp_path)
    pq.write_table(pa.table({"t": pa.array([1, 2, 3], pa.duration("ns")), "y": [1.0, 2.0, 3.0]}),
                   tmp_path / "dur.parquet")
    before = snapshot(tmp_path)
    code, _, err = cli(["apply", "m.json", "dur.parquet", "-q"], tmp_path, capsys)
    assert code == 3, err
    assert "'t'" in err and "duration" in err and "Traceback" not in err
    assert snapshot(tmp_path) == before


# ----------------------------------------------------------------------------
# 5. Signals: SIGTERM cleans up like Ctrl-C; temporaries of a killed run
# ----------------------------------------------------------------------------


STOP_SCRIPT = textwrap.dedent("""
    import os, signal, sys, time
    from kalmax import cli
    from kalmax._src.tools import report

    def stopped(*args, **kwargs):  # the table is written, the report is being drawn
        os.kill(os.getpid(), getattr(signal, sys.argv[1]))
        time.sleep(60)

    report.write_report = stopped
    sys.exit(cli.main(sys.argv[2:]))
""")

PART = re.compile(r"^\.(?P<name>.+)\.kalmax-[a-z0-9_]+\.part$")


def _stop_run(folder, signame):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.run([sys.executable, "-c", STOP_SCRIPT, signame, "apply", "m.json", "d.csv", "-q"],
                          cwd=folder, env=env, capture_output=True, text=True, timeout=120)


@pytest.mark.parametrize("signame, code, word", [("SIGTERM", 143, "terminated"), ("SIGINT", 130, "interrupted")])
def test_stop_signal_while_writing_removes_temporaries(tmp_path, signame, code, word):
    rw_model(tmp_path)
    write_csv(tmp_path / "d.csv", ["t", "y"], [[str(i), str(i % 3)] for i in range(8)])
    (tmp_path / "d_smoothed.csv").write_text("earlier result\n")
    before = snapshot(tmp_path)
    res = _stop_run(tmp_path, signame)
    assert res.returncode == code, (res.returncode, res.stderr[-1000:])
    assert word in res.stderr and "no output file was created or changed" in res.stderr
    assert "Traceback" not in res.stderr
    assert snapshot(tmp_path) == before  # no temporary left, the earlier output untouched


def test_stop_signal_during_the_renames_waits_for_the_last_one(tmp_path, monkeypatch):
    """A SIGTERM that arrives between two renames is delivered after the last one: the outputs
    are never left half old, half new by a signal."""
    import signal

    from kalmax._src.tools import signals

    real_replace = os.replace
    calls = []

    def replace(src, dst, *a, **k):
        calls.append(dst)
        if len(calls) == 1:
            os.kill(os.getpid(), signal.SIGTERM)
        return real_replace(src, dst, *a, **k)

    monkeypatch.setattr(os, "replace", replace)
    handler_before = signal.getsignal(signal.SIGTERM)
    with pytest.raises(signals.Interrupted) as info:
        with signals.raise_on_stop_signals():
            with atomic_outputs.AtomicOutputs() as out:
                for name in ("a.csv", "b.json", "c.png"):
                    out.temp_for(tmp_path / name).write_text(name)
    assert info.value.signum == signal.SIGTERM and info.value.after_commit
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv", "b.json", "c.png"]
    assert signal.getsignal(signal.SIGTERM) == handler_before  # put back


def test_temporaries_of_a_killed_run_are_recognisable_and_cleaned_only_when_old(tmp_path, capsys):
    rw_model(tmp_path)
    write_csv(tmp_path / "d.csv", ["t", "y"], [[str(i), str(i % 3)] for i in range(8)])
    res = _stop_run(tmp_path, "SIGKILL")
    assert res.returncode == -9
    left = sorted(p.name for p in tmp_path.iterdir() if p.name.endswith(".part"))
    assert len(left) == 2, left
    assert sorted(PART.match(n).group("name") for n in left) == ["d_report.png", "d_smoothed.csv"]
    # Files that look alike but are not this tool's temporaries: never touched.
    decoys = [".d_smoothed.csv.kalmax-abc.part.keep", ".d_smoothed.csv.other.part", "d_smoothed.csv.kalmax-x.part",
              ".notes.csv.kalmax-abcdefgh.part", ".d_smoothed.csv.kalmax-ABC DEF.part"]
    for n in decoys:
        (tmp_path / n).write_text("mine")
    os.mkdir(tmp_path / ".d_report.png.kalmax-folder00.part")
    code, _, err = cli(["apply", "m.json", "d.csv", "-q"], tmp_path, capsys)
    assert code == 0, err
    assert all((tmp_path / n).is_file() for n in left)  # less than a day old: kept
    two_days_ago = time.time() - 2 * 86400
    for n in left + decoys + [".d_report.png.kalmax-folder00.part"]:
        os.utime(tmp_path / n, (two_days_ago, two_days_ago))
    code, _, err = cli(["apply", "m.json", "d.csv", "-q"], tmp_path, capsys)
    assert code == 0, err
    assert not [n for n in left if (tmp_path / n).exists()]  # old: removed
    assert all((tmp_path / n).read_text() == "mine" for n in decoys)
    assert (tmp_path / ".d_report.png.kalmax-folder00.part").is_dir()


# ----------------------------------------------------------------------------
# 6. File modes: the umask for new files, the old mode for replaced ones
# ----------------------------------------------------------------------------


@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
def test_outputs_respect_the_umask_and_keep_an_existing_mode(tmp_path, capsys):
    rw_model(tmp_path)
    write_csv(tmp_path / "d.csv", ["t", "y"], [[str(i), str(i % 3)] for i in range(8)])
    (tmp_path / "old.csv").write_text("earlier\n")
    os.chmod(tmp_path / "old.csv", 0o604)
    old_mask = os.umask(0o027)
    try:
        code, _, err = cli(["apply", "m.json", "d.csv", "-o", "new.csv", "--report", "r.png", "-q"], tmp_path, capsys)
        assert code == 0, err
        code, _, err = cli(["apply", "m.json", "d.csv", "-o", "old.csv", "--no-report", "-q"], tmp_path, capsys)
        assert code == 0, err
        with atomic_outputs.AtomicOutputs() as out:
            out.temp_for(tmp_path / "plain.txt").write_text("x")
    finally:
        os.umask(old_mask)
    mode = lambda n: stat.S_IMODE(os.stat(tmp_path / n).st_mode)  # noqa: E731
    assert mode("new.csv") == 0o640 and mode("r.png") == 0o640 and mode("plain.txt") == 0o640
    assert mode("old.csv") == 0o604 and (tmp_path / "old.csv").read_text().startswith("t,y,")


# ----------------------------------------------------------------------------
# 7. Mixed timestamp styles
# ----------------------------------------------------------------------------


@pytest.mark.parametrize("cells, row, words", [
    (["2024-03-01T00:00:00", "2024-03-01T01:00:00", "2024-03-01T02:00:00-08:00"], 3, "time zone"),
    (["2024-03-01T00:00:00Z", "2024-03-01T01:00:00+00:00", "2024-03-01T02:00:00"], 3, "time zone"),
    (["2024-03-01", "2024-03-02", "2024-03-02T12:00:00"], 3, "date"),
    (["2024-03-01T00:00:00Z", "2024-03-02"], 2, "date"),
])
def test_mixed_timestamp_styles_are_refused(cells, row, words):
    names, cols = table(["t", "y"], [cells, ["1"] * len(cells)])
    with pytest.raises(DataError, match=rf"data row {row}\b.*{words}|{words}.*data row {row}\b"):
        series_from_table(names, cols, "t", ["y"], source="mixed.csv")


def test_one_style_with_different_offsets_is_fine():
    """Offsets may change (summer time): the instants are compared, exactly."""
    cells = ["2024-03-10T01:30:00-08:00", "2024-03-10T03:30:00-07:00", "2024-03-10T11:00:00Z"]
    names, cols = table(["t", "y"], [cells, ["1"] * 3])
    s = series_from_table(names, cols, "t", ["y"])
    np.testing.assert_array_equal(s.t, [0.0, 3600.0, 3600.0 * 1.5])


# ----------------------------------------------------------------------------
# 11. Commit order: fsync each file, rename, fsync the folder
# ----------------------------------------------------------------------------


def test_commit_syncs_files_before_renaming_and_the_folder_after(tmp_path, monkeypatch):
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        st = os.fstat(fd)
        events.append(("fsync", st.st_ino, stat.S_ISDIR(st.st_mode)))
        return real_fsync(fd)

    def replace(src, dst, *a, **k):
        events.append(("replace", os.stat(src).st_ino, False))
        return real_replace(src, dst, *a, **k)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    with atomic_outputs.AtomicOutputs() as out:
        a, b = out.temp_for(tmp_path / "a.csv"), out.temp_for(tmp_path / "b.png")
        a.write_text("a")
        b.write_text("b")
        inodes = {os.stat(a).st_ino, os.stat(b).st_ino}
    folder = os.stat(tmp_path).st_ino
    kinds = [e[0] for e in events]
    first_rename = kinds.index("replace")
    synced_before = {e[1] for e in events[:first_rename] if e[0] == "fsync"}
    assert inodes <= synced_before, events
    assert {e[1] for e in events if e[0] == "replace"} == inodes
    last_rename = len(kinds) - 1 - kinds[::-1].index("replace")
    assert ("fsync", folder, True) in events[last_rename + 1:], events
    assert (tmp_path / "a.csv").read_text() == "a" and (tmp_path / "b.png").read_text() == "b"


# ----------------------------------------------------------------------------
# 12. Missing-value words: the documented set, and --missing
# ----------------------------------------------------------------------------

# The set documented in README.md, docs/command_line.md and `kalmax fit --help`.
DOCUMENTED_MISSING = ["", "  ", "NaN", "nan", "NA", "na", "N/A", "n/a", "null", "NULL", "none", "None", "-"]


def test_default_missing_words_are_exactly_the_documented_set():
    for word in DOCUMENTED_MISSING:
        names, cols = table(["t", "y"], [["0", "1", "2"], ["1.5", word, "2.5"]])
        s = series_from_table(names, cols, "t", ["y"])
        assert np.isnan(s.y[1, 0]) and s.y[0, 0] == 1.5, word
    for word in ["nil", "?", "--", "missing", "n.a."]:
        names, cols = table(["t", "y"], [["0", "1", "2"], ["1.5", word, "2.5"]])
        with pytest.raises(DataError, match=re.escape(repr(word))):
            series_from_table(names, cols, "t", ["y"])


def test_missing_option_replaces_the_set(tmp_path, capsys):
    rw_model(tmp_path)
    write_csv(tmp_path / "q.csv", ["t", "y"], [["0", "1"], ["1", "?"], ["2", "-999"], ["3", "4"], ["4", ""]])
    code, _, err = cli(["apply", "m.json", "q.csv", "--no-report", "-q", "--missing", "?", "--missing", "-999"],
                       tmp_path, capsys)
    assert code == 0, err
    _, rows = read_csv(tmp_path / "q_smoothed.csv")
    assert [r[1] for r in rows] == ["1.0", "", "", "4.0", ""]  # blank cells stay missing
    write_csv(tmp_path / "na.csv", ["t", "y"], [["0", "1"], ["1", "NA"], ["2", "3"]])
    before = snapshot(tmp_path)
    code, _, err = cli(["apply", "m.json", "na.csv", "--no-report", "-q", "--missing", "?"], tmp_path, capsys)
    assert code == 3 and "'NA'" in err and "row 2" in err, err
    assert snapshot(tmp_path) == before


def test_help_names_the_missing_words(tmp_path, capsys):
    code, out, _ = cli(["fit", "--help"], tmp_path, capsys)
    assert code == 0
    text = " ".join(out.split())
    assert "--missing" in text
    for word in ("nan", "na", "n/a", "null", "none", "-"):
        assert re.search(rf"(^|[\s,(]){re.escape(word)}([\s,;)]|$)", text, re.IGNORECASE), word


def test_written_csv_cells_read_back(tmp_path):
    """write_table's CSV, read back by Python's csv module: every float as its repr (exact round
    trip), NaN and None blank, text with commas, quotes and line breaks intact, ints as written
    (common practice: RFC 4180 quoting, which csv.reader undoes)."""
    names = ["t", "x", "label", "k"]
    floats = [0.1, -2.5e-300, float("nan"), 1e300, 3.0]
    text = ["plain", "a, b", 'say "hi"', "two\nlines", None]
    ints = [1, -2, 0, 7, 12345678901234567890]
    cols = {"t": [0.0, 1.0, 2.0, 3.0, 4.0], "x": floats, "label": text, "k": ints}
    path = tmp_path / "out.csv"
    with atomic_outputs.AtomicOutputs() as out:
        tables.write_table(path, names, cols, out)
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    assert rows[0] == names
    assert len(rows) == 6
    for i, row in enumerate(rows[1:]):
        x = floats[i]
        assert row[1] == ("" if x != x else repr(x))
        if row[1]:
            assert float(row[1]) == x  # repr round-trips exactly
        assert row[2] == ("" if text[i] is None else text[i])
        assert int(row[3]) == ints[i]
        assert float(row[0]) == cols["t"][i]
