"""Tests of the synthetic dataset generator (fitrank.generate).

The written tables are read back with the project's loader and checked against
PageRank recomputed from them. The truth is also recomputed outside the
project's solver: with networkx for the scale and feature weightings, with a
dense LAPACK solve for the relation mixture (which networkx cannot express).
"""

from __future__ import annotations

import json
import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fitrank import generate
from fitrank.cli import main
from fitrank.errors import FitrankInputError
from fitrank.graph import SPLITS
from fitrank.pagerank import pagerank
from fitrank.tables import load_dataset
from fitrank.weightings import make_weighting

NODES = 1500
PAIRS = 1500
SEED = 11
KINDS = ("mixture", "scale", "features")


def _write(root, name, nodes=NODES, seed=SEED, weighting="scale", **options):
    options.setdefault("pairs", PAIRS)
    edges, pairs, truth = generate.generate_dataset(nodes, seed, weighting, **options)
    return generate.write_dataset(root / name, edges, pairs, truth)


def _load(paths):
    truth = json.loads(paths["truth"].read_text())
    data = load_dataset(paths["edges"], paths["pairs"])
    weighting = make_weighting(truth["weighting"], data.graph)
    theta = np.array([truth["theta"][name] for name in weighting.param_names])
    x = pagerank(data.graph, weighting, theta, damping=truth["damping"], tol=1e-12).x
    return truth, data, weighting, x


@pytest.fixture(scope="module")
def datasets(tmp_path_factory):
    root = tmp_path_factory.mktemp("generated")
    return {kind: _load(_write(root, kind, weighting=kind)) for kind in KINDS}


# --------------------------------------------------------------------------- consistency with the truth


@pytest.mark.parametrize("kind", KINDS)
def test_noise_free_labels_follow_truth_pagerank_of_written_tables(datasets, kind):
    truth, data, _, x = datasets[kind]
    pairs = data.pairs
    assert data.graph.n == truth["counts"]["nodes"] == NODES
    assert data.graph.num_edges == truth["counts"]["edges"]
    assert len(pairs) == PAIRS
    assert np.all(x[pairs.preferred] > x[pairs.other])


@pytest.mark.parametrize("kind", KINDS)
def test_default_theta_orders_clearly_fewer_pairs_than_truth(datasets, kind):
    truth, data, weighting, _ = datasets[kind]
    x0 = pagerank(data.graph, weighting, weighting.theta0, damping=truth["damping"], tol=1e-12).x
    a, b = x0[data.pairs.preferred], x0[data.pairs.other]
    agreement = np.mean((a > b) + 0.5 * (a == b))  # a tie is a coin flip
    assert agreement <= truth["settings"]["max_theta0_agreement"]
    assert agreement == pytest.approx(truth["checks"]["theta0_agreement_noise_free"], abs=1e-12)


