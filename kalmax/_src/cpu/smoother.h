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
// Diagonal R (Trajectory::R_diag, R given by its p variances per step): R_KK
// is diag(r_K), its Cholesky factor is diag(√r_K), and every product with the
// factor is a scaling of rows: whitening C_K costs O(k n) instead of
// O(k² n), S e is e/r, and the R gradient keeps only its diagonal
// (dℓ/dr_i = R̄_ii, since dR = e_i e_iᵀ dr_i).
//
// Diagonal Q (Trajectory::Q_diag, Q given by its n variances per step) the
// same way: Lq = diag(√q), Q⁻¹ = diag(1/q), log|Q| = Σ_i log q_i, so there is
// no Cholesky factorisation per step for a time-varying Q; Lq⁻¹A is A with
// row i divided by √q_i, Q⁻¹r is r/q, and the Q gradient keeps only its
// diagonal, Q̄_ii (the gradient w.r.t. the variances, dQ = e_i e_iᵀ dq_i).
// A variance that is not positive (or not finite) fails the step exactly as a
// dense Q that is not positive definite does.
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

#include <cmath>
#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <utility>
#include <vector>
#include <thread>
#include <memory>

#include "dense.h"
#include "patterns.h"

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
  bool R_diag = false;  // R holds the p variances of a diagonal R per block, not p×p
  bool Q_diag = false;  // Q holds the n variances of a diagonal Q per block, not n×n

  // Elements in one block of R, of Q.
  std::size_t R_item() const { return R_diag ? std::size_t(p) : std::size_t(p) * p; }
  std::size_t Q_item() const { return Q_diag ? std::size_t(n) : std::size_t(n) * n; }

  const Real* At(int t) const { return A_tv ? A + std::size_t(t) * n * n : A; }
  const Real* Qt(int t) const { return Q_tv ? Q + std::size_t(t) * Q_item() : Q; }
  const Real* bt(int t) const { return b_tv ? b + std::size_t(t) * n : b; }
  const Real* Ct(int t) const { return C_tv ? C + std::size_t(t) * p * n : C; }
  const Real* Rt(int t) const { return R_tv ? R + std::size_t(t) * R_item() : R; }
  const Real* dt(int t) const { return d_tv ? d + std::size_t(t) * p : d; }
};

