"""linalg.py: the LAPACK route for large blocks, and that no LAPACK call ever sees a batch that can hang.

Blocks up to ``WRITTEN_OUT_MAX`` are factorised by written-out code on CPU and
never reach LAPACK; larger ones go through two primitives whose CPU lowering
issues LAPACK in chunks that jaxlib 0.10.2 runs inline (the diagnosis is in
the module docstring of ``kalmax/_src/linalg.py``). Here ``WRITTEN_OUT_MAX`` is
set to 0 so that small, cheap blocks take the LAPACK route, and:

- values are checked against NumPy's dense Cholesky and solves (common practice),
  derivatives against central differences and the written-out route (its own
  closed-form rules, Golub & Van Loan 4th ed. Alg. 4.2.1 and 3.1.1/3.1.2);
- the lowered program of a *vmapped* gradient is read: every LAPACK custom call
  must have batch × work below jaxlib's inline bound. Before the primitives, a
  chunk under ``lax.map`` gained the vmap axis and this failed;
- the same program runs to the end in a subprocess with a time-out (it hung in
  2 of 3 runs on a loaded 2-core machine before the fix);
- no module but ``linalg.py`` issues a decomposition of a time-indexed batch.
"""

import math
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import reference as ref
from helpers import to_model
from kalmax._src import linalg

# jaxlib 0.10.2's batched LAPACK kernels schedule a batch on the thread pool
# (and block the thread they run on) once batch × work reaches about 2·10⁵,
# with work k³/3 for potrf and k²m for trsm (read off the jaxlib kernels; see
# linalg.py). Kept here as a number of its own, not linalg's chunk setting.
JAXLIB_INLINE_BOUND = 200_000


@pytest.fixture
def lapack_route(monkeypatch):
    """Every block through the LAPACK primitives, whatever its size."""
    monkeypatch.setattr(linalg, "WRITTEN_OUT_MAX", 0)


def _spd(rng, shape, k):
    G = rng.standard_normal(shape + (k, k))
    return G @ np.swapaxes(G, -1, -2) + k * np.eye(k)


