r"""Composed models on the command line: the component kinds, the text that lists them, their checks.

``kalmax fit --components TEXT`` fits a sum of components
(:mod:`kalmax._src.components`) to a table. TEXT lists the components joined
by ``+``; each is a kind word, optional settings in parentheses, and an
optional name after ``as``:

    level + season(period=1 day, harmonics=3) as daily + cycle(period=11 year) + regression(heater, vent)

The kinds (:data:`PART_KINDS`):

- ``level``: a random walk (parameter ``NAME.q``).
- ``trend``: a level with a wandering slope (``NAME.q_level``, ``NAME.q_slope``).
- ``season(period=P, harmonics=K)``: a pattern repeating every P, in
  trigonometric form with K harmonics (default 1); P is fixed (``NAME.q``).
- ``cycle(period=P)``: a damped stochastic cycle; P is its starting period,
  fitted with the damping rate (``NAME.period``, ``NAME.damping``, ``NAME.q``).
- ``oscillation(period=P)``: a noise-driven damped oscillator, P its starting
  natural period, fitted with the damping ratio (same parameter names).
- ``regression(COL, ...)``: an offset X β on known input columns of the table
  (``NAME.beta``, one coefficient per column, any sign). The inputs are read,
  not measured: every row needs a value (a blank input cell is an error), and
  forecast rows need theirs too.

Periods are durations: a number and a time unit (``1 day``, ``24h``,
``11 year``; the units of :mod:`.time_units`), or a plain number in the
model's time unit. A name defaults to the kind word (``season``, then
``season2``, ... for repeats). Parameter names are ``NAME.PARAMETER`` as in
:func:`kalmax.compose_components`; on the command line the measurement noise
keeps its name ``noise``.

Which columns read which component: ``--measure COL`` reads every component,
``--measure COL=NAME+NAME`` only those named. Parsing errors are
:class:`UsageError` naming the option; the checks of a stored model
(:func:`check_parts`) raise ValueError.
"""

from __future__ import annotations

import dataclasses
import math
import re
from typing import Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import jax.numpy as jnp
import numpy as np

from .. import components as comp
from .errors import UsageError
from .time_units import UNITS, parse_duration

OPTION = "--components"
MAX_PARTS = 32
MAX_STATES = 128  # states of the whole composition (the solve costs O(T n³))
RESERVED = ("noise", comp.NOISE)  # the command line's and the library's names of the measurement noise
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


@dataclasses.dataclass(frozen=True)
class Part:
    """One component of a command-line model, bound to the columns of a table.

    kind: a key of :data:`PART_KINDS`; name: its name (parameters ``name.PARAMETER``);
    columns: the measured columns that read it; period and harmonics: a
    season's fixed period (in the model's time unit) and harmonics; inputs: a
    regression's input columns.
    """

    kind: str
    name: str
    columns: Tuple[str, ...] = ()
    period: Optional[float] = None
    harmonics: Optional[int] = None
    inputs: Tuple[str, ...] = ()


@dataclasses.dataclass(frozen=True)
class PartKind:
    """A component kind as the command line offers it."""

    word: str
    syntax: str
    summary: str
    settings: Tuple[str, ...]  # the NAME=VALUE settings it takes
    needs_period: bool
    variances: Tuple[str, ...]  # its parameters that are variances per unit time (scaled together)
    build: Callable[[Part], comp.Component]
    takes_columns: bool = False  # regression: positional input column names


PART_KINDS: Dict[str, PartKind] = {
    "level": PartKind("level", "level", "a level wandering as a random walk", (), False, ("q",),
                      lambda p: comp.level_component(p.name)),
    "trend": PartKind("trend", "trend", "a level with a wandering slope (local linear trend)", (), False,
                      ("q_level", "q_slope"), lambda p: comp.trend_component(p.name)),
    "season": PartKind("season", "season(period=P, harmonics=K)",
                       "a pattern repeating every P (fixed), K harmonics (default 1)", ("period", "harmonics"),
                       True, ("q",), lambda p: comp.seasonal_component(p.name, p.period, p.harmonics)),
    "cycle": PartKind("cycle", "cycle(period=P)", "a damped stochastic cycle; P starts the fitted period",
                      ("period",), True, ("q",), lambda p: comp.cycle_component(p.name)),
    "oscillation": PartKind("oscillation", "oscillation(period=P)",
                            "a noise-driven damped oscillator; P starts the fitted natural period", ("period",),
                            True, ("q",), lambda p: comp.oscillator_component(p.name)),
    "regression": PartKind("regression", "regression(COL, ...)",
                           "an offset X·beta on known input columns (not measured ones)", (),
                           False, (), lambda p: comp.regression_component(p.name, len(p.inputs)),
                           takes_columns=True),
}


