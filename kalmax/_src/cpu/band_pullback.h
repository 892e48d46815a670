// The pull-back of a cotangent on the blocks of H (D̄_t on H_tt, S̄_t on
// H_{t+1,t}) to the model fields that H depends on: A, Q, C, R, P_0. The
// reverse mode of the covariances' derivatives (covariance_band.py) ends
// here: the band cotangent becomes one on H's blocks (the transposed band
// tangent), and this pass takes it to the model.
//
// The formulas are those of precision_terms.h with V_t = −(D̄_t + D̄_tᵀ) and
// X_t = −S̄_t. Every step's terms need only the cotangents of steps t and
// t+1 and the model at t: no recursion, so a trajectory's pass splits over
// threads by ranges of steps (visit_in_parts). Q̄ is formed in its direct
// form ½Q⁻¹W_tQ⁻¹ (the likelihood's second form relies on V being Σ).
// JAX's VJP of normal_equations.dynamics_blocks and measurement_precision_tangent
// is the oracle.
#pragma once

#include <cstddef>
#include <initializer_list>
#include <memory>
#include <vector>

#include "precision_terms.h"
#include "smoother.h"

namespace kalmax_cpu {

// The terms of a range of steps (one per thread; see gradients_one for the
// accumulators of a part that runs beside others).
template <class Real, int NK>
class PullbackPart {
 public:
  // Dbar (T, n, n), Sbar (T-1, n, n): the cotangents. raw: Q time-invariant,
  // with Q⁻¹ in Qinv_shared (and 1/q in its diagonal for a diagonal Q).
  PullbackPart(const Trajectory<Real>& P, const Real* Dbar, const Real* Sbar, const Gradients<Real>& G,
               const double* acc_base, double* own_acc, bool raw, const Real* Qinv_shared, int* idx,
               PatternCache<Real>* cache)
      : P_(P), Dbar_(Dbar), Sbar_(Sbar), G_(G), raw_(raw), idx_(idx), cache_(cache) {
    n_ = fixed<NK>(P.n);
    p_ = P.p;
    const std::size_t n2 = std::size_t(n_) * n_, q = std::size_t(n_ > p_ ? n_ : p_);
    buf_.resize(9 * n2 + std::size_t(p_) * p_ * 2 + 2 * std::size_t(p_) * n_ + 2 * q + 2 * std::size_t(n_) + 8);
    Arena<Real> arena(buf_.data());
    for (Real** block : {&Qinv_, &Lq_, &V_, &Vn_, &X_, &AV_, &E_, &W1_, &W2_}) *block = arena.take(n2);
    for (Real** block : {&Rinv_, &Lr_}) *block = arena.take(std::size_t(p_) * p_);
    for (Real** block : {&Fk_, &FV_}) *block = arena.take(std::size_t(p_) * n_);
    zeros_ = arena.take(q);
    cs_ = arena.take(q + 1);
    qi_ = arena.take(n_);
    fill(zeros_, q, Real(0));
    if (raw) {
      copy(Qinv_, Qinv_shared, n2);
      for (int i = 0; i < n_; ++i) qi_[i] = Qinv_[std::size_t(i) * n_ + i];
    }
    if (own_acc != nullptr) redirect_accumulators(G_, acc_base, own_acc);
  }

  bool failed() const { return failed_; }

  void visit(int t) {
    if (failed_) return;
    const int T = P_.T, n = fixed<NK>(n_);
    const std::size_t n2 = std::size_t(n) * n;
    Gradients<Real>& G = G_;
    V_of(V_, t);
    if (t < T - 1) {
      transition(t);
      if (failed_) return;
    }

    Measurement<Real, NK> m;
    if (!measurement_at<Real, NK>(P_, t, cache_, idx_, Lr_, cs_, &m)) {
      failed_ = true;
      return;
    }
    if (m.k > 0) {
      const Real *Sk, *Fm;
      Real ldR = 0;
      measurement_weights<Real, NK>(m, n, Rinv_, Fk_, Lr_, cs_, &Sk, &Fm, &ldR);
      rows_times<Real, NK>(FV_, Fm, V_, m.k, n);
      add_measurement_terms<Real, NK>(G, t, n, p_, m, Sk, Fm, FV_, zeros_, zeros_, Real(0));
    }

    if (t == 0 && P_.P0 != nullptr && G.P0.present()) {
      Real ld = 0;
      if (!spd_inverse<Real, NK>(W1_, &ld, P_.P0, n, Lq_, cs_)) {
        failed_ = true;
        return;
      }
      copy(E_, W1_, n2);  // P_0⁻¹ (W1_ is the terms' scratch)
      add_prior_cov_terms<Real, NK>(G, E_, V_, W1_, W2_, n);
    }
  }

 private:
  // V_t = −(D̄_t + D̄_tᵀ) into out.
  void V_of(Real* out, int t) const {
    const int n = fixed<NK>(n_);
    const Real* D = Dbar_ + std::size_t(t) * n * n;
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) out[i * n + j] = -(D[i * n + j] + D[j * n + i]);
  }

