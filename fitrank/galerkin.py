"""Galerkin reduction for weightings affine in their coefficients.

When M(theta) = sum_t w_t(theta) M_t (the relation mixture: with sum_t w_t = 1,
M_t = I - alpha (P_t + v z_t^T), z_t the nodes lacking relation t), the reduced
operator is assembled from k x k terms precomputed once:

    A_t = U^T M_t U,   g = (1 - alpha) U^T v,   (sum_t w_t A_t) c = g,

then c is rescaled so that sum(U c) = 1 exactly (the true solution satisfies
both equations, so the rescaling only removes the normalisation error). The
online cost is O(T k^2 + k^3), independent of n.

References:
  Quarteroni, Manzoni & Negri, "Reduced Basis Methods for Partial
  Differential Equations", Springer 2016, ch. 3 (Galerkin reduced basis,
  affine decomposition).
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import jax.scipy.linalg
import numpy as np

from fitrank.pagerank import PageRankProblem
from fitrank.weightings import affine_terms


def affine_operator_terms(problem: PageRankProblem, vectors: np.ndarray) -> np.ndarray:
    """(T, n, k) the products M_t U for each affine term t."""
    graph, weighting = problem.graph, problem.weighting
    alpha, v = problem.damping, problem.teleport
    terms = []
    for t, edge_data in enumerate(affine_terms(graph, weighting)):
        lacks = weighting.leak_basis[:, t]
        walk = graph.matrix(edge_data) @ vectors
        if problem.dangling == "teleport":
            walk += np.outer(v, lacks @ vectors)
        else:
            walk += lacks[:, None] * vectors
        terms.append(vectors - alpha * walk)
    return np.stack(terms)


def galerkin_arrays(problem: PageRankProblem, vectors: np.ndarray) -> dict:
    """Offline Galerkin terms.

    Args:
      problem: an affine problem (``problem.weighting.affine``).
      vectors: (n, k) orthonormal basis U.

    Returns:
      dict with ``terms`` (T, k, k) = U^T M_t U, ``rhs`` (k,) = (1 - alpha) U^T v,
      ``sums`` (k,) = 1^T U.
    """
    products = affine_operator_terms(problem, vectors)
    return {
        "terms": np.stack([vectors.T @ product for product in products]),  # BLAS, not einsum's loops
        "rhs": (1.0 - problem.damping) * (vectors.T @ problem.teleport),
        "sums": vectors.sum(axis=0),
    }


def galerkin_coefficients(w, arrays: dict):
    """Online Galerkin solve: c (k,) with sum(U c) = 1, for coefficients w (T,).

    Pure JAX and differentiable (:func:`solve_once`).
    """
    terms = arrays["terms"]
    operator = (w @ terms.reshape(terms.shape[0], -1)).reshape(terms.shape[1:])  # one GEMV, not einsum's loops
    c = solve_once(operator, arrays["rhs"])
    return c / (arrays["sums"] @ c)


@jax.custom_jvp
def solve_once(matrix, rhs):
    """x = matrix^-1 rhs by one partially pivoted LU factorisation of [matrix | rhs].

    LAPACK's getrf applies its row swaps to every column, so factoring the
    (k, k + 1) augmented matrix leaves L^-1 P rhs in its last column and one
    triangular solve remains. ``jnp.linalg.solve`` instead turns the pivots into
    a permutation in a k-step loop, which cost 25-30 us of its 115 at k = 100
    on this project's 2-core machines (about the price of the factorisation itself, measured).

    Args:
      matrix: (k, k) nonsingular.
      rhs: (k,).

    Returns:
      (k,) x. Its derivative (:func:`_solve_once_jvp`) is the usual
      dx = matrix^-1 (d_rhs - d_matrix x), on one factorisation.

    References:
      Golub & Van Loan, "Matrix Computations", 4th ed., sec. 3.4 (Gaussian
      elimination with partial pivoting; the augmented-matrix form is common practice).
    """
    k = matrix.shape[0]
    factors, _, _ = jax.lax.linalg.lu(jnp.concatenate([matrix, rhs[:, None]], axis=1))
    return jax.scipy.linalg.solve_triangular(factors[:, :k], factors[:, k], lower=False)


@solve_once.defjvp
def _solve_once_jvp(primals, tangents):
    matrix, rhs = primals
    d_matrix, d_rhs = tangents
    factors, _, permutation = jax.lax.linalg.lu(matrix)
    lower = functools.partial(jax.scipy.linalg.solve_triangular, factors, lower=True, unit_diagonal=True)
    upper = functools.partial(jax.scipy.linalg.solve_triangular, factors, lower=False)

    def solve(_, b):  # P A = L U, so A^-1 b = U^-1 L^-1 (P b)
        return upper(lower(b[permutation]))

    def transpose_solve(_, b):  # A^T y = b: y = P^T L^-T U^-T b
        return jnp.zeros_like(b).at[permutation].set(lower(upper(b, trans=1), trans=1))

    x = solve(None, rhs)
    # linear in the tangents and transposable, so reverse mode reuses the same factors
    dx = jax.lax.custom_linear_solve(lambda v: matrix @ v, d_rhs - d_matrix @ x, solve, transpose_solve)
    return x, dx
