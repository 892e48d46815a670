// One trajectory of the smoothing primitive: assemble + factor + solve in one
// sweep over time, solves with the stored factor, and the implicit-function
// gradients. The maths is that of kalmax/_src/normal_equations.py and
// kalmax/_src/blocktri.py; names follow those files.
//
// Normal equations H x = g (block tridiagonal, blocks n-by-n):
//   H_tt      = C_tᵀS_tC_t + [t<T-1] A_tᵀQ_t⁻¹A_t + [t≥1] Q_{t-1}⁻¹ + [t=0] P_0⁻¹
//   H_{t+1,t} = −Q_t⁻¹A_t
//   g_t       = C_tᵀS_t(y_t − d_t) − [t<T-1] A_tᵀQ_t⁻¹b_t + [t≥1] Q_{t-1}⁻¹b_{t-1}
//               + [t=0] P_0⁻¹m_0
// S_t is the precision of the observed entries K of y_t, (R_t)_KK⁻¹ padded
// with zeros. We gather K explicitly (at most p entries, indices into a small
// array) which is the same as the masked R̃_t of the JAX path: R̃_t is a
// permutation of blockdiag(R_KK, I) and the identity part meets only zero rows.
//
// Every precision-weighted product is a Gram matrix of whitened factors
// (Lq⁻¹A, Lr⁻¹C_K, ...), so diagonal blocks are positive semi-definite by
// construction.
//
// Block Cholesky H = L Lᵀ (L_t lower, M_t = H_{t,t-1} L_{t-1}⁻ᵀ):
//   L_t L_tᵀ = H_tt − M_t M_tᵀ,  z_t = L_t⁻¹(g_t − M_t z_{t-1}),
//   x_t = L_t⁻ᵀ(z_t − M_{t+1}ᵀ x_{t+1}).
// The factor is assembled and factorised step by step: block t of H is built
// right before it is eliminated, so H itself is never stored.
#pragma once

#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <limits>

#include "dense.h"

namespace kalmax_cpu {

// Pointers to one trajectory's inputs. A field flagged time-varying (tv)
// holds one block per step; otherwise the single block serves every step.
template <class Real>
struct Trajectory {
  int T = 0, n = 0, p = 0;
  const Real* A = nullptr;
  const Real* Q = nullptr;
  const Real* b = nullptr;  // nullptr: no transition offset
  const Real* C = nullptr;
  const Real* R = nullptr;
  const Real* d = nullptr;   // nullptr: no measurement offset
  const Real* m0 = nullptr;  // nullptr: zero prior mean
  const Real* P0 = nullptr;  // nullptr: flat (improper) prior on x_0
  const Real* y = nullptr;   // (T, p)
  const Real* w = nullptr;   // (T, p) 0/1 observation mask
  bool A_tv = false, Q_tv = false, b_tv = false, C_tv = false, R_tv = false, d_tv = false;

  const Real* At(int t) const { return A_tv ? A + std::size_t(t) * n * n : A; }
  const Real* Qt(int t) const { return Q_tv ? Q + std::size_t(t) * n * n : Q; }
  const Real* bt(int t) const { return b_tv ? b + std::size_t(t) * n : b; }
  const Real* Ct(int t) const { return C_tv ? C + std::size_t(t) * p * n : C; }
  const Real* Rt(int t) const { return R_tv ? R + std::size_t(t) * p * p : R; }
  const Real* dt(int t) const { return d_tv ? d + std::size_t(t) * p : d; }
};

// Workspace sizes (in Real elements and ints) for one trajectory.
inline std::size_t workspace_reals(int n, int p) {
  const std::size_t n2 = std::size_t(n) * n, p2 = std::size_t(p) * p, pn = std::size_t(p) * n;
  return 20 * n2 + 4 * p2 + 3 * pn + 16 * std::size_t(n) + 8 * std::size_t(p) + 64;
}

// Carves named scratch arrays out of one buffer (no allocation per step).
template <class Real>
class Arena {
 public:
  explicit Arena(Real* base) : next_(base) {}
  Real* take(std::size_t count) {
    Real* out = next_;
    next_ += count;
    return out;
  }

