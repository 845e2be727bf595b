"""Checks of fitrank.weightings: names, defaults, sampling, local tables, row costs.

The walk each weighting builds is checked against an independent
implementation of DESIGN.md section 2 in tests/test_pagerank.py (through
networkx and scipy); here the weighting's own contracts are checked.

tests/test_pagerank.py imports the helpers defined here (``random_typed_graph``,
``random_theta``, ``examples``, ``seeds``, ``shapes``).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.special
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from fitrank.graph import Graph, build_graph
from fitrank import weightings
from fitrank.weightings import KINDS, affine_terms, inert_parameters, make_weighting, row_cost


def random_typed_graph(
    seed: int,
    n: int = 12,
    num_relations: int = 2,
    num_features: int = 2,
    uniform_teleport: bool = False,
) -> Graph:
    """A small random typed, featured digraph with the awkward cases built in.

    About a fifth of the nodes are dangling; n // 2 node pairs carry parallel
    edges of two relations; self-loops occur; base weights are log-normal;
    features have different offsets and spreads; the teleport vector is
    non-uniform unless asked otherwise. The edge count depends on n and the
    relation count only, so that JAX reuses its compiled kernels across seeds.

    Args:
      seed: numpy seed.
      n: number of nodes (at least 2).
      num_relations: number of relations; one gives the unlabelled relation "".
      num_features: number of feature columns (may be 0).
      uniform_teleport: leave the graph's teleport vector uniform.

    Returns:
      The graph, 3 n edges plus n // 2 parallel ones when num_relations > 1.
    """
    rng = np.random.default_rng(seed)
    has_out = rng.random(n) > 0.2
    has_out[rng.integers(n)] = True
    num_edges = 3 * n
    src = rng.choice(np.flatnonzero(has_out), num_edges)
    dst = rng.integers(0, n, num_edges)
    relation = rng.integers(0, num_relations, num_edges)
    if num_relations > 1:  # the same pair again under another relation
        again = rng.choice(num_edges, n // 2, replace=False)
        src = np.concatenate([src, src[again]])
        dst = np.concatenate([dst, dst[again]])
        relation = np.concatenate([relation, (relation[again] + 1) % num_relations])
    num_edges = src.size
    base = rng.lognormal(0.0, 1.0, num_edges)
    spread, offset = rng.uniform(0.3, 3.0, num_features), rng.normal(0, 5, num_features)
    features = rng.normal(size=(num_edges, num_features)) * spread + offset
    names = ("",) if num_relations == 1 else tuple(f"rel{t}" for t in range(num_relations))
    teleport = None if uniform_teleport else rng.uniform(0.05, 1.0, n)
    return build_graph(src, dst, n, base=base, relation=relation, relation_names=names, features=features,
                       feature_names=tuple(f"f{k}" for k in range(num_features)), teleport=teleport)


def transition_of(weighting, theta) -> np.ndarray:
    """(E,) p_e of ``weighting`` at ``theta`` on the whole graph."""
    return np.asarray(weighting.transition(np.asarray(theta, dtype=np.float64), weighting.tables))


def leak_of(weighting, theta) -> np.ndarray:
    """(n,) leak of ``weighting`` at ``theta``."""
    return weighting.leak_basis @ np.asarray(weighting.leak_coefficients(np.asarray(theta, dtype=np.float64)))


def random_theta(weighting, seed: int, spread: float = 1.0) -> np.ndarray:
    """(p,) normal parameters with standard deviation ``spread``."""
    return np.random.default_rng(seed).normal(0.0, spread, weighting.num_params)


def examples(share: float) -> settings:
    """A share of the active Hypothesis profile's examples (at least 5): every example here builds a
    graph and runs JAX on new arrays, so these tests take fewer than the profile's default."""
    return settings(max_examples=max(5, int(settings.default.max_examples * share)))


