// XLA FFI handlers (CPU) for the smoothing primitive of kalmax.
//
// Seven targets, each with one handler templated over the floating-point type
// and dispatched on the buffers' dtype at run time (float32, float64):
//
//   kalmax_cpu_forward    (A, Q, b, C, R, d, m0, P0, y, w) -> (x, Linv, M, subT, ok, lo, x_lo)
//   kalmax_cpu_solve      (Linv, M, subT, ok, lo, v) -> H⁻¹ v
//   kalmax_cpu_gradients  (Linv, M, subT, ok, lo, x, x_lo, x̄, A, Q, b, C, R, d, m0, P0, y, w)
//                         -> (Ā, Q̄, b̄, C̄, R̄, d̄, m̄0, P̄0, ȳ)
//   kalmax_cpu_band       (Linv, M, subT, ok, lo) -> (Σ_tt, Σ_{t+1,t})      band of H⁻¹
//   kalmax_cpu_band_tangent (Linv, M, subT, ok, lo, Σ_tt, Σ_{t+1,t}, dH_tt, dH_{t+1,t})
//                         -> (dΣ_tt, dΣ_{t+1,t})                       −band(Σ dH Σ)
//   kalmax_cpu_loglik     (Linv, M, subT, ok, lo, x, x_lo, A, Q, b, C, R, d, m0, P0, y, w)
//                         -> (log p(y), its gradients w.r.t. A ... y)
//   kalmax_cpu_band_pullback (A, Q, b, C, R, d, m0, P0, y, w, D̄, S̄)
//                         -> (Ā, Q̄, b̄, C̄, R̄, d̄, m̄0, P̄0, ȳ)   a cotangent on H's
//                            blocks (D̄_tt, S̄_{t+1,t}) pulled back to the model; y is
//                            not read (only its shape), b̄, d̄, m̄0, ȳ are zero
// where lo = (Linv_lo, M_lo, subT_lo), the low parts of a float32 factor, and
// the forward also returns x_lo, the low part of a float32 x, which the
// gradient and log-likelihood handlers take after x: their formulas use the
// residuals x_{t+1} − A x_t, which float32 rounding of x would swamp when Q
// is small.
//
// The factor (Linv, M, subT, ok): Linv (T, n, n) the inverses L_t⁻¹ of the
// diagonal blocks of the block Cholesky factor; when A or Q
// varies in time, M (T-1, n, n) holds the sub-diagonal blocks; when both are
// time-invariant M has shape (0, n, n) and subT (n, n) holds the one block
// H_{t+1,t}ᵀ from which every M_t follows (see FactorView in smoother.h).
//
// Shapes describe everything: a model field is time-invariant or per step
// according to its rank, and an absent optional field (b, d, m0, P0) is a
// zero-size array of shape (0,). Any number of leading batch dimensions is
// accepted (this is how jax.vmap reaches us with vmap_method="expand_dims"):
// the batch shape is read from the first output, and every input's leading
// dimension is either that size or 1 (broadcast, never copied).
//
// R has a second form, chosen by the int32 attribute r_diagonal of the
// forward, gradient and log-likelihood calls: its p variances per block,
// (p,) or (T, p), for a diagonal R (and R̄ then has that shape too). An
// attribute, not the rank, because (T, p) and (p, p) look alike when T = p.
// Q likewise, with the attribute q_diagonal: its n variances per block, (n,)
// or (T-1, n), and Q̄ in that shape ((T-1, n) and (n, n) coincide when
// T-1 = n).
//
// float32 calls compute in double (widen.h): the operands are converted on
// entry, every result is rounded to float32 once at the end, and the factor
// keeps double precision as two float32 arrays, hi and lo, passed after ok
// (Linv_lo, M_lo, subT_lo; zero-size (0,) arrays for a float64 call).
//
// Errors in shapes or dtypes come back through the FFI error channel.
// Numerical failure (a covariance or a pivot that is not positive) is not an
// error: the affected trajectory gets ok = 0 and NaN results.

#include <sys/mman.h>

#include <algorithm>
#include <array>
#include <cstdint>
#include <cstdlib>
#include <memory>
#include <string>
#include <thread>
#include <type_traits>
#include <utility>
#include <vector>

#include "band_pullback.h"
#include "band_tangent.h"
#include "likelihood.h"
#include "smoother.h"
#include "widen.h"
#include "xla/ffi/api/ffi.h"

namespace ffi = xla::ffi;

// Returns the error of `expr` (an ffi::Error) from the enclosing function
// when it is a failure.
#define KALMAX_RETURN_IF_ERROR(expr)                       \
  do {                                                     \
    ::xla::ffi::Error kalmax_error_ = (expr);              \
    if (kalmax_error_.failure()) return kalmax_error_;     \
  } while (false)

namespace kalmax_cpu {
namespace {

// The error of a call with bad operands: "kalmax_cpu: <what>".
ffi::Error invalid(const std::string& what) { return ffi::Error::InvalidArgument("kalmax_cpu: " + what); }

constexpr int kMaxBatchRank = 16;

struct BatchShape {
  int rank = 0;
  int64_t dims[kMaxBatchRank] = {};
  int64_t count = 1;
};

// Where one operand's slice for a batch index starts.
struct Operand {
  const void* data = nullptr;
  std::vector<int64_t> core;  // dimensions after the batch dimensions
  int64_t core_size = 1;
  int64_t strides[kMaxBatchRank] = {};  // in elements; 0 where broadcast

