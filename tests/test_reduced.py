"""Reduced models against full solves, scipy's pivoted QR and finite differences."""

from __future__ import annotations

import functools
from concurrent.futures import Executor, ThreadPoolExecutor

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg
from scipy.stats import kendalltau

from fitrank.basis import extend_basis, pod_basis, snapshot_gram
from fitrank.errors import FitrankInputError, ModelMismatchError
from fitrank.galerkin import solve_once
from fitrank import interpolation
from fitrank.interpolation import (RowChoice, _local_least_squares, choose_rows, constrained_least_squares,
                                   interpolation_arrays, select_rows, source_layout)
from fitrank.pagerank import PageRankProblem
from fitrank.reduced import ReductionSettings, build_reduced_model, enrich, load_reduced_model
from fitrank.snapshots import solve_snapshots
from fitrank.weightings import make_weighting, row_cost

from tests._datasets import generated

CASES = [("mixture", "galerkin"), ("mixture", "interpolation"), ("scale", "interpolation"),
         ("features", "interpolation")]


@functools.lru_cache(maxsize=None)
def _problem(kind: str) -> PageRankProblem:
    dataset, _, _ = generated(kind)
    return PageRankProblem(dataset.graph, make_weighting(kind, dataset.graph))


@functools.lru_cache(maxsize=None)
def _model(kind: str, method: str):
    return build_reduced_model(_problem(kind), ReductionSettings(method=method, samples=128, max_rank=100),
                               progress=False)


@functools.lru_cache(maxsize=None)
def _fresh(kind: str, count: int = 12):
    """Fresh parameter points (another seed than the model's samples) and their full solutions."""
    problem = _problem(kind)
    thetas = problem.weighting.sample(count, seed=424242)
    return thetas, [problem.solve(theta, tol=1e-12).x for theta in thetas]


def _top_metrics(x, y, k=100):
    top = np.argsort(-x)[:k]
    # Kendall tau by the general-purpose reference implementation (scipy.stats.kendalltau).
    tau = kendalltau(x[top], y[top]).statistic
    return tau, np.abs(x[top] - y[top]).sum() / x[top].sum()


@pytest.mark.parametrize("kind,method", CASES)
def test_reduced_matches_full_solves_at_fresh_points(kind, method):
    model = _model(kind, method)
    assert model.rank <= 100
    thetas, exact = _fresh(kind)
    for theta, x in zip(thetas, exact):
        y = model.vector(theta)
        tau, l1 = _top_metrics(x, y)
        assert tau >= 0.999, (kind, method, tau)
        assert l1 <= 1e-3, (kind, method, l1)
        # normalisation is an exact constraint of the reduced solve
        assert abs(y.sum() - 1.0) <= 1e-12
        # the certified bound (||M^-1||_1 <= 1/(1-alpha)) holds for the true error
        assert np.abs(x - y).sum() <= model.certified_bound(theta, y) * (1 + 1e-9) + 1e-15


def test_galerkin_with_full_snapshot_basis_reproduces_a_snapshot():
    problem = _problem("mixture")
    settings = ReductionSettings(method="galerkin", samples=24, rank=24, energy=0.0, snapshot_tol=1e-13)
    model = build_reduced_model(problem, settings, progress=False)
    assert model.rank == 24
    theta = model.thetas[5]
    x = problem.solve(theta, tol=1e-13).x
    assert np.abs(model.vector(theta) - x).sum() <= 1e-10


def test_cost_free_row_choice_equals_scipy_pivoted_qr():
    # Businger-Golub column pivoting as implemented by LAPACK geqp3 (scipy.linalg.qr, pivoting=True)
    rng = np.random.default_rng(3)
    stacked = rng.normal(size=(400, 30)) * rng.pareto(1.5, size=(400, 1))
    choice = select_rows(stacked, 30, pool_size=16)  # a small pool exercises the lazy growth
    _, _, pivots = scipy.linalg.qr(stacked.T, pivoting=True, mode="economic")
    np.testing.assert_array_equal(choice.rows, pivots[:30])
    assert choice.candidates_scored < 400


