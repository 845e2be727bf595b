"""DEIM-style interpolation: enforce the PageRank equations at a few rows only.

With x = U c, choose r >= k rows I and solve, in least squares with the
normalisation as an exact constraint,

    min_c || (M(theta) U)_I c - (1 - alpha) v_I ||_2   s.t.  (1^T U) c = 1.

Forming (M(theta) U)_I needs only the in-edges of I (and, without a
closed-form out-weight, the out-edges of their sources): the *local subgraph*,
extracted once offline. The small constrained problem is solved by one
Cholesky factorisation of its equilibrated normal matrix and the Schur
complement of the constraint (:func:`constrained_least_squares`; one call
into BLAS and LAPACK when :mod:`fitrank.native` is built). Its
derivative is written out (implicit differentiation of the KKT system, edge by
edge for the local subgraph), so a gradient costs about one more solve instead
of autodiff's passes through B^T B and the sparse product; an SVD-based solve
would also have fragile gradients at repeated singular values.

Rows are picked by greedy pivoted QR on the rows of Z = [M(theta_1) U, ...,
M(theta_q) U] (the Businger-Golub pivoting behind DEIM). The cost-aware variant
scores a candidate by its residual norm / (1 + gamma * cost / mean cost) and can honour a
budget of touched edges. The greedy search is exact but lazy: a candidate's
initial score bounds all its later ones, so only a pool of the best-bounded
rows is ever updated, and it grows only when an outside row could still win.

References:
  Businger & Golub, "Linear least squares solutions by Householder
  transformations", Numer. Math. 7, 1965 (column pivoting); Chaturantabut &
  Sorensen, "Nonlinear model reduction via discrete empirical
  interpolation", SIAM J. Sci. Comput. 32(5), 2010 (DEIM); Drmac & Gugercin,
  "A new selection operator for the discrete empirical interpolation method",
  SIAM J. Sci. Comput. 38(2), 2016 (pivoted-QR selection).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import jax
import jax.scipy.linalg
import jax.numpy as jnp
import numpy as np
from jax.experimental import sparse

from fitrank import native
from fitrank.pagerank import PageRankProblem
from fitrank.weightings import row_cost


@dataclass(frozen=True)
class RowChoice:
    """Rows picked for interpolation.

    Attributes:
      rows: (r,) node indices, in the order picked.
      scores: (r,) the residual norm of each row when it was picked.
      cost: (r,) edges each row needs on its own.
      candidates_scored: how many rows the lazy search ever updated (of n).
    """

    rows: np.ndarray
    scores: np.ndarray
    cost: np.ndarray
    candidates_scored: int


def select_rows(
    stacked: np.ndarray,
    count: int,
    *,
    cost: np.ndarray | None = None,
    gamma: float = 0.0,
    budget: float | None = None,
    pool_size: int | None = None,
) -> RowChoice:
    """Greedy pivoted QR on the rows of ``stacked``, optionally cost-aware.

    Without cost (gamma = 0, no budget) the rows are the first ``count`` column
    pivots of ``scipy.linalg.qr(stacked.T, pivoting=True)``.

    Args:
      stacked: (n, c) matrix whose rows are candidates (c >= count for ``count`` rows).
      count: number of rows r to pick.
      cost: (n,) non-negative cost of each row (edges it needs); default zeros.
      gamma: cost weight; a row's score is residual_norm / (1 + gamma * cost / mean(cost)),
        so with gamma = 1 a row of average cost must be twice as informative as a free one.
      budget: total cost allowed; rows that would exceed it are skipped.
      pool_size: rows added to the lazily updated pool at a time (default max(4r, 1024)).

    Returns:
      :class:`RowChoice`; fewer than ``count`` rows when the residual vanishes
      (rank exhausted) or the budget allows no more.
    """
    stacked = np.asarray(stacked, dtype=np.float64)
    n, width = stacked.shape
    cost = np.zeros(n) if cost is None else np.asarray(cost, dtype=np.float64)
    # gamma is in units of the average row's cost, so one value suits graphs of any density
    penalty = 1.0 + gamma * cost / max(cost.mean(), 1e-300)
    norm2 = np.einsum("ij,ij->i", stacked, stacked)
    bound = np.sqrt(norm2) / penalty  # a row's score can only fall as directions are removed
    order = np.argsort(-bound, kind="stable")
    chunk = pool_size or max(4 * count, 1024)
    directions = np.empty((0, width))
    pool = np.empty(0, dtype=np.int64)
    lost = np.empty(0)  # squared norm already projected away, per pool row
    alive = np.empty(0, dtype=bool)
    spent, picked, picked_scores = 0.0, [], []
    tiny = 1e-13 * np.sqrt(norm2.max(initial=0.0))
    while len(picked) < count:
        while True:
            residual = np.sqrt(np.clip(norm2[pool] - lost, 0.0, None))
            score = np.where(alive, residual / penalty[pool], -np.inf)
            best = int(np.argmax(score)) if pool.size else -1
            best_score = score[best] if pool.size else -np.inf
            outside = bound[order[pool.size]] if pool.size < n else -np.inf
            if best_score >= outside or pool.size == n:
                break
            new = order[pool.size:pool.size + chunk]
            proj = stacked[new] @ directions.T
            pool = np.concatenate([pool, new])
            lost = np.concatenate([lost, np.einsum("ij,ij->i", proj, proj)])
            ok = np.ones(new.size, dtype=bool) if budget is None else cost[new] <= budget - spent
            alive = np.concatenate([alive, ok])
        if best < 0 or not best_score > tiny / penalty.max():
            break  # no eligible row left, or the residual has vanished (rank exhausted)
        row = pool[best]
        vec = stacked[row].copy()
        for _ in range(2):  # Gram-Schmidt twice: orthogonal to working precision
            vec -= directions.T @ (directions @ vec)
        size = np.linalg.norm(vec)
        if size <= tiny:
            # the estimate came from cancellation; record the true residual and retry
            lost[best] = norm2[row] - size**2
            alive[best] = size > tiny and alive[best]
            if not alive.any() and pool.size == n:
                break
            continue
        direction = vec / size
        directions = np.vstack([directions, direction])
        proj = stacked[pool] @ direction
        lost += proj**2
        alive[best] = False
        picked.append(row)
        picked_scores.append(size)
        spent += cost[row]
        if budget is not None:
            alive &= cost[pool] <= budget - spent
    rows = np.asarray(picked, dtype=np.int64)
    return RowChoice(rows, np.asarray(picked_scores), cost[rows] if rows.size else np.zeros(0), int(pool.size))


def probe_matrix(problem: PageRankProblem, vectors: np.ndarray, thetas: np.ndarray) -> np.ndarray:
    """(n, q k) the stacked products [M(theta_1) U, ..., M(theta_q) U]."""
    return np.hstack([problem.operator(theta).apply(vectors) for theta in thetas])


# U's rows are stored once per in-edge unless that holds more than this many times the distinct sources
EDGE_ORDER_LIMIT = 1.25


def source_layout(edge_sources: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which rows of U the local sparse product reads, and each edge's slot among them.

    In edge order (a row per in-edge, slots 0, 1, ...) the product reads U's
    rows front to back, which the hardware prefetches; through the distinct
    sources it jumps between rows, and a model whose arrays are out of cache
    (a regional model going from region to region) paid for every jump:
    0.41 against 0.36 ms a call (medians of 15 rounds side by side, scale
    weighting, 12 regions, k = 50). Edge order repeats the row of a source
    with several chosen out-neighbours, so it is used only while that costs at
    most ``EDGE_ORDER_LIMIT`` times the rows: rows chosen without a cost weight
    are hubs whose in-neighbours overlap (2.3 edges per source at 2M edges).

    Args:
      edge_sources: (E,) the source of each local in-edge, grouped by row.

    Returns:
      (sources (s,), slot (E,)) with ``sources[slot] == edge_sources``.
    """
    sources, slot = np.unique(edge_sources, return_inverse=True)
    if edge_sources.size <= EDGE_ORDER_LIMIT * sources.size:
        return edge_sources, np.arange(edge_sources.size, dtype=np.int64)
    return sources, slot.astype(np.int64)


