// The pull-back of a cotangent on the blocks of H to the model, term by
// term. Shared by the log-likelihood pass (likelihood.h), whose terms in the
// posterior covariances are this pull-back of −½Σ, and by the band pull-back
// (band_pullback.h), which pulls back any cotangent.
//
// H_tt = C_KᵀR_KK⁻¹C_K + [t<T-1] A_tᵀQ_t⁻¹A_t + [t≥1] Q_{t-1}⁻¹ + [t=0] P_0⁻¹ and
// H_{t+1,t} = −Q_t⁻¹A_t (normal_equations.py). A cotangent (D̄_t on H_tt,
// S̄_t on H_{t+1,t}) is written here in the likelihood's variables
//   V_t = −(D̄_t + D̄_tᵀ)   (symmetric; the role of Σ_t, D̄_t = −½Σ_t there)
//   X_t = −S̄_t            (the role of Σ_{t+1,t}; the sub block appears twice in H)
// and with dQ⁻¹ = −Q⁻¹dQ Q⁻¹, d(R_KK⁻¹) = −R_KK⁻¹dR_KK R_KK⁻¹, dP_0⁻¹ likewise,
// the chain rule through each term of H gives (F = R_KK⁻¹C_K):
//   Ā_t      = Q_t⁻¹ (X_t − A_t V_t)
//   C̄_t[K]   = −F V_t
//   R̄_t[K,K] = ½ F V_t Fᵀ
//   P̄_0      = ½ P_0⁻¹ V_0 P_0⁻¹
//   Q̄_t      = ½ Q_t⁻¹ W_t Q_t⁻¹,  W_t = V_{t+1} − A_t X_tᵀ − X_t A_tᵀ + A_t V_t A_tᵀ
// (sums over the terms of H each field enters; common practice, checked
// against JAX's VJP of the assembly in tests/test_band_pullback.py). The
// log-likelihood adds its terms in x* and the log-determinants to the same
// expressions (likelihood.h, header comment); the functions below take
// those extra terms as arguments, zero for the band pull-back. The
// likelihood computes Q̄ in a second form of its own (no cancellation when
// V = Σ), so Q̄ is not shared.
#pragma once

#include <cstddef>

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

// Inverse of a symmetric positive-definite matrix, and its log-determinant
// (L: its Cholesky factor; scratch: n entries).
template <class Real, int NK>
inline bool spd_inverse(Real* out, Real* logdet, const Real* S, int n, Real* L, Real* scratch) {
  if (!sym_cholesky_inverse<Real, NK>(out, L, S, n, scratch)) return false;
  *logdet = cholesky_logdet(L, fixed<NK>(n));
  return true;
}

// R_KK⁻¹ (*Sk, k×k) and F = R_KK⁻¹C_K (*Fm, k×n) of a measurement, and
// log|R_KK|: the memoised blocks of its pattern, or computed into Rinv and Fk
// from the factor in Lr (measurement_at; cs: p+1 entries of scratch).
template <class Real, int NK>
inline void measurement_weights(const Measurement<Real, NK>& m, int n_, Real* Rinv, Real* Fk, const Real* Lr,
                                Real* cs, const Real** Sk, const Real** Fm, Real* ldR) {
  const int n = fixed<NK>(n_), k = m.k;
  *Sk = Rinv;
  *Fm = Fk;
  *ldR = 0;
  if (m.memo != nullptr) {
    *Sk = m.memo->Rinv;
    *Fm = m.memo->F;
    *ldR = m.memo->logdet;
  } else if (k > 0 && m.diag) {  // Lr holds √r_K: R_KK⁻¹ and F by scaling
    fill(Rinv, std::size_t(k) * k, Real(0));
    for (int a = 0; a < k; ++a) {
      const Real ri = Real(1) / (Lr[a] * Lr[a]);
      *ldR += Real(2) * std::log(Lr[a]);
      Rinv[a * k + a] = ri;
      for (int j = 0; j < n; ++j) Fk[a * n + j] = ri * m.C_row(a)[j];
    }
  } else if (k > 0) {  // Lr holds the factor of R_KK
    *ldR = cholesky_logdet(Lr, k);
    inverse_from_cholesky<Real, 0>(Rinv, Lr, k, cs);
    for (int a = 0; a < k; ++a)
      for (int j = 0; j < n; ++j) {
        Real s = 0;
        for (int c = 0; c < k; ++c) s += Rinv[a * k + c] * m.C_row(c)[j];
        Fk[a * n + j] = s;
      }
  }
}

