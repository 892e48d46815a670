"""The ``kalmax`` command: fit a continuous-time smoother to a table of sensor readings.

Run ``kalmax --help``, ``kalmax fit --help`` or ``kalmax apply --help``.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import textwrap
import traceback
from pathlib import Path
from typing import List, Optional

from ._src.tools import signals
from ._src.tools.atomic_outputs import AtomicOutputs
from ._src.tools.errors import DataError, FitError, ModelFileError, UsageError
from ._src.tools.time_units import UNITS, UNIT_WORDS

SAFETY_NOTE = (
    "Safety: state estimates often feed decisions (navigation, monitoring, control). kalmax comes with no "
    "guarantee of any kind for safety-critical use. Validate every model against your own data, check the "
    "held-out errors and intervals it reports, and follow the codes and practices of your field."
)

# Exit codes (stable: scripts may rely on them).
EXIT_OK = 0
EXIT_INTERNAL = 1  # a bug: please report it (rerun with --debug for the traceback)
EXIT_USAGE = 2  # bad command line (argparse's own convention)
EXIT_DATA = 3  # data file problem: unreadable, missing column, bad timestamps, no observations, unwritable output
EXIT_MODEL_FILE = 4  # model file problem: unreadable, another format version, invalid contents
EXIT_FIT = 5  # numerical failure: non-finite loss, states not identified
EXIT_INTERRUPTED = 130  # Ctrl-C (SIGINT): temporaries removed, no output written
EXIT_TERMINATED = 143  # SIGTERM (kill, timeout, a job scheduler): handled like Ctrl-C

_SAFETY_WRAPPED = textwrap.fill(SAFETY_NOTE, width=78, break_on_hyphens=False)

EXIT_CODES_HELP = """exit codes:
  0    success: every output file was written
  1    internal error (a bug; rerun with --debug and report the traceback)
  2    bad command line, including an output that is an input or another output
  3    data problem: unreadable file, missing column, timestamps not strictly
       increasing or mixing styles, no observations, output folder missing
  4    model file problem: unreadable, from another format version, invalid,
       or lacking what the request needs (a time unit for --forecast-step 1h)
  5    numerical failure: the fit or the smoother produced non-finite values
  130  interrupted (Ctrl-C, SIGINT)
  143  terminated (SIGTERM)
On any failure no output file is created or changed: outputs are written to
temporary files (.NAME.kalmax-XXXXXXXX.part, in the output's folder) and
renamed into place only when all of them are complete. A run killed outright
(SIGKILL, power cut) can leave such temporary files: delete them at will; the
next run writing the same output removes those older than a day.

compiled programs are kept between runs in $KALMAX_CACHE_DIR (default
~/.cache/kalmax/xla), so a second run on same-shaped data starts in seconds;
KALMAX_COMPILE_CACHE=0 switches this off."""

MAIN_DESCRIPTION = """\
Smooth, impute and fit sensor readings with a continuous-time linear-Gaussian
model (a Kalman/Rauch-Tung-Striebel smoother on irregular timestamps).

Input: a CSV (or Parquet) table with a time column and one column per measured
quantity. Blank cells are missing values, and so are cells holding one of the
words NaN, NA, N/A, null, none or - (any case; --missing WORD replaces these
words); rows may come at irregular times and each sensor may report at its own
rate.

Typical session:
  kalmax models                                   # which models exist
  kalmax fit readings.csv --time time --model random-walk --measure temp \
      --time-unit day --forecast 14               # rates per day; 14 rows of forecast
  kalmax apply readings_model.json new_readings.csv

"""


TIME_HELP = """\
Time: numbers or date-times (ISO 8601, e.g. 2024-05-01T12:00:00Z, or any layout
given by --time-pattern), strictly increasing. Date-times are converted to the
--time-unit (default s), so the model's rates are per that unit. Numbers are
used as they are: --time-unit only names their unit (no conversion), unless
--numeric-time-unit says what they count in (e.g. ms for epoch milliseconds):
then they are converted exactly to --time-unit. A column that measures a
velocity or other rate must be in its units per --time-unit. Date-times are
written one way: all with a time zone (Z, +01:00; offsets may differ), all
without one (read as UTC), or all dates. Time differences are computed exactly
(epoch nanoseconds, fractions of a second) and rounded once."""


def _kinds_text() -> str:
    from ._src.tools.spec import KINDS

    lines = []
    for k in KINDS.values():
        lines.append(f"  {k.name:<22} {k.summary}")
        lines.append(f"  {'':<22} parameters: {', '.join(k.params)}, noise (per column)")
    return "\n".join(lines)


COMPONENTS_HELP = """\
Composed models (--components instead of --model): a sum of components joined by
'+', each KIND, KIND(SETTING=VALUE, ...) or either followed by 'as NAME':
{kinds}
A period P is a duration: a number and a time unit (1 day, 24h, 11 year) or a
plain number in the model's time unit. Names default to the kind word (season,
season2, ...); parameters are NAME.PARAMETER (--set daily.q=0.01, --fix
cycle.period). --measure COL reads every component; --measure COL=NAME+NAME
reads only those named. A regression's input columns are known values read
from DATA, not measured: every row needs one (a blank input cell is an error),
and a forecast needs them too (--future-inputs FILE). Example, an invented
greenhouse record:
  kalmax fit greenhouse.csv --time time --time-unit h --measure humidity \\
      --components "level + season(period=1 day, harmonics=2) as daily + regression(vent)\"
