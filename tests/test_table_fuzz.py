"""Random tables through the real command (``python -m kalmax``), in fresh processes.

Every table is invented by the generator below: random headers (unicode,
blanks, quotes, duplicates, padding), encodings (UTF-8 with and without a
byte-order mark, UTF-16, Latin-1), separators, line endings, time styles
(numbers, epoch nanoseconds, ISO 8601 with and without zones or fractions,
dates, mixtures, garbage, disorder), cells (numbers, missing-value words,
garbage, overflow), sizes (0 to 40 rows), CSV or Parquet, and options
(outputs in CSV or Parquet, a report, --missing, --debug, fit instead of
apply, an output path equal to the input).

The invariants, for every case:

* the exit code is one of the documented ones for a run without a signal
  (0, 2, 3, 4, 5; 1 would be a bug in kalmax);
* no Python traceback is printed unless --debug was given;
* on failure no file in the folder is created, changed or removed;
* on success the outputs exist, no temporary file is left, and the inputs
  are unchanged.

Cases per run: 20 by default (about a minute: each process imports JAX);
set KALMAX_FUZZ_CASES for more. KALMAX_TEST_SEED shifts the seeds. ``pytest -s``
prints the exit codes seen.
"""

import csv
import io
import json
import os
import random
import subprocess
import sys
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

N_CASES = max(1, int(os.environ.get("KALMAX_FUZZ_CASES", "20")))
SEED = int(os.environ.get("KALMAX_TEST_SEED", "0"))
DOCUMENTED_CODES = {0, 2, 3, 4, 5}
REPO = Path(__file__).resolve().parents[1]

NAMES = ["t", "time", "y", "temp", "température", "時間", "depth_m"]
HOSTILE_NAMES = ["a b", 'quo"te', "x" * 300, "", "  pad  ", "-", "0", "t,y", "\u00a0", "NaN"]
MISSING = ["", "NaN", "NA", "n/a", "null", "none", "-"]
BAD_CELLS = ["?", "nil", "abc", "1e400", "-inf", "1.2.3", "\u2212 1", "0x1p3"]
GOOD_TIMES = ["int", "float", "epoch_ns", "iso_z", "iso_offset", "iso_naive", "date", "iso_frac9"]
BAD_TIMES = ["mixed_zone", "garbage", "decreasing", "repeated", "huge"]
# Each case is a valid table and command with 0, 1 or 2 of these changes (about 40 % of the cases
# have none, so both outcomes are exercised).
HOSTILE = ["encoding", "separator", "bad_cells", "names", "bad_time", "other_time_format", "output_is_input",
           "duplicate_column", "cut", "too_few_rows", "bad_model", "missing_option"]


def _time_cells(r: random.Random, n: int, style: str):
    """(cells, format of the model that fits them) in one time style."""
    steps = sorted(r.sample(range(1, 10 * n + 10), n))
    fmt = "number"
    if style == "int":
        cells = [str(s) for s in steps]
    elif style == "float":
        cells = [f"{s / 7:.6f}" for s in steps]
    elif style == "epoch_ns":
        cells = [str(1_700_000_000_000_000_000 + 1000 * s) for s in steps]
    elif style == "huge":
        cells = [f"1e{300 + s}" for s in steps]
    elif style in ("iso_z", "iso_offset", "iso_naive", "iso_frac9", "mixed_zone"):
        fmt = "iso8601"
        tail = {"iso_z": "Z", "iso_offset": "-08:00", "iso_naive": "", "iso_frac9": "Z", "mixed_zone": ""}[style]
        frac = ".123456789" if style == "iso_frac9" else ""
        cells = [f"2024-03-{1 + s // 86400:02d}T{(s // 3600) % 24:02d}:{(s // 60) % 60:02d}:{s % 60:02d}{frac}{tail}"
                 for s in steps]
        if style == "mixed_zone" and n > 1:
            cells[r.randrange(1, n)] += "-08:00"
    elif style == "date":
        fmt = "iso8601"
        cells = [f"2024-{1 + s // 28 % 12:02d}-{1 + s % 28:02d}" for s in steps]
    elif style == "garbage":
        cells = [r.choice(["yesterday", "", "1", "2024-13-45", "0x10", "\u00a0", "1,5"]) for _ in steps]
    elif style == "decreasing":
        cells = [str(s) for s in steps[::-1]]
    else:  # repeated
        cells = [str(s) for s in steps]
        if n > 1:
            cells[-1] = cells[-2]
    return cells, fmt