  int64_t offset(const BatchShape& bs, int64_t flat) const {
    int64_t off = 0;
    for (int j = bs.rank - 1; j >= 0; --j) {
      const int64_t i = flat % bs.dims[j];
      flat /= bs.dims[j];
      off += i * strides[j];
    }
    return off;
  }
};

std::string shape_str(const std::vector<int64_t>& dims) {
  std::string s = "(";
  for (size_t i = 0; i < dims.size(); ++i) s += (i ? ", " : "") + std::to_string(dims[i]);
  return s + (dims.size() == 1 ? ",)" : ")");
}

ffi::Error batch_from_output(ffi::AnyBuffer::Dimensions dims, int core_rank, BatchShape* bs) {
  if (static_cast<int>(dims.size()) < core_rank ||
      static_cast<int>(dims.size()) - core_rank > kMaxBatchRank)
    return invalid("unexpected output rank");
  bs->rank = static_cast<int>(dims.size()) - core_rank;
  bs->count = 1;
  for (int j = 0; j < bs->rank; ++j) {
    bs->dims[j] = dims[j];
    bs->count *= dims[j];
  }
  return ffi::Error::Success();
}

ffi::Error describe(const void* data, ffi::AnyBuffer::Dimensions dims, const char* name,
                    const BatchShape& bs, Operand* op) {
  const int rank = static_cast<int>(dims.size());
  if (rank < bs.rank) return invalid(std::string(name) + " lacks the batch dimensions");
  op->data = data;
  op->core.assign(dims.begin() + bs.rank, dims.end());
  op->core_size = 1;
  for (int64_t c : op->core) op->core_size *= c;
  int64_t stride = op->core_size;
  for (int j = bs.rank - 1; j >= 0; --j) {
    if (dims[j] != bs.dims[j] && dims[j] != 1)
      return invalid("batch dimension " + std::to_string(j) + " of " + name + " is " + std::to_string(dims[j]) +
                     ", expected " + std::to_string(bs.dims[j]) + " or 1");
    op->strides[j] = dims[j] == 1 ? 0 : stride;
    stride *= dims[j];
  }
  return ffi::Error::Success();
}

ffi::Error describe(const ffi::AnyBuffer& buf, const char* name, const BatchShape& bs,
                    Operand* op) {
  return describe(buf.untyped_data(), buf.dimensions(), name, bs, op);
}

// A model field: invariant core shape `inv`, per-step shape `var`; optional
// fields may be absent, given as shape (0,).
enum class Kind { kAbsent, kInvariant, kVarying };

ffi::Error classify(const Operand& op, const char* name, const std::vector<int64_t>& inv,
                    const std::vector<int64_t>& var, bool optional, Kind* kind) {
  if (optional && op.core == std::vector<int64_t>{0}) {
    *kind = Kind::kAbsent;
  } else if (op.core == inv) {
    *kind = Kind::kInvariant;
  } else if (!var.empty() && op.core == var) {
    *kind = Kind::kVarying;
  } else {
    std::string expected = shape_str(inv);
    if (!var.empty()) expected += " or " + shape_str(var);
    return invalid(std::string(name) + " has shape " + shape_str(op.core) + ", expected " + expected);
  }
  return ffi::Error::Success();
}

// The ten model/data operands shared by the forward and gradient handlers.
struct ModelOperands {
  Operand A, Q, b, C, R, d, m0, P0, y, w;
  Kind kA, kQ, kb, kC, kR, kd, km0, kP0;
  bool R_diag = false;  // R given by its variances: (p,) or (T, p)
  bool Q_diag = false;  // Q given by its variances: (n,) or (T-1, n)
  int T = 0, n = 0, p = 0;
};

// The noise forms of a call, from its attributes r_diagonal (R as variances,
// (p,) or (T, p)) and q_diagonal (Q as variances, (n,) or (T-1, n)): the rank
// alone cannot tell (T, p) from (p, p) when T = p, nor (T-1, n) from (n, n).
struct NoiseForms {
  int32_t r_diagonal = 0;
  int32_t q_diagonal = 0;
};

ffi::Error describe_model(const ffi::AnyBuffer* in, const BatchShape& bs, int T, int n, NoiseForms forms,
                          ModelOperands* mo) {
  const char* names[] = {"A", "Q", "b", "C", "R", "d", "x0_mean", "x0_cov", "y", "w"};
  Operand* ops[] = {&mo->A, &mo->Q, &mo->b, &mo->C, &mo->R, &mo->d, &mo->m0, &mo->P0, &mo->y, &mo->w};
  const ffi::DataType dt = in[8].element_type();
  for (int i = 0; i < 10; ++i) {
    if (in[i].element_type() != dt) return invalid(std::string(names[i]) + " has a different dtype from y");
    KALMAX_RETURN_IF_ERROR(describe(in[i], names[i], bs, ops[i]));
  }
  if (mo->y.core.size() != 2 || mo->y.core[0] != T)
    return invalid("y must have shape (T, p) with T = " + std::to_string(T));
  const int64_t p = mo->y.core[1];
  if (mo->w.core != mo->y.core) return invalid("w must have the shape of y");
  const int64_t N = n, P = p, T1 = T - 1;
  KALMAX_RETURN_IF_ERROR(classify(mo->A, "A", {N, N}, {T1, N, N}, false, &mo->kA));
  mo->Q_diag = forms.q_diagonal != 0;
  if (mo->Q_diag)
    KALMAX_RETURN_IF_ERROR(classify(mo->Q, "Q (diagonal)", {N}, {T1, N}, false, &mo->kQ));
  else
    KALMAX_RETURN_IF_ERROR(classify(mo->Q, "Q", {N, N}, {T1, N, N}, false, &mo->kQ));
  KALMAX_RETURN_IF_ERROR(classify(mo->b, "b", {N}, {T1, N}, true, &mo->kb));
  KALMAX_RETURN_IF_ERROR(classify(mo->C, "C", {P, N}, {T, P, N}, false, &mo->kC));
  mo->R_diag = forms.r_diagonal != 0;
  if (mo->R_diag)
    KALMAX_RETURN_IF_ERROR(classify(mo->R, "R (diagonal)", {P}, {T, P}, false, &mo->kR));
  else
    KALMAX_RETURN_IF_ERROR(classify(mo->R, "R", {P, P}, {T, P, P}, false, &mo->kR));
  KALMAX_RETURN_IF_ERROR(classify(mo->d, "d", {P}, {T, P}, true, &mo->kd));
  KALMAX_RETURN_IF_ERROR(classify(mo->m0, "x0_mean", {N}, {}, true, &mo->km0));
  KALMAX_RETURN_IF_ERROR(classify(mo->P0, "x0_cov", {N, N}, {}, true, &mo->kP0));
  mo->T = T;
  mo->n = n;
  mo->p = static_cast<int>(p);
  return ffi::Error::Success();
}

template <class Real>
const Real* at(const Operand& op, const BatchShape& bs, int64_t b) {
  return static_cast<const Real*>(op.data) + op.offset(bs, b);
}

template <class Real>
Trajectory<Real> trajectory(const ModelOperands& mo, const BatchShape& bs, int64_t b) {
  Trajectory<Real> P;
  P.T = mo.T;
  P.n = mo.n;
  P.p = mo.p;
  auto field = [&](const Operand& op, Kind k) -> const Real* {
    return k == Kind::kAbsent ? nullptr : at<Real>(op, bs, b);
  };
  P.A = field(mo.A, mo.kA);
  P.Q = field(mo.Q, mo.kQ);
  P.b = field(mo.b, mo.kb);
  P.C = field(mo.C, mo.kC);
  P.R = field(mo.R, mo.kR);
  P.d = field(mo.d, mo.kd);
  P.m0 = field(mo.m0, mo.km0);
  P.P0 = field(mo.P0, mo.kP0);
  P.y = at<Real>(mo.y, bs, b);
  P.w = at<Real>(mo.w, bs, b);
  P.A_tv = mo.kA == Kind::kVarying;
  P.Q_tv = mo.kQ == Kind::kVarying;
  P.b_tv = mo.kb == Kind::kVarying;
  P.C_tv = mo.kC == Kind::kVarying;
  P.R_tv = mo.kR == Kind::kVarying;
  P.R_diag = mo.R_diag;
  P.Q_diag = mo.Q_diag;
  P.d_tv = mo.kd == Kind::kVarying;
  return P;
}

// Pattern caches for a batch: only when C and R are time-invariant, and
// rebuilt only when a trajectory's C or R differ from the previous one's
// (a model shared by the whole batch is cached once).
template <class Real>
class PatternCaches {
 public:
  explicit PatternCaches(const ModelOperands& mo)
      : usable_(mo.kC == Kind::kInvariant && mo.kR == Kind::kInvariant), diag_(mo.R_diag) {}

  PatternCache<Real>* get(const Trajectory<Real>& P) { return get(P, P.C, P.R); }

  // keyC, keyR: where C and R came from. A widened (float → double) trajectory
  // reuses one buffer for every trajectory, so its own pointers do not tell
  // whether C and R changed; the float source pointers do.
  PatternCache<Real>* get(const Trajectory<Real>& P, const void* keyC, const void* keyR) {
    if (!usable_) return nullptr;
    if (!cache_ || keyC != keyC_ || keyR != keyR_ || P.C != C_ || P.R != R_) {
      cache_.reset(new PatternCache<Real>(P.C, P.R, P.n, P.p, diag_));
      C_ = P.C;
      R_ = P.R;
      keyC_ = keyC;
      keyR_ = keyR;
    }
    return cache_.get();
  }