def kinds_text(indent: str = "  ") -> str:
    """One line per component kind: its syntax and summary (for help texts)."""
    width = max(len(k.syntax) for k in PART_KINDS.values())
    return "\n".join(f"{indent}{k.syntax:<{width}}  {k.summary}" for k in PART_KINDS.values())


# ----------------------------------------------------------------------------
# The text of --components
# ----------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Draft:
    """A component as written, before it is bound to a table: the period is still (amount, unit)."""

    kind: str
    name: str
    text: str
    period: Optional[Tuple[object, Optional[str]]] = None
    harmonics: Optional[int] = None
    inputs: Tuple[str, ...] = ()


def _split(text: str, sep: str, what: str) -> List[str]:
    """``text`` split at ``sep`` outside parentheses and quotes."""
    pieces, depth, quote, start = [], 0, None, 0
    for i, ch in enumerate(text):
        if quote:
            quote = None if ch == quote else quote
        elif ch in "\"'":
            quote = ch
        elif ch == "(":
            depth += 1
        elif ch == ")":
            depth -= 1
            if depth < 0:
                raise UsageError(f"{what}: a ')' without its '('.")
        elif ch == sep and depth == 0:
            pieces.append(text[start:i])
            start = i + 1
    if quote:
        raise UsageError(f"{what}: a quote {quote} is not closed.")
    if depth:
        raise UsageError(f"{what}: a '(' is not closed.")
    pieces.append(text[start:])
    return pieces


_TERM = re.compile(r"^(?P<kind>[A-Za-z][A-Za-z0-9_-]*)\s*(?:\((?P<args>.*)\))?\s*(?:\bas\s+(?P<name>\S+))?$",
                   re.DOTALL)


def _unquote(value: str) -> str:
    v = value.strip()
    if len(v) >= 2 and v[0] == v[-1] and v[0] in "\"'":
        return v[1:-1]
    return v


def _draft(term: str, option: str) -> Draft:
    what = f"{option} {term!r}"
    m = _TERM.match(term)
    if not m:
        raise UsageError(f"{what}: write a component as KIND, KIND(SETTING=VALUE, ...) or KIND(...) as NAME, "
                         f"e.g. season(period=1 day, harmonics=2) as daily.")
    kind_word = m.group("kind")
    if kind_word not in PART_KINDS:
        raise UsageError(f"{what}: unknown component {kind_word!r}; the kinds are {', '.join(PART_KINDS)}.")
    kind = PART_KINDS[kind_word]
    name = m.group("name")
    if name is not None and (not _NAME.match(name) or name in RESERVED):
        raise UsageError(f"{what}: the name {name!r} must be letters, digits and _ (not starting with a digit), "
                         f"and not {' or '.join(RESERVED)}.")
    settings: Dict[str, str] = {}
    columns: List[str] = []
    args = m.group("args")
    if args is not None and args.strip():
        for item in _split(args, ",", what):
            key, sep, value = item.partition("=")
            if not sep:
                if not kind.takes_columns:
                    raise UsageError(f"{what}: {item.strip()!r} is not a setting; write NAME=VALUE "
                                     f"({', '.join(kind.settings) or 'this kind takes no settings'}).")
                col = _unquote(item)
                if not col:
                    raise UsageError(f"{what}: an empty input column name.")
                columns.append(col)
                continue
            key = key.strip()
            if kind.takes_columns or key not in kind.settings:
                allowed = ", ".join(kind.settings) if kind.settings else "none"
                raise UsageError(f"{what}: unknown setting {key!r} for {kind_word}; its settings: {allowed}"
                                 + (" (list the input columns, e.g. regression(heater, vent))"
                                    if kind.takes_columns else "") + ".")
            if key in settings:
                raise UsageError(f"{what}: setting {key!r} is given twice.")
            settings[key] = value.strip()
    period = None
    if kind.needs_period:
        if "period" not in settings:
            raise UsageError(f"{what}: {kind_word} needs a period, e.g. {kind_word}(period=1 day).")
        try:
            period = parse_duration(settings["period"], f"{option} {term!r}: period")
        except ValueError as e:
            raise UsageError(str(e)) from None
    harmonics = None
    if kind_word == "season":
        text = settings.get("harmonics", "1")
        if not re.fullmatch(r"\s*[0-9]+\s*", text) or int(text) < 1:
            raise UsageError(f"{what}: harmonics must be a positive whole number; got {text!r}.")
        harmonics = int(text)
    if kind.takes_columns:
        if not columns:
            raise UsageError(f"{what}: name the input column(s) of the regression, e.g. regression(heater).")
        if len(set(columns)) != len(columns):
            raise UsageError(f"{what}: an input column is listed twice.")
    return Draft(kind=kind_word, name=name or "", text=term, period=period, harmonics=harmonics,
                 inputs=tuple(columns))