def _value_cell(r: random.Random, bad: bool):
    k = r.random()
    if bad and k < 0.2:
        return r.choice(BAD_CELLS)
    if k < 0.75:
        return r.choice([f"{r.gauss(0, 3):.5f}", f"{r.gauss(0, 3):.5f}", " 4 ", "1_000", "-0", "7"])
    return r.choice(MISSING)


def _parquet_column(r, pa, values, is_time, fmt):
    """A Parquet column of ``values`` (texts) in a random type that holds them; (array, fmt)."""
    kind = r.choice(["text", "number", "ns"] if is_time else ["text", "number", "decimal"])
    try:
        if kind == "number":
            return pa.array([float(c) for c in values], pa.float64()), fmt
        if kind == "decimal":
            import decimal

            return pa.array([decimal.Decimal(c.strip()) if c.strip() else None for c in values],
                            pa.decimal128(20, 6)), fmt
        if kind == "ns" and fmt == "number":
            return pa.array([int(c) for c in values], pa.int64()).cast(pa.timestamp("ns")), "iso8601"
    except (ValueError, ArithmeticError, pa.ArrowException):
        pass
    return pa.array(values, pa.string()), fmt


def _make_case(k: int, folder: Path):
    """Write the inputs of case ``k`` into ``folder``; return the command line and a description."""
    import kalmax as kx

    r = random.Random(SEED * 1_000_003 + k)
    changes = set(r.sample(HOSTILE, r.choices([0, 1, 2], weights=[4, 4, 2])[0]))
    n = 1 if "too_few_rows" in changes else r.choice([2, 3, 8, 40])
    tname, yname = r.sample(NAMES + HOSTILE_NAMES if "names" in changes else NAMES, 2)
    style = r.choice(BAD_TIMES if "bad_time" in changes else GOOD_TIMES)
    cells, fmt = _time_cells(r, n, style)
    bad = "bad_cells" in changes
    header = [tname, yname] + ([r.choice([tname, yname])] if "duplicate_column" in changes else [])
    if r.random() < 0.2:
        header.append("extra")
    rows = [[c] + [_value_cell(r, bad) for _ in header[1:]] for c in cells]
    if not bad and n >= 2 and all(row[1].strip() in MISSING for row in rows):
        rows[0][1] = "1.5"  # a column with no observation at all is a (different) data error
    desc = {"rows": n, "time": style, "header": header, "changes": sorted(changes)}
    if r.random() < 0.25 and not changes & {"encoding", "separator", "cut", "duplicate_column"}:
        import pyarrow as pa
        import pyarrow.parquet as pq

        data = "d.parquet"
        cols = {}
        for j, h in enumerate(header):
            cols[h], f = _parquet_column(r, pa, [row[j] for row in rows], j == 0, fmt)
            if j == 0:
                fmt = f
        pq.write_table(pa.table(cols), folder / data)
        desc["format"] = "parquet"
    else:
        data = "d.csv"
        sep = r.choice([";", "\t"]) if "separator" in changes else ","
        buf = io.StringIO()
        csv.writer(buf, delimiter=sep, lineterminator=r.choice(["\n", "\r\n"])).writerows([header] + rows)
        text = buf.getvalue()
        if "cut" in changes:
            text = text[: r.randrange(len(text))]  # cut anywhere: ragged last line, a half-written cell
        enc = r.choice(["utf-16", "latin-1", "cp1252"]) if "encoding" in changes else r.choice(["utf-8", "utf-8-sig"])
        (folder / data).write_bytes(text.encode(enc, errors="replace"))
        desc.update(format="csv", sep=repr(sep), encoding=enc)
    model_time = tname.strip() or "t"
    model_col = yname.strip() or "y"
    if model_col == model_time:
        model_col += "_y"
    if "other_time_format" in changes:
        fmt = "iso8601" if fmt == "number" else "number"  # the model was fitted on the other kind
    spec = kx.ModelSpec(kind="random-walk", dims=1, time_column=model_time, columns=(model_col,),
                        measured=("level0",), params={"q": [0.2]}, noise=(0.3,), time_format=fmt)
    kx.save_model(folder / "m.json", spec)
    if "bad_model" in changes:
        doc = json.loads((folder / "m.json").read_text())
        r.choice([lambda: doc.update(format_version=1.0), lambda: doc["model"].update(states=["x"]),
                  lambda: doc["model"]["measurements"][0].update(column=""),
                  lambda: doc["model"].update(parameters={"q": [-1.0]})])()
        (folder / "m.json").write_text(json.dumps(doc))
    if r.random() < 0.15:
        args = ["fit", data, "--time", model_time, "--model", "random-walk", "--measure", model_col,
                "--steps", "0", "--test-fraction", "0"]
    else:
        args = ["apply", "m.json", data]
    out = r.choice(["m.json", data] if "output_is_input" in changes else ["", "", "out.csv", "out.parquet"])
    if out:
        args += [r.choice(["-o", "--report"]) if out == "m.json" else "-o", out]
    if r.random() < 0.8 and "--report" not in args:
        args.append("--no-report")
    if "missing_option" in changes:
        args += ["--missing", r.choice(["?", "nil", "NA", ""])]
    if r.random() < 0.15:
        args.append("--debug")
    args.append("-q")
    return args, desc


