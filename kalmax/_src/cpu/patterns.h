// Measurement blocks memoised by mask pattern.
//
// When C and R are time-invariant, everything the measurement at step t
// contributes depends on y_t only through the observed values and on the
// mask only through its pattern K (which entries are observed):
//   G_K  = C_KᵀR_KK⁻¹C_K        (n×n)  added to H_tt
//   F_K  = R_KK⁻¹C_K            (k×n)  g_t += F_Kᵀ(y_K − d_K)
//   Ri_K = R_KK⁻¹               (k×k)  for the gradients
// Real recordings have few distinct patterns (all observed, one sensor out,
// ...), so computing these once per pattern removes the per-step Cholesky of
// R_KK and the whitening of C from the time loop. The cache is bounded; steps
// whose pattern does not fit fall back to the per-step computation.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <unordered_map>
#include <memory>
#include <vector>

#include "dense.h"

namespace kalmax_cpu {

// Lower Cholesky factor of the symmetrised observed sub-block R_KK (idx: the
// k observed entries; scratch: k entries).
template <class Real>
inline bool observed_cov_factor(Real* Lr, const Real* R, int p, const int* idx, int k,
                                Real* scratch) {
  for (int a = 0; a < k; ++a)
    for (int c = 0; c <= a; ++c)
      Lr[a * k + c] = Real(0.5) * (R[idx[a] * p + idx[c]] + R[idx[c] * p + idx[a]]);
  return cholesky<Real, 0>(Lr, Lr, k, scratch);
}

// A diagonal R (its p variances r): the factor of R_KK = diag(r_K) is
// diag(√r_K); sd receives its k diagonal entries. False unless every r_K is
// positive (NaN included), as the Cholesky factorisation would report.
template <class Real>
inline bool observed_sd(Real* sd, const Real* r, const int* idx, int k) {
  for (int a = 0; a < k; ++a) {
    const Real v = r[idx[a]];
    if (!(v > Real(0)) || !std::isfinite(v)) return false;
    sd[a] = std::sqrt(v);
  }
  return true;
}

// The same factor as a dense k×k lower-triangular block (for the pattern
// cache, which builds its blocks once and shares the dense code).
template <class Real>
inline bool observed_sd_factor(Real* Lr, const Real* r, const int* idx, int k) {
  std::fill(Lr, Lr + std::size_t(k) * k, Real(0));
  for (int a = 0; a < k; ++a) {
    const Real v = r[idx[a]];
    if (!(v > Real(0)) || !std::isfinite(v)) return false;
    Lr[a * k + a] = std::sqrt(v);
  }
  return true;
}

// The whitened observed rows W = Lr⁻¹C_K (k×n, Lr the factor of R_KK) and
// their share of the information, G += WᵀW = C_KᵀR_KK⁻¹C_K.
template <class Real, int NK>
inline void whiten_observed_rows(Real* W, Real* G, const Real* Lr, const Real* C, const int* idx, int k,
                                 int n_) {
  const int n = fixed<NK>(n_);
  for (int a = 0; a < k; ++a)
    for (int j = 0; j < n; ++j) W[a * n + j] = C[std::size_t(idx[a]) * n + j];
  lsolve_rows<Real, NK>(Lr, W, W, k, n);
  add_cross<Real, NK, NK>(G, W, W, k, n, n, Real(1));
}

// whiten_observed_rows for a diagonal factor (sd = √r_K): W = C_K scaled
// row by row, O(k n) instead of a triangular solve, then G += WᵀW.
template <class Real, int NK>
inline void whiten_observed_rows_diagonal(Real* W, Real* G, const Real* sd, const Real* C, const int* idx,
                                          int k, int n_) {
  const int n = fixed<NK>(n_);
  for (int a = 0; a < k; ++a) {
    const Real s = Real(1) / sd[a];
    for (int j = 0; j < n; ++j) W[a * n + j] = s * C[std::size_t(idx[a]) * n + j];
  }
  add_cross<Real, NK, NK>(G, W, W, k, n, n, Real(1));
}

template <class Real>
struct PatternBlocks {
  int k = 0;
  bool ok = true;    // R_KK positive definite
  const int* idx;    // observed entries, k of them
  const Real* G;     // n×n
  const Real* F;     // k×n
  const Real* Rinv;  // k×k
  Real logdet = 0;   // log|R_KK|
};

template <class Real>
class PatternCache {
 public:
  // At most this many Reals of memoised blocks (64 MiB of doubles).
  static constexpr std::size_t kMaxPool = std::size_t(8) << 20;