def test_cost_aware_choice_honours_budget_and_prefers_cheap_rows():
    problem = _problem("features")
    model = _model("features", "interpolation")
    cost = row_cost(problem.graph, problem.weighting)
    stacked = problem.operator(problem.weighting.theta0).apply(model.basis.vectors)
    plain = select_rows(stacked, 60)
    budget = 0.3 * cost[plain.rows].sum()
    frugal = select_rows(stacked, 60, cost=cost, gamma=0.05, budget=budget)
    assert isinstance(frugal, RowChoice)
    assert cost[frugal.rows].sum() <= budget
    assert cost[frugal.rows].mean() < cost[plain.rows].mean()


def test_row_choice_stops_when_rank_is_exhausted():
    rng = np.random.default_rng(4)
    low_rank = rng.normal(size=(200, 5)) @ rng.normal(size=(5, 12))
    assert select_rows(low_rank, 10).rows.size == 5


@pytest.mark.slow
@pytest.mark.parametrize("kind,method", CASES)
def test_reduced_score_gradients_match_finite_differences(kind, method):
    model = _model(kind, method)
    nodes = np.arange(0, model.problem.graph.n, 37)
    scorer = model.scorer(nodes)
    weights = np.random.default_rng(5).normal(size=nodes.size)

    def objective(theta, arrays):
        return jnp.dot(weights, jnp.log(scorer.fn(theta, arrays)))

    value = jax.jit(objective)
    grad = jax.jit(jax.grad(objective))
    theta = model.problem.weighting.sample(3, seed=77)[2]
    g = np.asarray(grad(jnp.asarray(theta), scorer.arrays))
    step = 1e-6
    fd = np.array([
        (value(jnp.asarray(theta + step * e), scorer.arrays) - value(jnp.asarray(theta - step * e), scorer.arrays))
        / (2 * step)
        for e in np.eye(theta.size)
    ])
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-8 * np.abs(fd).max())
    # the scorer reads only its nodes and agrees with the full reduced vector there
    np.testing.assert_allclose(np.asarray(scorer.fn(jnp.asarray(theta), scorer.arrays)),
                               model.vector(theta)[nodes], rtol=1e-10, atol=1e-15)


def test_save_load_round_trip_and_fingerprint_refusal(tmp_path):
    model = _model("scale", "interpolation")
    path = model.save(tmp_path / "model.npz")
    loaded = load_reduced_model(path, model.problem)
    theta = model.problem.weighting.sample(2, seed=9)[1]
    np.testing.assert_allclose(loaded.vector(theta), model.vector(theta), rtol=0, atol=1e-14)
    np.testing.assert_array_equal(loaded.rows, model.rows)
    other = PageRankProblem(model.problem.graph, model.problem.weighting, damping=0.8)
    with pytest.raises(ModelMismatchError, match="built for other data"):
        load_reduced_model(path, other)
    with pytest.raises(FitrankInputError, match="not a readable"):
        load_reduced_model(tmp_path / "missing.npz", model.problem)


def test_snapshots_on_an_executor_equal_serial_ones():
    problem = _problem("scale")
    thetas = problem.weighting.sample(20, seed=1)
    serial = solve_snapshots(problem, thetas, progress=False)
    # the same chunks whatever the executor and its size: the same warm starts, the same bits
    for workers in (2, 3):
        with ThreadPoolExecutor(max_workers=workers) as pool:
            np.testing.assert_array_equal(solve_snapshots(problem, thetas, executor=pool, progress=False), serial)
    # other chunks warm-start otherwise: equal within the solves' tolerance, not to the bit
    with ThreadPoolExecutor(max_workers=2) as pool:
        parallel = solve_snapshots(problem, thetas, executor=pool, chunk_size=2, progress=False)
    np.testing.assert_allclose(parallel, serial, rtol=0, atol=1e-12)


