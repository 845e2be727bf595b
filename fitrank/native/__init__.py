"""Native online kernels, through XLA's FFI: the constrained least squares and the feature transition.

The interpolation's online solve ends in a small equality-constrained least
squares (:func:`fitrank.interpolation.constrained_least_squares`). In XLA's
own operations that is half a dozen kernels: the Gram matrix, its
equilibration, a Cholesky factor, two triangular solves and the glue. At
k = 100, r = 200 they took about 340 us of a 650 us evaluation under XLA's
profiler; ``kernels.cc`` does the same steps in one call of about 150 us,
through the BLAS and LAPACK routines SciPy exports (``scipy.linalg.cython_blas``
and ``cython_lapack``): nothing is linked at build time, and the factor comes
from the same LAPACK routine JAX's own Cholesky calls.

The feature weighting's local transition (:func:`feature_weights`: an exp per
out-edge of the rows' in-neighbours, a sum per source, a division) is the
second: XLA computes a float64 exp one value at a time (about 5.5 ns), the
kernel's vectorised exp about 1 ns.

The functions here are pure JAX functions (jit, vmap, and the callers' custom
derivatives work as before); only their values come from the library.

The library is compiled by ``python -m fitrank.native`` (``make`` runs it after
installing). Its file name carries a hash of the source, the compiler flags and
the jaxlib version, so a stale build is never loaded. Without it (no C++
compiler, a JAX without ``jax.ffi``, or the environment variable
``FITRANK_NATIVE=0``) the same steps run in XLA's operations, which compute the
same numbers to rounding."""

from __future__ import annotations

import contextlib
import ctypes
import functools
import hashlib
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import jax
import jax.numpy as jnp
import jaxlib
import numpy as np

SOURCE = Path(__file__).with_name("kernels.cc")
SWITCH = "FITRANK_NATIVE"
"""Environment variable: ``0`` keeps every online solve on XLA's code."""

# the names XLA calls kernels.cc's handlers by
_TARGETS = {"fitrank_constrained_least_squares": "FitrankConstrainedLeastSquares",
            "fitrank_feature_weights": "FitrankFeatureWeights"}
# -O3 without -march: the library may run on another CPU than the one that built it (kernels.cc picks
# wider vector code at run time); no trapping math, so that the compiler may vectorise loops with selects
_FLAGS = ("-O3", "-std=c++17", "-shared", "-fPIC", "-w", "-fno-trapping-math")
_switched_off = False


def library_path() -> Path:
    """Where the library compiled from this source, with these flags, for this jaxlib lives (it may not exist yet)."""
    recipe = SOURCE.read_bytes() + " ".join(_FLAGS).encode() + jaxlib.__version__.encode()
    digest = hashlib.sha256(recipe).hexdigest()[:12]
    return SOURCE.with_name(f"_kernels-{digest}.so")


def build(compiler: str | None = None) -> Path:
    """Compile ``kernels.cc`` into :func:`library_path` (atomically) and return that path.

    Args:
      compiler: the C++ compiler; default ``$CXX``, else ``g++``, else ``c++``.

    Raises:
      RuntimeError: no compiler, no ``jax.ffi``, or the compiler's message.
    """
    compiler = compiler or os.environ.get("CXX") or shutil.which("g++") or shutil.which("c++")
    if not compiler or not shutil.which(compiler):
        raise RuntimeError("no C++ compiler found (set CXX); the online solves will use XLA's code")
    if not hasattr(jax, "ffi"):
        raise RuntimeError(f"JAX {jax.__version__} has no jax.ffi; the online solves will use XLA's code")
    target = library_path()
    with tempfile.TemporaryDirectory(dir=target.parent) as folder:
        temp = Path(folder) / target.name
        done = subprocess.run([compiler, *_FLAGS, f"-I{jax.ffi.include_dir()}", str(SOURCE), "-o", str(temp)],
                              capture_output=True, text=True)
        if done.returncode != 0:
            raise RuntimeError(f"{compiler} could not build {SOURCE.name}:\n{done.stderr.strip()}")
        os.replace(temp, target)
    for stale in target.parent.glob("_kernels-*.so"):
        if stale != target:
            stale.unlink(missing_ok=True)
    return target