// FV = F V (k×n) for F k×n and V n×n.
template <class Real, int NK>
inline void rows_times(Real* FV, const Real* F, const Real* V, int k, int n_) {
  const int n = fixed<NK>(n_);
  for (int a = 0; a < k; ++a)
    for (int j = 0; j < n; ++j) {
      Real s = 0;
      for (int c = 0; c < n; ++c) s += F[a * n + c] * V[c * n + j];
      FV[a * n + j] = s;
    }
}

// The measurement terms of step t: C̄_t[K] += σ x_tᵀ − FV and
// R̄_t[K,K] += ½ (σσᵀ + FV Fᵀ − c R_KK⁻¹), FV = F V_t (rows_times). σ, x_t
// and c = 1 are the log-likelihood's terms in x* and log|R|; the band
// pull-back passes zeros and c = 0. A diagonal R keeps the diagonal.
template <class Real, int NK>
inline void add_measurement_terms(Gradients<Real>& G, int t, int n_, int p, const Measurement<Real, NK>& m,
                                  const Real* Sk, const Real* Fm, const Real* FV, const Real* sigma,
                                  const Real* xt, Real c) {
  const int n = fixed<NK>(n_), k = m.k;
  const int* K = m.K;
  G.C.add_at(t, [&](auto* g) {
    for (int a = 0; a < k; ++a) {
      auto* row = g + std::size_t(K[a]) * n;
      for (int j = 0; j < n; ++j) row[j] += sigma[a] * xt[j] - FV[a * n + j];
    }
  });
  if (G.R.diagonal) {  // only R̄_ii (dR = e_i e_iᵀ dr_i)
    G.R.add_at(t, [&](auto* g) {
      for (int a = 0; a < k; ++a) {
        const Real fvf = dot<Real, NK>(FV + std::size_t(a) * n, Fm + std::size_t(a) * n, n);
        g[K[a]] += Real(0.5) * (sigma[a] * sigma[a] + fvf - c * Sk[a * k + a]);
      }
    });
  } else {
    G.R.add_at(t, [&](auto* g) {
      for (int a = 0; a < k; ++a)
        for (int b = 0; b < k; ++b) {
          const Real fvf = dot<Real, NK>(FV + std::size_t(a) * n, Fm + std::size_t(b) * n, n);
          g[std::size_t(K[a]) * p + K[b]] += Real(0.5) * (sigma[a] * sigma[b] + fvf - c * Sk[a * k + b]);
        }
    });
  }
}

// Ā_t += Q_t⁻¹ E with E = X_t − A_tV_t (+ r_t x_tᵀ in the likelihood).
// raw: Q is time-invariant, and a time-invariant Ā then sums E raw, Q⁻¹
// applied once at the end (apply_qinv_to_sums). Q⁻¹ is Qinv (n×n), or for a
// diagonal Q (`diag`) the row scaling by qi = 1/q. QE: n×n scratch.
template <class Real, int NK>
inline void add_transition_A(Gradients<Real>& G, int t, bool raw, bool diag, const Real* Qinv, const Real* qi,
                             const Real* E, Real* QE, int n_) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  if (!G.A.present()) return;
  if (raw && !G.A.tv) {
    for (std::size_t i = 0; i < n2; ++i) G.A.acc[i] += E[i];
    return;
  }
  if (diag) {
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) QE[std::size_t(i) * n + j] = qi[i] * E[std::size_t(i) * n + j];
  } else {
    matmul<Real, NK>(QE, Qinv, false, E, false, n);
  }
  G.A.add_at(t, [&](auto* g) { for (std::size_t i = 0; i < n2; ++i) g[i] += QE[i]; });
}

// P̄_0 += ½ P_0⁻¹ E P_0⁻¹ (symmetrised) with E = V_0 (+ d_0d_0ᵀ − P_0 in the
// likelihood); P0inv = P_0⁻¹. W1, W2: n×n scratch.
template <class Real, int NK>
inline void add_prior_cov_terms(Gradients<Real>& G, const Real* P0inv, const Real* E, Real* W1, Real* W2,
                                int n_) {
  const int n = fixed<NK>(n_);
  if (!G.P0.present()) return;
  matmul<Real, NK>(W1, P0inv, false, E, false, n);
  matmul<Real, NK>(W2, W1, false, P0inv, false, n);
  G.P0.add_at(0, [&](auto* g) {
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j) g[i * n + j] += Real(0.25) * (W2[i * n + j] + W2[j * n + i]);
  });
}

}  // namespace kalmax_cpu
