"""The graph and the supervision, as index arrays ready for sparse linear algebra.

A :class:`Graph` holds the directed edges ``j -> i`` of one dataset sorted by
target then source, so that the per-edge arrays are, in order, the data of a
CSR matrix whose rows are targets and whose columns are sources: the layout in
which ``P(theta) @ x`` is one sparse mat-vec and only the data array changes
with ``theta``.

:class:`Pairs` holds the preference pairs "preferred ranks above other" as node
indices with a confidence weight and a split code.

Both are plain frozen containers; loaders (``fitrank.tables``) and the
generator (``fitrank.generate``) build them, everything downstream reads them.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from fitrank.errors import FitrankInputError

SPLITS = ("train", "valid", "test")
"""Split names; :attr:`Pairs.split` stores their positions in this tuple."""


@dataclass(frozen=True, eq=False)
class Graph:
    """A directed graph with relation labels, base weights and edge features.

    Attributes:
      n: number of nodes.
      src: (E,) int64, source node index j of each edge.
      dst: (E,) int64, target node index i of each edge; edges are sorted by
        (dst, src) so ``indptr`` is the CSR row pointer over targets.
      indptr: (n + 1,) int64, edges into node i are ``indptr[i]:indptr[i+1]``.
      base: (E,) float64 > 0, base weight b_ij (1 when the data gives none).
      relation: (E,) int64 codes into ``relation_names``.
      relation_names: relation labels, in code order (one entry, ``""``, when
        the data has no relation column).
      features: (E, f) float64 raw numeric edge features (f may be 0).
      feature_names: names of the feature columns, length f.
      node_ids: (n,) original node identifiers, position = node index.
      teleport: (n,) float64 teleport distribution summing to 1.
    """

    n: int
    src: np.ndarray
    dst: np.ndarray
    indptr: np.ndarray
    base: np.ndarray
    relation: np.ndarray
    relation_names: tuple[str, ...]
    features: np.ndarray
    feature_names: tuple[str, ...]
    node_ids: np.ndarray
    teleport: np.ndarray
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def num_edges(self) -> int:
        return int(self.src.shape[0])

    @property
    def num_relations(self) -> int:
        return len(self.relation_names)

    def out_degree(self) -> np.ndarray:
        """(n,) number of out-edges of each node."""
        return np.bincount(self.src, minlength=self.n)

    def in_degree(self) -> np.ndarray:
        """(n,) number of in-edges of each node."""
        return np.diff(self.indptr)

    def relation_out_weight(self) -> np.ndarray:
        """(n, T) float64: S[j, t] = sum of base weights of j's out-edges of relation t."""
        if "relation_out_weight" not in self._cache:
            flat = self.src * self.num_relations + self.relation
            sums = np.bincount(flat, weights=self.base, minlength=self.n * self.num_relations)
            self._cache["relation_out_weight"] = sums.reshape(self.n, self.num_relations)
        return self._cache["relation_out_weight"]

    def out_edges(self) -> tuple[np.ndarray, np.ndarray]:
        """Edges grouped by source: (order, ptr) with ``order[ptr[j]:ptr[j+1]]``
        the edge positions whose source is j."""
        if "out_edges" not in self._cache:
            order = np.argsort(self.src, kind="stable")
            ptr = np.zeros(self.n + 1, dtype=np.int64)
            np.cumsum(np.bincount(self.src, minlength=self.n), out=ptr[1:])
            self._cache["out_edges"] = (order, ptr)
        return self._cache["out_edges"]

    def in_edges_of(self, nodes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(edge ids into ``nodes``, position in ``nodes`` of each edge's target), grouped by node."""
        return _expand_ranges(self.indptr, np.asarray(nodes, dtype=np.int64))

    def out_edges_of(self, nodes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(edge ids out of ``nodes``, position in ``nodes`` of each edge's source), grouped by node."""
        order, ptr = self.out_edges()
        positions, group = _expand_ranges(ptr, np.asarray(nodes, dtype=np.int64))
        return order[positions], group

    def matrix(self, data: np.ndarray) -> sp.csr_matrix:
        """The (n, n) CSR matrix with ``data`` (E,) on this graph's pattern.

        Repeated (i, j) positions (parallel edges of different relations) are
        kept as separate entries; the mat-vec sums them.
        """
        if "csr_index" not in self._cache:
            # 32-bit indices when they fit: the mat-vec is memory-bound, so narrower
            # indices make every PageRank iteration faster.
            index_type = np.int32 if max(self.n, self.num_edges) < 2**31 - 1 else np.int64
            self._cache["csr_index"] = (self.src.astype(index_type), self.indptr.astype(index_type))
        indices, indptr = self._cache["csr_index"]
        data = np.asarray(data, dtype=np.float64)
        mat = sp.csr_matrix((data, indices, indptr), shape=(self.n, self.n), copy=False)
        mat.has_sorted_indices = True
        return mat

    def fingerprint(self) -> str:
        """A short hash of everything that defines the graph (structure, weights,
        relations, features, teleport), used to refuse a saved model built on other data."""
        h = hashlib.sha256()
        h.update(np.int64(self.n).tobytes())
        for arr in (self.src, self.dst, self.base, self.relation, self.features, self.teleport):
            h.update(np.ascontiguousarray(arr).tobytes())
        h.update("\x1f".join(self.relation_names).encode())
        h.update("\x1f".join(self.feature_names).encode())
        return h.hexdigest()[:16]


def _expand_ranges(ptr: np.ndarray, groups: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Concatenated ranges ptr[g]:ptr[g+1] for each g in ``groups``, and each entry's group position."""
    counts = ptr[groups + 1] - ptr[groups]
    offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    return np.repeat(ptr[groups], counts) + offsets, np.repeat(np.arange(groups.size), counts)


@dataclass(frozen=True, eq=False)
class Pairs:
    """Preference pairs: node ``preferred[q]`` should rank above ``other[q]``.

    Attributes:
      preferred: (Q,) int64 node indices.
      other: (Q,) int64 node indices, never equal to ``preferred``.
      weight: (Q,) float64 > 0 confidence of each pair.
      split: (Q,) int8 positions in :data:`SPLITS`.
    """

    preferred: np.ndarray
    other: np.ndarray
    weight: np.ndarray
    split: np.ndarray

    def __len__(self) -> int:
        return int(self.preferred.shape[0])

    def subset(self, name: str) -> "Pairs":
        """The pairs of one split (``"train"``, ``"valid"`` or ``"test"``)."""
        keep = self.split == SPLITS.index(name)
        return Pairs(self.preferred[keep], self.other[keep], self.weight[keep], self.split[keep])

    def nodes(self) -> np.ndarray:
        """Sorted unique node indices that appear in any pair."""
        return np.unique(np.concatenate([self.preferred, self.other]))


@dataclass(frozen=True, eq=False)
class Dataset:
    """A graph with its supervision and where they came from."""

    graph: Graph
    pairs: Pairs
    sources: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()


def build_graph(
    src: np.ndarray,
    dst: np.ndarray,
    n: int,
    base: np.ndarray | None = None,
    relation: np.ndarray | None = None,
    relation_names: tuple[str, ...] = ("",),
    features: np.ndarray | None = None,
    feature_names: tuple[str, ...] = (),
    node_ids: np.ndarray | None = None,
    teleport: np.ndarray | None = None,
) -> Graph:
    """Assemble a :class:`Graph` from unsorted edge arrays (already validated).

    Sorts edges by (target, source), fills defaults (base 1, one relation, no
    features, ids 0..n-1, uniform teleport) and normalises the teleport vector.

    Args:
      src, dst: (E,) integer node indices in [0, n).
      n: number of nodes.
      base: (E,) positive base weights, default all ones.
      relation: (E,) integer relation codes, default all zero.
      relation_names: labels of the relation codes.
      features: (E, f) numeric features, default (E, 0).
      feature_names: names of the f feature columns.
      node_ids: (n,) original ids, default ``arange(n)``.
      teleport: (n,) non-negative weights, not all zero; default uniform.

    Returns:
      The graph with edges in CSR (target-major) order.
    """
    n = _whole_number(n, "n", low=1)
    src = _indices(src, "src", n)
    dst = _indices(dst, "dst", n)
    num_edges = src.shape[0]
    if dst.shape[0] != num_edges:
        raise FitrankInputError(f"build_graph: src has {num_edges} entries and dst {dst.shape[0]}; "
                                "give one of each per edge")
    base = np.ones(num_edges) if base is None else _per_edge(base, "base", num_edges)
    if not np.all(base > 0):
        first = int(np.argmin(base > 0))
        raise FitrankInputError(f"build_graph: base[{first}] is {base[first]}; base weights must be finite numbers > 0")
    relation = (np.zeros(num_edges, dtype=np.int64) if relation is None
                else _indices(relation, "relation", len(relation_names), what="relation codes"))
    if relation.shape[0] != num_edges:
        raise FitrankInputError(f"build_graph: relation has {relation.shape[0]} entries for {num_edges} edges")
    features = np.zeros((num_edges, 0)) if features is None else _per_edge(features, "features", num_edges)
    if features.ndim == 1:
        features = features[:, None]
    if features.shape[1] != len(feature_names):
        raise FitrankInputError(f"build_graph: features has {features.shape[1]} columns but {len(feature_names)} "
                                "feature_names; name every column")
    if node_ids is not None and len(node_ids) != n:
        raise FitrankInputError(f"build_graph: node_ids has {len(node_ids)} entries; expected n = {n}")
    already_sorted = bool(np.all((dst[1:] > dst[:-1]) | ((dst[1:] == dst[:-1]) & (src[1:] >= src[:-1]))))
    if not already_sorted:  # loaders hand over sorted edges; sorting 10M edges again costs seconds
        order = np.lexsort((src, dst))
        src, dst, base, relation, features = src[order], dst[order], base[order], relation[order], features[order]
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(dst, minlength=n), out=indptr[1:])
    teleport = np.full(n, 1.0 / n) if teleport is None else check_teleport(teleport, n)
    return Graph(
        n=int(n),
        src=src,
        dst=dst,
        indptr=indptr,
        base=base,
        relation=relation,
        relation_names=tuple(relation_names),
        features=np.ascontiguousarray(features),
        feature_names=tuple(feature_names),
        node_ids=np.arange(n) if node_ids is None else np.asarray(node_ids),
        teleport=teleport,
    )


def _whole_number(value, name: str, low: int) -> int:
    try:
        whole = not isinstance(value, (bool, np.bool_)) and float(value).is_integer() and value >= low
    except (TypeError, ValueError):
        whole = False
    if not whole:
        raise FitrankInputError(f"build_graph: {name} = {value!r}; expected a whole number >= {low}")
    return int(value)


def _indices(values, name: str, bound: int, what: str = "node indices") -> np.ndarray:
    """``values`` as (E,) int64, refusing what is not a whole number in [0, bound)."""
    array = np.asarray(values)
    if array.ndim != 1 or array.dtype.kind not in "iuf":
        raise FitrankInputError(f"build_graph: {name} must be a 1-D array of {what}, got dtype {array.dtype} "
                                f"and shape {array.shape}")
    as_int = array.astype(np.int64) if array.dtype.kind == "f" and np.all(np.isfinite(array)) else array
    bad = (as_int != array) | (as_int < 0) | (as_int >= bound)
    if np.any(bad):
        first = int(np.argmax(bad))
        raise FitrankInputError(f"build_graph: {name}[{first}] is {array[first].item()!r}; {what} must be whole "
                                f"numbers in [0, {bound})")
    return as_int.astype(np.int64, copy=False)


def _per_edge(values, name: str, num_edges: int) -> np.ndarray:
    """``values`` as float64 with one finite entry (or row) per edge."""
    array = np.asarray(values, dtype=np.float64)
    if array.ndim == 0 or array.shape[0] != num_edges:
        raise FitrankInputError(f"build_graph: {name} has shape {array.shape}; expected {num_edges} rows, "
                                "one per edge")
    if not np.all(np.isfinite(array)):
        first = int(np.argmin(np.isfinite(array).reshape(num_edges, -1).all(axis=1)))
        raise FitrankInputError(f"build_graph: {name} has a non-finite value on edge {first}")
    return array


def check_teleport(teleport, n: int) -> np.ndarray:
    """Validate a teleport vector and return it normalised to sum 1.

    Args:
      teleport: (n,) non-negative finite weights, not all zero.
      n: number of nodes.

    Returns:
      (n,) float64 summing to 1.
    """
    v = np.asarray(teleport, dtype=np.float64)
    if v.shape != (n,):
        raise FitrankInputError(f"teleport vector has shape {v.shape}; expected ({n},), one weight per node")
    if not np.all(np.isfinite(v)):
        raise FitrankInputError(f"teleport vector has a non-finite entry at node index {int(np.argmin(np.isfinite(v)))}")
    if np.any(v < 0):
        raise FitrankInputError(f"teleport vector has a negative entry at node index {int(np.argmax(v < 0))}")
    peak = v.max()
    if peak <= 0:
        raise FitrankInputError("teleport vector is all zero; give at least one node a positive weight")
    v = v / peak  # only ratios count; this keeps the sum within the float range
    return v / v.sum()
