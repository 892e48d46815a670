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
// (L may alias S; S is overwritten when it does not). Writes zeros above the
// diagonal. Returns false when a pivot is not positive (or NaN): the matrix is
// not positive definite. c: scratch of n entries.
//
// Right-looking order. Each trailing update runs over whole rows (fixed length
// when the size is a compile-time constant) instead of the shrinking
// triangle: more multiply-adds, but vectorised and unrolled, which is faster
// for the small blocks this kernel sees. The entries above the diagonal only
// ever receive such row updates and are zeroed at the end, so the upper
// triangle of S is never read into the result.
template <class Real, int NK, class Column>
inline bool cholesky_steps(Real* L, int n, Column&& column) {
  for (int k = 0; k < n; ++k) {
    const Real d = L[k * n + k];
    if (!(d > Real(0))) return false;
    const Real r = std::sqrt(d);
    const Real inv = Real(1) / r;
    Real* c = column();
    for (int j = 0; j < n; ++j) c[j] = j > k ? L[j * n + k] * inv : Real(0);
    for (int i = k + 1; i < n; ++i) {
      const Real a = c[i];
      Real* Li = L + i * n;
      for (int j = 0; j < n; ++j) Li[j] -= a * c[j];
    }
    for (int i = k + 1; i < n; ++i) L[i * n + k] = c[i];
    L[k * n + k] = r;
  }
  return true;
}

template <class Real, int NK>
inline bool cholesky(Real* L, Real* S, int n_, Real* scratch) {
  const int n = fixed<NK>(n_);
  // A whole-matrix copy (vector stores): copying just the lower triangle with
  // scalar stores makes the vector loads of the row updates stall on store
  // forwarding. Whatever lies above the diagonal only receives row updates
  // and is overwritten with zeros at the end.
  if (L != S)
    for (int i = 0; i < n * n; ++i) L[i] = S[i];
  bool ok = true;
  if constexpr (NK > 0) {
    // The current column in a local array, which the compiler keeps in
    // registers (it cannot alias L).
    for (int k = 0; k < NK && ok; ++k) {
      const Real d = L[k * NK + k];
      if (!(d > Real(0))) {
        ok = false;
        break;
      }
      const Real r = std::sqrt(d);
      const Real inv = Real(1) / r;
      Real c[NK];
      for (int j = 0; j < NK; ++j) c[j] = j > k ? L[j * NK + k] * inv : Real(0);
      for (int i = k + 1; i < NK; ++i) {
        const Real a = c[i];
        Real* Li = L + i * NK;
        for (int j = 0; j < NK; ++j) Li[j] -= a * c[j];
      }
      for (int i = k + 1; i < NK; ++i) L[i * NK + k] = c[i];
      L[k * NK + k] = r;
    }
  } else {
    ok = cholesky_steps<Real, NK>(L, n, [scratch] { return scratch; });
  }
  for (int i = 0; i < n; ++i)
    for (int j = i + 1; j < n; ++j) L[i * n + j] = Real(0);
  return ok;
}

// L = the lower Cholesky factor of (S + Sᵀ)/2 (L may alias S); false when
// that is not positive definite. scratch: n entries.
template <class Real, int NK>
inline bool sym_cholesky(Real* L, const Real* S, int n_, Real* scratch) {
  const int n = fixed<NK>(n_);
  sym_lower<Real, NK>(L, S, n);
  return cholesky<Real, NK>(L, L, n, scratch);
}

// log|S| = 2 Σ_i log L_ii from the Cholesky factor L of S.
template <class Real>
inline Real cholesky_logdet(const Real* L, int n) {
  Real ld = 0;
  for (int i = 0; i < n; ++i) ld += Real(2) * std::log(L[i * n + i]);
  return ld;
}

// x = L⁻¹ b (forward substitution); x may alias b.
template <class Real, int NK>
inline void lsolve_vec(const Real* L, const Real* b, Real* x, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    Real s = b[i];
    for (int k = 0; k < i; ++k) s -= L[i * n + k] * x[k];
    x[i] = s * (Real(1) / L[i * n + i]);
  }
}