def _networkx_pagerank(graph, edge_weight, damping):
    # networkx spreads dangling mass uniformly and sums nothing for us: merge
    # parallel edges of different relations into one weighted edge first.
    key = graph.src * graph.n + graph.dst
    merged, inverse = np.unique(key, return_inverse=True)
    total = np.bincount(inverse, weights=edge_weight)
    g = nx.DiGraph()
    g.add_nodes_from(range(graph.n))
    g.add_weighted_edges_from(zip((merged // graph.n).tolist(), (merged % graph.n).tolist(), total.tolist()))
    ranks = nx.pagerank(g, alpha=damping, weight="weight", tol=1e-14, max_iter=2000)
    return np.array([ranks[i] for i in range(graph.n)])


@pytest.mark.parametrize("kind", ("scale", "features"))
def test_truth_matches_networkx_pagerank(datasets, kind):
    truth, data, _, x = datasets[kind]
    graph = data.graph
    theta = np.array(list(truth["theta"].values()))
    if kind == "scale":
        # a_ij = b_ij exp(theta_rel): DESIGN.md section 2, relation scale.
        log_factor = theta[graph.relation]
    else:
        # a_ij = b_ij exp(theta . standardised phi_ij); standardisation over edges (DESIGN.md section 2).
        phi = graph.features
        log_factor = ((phi - phi.mean(axis=0)) / phi.std(axis=0)) @ theta
    reference = _networkx_pagerank(graph, graph.base * np.exp(log_factor), truth["damping"])
    assert np.abs(reference - x).sum() < 1e-9
    assert np.all(reference[data.pairs.preferred] > reference[data.pairs.other])


def test_mixture_truth_matches_dense_solve(datasets):
    truth, data, _, x = datasets["mixture"]
    graph = data.graph
    # P = sum_t w_t P_t, each P_t normalised by the relation-t out-weight; a node
    # without relation-t out-edges leaks w_t to the teleport vector (DESIGN.md
    # sections 1 and 2). Reference: a dense LAPACK solve of (I - alpha A) x = (1 - alpha) v.
    w = np.array(list(truth["mixture_weights"].values()))
    out_weight = np.zeros((graph.n, graph.num_relations))
    np.add.at(out_weight, (graph.src, graph.relation), graph.base)
    walk = np.zeros((graph.n, graph.n))
    np.add.at(walk, (graph.dst, graph.src), w[graph.relation] * graph.base / out_weight[graph.src, graph.relation])
    v = np.full(graph.n, 1.0 / graph.n)
    walk += np.outer(v, 1.0 - walk.sum(axis=0))
    alpha = truth["damping"]
    reference = np.linalg.solve(np.eye(graph.n) - alpha * walk, (1 - alpha) * v)
    assert np.abs(reference - x).sum() < 1e-9
    assert np.all(reference[data.pairs.preferred] > reference[data.pairs.other])


def test_flipped_share_is_close_to_noise_rate(datasets, tmp_path):
    noise = 0.2
    truth, data, _, x = _load(_write(tmp_path, "noisy", weighting="scale", noise=noise))
    flipped = x[data.pairs.preferred] < x[data.pairs.other]
    # Each label flips independently with probability q: the flipped count is
    # Binomial(Q, q); allow 4 standard deviations (4 sqrt(q (1 - q) / Q) = 0.041 here).
    assert abs(flipped.mean() - noise) <= 4 * math.sqrt(noise * (1 - noise) / PAIRS)
    assert flipped.sum() == truth["counts"]["flipped_pairs"]
    # Noise draws from its own stream: the same seed gives the same pairs, some reversed.
    clean = datasets["scale"][1].pairs
    assert np.array_equal(np.where(flipped, data.pairs.other, data.pairs.preferred), clean.preferred)
    assert np.array_equal(np.where(flipped, data.pairs.preferred, data.pairs.other), clean.other)


# --------------------------------------------------------------------------- reproducibility


def test_same_seed_same_bytes_other_seed_other_bytes(tmp_path):
    def written(name, seed):
        tables = generate.generate_dataset(400, seed, "features", pairs=200)
        return {fmt: generate.write_dataset(tmp_path / f"{name}-{fmt}", *tables, file_format=fmt)
                for fmt in generate.FORMATS}

    first, again, other = written("first", 3), written("again", 3), written("other", 4)
    for fmt in generate.FORMATS:
        for key in ("edges", "pairs", "truth"):
            assert first[fmt][key].read_bytes() == again[fmt][key].read_bytes()
            assert first[fmt][key].read_bytes() != other[fmt][key].read_bytes()


# --------------------------------------------------------------------------- structure


def test_graph_has_dangling_nodes_heavy_tails_and_every_relation(datasets):
    truth, data, _, _ = datasets["features"]
    graph = data.graph
    out_degree, in_degree = graph.out_degree(), graph.in_degree()
    assert np.count_nonzero(out_degree == 0) == truth["counts"]["dangling_nodes"] > 0.05 * graph.n
    mean_degree = graph.num_edges / graph.n
    # In a graph without heavy tails (Erdos-Renyi, Poisson(10) degrees) a degree of 10 x mean
    # has probability below 1e-60 per node (Chernoff bound; common practice).
    assert in_degree.max() > 10 * mean_degree
    assert out_degree.max() > 5 * mean_degree
    assert np.all(in_degree + out_degree > 0)  # no node is lost when the tables are read back
    assert set(graph.relation_names) == set(truth["relations"]) == set(generate.relation_names(3))
    counts = np.bincount(graph.relation, minlength=graph.num_relations)
    assert np.all(counts > 0.05 * graph.num_edges)


def test_split_sizes_follow_fractions(datasets):
    _, data, _, _ = datasets["mixture"]
    sizes = np.bincount(data.pairs.split, minlength=len(SPLITS))
    assert sizes.tolist() == [1050, 225, 225]  # 0.7 / 0.15 / 0.15 of 1500


def test_pairs_are_distinct_near_in_rank_and_mostly_near_the_top(datasets):
    truth, data, _, x = datasets["scale"]
    s = truth["settings"]
    rank = np.empty(x.size, dtype=np.int64)
    rank[np.argsort(-x, kind="stable")] = np.arange(x.size)
    a, b = rank[data.pairs.preferred], rank[data.pairs.other]
    assert np.all(a != b)
    assert np.unique(np.minimum(a, b) * x.size + np.maximum(a, b)).size == len(data.pairs)
    assert np.all(np.abs(a - b) <= np.maximum(10, np.ceil(s["window"] * np.maximum(a, b))))
    assert np.mean(np.minimum(a, b) < s["top"]) >= s["top_share"] - 0.05


def test_communities_differ_per_relation():
    s = generate.make_settings(3000, 2, "scale")
    g = generate.sample_graph(s, np.random.default_rng(0))
    for t in range(s.relations):
        mine = g.relation == t
        own = np.mean(g.community[t, g.src[mine]] == g.community[t, g.dst[mine]])
        for u in range(s.relations):
            if u != t:
                foreign = np.mean(g.community[u, g.src[mine]] == g.community[u, g.dst[mine]])
                assert own > 0.5 > 0.2 > foreign


def test_features_track_structure():
    s = generate.make_settings(2000, 4, "features", features=len(generate.FEATURE_SIGNALS))
    g = generate.sample_graph(s, np.random.default_rng(1))
    assert sorted(g.feature_signals) == sorted(generate.FEATURE_SIGNALS)
    column = {signal: k for k, signal in enumerate(g.feature_signals)}
    log_in = np.log(np.bincount(g.dst, minlength=g.n)[g.dst])
    assert np.corrcoef(g.features[:, column["target_popularity"]], log_in)[0, 1] > 0.3
    assert np.corrcoef(g.features[:, column["multiplicity"]], np.log(g.weight))[0, 1] > 0.3
    same = g.community[g.relation, g.src] == g.community[g.relation, g.dst]
    feature = g.features[:, column["same_community"]]
    assert abs(feature[same].mean() - feature[~same].mean()) > 0.5 * feature.std()


# --------------------------------------------------------------------------- pair sampling


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(1, 10**6), unique=True, min_size=30, max_size=150), st.integers(0, 2**32 - 1))
def test_sample_pairs_orients_and_skips_ties(values, seed):
    rng = np.random.default_rng(seed)
    distinct = np.asarray(values, dtype=np.float64)
    # Repeat half the values once: ties everywhere, yet every window holds distinct scores.
    x = rng.permutation(np.concatenate([distinct, rng.choice(distinct, distinct.size // 2, replace=False)]))
    preferred, other = generate.sample_pairs(x, 10, rng, top=20, top_share=0.8, window=0.2, min_gap=1e-7)
    assert preferred.size == other.size == 10
    assert np.all(x[preferred] > x[other])
    assert np.unique(np.minimum(preferred, other) * x.size + np.maximum(preferred, other)).size == 10


def test_sample_pairs_refuses_scores_without_order():
    with pytest.raises(FitrankInputError, match="fewer than 2 distinct scores"):
        generate.sample_pairs(np.full(50, 0.02), 10, np.random.default_rng(0), top=5, top_share=1.0,
                              window=0.2, min_gap=1e-4)


# --------------------------------------------------------------------------- command line and files


def test_cli_writes_three_files(tmp_path, capsys):
    out = tmp_path / "cli"
    code = main(["generate", str(out), "--nodes", "300", "--seed", "1", "--weighting", "mixture",
                 "--pairs", "100", "--ids", "int", "--format", "parquet", "--split", "0.8,0.1,0.1"])
    assert code == 0
    assert sorted(p.name for p in out.iterdir()) == ["edges.parquet", "pairs.parquet", "truth.json"]
    data = load_dataset(out / "edges.parquet", out / "pairs.parquet")
    assert np.issubdtype(data.graph.node_ids.dtype, np.integer)
    assert np.bincount(data.pairs.split, minlength=3).tolist() == [80, 10, 10]
    assert "wrote" in capsys.readouterr().out


@pytest.mark.parametrize(
    "argv, fragment",
    [
        (["--nodes", "10"], "nodes must be"),
        (["--noise", "0.5"], "noise must be in [0, 0.5)"),
        (["--noise", "-0.1"], "noise must be in [0, 0.5)"),
        (["--split", "0.5,0.5"], "split needs three fractions"),
        (["--weighting", "scale", "--relations", "1"], "needs at least 2 relations"),
        (["--weighting", "features", "--features", "0"], "needs at least 1 feature"),
    ],
)
def test_cli_bad_arguments_exit_2_with_one_line(tmp_path, capsys, argv, fragment):
    out = tmp_path / "bad"
    assert main(["generate", str(out), "--nodes", "300", *argv]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and fragment in err
    assert not out.exists()


def test_cli_refuses_a_non_empty_folder_and_leaves_it_alone(tmp_path, capsys):
    out = tmp_path / "taken"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    assert main(["generate", str(out), "--nodes", "300"]) == 2
    assert "--force" in capsys.readouterr().err
    assert [p.name for p in out.iterdir()] == ["keep.txt"]


def test_failed_write_leaves_nothing_behind(tmp_path, monkeypatch):
    edges = pd.DataFrame({"source": ["n1"], "target": ["n2"], "relation": ["link_a"], "weight": [1.0]})
    pairs = pd.DataFrame({"preferred": ["n2"], "other": ["n1"], "weight": [1.0], "split": ["train"]})
    truth = {"weighting": "scale"}
    calls = []

    def failing(frame, path, file_format):
        calls.append(path)
        if len(calls) == 2:
            raise OSError("disk full")
        path.write_text("partial")

    monkeypatch.setattr(generate, "_write_table", failing)
    with pytest.raises(OSError):
        generate.write_dataset(tmp_path / "out", edges, pairs, truth)
    assert list(tmp_path.iterdir()) == []


def test_unknown_option_is_refused():
    with pytest.raises(FitrankInputError, match="unknown generator option 'nodez'"):
        generate.generate_dataset(300, 1, "scale", nodez=5)