class _CountingExecutor(Executor):
    """An executor that, like Dask's, does not say how many workers it has, and counts its tasks."""

    def __init__(self):
        self.pool, self.tasks = ThreadPoolExecutor(max_workers=2), 0

    def submit(self, fn, /, *args, **kwargs):
        self.tasks += 1
        return self.pool.submit(fn, *args, **kwargs)

    def shutdown(self, wait=True, **kwargs):
        self.pool.shutdown(wait=wait)


def test_an_executor_that_hides_its_size_still_gets_many_tasks():
    problem = _problem("scale")
    with _CountingExecutor() as pool:
        solve_snapshots(problem, problem.weighting.sample(40, seed=3), executor=pool, progress=False)
    assert pool.tasks == 5  # 40 solves in chunks of 8


def test_method_of_snapshots_from_memmap_equals_svd(tmp_path):
    problem = _problem("scale")
    thetas = problem.weighting.sample(20, seed=2)
    stored = np.lib.format.open_memmap(tmp_path / "x.npy", mode="w+", dtype=np.float64,
                                       shape=(problem.graph.n, 20))
    solve_snapshots(problem, thetas, out=stored, progress=False)
    dense = pod_basis(np.asarray(stored), rank=8, method="svd")
    streamed = pod_basis(stored, rank=8, method="gram", block_rows=300)
    np.testing.assert_allclose(streamed.singular_values[:8], dense.singular_values[:8], rtol=1e-8)
    # same subspace: the projector difference is tiny
    diff = streamed.vectors @ streamed.vectors.T - dense.vectors @ dense.vectors.T
    assert np.abs(diff).max() < 1e-7
    # a subset of the columns, from a Gram matrix of all of them formed once (what regions share)
    columns = np.array([0, 3, 4, 7, 8, 11, 15, 16, 19])
    subset = pod_basis(stored, rank=5, method="gram", block_rows=300, columns=columns, gram=snapshot_gram(stored))
    reference = pod_basis(np.asarray(stored)[:, columns], rank=5, method="svd")
    np.testing.assert_allclose(subset.singular_values[:5], reference.singular_values[:5], rtol=1e-8)
    diff = subset.vectors @ subset.vectors.T - reference.vectors @ reference.vectors.T
    assert np.abs(diff).max() < 1e-7


def test_energy_rule_and_basis_extension():
    rng = np.random.default_rng(6)
    snapshots = rng.normal(size=(300, 40)) @ np.diag(0.5 ** np.arange(40)) @ rng.normal(size=(40, 40))
    basis = pod_basis(snapshots, energy=1e-6)
    s2 = basis.singular_values**2
    assert 1 - s2[:basis.rank].sum() / s2.sum() <= 1e-6 < 1 - s2[:basis.rank - 1].sum() / s2.sum()
    new = rng.normal(size=(300, 1))
    grown = extend_basis(basis, new, rank=basis.rank + 1)
    # the new vector is in the span of the extended basis
    residual = new - grown.vectors @ (grown.vectors.T @ new)
    assert np.linalg.norm(residual) < 1e-10 * np.linalg.norm(new)


def test_extend_basis_by_energy_keeps_a_new_direction_however_small():
    # Enrichment adds a snapshot the basis misses; under the energy rule that missing part
    # can carry far less than the energy tolerance of all snapshots together, and must
    # still be kept, or enrichment changes nothing.
    rng = np.random.default_rng(8)
    old = rng.normal(size=(300, 40)) @ np.diag(np.logspace(0, -3, 40)) @ rng.normal(size=(40, 60))
    basis = pod_basis(old, energy=1e-10)
    inside = basis.vectors @ rng.normal(size=basis.rank)
    outside = rng.normal(size=300)
    outside -= basis.vectors @ (basis.vectors.T @ outside)
    new = (inside + 1e-7 * np.linalg.norm(inside) * outside / np.linalg.norm(outside))[:, None]
    grown = extend_basis(basis, new, energy=1e-10)
    assert grown.rank == basis.rank + 1
    residual = new - grown.vectors @ (grown.vectors.T @ new)
    assert np.linalg.norm(residual) < 1e-12 * np.linalg.norm(new)
    # a vector already in the span adds nothing
    assert extend_basis(basis, inside[:, None], energy=1e-10).rank == basis.rank