 private:
  bool usable_;
  bool diag_;
  std::unique_ptr<PatternCache<Real>> cache_;
  const Real* C_ = nullptr;
  const Real* R_ = nullptr;
  const void* keyC_ = nullptr;
  const void* keyR_ = nullptr;
};

// advise_huge_pages(void*, bytes) is in widen.h; this one takes an FFI result.
using kalmax_cpu::advise_huge_pages;

template <class Buf>
void advise_huge_pages(Buf& buf) {
  advise_huge_pages(buf->untyped_data(), buf->size_bytes());
}

// Calls f(std::integral_constant<int, K>) with K = n for the specialised state
// sizes and K = 0 (general size) otherwise.
template <class F>
ffi::Error with_state_size(int n, F&& f) {
  switch (n) {
#define KALMAX_CASE(K) \
  case K:              \
    return f(std::integral_constant<int, K>{});
    KALMAX_CASE(1)
    KALMAX_CASE(2)
    KALMAX_CASE(3)
    KALMAX_CASE(4)
    KALMAX_CASE(5)
    KALMAX_CASE(6)
    KALMAX_CASE(8)
    KALMAX_CASE(10)
    KALMAX_CASE(12)
    KALMAX_CASE(16)
#undef KALMAX_CASE
    default:
      return f(std::integral_constant<int, 0>{});
  }
}

template <class F>
ffi::Error with_real_type(ffi::DataType dt, F&& f) {
  switch (dt) {
    case ffi::DataType::F32:
      return f(float{});
    case ffi::DataType::F64:
      return f(double{});
    default:
      return invalid("only float32 and float64 are supported");
  }
}

// ---------------------------------------------------------------------------
// Batches (vmap) over threads.
//
// One trajectory's sweep over time is sequential, but the trajectories of a
// vmapped batch are independent: contiguous ranges of them run on separate
// threads, each with its own scratch and pattern cache. Small calls stay on
// the calling thread, where starting threads would cost more than it saves.
// KALMAX_CPU_THREADS caps the count (1 turns threading off); the default is
// the number of hardware threads.

constexpr int64_t kMinStepsPerThread = 8192;  // a few ms of work at the smallest sizes

inline int worker_limit() {
  if (const char* env = std::getenv("KALMAX_CPU_THREADS")) {
    const int k = std::atoi(env);
    if (k >= 1) return k;
  }
  const unsigned hw = std::thread::hardware_concurrency();
  return hw == 0 ? 1 : static_cast<int>(hw);
}

// Runs body(begin, end) over a split of [0, count); steps: time steps per item.
template <class Body>
void for_batches(int64_t count, int64_t steps, Body&& body) {
  int64_t threads = worker_limit();
  threads = std::min<int64_t>(threads, count);
  threads = std::min<int64_t>(threads, (count * std::max<int64_t>(steps, 1)) / kMinStepsPerThread);
  if (threads <= 1) {
    body(int64_t{0}, count);
    return;
  }
  std::vector<std::thread> pool;
  pool.reserve(static_cast<std::size_t>(threads - 1));
  const int64_t per = count / threads, extra = count % threads;
  int64_t begin = 0;
  for (int64_t k = 0; k < threads; ++k) {
    const int64_t end = begin + per + (k < extra ? 1 : 0);
    if (k + 1 < threads)
      pool.emplace_back([&body, begin, end] { body(begin, end); });
    else
      body(begin, end);  // the calling thread takes the last range
    begin = end;
  }
  for (auto& t : pool) t.join();
}

// Threads for one trajectory's own pass (loglik_one's parts) when the batch
// is smaller than the worker count and would leave cores idle.
inline int parts_per_trajectory(int64_t count, int64_t steps) {
  const int64_t workers = worker_limit();
  if (count >= workers) return 1;
  int64_t parts = workers / std::max<int64_t>(count, 1);
  parts = std::min<int64_t>(parts, steps / kMinStepsPerThread);
  return static_cast<int>(std::max<int64_t>(parts, 1));
}

// ---------------------------------------------------------------------------

ffi::Error ForwardImpl(ffi::AnyBuffer A, ffi::AnyBuffer Q, ffi::AnyBuffer b, ffi::AnyBuffer C,
                       ffi::AnyBuffer R, ffi::AnyBuffer d, ffi::AnyBuffer m0, ffi::AnyBuffer P0,
                       ffi::AnyBuffer y, ffi::AnyBuffer w, ffi::Result<ffi::AnyBuffer> x,
                       ffi::Result<ffi::AnyBuffer> Linv, ffi::Result<ffi::AnyBuffer> M,
                       ffi::Result<ffi::AnyBuffer> subT, ffi::Result<ffi::Buffer<ffi::S32>> ok,
                       ffi::Result<ffi::AnyBuffer> Linv_lo, ffi::Result<ffi::AnyBuffer> M_lo,
                       ffi::Result<ffi::AnyBuffer> subT_lo, ffi::Result<ffi::AnyBuffer> x_lo,
                       double pivot_tolerance, double trusted_error, int32_t max_refine_steps,
                       double stall_ratio, int32_t r_diagonal, int32_t q_diagonal) {
  const SolveSettings settings{pivot_tolerance, trusted_error, max_refine_steps, stall_ratio};
  if (!(pivot_tolerance >= 0) || !(trusted_error >= 0) || max_refine_steps < 1 || !(stall_ratio > 0))
    return invalid("invalid solve settings");
  BatchShape bs;
  KALMAX_RETURN_IF_ERROR(batch_from_output(x->dimensions(), 2, &bs));
  const auto xd = x->dimensions();
  const int T = static_cast<int>(xd[xd.size() - 2]);
  const int n = static_cast<int>(xd[xd.size() - 1]);
  const ffi::AnyBuffer in[] = {A, Q, b, C, R, d, m0, P0, y, w};
  ModelOperands mo;
  KALMAX_RETURN_IF_ERROR(describe_model(in, bs, T, n, NoiseForms{r_diagonal, q_diagonal}, &mo));
  if (x->element_type() != y.element_type() || Linv->element_type() != y.element_type() ||
      M->element_type() != y.element_type() || subT->element_type() != y.element_type())
    return invalid("outputs must have the dtype of y");
  const bool compact = mo.kA == Kind::kInvariant && mo.kQ == Kind::kInvariant;
  const int64_t m_blocks = compact ? 0 : (T > 0 ? T - 1 : 0);
  if (static_cast<int64_t>(Linv->element_count()) != bs.count * T * n * n ||
      static_cast<int64_t>(M->element_count()) != bs.count * m_blocks * n * n ||
      static_cast<int64_t>(subT->element_count()) != bs.count * n * n ||
      static_cast<int64_t>(ok->element_count()) != bs.count)
    return invalid("factor outputs have unexpected sizes");
  // The lo parts of the factor: as big as the factor for float32, empty for float64.
  const bool wide = y.element_type() == ffi::DataType::F32;
  const int64_t lo_scale = wide ? 1 : 0;
  if (Linv_lo->element_type() != y.element_type() || M_lo->element_type() != y.element_type() ||
      subT_lo->element_type() != y.element_type() ||
      static_cast<int64_t>(Linv_lo->element_count()) != lo_scale * bs.count * T * n * n ||
      static_cast<int64_t>(M_lo->element_count()) != lo_scale * bs.count * m_blocks * n * n ||
      static_cast<int64_t>(subT_lo->element_count()) != lo_scale * bs.count * n * n ||
      x_lo->element_type() != y.element_type() ||
      static_cast<int64_t>(x_lo->element_count()) != lo_scale * bs.count * T * n)
    return invalid("lo parts of the factor have unexpected sizes");

  advise_huge_pages(x);
  advise_huge_pages(Linv);
  advise_huge_pages(M);
  advise_huge_pages(Linv_lo);
  advise_huge_pages(M_lo);
  return with_real_type(y.element_type(), [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const int p = mo.p;
      const std::size_t n2 = std::size_t(n) * n, Tn = std::size_t(T) * n, Tn2 = std::size_t(T) * n2;
      const std::size_t Mn2 = std::size_t(m_blocks) * n2;
      Real* xo = static_cast<Real*>(x->untyped_data());
      Real* Linvo = static_cast<Real*>(Linv->untyped_data());
      Real* Mo = static_cast<Real*>(M->untyped_data());
      Real* So = static_cast<Real*>(subT->untyped_data());
      Real* Linvlo = static_cast<Real*>(Linv_lo->untyped_data());
      Real* Mlo = static_cast<Real*>(M_lo->untyped_data());
      Real* Slo = static_cast<Real*>(subT_lo->untyped_data());
      Real* xlo = static_cast<Real*>(x_lo->untyped_data());
      int32_t* oko = ok->typed_data();
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        std::vector<double> ws(workspace_reals(n, p));  // double for both dtypes
        std::vector<int> idx(p + 1);
        PatternCaches<double> caches(mo);
        WideTrajectory wide_P;
        Scratch xw, Linvw, Mw, Sw;
        for (int64_t bi = begin; bi < end; ++bi) {
          const Trajectory<Real> P = trajectory<Real>(mo, bs, bi);
          Real* x_b = xo + bi * Tn;
          Real* Linv_b = Linvo + bi * Tn2;
          Real* M_b = Mo + bi * Mn2;
          Real* S_b = So + bi * n2;
          if constexpr (std::is_same_v<Real, double>) {
            oko[bi] = forward_one<double, NK>(P, x_b, Linv_b, M_b, S_b, ws.data(), idx.data(), caches.get(P),
                                              settings);
          } else {
            const Trajectory<double> W = wide_P.make(P);
            double* xd_ = xw.get(Tn);
            double* Linvd_ = Linvw.get(Tn2);
            double* Md_ = Mw.get(Mn2);
            double* Sd_ = Sw.get(n2);
            std::fill(Sd_, Sd_ + n2, 0.0);
            oko[bi] = forward_one<double, NK>(W, xd_, Linvd_, Md_, Sd_, ws.data(), idx.data(),
                                              caches.get(W, P.C, P.R), settings);
            split(xd_, x_b, xlo + bi * Tn, Tn);
            split(Linvd_, Linv_b, Linvlo + bi * Tn2, Tn2);
            split(Md_, M_b, Mlo + bi * Mn2, Mn2);
            split(Sd_, S_b, Slo + bi * n2, n2);
          }
        }
      });
      return ffi::Error::Success();
    });
  });
}

