"""Fuzzing the public entry points with random shapes, dtypes, containers and
values (hypothesis).

The oracle: every call either returns outputs of the documented shapes --
whose states are all finite or all NaN, never a mix -- or raises ValueError /
TypeError with a message that names the offending argument. Anything else
(AttributeError, IndexError, an XLA error, a process crash) is a bug. Known
core bugs, each with a strict xfail test in test_bad_input.py, are matched
by signature in KNOWN_BUGS and counted rather than failed; delete an entry
once its fix lands.

Shapes are kept small (T ≤ 4, n, p ≤ 3) so that the inputs that pass the
checks reuse a handful of compiled programs.
"""

import os
import re
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import kalmax as kx

SCALE = max(1, int(os.environ.get("KALMAX_PROPERTY_SCALE", "1")))
BOUNDED = dict(deadline=None, derandomize=True, database=None,
               suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                      HealthCheck.filter_too_much])

FIELDS = ("A", "C", "Q", "R", "b", "d", "x0_mean", "x0_cov")
DTYPES = ["float64", "float32", "float16", "bfloat16", "int32", "int64", "bool", "complex64", "uint8"]
# A clear message names what is wrong.
CLEAR = re.compile(r"model\.|model must|\by\b|mask|holdout|method|invalid smoothing problem|validate")
# Known core bugs (see the strict xfail tests named here): (exception type, message regex).
KNOWN_BUGS = {
    # empty: every core bug the fuzzer found so far has been fixed; add an entry
    # (with a strict xfail test in test_bad_input.py) when a new one turns up.
}
STATS = {"iterations": 0, "returned": 0, "clear_error": 0, "known_bug": 0}
_SIGNATURES = {}
_KNOWN_HITS = {}


def _shape_for(field, T, n, p, varying):
    inv = {"A": (n, n), "Q": (n, n), "b": (n,), "C": (p, n), "R": (p, p), "d": (p,),
           "x0_mean": (n,), "x0_cov": (n, n)}[field]
    lead = T - 1 if field in ("A", "Q", "b") else T
    return ((lead,) + inv) if (varying and field not in ("x0_mean", "x0_cov")) else inv


BREAKS = ["none", "shape", "rank", "dtype", "values", "list", "scalar"]


@st.composite
def leaves(draw, field, T, n, p, kind, varying):
    """One model field, valid or broken in the way ``kind`` names."""
    shape = _shape_for(field, T, n, p, varying)
    dtype = "float64"
    if kind == "none":
        return None
    if kind == "shape":
        shape = tuple(max(0, s + draw(st.integers(-1, 1))) for s in shape)
    if kind == "rank":
        shape = tuple(draw(st.lists(st.integers(0, 3), min_size=0, max_size=4)))
    if kind == "dtype":
        dtype = draw(st.sampled_from(DTYPES))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    x = rng.standard_normal(shape)
    if field in ("Q", "R", "x0_cov") and len(shape) >= 2 and shape[-1] == shape[-2]:
        k = shape[-1]
        x = np.einsum("...ij,...kj->...ik", x, x) / max(k, 1) + np.eye(k)  # SPD
    elif field == "A" and len(shape) >= 2:
        x = 0.5 * x / max(shape[-1], 1)
    if kind == "values" and x.size:
        special = draw(st.sampled_from([np.nan, np.inf, -np.inf, 1e300, -1.0, 0.0]))
        flat = x.reshape(-1)
        flat[draw(st.integers(0, x.size - 1))] = special
        x = flat.reshape(shape)
    with np.errstate(over="ignore", invalid="ignore"):  # huge values overflow on purpose
        if dtype == "bfloat16":
            out = jnp.asarray(x, jnp.bfloat16)
        elif dtype == "complex64":
            out = x.astype(np.complex64)
        else:
            out = x.astype(dtype)
    if kind == "list":
        return out.tolist()
    if kind == "scalar":
        return draw(st.sampled_from([1.0, 0, "text", (1.0, 2.0)]))
    return out