"""


def _components_text() -> str:
    from ._src.tools.composed import kinds_text

    return COMPONENTS_HELP.format(kinds=kinds_text())


def _units_text() -> str:
    words = ", ".join(f"{k} ({v})" for k, v in UNIT_WORDS.items())
    return textwrap.fill("Time units: " + words + ".", width=80, break_on_hyphens=False)


def build_parser() -> argparse.ArgumentParser:
    fmt = argparse.RawDescriptionHelpFormatter
    parser = argparse.ArgumentParser(
        prog="kalmax", formatter_class=fmt, description=MAIN_DESCRIPTION + _SAFETY_WRAPPED,
        epilog=EXIT_CODES_HELP)
    from ._src.version import __version__

    parser.add_argument("--version", action="version", version=f"kalmax {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    common = argparse.ArgumentParser(add_help=False)
    out = common.add_argument_group("outputs (default: next to DATA, named after it)")
    out.add_argument("--output", "-o", metavar="FILE",
                     help="smoothed table, .csv or .parquet (default: DATA_smoothed.csv). Columns: the time, then "
                          "for each measured column COL: COL (as read), COL_smoothed (estimate, also where COL was "
                          "missing), COL_lower and COL_upper (interval for a new noisy measurement of COL, i.e. "
                          "the smoother's uncertainty plus the measurement noise) and COL_status (observed, "
                          "imputed = missing in the input, held-out = hidden from the fit, or forecast)")
    out.add_argument("--report", metavar="FILE.png", help="PNG report (default: DATA_report.png)")
    out.add_argument("--no-report", action="store_true", help="do not draw the PNG report")
    out.add_argument("--level", type=float, default=0.95, metavar="P",
                     help="coverage of the interval columns and bands, between 0 and 1 (default: %(default)s)")
    out.add_argument("--with-states", action="store_true",
                     help="also write the smoothed state (e.g. velocities) as state_NAME columns")
    inp = common.add_argument_group("input")
    inp.add_argument("--missing", action="append", default=None, metavar="WORD",
                     help="a word that marks a missing measurement (any case; repeat for several). Given once "
                          "or more, it replaces the default words NaN, NA, N/A, null, none and -; blank cells "
                          "are always missing")
    inp.add_argument("--time-pattern", metavar="PATTERN",
                     help="read every time cell as a date-time with this strptime pattern, e.g. "
                          "'%%d/%%m/%%Y %%H:%%M' or '%%Y%%m%%d' (%%z for an offset such as +0200; without it the "
                          "times are read as UTC; %%Z is refused). Saved in the model file, so `kalmax apply` "
                          "reads new data the same way; there, 'iso8601' switches back to ISO 8601")
    fc = common.add_argument_group("forecast")
    fc.add_argument("--forecast", metavar="N",
                    help="append N forecast rows past the last timestamp, with forecast means and intervals in "
                         "the COL_smoothed, COL_lower and COL_upper columns and 'forecast' in COL_status")
    fc.add_argument("--forecast-step", metavar="STEP",
                    help="spacing of the forecast rows: a number in the model's time unit, or a number and a "
                         "unit such as 30min, 1.5h or 7day (default: the typical step of the data, the lower "
                         "median of its time steps)")
    fc.add_argument("--future-inputs", metavar="FILE",
                    help="for a composed model with a regression: a table (.csv or .parquet) with the time column "
                         "and the regression's input columns, one row per forecast time after the last one of "
                         "DATA; its rows are the forecast rows (--forecast N: the first N of them; no "
                         "--forecast-step). Without it, --forecast is refused for such a model: the inputs at "
                         "the forecast rows would be unknown")
    grp = common.add_argument_group("many series in one table")
    grp.add_argument("--group", metavar="COL",
                     help="the table holds several series, one per value of column COL (e.g. station), each "
                          "with its own strictly increasing times: fit smooths each group on its own (see "
                          "--group-fit) in one batched run; the outputs keep COL as their first column. apply: "
                          "a model fitted per group reads its group column from the model file (each group "
                          "with its own parameters; a group it does not know is an error); any other model is "
                          "applied to every group of COL")
    grp.add_argument("--report-group", metavar="VALUE",
                     help="with --group: the group drawn in the report (default: the first in the table)")
    rob = common.add_argument_group("outlier-prone columns")
    rob.add_argument("--robust", action="append", default=None, metavar="COL=KIND:VALUE",
                     help="smooth column COL with a robust loss on its residuals, so that a few wild values do not "
                          "pull the estimate: huber:DELTA (squared within DELTA noise sds, linear beyond; e.g. 2.5) "
                          "or student:NU (Student-t noise with NU degrees of freedom; e.g. 4). Repeat for several "
                          "columns (one KIND per run). The parameters stay those of the model: `kalmax fit` fits "
                          "them with the ordinary (Gaussian) likelihood and uses the robust loss only for the "
                          "smoothed table and report; `kalmax apply` smooths with the saved parameters. The "
                          "interval columns are then approximate. Not with --group")
    misc = common.add_argument_group("other")
    misc.add_argument("--quiet", "-q", action="store_true", help="print errors only (no progress, no summary)")
    misc.add_argument("--debug", action="store_true", help="show the Python traceback of an internal error")

    fit = sub.add_parser(
        "fit", parents=[common], formatter_class=fmt,
        help="fit a model to a table and write the smoothed table, the model file and a report",
        description=(
            "Fit a continuous-time model to DATA, then smooth and impute every measured column.\n\n"
            "A fraction (--test-fraction) of blocks of --test-block consecutive rows is hidden from the\n"
            "fit as gaps and used to report the held-out error of the starting model and of the fitted\n"
            "model. A fit that makes it worse prints a warning on stderr (also recorded in the model\n"
            "file); the outputs are written and the exit code stays 0. With --objective likelihood\n"
            "the summary gives each parameter with its standard error in natural units (observed\n"
            "information of the log-parameters, mapped by the delta method: SE(v) = v SE(log v)).\n\n"
            "Many series: --group station splits a long table (one row per station and time) by\n"
            "station and fits every group in one batched run: one parameter set per group\n"
            "(--group-fit separate, the default; the same as fitting each group alone) or one for\n"
            "all (--group-fit shared). Example:\n"
            "  kalmax fit stations.csv --time time --model random-walk --measure temp --group station\n\n"
            "Model kinds (--model):\n" + _kinds_text() + "\n\n" + _components_text() + "\n\n"
            "Each --measure names a column and, after '=', the state it measures; without '=' the\n"
            "k-th such column measures the k-th position/level. Example, positions in two axes plus a\n"
            "velocity sensor on the first axis:\n"
            "  kalmax fit float.csv --time time --model constant-velocity --dims 2 \\\n"
            "      --measure east --measure north --measure speed_east=velocity0\n\n"
            + TIME_HELP + "\n" + _units_text() + "\n\n"
            "Missing measurements: blank cells, and cells holding NaN, NA, N/A, null, none or -\n"
            "(any case); --missing WORD replaces these words.\n\n" + _SAFETY_WRAPPED),
        epilog=EXIT_CODES_HELP)
    fit.add_argument("data", metavar="DATA", help="input table: .csv (header row) or .parquet (needs pyarrow)")
    g = fit.add_argument_group("what to fit")
    g.add_argument("--time", metavar="COL", help="name of the time column (required unless --start gives it)")
    g.add_argument("--measure", "-m", action="append", metavar="COL[=STATE]", default=None,
                   help="a measured column, optionally with the state it measures (repeat for each column)")
    g.add_argument("--model", metavar="KIND", help="model kind (see the list above; `kalmax models` too)")
    g.add_argument("--components", metavar="TEXT",
                   help="instead of --model: a sum of components, e.g. \"level + season(period=1 day, "
                        "harmonics=2) as daily + regression(vent)\" (see 'Composed models' above)")
    g.add_argument("--dims", type=int, metavar="D",
                   help="number of spatial axes for random-walk / constant-velocity / constant-acceleration "
                        "(default: number of --measure columns without '=STATE')")
    g.add_argument("--time-unit", choices=tuple(UNITS), metavar="UNIT",
                   help="the unit of time the model's rates are per: " + ", ".join(UNITS) + " (year = 365.25 "
                        "days). Date-times are converted to it (default: s); numbers are taken to be in it "
                        "(no conversion) unless --numeric-time-unit is given. Saved in the model file")
    g.add_argument("--numeric-time-unit", choices=tuple(UNITS), metavar="UNIT",
                   help="what numeric timestamps count in (e.g. ms for epoch milliseconds, ns for epoch "
                        "nanoseconds); they are converted exactly to --time-unit (default: this unit, i.e. no "
                        "conversion). Saved in the model file")
    g.add_argument("--start", metavar="MODEL.json",
                   help="start from a saved model file (gives kind, dims, columns and starting values)")
    g.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                   help="starting value of a parameter, e.g. q=0.01, q=0.1,0.2 (per axis), frequency=0.5, "
                        "daily.q=0.01 (a component's), noise=4 (every column) or noise.COL=4 (one column; a "
                        "variance)")
    g.add_argument("--fix", action="append", default=[], metavar="NAME",
                   help="keep a parameter at its starting value (a process parameter name, or noise)")
    g.add_argument("--transform", action="append", default=[], metavar="COL=NAME",
                   help="model column COL on a transformed scale: log (values > 0), log1p (values > -1) or logit "
                        "(values in (0, 1)); repeat per column. Intervals and forecasts are transformed back, so "
                        "they stay in range; COL_smoothed is then the back-transformed median, not the mean. "
                        "Saved in the model file (kalmax apply uses it)")
    h = fit.add_argument_group("how to fit")
    h.add_argument("--objective", choices=("likelihood", "holdout"), default="likelihood",
                   help="likelihood: maximise the exact likelihood of the training cells (default). "
                        "holdout: minimise the cross-validated error of the smoother on training cells hidden "
                        "from it in turn, then scale all variances so the intervals match those errors")
    h.add_argument("--steps", type=int, default=300, metavar="N", help="optimisation steps (default: %(default)s)")
    h.add_argument("--learning-rate", type=float, default=0.1, metavar="LR",
                   help="Adam step size on the log-parameters (default: %(default)s)")
    h.add_argument("--optimizer", choices=("auto", "adam", "lbfgs"), default="auto",
                   help="lbfgs: quasi-Newton steps with a line search, stopping once the loss stalls (at most "
                        "--steps); about ten steps for a likelihood with few parameters. adam: --steps "
                        "first-order steps of size --learning-rate. auto (default): lbfgs for --objective "
                        "likelihood, adam for --objective holdout (a noisy, nearly flat cross-validated error) "
                        "and with --group (lbfgs does not combine with it)")
    h.add_argument("--test-fraction", type=float, default=0.2, metavar="F",
                   help="fraction of the --test-block blocks (or of the observed cells, with --test-block "
                        "cells) hidden from the fit and used to report the held-out error, 0 to use everything "
                        "for fitting (default: %(default)s)")
    h.add_argument("--test-block", default="10", metavar="ROWS|DURATION",
                   help="hold out whole blocks of this many consecutive rows (every measured column of them), "
                        "or of this duration when given with a time unit (6h, 2day: the rows it spans at "
                        "the data's typical step; numeric times need --time-unit), "
                        "both for the reported held-out error and for the folds of --objective holdout, so the "
                        "error is that of bridging a gap of that length; 'cells' holds out random single cells "
                        "instead, which have measured neighbours on both sides and so mostly test interpolation "
                        "across one step (default: %(default)s)")
    h.add_argument("--group-fit", choices=("separate", "shared"), default="separate",
                   help="with --group: 'separate' fits one set of parameters per group (default: groups such "
                        "as stations usually differ; it is the same as fitting each group's rows alone, run as "
                        "one batch), saved per group in the model file (format version 5); 'shared' fits one "
                        "set of parameters to all groups (the likelihood summed over groups), saved as an "
                        "ordinary model file")
    h.add_argument("--folds", type=int, default=4, metavar="K",
                   help="cross-validation folds for --objective holdout (default: %(default)s)")
    h.add_argument("--seed", type=int, default=0, help="seed of the random held-out choices (default: %(default)s)")
    fit.add_argument("--model-file", metavar="FILE.json", help="fitted model file (default: DATA_model.json)")

    apply = sub.add_parser(
        "apply", parents=[common], formatter_class=fmt,
        help="smooth new data with a saved model file, without refitting",
        description=("Smooth and impute DATA with the model saved by `kalmax fit` (no refitting).\n"
                     "DATA needs the model's time column and measurement columns. The time unit, the\n"
                     "unit of numeric timestamps and the --time-pattern come from the model file\n"
                     "(a version-1 file: seconds for date-times, the numbers' own unit for numbers).\n"
                     "--forecast N appends N forecast rows; --forecast-step with a unit (e.g. 1h)\n"
                     "needs a model file that names its time unit.\n\n" + _SAFETY_WRAPPED),
        epilog=EXIT_CODES_HELP)
    apply.add_argument("model_file", metavar="MODEL.json", help="model file written by `kalmax fit`")
    apply.add_argument("data", metavar="DATA", help="input table: .csv or .parquet")

    sub.add_parser("models", help="list the model kinds, their states and parameters, and the component kinds",
                   description="List the model kinds, their states and parameters, and the component kinds of "
                               "composed models (--components).")
    return parser


# ----------------------------------------------------------------------------
# Helpers
# ----------------------------------------------------------------------------


def _say(args, *text):
    if not args.quiet:
        print(*text, flush=True)


def _default_path(data: str, suffix: str) -> Path:
    p = Path(data)
    return p.with_name(p.stem + suffix)


def _same_file(a, b) -> bool:
    """Whether paths ``a`` and ``b`` name one file: the same inode (hard and symbolic links) for
    existing files, else the same fully resolved path."""
    try:
        if os.path.samefile(a, b):
            return True
    except OSError:  # one of them does not exist (yet)
        pass
    return os.path.normcase(os.path.realpath(a)) == os.path.normcase(os.path.realpath(b))


def _outputs(args, model_file: bool, inputs):
    """(table, report, model) output paths, checked. ``inputs``: (option, path) of every input file.

    An output that is one of the inputs, or two outputs that are one file (by
    resolved path, symbolic or hard link), is a :class:`UsageError`.
    """
    table = Path(args.output) if args.output else _default_path(args.data, "_smoothed.csv")
    report = None if args.no_report else (Path(args.report) if args.report else _default_path(args.data, "_report.png"))
    model = None
    if model_file:
        model = Path(args.model_file) if args.model_file else _default_path(args.data, "_model.json")
    named = [("--output" if args.output else "the table output", table),
             ("--report" if args.report else "the report output", report),
             ("--model-file" if model_file and args.model_file else "the model file output", model)]
    named = [(opt, p) for opt, p in named if p is not None]
    for i, (opt, p) in enumerate(named):
        for opt2, p2 in named[:i]:
            if _same_file(p, p2):
                raise UsageError(f"the output files must be different files, but {opt2} {p2} and {opt} {p} are "
                                 "the same file.")
        for what, src in inputs:
            if src is not None and _same_file(p, src):
                raise UsageError(f"{opt} {p} would overwrite the input {what} {src} (the same file); "
                                 "choose another output name.")
    # Check the destinations before any work: a long fit should not end in "cannot write".
    paths = [p for _, p in named]
    for p in paths:
        if p.is_dir():
            raise DataError(f"cannot write {p}: it is a folder.")
        if not p.parent.is_dir():
            raise DataError(f"cannot write {p}: folder {p.parent} does not exist.")
    return table, report, model


def _check_level(args):
    if not (0 < args.level < 1):
        raise UsageError(f"--level must lie strictly between 0 and 1; got {args.level}.")


def _format_errors(errs):
    return ", ".join(f"{k} {v:.4g}" for k, v in errs.items() if k != "all")


def _coverage_text(coverage):
    """The summary line of the held-out interval coverage (``apply_workflow.heldout_scores``)."""
    if coverage["all"] is None:
        return "Held-out coverage: no held-out cells."
    per = ", ".join(f"{c} {'-' if v is None else format(v, '.3f')}" for c, v in coverage["columns"].items()) \
        if len(coverage["columns"]) > 1 else ""
    return (f"Held-out coverage of the {100 * coverage['level']:g}% intervals (fitted model, {coverage['cells']} "
            f"cells hidden from the smoother): {coverage['all']:.3f}" + (f" ({per})" if per else ""))


def _pooled_coverage(coverages):
    """One coverage record (as ``apply_workflow.heldout_scores`` gives) over several groups' held-out cells."""
    def pooled(counts, fractions):
        n = sum(k for k in counts)
        return sum(k * f for k, f in zip(counts, fractions) if k) / n if n else None

    columns = list(coverages[0]["columns"])
    return {"level": coverages[0]["level"], "cells": sum(c["cells"] for c in coverages),
            "all": pooled([c["cells"] for c in coverages], [c["all"] for c in coverages]),
            "columns": {col: pooled([c["column_cells"][col] for c in coverages],
                                    [c["columns"][col] for c in coverages]) for col in columns},
            "column_cells": {col: sum(c["column_cells"][col] for c in coverages) for col in columns}}


