"""Synthetic datasets with known ground-truth parameters.

A dataset is a typed, featured directed graph, a ground-truth theta for one
weighting, and preference pairs read off PageRank at that theta (with some
labels flipped). It exists so that every later stage can be checked against
an answer that is known exactly.

How the graph is made:

* every node gets a heavy-tailed out-propensity (activity) and in-propensity
  (popularity), Pareto-tailed and mildly correlated through a Gaussian copula;
  each relation rescales them by its own log-normal factor, so nodes
  specialise in some relations;
* each relation has its own community assignment and mixing rate: an edge of
  relation t picks its source by activity, and its target by popularity either
  inside the source's relation-t community or, with probability mu_t,
  anywhere (a degree-corrected planted-partition block model per relation);
* repeated (source, target, relation) draws merge into one edge whose base
  weight is the number of draws; a fixed share of nodes never acts (dangling);
  a node that would have no edge at all gets one in-edge, so the node set a
  loader reads from the edge table is the generator's node set;
* edge features are noisy, rescaled mixtures of structural signals (same
  community, target popularity, a target quality correlated with popularity,
  a relation offset, the edge multiplicity, source activity), so a feature
  weighting has something real to find.

Pairs are drawn around ranks of the true PageRank: an anchor mostly from the
top ranks, sometimes from anywhere above the tie floor, and a partner a few
ranks away (a window proportional to the anchor's rank), which keeps score
ratios modest. Near-ties are skipped, each pair is oriented by the true
scores, then flipped with probability ``noise``.

References:
  Karrer & Newman, "Stochastic blockmodels and community structure in
  networks", Phys. Rev. E 83, 016107 (2011) (degree-corrected block model);
  Broder et al., "Graph structure in the Web", Computer Networks 33 (2000)
  (power-law in-degree exponent about 2.1, out-degree about 2.7; the default
  tails are close to these); Nelsen, "An Introduction to Copulas" (2006)
  (Gaussian copula).
"""

from __future__ import annotations

import json
import time
from dataclasses import asdict, dataclass, fields
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq
from scipy.special import ndtr

from fitrank.atomic import refuse_unwritable, staged_folder
from fitrank.errors import FitrankInputError
from fitrank.graph import SPLITS, Graph, build_graph
from fitrank.pagerank import pagerank
from fitrank.tables import random_split
from fitrank.weightings import make_weighting

MIN_NODES = 100
MAX_NODES = 50_000_000  # keeps the (source, target, relation) edge key inside int64
MAX_RELATIONS = 26
MAX_FEATURES = 64
FORMATS = ("csv", "parquet")
ID_STYLES = ("str", "int")
WEIGHTING_KINDS = ("mixture", "scale", "features")
TRUTH_FILE = "truth.json"

# Signals that edge features are made of; a feature's primary signal is picked
# by a seeded permutation, so feature names carry no fixed meaning.
FEATURE_SIGNALS = (
    "same_community",
    "target_popularity",
    "target_quality",
    "relation_offset",
    "multiplicity",
    "source_activity",
)

_MIN_HALF_WINDOW = 10  # partners at least this many ranks either side, so the very top gets pairs too
_PAIR_ROUNDS = 50
_EDGE_ROUNDS = 8
_TRUTH_TOL = 1e-12
_TRUTH_METHOD = "power"
"""The truth's solver is fixed, not "auto": pairs near a tie depend on the last digits of x, and a
dataset must come out the same from its seed whatever solvers later versions add to "auto"."""


@dataclass(frozen=True)
class GeneratorSettings:
    """Everything that, with the seed, determines a generated dataset.

    Attributes:
      nodes: number of nodes n.
      seed: non-negative integer seed.
      weighting: ``"mixture"``, ``"scale"`` or ``"features"``.
      relations: number of relation types T (named ``link_a``, ``link_b``, ...).
      features: number of numeric edge features f (named ``f_0``, ...).
      avg_degree: target edges per node before the isolated-node fix.
      communities: communities per relation; None picks ``max(2, round(sqrt(n) / 2))``.
      mixing: mean fraction of edges that leave their source's community.
      dangling: share of nodes that never act (no out-edges).
      in_tail, out_tail: Pareto shapes of popularity and activity (degree
        density exponent is shape + 1).
      specialisation: standard deviation of the per-relation log-normal factor.
      pairs: number of preference pairs; None picks ``min(4000, 2 * nodes)``.
      noise: probability that a pair's label is flipped, in [0, 0.5).
      top: size of the top-rank pool anchors are mostly drawn from.
      top_share: share of anchors drawn from that pool (the rest from all
        ranks above the tie floor).
      window: partner rank within ``window * rank`` (at least 10) of the anchor.
      min_gap: pairs whose true scores differ by less than this fraction of
        the larger are skipped as ties.
      split: (train, valid, test) fractions summing to 1.
      damping: PageRank damping alpha.
      ids: ``"str"`` (``n000123``) or ``"int"`` node identifiers.
      max_theta0_agreement: a drawn truth is kept once the default theta0
        orders at most this share of the (noise-free) pairs correctly.
      truth_tries: truth draws before settling for the least agreeing one.
    """

    nodes: int
    seed: int
    weighting: str
    relations: int = 3
    features: int = 4
    avg_degree: float = 10.0
    communities: int | None = None
    mixing: float = 0.3
    dangling: float = 0.1
    in_tail: float = 1.2
    out_tail: float = 1.7
    specialisation: float = 1.0
    pairs: int | None = None
    noise: float = 0.0
    top: int = 1000
    top_share: float = 0.8
    window: float = 0.2
    min_gap: float = 1e-4
    split: tuple[float, float, float] = (0.7, 0.15, 0.15)
    damping: float = 0.85
    ids: str = "str"
    max_theta0_agreement: float = 0.85
    truth_tries: int = 8