// x = L⁻ᵀ b (back substitution), in place on x which holds b on entry.
// Column-oriented so that it walks rows of L, which are contiguous.
template <class Real, int NK>
inline void ltsolve_vec_inplace(const Real* L, Real* x, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = n - 1; i >= 0; --i) {
    const Real xi = x[i] * (Real(1) / L[i * n + i]);
    x[i] = xi;
    for (int k = 0; k < i; ++k) x[k] -= L[i * n + k] * xi;
  }
}

// S⁻¹ as an explicit matrix from the Cholesky factor L of S, one column at a
// time (L Lᵀ s_j = e_j), so that later products with it are independent dot
// products instead of chains of substitutions. col: scratch of n entries.
template <class Real, int NK>
inline void inverse_from_cholesky(Real* inv, const Real* L, int n_, Real* col) {
  const int n = fixed<NK>(n_);
  for (int j = 0; j < n; ++j) {
    for (int i = 0; i < n; ++i) col[i] = Real(i == j);
    lsolve_vec<Real, NK>(L, col, col, n);
    ltsolve_vec_inplace<Real, NK>(L, col, n);
    for (int i = 0; i < n; ++i) inv[i * n + j] = col[i];
  }
}

// L = chol((S + Sᵀ)/2) and inv = S⁻¹; false when S is not positive definite.
// scratch: n entries (the factorisation's, then the columns').
template <class Real, int NK>
inline bool sym_cholesky_inverse(Real* inv, Real* L, const Real* S, int n, Real* scratch) {
  if (!sym_cholesky<Real, NK>(L, S, n, scratch)) return false;
  inverse_from_cholesky<Real, NK>(inv, L, n, scratch);
  return true;
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

// X = L⁻ᵀ X in place for X of shape (k, m) (back substitution by rows).
template <class Real, int MK>
inline void ltsolve_rows(const Real* L, Real* X, int k, int m_) {
  const int m = fixed<MK>(m_);
  for (int i = k - 1; i >= 0; --i) {
    Real* Xi = X + i * m;
    const Real inv = Real(1) / L[i * k + i];
    for (int j = 0; j < m; ++j) Xi[j] *= inv;
    for (int r = 0; r < i; ++r) {
      const Real l = L[i * k + r];
      Real* Xr = X + r * m;
      for (int j = 0; j < m; ++j) Xr[j] -= l * Xi[j];
    }
  }
}

// Gout = Gin + sign · Wᵀ V for W of shape (k, n) and V of shape (k, m)
// (Gout may alias Gin). With a compile-time row length each output row is
// accumulated in registers over the k rank-one updates and stored once.
template <class Real, int NK, int MK>
inline void cross_update(Real* Gout, const Real* Gin, const Real* W, const Real* V, int k, int n_,
                         int m_, Real sign) {
  const int n = fixed<NK>(n_);
  if constexpr (MK > 0) {
    constexpr int m = MK;
    for (int i = 0; i < n; ++i) {
      Real acc[m];
      for (int j = 0; j < m; ++j) acc[j] = Gin[i * m + j];
      for (int r = 0; r < k; ++r) {
        const Real a = sign * W[r * n + i];
        const Real* Vr = V + r * m;
        for (int j = 0; j < m; ++j) acc[j] += a * Vr[j];
      }
      for (int j = 0; j < m; ++j) Gout[i * m + j] = acc[j];
    }
  } else {
    const int m = m_;
    if (Gout != Gin)
      for (int i = 0; i < n * m; ++i) Gout[i] = Gin[i];
    for (int r = 0; r < k; ++r) {
      const Real* Wr = W + r * n;
      const Real* Vr = V + r * m;
      for (int i = 0; i < n; ++i) {
        const Real a = sign * Wr[i];
        Real* Gi = Gout + i * m;
        for (int j = 0; j < m; ++j) Gi[j] += a * Vr[j];
      }
    }
  }
}

// G += sign · Wᵀ V for W of shape (k, n) and V of shape (k, m).
template <class Real, int NK, int MK>
inline void add_cross(Real* G, const Real* W, const Real* V, int k, int n_, int m_, Real sign) {
  cross_update<Real, NK, MK>(G, G, W, V, k, n_, m_, sign);
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

// s = Σ_j a_j b_j. The reduction is split over independent partial sums
// (the order of the additions is ours to choose; without this each term
// waits for the previous one).
template <class Real, int NK>
inline Real dot(const Real* a, const Real* b, int n_) {
  const int n = fixed<NK>(n_);
  Real s0 = 0, s1 = 0, s2 = 0, s3 = 0;
  int j = 0;
  for (; j + 4 <= n; j += 4) {
    s0 += a[j] * b[j];
    s1 += a[j + 1] * b[j + 1];
    s2 += a[j + 2] * b[j + 2];
    s3 += a[j + 3] * b[j + 3];
  }
  for (; j < n; ++j) s0 += a[j] * b[j];
  return (s0 + s2) + (s1 + s3);
}

// y = M v for M (k, n).
template <class Real, int NK>
inline void matvec(Real* y, const Real* M, const Real* v, int k, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < k; ++i) y[i] = dot<Real, NK>(M + i * n, v, n);
}

// Li = L⁻¹ for lower-triangular n-by-n L (Li lower triangular, zeros above
// the diagonal; Li must not alias L). Row i of Li solves a forward
// substitution against the rows before it: contiguous multiply-adds.
template <class Real, int NK>
inline void tri_inverse(Real* Li, const Real* L, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i) {
    Real* Ri = Li + i * n;
    if constexpr (NK > 0) {
      Real acc[NK];  // the row in registers
      for (int j = 0; j < n; ++j) acc[j] = Real(j == i);
      for (int r = 0; r < i; ++r) {  // whole rows: fixed length, vectorised (see cholesky)
        const Real l = L[i * n + r];
        const Real* Rr = Li + r * n;
        for (int j = 0; j < n; ++j) acc[j] -= l * Rr[j];
      }
      const Real inv = Real(1) / L[i * n + i];
      for (int j = 0; j < n; ++j) Ri[j] = acc[j] * inv;
    } else {
      for (int j = 0; j < n; ++j) Ri[j] = Real(j == i);
      for (int r = 0; r < i; ++r) {
        const Real l = L[i * n + r];
        const Real* Rr = Li + r * n;
        for (int j = 0; j <= r; ++j) Ri[j] -= l * Rr[j];
      }
      const Real inv = Real(1) / L[i * n + i];
      for (int j = 0; j <= i; ++j) Ri[j] *= inv;
    }
  }
}