  // diag: R holds the p variances of a diagonal R (else the p×p block).
  PatternCache(const Real* C, const Real* R, int n, int p, bool diag = false)
      : C_(C), R_(R), n_(n), p_(p), diag_(diag) {
    const std::size_t entry = std::size_t(n) * n + std::size_t(p) * n + std::size_t(p) * p;
    // Reserve once so that the pool never moves: entries hand out pointers.
    max_entries_ = p <= 64 ? std::max<std::size_t>(1, kMaxPool / entry) : 0;
    if (max_entries_ > 4096) max_entries_ = 4096;
    pool_.reserve(max_entries_ * entry);
    idx_pool_.reserve(max_entries_ * std::size_t(p));
    entries_.reserve(max_entries_);
    if (max_entries_ > 0 && p <= kDirectBits) direct_.assign(std::size_t(1) << p, -1);
    scratch_.resize(3 * std::size_t(p) * p + std::size_t(p) * n + std::size_t(p) + 8);
  }

  // An empty cache for the same C and R (for another thread: lookups are not
  // safe to share).
  std::unique_ptr<PatternCache> fresh() const {
    return std::unique_ptr<PatternCache>(new PatternCache(C_, R_, n_, p_, diag_));
  }

  // Blocks for the pattern of mask row w, or nullptr when the cache is full
  // (or p > 64). The pointer is valid until the next lookup.
  template <int NK>
  const PatternBlocks<Real>* lookup(const Real* w) {
    if (max_entries_ == 0) return nullptr;
    uint64_t key = 0;
    for (int i = 0; i < p_; ++i)
      if (w[i] > Real(0)) key |= uint64_t(1) << i;
    if (!direct_.empty()) {  // a table indexed by the pattern itself: no hashing per step
      int& slot = direct_[key];
      if (slot >= 0) return &entries_[std::size_t(slot)];
      if (entries_.size() >= max_entries_) return nullptr;
      entries_.push_back(build<NK>(key));
      slot = int(entries_.size() - 1);
      return &entries_.back();
    }
    auto it = map_.find(key);
    if (it != map_.end()) return &entries_[it->second];
    if (entries_.size() >= max_entries_) return nullptr;
    entries_.push_back(build<NK>(key));
    map_.emplace(key, entries_.size() - 1);
    return &entries_.back();
  }

 private:
  template <int NK>
  PatternBlocks<Real> build(uint64_t key) {
    const int n = fixed<NK>(n_), p = p_;
    PatternBlocks<Real> e;
    int* idx = idx_pool_.data() + idx_pool_.size();
    int k = 0;
    for (int i = 0; i < p; ++i)
      if (key >> i & 1) idx_pool_.push_back(i), ++k;
    e.k = k;
    e.idx = idx;
    const std::size_t start = pool_.size();
    pool_.resize(start + std::size_t(n) * n + std::size_t(k) * n + std::size_t(k) * k, Real(0));
    Real* G = pool_.data() + start;
    Real* F = G + std::size_t(n) * n;
    Real* Rinv = F + std::size_t(k) * n;
    e.G = G;
    e.F = F;
    e.Rinv = Rinv;
    if (k == 0) return e;

    Real* Lr = scratch_.data();
    Real* Wr = Lr + std::size_t(p) * p;
    Real* c = Wr + std::size_t(p) * p;
    if (!(diag_ ? observed_sd_factor(Lr, R_, idx, k) : observed_cov_factor(Lr, R_, p, idx, k, c))) {
      e.ok = false;
      return e;
    }
    e.logdet = cholesky_logdet(Lr, k);
    // W = Lr⁻¹C_K (into F), G = WᵀW, then F = Lr⁻ᵀW = R_KK⁻¹C_K.
    whiten_observed_rows<Real, NK>(F, G, Lr, C_, idx, k, n);
    ltsolve_rows<Real, NK>(Lr, F, k, n);
    // Ri = WrᵀWr with Wr = Lr⁻¹.
    for (int a = 0; a < k; ++a)
      for (int b = 0; b < k; ++b) Wr[a * k + b] = Real(a == b);
    lsolve_rows<Real, 0>(Lr, Wr, Wr, k, k);
    add_cross<Real, 0, 0>(Rinv, Wr, Wr, k, k, k, Real(1));
    return e;
  }

  // Up to this many measured entries the patterns index a table of 2^p slots
  // directly (a lookup per step, per pass: the hash map's find measured 3-4 %
  // of a log-likelihood call at n = p = 1); beyond, the hash map.
  static constexpr int kDirectBits = 8;

  const Real* C_;
  const Real* R_;
  int n_, p_;
  bool diag_;
  std::size_t max_entries_ = 0;
  std::vector<Real> pool_;
  std::vector<int> idx_pool_;
  std::vector<Real> scratch_;
  std::vector<PatternBlocks<Real>> entries_;
  std::unordered_map<uint64_t, std::size_t> map_;
  std::vector<int> direct_;  // pattern → index into entries_ (−1: not built yet), p ≤ kDirectBits
};

}  // namespace kalmax_cpu