def test_a_fixed_rank_stops_at_the_numerically_independent_directions():
    # Snapshots that span 3 directions (as when a parameter does not change the walk):
    # asking for 10 must not pad the basis with rounding noise, on either POD path.
    rng = np.random.default_rng(9)
    snapshots = rng.normal(size=(200, 3)) @ rng.normal(size=(3, 12))
    for method in ("svd", "gram"):
        basis = pod_basis(snapshots, rank=10, method=method)
        assert basis.rank == 3, method
        residual = snapshots - basis.vectors @ (basis.vectors.T @ snapshots)
        assert np.abs(residual).max() < 1e-10 * np.abs(snapshots).max()


def test_enrichment_repairs_a_too_small_basis():
    problem = _problem("scale")
    small = build_reduced_model(problem, ReductionSettings(samples=8, rank=4, rows=12), progress=False)
    theta = problem.weighting.sample(5, seed=1234)[4]
    x = problem.solve(theta, tol=1e-12).x
    before = np.abs(small.vector(theta) - x).sum()
    better = enrich(small, theta[None, :])
    after = np.abs(better.vector(theta) - x).sum()
    assert better.rank == small.rank + 1
    assert after < 1e-8 < before


def test_galerkin_refused_for_non_affine_weighting():
    with pytest.raises(FitrankInputError, match="affine"):
        build_reduced_model(_problem("scale"), ReductionSettings(method="galerkin", samples=4), progress=False)


@pytest.mark.slow
def test_snapshots_on_local_processes_and_on_a_dask_executor():
    # the offline stage takes any concurrent.futures.Executor: local processes and Dask's alike
    distributed = pytest.importorskip("distributed")
    from fitrank.snapshots import local_executor

    problem = _problem("mixture")
    thetas = problem.weighting.sample(4, seed=3)
    serial = solve_snapshots(problem, thetas, progress=False)
    with local_executor(2) as pool:
        in_processes = solve_snapshots(problem, thetas, executor=pool, progress=False)
    np.testing.assert_allclose(in_processes, serial, rtol=0, atol=1e-12)
    with distributed.Client(processes=False, n_workers=1, threads_per_worker=2, dashboard_address=None) as client:
        on_dask = solve_snapshots(problem, thetas, executor=client.get_executor(), progress=False)
    np.testing.assert_allclose(on_dask, serial, rtol=0, atol=1e-12)


def test_constrained_least_squares_matches_the_dense_kkt_solve_and_finite_differences():
    # Reference: the KKT system of equality-constrained least squares (Golub & Van Loan,
    # "Matrix Computations", 4th ed., sec. 6.2), assembled densely and solved by numpy:
    # [[B^T B, u], [u^T, 0]] [c; mu] = [B^T f; 1]. Columns of very different scales test
    # the equilibration.
    rng = np.random.default_rng(3)
    r, k = 40, 12
    matrix = rng.normal(size=(r, k)) * np.logspace(-3, 2, k)
    rhs, sums = rng.normal(size=r), rng.uniform(0.5, 2.0, size=k)
    kkt = np.block([[matrix.T @ matrix, sums[:, None]], [sums[None, :], np.zeros((1, 1))]])
    expected = np.linalg.solve(kkt, np.concatenate([matrix.T @ rhs, [1.0]]))[:k]
    got = np.asarray(jax.jit(constrained_least_squares)(matrix, rhs, sums))
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12)
    assert abs(sums @ got - 1.0) < 1e-12

    # Implicit derivative against central differences of the reference solve.
    probe = rng.normal(size=k)
    grad = jax.grad(lambda m: probe @ constrained_least_squares(m, rhs, sums))(jnp.asarray(matrix))
    i, j, h = 5, 7, 1e-6 * abs(matrix[5, 7])
    plus, minus = matrix.copy(), matrix.copy()
    plus[i, j] += h
    minus[i, j] -= h

    def reference(m):
        system = np.block([[m.T @ m, sums[:, None]], [sums[None, :], np.zeros((1, 1))]])
        return probe @ np.linalg.solve(system, np.concatenate([m.T @ rhs, [1.0]]))[:k]

    fd = (reference(plus) - reference(minus)) / (2 * h)
    assert abs(float(grad[i, j]) - fd) <= 1e-6 * max(1.0, abs(fd))