@st.composite
def calls(draw):
    # Half the calls are valid; the rest break one to three things at once.
    broken = set(draw(st.lists(st.sampled_from(FIELDS + ("y", "mask", "method", "sizes")),
                               max_size=3, unique=True))) if draw(st.booleans()) else set()
    sizes_ok = "sizes" not in broken
    T = draw(st.integers(1, 4)) if sizes_ok else draw(st.integers(0, 4))
    n = draw(st.integers(1, 3)) if sizes_ok else draw(st.integers(0, 3))
    p = draw(st.integers(1, 3)) if sizes_ok else draw(st.integers(0, 3))
    if n == 0 and p == 0:
        # Kills the process (SIGFPE in the compiled CPU kernel): covered in a
        # subprocess by test_zero_sizes_do_not_crash_the_process instead.
        p = 1
    Tm = max(T, 1)
    varying = draw(st.booleans())
    fields = {f: draw(leaves(f, Tm, n, p, draw(st.sampled_from(BREAKS)) if f in broken else "valid", varying))
              for f in FIELDS}
    if draw(st.booleans()):  # half the time: no prior, or only a covariance
        fields["x0_mean"] = None
        if draw(st.booleans()):
            fields["x0_cov"] = None
    if draw(st.sampled_from([False] * 19 + [True])):
        model = fields  # not a StateSpace at all
    else:
        model = kx.StateSpace(**fields)
    ydtype = draw(st.sampled_from(DTYPES)) if "y" in broken else draw(st.sampled_from(["float64", "float32"]))
    yshape = draw(st.sampled_from([(T,), (T, p + 1), (2, T, p), (), (T, p)])) if "y" in broken else (T, p)
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    y = rng.standard_normal(yshape)
    if y.size and "y" in broken and draw(st.booleans()):
        y.reshape(-1)[rng.integers(y.size)] = draw(st.sampled_from([np.nan, np.inf, 1e300]))
    with np.errstate(over="ignore", invalid="ignore"):  # 1e300 → inf in float32 is intended
        y = jnp.asarray(y, jnp.bfloat16) if ydtype == "bfloat16" else y.astype(ydtype)
    mask_kind = draw(st.sampled_from(["int", "float", "shape", "list"] if "mask" in broken else ["none", "bool"]))
    mask = {
        "none": None,
        "bool": rng.random(yshape) < 0.7,
        "int": (rng.random(yshape) < 0.7).astype(np.int32),
        "float": (rng.random(yshape) < 0.7).astype(np.float32),
        "shape": rng.random((T + 1, p)) < 0.7,
        "list": (rng.random(yshape) < 0.7).tolist(),
    }[mask_kind]
    entry = draw(st.sampled_from(["smooth", "smooth_cov", "log_likelihood", "holdout_sums",
                                  "prediction_error", "validate", "condition_estimate"]))
    method = draw(st.sampled_from(["scan", "bogus", ""])) if "method" in broken else "auto"
    return entry, model, y, mask, method


_JIT = {
    "smooth": jax.jit(lambda m, y, k: kx.smooth(m, y, k).states),
    "smooth_cov": jax.jit(lambda m, y, k: kx.smooth(m, y, k, covariances=True).state_cov),
    "log_likelihood": jax.jit(lambda m, y, k: kx.log_likelihood(m, y, k)),
}