def _table_for(args, spec, series, smoothing, test_mask=None):
    from ._src.tools import apply_workflow

    return apply_workflow.output_table(spec, series, smoothing, level=args.level, with_states=args.with_states,
                                       test_mask=test_mask)


def _test_block(args, series=None):
    """The --test-block length in rows, or None for 'cells' (UsageError otherwise).

    A plain whole number is rows; a number with a time unit (6h, 2day) is a
    duration, turned into rows of ``series`` at its typical step
    (``horizon.duration_rows``)."""
    from ._src.tools import horizon

    text = str(args.test_block).strip().lower()
    if text == "cells":
        return None
    try:
        rows = int(text)
    except ValueError:
        if series is not None and any(ch.isalpha() for ch in text):
            return horizon.duration_rows(series, str(args.test_block).strip(), "--test-block")
        rows = 0
    if rows < 1:
        raise UsageError(f"--test-block must be a whole number of rows >= 1, a duration with a time unit "
                         f"(e.g. 6h) or 'cells'; got {args.test_block!r}.")
    return rows


def _kind_and_measures(args, alternatives: str):
    """(columns, states, dims) of a --model kind fit; a usage error naming what is missing or unknown."""
    from ._src.tools.settings import parse_measures  # lazily, like the rest of the command (fast --help)
    from ._src.tools.spec import KINDS

    missing = [o for o, v in (("--time", args.time), ("--model", args.model), ("--measure", args.measure)) if not v]
    if missing:
        raise UsageError(f"fit needs {', '.join(missing)} ({alternatives}).")
    if args.model not in KINDS:
        raise UsageError(f"--model {args.model!r} is not a model kind; choose one of {', '.join(KINDS)}.")
    return parse_measures(args.measure, args.model, args.dims)