def test_solve_once_matches_lapack_and_its_derivatives_match_finite_differences():
    # Reference: scipy.linalg.solve (LAPACK gesv) on a matrix whose small diagonal forces row
    # swaps, so the augmented-matrix factorisation must carry the pivots into the right-hand side.
    rng = np.random.default_rng(11)
    k = 25
    matrix = rng.normal(size=(k, k)) + np.diag(np.full(k, 1e-3))
    rhs = rng.normal(size=k)
    expected = scipy.linalg.solve(matrix, rhs)
    got = np.asarray(jax.jit(solve_once)(matrix, rhs))
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12 * np.abs(expected).max())

    # Reverse mode (the transpose of the custom JVP) against central differences of LAPACK's solve.
    probe = rng.normal(size=k)
    grad_matrix, grad_rhs = jax.grad(lambda m, b: probe @ solve_once(m, b), argnums=(0, 1))(matrix, rhs)
    for (i, j) in ((3, 7), (0, 0), (k - 1, 2)):
        h = 1e-6
        plus, minus = matrix.copy(), matrix.copy()
        plus[i, j] += h
        minus[i, j] -= h
        fd = probe @ (scipy.linalg.solve(plus, rhs) - scipy.linalg.solve(minus, rhs)) / (2 * h)
        assert abs(float(grad_matrix[i, j]) - fd) <= 1e-6 * max(1.0, abs(fd))
    # d/d rhs of probe . A^-1 rhs is A^-T probe exactly
    np.testing.assert_allclose(np.asarray(grad_rhs), scipy.linalg.solve(matrix.T, probe), rtol=1e-9)


def test_local_solve_derivatives_match_finite_differences_of_the_dense_system():
    # The interpolation solve has its own derivative rule, applied edge by edge. Reference:
    # the same local system assembled densely (B = U_I - alpha (P_I U_S + leak)) and solved
    # through its KKT matrix by numpy (Golub & Van Loan, "Matrix Computations", 4th ed.,
    # sec. 6.2), differentiated by central differences along a random direction; both
    # forward (jvp) and reverse (grad) mode, and a leak term that depends on the parameters.
    rng = np.random.default_rng(11)
    r, s, k, edges, alpha = 30, 25, 8, 70, 0.85
    row = np.sort(rng.integers(0, r, size=edges))
    slot = rng.integers(0, s, size=edges)
    arrays = {"basis_rows": rng.normal(size=(r, k)), "basis_sources": rng.normal(size=(s, k)),
              "slot": slot, "row": row, "indptr": np.searchsorted(row, np.arange(r + 1)),
              "teleport_rows": rng.uniform(0.5, 1.5, size=r), "sums": rng.uniform(0.5, 2.0, size=k)}
    p, leak = rng.uniform(0.1, 1.0, size=edges), 0.1 * rng.normal(size=(r, k))

    def reference(p, leak):
        walk = np.zeros((r, s))
        np.add.at(walk, (row, slot), p)
        matrix = arrays["basis_rows"] - alpha * (walk @ arrays["basis_sources"] + leak)
        kkt = np.block([[matrix.T @ matrix, arrays["sums"][:, None]], [arrays["sums"][None, :], np.zeros((1, 1))]])
        return np.linalg.solve(kkt, np.concatenate([matrix.T @ ((1 - alpha) * arrays["teleport_rows"]), [1.0]]))[:k]

    device = jax.device_put(arrays)
    solve = jax.jit(lambda p, leak: _local_least_squares(p, leak, device, alpha))
    np.testing.assert_allclose(np.asarray(solve(p, leak)), reference(p, leak), rtol=1e-9, atol=1e-12)

    d_p, d_leak, h = rng.normal(size=edges), rng.normal(size=(r, k)), 1e-6
    fd = (reference(p + h * d_p, leak + h * d_leak) - reference(p - h * d_p, leak - h * d_leak)) / (2 * h)
    _, tangent = jax.jvp(solve, (jnp.asarray(p), jnp.asarray(leak)), (jnp.asarray(d_p), jnp.asarray(d_leak)))
    np.testing.assert_allclose(np.asarray(tangent), fd, rtol=1e-6, atol=1e-8 * np.abs(fd).max())
    probe = rng.normal(size=k)
    g_p, g_leak = jax.grad(lambda p, leak: probe @ solve(p, leak), argnums=(0, 1))(jnp.asarray(p), jnp.asarray(leak))
    directional = float(np.asarray(g_p) @ d_p + np.sum(np.asarray(g_leak) * d_leak))
    assert abs(directional - probe @ fd) <= 1e-6 * max(1.0, abs(probe @ fd))