 private:
  Real* next_;
};

template <class Real>
inline void fill(Real* x, std::size_t count, Real value) {
  std::fill(x, x + count, value);
}

template <class Real>
inline void copy(Real* dst, const Real* src, std::size_t count) {
  std::copy(src, src + count, dst);
}

// Whitened transition blocks for one (A, Q): with Lq Lqᵀ = Q,
//   Wi = Lq⁻¹, WA = Lq⁻¹A, GAA = AᵀQ⁻¹A, Qinv = Q⁻¹, Hsub = −Q⁻¹A.
template <class Real, int NK>
struct TransitionBlocks {
  Real *Lq, *Wi, *WA, *GAA, *Qinv, *Hsub, *Wb;

  void allocate(Arena<Real>& arena, int n) {
    const std::size_t n2 = std::size_t(n) * n;
    Lq = arena.take(n2);
    Wi = arena.take(n2);
    WA = arena.take(n2);
    GAA = arena.take(n2);
    Qinv = arena.take(n2);
    Hsub = arena.take(n2);
    Wb = arena.take(n);
  }

  bool compute(const Real* A, const Real* Q, int n_) {
    const int n = fixed<NK>(n_);
    const int n2 = n * n;
    sym_lower<Real, NK>(Lq, Q, n);
    if (!cholesky<Real, NK>(Lq, Lq, n)) return false;
    fill(Wi, n2, Real(0));
    for (int i = 0; i < n; ++i) Wi[i * n + i] = Real(1);
    lsolve_rows<Real, NK>(Lq, Wi, Wi, n, n);
    lsolve_rows<Real, NK>(Lq, A, WA, n, n);
    fill(GAA, n2, Real(0));
    fill(Qinv, n2, Real(0));
    fill(Hsub, n2, Real(0));
    add_cross<Real, NK, NK>(GAA, WA, WA, n, n, n, Real(1));
    add_cross<Real, NK, NK>(Qinv, Wi, Wi, n, n, n, Real(1));
    add_cross<Real, NK, NK>(Hsub, Wi, WA, n, n, n, Real(-1));
    return true;
  }

  // Offset terms: g_t += −WAᵀ Wb and g_{t+1} += Wiᵀ Wb with Wb = Lq⁻¹ b.
  void offset_terms(const Real* b, Real* g_now, Real* g_next, int n_) {
    const int n = fixed<NK>(n_);
    lsolve_vec<Real, NK>(Lq, b, Wb, n);
    add_tmatvec<Real, NK>(g_now, WA, Wb, n, n, Real(-1));
    add_tmatvec<Real, NK>(g_next, Wi, Wb, n, n, Real(1));
  }
};

// Indices of the observed entries of a mask row; returns their count.
template <class Real>
inline int observed(const Real* w, int p, int* idx) {
  int k = 0;
  for (int i = 0; i < p; ++i)
    if (w[i] > Real(0)) idx[k++] = i;
  return k;
}

// Lower Cholesky factor of the symmetrised observed sub-block R_KK.
template <class Real>
inline bool observed_cov_factor(Real* Lr, const Real* R, int p, const int* idx, int k) {
  for (int a = 0; a < k; ++a)
    for (int c = 0; c <= a; ++c)
      Lr[a * k + c] = Real(0.5) * (R[idx[a] * p + idx[c]] + R[idx[c] * p + idx[a]]);
  return cholesky<Real, 0>(Lr, Lr, k);
}

// ---------------------------------------------------------------------------
// Solves with a stored factor.

// z_t = L_t⁻¹(g_t − M_t z_{t-1}), in place on z (which holds g on entry).
template <class Real, int NK>
inline void forward_substitute(const Real* L, const Real* M, Real* z, int T, int n_) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  for (int t = 0; t < T; ++t) {
    Real* zt = z + std::size_t(t) * n;
    if (t > 0) {
      const Real* Mt = M + std::size_t(t - 1) * n2;
      const Real* zp = zt - n;
      for (int i = 0; i < n; ++i) {
        Real s = 0;
        for (int j = 0; j < n; ++j) s += Mt[i * n + j] * zp[j];
        zt[i] -= s;
      }
    }
    lsolve_vec<Real, NK>(L + std::size_t(t) * n2, zt, zt, n);
  }
}