def make_settings(nodes: int, seed: int, weighting: str, **options) -> GeneratorSettings:
    """Validated :class:`GeneratorSettings`; a bad value raises a one-line FitrankInputError.

    Args:
      nodes, seed, weighting: as in :class:`GeneratorSettings`.
      **options: any other field of :class:`GeneratorSettings`; ``split`` may
        also be a string ``"0.7,0.15,0.15"``.
    """
    known = {f.name for f in fields(GeneratorSettings)}
    unknown = sorted(set(options) - known)
    if unknown:
        raise FitrankInputError(f"unknown generator option '{unknown[0]}'; known: {', '.join(sorted(known))}")
    if "split" in options:
        options["split"] = _parse_split(options["split"])
    if options.get("pairs") is None and isinstance(nodes, (int, np.integer)):
        options["pairs"] = min(4000, 2 * int(nodes))  # small graphs lack room for many near-rank pairs
    settings = GeneratorSettings(nodes=nodes, seed=seed, weighting=weighting, **options)
    _check_settings(settings)
    return settings


def _parse_split(value) -> tuple[float, float, float]:
    if isinstance(value, str):
        try:
            value = [float(part) for part in value.split(",")]
        except ValueError:
            raise FitrankInputError(
                f"split '{value}' is not three comma-separated fractions like 0.7,0.15,0.15") from None
    parts = tuple(float(v) for v in value)
    if len(parts) != 3:
        raise FitrankInputError(f"split needs three fractions (train, valid, test), got {len(parts)}")
    return parts


def _require(ok: bool, message: str) -> None:
    if not ok:
        raise FitrankInputError(message)


def _check_settings(s: GeneratorSettings) -> None:
    for name in ("nodes", "seed", "relations", "features", "pairs", "top", "truth_tries"):
        value = getattr(s, name)
        _require(isinstance(value, (int, np.integer)) and not isinstance(value, bool),
                 f"{name} must be an integer, got {value!r}")
    _require(s.communities is None or isinstance(s.communities, (int, np.integer)),
             f"communities must be an integer, got {s.communities!r}")
    _require(MIN_NODES <= s.nodes <= MAX_NODES,
             f"nodes must be an integer between {MIN_NODES} and {MAX_NODES}, got {s.nodes}")
    _require(s.seed >= 0, f"seed must be a non-negative integer, got {s.seed}")
    _require(s.weighting in WEIGHTING_KINDS, f"weighting must be one of {', '.join(WEIGHTING_KINDS)}, got '{s.weighting}'")
    _require(1 <= s.relations <= MAX_RELATIONS, f"relations must be between 1 and {MAX_RELATIONS}, got {s.relations}")
    _require(0 <= s.features <= MAX_FEATURES, f"features must be between 0 and {MAX_FEATURES}, got {s.features}")
    if s.weighting in ("mixture", "scale"):
        # With one relation these walks do not depend on theta at all: nothing to learn.
        _require(s.relations >= 2, f"the {s.weighting} weighting needs at least 2 relations, got {s.relations}")
    if s.weighting == "features":
        _require(s.features >= 1, "the features weighting needs at least 1 feature, got 0")
    max_degree = (s.nodes - 1) * s.relations / 4
    _require(1.0 <= s.avg_degree <= max_degree,
             f"avg_degree must be between 1 and {max_degree:g} for {s.nodes} nodes, got {s.avg_degree}")
    _require(s.communities is None or 1 <= s.communities <= s.nodes,
             f"communities must be between 1 and nodes ({s.nodes}), got {s.communities}")
    _require(0.0 <= s.mixing <= 1.0, f"mixing must be in [0, 1], got {s.mixing}")
    _require(0.0 <= s.dangling <= 0.9, f"dangling must be in [0, 0.9], got {s.dangling}")
    _require(s.in_tail > 1.0 and s.out_tail > 1.0,
             f"in_tail and out_tail must exceed 1 (finite mean degree), got {s.in_tail} and {s.out_tail}")
    _require(s.specialisation >= 0.0, f"specialisation must be non-negative, got {s.specialisation}")
    _require(10 <= s.pairs <= 10 * s.nodes, f"pairs must be between 10 and 10 * nodes, got {s.pairs}")
    _require(0.0 <= s.noise < 0.5, f"noise must be in [0, 0.5), got {s.noise}")
    _require(s.top >= 1, f"top must be at least 1, got {s.top}")
    _require(0.0 <= s.top_share <= 1.0, f"top_share must be in [0, 1], got {s.top_share}")
    _require(s.window > 0.0, f"window must be positive, got {s.window}")
    _require(0.0 <= s.min_gap < 1.0, f"min_gap must be in [0, 1), got {s.min_gap}")
    _require(all(f >= 0 for f in s.split) and abs(sum(s.split) - 1.0) < 1e-9 and s.split[0] > 0,
             f"split must be three non-negative fractions summing to 1 with a positive train share, got {s.split}")
    _require(0.0 < s.damping < 1.0, f"damping must be strictly between 0 and 1, got {s.damping}")
    _require(s.ids in ID_STYLES, f"ids must be one of {', '.join(ID_STYLES)}, got '{s.ids}'")
    _require(0.0 < s.max_theta0_agreement <= 1.0,
             f"max_theta0_agreement must be in (0, 1], got {s.max_theta0_agreement}")
    _require(s.truth_tries >= 1, f"truth_tries must be at least 1, got {s.truth_tries}")