seeds = st.integers(0, 2**31 - 1)
shapes = st.sampled_from([(9, 1, 1), (12, 2, 2), (16, 3, 3)])
"""(nodes, relations, features) of the random graphs: few distinct shapes keep JAX compilation rare."""


# ----------------------------------------------------------------------------- names and defaults


def test_parameter_names_and_default_theta():
    graph = build_graph(np.array([0, 1, 1, 2]), np.array([1, 0, 2, 0]), 3, relation=np.array([0, 1, 1, 0]),
                        relation_names=("cites", "links"), features=np.arange(8.0).reshape(4, 2) ** 2,
                        feature_names=("age", "size"))
    expected = {
        "mixture": ("mix:cites", "mix:links"),
        "scale": ("scale:cites", "scale:links"),
        "features": ("feat:age", "feat:size"),
    }
    for kind in KINDS:
        weighting = make_weighting(kind, graph)
        assert weighting.kind == kind
        assert weighting.param_names == expected[kind]
        assert weighting.num_params == 2
        np.testing.assert_array_equal(weighting.theta0, np.zeros(2))
        assert weighting.named([0.5, -1.0]) == {expected[kind][0]: 0.5, expected[kind][1]: -1.0}
    assert make_weighting("mixture", graph).affine and make_weighting("mixture", graph).closed_form_out_weight
    assert not make_weighting("scale", graph).affine and make_weighting("scale", graph).closed_form_out_weight
    assert not make_weighting("features", graph).affine and not make_weighting("features", graph).closed_form_out_weight


def test_unlabelled_relation_gets_a_readable_name():
    graph = build_graph(np.array([0, 1]), np.array([1, 0]), 2, features=np.ones((2, 1)), feature_names=("w",))
    assert make_weighting("mixture", graph).param_names == ("mix:edge",)
    assert make_weighting("scale", graph).param_names == ("scale:edge",)


def test_default_theta_is_the_base_weighted_walk():
    # At theta0 the scale and feature weightings are the plain walk p_e = b_e / sum of b over j's out-edges
    # (DESIGN.md section 2 with theta = 0); the mixture gives every relation the same weight 1/T.
    graph = random_typed_graph(7, n=15, num_relations=3)
    out_weight = np.bincount(graph.src, weights=graph.base, minlength=graph.n)
    plain = graph.base / out_weight[graph.src]
    for kind in ("scale", "features"):
        weighting = make_weighting(kind, graph)
        np.testing.assert_allclose(transition_of(weighting, weighting.theta0), plain, rtol=1e-13)
    mixture = make_weighting("mixture", graph)
    per_relation = np.zeros((graph.n, graph.num_relations))
    np.add.at(per_relation, (graph.src, graph.relation), graph.base)
    expected = graph.base / per_relation[graph.src, graph.relation] / graph.num_relations
    np.testing.assert_allclose(transition_of(mixture, mixture.theta0), expected, rtol=1e-13)


def test_unknown_kind_is_refused():
    graph = random_typed_graph(1)
    with pytest.raises(ValueError, match="unknown weighting 'pagerank'"):
        make_weighting("pagerank", graph)


def test_features_weighting_refuses_a_graph_without_feature_columns():
    graph = random_typed_graph(2, num_features=0)
    with pytest.raises(ValueError, match="feature columns"):
        make_weighting("features", graph)


def test_constant_feature_column_has_no_effect():
    # A constant column is centred to a constant, which the per-source normalisation cancels.
    graph = random_typed_graph(3, n=12, num_features=2)
    features = graph.features.copy()
    features[:, 1] = 0.1
    flat = build_graph(graph.src, graph.dst, graph.n, base=graph.base, features=features,
                       feature_names=graph.feature_names)
    weighting = make_weighting("features", flat)
    np.testing.assert_array_equal(transition_of(weighting, [0.7, 0.0]), transition_of(weighting, [0.7, 25.0]))


