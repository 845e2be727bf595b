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
from fitrank.basis import pod_basis, snapshot_gram, streams
from fitrank.errors import FitrankInputError
from fitrank.pagerank import PageRankProblem
from fitrank.reduced import (ReducedModel, ReductionSettings, Scorer, _assemble, build_reduced_model, enrich,
                             extend_model, model_from_stored, model_meta, read_model_file, read_out, readout_dtype,
                             sample_and_solve, solve_new_points)

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

    def scorer(self, nodes, dtype=np.float64) -> Scorer:
        """A :class:`~fitrank.reduced.Scorer` of x at ``nodes`` (S,): the region's solve, chosen inside jit.

        The regions' solve arrays are padded to one shape and stacked
        (:func:`stack_regions`), so the solve indexes them by region instead
        of branching: XLA's conditional over R regions' solves cost 35-70 us a
        call more than one region's program alone (measured at 200k nodes,
        k = 50). The readouts (k, S) stay one array per region, chosen by a
        ``lax.switch`` whose branches are one product each (within 5 us of a
        plain product): indexing a stacked readout copies the region's slice
        first, 60-140 us at S = 2,000. ``dtype`` is the readouts' and the
        values' precision, as in :meth:`fitrank.reduced.ReducedModel.scorer`.
        """
        nodes = np.asarray(nodes, dtype=np.int64)
        dtype = readout_dtype(dtype)
        if "values" not in self._jitted:
            stacked = stack_regions(self.parts, self.problem.weighting.table_fill)
            solve = self.parts[0].coefficient_fn  # every region's solve is the same function of its arrays
            coordinates = functools.partial(self.problem.weighting.coordinates, xp=jnp)
            readouts = [functools.partial(_read_out, region, rank=part.rank) for region, part in enumerate(self.parts)]

            def values(theta, arrays):
                region = nearest_centre(coordinates(theta), arrays["centres"], xp=jnp)
                local = jax.tree_util.tree_map(lambda leaf: leaf[region], arrays["stacked"])
                if "packed" in local.get("tables", {}):
                    # whole, with the region: the native kernel that reads it picks the region's rows
                    # itself, where a slicing kernel beside the chain sent XLA to its thread pool
                    local["tables"].update(packed=arrays["stacked"]["tables"]["packed"], part=region)
                if "basis_sources" in arrays:
                    local["basis_sources"] = arrays["basis_sources"]
                return jax.lax.switch(region, readouts, solve(theta, local), arrays["readout"])

            # stacked once per model: every scorer of it shares the function and these device arrays
            self._jitted.update(values=values, arrays=jax.device_put({**stacked, "centres": self.centres}))
        readout = tuple(np.ascontiguousarray(part.basis.vectors[nodes].T, dtype=dtype) for part in self.parts)
        return Scorer(self._jitted["values"], {**self._jitted["arrays"], "readout": jax.device_put(readout)}, nodes)

    # the same bound of the same residual: it needs only ``vector`` and ``problem``
    certified_bound = ReducedModel.certified_bound

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


