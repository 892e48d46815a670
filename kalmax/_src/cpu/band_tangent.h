// The tangent of the band of H⁻¹: dΣ = −band(Σ dH Σ) for a block-tridiagonal
// direction dH, from the stored factor and the band of Σ, in one forward and
// one backward sweep of one trajectory. The maths and its derivation are in
// kalmax/_src/blocktri.py (selected_inverse_tangent, the oracle) and
// kalmax/_src/covariance_band.py (how it gives the covariances' derivatives
// in both directions).
//
// With Li_t = L_t⁻¹, P_t = Li_tᵀ Li_t = (L_t L_tᵀ)⁻¹ and
// N_{t+1} = M_{t+1} Li_t = H_{t+1,t} P_t (in the compact form subTᵀ P_t):
//   forward:  dS_0 = dH_00,
//             dS_t = dH_tt − dH_{t,t-1} N_tᵀ − N_t dH_{t,t-1}ᵀ + N_t dS_{t-1} N_tᵀ
//   backward: dΣ_{T-1} = −P_{T-1} dS_{T-1} P_{T-1}, and for t < T-1
//             dN = dH_{t+1,t} P_t − N_{t+1} dS_t P_t
//             dΣ_{t+1,t} = −dΣ_{t+1} N_{t+1} − Σ_{t+1} dN
//             dΣ_tt = −P_t dS_t P_t − dNᵀ Σ_{t+1,t} − Σ_{t+1,t}ᵀ dN + N_{t+1}ᵀ dΣ_{t+1} N_{t+1}
// dS_t is the tangent of the Schur complement L_t L_tᵀ; it is kept in the
// output's diagonal blocks between the sweeps (each is read once, at its own
// step of the backward sweep, and then overwritten by dΣ_tt). The diagonal
// blocks of dH are read through their symmetric part, as the factorisation
// reads H_tt. About 15 n³ multiply-adds per step.
#pragma once

#include <cstddef>
#include <vector>

#include "likelihood.h"
#include "smoother.h"

namespace kalmax_cpu {

// X = ½(X + Xᵀ) in place (n-by-n).
template <class Real, int NK>
inline void symmetrise(Real* X, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i)
    for (int j = 0; j < i; ++j) {
      const Real v = Real(0.5) * (X[i * n + j] + X[j * n + i]);
      X[i * n + j] = X[j * n + i] = v;
    }
}

// N_{t+1} = M_{t+1} Li_t (stored M) or subTᵀ P_t (compact form), with P_t given.
template <class Real, int NK>
inline void coupling(Real* N, const FactorView<Real>& F, int t, const Real* P, int n) {
  const std::size_t n2 = std::size_t(n) * n;
  if (F.subT != nullptr)
    matmul<Real, NK>(N, F.subT, true, P, false, n);
  else
    matmul<Real, NK>(N, F.M + std::size_t(t) * n2, false, F.Li + std::size_t(t) * n2, false, n);
}