def interpolation_arrays(problem: PageRankProblem, vectors: np.ndarray, rows: np.ndarray) -> tuple[dict, int]:
    """Offline arrays of the interpolation solve at ``rows``.

    Args:
      problem: the full problem.
      vectors: (n, k) basis U.
      rows: (r,) node indices I.

    Returns:
      (arrays, edges_touched): the pytree :func:`interpolation_coefficients`
      reads, and how many edges of the graph it holds.
    """
    graph, weighting = problem.graph, problem.weighting
    arrays = {
        "basis_rows": vectors[rows],
        "teleport_rows": problem.teleport[rows],
        "sums": vectors.sum(axis=0),
    }
    if weighting.affine:
        from fitrank.galerkin import affine_operator_terms

        arrays["terms"] = affine_operator_terms(problem, vectors)[:, rows, :]
        return arrays, 0
    edge_ids, target_pos = problem.graph.in_edges_of(rows)
    sources, slot = source_layout(graph.src[edge_ids])
    tables = weighting.local_tables(edge_ids)
    arrays.update({
        "tables": tables,
        "basis_sources": vectors[sources],
        "slot": slot.astype(np.int64),
        # the in-edges come grouped by target row, so (slot, indptr) is the CSR pattern of P_I
        "indptr": np.searchsorted(target_pos, np.arange(rows.size + 1)).astype(np.int64),
        "row": target_pos.astype(np.int64),
        "leak_proj": weighting.leak_basis.T @ vectors,
        "leak_rows": weighting.leak_basis[rows],
    })
    touched = int(tables["log_base"].size) if not weighting.closed_form_out_weight else int(edge_ids.size)
    return arrays, touched


