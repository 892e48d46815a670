"""Checkpoints of ``kx.fit`` (kalmax/_src/checkpoint.py): resume, format, refusals, atomic writes.

The reference for a resumed fit is the same fit run without interruption
(no checkpoint at all): the resumed run must reach the same parameters,
history, best step and stop reason. The SIGKILL case across two processes is
in tests/test_multi_process.py.
"""

import json
import os

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

import kalmax as kx

TARGET = jnp.array([1.0, 2.0, -1.0])


def loss(p):
    # A smooth non-quadratic loss (common practice for optimiser tests): Adam
    # then has non-trivial moments to carry across the interruption.
    return jnp.sum(jnp.log(jnp.cosh(p["w"] - TARGET))) + 0.1 * p["b"] ** 2 + 0.05 * jnp.sum(p["w"] * p["b"])


def validation(p):
    # Best half-way to the training target, so patience stops the fit.
    return jnp.sum((p["w"] - 0.5 * TARGET) ** 2) + p["b"] ** 2


def start():
    return {"w": jnp.zeros(3), "b": jnp.array(0.3)}


def _fit(**kw):
    return kx.fit(loss, start(), optax.adam(0.05), steps=60, validation_fn=validation, patience=6,
                  progress=False, **kw)


class Interrupt(Exception):
    pass


def _close_trees(a, b, tol=1e-12):
    assert jax.tree_util.tree_structure(a) == jax.tree_util.tree_structure(b)
    for x, y in zip(jax.tree_util.tree_leaves(a), jax.tree_util.tree_leaves(b)):
        np.testing.assert_allclose(np.asarray(x), np.asarray(y), rtol=tol, atol=tol)


def test_interrupted_and_resumed_fit_equals_uninterrupted(tmp_path):
    whole = _fit()
    assert whole.stop_reason == "patience"  # the early-stopping counters matter below
    path = str(tmp_path / "fit.npz")
    # Interrupt two steps before the end, with the last checkpoint after the
    # best step: the resumed run must carry best params and patience counter.
    stop_at = whole.steps_run - 2
    every = 3
    assert whole.best_step < (stop_at // every) * every

    def interrupt(step):
        if step.step == stop_at:
            raise Interrupt

    with pytest.raises(Interrupt):
        _fit(checkpoint=path, checkpoint_every=every, callback=interrupt)
    saved = kx.load_fit_state(path, like=kx.FitState(0, start(), optax.adam(0.05).init(start()), start(), start(),
                                                     {"loss": [], "validation": []}))
    assert saved.step == (stop_at // every) * every and len(saved.history["loss"]) == saved.step

    resumed = _fit(checkpoint=path, checkpoint_every=every)
    assert (resumed.stop_reason, resumed.steps_run, resumed.best_step) == (
        whole.stop_reason, whole.steps_run, whole.best_step)
    np.testing.assert_allclose(resumed.history["loss"], whole.history["loss"], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(resumed.history["validation"], whole.history["validation"], rtol=1e-12, atol=1e-12)
    _close_trees(resumed.params, whole.params)
    _close_trees(resumed.opt_state, whole.opt_state)


def test_the_file_is_plain_npz_with_a_json_description(tmp_path):
    path = str(tmp_path / "fit.npz")
    res = kx.fit(loss, start(), optax.adam(0.05), steps=4, progress=False, checkpoint=path, checkpoint_every=2)
    with np.load(path, allow_pickle=False) as data:  # no pickle anywhere
        description = json.loads(str(data["description"]))
        assert description["format"] == "kalmax-fit-state" and description["step"] == 4
        assert len(description["history"]["loss"]) == 4
        paths = [(e["group"], e["path"]) for e in description["leaves"]]
        assert ("params", "['b']") in paths and ("params", "['w']") in paths
        # The stored params are those after 4 updates: the ones fit returned.
        i = paths.index(("params", "['w']"))
        np.testing.assert_array_equal(data[f"leaf_{i:05d}"], np.asarray(res.params["w"]))
        assert description["leaves"][i]["shape"] == [3] and description["leaves"][i]["dtype"] == "<f8"
    assert os.listdir(tmp_path) == ["fit.npz"]  # no temporary left behind


def test_mismatching_checkpoints_are_refused(tmp_path):
    path = str(tmp_path / "fit.npz")
    kx.fit(loss, start(), optax.adam(0.05), steps=2, progress=False, checkpoint=path, checkpoint_every=1)
    other_shape = {"w": jnp.zeros(4), "b": jnp.array(0.3)}
    with pytest.raises(ValueError, match=r"does not match this fit at array .*\['w'\]"):
        kx.fit(lambda p: jnp.sum(p["w"] ** 2), other_shape, optax.adam(0.05), steps=4, progress=False,
               checkpoint=path)
    with pytest.raises(ValueError, match="does not match this fit"):  # other optimiser, other state
        kx.fit(loss, start(), optax.sgd(0.05, momentum=0.9), steps=4, progress=False, checkpoint=path)
    with pytest.raises(ValueError, match="without validation_fn"):
        kx.fit(loss, start(), optax.adam(0.05), steps=4, validation_fn=validation, progress=False,
               checkpoint=path)
    with pytest.raises(ValueError, match="beyond steps=1"):
        kx.fit(loss, start(), optax.adam(0.05), steps=1, progress=False, checkpoint=path)
    np.savez(tmp_path / "other.npz", x=np.zeros(3))
    with pytest.raises(ValueError, match="not a kalmax fit checkpoint"):
        kx.fit(loss, start(), optax.adam(0.05), steps=4, progress=False, checkpoint=str(tmp_path / "other.npz"))
    with pytest.raises(ValueError, match="checkpoint_every"):
        kx.fit(loss, start(), optax.adam(0.05), steps=4, progress=False, checkpoint=path, checkpoint_every=0)


def test_a_failed_write_leaves_the_previous_checkpoint(tmp_path, monkeypatch):
    path = str(tmp_path / "fit.npz")
    params = start()
    state = kx.FitState(3, params, optax.adam(0.05).init(params), params, params, {"loss": [1.0, 0.5, 0.25]})
    kx.save_fit_state(path, state)
    before = open(path, "rb").read()

    def broken_savez(f, **arrays):
        f.write(b"PK\x03\x04 half a zip file")  # a crash in the middle of writing
        raise OSError("disk full")

    monkeypatch.setattr(np, "savez", broken_savez)
    with pytest.raises(OSError, match="disk full"):
        kx.save_fit_state(path, state._replace(step=4))
    assert open(path, "rb").read() == before
    assert os.listdir(tmp_path) == ["fit.npz"]
    monkeypatch.undo()
    assert kx.load_fit_state(path, like=state).step == 3
