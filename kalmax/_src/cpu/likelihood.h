// The band of H⁻¹ (selected inversion) and the log-likelihood with its
// gradient, as passes over the stored factor of one trajectory. The maths is
// that of kalmax/_src/blocktri.py (selected_inverse) and
// kalmax/_src/likelihood.py; the JAX versions there are the oracles.
//
// Selected inversion, backwards from the last step (Σ = H⁻¹, Li_t = L_t⁻¹):
//   Σ_{T-1}    = Li_{T-1}ᵀ Li_{T-1}
//   Σ_{t+1,t}  = −Σ_{t+1} (M_{t+1} Li_t)
//   Σ_t        = Li_tᵀ Li_t − Σ_{t+1,t}ᵀ (M_{t+1} Li_t)
// with M_{t+1} Li_t = H_sub Li_tᵀ Li_t in the compact form (see FactorView).
//
// Log-likelihood gradient (Fisher's identity): ∇_θ log p(y) = E[∇_θ log p(x, y) | y],
// and under the posterior N(x*, Σ) every expectation needs only x*, Σ_t and
// Σ_{t+1,t}. With r_t = x_{t+1} − A_t x_t − b_t, e_t = y_K − d_K − C_K x_t,
// S = R_KK⁻¹, F = S C_K, σ = S e, d_0 = x_0 − m_0:
//   Ā_t = Q_t⁻¹ (r_t x_tᵀ + Σ_{t+1,t} − A_t Σ_t)
//   Q̄_t = ½ Q_t⁻¹ (r_t r_tᵀ + W_t − Q_t) Q_t⁻¹,
//         W_t = Σ_{t+1} − A Σ_{t+1,t}ᵀ − Σ_{t+1,t} Aᵀ + A Σ_t Aᵀ   (posterior Cov of r_t)
//       = ½ (μ_t μ_tᵀ − Λ_t),  μ_t = Q_t⁻¹ r_t,  Λ_t = Z_t Σ_{t+1}⁻¹ (Ω_{t+1}Σ_{t+1})ᵀ   (computed so)
//   b̄_t = Q_t⁻¹ r_t
//   C̄_t[K] = σ x_tᵀ − F Σ_t          R̄_t[K,K] = ½ (σσᵀ + F Σ_t Fᵀ − S)
//   d̄_t[K] = σ                        ȳ_t[K] = −σ
//   m̄_0 = P_0⁻¹ d_0                   P̄_0 = ½ P_0⁻¹ (d_0 d_0ᵀ + Σ_0 − P_0) P_0⁻¹
// The terms in Σ are the pull-back of the cotangent −½Σ on H's blocks; they
// are formed by the functions of precision_terms.h that the band pull-back
// (band_pullback.h) shares, with the terms in x* and the log-dets passed in.
// This is the same gradient as the envelope-theorem route of likelihood.py
// (−∂_θJ at fixed x*, minus ½ tr(Σ ∂_θH), minus the normalising log-dets),
// written per step: the −∂_θJ part gives the terms in x*, ½ tr(Σ ∂_θH) the
// terms in Σ, and the log-dets the −Q, −S, −P_0 terms.
//
// Q̄ is computed in its second form. When Q is small beside the posterior
// covariances (q/r ≪ 1), W_t − Q_t = O(|Q|²/|Σ|) is a difference of O(|Σ|)
// numbers: the rounding eps·|Σ| of W_t would reach Q̄ as eps·|Σ|/|Q|², a
// relative error eps·κ(H)², measured 10⁵× off in double on ordinary tracking
// models. The second form has no such cancellation; the derivation is in the
// module docstring of likelihood.py (_process_noise_gradient is the JAX
// version). With O_s = C_KᵀR_KK⁻¹C_K (the information of y_s):
//   Z_t = Q_t⁻¹ (Σ_{t+1} − A_t Σ_{t+1,t}ᵀ)       (= P⁻⁻¹Σ_{t+1}, P⁻ the prediction of x_{t+1})
//   Y_s = Q_s⁻¹ (Σ_{s+1,s} − A_s Σ_s)           (Y_{T-1} = 0)
//   Ω_sΣ_s = O_s Σ_s − A_sᵀ Y_s                 (Ω_s: the information y_{s..T-1} carry about x_s)
// Ω_{t+1}Σ_{t+1} comes from the visit of step t+1 (a part of a split pass
// gets it at its upper boundary from LoglikPart::prime).
//
// The value is
//   log p(y_K) = −J(x*) − ½ log|H| − ½ log|P_0| − ½ Σ log|Q_t| − ½ Σ log|R_{t,KK}|
//                − ½ (N_K − n_flat) log 2π,   log|H| = −2 Σ_t Σ_i log (Li_t)_ii.
//
// A diagonal Q_t = diag(q_t) (given by its variances): Q_t⁻¹ = diag(1/q_t),
// log|Q_t| = Σ_i log q_ti, and the gradient w.r.t. the variances is the
// diagonal of Q̄_t in its second form, ½ (μ_ti² − (Λ_t)_ii): every Q_t⁻¹
// above is a division of row i by q_ti (μ_t, Y_t, Z_t), and of Λ_t only the
// diagonal is formed, O(n²) from Z_t and Σ_{t+1}⁻¹(Ω_{t+1}Σ_{t+1})ᵀ.
#pragma once