@functools.cache
def _loaded() -> bool:
    """Load the library and register its handlers with XLA, once; False when there is none."""
    if os.environ.get(SWITCH, "1").strip() == "0" or not hasattr(jax, "ffi"):
        return False
    path = library_path()
    if not path.exists():
        return False
    import scipy.linalg.cython_blas as blas
    import scipy.linalg.cython_lapack as lapack

    library = ctypes.CDLL(str(path))
    library.fitrank_set_routines.argtypes = [ctypes.c_void_p] * 4
    library.fitrank_set_routines(*(_routine(module, name) for module, name in (
        (blas, "dsyrk"), (blas, "dgemv"), (lapack, "dpotrf"), (lapack, "dpotrs"))))
    for target, symbol in _TARGETS.items():
        jax.ffi.register_ffi_target(target, jax.ffi.pycapsule(getattr(library, symbol)), platform="cpu")
    return True


def _routine(module, name: str) -> int:
    """The address of a BLAS / LAPACK routine that SciPy exports as a PyCapsule."""
    api = ctypes.pythonapi
    api.PyCapsule_GetName.restype = ctypes.c_char_p
    api.PyCapsule_GetName.argtypes = [ctypes.py_object]
    api.PyCapsule_GetPointer.restype = ctypes.c_void_p
    api.PyCapsule_GetPointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
    capsule = module.__pyx_capi__[name]
    return api.PyCapsule_GetPointer(capsule, api.PyCapsule_GetName(capsule))


def available() -> bool:
    """True when the online steps being traced now will use the native kernels (CPU only)."""
    return not _switched_off and jax.default_backend() == "cpu" and _loaded()


@contextlib.contextmanager
def switched_off():
    """Within this block, functions traced (jit-compiled) use XLA's code: for side-by-side comparisons."""
    global _switched_off
    before, _switched_off = _switched_off, True
    try:
        yield
    finally:
        _switched_off = before


def constrained_least_squares_parts(matrix, rhs, sums):
    """The native twin of ``fitrank.interpolation._constrained_least_squares_parts`` (float64).

    Args:
      matrix: (r, k) B; rhs: (r,) f; sums: (k,) u.

    Returns:
      (c (k,), (normal (k, k), (upper Cholesky factor (k, k), False), scale (k,), D u (k,), z (k,), mu ())),
      the layout that :func:`jax.scipy.linalg.cho_solve` and the caller's derivative read.
    """
    k = matrix.shape[1]
    # one operand [[B, f], [u, 0]], made in the fusion that computes B (see kernels.cc for why)
    system = jnp.concatenate([jnp.concatenate([matrix, rhs[:, None]], axis=1),
                              jnp.concatenate([sums, jnp.zeros(1, sums.dtype)])[None, :]], axis=0)
    vector, square = jax.ShapeDtypeStruct((k,), jnp.float64), jax.ShapeDtypeStruct((k, k), jnp.float64)
    call = jax.ffi.ffi_call("fitrank_constrained_least_squares",
                            (vector, square, square, vector, vector, vector, jax.ShapeDtypeStruct((), jnp.float64)),
                            vmap_method="sequential")
    c, normal, factor, scale, u, z, multiplier = call(system)
    return c, (normal, (factor, False), scale, u, z, multiplier)


def feature_weights(theta, tables, part, sources: int):
    """The feature weighting's normalised out-edge weights q (E,), in one call (float64).

    The native twin of the exp, per-source sum and division in
    ``fitrank.weightings._feature_transition`` (the same numbers to rounding;
    values only: the caller writes the derivative).

    Args:
      theta: (f,) parameters.
      tables: (R, 2 f + 2, E) R stacked tables (a regional model's regions),
        each with rows log_base, the per-source shifted features hi (f rows)
        and lo (f rows), and each edge's source slot (as float64).
      part: () index of the table to use.
      sources: S, the number of source slots.

    Returns:
      (E,) q_e = exp(s_e) / sum over the out-edges e' of e's source of exp(s_e').
    """
    call = jax.ffi.ffi_call("fitrank_feature_weights", jax.ShapeDtypeStruct(tables.shape[2:], jnp.float64),
                            vmap_method="sequential")
    return call(theta, tables, jnp.asarray(part, jnp.int64), sources=np.int64(sources))