def _transformed(args, natural, columns, stored=()):
    """(transforms, series on the transformed scale) of ``natural``: --transform, else the ``stored`` ones."""
    from ._src.tools import transforms

    given = getattr(args, "transform", None)  # a fit option; apply uses the model file's
    chosen = transforms.parse(given, columns) if given else tuple(stored)
    if given and stored and chosen != tuple(stored):
        raise UsageError("--transform contradicts the transforms of the --start model file; drop one of them.")
    if not chosen:
        return chosen, natural
    y = transforms.forward(natural.y, columns, chosen, source=str(args.data), times=natural.times_raw)
    return chosen, natural._replace(y=y)


def _time_pattern(args, stored=None):
    """The strptime pattern to read the time column with: --time-pattern ('iso8601': none), else ``stored``."""
    from ._src.tools.time_units import check_pattern

    if args.time_pattern is None:
        return stored
    if args.time_pattern.strip().lower() in ("iso8601", "iso"):
        return None
    try:
        check_pattern(args.time_pattern)
    except ValueError as e:
        raise UsageError(f"--time-pattern: {e}") from None
    return args.time_pattern


def _check_forecast(args):
    """The number of forecast rows (None without --forecast); checks --forecast-step's syntax (UsageError)."""
    from ._src.tools import horizon

    if args.future_inputs is not None and args.forecast_step is not None:
        raise UsageError("--forecast-step does not go with --future-inputs: the rows of --future-inputs give the "
                         "forecast times.")
    if args.forecast is None:
        if args.forecast_step is not None:
            raise UsageError("--forecast-step needs --forecast N (the number of forecast rows).")
        return None
    steps = horizon.parse_steps(args.forecast)
    horizon.check_step(args.forecast_step)
    return steps


def _check_future_inputs(args, spec):
    """UsageError unless the forecast options suit the model's regression inputs (none, or --future-inputs)."""
    inputs = spec.input_columns()
    if args.future_inputs is not None and not inputs:
        raise UsageError("--future-inputs: the model has no regression component, so its forecast rows need no "
                         "inputs; use --forecast N (and --forecast-step).")
    if inputs and args.forecast is not None and args.future_inputs is None:
        regs = ", ".join(p.name for p in spec.components if p.inputs)
        raise UsageError(f"--forecast {args.forecast}: the model's regression ({regs}) reads the input column(s) "
                         f"{', '.join(inputs)}, whose values at the forecast rows are unknown. Give them with "
                         f"--future-inputs FILE (a table with columns {spec.time_column}, {', '.join(inputs)}), "
                         "or add the future rows to DATA with the inputs filled and the measurements blank.")


def _with_forecast(args, series, steps, spec):
    """``series`` with the forecast rows appended (unchanged without --forecast or --future-inputs)."""
    from ._src.tools import horizon, tables

    _check_future_inputs(args, spec)
    if args.future_inputs is not None:
        names, cols = tables.read_table(args.future_inputs)
        extended = horizon.rows_from_table(series, names, cols, spec.time_column, source=str(args.future_inputs),
                                           limit=steps, missing=args.missing)
        steps = extended.forecast
    elif steps is None:
        return series
    else:
        extended = horizon.extend(series, steps, args.forecast_step)
    _say(args, f"Forecast: {steps} rows after {series.times_raw[-1]}, up to {extended.times_raw[-1]}.")
    return extended


def _read(args, time_column, columns, time_format=None, *, time_unit=None, numeric_time_unit=None,
          time_pattern=None, inputs=(), inputs_option=None):
    """The series of DATA. ``inputs``: regression input columns; with ``inputs_option`` (the option that named
    them) one that DATA lacks is a UsageError naming that option, else a DataError."""
    from ._src.tools import series, tables

    if args.missing is not None:
        bad = [w for w in args.missing if not w.strip()]
        if bad:
            raise UsageError("--missing needs a word; blank cells are always missing.")
    names, cols = tables.read_table(args.data)
    absent = [c for c in inputs if c not in cols]
    if absent and inputs_option is not None:
        raise UsageError(f"{inputs_option}: the regression reads input column {absent[0]!r}, but {args.data} has "
                         f"no such column; its columns are {', '.join(map(repr, names))}.")
    return series.series_from_table(names, cols, time_column, columns, source=str(args.data),
                                    time_format=time_format, missing=args.missing, time_unit=time_unit,
                                    numeric_time_unit=numeric_time_unit, time_pattern=time_pattern,
                                    inputs=inputs)


# ----------------------------------------------------------------------------
# Commands
# ----------------------------------------------------------------------------


def cmd_models(args) -> int:
    from ._src.tools.spec import KINDS

    for k in KINDS.values():
        print(f"{k.name}\n    {k.summary}")
        dims_note = "" if k.fixed_dims else " (with --dims 1; more axes add position1, velocity1, ...)"
        print(f"    states: {', '.join(k.state_names(1))}{dims_note}")
        print(f"    parameters: {', '.join(k.params)}, noise (one variance per measured column)")
    print("\n" + _components_text())
    return EXIT_OK