// The factor operands as a handler receives them: Linv (the inverse diagonal
// blocks L_t⁻¹), M, subT, ok, and the lo parts of a float32 factor.
struct FactorBuffers {
  const ffi::AnyBuffer& Linv;
  const ffi::AnyBuffer& M;
  const ffi::AnyBuffer& subT;
  const ffi::Buffer<ffi::S32>& ok;
  const ffi::AnyBuffer& Linv_lo;
  const ffi::AnyBuffer& M_lo;
  const ffi::AnyBuffer& subT_lo;
};

// The factor operands described for a batch.
struct FactorOperands {
  Operand Linv, M, subT, ok, Linv_lo, M_lo, subT_lo;
  bool compact = false;
  int T = 0, n = 0;

  // The double factor of trajectory b: the stored arrays themselves for a
  // float64 factor; hi + lo joined into wf's buffers for a float32 one.
  template <class Real>
  FactorView<double> view(const BatchShape& bs, int64_t b, WideFactor& wf) const {
    FactorView<double> F;
    if constexpr (std::is_same_v<Real, double>) {
      F.Li = static_cast<const double*>(Linv.data) + Linv.offset(bs, b);
      F.M = static_cast<const double*>(M.data) + M.offset(bs, b);
      F.subT = compact ? static_cast<const double*>(subT.data) + subT.offset(bs, b) : nullptr;
    } else {
      const std::size_t n2 = std::size_t(n) * n, Tn2 = std::size_t(T) * n2;
      const std::size_t Mn2 = compact ? 0 : std::size_t(T > 0 ? T - 1 : 0) * n2;
      auto part = [&](const Operand& op) { return static_cast<const float*>(op.data) + op.offset(bs, b); };
      join(part(Linv), part(Linv_lo), wf.Li.get(Tn2), Tn2);
      join(part(M), part(M_lo), wf.M.get(Mn2), Mn2);
      F.Li = wf.Li.data();
      F.M = wf.M.data();
      if (compact) {
        join(part(subT), part(subT_lo), wf.subT.get(n2), n2);
        F.subT = wf.subT.data();
      }
    }
    return F;
  }

  bool ok_at(const BatchShape& bs, int64_t b) const {
    return *(static_cast<const int32_t*>(ok.data) + ok.offset(bs, b)) != 0;
  }
};

ffi::Error describe_factor(const FactorBuffers& in, const BatchShape& bs, int T, int n, ffi::DataType dt,
                           FactorOperands* fo) {
  fo->T = T;
  fo->n = n;
  KALMAX_RETURN_IF_ERROR(describe(in.Linv, "Linv", bs, &fo->Linv));
  KALMAX_RETURN_IF_ERROR(describe(in.M, "M", bs, &fo->M));
  KALMAX_RETURN_IF_ERROR(describe(in.subT, "subT", bs, &fo->subT));
  KALMAX_RETURN_IF_ERROR(describe(in.Linv_lo, "Linv_lo", bs, &fo->Linv_lo));
  KALMAX_RETURN_IF_ERROR(describe(in.M_lo, "M_lo", bs, &fo->M_lo));
  KALMAX_RETURN_IF_ERROR(describe(in.subT_lo, "subT_lo", bs, &fo->subT_lo));
  if (in.Linv_lo.element_type() != dt || in.M_lo.element_type() != dt || in.subT_lo.element_type() != dt)
    return invalid("factor operands must share one dtype");
  const std::vector<int64_t> empty{0};
  const bool lo_ok = dt == ffi::DataType::F32
                         ? (fo->Linv_lo.core == fo->Linv.core && fo->M_lo.core == fo->M.core &&
                            fo->subT_lo.core == fo->subT.core)
                         : (fo->Linv_lo.core == empty && fo->M_lo.core == empty && fo->subT_lo.core == empty);
  if (!lo_ok)
    return invalid("the lo parts of the factor must match the factor (float32) or have shape (0,) (float64)");
  KALMAX_RETURN_IF_ERROR(describe(in.ok.untyped_data(), in.ok.dimensions(), "ok", bs, &fo->ok));
  const int64_t N = n, T1 = T > 0 ? T - 1 : 0;
  fo->compact = fo->M.core.size() == 3 && fo->M.core[0] == 0;
  if (fo->Linv.core != std::vector<int64_t>{T, N, N} ||
      (!fo->compact && fo->M.core != std::vector<int64_t>{T1, N, N}) ||
      fo->subT.core != std::vector<int64_t>{N, N} || !fo->ok.core.empty())
    return invalid("factor operands have inconsistent shapes");
  if (in.Linv.element_type() != dt || in.M.element_type() != dt || in.subT.element_type() != dt)
    return invalid("factor operands must share one dtype");
  return ffi::Error::Success();
}

// The lo part of a float32 x (the forward's answer before rounding):
// shape of x for float32, (0,) for float64.
ffi::Error describe_x_lo(const ffi::AnyBuffer& x_lo, const Operand& oX, const BatchShape& bs, ffi::DataType dt,
                         Operand* op) {
  KALMAX_RETURN_IF_ERROR(describe(x_lo, "x_lo", bs, op));
  const bool fits = x_lo.element_type() == dt &&
                    (dt == ffi::DataType::F32 ? op->core == oX.core : op->core == std::vector<int64_t>{0});
  if (!fits) return invalid("x_lo must match x (float32) or have shape (0,) (float64)");
  return ffi::Error::Success();
}

// x of trajectory b at double precision: x itself (float64), x + x_lo (float32).
template <class Real>
const double* x_double(const Operand& oX, const Operand& oXlo, const BatchShape& bs, int64_t b, Scratch& buf,
                       std::size_t Tn) {
  if constexpr (std::is_same_v<Real, double>) {
    (void)oXlo;
    (void)buf;
    (void)Tn;
    return at<double>(oX, bs, b);
  } else {
    double* out = buf.get(Tn);
    join(at<float>(oX, bs, b), at<float>(oXlo, bs, b), out, Tn);
    return out;
  }
}

