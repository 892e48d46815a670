"""Fuzzing ``kx.load_model`` with untrusted, corrupt and hostile model files
(hypothesis).

Requirement under test ("Loading untrusted files"): a saved-model file is
parsed without executing code (no pickle), under size and shape limits, and
a malformed file gives a clear error.

The oracle, applied to every generated file: ``kx.load_model(path)`` either

* returns a :class:`kx.ModelSpec` that is within the documented limits, whose
  parameters are finite and positive, and which saves and reloads to an equal
  spec (or whose re-save is refused with a ModelFileError because the indented
  file would exceed the size limit); or
* raises :class:`kx.ModelFileError` whose message is a clear sentence: one
  line, names the file, ends with a full stop, bounded in length, with no
  chained exception or traceback text.

Any other exception (KeyError, TypeError, IndexError, RecursionError,
UnicodeDecodeError, ValueError, OverflowError, MemoryError, ...) fails.

Files come from three generators, all derandomized:

* ``structural_files``: a valid file written by ``kx.save_model`` (format
  version 2, or the same rewritten as version 1 without the unit entries), parsed,
  mutated 1-3 times (delete a key or item, replace a value by a hostile JSON
  value or by one of another type, add keys, change format name/version,
  break the shapes and limits, put NaN/Infinity/overflowing number tokens in
  place of a value) and serialised again;
* ``byte_files``: the bytes of a valid file, mutated 1-4 times (truncate,
  flip/insert/delete bytes, invalid UTF-8, byte-order marks, UTF-16/32,
  NUL bytes, a duplicate key);
* ``random_files``: random bytes, random text, random JSON documents and
  documents with a valid header around a random model.

Plus fixed cases that a random generator is unlikely to reach: numbers past
the float range, a list as the model kind, 100000-level nesting, files at and
just over the size limit, a FIFO that streams more than the limit, limits on
dims / columns / name lengths, and a pickle whose loading would create a
marker file.

Examples per run (KALMAX_PROPERTY_SCALE=k multiplies each by k, the same
convention as test_properties.py and test_fuzz.py): structural 250, byte 200,
random 150, so 600 generated files at the default scale and 3000 at scale 5,
plus 59 fixed cases. ``pytest -s`` prints the counts.
"""

import ast
import copy
import inspect
import json
import os
import pickle
import re
import threading
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import kalmax as kx
from kalmax._src.tools import model_file as kio

SCALE = max(1, int(os.environ.get("KALMAX_PROPERTY_SCALE", "1")))
BOUNDED = dict(deadline=None, derandomize=True, database=None,
               suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                      HealthCheck.filter_too_much])
# Longest acceptable error message, beyond the file name it names (common
# practice: an error message fits on a terminal screen).
MESSAGE_LIMIT = 2000
CASES = {"structural": 0, "byte": 0, "random": 0, "fixed": 0,
         "loaded": 0, "loaded_not_resaved_too_big": 0, "rejected": 0}


# ----------------------------------------------------------------------------
# Valid starting points
# ----------------------------------------------------------------------------


def _seed_specs():
    """Valid specs covering every model kind, small and at the size limits."""
    big_dims = kio.MAX_DIMS
    states = [f"{pre}{k}" for pre in ("position", "velocity") for k in range(big_dims)]
    n_cols = kio.MAX_COLUMNS
    long = "c" * (kio.MAX_NAME_CHARS - 4)
    return [
        kx.ModelSpec(kind="random-walk", dims=1, time_column="t", columns=("y",), measured=("level0",),
                     params={"q": [0.1]}, noise=(0.5,)),
        kx.ModelSpec(kind="constant-velocity", dims=2, time_column="stamp", columns=("x", "y", "vy"),
                     measured=("position0", "position1", "velocity1"), params={"q": [0.1, 2.5e-3]},
                     noise=(0.25, 0.5, 1e-4), time_format="iso8601", jitter=1e-9,
                     fit={"objective": "likelihood", "steps": 12, "errors": {"x": 0.1, "y": [1, 2.5]},
                          "converged": True, "note": None}),
        kx.ModelSpec(kind="constant-acceleration", dims=3, time_column="time",
                     columns=("px", "py", "pz", "az"),
                     measured=("position0", "position1", "position2", "acceleration2"),
                     params={"q": [1.0, 2.0, 3.0]}, noise=(1.0, 1.0, 1.0, 4.0)),
        kx.ModelSpec(kind="local-linear-trend", dims=1, time_column="day", columns=("sales",),
                     measured=("level",), params={"q_level": 0.01, "q_slope": 1e-5}, noise=(2.0,),
                     fit={"note": "by hand \u00e9\u4e2d\U0001F600"}),
        kx.ModelSpec(kind="damped-oscillator", dims=1, time_column="t", columns=("temp", "rate"),
                     measured=("displacement", "rate"),
                     params={"frequency": 1 / 365.25, "damping": 0.05, "q": 1e-6}, noise=(0.25, 1e300)),
        # At the limits: MAX_DIMS axes, MAX_COLUMNS columns, names of MAX_NAME_CHARS characters.
        kx.ModelSpec(kind="constant-velocity", dims=big_dims, time_column="t" * kio.MAX_NAME_CHARS,
                     columns=tuple(f"{long}{i:04d}" for i in range(n_cols)),
                     measured=tuple(states[i % len(states)] for i in range(n_cols)),
                     params={"q": [0.1 * (k + 1) for k in range(big_dims)]},
                     noise=tuple(1.0 + i for i in range(n_cols))),
    ]


