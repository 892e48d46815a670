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
//   b̄_t = Q_t⁻¹ r_t
//   C̄_t[K] = σ x_tᵀ − F Σ_t          R̄_t[K,K] = ½ (σσᵀ + F Σ_t Fᵀ − S)
//   d̄_t[K] = σ                        ȳ_t[K] = −σ
//   m̄_0 = P_0⁻¹ d_0                   P̄_0 = ½ P_0⁻¹ (d_0 d_0ᵀ + Σ_0 − P_0) P_0⁻¹
// This is the same gradient as the envelope-theorem route of likelihood.py
// (−∂_θJ at fixed x*, minus ½ tr(Σ ∂_θH), minus the normalising log-dets),
// written per step: the −∂_θJ part gives the terms in x*, ½ tr(Σ ∂_θH) the
// terms in Σ, and the log-dets the −Q, −S, −P_0 terms.
//
// The value is
//   log p(y_K) = −J(x*) − ½ log|H| − ½ log|P_0| − ½ Σ log|Q_t| − ½ Σ log|R_{t,KK}|
//                − ½ (N_K − n_flat) log 2π,   log|H| = −2 Σ_t Σ_i log (Li_t)_ii.
#pragma once

#include <cmath>
#include <vector>

#include "smoother.h"

namespace kalmax_cpu {

// C = op(A) op(B) for n-by-n matrices (C must not alias A or B).
template <class Real, int NK>
inline void matmul(Real* C, const Real* A, bool ta, const Real* B, bool tb, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i)
    for (int j = 0; j < n; ++j) {
      Real s = 0;
      for (int r = 0; r < n; ++r) s += (ta ? A[r * n + i] : A[i * n + r]) * (tb ? B[j * n + r] : B[r * n + j]);
      C[i * n + j] = s;
    }
}

// Inverse of a symmetric positive-definite matrix, and its log-determinant.
template <class Real, int NK>
inline bool spd_inverse(Real* out, Real* logdet, const Real* S, int n_, Real* L, Real* scratch) {
  const int n = fixed<NK>(n_);
  sym_lower<Real, NK>(L, S, n);
  if (!cholesky<Real, NK>(L, L, n, scratch)) return false;
  Real ld = 0;
  for (int i = 0; i < n; ++i) ld += Real(2) * std::log(L[i * n + i]);
  *logdet = ld;
  for (int j = 0; j < n; ++j) {  // column j of S⁻¹
    for (int i = 0; i < n; ++i) scratch[i] = Real(i == j);
    lsolve_vec<Real, NK>(L, scratch, scratch, n);
    ltsolve_vec_inplace<Real, NK>(L, scratch, n);
    for (int i = 0; i < n; ++i) out[i * n + j] = scratch[i];
  }
  return true;
}