def parse_components(text: str, option: str = OPTION) -> Tuple[Draft, ...]:
    """The components listed in ``text`` (UsageError naming ``option`` and the term at fault)."""
    if not isinstance(text, str) or not text.strip():
        raise UsageError(f"{option}: list the components, e.g. \"level + season(period=1 day)\"; the kinds are "
                         f"{', '.join(PART_KINDS)}.")
    terms = [t.strip() for t in _split(text, "+", f"{option} {text!r}")]
    if any(not t for t in terms):
        raise UsageError(f"{option} {text!r}: an empty component between '+' signs.")
    if len(terms) > MAX_PARTS:
        raise UsageError(f"{option}: at most {MAX_PARTS} components; got {len(terms)}.")
    drafts = [_draft(t, option) for t in terms]
    explicit = {d.name for d in drafts if d.name}
    if len(explicit) != sum(1 for d in drafts if d.name):
        raise UsageError(f"{option} {text!r}: two components share a name; give each its own with 'as NAME'.")
    seen: Dict[str, int] = {}
    named = []
    for d in drafts:
        if not d.name:
            seen[d.kind] = seen.get(d.kind, 0) + 1
            name = d.kind if seen[d.kind] == 1 else f"{d.kind}{seen[d.kind]}"
            if name in explicit:
                raise UsageError(f"{option} {d.text!r}: its default name {name!r} is taken; name it with 'as NAME'.")
            d = dataclasses.replace(d, name=name)
        named.append(d)
    if all(PART_KINDS[d.kind].takes_columns for d in named):
        raise UsageError(f"{option} {text!r}: a regression alone has no states; add a level, trend, season, "
                         "cycle or oscillation.")
    return tuple(named)


def parse_reads(items: Sequence[str], names: Sequence[str], option: str = "--measure"):
    """(columns, reads) from ``COL`` (reads every component) or ``COL=NAME+NAME`` items."""
    cols, reads = [], []
    for item in items:
        col, sep, which = item.partition("=")
        col = col.strip()
        if not col or (sep and not which.strip()):
            raise UsageError(f"{option} {item!r}: write COL, or COL=NAME+NAME to read only the components named.")
        chosen = tuple(names) if not sep else tuple(w.strip() for w in which.split("+"))
        unknown = [w for w in chosen if w not in names]
        if unknown:
            raise UsageError(f"{option} {item!r}: no component named {unknown[0]!r}; the components are "
                             f"{', '.join(names)}.")
        if len(set(chosen)) != len(chosen):
            raise UsageError(f"{option} {item!r}: a component is listed twice.")
        cols.append(col)
        reads.append(chosen)
    unread = [n for n in names if not any(n in r for r in reads)]
    if unread:
        raise UsageError(f"{option}: component {unread[0]!r} is read by no measured column; add it to a "
                         "COL=NAME+NAME item (a plain COL reads every component).")
    return cols, reads


