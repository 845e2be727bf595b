"""The native online kernel (BLAS / LAPACK through XLA's FFI) against XLA's code and a dense reference."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fitrank import interpolation, native, weightings
from fitrank.interpolation import constrained_least_squares
from fitrank.reduced import ReductionSettings
from fitrank.regions import build_model

from tests.test_reduced import _model, _problem

needs_native = pytest.mark.skipif(not native.available(), reason="the native kernels are not built here")


def test_the_kernels_are_built_wherever_a_compiler_and_jax_ffi_are():
    # `make` builds them; a silent fallback on a machine that could build them would hide a broken build
    if os.environ.get(native.SWITCH, "1") == "0":
        pytest.skip(f"{native.SWITCH}=0 switches them off")
    if not (shutil.which("g++") or shutil.which("c++")) or not hasattr(jax, "ffi"):
        pytest.skip("no C++ compiler or no jax.ffi: XLA's code is the only path here")
    assert native.library_path().exists(), "run `python -m fitrank.native` (make does)"
    assert native.available()


def _system(rng, r, k, padding=0):
    matrix = rng.normal(size=(r, k)) * np.logspace(-3, 2, k)  # very different column scales: the equilibration
    matrix[:, k - padding:] = 0.0  # a regional model pads smaller bases with zero columns
    return matrix, rng.normal(size=r), rng.uniform(0.5, 2.0, size=k)


@needs_native
@pytest.mark.parametrize("r,k,padding", [(40, 12, 0), (100, 50, 0), (200, 100, 0), (61, 30, 4), (7, 1, 0)])
def test_native_least_squares_equals_xla_and_the_dense_kkt_solve(r, k, padding):
    rng = np.random.default_rng(r + k)
    matrix, rhs, sums = _system(rng, r, k, padding)
    got_c, got = jax.jit(native.constrained_least_squares_parts)(matrix, rhs, sums)
    want_c, want = jax.jit(interpolation._xla_least_squares_parts)(matrix, rhs, sums)
    np.testing.assert_allclose(got_c, want_c, rtol=1e-11, atol=1e-13)
    for got_part, want_part in zip(jax.tree_util.tree_leaves(got), jax.tree_util.tree_leaves(want)):
        np.testing.assert_allclose(np.asarray(got_part), np.asarray(want_part), rtol=1e-11, atol=1e-12)
    # Reference outside the project: the KKT system of equality-constrained least squares
    # (Golub & Van Loan, "Matrix Computations", 4th ed., sec. 6.2), solved densely by numpy;
    # padding columns are left out of it and get coefficient 0.
    real = k - padding
    kkt = np.block([[matrix[:, :real].T @ matrix[:, :real], sums[:real, None]], [sums[None, :real], np.zeros((1, 1))]])
    expected = np.linalg.solve(kkt, np.concatenate([matrix[:, :real].T @ rhs, [1.0]]))[:real]
    np.testing.assert_allclose(got_c[:real], expected, rtol=1e-8, atol=1e-12)
    assert np.all(np.asarray(got_c[real:]) == 0.0)
    assert abs(sums @ np.asarray(got_c) - 1.0) < 1e-12


@needs_native
def test_a_singular_normal_matrix_gives_nan_on_both_paths():
    matrix = np.ones((5, 2))  # two equal columns: the equilibrated normal matrix is [[1, 1], [1, 1]]
    rhs, sums = np.arange(5.0), np.ones(2)
    got = jax.jit(native.constrained_least_squares_parts)(matrix, rhs, sums)[0]
    want = jax.jit(interpolation._xla_least_squares_parts)(matrix, rhs, sums)[0]
    assert np.all(np.isnan(np.asarray(got))) and np.all(np.isnan(np.asarray(want)))


@needs_native
def test_gradients_through_the_native_solve_equal_xla_ones():
    rng = np.random.default_rng(8)
    matrix, rhs, sums = _system(rng, 60, 20)
    probe = rng.normal(size=20)

    def loss(m, f):
        return probe @ constrained_least_squares(m, f, jnp.asarray(sums))

    got = jax.jit(jax.grad(loss, argnums=(0, 1)))(matrix, rhs)
    with native.switched_off():
        want = jax.jit(jax.grad(lambda m, f: loss(m, f) + 0.0, argnums=(0, 1)))(matrix, rhs)  # traced anew
    for g, w in zip(got, want):
        np.testing.assert_allclose(np.asarray(g), np.asarray(w), rtol=1e-10, atol=1e-13)
    batched = jax.jit(jax.vmap(lambda m: constrained_least_squares(m, jnp.asarray(rhs), jnp.asarray(sums))))
    stacked = np.stack([matrix, matrix + rng.normal(size=matrix.shape)])
    one_by_one = [np.asarray(constrained_least_squares(m, rhs, sums)) for m in stacked]
    np.testing.assert_allclose(np.asarray(batched(stacked)), np.stack(one_by_one), rtol=1e-12, atol=1e-14)


@needs_native
@pytest.mark.parametrize("kind,method", [("mixture", "galerkin"), ("scale", "interpolation"),
                                         ("features", "interpolation")])
def test_a_scorer_gives_the_same_values_and_gradients_with_and_without_the_kernels(kind, method):
    model, problem = _model(kind, method), _problem(kind)
    scorer = model.scorer(np.arange(0, problem.graph.n, 5))
    theta = jnp.asarray(problem.weighting.sample(2, seed=77)[1])

    def total(t, arrays):
        return jnp.sum(jnp.sqrt(scorer.fn(t, arrays)))

    got = jax.jit(jax.value_and_grad(total))(theta, scorer.arrays)
    with native.switched_off():
        want = jax.jit(jax.value_and_grad(lambda t, a: total(t, a) + 0.0))(theta, scorer.arrays)
    np.testing.assert_allclose(float(got[0]), float(want[0]), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(got[1]), np.asarray(want[1]), rtol=1e-9, atol=1e-14)


def _softmax_per_source(problem, theta, edge_ids):
    """p_e = b_e exp(theta . phi_e) / sum over the source's out-edges, in numpy from the graph itself.

    Independent of the weighting's shifted tables: standardised features as the
    weighting's docstring defines them, and each source's log-sum-exp shifted by
    its own maximum (common practice for a stable softmax).
    """
    graph, weighting = problem.graph, problem.weighting
    standard = (graph.features - weighting.feature_center) / weighting.feature_scale
    score = np.log(graph.base) + standard @ theta
    peak = np.full(graph.n, -np.inf)
    np.maximum.at(peak, graph.src, score)
    weight = np.exp(score - peak[graph.src])
    total = np.bincount(graph.src, weights=weight, minlength=graph.n)
    return (weight / total[graph.src])[edge_ids]


@needs_native
@pytest.mark.parametrize("scale", [0.0, 0.3, 3.0, 400.0])  # 400: scores below exp's range, the rescaled branch
def test_native_feature_weights_equal_a_numpy_softmax_and_the_xla_code(scale):
    problem = _problem("features")
    weighting = problem.weighting
    rng = np.random.default_rng(int(scale * 10) + 1)
    edge_ids = np.sort(rng.choice(problem.graph.num_edges, 300, replace=False))
    tables = jax.device_put(weighting.local_tables(edge_ids))
    theta = jnp.asarray(rng.normal(size=weighting.num_params) * scale)
    got = np.asarray(jax.jit(weighting.transition)(theta, tables))
    want = _softmax_per_source(problem, np.asarray(theta), edge_ids)
    # at scale 400 the scores reach -1e3: their rounding (1e-16 of that) is the relative error of exp
    np.testing.assert_allclose(got, want, rtol=1e-12 if scale < 100 else 1e-10, atol=1e-300)
    xla = jax.jit(lambda t, x: weightings._feature_transition(t, {k: v for k, v in x.items() if k != "packed"}))
    np.testing.assert_allclose(got, np.asarray(xla(theta, tables)), rtol=1e-12 if scale < 100 else 1e-10, atol=1e-300)


@needs_native
def test_native_feature_weights_derivative_equals_autodiff_of_the_xla_code():
    problem = _problem("features")
    weighting = problem.weighting
    rng = np.random.default_rng(5)
    tables = jax.device_put(weighting.local_tables(rng.choice(problem.graph.num_edges, 200, replace=False)))
    unpacked = {k: v for k, v in tables.items() if k != "packed"}
    for theta in (weighting.sample(1, seed=3)[0], -2.0 * weighting.upper):
        got_forward = jax.jacfwd(weighting.transition)(jnp.asarray(theta), tables)
        got_reverse = jax.jacrev(weighting.transition)(jnp.asarray(theta), tables)
        want = jax.jacfwd(weighting.transition)(jnp.asarray(theta), unpacked)  # the XLA code, differentiated by JAX
        np.testing.assert_allclose(np.asarray(got_forward), np.asarray(want), rtol=1e-10, atol=1e-14)
        np.testing.assert_allclose(np.asarray(got_reverse), np.asarray(want), rtol=1e-10, atol=1e-14)


@needs_native
def test_a_regional_feature_model_gives_the_same_values_and_gradients_with_and_without_the_kernels():
    # its stacked, padded tables reach the kernel whole, with the region's index
    problem = _problem("features")
    model = build_model(problem, ReductionSettings(method="interpolation", samples=48, regions=3, rank=8),
                        progress=False)
    scorer = model.scorer(np.arange(0, problem.graph.n, 7))
    thetas = problem.weighting.sample(6, seed=91)
    assert len({model.region_of(theta) for theta in thetas}) >= 2

    def total(t, arrays):
        return jnp.sum(jnp.sqrt(scorer.fn(t, arrays)))

    got_fn = jax.jit(jax.value_and_grad(total))
    with native.switched_off():
        want_fn = jax.jit(jax.value_and_grad(lambda t, a: total(t, a) + 0.0))
        want_fn(jnp.asarray(thetas[0]), scorer.arrays)  # traced here, without the kernels
    for theta in thetas:
        got, want = got_fn(jnp.asarray(theta), scorer.arrays), want_fn(jnp.asarray(theta), scorer.arrays)
        np.testing.assert_allclose(float(got[0]), float(want[0]), rtol=1e-12)
        np.testing.assert_allclose(np.asarray(got[1]), np.asarray(want[1]), rtol=1e-9, atol=1e-14)


def test_a_changed_source_gets_another_library_file(tmp_path, monkeypatch):
    copy = tmp_path / "kernels.cc"
    copy.write_bytes(native.SOURCE.read_bytes())
    monkeypatch.setattr(native, "SOURCE", copy)
    before = native.library_path()
    copy.write_bytes(native.SOURCE.read_bytes() + b"\n// changed\n")
    assert native.library_path() != before and native.library_path().parent == tmp_path


def test_building_without_a_compiler_says_so_and_exits_zero():
    env = dict(os.environ, CXX="no-such-compiler-anywhere")
    done = subprocess.run([sys.executable, "-m", "fitrank.native"], capture_output=True, text=True, env=env)
    assert done.returncode == 0
    assert done.stderr.strip() == ("fitrank.native: not built: no C++ compiler found (set CXX); "
                                   "the online solves will use XLA's code")