ffi::Error SolveImpl(ffi::AnyBuffer Linv, ffi::AnyBuffer M, ffi::AnyBuffer subT,
                     ffi::Buffer<ffi::S32> ok, ffi::AnyBuffer Linv_lo, ffi::AnyBuffer M_lo,
                     ffi::AnyBuffer subT_lo, ffi::AnyBuffer v, ffi::Result<ffi::AnyBuffer> x) {
  BatchShape bs;
  KALMAX_RETURN_IF_ERROR(batch_from_output(x->dimensions(), 2, &bs));
  const auto xd = x->dimensions();
  const int T = static_cast<int>(xd[xd.size() - 2]);
  const int n = static_cast<int>(xd[xd.size() - 1]);
  FactorOperands fo;
  KALMAX_RETURN_IF_ERROR(
      describe_factor({Linv, M, subT, ok, Linv_lo, M_lo, subT_lo}, bs, T, n, x->element_type(), &fo));
  Operand oV;
  KALMAX_RETURN_IF_ERROR(describe(v, "v", bs, &oV));
  if (oV.core != std::vector<int64_t>{T, n} || v.element_type() != x->element_type())
    return invalid("v must have the shape and dtype of the result");
  advise_huge_pages(x);
  return with_real_type(x->element_type(), [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      Real* xo = static_cast<Real*>(x->untyped_data());
      const std::size_t Tn = std::size_t(T) * n;
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        std::vector<double> tmp(2 * n + 2);
        Scratch vbuf, xbuf;
        WideFactor wf;
        for (int64_t bi = begin; bi < end; ++bi) {
          double* xd_ = double_out(xo + bi * Tn, xbuf, Tn);
          solve_one<double, NK>(fo.view<Real>(bs, bi, wf), fo.ok_at(bs, bi),
                                as_double(at<Real>(oV, bs, bi), vbuf, Tn), xd_, T, n, tmp.data(),
                                tmp.data() + n + 1);
          finish(xd_, xo + bi * Tn, Tn);
        }
      });
      return ffi::Error::Success();
    });
  });
}

// ---------------------------------------------------------------------------
// What the gradient and log-likelihood handlers share.

// Their inputs: x (with the lo part of a float32 x), the stored factor and
// the model, described for the batch of the gradient outputs.
struct GradientOperands {
  BatchShape bs;
  Operand x, x_lo, xbar;
  FactorOperands fo;
  ModelOperands mo;
  int T = 0, n = 0;
};

// out_dims: the dimensions of ȳ, which fix the batch. xbar: the gradient
// handler's cotangent, checked alongside x; nullptr for the log-likelihood.
ffi::Error describe_gradient_operands(ffi::AnyBuffer::Dimensions out_dims, const ffi::AnyBuffer& x,
                                      const ffi::AnyBuffer& x_lo, const ffi::AnyBuffer* xbar,
                                      const FactorBuffers& factor, const ffi::AnyBuffer (&model)[10],
                                      NoiseForms forms, GradientOperands* go) {
  KALMAX_RETURN_IF_ERROR(batch_from_output(out_dims, 2, &go->bs));
  KALMAX_RETURN_IF_ERROR(describe(x, "x", go->bs, &go->x));
  if (xbar != nullptr) {
    KALMAX_RETURN_IF_ERROR(describe(*xbar, "x_bar", go->bs, &go->xbar));
    if (go->x.core.size() != 2 || go->xbar.core != go->x.core) return invalid("x and x_bar must have shape (T, n)");
  } else if (go->x.core.size() != 2) {
    return invalid("x must have shape (T, n)");
  }
  const ffi::DataType dt = model[8].element_type();  // y's
  KALMAX_RETURN_IF_ERROR(describe_x_lo(x_lo, go->x, go->bs, dt, &go->x_lo));
  go->T = static_cast<int>(go->x.core[0]);
  go->n = static_cast<int>(go->x.core[1]);
  KALMAX_RETURN_IF_ERROR(describe_factor(factor, go->bs, go->T, go->n, dt, &go->fo));
  KALMAX_RETURN_IF_ERROR(describe_model(model, go->bs, go->T, go->n, forms, &go->mo));
  if (go->fo.compact != (go->mo.kA == Kind::kInvariant && go->mo.kQ == Kind::kInvariant) && go->T > 1)
    return invalid("factor form does not match the model");
  return ffi::Error::Success();
}

// Their outputs: the gradients w.r.t. A, Q, b, C, R, d, x0_mean, x0_cov, y,
// in this order.
constexpr int kModelGradients = 9;
using GradientResults = ffi::Result<ffi::AnyBuffer>* const (&)[kModelGradients];

// The model operand that each gradient output has the shape of.
std::array<const Operand*, kModelGradients> gradient_shapes(const ModelOperands& mo) {
  return {&mo.A, &mo.Q, &mo.b, &mo.C, &mo.R, &mo.d, &mo.m0, &mo.P0, &mo.y};
}

// Each gradient output must have its input's core shape with full batch
// dims, and y's dtype; then huge pages are advised for all of them.
ffi::Error prepare_gradient_outputs(GradientResults outs, const ModelOperands& mo, const BatchShape& bs,
                                    ffi::DataType dt) {
  const auto ins = gradient_shapes(mo);
  for (int i = 0; i < kModelGradients; ++i) {
    if ((*outs[i])->element_type() != dt ||
        static_cast<int64_t>((*outs[i])->element_count()) != bs.count * ins[i]->core_size)
      return invalid("gradient output " + std::to_string(i) + " has an unexpected size or dtype");
  }
  for (auto* out : outs) advise_huge_pages(*out);
  return ffi::Error::Success();
}

// The gradient outputs of one trajectory at a time, as the double passes
// write them: the output buffers themselves (float64) or scratch that
// store() rounds into them (float32). One per thread (it owns the scratch).
template <class Real>
class GradientOutputs {
 public:
  GradientOutputs(GradientResults outs, const ModelOperands& mo, int n)
      : kinds_{mo.kA, mo.kQ, mo.kb, mo.kC, mo.kR, mo.kd, mo.km0, mo.kP0} {
    const std::size_t p = mo.p, nn = n;
    const std::size_t items[] = {nn * nn, mo.Q_diag ? nn : nn * nn, nn, p * nn, mo.R_diag ? p : p * p, p, nn,
                                 nn * nn};
    r_diag_ = mo.R_diag;
    q_diag_ = mo.Q_diag;
    std::copy(items, items + kFields, items_);
    const auto ins = gradient_shapes(mo);
    for (int f = 0; f < kModelGradients; ++f) {
      base_[f] = static_cast<Real*>((*outs[f])->untyped_data());
      sizes_[f] = ins[f]->core_size;
    }
  }

  // G aimed at trajectory b's outputs (absent fields stay absent).
  Gradients<double> bind(int64_t b) {
    Gradients<double> G;
    GradSink<double>* sinks[] = {&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0};
    for (int f = 0; f < kModelGradients; ++f) dst_[f] = base_[f] + b * sizes_[f];
    for (int f = 0; f < kFields; ++f) {
      if (kinds_[f] == Kind::kAbsent) continue;
      sinks[f]->out = double_out(dst_[f], buf_[f], sizes_[f]);
      sinks[f]->tv = kinds_[f] == Kind::kVarying;
      sinks[f]->item = items_[f];
    }
    G.R.diagonal = r_diag_;
    G.Q.diagonal = q_diag_;
    G.y = double_out(dst_[kFields], buf_[kFields], sizes_[kFields]);
    return G;
  }

  // Rounds what the pass wrote through G into the outputs (nothing to do for float64).
  void store(const Gradients<double>& G) {
    const GradSink<double>* sinks[] = {&G.A, &G.Q, &G.b, &G.C, &G.R, &G.d, &G.m0, &G.P0};
    for (int f = 0; f < kFields; ++f)
      if (kinds_[f] != Kind::kAbsent) finish(sinks[f]->out, dst_[f], sizes_[f]);
    finish(G.y, dst_[kFields], sizes_[kFields]);
  }

 private:
  static constexpr int kFields = kModelGradients - 1;  // the model's; ȳ last
  Kind kinds_[kFields];
  bool r_diag_ = false;
  bool q_diag_ = false;
  std::size_t items_[kFields];
  Real* base_[kModelGradients];
  int64_t sizes_[kModelGradients];
  Real* dst_[kModelGradients];
  Scratch buf_[kModelGradients];
};