SEED_SPECS = _seed_specs()


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("model_file_fuzz")


class _Seeds(list):
    def __repr__(self):  # keeps hypothesis' failure reports short
        return f"<{len(self)} seed model files>"


@pytest.fixture(scope="module")
def seed_texts(workdir):
    """The bytes ``kx.save_model`` writes for each seed spec."""
    out = _Seeds()
    for i, spec in enumerate(SEED_SPECS):
        path = workdir / f"seed{i}.json"
        kx.save_model(path, spec)
        out.append(path.read_bytes())
    return out


@pytest.fixture(scope="module")
def mutation_seeds(seed_texts):
    """The seed files, plus the small ones rewritten as format version 1 (no unit entries): the
    mutations reach the loader's version-1 path too."""
    out = _Seeds(seed_texts)
    for text in seed_texts[:5]:
        doc = json.loads(text)
        doc["format_version"] = 1
        for k in kio.V2_ENTRIES:
            doc["model"].pop(k, None)
        out.append(json.dumps(doc, indent=2).encode())
    return out


# ----------------------------------------------------------------------------
# The oracle
# ----------------------------------------------------------------------------


def _assert_clear(exc, path):
    msg = str(exc)
    shown = msg[:300]
    assert type(exc) is kx.ModelFileError, f"{type(exc).__name__}: {shown}"
    assert msg and msg == msg.strip(), f"empty or padded message: {msg!r}"
    assert "\n" not in msg and "\r" not in msg, f"multi-line message: {shown!r}"
    assert "Traceback" not in msg and 'File "' not in msg, f"traceback text in message: {shown!r}"
    assert str(path) in msg, f"message does not name the file: {shown!r}"
    assert msg.endswith("."), f"message is not a sentence: {msg[-200:]!r}"
    detail = msg.replace(str(path), "")
    assert len(re.findall(r"[A-Za-z]{2,}", detail)) >= 3, f"message is not a sentence: {shown!r}"
    assert len(detail) <= MESSAGE_LIMIT, f"message of {len(detail)} characters: {shown!r}..."
    assert exc.__cause__ is None and (exc.__context__ is None or exc.__suppress_context__), (
        f"message would print a chained traceback: {shown!r}")


def _assert_valid_spec(spec):
    assert isinstance(spec, kx.ModelSpec)
    kx._src.tools.spec.check_spec(spec)
    assert 1 <= spec.dims <= kio.MAX_DIMS
    assert 1 <= len(spec.columns) <= kio.MAX_COLUMNS
    assert all(isinstance(c, str) and len(c) <= kio.MAX_NAME_CHARS for c in spec.columns)
    assert isinstance(spec.time_column, str) and 0 < len(spec.time_column) <= kio.MAX_NAME_CHARS
    for name, logs in spec.to_unconstrained().items():  # every parameter finite and > 0
        assert np.all(np.isfinite(logs)), name
    assert np.isfinite(spec.jitter) and spec.jitter >= 0
    assert spec.fit is None or isinstance(spec.fit, dict)


def check_file(data: bytes, workdir: Path, source: str):
    """Write ``data`` as a model file and apply the oracle to loading it."""
    CASES[source] += 1
    path = workdir / "case.json"
    path.write_bytes(data)
    try:
        spec = kx.load_model(path)
    except kx.ModelFileError as exc:
        _assert_clear(exc, path)
        CASES["rejected"] += 1
        return None
    except Exception as exc:  # noqa: BLE001 - the oracle itself
        raise AssertionError(f"load_model raised {type(exc).__name__} (not ModelFileError): "
                             f"{str(exc)[:300]}") from exc
    _assert_valid_spec(spec)
    again = workdir / "resaved.json"
    try:
        kx.save_model(again, spec)
    except kx.ModelFileError as exc:
        # A compact file under the limit can grow past it when written indented.
        assert "would exceed" in str(exc), str(exc)[:300]
        CASES["loaded_not_resaved_too_big"] += 1
        return spec
    back = kx.load_model(again)
    assert back == spec
    CASES["loaded"] += 1
    return spec


# ----------------------------------------------------------------------------
# Strategies
# ----------------------------------------------------------------------------

SPECIAL_VALUES = [
    None, True, False, 0, 1, -1, -0.0, 0.5, -1e-300, 5e-324, 1e308, -1e308, 2**53 + 1, 2**64, -2**64,
    10**400, -10**400, "", " ", "0", "1", "NaN", "Infinity", "null", "x" * 1000, "\u0000", "\ud7ff\uffff",
    [], {}, [None], [[[[[[]]]]]], [1, [2, [3]]], {"": None}, {"format": "kalmax-model"},
    "kalmax-model", "random-walk", "constant-velocity", "position0", "level0", "number", "iso8601",
]
JSON_LEAVES = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**70), 2**70),
    st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=12))