def test_both_layouts_of_the_sources_rows_give_the_same_solve(monkeypatch):
    # U's rows at the in-edges' sources are stored in edge order (few repeated sources) or once
    # per distinct source (many): the same sparse product either way, so the coefficients must
    # agree to round-off (the check is exact agreement of two layouts, common practice).
    few = np.array([4, 2, 9, 4, 5, 3, 8, 1])  # one repeat in eight: edge order
    sources, slot = source_layout(few)
    np.testing.assert_array_equal(sources[slot], few)
    assert sources.size == few.size
    many = np.array([4, 4, 4, 2, 4, 2, 4, 4])  # hubs' shared sources (4x): one row per source
    sources, slot = source_layout(many)
    np.testing.assert_array_equal(sources[slot], many)
    np.testing.assert_array_equal(sources, [2, 4])

    problem, model = _problem("scale"), _model("scale", "interpolation")
    thetas, _ = _fresh("scale")
    monkeypatch.setattr(interpolation, "EDGE_ORDER_LIMIT", np.inf)
    edge_order, _ = interpolation_arrays(problem, model.basis.vectors, model.rows)
    monkeypatch.setattr(interpolation, "EDGE_ORDER_LIMIT", 0.0)
    distinct, _ = interpolation_arrays(problem, model.basis.vectors, model.rows)
    assert edge_order["basis_sources"].shape[0] == edge_order["slot"].size > distinct["basis_sources"].shape[0]
    solve = jax.jit(model.coefficient_fn)
    for theta in thetas[:4]:
        np.testing.assert_allclose(np.asarray(solve(jnp.asarray(theta), jax.device_put(edge_order))),
                                   np.asarray(solve(jnp.asarray(theta), jax.device_put(distinct))),
                                   rtol=1e-12, atol=1e-15)


def test_scorer_differences_equal_differences_of_scores():
    model = _model("scale", "interpolation")
    problem = _problem("scale")
    nodes = np.arange(0, problem.graph.n, 7)
    scorer = model.scorer(nodes)
    rng = np.random.default_rng(4)
    first, second = rng.integers(0, nodes.size, 50), rng.integers(0, nodes.size, 50)
    margins = scorer.differences(first, second, scale=3.0)
    theta = jnp.asarray(problem.weighting.sample(3, seed=99)[2])
    x = np.asarray(jax.jit(scorer.fn)(theta, scorer.arrays))
    got = np.asarray(jax.jit(margins.fn)(theta, margins.arrays))
    np.testing.assert_allclose(got, 3.0 * (x[first] - x[second]), rtol=1e-12, atol=1e-15)


