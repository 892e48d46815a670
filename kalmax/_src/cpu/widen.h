// float32 at the interface, double inside.
//
// A float32 call of any handler converts its operands to double, runs the
// double-precision code of smoother.h / likelihood.h, and rounds the results
// to float32 once at the end. The factor, which must survive between calls
// (forward → solve, gradients, band, log-likelihood), is kept at double
// precision in two float32 arrays: hi = fl32(v) and lo = fl32(v − hi), so
// that hi + lo reproduces v to about 2⁻⁴⁸ relative (the two parts hold 24
// significant bits each; v − hi is exact in double). JAX-side code that reads
// the factor (second-order derivatives, the pure-JAX band) uses hi alone:
// the float32 rounding of the double factor.
//
// Why (kalmax/_src/backends/cpu.py has the measurements): forming the normal
// equations squares the condition number, so ordinary tracking models (a
// quiet position process beside an unit-variance measurement) lose every
// digit of a float32 factorisation; the same factorisation in double keeps
// them, and conversion costs O(T n²) against the O(T n³) factorisation.
#pragma once

#include <sys/mman.h>

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <memory>
#include <type_traits>
#include <vector>

#include "smoother.h"

namespace kalmax_cpu {

// Output buffers and large scratch are fresh memory that the first write
// faults in, one 4 KiB page at a time: at T = 10⁵ the factor alone is
// ~20,000 faults, a sizeable share of a call. Where the system leaves
// transparent huge pages to madvise, asking for them on large buffers
// removes most of that cost. Purely advisory: failure (or no THP support)
// changes nothing.
inline void advise_huge_pages(void* data, std::size_t bytes) {
#ifdef MADV_HUGEPAGE
  constexpr std::uintptr_t kHuge = std::uintptr_t(2) << 20;
  if (bytes < 4 * kHuge) return;
  const std::uintptr_t begin = (reinterpret_cast<std::uintptr_t>(data) + kHuge - 1) & ~(kHuge - 1);
  const std::uintptr_t end = (reinterpret_cast<std::uintptr_t>(data) + bytes) & ~(kHuge - 1);
  if (end > begin) madvise(reinterpret_cast<void*>(begin), end - begin, MADV_HUGEPAGE);
#else
  (void)data;
  (void)bytes;
#endif
}

// Uninitialised double scratch that grows on demand and is reused across the
// trajectories of one thread (no zero-fill, huge pages where possible).
class Scratch {
 public:
  double* get(std::size_t count) {
    if (count + 1 > capacity_) {
      capacity_ = count + 1;  // + 1: a valid pointer even for count = 0
      data_.reset(new double[capacity_]);
      advise_huge_pages(data_.get(), capacity_ * sizeof(double));
    }
    return data_.get();
  }
  double* data() { return data_.get(); }

 private:
  std::unique_ptr<double[]> data_;
  std::size_t capacity_ = 0;
};

inline void widen(const float* src, double* dst, std::size_t count) {
  for (std::size_t i = 0; i < count; ++i) dst[i] = double(src[i]);
}

inline void narrow(const double* src, float* dst, std::size_t count) {
  for (std::size_t i = 0; i < count; ++i) dst[i] = static_cast<float>(src[i]);
}

// hi = fl32(v), lo = fl32(v − hi); lo = 0 where hi is not finite (so that a
// NaN or overflowed entry stays NaN/inf when the parts are joined).
inline void split(const double* src, float* hi, float* lo, std::size_t count) {
  for (std::size_t i = 0; i < count; ++i) {
    const float h = static_cast<float>(src[i]);
    hi[i] = h;
    lo[i] = std::isfinite(h) ? static_cast<float>(src[i] - double(h)) : 0.0f;
  }
}

inline void join(const float* hi, const float* lo, double* dst, std::size_t count) {
  for (std::size_t i = 0; i < count; ++i) dst[i] = double(hi[i]) + double(lo[i]);
}

// Owns double copies of one trajectory's float inputs.
class WideTrajectory {
 public:
  Trajectory<double> make(const Trajectory<float>& P) {
    const std::size_t n = P.n, p = P.p, T = P.T, T1 = T > 0 ? T - 1 : 0;
    Trajectory<double> W;
    W.T = P.T;
    W.n = P.n;
    W.p = P.p;
    W.A_tv = P.A_tv;
    W.Q_tv = P.Q_tv;
    W.b_tv = P.b_tv;
    W.C_tv = P.C_tv;
    W.R_tv = P.R_tv;
    W.R_diag = P.R_diag;
    W.Q_diag = P.Q_diag;
    W.d_tv = P.d_tv;
    W.A = take(A_, P.A, (P.A_tv ? T1 : 1) * n * n);
    W.Q = take(Q_, P.Q, (P.Q_tv ? T1 : 1) * P.Q_item());
    W.b = take(b_, P.b, (P.b_tv ? T1 : 1) * n);
    W.C = take(C_, P.C, (P.C_tv ? T : 1) * p * n);
    W.R = take(R_, P.R, (P.R_tv ? T : 1) * P.R_item());
    W.d = take(d_, P.d, (P.d_tv ? T : 1) * p);
    W.m0 = take(m0_, P.m0, n);
    W.P0 = take(P0_, P.P0, n * n);
    W.y = take(y_, P.y, T * p);
    W.w = take(w_, P.w, T * p);
    return W;
  }

 private:
  static const double* take(Scratch& buf, const float* src, std::size_t count) {
    if (src == nullptr) return nullptr;
    double* out = buf.get(count);
    widen(src, out, count);
    return out;
  }

  Scratch A_, Q_, b_, C_, R_, d_, m0_, P0_, y_, w_;
};

// Owns the double factor of one trajectory joined from its float hi/lo parts.
struct WideFactor {
  Scratch Li, M, subT;
};

// The same, generic over the stored type: a double operand is used in place,
// a float one is converted into buf.
template <class Real>
inline const double* as_double(const Real* src, Scratch& buf, std::size_t count) {
  if constexpr (std::is_same_v<Real, double>) {
    (void)buf;
    (void)count;
    return src;
  } else {
    double* out = buf.get(count);
    widen(src, out, count);
    return out;
  }
}

template <class Real>
inline Trajectory<double> as_double(const Trajectory<Real>& P, WideTrajectory& wide) {
  if constexpr (std::is_same_v<Real, double>) {
    (void)wide;
    return P;
  } else {
    return wide.make(P);
  }
}

// Where a double pass writes a result destined for dst: dst itself, or buf.
template <class Real>
inline double* double_out(Real* dst, Scratch& buf, std::size_t count) {
  if constexpr (std::is_same_v<Real, double>) {
    (void)buf;
    (void)count;
    return dst;
  } else {
    return buf.get(count);
  }
}

// Rounds a result written by double_out into dst (nothing to do for double).
template <class Real>
inline void finish(const double* src, Real* dst, std::size_t count) {
  if constexpr (!std::is_same_v<Real, double>) narrow(src, dst, count);
  else {
    (void)src;
    (void)dst;
    (void)count;
  }
}

}  // namespace kalmax_cpu
