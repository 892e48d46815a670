"""Gap filling on public weather records: the composed model against linear interpolation and a seasonal copy.

Usage::

    python benchmarks/real_records.py [--quick]

Needs ``vega_datasets`` (PyPI, MIT licence; its CSV files ship inside the
package, no network): ``seattle-temps.csv`` and ``sf-temps.csv`` (hourly
temperature, 2010) and ``seattle-weather.csv`` (daily maximum temperature,
2012-2015), which the package describes as drawn from public-domain NOAA data.
The protocol, models and baselines are in ``tests/real_records.py``: gaps of
6-24 h (hourly) or 3-10 days (daily) dealt into 4 folds; per fold the model is
fitted by maximum likelihood on the visible cells only (the hourly ones on four
3-week windows, one per season), the smoother predicts the hidden cells and
three predictions are scored there. Coverage: the fraction of hidden cells
inside the model's 95 % interval (measurement noise included). The
log-likelihood is that of the whole record's visible cells at the fitted
parameters (one flat-prior start), averaged over the folds: it compares the
models on the same data.

Rows: the models of the check (trend + 6-harmonic daily seasonal with a
smoothly changing pattern, ``order=2``; level + 2-harmonic yearly seasonal +
damped oscillator) and, for contrast on Seattle hourly: the random-walk
seasonal (``order=1``) of 6 and 4 harmonics, 8 harmonics of ``order=2``, and
the model of the check with a measurement-noise variance that follows the
day (2 harmonics of log r_t, fitted with the rest; ``rr.GridModel``). ``--quick`` scores 2 folds of
each hourly row and one daily layout.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests"))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

import real_records as rr  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    a = ap.parse_args(argv)
    if not rr.available():
        sys.exit("vega_datasets is not installed: pip install vega_datasets")
    hourly_folds = (0, 1) if a.quick else None
    rows = [
        ("Seattle hourly, 6-24 h gaps", "trend + day(6 harmonics, order 2)", rr.HOURLY, None, (0,), hourly_folds),
        ("San Francisco hourly, 6-24 h gaps", "trend + day(6 harmonics, order 2)", rr.SF_HOURLY, None, (0,),
         hourly_folds),
        ("Seattle daily max, 3-10 day gaps", "level + year(2) + oscillator", rr.DAILY, None,
         (0,) if a.quick else (0, 1, 2), None),
        ("Seattle hourly, 6-24 h gaps", "trend + day(6 harmonics, order 1)", rr.HOURLY,
         rr.hourly_model(6, order=1), (0,), hourly_folds),
        ("Seattle hourly, 6-24 h gaps", "trend + day(4 harmonics, order 1)", rr.HOURLY,
         rr.hourly_model(4, order=1), (0,), hourly_folds),
        ("Seattle hourly, 6-24 h gaps", "trend + day(8 harmonics, order 2)", rr.HOURLY,
         rr.hourly_model(8, order=2), (0,), hourly_folds),
        ("Seattle hourly, 6-24 h gaps", "trend + day(6 harmonics, order 2), noise variance with a daily cycle",
         rr.HOURLY, None, (0,), hourly_folds, 2),
    ]
    print(f"data: {rr.SOURCE}")
    print("| record | model | layouts × folds | hidden cells | RMSE model | RMSE linear interp. | "
          "RMSE seasonal copy | 95 % coverage | log-likelihood per fold | fit per fold (s) |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for record_name, model_name, record, cm, seeds, folds, *noise in rows:
        t0 = time.perf_counter()
        results, s = rr.run_record(record, seeds=seeds, folds=folds, cm=cm,
                                   noise_harmonics=noise[0] if noise else None)
        n_folds = len(results) // len(seeds)
        print(f"| {record_name} | {model_name} | {len(seeds)} × {n_folds} | {s['hidden']} | "
              f"{s['rmse_model']:.4g} | {s['rmse_interp']:.4g} | {s['rmse_copy']:.4g} | {s['coverage']:.3f} | "
              f"{s['loglik']:.0f} | {s['fit_seconds']:.1f} |", flush=True)
        per_fold = ", ".join(f"{r.covered / r.hidden:.3f}" for r in results)
        print(f"  coverage per fold: {per_fold}; wall {time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)


if __name__ == "__main__":
    main()
