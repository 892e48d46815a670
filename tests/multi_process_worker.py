"""One process of the two-process fit in tests/test_multi_process.py.

It runs the data-parallel fit of examples/multi_process_fit.py (same invented
buoy data, model and loss, imported from there) under ``jax.distributed``,
with a checkpoint file, and two test hooks:

- ``--stall-at K``: when the fit reaches step K (a checkpoint at step K has
  then been written), print ``stalled`` and sleep, so that the test can kill
  the processes with SIGKILL in the middle of a fit;
- ``--out FILE``: process 0 writes the fitted parameters, the loss history,
  the step the run resumed from, and whether slices that differ between the
  processes were refused by ``kx.shard_batch``, as JSON.

Usage: multi_process_worker.py PROCESS_ID COORDINATOR ARGS...
"""

import argparse
import json
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "examples"))

import multi_process_fit as example  # noqa: E402


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("process_id", type=int)
    ap.add_argument("coordinator")
    ap.add_argument("--buoys", type=int, required=True)
    ap.add_argument("--hours", type=int, required=True)
    ap.add_argument("--steps", type=int, required=True)
    ap.add_argument("--checkpoint", required=True)
    ap.add_argument("--checkpoint-every", type=int, required=True)
    ap.add_argument("--stall-at", type=int)
    ap.add_argument("--out")
    a = ap.parse_args()

    start = time.time()

    def tick(what):  # progress on stderr, which the test shows when a process fails
        print(f"[{time.time() - start:.1f} s] {what}", file=sys.stderr, flush=True)

    import jax

    jax.config.update("jax_enable_x64", True)
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    jax.distributed.initialize(coordinator_address=a.coordinator, num_processes=2, process_id=a.process_id,
                               initialization_timeout=120)
    tick("initialized")
    import numpy as np

    import kalmax as kx

    mesh = kx.batch_mesh()
    y, mask, hold = example.local_batch(a.process_id, 2, a.buoys, a.hours)
    (y, mask, hold), valid = kx.pad_to_mesh((y, mask, hold), mesh)
    hold = hold & valid[:, None, None]
    loss = kx.data_parallel(example.batch_loss, (y, mask, hold), mesh)

    tick("batch placed")

    def refused(local, words):
        try:
            kx.shard_batch(local, mesh)
        except ValueError as err:
            return words in str(err)
        return False

    refusals = None
    if a.out:  # slices that differ between the processes: each process must refuse, not hang
        refusals = {
            "count": refused(np.zeros((2 * (1 + a.process_id), 3)), "same number of trajectories"),
            "layout": refused(np.zeros((2, 3 + a.process_id)), "differ in structure, dtype or trailing shape"),
        }
    resumed_from = 0
    if os.path.exists(a.checkpoint):
        fresh = example.initial_params()
        like = kx.FitState(0, fresh, example.optimizer().init(fresh), fresh, fresh, {"loss": []})
        resumed_from = kx.load_fit_state(a.checkpoint, like).step

    def stall(step):
        tick(f"step {step.step}")
        if a.stall_at is not None and step.step == a.stall_at:
            print("stalled", flush=True)
            time.sleep(3600)

    result = kx.fit(loss, example.initial_params(), example.optimizer(), steps=a.steps, progress=False,
                    checkpoint=a.checkpoint, checkpoint_every=a.checkpoint_every, callback=stall)
    tick("fit done")
    if jax.process_index() == 0 and a.out:
        with open(a.out, "w") as f:
            json.dump({
                "params": {k: np.asarray(v).ravel().tolist() for k, v in result.params.items()},
                "loss": np.asarray(result.history["loss"]).tolist(),
                "steps_run": result.steps_run,
                "resumed_from": resumed_from,
                "refusals": refusals,
                "devices": len(jax.devices()),
                "local_devices": len(jax.local_devices()),
                "processes": jax.process_count(),
                "local_padded": int(len(valid)),
                "local_valid": int(valid.sum()),
            }, f)
    jax.distributed.shutdown()
    tick("shut down")


if __name__ == "__main__":
    main()