  // Ā_t and Q̄_t (precision_terms.h).
  void transition(int t) {
    const int n = fixed<NK>(n_);
    const std::size_t n2 = std::size_t(n) * n;
    Gradients<Real>& G = G_;
    const Real* A = P_.At(t);
    const bool diag = P_.Q_diag;
    if (!raw_) {
      if (!transition_precision<Real, NK>(Qinv_, nullptr, P_.Qt(t), diag, n, Lq_, cs_)) {
        failed_ = true;
        return;
      }
      for (int i = 0; i < n; ++i) qi_[i] = Qinv_[std::size_t(i) * n + i];
    }
    const Real* Sb = Sbar_ + std::size_t(t) * n2;
    for (std::size_t i = 0; i < n2; ++i) X_[i] = -Sb[i];
    matmul<Real, NK>(AV_, A, false, V_, false, n);  // A V_t
    for (std::size_t i = 0; i < n2; ++i) E_[i] = X_[i] - AV_[i];
    add_transition_A<Real, NK>(G, t, raw_, diag, Qinv_, qi_, E_, W1_, n);
    if (!G.Q.present()) return;

    // ½W_t = ½ (V_{t+1} − A X_tᵀ − X_t Aᵀ + A V_t Aᵀ), symmetric.
    V_of(Vn_, t + 1);
    matmul<Real, NK>(W1_, A, false, X_, true, n);     // A X_tᵀ
    matmul<Real, NK>(W2_, AV_, false, A, true, n);    // A V_t Aᵀ
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) {
        const std::size_t ij = std::size_t(i) * n + j, ji = std::size_t(j) * n + i;
        E_[ij] = Real(0.5) * (Vn_[ij] - W1_[ij] - W1_[ji] + Real(0.5) * (W2_[ij] + W2_[ji]));
      }
    if (raw_ && !G.Q.tv) {  // raw sum; apply_qinv_to_sums applies Q⁻¹ on both sides at the end
      if (diag)
        for (int i = 0; i < n; ++i) G.Q.acc[i] += E_[std::size_t(i) * n + i];
      else
        for (std::size_t i = 0; i < n2; ++i) G.Q.acc[i] += E_[i];
      return;
    }
    if (diag) {
      G.Q.add_at(t, [&](auto* g) {
        for (int i = 0; i < n; ++i) g[i] += qi_[i] * qi_[i] * E_[std::size_t(i) * n + i];
      });
      return;
    }
    matmul<Real, NK>(W1_, Qinv_, false, E_, false, n);
    matmul<Real, NK>(W2_, W1_, false, Qinv_, false, n);
    G.Q.add_at(t, [&](auto* g) {
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j)
          g[i * n + j] += Real(0.5) * (W2_[std::size_t(i) * n + j] + W2_[std::size_t(j) * n + i]);
    });
  }

  const Trajectory<Real>& P_;
  const Real* Dbar_;
  const Real* Sbar_;
  Gradients<Real> G_;  // a copy: its accumulators may be this part's own
  bool raw_;
  int* idx_;
  PatternCache<Real>* cache_;
  int n_ = 0, p_ = 0;
  std::vector<Real> buf_;
  Real *Qinv_, *Lq_, *V_, *Vn_, *X_, *AV_, *E_, *W1_, *W2_, *Rinv_, *Lr_, *Fk_, *FV_, *zeros_, *cs_, *qi_;
  bool failed_ = false;
};

// The model cotangent of one trajectory for the cotangents Dbar (T, n, n)
// and Sbar (T-1, n, n) on H's blocks, into G's sinks (b, d, x0_mean and y
// get zeros: H does not depend on them). NaN everywhere when Q, R_KK or P_0
// is not positive definite. parts: threads over time (visit_in_parts).
template <class Real, int NK>
void band_pullback_one(const Trajectory<Real>& P, const Real* Dbar, const Real* Sbar, Gradients<Real>& G,
                       double* acc, int* idx, PatternCache<Real>* cache, int parts = 1) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n;
  const GradSinks<Real> sinks(G, T, n, p, acc);
  const bool raw = !P.Q_tv;
  std::vector<Real> qbuf(2 * n2 + n + 1);
  Real* Qinv = qbuf.data();
  if (T > 1 && raw &&
      !transition_precision<Real, NK>(Qinv, nullptr, P.Q, P.Q_diag, n, qbuf.data() + n2, qbuf.data() + 2 * n2)) {
    sinks.fail();
    return;
  }
  const bool ok = visit_parts_with_scratch<PullbackPart<Real, NK>>(
      T, parts, n, p, acc, idx, cache, [&](const typename PartScratch<Real>::Slot& s) {
        return new PullbackPart<Real, NK>(P, Dbar, Sbar, G, acc, s.acc, raw, Qinv, s.idx, s.cache);
      });
  if (!ok) {
    sinks.fail();
    return;
  }
  if (raw && T > 1) apply_qinv_to_sums(G, Qinv, n, /*with_Q=*/true);
  sinks.finish(/*symmetrise_Q=*/true);
}

}  // namespace kalmax_cpu