// Workspace sizes (in Real elements and ints) for one trajectory.
inline std::size_t workspace_reals(int n, int p) {
  const std::size_t n2 = std::size_t(n) * n, p2 = std::size_t(p) * p, pn = std::size_t(p) * n;
  return 26 * n2 + 4 * p2 + 3 * pn + 16 * std::size_t(n) + 8 * std::size_t(p) + 64;
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

// The n variances q of a diagonal Q: inv receives 1/q_i. False unless every
// q_i is positive and finite (NaN included): the Cholesky factorisation of
// the dense diag(q) would report such a pivot as not positive.
template <class Real>
inline bool variances_inverse(Real* inv, const Real* q, int n) {
  for (int i = 0; i < n; ++i) {
    const Real v = q[i];
    if (!(v > Real(0)) || !std::isfinite(v)) return false;
    inv[i] = Real(1) / v;
  }
  return true;
}

// Q⁻¹ as an n×n matrix from one block of Q (time-invariant Q: computed once,
// so that later products with it are independent dot products): through the
// Cholesky factor L (n×n) of a dense block, or diag(1/q) when `diag` (the
// block holds the n variances). logdet (optional) receives log|Q|. False when
// Q is not positive definite. scratch: n entries.
template <class Real, int NK>
inline bool transition_precision(Real* Qinv, Real* logdet, const Real* Q, bool diag, int n_, Real* L,
                                 Real* scratch) {
  const int n = fixed<NK>(n_);
  if (!diag) {
    if (!sym_cholesky_inverse<Real, NK>(Qinv, L, Q, n, scratch)) return false;
    if (logdet != nullptr) *logdet = cholesky_logdet(L, n);
    return true;
  }
  if (!variances_inverse(scratch, Q, n)) return false;
  fill(Qinv, std::size_t(n) * n, Real(0));
  Real ld = 0;
  for (int i = 0; i < n; ++i) {
    Qinv[i * n + i] = scratch[i];
    ld += std::log(Q[i]);
  }
  if (logdet != nullptr) *logdet = ld;
  return true;
}

// Whitened transition blocks for one (A, Q): with Lq Lqᵀ = Q,
//   Wi = Lq⁻¹, WA = Lq⁻¹A, GAA = AᵀQ⁻¹A, Qinv = Q⁻¹,
//   HsubT = H_{t+1,t}ᵀ = −AᵀQ⁻¹ (kept transposed: that is how the factor step uses it).
// A diagonal Q (`diag`, Q given by its n variances q): Lq holds √q (n
// entries), WA is A with row i divided by √q_i, Qinv = diag(1/q) and
// HsubT = −Aᵀdiag(1/q), all O(n²); Wi is not used. GAA stays a product, O(n³).
template <class Real, int NK>
struct TransitionBlocks {
  Real *Lq, *Wi, *WA, *GAA, *Qinv, *HsubT, *Wb, *c;
  bool diag = false;  // Q given by its variances

  void allocate(Arena<Real>& arena, int n) {
    const std::size_t n2 = std::size_t(n) * n;
    Lq = arena.take(n2);
    Wi = arena.take(n2);
    WA = arena.take(n2);
    GAA = arena.take(n2);
    Qinv = arena.take(n2);
    HsubT = arena.take(n2);
    Wb = arena.take(n);
    c = arena.take(n);
  }

  bool compute(const Real* A, const Real* Q, int n_) {
    const int n = fixed<NK>(n_);
    const int n2 = n * n;
    if (diag) return compute_diagonal(A, Q, n);
    if (!sym_cholesky<Real, NK>(Lq, Q, n, c)) return false;
    fill(Wi, n2, Real(0));
    for (int i = 0; i < n; ++i) Wi[i * n + i] = Real(1);
    lsolve_rows<Real, NK>(Lq, Wi, Wi, n, n);
    lsolve_rows<Real, NK>(Lq, A, WA, n, n);
    fill(GAA, n2, Real(0));
    fill(Qinv, n2, Real(0));
    fill(HsubT, n2, Real(0));
    add_cross<Real, NK, NK>(GAA, WA, WA, n, n, n, Real(1));
    add_cross<Real, NK, NK>(Qinv, Wi, Wi, n, n, n, Real(1));
    add_cross<Real, NK, NK>(HsubT, WA, Wi, n, n, n, Real(-1));
    return true;
  }

  // The blocks of a diagonal Q = diag(q) (see above). c receives 1/q.
  bool compute_diagonal(const Real* A, const Real* q, int n_) {
    const int n = fixed<NK>(n_);
    const int n2 = n * n;
    if (!variances_inverse(c, q, n)) return false;
    for (int i = 0; i < n; ++i) Lq[i] = std::sqrt(q[i]);
    for (int i = 0; i < n; ++i) {
      const Real s = Real(1) / Lq[i];
      for (int j = 0; j < n; ++j) WA[i * n + j] = s * A[i * n + j];
    }
    fill(GAA, n2, Real(0));
    fill(Qinv, n2, Real(0));
    add_cross<Real, NK, NK>(GAA, WA, WA, n, n, n, Real(1));
    for (int i = 0; i < n; ++i) Qinv[i * n + i] = c[i];
    for (int j = 0; j < n; ++j)
      for (int i = 0; i < n; ++i) HsubT[j * n + i] = -A[i * n + j] * c[i];
    return true;
  }

  // Offset terms: g_t += −WAᵀ Wb and g_{t+1} += Wiᵀ Wb with Wb = Lq⁻¹ b
  // (diagonal Q: Wb = b/√q and Wiᵀ Wb = b/q).
  void offset_terms(const Real* b, Real* g_now, Real* g_next, int n_) {
    const int n = fixed<NK>(n_);
    if (diag) {
      for (int i = 0; i < n; ++i) Wb[i] = b[i] / Lq[i];
      add_tmatvec<Real, NK>(g_now, WA, Wb, n, n, Real(-1));
      for (int i = 0; i < n; ++i) g_next[i] += Wb[i] / Lq[i];
      return;
    }
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

// The measurement of one step restricted to its observed entries K: y_K,
// d_K, the rows C_K and the block R_KK, as every pass over time reads them.
// With a pattern cache (C and R time-invariant) the blocks of K's pattern
// come memoised (`memo`: R_KK⁻¹, F = R_KK⁻¹C_K, G = C_KᵀR_KK⁻¹C_K, log|R_KK|);
// otherwise (`memo` null) the caller's Lr holds the Cholesky factor of R_KK:
// k×k, or for a diagonal R (`diag`) only its k diagonal entries √r_K.
// Each pass keeps its own arithmetic for the two cases: the memoised blocks
// round differently from the per-step factor.
template <class Real, int NK>
struct Measurement {
  int n = 0;
  int k = 0;                                  // |K|
  const int* K = nullptr;                     // observed entries
  const PatternBlocks<Real>* memo = nullptr;  // memoised blocks, or nullptr
  const Real* y = nullptr;                    // y_t
  const Real* d = nullptr;                    // d_t (nullptr: no offset)
  const Real* C = nullptr;                    // C_t
  bool diag = false;                          // R diagonal: Lr holds √r_K (k entries)

  // Row a of C_K.
  const Real* C_row(int a) const { return C + std::size_t(K[a]) * fixed<NK>(n); }
  // (y_t − d_t) at observed entry a.
  Real centred(int a) const { return y[K[a]] - (d ? d[K[a]] : Real(0)); }
  // The residual (y_t − d_t − C_t x_t) at observed entry a.
  Real residual(int a, const Real* x) const { return centred(a) - dot<Real, NK>(C_row(a), x, n); }
};

// The measurement of step t (see Measurement). Without memoised blocks, K is
// gathered into idx (p entries) and Lr (p×p) receives the factor of R_KK
// (cs: its scratch). False when R_KK is not positive definite.
template <class Real, int NK>
inline bool measurement_at(const Trajectory<Real>& P, int t, PatternCache<Real>* cache, int* idx, Real* Lr,
                           Real* cs, Measurement<Real, NK>* m) {
  const int p = P.p;
  const Real* w = P.w + std::size_t(t) * p;
  m->n = P.n;
  m->y = P.y + std::size_t(t) * p;
  m->d = P.d != nullptr ? P.dt(t) : nullptr;
  m->C = P.Ct(t);
  m->memo = cache != nullptr ? cache->template lookup<NK>(w) : nullptr;
  if (m->memo != nullptr) {
    m->k = m->memo->k;
    m->K = m->memo->idx;
    return m->memo->ok;
  }
  m->K = idx;
  m->k = observed(w, p, idx);
  m->diag = P.R_diag;
  if (P.R_diag) return observed_sd(Lr, P.Rt(t), idx, m->k);
  return m->k == 0 || observed_cov_factor(Lr, P.Rt(t), p, idx, m->k, cs);
}

// ---------------------------------------------------------------------------
// Solves with a stored factor.
//
// The factor is stored as the inverses Li_t = L_t⁻¹ of the diagonal blocks
// (lower triangular, zeros above the diagonal), so that every later solve is
// a dense matrix-vector product: no dependency chain through a triangular
// substitution, which is what limits a sweep over small blocks.
//
// The sub-diagonal blocks M_t are stored only when A or Q varies in time.
// For a time-invariant transition, with the one block H_sub = H_{t,t-1}
// (kept as its transpose subT),
//   M_t v   = H_sub (Li_{t-1}ᵀ v)    and    M_{t+1}ᵀ v = Li_t (H_subᵀ v),
// which halves the memory of the factor and the traffic of each sweep.
template <class Real>
struct FactorView {
  const Real* Li = nullptr;    // (T, n, n) inverse diagonal blocks
  const Real* M = nullptr;     // (T-1, n, n), unused when subT is set
  const Real* subT = nullptr;  // (n, n) H_subᵀ: the compact form
};

// One step of forward substitution: z_t = Li_t (g_t − M_t z_{t-1}), in place
// on zt (which holds g_t on entry); zp is z_{t-1} (unused at t = 0).
// tmp, tmp2: scratch of n entries each.
template <class Real, int NK>
inline void forward_step(const FactorView<Real>& F, int t, const Real* zp, Real* zt, int n_, Real* tmp,
                         Real* tmp2) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  if (t > 0) {
    if (F.subT != nullptr) {
      tmatvec<Real, NK>(tmp, F.Li + std::size_t(t - 1) * n2, zp, n);
      add_tmatvec<Real, NK>(zt, F.subT, tmp, n, n, Real(-1));  // H_sub v = Σ_r v_r subT[r, :]
    } else {
      const Real* Mt = F.M + std::size_t(t - 1) * n2;
      matvec<Real, NK>(tmp, Mt, zp, n, n);
      for (int i = 0; i < n; ++i) zt[i] -= tmp[i];
    }
  }
  matvec<Real, NK>(tmp2, F.Li + std::size_t(t) * n2, zt, n, n);
  copy(zt, tmp2, n);
}

// z = L⁻¹ g over all steps, in place on z (which holds g on entry).
template <class Real, int NK>
inline void forward_substitute(const FactorView<Real>& F, Real* z, int T, int n_, Real* tmp, Real* tmp2) {
  const int n = fixed<NK>(n_);
  for (int t = 0; t < T; ++t)
    forward_step<Real, NK>(F, t, t > 0 ? z + std::size_t(t - 1) * n : nullptr, z + std::size_t(t) * n, n, tmp,
                           tmp2);
}

// One step of back substitution: x_t = Li_tᵀ(z_t − M_{t+1}ᵀ x_{t+1}), in place
// on x_t (holding z_t). x_next is null at the last step.
template <class Real, int NK>
inline void back_step(const FactorView<Real>& F, int t, const Real* x_next, Real* xt, int n_, Real* tmp,
                      Real* tmp2) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  const Real* Lit = F.Li + std::size_t(t) * n2;
  if (x_next != nullptr) {
    if (F.subT != nullptr) {
      matvec<Real, NK>(tmp, F.subT, x_next, n, n);
      matvec<Real, NK>(tmp2, Lit, tmp, n, n);
    } else {
      tmatvec<Real, NK>(tmp2, F.M + std::size_t(t) * n2, x_next, n);
    }
    for (int i = 0; i < n; ++i) xt[i] -= tmp2[i];
  }
  tmatvec<Real, NK>(tmp, Lit, xt, n);
  copy(xt, tmp, n);
}

template <class Real, int NK>
inline void back_substitute(const FactorView<Real>& F, Real* x, int T, int n_, Real* tmp, Real* tmp2) {
  const int n = fixed<NK>(n_);
  for (int t = T - 1; t >= 0; --t)
    back_step<Real, NK>(F, t, t == T - 1 ? nullptr : x + std::size_t(t + 1) * n, x + std::size_t(t) * n, n,
                        tmp, tmp2);
}

// x = H⁻¹ v with the stored factor (NaN everywhere when the factor failed).
template <class Real, int NK>
void solve_one(const FactorView<Real>& F, bool ok, const Real* v, Real* x, int T, int n, Real* tmp,
               Real* tmp2) {
  const std::size_t Tn = std::size_t(T) * n;
  if (!ok) {
    fill(x, Tn, quiet_nan<Real>());
    return;
  }
  copy(x, v, Tn);
  forward_substitute<Real, NK>(F, x, T, n, tmp, tmp2);
  back_substitute<Real, NK>(F, x, T, n, tmp, tmp2);
}

// ---------------------------------------------------------------------------
// Forward: assemble, factorise and solve in one sweep.

// The numerical settings of a solve. They are not constants of this file:
// kalmax/_src/tolerances.py defines them and kalmax/_src/backends/cpu.py
// passes them on every call as XLA FFI attributes, so the JAX paths and the
// kernel cannot drift apart.
struct SolveSettings {
  double pivot_tolerance = 0;  // smallest accepted (pivot)² / H_ii
  double trusted_error = 0;    // largest accepted estimate ‖δ‖∞/‖x‖∞
  int max_refine_steps = 0;    // at most this many corrections
  double stall_ratio = 0;      // stop once an estimate is not below this × the previous one
};

// ---------------------------------------------------------------------------
// Forward-error check and iterative refinement (kalmax/_src/accuracy.py).
//
// Forming H squares the condition number: information that is small next to
// the rest of H_tt (a quiet measurement beside a tight transition) is partly
// rounded away before the factorisation starts. The residual of the
// stationarity condition computed from the model, without forming H,
//   r = g − H x = −∇J(x) = Σ C_tᵀS_t e_t + A_tᵀQ_t⁻¹r_t − Q_{t-1}⁻¹r_{t-1} − P_0⁻¹(x_0 − m_0)
// (e, r the measurement and transition residuals, which are formed first, so
// the small terms keep their digits) gives δ = H⁻¹r ≈ x* − x. We add δ to x
// and report the answer as untrusted when ‖δ‖∞/‖x‖∞ exceeds trusted_error.

// Iterative refinement, as accuracy.refine: add δ_k = H⁻¹(−∇J(x_k)) while
// ‖δ_k‖∞/‖x_k‖∞ is above the trusted error, keeps shrinking by the stall
// ratio, and fewer than max_refine_steps were taken. The verdict is made on
// the last estimate alone: one that stalled inside the tolerance is
// accepted. False when the last estimate is still too big.
//
// One step is two sweeps. The first forms r_t = −∇J(x)_t and at once runs the
// forward substitution on it: the residual of step t needs only x (known),
// so its arithmetic has no dependency on the substitution chain and overlaps
// with it. The second back-substitutes and adds the correction to x.
template <class Real, int NK>
bool refine_one(const Trajectory<Real>& P, const FactorView<Real>& F, Real* x, Real* ws, int* idx,
                PatternCache<Real>* cache, const SolveSettings& settings) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n, Tn = std::size_t(T) * n;
  const Real tol = static_cast<Real>(settings.trusted_error);
  const Real stall = static_cast<Real>(settings.stall_ratio);
  Arena<Real> arena(ws);  // the factorisation's scratch is free again
  Real* Lq = arena.take(n2);
  Real* Qinv = arena.take(n2);
  Real* Lp = arena.take(n2);
  Real* Lr = arena.take(std::size_t(p) * p);
  Real* rho = arena.take(n);  // Q⁻¹ r_t of the transition from t
  Real* res = arena.take(n);
  Real* e = arena.take(p);
  Real* cs = arena.take(std::size_t(n > p ? n : p) + 1);
  Real* tmp = arena.take(n);
  Real* tmp2 = arena.take(n);

  // Time-invariant Q and the prior: factor once (Q⁻¹ as a matrix: the
  // residual's products with it are independent dot products, no chains).
  if (T > 1 && !P.Q_tv && !transition_precision<Real, NK>(Qinv, nullptr, P.Q, P.Q_diag, n, Lq, cs)) return false;
  if (P.P0 != nullptr && !sym_cholesky<Real, NK>(Lp, P.P0, n, cs)) return false;

  std::vector<Real> d(Tn);
  Real prev = std::numeric_limits<Real>::infinity();
  for (int k = 0; k < settings.max_refine_steps; ++k) {
    fill(d.data(), Tn, Real(0));
    for (int t = 0; t < T; ++t) {
      Real* rt = d.data() + std::size_t(t) * n;
      const Real* xt = x + std::size_t(t) * n;
      // Transition t → t+1: r_t += A_tᵀQ_t⁻¹ r'_t and r_{t+1} −= Q_t⁻¹ r'_t.
      if (t + 1 < T) {
        const Real* At = P.At(t);
        const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
        for (int i = 0; i < n; ++i)
          res[i] = xt[n + i] - dot<Real, NK>(At + std::size_t(i) * n, xt, n) - (bt ? bt[i] : Real(0));
        if (P.Q_tv && P.Q_diag) {  // Q_t⁻¹ r'_t = r'_t / q_t
          if (!variances_inverse(cs, P.Qt(t), n)) return false;
          for (int i = 0; i < n; ++i) rho[i] = res[i] * cs[i];
        } else if (P.Q_tv) {
          if (!sym_cholesky<Real, NK>(Lq, P.Qt(t), n, cs)) return false;
          lsolve_vec<Real, NK>(Lq, res, rho, n);
          ltsolve_vec_inplace<Real, NK>(Lq, rho, n);
        } else {
          matvec<Real, NK>(rho, Qinv, res, n, n);
        }
        add_tmatvec<Real, NK>(rt, At, rho, n, n, Real(1));
        for (int i = 0; i < n; ++i) rt[n + i] -= rho[i];
      }
      // Measurement t: r_t += C_tᵀ S_t e_t.
      Measurement<Real, NK> m;
      if (!measurement_at<Real, NK>(P, t, cache, idx, Lr, cs, &m)) return false;
      for (int a = 0; a < m.k; ++a) e[a] = m.residual(a, xt);
      if (m.memo != nullptr) {  // Cᵀ S e = Fᵀe with F = R_KK⁻¹C_K
        add_tmatvec<Real, NK>(rt, m.memo->F, e, m.k, n, Real(1));
      } else if (m.k > 0) {
        if (m.diag) {
          for (int a = 0; a < m.k; ++a) e[a] /= Lr[a] * Lr[a];
        } else {
          lsolve_vec<Real, 0>(Lr, e, e, m.k);
          ltsolve_vec_inplace<Real, 0>(Lr, e, m.k);  // S e on the observed entries
        }
        for (int a = 0; a < m.k; ++a) {
          const Real* Crow = m.C_row(a);
          for (int j = 0; j < n; ++j) rt[j] += e[a] * Crow[j];
        }
      }
      // Prior: r_0 −= P_0⁻¹(x_0 − m_0).
      if (t == 0 && P.P0 != nullptr) {
        for (int i = 0; i < n; ++i) res[i] = x[i] - (P.m0 != nullptr ? P.m0[i] : Real(0));
        lsolve_vec<Real, NK>(Lp, res, res, n);
        ltsolve_vec_inplace<Real, NK>(Lp, res, n);
        for (int i = 0; i < n; ++i) rt[i] -= res[i];
      }
      forward_step<Real, NK>(F, t, t > 0 ? rt - n : nullptr, rt, n, tmp, tmp2);
    }
    // Back substitution, adding the correction to x as it comes.
    Real dmax = 0, xmax = 0;
    bool finite = true;
    for (int t = T - 1; t >= 0; --t) {
      Real* dt_ = d.data() + std::size_t(t) * n;
      back_step<Real, NK>(F, t, t == T - 1 ? nullptr : dt_ + n, dt_, n, tmp, tmp2);
      Real* xt = x + std::size_t(t) * n;
      for (int i = 0; i < n; ++i) {
        finite = finite && std::isfinite(dt_[i]);
        dmax = std::max(dmax, std::abs(dt_[i]));
        xmax = std::max(xmax, std::abs(xt[i]));
        xt[i] += dt_[i];
      }
    }
    if (!finite) return false;
    const Real est = xmax > Real(0) ? dmax / xmax : dmax;
    if (est <= tol) return true;  // accepted, whether or not it stalled on the way
    if (k > 0 && !(est < stall * prev)) return false;  // stalled above the bar: more steps will not help
    prev = est;
  }
  return false;
}

