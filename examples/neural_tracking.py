"""A neural network as the measurement model of a differentiable smoother.

Invented scenario (generated below, no real data): a bead drifts inside a
small observation tank and a low-resolution 16×16 camera films it at
irregular frame times. A quarter of the frames are spoiled: glare from an air
bubble shows as a bright patch somewhere else, and the bead is not visible.

A small network turns each raw frame (256 pixels) into

- a measurement: the bead's (x, y) position, and
- a per-frame measurement-noise level: log-variances of that measurement,
  i.e. a heteroscedastic R_t = diag(exp(log-variance)).

These feed a constant-velocity smoother on the irregular frame times
(``kx.constant_velocity(...).at_times(t)``, exact discretisation), and the
network and the smoother's process noise q are trained *jointly*, with Optax,
through ``kx.smooth``: the loss is the squared error of the smoothed
positions on training sequences.

Compared on held-out sequences (every step of them is unseen in training):

(a) the network alone, trained to regress positions frame by frame;
(b) that network followed by a smoother with fixed noise: one constant R and q,
    fitted by the same loss, no per-frame noise;
(c) joint training: per-frame R_t from the network, q, and the network itself.

(c) wins because the network learns to report a large R_t on spoiled frames,
so the smoother leans on the dynamics there instead of on a wrong position.

The network is a small convolutional "soft arg-max" locator with a noise
head, written directly in JAX (``jax.lax.conv_general_dilated``; its
parameters are a dict of arrays, a pytree that ``kx.fit``, ``jax.grad`` and
Optax take as it is): a layer library is not needed at this size and would
only add a dependency.

Run: ``python examples/neural_tracking.py`` (one to two minutes on 2 cores), or
``--fast`` for the small version the tests run.
"""

from __future__ import annotations

import argparse
import time

import jax
import jax.numpy as jnp
import numpy as np
import optax

import kalmax as kx

SIDE = 16  # frame is SIDE × SIDE pixels
BLOB = 0.07  # blob radius (fraction of the frame)


# ----------------------------------------------------------------------------
# Invented data
# ----------------------------------------------------------------------------


def simulate(rng, n_seq: int, T: int, spoil: float = 0.25):
    """(times (B,T), frames (B,T,SIDE²), positions (B,T,2), spoiled (B,T) bool)."""
    times = np.cumsum(rng.uniform(0.5, 1.5, size=(n_seq, T)), axis=1)
    pos = np.empty((n_seq, T, 2))
    for b in range(n_seq):
        x = rng.uniform(0.3, 0.7, 2)
        v = rng.normal(0, 0.03, 2)
        prev = times[b, 0]
        for k in range(T):
            dt = times[b, k] - prev
            prev = times[b, k]
            # A gentle spring to the tank's centre keeps the bead in the picture.
            for _ in range(4):
                h = dt / 4
                v = v + h * (-0.02 * (x - 0.5) - 0.05 * v) + np.sqrt(h) * rng.normal(0, 0.01, 2)
                x = x + h * v
            x = np.clip(x, 0.08, 0.92)
            pos[b, k] = x
    spoiled = rng.random((n_seq, T)) < spoil
    grid = (np.arange(SIDE) + 0.5) / SIDE
    gx, gy = np.meshgrid(grid, grid, indexing="ij")

    def blob(c):
        return np.exp(-((gx - c[0]) ** 2 + (gy - c[1]) ** 2) / (2 * BLOB**2))

    frames = np.empty((n_seq, T, SIDE * SIDE))
    for b in range(n_seq):
        for k in range(T):
            if spoiled[b, k]:  # glare from a bubble: a bright patch elsewhere, the bead not visible
                img = 1.5 * blob(rng.uniform(0.1, 0.9, 2))
            else:
                img = blob(pos[b, k])
            img = img + 0.05 * rng.normal(size=(SIDE, SIDE))
            frames[b, k] = img.ravel()
    return times, frames, pos, spoiled


# ----------------------------------------------------------------------------
# The network: frame -> (position, log-variance)
# ----------------------------------------------------------------------------