// The band sweep: calls visit(t, Σ_t, Σ_{t+1,t}, Σ_{t+1}) for t = T-1, ..., 0
// (the last two null at t = T-1). All matrices n-by-n, row-major.
template <class Real, int NK, class Visit>
void band_sweep(const FactorView<Real>& F, int T, int n_, Visit&& visit) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  std::vector<Real> buf(5 * n2);
  Real* S_next = buf.data();
  Real* S_t = S_next + n2;
  Real* X = S_t + n2;
  Real* ML = X + n2;
  Real* P = ML + n2;
  const Real* Li_last = F.Li + std::size_t(T - 1) * n2;
  matmul<Real, NK>(S_next, Li_last, true, Li_last, false, n);
  visit(T - 1, S_next, static_cast<const Real*>(nullptr), static_cast<const Real*>(nullptr));
  for (int t = T - 2; t >= 0; --t) {
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

// Value and gradient of log p(y_K) for one trajectory. G's sinks as for
// gradients_one (time-invariant fields accumulate in double); *value gets
// the log-likelihood. NaN everywhere when the factor failed.
template <class Real, int NK>
void loglik_one(const Trajectory<Real>& P, const FactorView<Real>& F, bool ok, const Real* x,
                Real* value, Gradients<Real>& G, double* acc, int* idx, PatternCache<Real>* cache) {
  const int T = P.T, n = fixed<NK>(P.n), p = P.p;
  const std::size_t n2 = std::size_t(n) * n;

  GradSink<Real>* sinks[] = {&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0};
  const int steps[] = {T - 1, T - 1, T - 1, T, T, T, 1, 1};
  auto blocks = [&](int f) { return sinks[f]->tv ? std::size_t(steps[f] > 0 ? steps[f] : 0) : 1; };
  double* next_acc = acc;
  for (int f = 0; f < 8; ++f) {
    GradSink<Real>& s = *sinks[f];
    if (!s.present()) continue;
    fill(s.out, blocks(f) * s.item, Real(0));
    if (!s.tv) {
      s.acc = next_acc;
      next_acc += s.item;
      std::fill(s.acc, s.acc + s.item, 0.0);
    }
  }
  fill(G.y, std::size_t(T) * p, Real(0));
  const Real nan = quiet_nan<Real>();
  auto fail_all = [&]() {
    for (int f = 0; f < 8; ++f)
      if (sinks[f]->present()) fill(sinks[f]->out, blocks(f) * sinks[f]->item, nan);
    fill(G.y, std::size_t(T) * p, nan);
    *value = nan;
  };
  if (!ok) {
    fail_all();
    return;
  }

  const int q = n > p ? n : p;
  std::vector<Real> buf(12 * n2 + 3 * std::size_t(p) * p + 3 * std::size_t(p) * n + 8 * std::size_t(q) + 8);
  Arena<Real> arena(buf.data());
  Real* Qinv = arena.take(n2);
  Real* Lq = arena.take(n2);
  Real* E1 = arena.take(n2);
  Real* E2 = arena.take(n2);
  Real* AS = arena.take(n2);
  Real* AX = arena.take(n2);
  Real* T1 = arena.take(n2);
  Real* T2 = arena.take(n2);
  Real* Rinv = arena.take(std::size_t(p) * p);
  Real* Lr = arena.take(std::size_t(p) * p);
  Real* Fk = arena.take(std::size_t(p) * n);
  Real* FS = arena.take(std::size_t(p) * n);
  Real* r = arena.take(q);
  Real* e = arena.take(q);
  Real* sigma = arena.take(q);
  Real* cs = arena.take(q + 1);

  // Time-invariant Q: Q⁻¹ and log|Q| once; its transition sums stay raw and
  // get Q⁻¹ applied at the end.
  double val = 0;  // −J − ½ Σ log-dets, accumulated in double
  long long n_obs = 0;
  Real ldQ = 0;
  const bool raw = !P.Q_tv;
  if (T > 1 && raw && !spd_inverse<Real, NK>(Qinv, &ldQ, P.Q, n, Lq, cs)) {
    fail_all();
    return;
  }
  auto dst = [](GradSink<Real>& s, int t, auto&& fn) {
    if (!s.present()) return;
    if (s.tv)
      fn(s.out + std::size_t(t) * s.item);
    else
      fn(s.acc);
  };
  bool failed = false;

  band_sweep<Real, NK>(F, T, n, [&](int t, const Real* S, const Real* X, const Real* S_next) {
    if (failed) return;
    const Real* xt = x + std::size_t(t) * n;
    // Transition t → t+1.
    if (X != nullptr) {
      const Real* A = P.At(t);
      const Real* bt = P.b != nullptr ? P.bt(t) : nullptr;
      for (int i = 0; i < n; ++i)
        r[i] = xt[n + i] - dot<Real, NK>(A + std::size_t(i) * n, xt, n) - (bt ? bt[i] : Real(0));
      matmul<Real, NK>(AS, A, false, S, false, n);  // A Σ_t
      matmul<Real, NK>(AX, A, false, X, true, n);   // A Σ_{t+1,t}ᵀ
      matmul<Real, NK>(T1, AS, false, A, true, n);  // A Σ_t Aᵀ
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          const std::size_t ij = std::size_t(i) * n + j;
          E1[ij] = r[i] * xt[j] + X[ij] - AS[ij];
          E2[ij] = r[i] * r[j] + S_next[ij] - AX[ij] - AX[std::size_t(j) * n + i] + T1[ij];
        }
      if (!raw && !spd_inverse<Real, NK>(Qinv, &ldQ, P.Qt(t), n, Lq, cs)) {
        failed = true;
        return;
      }
      for (int i = 0; i < n; ++i) e[i] = dot<Real, NK>(Qinv + std::size_t(i) * n, r, n);  // Q⁻¹ r
      val -= 0.5 * double(dot<Real, NK>(r, e, n)) + 0.5 * double(ldQ);
      // Raw sums where Q is fixed and the destination is too; Q⁻¹ applied now otherwise.
      if (G.A.present()) {
        if (raw && !G.A.tv) {
          for (std::size_t i = 0; i < n2; ++i) G.A.acc[i] += E1[i];
        } else {
          matmul<Real, NK>(T2, Qinv, false, E1, false, n);
          dst(G.A, t, [&](auto* g) { for (std::size_t i = 0; i < n2; ++i) g[i] += T2[i]; });
        }
      }
      if (G.Q.present()) {
        if (raw) {
          for (std::size_t i = 0; i < n2; ++i) G.Q.acc[i] += E2[i];
        } else {
          const Real* Qt = P.Qt(t);
          for (std::size_t i = 0; i < n2; ++i) E2[i] -= Qt[i];
          matmul<Real, NK>(T1, Qinv, false, E2, false, n);
          matmul<Real, NK>(T2, T1, false, Qinv, false, n);
          Real* g = G.Q.out + std::size_t(t) * n2;
          for (int i = 0; i < n; ++i)
            for (int j = 0; j < n; ++j)
              g[i * n + j] += Real(0.25) * (T2[i * n + j] + T2[j * n + i]);
        }
      }
      if (G.b.present()) {
        if (raw && !G.b.tv) {
          for (int i = 0; i < n; ++i) G.b.acc[i] += r[i];
        } else {
          dst(G.b, t, [&](auto* g) { for (int i = 0; i < n; ++i) g[i] += e[i]; });
        }
      }
    }

    // Measurement t.
    const Real* yt = P.y + std::size_t(t) * p;
    const Real* dt = P.d != nullptr ? P.dt(t) : nullptr;
    const Real* Ct = P.Ct(t);
    const PatternBlocks<Real>* pb =
        cache != nullptr ? cache->template lookup<NK>(P.w + std::size_t(t) * p) : nullptr;
    int k = 0;
    const int* K = idx;
    const Real* Sk = Rinv;  // R_KK⁻¹
    const Real* Fm = Fk;    // R_KK⁻¹ C_K
    Real ldR = 0;
    if (pb != nullptr) {
      if (!pb->ok) {
        failed = true;
        return;
      }
      k = pb->k;
      K = pb->idx;
      Sk = pb->Rinv;
      Fm = pb->F;
      ldR = pb->logdet;
    } else {
      k = observed(P.w + std::size_t(t) * p, p, idx);
      if (k > 0) {
        const Real* Rt = P.Rt(t);
        for (int a = 0; a < k; ++a)
          for (int c = 0; c < k; ++c) Lr[a * k + c] = Rt[idx[a] * p + idx[c]];
        if (!spd_inverse<Real, 0>(Rinv, &ldR, Lr, k, Lr, cs)) {
          failed = true;
          return;
        }
        for (int a = 0; a < k; ++a)
          for (int j = 0; j < n; ++j) {
            Real s = 0;
            for (int c = 0; c < k; ++c) s += Rinv[a * k + c] * Ct[std::size_t(idx[c]) * n + j];
            Fk[a * n + j] = s;
          }
      }
    }
    if (k > 0) {
      n_obs += k;
      for (int a = 0; a < k; ++a)
        e[a] = yt[K[a]] - (dt ? dt[K[a]] : Real(0)) - dot<Real, NK>(Ct + std::size_t(K[a]) * n, xt, n);
      for (int a = 0; a < k; ++a) {
        Real s = 0;
        for (int c = 0; c < k; ++c) s += Sk[a * k + c] * e[c];
        sigma[a] = s;
      }
      double je = 0;
      for (int a = 0; a < k; ++a) je += double(e[a]) * sigma[a];
      val -= 0.5 * je + 0.5 * double(ldR);
      for (int a = 0; a < k; ++a)  // F Σ_t
        for (int j = 0; j < n; ++j) {
          Real s = 0;
          for (int c = 0; c < n; ++c) s += Fm[a * n + c] * S[c * n + j];
          FS[a * n + j] = s;
        }
      Real* gy = G.y + std::size_t(t) * p;
      for (int a = 0; a < k; ++a) gy[K[a]] = -sigma[a];
      dst(G.C, t, [&](auto* g) {
        for (int a = 0; a < k; ++a) {
          auto* row = g + std::size_t(K[a]) * n;
          for (int j = 0; j < n; ++j) row[j] += sigma[a] * xt[j] - FS[a * n + j];
        }
      });
      dst(G.R, t, [&](auto* g) {
        for (int a = 0; a < k; ++a)
          for (int c = 0; c < k; ++c) {
            const Real fsf = dot<Real, NK>(FS + std::size_t(a) * n, Fm + std::size_t(c) * n, n);
            g[std::size_t(K[a]) * p + K[c]] += Real(0.5) * (sigma[a] * sigma[c] + fsf - Sk[a * k + c]);
          }
      });
      dst(G.d, t, [&](auto* g) {
        for (int a = 0; a < k; ++a) g[K[a]] += sigma[a];
      });
    }

    // Prior on x_0.
    if (t == 0 && P.P0 != nullptr) {
      Real ldP = 0;
      if (!spd_inverse<Real, NK>(T1, &ldP, P.P0, n, Lq, cs)) {  // T1 = P_0⁻¹
        failed = true;
        return;
      }
      for (int i = 0; i < n; ++i) r[i] = xt[i] - (P.m0 != nullptr ? P.m0[i] : Real(0));
      for (int i = 0; i < n; ++i) e[i] = dot<Real, NK>(T1 + std::size_t(i) * n, r, n);
      val -= 0.5 * double(dot<Real, NK>(r, e, n)) + 0.5 * double(ldP);
      dst(G.m0, 0, [&](auto* g) { for (int i = 0; i < n; ++i) g[i] += e[i]; });
      if (G.P0.present()) {
        for (int i = 0; i < n; ++i)
          for (int j = 0; j < n; ++j) E2[i * n + j] = r[i] * r[j] + S[i * n + j] - P.P0[i * n + j];
        matmul<Real, NK>(AS, T1, false, E2, false, n);
        matmul<Real, NK>(T2, AS, false, T1, false, n);
        dst(G.P0, 0, [&](auto* g) {
          for (int i = 0; i < n; ++i)
            for (int j = 0; j < n; ++j) g[i * n + j] += Real(0.25) * (T2[i * n + j] + T2[j * n + i]);
        });
      }
    }
  });
  if (failed) {
    fail_all();
    return;
  }

  // −½ log|H| = Σ_t Σ_i log (Li_t)_ii.
  for (int t = 0; t < T; ++t) {
    const Real* Li = F.Li + std::size_t(t) * n2;
    for (int i = 0; i < n; ++i) val += std::log(double(Li[i * n + i]));
  }
  const int n_flat = P.P0 != nullptr ? 0 : n;
  val -= 0.5 * double(n_obs - n_flat) * std::log(2.0 * M_PI);
  *value = static_cast<Real>(val);

  // Q⁻¹ on the raw transition sums (fixed Q), in double.
  if (raw && T > 1) {
    std::vector<double> tmp(n2), tmp2(n2);
    auto left = [&](const double* S, double* out) {
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) {
          double v = 0;
          for (int c = 0; c < n; ++c) v += double(Qinv[i * n + c]) * S[c * n + j];
          out[i * n + j] = v;
        }
    };
    if (G.A.present() && !G.A.tv) {
      left(G.A.acc, tmp.data());
      std::copy(tmp.begin(), tmp.end(), G.A.acc);
    }
    if (G.Q.present()) {  // ½ Q⁻¹ (Σ E2 − (T−1) Q) Q⁻¹
      double* S = G.Q.acc;
      for (std::size_t i = 0; i < n2; ++i) S[i] -= double(T - 1) * P.Q[i];
      left(S, tmp.data());
      for (int i = 0; i < n; ++i)  // (Q⁻¹ S) Q⁻¹ = (Q⁻¹ (Q⁻¹ S)ᵀ)ᵀ, Q⁻¹ symmetric
        for (int j = 0; j < n; ++j) tmp2[i * n + j] = tmp[j * n + i];
      left(tmp2.data(), tmp.data());
      for (int i = 0; i < n; ++i)
        for (int j = 0; j < n; ++j) S[i * n + j] = 0.25 * (tmp[j * n + i] + tmp[i * n + j]);
    }
    if (G.b.present() && !G.b.tv) {
      for (int i = 0; i < n; ++i) {
        double v = 0;
        for (int c = 0; c < n; ++c) v += double(Qinv[i * n + c]) * G.b.acc[c];
        tmp[i] = v;
      }
      for (int i = 0; i < n; ++i) G.b.acc[i] = tmp[i];
    }
  }
  for (int f = 0; f < 8; ++f) {
    GradSink<Real>& s = *sinks[f];
    if (!s.present() || s.tv) continue;
    if (f == 4) {  // R̄: symmetric part of the accumulated sum
      for (int i = 0; i < p; ++i)
        for (int j = 0; j < p; ++j)
          s.out[i * p + j] = static_cast<Real>(0.5 * (s.acc[i * p + j] + s.acc[j * p + i]));
    } else {
      for (std::size_t i = 0; i < s.item; ++i) s.out[i] = static_cast<Real>(s.acc[i]);
    }
  }
}

}  // namespace kalmax_cpu