@pytest.mark.parametrize("noise", [1, 4, 16])
def test_a_column_constant_up_to_rounding_has_no_effect(noise):
    # 3.0 give or take a few units in the last place (what averaging merged rows can leave): standardising that
    # as a feature would scale the rounding up to unit spread and let its parameter reorder the walk
    graph = random_typed_graph(5, n=40, num_features=2)
    features = graph.features.copy()
    features[:, 1] = 3.0 + noise * np.spacing(3.0) * np.random.default_rng(noise).integers(-1, 2, graph.num_edges)
    assert np.ptp(features[:, 1]) > 0  # the premise: not exactly constant
    weighting = make_weighting("features", build_graph(graph.src, graph.dst, graph.n, base=graph.base,
                                                       features=features, feature_names=graph.feature_names))
    np.testing.assert_array_equal(transition_of(weighting, [0.7, 0.0]), transition_of(weighting, [0.7, 1.0]))
    assert weighting.feature_scale[1] == 1.0


def test_a_column_that_varies_by_one_part_in_a_billion_is_a_feature():
    graph = random_typed_graph(6, n=40, num_features=2)
    features = graph.features.copy()
    features[:, 1] = 1.7e9 + np.random.default_rng(0).integers(0, 3, graph.num_edges)  # seconds, of a date
    weighting = make_weighting("features", build_graph(graph.src, graph.dst, graph.n, base=graph.base,
                                                       features=features, feature_names=graph.feature_names))
    assert not np.allclose(transition_of(weighting, [0.7, 0.0]), transition_of(weighting, [0.7, 1.0]), rtol=1e-3)



@pytest.mark.parametrize("unit", [1e200, 1e307, -1e308])
def test_features_in_huge_units_keep_their_effect(unit):
    # The same feature in huge units must give the same walk: standardisation removes units.
    # Taken naively, the variance (at 1e200) or even the mean (near 1e308) overflows and the
    # feature silently becomes zero or NaN.
    graph = random_typed_graph(4, n=30, num_features=2)
    features = graph.features / np.abs(graph.features).max(axis=0)
    huge = features * np.array([1.0, unit])
    walks = [make_weighting("features", build_graph(graph.src, graph.dst, graph.n, base=graph.base,
                                                    features=table, feature_names=graph.feature_names))
             for table in (features, huge)]
    theta = np.array([0.4, 0.9])
    plain = transition_of(walks[0], theta)
    scaled = transition_of(walks[1], theta * [1.0, np.sign(unit)])  # negative units flip the feature
    assert np.all(np.isfinite(scaled))
    np.testing.assert_allclose(scaled, plain, rtol=1e-10)
    # and the second feature still matters
    assert np.abs(transition_of(walks[1], theta * [1.0, 0.0]) - scaled).max() > 1e-3

@pytest.mark.parametrize("tiny", [5e-324, 1e-310, 1e-200])
def test_scale_weighting_with_tiny_base_weights_is_the_same_walk(tiny):
    # Node 0's out-edges all carry relation 1, which theta down-weights: tiny * exp(-3)
    # underflows to 0 for the smallest weights, and the walk must not turn into 0 / 0.
    src, dst, rel = np.array([0, 0, 1, 2, 2]), np.array([1, 2, 0, 0, 1]), np.array([1, 1, 0, 0, 1])
    walks = [make_weighting("scale", build_graph(src, dst, 3, base=np.where(src == 0, weight, 1.0), relation=rel,
                                                 relation_names=("a", "b")))
             for weight in (1.0, tiny)]
    theta = np.array([0.0, -3.0])
    plain, small = (transition_of(w, theta) for w in walks)
    assert np.all(np.isfinite(small))
    np.testing.assert_allclose(small, plain, rtol=1e-12)


# ----------------------------------------------------------------------------- sampling