def input_columns(parts) -> Tuple[str, ...]:
    """The regression input columns of ``parts`` (Drafts or Parts), each once, in order."""
    out: List[str] = []
    for p in parts:
        out.extend(c for c in p.inputs if c not in out)
    return tuple(out)


def bind(drafts: Sequence[Draft], columns: Sequence[str], reads, unit: Optional[str], step: float,
         option: str = OPTION) -> Tuple[Tuple[Part, ...], Dict[str, float]]:
    """(parts, periods): each draft as a :class:`Part` read by the columns that list it, and name → period
    in the model's time unit ``unit`` for every component with a period (a season's is fixed in its
    Part; a cycle's or oscillation's starts the fit).

    ``step``: the typical step of the data (model units); a season's K
    harmonics must stay below half the sampling rate, K < period / (2 step).
    """
    parts, periods = [], {}
    for d in drafts:
        if d.period is not None:
            amount, u = d.period
            if u is None:
                period = float(amount)
            elif unit is None:
                raise UsageError(f"{option} {d.text!r}: the period names the unit {u!r}, but the numeric time "
                                 "column has no named unit; give --time-unit (or --numeric-time-unit), or write the "
                                 "period as a plain number in the time column's units.")
            else:
                period = float(amount * UNITS[u] / UNITS[unit])
            if not (math.isfinite(period) and period > 0):
                raise UsageError(f"{option} {d.text!r}: the period is not a usable positive number in {unit}.")
            periods[d.name] = period
        if d.kind == "season" and d.harmonics >= periods[d.name] / (2.0 * step):
            period = periods[d.name]
            raise UsageError(
                f"{option} {d.text!r}: harmonics={d.harmonics} needs more than {2 * d.harmonics} samples per "
                f"period, but the typical step of the data is {step:.4g}{' ' + unit if unit else ''}, so a period "
                f"of {period:.4g}{' ' + unit if unit else ''} holds about {period / step:.3g}; lower harmonics to "
                "at most "
                f"{max(math.ceil(period / (2.0 * step)) - 1, 0)} (or use a longer period).")
        cols = tuple(c for c, r in zip(columns, reads) if d.name in r)
        parts.append(Part(kind=d.kind, name=d.name, columns=cols,
                          period=periods[d.name] if d.kind == "season" else None, harmonics=d.harmonics,
                          inputs=d.inputs))
    for col, names in zip(columns, reads):
        _check_separable([d for d in drafts if d.name in names], periods, col, option)
    return tuple(parts), periods


def _check_separable(drafts, periods, column, option) -> None:
    """UsageError when a column reads two components that the data can never tell apart (the smoother
    would return NaN): two levels (level or trend), or two seasons of one period."""
    levels = [d.name for d in drafts if d.kind in ("level", "trend")]
    seasons: Dict[float, List[str]] = {}
    for d in drafts:
        if d.kind == "season":
            seasons.setdefault(periods[d.name], []).append(d.name)
    same = levels if len(levels) > 1 else next((v for v in seasons.values() if len(v) > 1), None)
    if same:
        raise UsageError(f"{option}: column {column!r} reads {same[0]!r} and {same[1]!r}, which move alike, so no "
                         "data can tell them apart; keep one, or let each column read one (--measure COL=NAME+NAME).")


# ----------------------------------------------------------------------------
# A stored composition: checks and the model
# ----------------------------------------------------------------------------


