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

import jax.numpy as jnp
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

    Pure JAX; differentiate through it with jax.grad (LU solve).
    """
    terms = arrays["terms"]
    operator = (w @ terms.reshape(terms.shape[0], -1)).reshape(terms.shape[1:])  # one GEMV, not einsum's loops
    c = jnp.linalg.solve(operator, arrays["rhs"])
    return c / (arrays["sums"] @ c)
