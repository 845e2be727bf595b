"""Accuracy measures against scipy.stats and hand-computed cases."""

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from fitrank import metrics
from fitrank.graph import Pairs
from fitrank.metrics import kendall_tau_topk, l1_topk, misordered_pairs, pair_accuracy, tied_pairs, top_k


def _pairs(preferred, other, weight=None):
    preferred = np.asarray(preferred, dtype=np.int64)
    weight = np.ones(preferred.size) if weight is None else np.asarray(weight, dtype=np.float64)
    return Pairs(preferred, np.asarray(other, dtype=np.int64), weight, np.zeros(preferred.size, dtype=np.int8))


def test_top_k_is_largest_first_and_breaks_ties_by_index():
    x = np.array([0.1, 0.5, 0.3, 0.5, 0.0])
    assert top_k(x, 3).tolist() == [1, 3, 2]
    assert top_k(x, 10).tolist() == [1, 3, 2, 0, 4]  # k capped at n
    with pytest.raises(ValueError):
        top_k(x, 0)


def test_one_swapped_adjacent_pair_in_a_top_100():
    # Hand count: 4950 pairs, one discordant: tau = (4949 - 1) / 4950 = 1 - 2/4950 ~ 1 - 4.04e-4
    # (Kendall, Biometrika 30, 1938: tau = (C - D) / (n(n-1)/2)).
    x = np.linspace(1.0, 0.01, 300)
    y = x.copy()
    y[[40, 41]] = y[[41, 40]]
    tau = kendall_tau_topk(x, y, k=100)
    assert tau == pytest.approx(1.0 - 2.0 / 4950.0, abs=1e-15)
    assert 1.0 - tau == pytest.approx(4.04e-4, abs=1e-6)


def test_only_the_reference_top_k_counts():
    rng = np.random.default_rng(3)
    x = rng.random(500)
    y = x.copy()
    outside = top_k(x, 500)[100:]
    y[outside] = rng.random(outside.size)  # shuffle everything below the top 100
    assert kendall_tau_topk(x, y, k=100) == 1.0
    assert l1_topk(x, y, k=100) == 0.0
    assert kendall_tau_topk(x, -x, k=100) == pytest.approx(-1.0, abs=1e-15)


@given(
    st.lists(st.integers(0, 6), min_size=2, max_size=60),
    st.lists(st.integers(0, 6), min_size=60, max_size=60),
    st.integers(2, 70),
)
def test_kendall_tau_matches_scipy_tau_b_with_ties(xs, ys, k):
    # Reference: scipy.stats.kendalltau, variant "b" (its default), which handles ties
    # as Kendall, Biometrika 33(3), 1945.
    x = np.asarray(xs, dtype=float)
    y = np.asarray(ys[: x.size], dtype=float)
    top = top_k(x, k)
    expected = stats.kendalltau(x[top], y[top]).statistic
    got = kendall_tau_topk(x, y, k)
    if math.isnan(expected):
        assert math.isnan(got)
    else:
        assert got == pytest.approx(expected, abs=1e-12)


def test_kendall_tau_in_row_blocks_equals_scipy(monkeypatch):
    monkeypatch.setattr(metrics, "_BLOCK_ENTRIES", 1000)  # force many row blocks
    rng = np.random.default_rng(11)
    x = rng.random(400)
    y = x + 0.05 * rng.normal(size=400)
    top = top_k(x, 300)
    # Reference: scipy.stats.kendalltau (tau-b).
    assert kendall_tau_topk(x, y, 300) == pytest.approx(stats.kendalltau(x[top], y[top]).statistic, abs=1e-12)


@given(
    st.lists(st.integers(0, 6), min_size=2, max_size=40),
    st.lists(st.integers(-3, 3), min_size=40, max_size=40),
    st.integers(2, 50),
    st.sampled_from([0.0, 0.5, 1.5]),
)
def test_tau_on_the_pairs_the_reference_orders_by_brute_force(xs, noise, k, resolution):
    # Reference: Kendall's tau-b (Biometrika 33(3), 1945) computed pair by pair, over only the
    # pairs whose reference values differ by more than the resolution.
    x = np.asarray(xs, dtype=float)
    y = x + 0.1 * np.asarray(noise[: x.size], dtype=float)
    top = top_k(x, k)
    agree = untied_x = untied_y = 0
    for i in range(top.size):
        for j in range(i + 1, top.size):
            a, b = x[top[i]] - x[top[j]], y[top[i]] - y[top[j]]
            if abs(a) <= resolution:
                continue
            agree += np.sign(a) * np.sign(b)
            untied_x += 1
            untied_y += b != 0
    got = kendall_tau_topk(x, y, k, reference_resolution=resolution)
    if untied_x == 0 or untied_y == 0:
        assert math.isnan(got)
    else:
        assert got == pytest.approx(agree / math.sqrt(untied_x * untied_y), abs=1e-12)


def test_an_approximation_that_breaks_only_exact_ties_agrees_fully():
    # symmetric nodes tie exactly in the full solve; rounding-level noise in y orders them at
    # random, which plain tau-b counts against y and the check must not
    x = np.repeat([0.3, 0.2, 0.1], 4) / 2.4
    y = x + 1e-12 * np.random.default_rng(0).normal(size=x.size)
    assert kendall_tau_topk(x, y, 12) == pytest.approx(math.sqrt(48 / 66))  # 48 ordered pairs of 66, all kept
    assert kendall_tau_topk(x, y, 12, reference_resolution=0.0) == 1.0
    tau, _ = metrics.agreement_with_solve(x, y, k=12, x_bound=1e-15)
    assert tau == 1.0 and metrics.within_tolerance(x, tau, 1e-11, k=12, tau_min=0.999, l1_max=1e-3, x_bound=1e-15)
    # but an order the full solve does make still counts
    swapped = y.copy()
    swapped[[3, 4]] = swapped[[4, 3]]
    assert metrics.agreement_with_solve(x, swapped, k=12, x_bound=1e-15)[0] < 0.999
    # a y that ties everything x orders fails, an x that orders nothing leaves it to L1
    flat = np.full_like(x, x.mean())
    assert not metrics.within_tolerance(x, metrics.agreement_with_solve(x, flat, k=12)[0], 0.0, k=12,
                                        tau_min=0.999, l1_max=1e-3)
    assert metrics.within_tolerance(flat, metrics.agreement_with_solve(flat, x, k=12)[0], 0.0, k=12,
                                    tau_min=0.999, l1_max=1e-3)