ffi::Error GradientsImpl(ffi::AnyBuffer Linv, ffi::AnyBuffer M, ffi::AnyBuffer subT,
                         ffi::Buffer<ffi::S32> ok, ffi::AnyBuffer Linv_lo, ffi::AnyBuffer M_lo,
                         ffi::AnyBuffer subT_lo, ffi::AnyBuffer x, ffi::AnyBuffer x_lo, ffi::AnyBuffer xbar,
                         ffi::AnyBuffer A, ffi::AnyBuffer Q,
                         ffi::AnyBuffer b, ffi::AnyBuffer C, ffi::AnyBuffer R, ffi::AnyBuffer d,
                         ffi::AnyBuffer m0, ffi::AnyBuffer P0, ffi::AnyBuffer y, ffi::AnyBuffer w,
                         ffi::Result<ffi::AnyBuffer> gA, ffi::Result<ffi::AnyBuffer> gQ,
                         ffi::Result<ffi::AnyBuffer> gb, ffi::Result<ffi::AnyBuffer> gC,
                         ffi::Result<ffi::AnyBuffer> gR, ffi::Result<ffi::AnyBuffer> gd,
                         ffi::Result<ffi::AnyBuffer> gm0, ffi::Result<ffi::AnyBuffer> gP0,
                         ffi::Result<ffi::AnyBuffer> gy, int32_t r_diagonal, int32_t q_diagonal) {
  const ffi::AnyBuffer model[] = {A, Q, b, C, R, d, m0, P0, y, w};
  GradientOperands go;
  KALMAX_RETURN_IF_ERROR(describe_gradient_operands(gy->dimensions(), x, x_lo, &xbar,
                                                    {Linv, M, subT, ok, Linv_lo, M_lo, subT_lo}, model,
                                                    NoiseForms{r_diagonal, q_diagonal}, &go));
  if (x.element_type() != y.element_type() || xbar.element_type() != y.element_type())
    return invalid("operands must share one dtype");
  ffi::Result<ffi::AnyBuffer>* const outs[] = {&gA, &gQ, &gb, &gC, &gR, &gd, &gm0, &gP0, &gy};
  KALMAX_RETURN_IF_ERROR(prepare_gradient_outputs(outs, go.mo, go.bs, y.element_type()));
  const BatchShape& bs = go.bs;
  const int T = go.T, n = go.n;
  return with_real_type(y.element_type(), [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const int p = go.mo.p;
      const std::size_t Tn = std::size_t(T) * n;
      const int parts = parts_per_trajectory(bs.count, T);
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        std::vector<double> ws(workspace_reals(n, p));
        // Uninitialised (std::vector would zero-fill it, faulting every page in
        // before the huge-page advice could apply); fully written before use.
        const std::size_t u_size = Tn + 1;
        std::unique_ptr<double[]> u(new double[u_size]);
        advise_huge_pages(u.get(), u_size * sizeof(double));
        std::vector<double> acc(accumulator_size(n, p));
        std::vector<int> idx(p + 1);
        PatternCaches<double> caches(go.mo);
        WideTrajectory wide_P;
        WideFactor wf;
        Scratch xbuf, xbbuf;
        GradientOutputs<Real> grads(outs, go.mo, n);
        for (int64_t bi = begin; bi < end; ++bi) {
          const Trajectory<Real> P = trajectory<Real>(go.mo, bs, bi);
          const Trajectory<double> W = as_double(P, wide_P);
          Gradients<double> G = grads.bind(bi);
          gradients_one<double, NK>(W, go.fo.view<Real>(bs, bi, wf), go.fo.ok_at(bs, bi),
                                    x_double<Real>(go.x, go.x_lo, bs, bi, xbuf, Tn),
                                    as_double(at<Real>(go.xbar, bs, bi), xbbuf, Tn), G, ws.data(), u.get(),
                                    acc.data(), idx.data(), caches.get(W, P.C, P.R), parts);
          grads.store(G);
        }
      });
      return ffi::Error::Success();
    });
  });
}

ffi::Error BandImpl(ffi::AnyBuffer Linv, ffi::AnyBuffer M, ffi::AnyBuffer subT, ffi::Buffer<ffi::S32> ok,
                    ffi::AnyBuffer Linv_lo, ffi::AnyBuffer M_lo, ffi::AnyBuffer subT_lo,
                    ffi::Result<ffi::AnyBuffer> diag, ffi::Result<ffi::AnyBuffer> sub) {
  BatchShape bs;
  KALMAX_RETURN_IF_ERROR(batch_from_output(diag->dimensions(), 3, &bs));
  const auto dd = diag->dimensions();
  const int T = static_cast<int>(dd[dd.size() - 3]);
  const int n = static_cast<int>(dd[dd.size() - 1]);
  FactorOperands fo;
  KALMAX_RETURN_IF_ERROR(
      describe_factor({Linv, M, subT, ok, Linv_lo, M_lo, subT_lo}, bs, T, n, diag->element_type(), &fo));
  if (static_cast<int64_t>(sub->element_count()) != bs.count * int64_t(T > 0 ? T - 1 : 0) * n * n ||
      sub->element_type() != diag->element_type())
    return invalid("band outputs have unexpected sizes");
  advise_huge_pages(diag);
  advise_huge_pages(sub);
  return with_real_type(diag->element_type(), [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const std::size_t n2 = std::size_t(n) * n;
      Real* Do = static_cast<Real*>(diag->untyped_data());
      Real* So = static_cast<Real*>(sub->untyped_data());
      const std::size_t Dn = std::size_t(T) * n2, Sn = std::size_t(T > 0 ? T - 1 : 0) * n2;
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        WideFactor wf;
        Scratch dbuf, sbuf;
        for (int64_t bi = begin; bi < end; ++bi) {
          double* dd_ = double_out(Do + bi * Dn, dbuf, Dn);
          double* sd_ = double_out(So + bi * Sn, sbuf, Sn);
          band_one<double, NK>(fo.view<Real>(bs, bi, wf), fo.ok_at(bs, bi), T, n, dd_, sd_);
          finish(dd_, Do + bi * Dn, Dn);
          finish(sd_, So + bi * Sn, Sn);
        }
      });
      return ffi::Error::Success();
    });
  });
}

// The band operands of the band tangent: Σ_tt and dH_tt (T, n, n), Σ_{t+1,t}
// and dH_{t+1,t} (T-1, n, n), each with the batch dimensions of the outputs
// (or 1) and the outputs' dtype.
ffi::Error describe_band(const ffi::AnyBuffer& buf, const char* name, const BatchShape& bs, int64_t blocks, int n,
                         ffi::DataType dt, Operand* op) {
  KALMAX_RETURN_IF_ERROR(describe(buf, name, bs, op));
  if (op->core != std::vector<int64_t>{blocks, n, n} || buf.element_type() != dt)
    return invalid(std::string(name) + " has shape " + shape_str(op->core) + ", expected " +
                   shape_str({blocks, n, n}) + " and the dtype of the factor");
  return ffi::Error::Success();
}

