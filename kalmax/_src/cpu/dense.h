// Small dense linear algebra for the block-tridiagonal smoother kernel.
//
// Every matrix is row-major and contiguous (a k-by-m matrix X has X[i*m + j]).
// Sizes are runtime ints, but each routine takes a compile-time hint K: when
// K > 0 the routine uses K instead of the runtime size, so the loops have
// constant trip counts that the compiler unrolls and vectorises. K == 0 is the
// general-size fallback. Nothing here allocates.
#pragma once

#include <cmath>
#include <limits>

namespace kalmax_cpu {

template <int K>
inline int fixed(int k) {
  return K > 0 ? K : k;
}

template <class Real>
inline Real quiet_nan() {
  return std::numeric_limits<Real>::quiet_NaN();
}

// out = lower triangle of (S + Sᵀ)/2; the strict upper part is left untouched.
// Covariances supplied by users are read through this, so that an input that
// is symmetric only up to rounding is treated exactly like its symmetric part.
template <class Real, int NK>
inline void sym_lower(Real* out, const Real* S, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i)
    for (int j = 0; j <= i; ++j) out[i * n + j] = Real(0.5) * (S[i * n + j] + S[j * n + i]);
}

// Lower Cholesky factor L of the symmetric matrix whose lower triangle is in S
// (L may alias S). Writes zeros above the diagonal. Returns false when a pivot
// is not positive (or NaN): the matrix is not positive definite.
template <class Real, int NK>
inline bool cholesky(Real* L, const Real* S, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    Real* Li = L + i * n;
    for (int j = 0; j <= i; ++j) {
      const Real* Lj = L + j * n;
      Real s = S[i * n + j];
      for (int k = 0; k < j; ++k) s -= Li[k] * Lj[k];
      if (i == j) {
        if (!(s > Real(0))) return false;
        Li[i] = std::sqrt(s);
      } else {
        Li[j] = s / Lj[j];
      }
    }
    for (int j = i + 1; j < n; ++j) Li[j] = Real(0);
  }
  return true;
}

// x = L⁻¹ b (forward substitution); x may alias b.
template <class Real, int NK>
inline void lsolve_vec(const Real* L, const Real* b, Real* x, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    Real s = b[i];
    for (int k = 0; k < i; ++k) s -= L[i * n + k] * x[k];
    x[i] = s / L[i * n + i];
  }
}

// x = L⁻ᵀ b (back substitution), in place on x which holds b on entry.
// Column-oriented so that it walks rows of L, which are contiguous.
template <class Real, int NK>
inline void ltsolve_vec_inplace(const Real* L, Real* x, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = n - 1; i >= 0; --i) {
    const Real xi = x[i] / L[i * n + i];
    x[i] = xi;
    for (int k = 0; k < i; ++k) x[k] -= L[i * n + k] * xi;
  }
}

// X = L⁻¹ B for B of shape (k, m); X may alias B. L is k-by-k with runtime k,
// the row length m has the compile-time hint MK.
template <class Real, int MK>
inline void lsolve_rows(const Real* L, const Real* B, Real* X, int k, int m_) {
  const int m = fixed<MK>(m_);
  for (int i = 0; i < k; ++i) {
    Real* Xi = X + i * m;
    if (Xi != B + i * m)
      for (int j = 0; j < m; ++j) Xi[j] = B[i * m + j];
    for (int r = 0; r < i; ++r) {
      const Real l = L[i * k + r];
      const Real* Xr = X + r * m;
      for (int j = 0; j < m; ++j) Xi[j] -= l * Xr[j];
    }
    const Real inv = Real(1) / L[i * k + i];
    for (int j = 0; j < m; ++j) Xi[j] *= inv;
  }
}

// G += sign · Wᵀ V for W of shape (k, n) and V of shape (k, m): a sum of k
// rank-one updates along contiguous rows.
template <class Real, int NK, int MK>
inline void add_cross(Real* G, const Real* W, const Real* V, int k, int n_, int m_, Real sign) {
  const int n = fixed<NK>(n_);
  const int m = fixed<MK>(m_);
  for (int r = 0; r < k; ++r) {
    const Real* Wr = W + r * n;
    const Real* Vr = V + r * m;
    for (int i = 0; i < n; ++i) {
      const Real a = sign * Wr[i];
      Real* Gi = G + i * m;
      for (int j = 0; j < m; ++j) Gi[j] += a * Vr[j];
    }
  }
}

// y += sign · Wᵀ v for W (k, n), v (k).
template <class Real, int NK>
inline void add_tmatvec(Real* y, const Real* W, const Real* v, int k, int n_, Real sign) {
  const int n = fixed<NK>(n_);
  for (int r = 0; r < k; ++r) {
    const Real a = sign * v[r];
    const Real* Wr = W + r * n;
    for (int i = 0; i < n; ++i) y[i] += a * Wr[i];
  }
}

// y = M v for M (k, n).
template <class Real, int NK>
inline void matvec(Real* y, const Real* M, const Real* v, int k, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < k; ++i) {
    Real s = 0;
    const Real* Mi = M + i * n;
    for (int j = 0; j < n; ++j) s += Mi[j] * v[j];
    y[i] = s;
  }
}

// M = H L⁻ᵀ for square n-by-n H and lower-triangular L, row by row: each row
// m of M solves L mᵀ = hᵀ by forward substitution.
template <class Real, int NK>
inline void right_solve_lt(Real* M, const Real* H, const Real* L, int n_) {
  const int n = fixed<NK>(n_);
  for (int r = 0; r < n; ++r) {
    Real* Mr = M + r * n;
    const Real* Hr = H + r * n;
    for (int i = 0; i < n; ++i) {
      Real s = Hr[i];
      const Real* Li = L + i * n;
      for (int k = 0; k < i; ++k) s -= Li[k] * Mr[k];
      Mr[i] = s / Li[i];
    }
  }
}

// Lower triangle of S = H − M Mᵀ (n-by-n).
template <class Real, int NK>
inline void schur_lower(Real* S, const Real* H, const Real* M, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    const Real* Mi = M + i * n;
    for (int j = 0; j <= i; ++j) {
      const Real* Mj = M + j * n;
      Real s = H[i * n + j];
      for (int k = 0; k < n; ++k) s -= Mi[k] * Mj[k];
      S[i * n + j] = s;
    }
  }
}

}  // namespace kalmax_cpu