def _run(entry, model, y, mask, method):
    if method != "auto" or not isinstance(model, kx.StateSpace) or isinstance(y, list) or isinstance(mask, list):
        # the eager path (also the only one that can take non-array leaves)
        if entry == "smooth":
            return kx.smooth(model, y, mask, method=method).states
        if entry == "smooth_cov":
            return kx.smooth(model, y, mask, covariances=True, method=method).state_cov
        if entry == "log_likelihood":
            return kx.log_likelihood(model, y, mask, method=method)
    elif entry in _JIT:
        leaves_ok = all(not isinstance(v, (list, tuple, str, int, float)) for v in
                        (getattr(model, f) for f in FIELDS))
        if leaves_ok:
            return _JIT[entry](model, y, mask)
        return {"smooth": lambda: kx.smooth(model, y, mask).states,
                "smooth_cov": lambda: kx.smooth(model, y, mask, covariances=True).state_cov,
                "log_likelihood": lambda: kx.log_likelihood(model, y, mask)}[entry]()
    holdout = np.zeros(np.shape(y), bool)
    if holdout.ndim == 2 and holdout.size:
        holdout[0, 0] = True
    if entry == "holdout_sums":
        return kx.holdout_sums(model, y, mask, holdout, method=method)[0]
    if entry == "prediction_error":
        return kx.prediction_error(model, y, mask, holdout, method=method)
    if entry == "validate":
        return kx.validate(model, y, mask)
    return kx.condition_estimate(model, y, mask)


def _known(exc):
    for name, (typ, pattern) in KNOWN_BUGS.items():
        if isinstance(exc, typ) and re.search(pattern, str(exc)):
            return name
    return None


@settings(max_examples=200 * SCALE, **BOUNDED)
@given(calls())
def test_fuzz_public_entry_points(call):
    entry, model, y, mask, method = call
    STATS["iterations"] += 1
    try:
        out = _run(entry, model, y, mask, method)
    except (ValueError, TypeError) as exc:
        known = _known(exc)
        if known:
            STATS["known_bug"] += 1
            _KNOWN_HITS[known] = _KNOWN_HITS.get(known, 0) + 1
            return
        msg = str(exc)
        assert CLEAR.search(msg), f"{entry}: unclear {type(exc).__name__}: {msg}"
        STATS["clear_error"] += 1
        _SIGNATURES.setdefault(msg.split(";")[0][:60], 0)
        return
    except Exception as exc:  # noqa: BLE001 - the oracle itself
        known = _known(exc)
        assert known, f"{entry}: {type(exc).__name__} is not a clear error: {str(exc)[:300]}"
        STATS["known_bug"] += 1
        _KNOWN_HITS[known] = _KNOWN_HITS.get(known, 0) + 1
        return
    STATS["returned"] += 1
    if entry in ("validate",):
        assert out is None
        return
    out = np.asarray(out, np.float64)
    if entry in ("smooth", "smooth_cov"):
        T = np.shape(y)[0]
        n = np.shape(model.A)[-1]
        assert out.shape[:2] == (T, n)
    if entry != "condition_estimate":
        nan = np.isnan(out)
        assert nan.all() or not nan.any(), f"{entry}: partly NaN output"


_ZERO_SIZE_SCRIPT = """
import sys, jax
jax.config.update("jax_enable_x64", True)
import numpy as np, kalmax as kx
n, p = int(sys.argv[1]), int(sys.argv[2])
m = kx.StateSpace(A=np.zeros((n, n)), C=np.zeros((p, n)), Q=np.eye(n), R=np.eye(p), x0_cov=np.eye(n))
for method in sys.argv[3:]:
    try:
        kx.smooth(m, np.zeros((2, p)), method=method)
    except (ValueError, TypeError):
        pass
print("survived")
"""


def _methods():
    from kalmax._src.backends import registry
    return list(registry.available())


@pytest.mark.parametrize("n,p", [
    (0, 0),
    (0, 1), (1, 0)])
def test_zero_sizes_do_not_crash_the_process(n, p):
    """Run in a subprocess: a crash must fail this test, not the whole run."""
    proc = subprocess.run([sys.executable, "-c", _ZERO_SIZE_SCRIPT, str(n), str(p)] + _methods(),
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0 and "survived" in proc.stdout, (
        f"exit status {proc.returncode}: {proc.stderr[-500:]}")


def test_report_fuzz_counts():
    print("\n[fuzz]", STATS, "distinct clear-error messages:", len(_SIGNATURES), "known bugs hit:", _KNOWN_HITS)