def init_network(key, channels: int = 4):
    """Network parameters (float32: the network is the costly part, and needs no more)."""
    k1, k2, k3 = jax.random.split(key, 3)
    f32 = jnp.float32
    return {
        "conv1": {"w": jax.random.normal(k1, (channels, 1, 3, 3), f32) / 3.0, "b": jnp.zeros(channels, f32)},
        "conv2": {"w": jax.random.normal(k2, (1, channels, 3, 3), f32) / float(3.0 * np.sqrt(channels)),
                  "b": jnp.zeros(1, f32)},
        "sharp": jnp.asarray(2.0, f32),  # log inverse temperature of the spatial softmax
        "noise": {"w": 0.1 * jax.random.normal(k3, (2 * channels, 2), f32), "b": jnp.full(2, -5.0, f32)},
    }


_GRID = ((np.arange(SIDE) + 0.5) / SIDE).astype(np.float32)


def network(params, frames):
    """frames (..., SIDE²) -> positions (..., 2), log-variances (..., 2).

    Two 3×3 convolutions make a heat map; its spatial softmax gives the
    expected (x, y) ("soft arg-max"). The noise head reads the per-channel
    maximum and mean of the first feature maps (how bright and how spread the
    picture is) and returns two log-variances. A few hundred weights in all:
    convolutions share them over the picture, so the network cannot memorise
    individual training frames.
    """
    lead = frames.shape[:-1]
    img = frames.reshape((-1, 1, SIDE, SIDE))
    dn = ("NCHW", "OIHW", "NCHW")
    h = jax.lax.conv_general_dilated(img, params["conv1"]["w"], (1, 1), "SAME", dimension_numbers=dn)
    h = jax.nn.relu(h + params["conv1"]["b"][None, :, None, None])
    heat = jax.lax.conv_general_dilated(h, params["conv2"]["w"], (1, 1), "SAME", dimension_numbers=dn)
    heat = (heat[:, 0] + params["conv2"]["b"][0]) * jnp.exp(params["sharp"])
    prob = jax.nn.softmax(heat.reshape(heat.shape[0], -1), axis=-1).reshape(heat.shape)
    pos = jnp.stack([jnp.sum(prob * _GRID[:, None], axis=(1, 2)), jnp.sum(prob * _GRID[None, :], axis=(1, 2))], -1)
    feats = jnp.concatenate([jnp.max(h, axis=(2, 3)), jnp.mean(h, axis=(2, 3))], axis=-1)
    raw = feats @ params["noise"]["w"] + params["noise"]["b"]
    log_var = -12.0 + 12.0 * jax.nn.sigmoid(raw + 2.0)  # variance between 6e-6 and 1
    return pos.reshape(lead + (2,)), log_var.reshape(lead + (2,))


# ----------------------------------------------------------------------------
# The smoother layer
# ----------------------------------------------------------------------------


def unit_noise_models(times):
    """(A, Q₁) of shapes (B, T-1, 4, 4): the constant-velocity model in 2 axes on each
    sequence's own irregular frame times, for q = 1.

    Q(Δ) is linear in q (Q = q Q₁), so the exact discretisation runs once, on
    concrete times, outside the training loop; the loss only rescales Q₁.
    """
    times = np.asarray(times)
    B, T = times.shape
    unit = kx.constant_velocity(dims=2, q=1.0, r=1.0)
    A, Q = kx.discretize(unit.drift, unit.diffusion, np.diff(times, axis=1).ravel())
    return A.reshape(B, T - 1, 4, 4), Q.reshape(B, T - 1, 4, 4)


def smoothed_positions(A, Q1, meas, log_var, log_q):
    """Smoothed (x, y) of one sequence with per-step R_t = diag(exp(log_var_t))."""
    C = jnp.eye(4)[:2]  # the positions are measured
    R = jax.vmap(jnp.diag)(jnp.exp(log_var))  # (T, 2, 2): heteroscedastic
    model = kx.StateSpace(A=A, C=C, Q=jnp.exp(log_q) * Q1, R=R)
    return kx.smooth(model, meas).states[:, :2]


def batch_smooth(AQ, meas, log_var, log_q):
    A, Q1 = AQ
    return jax.vmap(smoothed_positions, in_axes=(0, 0, 0, 0, None))(A, Q1, meas, log_var, log_q)