@pytest.mark.slow
@pytest.mark.parametrize("kind,method", [("mixture", "galerkin"), ("features", "interpolation")])
def test_a_float32_scorer_gives_the_float64_values_within_float32_rounding(kind, method):
    model = _model(kind, method)
    nodes = np.arange(3, model.problem.graph.n, 11)
    wide, narrow = model.scorer(nodes), model.scorer(nodes, dtype="float32")
    assert narrow.fn is wide.fn and narrow.arrays["readout"].dtype == np.float32
    values = jax.jit(wide.fn)
    readout = model.basis.vectors[nodes]
    for theta in _fresh(kind)[0][:3]:
        point = jnp.asarray(theta)
        x64, x32 = np.asarray(values(point, wide.arrays)), np.asarray(values(point, narrow.arrays))
        assert x32.dtype == np.float32
        # Rounding c and U to float32 and summing k products in float32: |error| <= (k + 2) u sum_i |c_i U_ji|,
        # u = 2^-24 (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., sec. 3.1).
        magnitude = np.abs(readout) @ np.abs(model.coefficients(theta))
        assert np.all(np.abs(x32 - x64) <= (model.rank + 2) * 2.0 ** -24 * magnitude)
        assert np.abs(x32 - x64).max() <= 1e-5 * np.abs(x64).max()

    def objective(theta, arrays):
        return jnp.sum(jnp.log(wide.fn(theta, arrays).astype(jnp.float64)))

    theta = jnp.asarray(_fresh(kind)[0][0])
    gradient = jax.jit(jax.grad(objective))
    np.testing.assert_allclose(np.asarray(gradient(theta, narrow.arrays)), np.asarray(gradient(theta, wide.arrays)),
                               rtol=1e-3, atol=1e-6)
    margins = narrow.differences(np.arange(5), np.arange(5, 10), scale=2.0)
    assert margins.arrays["readout"].dtype == np.float32


@pytest.mark.parametrize("dtype", ["int32", np.float16, "complex128", "no-such-type"])
def test_a_scorer_refuses_a_readout_dtype_other_than_float64_or_float32(dtype):
    with pytest.raises(ValueError, match="float64 or float32"):
        _model("scale", "interpolation").scorer(np.arange(4), dtype=dtype)


def test_scorers_of_one_model_share_one_function():
    # Sweeps and the explorer build many scorers on one model; jit caches compiled programs
    # by function and shapes, so scorers of equal-sized node sets must share the function.
    model = _model("scale", "interpolation")
    n = model.problem.graph.n
    nodes = [np.arange(start, n, 5)[:40] for start in (0, 1)]
    first, second = (model.scorer(chosen) for chosen in nodes)
    assert first.fn is second.fn
    values = jax.jit(first.fn)
    theta = jnp.asarray(model.problem.weighting.theta0)
    for scorer, chosen in zip((first, second), nodes):
        np.testing.assert_allclose(np.asarray(values(theta, scorer.arrays)), model.vector(theta)[chosen],
                                   rtol=1e-10, atol=1e-15)


def test_a_budget_too_small_for_k_rows_says_what_helps_and_the_advice_holds():
    problem = _problem("features")
    with pytest.raises(FitrankInputError, match=r"edge_budget = 200; raise it, raise reduction.gamma"):
        build_reduced_model(problem, ReductionSettings(samples=12, rank=8, edge_budget=200, gamma=0.0),
                            progress=False)
    # the advice: a larger gamma ranks cheap rows first, so more of them fit the same budget
    vectors = np.linalg.qr(solve_snapshots(problem, problem.weighting.sample(12), progress=False))[0][:, :8]
    fitted = [choose_rows(problem, vectors, 16, gamma=gamma, budget=200).rows.size for gamma in (0.0, 16.0)]
    assert fitted[1] > fitted[0], fitted  # 4 and 12 rows when written


def test_a_snapshot_file_the_file_system_refuses_is_one_line(tmp_path, monkeypatch):
    from fitrank.reduced import sample_and_solve

    def refuse(*args, **kwargs):
        raise PermissionError(1, "Operation not permitted")

    monkeypatch.setattr(np.lib.format, "open_memmap", refuse)  # as an immutable file does (CI runs as root)
    path = tmp_path / "snapshots.npy"
    with pytest.raises(FitrankInputError) as error:
        sample_and_solve(_problem("scale"), ReductionSettings(samples=4, snapshot_path=str(path)), progress=False)
    message = str(error.value)
    assert "\n" not in message and message.startswith(f"{path}: cannot be written (Operation not permitted)")
    assert "reduction.snapshot_file" in message