// One step of back substitution: x_t = L_t⁻ᵀ(z_t − M_{t+1}ᵀ x_{t+1}), in place
// on x_t (holding z_t). x_next is null at the last step.
template <class Real, int NK>
inline void back_step(const Real* Lt, const Real* Mnext, const Real* x_next, Real* xt, int n_) {
  const int n = fixed<NK>(n_);
  if (x_next != nullptr) {
    for (int r = 0; r < n; ++r) {
      const Real a = x_next[r];
      const Real* Mr = Mnext + r * n;
      for (int i = 0; i < n; ++i) xt[i] -= a * Mr[i];
    }
  }
  ltsolve_vec_inplace<Real, NK>(Lt, xt, n);
}

template <class Real, int NK>
inline void back_substitute(const Real* L, const Real* M, Real* x, int T, int n_) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  for (int t = T - 1; t >= 0; --t) {
    const bool last = t == T - 1;
    back_step<Real, NK>(L + std::size_t(t) * n2, last ? nullptr : M + std::size_t(t) * n2,
                        last ? nullptr : x + std::size_t(t + 1) * n, x + std::size_t(t) * n, n);
  }
}

// x = H⁻¹ v with the stored factor (NaN everywhere when the factor failed).
template <class Real, int NK>
void solve_one(const Real* L, const Real* M, bool ok, const Real* v, Real* x, int T, int n) {
  const std::size_t Tn = std::size_t(T) * n;
  if (!ok) {
    fill(x, Tn, quiet_nan<Real>());
    return;
  }
  copy(x, v, Tn);
  forward_substitute<Real, NK>(L, M, x, T, n);
  back_substitute<Real, NK>(L, M, x, T, n);
}

// ---------------------------------------------------------------------------
// Forward: assemble, factorise and solve in one sweep.

// A Schur complement whose pivots fell below this fraction of the matching
// diagonal entry of H has lost all but a couple of digits to cancellation;
// same rule and threshold as kalmax/_src/blocktri.py (common practice: a small
// multiple of n·eps).
template <class Real>
inline Real pivot_tolerance(int n) {
  return Real(100) * Real(n) * std::numeric_limits<Real>::epsilon();
}

