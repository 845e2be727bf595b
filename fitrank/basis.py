"""Proper orthogonal decomposition of a snapshot matrix.

Two paths give the same basis: a thin SVD of X (n, m) when it fits in memory,
and the method of snapshots for large n, which forms the m x m Gram matrix
X^T X and U = X V S^{-1} by streaming row blocks of X (e.g. from a memory-mapped
file), so X is never held twice. The Gram path squares the condition number:
singular values below about sqrt(machine epsilon) * s_1 are not resolved, which
is why it stops the basis there.

References:
  Sirovich, "Turbulence and the dynamics of coherent structures", Quart. Appl.
  Math. 45(3), 1987 (method of snapshots); Holmes, Lumley & Berkooz,
  "Turbulence, Coherent Structures, Dynamical Systems and Symmetry", 1996 (POD).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


_INDEPENDENT = 1e-12  # relative singular value below which a direction is rounding noise (common practice)


@dataclass(frozen=True, eq=False)
class PodBasis:
    """Leading left singular vectors of a snapshot matrix.

    Attributes:
      vectors: (n, k) orthonormal columns U.
      singular_values: (m,) all singular values of X, descending (those the
        Gram path cannot resolve are reported as 0).
      lost_energy: 1 - sum_{i<=k} s_i^2 / sum_i s_i^2.
    """

    vectors: np.ndarray
    singular_values: np.ndarray
    lost_energy: float

    @property
    def rank(self) -> int:
        return int(self.vectors.shape[1])


def choose_rank(singular_values: np.ndarray, rank: int | None = None, energy: float | None = None,
                max_rank: int | None = None) -> int:
    """Basis size: ``rank`` if given, else the smallest k whose lost energy is <= ``energy``.

    Args:
      singular_values: (m,) descending.
      rank: a fixed k (capped as below).
      energy: tolerance on 1 - sum_{i<=k} s_i^2 / sum s_i^2.
      max_rank: upper cap on k.

    Returns:
      k >= 1, never more than the numerically independent directions (singular
      values above 1e-12 s_1): a fixed rank on snapshots that span fewer, e.g.
      a parameter that does not change the walk, would add rounding noise as
      basis vectors.
    """
    s = np.asarray(singular_values, dtype=np.float64)
    s2 = s**2
    usable = int(np.sum(s > s[0] * _INDEPENDENT)) if s.size else 0
    if rank is not None:
        k = min(int(rank), usable)
    else:
        tol = 1e-10 if energy is None else float(energy)
        lost = 1.0 - np.cumsum(s2) / s2.sum()
        k = int(np.argmax(lost <= tol)) + 1 if np.any(lost <= tol) else usable
    if max_rank is not None:
        k = min(k, int(max_rank))
    return max(1, k)


def _lost(singular_values: np.ndarray, k: int) -> float:
    s2 = singular_values ** 2
    return float(max(0.0, 1.0 - s2[:k].sum() / s2.sum()))


def pod_basis(snapshots: np.ndarray, rank: int | None = None, energy: float | None = None,
              max_rank: int | None = None, method: str = "auto", block_rows: int = 65_536,
              columns: np.ndarray | None = None, gram: np.ndarray | None = None) -> PodBasis:
    """POD basis of the columns of ``snapshots`` (or of the chosen ``columns``).

    Args:
      snapshots: (n, m) array or ``np.memmap``.
      rank, energy, max_rank: see :func:`choose_rank`.
      method: ``"svd"`` (thin SVD in memory), ``"gram"`` (method of snapshots,
        streamed in row blocks) or ``"auto"`` (SVD when X is under ~2 GB and
        not memory-mapped).
      block_rows: rows per block on the Gram path.
      columns: (m_c,) indices of the snapshots to use (default: all). On the
        Gram path only row blocks of X are read, so a subset costs no copy of X.
      gram: (m, m) :func:`snapshot_gram` of all of ``snapshots``, when already
        formed (the Gram path then reads X once, for U, instead of twice):
        several bases over subsets of the columns share one pass for it.

    Returns:
      :class:`PodBasis`.
    """
    n, m = snapshots.shape
    columns = np.arange(m) if columns is None else np.asarray(columns, dtype=np.int64)
    if method == "auto":
        method = "gram" if streams(snapshots, columns.size) else "svd"
    if method == "svd":
        chosen = np.asarray(snapshots) if columns.size == m else np.asarray(snapshots)[:, columns]
        u, s, _ = np.linalg.svd(chosen, full_matrices=False)
        k = choose_rank(s, rank, energy, max_rank)
        return PodBasis(np.ascontiguousarray(u[:, :k]), s, _lost(s, k))
    if method != "gram":
        raise ValueError(f"POD method must be 'svd', 'gram' or 'auto', got '{method}'")
    gram = snapshot_gram(snapshots, block_rows) if gram is None else np.asarray(gram)
    eigval, eigvec = np.linalg.eigh(gram[np.ix_(columns, columns)])
    eigval, eigvec = eigval[::-1], eigvec[:, ::-1]
    resolvable = eigval > eigval[0] * 1e-14  # the Gram path squares the condition number
    s = np.where(resolvable, np.sqrt(np.clip(eigval, 0.0, None)), 0.0)
    k = choose_rank(s, rank, energy, max_rank)
    coef = eigvec[:, :k] / s[:k]
    vectors = np.empty((n, k))
    for start, block in _row_blocks(snapshots, block_rows):
        vectors[start:start + block.shape[0]] = block[:, columns] @ coef
    # one re-orthonormalisation pass removes the loss of orthogonality of U = X V S^-1
    vectors, r = np.linalg.qr(vectors)
    vectors *= np.sign(np.diag(r))
    return PodBasis(vectors, s, _lost(s, k))


def streams(snapshots: np.ndarray, width: int) -> bool:
    """Whether :func:`pod_basis` ("auto") takes the Gram path for ``width`` of these snapshots' columns:
    for a memory-mapped file, or when those columns would take 2 GB or more in memory."""
    return isinstance(snapshots, np.memmap) or snapshots.shape[0] * width * 8 >= 2e9


def snapshot_gram(snapshots: np.ndarray, block_rows: int = 65_536) -> np.ndarray:
    """(m, m) X^T X of the snapshots (n, m), from row blocks (one pass over a memory-mapped file)."""
    gram = np.zeros((snapshots.shape[1],) * 2)
    for _, block in _row_blocks(snapshots, block_rows):
        gram += block.T @ block
    return gram


def _row_blocks(snapshots: np.ndarray, block_rows: int):
    for start in range(0, snapshots.shape[0], block_rows):
        yield start, np.asarray(snapshots[start:start + block_rows])


def extend_basis(basis: PodBasis, new_vectors: np.ndarray, rank: int | None = None, energy: float | None = None,
                 max_rank: int | None = None) -> PodBasis:
    """Basis of the old snapshots plus new ones, from the old basis alone.

    The old snapshot matrix is represented by U diag(s_k) (exact up to the
    truncated tail), so the SVD of [U diag(s_k), X_new] (n, k + m_new) updates
    the basis without the old snapshots.

    Args:
      basis: the current basis.
      new_vectors: (n, m_new) new snapshots.
      rank, energy, max_rank: see :func:`choose_rank`; rank None keeps the energy rule, but
        never drops a new direction that is numerically independent of the old basis
        (so the new snapshots always lie in the span, up to the max_rank cap).

    Returns:
      The updated :class:`PodBasis` (its singular values are those of the stacked matrix).

    References:
      Brand, "Fast low-rank modifications of the thin singular value
      decomposition", Linear Algebra Appl. 415, 2006.
    """
    k = basis.rank
    added = np.atleast_2d(new_vectors.T).T
    stacked = np.hstack([basis.vectors * basis.singular_values[:k], added])
    u, s, _ = np.linalg.svd(stacked, full_matrices=False)
    new_k = choose_rank(s, rank, energy, max_rank)
    if rank is None:
        # The energy rule measures a direction against all snapshots, and the part of a new
        # snapshot the old basis misses can be tiny next to them: the rule would then drop
        # exactly what enrichment was for. Keep every numerically independent new direction.
        new_k = max(new_k, choose_rank(s, k + added.shape[1], max_rank=max_rank))
    return PodBasis(np.ascontiguousarray(u[:, :new_k]), s, _lost(s, new_k))