def test_values_against_numpy(rng, lapack_route):
    S = _spd(rng, (2, 3), 4)
    B = rng.standard_normal((2, 3, 4, 2))
    L = np.linalg.cholesky(S)
    got = linalg.chol(jnp.asarray(S))
    np.testing.assert_allclose(got, L, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(linalg.lsolve(got, jnp.asarray(B)), np.linalg.solve(L, B), rtol=1e-11, atol=1e-12)
    np.testing.assert_allclose(linalg.lsolve(got, jnp.asarray(B), transpose=True),
                               np.linalg.solve(np.swapaxes(L, -1, -2), B), rtol=1e-11, atol=1e-12)
    # One L against a batch of right-hand sides (the columns path), and under jit.
    solve_one = jax.jit(lambda L, B: linalg.lsolve(L, B))
    np.testing.assert_allclose(solve_one(got[0, 0], jnp.asarray(B)), np.linalg.solve(L[0, 0], B), rtol=1e-11,
                               atol=1e-12)
    np.testing.assert_allclose(jax.jit(linalg.spd_inverse)(jnp.asarray(S)), np.linalg.inv(S), rtol=1e-10, atol=1e-12)
    # Not positive definite: NaN, as jnp.linalg.cholesky.
    assert np.all(np.isnan(linalg.chol(jnp.asarray(-S[0, 0]))))


@pytest.mark.parametrize("k", [1, 3, linalg.BATCH_STRAIGHT_MAX, linalg.BATCH_STRAIGHT_MAX + 1, 12])
def test_written_out_routes_against_numpy(rng, k):
    # Straight-line code for a batch of blocks up to BATCH_STRAIGHT_MAX, the
    # column loop above it (both the default CPU route, no patching); values,
    # and a derivative against central differences (common practice).
    assert linalg._written_out(k)
    S = _spd(rng, (2, 3), k)
    B = rng.standard_normal((2, 3, k, 2))
    L = np.linalg.cholesky(S)
    got = jax.jit(linalg.chol)(jnp.asarray(S))
    np.testing.assert_allclose(got, L, rtol=1e-12, atol=1e-12)
    for tr in (False, True):
        ref_x = np.linalg.solve(np.swapaxes(L, -1, -2) if tr else L, B)
        np.testing.assert_allclose(jax.jit(lambda L, B: linalg.lsolve(L, B, transpose=tr))(got, jnp.asarray(B)),
                                   ref_x, rtol=1e-11, atol=1e-12)
    # One L against a batch of right-hand sides.
    np.testing.assert_allclose(linalg.lsolve(got[0, 0], jnp.asarray(B)), np.linalg.solve(L[0, 0], B),
                               rtol=1e-11, atol=1e-12)
    bad = S.copy()
    bad[1, 2] = -bad[1, 2]
    Lb = np.asarray(linalg.chol(jnp.asarray(bad)))
    assert np.all(np.isnan(Lb[1, 2])) and np.all(np.isfinite(Lb[0]))  # NaN only in the failed block
    E = rng.standard_normal(S.shape)
    E = jnp.asarray(E + np.swapaxes(E, -1, -2))
    h = 1e-6
    Sj, Bj = jnp.asarray(S), jnp.asarray(B)
    gS = jax.grad(_loss)(Sj, Bj)
    fd = (_loss(Sj + h * E, Bj) - _loss(Sj - h * E, Bj)) / (2 * h)
    np.testing.assert_allclose(jnp.sum(gS * E), fd, rtol=1e-6)


def test_block_above_written_out_size_against_numpy(rng):
    k = linalg.WRITTEN_OUT_MAX + 1  # the genuine LAPACK route, no patching
    S = _spd(rng, (3,), k)
    B = rng.standard_normal((3, k, 2))
    L = jax.jit(linalg.chol)(jnp.asarray(S))
    np.testing.assert_allclose(L, np.linalg.cholesky(S), rtol=1e-10, atol=1e-12)
    X = jax.jit(lambda L, B: linalg.lsolve(L, B, transpose=True))(L, jnp.asarray(B))
    np.testing.assert_allclose(X, np.linalg.solve(np.swapaxes(np.linalg.cholesky(S), -1, -2), B), rtol=1e-10)


def _loss(S, B):
    L = linalg.chol(S)
    return (jnp.sum(jnp.sin(linalg.lsolve(L, B, transpose=True))) + jnp.sum(linalg.lsolve(L, B) ** 2)
            + jnp.sum(L ** 3))


def test_derivatives_against_central_differences(rng, lapack_route):
    # Reverse, forward and forward-over-reverse (what fitting.information
    # uses) against central differences along a random symmetric direction
    # (common practice).
    S = jnp.asarray(_spd(rng, (2,), 3))
    B = jnp.asarray(rng.standard_normal((2, 3, 2)))
    E = rng.standard_normal(S.shape)
    E = jnp.asarray(E + np.swapaxes(E, -1, -2))
    D = jnp.asarray(rng.standard_normal(B.shape))
    h = 1e-5
    loss = jax.jit(_loss)
    grad = jax.jit(jax.grad(_loss, argnums=(0, 1)))
    gS, gB = grad(S, B)
    np.testing.assert_allclose(jnp.sum(gS * E), (loss(S + h * E, B) - loss(S - h * E, B)) / (2 * h), rtol=1e-7)
    np.testing.assert_allclose(jnp.sum(gB * D), (loss(S, B + h * D) - loss(S, B - h * D)) / (2 * h), rtol=1e-7)
    _, tangent = jax.jit(lambda s, e: jax.jvp(lambda s: _loss(s, B), (s,), (e,)))(S, E)
    np.testing.assert_allclose(tangent, jnp.sum(gS * E), rtol=1e-7)
    hess = jax.jit(jax.hessian(lambda s: _loss(s, B)))(S)
    hE = jnp.tensordot(hess, E, axes=3)
    fd = (grad(S + h * E, B)[0] - grad(S - h * E, B)[0]) / (2 * h)
    np.testing.assert_allclose(hE, fd, rtol=1e-5, atol=1e-6)


def test_nested_vmap_matches_a_loop(rng, lapack_route):
    S = jnp.asarray(_spd(rng, (2, 3), 3))
    B = jnp.asarray(rng.standard_normal((2, 3, 3, 2)))
    grad = jax.jit(jax.grad(_loss))
    batched = jax.jit(jax.vmap(jax.vmap(jax.grad(_loss))))(S, B)
    for i in range(2):
        for j in range(3):
            np.testing.assert_allclose(batched[i, j], grad(S[i, j], B[i, j]), rtol=1e-12, atol=1e-13)


_SLOW = not os.environ.get("KALMAX_SLOW")


@pytest.mark.parametrize("method", [
    "parallel",
    pytest.param("scan", marks=pytest.mark.skipif(_SLOW, reason="set KALMAX_SLOW=1 to run")),
    pytest.param("scan-recompute", marks=pytest.mark.skipif(_SLOW, reason="set KALMAX_SLOW=1 to run")),
    pytest.param("covariance", marks=pytest.mark.skipif(_SLOW, reason="set KALMAX_SLOW=1 to run")),
])
def test_backends_through_the_lapack_route_against_the_textbook_filter(rng, lapack_route, method):
    # A JAX backend with all its decompositions on the LAPACK primitives, under
    # vmap: the log-likelihood against the NumPy covariance-form filter
    # (Särkkä 2013, Bayesian Filtering and Smoothing, Ch. 4; tests/reference.py)
    # and its gradient along a direction of Q against central differences of
    # that filter's log-likelihood (common practice). One small compiled
    # program: compilation dominates the cost.
    import kalmax as kx

    T = 6
    md = ref.random_model(rng, 3, 2, T, time_varying=False)
    model = to_model(md)
    data = [ref.random_data(rng, md, T) for _ in range(2)]
    ys = np.stack([np.where(mask, y, 0.0) for y, mask in data])
    masks = np.stack([mask for _, mask in data])

    def one(m, y, w):
        ll, g = jax.value_and_grad(lambda m: kx.log_likelihood(m, y, w, method=method))(m)
        return ll, g.Q

    ll, gQ = jax.jit(jax.vmap(one, in_axes=(None, 0, 0)))(model, ys, masks)
    E = rng.standard_normal((3, 3))
    E = E + E.T
    h = 1e-6
    for i in range(2):
        np.testing.assert_allclose(ll[i], ref.kalman_filter(md, ys[i], masks[i]).log_likelihood, rtol=1e-9)
        up = ref.kalman_filter({**md, "Q": md["Q"] + h * E}, ys[i], masks[i]).log_likelihood
        down = ref.kalman_filter({**md, "Q": md["Q"] - h * E}, ys[i], masks[i]).log_likelihood
        np.testing.assert_allclose(np.sum(gQ[i] * E), (up - down) / (2 * h), rtol=1e-6)


_LAPACK_CALL = re.compile(r"custom_call @lapack_(\w+?)_ffi\(.*?: \((tensor<[^)]*)\) ->")


def lapack_calls(hlo_text):
    """(routine, operand shapes) of every LAPACK custom call in lowered StableHLO text."""
    calls = []
    for routine, types in _LAPACK_CALL.findall(hlo_text):
        shapes = [tuple(int(d) for d in dims.split("x")) for dims in re.findall(r"tensor<([\dx]+)x[a-z]+\d+>", types)]
        calls.append((routine[1:], shapes))  # drop the type letter: potrf, trsm
    return calls


def _inline_excess(calls):
    """The calls whose batch × work reaches jaxlib's inline bound."""
    bad = []
    for routine, shapes in calls:
        batch, k = math.prod(shapes[0][:-2]), shapes[0][-1]
        if routine == "potrf":
            work = k ** 3 / 3
        elif routine == "trsm":
            work = k * k * shapes[1][-1]
        else:
            work = math.inf  # nothing else is expected from this package
        if batch * work >= JAXLIB_INLINE_BOUND:
            bad.append((routine, shapes, batch * work))
    return bad


def test_vmapped_gradient_issues_only_inline_lapack_calls(lapack_route):
    # 4 trajectories × 70,000 blocks: each trajectory alone is chunked; the vmap
    # axis must be folded into the chunking as well.
    S = jax.ShapeDtypeStruct((4, 70_000, 3, 3), jnp.float64)
    B = jax.ShapeDtypeStruct((4, 70_000, 3, 2), jnp.float64)
    text = jax.jit(jax.vmap(jax.grad(_loss, argnums=(0, 1)))).lower(S, B).as_text()
    calls = lapack_calls(text)
    assert {routine for routine, _ in calls} == {"potrf", "trsm"}, calls
    assert _inline_excess(calls) == []


# A decomposition primitive in a printed jaxpr: "out = name[params] args" or "out = name args".
_DECOMPOSITION_PRIMITIVE = re.compile(r"=\s+(cholesky|triangular_solve|lu|lu_pivots_to_permutation|eigh|eig|svd|qr"
                                      r"|kalmax_lapack_\w+)\b")


def test_parallel_backend_gradient_under_vmap_issues_no_lapack():
    # The issue's program (method="parallel", vmap of grad) with blocks of the
    # written-out size: no LAPACK call at all. T is small here because the
    # program's structure does not depend on it beyond the number of levels;
    # tests/test_stress_hang.py runs T = 66,000.
    import kalmax as kx

    T, n = 8, 2
    m = kx.StateSpace(A=0.9 * jnp.eye(n), C=jnp.ones((1, n)), Q=0.1 * jnp.eye(n), R=jnp.eye(1),
                      x0_mean=jnp.zeros(n), x0_cov=jnp.eye(n))
    y = jnp.zeros((3, T, 1))
    mask = jnp.ones((3, T, 1), bool)
    loss = jax.grad(lambda m, y, w: kx.log_likelihood(m, y, w, method="parallel"))
    # The jaxpr (cheaper than lowering) names every primitive, nested ones too.
    text = str(jax.make_jaxpr(jax.vmap(loss, in_axes=(None, 0, 0)))(m, y, mask))
    assert _DECOMPOSITION_PRIMITIVE.findall(text) == []


_HANG_PROGRAM = textwrap.dedent(
    """
    import sys
    import jax
    jax.config.update("jax_enable_x64", True)
    import jax.numpy as jnp, numpy as np
    from kalmax._src import linalg
    linalg.WRITTEN_OUT_MAX = 0  # the LAPACK route for 2x2 blocks
    V, N, k, reps = 8, 20_000, 2, 10
    rng = np.random.default_rng(0)
    G = rng.standard_normal((V, N, k, k))
    S = jnp.asarray(G @ np.swapaxes(G, -1, -2) + k * np.eye(k))
    B = jnp.asarray(rng.standard_normal((V, N, k, 2)))
    def loss(S, B):
        L = linalg.chol(S)
        return (jnp.sum(linalg.lsolve(L, B) ** 2) + jnp.sum(linalg.lsolve(L, B, transpose=True) ** 2)
                + jnp.sum(linalg.spd_inverse(S)))
    f = jax.jit(jax.vmap(jax.grad(loss, argnums=(0, 1))))
    for _ in range(reps):
        gS, gB = jax.block_until_ready(f(S, B))
    assert np.all(np.isfinite(np.asarray(gS)))
    print("finished")
    """
)


def test_vmapped_lapack_gradient_finishes():
    # 8 × 20,000 blocks under vmap: before the fix each LAPACK call saw 8 × its
    # chunk, and this hung at 0 % CPU in 2 of 3 runs (gdb: pool threads in
    # lapack_dtrsm_ffi → ParallelBatchMap → BlockingCounter::Wait). Fixed: ~10 s.
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    try:
        out = subprocess.run([sys.executable, "-c", _HANG_PROGRAM], capture_output=True, text=True, timeout=120,
                             env=env)
    except subprocess.TimeoutExpired:
        pytest.fail("the vmapped gradient through the LAPACK route did not finish in 120 s (thread-pool hang)")
    assert out.returncode == 0, out.stderr[-2000:]
    assert "finished" in out.stdout


# Decompositions of a batch (anything LAPACK-backed) belong in linalg.py. Two
# exceptions act on one parameter-space matrix, never on a time-indexed batch.
_DECOMPOSITION = re.compile(r"\b(?:jnp\.linalg|jax\.numpy\.linalg|lax\.linalg|jax\.lax\.linalg|jax\.scipy\.linalg"
                            r"|jsp\.linalg|jsl)\.(\w+)")
_ALLOWED = {("fitting.py", "eigh"), ("prox.py", "svd"), ("components.py", "block_diag"),
            ("objectives.py", "block_diag")}
_NOT_DECOMPOSITIONS = {"norm", "block_diag"}


def test_no_decomposition_outside_linalg():
    src = Path(linalg.__file__).resolve().parent
    found = []
    for path in sorted(src.rglob("*.py")):
        if path.name == "linalg.py":
            continue
        text = path.read_text()
        assert not re.search(r"from jax(\.numpy|\.scipy|\.lax)?\.?linalg import|from jax\.scipy import linalg", text), \
            f"{path.name} imports a linalg module directly"
        for name in _DECOMPOSITION.findall(text):
            if (path.name, name) not in _ALLOWED and name not in _NOT_DECOMPOSITIONS:
                found.append((str(path.relative_to(src)), name))
    assert found == [], f"decompositions outside linalg.py: {found}"


@pytest.mark.parametrize("k", [1, 3, 9])
def test_psd_within_agrees_with_numpy_eigenvalues(k):
    """psd_within(S, s) is λ_min(S) > −s; checked against NumPy's symmetric eigensolver
    (LAPACK syevd) on matrices whose smallest eigenvalue is set on either side of −s."""
    rng = np.random.default_rng(k)
    Qm, _ = np.linalg.qr(rng.standard_normal((k, k)))
    slack = 1e-3
    cases = []
    for lam_min in (-10 * slack, -2 * slack, -0.5 * slack, 0.0, 1.0):
        ev = np.concatenate([[lam_min], rng.uniform(0.5, 2.0, k - 1)])
        cases.append((Qm * ev) @ Qm.T)
    S = np.stack(cases)
    want = np.linalg.eigvalsh(S)[:, 0] > -slack
    got = np.asarray(linalg.psd_within(jnp.asarray(S), jnp.full(len(cases), slack)))
    np.testing.assert_array_equal(got, want)
    assert want.tolist() == [False, False, True, True, True]