#include <cmath>
#include <cstdint>
#include <cstring>
#include <limits>
#include <memory>
#include <thread>
#include <vector>

#include "precision_terms.h"
#include "smoother.h"

namespace kalmax_cpu {

// The band sweep: calls visit(t, Σ_t, Σ_{t+1,t}, Σ_{t+1}) for t = T-1, ..., 0
// (the last two null at t = T-1). All matrices n-by-n, row-major.
// Selected inversion over steps t = hi-1, ..., lo (descending), calling
// visit(t, Σ_t, Σ_{t+1,t}, Σ_{t+1}); the last two are nullptr at t = T-1.
// S_hi: Σ_hi, where the pass starts when hi < T (unused when hi == T).
// S_lo (optional): receives Σ_lo, so a later pass can start from there.
// X_lo (optional): receives Σ_{lo+1,lo} when lo < T-1.
// Σ_i log v_i over many factors v_i, as the log of their product kept as
// m·2^e (m in [1, 2)): the exponent of each factor is split off exactly and
// only the mantissas are multiplied, so the product neither overflows nor
// underflows, and a step costs a multiplication instead of a std::log (the
// logs of the factor's diagonal and of Q_t were 4-6 % of a log-likelihood call
// at n = 1). Each factor rounds the product once: relative error ≤ N·eps/2
// after N factors, an absolute error ≤ N·eps/2 in the log, the order of the
// rounding of a sum of N logs (common practice: scaled products for
// log-determinants). A factor that is not a positive normal number (zero,
// negative, subnormal, inf, NaN) goes through std::log itself, so the result
// is what the sum of logs gives (−inf, NaN, ...).
class LogProduct {
 public:
  void add_log_of(double v) {
    if (!(v >= std::numeric_limits<double>::min() && v <= std::numeric_limits<double>::max())) {
      add_unusual(v);  // out of line, so that this stays small enough to inline (a call per entry cost 5 %)
      return;
    }
    uint64_t bits;
    std::memcpy(&bits, &v, sizeof bits);
    exponent_ += int64_t((bits >> 52) & 0x7ff) - 1023;
    bits = (bits & ((uint64_t(1) << 52) - 1)) | (uint64_t(1023) << 52);  // v's mantissa, in [1, 2)
    double mv;
    std::memcpy(&mv, &bits, sizeof mv);
    mantissa_ *= mv;
    if (mantissa_ >= 2.0) {  // exact rescaling by a power of two
      mantissa_ *= 0.5;
      ++exponent_;
    }
  }
  double log() const {
    // ln 2 in two parts: the high part has 32 significant bits, so e·hi is
    // exact for |e| < 2^21 and the exponent does not amplify ln 2's rounding.
    constexpr double kLn2Hi = 6.93147180369123816490e-01, kLn2Lo = 1.90821492927058770002e-10;
    const double e = double(exponent_);
    return std::log(mantissa_) + (e * kLn2Hi + (e * kLn2Lo + rest_));
  }

 private:
  [[gnu::noinline]] void add_unusual(double v) { rest_ += std::log(v); }