def stack_regions(parts, table_fill: dict) -> dict:
    """The regions' online arrays padded to common shapes and stacked along a new first axis.

    Padding is inert: zero basis columns get coefficient 0
    (:func:`~fitrank.interpolation.constrained_least_squares`; for Galerkin, a
    unit diagonal in every affine term and a zero right-hand side), zero rows
    drop out of the least squares, empty CSR rows hold no edge, and padded
    table entries take ``table_fill`` (the weighting's inert values). For
    interpolation every region gets one more row than the largest region has,
    always empty: padded edges point there, so no derivative reaches a real row.
    The interpolation's U_S is not stacked but concatenated, with each
    region's CSR columns offset into it: the sparse product reads only the rows
    it needs, where a stacked (R, s, k) array would copy a region's slice on
    every call.

    Args:
      parts: (R,) :class:`~fitrank.reduced.ReducedModel` of one problem and method.
      table_fill: the weighting's ``table_fill``.

    Returns:
      ``{"stacked": each leaf (R, ...)}``, and with interpolation on a
      non-affine weighting ``"basis_sources"``: the (sum of s, largest k)
      concatenation.
    """
    trees = [jax.device_get(part.arrays) for part in parts]
    width = max(part.rank for part in parts)
    method = parts[0].method

    def pad(leaf, shape, fill):
        leaf = np.asarray(leaf)
        widths = [(0, size - now) for size, now in zip(shape, leaf.shape)]
        if np.ndim(fill) == 0:
            return np.pad(leaf, widths, constant_values=fill)
        # one fill per row (a table that packs several columns as rows)
        return np.stack([np.pad(row, widths[1:], constant_values=value) for row, value in zip(leaf, fill)])

    def common(leaves):
        return tuple(max(sizes) for sizes in zip(*(np.shape(leaf) for leaf in leaves)))

    stacked = {}
    if method == "galerkin":
        terms = []
        for tree in trees:
            k = tree["sums"].shape[0]
            padded = pad(tree["terms"], (tree["terms"].shape[0], width, width), 0.0)
            padded[:, np.arange(k, width), np.arange(k, width)] = 1.0  # coefficients sum to 1 (the mixture)
            terms.append(padded)
        stacked.update(terms=np.stack(terms), rhs=np.stack([pad(t["rhs"], (width,), 0.0) for t in trees]),
                       sums=np.stack([pad(t["sums"], (width,), 0.0) for t in trees]))
        return {"stacked": stacked}
    local_subgraph = "tables" in trees[0]  # interpolation on a non-affine weighting
    rows = max(tree["basis_rows"].shape[0] for tree in trees) + local_subgraph
    shapes = {"basis_rows": (rows, width), "teleport_rows": (rows,), "sums": (width,)}
    if not local_subgraph:
        shapes["terms"] = (trees[0]["terms"].shape[0], rows, width)
    else:
        edges = max(tree["slot"].shape[0] for tree in trees)
        shapes.update(leak_rows=(rows, trees[0]["leak_rows"].shape[1]), leak_proj=(trees[0]["leak_proj"].shape[0], width))
        offsets = np.cumsum([0] + [tree["basis_sources"].shape[0] for tree in trees])
        stacked.update(
            indptr=np.stack([pad(t["indptr"], (rows + 1,), t["indptr"][-1]) for t in trees]),
            row=np.stack([pad(t["row"], (edges,), rows - 1) for t in trees]),
            slot=np.stack([pad(t["slot"] + offset, (edges,), offset) for t, offset in zip(trees, offsets)]),
            tables={name: np.stack([pad(t["tables"][name], common([u["tables"][name] for u in trees]),
                                        _fill(table_fill, name)) for t in trees])
                    for name in trees[0]["tables"]})
    stacked.update({name: np.stack([pad(t[name], shape, 0.0) for t in trees]) for name, shape in shapes.items()})
    arrays = {"stacked": stacked}
    if local_subgraph:
        arrays["basis_sources"] = np.concatenate([pad(t["basis_sources"], (t["basis_sources"].shape[0], width), 0.0)
                                                  for t in trees])
    return arrays


def _read_out(region: int, coefficients, readouts, *, rank: int):
    """x at the scorer's nodes from the padded coefficients of one region (its first ``rank`` are real)."""
    return read_out(coefficients[:rank], readouts[region])


def _fill(table_fill: dict, name: str):
    if name not in table_fill:
        raise ValueError(f"the weighting names no padding value for its table '{name}' (Weighting.table_fill)")
    return table_fill[name]


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
    # streamed snapshots (a memory-mapped file, or too large to copy) are read in row blocks: one pass
    # for the Gram matrix of all samples, whose sub-matrices serve every region, one per region for U
    gram = snapshot_gram(snapshots) if any(streams(snapshots, int(belongs.sum())) for belongs in members) else None
    for region, belongs in enumerate(members):
        start = time.perf_counter()
        basis = pod_basis(snapshots, rank=settings.rank, energy=settings.energy, max_rank=settings.max_rank,
                          columns=np.flatnonzero(belongs), gram=gram)
        try:
            parts.append(_assemble(problem, settings, basis, thetas[belongs], method,
                                   {"basis_s": time.perf_counter() - start}))
        except FitrankInputError as err:  # too few rows fit: say in which region
            raise FitrankInputError(f"region {region + 1} of {len(members)} ({int(belongs.sum())} samples): "
                                    f"{err}") from None
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
