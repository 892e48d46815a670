"""The alternatives measured for float32 (see ``kalmax/_src/backends/cpu.py``).

Usage: ``python benchmarks/float32_alternatives.py [--count 200] [--T 200] [--seed 7]``

On the sweep of ``tests/float32_sweep.py`` (same seed and cases as
``benchmarks/float32_sweep.py``), the fraction of cases within 1e-3 of the
float64 reference for:

* ``ne32``: float32 normal equations (kalmax's assembly and block Cholesky,
  ``blocktri``) with the refinement of ``accuracy.refine`` — what the pure-JAX
  backends do;
* ``ne32-equilibrated``: the same after symmetric diagonal scaling
  D H D, D = diag(H)^(-1/2), and with D rounded to powers of two;
* ``ne32-no-pivot-check``: the same with the pivot monitor switched off;
* ``qr32``: a square-root information factorisation (Householder QR of the
  whitened blocks, one step at a time; Paige & Saunders (1977), SIAM J.
  Numer. Anal. 14(2) -- from memory), all in float32 NumPy arithmetic, then
  the same kind of refinement with the model's residual (a prototype: NumPy,
  not JAX);
* ``kf32``: the textbook float32 covariance Kalman filter + RTS smoother.

The double factor of the compiled kernel is ``benchmarks/float32_sweep.py``.
"""

from __future__ import annotations

import argparse
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests"))


def _ne32(model, y, mask, scale, pow2, pivot):
    import jax.numpy as jnp

    from kalmax._src import accuracy, blocktri, tolerances
    from kalmax._src.checks import canonicalize
    from kalmax._src.normal_equations import assemble

    model, y, mask, dims, dt = canonicalize(model, y, mask)
    w = mask.astype(dt)
    s = assemble(model, y, w)
    tol = tolerances.pivot_tolerance(dt, dims.n, flat_prior=False) if pivot else -1.0
    if scale:
        d = 1 / jnp.sqrt(jnp.diagonal(s.diag, axis1=-2, axis2=-1))
        if pow2:
            d = jnp.exp2(jnp.round(jnp.log2(d)))
        x, f = blocktri.factor_solve(d[:, :, None] * s.diag * d[:, None, :], d[1:, :, None] * s.sub * d[:-1, None, :],
                                     s.rhs * d, tol)
        x = x * d

        def solve(f_, v):
            return blocktri.solve(f_, v * d) * d
    else:
        x, f = blocktri.factor_solve(s.diag, s.sub, s.rhs, tol)
        solve = blocktri.solve
    return accuracy.refine(model, y, w, x, f.ok, f, solve)[0]


def _householder_r(M):
    """R of a batch of QR factorisations, in M's dtype (NumPy's qr computes float32 in double)."""
    import numpy as np

    M = np.array(M, copy=True)
    _, m, k = M.shape
    for j in range(min(m - 1, k)):
        x = M[:, j:, j]
        s = np.abs(x).max(axis=-1)
        s = np.where(s > 0, s, 1).astype(M.dtype)
        xs = x / s[:, None]
        alpha = -np.where(xs[:, 0] >= 0, 1, -1).astype(M.dtype) * np.sqrt(np.sum(xs * xs, -1))
        v = xs.copy()
        v[:, 0] -= alpha
        vn = np.sum(v * v, -1)
        beta = np.where(vn > 0, 2 / np.where(vn > 0, vn, 1), 0).astype(M.dtype)
        sub = M[:, j:, j:]
        M[:, j:, j:] = sub - beta[:, None, None] * v[:, :, None] * np.einsum("bi,bij->bj", v, sub)[:, None, :]
    return M[:, :k, :]