@pytest.mark.parametrize("kind", ["scale", "features"])
def test_box_samples_shape_domain_and_reproducibility(kind):
    weighting = make_weighting(kind, random_typed_graph(4, num_relations=3, num_features=3))
    theta = weighting.sample(64, seed=5)
    assert theta.shape == (64, weighting.num_params)
    assert np.all(np.isfinite(theta))
    assert np.all(theta >= weighting.lower) and np.all(theta <= weighting.upper)
    np.testing.assert_array_equal(theta, weighting.sample(64, seed=5))
    assert not np.allclose(theta, weighting.sample(64, seed=6))
    # The points fill the box: each coordinate reaches into both outer tenths.
    span = weighting.upper - weighting.lower
    assert np.all(theta.min(axis=0) < weighting.lower + 0.1 * span)
    assert np.all(theta.max(axis=0) > weighting.upper - 0.1 * span)


def test_mixture_samples_are_centred_log_weights_covering_the_simplex():
    weighting = make_weighting("mixture", random_typed_graph(5, num_relations=3))
    theta = weighting.sample(256, seed=11)
    assert theta.shape == (256, 3)
    assert np.all(np.isfinite(theta))
    np.testing.assert_allclose(theta.mean(axis=1), 0.0, atol=1e-12)
    np.testing.assert_array_equal(theta, weighting.sample(256, seed=11))
    assert not np.allclose(theta, weighting.sample(256, seed=12))
    w = np.asarray(jax.nn.softmax(theta, axis=1))
    np.testing.assert_allclose(w.sum(axis=1), 1.0, rtol=1e-12)
    # Every corner of the simplex is approached.
    assert np.all(w.max(axis=0) > 0.85) and np.all(w.min(axis=0) < 0.02)
    # Uniform on the simplex = Dirichlet(1, 1, 1), whose marginal is Beta(1, K - 1)
    # (Devroye, "Non-Uniform Random Variate Generation", 1986, ch. XI.4); Kolmogorov-Smirnov
    # distance from scipy.stats. 0.085 is the 5% critical value for 256 i.i.d. points (common
    # practice: 1.36 / sqrt(m)); quasi-random points sit well inside it.
    for t in range(3):
        assert stats.kstest(w[:, t], stats.beta(1, 2).cdf).statistic < 1.36 / np.sqrt(256)


# ----------------------------------------------------------------------------- the walk itself


@pytest.mark.slow
@examples(0.8)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), spread=st.sampled_from([0.5, 3.0, 30.0]))
def test_transition_columns_sum_to_one_minus_leak(seed, shape, kind, spread):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting(kind, graph)
    theta = random_theta(weighting, seed, spread)
    p = transition_of(weighting, theta)
    leak = leak_of(weighting, theta)
    assert np.all(p >= 0) and np.all(np.isfinite(p))
    assert np.all(leak >= -1e-15) and np.all(leak <= 1 + 1e-15)
    column_sums = np.bincount(graph.src, weights=p, minlength=graph.n)
    np.testing.assert_allclose(column_sums + leak, 1.0, atol=1e-13)
    dangling = graph.out_degree() == 0
    np.testing.assert_array_equal(column_sums[dangling], 0.0)
    np.testing.assert_allclose(leak[dangling], 1.0, atol=1e-15)


@pytest.mark.slow
@examples(0.5)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), spread=st.sampled_from([0.5, 3.0, 30.0]))
def test_numpy_evaluation_is_the_jax_one(seed, shape, kind, spread):
    # walk_operator evaluates a weighting in NumPy (no compile); training differentiates it in JAX.
    # One formula, two array modules: they must agree to rounding, for the full and local tables.
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting(kind, graph)
    theta = np.asarray(random_theta(weighting, seed, spread), dtype=np.float64)
    with_jax = np.asarray(jax.jit(weighting.transition)(theta, weighting.tables))
    with_numpy = weighting.transition(theta, weighting.tables, xp=np)
    assert isinstance(with_numpy, np.ndarray)
    np.testing.assert_allclose(with_numpy, with_jax, rtol=1e-13, atol=1e-300)
    np.testing.assert_allclose(weighting.leak_coefficients(theta, xp=np),
                               np.asarray(weighting.leak_coefficients(jnp.asarray(theta))), rtol=1e-14)
    edge_ids = np.arange(0, graph.num_edges, 2)
    local = weighting.local_tables(edge_ids)
    np.testing.assert_allclose(weighting.transition(theta, local, xp=np),
                               np.asarray(weighting.transition(theta, local)), rtol=1e-13, atol=1e-300)