def check_parts(parts, columns: Sequence[str], time_column: str) -> None:
    """Raise ValueError naming the first inconsistency of a composition bound to ``columns``."""
    if not isinstance(parts, tuple) or not 1 <= len(parts) <= MAX_PARTS:
        raise ValueError(f"a composed model needs 1 to {MAX_PARTS} components.")
    names = []
    for p in parts:
        if not isinstance(p, Part):
            raise ValueError(f"components must be Part objects; got {type(p).__name__}.")
        if p.kind not in PART_KINDS:
            raise ValueError(f"unknown component kind {p.kind!r}; the kinds are {', '.join(PART_KINDS)}.")
        if not isinstance(p.name, str) or not _NAME.match(p.name) or p.name in RESERVED:
            raise ValueError(f"component name {p.name!r} must be letters, digits and _ (not starting with a "
                             f"digit), and not {' or '.join(RESERVED)}.")
        names.append(p.name)
        if not (isinstance(p.columns, tuple) and p.columns and all(c in columns for c in p.columns)
                and len(set(p.columns)) == len(p.columns)):
            raise ValueError(f"component {p.name!r} must be read by one or more distinct measured columns "
                             f"({', '.join(columns)}); got {p.columns!r}.")
        if p.kind == "season":
            ok = (isinstance(p.period, float) and math.isfinite(p.period) and p.period > 0
                  and isinstance(p.harmonics, int) and not isinstance(p.harmonics, bool) and p.harmonics >= 1)
            if not ok:
                raise ValueError(f"season {p.name!r} needs a positive finite period and a positive whole number "
                                 f"of harmonics; got period {p.period!r}, harmonics {p.harmonics!r}.")
        elif p.period is not None or p.harmonics is not None:
            raise ValueError(f"component {p.name!r} ({p.kind}) takes no fixed period or harmonics.")
        if PART_KINDS[p.kind].takes_columns:
            ok = (isinstance(p.inputs, tuple) and p.inputs and len(set(p.inputs)) == len(p.inputs)
                  and all(isinstance(c, str) and c.strip() for c in p.inputs))
            if not ok:
                raise ValueError(f"regression {p.name!r} needs one or more distinct input column names; "
                                 f"got {p.inputs!r}.")
            clash = [c for c in p.inputs if c in columns or c == time_column]
            if clash:
                raise ValueError(f"regression {p.name!r} reads {clash[0]!r} as an input, but it is the time column "
                                 "or a measured column; inputs are known values, not measurements.")
        elif p.inputs:
            raise ValueError(f"component {p.name!r} ({p.kind}) reads no input columns.")
    if len(set(names)) != len(names):
        raise ValueError(f"component names must be distinct; got {names}.")
    # a season's 2K states are counted before anything of that size is built
    states = sum(2 * p.harmonics if p.kind == "season" else PART_KINDS[p.kind].build(p).state_size for p in parts)
    if states == 0:
        raise ValueError("a composed model needs a component with states (a regression alone has none).")
    if states > MAX_STATES:
        raise ValueError(f"the components have {states} states in all; at most {MAX_STATES}.")


def composition(parts, columns: Sequence[str], jitter: float = 0.0) -> comp.ComposedModel:
    """The :class:`ComposedModel` of ``parts`` read by ``columns`` (structure only; values come later)."""
    built = [PART_KINDS[p.kind].build(p) for p in parts]
    reads = {c: [p.name for p in parts if c in p.columns] for c in columns}
    return comp.compose_components(*built, columns=reads, jitter=jitter)


def reads_text(parts, column: str) -> str:
    """What ``column`` reads, as ``NAME+NAME`` (the composed model's entry of ``ModelSpec.measured``)."""
    return "+".join(p.name for p in parts if column in p.columns)


def regression_inputs(parts, inputs: Optional[Mapping], dtype=None) -> Dict[str, object]:
    """regression name → (T, k) inputs, stacked from ``inputs`` (column name → (T,) values)."""
    out = {}
    for p in parts:
        if not p.inputs:
            continue
        absent = [c for c in p.inputs if inputs is None or c not in inputs]
        if absent:
            raise ValueError(f"regression component {p.name!r} needs the values of input column(s) "
                             f"{', '.join(map(repr, absent))} at every timestamp.")
        cols = [inputs[c] for c in p.inputs]
        if all(isinstance(c, np.ndarray) for c in cols):
            X = np.stack(cols, axis=1)  # concrete: the component checks its values
        else:
            X = jnp.stack([jnp.asarray(c) for c in cols], axis=1)
        out[p.name] = X if dtype is None else X.astype(dtype)
    return out


def variance_names(parts) -> Tuple[str, ...]:
    """Full names of the parameters that are variances per unit time (the holdout calibration scales them)."""
    return tuple(f"{p.name}.{v}" for p in parts for v in PART_KINDS[p.kind].variances)