def _snapshot(folder: Path):
    return {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}


def _run_case(k: int, root: Path):
    folder = root / f"case{k:03d}"
    folder.mkdir()
    args, desc = _make_case(k, folder)
    before = _snapshot(folder)
    env = dict(os.environ, PYTHONPATH=str(REPO), KALMAX_COMPILE_CACHE=os.environ.get("KALMAX_COMPILE_CACHE", "1"))
    env.pop("JAX_ENABLE_X64", None)
    res = subprocess.run([sys.executable, "-m", "kalmax", *args], cwd=folder, env=env, capture_output=True,
                         text=True, timeout=300)
    problems = []
    if res.returncode not in DOCUMENTED_CODES:
        problems.append(f"exit code {res.returncode}")
    if "Traceback" in res.stderr and "--debug" not in args:
        problems.append("a traceback without --debug")
    after = _snapshot(folder)
    if res.returncode != 0:
        if after != before:
            problems.append(f"files changed on failure: {sorted(set(after) ^ set(before)) or 'contents'}")
    else:
        if any(name.endswith(".part") for name in after):
            problems.append("a temporary file was left")
        if any(after.get(name) != data for name, data in before.items()):
            problems.append("an input changed")
        if len(after) <= len(before):
            problems.append("no output written")
    return k, args, desc, res, problems


def test_random_tables_through_the_command(tmp_path):
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(lambda k: _run_case(k, tmp_path), range(N_CASES)))
    codes = Counter(res.returncode for _, _, _, res, _ in results)
    print(f"\n[table fuzz] {N_CASES} cases, exit codes {dict(sorted(codes.items()))}")
    failures = [f"case {k}: {'; '.join(p)}\n  kalmax {' '.join(args)}\n  {desc}\n  stderr: {res.stderr[-600:]}"
                for k, args, desc, res, p in results if p]
    assert not failures, "\n".join(failures)
    if N_CASES >= 10:  # the generator must reach both outcomes
        assert codes[0] >= 1 and sum(v for c, v in codes.items() if c) >= 1, codes

