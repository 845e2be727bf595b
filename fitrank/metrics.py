"""Accuracy measures: how far one ranking vector is from another, and how well
scores agree with preference pairs.

Three numbers, all computed with NumPy on plain arrays:

* :func:`kendall_tau_topk`: Kendall's tau-b between a reference vector and an
  approximation, both restricted to the reference's top-k nodes;
* :func:`l1_topk`: normalised L1 error on those same nodes;
* :func:`pair_accuracy`: weighted fraction of preference pairs that a score
  vector orders correctly.

:func:`agreement_with_solve` and :func:`within_tolerance` apply the first two
to a reduced vector against a full solve, as every check of a reduced model does.

The top-k of a vector is taken by value, largest first; equal values at the
cut are broken by the lower node index so that the choice is deterministic.
"""

from __future__ import annotations

import numpy as np

from fitrank.graph import Pairs

_BLOCK_ENTRIES = 4_000_000
"""Pairwise sign matrices are built in row blocks of at most this many entries."""


def top_k(x_ref: np.ndarray, k: int = 100) -> np.ndarray:
    """Indices of the k largest entries of ``x_ref``, largest first.

    Args:
      x_ref: (n,) reference values.
      k: how many; capped at n. Must be >= 1.

    Returns:
      (min(k, n),) int64 node indices; equal values are ordered by index.
    """
    x_ref = _vector(x_ref, "x_ref")
    if int(k) < 1:
        raise ValueError(f"top-k needs k >= 1, got {k}")
    k = min(int(k), x_ref.shape[0])
    # argsort is stable, so among equal values the lower index comes first.
    return np.argsort(-x_ref, kind="stable")[:k].astype(np.int64)


