"""Regional reduced models: one basis and one online solve per region of the parameter domain.

One global basis has to span every walk the sampled domain holds. Where those
walks differ a lot (relation scales that vary twentyfold across the box, say),
a top-100 Kendall tau of 0.999 needs k near 100, and the online solve costs
about r k^2 + k^3 / 3 flops. Grouping the snapshots into R regions of the
domain and giving each its own basis reaches the same accuracy with a much
smaller k per region, so each evaluation is several times cheaper; the price is
R times the offline row choice and assembly, and more snapshots.

Regions are k-means clusters of the sampled points in
:meth:`~fitrank.weightings.Weighting.coordinates`. Each region's basis is built
from the snapshots of every point whose distance to the region's centre is
within ``OVERLAP`` times its distance to its nearest centre, so neighbouring
regions share snapshots near their common boundary. Online, theta runs the
model of its nearest centre. Values and gradients are those of that model: the
function is smooth inside a region and jumps at a boundary by at most the two
models' errors (the full check at the end of training measures the model
actually used).

References:
  Amsallem, Zahr & Farhat, "Nonlinear model order reduction based on local
  reduced-order bases", Int. J. Numer. Meth. Engng 92(10), 2012 (clustered
  snapshots with overlap, one basis per cluster, nearest-centre choice online;
  cited from memory). Lloyd, "Least squares quantization in PCM", IEEE Trans.
  Inf. Theory 28(2), 1982, and Arthur & Vassilvitskii, "k-means++", SODA 2007
  (the clustering, through scipy.cluster.vq.kmeans2).
"""

from __future__ import annotations

import functools
import json
import os
import time
import warnings
from concurrent.futures import Executor
from dataclasses import dataclass, field, replace

import jax
import jax.numpy as jnp
import numpy as np
from scipy.cluster.vq import kmeans2

from fitrank.atomic import staged_file
from fitrank.basis import pod_basis
from fitrank.errors import FitrankInputError
from fitrank.pagerank import PageRankProblem, certified_bound
from fitrank.reduced import (ReducedModel, ReductionSettings, Scorer, _assemble, build_reduced_model, enrich,
                             extend_model, model_from_stored, model_meta, read_model_file, sample_and_solve,
                             solve_new_points)

OVERLAP = 2.0
"""A point joins every region whose squared centre distance is within this factor of its nearest one.

Common practice for local bases: overlapping clusters keep a region's basis
accurate up to its boundary. 2 (distances within sqrt(2)) gave the measured
accuracy on generated graphs; each point then sits in about 1.5-2 regions.
"""


@dataclass(frozen=True, eq=False)
class RegionalModel:
    """Reduced models of one problem, one per region of the parameter domain.

    It answers like a :class:`~fitrank.reduced.ReducedModel`: ``scorer``,
    ``vector``, ``certified_bound``, ``save``, ``rank``, ``method``, ``info``.

    Attributes:
      problem: the full problem.
      settings: how it was built (``settings.regions`` = R).
      parts: (R,) the regions' models.
      centres: (R, p) region centres in ``problem.weighting.coordinates``.
      info: offline report; ``k``, ``rows`` and ``edges_touched`` are the
        largest over regions (one evaluation runs one region), ``regions`` has
        each region's own.
    """

    problem: PageRankProblem
    settings: ReductionSettings
    parts: tuple[ReducedModel, ...]
    centres: np.ndarray
    info: dict
    _jitted: dict = field(default_factory=dict, repr=False)

    @property
    def method(self) -> str:
        return self.parts[0].method

    @property
    def rank(self) -> int:
        return max(part.rank for part in self.parts)

    def region_of(self, theta) -> int:
        """Index of the region whose model serves ``theta`` (p,)."""
        return int(nearest_centre(self.problem.weighting.coordinates(np.asarray(theta, dtype=np.float64)),
                                  self.centres))

    def vector(self, theta) -> np.ndarray:
        """(n,) the reduced approximation of x(theta) by its region's model (sums to 1)."""
        return self.parts[self.region_of(theta)].vector(theta)

    def scorer(self, nodes) -> Scorer:
        """A :class:`~fitrank.reduced.Scorer` of x at ``nodes`` (S,): the region's solve, chosen inside jit."""
        nodes = np.asarray(nodes, dtype=np.int64)
        if "values" not in self._jitted:
            solve_arrays, solve_layout = pack([part.arrays for part in self.parts])
            solve = self.parts[0].coefficient_fn  # every region's solve is the same function of its arrays
            coordinates = functools.partial(self.problem.weighting.coordinates, xp=jnp)

            def region_values(region, theta, arrays):
                return solve(theta, unpack(arrays["solve"], solve_layout, region)) @ arrays["readout"][region]

            branches = [functools.partial(region_values, region) for region in range(len(self.parts))]

            def values(theta, arrays):
                region = nearest_centre(coordinates(theta), arrays["centres"], xp=jnp)
                return jax.lax.switch(region, branches, theta, arrays)

            # packed once per model: every scorer of it shares the function and these device arrays
            self._jitted.update(values=values, solve=jax.device_put(solve_arrays))
        readouts = tuple(np.ascontiguousarray(part.basis.vectors[nodes].T) for part in self.parts)
        arrays = {**jax.device_put({"centres": self.centres, "readout": readouts}), "solve": self._jitted["solve"]}
        return Scorer(self._jitted["values"], arrays, nodes)

    def certified_bound(self, theta, vector: np.ndarray | None = None) -> float:
        """Certified ||x(theta) - x_reduced(theta)||_1 (one full sparse mat-vec)."""
        y = self.vector(theta) if vector is None else vector
        return certified_bound(self.problem.operator(theta), y)

    def save(self, path) -> str:
        """Write every region's model and the centres to one ``.npz`` file (atomically)."""
        path = os.fspath(path)
        meta = model_meta(self.problem, self.settings, self.method, self.info)
        meta.update(regions=len(self.parts), part_info=[part.info for part in self.parts])
        arrays = {"centres": self.centres}
        for region, part in enumerate(self.parts):
            arrays.update(part.stored_arrays(prefix=_prefix(region)))
        with staged_file(path, suffix=".npz") as temp:
            np.savez(temp, meta=np.array(json.dumps(meta)), **arrays)
        return path