// Writes x and the factor (Li = L_t⁻¹ blocks, M or subT: see FactorView).
// Returns 1 when the factorisation succeeded, 0 when a pivot collapsed or a
// covariance was not positive definite (x is then NaN; Li and M are NaN from
// the first failing block on, as in the JAX path).
//
// `cache` memoises measurement blocks by mask pattern; pass it only when C
// and R are time-invariant (nullptr otherwise).
//
// With a time-invariant transition the factor is stored compactly: M is not
// written and subT_out (n×n) receives H_subᵀ instead (see FactorView).
template <class Real, int NK>
int forward_one(const Trajectory<Real>& P, Real* x, Real* Li, Real* M, Real* subT_out, Real* ws,
                int* idx, PatternCache<Real>* cache, const SolveSettings& settings) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n;
  Arena<Real> arena(ws);
  Real* H = arena.take(n2);          // H_tt being built
  Real* S = arena.take(n2);          // Schur complement H_tt − M_t M_tᵀ
  Real* X = arena.take(n2);          // M_tᵀ = L_{t-1}⁻¹ H_{t,t-1}ᵀ
  Real* cs = arena.take(std::size_t(n > p ? n : p) + 1);  // Cholesky scratch
  Real* g = arena.take(n);           // g_t being built
  Real* next_diag = arena.take(n2);  // share of transition t-1 in H_tt
  Real* next_rhs = arena.take(n);    // ... and in g_t
  Real* subT_prev = arena.take(n2);  // H_{t,t-1}ᵀ
  Real* Lr = arena.take(std::size_t(p) * p);
  Real* WC = arena.take(std::size_t(p) * n);
  Real* ey = arena.take(p);
  TransitionBlocks<Real, NK> tb;
  tb.allocate(arena, n);
  tb.diag = P.Q_diag;
  Real* gb_now = arena.take(n);  // offset terms of a time-invariant (A, Q, b)
  Real* gb_next = arena.take(n);
  Real* Wp = arena.take(n2);  // whitened prior precision factor
  Real* wm = arena.take(n);

  const Real nan = quiet_nan<Real>();
  const Real tol = static_cast<Real>(settings.pivot_tolerance);
  const bool fixed_transition = !P.A_tv && !P.Q_tv;
  Real* tmp = arena.take(n);
  Real* tmp2 = arena.take(n);
  Real* Lt = arena.take(n2);  // L_t (only its inverse is stored)
  int ok = 1;
  int failed_at = -1;  // first block whose factorisation broke down

  if (T > 1 && fixed_transition) {
    if (!tb.compute(P.A, P.Q, n)) failed_at = 0;
    if (failed_at < 0 && P.b != nullptr && !P.b_tv) {
      fill(gb_now, n, Real(0));
      fill(gb_next, n, Real(0));
      tb.offset_terms(P.b, gb_now, gb_next, n);
    }
    copy(subT_prev, tb.HsubT, n2);
  }
  if (fixed_transition) fill(subT_out, n2, Real(0));  // T = 1: no transition at all

  // With a fixed transition the transition share of H_tt is one of three
  // constant blocks: AᵀQ⁻¹A (t = 0), Q⁻¹ + AᵀQ⁻¹A (inner steps), Q⁻¹ (t = T-1).
  Real* inner = arena.take(n2);
  if (fixed_transition && T > 1 && failed_at < 0)
    for (std::size_t i = 0; i < n2; ++i) inner[i] = tb.Qinv[i] + tb.GAA[i];

  fill(next_diag, n2, Real(0));
  fill(next_rhs, n, Real(0));
  for (int t = 0; t < T && failed_at < 0; ++t) {
    if (fixed_transition && T > 1)
      copy(H, t == 0 ? tb.GAA : (t == T - 1 ? tb.Qinv : inner), n2);
    else
      copy(H, next_diag, n2);
    copy(g, next_rhs, n);

    if (t == 0 && P.P0 != nullptr) {
      // P_0⁻¹ = WpᵀWp with Wp = Lp⁻¹; P_0⁻¹m_0 = Wpᵀ(Wp m_0).
      Real* Lp = S;  // S is free until the factor step
      if (!sym_cholesky<Real, NK>(Lp, P.P0, n, cs)) {
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
    Measurement<Real, NK> m;
    if (!measurement_at<Real, NK>(P, t, cache, idx, Lr, cs, &m)) {
      failed_at = t;
      break;
    }
    for (int a = 0; a < m.k; ++a) ey[a] = m.centred(a);
    if (m.memo != nullptr) {
      for (std::size_t i = 0; i < n2; ++i) H[i] += m.memo->G[i];
      add_tmatvec<Real, NK>(g, m.memo->F, ey, m.k, n, Real(1));
    } else if (m.k > 0) {  // with W = Lr⁻¹C_K: H_tt += WᵀW, g_t += Wᵀ(Lr⁻¹(y_K − d_K))
      if (m.diag) {
        whiten_observed_rows_diagonal<Real, NK>(WC, H, Lr, m.C, m.K, m.k, n);
        for (int a = 0; a < m.k; ++a) ey[a] /= Lr[a];
      } else {
        whiten_observed_rows<Real, NK>(WC, H, Lr, m.C, m.K, m.k, n);
        lsolve_vec<Real, 0>(Lr, ey, ey, m.k);
      }
      add_tmatvec<Real, NK>(g, WC, ey, m.k, n, Real(1));
    }

    // Transition t (to step t+1): its share of H_tt and g_t now, the rest
    // carried to the next step.
    if (t < T - 1) {
      if (!fixed_transition && !tb.compute(P.At(t), P.Qt(t), n)) {
        failed_at = t;
        break;
      }
      if (!fixed_transition) {
        for (std::size_t i = 0; i < n2; ++i) H[i] += tb.GAA[i];
        copy(next_diag, tb.Qinv, n2);
      }
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
    Real* Lit = Li + std::size_t(t) * n2;
    Real* zt = x + std::size_t(t) * n;
    if (t == 0) {
      if (!cholesky<Real, NK>(Lt, H, n, cs)) {
        failed_at = t;
        break;
      }
    } else {
      // X = M_tᵀ = L_{t-1}⁻¹ H_{t,t-1}ᵀ; then S = H_tt − XᵀX and
      // g_t −= Xᵀ z_{t-1}.
      lower_matmul<Real, NK>(X, Lit - n2, subT_prev, n);
      if (!fixed_transition) transpose<Real, NK>(M + std::size_t(t - 1) * n2, X, n);
      cross_update<Real, NK, NK>(S, H, X, X, n, n, n, Real(-1));
      if (!cholesky<Real, NK>(Lt, S, n, cs)) {
        failed_at = t;
        break;
      }
      add_tmatvec<Real, NK>(g, X, zt - n, n, n, Real(-1));
    }
    for (int i = 0; i < n; ++i) {
      const Real h = H[i * n + i];
      const Real d = Lt[i * n + i];
      if (!(d * d > tol * (h > Real(0) ? h : Real(1)))) ok = 0;  // d²/h > tol, no division
    }
    tri_inverse<Real, NK>(Lit, Lt, n);
    matvec<Real, NK>(zt, Lit, g, n, n);
    if (t < T - 1 && !fixed_transition) copy(subT_prev, tb.HsubT, n2);
  }

  const std::size_t Tn = std::size_t(T) * n;
  if (fixed_transition && T > 1) copy(subT_out, tb.HsubT, n2);
  if (failed_at >= 0) {
    fill(Li + std::size_t(failed_at) * n2, std::size_t(T - failed_at) * n2, nan);
    if (T > 1 && !fixed_transition) {
      const int m_from = failed_at > 0 ? failed_at - 1 : 0;
      fill(M + std::size_t(m_from) * n2, std::size_t(T - 1 - m_from) * n2, nan);
    }
    if (fixed_transition) fill(subT_out, n2, nan);
    fill(x, Tn, nan);
    return 0;
  }
  FactorView<Real> F;
  F.Li = Li;
  F.M = M;
  F.subT = fixed_transition ? subT_out : nullptr;
  back_substitute<Real, NK>(F, x, T, n, tmp, tmp2);
  if (ok) ok = refine_one<Real, NK>(P, F, x, ws, idx, cache, settings) ? 1 : 0;
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
// A diagonal Q or R keeps the diagonal only: Q̄_ii = φ_i ρ_i, R̄_ii = −κ_i σ_i.
// Time-invariant fields sum the per-step terms (in double precision).

// Destination of one gradient field: per-step blocks in the output, or one
// double-precision accumulator for a time-invariant field.
template <class Real>
struct GradSink {
  Real* out = nullptr;    // output buffer (nullptr: field absent)
  double* acc = nullptr;  // accumulator when time-invariant
  bool tv = false;
  bool diagonal = false;  // the field is a diagonal given by its entries (R or Q)
  std::size_t item = 0;   // elements per block

  bool present() const { return out != nullptr; }

  // fn(destination of the term of step t): block t of the output, or the
  // accumulator (fn takes Real* or double*). Nothing when the field is absent.
  template <class Fn>
  void add_at(int t, Fn&& fn) {
    if (!present()) return;
    if (tv)
      fn(out + std::size_t(t) * item);
    else
      fn(acc);
  }
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

// The sinks of one trajectory's gradients over one pass (gradients_one,
// loglik_one). On construction every present output is zeroed and each
// time-invariant field gets its double accumulator out of acc
// (accumulator_size entries); fail() writes NaN to every output; finish()
// rounds the accumulators into the outputs of the time-invariant fields.
template <class Real>
class GradSinks {
 public:
  GradSinks(Gradients<Real>& G, int T, int n, int p, double* acc)
      : G_(G),
        n_(n),
        p_(p),
        T_(T),
        sinks_{&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0},
        steps_{T - 1, T - 1, T - 1, T, T, T, 1, 1} {
    double* next_acc = acc;
    for (int f = 0; f < kFields; ++f) {
      GradSink<Real>& s = *sinks_[f];
      if (!s.present()) continue;
      fill(s.out, blocks(f) * s.item, Real(0));
      if (!s.tv) {
        s.acc = next_acc;
        next_acc += s.item;
        std::fill(s.acc, s.acc + s.item, 0.0);
      }
    }
    fill(G.y, std::size_t(T) * p, Real(0));
  }

  void fail() const {
    const Real nan = quiet_nan<Real>();
    for (int f = 0; f < kFields; ++f)
      if (sinks_[f]->present()) fill(sinks_[f]->out, blocks(f) * sinks_[f]->item, nan);
    fill(G_.y, std::size_t(T_) * p_, nan);
  }

  // R̄'s accumulator holds an unsymmetrised sum, and so does Q̄'s when
  // symmetrise_Q is set: their outputs get the symmetric part (a diagonal
  // field holds its diagonal only, which is kept as it is).
  void finish(bool symmetrise_Q) const {
    for (int f = 0; f < kFields; ++f) {
      GradSink<Real>& s = *sinks_[f];
      if (!s.present() || s.tv) continue;
      if (!s.diagonal && ((f == kR) || (f == kQ && symmetrise_Q))) {
        const int r = f == kQ ? n_ : p_;
        for (int i = 0; i < r; ++i)
          for (int j = 0; j < r; ++j)
            s.out[i * r + j] = static_cast<Real>(0.5 * (s.acc[i * r + j] + s.acc[j * r + i]));
      } else {
        for (std::size_t i = 0; i < s.item; ++i) s.out[i] = static_cast<Real>(s.acc[i]);
      }
    }
  }

 private:
  static constexpr int kFields = 8, kQ = 1, kR = 4;  // the order of sinks_

  // Blocks in field f's output.
  std::size_t blocks(int f) const {
    return sinks_[f]->tv ? std::size_t(steps_[f] > 0 ? steps_[f] : 0) : 1;
  }

  Gradients<Real>& G_;
  int n_, p_, T_;
  GradSink<Real>* sinks_[kFields];
  int steps_[kFields];
};

// out = Q⁻¹ S in double, for S with m columns (out must not alias S).
template <class Real>
inline void qinv_times(double* out, const Real* Qinv, const double* S, int n, int m) {
  for (int i = 0; i < n; ++i)
    for (int j = 0; j < m; ++j) {
      double v = 0;
      for (int r = 0; r < n; ++r) v += double(Qinv[i * n + r]) * S[r * m + j];
      out[i * m + j] = v;
    }
}

// Transition sums of a time-invariant Q, accumulated raw, get Q⁻¹ applied
// once at the end (in double): Ā ← Q⁻¹Ā, b̄ ← Q⁻¹b̄, and Q̄ ← Q⁻¹(Q⁻¹Q̄)ᵀ =
// Q⁻¹Q̄ᵀQ⁻¹ (Q⁻¹ symmetric), the transpose of Q⁻¹Q̄Q⁻¹: gradients_one keeps
// only its symmetric part. Each only where present and accumulated; Q̄ not
// with with_Q false (the log-likelihood pass, whose Q̄ terms hold Q⁻¹ already).
// A diagonal Q̄ (Q given by its variances; Qinv is then diag(1/q)) holds the
// diagonal of the sum: Q̄_ii ← Q̄_ii / q_i².
template <class Real>
void apply_qinv_to_sums(Gradients<Real>& G, const Real* Qinv, int n, bool with_Q = true) {
  const std::size_t n2 = std::size_t(n) * n;
  std::vector<double> tmp(n2), tmp2(n2);
  if (G.A.present() && !G.A.tv) {
    qinv_times(tmp.data(), Qinv, G.A.acc, n, n);
    std::copy(tmp.begin(), tmp.end(), G.A.acc);
  }
  if (with_Q && G.Q.present() && !G.Q.tv && G.Q.diagonal) {
    for (int i = 0; i < n; ++i) {
      const double qi = Qinv[i * n + i];
      G.Q.acc[i] *= qi * qi;
    }
  } else if (with_Q && G.Q.present() && !G.Q.tv) {
    qinv_times(tmp.data(), Qinv, G.Q.acc, n, n);
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) tmp2[i * n + j] = tmp[j * n + i];
    qinv_times(G.Q.acc, Qinv, tmp2.data(), n, n);
  }
  if (G.b.present() && !G.b.tv) {
    qinv_times(tmp.data(), Qinv, G.b.acc, n, 1);
    std::copy(tmp.begin(), tmp.begin() + n, G.b.acc);
  }
}

// Solves L Lᵀ v = v in place for two right-hand sides at once (interleaved,
// so that the two dependency chains overlap).
template <class Real, int NK>
inline void spd_solve2(const Real* L, Real* a, Real* b, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    Real sa = a[i], sb = b[i];
    for (int k = 0; k < i; ++k) {
      sa -= L[i * n + k] * a[k];
      sb -= L[i * n + k] * b[k];
    }
    const Real inv = Real(1) / L[i * n + i];
    a[i] = sa * inv;
    b[i] = sb * inv;
  }
  for (int i = n - 1; i >= 0; --i) {
    const Real inv = Real(1) / L[i * n + i];
    const Real ai = a[i] * inv, bi = b[i] * inv;
    a[i] = ai;
    b[i] = bi;
    for (int k = 0; k < i; ++k) {
      a[k] -= L[i * n + k] * ai;
      b[k] -= L[i * n + k] * bi;
    }
  }
}

// Points G's time-invariant accumulators, which lie in acc_base, at the same
// offsets in own_acc instead: a part of a pass that runs beside others sums
// into its own, added to the caller's at the end.
template <class Real>
void redirect_accumulators(Gradients<Real>& G, const double* acc_base, double* own_acc) {
  GradSink<Real>* sinks[] = {&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0};
  for (GradSink<Real>* g : sinks)
    if (g->present() && !g->tv) g->acc = own_acc + (g->acc - acc_base);
}

// The scratch of the parts of a split pass (loglik_one, gradients_one) that
// run beside the calling thread: each its own pattern cache (lookups are not
// safe to share), index scratch and accumulators of the time-invariant
// gradient fields, which add_into() sums into the caller's at the end. The
// part on the calling thread uses the caller's own.
template <class Real>
class PartScratch {
 public:
  struct Slot {
    PatternCache<Real>* cache;
    int* idx;
    double* acc;  // nullptr: the caller's accumulators
  };

  PartScratch(int parts, std::size_t acc_size, PatternCache<Real>* cache, int* idx, int p)
      : cache_(cache), idx_(idx), p_(p), acc_size_(acc_size), caches_(parts > 1 ? parts : 1),
        idxs_(parts > 1 ? parts : 1), accs_(parts > 1 ? parts : 1) {}

  Slot slot(int k, bool beside) {
    if (!beside) return {cache_, idx_, nullptr};
    if (cache_ != nullptr) caches_[k] = cache_->fresh();
    idxs_[k].resize(std::size_t(p_) + 1);
    accs_[k].assign(acc_size_, 0.0);
    return {caches_[k].get(), idxs_[k].data(), accs_[k].data()};
  }

  void add_into(double* acc) const {
    for (const auto& a : accs_)
      for (std::size_t i = 0; i < a.size(); ++i) acc[i] += a[i];
  }

 private:
  PatternCache<Real>* cache_;
  int* idx_;
  int p_;
  std::size_t acc_size_;
  std::vector<std::unique_ptr<PatternCache<Real>>> caches_;
  std::vector<std::vector<int>> idxs_;
  std::vector<std::vector<double>> accs_;
};

// The per-step terms of the implicit-function gradients over a range of
// steps, given x and u = H⁻¹x̄ at every step: one per thread when a
// trajectory's pass is split over time (see gradients_one). Its own scratch,
// pattern cache and accumulators of the time-invariant fields; the per-step
// outputs it writes are its own steps' only.
template <class Real, int NK>
class GradientPart {
 public:
  // Qinv_shared: Q⁻¹ when Q is time-invariant. acc_base / own_acc: G's
  // accumulators point into acc_base; a part that runs beside others gets
  // own_acc (same size, zeroed) instead (nullptr: use G's own).
  GradientPart(const Trajectory<Real>& P, const Real* x, const Real* u, const Gradients<Real>& G,
               const double* acc_base, double* own_acc, bool raw_sums, const Real* Qinv_shared, int* idx,
               PatternCache<Real>* cache)
      : P_(P), x_(x), u_(u), G_(G), raw_sums_(raw_sums), Qinv_(Qinv_shared), idx_(idx), cache_(cache) {
    n_ = fixed<NK>(P.n);
    p_ = P.p;
    const std::size_t n2 = std::size_t(n_) * n_;
    const std::size_t q = std::size_t(n_ > p_ ? n_ : p_);
    buf_.resize(n2 + std::size_t(p_) * p_ + 4 * std::size_t(n_) + 3 * std::size_t(p_) + q + 8);
    Arena<Real> arena(buf_.data());
    Lq_ = arena.take(n2);
    Lr_ = arena.take(std::size_t(p_) * p_);
    rho_ = arena.take(n_);
    phi_ = arena.take(n_);
    alpha_ = arena.take(n_);
    beta_ = arena.take(n_);
    sigma_ = arena.take(p_);
    kappa_ = arena.take(p_);
    ey_ = arena.take(p_);
    cs_ = arena.take(q + 1);
    if (own_acc != nullptr) redirect_accumulators(G_, acc_base, own_acc);
  }

  bool failed() const { return failed_; }

  // The terms of step t: the transition t → t+1 (t < T-1), the measurement
  // at t and the prior at t = 0.
  void visit(int t) {
    if (failed_) return;
    const int T = P_.T, n = fixed<NK>(n_), p = p_;
    const std::size_t n2 = std::size_t(n) * n;
    const Trajectory<Real>& P = P_;
    Gradients<Real>& G = G_;
    const bool raw_sums = raw_sums_;
    const Real* Qinv = Qinv_;
    Real *Lq = Lq_, *Lr = Lr_, *rho = rho_, *phi = phi_, *alpha = alpha_, *beta = beta_;
    Real *sigma = sigma_, *kappa = kappa_, *ey = ey_, *cs = cs_;
    PatternCache<Real>* cache = cache_;
    int* idx = idx_;
    const bool last = t == T - 1;
    const Real* ut = u_ + std::size_t(t) * n;
    const Real* xt = x_ + std::size_t(t) * n;
    (void)n2;

    // Transition t: needs u_t, u_{t+1}, x_t, x_{t+1}.
    if (!last) {
      const Real* At = P.At(t);
      const Real* un = ut + n;
      const Real* xn = xt + n;
      const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
      for (int i = 0; i < n; ++i) {
        Real ax = 0, au = 0;
        for (int j = 0; j < n; ++j) {
          ax += At[i * n + j] * xt[j];
          au += At[i * n + j] * ut[j];
        }
        alpha[i] = xn[i] - ax - (bt ? bt[i] : Real(0));  // r_t
        beta[i] = un[i] - au;                            // δ_t
      }
      if (raw_sums) {
        // Ā = Q⁻¹Σ(r uᵀ + δ xᵀ), Q̄ = sym(Q⁻¹(Σ δ rᵀ)Q⁻¹), b̄ = Q⁻¹Σ δ: sums now,
        // Q⁻¹ once at the end.
        for (int i = 0; i < n; ++i) {
          const Real ri = alpha[i], di = beta[i];
          if (G.A.present()) {
            double* row = G.A.acc + std::size_t(i) * n;
            for (int j = 0; j < n; ++j) row[j] += ri * ut[j] + di * xt[j];
          }
          if (G.Q.present() && G.Q.diagonal) {
            G.Q.acc[i] += di * ri;
          } else if (G.Q.present()) {
            double* row = G.Q.acc + std::size_t(i) * n;
            for (int j = 0; j < n; ++j) row[j] += di * alpha[j];
          }
          if (G.b.present()) G.b.acc[i] += di;
        }
      } else {
        if (P.Q_tv && P.Q_diag) {  // ρ = r/q, φ = δ/q
          if (!variances_inverse(cs, P.Qt(t), n)) {
            failed_ = true;
            return;
          }
          for (int i = 0; i < n; ++i) {
            rho[i] = alpha[i] * cs[i];
            phi[i] = beta[i] * cs[i];
          }
        } else if (P.Q_tv) {
          if (!sym_cholesky<Real, NK>(Lq, P.Qt(t), n, cs)) {
            failed_ = true;
            return;
          }
          copy(rho, alpha, n);
          copy(phi, beta, n);
          spd_solve2<Real, NK>(Lq, rho, phi, n);
        } else {
          matvec<Real, NK>(rho, Qinv, alpha, n, n);
          matvec<Real, NK>(phi, Qinv, beta, n, n);
        }
        G.A.add_at(t, [&](auto* gA) {
          add_outer(gA, rho, ut, n, n, Real(1));
          add_outer(gA, phi, xt, n, n, Real(1));
        });
        // Time-invariant Q̄ accumulates φρᵀ and is symmetrised once at the end;
        // a diagonal Q̄ keeps φ_i ρ_i only.
        if (G.Q.present() && G.Q.diagonal) {
          G.Q.add_at(t, [&](auto* gQ) {
            for (int i = 0; i < n; ++i) gQ[i] += phi[i] * rho[i];
          });
        } else if (G.Q.present()) {
          if (G.Q.tv)
            add_sym_outer(G.Q.out + std::size_t(t) * n2, phi, rho, n, Real(1));
          else
            add_outer(G.Q.acc, phi, rho, n, n, Real(1));
        }
        G.b.add_at(t, [&](auto* gb) {
          for (int i = 0; i < n; ++i) gb[i] += phi[i];
        });
      }
    }

    // Measurement t: σ = S e (e the observed residual), κ = S C u.
    Measurement<Real, NK> m;
    if (!measurement_at<Real, NK>(P, t, cache, idx, Lr, cs, &m)) {
      failed_ = true;
      return;
    }
    const int k = m.k;
    const int* K = m.K;
    if (m.memo != nullptr) {
      // κ = F u and σ = R_KK⁻¹(y_K − d_K) − F x, with F = R_KK⁻¹C_K.
      for (int a = 0; a < k; ++a) ey[a] = m.centred(a);
      for (int a = 0; a < k; ++a) {
        const Real* Fa = m.memo->F + std::size_t(a) * n;
        const Real* Ra = m.memo->Rinv + std::size_t(a) * k;
        Real su = 0, sx = 0, sy = 0;
        for (int j = 0; j < n; ++j) {
          su += Fa[j] * ut[j];
          sx += Fa[j] * xt[j];
        }
        for (int b = 0; b < k; ++b) sy += Ra[b] * ey[b];
        kappa[a] = su;
        sigma[a] = sy - sx;
      }
    } else if (k > 0) {
      for (int a = 0; a < k; ++a) {
        const Real* Crow = m.C_row(a);
        Real sx = 0, su = 0;
        for (int j = 0; j < n; ++j) {
          sx += Crow[j] * xt[j];
          su += Crow[j] * ut[j];
        }
        sigma[a] = m.y[K[a]] - sx - (m.d ? m.d[K[a]] : Real(0));
        kappa[a] = su;
      }
      if (m.diag) {
        for (int a = 0; a < k; ++a) {
          const Real r = Lr[a] * Lr[a];
          sigma[a] /= r;
          kappa[a] /= r;
        }
      } else {
        spd_solve2<Real, 0>(Lr, sigma, kappa, k);
      }
    }
    if (k > 0) {
      Real* gy = G.y + std::size_t(t) * p;
      for (int a = 0; a < k; ++a) gy[K[a]] = kappa[a];
      G.C.add_at(t, [&](auto* gC) {
        for (int a = 0; a < k; ++a) {
          auto* row = gC + std::size_t(K[a]) * n;
          const Real sa = sigma[a], ka = kappa[a];
          for (int j = 0; j < n; ++j) row[j] += sa * ut[j] - ka * xt[j];
        }
      });
      if (G.R.present() && G.R.diagonal) {  // only R̄_ii = −κ_i σ_i
        G.R.add_at(t, [&](auto* gR) {
          for (int a = 0; a < k; ++a) gR[K[a]] -= kappa[a] * sigma[a];
        });
      } else if (G.R.present()) {
        if (G.R.tv) {
          Real* gR = G.R.out + std::size_t(t) * p * p;
          for (int a = 0; a < k; ++a)
            for (int c = 0; c < k; ++c)
              gR[K[a] * p + K[c]] -= Real(0.5) * (kappa[a] * sigma[c] + sigma[a] * kappa[c]);
        } else {  // −κσᵀ now, symmetrised at the end
          for (int a = 0; a < k; ++a) {
            double* row = G.R.acc + std::size_t(K[a]) * p;
            const Real ka = kappa[a];
            for (int c = 0; c < k; ++c) row[K[c]] -= ka * sigma[c];
          }
        }
      }
      G.d.add_at(t, [&](auto* gd) {
        for (int a = 0; a < k; ++a) gd[K[a]] -= kappa[a];
      });
    }

    // Prior on x_0: α = P_0⁻¹u_0, β = P_0⁻¹(x_0 − m_0).
    if (t == 0 && P.P0 != nullptr) {
      Real* Lp = Lq;  // Lq is no longer needed at t = 0
      if (!sym_cholesky<Real, NK>(Lp, P.P0, n, cs)) {
        failed_ = true;
        return;
      }
      for (int i = 0; i < n; ++i) {
        alpha[i] = ut[i];
        beta[i] = xt[i] - (P.m0 != nullptr ? P.m0[i] : Real(0));
      }
      spd_solve2<Real, NK>(Lp, alpha, beta, n);
      G.m0.add_at(0, [&](auto* gm) {
        for (int i = 0; i < n; ++i) gm[i] += alpha[i];
      });
      G.P0.add_at(0, [&](auto* gP) { add_sym_outer(gP, alpha, beta, n, Real(1)); });
    }
  }

 private:
  const Trajectory<Real>& P_;
  const Real* x_;
  const Real* u_;
  Gradients<Real> G_;  // a copy: its accumulators may be this part's own
  bool raw_sums_;
  const Real* Qinv_;
  int* idx_;
  PatternCache<Real>* cache_;
  int n_ = 0, p_ = 0;
  std::vector<Real> buf_;
  Real *Lq_, *Lr_, *rho_, *phi_, *alpha_, *beta_, *sigma_, *kappa_, *ey_, *cs_;
  bool failed_ = false;
};

// Runs part->visit(t) for t = 0..T-1, the steps split into `parts`
// contiguous ranges on as many threads (the calling thread takes the last
// range). make_part(k, beside) builds part k; beside: it runs on a thread of
// its own. False when a part failed.
template <class Part, class Make>
bool visit_in_parts(int T, int parts, Make&& make_part) {
  if (parts > T) parts = T;
  if (parts < 1) parts = 1;
  std::vector<std::unique_ptr<Part>> part(parts);
  for (int k = 0; k < parts; ++k) part[k] = make_part(k, k != parts - 1);
  auto bound = [&](int k) { return int((int64_t(T) * k) / parts); };
  std::vector<std::thread> threads;
  threads.reserve(std::size_t(parts - 1));
  for (int k = 0; k < parts - 1; ++k)
    threads.emplace_back([&, k]() {
      for (int t = bound(k); t < bound(k + 1); ++t) part[k]->visit(t);
    });
  for (int t = bound(parts - 1); t < T; ++t) part[parts - 1]->visit(t);
  for (auto& th : threads) th.join();
  for (int k = 0; k < parts; ++k)
    if (part[k]->failed()) return false;
  return true;
}

// The per-step terms of a pass in `parts` (visit_in_parts), part k built by
// make(slot) with its scratch (PartScratch: a part beside the calling thread
// gets its own pattern cache, index scratch and accumulators); the parts'
// accumulators are then summed into acc. False when a part failed.
template <class Part, class Real, class Make>
bool visit_parts_with_scratch(int T, int parts, int n, int p, double* acc, int* idx, PatternCache<Real>* cache,
                              Make&& make) {
  PartScratch<Real> scratch(parts, accumulator_size(n, p), cache, idx, p);
  const bool ok = visit_in_parts<Part>(T, parts, [&](int k, bool beside) {
    return std::unique_ptr<Part>(make(scratch.slot(k, beside)));
  });
  if (ok) scratch.add_into(acc);
  return ok;
}

template <class Real, int NK>
void gradients_one(const Trajectory<Real>& P, const FactorView<Real>& F, bool ok, const Real* x,
                   const Real* xbar, Gradients<Real>& G, Real* ws, Real* u, double* acc, int* idx,
                   PatternCache<Real>* cache, int parts = 1) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n, Tn = std::size_t(T) * n;

  const GradSinks<Real> sinks(G, T, n, p, acc);
  if (!ok) {
    sinks.fail();
    return;
  }

  Arena<Real> arena(ws);
  Real* Lq = arena.take(n2);
  Real* Qinv = arena.take(n2);
  Real* cs = arena.take(std::size_t(n > p ? n : p) + 1);  // Cholesky scratch
  Real* tmp = arena.take(n);
  Real* tmp2 = arena.take(n);

  // A fixed transition (A, Q and b all time-invariant): the transition
  // gradients are Q⁻¹ times sums of outer products, so the loop only sums.
  const bool raw_sums = !P.Q_tv && !P.A_tv && !(P.b != nullptr && P.b_tv);

  // Time-invariant Q: use Q⁻¹ explicitly (matrix-vector products, no chains).
  if (T > 1 && !P.Q_tv && !transition_precision<Real, NK>(Qinv, nullptr, P.Q, P.Q_diag, n, Lq, cs)) {
    sinks.fail();
    return;
  }

  // u = H⁻¹ x̄ (both sweeps), then the per-step terms, which need only x and
  // u at steps t and t+1: split over `parts` threads when asked (a
  // trajectory with cores to itself), each part with its own accumulators,
  // added here at the end.
  copy(u, xbar, Tn);
  forward_substitute<Real, NK>(F, u, T, n, tmp, tmp2);
  back_substitute<Real, NK>(F, u, T, n, tmp, tmp2);
  const bool ok_terms = visit_parts_with_scratch<GradientPart<Real, NK>>(
      T, parts, n, p, acc, idx, cache, [&](const typename PartScratch<Real>::Slot& s) {
        return new GradientPart<Real, NK>(P, x, u, G, acc, s.acc, raw_sums, Qinv, s.idx, s.cache);
      });
  if (!ok_terms) {
    sinks.fail();
    return;
  }

  if (raw_sums && T > 1) apply_qinv_to_sums(G, Qinv, n);
  sinks.finish(/*symmetrise_Q=*/true);
}

}  // namespace kalmax_cpu