def kendall_tau_topk(x_ref: np.ndarray, y: np.ndarray, k: int = 100, *,
                     reference_resolution: float | None = None) -> float:
    """Kendall's tau-b of ``x_ref`` and ``y`` on the top-k nodes of ``x_ref``.

    tau_b = sum_{i<j} s_x(i,j) s_y(i,j) / sqrt(T_x T_y) with s(i, j) the sign of
    the difference of the two entries and T the number of pairs that are not
    tied in that vector; without ties it is (concordant - discordant) / (k(k-1)/2).
    One swapped adjacent pair among k = 100 costs 2 / 4950, about 4e-4.

    With ``reference_resolution`` the pairs whose ``x_ref`` values differ by at
    most that much are left out of every count: the reference cannot order
    them (an exact tie, or a difference below its own error), so the order
    ``y`` gives them neither helps nor hurts. Plain tau-b would count y's
    breaking of the reference's ties against it (T_y > T_x) even where y is
    exact to rounding.

    Cost: O(k^2) time, memory bounded by row blocks (k = 100: 10^4 pairs).

    Args:
      x_ref: (n,) reference vector (e.g. the full PageRank solution).
      y: (n,) approximation on the same nodes.
      k: size of the top set, capped at n.
      reference_resolution: None for plain tau-b, else the smallest difference
        of ``x_ref`` values that counts as an order (>= 0).

    Returns:
      tau_b in [-1, 1]; NaN when either restricted vector is constant (tau is
      undefined then) or k = 1.

    References:
      Kendall, "The treatment of ties in ranking problems", Biometrika 33(3),
      1945 (tau-b).
    """
    x_ref, y = _same_length(x_ref, y)
    top = top_k(x_ref, k)
    a, b = x_ref[top], y[top]
    agree = untied_a = untied_b = 0.0
    rows = max(1, _BLOCK_ENTRIES // max(1, a.size))
    for start in range(0, a.size, rows):
        difference = a[start:start + rows, None] - a[None, :]
        sa = np.sign(difference)
        sb = np.sign(b[start:start + rows, None] - b[None, :])
        if reference_resolution is not None:
            orderable = np.abs(difference) > reference_resolution
            sa, sb = sa * orderable, sb * orderable
        # Summing over all ordered pairs counts each pair twice in every term, so the ratio is unchanged.
        agree += float(np.sum(sa * sb))
        untied_a += float(np.sum(np.abs(sa)))
        untied_b += float(np.sum(np.abs(sb)))
    if untied_a == 0.0 or untied_b == 0.0:
        return float("nan")
    return agree / np.sqrt(untied_a * untied_b)


def l1_topk(x_ref: np.ndarray, y: np.ndarray, k: int = 100) -> float:
    """Normalised L1 error ||x_top - y_top||_1 / ||x_top||_1 on the top-k nodes of ``x_ref``.

    Args:
      x_ref: (n,) reference vector.
      y: (n,) approximation.
      k: size of the top set, capped at n.

    Returns:
      The relative error (>= 0); infinity when the reference's top-k is all zero
      and y differs there, 0 when both are zero there.
    """
    x_ref, y = _same_length(x_ref, y)
    top = top_k(x_ref, k)
    error = float(np.abs(x_ref[top] - y[top]).sum())
    scale = float(np.abs(x_ref[top]).sum())
    if scale == 0.0:
        return 0.0 if error == 0.0 else float("inf")
    return error / scale


REFERENCE_TOL = 1e-10
"""The loosest certified L1 error a check's full solve may have.

A check counts only the pairs its full solve orders (:func:`agreement_with_solve`),
so a loose reference would leave close pairs unchecked: at 1e-4 most of a
top-100 can sit within the error, and a model that reverses them would pass.
Below 1e-10, pairs left out differ by less than a ten-billionth of the total
mass: ties for any ranking purpose.
"""


def agreement_with_solve(x: np.ndarray, y: np.ndarray, *, k: int = 100,
                         x_bound: float = 0.0) -> tuple[float, float]:
    """(tau, L1) of an approximation ``y`` on the top-k of a full solve ``x``.

    ``x`` is itself only certified to within ``x_bound`` (L1), so it orders
    two nodes only when their values differ by more than that; the order ``y``
    gives the others (symmetric nodes, exact ties, differences at rounding
    level) is noise and does not count (``reference_resolution`` of
    :func:`kendall_tau_topk`).

    Args:
      x: (n,) full solution.
      y: (n,) approximation.
      k: size of the top set.
      x_bound: certified L1 error of ``x``; solve ``x`` to at most :data:`REFERENCE_TOL`.

    Returns:
      (tau on the pairs ``x`` orders, :func:`l1_topk` of ``y``).
    """
    return kendall_tau_topk(x, y, k=k, reference_resolution=x_bound), l1_topk(x, y, k=k)


def within_tolerance(x: np.ndarray, tau: float, l1: float, *, k: int, tau_min: float, l1_max: float,
                     x_bound: float = 0.0) -> bool:
    """Whether (tau, L1) from :func:`agreement_with_solve` meet ``tau_min`` and ``l1_max``.

    tau is undefined (NaN) when ``x`` orders no pair of its top-k (all within
    ``x_bound`` of each other, or k = 1): there is no order to reproduce, and
    only L1 decides. It is NaN too when ``y`` ties every pair that ``x``
    orders, which fails.
    """
    if np.isfinite(tau):
        order_ok = tau >= tau_min
    else:
        order_ok = np.ptp(_vector(x, "x")[top_k(x, k)]) <= x_bound
    return bool(order_ok and l1 <= l1_max)


def pair_accuracy(scores: np.ndarray, pairs: Pairs, *, resolution: float = 0.0) -> float:
    """Weighted fraction of pairs that ``scores`` orders as the pairs say.

    A pair counts 1 when score[preferred] > score[other], 0 when it is below, and
    1/2 on a tie: a tie is a coin flip, so a constant score vector gets
    accuracy 0.5 rather than 0 or 1 (the convention of the Mann-Whitney U
    statistic). With ``resolution`` > 0, scores that differ by no more than it
    tie too: the scores of a solve certified to an error of ``resolution``
    cannot order such a pair (nodes of identical position in the graph differ
    by rounding only, and would otherwise count 0 or 1 by that rounding).

    Args:
      scores: (n,) one score per node (any positive multiple of x gives the same value).
      pairs: the pairs; their node indices index ``scores``.
      resolution: largest difference of two scores that is a tie (>= 0; in the
        units of ``scores``).

    Returns:
      sum_q w_q [1(s_a - s_b > res) + 1/2 1(|s_a - s_b| <= res)] / sum_q w_q in
      [0, 1]; NaN when there are no pairs.

    References:
      Mann & Whitney, "On a test of whether one of two random variables is
      stochastically larger than the other", Ann. Math. Statist. 18(1), 1947
      (ties counted one half).
    """
    scores = _vector(scores, "scores")
    if len(pairs) == 0:
        return float("nan")
    if not resolution >= 0.0:
        raise ValueError(f"resolution must be >= 0, got {resolution}")
    difference = _pair_differences(scores, pairs)
    hit = (difference > resolution).astype(np.float64) + 0.5 * (np.abs(difference) <= resolution)
    weight = np.asarray(pairs.weight, dtype=np.float64)
    return float(np.dot(weight, hit) / weight.sum())


def tied_pairs(scores: np.ndarray, pairs: Pairs, resolution: float) -> int:
    """How many of ``pairs`` ``scores`` (n,) cannot order: |s_preferred - s_other| <= ``resolution``."""
    return int(np.count_nonzero(np.abs(_pair_differences(scores, pairs)) <= resolution))


def misordered_pairs(reference: np.ndarray, scores: np.ndarray, pairs: Pairs, resolution: float) -> int:
    """How many of ``pairs`` ``scores`` (n,) orders otherwise than ``reference`` (n,).

    Only pairs that ``reference`` orders, by more than ``resolution``, count.
    """
    exact, approximate = _pair_differences(reference, pairs), _pair_differences(scores, pairs)
    return int(np.count_nonzero((np.abs(exact) > resolution) & (np.sign(exact) != np.sign(approximate))))


def _pair_differences(scores: np.ndarray, pairs: Pairs) -> np.ndarray:
    """(Q,) s_preferred - s_other."""
    return scores[pairs.preferred] - scores[pairs.other]


def _vector(x, name: str) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"{name} must be a 1-d vector, got shape {x.shape}")
    return x


def _same_length(x_ref, y) -> tuple[np.ndarray, np.ndarray]:
    x_ref, y = _vector(x_ref, "x_ref"), _vector(y, "y")
    if x_ref.shape != y.shape:
        raise ValueError(f"x_ref has shape {x_ref.shape} but y has shape {y.shape}; give both on the same nodes")
    return x_ref, y