def interpolation_coefficients(theta, arrays: dict, *, problem_static: tuple):
    """Online interpolation solve: c (k,) with sum(U c) = 1. Pure JAX.

    Args:
      theta: (p,) parameters.
      arrays: from :func:`interpolation_arrays`.
      problem_static: (damping, dangling, transition, leak_coefficients,
        affine_coefficients or None), bound with functools.partial.
    """
    alpha, dangling, transition, leak_coefficients, coefficients = problem_static
    if coefficients is not None:
        rows_op = jnp.einsum("t,trk->rk", coefficients(theta), arrays["terms"])
        return constrained_least_squares(rows_op, (1.0 - alpha) * arrays["teleport_rows"], arrays["sums"])
    leak = leak_coefficients(theta)
    if dangling == "teleport":
        leak_walk = jnp.outer(arrays["teleport_rows"], leak @ arrays["leak_proj"])
    else:
        leak_walk = (arrays["leak_rows"] @ leak)[:, None] * arrays["basis_rows"]
    # the model's arrays are constants of theta: derivatives flow through p and the leak only
    return _local_least_squares(transition(theta, arrays["tables"]), leak_walk, jax.lax.stop_gradient(arrays), alpha)


def _local_system(p, leak_walk, arrays, alpha):
    """(B, f): the rows I of M(theta) U, B = U_I - alpha (P_I U + leak), and f = (1 - alpha) v_I."""
    basis_rows = arrays["basis_rows"]
    # P_I U as one CSR-times-dense product: a native kernel on CPU, 2-3x faster than
    # gathering the (edges, k) rows and scatter-adding them (measured at k = 100)
    local_walk = sparse.BCSR((p, arrays["slot"], arrays["indptr"]),
                             shape=(basis_rows.shape[0], arrays["basis_sources"].shape[0]))
    matrix = basis_rows - alpha * (local_walk @ arrays["basis_sources"] + leak_walk)
    return matrix, (1.0 - alpha) * arrays["teleport_rows"]


@functools.partial(jax.custom_jvp, nondiff_argnums=(3,))
def _local_least_squares(p, leak_walk, arrays, alpha):
    """c of :func:`constrained_least_squares` on the local system, from edge values p (E,)."""
    return constrained_least_squares(*_local_system(p, leak_walk, arrays, alpha), arrays["sums"])