// S_diag, S_sub: the band of Σ; dD (T, n, n), dS (T-1, n, n): the direction
// (dS[t] = dH_{t+1,t}). Writes dΣ_tt into out_diag and dΣ_{t+1,t} into
// out_sub; NaN when the factor failed.
template <class Real, int NK>
void band_tangent_one(const FactorView<Real>& F, bool ok, int T, int n_, const Real* S_diag, const Real* S_sub,
                      const Real* dD, const Real* dS, Real* out_diag, Real* out_sub) {
  const int n = fixed<NK>(n_);
  const std::size_t n2 = std::size_t(n) * n;
  if (!ok || T == 0) {
    fill(out_diag, std::size_t(T) * n2, quiet_nan<Real>());
    if (T > 1) fill(out_sub, std::size_t(T - 1) * n2, quiet_nan<Real>());
    return;
  }
  std::vector<Real> buf(7 * n2);
  Real* P = buf.data();
  Real* N = P + n2;
  Real* X = N + n2;
  Real* Y = X + n2;
  Real* G = Y + n2;
  Real* dN = G + n2;
  Real* Z = dN + n2;

  // Forward sweep: dS_t into out_diag[t].
  copy(out_diag, dD, n2);
  symmetrise<Real, NK>(out_diag, n);
  for (int t = 1; t < T; ++t) {
    const Real* Li = F.Li + std::size_t(t - 1) * n2;
    matmul<Real, NK>(P, Li, true, Li, false, n);  // P_{t-1}
    coupling<Real, NK>(N, F, t - 1, P, n);         // N_t
    const Real* prev = out_diag + std::size_t(t - 1) * n2;
    const Real* dHs = dS + std::size_t(t - 1) * n2;  // dH_{t,t-1}
    Real* cur = out_diag + std::size_t(t) * n2;
    matmul<Real, NK>(X, N, false, prev, false, n);   // N_t dS_{t-1}
    matmul<Real, NK>(Y, X, false, N, true, n);       // N_t dS_{t-1} N_tᵀ
    matmul<Real, NK>(X, dHs, false, N, true, n);     // dH_{t,t-1} N_tᵀ
    const Real* dHt = dD + std::size_t(t) * n2;
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j)
        cur[i * n + j] = Real(0.5) * (dHt[i * n + j] + dHt[j * n + i]) - X[i * n + j] - X[j * n + i] + Y[i * n + j];
    symmetrise<Real, NK>(cur, n);
  }

  // Backward sweep: dΣ_tt over dS_t in out_diag, dΣ_{t+1,t} into out_sub.
  for (int t = T - 1; t >= 0; --t) {
    const Real* Li = F.Li + std::size_t(t) * n2;
    Real* cur = out_diag + std::size_t(t) * n2;
    matmul<Real, NK>(P, Li, true, Li, false, n);  // P_t
    matmul<Real, NK>(G, cur, false, P, false, n);  // dS_t P_t
    matmul<Real, NK>(Z, P, false, G, false, n);    // P_t dS_t P_t = −dP_t
    if (t == T - 1) {
      for (std::size_t i = 0; i < n2; ++i) cur[i] = -Z[i];
      symmetrise<Real, NK>(cur, n);
      continue;
    }
    coupling<Real, NK>(N, F, t, P, n);  // N_{t+1}
    const Real* next = out_diag + std::size_t(t + 1) * n2;  // dΣ_{t+1}, final
    const Real* Sn = S_diag + std::size_t(t + 1) * n2;      // Σ_{t+1}
    const Real* Sx = S_sub + std::size_t(t) * n2;           // Σ_{t+1,t}
    matmul<Real, NK>(dN, dS + std::size_t(t) * n2, false, P, false, n);  // dH_{t+1,t} P_t
    matmul<Real, NK>(X, N, false, G, false, n);                         // N_{t+1} dS_t P_t
    for (std::size_t i = 0; i < n2; ++i) dN[i] -= X[i];
    Real* sub = out_sub + std::size_t(t) * n2;
    matmul<Real, NK>(Y, next, false, N, false, n);  // dΣ_{t+1} N_{t+1}
    matmul<Real, NK>(X, Sn, false, dN, false, n);   // Σ_{t+1} dN
    for (std::size_t i = 0; i < n2; ++i) sub[i] = -Y[i] - X[i];
    matmul<Real, NK>(G, N, true, Y, false, n);   // N_{t+1}ᵀ dΣ_{t+1} N_{t+1}
    matmul<Real, NK>(X, dN, true, Sx, false, n);  // dNᵀ Σ_{t+1,t}
    for (int i = 0; i < n; ++i)
      for (int j = 0; j < n; ++j)
        cur[i * n + j] = -Z[i * n + j] - X[i * n + j] - X[j * n + i] + G[i * n + j];
    symmetrise<Real, NK>(cur, n);
  }
}

}  // namespace kalmax_cpu