@pytest.mark.slow
@examples(0.5)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), fraction=st.sampled_from([0.0, 0.3, 1.0]))
def test_local_tables_give_the_same_transition_as_the_full_tables(seed, shape, kind, fraction):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting(kind, graph)
    rng = np.random.default_rng(seed + 1)
    theta = random_theta(weighting, seed)
    edge_ids = rng.permutation(graph.num_edges)[: max(1, int(fraction * graph.num_edges))]
    local = weighting.transition(theta, weighting.local_tables(edge_ids))
    np.testing.assert_allclose(np.asarray(local), transition_of(weighting, theta)[edge_ids], rtol=1e-13, atol=0)


@pytest.mark.slow
def test_local_tables_of_the_in_edges_of_one_row():
    # The unit a reduced model asks for: all in-edges of one node; here the busiest row, a
    # middling one and an empty selection (each new size costs a JAX compilation).
    graph = random_typed_graph(21, n=20, num_relations=2)
    in_degree = graph.in_degree()
    busiest, middling = int(np.argmax(in_degree)), int(np.argsort(in_degree)[graph.n // 2])
    selections = [np.arange(graph.indptr[i], graph.indptr[i + 1]) for i in (busiest, middling)]
    selections.append(np.zeros(0, dtype=np.int64))
    for kind in KINDS:
        weighting = make_weighting(kind, graph)
        theta = random_theta(weighting, 0)
        full = transition_of(weighting, theta)
        for ids in selections:
            np.testing.assert_allclose(np.asarray(weighting.transition(theta, weighting.local_tables(ids))),
                                       full[ids], rtol=1e-13)


@examples(0.5)
@given(seed=seeds, shape=shapes)
def test_affine_terms_reassemble_the_mixture(seed, shape):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting("mixture", graph)
    theta = random_theta(weighting, seed)
    w = np.asarray(weighting.coefficients(theta))
    terms = affine_terms(graph, weighting)
    assert len(terms) == graph.num_relations and all(t.shape == (graph.num_edges,) for t in terms)
    assembled = sum(w_k * graph.matrix(term) for w_k, term in zip(w, terms))
    direct = graph.matrix(transition_of(weighting, theta))
    assert abs(assembled - direct).max() < 1e-14
    np.testing.assert_allclose(weighting.leak_basis @ w, leak_of(weighting, theta), atol=1e-15)
    # Each term is the walk on one relation alone: columns sum to 1 where the node has that relation.
    for t, term in enumerate(terms):
        column_sums = np.bincount(graph.src, weights=term, minlength=graph.n)
        has_relation = np.bincount(graph.src[graph.relation == t], minlength=graph.n) > 0
        np.testing.assert_allclose(column_sums, has_relation.astype(float), atol=1e-14)
        np.testing.assert_array_equal(weighting.leak_basis[:, t], (~has_relation).astype(float))


@pytest.mark.parametrize("kind", ["scale", "features"])
def test_affine_terms_refuse_a_non_affine_weighting(kind):
    graph = random_typed_graph(8)
    with pytest.raises(ValueError, match="not affine"):
        affine_terms(graph, make_weighting(kind, graph))


def test_scale_is_invariant_to_a_common_shift():
    graph = random_typed_graph(9, num_relations=3)
    weighting = make_weighting("scale", graph)
    theta = np.array([0.3, -1.2, 0.8])
    np.testing.assert_allclose(transition_of(weighting, theta + 40.0), transition_of(weighting, theta), rtol=1e-13)


# ----------------------------------------------------------------------------- row costs


def _brute_force_row_cost(graph: Graph, needs_out_edges: bool) -> np.ndarray:
    """Edges read to form each row of P, counted one row at a time with sets."""
    cost = np.zeros(graph.n, dtype=np.int64)
    for i in range(graph.n):
        in_edges = {e for e in range(graph.num_edges) if graph.dst[e] == i}
        needed = set(in_edges)
        if needs_out_edges:
            neighbours = {int(graph.src[e]) for e in in_edges}
            needed |= {e for e in range(graph.num_edges) if int(graph.src[e]) in neighbours}
        cost[i] = len(needed)
    return cost


@examples(0.5)
@given(seed=seeds, shape=shapes)
def test_row_cost_matches_a_brute_force_count(seed, shape):
    graph = random_typed_graph(seed, *shape)
    for kind in KINDS:
        weighting = make_weighting(kind, graph)
        cost = row_cost(graph, weighting)
        assert cost.shape == (graph.n,)
        np.testing.assert_array_equal(cost, _brute_force_row_cost(graph, not weighting.closed_form_out_weight))


def test_row_cost_is_what_the_local_tables_read():
    graph = random_typed_graph(13, n=18, num_relations=2)
    for kind in KINDS:
        weighting = make_weighting(kind, graph)
        cost = row_cost(graph, weighting)
        for i in range(graph.n):
            tables = weighting.local_tables(np.arange(graph.indptr[i], graph.indptr[i + 1]))
            per_edge = tables["log_base"] if kind == "features" else tables["rel"]
            assert per_edge.shape[0] == cost[i]


def test_hub_in_neighbour_makes_a_row_expensive_only_without_closed_form():
    # Node 0 is a hub with 50 out-edges, one of them into node 1 (DESIGN.md section 4).
    n = 52
    src = np.concatenate([np.zeros(50, dtype=np.int64), [1]])
    dst = np.concatenate([np.arange(1, 51), [0]])
    graph = build_graph(src, dst, n, features=np.arange(51.0), feature_names=("x",))
    assert row_cost(graph, make_weighting("scale", graph))[1] == 1
    assert row_cost(graph, make_weighting("features", graph))[1] == 50
    # scipy's sparse pattern gives the same in-degrees (independent count).
    pattern = sp.coo_matrix((np.ones(51), (dst, src)), shape=(n, n)).tocsr()
    np.testing.assert_array_equal(row_cost(graph, make_weighting("mixture", graph)), np.diff(pattern.indptr))


@pytest.mark.parametrize("magnitude", [0.3, 30.0, 3000.0])
def test_feature_transition_is_each_sources_softmax_however_far_theta_goes(magnitude):
    # p_e = softmax over the source's out-edges of log b_e + theta . phi_e, by the reference
    # implementation (scipy.special.softmax per source). At 3000 the shift bound of the fast
    # path underflows (scores thousands below it) and the exact per-source maximum takes over.
    graph = random_typed_graph(7, n=40, num_features=2)
    weighting = make_weighting("features", graph)
    theta = magnitude * np.array([1.0, -0.6])
    standard = (graph.features - weighting.feature_center) / weighting.feature_scale
    score = np.log(graph.base) + standard @ theta
    expected = np.zeros(graph.num_edges)
    for node in np.unique(graph.src):
        mine = graph.src == node
        expected[mine] = scipy.special.softmax(score[mine])
    # exp turns the scores' absolute rounding (eps |theta| |phi|, about 1e-12 at 3000) into relative error
    rtol = max(1e-13, 1e-15 * magnitude)
    np.testing.assert_allclose(weighting.transition(theta, weighting.tables, xp=np), expected, rtol=rtol,
                               atol=1e-300)
    np.testing.assert_allclose(np.asarray(jax.jit(weighting.transition)(theta, weighting.tables)), expected,
                               rtol=rtol, atol=1e-300)
    edge_ids = np.arange(1, graph.num_edges, 3)
    np.testing.assert_allclose(np.asarray(weighting.transition(theta, weighting.local_tables(edge_ids))),
                               expected[edge_ids], rtol=rtol, atol=1e-300)


@pytest.mark.parametrize("magnitude", [0.3, 30.0, 250.0, 300.0, 3000.0])
def test_feature_transition_derivative_is_finite_and_matches_central_differences(magnitude):
    # At 250 and 300 the smallest total of the fast path is 8e-197 and 7e-236: finite, but its
    # square (in the quotient rule) underflowed to 0, and the derivative was NaN until the fast
    # path required totals of at least 1e-140. Reference: central differences of the NumPy
    # evaluation (common practice), step 1e-5, truncation error about 1e-9 here.
    graph = random_typed_graph(7, n=40, num_features=2)
    weighting = make_weighting("features", graph)
    theta = magnitude * np.array([1.0, -0.6])
    tables = jax.device_put(weighting.tables)
    forward = np.asarray(jax.jacfwd(weighting.transition)(jnp.asarray(theta), tables))
    reverse = np.asarray(jax.jacrev(weighting.transition)(jnp.asarray(theta), tables))
    step = 1e-5
    central = np.stack([(weighting.transition(theta + step * unit, weighting.tables, xp=np)
                         - weighting.transition(theta - step * unit, weighting.tables, xp=np)) / (2 * step)
                        for unit in np.eye(2)], axis=1)
    assert np.all(np.isfinite(forward)) and np.all(np.isfinite(reverse))
    np.testing.assert_allclose(forward, central, rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(reverse, forward, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("spread", [1.0, 180.0, 372.0, 1000.0])
def test_scale_transition_holds_however_wide_theta_spreads(spread):
    # theta = (d, -d): one shared shift by max(theta) left exp(-2d) for the other relation. From
    # d = 180 its square underflowed in the derivative (NaN gradient), at 372 the out-weights of
    # sources with only that relation were subnormal (p off by 0.23) and from 400 they were 0 (NaN).
    # Reference: each source's weights b_e exp(theta_rel(e)) over their sum, in logs shifted by the
    # source's own maximum (common practice); derivatives against central differences.
    graph = random_typed_graph(7, n=60)
    weighting = make_weighting("scale", graph)
    theta = np.zeros(weighting.num_params)
    theta[:2] = spread, -spread
    log_weight = np.log(graph.base) + theta[graph.relation]
    peak = np.full(graph.n, -np.inf)
    np.maximum.at(peak, graph.src, log_weight)
    weight = np.exp(log_weight - peak[graph.src])
    expected = weight / np.bincount(graph.src, weights=weight, minlength=graph.n)[graph.src]
    tables = jax.device_put(weighting.tables)
    rtol = max(1e-13, 1e-15 * spread)
    np.testing.assert_allclose(weighting.transition(theta, weighting.tables, xp=np), expected, rtol=rtol, atol=1e-300)
    np.testing.assert_allclose(np.asarray(jax.jit(weighting.transition)(jnp.asarray(theta), tables)), expected,
                               rtol=rtol, atol=1e-300)
    edge_ids = np.arange(0, graph.num_edges, 2)
    np.testing.assert_allclose(np.asarray(weighting.transition(jnp.asarray(theta), weighting.local_tables(edge_ids))),
                               expected[edge_ids], rtol=rtol, atol=1e-300)
    forward = np.asarray(jax.jacfwd(weighting.transition)(jnp.asarray(theta), tables))
    step = 1e-5
    central = np.stack([(weighting.transition(theta + step * unit, weighting.tables, xp=np)
                         - weighting.transition(theta - step * unit, weighting.tables, xp=np)) / (2 * step)
                        for unit in np.eye(theta.size)], axis=1)
    assert np.all(np.isfinite(forward))
    np.testing.assert_allclose(forward, central, rtol=1e-5, atol=1e-8)


def test_feature_transition_keeps_the_fast_path_beside_dangling_nodes(monkeypatch):
    # Nodes without out-edges have a total of 0: that must not send every evaluation of the
    # full tables to the exact per-source maximum, which is meant for theta far out of the box.
    graph = random_typed_graph(3, n=40, num_features=2)
    assert (graph.out_degree() == 0).any()
    weighting = make_weighting("features", graph)
    expected = weighting.transition(weighting.theta0 + 0.3, weighting.tables, xp=np)

    def refuse(*args, **kwargs):
        raise AssertionError("the rescaled path ran inside the sampled box")

    monkeypatch.setattr(weightings, "_feature_transition_rescaled", refuse)
    np.testing.assert_array_equal(weighting.transition(weighting.theta0 + 0.3, weighting.tables, xp=np), expected)


def test_a_small_spread_on_a_large_offset_keeps_its_digits():
    # 1e9 + noise of 0.01 and 1e-4: the deviations from the mean are exact differences of close floats, and a
    # second pass removes the mean's own rounding, so the reference below is accurate to rounding. Dividing by
    # the magnitude first had been 5e-4 and 3.6 off at unit spread.
    from fitrank.weightings import _standardise

    rng = np.random.default_rng(1)
    features = np.column_stack([rng.normal(size=20_000), 1e9 + rng.normal(0.0, 1e-2, 20_000),
                                1e9 + rng.normal(0.0, 1e-4, 20_000)])
    center, spread, standard = _standardise(features)
    deviation = features - features.mean(axis=0)
    np.testing.assert_allclose(center, features.mean(axis=0) + deviation.mean(axis=0), rtol=1e-15, atol=1e-15)
    deviation -= deviation.mean(axis=0)
    np.testing.assert_allclose(spread, deviation.std(axis=0), rtol=1e-12)
    np.testing.assert_allclose(standard, deviation / deviation.std(axis=0), rtol=0, atol=1e-12)


def test_inert_parameters_are_those_the_normalisation_cancels():
    # Nodes 0 and 1 use relations a and b side by side; node 2 uses only c, node 3 only d, and c
    # appears nowhere else, while d also leaves node 0. Exact reasoning (p_e = a_e / d_src): scaling
    # c rescales node 2's out-edges alike, so c is inert; d is not. Feature "flat" takes one value
    # among each node's out-edges (though it differs between nodes), "spread" does not.
    src = np.array([0, 0, 0, 1, 1, 2, 2, 3])
    dst = np.array([1, 2, 3, 0, 2, 0, 1, 0])
    relation = np.array([0, 1, 3, 0, 1, 2, 2, 3])
    flat = np.array([1.0, 1.0, 1.0, 5.0, 5.0, -2.0, -2.0, 7.0])
    spread = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0])
    graph = build_graph(src, dst, 4, relation=relation, relation_names=("a", "b", "c", "d"),
                        features=np.column_stack([flat, spread]), feature_names=("flat", "spread"))
    scale = make_weighting("scale", graph)
    assert inert_parameters(scale, scale.theta0) == ["scale:c"]
    assert inert_parameters(scale, np.array([0.3, -1.0, 0.7, 1.2])) == ["scale:c"]
    features = make_weighting("features", graph)
    assert inert_parameters(features, np.array([0.4, -0.2])) == ["feat:flat"]
    single = build_graph(src, dst, 4)
    assert inert_parameters(make_weighting("scale", single), np.zeros(1)) == ["scale:edge"]  # one relation
    assert inert_parameters(make_weighting("mixture", graph), np.zeros(4)) == []