@_local_least_squares.defjvp
def _local_least_squares_jvp(alpha, primals, tangents):
    """The KKT derivative with dB = -alpha (P_I(dp) U + d_leak) applied edge by edge.

    dB^T rho and dB c need only U_S c and sums over the E edges, never the (E, k)
    products of every tangent direction that autodiff through the sparse
    product would form: O(E + (s + r) k) per derivative (s = rows of U_S: the
    distinct sources, or one per edge, see :func:`source_layout`). A regional
    model's U_S concatenates all regions' (s much larger than E): there the
    edges' rows of U_S are gathered once instead, O(E k).
    """
    p, leak_walk, arrays = primals
    d_p, d_leak, _ = tangents
    matrix, rhs = _local_system(p, leak_walk, arrays, alpha)
    c, parts = _constrained_least_squares_parts(matrix, rhs, arrays["sums"])
    residual = rhs - matrix @ c
    sources, row, slot = arrays["basis_sources"], arrays["row"], arrays["slot"]
    if sources.shape[0] <= slot.shape[0]:
        # products over U_S, then per edge: one model's U_S has at most one row per edge
        source_c = (sources @ c)[slot]
        pulled_t_residual = jax.ops.segment_sum(d_p * residual[row], slot, num_segments=sources.shape[0]) @ sources
    else:
        # a regional model's U_S concatenates every region's: gather the edges' rows once instead
        edge_sources = sources[slot]
        source_c = edge_sources @ c
        pulled_t_residual = (d_p * residual[row]) @ edge_sources
    d_matrix_t_residual = -alpha * (pulled_t_residual + d_leak.T @ residual)
    d_matrix_c = -alpha * (jax.ops.segment_sum(d_p * source_c, row, num_segments=matrix.shape[0],
                                               indices_are_sorted=True) + d_leak @ c)
    return c, _kkt_tangent(d_matrix_t_residual - matrix.T @ d_matrix_c, 0.0, parts)


@jax.custom_jvp
def constrained_least_squares(matrix, rhs, sums):
    """argmin_c ||matrix c - rhs||_2 subject to sums . c = 1, in JAX.

    With B = ``matrix``, D the diagonal that scales its columns to unit norm,
    N = D B^T B D (symmetric positive definite) and u = D sums, the KKT
    conditions give c' = y - z mu, mu = (u.y - 1) / (u.z), with N y = D B^T f and
    N z = u (the Schur complement of the constraint), and c = D c'. One
    Cholesky factorisation serves both right-hand sides: r k^2 + k^3 / 3 flops,
    no pivoting (an LU of the (k + 1)-sized KKT matrix costs twice the flops
    plus a sequential pivot loop, which dominated the online time at k = 100).
    Squaring the condition number is harmless here: the columns of M(theta) U
    are close to orthonormal (||M|| <= 1 + alpha, ||M^-1|| <= 1 / (1 - alpha))
    and the equilibration removes the column scales.

    The derivative is implicit (:func:`_constrained_least_squares_jvp`): one
    more solve with the same factor and matrix-vector products, O(r k + k^2),
    where differentiating through B^T B would cost two more r k^2 products.

    Args:
      matrix: (r, k) B, r >= k, full column rank apart from columns that are
        exactly zero (padding), whose coefficients come out 0.
      rhs: (r,) f.
      sums: (k,) u.

    Returns:
      (k,) c.

    References:
      Golub & Van Loan, "Matrix Computations", 4th ed., sec. 6.2 (equality-
      constrained least squares via the KKT system and its Schur complement)
      and sec. 3.5.2 (equilibration).
    """
    return _constrained_least_squares_parts(matrix, rhs, sums)[0]


def _constrained_least_squares_parts(matrix, rhs, sums):
    """c and what its derivative reuses: (c, (N, Cholesky factor, D, u, z, mu)).

    By the native kernel when it is built (:mod:`fitrank.native`: the same
    steps in one BLAS / LAPACK call; whole online evaluations took 0.84-0.94
    of their time without it), else by XLA's code below.
    """
    if matrix.dtype == jnp.float64 and native.available():
        return native.constrained_least_squares_parts(matrix, rhs, sums)
    return _xla_least_squares_parts(matrix, rhs, sums)