def cmd_fit(args) -> int:
    import numpy as np

    from ._src import splits
    from ._src.tools import apply_workflow, fit_workflow, model_file, robust_columns, starting_values, tables
    from ._src.tools.report import write_report
    from ._src.tools import composed
    from ._src.tools.settings import apply_settings, parse_measures
    from ._src.tools.spec import KINDS, check_columns

    _check_level(args)
    if args.steps < 0:
        raise UsageError(f"--steps must be >= 0; got {args.steps}.")
    if not (0 <= args.test_fraction < 1):
        raise UsageError(f"--test-fraction must lie in [0, 1); got {args.test_fraction}.")
    if args.folds < 2:
        raise UsageError(f"--folds must be at least 2; got {args.folds}.")
    if not (args.learning_rate > 0 and math.isfinite(args.learning_rate)):
        raise UsageError(f"--learning-rate must be > 0; got {args.learning_rate}.")
    if args.optimizer == "auto":
        args.optimizer = "lbfgs" if args.objective == "likelihood" and args.group is None else "adam"
    if args.optimizer == "lbfgs" and args.group is not None:
        # One quasi-Newton run over all groups' parameters would couple the groups through its line
        # search and curvature pairs; Adam is per coordinate, so a batched run fits each group alone.
        raise UsageError("--optimizer lbfgs does not combine with --group; use --optimizer adam there.")
    forecast_steps = _check_forecast(args)
    table_path, report_path, model_path = _outputs(args, model_file=True, inputs=[
        ("DATA", args.data), ("--start", args.start), ("--future-inputs", args.future_inputs)])

    robust_columns.parse(args.robust, None)  # the option's syntax, before any fitting
    if args.group is not None:
        _no_robust_with_groups(args)
        return _fit_groups(args, forecast_steps, table_path, report_path, model_path)
    if args.report_group is not None:
        raise UsageError("--report-group needs --group COL.")
    start = model_file.load_model(args.start) if args.start else None
    time_unit, numeric_unit = args.time_unit, args.numeric_time_unit
    if args.components is not None and (args.model is not None or start is not None):
        raise UsageError(f"--components gives the model, and so does {'--model' if args.model else '--start'}; "
                         "drop one of them.")
    if start is not None:
        for opt, val, have in (("--model", args.model, start.kind), ("--time", args.time, start.time_column),
                               ("--dims", args.dims, start.dims)):
            if val is not None and val != have:
                raise UsageError(f"{opt} {val} contradicts the --start model file ({have}); drop one of them.")
        if args.measure:
            if start.is_composed:
                cols, reads = composed.parse_reads(args.measure, [p.name for p in start.components])
                states = ["+".join(r) for r in reads]
            else:
                cols, states, _ = parse_measures(args.measure, start.kind, start.dims)
            if tuple(cols) != start.columns or tuple(states) != start.measured:
                raise UsageError("--measure contradicts the columns of the --start model file; drop one of them.")
        # The starting values are per the start file's time unit: another unit would change their meaning.
        # A file whose numbers have no named unit may be given one (a name, no conversion).
        time_unit = time_unit or start.time_unit
        if numeric_unit is None and start.numeric_time_unit is not None:
            numeric_unit = start.numeric_time_unit
        resolved = time_unit or numeric_unit
        if start.time_unit is not None and resolved != start.time_unit:
            raise UsageError(f"--time-unit {resolved} contradicts the --start model file, whose rates are per "
                             f"{start.time_unit}; drop one of them.")
        series = _read(args, start.time_column, start.columns, start.time_format, time_unit=time_unit,
                       numeric_time_unit=numeric_unit, time_pattern=_time_pattern(args, start.time_pattern),
                       inputs=start.input_columns())
        natural = series
        chosen, series = _transformed(args, natural, start.columns, start.transforms)
        spec = start
    elif args.components is not None:
        missing = [o for o, v in (("--time", args.time), ("--measure", args.measure)) if not v]
        if missing:
            raise UsageError(f"fit needs {', '.join(missing)} (or --start MODEL.json).")
        if args.dims is not None:
            raise UsageError("--dims does not apply to --components (a composed model has one axis).")
        drafts = composed.parse_components(args.components)
        cols, reads = composed.parse_reads(args.measure, [d.name for d in drafts])
        try:
            check_columns(args.time, cols)
        except ValueError as e:
            raise UsageError(f"--measure: {e}") from None
        clash = [c for c in composed.input_columns(drafts) if c in cols or c == args.time]
        if clash:
            raise UsageError(f"--components: regression input {clash[0]!r} is the time column or a --measure "
                             "column; a regression reads known inputs, not the measured quantities.")
        series = _read(args, args.time, cols, time_unit=time_unit, numeric_time_unit=numeric_unit,
                       time_pattern=_time_pattern(args), inputs=composed.input_columns(drafts),
                       inputs_option="--components")
        natural = series
        chosen, series = _transformed(args, natural, cols)
        try:
            spec = starting_values.composed_spec(drafts, args.time, cols, reads, series)
        except ValueError as e:
            raise UsageError(f"--components: {e}") from None
    else:
        cols, states, dims = _kind_and_measures(args, "or --components TEXT, or --start MODEL.json")
        try:
            check_columns(args.time, cols)
        except ValueError as e:
            raise UsageError(f"--measure: {e}") from None
        series = _read(args, args.time, cols, time_unit=time_unit, numeric_time_unit=numeric_unit,
                       time_pattern=_time_pattern(args))
        natural = series
        chosen, series = _transformed(args, natural, cols)
        spec = starting_values.default_spec(args.model, dims, args.time, cols, states, series)
    spec = spec.replace(transforms=chosen, time_unit=series.unit, time_pattern=series.clock.pattern,
                        numeric_time_unit=numeric_unit if series.time_format == "number" else None)
    if series.time_format == "iso8601" and start is None and args.time_unit is None:
        step = float(np.median(np.diff(series.t)))
        hint = next((u for u, s in (("day", 86400), ("h", 3600), ("min", 60)) if step >= s), None)
        if hint:
            _say(args, f"Note: the rates are per second; the typical step is {step:.4g} s, so --time-unit {hint} "
                       "may give more readable numbers.")
    out_natural = _with_forecast(args, natural, forecast_steps, spec)  # before the fit: a bad step fails fast
    out_series = out_natural._replace(y=np.concatenate([series.y, out_natural.y[len(series.y):]]))
    spec = apply_settings(spec, args.set)
    allowed = spec.free_names()
    bad = [f for f in args.fix if f not in allowed]
    if bad:
        raise UsageError(f"--fix {bad[0]}: unknown parameter; this model has {', '.join(sorted(allowed))}.")

    mask = series.mask
    block = _test_block(args, series)
    if block is not None and not str(args.test_block).strip().isdigit():
        _say(args, f"Held-out blocks: --test-block {args.test_block} is {block} rows at the typical step.")
    if args.test_fraction > 0 and block is None:
        test = np.asarray(splits.holdout_entries(mask, args.test_fraction, args.seed))
    elif args.test_fraction > 0:
        test = np.asarray(splits.holdout_blocks(mask, block, args.test_fraction, args.seed))
    else:
        test = np.zeros_like(mask)
    train = mask & ~test
    empty = [c for j, c in enumerate(spec.columns) if not train[:, j].any()]
    if empty:
        raise DataError(f"{args.data}: after holding out test cells, column(s) {', '.join(empty)} have "
                                 "no training observation; lower --test-fraction.")
    _say(args, f"Read {args.data}: {len(series.t)} rows, {int(mask.sum())} observed cells "
               f"({', '.join(f'{c} {int(mask[:, j].sum())}' for j, c in enumerate(spec.columns))}).")
    before = apply_workflow.heldout_rmse(spec, series, test) if test.any() else None
    if before is not None:
        _say(args, f"Held-out RMSE of the starting model: {_format_errors(before)}")
    _say(args, f"Fitting {spec.label} (objective: {args.objective}, "
               + (f"{args.steps} steps)" if args.optimizer == "adam" else f"lbfgs, at most {args.steps} steps)")
               + " ...")
    fold_block = block
    if block is not None and args.objective == "holdout" and len(series.t) // block < args.folds:
        # Fewer blocks than folds would leave folds empty and hide most of the record at once.
        fold_block = max(1, len(series.t) // args.folds)
        _say(args, f"Note: {len(series.t)} rows hold fewer than --folds {args.folds} blocks of {block} rows; the "
                   f"cross-validation folds use blocks of {fold_block} rows.")
    outcome = fit_workflow.fit_spec(spec, series, train, objective=args.objective, steps=args.steps,
                                    optimizer=args.optimizer,
                                    learning_rate=args.learning_rate, fixed=tuple(args.fix), folds=args.folds,
                                    seed=args.seed, progress=not args.quiet, block_length=fold_block)
    fitted = outcome.spec
    scores = apply_workflow.heldout_scores(fitted, series, test, args.level) if test.any() else None
    after, coverage = (scores.rmse, scores.coverage) if scores is not None else (None, None)
    if after is not None:
        _say(args, f"Held-out RMSE of the fitted model:   {_format_errors(after)}")
        _say(args, f"Held-out RMSE, all columns in units of their sd: before {before['all']:.4g}, "
                   f"after {after['all']:.4g}")
        _say(args, _coverage_text(coverage))
    if outcome.history and not math.isfinite(outcome.history[-1]):
        raise FitError("the fit loss became non-finite.")
    warnings = []
    if after is not None and math.isfinite(before["all"]) and not after["all"] <= before["all"]:
        warnings.append(f"fitting made the held-out error worse (RMSE in sd units: start {before['all']:.4g}, "
                        f"fitted {after['all']:.4g}); the starting values predict the held-out cells better. "
                        "Check --steps, --learning-rate, --objective and the model; the fitted model was "
                        "written all the same.")
    for w in warnings:  # on stderr even with --quiet: it concerns the result, not progress
        print(f"kalmax: warning: {w}", file=sys.stderr, flush=True)
    fitted = fitted.replace(fit={
        "data": Path(args.data).name, "rows": int(len(series.t)), "objective": args.objective,
        "steps_run": outcome.steps_run, "best_step": outcome.best_step, "stop_reason": outcome.stop_reason,
        "final_loss": outcome.history[outcome.best_step] if outcome.history else None,
        "learning_rate": args.learning_rate, "optimizer": args.optimizer, "fixed": list(args.fix),
        "test_fraction": args.test_fraction, "seed": args.seed, "test_block": block if block is not None else "cells",
        **({"test_block_given": str(args.test_block)} if block is not None
           and not str(args.test_block).strip().isdigit() else {}),
        "heldout_rmse_before": before, "heldout_rmse_after": after, "heldout_coverage": coverage,
        "warnings": warnings,
        **({"components": args.components} if args.components is not None else {}),
    })
    natural_ses = None
    if args.objective == "likelihood" and outcome.steps_run > 0:
        natural_ses = _natural_standard_errors(fitted, fit_workflow.log_standard_errors(
            fitted, series, train, fixed=tuple(args.fix)))
        fitted = fitted.replace(fit={**fitted.fit, "standard_errors": natural_ses})
    smoothing = apply_workflow.smooth_series(fitted, out_series, robust=_robust(args, fitted))
    names, cols = _table_for(args, fitted, out_natural, smoothing, test if test.any() else None)
    summary = ""
    if after is not None:
        summary = (f"held-out RMSE (sd units): start {before['all']:.3g} -> fitted {after['all']:.3g}; "
                   f"objective {args.objective}, {outcome.steps_run} steps")
        if warnings:
            summary += "; WARNING: the fit made the held-out error worse"
    with AtomicOutputs() as out:
        tables.write_table(table_path, names, cols, out)
        model_file.save_model(model_path, fitted, out)
        if report_path is not None:
            write_report(out.temp_for(report_path), fitted, out_series, smoothing, level=args.level,
                         test_mask=test if test.any() else None, history=outcome.history,
                         loss_label=("−log-likelihood per cell" if args.objective == "likelihood"
                                     else "CV squared error (sd units)"),
                         title=f"kalmax fit: {fitted.label} on {Path(args.data).name}{_scale_note(fitted)}",
                         summary=summary)
    per = f" (rates per {fitted.time_unit})" if fitted.time_unit else ""
    _say(args, f"Fitted parameters{per}: {_parameter_text(fitted, natural_ses)}"
         + (" (± standard error)" if natural_ses else ""))
    _say(args, f"Wrote {table_path}, {model_path}" + (f", {report_path}" if report_path else ""))
    return EXIT_OK


def _read_groups(args, time_column, columns, *, time_format=None, time_unit=None, numeric_time_unit=None,
                 time_pattern=None, inputs=(), forbidden=()):
    """[(group value, series)] of DATA split by --group (see ``tools/groups.py``)."""
    from ._src.tools import groups, series, tables

    names, table = tables.read_table(args.data)
    split = groups.split_rows(names, table, args.group, str(args.data),
                              forbidden=[("--time", time_column)] + [("--measure", c) for c in columns]
                              + [("regression input", c) for c in inputs] + list(forbidden))
    groups.check_group_rows(split, args.group, str(args.data))
    if args.report_group is not None and args.report_group not in [v for v, _ in split]:
        raise UsageError(f"--report-group {args.report_group!r}: no such group in column {args.group!r} of "
                         f"{args.data}; the first groups are {', '.join(repr(v) for v, _ in split[:5])}.")
    out = []
    for value, rows in split:
        s = series.series_from_table(names, groups.sub_table(table, rows), time_column, columns,
                                     source=f"{args.data} (group {args.group}={value})", time_format=time_format,
                                     missing=args.missing, time_unit=time_unit, numeric_time_unit=numeric_time_unit,
                                     time_pattern=time_pattern, inputs=inputs)
        out.append((value, s))
    kinds = {s.time_format for _, s in out}
    if len(kinds) > 1:
        raise DataError(f"{args.data}: some groups of {args.group!r} have numeric times and others date-times; "
                        "one table needs one kind of time.")
    return out


def _grouped_table(args, specs, values, naturals, smoothings, tests):
    """(names, columns) of the result table of every group, the group column first."""
    from ._src.tools import apply_workflow

    names, cols = None, None
    for spec, value, natural, sm, test in zip(specs, values, naturals, smoothings, tests):
        n, c = apply_workflow.output_table(spec, natural, sm, level=args.level, with_states=args.with_states,
                                           test_mask=test)
        if args.group in n:
            raise DataError(f"the output column names collide: --group {args.group!r} is also an output column.")
        if names is None:
            names, cols = [args.group] + n, {args.group: [], **{k: [] for k in n}}
        cols[args.group].extend([value] * len(natural.times_raw))
        for k in n:
            cols[k].extend(c[k])
    return names, cols


def _fit_groups(args, forecast_steps, table_path, report_path, model_path) -> int:
    """``kalmax fit --group COL``: the groups of DATA fitted in one batched run (``tools/groups.py``)."""
    import numpy as np

    from ._src import splits
    from ._src.tools import composed, groups, horizon, model_file, starting_values, tables
    from ._src.tools import apply_workflow
    from ._src.tools.report import write_report
    from ._src.tools.settings import apply_settings, parse_measures
    from ._src.tools.spec import KINDS, check_columns

    for opt, given in (("--start", args.start), ("--future-inputs", args.future_inputs)):
        if given is not None:
            raise UsageError(f"{opt} does not go with --group: fit the groups from their own starting values, "
                             "or fit each group's rows alone.")
    if args.objective != "likelihood":
        raise UsageError("--objective holdout does not go with --group; the groups are fitted by likelihood.")
    inputs, drafts = (), None
    if args.components is not None:
        if args.model is not None:
            raise UsageError("--components gives the model, and so does --model; drop one of them.")
        missing = [o for o, v in (("--time", args.time), ("--measure", args.measure)) if not v]
        if missing:
            raise UsageError(f"fit needs {', '.join(missing)}.")
        drafts = composed.parse_components(args.components)
        cols, reads = composed.parse_reads(args.measure, [d.name for d in drafts])
        inputs = composed.input_columns(drafts)
    else:
        cols, states, dims = _kind_and_measures(args, "or --components TEXT")
    try:
        check_columns(args.time, cols)
    except ValueError as e:
        raise UsageError(f"--measure: {e}") from None
    read = _read_groups(args, args.time, cols, time_unit=args.time_unit, numeric_time_unit=args.numeric_time_unit,
                        time_pattern=_time_pattern(args), inputs=inputs)
    values = [v for v, _ in read]
    naturals, series_list, specs = [], [], []
    for value, natural in read:
        chosen, s = _transformed(args, natural, cols)
        try:
            spec = (starting_values.composed_spec(drafts, args.time, cols, reads, s) if drafts is not None
                    else starting_values.default_spec(args.model, dims, args.time, cols, states, s))
        except ValueError as e:
            raise UsageError(f"--components (group {args.group}={value}): {e}") from None
        spec = spec.replace(transforms=chosen, time_unit=s.unit, time_pattern=s.clock.pattern,
                            numeric_time_unit=args.numeric_time_unit if s.time_format == "number" else None)
        specs.append(apply_settings(spec, args.set))
        naturals.append(natural)
        series_list.append(s)
    allowed = specs[0].free_names()
    bad = [f for f in args.fix if f not in allowed]
    if bad:
        raise UsageError(f"--fix {bad[0]}: unknown parameter; this model has {', '.join(sorted(allowed))}.")
    tests, trains, blocks = [], [], []
    for value, s in zip(values, series_list):
        block = _test_block(args, s)  # a duration: rows at each group's own typical step
        blocks.append(block)
        mask = s.mask
        if args.test_fraction > 0:
            test = np.asarray(splits.holdout_entries(mask, args.test_fraction, args.seed) if block is None
                              else splits.holdout_blocks(mask, block, args.test_fraction, args.seed))
        else:
            test = np.zeros_like(mask)
        train = mask & ~test
        empty = [c for j, c in enumerate(cols) if not train[:, j].any()]
        if empty:
            raise DataError(f"{args.data}: group {args.group}={value!r} (--group) has no training observation of "
                            f"{', '.join(empty)} after holding out test cells; lower --test-fraction, or drop "
                            "that group.")
        tests.append(test)
        trains.append(train)
    rows = sum(len(s.t) for s in series_list)
    _say(args, f"Read {args.data}: {rows} rows in {len(values)} groups of {args.group!r} "
               f"({min(len(s.t) for s in series_list)} to {max(len(s.t) for s in series_list)} rows each).")
    have_test = any(t.any() for t in tests)

    def pooled(errors_list):
        """Held-out RMSE in sd units over every group's held-out cells."""
        n = [int(t.sum()) for t in tests]
        total = sum(k for k, e in zip(n, errors_list) if k and math.isfinite(e["all"]))
        ss = sum(k * e["all"] ** 2 for k, e in zip(n, errors_list) if k and math.isfinite(e["all"]))
        return math.sqrt(ss / total) if total else math.nan

    before = [apply_workflow.heldout_rmse(sp, s, t) for sp, s, t in zip(specs, series_list, tests)] \
        if have_test else None
    _say(args, f"Fitting {specs[0].label} to {len(values)} groups ({args.group_fit} parameters, {args.steps} "
               "steps) ...")
    batch = groups.pad_groups(series_list, trains)
    fitted, history, result, ses = groups.fit_groups(
        specs, batch, mode=args.group_fit, steps=args.steps, learning_rate=args.learning_rate,
        fixed=tuple(args.fix), progress=not args.quiet, standard_errors=True)
    scores = [apply_workflow.heldout_scores(sp, s, t, args.level) for sp, s, t in zip(fitted, series_list, tests)] \
        if have_test else None
    after = None if scores is None else [sc.rmse for sc in scores]
    coverage = None if scores is None else _pooled_coverage([sc.coverage for sc in scores])
    warnings = []
    if have_test:
        b, a = pooled(before), pooled(after)
        _say(args, f"Held-out RMSE over all groups, in units of each column's sd: before {b:.4g}, after {a:.4g}")
        _say(args, _coverage_text(coverage))
        if math.isfinite(b) and not a <= b:
            warnings.append(f"fitting made the held-out error worse (RMSE in sd units over all groups: start "
                            f"{b:.4g}, fitted {a:.4g}). Check --steps, --learning-rate and the model; the fitted "
                            "model was written all the same.")
    for w in warnings:
        print(f"kalmax: warning: {w}", file=sys.stderr, flush=True)
    out_naturals, out_series = [], []
    for natural, s, spec in zip(naturals, series_list, fitted):
        ext = natural if forecast_steps is None else horizon.extend(natural, forecast_steps, args.forecast_step)
        out_naturals.append(ext)
        out_series.append(ext._replace(y=np.concatenate([s.y, ext.y[len(s.y):]])))
    if forecast_steps is not None:
        _say(args, f"Forecast: {forecast_steps} rows after the last time of each group.")
    smoothings = groups.smooth_groups(fitted, out_series)
    finite = [se if all(np.all(np.isfinite(v)) for v in se.values()) else None for se in ses]
    natural_ses = [_natural_standard_errors(f, se) for f, se in zip(fitted, finite)]
    record = {
        "data": Path(args.data).name, "rows": rows, "objective": "likelihood", "group_column": args.group,
        "group_fit": args.group_fit, "groups": len(values), "steps_run": int(result.steps_run),
        "best_step": int(result.best_step), "stop_reason": str(result.stop_reason),
        "final_loss": history[result.best_step] if history else None, "learning_rate": args.learning_rate,
        "fixed": list(args.fix), "test_fraction": args.test_fraction, "seed": args.seed,
        "test_block": (str(args.test_block) if not str(args.test_block).strip().isdigit() else blocks[0])
        if blocks[0] is not None else "cells",
        "heldout_rmse_before": None if before is None else dict(zip(values, before)),
        "heldout_rmse_after": None if after is None else dict(zip(values, after)),
        "heldout_coverage": coverage, "warnings": warnings,
        **({"components": args.components} if args.components is not None else {}),
    }
    if args.group_fit == "separate":
        record["standard_errors"] = {v: se for v, se in zip(values, natural_ses)}
        saved = fitted[0].replace(fit=record, group_column=args.group, groups=tuple(
            (v, dict(f.params), tuple(f.noise)) for v, f in zip(values, fitted)))
    else:
        record["standard_errors"] = natural_ses[0]
        saved = fitted[0].replace(fit=record)
    names, table = _grouped_table(args, fitted, values, out_naturals, smoothings, tests)
    shown = values.index(args.report_group) if args.report_group is not None else 0
    with AtomicOutputs() as out:
        tables.write_table(table_path, names, table, out)
        model_file.save_model(model_path, saved, out)
        if report_path is not None:
            g = shown
            write_report(out.temp_for(report_path), fitted[g], out_series[g], smoothings[g], level=args.level,
                         test_mask=tests[g] if tests[g].any() else None, history=history,
                         loss_label="−log-likelihood per cell" + (", summed over groups"
                                                                   if args.group_fit == "separate" else ""),
                         title=f"kalmax fit: {fitted[g].label} on {Path(args.data).name}, group "
                               f"{args.group}={values[g]} ({g + 1} of {len(values)}){_scale_note(fitted[g])}")
    per = f" (rates per {fitted[0].time_unit})" if fitted[0].time_unit else ""
    if args.group_fit == "shared":
        _say(args, f"Fitted parameters, shared by all groups{per}: {_parameter_text(fitted[0], natural_ses[0])}")
    else:
        for v, f, se in list(zip(values, fitted, natural_ses))[:10]:
            _say(args, f"Fitted parameters of {args.group}={v}{per}: {_parameter_text(f, se)}")
        if len(values) > 10:
            _say(args, f"... and {len(values) - 10} more groups (all in {model_path}).")
    _say(args, f"Wrote {table_path}, {model_path}" + (f", {report_path}" if report_path else ""))
    return EXIT_OK


def _natural_standard_errors(spec, se_log):
    """Standard errors of the fitted parameters in their natural units, by the delta method.

    The fit works in log-parameters θ = log v (a regression coefficient as it
    is), and ``se_log`` holds the standard errors of θ from the observed
    information (``kx.standard_errors``). For v = exp(θ), dv/dθ = v, so to
    first order SE(v) ≈ v · SE(θ) (the delta method: Casella & Berger,
    Statistical Inference, 2nd ed., §5.5.4). For a small SE(θ) this is the
    half-width of the log-scale interval mapped back, divided by z; for
    SE(θ) ≳ 0.5 the log-scale interval exp(θ ± z SE(θ)) is the better summary
    (asymmetric). None when the information is not positive definite.
    """
    import numpy as np

    if se_log is None:
        return None
    out = {}
    for name, s in se_log.items():
        s = np.asarray(s, dtype=np.float64)
        value = np.asarray(spec.noise if name == "noise" else spec.params[name], dtype=np.float64)
        nat = value * s if spec.is_positive(name) else s
        out[name] = [float(x) for x in nat] if nat.ndim else float(nat)
    return out


def _parameter_text(spec, ses=None) -> str:
    """``name=value ± SE`` for every parameter, then the noise sds (each column's)."""
    def fmt(v, e=None):
        if isinstance(v, (list, tuple)):
            es = e if isinstance(e, (list, tuple)) else [None] * len(v)
            return "[" + ", ".join(fmt(x, y) for x, y in zip(v, es)) + "]"
        if e is None or not math.isfinite(e):
            return f"{v:.4g}"
        return f"{v:.4g} ± {e:.2g}"

    ses = ses or {}
    text = ", ".join(f"{k}={fmt(v, ses.get(k))}" for k, v in spec.params.items())
    noise_se = ses.get("noise")
    parts = []
    for j, (c, r) in enumerate(zip(spec.columns, spec.noise)):
        sd = math.sqrt(r)
        # sd = sqrt(r): d sd / d r = 1 / (2 sd), so SE(sd) ≈ SE(r) / (2 sd) (delta method).
        e = None if noise_se is None else noise_se[j] / (2 * sd)
        parts.append(f"{c} {fmt(sd, e)}")
    return text + "; noise sd " + ", ".join(parts)


def _scale_note(spec) -> str:
    """A report title's note of the columns drawn on a transformed scale (empty without transforms)."""
    if not spec.transforms:
        return ""
    return " (modelled as " + ", ".join(f"{n}({c})" for c, n in spec.transforms) + ", drawn back-transformed)"


def _robust(args, spec):
    """The parsed --robust options for the model's columns (None without them)."""
    from ._src.tools import robust_columns

    return robust_columns.parse(args.robust, spec.columns)


def _no_robust_with_groups(args):
    if args.robust:
        raise UsageError("--robust is not available with --group (or a model fitted per group); smooth one "
                         "group at a time.")


def cmd_apply(args) -> int:
    import numpy as np

    from ._src.tools import apply_workflow, model_file, tables
    from ._src.tools.report import write_report

    from ._src.tools import horizon

    _check_level(args)
    forecast_steps = _check_forecast(args)
    table_path, report_path, _ = _outputs(args, model_file=False, inputs=[
        ("DATA", args.data), ("MODEL.json", args.model_file), ("--future-inputs", args.future_inputs)])
    spec = model_file.load_model(args.model_file)
    if spec.groups and args.group is not None and args.group != spec.group_column:
        raise UsageError(f"--group {args.group}: the model file was fitted per group of {spec.group_column!r}; "
                         "drop --group (the model file names its group column) or give that column.")
    if spec.groups or args.group is not None:
        _no_robust_with_groups(args)
        return _apply_groups(args, spec, forecast_steps, table_path, report_path)
    _robust(args, spec)  # option errors before any reading
    if args.report_group is not None:
        raise UsageError("--report-group needs --group COL (or a model file fitted per group).")
    _check_future_inputs(args, spec)
    if horizon.step_needs_unit(args.forecast_step, spec.time_format, spec.time_unit):
        raise ModelFileError(f"{args.model_file}: the model names no time unit (numeric times fitted without "
                             f"--time-unit, or a format version 1 file), so --forecast-step {args.forecast_step} "
                             "cannot be converted to the time column's units; give the step as a plain number in "
                             "those units, or refit with --time-unit.")
    series = _read(args, spec.time_column, spec.columns, spec.time_format, time_unit=spec.time_unit,
                   numeric_time_unit=spec.numeric_time_unit, time_pattern=_time_pattern(args, spec.time_pattern),
                   inputs=spec.input_columns())
    _say(args, f"Read {args.data}: {len(series.t)} rows, {int(series.mask.sum())} observed cells.")
    _, transformed = _transformed(args, series, spec.columns, spec.transforms)
    natural = _with_forecast(args, series, forecast_steps, spec)
    series = natural._replace(y=np.concatenate([transformed.y, natural.y[len(transformed.y):]]))
    smoothing = apply_workflow.smooth_series(spec, series, robust=_robust(args, spec))
    names, cols = _table_for(args, spec, natural, smoothing)
    with AtomicOutputs() as out:
        tables.write_table(table_path, names, cols, out)
        if report_path is not None:
            write_report(out.temp_for(report_path), spec, series, smoothing, level=args.level,
                         title=f"kalmax apply: {spec.label} model {Path(args.model_file).name} on "
                               f"{Path(args.data).name}{_scale_note(spec)}")
    _say(args, f"Wrote {table_path}" + (f", {report_path}" if report_path else ""))
    return EXIT_OK


def _apply_groups(args, spec, forecast_steps, table_path, report_path) -> int:
    """``kalmax apply`` on a table of groups: each group with its own parameters (a model fitted per group)
    or all with the one model."""
    import numpy as np

    from ._src.tools import groups, horizon, tables
    from ._src.tools.report import write_report

    column = spec.group_column or args.group
    if args.future_inputs is not None:
        raise UsageError("--future-inputs does not go with groups; add the future rows to DATA instead.")
    _check_future_inputs(args, spec)
    if horizon.step_needs_unit(args.forecast_step, spec.time_format, spec.time_unit):
        raise ModelFileError(f"{args.model_file}: the model names no time unit, so --forecast-step "
                             f"{args.forecast_step} cannot be converted; give the step as a plain number.")
    args.group = column
    read = _read_groups(args, spec.time_column, spec.columns, time_format=spec.time_format,
                        time_unit=spec.time_unit, numeric_time_unit=spec.numeric_time_unit,
                        time_pattern=_time_pattern(args, spec.time_pattern), inputs=spec.input_columns())
    values = [v for v, _ in read]
    if spec.groups:
        unknown = [v for v in values if v not in spec.group_values()]
        if unknown:
            raise DataError(f"{args.data}: group {column}={unknown[0]!r} is not one of the model file's groups "
                            f"({', '.join(repr(v) for v in spec.group_values()[:10])}"
                            f"{', ...' if len(spec.groups) > 10 else ''}); a model fitted per group has no "
                            "parameters for it. Fit it, or fit with --group-fit shared.")
        specs = [spec.for_group(v) for v in values]
    else:
        specs = [spec] * len(values)
    naturals, out_series = [], []
    for (value, natural), sp in zip(read, specs):
        _, transformed = _transformed(args, natural, sp.columns, sp.transforms)
        ext = natural if forecast_steps is None else horizon.extend(natural, forecast_steps, args.forecast_step)
        naturals.append(ext)
        out_series.append(ext._replace(y=np.concatenate([transformed.y, ext.y[len(transformed.y):]])))
    _say(args, f"Read {args.data}: {sum(len(s.t) for _, s in read)} rows in {len(values)} groups of {column!r}.")
    smoothings = groups.smooth_groups(specs, out_series)
    names, table = _grouped_table(args, specs, values, naturals, smoothings, [None] * len(values))
    g = values.index(args.report_group) if args.report_group is not None else 0
    with AtomicOutputs() as out:
        tables.write_table(table_path, names, table, out)
        if report_path is not None:
            write_report(out.temp_for(report_path), specs[g], out_series[g], smoothings[g], level=args.level,
                         title=f"kalmax apply: {spec.label} model {Path(args.model_file).name} on "
                               f"{Path(args.data).name}, group {column}={values[g]} ({g + 1} of {len(values)})"
                               f"{_scale_note(spec)}")
    _say(args, f"Wrote {table_path}" + (f", {report_path}" if report_path else ""))
    return EXIT_OK


def compilation_cache_dir() -> Optional[str]:
    """Where compiled programs are kept between runs (None: switched off by KALMAX_COMPILE_CACHE=0).

    KALMAX_CACHE_DIR, else $XDG_CACHE_HOME/kalmax/xla, else ~/.cache/kalmax/xla.
    """
    if os.environ.get("KALMAX_COMPILE_CACHE", "1").strip().lower() in ("0", "no", "off", "false"):
        return None
    if os.environ.get("KALMAX_CACHE_DIR"):
        return os.environ["KALMAX_CACHE_DIR"]
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "kalmax", "xla")


