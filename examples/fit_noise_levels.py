"""Fitting noise levels, twice: with ``kx.fit`` and with a hand-written Optax loop.

The scenario is invented and simulated below (no real site or data set): the
water level of an imaginary holding pond is read every ten minutes by two
gauges, a float gauge (noise s.d. 2 cm) and a pressure gauge (noise s.d.
5 cm) that drops out now and then. The level drifts with a slowly changing
rate (a "local linear trend": level and rate as the state). We pretend not to
know how fast the rate wanders (the process-noise level) nor how noisy each
gauge is, and learn them.

1. ``kx.fit``: minimise the held-out prediction error of the smoother, with
   a validation split for early stopping and a progress display.
2. A plain Optax loop (no ``kx.fit``): maximise the exact log-likelihood,
   then standard errors from the observed information.
3. Expectation–maximisation from the same start, for comparison.

Run:  python examples/fit_noise_levels.py      (well under a minute on a laptop CPU)
"""

import jax
import jax.numpy as jnp
import numpy as np
import optax

import kalmax as kx

jax.config.update("jax_enable_x64", True)

# ---------------------------------------------------------------- invented data
rng = np.random.default_rng(2024)
T = 1000
A = np.array([[1.0, 1.0], [0.0, 1.0]])  # level += rate; rate drifts
C = np.array([[1.0, 0.0], [1.0, 0.0]])  # both gauges read the level (cm)
true_q = 0.01  # rate wander (cm per step)²
Q_shape = np.array([[1 / 3, 1 / 2], [1 / 2, 1.0]])  # integrated random walk shape
true_R = np.diag([2.0**2, 5.0**2])

x = np.zeros((T, 2))
x[0] = [120.0, 0.05]
L_Q = np.linalg.cholesky(true_q * Q_shape)
for t in range(T - 1):
    x[t + 1] = A @ x[t] + L_Q @ rng.standard_normal(2)
y = x @ C.T + rng.standard_normal((T, 2)) @ np.sqrt(true_R)
mask = np.ones((T, 2), bool)
mask[rng.random(T) < 0.3, 1] = False  # the pressure gauge drops out
y[~mask] = np.nan
y, mask = jnp.asarray(y), jnp.asarray(mask)

# A deliberately poor starting model: process noise 100x too large, both gauges
# assumed equally noisy; a vague prior on the first state.
nominal = kx.StateSpace(A=jnp.asarray(A), C=jnp.asarray(C), Q=jnp.asarray(Q_shape),
                        R=jnp.eye(2) * 9.0, x0_mean=jnp.asarray([y[0, 0], 0.0]), x0_cov=jnp.diag(jnp.array([100.0, 1.0])))
spec = kx.Parameterization(nominal, Q=kx.LogScale(), R=kx.DiagonalCov())


def describe(label, model):
    q, r = float(model.Q[1, 1]), np.diag(np.asarray(model.R))
    print(f"{label:>22}: q = {q:.4f}, gauge s.d. = {np.sqrt(r).round(2)} cm; "
          f"ratios q/r1 = {q / r[0]:.5f}, r2/r1 = {r[1] / r[0]:.2f}")


describe("truth", nominal.replace(Q=true_q * jnp.asarray(Q_shape), R=jnp.asarray(true_R)))
describe("start", nominal)

# ------------------------------------------------- 1. kx.fit on held-out error
# Scaling every covariance by the same factor leaves the smoothed means, and
# so the held-out error, unchanged: this criterion sees only the *ratios*
# q/r1 and r2/r1 (compare those with the truth), and it is a noisier
# criterion than the likelihood. Its strength is that it asks exactly what a
# user wants: predict what the smoother has not seen.
# Three disjoint sets of observed entries: training (what the smoother sees),
# a held-out set the loss scores, and a validation set for early stopping.
folds = kx.holdout_folds(mask, 4, seed=0)
hold, valid = folds[0], folds[1]
train_mask = mask & ~valid  # the validation entries are never seen while fitting


def heldout_loss(p):
    return kx.prediction_error(spec.model(p), y, train_mask, hold)


def validation(p):
    return kx.prediction_error(spec.model(p), y, mask & ~hold, valid)


result = kx.fit(heldout_loss, spec.init(), optax.adam(0.1), steps=400,
                validation_fn=validation, patience=60)
describe("kx.fit (held-out)", spec.model(result.params))
print(f"{'':>22}  best step {result.best_step} of {result.steps_run}, "
      f"validation MSE {result.history['validation'][0]:.2f} -> {result.history['validation'][result.best_step]:.2f}")

# ------------------------------------------- 2. the same, by hand, on likelihood
def neg_log_lik(p):
    return -kx.log_likelihood(spec.model(p), y, mask)


optimizer = optax.adam(0.05)
params = spec.init()
opt_state = optimizer.init(params)


@jax.jit
def step(params, opt_state):
    loss, grads = jax.value_and_grad(neg_log_lik)(params)
    updates, opt_state = optimizer.update(grads, opt_state, params)
    return optax.apply_updates(params, updates), opt_state, loss


for i in range(400):
    params, opt_state, loss = step(params, opt_state)
    if i % 100 == 0:
        print(f"{'hand loop':>22}  step {i:3d}  -log-lik {float(loss):.3f}")
fitted = spec.model(params)
describe("hand loop (likelihood)", fitted)
# Standard errors of the learned quantities (delta method from the log-parameters).
se = kx.standard_errors(neg_log_lik, params,
                        of=lambda p: {"q": spec.model(p).Q[1, 1], "R": jnp.diag(spec.model(p).R)})
print(f"{'':>22}  q = {float(fitted.Q[1, 1]):.4f} ± {float(se['q']):.4f}; "
      f"R diag = {np.asarray(jnp.diag(fitted.R)).round(2)} ± {np.asarray(se['R']).round(2)}")

# --------------------------------------------------------- 3. EM for comparison
# EM learns a full Q (three numbers, not one scale) with closed-form updates
# and no learning rate; it climbs fast at first and then slowly (linear
# convergence), which is why it is often used to initialise gradient fitting.
em_model, ll = kx.em(nominal, y, mask, iterations=200, fields=("Q", "R"))
describe("EM (full Q, R)", em_model)
print(f"{'':>22}  log-likelihood {ll[0]:.2f} -> {ll[-1]:.2f} (never decreasing: {bool(np.all(np.diff(ll) > -1e-8))})")
