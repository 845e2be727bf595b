"""Loading the input tables: exact arrays, id typing, policies, and one error per bad input."""

from __future__ import annotations

import gzip
import re
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given
from hypothesis import strategies as st

from fitrank.errors import ConfigError, DataError
from fitrank.graph import SPLITS, build_graph
from fitrank.tables import _factorise, _relations, _sort_edges, load_dataset, random_split, read_edges, read_pairs

GOOD_EDGES = "source,target\na,b\nb,c\nc,a\n"
GOOD_PAIRS = "preferred,other\na,b\nb,c\n"


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text)
    return path


def graph_arrays(graph) -> dict:
    return {
        "src": graph.src,
        "dst": graph.dst,
        "indptr": graph.indptr,
        "base": graph.base,
        "relation": graph.relation,
        "features": graph.features,
        "node_ids": graph.node_ids,
        "teleport": graph.teleport,
    }


def assert_same_dataset(a, b) -> None:
    for name, value in graph_arrays(a.graph).items():
        np.testing.assert_array_equal(value, graph_arrays(b.graph)[name], err_msg=name)
    assert a.graph.relation_names == b.graph.relation_names
    assert a.graph.feature_names == b.graph.feature_names
    for name in ("preferred", "other", "weight", "split"):
        np.testing.assert_array_equal(getattr(a.pairs, name), getattr(b.pairs, name), err_msg=name)


# --------------------------------------------------------------------------- exact round trip


def test_hand_built_table_gives_exact_graph_arrays(tmp_path):
    edges = write(
        tmp_path,
        "edges.csv",
        "source,target,relation,weight,age\n"
        "p,q,works_with,2,1.5\n"
        "q,r,reports_to,1,0\n"
        "r,p,works_with,0.5,-2\n"
        "p,r,reports_to,3,4\n",
    )
    graph = read_edges(edges)
    # ids in order of first appearance, row by row: p, q, r
    assert list(graph.node_ids) == ["p", "q", "r"]
    # relation codes follow the labels sorted as text
    assert graph.relation_names == ("reports_to", "works_with")
    assert graph.feature_names == ("age",)
    # edges sorted by (target, source): r->p, p->q, p->r, q->r
    np.testing.assert_array_equal(graph.src, [2, 0, 0, 1])
    np.testing.assert_array_equal(graph.dst, [0, 1, 2, 2])
    np.testing.assert_array_equal(graph.indptr, [0, 1, 2, 4])
    np.testing.assert_array_equal(graph.base, [0.5, 2.0, 3.0, 1.0])
    np.testing.assert_array_equal(graph.relation, [1, 1, 0, 0])
    np.testing.assert_array_equal(graph.features, [[-2.0], [1.5], [4.0], [0.0]])
    np.testing.assert_array_equal(graph.teleport, np.full(3, 1 / 3))
    assert graph.src.dtype == np.int64 and graph.base.dtype == np.float64


def test_defaults_without_optional_columns(tmp_path):
    graph = read_edges(write(tmp_path, "e.csv", GOOD_EDGES))
    np.testing.assert_array_equal(graph.base, np.ones(3))
    np.testing.assert_array_equal(graph.relation, np.zeros(3))
    assert graph.relation_names == ("",)
    assert graph.features.shape == (3, 0) and graph.feature_names == ()


def test_a_true_false_column_is_a_zero_one_feature(tmp_path):
    graph = read_edges(write(tmp_path, "e.csv", "source,target,verified\na,b,true\nb,c,false\nc,a,TRUE\n"))
    assert graph.feature_names == ("verified",)
    by_source = dict(zip(graph.src.tolist(), graph.features[:, 0].tolist()))  # a, b, c are nodes 0, 1, 2
    assert by_source == {0: 1.0, 1: 0.0, 2: 1.0}


def test_node_order_is_first_appearance_row_by_row(tmp_path):
    graph = read_edges(write(tmp_path, "e.csv", "source,target\nd,a\nc,d\nb,e\n"))
    assert list(graph.node_ids) == ["d", "a", "c", "b", "e"]


# --------------------------------------------------------------------------- id typing


def test_integer_ids_stay_integers(tmp_path):
    graph = read_edges(write(tmp_path, "e.csv", "source,target\n10,20\n20,-5\n"))
    assert graph.node_ids.dtype == np.int64
    assert list(graph.node_ids) == [10, 20, -5]


