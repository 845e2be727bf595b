"""Test helpers: an exact dense stand-in for a reduced model's scorer, and a
tiny preference problem with a known answer.

The stand-in builds M(theta) = I - alpha (P(theta) + route(leak)) as a dense
JAX matrix from the weighting's own pieces (transition, leak_coefficients,
leak_basis) and solves it with jnp.linalg.solve (LU), so its values are the
exact PageRank vector and jax.grad gives the exact gradient. It follows the
scorer contract of fitrank.reduced: ``fn(theta, arrays) -> (S,)`` values at
``nodes``, with every array passed in ``arrays``. Small graphs only (O(n^3)).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

from fitrank.graph import SPLITS, Graph, Pairs, build_graph
from fitrank.weightings import Weighting, make_weighting


@dataclass(frozen=True, eq=False)
class DenseScorer:
    fn: Callable
    arrays: dict
    nodes: np.ndarray

    def differences(self, first, second, *, scale: float = 1.0) -> "DenseScorer":
        """scale * (x[nodes[first]] - x[nodes[second]]), by gathering from the exact values."""
        inner = self.fn

        def fn(theta, arrays):
            x = inner(theta, arrays["inner"])
            return arrays["scale"] * (x[arrays["first"]] - x[arrays["second"]])

        arrays = {"inner": self.arrays, "first": jnp.asarray(first), "second": jnp.asarray(second),
                  "scale": jnp.asarray(float(scale))}
        return DenseScorer(fn, arrays, self.nodes)


def dense_scorer(graph: Graph, weighting: Weighting, nodes, *, damping: float = 0.85,
                 dangling: str = "teleport") -> DenseScorer:
    """Exact PageRank values at ``nodes`` (sorted) as a differentiable JAX function of theta."""
    nodes = np.unique(np.asarray(nodes, dtype=np.int64))
    arrays = {
        "tables": weighting.tables,
        "src": graph.src,
        "dst": graph.dst,
        "leak_basis": weighting.leak_basis,
        "teleport": graph.teleport,
        "nodes": nodes,
    }
    transition, leak_coefficients = weighting.transition, weighting.leak_coefficients

    def fn(theta, arrays):
        v = arrays["teleport"]
        n = v.shape[0]
        walk = jnp.zeros((n, n)).at[arrays["dst"], arrays["src"]].add(transition(theta, arrays["tables"]))
        leak = arrays["leak_basis"] @ leak_coefficients(theta)
        walk = walk + (jnp.outer(v, leak) if dangling == "teleport" else jnp.diag(leak))
        x = jnp.linalg.solve(jnp.eye(n) - damping * walk, (1.0 - damping) * v)
        return x[arrays["nodes"]]

    return DenseScorer(fn, jax.tree_util.tree_map(jnp.asarray, arrays), nodes)


@dataclass(frozen=True, eq=False)
class TinyProblem:
    graph: Graph
    weighting: Weighting
    pairs: Pairs
    theta_true: np.ndarray
    x_true: np.ndarray
    flipped: np.ndarray


def tiny_problem(*, n: int = 80, relations: int = 3, theta_true=(1.2, -0.8, 0.0), num_pairs: int = 1500,
                 noise: float = 0.05, seed: int = 0, kind: str = "scale") -> TinyProblem:
    """A typed random graph whose relations lead to different node groups, and
    pairs labelled by PageRank at ``theta_true`` with a fraction ``noise`` flipped.
    ``theta_true`` has one entry per parameter of the ``kind`` weighting (the
    features weighting has two: every edge carries two random features).

    Relation t points into group t four times out of five, so re-weighting the
    relations moves PageRank mass between groups: the parameters are identifiable
    from pairs (up to the additive constant of the scale weighting).
    """
    rng = np.random.default_rng(seed)
    theta_true = np.asarray(theta_true, dtype=np.float64)
    num_rel = relations
    group = rng.integers(0, num_rel, size=n)
    out_degree = rng.integers(2, 7, size=n)
    src = np.repeat(np.arange(n), out_degree)
    rel = rng.integers(0, num_rel, size=src.size)
    own_group = rng.random(src.size) < 0.8
    dst = np.where(own_group, 0, rng.integers(0, n, size=src.size))
    for t in range(num_rel):
        members = np.flatnonzero(group == t)
        pick = own_group & (rel == t)
        dst[pick] = rng.choice(members, size=int(pick.sum()))
    keep = src != dst
    src, dst, rel = src[keep], dst[keep], rel[keep]
    key = np.unique((src * n + dst) * num_rel + rel)
    rel, pair = key % num_rel, key // num_rel
    src, dst = pair // n, pair % n
    features = rng.normal(size=(src.size, 2))
    graph = build_graph(src, dst, n, base=rng.uniform(0.5, 2.0, size=src.size), relation=rel,
                        relation_names=tuple(f"r{t}" for t in range(num_rel)), features=features,
                        feature_names=("f0", "f1"))
    weighting = make_weighting(kind, graph)
    everywhere = dense_scorer(graph, weighting, np.arange(n))
    x_true = np.asarray(everywhere.fn(jnp.asarray(theta_true), everywhere.arrays))
    a = rng.integers(0, n, size=num_pairs)
    b = (a + rng.integers(1, n, size=num_pairs)) % n
    flipped = rng.random(num_pairs) < noise
    a_wins = (x_true[a] > x_true[b]) ^ flipped
    preferred, other = np.where(a_wins, a, b), np.where(a_wins, b, a)
    weight = rng.uniform(0.5, 1.5, size=num_pairs)
    split = rng.choice(len(SPLITS), size=num_pairs, p=(0.6, 0.2, 0.2)).astype(np.int8)
    return TinyProblem(graph, weighting, Pairs(preferred, other, weight, split), theta_true, x_true, flipped)