// Returns 1 when the factorisation succeeded, 0 when a pivot collapsed or a
// covariance was not positive definite (x is then NaN; L and M are NaN from
// the first failing block on, as in the JAX path).
template <class Real, int NK>
int forward_one(const Trajectory<Real>& P, Real* x, Real* L, Real* M, Real* ws, int* idx) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n;
  Arena<Real> arena(ws);
  Real* H = arena.take(n2);      // H_tt being built
  Real* S = arena.take(n2);      // Schur complement H_tt − M_t M_tᵀ
  Real* g = arena.take(n);       // g_t being built
  Real* next_diag = arena.take(n2);  // contribution of transition t-1 to H_tt
  Real* next_rhs = arena.take(n);    // ... and to g_t
  Real* sub_prev = arena.take(n2);   // H_{t,t-1}
  Real* Lr = arena.take(std::size_t(p) * p);
  Real* WC = arena.take(std::size_t(p) * n);
  Real* ey = arena.take(p);
  // Cached measurement blocks for fully observed steps when C and R are fixed.
  Real* Lr_full = arena.take(std::size_t(p) * p);
  Real* WC_full = arena.take(std::size_t(p) * n);
  Real* G_full = arena.take(n2);
  TransitionBlocks<Real, NK> tb;
  tb.allocate(arena, n);
  // Offset terms of a time-invariant (A, Q, b): computed once.
  Real* gb_now = arena.take(n);
  Real* gb_next = arena.take(n);
  Real* Wp = arena.take(n2);  // whitened prior precision factor
  Real* wm = arena.take(n);

  const Real nan = quiet_nan<Real>();
  const Real tol = pivot_tolerance<Real>(n);
  const bool fixed_transition = !P.A_tv && !P.Q_tv;
  int ok = 1;
  int failed_at = -1;  // first block whose factorisation broke down

  if (T > 1 && fixed_transition) {
    if (!tb.compute(P.A, P.Q, n)) failed_at = 0;
    if (failed_at < 0 && P.b != nullptr && !P.b_tv) {
      fill(gb_now, n, Real(0));
      fill(gb_next, n, Real(0));
      tb.offset_terms(P.b, gb_now, gb_next, n);
    }
  }
  bool full_cached = false;
  if (!P.C_tv && !P.R_tv && p > 0) {
    for (int i = 0; i < p; ++i) idx[i] = i;
    if (observed_cov_factor(Lr_full, P.R, p, idx, p)) {
      lsolve_rows<Real, NK>(Lr_full, P.C, WC_full, p, n);
      fill(G_full, n2, Real(0));
      add_cross<Real, NK, NK>(G_full, WC_full, WC_full, p, n, n, Real(1));
      full_cached = true;
    }
  }

  fill(next_diag, n2, Real(0));
  fill(next_rhs, n, Real(0));
  for (int t = 0; t < T && failed_at < 0; ++t) {
    copy(H, next_diag, n2);
    copy(g, next_rhs, n);

    if (t == 0 && P.P0 != nullptr) {
      // P_0⁻¹ = WpᵀWp with Wp = Lp⁻¹; P_0⁻¹m_0 = Wpᵀ(Wp m_0).
      Real* Lp = S;  // S is free until the factor step
      sym_lower<Real, NK>(Lp, P.P0, n);
      if (!cholesky<Real, NK>(Lp, Lp, n)) {
        failed_at = 0;
        break;
      }
      fill(Wp, n2, Real(0));
      for (int i = 0; i < n; ++i) Wp[i * n + i] = Real(1);
      lsolve_rows<Real, NK>(Lp, Wp, Wp, n, n);
      add_cross<Real, NK, NK>(H, Wp, Wp, n, n, n, Real(1));
      if (P.m0 != nullptr) {
        lsolve_vec<Real, NK>(Lp, P.m0, wm, n);
        add_tmatvec<Real, NK>(g, Wp, wm, n, n, Real(1));
      }
    }

    // Measurement terms C_tᵀS_tC_t and C_tᵀS_t(y_t − d_t).
    const Real* yt = P.y + std::size_t(t) * p;
    const int k = observed(P.w + std::size_t(t) * p, p, idx);
    if (k > 0) {
      const Real* Ct = P.Ct(t);
      const Real* dt = P.d != nullptr ? P.dt(t) : nullptr;
      for (int a = 0; a < k; ++a) ey[a] = yt[idx[a]] - (dt ? dt[idx[a]] : Real(0));
      if (k == p && full_cached) {
        lsolve_vec<Real, 0>(Lr_full, ey, ey, p);
        for (std::size_t i = 0; i < n2; ++i) H[i] += G_full[i];
        add_tmatvec<Real, NK>(g, WC_full, ey, p, n, Real(1));
      } else {
        if (!observed_cov_factor(Lr, P.Rt(t), p, idx, k)) {
          failed_at = t;
          break;
        }
        for (int a = 0; a < k; ++a) copy(WC + std::size_t(a) * n, Ct + std::size_t(idx[a]) * n, n);
        lsolve_rows<Real, NK>(Lr, WC, WC, k, n);
        lsolve_vec<Real, 0>(Lr, ey, ey, k);
        add_cross<Real, NK, NK>(H, WC, WC, k, n, n, Real(1));
        add_tmatvec<Real, NK>(g, WC, ey, k, n, Real(1));
      }
    }

    // Transition t (to step t+1): its share of H_tt and g_t now, the rest
    // carried to the next step.
    if (t < T - 1) {
      if (!fixed_transition && !tb.compute(P.At(t), P.Qt(t), n)) {
        failed_at = t;
        break;
      }
      for (std::size_t i = 0; i < n2; ++i) H[i] += tb.GAA[i];
      copy(next_diag, tb.Qinv, n2);
      fill(next_rhs, n, Real(0));
      if (P.b != nullptr) {
        if (fixed_transition && !P.b_tv) {
          for (int i = 0; i < n; ++i) g[i] += gb_now[i];
          copy(next_rhs, gb_next, n);
        } else {
          tb.offset_terms(P.bt(t), g, next_rhs, n);
        }
      }
    }

    // Eliminate block t.
    Real* Lt = L + std::size_t(t) * n2;
    Real* zt = x + std::size_t(t) * n;
    if (t == 0) {
      if (!cholesky<Real, NK>(Lt, H, n)) {
        failed_at = t;
        break;
      }
    } else {
      Real* Mt = M + std::size_t(t - 1) * n2;
      right_solve_lt<Real, NK>(Mt, sub_prev, Lt - n2, n);
      schur_lower<Real, NK>(S, H, Mt, n);
      if (!cholesky<Real, NK>(Lt, S, n)) {
        failed_at = t;
        break;
      }
      const Real* zp = zt - n;
      for (int i = 0; i < n; ++i) {
        Real s = 0;
        for (int j = 0; j < n; ++j) s += Mt[i * n + j] * zp[j];
        g[i] -= s;
      }
    }
    lsolve_vec<Real, NK>(Lt, g, zt, n);
    for (int i = 0; i < n; ++i) {
      const Real h = H[i * n + i];
      const Real d = Lt[i * n + i];
      if (!(d * d / (h > Real(0) ? h : Real(1)) > tol)) ok = 0;
    }
    if (t < T - 1) copy(sub_prev, tb.Hsub, n2);
  }

  const std::size_t Tn = std::size_t(T) * n;
  if (failed_at >= 0) {
    fill(L + std::size_t(failed_at) * n2, std::size_t(T - failed_at) * n2, nan);
    if (T > 1) {
      const int m_from = std::max(failed_at - 1, 0);
      fill(M + std::size_t(m_from) * n2, std::size_t(T - 1 - m_from) * n2, nan);
    }
    fill(x, Tn, nan);
    return 0;
  }
  back_substitute<Real, NK>(L, M, x, T, n);
  if (!ok) fill(x, Tn, nan);
  return ok;
}