JSON_VALUES = st.recursive(
    JSON_LEAVES,
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=6), children, max_size=4),
    max_leaves=10)


@st.composite
def hostile_values(draw):
    how = draw(st.sampled_from(["special", "json", "nested", "long_text", "long_list", "wide_dict"]))
    if how == "special":  # a copy: later mutations must not change the shared list
        return copy.deepcopy(draw(st.sampled_from(SPECIAL_VALUES)))
    if how == "json":
        return draw(JSON_VALUES)
    if how == "nested":
        depth = draw(st.integers(1, 150))  # stacked by up to 3 mutations: stays under the recursion limit
        value = draw(st.sampled_from([[], 0.5, "level0", None]))
        for _ in range(depth):
            value = [value] if draw(st.booleans()) else {"k": value}
        return value
    if how == "long_text":
        return draw(st.sampled_from(["a", "\u00e9", "\"", "\\", "\n"])) * draw(st.integers(150, 20_000))
    if how == "long_list":
        return [draw(st.sampled_from([0.1, 1, "x", None]))] * draw(st.integers(15, 3000))
    return {f"k{i}": i for i in range(draw(st.integers(10, 2000)))}


def _other_type_values(value):
    """Values of a JSON type different from ``value``'s."""
    kinds = {
        "null": [None], "bool": [True, False], "int": [0, -1, 7, 10**400],
        "float": [-2.5, 0.0, 1e-320, 1e308], "str": ["", "1.0", "level0"],
        "list": [[], [value], [1, 2]], "dict": [{}, {"value": value}],
    }
    mine = ("null" if value is None else "bool" if isinstance(value, bool) else "int" if isinstance(value, int)
            else "float" if isinstance(value, float) else "str" if isinstance(value, str)
            else "list" if isinstance(value, list) else "dict")
    return [v for k, vs in kinds.items() if k != mine for v in vs]


def _paths(doc):
    """Every path (tuple of keys / indices) in a parsed JSON document, root first."""
    out, stack = [], [()]
    while stack:
        path = stack.pop()
        out.append(path)
        node = _get(doc, path)
        if isinstance(node, dict):
            stack.extend(path + (k,) for k in node)
        elif isinstance(node, list):
            stack.extend(path + (i,) for i in range(len(node)))
    return out


def _get(doc, path):
    for k in path:
        doc = doc[k]
    return doc


def _set(doc, path, value):
    if not path:
        return value
    _get(doc, path[:-1])[path[-1]] = value
    return doc


TOKENS = ["NaN", "Infinity", "-Infinity", "1e400", "-1e400", "1E+999", "-0", "1e-400", "0e0", "00", "01",
          "+1", ".5", "1.", "0x10", "1_000", "-", "1" * 5000, "9" * 400 + ".5", "1e" + "9" * 400, "true1",
          "nan", "inf", "undefined", "'x'", "\"\\ud800\"", "\"\\u00\""]
SENTINEL = "\u0001kx-token\u0001"


