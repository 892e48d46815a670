"""The versioned model file of the command line (JSON).

JSON is human-readable and runs no code on load (unlike pickle). The file
names its format and format version; readers refuse other versions rather
than guess, and cap the file size and the model sizes so that a hostile or
corrupt file cannot exhaust memory.

Format versions:

1. the first version. Its rates are per second for date-times and per unit
   of the numbers for numeric timestamps; it has no time-unit entries (a
   version-1 file that carries one is refused, since a reader of version 1
   would ignore it and use the wrong unit).
2. adds, in ``model``, ``time_unit`` (required: a unit name, or null for
   numbers in their own unnamed unit), ``numeric_time_unit`` and
   ``time_pattern`` (optional, null when absent).
3. adds composed models (``kalmax fit --components``): kind ``"composed"``
   with a ``components`` list, one object per component: ``name``, ``kind``
   (a component kind: level, trend, season, cycle, oscillation, regression),
   ``columns`` (the measured columns that read it), and for a season its
   fixed ``period`` (in ``time_unit``) and ``harmonics``, for a regression
   its ``inputs`` (the input columns of the table). Its ``parameters`` are
   named ``COMPONENT.PARAMETER`` (a regression's ``NAME.beta`` is a list, one
   coefficient per input, any sign); its measurement entries have no
   ``state``. The named kinds are written as in version 2 (no
   ``components`` entry).

4. adds, in ``model``, ``transforms``: an object column → transform name
   (``log``, ``log1p`` or ``logit``; ``kalmax fit --transform``), the
   columns that the model describes on that scale. Written only for a model
   with a transform; every other model is still written as version 3, so
   readers of version 3 keep reading it.

5. adds, in ``model``, ``groups`` (``kalmax fit --group COL``, fitted
   separately per group): ``{"column": COL, "members": [{"value": V,
   "parameters": {...}, "noise_variance": [...]}, ...]}``, each member's
   ``parameters`` in the form of ``model.parameters`` and one noise variance
   per measurement column. ``model.parameters`` and the measurements' noise
   variances then hold the first group's values. Written only for such a
   model; a model fitted with shared parameters over groups is an ordinary
   one-model file (the group column is recorded in ``fit``).

:func:`save_model` writes version 3, 4 for a model with a transform, 5 for a
model with per-group parameters;
version-1 and version-2 files still load, with the units above (:func:`spec_to_dict` can still write them, for
models they can hold).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from pathlib import Path

from .atomic_outputs import AtomicOutputs
from .errors import ModelFileError
from . import composed
from .spec import COMPOSED, KINDS, ModelSpec
from .time_units import MAX_PATTERN_CHARS, UNITS, unit_names

FORMAT_NAME = "kalmax-model"
FORMAT_VERSION = 3  # written for every model without a transform
TRANSFORM_VERSION = 4  # written for a model with a transform
GROUPS_VERSION = 5  # written for a model with per-group parameters
READABLE_VERSIONS = (1, 2, 3, 4, 5)
MAX_GROUPS = 10000
V2_ENTRIES = ("time_unit", "numeric_time_unit", "time_pattern")  # model entries new in version 2
V3_ENTRIES = ("components",)  # model entries new in version 3
V4_ENTRIES = ("transforms",)  # model entries new in version 4
PART_ENTRIES = ("name", "kind", "columns", "period", "harmonics", "inputs")
MAX_MODEL_FILE_BYTES = 1 << 20  # 1 MiB: a model file holds a few hundred numbers
MAX_DIMS = 16
MAX_COLUMNS = 256
MAX_NAME_CHARS = 200
MAX_MESSAGE_CHARS = 1000  # an error message quoting a huge value from the file is shortened to this


def _part_to_dict(p: composed.Part) -> dict:
    entry = {"name": p.name, "kind": p.kind, "columns": list(p.columns)}
    if p.kind == "season":
        entry.update(period=p.period, harmonics=p.harmonics)
    if p.inputs:
        entry["inputs"] = list(p.inputs)
    return entry


def spec_to_dict(spec: ModelSpec, version: int = None) -> dict:
    """The JSON document of a :class:`ModelSpec` (see :func:`save_model`) in format ``version``.

    Versions 1 and 2 are written for the models they can hold (ValueError
    otherwise): no composed model, and for version 1 only the time units it
    implies (seconds for date-times, none for numbers, no pattern).
    """
    from ..version import __version__

    if version is None:
        version = GROUPS_VERSION if spec.groups else TRANSFORM_VERSION if spec.transforms else FORMAT_VERSION
    if spec.groups and version < GROUPS_VERSION:
        raise ValueError(f"format version {version} cannot hold per-group parameters (version 5 and later).")
    if version not in READABLE_VERSIONS:
        raise ValueError(f"version must be one of {READABLE_VERSIONS}; got {version!r}.")
    if spec.transforms and version < 4:
        raise ValueError(f"format version {version} cannot hold a column transform (version 4 and later).")
    if spec.is_composed and version < 3:
        raise ValueError(f"format version {version} cannot hold a composed model (version 3 and later).")
    v1_units = dict(time_unit="s" if spec.time_format == "iso8601" else None, numeric_time_unit=None,
                    time_pattern=None)
    if version == 1 and any(getattr(spec, k) != v for k, v in v1_units.items()):
        raise ValueError("format version 1 has no time-unit entries: it holds only rates per second for "
                         "date-times and per unit of the numbers for numbers, without a time pattern.")
    params = {k: (list(v) if isinstance(v, (list, tuple)) else v) for k, v in spec.params.items()}
    measurements = [{"column": c, "state": s, "noise_variance": float(r)}
                    for c, s, r in zip(spec.columns, spec.measured, spec.noise)]
    if spec.is_composed:  # what each column reads is in the components' "columns"
        measurements = [{"column": c, "noise_variance": float(r)} for c, r in zip(spec.columns, spec.noise)]
    doc = {
        "format": FORMAT_NAME,
        "format_version": version,
        "written_by": f"kalmax {__version__}",
        "written_at": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "model": {
            "kind": spec.kind,
            "dims": spec.dims,
            "states": list(spec.state_names()),
            "time_column": spec.time_column,
            "time_format": spec.time_format,
            "time_unit": spec.time_unit,
            "numeric_time_unit": spec.numeric_time_unit,
            "time_pattern": spec.time_pattern,
            "jitter": spec.jitter,
            "parameters": params,
            "measurements": measurements,
        },
        "fit": dict(spec.fit) if spec.fit is not None else None,
        "notes": (
            "Continuous-time model: parameters are in the units of the measurement columns and per "
            "time_unit (null: per unit of the numbers in the time column); a column that measures a "
            "velocity or rate is in its units per time_unit too. Variances, not standard deviations."
        ),
    }
    if spec.is_composed:  # after "jitter", before the parameters that name them
        m = doc["model"]
        at = list(m).index("parameters")
        doc["model"] = dict(list(m.items())[:at] + [("components", [_part_to_dict(p) for p in spec.components])]
                            + list(m.items())[at:])
    if spec.transforms:
        doc["model"]["transforms"] = dict(spec.transforms)
    if spec.groups:
        doc["model"]["groups"] = {"column": spec.group_column, "members": [
            {"value": v, "parameters": {k: (list(x) if isinstance(x, (list, tuple)) else x) for k, x in p.items()},
             "noise_variance": [float(r) for r in noise]} for v, p, noise in spec.groups]}
    if version == 1:
        for k in V2_ENTRIES:
            del doc["model"][k]
    return doc


def _reject_constant(name):
    raise ValueError(f"non-standard JSON number {name}")


def _finite_float(text):
    # A literal such as 1e400 parses to inf: refuse it like NaN / Infinity
    # (save_model could not write it back).
    value = float(text)
    if not math.isfinite(value):
        shown = text if len(text) <= 40 else text[:40] + "..."
        raise ValueError(f"number {shown} is out of the floating-point range")
    return value


def _clip(msg: str) -> str:
    """``msg`` shortened to about MAX_MESSAGE_CHARS, keeping both ends."""
    if len(msg) <= MAX_MESSAGE_CHARS:
        return msg
    head = MAX_MESSAGE_CHARS * 2 // 3
    tail = MAX_MESSAGE_CHARS - head
    return f"{msg[:head]} [... {len(msg) - head - tail} characters left out ...] {msg[-tail:]}"


def _require(cond, msg, path):
    if not cond:
        raise ModelFileError(f"{path}: {_clip(msg)}")


def spec_from_dict(doc, path="<model>") -> ModelSpec:
    """Check a parsed model document and build the :class:`ModelSpec` (see :func:`load_model`)."""
    _require(isinstance(doc, dict), "not a kalmax model file (the top level is not a JSON object).", path)
    _require(doc.get("format") == FORMAT_NAME,
             f"not a kalmax model file (format is {doc.get('format')!r}, expected {FORMAT_NAME!r}).", path)
    version = doc.get("format_version")
    if type(version) is not int:  # true and 1.0 compare equal to 1 in Python: refuse them by type
        shown = json.dumps(version) if isinstance(version, (bool, int, float, str)) or version is None \
            else f"a JSON {'list' if isinstance(version, list) else 'object'}"
        raise ModelFileError(f"{path}: " + _clip(
            f"format_version must be the integer {FORMAT_VERSION}; got {shown} (written by "
            f"{doc.get('written_by', 'unknown')!r})."))
    if version not in READABLE_VERSIONS:
        raise ModelFileError(f"{path}: " + _clip(
            f"model file format version {version!r} (written by {doc.get('written_by', 'unknown')}); "
            f"this kalmax reads format versions {', '.join(map(str, READABLE_VERSIONS[:-1]))} and "
            f"{READABLE_VERSIONS[-1]}. Refit the model "
            "with this version, or use the kalmax version that wrote the file."
        ))
    m = doc.get("model")
    _require(isinstance(m, dict), "the 'model' entry is missing or not an object.", path)
    kind = m.get("kind")
    _require(isinstance(kind, str) and (kind in KINDS or kind == COMPOSED),  # a list or object is not hashable
             f"unknown model kind {kind!r}; known kinds: {', '.join(KINDS)}, {COMPOSED}.", path)
    is_composed = kind == COMPOSED
    _require(not is_composed or version >= 3, f"model kind {COMPOSED!r} needs format version 3 or later; the file "
                                              f"says format_version {version}.", path)
    dims = m.get("dims")
    _require(isinstance(dims, int) and not isinstance(dims, bool) and 1 <= dims <= MAX_DIMS,
             f"dims must be an integer from 1 to {MAX_DIMS}; got {dims!r}.", path)
    meas = m.get("measurements")
    _require(isinstance(meas, list) and 1 <= len(meas) <= MAX_COLUMNS,
             f"'measurements' must be a list of 1 to {MAX_COLUMNS} entries.", path)
    for i, e in enumerate(meas):
        _require(isinstance(e, dict) and isinstance(e.get("column"), str)
                 and (is_composed or isinstance(e.get("state"), str))
                 and isinstance(e.get("noise_variance"), (int, float)) and not isinstance(e.get("noise_variance"), bool),
                 f"measurement {i} must have a text 'column', " + ("" if is_composed else "a text 'state' ")
                 + "and a numeric 'noise_variance'.", path)
        _require(len(e["column"]) <= MAX_NAME_CHARS, f"measurement {i}: column name too long.", path)
        _require(e["column"].strip() != "", f"measurement {i}: the column name is empty.", path)
    if "states" in m and not is_composed:  # written for readers; optional, but if present it must be the kind's states
        want = list(KINDS[kind].state_names(dims))
        _require(m["states"] == want and all(isinstance(x, str) for x in m["states"]),
                 f"'states' must be the states of a {kind} model with dims={dims}: {', '.join(want)}.", path)
    tcol = m.get("time_column")
    _require(isinstance(tcol, str) and 0 < len(tcol) <= MAX_NAME_CHARS, "'time_column' must be a non-empty text.", path)
    params = m.get("parameters")
    _require(isinstance(params, dict), "'parameters' must be an object.", path)
    longest = MAX_COLUMNS if is_composed else MAX_DIMS  # a regression's beta: one per input column
    for k, v in params.items():
        ok = isinstance(v, (int, float)) and not isinstance(v, bool)
        ok = ok or (isinstance(v, list) and len(v) <= longest
                    and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v))
        _require(ok, f"parameter {k!r} must be a number or a list of at most {longest} numbers.", path)
    fit = doc.get("fit")
    _require(fit is None or isinstance(fit, dict), "'fit' must be an object or null.", path)
    jitter = m.get("jitter", 0.0)
    _require(isinstance(jitter, (int, float)) and not isinstance(jitter, bool), "'jitter' must be a number.", path)
    time_format = m.get("time_format", "number")
    _require(isinstance(time_format, str) and time_format in ("number", "iso8601"),
             "'time_format' must be \"number\" or \"iso8601\".", path)
    later = [k for k in V3_ENTRIES if k in m] if version < 3 else []
    _require(not later, f"'{later[0] if later else ''}' is an entry of format version 3, but the file says "
                        f"format_version {version} (a reader of that version would ignore it).", path)
    _require(is_composed or "components" not in m,
             f"'components' belongs to kind {COMPOSED!r}, not to kind {kind!r}.", path)
    parts = _parts_from_doc(m.get("components"), path) if is_composed else ()
    _require(version >= 4 or "transforms" not in m, f"'transforms' is an entry of format version 4, but the file "
                                                    f"says format_version {version} (a reader of that version "
                                                    "would ignore it).", path)
    transforms = m.get("transforms", {})
    _require(isinstance(transforms, dict) and len(transforms) <= MAX_COLUMNS
             and all(isinstance(v, str) and len(v) <= MAX_NAME_CHARS for v in transforms.values()),
             "'transforms' must be an object: measured column -> transform name.", path)
    if version == 1:
        extra = [k for k in V2_ENTRIES if k in m]
        _require(not extra, f"'{extra[0] if extra else ''}' is an entry of format version 2, but the file says "
                            "format_version 1 (a version-1 reader would ignore it).", path)
        # Version 1: rates per second for date-times, per unit of the numbers for numbers.
        units = dict(time_unit="s" if time_format == "iso8601" else None, numeric_time_unit=None, time_pattern=None)
    else:
        _require("time_format" in m and "time_unit" in m,
                 f"a format version {version} model needs 'time_format' and 'time_unit' entries.", path)
        units = {k: m.get(k) for k in V2_ENTRIES}
        for k in ("time_unit", "numeric_time_unit"):
            _require(units[k] is None or (isinstance(units[k], str) and units[k] in UNITS),
                     f"'{k}' must be null or one of {unit_names()}.", path)
        _require(units["time_pattern"] is None or (isinstance(units["time_pattern"], str)
                                                   and len(units["time_pattern"]) <= MAX_PATTERN_CHARS),
                 f"'time_pattern' must be null or a text of at most {MAX_PATTERN_CHARS} characters.", path)
        _require(units["time_unit"] is not None or time_format == "number",
                 "'time_unit' must name a unit for date-times (time_format iso8601); null is for numbers only.",
                 path)
    _require(version >= GROUPS_VERSION or "groups" not in m, f"'groups' is an entry of format version 5, but the "
                                                             f"file says format_version {version} (a reader of "
                                                             "that version would ignore it).", path)
    group_column, groups = _groups_from_doc(m["groups"], path) if "groups" in m else (None, ())
    columns = tuple(e["column"] for e in meas)
    try:
        spec = ModelSpec(
            kind=kind, dims=dims, time_column=tcol,
            columns=columns,
            measured=(tuple(composed.reads_text(parts, c) for c in columns) if is_composed
                      else tuple(e["state"] for e in meas)),
            params=params,
            noise=tuple(float(e["noise_variance"]) for e in meas),
            time_format=time_format,
            jitter=float(jitter),
            fit=fit,
            components=parts,
            transforms=tuple(transforms.items()),
            group_column=group_column,
            groups=groups,
            **units,
        )
        if is_composed and "states" in m:  # written for readers; if present, the components' states
            _require(m["states"] == list(spec.state_names()),
                     f"'states' must be the states of the components: {', '.join(spec.state_names())}.", path)
        return spec
    except ValueError as e:
        raise ModelFileError(f"{path}: invalid model: {_clip(str(e))}") from None
    except OverflowError:  # an integer too large for a float (JSON integers are unbounded)
        raise ModelFileError(f"{path}: invalid model: a number is too large to be a floating-point value "
                             "(the largest is about 1.8e308).") from None


def _groups_from_doc(entry, path):
    """(group column, ((value, parameters, noise), ...)) of a version-5 'groups' entry, checked for types
    (values: ``ModelSpec``)."""
    _require(isinstance(entry, dict) and set(entry) == {"column", "members"},
             "'groups' must be an object with 'column' and 'members'.", path)
    column, members = entry["column"], entry["members"]
    _require(isinstance(column, str) and 0 < len(column) <= MAX_NAME_CHARS,
             "'groups.column' must be a non-empty text.", path)
    _require(isinstance(members, list) and 1 <= len(members) <= MAX_GROUPS,
             f"'groups.members' must be a list of 1 to {MAX_GROUPS} objects.", path)
    out = []
    for i, e in enumerate(members):
        _require(isinstance(e, dict) and isinstance(e.get("value"), str) and len(e["value"]) <= MAX_NAME_CHARS
                 and isinstance(e.get("parameters"), dict) and isinstance(e.get("noise_variance"), list)
                 and len(e["noise_variance"]) <= MAX_COLUMNS,
                 f"group member {i} needs a text 'value', a 'parameters' object and a 'noise_variance' list.", path)
        for k, v in list(e["parameters"].items()) + [("noise_variance", e["noise_variance"])]:
            ok = isinstance(v, (int, float)) and not isinstance(v, bool)
            ok = ok or (isinstance(v, list) and len(v) <= MAX_COLUMNS
                        and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v))
            _require(ok, f"group member {i}: {k!r} must be a number or a list of numbers.", path)
        out.append((e["value"], dict(e["parameters"]), tuple(float(r) for r in e["noise_variance"])))
    return column, tuple(out)


def _parts_from_doc(entries, path) -> tuple:
    """The components of a composed model's document, checked for types (values: ``composed.check_parts``)."""
    _require(isinstance(entries, list) and 1 <= len(entries) <= composed.MAX_PARTS,
             f"a composed model needs 'components': a list of 1 to {composed.MAX_PARTS} objects.", path)
    parts = []
    for i, e in enumerate(entries):
        _require(isinstance(e, dict), f"component {i} must be an object.", path)
        unknown = [k for k in e if k not in PART_ENTRIES]
        _require(not unknown, f"component {i}: unknown entry {unknown[0] if unknown else ''!r}; the entries are "
                              f"{', '.join(PART_ENTRIES)}.", path)
        _require(isinstance(e.get("name"), str) and len(e["name"]) <= MAX_NAME_CHARS,
                 f"component {i} needs a text 'name'.", path)
        _require(isinstance(e.get("kind"), str) and e["kind"] in composed.PART_KINDS,
                 f"component {i}: 'kind' must be one of {', '.join(composed.PART_KINDS)}.", path)
        for key in ("columns", "inputs"):
            v = e.get(key, [] if key == "inputs" else None)
            _require(isinstance(v, list) and len(v) <= MAX_COLUMNS
                     and all(isinstance(c, str) and len(c) <= MAX_NAME_CHARS for c in v),
                     f"component {i}: '{key}' must be a list of at most {MAX_COLUMNS} column names.", path)
        period, harmonics = e.get("period"), e.get("harmonics")
        _require(period is None or (isinstance(period, (int, float)) and not isinstance(period, bool)),
                 f"component {i}: 'period' must be a number.", path)
        _require(harmonics is None or (type(harmonics) is int and 1 <= harmonics <= composed.MAX_STATES // 2),
                 f"component {i}: 'harmonics' must be a whole number from 1 to {composed.MAX_STATES // 2}.", path)
        parts.append(composed.Part(kind=e["kind"], name=e["name"], columns=tuple(e["columns"]),
                                   period=None if period is None else float(period), harmonics=harmonics,
                                   inputs=tuple(e.get("inputs", ()))))
    return tuple(parts)


def save_model(path, spec: ModelSpec, out: AtomicOutputs = None) -> None:
    """Write ``spec`` as a versioned, human-readable JSON model file.

    The file names its format (``"kalmax-model"``) and format version, the
    model kind, the state names, each measurement column with the state it
    measures and its noise variance, the process parameters, and a record of
    the fit. Written atomically (temporary file, then rename). Pass ``out``
    to commit it together with other outputs.

    Example:
        >>> import os, tempfile
        >>> spec = kx.ModelSpec(kind="random-walk", dims=1, time_column="time", columns=("depth",),
        ...                     measured=("level0",), params={"q": [0.05]}, noise=(0.01,))
        >>> path = os.path.join(tempfile.mkdtemp(), "drifter.json")
        >>> kx.save_model(path, spec)
        >>> kx.load_model(path) == spec
        True
    """
    text = json.dumps(spec_to_dict(spec), indent=2, allow_nan=False) + "\n"
    if len(text.encode()) > MAX_MODEL_FILE_BYTES:
        raise ModelFileError(f"{path}: the model file would exceed {MAX_MODEL_FILE_BYTES} bytes.")
    if out is None:
        with AtomicOutputs() as own:
            own.temp_for(path).write_text(text, encoding="utf-8")
        return
    out.temp_for(path).write_text(text, encoding="utf-8")


def load_model(path) -> ModelSpec:
    """Read a model file written by :func:`save_model` (or ``kalmax fit``).

    Raises :class:`ModelFileError` for a missing or unreadable file, a file
    over 1 MiB, invalid JSON, a different format or format version, or
    inconsistent contents (each message names the problem).

    Returns:
        the :class:`ModelSpec`; ``spec.state_space(times)`` gives the
        discrete :class:`StateSpace` for new timestamps.
    """
    path = Path(path)
    try:
        size = path.stat().st_size
        if size > MAX_MODEL_FILE_BYTES:
            raise ModelFileError(f"{path}: {size} bytes is too large for a model file "
                                 f"(limit {MAX_MODEL_FILE_BYTES}).")
        with open(path, "rb") as f:
            # Read at most one byte past the limit: the size stat reports is 0 for pipes and
            # devices, and a file can grow after the check.
            raw = f.read(MAX_MODEL_FILE_BYTES + 1)
    except FileNotFoundError:
        raise ModelFileError(f"cannot read model file {path}: no such file.") from None
    except IsADirectoryError:
        raise ModelFileError(f"cannot read model file {path}: it is a folder.") from None
    except OSError as e:
        raise ModelFileError(f"cannot read model file {path}: {e.strerror}.") from None
    if len(raw) > MAX_MODEL_FILE_BYTES:
        raise ModelFileError(f"{path}: more than {MAX_MODEL_FILE_BYTES} bytes is too large for a model file.")
    try:
        doc = json.loads(raw.decode("utf-8"), parse_constant=_reject_constant, parse_float=_finite_float)
    except (UnicodeDecodeError, ValueError, RecursionError) as e:
        raise ModelFileError(f"{path}: not a kalmax model file (invalid JSON: {_clip(str(e))}).") from None
    return spec_from_dict(doc, path)