def test_normalised_l1_by_hand():
    x = np.array([0.4, 0.3, 0.2, 0.1])
    y = np.array([0.35, 0.3, 0.25, 0.9])
    # top-2 of x: nodes 0, 1 -> |0.4 - 0.35| + 0 over 0.7
    assert l1_topk(x, y, k=2) == pytest.approx(0.05 / 0.7, rel=1e-14)
    # top-3 adds node 2: (0.05 + 0.05) / 0.9
    assert l1_topk(x, y, k=3) == pytest.approx(0.1 / 0.9, rel=1e-14)


def test_shape_mismatch_is_refused():
    with pytest.raises(ValueError, match="same nodes"):
        kendall_tau_topk(np.ones(3), np.ones(4))
    with pytest.raises(ValueError, match="1-d"):
        l1_topk(np.ones((2, 2)), np.ones((2, 2)))


def test_pair_accuracy_by_hand_with_weights_and_ties():
    scores = np.array([3.0, 1.0, 2.0, 2.0])
    pairs = _pairs([0, 1, 2, 3], [1, 0, 3, 0], weight=[1.0, 2.0, 4.0, 1.0])
    # pair 0 right (1), pair 1 wrong (0), pair 2 tie (1/2), pair 3 wrong (0)
    expected = (1.0 * 1 + 2.0 * 0 + 4.0 * 0.5 + 1.0 * 0) / 8.0
    assert pair_accuracy(scores, pairs) == pytest.approx(expected, abs=1e-15)
    assert pair_accuracy(np.ones(4), pairs) == 0.5  # constant scores: every pair a coin flip
    assert pair_accuracy(7.5 * scores, pairs) == pair_accuracy(scores, pairs)


@given(st.lists(st.floats(-5, 5), min_size=3, max_size=40), st.integers(0, 2**32 - 1))
def test_pair_accuracy_matches_a_loop(values, seed):
    scores = np.asarray(values)
    rng = np.random.default_rng(seed)
    a = rng.integers(0, scores.size, 30)
    b = (a + rng.integers(1, scores.size, 30)) % scores.size
    w = rng.uniform(0.1, 2.0, 30)
    total = sum(wq * (1.0 if scores[i] > scores[j] else 0.5 if scores[i] == scores[j] else 0.0)
                for i, j, wq in zip(a, b, w))
    assert pair_accuracy(scores, _pairs(a, b, w)) == pytest.approx(total / w.sum(), abs=1e-12)


def test_pair_accuracy_ties_scores_within_the_resolution():
    # nodes 0 and 1 differ by rounding only (3e-15); nodes 2 and 3 by a real 2^-20 (about 1e-6, exact in binary)
    scores = np.array([0.25, 0.25 + 3e-15, 0.5, 0.5 + 2.0**-20])
    pairs = _pairs([0, 1, 2, 3], [1, 0, 3, 2])
    assert pair_accuracy(scores, pairs) == 0.5  # by rounding: one right, one wrong, one wrong, one right
    assert pair_accuracy(scores, pairs, resolution=1e-10) == (0.5 + 0.5 + 0.0 + 1.0) / 4
    assert pair_accuracy(scores, pairs, resolution=2.0**-20) == 0.5  # a difference equal to it is a tie
    with pytest.raises(ValueError, match="resolution"):
        pair_accuracy(scores, pairs, resolution=-1.0)


@given(st.lists(st.floats(-5, 5), min_size=3, max_size=40), st.integers(0, 2**32 - 1), st.floats(0.0, 2.0))
def test_pair_accuracy_with_a_resolution_matches_a_loop(values, seed, resolution):
    scores = np.asarray(values)
    rng = np.random.default_rng(seed)
    a = rng.integers(0, scores.size, 30)
    b = (a + rng.integers(1, scores.size, 30)) % scores.size
    total = sum(1.0 if scores[i] - scores[j] > resolution else 0.5 if abs(scores[i] - scores[j]) <= resolution
                else 0.0 for i, j in zip(a, b))
    assert pair_accuracy(scores, _pairs(a, b), resolution=resolution) == pytest.approx(total / 30, abs=1e-12)


def test_pair_accuracy_of_no_pairs_is_nan():
    assert math.isnan(pair_accuracy(np.ones(3), _pairs([], [])))


def test_misordered_pairs_are_counted_beyond_the_resolution_only():
    x, y = np.array([3.0, 2.0, 1.0]), np.array([3.0, 1.0, 2.0])
    pairs = Pairs(np.array([0, 1, 0]), np.array([1, 2, 2]), np.ones(3), np.zeros(3, dtype=np.int8))
    assert misordered_pairs(x, y, pairs, resolution=0.0) == 1  # only (1, 2) changes sign
    assert misordered_pairs(x, y, pairs, resolution=1.5) == 0  # its gap of 1 is within the resolution
    assert tied_pairs(x, pairs, resolution=1.0) == 2 and tied_pairs(x, pairs, resolution=0.5) == 0