def _shape_break(doc, draw):
    """A targeted edit of the model's shapes and limits (missing keys are no-ops)."""
    m = doc.get("model") if isinstance(doc, dict) else None
    if not isinstance(m, dict):
        return
    how = draw(st.sampled_from([
        "dims", "param_len", "param_ragged", "param_type", "no_measurements", "many_measurements",
        "duplicate_column", "column_is_time", "long_name", "bad_state", "time_column", "jitter", "noise",
        "time_unit", "time_pattern"]))
    meas = m.get("measurements") if isinstance(m.get("measurements"), list) else None
    params = m.get("parameters") if isinstance(m.get("parameters"), dict) else None
    if how == "dims":
        m["dims"] = draw(st.sampled_from([0, -1, kio.MAX_DIMS, kio.MAX_DIMS + 1, 2, 3, 10**400, 1.0, "1"]))
    elif how in ("param_len", "param_ragged", "param_type") and params:
        name = draw(st.sampled_from(sorted(params)))
        v = params[name]
        if how == "param_len":
            n = draw(st.sampled_from([0, 1, 2, kio.MAX_DIMS, kio.MAX_DIMS + 1, 1000]))
            params[name] = [0.5] * n
        elif how == "param_ragged":
            params[name] = [v[0], [v[0]]] + v[1:] if isinstance(v, list) and v else [[v], v]
        else:
            params[name] = draw(st.sampled_from([[v], v[0] if isinstance(v, list) and v else 0.5, 0, -1.0,
                                                 str(v), None, {"value": v}]))
    elif how == "no_measurements":
        m["measurements"] = draw(st.sampled_from([[], {}, None, [{}], [[]]]))
    elif how == "many_measurements" and meas:
        n = draw(st.sampled_from([kio.MAX_COLUMNS, kio.MAX_COLUMNS + 1, 5000]))
        entries = [e for e in meas if isinstance(e, dict)] or [{"state": "level0", "noise_variance": 1.0}]
        m["measurements"] = [dict(entries[i % len(entries)], column=f"col{i}") for i in range(n)]
    elif how == "duplicate_column" and meas:
        entry = meas[draw(st.integers(0, len(meas) - 1))]
        meas.append(copy.deepcopy(entry))
    elif how == "column_is_time" and meas and isinstance(meas[0], dict):
        meas[0]["column"] = m.get("time_column")
    elif how == "long_name" and meas and isinstance(meas[0], dict):
        n = draw(st.sampled_from([kio.MAX_NAME_CHARS, kio.MAX_NAME_CHARS + 1, 100_000]))
        meas[0][draw(st.sampled_from(["column", "state"]))] = "n" * n
    elif how == "bad_state" and meas and isinstance(meas[0], dict):
        meas[0]["state"] = draw(st.sampled_from(["position99", "level1", "", "Position0", "level0 ", None]))
    elif how == "time_column":
        m["time_column"] = draw(st.sampled_from(["", "t" * (kio.MAX_NAME_CHARS + 1), None, 1]))
    elif how == "jitter":
        m["jitter"] = draw(st.sampled_from([-1e-9, 0, 10**400, 1e308, "0", None, [0.0]]))
    elif how == "time_unit":
        m[draw(st.sampled_from(["time_unit", "numeric_time_unit"]))] = draw(st.sampled_from(
            ["s", "ms", "day", "year", "parsec", "", "S", " s", None, 1, 86400.0, ["s"], {"unit": "s"}]))
    elif how == "time_pattern":
        m["time_pattern"] = draw(st.sampled_from(
            ["%d/%m/%Y %H:%M", "%Y%m%d", "%Q", "%", "100%", "%Z", "%z", "plain", "", None, 7, ["%Y"],
             "%Y" * 200, "%H\n%M", "%Y\u0000"]))
    elif how == "noise" and meas and isinstance(meas[-1], dict):
        meas[-1]["noise_variance"] = draw(st.sampled_from([0, 0.0, -1.0, 5e-324, 10**400, -(10**400),
                                                           1e308, True, "1", None, [1.0]]))


@st.composite
def structural_files(draw, seeds):
    doc = json.loads(seeds[draw(st.integers(0, len(seeds) - 1))])
    tokens = []
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["delete", "replace", "retype", "insert", "format", "shape", "shape",
                                   "token"]))
        paths = _paths(doc)
        if op == "delete":
            inner = [p for p in paths if p]
            if inner:
                path = inner[draw(st.integers(0, len(inner) - 1))]
                del _get(doc, path[:-1])[path[-1]]
        elif op in ("replace", "retype"):
            path = paths[draw(st.integers(0, len(paths) - 1))]
            old = _get(doc, path)
            new = (draw(hostile_values()) if op == "replace"
                   else draw(st.sampled_from(_other_type_values(old))))
            doc = _set(doc, path, new)
        elif op == "insert":
            containers = [p for p in paths if isinstance(_get(doc, p), (dict, list))]
            if containers:
                node = _get(doc, containers[draw(st.integers(0, len(containers) - 1))])
                value = draw(hostile_values())
                if isinstance(node, dict):
                    key = draw(st.sampled_from(["format", "model", "kind", "dims", "q", "state", "column",
                                                "fit", "__class__", "__reduce__", ""]) | st.text(max_size=8))
                    node[key] = value
                else:
                    node.insert(draw(st.integers(0, len(node))), value)
        elif op == "format":
            if isinstance(doc, dict):
                key = draw(st.sampled_from(["format", "format_version"]))
                doc[key] = draw(st.sampled_from(
                    [0, 1, 2, 3, -1, "1", 1.0, 1.5, True, 10**400, None, [1], "kalmax-model", "KALMAX-MODEL",
                     "kalmax-model ", "kalmax", ""]))
        elif op == "shape":
            _shape_break(doc, draw)
        else:  # token: a raw number token that json.dumps would never write
            path = paths[draw(st.integers(0, len(paths) - 1))]
            tokens.append(draw(st.sampled_from(TOKENS)))
            doc = _set(doc, path, SENTINEL)
    text = json.dumps(doc, indent=draw(st.sampled_from([None, 2])), ensure_ascii=draw(st.booleans()))
    for token in tokens:
        text = text.replace(json.dumps(SENTINEL), token, 1)
    return text.encode("utf-8", "surrogatepass")


INVALID_UTF8 = [b"\xff", b"\xfe", b"\xc3\x28", b"\xc0\xaf", b"\xed\xa0\x80", b"\xf4\x90\x80\x80", b"\x80",
                b"\xe2\x82", b"\xf0\x9f\x98"]
BOMS = [b"\xef\xbb\xbf", b"\xff\xfe", b"\xfe\xff", b"\xff\xfe\x00\x00"]