  double mantissa_ = 1.0;
  int64_t exponent_ = 0;
  double rest_ = 0;  // logs of the factors that are not positive normal numbers
};

template <class Real, int NK, class Visit>
void band_range(const FactorView<Real>& F, int T, int n_, int lo, int hi, const Real* S_hi, Real* S_lo,
                Visit&& visit, Real* X_lo = nullptr) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  std::vector<Real> buf(5 * n2);
  Real* S_next = buf.data();
  Real* S_t = S_next + n2;
  Real* X = S_t + n2;
  Real* ML = X + n2;
  Real* P = ML + n2;
  int t = hi - 1;
  if (hi == T) {
    const Real* Li_last = F.Li + std::size_t(T - 1) * n2;
    matmul<Real, NK>(S_next, Li_last, true, Li_last, false, n);
    visit(T - 1, S_next, static_cast<const Real*>(nullptr), static_cast<const Real*>(nullptr));
    t = T - 2;
  } else {
    copy(S_next, S_hi, n2);
  }
  for (; t >= lo; --t) {
    const Real* Li = F.Li + std::size_t(t) * n2;
    matmul<Real, NK>(P, Li, true, Li, false, n);  // Li_tᵀ Li_t = (L_t L_tᵀ)⁻¹
    if (F.subT != nullptr)
      matmul<Real, NK>(ML, F.subT, true, P, false, n);  // H_sub (Li_tᵀ Li_t)
    else
      matmul<Real, NK>(ML, F.M + std::size_t(t) * n2, false, Li, false, n);
    matmul<Real, NK>(X, S_next, false, ML, false, n);
    for (std::size_t i = 0; i < n2; ++i) X[i] = -X[i];
    matmul<Real, NK>(S_t, X, true, ML, false, n);
    for (int i = 0; i < n; ++i)
      for (int j = 0; j <= i; ++j) {  // exact symmetry against rounding
        const Real a = P[i * n + j] - S_t[i * n + j], b = P[j * n + i] - S_t[j * n + i];
        S_t[i * n + j] = S_t[j * n + i] = Real(0.5) * (a + b);
      }
    visit(t, S_t, X, S_next);
    std::swap(S_next, S_t);
  }
  if (S_lo != nullptr) copy(S_lo, S_next, n2);
  if (X_lo != nullptr && lo < T - 1) copy(X_lo, X, n2);
}

// The whole band, backwards from the last step.
template <class Real, int NK, class Visit>
void band_sweep(const FactorView<Real>& F, int T, int n_, Visit&& visit) {
  band_range<Real, NK>(F, T, n_, 0, T, static_cast<const Real*>(nullptr), static_cast<Real*>(nullptr),
                       std::forward<Visit>(visit));
}

// Σ_tt (T, n, n) and Σ_{t+1,t} (T-1, n, n); NaN when the factor failed.
template <class Real, int NK>
void band_one(const FactorView<Real>& F, bool ok, int T, int n, Real* diag, Real* sub) {
  const std::size_t n2 = std::size_t(n) * n;
  if (!ok) {
    fill(diag, std::size_t(T) * n2, quiet_nan<Real>());
    if (T > 1) fill(sub, std::size_t(T - 1) * n2, quiet_nan<Real>());
    return;
  }
  band_sweep<Real, NK>(F, T, n, [&](int t, const Real* S, const Real* X, const Real*) {
    copy(diag + std::size_t(t) * n2, S, n2);
    if (X != nullptr) copy(sub + std::size_t(t) * n2, X, n2);
  });
}

// The per-step terms of the log-likelihood and its gradient over a range of
// steps: one per thread when a trajectory's pass is split over time (see
// loglik_one). Its own scratch, pattern cache, value and accumulators of the
// time-invariant gradient fields; the per-step outputs it writes are its own
// steps' only, so parts never touch the same memory.
template <class Real, int NK>
class LoglikPart {
 public:
  // shared: Q⁻¹ and log|Q| when Q is time-invariant (raw), else unused.
  // acc_base: the accumulators G's time-invariant sinks point into; own_acc
  // (the same size, zeroed) replaces them for a part that runs beside others
  // (nullptr: use G's own).
  LoglikPart(const Trajectory<Real>& P, const FactorView<Real>& F, const Real* x, const Gradients<Real>& G,
             const double* acc_base, double* own_acc, bool raw, const Real* Qinv_shared, Real ldQ_shared,
             int* idx, PatternCache<Real>* cache)
      : P_(P), F_(F), x_(x), G_(G), raw_(raw), idx_(idx), cache_(cache), ldQ_(ldQ_shared) {
    n_ = fixed<NK>(P.n);
    p_ = P.p;
    const std::size_t n2 = std::size_t(n_) * n_;
    const int q = n_ > p_ ? n_ : p_;
    buf_.resize(14 * n2 + 3 * std::size_t(p_) * p_ + 3 * std::size_t(p_) * n_ + 9 * std::size_t(q) + 8);
    Arena<Real> arena(buf_.data());
    Qinv_ = arena.take(n2);
    Lq_ = arena.take(n2);
    E1_ = arena.take(n2);
    E2_ = arena.take(n2);
    AS_ = arena.take(n2);
    AX_ = arena.take(n2);
    T1_ = arena.take(n2);
    T2_ = arena.take(n2);
    Y_ = arena.take(n2);
    JS_ = arena.take(n2);
    Rinv_ = arena.take(std::size_t(p_) * p_);
    Lr_ = arena.take(std::size_t(p_) * p_);
    Fk_ = arena.take(std::size_t(p_) * n_);
    FS_ = arena.take(std::size_t(p_) * n_);
    r_ = arena.take(q);
    e_ = arena.take(q);
    sigma_ = arena.take(q);
    cs_ = arena.take(q + 1);
    qi_ = arena.take(q);
    if (raw) copy(Qinv_, Qinv_shared, n2);
    if (raw && P.Q_diag)  // 1/q of a diagonal time-invariant Q, from Q⁻¹ = diag(1/q)
      for (int i = 0; i < n_; ++i) qi_[i] = Qinv_[std::size_t(i) * n_ + i];
    if (own_acc != nullptr) redirect_accumulators(G_, acc_base, own_acc);
  }