ffi::Error BandTangentImpl(ffi::AnyBuffer Linv, ffi::AnyBuffer M, ffi::AnyBuffer subT, ffi::Buffer<ffi::S32> ok,
                           ffi::AnyBuffer Linv_lo, ffi::AnyBuffer M_lo, ffi::AnyBuffer subT_lo,
                           ffi::AnyBuffer S_diag, ffi::AnyBuffer S_sub, ffi::AnyBuffer dH_diag,
                           ffi::AnyBuffer dH_sub, ffi::Result<ffi::AnyBuffer> diag,
                           ffi::Result<ffi::AnyBuffer> sub) {
  BatchShape bs;
  KALMAX_RETURN_IF_ERROR(batch_from_output(diag->dimensions(), 3, &bs));
  const auto dd = diag->dimensions();
  const int T = static_cast<int>(dd[dd.size() - 3]);
  const int n = static_cast<int>(dd[dd.size() - 1]);
  const int64_t T1 = T > 0 ? T - 1 : 0;
  const ffi::DataType dt = diag->element_type();
  FactorOperands fo;
  KALMAX_RETURN_IF_ERROR(describe_factor({Linv, M, subT, ok, Linv_lo, M_lo, subT_lo}, bs, T, n, dt, &fo));
  Operand oSd, oSs, oDd, oDs;
  KALMAX_RETURN_IF_ERROR(describe_band(S_diag, "S_diag", bs, T, n, dt, &oSd));
  KALMAX_RETURN_IF_ERROR(describe_band(S_sub, "S_sub", bs, T1, n, dt, &oSs));
  KALMAX_RETURN_IF_ERROR(describe_band(dH_diag, "dH_diag", bs, T, n, dt, &oDd));
  KALMAX_RETURN_IF_ERROR(describe_band(dH_sub, "dH_sub", bs, T1, n, dt, &oDs));
  if (static_cast<int64_t>(sub->element_count()) != bs.count * T1 * n * n || sub->element_type() != dt)
    return invalid("band tangent outputs have unexpected sizes");
  advise_huge_pages(diag);
  advise_huge_pages(sub);
  return with_real_type(dt, [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const std::size_t n2 = std::size_t(n) * n;
      Real* Do = static_cast<Real*>(diag->untyped_data());
      Real* So = static_cast<Real*>(sub->untyped_data());
      const std::size_t Dn = std::size_t(T) * n2, Sn = std::size_t(T1) * n2;
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        WideFactor wf;
        Scratch dbuf, sbuf, sd_buf, ss_buf, hd_buf, hs_buf;
        for (int64_t bi = begin; bi < end; ++bi) {
          double* dd_ = double_out(Do + bi * Dn, dbuf, Dn);
          double* sd_ = double_out(So + bi * Sn, sbuf, Sn);
          band_tangent_one<double, NK>(fo.view<Real>(bs, bi, wf), fo.ok_at(bs, bi), T, n,
                                       as_double(at<Real>(oSd, bs, bi), sd_buf, Dn),
                                       as_double(at<Real>(oSs, bs, bi), ss_buf, Sn),
                                       as_double(at<Real>(oDd, bs, bi), hd_buf, Dn),
                                       as_double(at<Real>(oDs, bs, bi), hs_buf, Sn), dd_, sd_);
          finish(dd_, Do + bi * Dn, Dn);
          finish(sd_, So + bi * Sn, Sn);
        }
      });
      return ffi::Error::Success();
    });
  });
}

ffi::Error LoglikImpl(ffi::AnyBuffer Linv, ffi::AnyBuffer M, ffi::AnyBuffer subT, ffi::Buffer<ffi::S32> ok,
                      ffi::AnyBuffer Linv_lo, ffi::AnyBuffer M_lo, ffi::AnyBuffer subT_lo, ffi::AnyBuffer x,
                      ffi::AnyBuffer x_lo, ffi::AnyBuffer A, ffi::AnyBuffer Q, ffi::AnyBuffer b,
                      ffi::AnyBuffer C, ffi::AnyBuffer R, ffi::AnyBuffer d, ffi::AnyBuffer m0,
                      ffi::AnyBuffer P0, ffi::AnyBuffer y, ffi::AnyBuffer w,
                      ffi::Result<ffi::AnyBuffer> value, ffi::Result<ffi::AnyBuffer> gA,
                      ffi::Result<ffi::AnyBuffer> gQ, ffi::Result<ffi::AnyBuffer> gb,
                      ffi::Result<ffi::AnyBuffer> gC, ffi::Result<ffi::AnyBuffer> gR,
                      ffi::Result<ffi::AnyBuffer> gd, ffi::Result<ffi::AnyBuffer> gm0,
                      ffi::Result<ffi::AnyBuffer> gP0, ffi::Result<ffi::AnyBuffer> gy, int32_t r_diagonal,
                      int32_t q_diagonal) {
  const ffi::AnyBuffer model[] = {A, Q, b, C, R, d, m0, P0, y, w};
  GradientOperands go;
  KALMAX_RETURN_IF_ERROR(describe_gradient_operands(gy->dimensions(), x, x_lo, nullptr,
                                                    {Linv, M, subT, ok, Linv_lo, M_lo, subT_lo}, model,
                                                    NoiseForms{r_diagonal, q_diagonal}, &go));
  if (x.element_type() != y.element_type() || value->element_type() != y.element_type() ||
      static_cast<int64_t>(value->element_count()) != go.bs.count)
    return invalid("value must be one scalar of y's dtype per trajectory");
  ffi::Result<ffi::AnyBuffer>* const outs[] = {&gA, &gQ, &gb, &gC, &gR, &gd, &gm0, &gP0, &gy};
  KALMAX_RETURN_IF_ERROR(prepare_gradient_outputs(outs, go.mo, go.bs, y.element_type()));
  const BatchShape& bs = go.bs;
  const int T = go.T, n = go.n;
  return with_real_type(y.element_type(), [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const int p = go.mo.p;
      Real* vo = static_cast<Real*>(value->untyped_data());
      const std::size_t Tn = std::size_t(T) * n;
      const int parts = parts_per_trajectory(bs.count, T);
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        std::vector<double> acc(accumulator_size(n, p));
        std::vector<int> idx(p + 1);
        PatternCaches<double> caches(go.mo);
        WideTrajectory wide_P;
        WideFactor wf;
        Scratch xbuf;
        GradientOutputs<Real> grads(outs, go.mo, n);
        for (int64_t bi = begin; bi < end; ++bi) {
          const Trajectory<Real> P = trajectory<Real>(go.mo, bs, bi);
          const Trajectory<double> W = as_double(P, wide_P);
          Gradients<double> G = grads.bind(bi);
          double value_d = 0;
          loglik_one<double, NK>(W, go.fo.view<Real>(bs, bi, wf), go.fo.ok_at(bs, bi),
                                 x_double<Real>(go.x, go.x_lo, bs, bi, xbuf, Tn), &value_d, G, acc.data(),
                                 idx.data(), caches.get(W, P.C, P.R), parts);
          vo[bi] = static_cast<Real>(value_d);
          grads.store(G);
        }
      });
      return ffi::Error::Success();
    });
  });
}

// The cotangents of the band pull-back: D̄ (T, n, n) fixes T and n; S̄ (T-1, n, n).
ffi::Error BandPullbackImpl(ffi::AnyBuffer A, ffi::AnyBuffer Q, ffi::AnyBuffer b, ffi::AnyBuffer C,
                            ffi::AnyBuffer R, ffi::AnyBuffer d, ffi::AnyBuffer m0, ffi::AnyBuffer P0,
                            ffi::AnyBuffer y, ffi::AnyBuffer w, ffi::AnyBuffer Dbar, ffi::AnyBuffer Sbar,
                            ffi::Result<ffi::AnyBuffer> gA, ffi::Result<ffi::AnyBuffer> gQ,
                            ffi::Result<ffi::AnyBuffer> gb, ffi::Result<ffi::AnyBuffer> gC,
                            ffi::Result<ffi::AnyBuffer> gR, ffi::Result<ffi::AnyBuffer> gd,
                            ffi::Result<ffi::AnyBuffer> gm0, ffi::Result<ffi::AnyBuffer> gP0,
                            ffi::Result<ffi::AnyBuffer> gy, int32_t r_diagonal, int32_t q_diagonal) {
  BatchShape bs;
  KALMAX_RETURN_IF_ERROR(batch_from_output(gy->dimensions(), 2, &bs));
  const ffi::DataType dt = y.element_type();
  Operand oD, oS;
  KALMAX_RETURN_IF_ERROR(describe(Dbar, "D_bar", bs, &oD));
  if (oD.core.size() != 3 || oD.core[1] != oD.core[2] || oD.core[0] < 1)
    return invalid("D_bar has shape " + shape_str(oD.core) + ", expected (T, n, n)");
  const int T = static_cast<int>(oD.core[0]), n = static_cast<int>(oD.core[1]);
  KALMAX_RETURN_IF_ERROR(describe_band(Dbar, "D_bar", bs, T, n, dt, &oD));
  KALMAX_RETURN_IF_ERROR(describe_band(Sbar, "S_bar", bs, T - 1, n, dt, &oS));
  const ffi::AnyBuffer model[] = {A, Q, b, C, R, d, m0, P0, y, w};
  ModelOperands mo;
  KALMAX_RETURN_IF_ERROR(describe_model(model, bs, T, n, NoiseForms{r_diagonal, q_diagonal}, &mo));
  ffi::Result<ffi::AnyBuffer>* const outs[] = {&gA, &gQ, &gb, &gC, &gR, &gd, &gm0, &gP0, &gy};
  KALMAX_RETURN_IF_ERROR(prepare_gradient_outputs(outs, mo, bs, dt));
  return with_real_type(dt, [&](auto real) {
    using Real = decltype(real);
    return with_state_size(n, [&](auto nk) {
      constexpr int NK = decltype(nk)::value;
      const int p = mo.p;
      const std::size_t n2 = std::size_t(n) * n, Dn = std::size_t(T) * n2, Sn = std::size_t(T - 1) * n2;
      const int parts = parts_per_trajectory(bs.count, T);
      for_batches(bs.count, T, [&](int64_t begin, int64_t end) {
        std::vector<double> acc(accumulator_size(n, p));
        std::vector<int> idx(p + 1);
        PatternCaches<double> caches(mo);
        WideTrajectory wide_P;
        Scratch dbuf, sbuf;
        GradientOutputs<Real> grads(outs, mo, n);
        for (int64_t bi = begin; bi < end; ++bi) {
          const Trajectory<Real> P = trajectory<Real>(mo, bs, bi);
          const Trajectory<double> W = as_double(P, wide_P);
          Gradients<double> G = grads.bind(bi);
          band_pullback_one<double, NK>(W, as_double(at<Real>(oD, bs, bi), dbuf, Dn),
                                        as_double(at<Real>(oS, bs, bi), sbuf, Sn), G, acc.data(), idx.data(),
                                        caches.get(W, P.C, P.R), parts);
          grads.store(G);
        }
      });
      return ffi::Error::Success();
    });
  });
}