@st.composite
def byte_files(draw, seeds):
    data = bytearray(seeds[draw(st.integers(0, len(seeds) - 1))])
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["truncate", "flip", "insert", "delete", "utf8", "bom", "encoding",
                                   "nul", "syntax", "duplicate_key"]))
        at = draw(st.integers(0, len(data)))
        if op == "truncate":
            del data[at:]
        elif op == "flip" and at < len(data):
            data[at] ^= draw(st.integers(1, 255))
        elif op == "insert":
            data[at:at] = draw(st.binary(min_size=1, max_size=8))
        elif op == "delete":
            del data[at:at + draw(st.integers(1, 64))]
        elif op == "utf8":
            data[at:at] = draw(st.sampled_from(INVALID_UTF8))
        elif op == "bom":
            data[0:0] = draw(st.sampled_from(BOMS))
        elif op == "encoding":
            try:
                text = bytes(data).decode("utf-8")
            except UnicodeDecodeError:
                continue
            data = bytearray(text.encode(draw(st.sampled_from(["utf-16", "utf-16-be", "utf-32", "latin-1"])),
                                         "replace"))
        elif op == "nul":
            data[at:at + 1] = b"\x00"
        elif op == "syntax":
            data[at:at] = draw(st.sampled_from([b"{", b"}", b"[", b"]", b"\"", b"\\", b",", b":", b"//", b"/*",
                                                b"\\u", b"\\ud800", b"NaN", b"-"]))
        else:  # duplicate_key: a later key silently overrides an earlier one in JSON
            end = data.rfind(b"}")
            if end > 0:
                data[end:end] = draw(st.sampled_from([b', "format": "other"', b', "format_version": 2',
                                                      b', "model": null', b', "fit": []', b', "model": {}']))
    return bytes(data)


@st.composite
def random_files(draw):
    how = draw(st.sampled_from(["bytes", "text", "json", "header"]))
    if how == "bytes":
        return draw(st.binary(max_size=4096))
    if how == "text":
        return draw(st.text(max_size=2000)).encode("utf-8")
    if how == "json":
        return json.dumps(draw(JSON_VALUES)).encode()
    doc = {"format": "kalmax-model", "format_version": draw(st.sampled_from([1, 2])),
           "model": draw(st.dictionaries(
               st.sampled_from(["kind", "dims", "states", "time_column", "time_format", "time_unit",
                                "numeric_time_unit", "time_pattern", "jitter", "parameters", "measurements"]),
               JSON_VALUES | hostile_values(), max_size=11))}
    return json.dumps(doc).encode()


# ----------------------------------------------------------------------------
# Tests
# ----------------------------------------------------------------------------


def test_valid_files_round_trip(workdir, seed_texts):
    """Sanity: load(save(spec)) == spec for every seed spec (each model kind, and a model at every
    size limit), and saving the loaded spec writes a file that loads equal again."""
    for i, (spec, text) in enumerate(zip(SEED_SPECS, seed_texts)):
        doc = json.loads(text)
        assert doc["format"] == kio.FORMAT_NAME and doc["format_version"] == kio.FORMAT_VERSION
        assert len(text) <= kio.MAX_MODEL_FILE_BYTES
        back = check_file(text, workdir, "fixed")
        assert back == spec, f"seed {i}"


@settings(max_examples=250 * SCALE, **BOUNDED)
@given(data=st.data())
def test_structurally_mutated_files(workdir, mutation_seeds, data):
    """Mutated JSON documents (keys deleted, values replaced by hostile or wrongly typed JSON values,
    keys added, other format names / versions, broken shapes and limits, NaN / Infinity / overflowing
    number tokens) load as a valid spec or fail with a clear ModelFileError.
    250 examples x KALMAX_PROPERTY_SCALE."""
    check_file(data.draw(structural_files(mutation_seeds)), workdir, "structural")


@settings(max_examples=200 * SCALE, **BOUNDED)
@given(data=st.data())
def test_byte_mutated_files(workdir, mutation_seeds, data):
    """Byte-level damage (truncation, flipped / inserted / deleted bytes, invalid UTF-8, byte-order
    marks, other encodings, NUL bytes, duplicate keys) loads as a valid spec or fails with a clear
    ModelFileError. 200 examples x KALMAX_PROPERTY_SCALE."""
    check_file(data.draw(byte_files(mutation_seeds)), workdir, "byte")


@settings(max_examples=150 * SCALE, **BOUNDED)
@given(blob=random_files())
def test_random_files(workdir, blob):
    """Random bytes, text, JSON documents and random models under a valid header fail with a clear
    ModelFileError (or, improbably, load as a valid spec). 150 examples x KALMAX_PROPERTY_SCALE."""
    check_file(blob, workdir, "random")


def _valid_doc():
    return json.loads(json.dumps(kio.spec_to_dict(SEED_SPECS[1])))


def _edit(valid, old, new):
    assert old in valid, old
    return valid.replace(old, new, 1)