  // Ω_sΣ_s at the upper boundary s of a part that does not end at T-1 (the
  // visit of step s belongs to the part above, and the first visit here,
  // s − 1, needs it): from Σ_s and Σ_{s+1,s}.
  void prime(int s, const Real* S, const Real* X) {
    if (failed_ || !G_.Q.present()) return;
    const int n = fixed<NK>(n_);
    const std::size_t n2 = std::size_t(n) * n;
    if (X != nullptr && P_.Q_diag) {  // Y_s = (Σ_{s+1,s} − A_sΣ_s) / q_s, by rows
      if (!raw_ && !variances_inverse(qi_, P_.Qt(s), n)) {
        failed_ = true;
        return;
      }
      matmul<Real, NK>(AS_, P_.At(s), false, S, false, n);
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          const std::size_t ij = std::size_t(i) * n + j;
          Y_[ij] = qi_[i] * (X[ij] - AS_[ij]);
        }
    } else if (X != nullptr) {
      Real ld = 0;
      if (!raw_ && !spd_inverse<Real, NK>(Qinv_, &ld, P_.Qt(s), n, Lq_, cs_)) {
        failed_ = true;
        return;
      }
      matmul<Real, NK>(AS_, P_.At(s), false, S, false, n);
      for (std::size_t i = 0; i < n2; ++i) T1_[i] = X[i] - AS_[i];
      matmul<Real, NK>(Y_, Qinv_, false, T1_, false, n);
    }
    Measurement<Real, NK> m;
    if (!measurement_at<Real, NK>(P_, s, cache_, idx_, Lr_, cs_, &m)) {
      failed_ = true;
      return;
    }
    const Real *Sk, *Fm;
    Real ldR = 0;
    weights(m, &Sk, &Fm, &ldR);
    rows_times<Real, NK>(FS_, Fm, S, m.k, n);  // F Σ_s
    next_carry(s, m, X != nullptr);
  }

  // −J − ½ Σ log-dets over this part's steps (the logs gathered as products).
  double value() const { return val_ + li_diag_.log() - q_factor_.log() - 0.5 * q_variances_.log(); }
  long long observed() const { return n_obs_; }
  bool failed() const { return failed_; }

  // The terms of step t: the transition t → t+1 (t < T-1), the measurement
  // at t, the prior at t = 0, and −½ log|H|'s share Σ_i log (Li_t)_ii.
  void visit(int t, const Real* S, const Real* X, const Real* S_next) {
    if (failed_) return;
    const int n = fixed<NK>(n_), p = p_;
    const std::size_t n2 = std::size_t(n) * n;
    const Trajectory<Real>& P = P_;
    Gradients<Real>& G = G_;
    const Real* xt = x_ + std::size_t(t) * n;
    Real *Qinv = Qinv_, *Lq = Lq_, *E1 = E1_, *E2 = E2_, *AS = AS_, *AX = AX_, *T1 = T1_, *T2 = T2_;
    Real *Lr = Lr_, *FS = FS_, *r = r_, *e = e_, *sigma = sigma_, *cs = cs_;
    const bool raw = raw_;
    double& val = val_;

    const Real* Li_t = F_.Li + std::size_t(t) * n2;
    for (int i = 0; i < n; ++i) li_diag_.add_log_of(double(Li_t[i * n + i]));

    // Transition t → t+1.
    if (X != nullptr && P.Q_diag) {
      transition_diagonal(t, S, X, S_next);
      if (failed_) return;
    } else if (X != nullptr) {
      const Real* A = P.At(t);
      const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
      for (int i = 0; i < n; ++i)
        r[i] = xt[n + i] - dot<Real, NK>(A + std::size_t(i) * n, xt, n) - (bt ? bt[i] : Real(0));
      matmul<Real, NK>(AS, A, false, S, false, n);  // A Σ_t
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          const std::size_t ij = std::size_t(i) * n + j;
          E1[ij] = r[i] * xt[j] + X[ij] - AS[ij];
        }
      if (!raw) {  // ½ log|Q_t| = Σ_i log (Lq)_ii, gathered in q_factor_
        if (!sym_cholesky_inverse<Real, NK>(Qinv, Lq, P.Qt(t), n, cs)) {
          failed_ = true;
          return;
        }
        for (int i = 0; i < n; ++i) q_factor_.add_log_of(double(Lq[i * n + i]));
      }
      for (int i = 0; i < n; ++i) e[i] = dot<Real, NK>(Qinv + std::size_t(i) * n, r, n);  // Q⁻¹ r
      val -= 0.5 * double(dot<Real, NK>(r, e, n)) + (raw ? 0.5 * double(ldQ_) : 0.0);
      // Raw sums where Q is fixed and the destination is too; Q⁻¹ applied now otherwise.
      add_transition_A<Real, NK>(G, t, raw, /*diag=*/false, Qinv, nullptr, E1, T2, n);
      if (G.Q.present()) {  // ½ (μμᵀ − Λ_t), μ = e (header comment)
        Real* Y = Y_;
        for (std::size_t i = 0; i < n2; ++i) T1[i] = X[i] - AS[i];
        matmul<Real, NK>(Y, Qinv, false, T1, false, n);  // Y_t, for step t−1's Ω_tΣ_t
        matmul<Real, NK>(AX, A, false, X, true, n);      // A Σ_{t+1,t}ᵀ
        for (std::size_t i = 0; i < n2; ++i) T1[i] = S_next[i] - AX[i];
        matmul<Real, NK>(T2, Qinv, false, T1, false, n);  // Z_t
        if (!sym_cholesky<Real, NK>(Lq, S_next, n, cs)) {  // Σ_{t+1} (Lq is free here)
          failed_ = true;
          return;
        }
        transpose<Real, NK>(E2, JS_, n);  // (Ω_{t+1}Σ_{t+1})ᵀ, from step t+1
        lsolve_rows<Real, NK>(Lq, E2, E2, n, n);
        ltsolve_rows<Real, NK>(Lq, E2, n, n);
        matmul<Real, NK>(T1, T2, false, E2, false, n);  // Λ_t
        auto add = [&](auto* g) {
          for (int i = 0; i < n; ++i)
            for (int j = 0; j < n; ++j)
              g[i * n + j] += Real(0.5) * e[i] * e[j] - Real(0.25) * (T1[i * n + j] + T1[j * n + i]);
        };
        G.Q.add_at(t, add);
      }
      if (G.b.present()) {
        if (raw && !G.b.tv) {
          for (int i = 0; i < n; ++i) G.b.acc[i] += r[i];
        } else {
          G.b.add_at(t, [&](auto* g) { for (int i = 0; i < n; ++i) g[i] += e[i]; });
        }
      }
    }

    // Measurement t.
    Measurement<Real, NK> m;
    if (!measurement_at<Real, NK>(P, t, cache_, idx_, Lr, cs, &m)) {
      failed_ = true;
      return;
    }
    const int k = m.k;
    const int* K = m.K;
    const Real *Sk, *Fm;  // R_KK⁻¹, R_KK⁻¹ C_K
    Real ldR = 0;
    weights(m, &Sk, &Fm, &ldR);
    if (k > 0) {
      n_obs_ += k;
      for (int a = 0; a < k; ++a) e[a] = m.residual(a, xt);
      if (m.diag && m.memo == nullptr) {
        for (int a = 0; a < k; ++a) sigma[a] = Sk[a * k + a] * e[a];
      } else {
        for (int a = 0; a < k; ++a) {
          Real s = 0;
          for (int c = 0; c < k; ++c) s += Sk[a * k + c] * e[c];
          sigma[a] = s;
        }
      }
      double je = 0;
      for (int a = 0; a < k; ++a) je += double(e[a]) * sigma[a];
      val -= 0.5 * je + 0.5 * double(ldR);
      rows_times<Real, NK>(FS, Fm, S, k, n);  // F Σ_t
      Real* gy = G.y + std::size_t(t) * p;
      for (int a = 0; a < k; ++a) gy[K[a]] = -sigma[a];
      add_measurement_terms<Real, NK>(G, t, n, p, m, Sk, Fm, FS, sigma, xt, Real(1));
      G.d.add_at(t, [&](auto* g) {
        for (int a = 0; a < k; ++a) g[K[a]] += sigma[a];
      });
    }
    if (G.Q.present()) next_carry(t, m, X != nullptr);

    // Prior on x_0.
    if (t == 0 && P.P0 != nullptr) {
      Real ldP = 0;
      if (!spd_inverse<Real, NK>(T1, &ldP, P.P0, n, Lq, cs)) {  // T1 = P_0⁻¹
        failed_ = true;
        return;
      }
      for (int i = 0; i < n; ++i) r[i] = xt[i] - (P.m0 != nullptr ? P.m0[i] : Real(0));
      for (int i = 0; i < n; ++i) e[i] = dot<Real, NK>(T1 + std::size_t(i) * n, r, n);
      val -= 0.5 * double(dot<Real, NK>(r, e, n)) + 0.5 * double(ldP);
      G.m0.add_at(0, [&](auto* g) { for (int i = 0; i < n; ++i) g[i] += e[i]; });
      if (G.P0.present()) {
        for (int i = 0; i < n; ++i)
          for (int j = 0; j < n; ++j) E2[i * n + j] = r[i] * r[j] + S[i * n + j] - P.P0[i * n + j];
        add_prior_cov_terms<Real, NK>(G, T1, E2, AS, T2, n);
      }
    }
  }

 private:
  // Transition t → t+1 for a diagonal Q_t = diag(q_t) (module comment): the
  // dense case's terms with Q⁻¹ = diag(1/q), a row scaling, and of Λ_t only
  // its diagonal.
  void transition_diagonal(int t, const Real* S, const Real* X, const Real* S_next) {
    const int n = fixed<NK>(n_);
    const Trajectory<Real>& P = P_;
    Gradients<Real>& G = G_;
    const Real* xt = x_ + std::size_t(t) * n;
    const Real* A = P.At(t);
    const Real* q = P.Qt(t);
    const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
    Real *E1 = E1_, *E2 = E2_, *AS = AS_, *AX = AX_, *T2 = T2_, *Lq = Lq_, *r = r_, *e = e_, *qi = qi_;
    if (!raw_) {
      if (!variances_inverse(qi, q, n)) {
        failed_ = true;
        return;
      }
      for (int i = 0; i < n; ++i) q_variances_.add_log_of(double(q[i]));  // log|Q_t| = Σ_i log q_ti
    }
    for (int i = 0; i < n; ++i)
      r[i] = xt[n + i] - dot<Real, NK>(A + std::size_t(i) * n, xt, n) - (bt ? bt[i] : Real(0));
    matmul<Real, NK>(AS, A, false, S, false, n);  // A Σ_t
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) {
        const std::size_t ij = std::size_t(i) * n + j;
        E1[ij] = r[i] * xt[j] + X[ij] - AS[ij];
      }
    for (int i = 0; i < n; ++i) e[i] = qi[i] * r[i];  // Q⁻¹ r
    val_ -= 0.5 * double(dot<Real, NK>(r, e, n)) + (raw_ ? 0.5 * double(ldQ_) : 0.0);
    add_transition_A<Real, NK>(G, t, raw_, /*diag=*/true, nullptr, qi, E1, T2, n);
    if (G.Q.present()) {  // ½ (μ_i² − (Λ_t)_ii), μ = e: the diagonal of the dense Q̄_t
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          const std::size_t ij = std::size_t(i) * n + j;
          Y_[ij] = qi[i] * (X[ij] - AS[ij]);  // Y_t, for step t−1's Ω_tΣ_t
        }
      matmul<Real, NK>(AX, A, false, X, true, n);  // A Σ_{t+1,t}ᵀ
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          const std::size_t ij = std::size_t(i) * n + j;
          T2[ij] = qi[i] * (S_next[ij] - AX[ij]);  // Z_t
        }
      if (!sym_cholesky<Real, NK>(Lq, S_next, n, cs_)) {  // Σ_{t+1}
        failed_ = true;
        return;
      }
      transpose<Real, NK>(E2, JS_, n);  // (Ω_{t+1}Σ_{t+1})ᵀ, from step t+1
      lsolve_rows<Real, NK>(Lq, E2, E2, n, n);
      ltsolve_rows<Real, NK>(Lq, E2, n, n);  // E2 = Σ_{t+1}⁻¹ (Ω_{t+1}Σ_{t+1})ᵀ
      G.Q.add_at(t, [&](auto* g) {
        for (int i = 0; i < n; ++i) {
          Real lam = 0;  // (Λ_t)_ii = (Z_t E2)_ii
          for (int j = 0; j < n; ++j) lam += T2[std::size_t(i) * n + j] * E2[std::size_t(j) * n + i];
          g[i] += Real(0.5) * (e[i] * e[i] - lam);
        }
      });
    }
    if (G.b.present()) {
      if (raw_ && !G.b.tv) {
        for (int i = 0; i < n; ++i) G.b.acc[i] += r[i];
      } else {
        G.b.add_at(t, [&](auto* g) { for (int i = 0; i < n; ++i) g[i] += e[i]; });
      }
    }
  }

  // R_KK⁻¹ (*Sk) and R_KK⁻¹C_K (*Fm) of a measurement, and log|R_KK|.
  void weights(const Measurement<Real, NK>& m, const Real** Sk, const Real** Fm, Real* ldR) {
    measurement_weights<Real, NK>(m, n_, Rinv_, Fk_, Lr_, cs_, Sk, Fm, ldR);
  }

  // Ω_tΣ_t = O_tΣ_t − A_tᵀY_t into JS_, for the visit of step t − 1: O_tΣ_t =
  // C_Kᵀ (F Σ_t) from FS_ (F Σ_t when m.k > 0), Y_t from Y_ when t < T-1.
  void next_carry(int t, const Measurement<Real, NK>& m, bool transition) {
    const int n = fixed<NK>(n_);
    Real* JS = JS_;
    fill(JS, std::size_t(n) * n, Real(0));
    for (int a = 0; a < m.k; ++a) {
      const Real* c = m.C_row(a);
      const Real* fs = FS_ + std::size_t(a) * n;
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) JS[i * n + j] += c[i] * fs[j];
    }
    if (transition) {
      const Real* A = P_.At(t);
      for (int r = 0; r < n; ++r)
        for (int i = 0; i < n; ++i) {
          const Real ari = A[r * n + i];
          for (int j = 0; j < n; ++j) JS[i * n + j] -= ari * Y_[r * n + j];
        }
    }
  }

  const Trajectory<Real>& P_;
  const FactorView<Real>& F_;
  const Real* x_;
  Gradients<Real> G_;  // a copy: its accumulators may be this part's own
  bool raw_;
  int* idx_;
  PatternCache<Real>* cache_;
  int n_ = 0, p_ = 0;
  std::vector<Real> buf_;
  Real *Qinv_, *Lq_, *E1_, *E2_, *AS_, *AX_, *T1_, *T2_, *Y_, *JS_, *Rinv_, *Lr_, *Fk_, *FS_, *r_, *e_, *sigma_, *cs_;
  Real* qi_;  // 1/q of a diagonal Q_t
  Real ldQ_;
  double val_ = 0;  // −J − ½ Σ log-dets over this part's steps, in double, less the products below
  LogProduct li_diag_;      // Π_t Π_i (Li_t)_ii: −½ log|H|
  LogProduct q_factor_;     // Π_t Π_i (Lq_t)_ii of a dense time-varying Q: ½ Σ_t log|Q_t|
  LogProduct q_variances_;  // Π_t Π_i q_ti of a diagonal time-varying Q: Σ_t log|Q_t|
  long long n_obs_ = 0;
  bool failed_ = false;
};