# ----------------------------------------------------------------------------- graph


@dataclass(frozen=True, eq=False)
class _RelationModel:
    """The block model of one relation, laid out for vectorised inverse-CDF draws.

    Attributes:
      out_cum: (n,) cumulative activity over node index.
      members: (n,) node indices sorted by community.
      in_cum: (n,) cumulative popularity over ``members``.
      mass_bounds: (K + 1,) cumulative popularity at community boundaries.
      index_bounds: (K + 1,) positions in ``members`` where communities start.
      community: (n,) community of each node.
      mixing: probability mu that an edge ignores communities.
    """

    out_cum: np.ndarray
    members: np.ndarray
    in_cum: np.ndarray
    mass_bounds: np.ndarray
    index_bounds: np.ndarray
    community: np.ndarray
    mixing: float


@dataclass(frozen=True, eq=False)
class SyntheticGraph:
    """A generated graph before it is written out.

    Attributes:
      src, dst: (E,) int64 node indices, edges sorted by (src, dst, relation).
      relation: (E,) int64 relation codes.
      weight: (E,) float64 base weights (merged draw counts, >= 1).
      features: (E, f) float64 raw features.
      feature_signals: the primary signal (from :data:`FEATURE_SIGNALS`) of each feature.
      community: (T, n) int64 community of each node in each relation.
      relation_names, feature_names: labels.
      n: number of nodes.
    """

    src: np.ndarray
    dst: np.ndarray
    relation: np.ndarray
    weight: np.ndarray
    features: np.ndarray
    feature_signals: tuple[str, ...]
    community: np.ndarray
    relation_names: tuple[str, ...]
    feature_names: tuple[str, ...]
    n: int

    def to_graph(self, node_ids: np.ndarray | None = None) -> Graph:
        """The :class:`fitrank.graph.Graph` the solvers read."""
        return build_graph(self.src, self.dst, self.n, base=self.weight, relation=self.relation,
                           relation_names=self.relation_names, features=self.features,
                           feature_names=self.feature_names, node_ids=node_ids)


def relation_names(count: int) -> tuple[str, ...]:
    """``("link_a", "link_b", ...)``: the relation labels of a generated graph."""
    return tuple(f"link_{chr(ord('a') + t)}" for t in range(count))


def _pareto_pair(rng: np.random.Generator, n: int, shapes: tuple[float, float], rho: float) -> np.ndarray:
    """(2, n) Pareto(x_min=1) variates with the given tail shapes, coupled by a
    Gaussian copula of correlation rho (the survival function of a normal is
    the uniform that the Pareto inverse CDF reads)."""
    z = rng.standard_normal((2, n))
    z[1] = rho * z[0] + np.sqrt(1.0 - rho * rho) * z[1]
    survival = np.clip(ndtr(-z), 1e-300, 1.0)
    return survival ** (-1.0 / np.asarray(shapes)[:, None])


