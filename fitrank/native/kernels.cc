// fitrank's native online kernel: an XLA FFI handler that calls BLAS and LAPACK.
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
#include <cstring>
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