// Value and gradient of log p(y_K) for one trajectory. G's sinks as for
// gradients_one (time-invariant fields accumulate in double; acc holds
// accumulator_size(n, p) doubles); *value gets the log-likelihood. NaN
// everywhere when the factor failed.
//
// parts > 1 splits the pass over time between that many threads, for a
// trajectory that has cores to itself (a batch smaller than the cores).
// The per-step terms are independent given Σ_t, Σ_{t+1,t} and Σ_{t+1}, but
// those come from the backward recursion, which is sequential. So the
// calling thread first runs the recursion alone (its cheap part: four n×n
// products a step) down through the part boundaries, starting each lower
// part's thread from Σ at its upper boundary as soon as it is known; then it
// does its own part, the top one, in full. Every part restarts the
// recursion at its boundary from the same Σ the single pass would hold
// there, so the result is that of the single pass up to the order of the
// sums (per-part accumulators, added at the end). Cost with k parts:
// (k−1)/k of a recursion-only pass, then 1/k of the full pass per thread.
template <class Real, int NK>
void loglik_one(const Trajectory<Real>& P, const FactorView<Real>& F, bool ok, const Real* x,
                Real* value, Gradients<Real>& G, double* acc, int* idx, PatternCache<Real>* cache,
                int parts = 1) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n;

  const GradSinks<Real> sinks(G, T, n, p, acc);
  auto fail_all = [&]() {
    sinks.fail();
    *value = quiet_nan<Real>();
  };
  if (!ok) {
    fail_all();
    return;
  }

  // Time-invariant Q: Q⁻¹ and log|Q| once; its transition sums stay raw and
  // get Q⁻¹ applied at the end.
  const bool raw = !P.Q_tv;
  std::vector<Real> qbuf(2 * n2 + n + 1);
  Real* Qinv = qbuf.data();
  Real ldQ = 0;
  if (T > 1 && raw &&
      !transition_precision<Real, NK>(Qinv, &ldQ, P.Q, P.Q_diag, n, qbuf.data() + n2, qbuf.data() + 2 * n2)) {
    fail_all();
    return;
  }

  if (parts > T) parts = T;
  if (parts < 1) parts = 1;
  PartScratch<Real> scratch(parts, accumulator_size(n, p), cache, idx, p);
  std::vector<std::unique_ptr<LoglikPart<Real, NK>>> part(parts);
  for (int k = 0; k < parts; ++k) {
    const auto s = scratch.slot(k, /*beside=*/k != parts - 1);
    part[k].reset(new LoglikPart<Real, NK>(P, F, x, G, acc, s.acc, raw, Qinv, ldQ, s.idx, s.cache));
  }
  // Part k covers steps [T k / parts, T (k+1) / parts).
  auto bound = [&](int k) { return int((int64_t(T) * k) / parts); };
  {
    std::vector<std::thread> threads;
    threads.reserve(std::size_t(parts - 1));
    std::vector<Real> S_hi(n2), S_lo(n2), X_hi(n2), X_lo(n2);
    auto noop = [](int, const Real*, const Real*, const Real*) {};
    for (int k = parts - 2; k >= 0; --k) {  // recursion only, down to the next boundary
      const int hi = bound(k + 2), lo = bound(k + 1);
      band_range<Real, NK>(F, T, n, lo, hi, S_hi.data(), S_lo.data(), noop, X_lo.data());
      std::swap(S_hi, S_lo);
      std::swap(X_hi, X_lo);
      threads.emplace_back([&, k, lo, S = S_hi, Xb = X_hi]() {
        LoglikPart<Real, NK>& w = *part[k];
        w.prime(lo, S.data(), lo < T - 1 ? Xb.data() : static_cast<const Real*>(nullptr));
        band_range<Real, NK>(F, T, n, bound(k), bound(k + 1), S.data(), static_cast<Real*>(nullptr),
                             [&w](int t, const Real* St, const Real* X, const Real* Sn) { w.visit(t, St, X, Sn); });
      });
    }
    LoglikPart<Real, NK>& w = *part[parts - 1];
    band_range<Real, NK>(F, T, n, bound(parts - 1), T, static_cast<const Real*>(nullptr),
                         static_cast<Real*>(nullptr),
                         [&w](int t, const Real* St, const Real* X, const Real* Sn) { w.visit(t, St, X, Sn); });
    for (auto& th : threads) th.join();
  }

  double val = 0;
  long long n_obs = 0;
  for (int k = 0; k < parts; ++k) {
    if (part[k]->failed()) {
      fail_all();
      return;
    }
    val += part[k]->value();
    n_obs += part[k]->observed();
  }
  scratch.add_into(acc);
  const int n_flat = P.P0 != nullptr ? 0 : n;
  val -= 0.5 * double(n_obs - n_flat) * std::log(2.0 * M_PI);
  *value = static_cast<Real>(val);

  // Q⁻¹ on the raw transition sums of Ā and b̄ (fixed Q), in double. Q̄'s
  // terms carry their Q⁻¹ already (and are symmetric; a diagonal Q̄ holds
  // the diagonal only).
  if (raw && T > 1) apply_qinv_to_sums(G, Qinv, n, /*with_Q=*/false);
  sinks.finish(/*symmetrise_Q=*/false);
}

}  // namespace kalmax_cpu
