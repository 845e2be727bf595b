// fitrank's native online kernels: XLA FFI handlers for the interpolation's
// constrained least squares (BLAS and LAPACK) and the feature weighting's
// local transition (a vectorised exp; see FeatureWeights below).
//
// The interpolation's constrained least squares, written in XLA operations,
// is half a dozen kernels (the Gram matrix, its equilibration, a Cholesky
// factor, two triangular solves and the glue between them); at k = 100 they
// took about 340 us of a 650 us evaluation under XLA's profiler, against
// about 150 us for this one call (see experiments/README.md). The BLAS and
// LAPACK routines are not linked here: fitrank/native/__init__.py hands over
// the function pointers SciPy exports (scipy.linalg.cython_blas and
// cython_lapack), so no library search happens at build time.
//
// Every array is row-major, as XLA passes it. A row-major (r, k) matrix is the
// column-major (k, r) matrix of its transpose, which is how BLAS sees it.

#include <cmath>
#include <cstdint>
#include <cstring>
#include <algorithm>
#include <limits>
#include <vector>

#include "xla/ffi/api/ffi.h"

namespace ffi = xla::ffi;

namespace {

using dsyrk_t = void(char*, char*, int*, int*, double*, double*, int*, double*, double*, int*);
using dgemv_t = void(char*, int*, int*, double*, double*, int*, double*, int*, double*, double*, int*);
using dpotrf_t = void(char*, int*, double*, int*, int*);
using dpotrs_t = void(char*, int*, int*, double*, int*, double*, int*, int*);

dsyrk_t* dsyrk = nullptr;
dgemv_t* dgemv = nullptr;
dpotrf_t* dpotrf = nullptr;
dpotrs_t* dpotrs = nullptr;

using F64 = ffi::Buffer<ffi::F64>;
using OutF64 = ffi::ResultBuffer<ffi::F64>;
using S64 = ffi::Buffer<ffi::S64>;
using Pred = ffi::Buffer<ffi::PRED>;

// argmin_c ||B c - f|| subject to u . c = 1 (see constrained_least_squares in
// fitrank/interpolation.py, which this mirrors step for step): the Gram matrix
// by dsyrk, its column equilibration, one Cholesky factor by dpotrf and both
// right-hand sides by one dpotrs. Outputs: c and what the derivative reuses.
//
// The input is one (r + 1, k + 1) array [[B, f], [u, 0]]: XLA builds it in the
// fusion that computes B, so the call depends on one chain of kernels. Given
// f and u as separate operands, their own small kernels made the program's
// dependency graph branch, and XLA's CPU runtime then ran it on its thread
// pool (measured on a 12-region model: 1.10-1.21x slower than without this
// kernel, against 0.93x with the one operand).
ffi::Error ConstrainedLeastSquares(F64 system, OutF64 c_out, OutF64 normal_out,
                                   OutF64 factor_out, OutF64 scale_out, OutF64 u_out, OutF64 z_out,
                                   OutF64 multiplier_out) {
  const auto dims = system.dimensions();
  int r = static_cast<int>(dims[0]) - 1;
  int k = static_cast<int>(dims[1]) - 1;
  int width = k + 1;
  double* b = const_cast<double*>(system.typed_data());
  double* normal = normal_out->typed_data();
  double* factor = factor_out->typed_data();
  double* scale = scale_out->typed_data();
  double* u = u_out->typed_data();
  double* z = z_out->typed_data();
  double* c = c_out->typed_data();
  double* multiplier = multiplier_out->typed_data();
  char upper = 'U', lower = 'L', plain = 'N';
  double one = 1.0, zero = 0.0;
  int step = 1, two = 2, info = 0;
  if (k == 0) return ffi::Error::Success();

  // B^T B: the row-major B is the column-major k x r matrix A = B^T, and A A^T = B^T B
  dsyrk(&upper, &plain, &k, &r, &one, b, &width, &zero, normal, &k);
  for (int i = 0; i < k; ++i) {
    const double norm2 = normal[i + i * k];
    scale[i] = norm2 == 0.0 ? 0.0 : 1.0 / std::sqrt(norm2);  // a zero (padding) column gets coefficient 0
  }
  for (int j = 0; j < k; ++j) {
    for (int i = 0; i < j; ++i) {
      const double value = normal[i + j * k] * scale[i] * scale[j];
      normal[i + j * k] = value;
      normal[j + i * k] = value;
    }
    const double diagonal = normal[j + j * k];
    normal[j + j * k] = diagonal == 0.0 ? 1.0 : diagonal * scale[j] * scale[j];
  }
  std::vector<double> both(2 * static_cast<size_t>(k));  // columns: D B^T f and u
  dgemv(&plain, &k, &r, &one, b, &width, b + k, &width, &zero, both.data(), &step);
  const double* s = b + static_cast<size_t>(r) * width;
  for (int i = 0; i < k; ++i) {
    both[i] *= scale[i];
    u[i] = s[i] * scale[i];
    both[k + i] = u[i];
  }
  std::memcpy(factor, normal, sizeof(double) * k * k);
  dpotrf(&lower, &k, factor, &k, &info);  // column-major lower L is the row-major upper L^T
  if (info != 0) {  // not positive definite: NaN, as XLA's Cholesky reports it
    const double nan = std::numeric_limits<double>::quiet_NaN();
    for (int i = 0; i < k * k; ++i) factor[i] = nan;
    for (int i = 0; i < k; ++i) c[i] = z[i] = nan;
    *multiplier = nan;
    return ffi::Error::Success();
  }
  for (int j = 0; j < k; ++j)
    for (int i = 0; i < j; ++i) factor[i + j * k] = 0.0;  // the unused triangle, zeroed as XLA's Cholesky does
  dpotrs(&lower, &k, &two, factor, &k, both.data(), &k, &info);
  double uy = 0.0, uz = 0.0;
  for (int i = 0; i < k; ++i) {
    uy += u[i] * both[i];
    uz += u[i] * both[k + i];
  }
  const double mu = (uy - 1.0) / uz;
  *multiplier = mu;
  for (int i = 0; i < k; ++i) {
    z[i] = both[k + i];
    c[i] = (both[i] - both[k + i] * mu) * scale[i];
  }
  return ffi::Error::Success();
}


// ---------------------------------------------------------------- feature weighting

// v <- exp(v) for v <= 0, and 0 below -708 (where exp(x) < 3.4e-308 would be
// subnormal); relative error <= 2.3e-16 on [-708, 0] (checked against std::exp
// by tests/test_native.py). Range reduction x = m ln 2 + r, |r| <= ln 2 / 2
// (Cody & Waite's two-part ln 2, the constants of fdlibm), exp(r) by its Taylor
// polynomial of degree 13 (truncation < 5e-18), 2^m built in the exponent bits.
// Written so that the compiler vectorises the loop: glibc's exp is one value at
// a time, about 5.5 ns each (XLA's float64 exp measured alike), this 1.4 ns
// with AVX2 and FMA.
//
// References: Cody & Waite, "Software Manual for the Elementary Functions",
// Prentice-Hall 1980 (the reduction); fdlibm's e_exp.c (the split of ln 2).
#define FITRANK_EXP_LOOP                                                                        \
  for (int64_t i = 0; i < n; ++i) {                                                             \
    const double xi = v[i];                                                                     \
    const double clamped = xi > -708.0 ? xi : -708.0;                                           \
    const double shifted = clamped * 1.4426950408889634 + 6755399441055744.0; /* 1.5 * 2^52 */  \
    const double m = shifted - 6755399441055744.0; /* round(x / ln 2) */                        \
    const double r = (clamped - m * 6.93147180369123816490e-01) - m * 1.90821492927058770002e-10; \
    double p = 1.0 / 6227020800.0;                                                              \
    p = p * r + 1.0 / 479001600.0;                                                              \
    p = p * r + 1.0 / 39916800.0;                                                               \
    p = p * r + 1.0 / 3628800.0;                                                                \
    p = p * r + 1.0 / 362880.0;                                                                 \
    p = p * r + 1.0 / 40320.0;                                                                  \
    p = p * r + 1.0 / 5040.0;                                                                   \
    p = p * r + 1.0 / 720.0;                                                                    \
    p = p * r + 1.0 / 120.0;                                                                    \
    p = p * r + 1.0 / 24.0;                                                                     \
    p = p * r + 1.0 / 6.0;                                                                      \
    p = p * r + 0.5;                                                                            \
    p = p * r + 1.0;                                                                            \
    p = p * r + 1.0;                                                                            \
    /* the low bits of shifted hold m; 2^m is (m + 1023) in the exponent field */               \
    const int64_t power = (__builtin_bit_cast(int64_t, shifted) - 0x4338000000000000LL + 1023LL) << 52; \
    const double value = p * __builtin_bit_cast(double, power);                                 \
    v[i] = xi >= -708.0 ? value : 0.0;                                                          \
  }

void ExpNonPositivePortable(double* v, int64_t n) { FITRANK_EXP_LOOP }

#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
// the same loop compiled for AVX2 and FMA, chosen at run time: the library is built without
// -march (it may run on another CPU than the one that built it), and plain x86-64 has only
// 2-wide vectors and no FMA (39 against 9 us for 6,500 values)
__attribute__((target("avx2,fma"))) void ExpNonPositiveAvx2(double* v, int64_t n) { FITRANK_EXP_LOOP }

void ExpNonPositive(double* v, int64_t n) {
  static const bool wide = __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
  if (wide) {
    ExpNonPositiveAvx2(v, n);
  } else {
    ExpNonPositivePortable(v, n);
  }
}
#else
void ExpNonPositive(double* v, int64_t n) { ExpNonPositivePortable(v, n); }
#endif
#undef FITRANK_EXP_LOOP

// below this a source's total counts as too small, as _SMALLEST_TOTAL in weightings.py (the same
// branch, so that both paths compute alike)
constexpr double kSmallestTotal = 1e-140;

// q <- the scores s_e = log_base_e + sum_f theta_f (hi_fe if theta_f > 0 else lo_fe)
void Scores(const double* theta, int64_t features, const double* table, int64_t edges, double* q) {
  std::memcpy(q, table, sizeof(double) * edges);
  for (int64_t f = 0; f < features; ++f) {
    const double step = theta[f];
    const double* column = table + (1 + f + (step > 0.0 ? 0 : features)) * edges;
    for (int64_t e = 0; e < edges; ++e) q[e] += step * column[e];
  }
}

// A run of consecutive edges with one source slot.
struct Run {
  int64_t start, end, slot;
};

// Sum of v[start:end] in four independent chains: one chain waits a full floating-point add
// latency per edge, which made these sums the kernel's largest cost.
double RunSum(const double* v, int64_t start, int64_t end) {
  double a = 0.0, b = 0.0, c = 0.0, d = 0.0;
  int64_t e = start;
  for (; e + 4 <= end; e += 4) {
    a += v[e];
    b += v[e + 1];
    c += v[e + 2];
    d += v[e + 3];
  }
  for (; e < end; ++e) a += v[e];
  return (a + b) + (c + d);
}

// The feature weighting's normalised out-edge weights q_e = exp(s_e) / sum_{e' out of j} exp(s_e'),
// j the source of e, from the per-source shifted tables of fitrank/weightings.py
// (_per_source_shifted: s_e <= 0, so exp never overflows). As there, when a source's total falls
// below kSmallestTotal every source's scores are shifted by their maximum instead (the same
// values). Padding edges (log_base = -inf) get 0.
//
// Inputs: theta (f,); tables (R, 2 f + 2, E), R tables stacked, each with rows log_base, hi
// (f rows), lo (f rows) and each edge's source slot in 0 .. sources - 1 (as a double: exact below
// 2^53); part () the table to use. The edges of a source normally come one after another; the
// kernel works on such runs but is correct for any order. The columns come as one operand and a
// regional model's stacked tables come whole, with the region's index: a slicing kernel beside
// the program's chain sent XLA's runtime to its thread pool (as for the least squares above).
// Output: q (E,), also the working space: nothing of size E is allocated (fresh pages for 80 kB
// of scratch cost more than the arithmetic).
ffi::Error FeatureWeights(F64 theta_in, F64 tables_in, S64 part_in, OutF64 weights_out, int64_t sources) {
  const int64_t features = static_cast<int64_t>(theta_in.element_count());
  const auto dims = tables_in.dimensions();
  const int64_t parts = static_cast<int64_t>(dims[0]), edges = static_cast<int64_t>(dims[2]);
  const int64_t part = std::min(std::max(*part_in.typed_data(), int64_t{0}), parts - 1);
  const double* theta = theta_in.typed_data();
  const double* table = tables_in.typed_data() + part * (2 * features + 2) * edges;
  const double* slot = table + (2 * features + 1) * edges;
  double* q = weights_out->typed_data();
  thread_local std::vector<Run> runs;
  thread_local std::vector<double> total;
  thread_local std::vector<char> real;  // sources with an edge that is not padding
  runs.clear();
  for (int64_t start = 0, end; start < edges; start = end) {
    for (end = start + 1; end < edges && slot[end] == slot[start]; ++end) {
    }
    runs.push_back({start, end, static_cast<int64_t>(slot[start])});
  }
  real.assign(sources, 0);
  for (const Run& run : runs)  // padding edges come in runs of their own, or after a source's real edges
    real[run.slot] |= table[run.start] > -std::numeric_limits<double>::infinity();
  Scores(theta, features, table, edges, q);
  for (int attempt = 0; attempt < 2; ++attempt) {
    ExpNonPositive(q, edges);
    total.assign(sources, 0.0);
    for (const Run& run : runs) total[run.slot] += RunSum(q, run.start, run.end);
    bool fits = true;
    for (int64_t j = 0; j < sources; ++j) fits = fits && (!real[j] || total[j] >= kSmallestTotal);
    if (fits || attempt == 1) break;
    // theta so far out that the bound underflows: shift each source by its largest score
    // (the exp overwrote the scores, so they are formed once more)
    Scores(theta, features, table, edges, q);
    std::vector<double> peak(sources, -std::numeric_limits<double>::infinity());
    for (const Run& run : runs)
      for (int64_t e = run.start; e < run.end; ++e) peak[run.slot] = std::max(peak[run.slot], q[e]);
    for (const Run& run : runs) {
      const double shift = std::isfinite(peak[run.slot]) ? peak[run.slot] : 0.0;
      for (int64_t e = run.start; e < run.end; ++e) q[e] -= shift;
    }
  }
  for (const Run& run : runs) {
    const double inverse = total[run.slot] > 0.0 ? 1.0 / total[run.slot] : 0.0;
    for (int64_t e = run.start; e < run.end; ++e) q[e] *= inverse;
  }
  return ffi::Error::Success();
}

}  // namespace

extern "C" void fitrank_set_routines(void* syrk, void* gemv, void* potrf, void* potrs) {
  dsyrk = reinterpret_cast<dsyrk_t*>(syrk);
  dgemv = reinterpret_cast<dgemv_t*>(gemv);
  dpotrf = reinterpret_cast<dpotrf_t*>(potrf);
  dpotrs = reinterpret_cast<dpotrs_t*>(potrs);
}

XLA_FFI_DEFINE_HANDLER_SYMBOL(FitrankConstrainedLeastSquares, ConstrainedLeastSquares,
                              ffi::Ffi::Bind()
                                  .Arg<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>()
                                  .Ret<F64>());

XLA_FFI_DEFINE_HANDLER_SYMBOL(FitrankFeatureWeights, FeatureWeights,
                              ffi::Ffi::Bind().Arg<F64>().Arg<F64>().Arg<S64>().Ret<F64>().Attr<int64_t>("sources"));