// ---------------------------------------------------------------------------
// Gradients by implicit differentiation.
//
// With u = H⁻¹ x̄ and x = x*, the gradient of every input θ is
// −∂_θ[uᵀ∇ₓJ(x; θ)], where
//   uᵀ∇ₓJ = Σ_{t<T-1} δ_tᵀQ_t⁻¹r_t − Σ_t (C_t u_t)ᵀS_t e_t + u_0ᵀP_0⁻¹(x_0 − m_0),
//   r_t = x_{t+1} − A_t x_t − b_t,  δ_t = u_{t+1} − A_t u_t,  e_t = y_t − C_t x_t − d_t.
// Writing ρ = Q⁻¹r, φ = Q⁻¹δ, σ = S e, κ = S C u (zero off K), α = P_0⁻¹u_0,
// β = P_0⁻¹(x_0 − m_0), differentiating each term gives
//   Ā_t = ρ u_tᵀ + φ x_tᵀ    Q̄_t = sym(φ ρᵀ)      b̄_t = φ
//   C̄_t = σ u_tᵀ − κ x_tᵀ    R̄_t = −sym(κ σᵀ)     d̄_t = −κ     ȳ_t = κ
//   m̄_0 = α                  P̄_0 = sym(α βᵀ)
// with sym(X) = (X + Xᵀ)/2 because covariances are read through their
// symmetric part (dQ⁻¹ = −Q⁻¹ dQ Q⁻¹, dS = −S dR S on the observed block).
// Time-invariant fields sum the per-step terms (in double precision).

// Destination of one gradient field: per-step blocks in the output, or one
// double-precision accumulator for a time-invariant field.
template <class Real>
struct GradSink {
  Real* out = nullptr;    // output buffer (nullptr: field absent)
  double* acc = nullptr;  // accumulator when time-invariant
  bool tv = false;
  std::size_t item = 0;   // elements per block

  bool present() const { return out != nullptr; }
};

template <class D, class Real>
inline void add_outer(D* G, const Real* a, const Real* b, int r, int c, Real s) {
  for (int i = 0; i < r; ++i) {
    const Real ai = s * a[i];
    for (int j = 0; j < c; ++j) G[i * c + j] += ai * b[j];
  }
}

// G += s·(a bᵀ + b aᵀ)/2 for square r-by-r.
template <class D, class Real>
inline void add_sym_outer(D* G, const Real* a, const Real* b, int r, Real s) {
  const Real h = Real(0.5) * s;
  for (int i = 0; i < r; ++i)
    for (int j = 0; j < r; ++j) G[i * r + j] += h * (a[i] * b[j] + b[i] * a[j]);
}

template <class Real>
struct Gradients {
  GradSink<Real> A, Q, b, C, R, d, m0, P0;
  Real* y = nullptr;  // (T, p), always per step
};

// Accumulation buffer (double) sizes for time-invariant gradients.
inline std::size_t accumulator_size(int n, int p) {
  return 3 * std::size_t(n) * n + 2 * std::size_t(n) + std::size_t(p) * n + std::size_t(p) * p +
         std::size_t(p) + 8;
}