def _inverse_cdf(cum: np.ndarray, lo_mass, hi_mass, lo_index, hi_index, u: np.ndarray) -> np.ndarray:
    """Positions drawn proportionally to the increments of ``cum`` within
    [lo_mass, hi_mass); clipped to [lo_index, hi_index] against rounding."""
    values = lo_mass + u * (hi_mass - lo_mass)
    # Searching sorted queries walks ``cum`` in order: about 4x faster than
    # random queries once ``cum`` outgrows the cache (measured at n = 1e6).
    order = np.argsort(values)
    pos = np.empty_like(order)
    pos[order] = np.searchsorted(cum, values[order], side="right")
    return np.clip(pos, lo_index, hi_index)


def _relation_models(rng: np.random.Generator, s: GeneratorSettings, activity: np.ndarray,
                     popularity: np.ndarray) -> list[_RelationModel]:
    n = s.nodes
    num_communities = s.communities or max(2, round(np.sqrt(n) / 2))
    models = []
    for t in range(s.relations):
        sizes = rng.dirichlet(np.full(num_communities, 2.0))
        community = rng.choice(num_communities, size=n, p=sizes)
        members = np.argsort(community, kind="stable")
        index_bounds = np.zeros(num_communities + 1, dtype=np.int64)
        np.cumsum(np.bincount(community, minlength=num_communities), out=index_bounds[1:])
        in_cum = np.cumsum(popularity[t][members])
        mass_bounds = np.concatenate([[0.0], in_cum])[index_bounds]
        mixing = float(np.clip(s.mixing * rng.uniform(0.5, 1.5), 0.0, 1.0))
        models.append(_RelationModel(np.cumsum(activity[t]), members, in_cum, mass_bounds, index_bounds,
                                     community, mixing))
    return models