def _use_compilation_cache(jax) -> None:
    # Every run compiles the same programs for the same shapes: keeping them
    # on disk makes a second run on same-shaped data start in seconds. A cache
    # that cannot be created is not an error: the run compiles as usual.
    path = compilation_cache_dir()
    if path is None:
        return
    try:
        os.makedirs(path, exist_ok=True)
        jax.config.update("jax_compilation_cache_dir", path)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.5)
    except Exception:  # noqa: BLE001  (an unwritable home, an old jax): run without the cache
        pass


def main(argv: Optional[List[str]] = None) -> int:
    """Entry point of the ``kalmax`` command; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)  # exits with code 2 on a bad command line
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    if args.command == "models":
        return cmd_models(args)
    # SIGTERM unwinds like Ctrl-C: temporary outputs are removed, then exit 143 (130 for Ctrl-C).
    with signals.raise_on_stop_signals():
        return _run(parser, args)


def _run(parser, args) -> int:
    try:
        import jax

        # Timestamps and variances span many orders of magnitude: the command line works in float64.
        jax.config.update("jax_enable_x64", True)
        _use_compilation_cache(jax)
        return cmd_fit(args) if args.command == "fit" else cmd_apply(args)
    except UsageError as e:
        parser.exit(EXIT_USAGE, f"kalmax {args.command}: error: {e}\n")
    except DataError as e:
        print(f"kalmax: data error: {e}", file=sys.stderr)
        return EXIT_DATA
    except ModelFileError as e:
        print(f"kalmax: model file error: {e}", file=sys.stderr)
        return EXIT_MODEL_FILE
    except FitError as e:
        print(f"kalmax: fit failed: {e}", file=sys.stderr)
        return EXIT_FIT
    except KeyboardInterrupt as e:  # Ctrl-C, or signals.Interrupted for SIGINT / SIGTERM
        terminated = isinstance(e, signals.Interrupted) and e.name == "SIGTERM"
        what = "terminated (SIGTERM)" if terminated else "interrupted"
        if isinstance(e, signals.Interrupted) and e.after_commit:
            print(f"kalmax: {what} after every output file was written.", file=sys.stderr)
        else:
            print(f"kalmax: {what}; no output file was created or changed.", file=sys.stderr)
        return EXIT_TERMINATED if terminated else EXIT_INTERRUPTED
    except Exception as e:  # the last resort: report, do not dump a traceback on a newcomer
        if args.debug:
            traceback.print_exc()
        print(f"kalmax: internal error: {type(e).__name__}: {e}\n"
              "This is a bug in kalmax; rerun with --debug and report the traceback.", file=sys.stderr)
        return EXIT_INTERNAL
    return EXIT_OK