// The operand groups that several handlers share, each bound in the order of
// the handlers' parameters in one place.

// One more AnyBuffer result (ret) or operand (!ret) on a binding.
template <bool ret, class B>
auto bind_buffer(B&& binding) {
  if constexpr (ret)
    return std::forward<B>(binding).template Ret<ffi::AnyBuffer>();
  else
    return std::forward<B>(binding).template Arg<ffi::AnyBuffer>();
}

// `count` (≥ 1) of them. Every step returns the new binding as a prvalue:
// bindings cannot be moved from outside.
template <bool ret, int count, class B>
auto bind_buffers(B&& binding) {
  static_assert(count >= 1, "bind at least one buffer");
  if constexpr (count == 1)
    return bind_buffer<ret>(std::forward<B>(binding));
  else
    return bind_buffers<ret, count - 1>(bind_buffer<ret>(std::forward<B>(binding)));
}

// The stored factor (FactorBuffers: Linv, M, subT, ok, Linv_lo, M_lo,
// subT_lo), as the solve, gradient, band, band tangent and log-likelihood take it.
template <class B>
auto bind_factor(B&& binding) {
  return bind_buffers<false, 3>(
      bind_buffers<false, 3>(std::forward<B>(binding)).template Arg<ffi::Buffer<ffi::S32>>());
}

// A band of the block-tridiagonal matrices of the band tangent: its diagonal
// blocks (T, n, n) and sub-diagonal blocks (T-1, n, n), Σ's first, then dH's.
template <class B>
auto bind_band_pair(B&& binding) {
  return bind_buffers<false, 2>(std::forward<B>(binding));
}

// The model and the data (ModelOperands: A, Q, b, C, R, d, x0_mean, x0_cov, y, w).
template <class B>
auto bind_model(B&& binding) {
  return bind_buffers<false, 10>(std::forward<B>(binding));
}

// The gradients w.r.t. the model and y (GradientResults: Ā, Q̄, b̄, C̄, R̄, d̄, m̄0, P̄0, ȳ).
template <class B>
auto bind_model_gradients(B&& binding) {
  return bind_buffers<true, kModelGradients>(std::forward<B>(binding));
}

}  // namespace
}  // namespace kalmax_cpu

namespace kc = kalmax_cpu;

XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuForward, kc::ForwardImpl,
                              kc::bind_model(ffi::Ffi::Bind())
                                  .Ret<ffi::AnyBuffer>()         // x
                                  .Ret<ffi::AnyBuffer>()         // Linv
                                  .Ret<ffi::AnyBuffer>()         // M
                                  .Ret<ffi::AnyBuffer>()         // subT
                                  .Ret<ffi::Buffer<ffi::S32>>()  // ok
                                  .Ret<ffi::AnyBuffer>()         // Linv_lo (float32: the factor's low parts;
                                  .Ret<ffi::AnyBuffer>()         // M_lo     float64: shape (0,))
                                  .Ret<ffi::AnyBuffer>()         // subT_lo
                                  .Ret<ffi::AnyBuffer>()         // x_lo    (float32: x − fl32(x) of the double answer)
                                  // Settings from kalmax/_src/tolerances.py (never copied here).
                                  .Attr<double>("pivot_tolerance")
                                  .Attr<double>("trusted_error")
                                  .Attr<int32_t>("max_refine_steps")
                                  .Attr<double>("stall_ratio")
                                  // R given by its variances ((p,) or (T, p)): set from the model's form.
                                  .Attr<int32_t>("r_diagonal")
                                  // Q given by its variances ((n,) or (T-1, n)): likewise.
                                  .Attr<int32_t>("q_diagonal"));

XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuSolve, kc::SolveImpl,
                              kc::bind_factor(ffi::Ffi::Bind())
                                  .Arg<ffi::AnyBuffer>()    // v
                                  .Ret<ffi::AnyBuffer>());  // H⁻¹ v

// (factor, x, x_lo, x_bar, model) -> model gradients
XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuGradients, kc::GradientsImpl,
                              kc::bind_model_gradients(kc::bind_model(kc::bind_factor(ffi::Ffi::Bind())
                                                                          .Arg<ffi::AnyBuffer>()      // x
                                                                          .Arg<ffi::AnyBuffer>()      // x_lo
                                                                          .Arg<ffi::AnyBuffer>()))  // x_bar
                                  .Attr<int32_t>("r_diagonal")
                                  .Attr<int32_t>("q_diagonal"));

XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuBand, kc::BandImpl,
                              kc::bind_factor(ffi::Ffi::Bind())
                                  .Ret<ffi::AnyBuffer>()    // Σ_tt
                                  .Ret<ffi::AnyBuffer>());  // Σ_{t+1,t}

// (factor, Σ band, dH band) -> dΣ band
XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuBandTangent, kc::BandTangentImpl,
                              kc::bind_band_pair(kc::bind_band_pair(kc::bind_factor(ffi::Ffi::Bind())))
                                  .Ret<ffi::AnyBuffer>()    // dΣ_tt
                                  .Ret<ffi::AnyBuffer>());  // dΣ_{t+1,t}

// (factor, x, x_lo, model) -> (log p(y), model gradients)
XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuLoglik, kc::LoglikImpl,
                              kc::bind_model_gradients(kc::bind_model(kc::bind_factor(ffi::Ffi::Bind())
                                                                          .Arg<ffi::AnyBuffer>()   // x
                                                                          .Arg<ffi::AnyBuffer>())  // x_lo
                                                           .Ret<ffi::AnyBuffer>())  // log p(y)
                                  .Attr<int32_t>("r_diagonal")
                                  .Attr<int32_t>("q_diagonal"));

// (model, D̄, S̄) -> model gradients (ȳ zero): the pull-back of a cotangent on H's blocks
XLA_FFI_DEFINE_HANDLER_SYMBOL(KalmaxCpuBandPullback, kc::BandPullbackImpl,
                              kc::bind_model_gradients(kc::bind_band_pair(kc::bind_model(ffi::Ffi::Bind())))
                                  .Attr<int32_t>("r_diagonal")
                                  .Attr<int32_t>("q_diagonal"));