def rmse(a, b):
    return float(jnp.sqrt(jnp.mean((a - b) ** 2)))


def run(n_train: int = 40, n_test: int = 32, T: int = 40, steps_net: int = 300, steps_joint: int = 200,
        seed: int = 0, progress: bool = False) -> dict:
    """Train (a), (b), (c) and return their position RMSE on held-out sequences (+ timings)."""
    rng = np.random.default_rng(seed)
    t_tr, f_tr, p_tr, s_tr = simulate(rng, n_train, T)
    t_te, f_te, p_te, s_te = simulate(rng, n_test, T)
    f_tr, f_te = jnp.asarray(f_tr, jnp.float32), jnp.asarray(f_te, jnp.float32)
    p_tr, p_te, s_te = jnp.asarray(p_tr), jnp.asarray(p_te), jnp.asarray(s_te)
    aq_tr, aq_te = unit_noise_models(t_tr), unit_noise_models(t_te)
    started = time.perf_counter()

    # (a) The network alone: per-frame regression of the position.
    def loss_net(params):
        pos, _ = network(params, f_tr)
        return jnp.mean((pos - p_tr) ** 2)

    net = kx.fit(loss_net, init_network(jax.random.key(seed)), optax.adam(2e-2), steps=steps_net,
                 progress=progress).params
    pos_te, _ = network(net, f_te)
    err_net = rmse(pos_te, p_te)

    # (b) Fixed-noise smoother on that network: one constant R and q, fitted by the same loss.
    pos_tr, _ = network(net, f_tr)

    def loss_fixed(th):
        lv = jnp.broadcast_to(th["log_r"], pos_tr.shape)
        return jnp.mean((batch_smooth(aq_tr, pos_tr, lv, th["log_q"]) - p_tr) ** 2)

    fixed = kx.fit(loss_fixed, {"log_r": jnp.log(1e-3), "log_q": jnp.log(1e-4)}, optax.adam(0.05),
                   steps=steps_joint // 2, progress=progress).params
    lv_te = jnp.broadcast_to(fixed["log_r"], pos_te.shape)
    err_fixed = rmse(batch_smooth(aq_te, pos_te, lv_te, fixed["log_q"]), p_te)

    # (c) Joint: network (measurement and per-frame noise) and q, through the smoother.
    def loss_joint(th):
        meas, lv = network(th["net"], f_tr)
        return jnp.mean((batch_smooth(aq_tr, meas, lv, th["log_q"]) - p_tr) ** 2)

    joint = kx.fit(loss_joint, {"net": net, "log_q": fixed["log_q"]}, optax.adam(1e-2), steps=steps_joint,
                   progress=progress).params
    meas_te, lv_joint = network(joint["net"], f_te)
    err_joint = rmse(batch_smooth(aq_te, meas_te, lv_joint, joint["log_q"]), p_te)
    # How the learned noise separates spoiled from clean frames (held-out data).
    lv_mean = jnp.mean(lv_joint, axis=-1)
    return {
        "network_alone": err_net,
        "fixed_noise_smoother": err_fixed,
        "joint": err_joint,
        "learned_sd_clean": float(jnp.exp(0.5 * jnp.median(lv_mean[~s_te]))),
        "learned_sd_spoiled": float(jnp.exp(0.5 * jnp.median(lv_mean[s_te]))),
        "seconds": time.perf_counter() - started,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--fast", action="store_true", help="the small, quick version the tests run")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    jax.config.update("jax_enable_x64", True)
    kwargs = FAST if args.fast else {}
    res = run(seed=args.seed, progress=not args.fast, **kwargs)
    print("Position RMSE on held-out sequences (fraction of the frame width):")
    print(f"  (a) network alone              {res['network_alone']:.4f}")
    print(f"  (b) smoother with fixed noise  {res['fixed_noise_smoother']:.4f}")
    print(f"  (c) joint training             {res['joint']:.4f}")
    print(f"Learned measurement sd: clean frames {res['learned_sd_clean']:.3g}, "
          f"spoiled frames {res['learned_sd_spoiled']:.3g}   ({res['seconds']:.0f} s)")


FAST = dict(n_train=16, n_test=16, T=24, steps_net=150, steps_joint=100)

if __name__ == "__main__":
    main()