PACK_LIMIT = 16384


def pack(trees: list) -> tuple[list[np.ndarray], tuple]:
    """Pytrees of one structure as one flat array per leaf position, and the layout to cut them apart.

    A jitted call pays for every array argument, and a ``lax.switch`` for every
    operand of its branches: R regions of 14 arrays each cost about 17 us per
    region per call (measured at 200k nodes), more than a region's whole solve
    at small k. Packed, the count stays that of one region.

    Returns:
      (packed, layout): ``packed[j]`` holds leaf j of every tree, raveled and
      concatenated; ``layout`` = (treedef, ((offset, shape) per leaf) per tree).
    """
    flat = [jax.tree_util.tree_flatten(tree) for tree in trees]
    treedef = flat[0][1]
    if any(other != treedef for _, other in flat):
        raise ValueError("regional arrays must share one structure")
    packed, places = [], [[] for _ in trees]
    for position in range(treedef.num_leaves):
        leaves = [np.asarray(leaves[position]) for leaves, _ in flat]
        if max(leaf.size for leaf in leaves) > PACK_LIMIT:
            packed.append(tuple(leaves))
            for tree in range(len(trees)):
                places[tree].append((None, None))
            continue
        offsets = np.cumsum([0] + [leaf.size for leaf in leaves])
        packed.append(np.concatenate([leaf.ravel() for leaf in leaves]))
        for tree, (leaf, offset) in enumerate(zip(leaves, offsets)):
            places[tree].append((int(offset), leaf.shape))
    return packed, (treedef, tuple(tuple(place) for place in places))


def unpack(packed, layout: tuple, index: int):
    """Tree ``index`` of :func:`pack`'s output, cut out with static slices."""
    treedef, places = layout
    leaves = [buffer[index] if offset is None else
              jax.lax.slice(buffer, (offset,), (offset + int(np.prod(shape)),)).reshape(shape)
              for buffer, (offset, shape) in zip(packed, places[index])]
    return jax.tree_util.tree_unflatten(treedef, leaves)


def nearest_centre(point, centres, xp=np):
    """Index of the row of ``centres`` (R, p) nearest to ``point`` (p,) in Euclidean distance."""
    return xp.argmin(xp.sum((centres - point) ** 2, axis=1))