template <class Real, int NK>
void gradients_one(const Trajectory<Real>& P, const Real* L, const Real* M, bool ok, const Real* x,
                   const Real* xbar, Gradients<Real>& G, Real* ws, Real* u, double* acc, int* idx) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n, Tn = std::size_t(T) * n;

  // Assign accumulators to time-invariant fields; zero every destination.
  GradSink<Real>* sinks[] = {&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0};
  const int steps[] = {T - 1, T - 1, T - 1, T, T, T, 1, 1};
  double* next_acc = acc;
  for (int f = 0; f < 8; ++f) {
    GradSink<Real>& s = *sinks[f];
    if (!s.present()) continue;
    fill(s.out, (s.tv ? std::size_t(std::max(steps[f], 0)) : 1) * s.item, Real(0));
    if (!s.tv) {
      s.acc = next_acc;
      next_acc += s.item;
      std::fill(s.acc, s.acc + s.item, 0.0);
    }
  }
  fill(G.y, std::size_t(T) * p, Real(0));

  if (!ok) {
    const Real nan = quiet_nan<Real>();
    for (int f = 0; f < 8; ++f)
      if (sinks[f]->present())
        fill(sinks[f]->out, (sinks[f]->tv ? std::size_t(std::max(steps[f], 0)) : 1) * sinks[f]->item,
             nan);
    fill(G.y, std::size_t(T) * p, nan);
    return;
  }

  Arena<Real> arena(ws);
  Real* Lq = arena.take(n2);
  Real* Lr = arena.take(std::size_t(p) * p);
  Real* Lr_full = arena.take(std::size_t(p) * p);
  Real* rho = arena.take(n);
  Real* phi = arena.take(n);
  Real* sigma = arena.take(p);
  Real* kappa = arena.take(p);
  Real* alpha = arena.take(n);
  Real* beta = arena.take(n);

  // Per-block destination pointers for step t.
  auto dst = [](GradSink<Real>& s, int t, auto&& fn) {
    if (!s.present()) return;
    if (s.tv)
      fn(s.out + std::size_t(t) * s.item);
    else
      fn(s.acc);
  };

  const Real nan = quiet_nan<Real>();
  bool fail = false;
  if (T > 1 && !P.Q_tv) {
    sym_lower<Real, NK>(Lq, P.Q, n);
    fail = !cholesky<Real, NK>(Lq, Lq, n);
  }
  bool full_cached = false;
  if (!P.R_tv && p > 0) {
    for (int i = 0; i < p; ++i) idx[i] = i;
    full_cached = observed_cov_factor(Lr_full, P.R, p, idx, p);
  }

  // u = H⁻¹ x̄: forward sweep now, back sweep fused with the gradient terms.
  copy(u, xbar, Tn);
  forward_substitute<Real, NK>(L, M, u, T, n);
  for (int t = T - 1; t >= 0 && !fail; --t) {
    const bool last = t == T - 1;
    Real* ut = u + std::size_t(t) * n;
    const Real* xt = x + std::size_t(t) * n;
    back_step<Real, NK>(L + std::size_t(t) * n2, last ? nullptr : M + std::size_t(t) * n2,
                        last ? nullptr : ut + n, ut, n);

    // Transition t: needs u_t, u_{t+1}, x_t, x_{t+1}.
    if (!last) {
      const Real* At = P.At(t);
      const Real* un = ut + n;
      const Real* xn = xt + n;
      if (P.Q_tv) {
        sym_lower<Real, NK>(Lq, P.Qt(t), n);
        if (!cholesky<Real, NK>(Lq, Lq, n)) {
          fail = true;
          break;
        }
      }
      const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
      for (int i = 0; i < n; ++i) {
        Real ax = 0, au = 0;
        for (int j = 0; j < n; ++j) {
          ax += At[i * n + j] * xt[j];
          au += At[i * n + j] * ut[j];
        }
        rho[i] = xn[i] - ax - (bt ? bt[i] : Real(0));
        phi[i] = un[i] - au;
      }
      lsolve_vec<Real, NK>(Lq, rho, rho, n);
      ltsolve_vec_inplace<Real, NK>(Lq, rho, n);
      lsolve_vec<Real, NK>(Lq, phi, phi, n);
      ltsolve_vec_inplace<Real, NK>(Lq, phi, n);
      dst(G.A, t, [&](auto* gA) {
        add_outer(gA, rho, ut, n, n, Real(1));
        add_outer(gA, phi, xt, n, n, Real(1));
      });
      dst(G.Q, t, [&](auto* gQ) { add_sym_outer(gQ, phi, rho, n, Real(1)); });
      dst(G.b, t, [&](auto* gb) {
        for (int i = 0; i < n; ++i) gb[i] += phi[i];
      });
    }

    // Measurement t.
    const int k = observed(P.w + std::size_t(t) * p, p, idx);
    if (k > 0) {
      const Real* Ct = P.Ct(t);
      const Real* yt = P.y + std::size_t(t) * p;
      const Real* dt = P.d != nullptr ? P.dt(t) : nullptr;
      const Real* Lk = Lr_full;
      if (!(k == p && full_cached)) {
        if (!observed_cov_factor(Lr, P.Rt(t), p, idx, k)) {
          fail = true;
          break;
        }
        Lk = Lr;
      }
      for (int a = 0; a < k; ++a) {
        const Real* Crow = Ct + std::size_t(idx[a]) * n;
        Real sx = 0, su = 0;
        for (int j = 0; j < n; ++j) {
          sx += Crow[j] * xt[j];
          su += Crow[j] * ut[j];
        }
        sigma[a] = yt[idx[a]] - sx - (dt ? dt[idx[a]] : Real(0));
        kappa[a] = su;
      }
      lsolve_vec<Real, 0>(Lk, sigma, sigma, k);
      ltsolve_vec_inplace<Real, 0>(Lk, sigma, k);
      lsolve_vec<Real, 0>(Lk, kappa, kappa, k);
      ltsolve_vec_inplace<Real, 0>(Lk, kappa, k);
      Real* gy = G.y + std::size_t(t) * p;
      for (int a = 0; a < k; ++a) gy[idx[a]] = kappa[a];
      dst(G.C, t, [&](auto* gC) {
        for (int a = 0; a < k; ++a) {
          auto* row = gC + std::size_t(idx[a]) * n;
          const Real sa = sigma[a], ka = kappa[a];
          for (int j = 0; j < n; ++j) row[j] += sa * ut[j] - ka * xt[j];
        }
      });
      dst(G.R, t, [&](auto* gR) {
        for (int a = 0; a < k; ++a)
          for (int c = 0; c < k; ++c)
            gR[idx[a] * p + idx[c]] -= Real(0.5) * (kappa[a] * sigma[c] + sigma[a] * kappa[c]);
      });
      dst(G.d, t, [&](auto* gd) {
        for (int a = 0; a < k; ++a) gd[idx[a]] -= kappa[a];
      });
    }

    // Prior on x_0.
    if (t == 0 && P.P0 != nullptr) {
      Real* Lp = Lq;  // Lq is no longer needed at t = 0
      sym_lower<Real, NK>(Lp, P.P0, n);
      if (!cholesky<Real, NK>(Lp, Lp, n)) {
        fail = true;
        break;
      }
      for (int i = 0; i < n; ++i) {
        alpha[i] = ut[i];
        beta[i] = xt[i] - (P.m0 != nullptr ? P.m0[i] : Real(0));
      }
      lsolve_vec<Real, NK>(Lp, alpha, alpha, n);
      ltsolve_vec_inplace<Real, NK>(Lp, alpha, n);
      lsolve_vec<Real, NK>(Lp, beta, beta, n);
      ltsolve_vec_inplace<Real, NK>(Lp, beta, n);
      dst(G.m0, 0, [&](auto* gm) {
        for (int i = 0; i < n; ++i) gm[i] += alpha[i];
      });
      dst(G.P0, 0, [&](auto* gP) { add_sym_outer(gP, alpha, beta, n, Real(1)); });
    }
  }

  for (int f = 0; f < 8; ++f) {
    GradSink<Real>& s = *sinks[f];
    if (!s.present()) continue;
    if (fail) {
      fill(s.out, (s.tv ? std::size_t(std::max(steps[f], 0)) : 1) * s.item, nan);
    } else if (!s.tv) {
      for (std::size_t i = 0; i < s.item; ++i) s.out[i] = static_cast<Real>(s.acc[i]);
    }
  }
  if (fail) fill(G.y, std::size_t(T) * p, nan);
}

}  // namespace kalmax_cpu