def _qr32(md, y, mask, steps=4):
    """Square-root information smoother in float32, then refinement with the model's residual."""
    import numpy as np

    import float32_sweep as fs

    dt = np.float32
    c = lambda a: np.asarray(a, dt)  # noqa: E731
    A, Q, C, R, m0, P0 = (c(md[k]) for k in ("A", "Q", "C", "R", "m0", "P0"))
    w = c(mask)
    yy = c(np.where(mask, y, 0))
    B, T, p = yy.shape
    n = A.shape[-1]
    eye_n, eye_p = np.eye(n, dtype=dt), np.eye(p, dtype=dt)
    inv = lambda L: fs.solve(L, np.broadcast_to(eye_n, L.shape))  # noqa: E731
    Rt = inv(fs.cholesky(P0))
    zt = np.einsum("bij,bj->bi", Rt, m0)
    U11, U12, c1 = np.zeros((B, T, n, n), dt), np.zeros((B, T, n, n), dt), np.zeros((B, T, n), dt)
    for t in range(T):
        wt = w[:, t]
        Lr = fs.cholesky(wt[:, :, None] * wt[:, None, :] * R + (1 - wt)[:, :, None] * eye_p)
        WC = fs.solve(Lr, wt[:, :, None] * C)
        Wy = fs.solve(Lr, (wt * yy[:, t])[..., None])[..., 0]
        if t < T - 1:
            Lq = fs.cholesky(Q[:, t])
            aug = np.concatenate([
                np.concatenate([Rt, np.zeros((B, n, n), dt), zt[..., None]], -1),
                np.concatenate([WC, np.zeros((B, p, n), dt), Wy[..., None]], -1),
                np.concatenate([-fs.solve(Lq, A[:, t]), inv(Lq), np.zeros((B, n, 1), dt)], -1)], -2)
            Rf = _householder_r(aug)
            U11[:, t], U12[:, t], c1[:, t] = Rf[:, :n, :n], Rf[:, :n, n:2 * n], Rf[:, :n, -1]
            Rt, zt = Rf[:, n:2 * n, n:2 * n], Rf[:, n:2 * n, -1]
        else:
            Rf = _householder_r(np.concatenate([np.concatenate([Rt, zt[..., None]], -1),
                                                np.concatenate([WC, Wy[..., None]], -1)], -2))
            U11[:, t], c1[:, t] = Rf[:, :n, :n], Rf[:, :n, -1]

    def back(z):
        x = np.empty_like(z)
        x[:, -1] = fs.solve(U11[:, -1], z[:, -1][..., None])[..., 0]
        for t in range(T - 2, -1, -1):
            rhs = z[:, t] - np.einsum("bij,bj->bi", U12[:, t], x[:, t + 1])
            x[:, t] = fs.solve(U11[:, t], rhs[..., None])[..., 0]
        return x

    def solve_h(r):  # H = UᵀU
        z = np.empty_like(r)
        z[:, 0] = fs.solve(np.swapaxes(U11[:, 0], -1, -2), r[:, 0][..., None])[..., 0]
        for t in range(1, T):
            rhs = r[:, t] - np.einsum("bji,bj->bi", U12[:, t - 1], z[:, t - 1])
            z[:, t] = fs.solve(np.swapaxes(U11[:, t], -1, -2), rhs[..., None])[..., 0]
        return back(z)

    def residual(x):  # −∇J(x), in float32
        Rr = w[..., :, None] * w[..., None, :] * R[:, None] + (1 - w)[..., :, None] * eye_p
        e = w * (yy - np.einsum("bpi,bti->btp", C, x))
        r = np.einsum("bpi,btp->bti", C, w * fs.solve(Rr, e[..., None])[..., 0])
        Qr = fs.solve(Q, (x[:, 1:] - np.einsum("btij,btj->bti", A, x[:, :-1]))[..., None])[..., 0]
        r[:, :-1] += np.einsum("btki,btk->bti", A, Qr)
        r[:, 1:] -= Qr
        r[:, 0] -= fs.solve(P0, (x[:, 0] - m0)[..., None])[..., 0]
        return r

    x = back(c1)
    est = np.full(B, np.inf)
    for _ in range(steps):
        d = solve_h(residual(x))
        est = np.abs(d).max(axis=(1, 2)) / np.abs(x).max(axis=(1, 2))
        x = x + d
    return np.where((est <= 1e-3)[:, None, None], x, np.nan)


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--count", type=int, default=200)
    ap.add_argument("--T", type=int, default=200)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args(argv)

    import jax

    jax.config.update("jax_enable_x64", True)
    import numpy as np

    import float32_sweep as fs

    variants = {"ne32": (False, False, True), "ne32-equilibrated": (True, False, True),
                "ne32-equilibrated-pow2": (True, True, True), "ne32-no-pivot-check": (False, False, False)}
    res = {k: [] for k in list(variants) + ["qr32", "kf32"]}
    for g in fs.group(fs.draw_cases(args.seed, args.count, args.T)):
        x64, _ = fs.filter_group(g, np.float64)
        x32, _ = fs.filter_group(g, np.float32)
        model = fs.kalmax_model(g.md, np.float32)
        y = g.y.astype(np.float32)
        for name, (sc, p2, pv) in variants.items():
            f = jax.jit(jax.vmap(lambda m, yy, k, sc=sc, p2=p2, pv=pv: _ne32(m, yy, k, sc, p2, pv)))
            x = np.asarray(f(model, y, g.mask), np.float64)
            res[name] += [fs.rel_err(x[i], x64[i]) for i in range(len(g.cases))]
        with np.errstate(all="ignore"):
            xq = _qr32(g.md, g.y, g.mask)
        res["qr32"] += [fs.rel_err(xq[i], x64[i]) for i in range(len(g.cases))]
        res["kf32"] += [fs.rel_err(x32[i], x64[i]) for i in range(len(g.cases))]
    for k, v in res.items():
        v = np.array(v)
        print(f"{k:24s} within 1e-3: {np.mean(v <= 1e-3):6.1%}   NaN: {int(np.sum(~np.isfinite(v)))}")


if __name__ == "__main__":
    main()