def test_leading_zero_forces_text_ids_and_keeps_01_apart_from_1(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\n01,1\n1,2\n")
    pairs = write(tmp_path, "p.csv", "preferred,other\n1,01\n")
    data = load_dataset(edges, pairs)
    assert list(data.graph.node_ids) == ["01", "1", "2"]
    assert all(isinstance(node, str) for node in data.graph.node_ids)
    assert (data.pairs.preferred[0], data.pairs.other[0]) == (1, 0)


def test_pair_id_with_leading_zero_is_not_an_integer_node(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\n1,2\n2,3\n")
    pairs = write(tmp_path, "p.csv", "preferred,other\n2,3\n01,2\n")
    with pytest.raises(DataError) as err:
        load_dataset(edges, pairs)
    assert (err.value.row, err.value.column) == (2, "preferred")
    assert "'01'" in str(err.value)


def test_parquet_integer_edges_with_csv_pairs(tmp_path):
    edges = tmp_path / "e.parquet"
    pd.DataFrame({"source": [7, 8], "target": [8, 9]}).to_parquet(edges)
    pairs = write(tmp_path, "p.csv", "preferred,other,split\n9,7,train\n")
    data = load_dataset(edges, pairs)
    assert list(data.graph.node_ids) == [7, 8, 9]
    np.testing.assert_array_equal(data.pairs.preferred, [2])
    np.testing.assert_array_equal(data.pairs.other, [0])


def test_pairs_against_a_graph_built_in_memory(tmp_path):
    # graphs from the generator carry the default ids 0..n-1
    graph = build_graph(np.array([0, 1, 2]), np.array([1, 2, 0]), 3)
    pairs = read_pairs(write(tmp_path, "p.csv", "preferred,other,split\n2,0,test\n"), graph)
    assert (pairs.preferred[0], pairs.other[0], pairs.split[0]) == (2, 0, SPLITS.index("test"))


def test_text_and_integer_id_columns_are_unified_as_text(tmp_path):
    edges = tmp_path / "e.parquet"
    pd.DataFrame({"source": [1, 2], "target": ["2", "x"]}).to_parquet(edges)
    graph = read_edges(edges)
    assert list(graph.node_ids) == ["1", "2", "x"]


# --------------------------------------------------------------------------- CSV and Parquet agree


def random_frames(rng: np.random.Generator, text_ids: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    num_nodes, num_edges, num_pairs = 40, 300, 120
    ids = np.array([f"n{i}" for i in range(num_nodes)]) if text_ids else rng.permutation(1000)[:num_nodes]
    src, dst = rng.integers(0, num_nodes, num_edges), rng.integers(0, num_nodes, num_edges)
    edges = pd.DataFrame(
        {
            "source": ids[src],
            "target": ids[dst],
            "relation": rng.choice(["follows", "cites", "quotes"], num_edges),
            "weight": rng.uniform(0.1, 3.0, num_edges),
            "length": rng.normal(size=num_edges),
            "count": rng.integers(0, 9, num_edges),
        }
    )
    a = rng.integers(0, num_nodes, num_pairs)
    b = (a + rng.integers(1, num_nodes, num_pairs)) % num_nodes
    pairs = pd.DataFrame(
        {
            "preferred": ids[a],
            "other": ids[b],
            "weight": rng.uniform(0.5, 2.0, num_pairs),
            "split": rng.choice(list(SPLITS), num_pairs),
        }
    )
    return edges, pairs


@pytest.mark.parametrize("text_ids", [False, True])
def test_csv_and_parquet_give_identical_datasets(tmp_path, text_ids):
    edges, pairs = random_frames(np.random.default_rng(3), text_ids)
    edges.to_csv(tmp_path / "e.csv", index=False)
    pairs.to_csv(tmp_path / "p.csv", index=False)
    edges.to_parquet(tmp_path / "e.parquet")
    pairs.to_parquet(tmp_path / "p.pq")
    from_csv = load_dataset(tmp_path / "e.csv", tmp_path / "p.csv")
    from_parquet = load_dataset(tmp_path / "e.parquet", tmp_path / "p.pq")
    assert_same_dataset(from_csv, from_parquet)
    assert from_csv.graph.node_ids.dtype == (object if text_ids else np.int64)
    assert from_csv.graph.feature_names == ("length", "count")
    assert [note.split(": ", 1)[1] for note in from_csv.notes] == [
        note.split(": ", 1)[1] for note in from_parquet.notes
    ]


def test_gzip_csv_reads_like_plain_csv(tmp_path):
    plain = write(tmp_path, "e.csv", GOOD_EDGES)
    packed = tmp_path / "e.csv.gz"
    packed.write_bytes(gzip.compress(GOOD_EDGES.encode()))
    for name, value in graph_arrays(read_edges(plain)).items():
        np.testing.assert_array_equal(value, graph_arrays(read_edges(packed))[name], err_msg=name)


def test_byte_order_mark_before_header_is_ignored(tmp_path):
    path = tmp_path / "e.csv"
    path.write_bytes(b"\xef\xbb\xbf" + GOOD_EDGES.encode())
    assert read_edges(path).n == 3


# --------------------------------------------------------------------------- policies


def test_duplicate_edges_are_summed_with_weighted_mean_features(tmp_path):
    edges = write(
        tmp_path,
        "e.csv",
        "source,target,relation,weight,age\n"
        "a,b,x,1,10\n"
        "a,b,y,5,7\n"  # other relation: a separate edge
        "a,b,x,3,2\n"
        "b,a,x,2,1\n",
    )
    notes: list[str] = []
    graph = read_edges(edges, notes=notes)
    # sorted by (target, source, relation): b->a x, a->b x, a->b y
    np.testing.assert_array_equal(graph.src, [1, 0, 0])
    np.testing.assert_array_equal(graph.relation, [0, 0, 1])
    np.testing.assert_array_equal(graph.base, [2.0, 4.0, 5.0])
    # (1 * 10 + 3 * 2) / (1 + 3) = 4
    np.testing.assert_array_equal(graph.features[:, 0], [1.0, 4.0, 7.0])
    assert any("merged" in note and note.endswith(": 1") for note in notes)


def test_merged_features_of_huge_weights_stay_finite(tmp_path):
    # weights near the float range are valid; their products with the features are not needed
    edges = write(tmp_path, "e.csv", "source,target,weight,age\na,b,5e307,2\na,b,5e307,4\nb,a,1,1\n")
    with np.errstate(all="raise"):
        graph = read_edges(edges)
    np.testing.assert_array_equal(graph.base, [1.0, 1e308])
    np.testing.assert_allclose(graph.features[:, 0], [1.0, 3.0], rtol=1e-15)


def test_merged_rows_with_equal_features_keep_them_exactly(tmp_path):
    # 1.3 averaged with weights 0.1, 0.2, 0.7 comes out 1.2999999999999998 in floating point; merged rows that
    # agree must keep their value bit for bit, or a constant column would vary by rounding
    rows = "".join(f"a,b,{w},1.3,{f}\n" for w, f in ((0.1, 5), (0.2, 6), (0.7, 7))) + "b,a,1,1.3,2\n"
    graph = read_edges(write(tmp_path, "e.csv", "source,target,weight,const,varies\n" + rows))
    assert graph.features[:, 0].tolist() == [1.3, 1.3]
    np.testing.assert_allclose(graph.features[:, 1], [2.0, 0.5 + 1.2 + 4.9], rtol=1e-15)


def test_self_loops_are_kept_and_counted(tmp_path):
    notes: list[str] = []
    graph = read_edges(write(tmp_path, "e.csv", "source,target\na,a\na,b\nb,b\n"), notes=notes)
    assert graph.num_edges == 3
    assert int(np.count_nonzero(graph.src == graph.dst)) == 2
    assert any(note.startswith(f"{tmp_path / 'e.csv'}: self-loops") and note.endswith(": 2") for note in notes)


def test_contradictory_and_repeated_pairs_are_kept_and_counted(tmp_path):
    edges = write(tmp_path, "e.csv", GOOD_EDGES)
    pairs = write(
        tmp_path,
        "p.csv",
        "preferred,other\na,b\nb,a\na,b\nb,c\nc,b\nc,a\n",
    )
    data = load_dataset(edges, pairs)
    assert len(data.pairs) == 6
    both_ways = [note for note in data.notes if "both directions" in note]
    repeated = [note for note in data.notes if "repeating an earlier" in note]
    assert len(both_ways) == 1 and both_ways[0].endswith(": 2")  # {a,b} and {b,c}
    assert len(repeated) == 1 and repeated[0].endswith(": 1")


def test_teleport_table_adds_isolated_nodes_and_zeroes_unlisted_ones(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\na,b\nb,c\n")
    nodes = write(tmp_path, "n.csv", "node,teleport\nc,3\nz,1\na,0\n")
    pairs = write(tmp_path, "p.csv", "preferred,other\nz,a\n")
    data = load_dataset(edges, pairs, nodes)
    graph = data.graph
    assert list(graph.node_ids) == ["a", "b", "c", "z"]
    np.testing.assert_array_equal(graph.teleport, [0.0, 0.0, 0.75, 0.25])
    assert np.all(graph.indptr[3:] == graph.num_edges)  # z has no in-edge
    assert any("isolated" in note and note.endswith(": 1") for note in data.notes)
    assert any("teleport weight 0: 1" in note for note in data.notes)  # b is not listed
    assert data.sources == {"edges": str(edges), "nodes": str(nodes), "pairs": str(pairs)}


def test_weights_that_sum_beyond_the_float_range_keep_their_ratios(tmp_path):
    # pair and teleport weights count only relative to their sums, which must stay finite; and an
    # edge table whose total overflows is fine as long as no node's out-weights do
    edges = write(tmp_path, "e.csv", "source,target,weight\na,b,1e308\nb,c,1e308\nc,a,1e308\n")
    nodes = write(tmp_path, "n.csv", "node,teleport\na,1e308\nb,1e308\nc,5e307\n")
    pairs = write(tmp_path, "p.csv", "preferred,other,weight\na,b,1e308\nb,c,1e308\nc,a,5e307\n")
    data = load_dataset(edges, pairs, nodes)
    np.testing.assert_allclose(data.pairs.weight, [1.0, 1.0, 0.5], rtol=1e-15)
    np.testing.assert_allclose(data.graph.teleport / data.graph.teleport.sum(), [0.4, 0.4, 0.2], rtol=1e-15)
    assert sum("divided by its largest value" in note for note in data.notes) == 2
    np.testing.assert_array_equal(data.graph.base, [1e308] * 3)


def test_node_table_without_teleport_column_keeps_uniform_teleport(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\n1,2\n")
    nodes = write(tmp_path, "n.csv", "node\n3\n1\n")
    graph = read_edges(edges, nodes)
    assert list(graph.node_ids) == [1, 2, 3]
    np.testing.assert_array_equal(graph.teleport, np.full(3, 1 / 3))


# --------------------------------------------------------------------------- splits


def test_random_split_is_reproducible_with_exact_proportions():
    first = random_split(1000, seed=11)
    np.testing.assert_array_equal(first, random_split(1000, seed=11))
    assert not np.array_equal(first, random_split(1000, seed=12))
    np.testing.assert_array_equal(np.bincount(first, minlength=3), [700, 150, 150])
    assert first.dtype == np.int8


@pytest.mark.parametrize("num_pairs", [1, 2, 7, 101])
def test_random_split_counts_sum_and_stay_within_one(num_pairs):
    fractions = (0.6, 0.25, 0.15)
    counts = np.bincount(random_split(num_pairs, 0, fractions), minlength=3)
    assert counts.sum() == num_pairs
    assert np.all(np.abs(counts - np.array(fractions) * num_pairs) < 1)


def test_load_dataset_split_is_seeded(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\n" + "".join(f"{i},{i + 1}\n" for i in range(60)))
    pairs = write(tmp_path, "p.csv", "preferred,other\n" + "".join(f"{i},{i + 1}\n" for i in range(60)))
    one = load_dataset(edges, pairs, seed=4)
    two = load_dataset(edges, pairs, seed=4)
    np.testing.assert_array_equal(one.pairs.split, two.pairs.split)
    np.testing.assert_array_equal(np.bincount(one.pairs.split, minlength=3), [42, 9, 9])
    other = load_dataset(edges, pairs, seed=5, split_fractions=(0.5, 0.5, 0.0))
    np.testing.assert_array_equal(np.bincount(other.pairs.split, minlength=3), [30, 30, 0])
    assert any("no pairs in split test" in note for note in other.notes)
    assert any("seed 4" in note for note in one.notes)


def test_split_column_ignores_case_and_spaces(tmp_path):
    edges = write(tmp_path, "e.csv", GOOD_EDGES)
    pairs = write(tmp_path, "p.csv", "preferred,other,split\na,b, Train\nb,c,VALID\nc,a,test\n")
    data = load_dataset(edges, pairs)
    np.testing.assert_array_equal(data.pairs.split, [0, 1, 2])
    assert not any("at random" in note for note in data.notes)


@pytest.mark.parametrize("fractions", [(0.5, 0.5, 0.5), (1.0, 0.0), (-0.1, 0.6, 0.5), (float("nan"), 0.5, 0.5)])
def test_bad_split_fractions_are_refused(fractions):
    with pytest.raises(ConfigError, match="split_fractions"):
        random_split(10, 0, fractions)


# --------------------------------------------------------------------------- errors

# (file that is wrong, edges text, nodes text or None, pairs text, row, column, words in the message)
BAD_INPUTS = {
    "header only": ("edges", "source,target\n", None, GOOD_PAIRS, None, None, "no data rows"),
    "empty file": ("edges", "", None, GOOD_PAIRS, None, None, "empty"),
    "missing source": ("edges", "src,target\na,b\n", None, GOOD_PAIRS, None, None, "missing required column 'source'"),
    "duplicate header": ("edges", "source,target,source\na,b,c\n", None, GOOD_PAIRS, None, "source", "twice"),
    "no header row": ("edges", "1,2\n2,3\n", None, GOOD_PAIRS, None, None, "lack a header row"),
    "no header row, repeated value": ("edges", "1,1\n2,3\n", None, GOOD_PAIRS, None, "1", "lack a header row"),
    "ragged row": ("edges", "source,target\na,b\n\nb,c,d\n", None, GOOD_PAIRS, 2, None, "Expected 2 columns, got 3"),
    "zero weight": ("edges", "source,target,weight\na,b,1\nb,c,2\nc,a,0\n", None, GOOD_PAIRS, 3, "weight", "> 0"),
    "negative weight": ("edges", "source,target,weight\na,b,-1\nb,c,2\n", None, GOOD_PAIRS, 1, "weight", "-1.0"),
    "empty weight": ("edges", "source,target,weight\na,b,1\nb,c,\n", None, GOOD_PAIRS, 2, "weight", "nan"),
    "inf weight": ("edges", "source,target,weight\na,b,inf\nb,c,1\n", None, GOOD_PAIRS, 1, "weight", "finite"),
    # every weighting divides by a node's summed weights: an infinite sum must not pass as a number
    "out-weights overflow": ("edges", "source,target,weight\na,b,1\nc,a,1\nb,c,1e308\nb,a,1e308\n", None, GOOD_PAIRS, 3,
                             "weight", "node 'b'"),
    "merged rows overflow": ("edges", "source,target,weight\na,b,1\nb,c,1e308\nc,a,1\nb,c,1e308\n", None, GOOD_PAIRS, 2,
                             "weight", "divide the whole weight column"),
    "text weight": ("edges", "source,target,weight\na,b,1\nb,c,heavy\n", None, GOOD_PAIRS, 2, "weight", "'heavy' is not a number"),
    "text feature": ("edges", "source,target,colour\na,b,red\nb,c,blue\n", None, GOOD_PAIRS, 1, "colour", "drop the column or make it numeric"),
    "NaN feature": ("edges", "source,target,age\na,b,1\nb,c,\n", None, GOOD_PAIRS, 2, "age", "not a finite number"),
    "inf feature": ("edges", "source,target,age,size\na,b,1,2\nb,c,3,-inf\n", None, GOOD_PAIRS, 2, "size", "-inf"),
    "empty source": ("edges", "source,target\na,b\n,c\n", None, GOOD_PAIRS, 2, "source", "missing node id"),
    "blank target": ("edges", "source,target\na,b\nb,  \n", None, GOOD_PAIRS, 2, "target", "missing node id"),
    "NaN target": ("edges", "source,target\na,b\nb,NaN\n", None, GOOD_PAIRS, 2, "target", "missing node id"),
    "empty relation": ("edges", "source,target,relation\na,b,x\nb,c,\n", None, GOOD_PAIRS, 2, "relation", "missing relation label"),
    "blank line not counted": ("edges", "source,target\na,b\n\nb,\n", None, GOOD_PAIRS, 2, "target", "missing node id"),
    "unknown preferred": ("pairs", GOOD_EDGES, None, "preferred,other\na,b\nzz,a\n", 2, "preferred", "unknown node 'zz'"),
    "unknown other": ("pairs", GOOD_EDGES, None, "preferred,other\na,q\nzz,a\n", 1, "other", "unknown node 'q'"),
    "same node": ("pairs", GOOD_EDGES, None, "preferred,other\na,b\nc,c\n", 2, None, "same node 'c'"),
    "unknown split": ("pairs", GOOD_EDGES, None, "preferred,other,split\na,b,train\nb,c,holdout\n", 2, "split", "unknown split 'holdout'"),
    "empty split": ("pairs", GOOD_EDGES, None, "preferred,other,split\na,b,\n", 1, "split", "unknown split"),
    "NaN pair weight": ("pairs", GOOD_EDGES, None, "preferred,other,weight\na,b,1\nb,c,NaN\n", 2, "weight", "nan"),
    "zero pair weight": ("pairs", GOOD_EDGES, None, "preferred,other,weight\na,b,0\n", 1, "weight", "> 0"),
    "extra pair column": ("pairs", GOOD_EDGES, None, "preferred,other,why\na,b,x\n", None, "why", "unexpected column"),
    "pairs header only": ("pairs", GOOD_EDGES, None, "preferred,other\n", None, None, "no data rows"),
    "negative teleport": ("nodes", GOOD_EDGES, "node,teleport\na,1\nb,-2\n", GOOD_PAIRS, 2, "teleport", ">= 0"),
    "NaN teleport": ("nodes", GOOD_EDGES, "node,teleport\na,1\nb,\n", GOOD_PAIRS, 2, "teleport", "nan"),
    "all-zero teleport": ("nodes", GOOD_EDGES, "node,teleport\na,0\nb,0\n", GOOD_PAIRS, None, "teleport", "every teleport weight is 0"),
    "duplicate node": ("nodes", GOOD_EDGES, "node,teleport\na,1\nb,1\na,2\n", GOOD_PAIRS, 3, "node", "'a' is listed twice (first at row 1)"),
    "extra node column": ("nodes", GOOD_EDGES, "node,telport\na,1\n", GOOD_PAIRS, None, "telport", "unexpected column"),
    "missing node column": ("nodes", GOOD_EDGES, "id,teleport\na,1\n", GOOD_PAIRS, None, None, "missing required column 'node'"),
}


@pytest.mark.parametrize("case", BAD_INPUTS.values(), ids=BAD_INPUTS.keys())
def test_bad_input_names_file_row_and_column(tmp_path, case):
    wrong, edges_text, nodes_text, pairs_text, row, column, words = case
    paths = {
        "edges": write(tmp_path, "edges.csv", edges_text),
        "nodes": None if nodes_text is None else write(tmp_path, "nodes.csv", nodes_text),
        "pairs": write(tmp_path, "pairs.csv", pairs_text),
    }
    with pytest.raises(DataError) as err:
        load_dataset(paths["edges"], paths["pairs"], paths["nodes"])
    message = str(err.value)
    assert message.startswith(str(paths[wrong]))
    assert words in message
    assert err.value.row == row
    assert err.value.column == column
    if row is not None:
        assert f"row {row}" in message
    if column is not None:
        assert f"column '{column}'" in message
    assert "\n" not in message


def test_missing_file(tmp_path):
    with pytest.raises(DataError, match="no such file") as err:
        read_edges(tmp_path / "absent.csv")
    assert str(tmp_path / "absent.csv") in str(err.value)


def test_unknown_suffix(tmp_path):
    with pytest.raises(DataError, match=r"edges\.txt: unknown table format"):
        read_edges(write(tmp_path, "edges.txt", GOOD_EDGES))


def test_folder_instead_of_file(tmp_path):
    (tmp_path / "edges.csv").mkdir()
    with pytest.raises(DataError, match="not a regular file"):
        read_edges(tmp_path / "edges.csv")


@pytest.mark.parametrize("content, message", [
    (b"source,target\na,b\n\nb,\xe9t\xe9\n", r"edges\.csv, row 2: this row is not UTF-8 text"),  # Latin-1 bytes
    (b"source,t\xe9rget\na,b\n", r"edges\.csv: the header is not UTF-8 text"),
    (bytes(range(256)) * 4, r"edges\.csv: not a text file \(it holds NUL bytes\)"),
    (b"source,target\ra,b\rb,\xe9\r", r"edges\.csv, row 2: this row is not UTF-8 text"),  # old line ends
    ("source,target\na,b\n".encode("utf-16"), r"edges\.csv: this is UTF-16 text; save the file as UTF-8"),
])
def test_csv_that_is_not_utf8_text_says_so_and_where(tmp_path, content, message):
    path = tmp_path / "edges.csv"
    path.write_bytes(content)
    with pytest.raises(DataError, match=message):
        read_edges(path)


@pytest.mark.parametrize("name, content", [
    ("edges.csv.gz", b"not gzip"),
    ("edges.csv.bz2", b"junk"),
    ("edges.csv.gz", gzip.compress(("source,target\n" + "".join(f"n{i * 7919 % 10007},n{i * 104729 % 10009}\n"
                                                                 for i in range(5000))).encode())[:3000]),  # cut short
])
def test_a_damaged_compressed_table_is_one_line_naming_the_file(tmp_path, name, content):
    path = tmp_path / name
    path.write_bytes(content)
    with pytest.raises(DataError, match=rf"{re.escape(name)}: cannot be decompressed \(.+\); the file is damaged"):
        read_edges(path)


def test_binary_bytes_without_a_line_end_are_not_called_empty(tmp_path):
    path = tmp_path / "edges.csv"
    path.write_bytes(bytes([0xC3, 0x28, 0xA0, 0xA1, 0xE2, 0x28, 0xA1, 0xF0, 0x28, 0x8C, 0xBC]))  # no NUL, no newline
    with pytest.raises(DataError, match=r"edges\.csv: the header is not UTF-8 text"):
        read_edges(path)


def test_a_parquet_file_named_csv_is_named_as_such(tmp_path):
    path = tmp_path / "edges.csv"
    pd.DataFrame({"source": ["a", "b"], "target": ["b", "c"]}).to_parquet(path)
    with pytest.raises(DataError, match=r"edges\.csv: this is a Parquet file, not CSV text; give it a \.parquet name"):
        read_edges(path)


def test_corrupt_parquet(tmp_path):
    path = tmp_path / "edges.parquet"
    path.write_bytes(b"this is not parquet at all")
    with pytest.raises(DataError, match=r"edges\.parquet: cannot read as Parquet"):
        read_edges(path)


@pytest.mark.parametrize(
    "frame, row, words",
    [
        (pd.DataFrame({"source": [1.0, np.nan], "target": [2.0, 3.0]}), 2, "missing node id"),
        (pd.DataFrame({"source": [1.0, 2.5], "target": [2.0, 3.0]}), 2, "2.5 is not an integer"),
        (pd.DataFrame({"source": ["a", None], "target": ["b", "c"]}), 2, "missing node id"),
    ],
)
def test_bad_ids_in_parquet(tmp_path, frame, row, words):
    path = tmp_path / "edges.parquet"
    frame.to_parquet(path)
    with pytest.raises(DataError) as err:
        read_edges(path)
    assert (err.value.row, err.value.column) == (row, "source")
    assert words in str(err.value)


def test_integral_float_ids_in_parquet_become_integers(tmp_path):
    path = tmp_path / "edges.parquet"
    pd.DataFrame({"source": [1.0, 2.0], "target": [2.0, 3.0]}).to_parquet(path)
    graph = read_edges(path)
    assert graph.node_ids.dtype == np.int64 and list(graph.node_ids) == [1, 2, 3]


# --------------------------------------------------------------------------- property: against a plain-Python reference

edge_rows = st.lists(
    st.tuples(
        st.integers(0, 5),
        st.integers(0, 5),
        st.sampled_from(["u", "v"]),
        st.sampled_from([0.25, 0.5, 1.0, 3.0]),
        st.integers(-3, 3),
    ),
    min_size=1,
    max_size=25,
)


@given(rows=edge_rows, row_group=st.integers(1, 6))
def test_merged_edges_match_a_dictionary_reference(tmp_path_factory, rows, row_group):
    folder = tmp_path_factory.mktemp("prop")
    text = "source,target,relation,weight,score\n" + "".join(f"{s},{t},{r},{w},{f}\n" for s, t, r, w, f in rows)
    graph = read_edges(write(folder, "e.csv", text))
    # The same rows as Parquet in row groups of `row_group` rows: each group has its own
    # relation dictionary, which the reader must merge.
    frame = pd.DataFrame(rows, columns=["source", "target", "relation", "weight", "score"])
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), folder / "e.parquet", row_group_size=row_group)
    for name, value in graph_arrays(read_edges(folder / "e.parquet")).items():
        np.testing.assert_array_equal(value, graph_arrays(graph)[name], err_msg=name)

    # Reference: ids by first appearance, then per (source, target, relation) the
    # summed weight and the weight-averaged feature, by a dictionary walk.
    order: dict[int, None] = {}
    sums: dict[tuple, list[float]] = {}
    for s, t, r, w, f in rows:
        order.setdefault(s)
        order.setdefault(t)
        total = sums.setdefault((s, t, r), [0.0, 0.0])
        total[0] += w
        total[1] += w * f
    assert list(graph.node_ids) == list(order)
    labels = sorted({r for _, _, r, _, _ in rows})
    assert graph.relation_names == tuple(labels)
    got = {
        (int(graph.node_ids[j]), int(graph.node_ids[i]), labels[k]): (b, phi)
        for j, i, k, b, phi in zip(graph.src, graph.dst, graph.relation, graph.base, graph.features[:, 0])
    }
    assert got.keys() == sums.keys()
    for key, (weight, weighted) in sums.items():
        assert math.isclose(got[key][0], weight, rel_tol=1e-12)
        assert math.isclose(got[key][1], weighted / weight, rel_tol=1e-12, abs_tol=1e-12)
    assert np.all(np.diff(graph.dst) >= 0)


# --------------------------------------------------------------------------- dictionary columns, chunks and sort keys


def test_parquet_row_groups_with_their_own_dictionaries_read_like_csv(tmp_path):
    rng = np.random.default_rng(5)
    names = np.array([f"v{i:03d}" for i in range(60)], dtype=object)
    frame = pd.DataFrame({
        "source": names[rng.integers(0, 60, 400)],
        "target": names[rng.integers(0, 60, 400)],
        "relation": np.array(["cites", "links", "quotes"], dtype=object)[rng.integers(0, 3, 400)],
        "weight": rng.uniform(0.5, 2.0, 400),
        "length": rng.normal(size=400),
    })
    frame.to_csv(tmp_path / "e.csv", index=False)
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp_path / "e.parquet", row_group_size=37)
    # the case under test: the Parquet reader hands over several different dictionaries
    chunks = pq.ParquetFile(tmp_path / "e.parquet", read_dictionary=["source"]).read().column("source").chunks
    assert len({tuple(chunk.dictionary.to_pylist()) for chunk in chunks}) > 1
    from_csv, from_parquet = read_edges(tmp_path / "e.csv"), read_edges(tmp_path / "e.parquet")
    for name, value in graph_arrays(from_csv).items():
        np.testing.assert_array_equal(value, graph_arrays(from_parquet)[name], err_msg=name)
    assert from_csv.relation_names == from_parquet.relation_names == ("cites", "links", "quotes")


def test_unused_categories_of_categorical_columns_add_no_node_and_no_relation(tmp_path):
    frame = pd.DataFrame({
        "source": pd.Categorical(["a", "b", "a"], categories=["ghost", "a", "b"]),
        "target": pd.Categorical(["b", "c", "c"], categories=["c", "b", "unseen"]),
        "relation": pd.Categorical(["x", "y", "x"], categories=["y", "never", "x"]),
    })
    frame.to_parquet(tmp_path / "e.parquet")
    # the case under test: the file keeps the unused categories in its dictionaries
    chunk = pq.ParquetFile(tmp_path / "e.parquet", read_dictionary=["source"]).read().column("source").chunk(0)
    assert "ghost" in chunk.dictionary.to_pylist()
    graph = read_edges(tmp_path / "e.parquet")
    assert list(graph.node_ids) == ["a", "b", "c"]  # first appearance, not category order
    assert graph.relation_names == ("x", "y")
    np.testing.assert_array_equal(graph.src, [0, 0, 1])  # sorted by (target, source): a->b, a->c, b->c
    np.testing.assert_array_equal(graph.dst, [1, 2, 2])
    np.testing.assert_array_equal(graph.relation, [0, 0, 1])


cells = st.lists(st.one_of(st.none(), st.sampled_from("abcd")), min_size=1, max_size=12)


@st.composite
def dictionary_chunks(draw):
    """Chunks of a dictionary column as a file could hold them: dictionaries that repeat
    values, hold nulls or values no cell uses, and cells that are null."""
    chunks = []
    for _ in range(draw(st.integers(1, 4))):
        dictionary = draw(cells)
        indices = draw(st.lists(st.one_of(st.none(), st.integers(0, len(dictionary) - 1)), min_size=0, max_size=10))
        chunks.append(pa.DictionaryArray.from_arrays(pa.array(indices, type=pa.int32()), pa.array(dictionary, pa.string())))
    return pa.chunked_array(chunks)


@given(column=dictionary_chunks())
def test_factorised_dictionary_column_decodes_to_its_cells(column):
    cells_in_order = column.to_pylist()  # Arrow's own decoding is the reference
    factors = _factorise(column)
    values = factors.values.to_pylist()
    decoded = [None if code < 0 else values[code] for code in factors.codes]
    assert decoded == cells_in_order
    assert None not in values
    used = {int(code) for code in factors.codes if code >= 0}
    assert used == set(range(len(values)))  # every value is used by some cell
    nulls = [row for row, cell in enumerate(cells_in_order) if cell is None]
    assert factors.first_null == (nulls[0] if nulls else None)
    for k in range(len(values)):
        assert factors.first_row[k] == list(factors.codes).index(k)


def test_relation_dictionary_repeating_a_label_gives_one_relation():
    column = pa.DictionaryArray.from_arrays(pa.array([0, 1, 2, 0], type=pa.int32()), pa.array(["x", "y", "x"]))
    codes, names = _relations(pa.table({"relation": column}), "edges.parquet")
    assert names == ("x", "y")
    np.testing.assert_array_equal(codes, [0, 1, 0, 0])


@pytest.mark.parametrize("n", [50, 2**27, 2**40, 2**62])  # one sort, two sorts (twice), lexsort
def test_edge_order_matches_lexsort_at_every_key_width(n):
    rng = np.random.default_rng(n % 1000)
    spots = rng.integers(0, n, 40)  # few distinct nodes, so that triples repeat
    src, dst = spots[rng.integers(0, 40, 1000)], spots[rng.integers(0, 40, 1000)]
    relation = rng.integers(0, 3, 1000)
    order, src_sorted, dst_sorted, relation_sorted, starts = _sort_edges(src, dst, relation, n, 3)
    reference = np.lexsort((relation, src, dst))
    triples = np.stack([dst, src, relation], axis=1)
    np.testing.assert_array_equal(triples[order], triples[reference])
    np.testing.assert_array_equal(np.stack([dst_sorted, src_sorted, relation_sorted], axis=1), triples[reference])
    assert src_sorted.dtype == dst_sorted.dtype == relation_sorted.dtype == np.int64
    expected_starts = np.ones(1000, dtype=bool)
    expected_starts[1:] = (np.diff(triples[reference], axis=0) != 0).any(axis=1)
    np.testing.assert_array_equal(starts, expected_starts)
    assert expected_starts.sum() < 1000  # the case under test: some triples repeat
    np.testing.assert_array_equal(order, reference)  # stable: repeated triples keep file order, as in lexsort


@pytest.mark.parametrize(
    "text, row, column",
    [
        ("source,target,weight,age\na,b,0,1\n,c,1,inf\n", 2, "source"),  # id error, though weight's row is earlier
        ("source,target,weight,relation,age\na,b,1,,1\nb,c,0,x,inf\n", 2, "weight"),
        ("source,target,relation,age\na,b,x,inf\nb,c,,1\n", 2, "relation"),
    ],
)
def test_checks_report_in_column_order_ids_weight_relation_features(tmp_path, text, row, column):
    with pytest.raises(DataError) as err:
        read_edges(write(tmp_path, "e.csv", text))
    assert (err.value.row, err.value.column) == (row, column)