def _xla_least_squares_parts(matrix, rhs, sums):
    """:func:`_constrained_least_squares_parts` in XLA's own operations."""
    # B^T B before the scaling, from a materialised transpose: fused into the product, the
    # scaling and the transpose sent XLA to a slower dot (320-400 us against 220-280 us at k = 100)
    transposed, matrix = jax.lax.optimization_barrier((matrix.T, matrix))
    gram = transposed @ matrix
    # the column norms, read off B^T B; a column of zeros (a regional model pads smaller bases
    # with them) gets scale 0 and a unit diagonal, hence coefficient 0
    norms2 = jnp.diagonal(gram)
    padding = norms2 == 0.0
    scale = jnp.where(padding, 0.0, 1.0 / jnp.sqrt(jnp.where(padding, 1.0, norms2)))
    u = sums * scale
    normal = gram * scale[:, None] * scale[None, :] + jnp.diag(padding.astype(gram.dtype))
    factor = jax.scipy.linalg.cho_factor(normal)
    both = jax.scipy.linalg.cho_solve(factor, jnp.stack([(transposed @ rhs) * scale, u], axis=1))
    y, z = both[:, 0], both[:, 1]
    multiplier = (u @ y - 1.0) / (u @ z)
    return (y - z * multiplier) * scale, (normal, factor, scale, u, z, multiplier)


@constrained_least_squares.defjvp
def _constrained_least_squares_jvp(primals, tangents):
    """Implicit derivative of the KKT system [[B^T B, u], [u^T, 0]] [c; mu] = [B^T f; 1].

    Differentiating it gives B^T B dc + d_mu u = g, u . dc = -du . c, with
    g = dB^T (f - B c) - B^T (dB c) + B^T df - mu du: the same Schur complement
    as the values, on the same factor. Linear in the tangents and built from
    matrix-vector products only, so its transpose (the gradient) costs O(r k + k^2).
    """
    matrix, rhs, sums = primals
    d_matrix, d_rhs, d_sums = tangents
    c, parts = _constrained_least_squares_parts(matrix, rhs, sums)
    multiplier = parts[-1]
    drive = d_matrix.T @ (rhs - matrix @ c) - matrix.T @ (d_matrix @ c) + matrix.T @ d_rhs - multiplier * d_sums
    return c, _kkt_tangent(drive, d_sums @ c, parts)


def _kkt_tangent(drive, d_sums_c, parts):
    """dc from (B^T B) dc + d_mu u = drive, u . dc = -d_sums_c (unscaled u), on the factor in ``parts``."""
    normal, factor, scale, u, z, _ = parts
    t = jax.lax.custom_linear_solve(lambda v: normal @ v, drive * scale,
                                    lambda _, b: jax.scipy.linalg.cho_solve(factor, b), symmetric=True)
    d_multiplier = (u @ t + d_sums_c) / (u @ z)
    return (t - d_multiplier * z) * scale


def choose_rows(problem: PageRankProblem, vectors: np.ndarray, count: int, *, probes: int | None = None,
                gamma: float = 0.0, budget: float | None = None, seed: int = 0) -> RowChoice:
    """Pick ``count`` interpolation rows for basis ``vectors`` (n, k).

    Probes at theta0 and ``probes - 1`` sampled points; by default enough that
    the stacked matrix has at least ``count`` columns.
    """
    k = vectors.shape[1]
    q = probes or max(2, -(-count // k) + 1)
    weighting = problem.weighting
    thetas = np.vstack([weighting.theta0[None, :], weighting.sample(q - 1, seed=seed + 7919)])
    stacked = probe_matrix(problem, vectors, thetas)
    cost = row_cost(problem.graph, weighting) if (gamma > 0 or budget is not None) else None
    choice = select_rows(stacked, count, cost=cost, gamma=gamma, budget=budget)
    if cost is None:
        full_cost = row_cost(problem.graph, weighting)[choice.rows]
        choice = RowChoice(choice.rows, choice.scores, full_cost, choice.candidates_scored)
    return choice