// C = A B for square n-by-n matrices with A lower triangular, each output
// row accumulated in registers (C must not alias A or B).
template <class Real, int NK>
inline void lower_matmul(Real* C, const Real* A, const Real* B, int n_) {
  const int n = fixed<NK>(n_);
  if constexpr (NK > 0) {
    for (int i = 0; i < n; ++i) {
      Real acc[NK];
      for (int j = 0; j < n; ++j) acc[j] = Real(0);
      for (int r = 0; r <= i; ++r) {  // A is lower triangular
        const Real a = A[i * n + r];
        const Real* Br = B + r * n;
        for (int j = 0; j < n; ++j) acc[j] += a * Br[j];
      }
      for (int j = 0; j < n; ++j) C[i * n + j] = acc[j];
    }
  } else {
    for (int i = 0; i < n; ++i) {
      Real* Ci = C + i * n;
      for (int j = 0; j < n; ++j) Ci[j] = Real(0);
      for (int r = 0; r <= i; ++r) {
        const Real a = A[i * n + r];
        const Real* Br = B + r * n;
        for (int j = 0; j < n; ++j) Ci[j] += a * Br[j];
      }
    }
  }
}

// y = Aᵀ v for square n-by-n A (y must not alias v).
template <class Real, int NK>
inline void tmatvec(Real* y, const Real* A, const Real* v, int n_) {
  const int n = fixed<NK>(n_);
  for (int j = 0; j < n; ++j) y[j] = Real(0);
  for (int r = 0; r < n; ++r) {
    const Real a = v[r];
    const Real* Ar = A + r * n;
    for (int j = 0; j < n; ++j) y[j] += a * Ar[j];
  }
}

// B = Aᵀ for square n-by-n A.
template <class Real, int NK>
inline void transpose(Real* B, const Real* A, int n_) {
  const int n = fixed<NK>(n_);
  for (int i = 0; i < n; ++i)
    for (int j = 0; j < n; ++j) B[j * n + i] = A[i * n + j];
}

}  // namespace kalmax_cpu