def _draw_edges(rng: np.random.Generator, models: list[_RelationModel], shares: np.ndarray,
                count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``count`` raw edge draws (src, dst, relation), self-loops removed."""
    per_relation = rng.multinomial(count, shares)
    parts = []
    for t, (model, k) in enumerate(zip(models, per_relation)):
        n = model.out_cum.size
        src = _inverse_cdf(model.out_cum, 0.0, model.out_cum[-1], 0, n - 1, rng.random(k))
        anywhere = rng.random(k) < model.mixing
        c = model.community[src]
        lo_mass = np.where(anywhere, 0.0, model.mass_bounds[c])
        hi_mass = np.where(anywhere, model.in_cum[-1], model.mass_bounds[c + 1])
        lo_index = np.where(anywhere, 0, model.index_bounds[c])
        hi_index = np.where(anywhere, n, model.index_bounds[c + 1]) - 1
        dst = model.members[_inverse_cdf(model.in_cum, lo_mass, hi_mass, lo_index, hi_index, rng.random(k))]
        keep = src != dst
        parts.append((src[keep], dst[keep], np.full(int(keep.sum()), t, dtype=np.int64)))
    return tuple(np.concatenate(col) for col in zip(*parts))


def _edge_key(src, dst, rel, n: int, num_rel: int) -> np.ndarray:
    return (src * n + dst) * num_rel + rel


def _split_key(key: np.ndarray, n: int, num_rel: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    pair, rel = np.divmod(key, num_rel)
    src, dst = np.divmod(pair, n)
    return src, dst, rel


def _runs(sorted_keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct values of a sorted array and their multiplicities (a sort-based
    unique: much faster than np.unique's hashing on many repeated int64 keys)."""
    if sorted_keys.size == 0:
        return sorted_keys, np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(np.concatenate([[True], sorted_keys[1:] != sorted_keys[:-1]]))
    return sorted_keys[starts], np.diff(np.append(starts, sorted_keys.size))


def _merged_edges(rng: np.random.Generator, s: GeneratorSettings, models: list[_RelationModel],
                  shares: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct edge keys (sorted) and their draw counts, exactly
    ``round(avg_degree * n)`` of them unless repeated draws exhaust the rounds."""
    n, num_rel = s.nodes, s.relations
    target = int(round(s.avg_degree * n))
    keys = np.zeros(0, dtype=np.int64)
    distinct, yield_rate = 0, 1.0
    for _ in range(_EDGE_ROUNDS):
        # Repeats and self-loops are merged or dropped: draw the deficit over the
        # share of new distinct edges the previous round delivered.
        wanted = int((target - distinct) / yield_rate * 1.05) + 16
        src, dst, rel = _draw_edges(rng, models, shares, wanted)
        keys = np.sort(np.concatenate([keys, _edge_key(src, dst, rel, n, num_rel)]))
        before, distinct = distinct, _runs(keys)[0].size
        if distinct >= target:
            break
        yield_rate = max((distinct - before) / wanted, 0.05)
    unique, counts = _runs(keys)
    if unique.size > target:
        drop = rng.choice(unique.size, unique.size - target, replace=False)
        keep = np.ones(unique.size, dtype=bool)
        keep[drop] = False
        unique, counts = unique[keep], counts[keep]
    return unique, counts


def _attach_isolated(rng: np.random.Generator, src, dst, rel, counts, n: int):
    """Give every node without any edge one in-edge, copying source and relation
    from a uniformly chosen existing edge (so sources follow realised activity)."""
    touched = np.zeros(n, dtype=bool)
    touched[src] = True
    touched[dst] = True
    lonely = np.flatnonzero(~touched)
    if lonely.size == 0:
        return src, dst, rel, counts
    donor = rng.integers(0, src.size, lonely.size)
    return (np.concatenate([src, src[donor]]), np.concatenate([dst, lonely]),
            np.concatenate([rel, rel[donor]]), np.concatenate([counts, np.ones(lonely.size, dtype=counts.dtype)]))


def _standardise(values: np.ndarray) -> np.ndarray:
    spread = values.std()
    return (values - values.mean()) / (spread if spread > 0 else 1.0)


def _edge_features(rng: np.random.Generator, s: GeneratorSettings, src, dst, rel, counts, community,
                   activity, popularity) -> tuple[np.ndarray, tuple[str, ...]]:
    """(E, f) raw features and the primary signal of each.

    Each feature is its primary signal plus weaker random loadings on the
    others plus noise, then put on its own arbitrary location and scale (so a
    consumer has to standardise) and rounded to 4 decimals (so a CSV round
    trip is exact).
    """
    num_edges = src.size
    if s.features == 0:
        return np.zeros((num_edges, 0)), ()
    log_pop = np.log(popularity.mean(axis=0))
    quality = 0.5 * _standardise(log_pop) + np.sqrt(0.75) * rng.standard_normal(s.nodes)
    relation_offset = rng.standard_normal(s.relations)
    signals = {
        "same_community": lambda: (community[rel, src] == community[rel, dst]).astype(np.float64),
        "target_popularity": lambda: np.log(popularity[rel, dst]),
        "target_quality": lambda: quality[dst],
        "relation_offset": lambda: relation_offset[rel],
        "multiplicity": lambda: np.log(counts.astype(np.float64)),
        "source_activity": lambda: np.log(np.maximum(activity[rel, src], 1e-12)),
    }
    standard = {name: _standardise(make()) for name, make in signals.items()}
    primary = [FEATURE_SIGNALS[i] for i in np.resize(rng.permutation(len(FEATURE_SIGNALS)), s.features)]
    features = np.empty((num_edges, s.features))
    for k, name in enumerate(primary):
        cross = 0.3 * rng.standard_normal(len(FEATURE_SIGNALS)) / np.sqrt(len(FEATURE_SIGNALS))
        value = standard[name] + 0.5 * rng.standard_normal(num_edges)
        for other, loading in zip(FEATURE_SIGNALS, cross):
            value += loading * standard[other]
        scale, location = 10.0 ** rng.uniform(-1.0, 2.0), rng.normal(0.0, 5.0)
        features[:, k] = np.round(location + scale * value, 4)
    return features, tuple(primary)


def sample_graph(s: GeneratorSettings, rng: np.random.Generator) -> SyntheticGraph:
    """Draw the graph of a dataset (see the module docstring for the model).

    Args:
      s: validated settings.
      rng: the graph's random stream.

    Returns:
      The graph, edges sorted by (source, target, relation).

    References:
      Karrer & Newman, Phys. Rev. E 83, 016107 (2011): degree-corrected block model.
    """
    n, num_rel = s.nodes, s.relations
    base = _pareto_pair(rng, n, (s.out_tail, s.in_tail), rho=0.3)
    factors = np.exp(s.specialisation * rng.standard_normal((2, num_rel, n)) - 0.5 * s.specialisation ** 2)
    activity, popularity = base[0] * factors[0], base[1] * factors[1]  # (T, n) each
    silent = rng.choice(n, size=int(round(s.dangling * n)), replace=False)
    activity[:, silent] = 0.0
    shares = rng.dirichlet(np.full(num_rel, 4.0))
    models = _relation_models(rng, s, activity, popularity)
    keys, counts = _merged_edges(rng, s, models, shares)
    src, dst, rel = _split_key(keys, n, num_rel)
    src, dst, rel, counts = _attach_isolated(rng, src, dst, rel, counts, n)
    order = np.argsort(_edge_key(src, dst, rel, n, num_rel), kind="stable")
    src, dst, rel, counts = src[order], dst[order], rel[order], counts[order]
    community = np.stack([m.community for m in models])
    features, primary = _edge_features(rng, s, src, dst, rel, counts, community, activity, popularity)
    return SyntheticGraph(
        src=src, dst=dst, relation=rel, weight=counts.astype(np.float64), features=features,
        feature_signals=primary, community=community, relation_names=relation_names(num_rel),
        feature_names=tuple(f"f_{k}" for k in range(s.features)), n=n,
    )


# ----------------------------------------------------------------------------- pairs


def sample_pairs(x: np.ndarray, count: int, rng: np.random.Generator, *, top: int, top_share: float,
                 window: float, min_gap: float) -> tuple[np.ndarray, np.ndarray]:
    """Distinct node pairs near each other in the ranking of ``x``, oriented by ``x``.

    An anchor rank r comes from the top ``top`` ranks with probability
    ``top_share``, otherwise from all ranks above the tie floor; its partner
    is uniform within ``max(10, ceil(window * r))`` ranks on either side.
    Pairs with ``x_hi - x_lo <= min_gap * x_hi`` are near-ties and skipped.

    Args:
      x: (n,) scores, higher ranks better.
      count: pairs wanted.
      rng: the pairs' random stream.
      top, top_share, window, min_gap: see :class:`GeneratorSettings`.

    Returns:
      (preferred, other): (count,) int64 node indices with x[preferred] > x[other].

    Raises:
      FitrankInputError: the scores do not offer ``count`` distinct non-tied pairs.
    """
    n = x.size
    order = np.argsort(-x, kind="stable")
    ranked = x[order]
    # Below the tie floor (typically nodes nobody links to) scores are equal: no order to learn.
    span = int(np.count_nonzero(ranked > ranked[-1] * (1.0 + min_gap)))
    if span < 2:
        raise FitrankInputError("the true PageRank has fewer than 2 distinct scores; use more nodes or edges")
    pool = min(top, span)
    kept = np.zeros(0, dtype=np.int64)
    for _ in range(_PAIR_ROUNDS):
        m = 2 * (count - kept.size) + 64
        anchor = np.where(rng.random(m) < top_share, rng.integers(0, pool, m), rng.integers(0, span, m))
        half = np.maximum(_MIN_HALF_WINDOW, np.ceil(window * anchor)).astype(np.int64)
        partner = anchor + rng.integers(1, half + 1) * rng.choice(np.array([-1, 1]), m)
        ok = (partner >= 0) & (partner < n)
        hi, lo = np.minimum(anchor, partner)[ok], np.maximum(anchor, partner)[ok]
        distinct = ranked[hi] - ranked[lo] > min_gap * ranked[hi]
        fresh = (hi * n + lo)[distinct]
        everything = np.concatenate([kept, fresh])
        _, first = np.unique(everything, return_index=True)
        kept = everything[np.sort(first)]  # keep draw order: earlier draws win
        if kept.size >= count:
            break
    if kept.size < count:
        raise FitrankInputError(
            f"could only form {kept.size} distinct non-tied pairs, fewer than the {count} asked for; "
            "lower pairs or raise window/top"
        )
    hi, lo = np.divmod(kept[:count], n)
    return order[hi], order[lo]


def _agreement(x: np.ndarray, preferred: np.ndarray, other: np.ndarray) -> float:
    """Share of pairs that scores x order as labelled (ties count half)."""
    a, b = x[preferred], x[other]
    return float(np.mean((a > b) + 0.5 * (a == b)))


# ----------------------------------------------------------------------------- truth


@dataclass(frozen=True)
class _Truth:
    names: tuple[str, ...]
    theta0: np.ndarray
    theta: np.ndarray
    preferred: np.ndarray
    other: np.ndarray
    theta0_agreement: float
    tries: int


def _choose_truth(s: GeneratorSettings, graph: Graph, streams: dict) -> _Truth:
    """Draw ground-truth thetas from the weighting's domain until the default
    theta0 orders at most ``max_theta0_agreement`` of the resulting pairs
    correctly (or ``truth_tries`` draws are spent: keep the least agreeing)."""
    weighting = make_weighting(s.weighting, graph)
    x0 = pagerank(graph, weighting, weighting.theta0, damping=s.damping, tol=_TRUTH_TOL, method=_TRUTH_METHOD).x
    candidates = weighting.sample(s.truth_tries, seed=_int_seed(streams["theta"]))
    best = None
    for tries, theta in enumerate(candidates, start=1):
        theta = np.asarray(theta, dtype=np.float64)
        x = pagerank(graph, weighting, theta, damping=s.damping, tol=_TRUTH_TOL, method=_TRUTH_METHOD).x
        rng = np.random.default_rng(streams["pairs"])  # same stream per try: the seed alone fixes the pairs
        preferred, other = sample_pairs(x, s.pairs, rng, top=s.top, top_share=s.top_share,
                                        window=s.window, min_gap=s.min_gap)
        agreement = _agreement(x0, preferred, other)
        if best is None or agreement < best.theta0_agreement:
            best = _Truth(weighting.param_names, weighting.theta0, theta, preferred, other, agreement, tries)
        if agreement <= s.max_theta0_agreement:
            break
    return best


# ----------------------------------------------------------------------------- dataset


def _node_ids(n: int, style: str) -> pa.Array:
    if style == "int":
        return pa.array(np.arange(n, dtype=np.int64))
    width = max(6, len(str(n - 1)))
    return pa.array([f"n{i:0{width}d}" for i in range(n)], type=pa.string())


def _streams(seed: int) -> dict[str, np.random.SeedSequence]:
    # Independent child streams: changing e.g. the noise rate leaves graph and pairs as they were.
    names = ("graph", "theta", "pairs", "noise", "split")
    return dict(zip(names, np.random.SeedSequence(seed).spawn(len(names))))


def _int_seed(stream: np.random.SeedSequence) -> int:
    """An integer seed for APIs that take one, drawn from ``stream``."""
    return int(stream.generate_state(1)[0])


def generate_dataset(nodes: int, seed: int, weighting: str, **options) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """Generate a dataset: edge table, pair table and the ground truth.

    Args:
      nodes: number of nodes (at least :data:`MIN_NODES`).
      seed: non-negative seed; equal settings and seed give identical output.
      weighting: ``"mixture"``, ``"scale"`` or ``"features"``.
      **options: other fields of :class:`GeneratorSettings`.

    Returns:
      edges: DataFrame (E rows) with ``source``, ``target``, ``relation``,
        ``weight`` and feature columns ``f_0``...;
      pairs: DataFrame (Q rows) with ``preferred``, ``other``, ``weight``, ``split``;
      truth: JSON-ready dict (weighting, theta by name, theta0, damping, seed,
        settings, noise, counts, the theta0 agreement on the noise-free pairs).
    """
    s = make_settings(nodes, seed, weighting, **options)
    streams = _streams(s.seed)
    synthetic = sample_graph(s, np.random.default_rng(streams["graph"]))
    truth = _choose_truth(s, synthetic.to_graph(), streams)

    flip = np.random.default_rng(streams["noise"]).random(s.pairs) < s.noise
    preferred = np.where(flip, truth.other, truth.preferred)
    other = np.where(flip, truth.preferred, truth.other)
    split = random_split(s.pairs, _int_seed(streams["split"]), s.split)

    ids = _node_ids(s.nodes, s.ids)
    edges = pa.table({
        "source": ids.take(pa.array(synthetic.src)),
        "target": ids.take(pa.array(synthetic.dst)),
        "relation": pa.array(np.asarray(synthetic.relation_names, dtype=object)[synthetic.relation], type=pa.string()),
        "weight": pa.array(synthetic.weight),
        **{name: pa.array(synthetic.features[:, k]) for k, name in enumerate(synthetic.feature_names)},
    })
    pairs = pa.table({
        "preferred": ids.take(pa.array(preferred)),
        "other": ids.take(pa.array(other)),
        "weight": pa.array(np.ones(s.pairs)),
        "split": pa.array(np.asarray(SPLITS, dtype=object)[split], type=pa.string()),
    })
    return edges.to_pandas(), pairs.to_pandas(), _truth_record(s, synthetic, truth, flip, split)


def _truth_record(s: GeneratorSettings, synthetic: SyntheticGraph, truth: _Truth, flip: np.ndarray,
                  split: np.ndarray) -> dict:
    record = {
        "weighting": s.weighting,
        "theta": dict(zip(truth.names, truth.theta.tolist())),
        "theta0": dict(zip(truth.names, np.asarray(truth.theta0, dtype=np.float64).tolist())),
        "damping": s.damping,
        "dangling": "teleport",
        "teleport": "uniform",
        "seed": s.seed,
        "noise": s.noise,
        "settings": {**asdict(s), "split": list(s.split)},
        "relations": list(synthetic.relation_names),
        "features": {name: signal for name, signal in zip(synthetic.feature_names, synthetic.feature_signals)},
        "counts": {
            "nodes": s.nodes,
            "edges": int(synthetic.src.size),
            "edges_by_relation": dict(zip(synthetic.relation_names,
                                          np.bincount(synthetic.relation, minlength=s.relations).tolist())),
            "dangling_nodes": int(np.count_nonzero(np.bincount(synthetic.src, minlength=s.nodes) == 0)),
            "pairs": s.pairs,
            "pairs_by_split": dict(zip(SPLITS, np.bincount(split, minlength=len(SPLITS)).tolist())),
            "flipped_pairs": int(flip.sum()),
        },
        "checks": {
            "theta0_agreement_noise_free": truth.theta0_agreement,
            "truth_draws": truth.tries,
            "pagerank_tol": _TRUTH_TOL,
        },
    }
    if s.weighting == "mixture":
        w = np.exp(truth.theta - truth.theta.max())
        record["mixture_weights"] = dict(zip(synthetic.relation_names, (w / w.sum()).tolist()))
    if s.weighting == "scale":
        # The scale walk ignores a constant added to theta: this is the equivalent
        # truth nearest theta0 = 0, the one a learner regularised towards theta0 finds.
        record["theta_centred"] = dict(zip(truth.names, (truth.theta - truth.theta.mean()).tolist()))
    return record


# ----------------------------------------------------------------------------- files


def _write_table(frame: pd.DataFrame, path: Path, file_format: str) -> None:
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if file_format == "parquet":
        pq.write_table(table, path)
        return
    with open(path, "wb") as out:
        # Arrow quotes the header whatever the quoting style; write a plain one.
        out.write((",".join(table.column_names) + "\n").encode())
        pa_csv.write_csv(table, out, pa_csv.WriteOptions(include_header=False, quoting_style="none"))


def write_dataset(out_dir, edges: pd.DataFrame, pairs: pd.DataFrame, truth: dict, *,
                  file_format: str = "csv", overwrite: bool = False) -> dict[str, Path]:
    """Write ``edges``, ``pairs`` and ``truth.json`` into ``out_dir`` all at once.

    The files are written into a temporary folder beside ``out_dir`` and
    renamed into place, so ``out_dir`` is either complete or untouched.

    Args:
      out_dir: the folder to create; an existing non-empty one is replaced
        only with ``overwrite``.
      edges, pairs, truth: as returned by :func:`generate_dataset`.
      file_format: ``"csv"`` or ``"parquet"`` for the two tables.
      overwrite: replace an existing non-empty ``out_dir``.

    Returns:
      ``{"edges": path, "pairs": path, "truth": path}`` inside ``out_dir``.
    """
    if file_format not in FORMATS:
        raise FitrankInputError(f"format must be one of {', '.join(FORMATS)}, got '{file_format}'")
    out_dir = Path(out_dir)
    refuse_unwritable(out_dir, folder=True)
    if out_dir.is_dir() and any(out_dir.iterdir()) and not overwrite:
        raise FitrankInputError(f"{out_dir} exists and is not empty; choose a new folder or pass --force")
    names = {"edges": f"edges.{file_format}", "pairs": f"pairs.{file_format}", "truth": TRUTH_FILE}
    try:
        with staged_folder(out_dir) as staging:
            _write_table(edges, staging / names["edges"], file_format)
            _write_table(pairs, staging / names["pairs"], file_format)
            record = {**truth, "files": {"edges": names["edges"], "pairs": names["pairs"]}}
            (staging / names["truth"]).write_text(json.dumps(record, indent=2) + "\n")
    except PermissionError as err:
        raise FitrankInputError(f"cannot write in {out_dir.parent}: {err.strerror}") from None
    return {key: out_dir / name for key, name in names.items()}


# ----------------------------------------------------------------------------- command line

# CLI option -> settings field, for the options the ``generate`` subcommand exposes.
CLI_OPTIONS = ("relations", "features", "avg_degree", "communities", "mixing", "dangling", "pairs", "noise",
               "top", "window", "split", "damping", "ids")


def run_cli(args) -> None:
    """``fitrank generate``: generate a dataset from parsed arguments and write it."""
    options = {name: getattr(args, name) for name in CLI_OPTIONS if getattr(args, name, None) is not None}
    file_format = getattr(args, "format", "csv")
    out_dir = Path(args.out_dir)
    refuse_unwritable(out_dir, folder=True)
    if out_dir.is_dir() and any(out_dir.iterdir()) and not getattr(args, "force", False):
        # Fail before minutes of generation, not after.
        raise FitrankInputError(f"{out_dir} exists and is not empty; choose a new folder or pass --force")
    start = time.perf_counter()
    edges, pairs, truth = generate_dataset(args.nodes, args.seed, args.weighting, **options)
    paths = write_dataset(out_dir, edges, pairs, truth, file_format=file_format,
                          overwrite=getattr(args, "force", False))
    counts = truth["counts"]
    print(f"wrote {paths['edges']} ({counts['edges']} edges, {counts['nodes']} nodes, "
          f"{counts['dangling_nodes']} dangling), {paths['pairs']} ({counts['pairs']} pairs, "
          f"{counts['flipped_pairs']} flipped) and {paths['truth']} in {time.perf_counter() - start:.1f} s")