def _fixed_cases():
    limit = kio.MAX_MODEL_FILE_BYTES
    valid = json.dumps(_valid_doc()).encode()
    huge = b"1" + b"0" * 400  # an integer far past the float range: JSON integers are unbounded
    cases = {
        "a huge integer as a noise variance": _edit(valid, b"\"noise_variance\": 0.25", b"\"noise_variance\": " + huge),
        "a huge integer as the jitter": _edit(valid, b"\"jitter\": 1e-09", b"\"jitter\": " + huge),
        "a huge integer in a parameter list": _edit(valid, b"\"q\": [0.1,", b"\"q\": [" + huge + b","),
        "a huge negative integer as a parameter": _edit(valid, b"\"q\": [0.1,", b"\"q\": [-" + huge + b","),
        "1e400 as a noise variance": _edit(valid, b"\"noise_variance\": 0.25", b"\"noise_variance\": 1e400"),
        "1e400 in the fit record": _edit(valid, b"\"steps\": 12", b"\"steps\": 1e400"),
        "-1e400 in the fit record": _edit(valid, b"\"steps\": 12", b"\"steps\": [-1e400]"),
        "a list as the model kind": _edit(valid, b"\"kind\": \"constant-velocity\"",
                                          b"\"kind\": [\"constant-velocity\"]"),
        "an object as the model kind": _edit(valid, b"\"kind\": \"constant-velocity\"", b"\"kind\": {}"),
        "empty file": b"",
        "whitespace only": b" \n\t " * 10,
        "null": b"null",
        "a number": b"1",
        "a string": b"\"kalmax-model\"",
        "an empty list": b"[]",
        "an empty object": b"{}",
        "closed 100000-level list": b"[" * 100_000 + b"]" * 100_000,
        "unclosed 100000-level list": b"[" * 100_000,
        "100000-level object": b"{\"a\":" * 100_000 + b"1" + b"}" * 100_000,
        "deep value inside a valid file": _edit(valid, b"\"fit\": {", b"\"fit\": {\"deep\": "
                                                        + b"[" * 50_000 + b"]" * 50_000 + b", "),
        "a 1 MiB string as the format": json.dumps({"format": "f" * (limit - 20)}).encode(),
        "a 1 MiB list as the format version": json.dumps(
            {"format": "kalmax-model", "format_version": [0] * ((limit - 60) // 3)}).encode(),
        "a 1 MiB list in the fit record": _edit(
            valid, b"\"fit\": {", b"\"fit\": {\"big\": [" + b"0," * ((limit - len(valid)) // 2 - 20) + b"0], "),
        "many parameter names": json.dumps(dict(_valid_doc(), model=dict(
            _valid_doc()["model"], parameters={f"p{i:06d}": 1.0 for i in range(50_000)}))).encode(),
        "a long state name": json.dumps(dict(_valid_doc(), model=dict(
            _valid_doc()["model"], measurements=[{"column": "x", "state": "s" * 500_000,
                                                  "noise_variance": 1.0}]))).encode(),
        "a 4300-digit integer": _edit(valid, b"\"dims\": 2", b"\"dims\": " + b"9" * 4300),
        "a 5000-digit integer": _edit(valid, b"\"dims\": 2", b"\"dims\": " + b"9" * 5000),
        "a 500000-digit float": _edit(valid, b"\"jitter\": 1e-09", b"\"jitter\": 0." + b"1" * 500_000),
        "a huge exponent": _edit(valid, b"\"jitter\": 1e-09", b"\"jitter\": 1e" + b"9" * 10_000),
        "one byte over the limit": b" " * (limit + 1),
        "a valid model padded to one byte over the limit": valid + b" " * (limit + 1 - len(valid)),
        "pickle protocol 0 (text)": pickle.dumps({"format": "kalmax-model"}, protocol=0),
        "pickle protocol 5": pickle.dumps({"format": "kalmax-model"}, protocol=5),
    }
    return cases


FIXED = _fixed_cases()


@pytest.mark.parametrize("name", list(FIXED))
def test_fixed_hostile_files(workdir, name):
    """Hand-made files a random generator is unlikely to produce: integers and float literals past
    the float range (in a noise variance, the jitter, a parameter, the fit record), a list or
    object as the model kind, deep nesting (far past the interpreter's recursion limit),
    megabyte-sized values, the integer-digit limit, files one byte over the size limit, pickles.
    Each fails with a clear ModelFileError or loads as a valid spec (the oracle of check_file)."""
    data = FIXED[name]
    assert len(data) <= kio.MAX_MODEL_FILE_BYTES or "over the limit" in name
    spec = check_file(data, workdir, "fixed")
    if "over the limit" in name:
        assert spec is None


def test_size_and_shape_limits_exist(workdir):
    """The limits on file size, dims, number of columns and name length exist and sit where the
    module says: a valid model padded to exactly the size limit loads, one byte more is refused
    before parsing; each shape limit is accepted at the limit and refused one past it. (A 1 MiB cap
    keeps every load to a fraction of a second; common practice for a file of a few hundred numbers.)"""
    limit = kio.MAX_MODEL_FILE_BYTES
    assert limit <= 1 << 20 and kio.MAX_DIMS <= 64 and kio.MAX_COLUMNS <= 4096 and kio.MAX_NAME_CHARS <= 4096
    valid = json.dumps(_valid_doc()).encode()
    assert check_file(valid + b" " * (limit - len(valid)), workdir, "fixed") == SEED_SPECS[1]
    with pytest.raises(kx.ModelFileError, match="too large"):
        kx.load_model(_write(workdir, valid + b" " * (limit + 1 - len(valid))))

    def edited(edit):
        doc = _valid_doc()
        edit(doc["model"])
        return _write(workdir, json.dumps(doc).encode())

    at_limit = kio.spec_to_dict(SEED_SPECS[-1])  # dims, columns and names all at their limits
    assert kx.load_model(_write(workdir, json.dumps(at_limit).encode())) == SEED_SPECS[-1]
    with pytest.raises(kx.ModelFileError, match="dims"):
        kx.load_model(edited(lambda m: m.update(dims=kio.MAX_DIMS + 1)))
    with pytest.raises(kx.ModelFileError, match="measurements"):
        kx.load_model(edited(lambda m: m.update(measurements=[
            {"column": f"c{i}", "state": "position0", "noise_variance": 1.0} for i in range(kio.MAX_COLUMNS + 1)])))
    with pytest.raises(kx.ModelFileError, match="too long"):
        kx.load_model(edited(lambda m: m["measurements"][0].update(column="c" * (kio.MAX_NAME_CHARS + 1))))
    with pytest.raises(kx.ModelFileError, match="time_column"):
        kx.load_model(edited(lambda m: m.update(time_column="t" * (kio.MAX_NAME_CHARS + 1))))
    with pytest.raises(kx.ModelFileError, match="parameter"):
        kx.load_model(edited(lambda m: m["parameters"].update(q=[0.1] * (kio.MAX_DIMS + 1))))
    CASES["fixed"] += 7


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs POSIX named pipes")
def test_stream_longer_than_the_limit_is_refused(workdir):
    """A file whose size the file system does not report (a named pipe here; a device or a file
    still growing behave alike) is read only up to the size limit, then refused: memory stays
    bounded whatever the file streams."""
    fifo = workdir / "stream.json"
    if fifo.exists():
        fifo.unlink()
    os.mkfifo(fifo)
    sent = {"bytes": 0}

    def writer():
        chunk = b" " * 65536
        try:
            with open(fifo, "wb") as f:
                for _ in range(3 * kio.MAX_MODEL_FILE_BYTES // len(chunk)):
                    f.write(chunk)
                    sent["bytes"] += len(chunk)
        except BrokenPipeError:  # the reader stopped reading: what a bounded reader does
            pass

    thread = threading.Thread(target=writer, daemon=True)
    thread.start()
    CASES["fixed"] += 1
    with pytest.raises(kx.ModelFileError) as info:
        kx.load_model(fifo)
    thread.join(timeout=10)
    _assert_clear(info.value, fifo)
    assert "too large" in str(info.value)


class _CreatesMarker:
    """Unpickling this object opens (and so creates) the marker file: a stand-in for any code."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


@pytest.mark.parametrize("protocol", [0, 2, pickle.HIGHEST_PROTOCOL])
def test_pickle_payload_is_rejected_without_running_it(workdir, protocol):
    """A pickle whose loading would run code (create a marker file) is refused with a clear
    ModelFileError and the marker file is not created. A control unpickles the same kind of
    payload to prove it would have created its marker."""
    control = workdir / f"control{protocol}.txt"
    handle = pickle.loads(pickle.dumps(_CreatesMarker(control), protocol=protocol))
    handle.close()
    assert control.exists()

    marker = workdir / f"marker{protocol}.txt"
    for name in ("model.json", "model.pkl", "model"):
        path = workdir / name
        path.write_bytes(pickle.dumps(_CreatesMarker(marker), protocol=protocol))
        with pytest.raises(kx.ModelFileError) as info:
            kx.load_model(path)
        _assert_clear(info.value, path)
        CASES["fixed"] += 1
        assert not marker.exists()


def test_loader_uses_no_code_executing_parser():
    """The model-file module imports no deserialiser that can run code (pickle, marshal, shelve,
    dill, yaml) and calls no eval / exec / compile / __import__."""
    tree = ast.parse(inspect.getsource(kio))
    banned_modules = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "cloudpickle", "yaml",
                      "joblib"}
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            assert not {a.name.split(".")[0] for a in node.names} & banned_modules
        elif isinstance(node, ast.ImportFrom):
            assert (node.module or "").split(".")[0] not in banned_modules
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            assert node.func.id not in ("eval", "exec", "compile", "__import__")


def _strict_cases():
    """Values that plain Python equality or a missing check would let through."""
    def with_model(**changes):
        doc = _valid_doc()
        doc["model"].update(changes)
        return doc

    def with_column(name):
        doc = _valid_doc()
        doc["model"]["measurements"][0]["column"] = name
        return doc

    def without(*keys, version=2):
        doc = _valid_doc()
        doc["format_version"] = version
        for k in keys:
            del doc["model"][k]
        return doc

    states = list(_valid_doc()["model"]["states"])
    return {
        "format_version true": (dict(_valid_doc(), format_version=True), "format_version"),
        "format_version 1.0": (dict(_valid_doc(), format_version=1.0), "format_version"),
        "format_version '1'": (dict(_valid_doc(), format_version="1"), "format_version"),
        "format_version 2.0": (dict(_valid_doc(), format_version=2.0), "format_version"),
        # Version 2: the time unit entries, checked by type and value.
        "version 2 without time_unit": (without("time_unit"), "time_unit"),
        "version 2 without time_format": (without("time_format"), "time_format"),
        "an unknown time unit": (with_model(time_unit="parsec"), "time_unit"),
        "a time unit in capitals": (with_model(time_unit="S"), "time_unit"),
        "a list as the time unit": (with_model(time_unit=["s"]), "time_unit"),
        "a null time unit for date-times": (with_model(time_unit=None), "time_unit"),
        "a numeric time unit for date-times": (with_model(numeric_time_unit="ms"), "numeric_time_unit"),
        "a time pattern with an unknown directive": (with_model(time_pattern="%d/%m/%Q"), "pattern"),
        "a time pattern with a zone name": (with_model(time_pattern="%Y-%m-%d %Z"), "%Z"),
        "a time pattern without a directive": (with_model(time_pattern="day"), "pattern"),
        "a number as the time pattern": (with_model(time_pattern=5), "time_pattern"),
        "a time pattern for numbers": (with_model(time_format="number", time_pattern="%Y"), "time_pattern"),
        # Version 1 files have no unit entries: one there would be ignored by a version-1 reader.
        "version 1 with a time unit": (without("numeric_time_unit", "time_pattern", version=1), "time_unit"),
        "version 1 with a time pattern": (without("time_unit", "numeric_time_unit", version=1), "time_pattern"),
        "states of another kind": (with_model(states=["level0", "level1"]), "states"),
        "states in another order": (with_model(states=states[::-1]), "states"),
        "states missing one": (with_model(states=states[:-1]), "states"),
        "states not a list": (with_model(states="position0"), "states"),
        "an empty column name": (with_column(""), "column"),
        "a blank column name": (with_column("   "), "column"),
    }


@pytest.mark.parametrize("name", list(_strict_cases()))
def test_strict_values_are_refused(workdir, name):
    doc, word = _strict_cases()[name]
    path = _write(workdir, json.dumps(doc).encode())
    with pytest.raises(kx.ModelFileError) as info:
        kx.load_model(path)
    _assert_clear(info.value, path)
    assert word in str(info.value)
    CASES["fixed"] += 1


def test_matching_states_and_integer_version_load(workdir):
    doc = _valid_doc()
    assert doc["format_version"] == kio.FORMAT_VERSION == 3 and type(doc["format_version"]) is int
    spec = kx.load_model(_write(workdir, json.dumps(doc).encode()))
    assert list(spec.state_names()) == doc["model"]["states"]
    del doc["model"]["states"]  # optional: the kind and dims define them
    assert kx.load_model(_write(workdir, json.dumps(doc).encode())) == spec


def test_version_1_files_load_with_the_units_of_version_1(workdir):
    """A version-1 file (no unit entries) still loads: rates per second for date-times, per unit of the
    numbers for numbers; saving it again writes the current version with those units spelt out, which loads
    equal."""
    for seed, want in ((SEED_SPECS[1], "s"), (SEED_SPECS[0], None)):
        doc = kio.spec_to_dict(seed)
        doc["format_version"] = 1
        for k in kio.V2_ENTRIES:
            del doc["model"][k]
        spec = kx.load_model(_write(workdir, json.dumps(doc).encode()))
        assert spec.time_unit == want and spec.numeric_time_unit is None and spec.time_pattern is None
        assert spec == seed
        again = workdir / "v1_resaved.json"
        kx.save_model(again, spec)
        resaved = json.loads(again.read_text())
        assert resaved["format_version"] == kio.FORMAT_VERSION and resaved["model"]["time_unit"] == want
        assert kx.load_model(again) == spec
    CASES["fixed"] += 2


def test_missing_file_and_folder(workdir):
    """A missing path and a folder fail with a clear ModelFileError."""
    for path in (workdir / "does-not-exist.json", workdir):
        with pytest.raises(kx.ModelFileError) as info:
            kx.load_model(path)
        _assert_clear(info.value, path)
        CASES["fixed"] += 1


def _write(workdir, data):
    path = workdir / "limit.json"
    path.write_bytes(data)
    return path


def test_report_fuzz_case_counts():
    # Runs last in file order; prints the counts (pytest -s).
    generated = CASES["structural"] + CASES["byte"] + CASES["random"]
    print(f"\n[model file fuzz cases] {CASES} generated {generated} total {generated + CASES['fixed']}")
