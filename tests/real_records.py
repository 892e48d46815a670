r"""Gap filling on public weather records: the composed model against two simple baselines.

Shared by ``tests/test_real_records.py`` (the check) and
``benchmarks/real_records.py`` (the table in ``benchmarks/RESULTS.md``).

Data: the CSV files shipped inside the ``vega_datasets`` package (MIT
licence; read from the installed package, no network). Its own
``dataset_info.json`` describes both records used here as "drawn from
public-domain NOAA data":

- ``seattle-temps.csv``: hourly temperature (°F) in Seattle, 2010, 8,759
  rows (the stamp 03:00 on 14 March, the night the clocks went forward, is
  missing; it stays a missing cell on the hourly grid and is never scored).
  The curves are very smooth from day to day (the change between one hour and the same hour a day
  later has a standard deviation of 0.2 °F against 1.2 °F from one hour to
  the next), which suggests smoothed climatological values rather than raw
  readings; the package does not say.
- ``sf-temps.csv`` (the benchmark only): the same for San Francisco, with
  the same missing stamp.
- ``seattle-weather.csv``: daily maximum temperature (°C) in Seattle,
  2012-2015, 1,461 days: ordinary weather, with spells of a few days.

The check. Time is cut into gaps of realistic length (6-24 h for the hourly
record, 3-10 days for the daily one) separated by short visible stretches,
and the gaps are dealt at random into folds. For each fold: its gaps are
hidden, the model's parameters are fitted by maximum likelihood on what is
left (the hidden values never enter the fit), the smoother predicts the
hidden cells, and three predictions are scored on them:

- the model: the smoothed measurement, with the 95 % interval
  ±1.96 √(measurement variance + r) (r: the fitted measurement noise, since a
  hidden cell is a noisy reading too);
- linear interpolation across the gap between its two visible ends;
- a seasonal copy: the value one period earlier (24 h, or 365 days), or
  when that is hidden too, one period later, two periods earlier, ... (the
  nearest visible one), else linear interpolation.

Models (chosen by hand while the check was written, looking at likelihoods and at the
errors and coverage of earlier trial gap layouts of the same records; then fixed, not
tuned on the folds scored here):

- hourly: a local linear trend plus a daily seasonal of 6 harmonics whose
  pattern changes smoothly (``order=2``: the harmonics' coefficients are an
  integrated random walk). With ``order=1`` (a random walk) the whole year's
  log-likelihood is ~630 lower and the intervals in the gaps are too wide
  (coverage 0.97-0.98). Compare such likelihoods on the whole record: every
  fresh start of a flat prior (each fit window) costs the 26-state model
  ~100 nats against ~25 for the 14-state one, so a sum over short windows
  ranks the two the other way round. More harmonics fit better still (8:
  higher likelihood, smaller error) but their intervals come out too narrow
  (coverage ~0.92-0.93): the pattern changes within a gap less smoothly than
  the integrated random walk says, most around sunrise and sunset.
  ``benchmarks/real_records.py`` prints these variants too;
- daily: a level, a yearly seasonal of 2 harmonics and a noise-driven damped
  oscillator for the weather's spells of a few days.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Callable, Dict, List, Optional, Sequence, Tuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

import kalmax as kx

SOURCE = ("vega_datasets 0.9 (PyPI, MIT licence), files seattle-temps.csv, sf-temps.csv and seattle-weather.csv; "
          "the package describes them as drawn from public-domain NOAA data")


def available() -> bool:
    try:
        import vega_datasets  # noqa: F401
    except ImportError:
        return False
    return True


def _local(name):
    from vega_datasets import local_data

    if name not in local_data.list_datasets():
        raise RuntimeError(f"vega_datasets does not ship {name!r} locally")
    return local_data(name)


def load_hourly(name: str = "seattle-temps") -> np.ndarray:
    """The hourly record on a regular grid of hours from its first stamp; NaN where an hour is missing."""
    df = _local(name)
    stamps = df["date"].to_numpy().astype("datetime64[s]").astype(np.int64)
    hours = (stamps - stamps[0]) // 3600
    if np.any(np.diff(hours) <= 0) or np.any((stamps - stamps[0]) % 3600):
        raise RuntimeError(f"{name}: stamps are not whole, increasing hours")
    y = np.full(int(hours[-1]) + 1, np.nan)
    y[hours] = df["temp"].to_numpy(float)
    return y


def load_daily(column: str = "temp_max") -> np.ndarray:
    """A column of the daily Seattle record on a regular grid of days; NaN where a day is missing."""
    df = _local("seattle-weather")
    days = df["date"].to_numpy().astype("datetime64[D]").astype(np.int64)
    days = days - days[0]
    y = np.full(int(days[-1]) + 1, np.nan)
    y[days] = df[column].to_numpy(float)
    return y


def gap_folds(T: int, seed: int, gap: Tuple[int, int], spacing: Tuple[int, int], folds: int) -> np.ndarray:
    """(folds, T) bool: gaps of ``gap`` steps (inclusive range) separated by ``spacing`` visible steps,
    dealt at random into ``folds`` folds. The record starts and ends with a visible stretch."""
    rng = np.random.default_rng(seed)
    out = np.zeros((folds, T), bool)
    t = int(rng.integers(spacing[0], spacing[1] + 1))
    while True:
        L = int(rng.integers(gap[0], gap[1] + 1))
        if t + L + spacing[0] > T:
            break
        out[int(rng.integers(folds)), t:t + L] = True
        t += L + int(rng.integers(spacing[0], spacing[1] + 1))
    return out


def linear_interpolation(y_visible: np.ndarray) -> np.ndarray:
    """Straight line across every gap between its two visible ends."""
    t = np.arange(y_visible.size)
    vis = ~np.isnan(y_visible)
    return np.interp(t, t[vis], y_visible[vis])


def seasonal_copy(y_visible: np.ndarray, period: int) -> np.ndarray:
    """The value one period earlier; if hidden, the nearest visible of +1, -2, +2, ... periods; else interpolation."""
    T = y_visible.size
    out = y_visible.copy()
    fallback = linear_interpolation(y_visible)
    for i in np.flatnonzero(np.isnan(y_visible)):
        value = np.nan
        for k in range(1, T // period + 1):
            for j in (i - k * period, i + k * period):
                if 0 <= j < T and not np.isnan(y_visible[j]):
                    value = y_visible[j]
                    break
            if not np.isnan(value):
                break
        out[i] = fallback[i] if np.isnan(value) else value
    return out


# ----------------------------------------------------------------------------
# Models
# ----------------------------------------------------------------------------


def hourly_model(harmonics: int = 6, order: int = 2) -> kx.ComposedModel:
    return kx.compose_components(
        kx.trend_component("trend", q_level=1e-3, q_slope=1e-6),
        kx.seasonal_component("day", 24.0, harmonics, q=1e-4, order=order, q_rate=1e-8),
        r=0.01)


def daily_model() -> kx.ComposedModel:
    return kx.compose_components(
        kx.level_component("level", q=1e-3),
        kx.seasonal_component("year", 365.25, 2, q=1e-4),
        kx.oscillator_component("weather", period=20.0, damping=1.0, q=5.0),
        r=1.0)


class GridModel:
    r"""A composed model on a regular grid of unit steps, optionally with a noise variance that follows a cycle.

    A and Q are one matrix each for every step (``kx.discretize`` over Δ = 1).
    With ``noise_harmonics`` H > 0 the measurement noise variance at step t is

        r_t = r · exp(Σ_{j=1..H} a_j cos(2πjt/P) + b_j sin(2πjt/P)),   P = ``noise_period``,

    a time-varying R (T, 1, 1) of :class:`kx.StateSpace`: the composed model's
    own ``r`` is constant, and the hourly records' misfit is not (it is
    largest around sunrise and sunset, whose hour drifts through the year).
    The coefficients (a, b) are fitted with the rest, by likelihood. Used
    by a contrast row of the benchmark only.
    """

    def __init__(self, cm: kx.ComposedModel, noise_period: float = 24.0, noise_harmonics: int = 0):
        self.cm, self.noise_period, self.noise_harmonics = cm, float(noise_period), int(noise_harmonics)

    def init(self):
        u = {"cm": self.cm.to_unconstrained(self.cm.initial_params(jnp.float64))}
        if self.noise_harmonics:
            u["noise"] = jnp.zeros(2 * self.noise_harmonics)
        return u

    def noise_scale(self, u, start: int, length: int):
        """r_t / r for the steps start .. start + length - 1."""
        if not self.noise_harmonics:
            return jnp.ones(length)
        t = start + jnp.arange(length, dtype=jnp.float64)
        w = 2 * jnp.pi * jnp.arange(1, self.noise_harmonics + 1) / self.noise_period
        basis = jnp.concatenate([jnp.cos(t[:, None] * w), jnp.sin(t[:, None] * w)], axis=1)
        return jnp.exp(basis @ u["noise"])

    def state_space(self, u, start: int, length: int) -> kx.StateSpace:
        ct = self.cm.model(self.cm.from_unconstrained(u["cm"]))
        A, Q = kx.discretize(ct.drift, ct.diffusion, jnp.asarray(1.0, ct.drift.dtype))
        R = ct.R if not self.noise_harmonics else ct.R[None] * self.noise_scale(u, start, length)[:, None, None]
        return kx.StateSpace(A=A, C=ct.C, Q=Q, R=R)

    def natural(self, u) -> Dict[str, float]:
        out = {k: float(np.squeeze(v)) for k, v in self.cm.from_unconstrained(u["cm"]).items()}
        for i, v in enumerate(np.asarray(u.get("noise", []))):
            out[f"noise.{'ab'[i // self.noise_harmonics]}{i % self.noise_harmonics + 1}"] = float(v)
        return out


def on_grid(cm: kx.ComposedModel, params) -> kx.StateSpace:
    """The composed model (natural parameters) on a regular grid of unit steps, constant noise."""
    return GridModel(cm).state_space({"cm": cm.to_unconstrained(params)}, 0, 1)


@dataclasses.dataclass
class Record:
    name: str
    load: Callable[[], np.ndarray]
    model: Callable[[], kx.ComposedModel]
    period: int                      # steps per seasonal period (the seasonal copy's lag)
    gap: Tuple[int, int]             # gap lengths, steps
    spacing: Tuple[int, int]         # visible steps between gaps
    folds: int
    unit: str
    fit_windows: Optional[Sequence[Tuple[int, int]]] = None   # (start, length) in steps; None: the whole record
    steps: int = 40                  # L-BFGS iterations (the loss has settled to ~0.01 nats by then)
    noise_harmonics: int = 0         # harmonics of a noise variance following the period (GridModel)


HOURLY = Record(
    name="Seattle hourly temperature 2010 (°F), 6-24 h gaps",
    load=lambda: load_hourly("seattle-temps"), model=hourly_model, period=24,
    gap=(6, 24), spacing=(2, 12), folds=4, unit="°F",
    # four 3-week windows, one per season: the likelihood of the whole year costs ~4x more
    fit_windows=[(24 * d, 24 * 21) for d in (15, 105, 195, 285)], steps=25)

SF_HOURLY = dataclasses.replace(
    HOURLY, name="San Francisco hourly temperature 2010 (°F), 6-24 h gaps",
    load=lambda: load_hourly("sf-temps"))

DAILY = Record(
    name="Seattle daily maximum temperature 2012-2015 (°C), 3-10 day gaps",
    load=lambda: load_daily("temp_max"), model=daily_model, period=365,
    gap=(3, 10), spacing=(1, 5), folds=4, unit="°C")

RECORDS = {"hourly": HOURLY, "sf-hourly": SF_HOURLY, "daily": DAILY}


class Fitter:
    """Maximum likelihood for one GridModel: L-BFGS (Optax) on the log-parameters.

    The negative log-likelihood of the visible cells is summed over the
    windows (the whole record by default). The optimiser's step is compiled
    once and reused for every fold (the windows keep their shapes), which
    saves a few seconds of compilation per fold over calling ``kx.fit``
    afresh.
    """

    def __init__(self, model: GridModel, T: int, windows=None, steps: int = 40):
        self.model, self.steps = model, steps
        self.windows = [(0, T)] if windows is None else [(int(s), int(L)) for s, L in windows]
        opt = optax.lbfgs()

        def nll(u, pieces, count):
            return -sum(kx.log_likelihood(model.state_space(u, s, L), p)
                        for (s, L), p in zip(self.windows, pieces)) / count

        def step(u, state, pieces, count):
            loss, grad = jax.value_and_grad(nll)(u, pieces, count)
            updates, state = opt.update(grad, state, u, value=loss, grad=grad,
                                        value_fn=lambda v: nll(v, pieces, count))
            return optax.apply_updates(u, updates), state, loss

        self._opt, self._step = opt, jax.jit(step)

    def __call__(self, y_visible: np.ndarray):
        """Fitted (unconstrained) parameters and the history of the loss (per visible cell)."""
        pieces = [y_visible[s:s + L] for s, L in self.windows]
        count = jnp.asarray(float(sum(np.sum(~np.isnan(p)) for p in pieces)))
        pieces = tuple(jnp.asarray(p[:, None]) for p in pieces)
        u = self.model.init()
        # optax.lbfgs starts a few scalars of its state weakly typed, and the
        # step returns them strongly typed: without this cast the second call
        # sees new argument types and compiles the step a second time (~8 s
        # of the hourly record's fit).
        state = jax.tree.map(lambda a: jnp.asarray(a, a.dtype), self._opt.init(u))
        history = []
        for _ in range(self.steps):
            u, state, loss = self._step(u, state, pieces, count)
            history.append(float(loss))
            if not np.isfinite(history[-1]):
                raise FloatingPointError(f"the fit reached a non-finite loss after {len(history)} steps")
        return u, np.asarray(history)


@dataclasses.dataclass
class FoldResult:
    hidden: int
    sq_model: float
    sq_interp: float
    sq_copy: float
    covered: int
    fit_seconds: float
    params: Dict[str, float]
    loglik: float                    # log-likelihood of the record's visible cells at the fitted parameters


def run_fold(fitter: Fitter, period: int, y: np.ndarray, hidden: np.ndarray) -> FoldResult:
    """Hide the cells of ``hidden``, fit on the rest, and score the three predictions on the hidden cells."""
    hidden = hidden & ~np.isnan(y)
    y_vis = np.where(hidden, np.nan, y)
    t0 = time.perf_counter()
    u, _ = fitter(y_vis)
    fit_seconds = time.perf_counter() - t0
    model = fitter.model.state_space(u, 0, y.size)
    est = kx.smooth(model, jnp.asarray(y_vis[:, None]), covariances=True)
    mean = np.asarray(est.measurements[:, 0])
    R = np.broadcast_to(np.asarray(model.R), (y.size, 1, 1))
    var = np.asarray(est.measurement_cov[:, 0, 0]) + R[:, 0, 0]
    truth = y[hidden]
    err = mean[hidden] - truth
    covered = int(np.sum(np.abs(err) <= 1.96 * np.sqrt(var[hidden])))
    return FoldResult(
        hidden=int(hidden.sum()),
        sq_model=float(np.sum(err ** 2)),
        sq_interp=float(np.sum((linear_interpolation(y_vis)[hidden] - truth) ** 2)),
        sq_copy=float(np.sum((seasonal_copy(y_vis, period)[hidden] - truth) ** 2)),
        covered=covered, fit_seconds=fit_seconds, params=fitter.model.natural(u),
        loglik=float(kx.log_likelihood(model, jnp.asarray(y_vis[:, None]))))


def summarise(results: List[FoldResult]) -> Dict[str, float]:
    n = sum(r.hidden for r in results)
    return {
        "hidden": n,
        "rmse_model": float(np.sqrt(sum(r.sq_model for r in results) / n)),
        "rmse_interp": float(np.sqrt(sum(r.sq_interp for r in results) / n)),
        "rmse_copy": float(np.sqrt(sum(r.sq_copy for r in results) / n)),
        "coverage": sum(r.covered for r in results) / n,
        "fit_seconds": sum(r.fit_seconds for r in results) / len(results),
        "loglik": sum(r.loglik for r in results) / len(results),
    }


def run_record(record: Record, seeds: Sequence[int] = (0,), folds: Optional[Sequence[int]] = None, cm=None,
               noise_harmonics: Optional[int] = None):
    """Score the folds (all of them by default) of the gap layouts ``seeds`` of one record.

    Returns (per-fold results, pooled summary). ``cm`` and ``noise_harmonics``
    replace the record's.
    """
    y = record.load()
    H = record.noise_harmonics if noise_harmonics is None else noise_harmonics
    model = GridModel(record.model() if cm is None else cm, record.period, H)
    fitter = Fitter(model, y.size, record.fit_windows, record.steps)
    results = []
    for seed in seeds:
        masks = gap_folds(y.size, seed, record.gap, record.spacing, record.folds)
        for k in (range(record.folds) if folds is None else folds):
            results.append(run_fold(fitter, record.period, y, masks[k]))
    return results, summarise(results)