def region_members(points: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """(R, m) bool: point j belongs to region c (its nearest region, and any within ``OVERLAP``)."""
    distance = np.sum((points[None, :, :] - centres[:, None, :]) ** 2, axis=2)
    return distance <= OVERLAP * distance.min(axis=0, keepdims=True)


def region_centres(points: np.ndarray, regions: int, seed: int) -> np.ndarray:
    """(R, p) k-means centres of ``points`` (m, p), seeded; centres that win no point are dropped."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # kmeans2 warns about empty clusters, handled below
        centres, labels = kmeans2(points, regions, minit="++", seed=seed)
    return centres[np.isin(np.arange(regions), labels)]


def build_model(problem: PageRankProblem, settings: ReductionSettings = ReductionSettings(), *,
                executor: Executor | None = None, progress: bool = True) -> ReducedModel | RegionalModel:
    """The reduced model ``settings`` asks for: one global model, or one per region when ``regions`` > 1.

    Args and offline work as :func:`fitrank.reduced.build_reduced_model`.
    """
    if settings.regions <= 1:
        return build_reduced_model(problem, settings, executor=executor, progress=progress)
    if settings.regions > settings.samples:
        raise FitrankInputError(f"{settings.regions} regions need at least as many samples "
                                f"(got {settings.samples})")
    method = settings.resolved_method(problem.weighting.affine)
    thetas, snapshots, timings = sample_and_solve(problem, settings, executor=executor, progress=progress)
    start = time.perf_counter()
    points = problem.weighting.coordinates(thetas)
    centres = region_centres(points, settings.regions, settings.seed)
    members = region_members(points, centres)
    timings["regions_s"] = time.perf_counter() - start
    parts = []
    for belongs in members:
        start = time.perf_counter()
        basis = pod_basis(np.asarray(snapshots[:, belongs]), rank=settings.rank, energy=settings.energy,
                          max_rank=settings.max_rank)
        parts.append(_assemble(problem, settings, basis, thetas[belongs], method,
                               {"basis_s": time.perf_counter() - start}))
        for name in ("basis_s", "assemble_s"):
            timings[name] = timings.get(name, 0.0) + parts[-1].info["timings"][name]
    return RegionalModel(problem, settings, tuple(parts), centres, _summary(parts, timings, thetas.shape[0]))


def enrich_model(model: ReducedModel | RegionalModel, thetas: np.ndarray, *, executor: Executor | None = None,
                 progress: bool = False) -> ReducedModel | RegionalModel:
    """The model with full solves at ``thetas`` (m_new, p) added: to its one basis, or to each region they join."""
    if isinstance(model, ReducedModel):
        return enrich(model, thetas, executor=executor, progress=progress)
    start = time.perf_counter()
    thetas, new = solve_new_points(model, thetas, executor=executor, progress=progress)
    members = region_members(model.problem.weighting.coordinates(thetas), model.centres)
    parts = tuple(extend_model(part, thetas[belongs], new[:, belongs]) if belongs.any() else part
                  for part, belongs in zip(model.parts, members))
    info = _summary(parts, {"enrich_s": time.perf_counter() - start}, model.info["samples"] + thetas.shape[0])
    return replace(model, parts=parts, info=info, _jitted={})


def load_model(path, problem: PageRankProblem) -> ReducedModel | RegionalModel:
    """Load a model saved by either kind's ``save`` for ``problem`` (same checks as
    :func:`fitrank.reduced.load_reduced_model`)."""
    path = os.fspath(path)
    meta, stored = read_model_file(path, problem)
    regions = int(meta.get("regions", 1))
    if regions == 1:
        return model_from_stored(problem, meta, stored, path=path)
    if "centres" not in stored or len(meta.get("part_info", ())) != regions:
        raise FitrankInputError(f"{path}: not a readable fitrank reduced model (regional parts missing)")
    parts = tuple(model_from_stored(problem, meta, stored, prefix=_prefix(region), info=meta["part_info"][region],
                                    path=path) for region in range(regions))
    settings = ReductionSettings(**meta["settings"])
    return RegionalModel(problem, settings, parts, stored["centres"], dict(meta["info"], loaded_from=path))


def _prefix(region: int) -> str:
    return f"region{region}_"


def _summary(parts, timings: dict, samples: int) -> dict:
    """The regional model's info: per-region reports, and the largest k, rows and edges of any region."""
    largest = max(parts, key=lambda part: part.rank)
    per_region = [{"k": part.rank, "samples": int(part.thetas.shape[0]), "rows": part.info.get("rows", 0),
                   "edges_touched": part.info.get("edges_touched", 0), "lost_energy": part.basis.lost_energy}
                  for part in parts]
    info = {"k": largest.rank, "samples": samples, "regions": per_region,
            "lost_energy": max(region["lost_energy"] for region in per_region),
            "singular_values": largest.info["singular_values"],
            "rows": max(region["rows"] for region in per_region),
            "edges_touched": max(region["edges_touched"] for region in per_region),
            "timings": timings, "offline_s": float(sum(timings.values()))}
    fractions = [part.info["edges_touched_fraction"] for part in parts if "edges_touched_fraction" in part.info]
    if fractions:
        info["edges_touched_fraction"] = max(fractions)
    return info
