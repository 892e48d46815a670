"""Two processes under ``jax.distributed`` fit what one process fits, and survive a kill.

Two copies of tests/multi_process_worker.py (2 forced CPU devices each,
coordinator and gloo collectives on 127.0.0.1, a free port) fit the invented
buoy data of examples/multi_process_fit.py with ``kx.data_parallel`` and
``kx.fit``. The five buoys are split 3 + 2 and each process pads its slice to
4 (``kx.pad_to_mesh``), so the global batch of 8 holds 3 padding copies that
must score nothing. The fit is killed with SIGKILL in the middle (after a
checkpoint), started again, and resumes from the checkpoint.

The independent reference is the plain single-process, single-device fit of
the five unpadded buoys (``kx.fit`` with the data as arguments: no mesh, no
padding, no collectives, no checkpoint), solved by the compiled CPU kernel
rather than the processes' pure-JAX "scan" backend. The issue's target: equal to 1e-10
in float64, parameters and the whole loss history; a pooled loss summed in a
different order differs only by rounding.

Every wait is bounded; the children are killed whatever happens.
"""

import json
import os
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import pytest

import kalmax as kx

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "examples"))

import multi_process_fit as example  # noqa: E402

TOL = 1e-10
BUOYS, HOURS, STEPS, EVERY, STALL = 5, 24, 6, 2, 4
LIMIT = 240  # seconds for one launch, start-up and compilation included (a loaded 2-core machine)


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _launch(tmp, extra, name):
    """Start both processes; their output goes to files (a full pipe would block a child)."""
    env = dict(os.environ, JAX_PLATFORMS="cpu", XLA_FLAGS="--xla_force_host_platform_device_count=2",
               # the relaunch compiles the same programs: let it reuse them
               JAX_COMPILATION_CACHE_DIR=str(tmp / "jax-cache"),
               JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS="0")
    coordinator = f"127.0.0.1:{_free_port()}"
    args = ["--buoys", str(BUOYS), "--hours", str(HOURS), "--steps", str(STEPS),
            "--checkpoint", str(tmp / "fit.npz"), "--checkpoint-every", str(EVERY)] + extra
    procs = []
    for i in range(2):
        with open(tmp / f"{name}{i}.out", "w") as out, open(tmp / f"{name}{i}.err", "w") as err:
            procs.append(subprocess.Popen(
                [sys.executable, os.path.join(HERE, "multi_process_worker.py"), str(i), coordinator] + args,
                env=env, stdout=out, stderr=err))
    return procs


def _kill(procs):
    for p in procs:
        if p.poll() is None:
            p.send_signal(signal.SIGKILL)
    for p in procs:
        p.wait(timeout=30)


def _wait(procs, tmp, name):
    deadline = time.monotonic() + LIMIT
    while any(p.poll() is None for p in procs) and time.monotonic() < deadline:
        if any(p.poll() not in (None, 0) for p in procs):
            break  # one failed: the other would wait for it in a collective
        time.sleep(0.2)
    _kill(procs)
    for i, p in enumerate(procs):
        err = (tmp / f"{name}{i}.err").read_text()
        assert p.returncode == 0, f"process {i} ended with {p.returncode} (limit {LIMIT} s):\n{err[-3000:]}"


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("multi_process")
    out = {}
    # 1. Start, and kill both processes with SIGKILL once the fit is stalled at
    #    step STALL (the checkpoint of step STALL has been written by then).
    procs = _launch(tmp, ["--stall-at", str(STALL)], "first")
    try:
        deadline = time.monotonic() + LIMIT
        stalled = lambda: all("stalled" in (tmp / f"first{i}.out").read_text() for i in range(2))  # noqa: E731
        while not stalled() and time.monotonic() < deadline and all(p.poll() is None for p in procs):
            time.sleep(0.2)
        out["stalled"] = stalled()
    finally:
        _kill(procs)
    if not out["stalled"]:
        pytest.fail("the first launch never reached the stall:\n" + (tmp / "first0.err").read_text()[-3000:])
    out["checkpoint_after_kill"] = os.path.exists(tmp / "fit.npz")
    out["temporaries_left"] = [n for n in os.listdir(tmp) if n.endswith(".tmp")]
    # 2. Start again: the fit resumes from the checkpoint and finishes.
    procs = _launch(tmp, ["--out", str(tmp / "resumed.json")], "second")
    try:
        _wait(procs, tmp, "second")
    finally:
        _kill(procs)
    with open(tmp / "resumed.json") as f:
        out["resumed"] = json.load(f)
    return out


@pytest.fixture(scope="module")
def single_process():
    """The reference: one process, one device, the five buoys unpadded, no checkpoint."""
    y, mask, hold = example.local_batch(0, 1, BUOYS, HOURS)
    assert y.shape[0] == BUOYS
    # The compiled CPU kernel, where the processes run the "scan" backend: a
    # second, independent solver (and a program that compiles in about a
    # second instead of fifteen).
    loss = lambda p, *b: kx.batch_prediction_error(example.model_of(p), *b, method="cpu")  # noqa: E731
    res = kx.fit(loss, example.initial_params(), example.optimizer(), steps=STEPS, progress=False,
                 args=(y, mask, hold))
    return {"params": {k: np.asarray(v).ravel() for k, v in res.params.items()},
            "loss": np.asarray(res.history["loss"])}


def test_two_processes_really_ran_and_were_killed_midway(runs):
    r = runs["resumed"]
    assert r["processes"] == 2 and r["devices"] == 4 and r["local_devices"] == 2
    # Ragged: process 0 holds 3 buoys padded to 4 (process 1 holds 2, also padded to 4).
    assert (r["local_valid"], r["local_padded"]) == (3, 4)
    assert runs["stalled"] and runs["checkpoint_after_kill"]
    assert runs["temporaries_left"] == []
    # Slices of different sizes or layouts were refused by a message, not a hang.
    assert r["refusals"] == {"count": True, "layout": True}
    # The second launch continued from the checkpoint, not from the start.
    assert r["resumed_from"] == STALL and r["steps_run"] == STEPS


def test_resumed_two_process_fit_equals_single_process_fit(runs, single_process):
    r = runs["resumed"]
    np.testing.assert_allclose(r["loss"], single_process["loss"], rtol=TOL, atol=TOL)
    for k, v in single_process["params"].items():
        np.testing.assert_allclose(r["params"][k], v, rtol=TOL, atol=TOL)
    # The optimiser moved (a fit that did nothing would pass trivially).
    assert single_process["loss"][-1] < single_process["loss"][0] - 1e-3
