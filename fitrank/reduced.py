"""Reduced models: build once offline, evaluate in microseconds to milliseconds online.

A :class:`ReducedModel` approximates x(theta) by U c(theta) with a POD basis U
(n, k) and a small solve for c: Galerkin (affine weightings) or DEIM-style
interpolation (any weighting). Online work never touches an n-sized array when
only the entries of a few nodes are needed (:meth:`ReducedModel.scorer`).
Models are saved to one ``.npz`` file with the fingerprint of the problem they
were built for; loading against other data is refused.
"""

from __future__ import annotations

import functools
import json
import os
import time
import zipfile
from concurrent.futures import Executor
from dataclasses import asdict, dataclass, field, replace
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

from fitrank.atomic import refused_as_input_error, staged_file
from fitrank.basis import PodBasis, extend_basis, pod_basis
from fitrank.errors import FitrankInputError, ModelMismatchError
from fitrank.galerkin import galerkin_arrays, galerkin_coefficients
from fitrank.interpolation import choose_rows, interpolation_arrays, interpolation_coefficients
from fitrank.pagerank import PageRankProblem, certified_bound
from fitrank.snapshots import solve_snapshots

METHODS = ("auto", "galerkin", "interpolation")
FORMAT_VERSION = 1


@dataclass(frozen=True)
class ReductionSettings:
    """How to build a reduced model.

    Attributes:
      method: ``"galerkin"`` (affine weightings only), ``"interpolation"``, or
        ``"auto"`` (Galerkin when the weighting is affine).
      samples: parameter points m for snapshots (quasi-random, seeded).
      rank: fixed basis size k; None chooses k by ``energy``.
      energy: largest allowed lost energy 1 - sum_{i<=k} s_i^2 / sum s_i^2.
      max_rank: cap on k.
      rows: interpolation rows r (default 2 k).
      gamma: cost weight of the row choice, in units of the average row's cost
        (0: pure pivoted QR, which favours hubs; 1: a row of average cost must be
        twice as informative as a free one); None picks by weighting: 0.25 when
        out-weights have a closed form, 4 otherwise (rows then also pay for
        their in-neighbours' out-edges, a heavier-tailed cost). Measured on
        generated 2M-edge graphs: 0.25 cut the edges touched 15-fold at unchanged
        top-100 tau for the scale weighting; for the feature weighting 0, 0.25 and
        4 touched 88%, 10% and 1.1% of the edges at the same tau.
      edge_budget: most edges the interpolation rows may need (None: no budget).
      probes: parameter points stacked for the row choice (default enough for r).
      seed: seed of sampling.
      snapshot_tol: certified L1 error of each snapshot solve. The basis keeps less
        detail than this anyway (lost energy 1e-10 is a relative 2-norm error of
        about 1e-5), so tighter solves would only cost mat-vecs.
      snapshot_path: file for a memory-mapped snapshot matrix (None: in memory).
      regions: number of local models (1: one global model). With R > 1 the
        samples are grouped into R regions of the parameter domain and each
        region gets its own basis, rows and online solve
        (:mod:`fitrank.regions`); ``rank``, ``energy`` and ``rows`` then apply
        per region. From ``snapshot_path`` every region's basis is streamed
        (the method of snapshots on its sub-Gram matrix), never read whole.
    """

    method: str = "auto"
    samples: int = 128
    rank: int | None = None
    energy: float = 1e-10
    max_rank: int = 100
    rows: int | None = None
    gamma: float | None = None
    edge_budget: int | None = None
    probes: int | None = None
    seed: int = 0
    snapshot_tol: float = 1e-8
    snapshot_path: str | None = None
    regions: int = 1

    def resolved_gamma(self, weighting) -> float:
        if self.gamma is not None:
            return float(self.gamma)
        return 0.25 if weighting.closed_form_out_weight else 4.0

    def resolved_method(self, affine: bool) -> str:
        if self.method not in METHODS:
            raise FitrankInputError(f"reduction method must be one of {METHODS}, got '{self.method}'")
        if self.method == "auto":
            return "galerkin" if affine else "interpolation"
        if self.method == "galerkin" and not affine:
            raise FitrankInputError(
                "Galerkin reduction needs a weighting that is affine in its parameters (the relation mixture); "
                "use method 'interpolation' for this weighting")
        return self.method


@dataclass(frozen=True, eq=False)
class Scorer:
    """PageRank values at a fixed node set, as a pure JAX function.

    Attributes:
      fn: ``fn(theta (p,), arrays) -> (S,)`` values x at ``nodes``; jit-able and
        differentiable. Pass ``arrays`` as an argument of the jitted function
        (closed-over large arrays get constant-folded by XLA). The values are
        ``c(theta) @ arrays["readout"]``: linear in that readout, stored (k, S)
        so that both the values and their gradient ``readout @ g`` read it
        along rows (XLA's transposed GEMV was 5x slower: 150-180 us against
        23-29 us at k = 51, S = 2,800).
      arrays: the pytree ``fn`` reads.
      nodes: (S,) node indices.

    The readout's dtype is the values' (see :func:`readout_dtype`).
    """

    fn: Callable
    arrays: dict
    nodes: np.ndarray

    def differences(self, first, second, *, scale: float = 1.0) -> Scorer:
        """A scorer of the Q differences scale * (x[nodes[first]] - x[nodes[second]]).

        The values are linear in the readout, so the differences are taken
        once, on its columns: evaluating them costs one (k, Q) product and no gather.

        Args:
          first, second: (Q,) positions into ``nodes``.
          scale: factor of every difference (the objective's n).

        Returns:
          A :class:`Scorer` with the same ``fn`` and ``nodes`` whose values are (Q,).
        """
        first, second = np.asarray(first), np.asarray(second)

        def differenced(columns):
            columns = np.asarray(columns)
            wide = columns.astype(np.float64, copy=False)
            return np.ascontiguousarray((scale * (wide[:, first] - wide[:, second])).astype(columns.dtype))

        # a regional model holds one readout per region, hence the tree map
        readout = jax.tree_util.tree_map(differenced, self.arrays["readout"])
        return Scorer(self.fn, {**self.arrays, "readout": jax.device_put(readout)}, self.nodes)


@dataclass(frozen=True, eq=False)
class ReducedModel:
    """A reduced model of one :class:`~fitrank.pagerank.PageRankProblem`.

    Attributes:
      problem: the full problem it approximates.
      settings: how it was built.
      method: ``"galerkin"`` or ``"interpolation"``.
      basis: the POD basis (U (n, k), singular values).
      rows: (r,) interpolation rows (empty for Galerkin).
      thetas: (m, p) parameter points whose snapshots span the basis.
      arrays: online arrays of the small solve.
      info: offline report (k, rows, edges touched, timings, ...).
    """

    problem: PageRankProblem
    settings: ReductionSettings
    method: str
    basis: PodBasis
    rows: np.ndarray
    thetas: np.ndarray
    arrays: dict
    info: dict
    _jitted: dict = field(default_factory=dict, repr=False)

    @property
    def rank(self) -> int:
        return self.basis.rank

    @property
    def coefficient_fn(self) -> Callable:
        """``(theta, arrays) -> c (k,)``: the pure JAX online solve."""
        if "coefficients" not in self._jitted:
            self._jitted["coefficients"] = _coefficient_fn(self.problem, self.method)
        return self._jitted["coefficients"]

    def coefficients(self, theta) -> np.ndarray:
        """(k,) reduced coefficients c(theta)."""
        if "coefficients_jit" not in self._jitted:
            self._jitted["coefficients_jit"] = jax.jit(self.coefficient_fn)
        return np.asarray(self._jitted["coefficients_jit"](jnp.asarray(theta, dtype=jnp.float64), self.arrays))

    def vector(self, theta) -> np.ndarray:
        """(n,) the reduced approximation U c(theta) of the PageRank vector (sums to 1)."""
        return self.basis.vectors @ self.coefficients(theta)

    def scorer(self, nodes, dtype=np.float64) -> Scorer:
        """A :class:`Scorer` returning x at ``nodes`` (S,) without n-sized work.

        Args:
          nodes: (S,) node indices.
          dtype: precision of the readout and the values: float64, or float32
            for ranking and display (:func:`readout_dtype`).
        """
        nodes = np.asarray(nodes, dtype=np.int64)
        dtype = readout_dtype(dtype)
        if "values" not in self._jitted:
            solve = self.coefficient_fn

            def values(theta, arrays):
                return read_out(solve(theta, arrays["solve"]), arrays["readout"])

            # one function per model: scorers of other node sets (and objectives built on
            # them) then share jit's compiled programs whenever the shapes agree
            self._jitted["values"] = values

        # device arrays once, here: NumPy arguments would be copied in on every call
        readout = np.ascontiguousarray(self.basis.vectors[nodes].T, dtype=dtype)
        arrays = jax.device_put({"readout": readout, "solve": self.arrays})
        return Scorer(self._jitted["values"], arrays, nodes)

    def certified_bound(self, theta, vector: np.ndarray | None = None) -> float:
        """Certified ||x(theta) - y||_1, y = ``vector`` or else ``self.vector(theta)`` (one full sparse mat-vec)."""
        y = self.vector(theta) if vector is None else vector
        return certified_bound(self.problem.operator(theta), y)

    def save(self, path) -> str:
        """Write the model to one ``.npz`` file (atomically; no pickled objects).

        Returns:
          the path written.
        """
        path = os.fspath(path)
        meta = model_meta(self.problem, self.settings, self.method, self.info)
        with staged_file(path, suffix=".npz") as temp:
            np.savez(temp, meta=np.array(json.dumps(meta)), **self.stored_arrays())
        return path

    def stored_arrays(self, prefix: str = "") -> dict[str, np.ndarray]:
        """What a saved file holds of this model, under names starting with ``prefix``."""
        arrays = {"vectors": self.basis.vectors, "singular_values": self.basis.singular_values,
                  "lost_energy": np.array(self.basis.lost_energy), "rows": self.rows, "thetas": self.thetas}
        return {prefix + name: value for name, value in arrays.items()}


def read_out(coefficients, readout):
    """Values (S,) = c @ readout, in the readout's precision (c (k,) is always float64)."""
    return coefficients.astype(readout.dtype) @ readout


def readout_dtype(dtype) -> np.dtype:
    """The precision of a scorer's readout (k, S) and values, checked: float64 or float32.

    The online solve always runs in float64; only the product c @ readout may
    run in float32. That halves the bytes it reads (a regional model's
    readouts are its largest arrays, and going from region to region they
    come from memory, not cache) and XLA's float32 product runs 1.5-2x as fast
    as its float64 one: (50, 2,000) in 40-48 against 59-81 us. The feature
    weighting's 12-region model called at a new region each time took 0.287
    against 0.326 ms in all, and the mixture's scores of all 200k nodes 1.83
    against 5.42 ms at k = 50 (measured side by side on the 2-core
    development machine). The values then carry
    relative errors of about 1e-7 (float32's epsilon times the largest terms
    of the sum), a thousandth or less of a reduced model's own error at
    top-100 Kendall tau 0.999. Training keeps float64: a line search compares
    objective values that differ by far less than 1e-7 near the optimum.

    Args:
      dtype: anything ``numpy.dtype`` accepts.

    Returns:
      ``numpy.dtype('float64')`` or ``numpy.dtype('float32')``.
    """
    try:
        checked = np.dtype(dtype)
    except TypeError:
        checked = np.dtype(object)  # not a dtype at all: refused below (np.dtype(None) would be float64)
    if checked.name not in ("float64", "float32"):
        raise ValueError(f"a scorer's dtype must be float64 or float32, got {dtype!r}")
    return checked


def _coefficient_fn(problem: PageRankProblem, method: str) -> Callable:
    weighting = problem.weighting
    if method == "galerkin":
        coefficients = weighting.coefficients

        def galerkin(theta, arrays):
            return galerkin_coefficients(coefficients(theta), arrays)

        return galerkin
    static = (problem.damping, problem.dangling, weighting.transition, weighting.leak_coefficients,
              weighting.coefficients if weighting.affine else None)
    return functools.partial(interpolation_coefficients, problem_static=static)


def _assemble(problem: PageRankProblem, settings: ReductionSettings, basis: PodBasis, thetas: np.ndarray,
              method: str, timings: dict, rows: np.ndarray | None = None) -> ReducedModel:
    """Online arrays for a basis: Galerkin terms, or rows (chosen unless given) and their local subgraph."""
    start = time.perf_counter()
    vectors = basis.vectors
    info = {"k": basis.rank, "samples": int(thetas.shape[0]), "lost_energy": basis.lost_energy,
            "singular_values": [float(s) for s in basis.singular_values]}
    if method == "galerkin":
        arrays, rows = galerkin_arrays(problem, vectors), np.zeros(0, dtype=np.int64)
        info.update(rows=0, edges_touched=0)
    else:
        if rows is None:
            count = settings.rows or 2 * basis.rank
            choice = choose_rows(problem, vectors, max(count, basis.rank), probes=settings.probes,
                                 gamma=settings.resolved_gamma(problem.weighting), budget=settings.edge_budget,
                                 seed=settings.seed)
            rows = choice.rows
            info["row_candidates_scored"] = choice.candidates_scored
        if rows.size < basis.rank and settings.edge_budget is not None:
            raise FitrankInputError(
                f"only {rows.size} interpolation rows fit (k = {basis.rank}) within reduction.edge_budget = "
                f"{settings.edge_budget}; raise it, raise reduction.gamma (cheaper rows first) or use a smaller basis")
        if rows.size < basis.rank:
            raise FitrankInputError(f"only {rows.size} independent interpolation rows exist (k = {basis.rank}); "
                                    "use a smaller basis (reduction.rank or reduction.max_rank)")
        arrays, touched = interpolation_arrays(problem, vectors, rows)
        info.update(rows=int(rows.size), edges_touched=touched,
                    edges_touched_fraction=touched / max(1, problem.graph.num_edges))
    timings = dict(timings, assemble_s=time.perf_counter() - start)
    info["timings"] = timings
    info["offline_s"] = float(sum(timings.values()))
    return ReducedModel(problem, settings, method, basis, np.asarray(rows, dtype=np.int64), thetas,
                        jax.device_put(arrays), info)


def build_reduced_model(problem: PageRankProblem, settings: ReductionSettings = ReductionSettings(), *,
                        executor: Executor | None = None, progress: bool = True) -> ReducedModel:
    """Sample, solve snapshots, compute the POD basis and assemble the online solve.

    Args:
      problem: the full problem.
      settings: :class:`ReductionSettings`.
      executor: where snapshot solves run (any ``concurrent.futures.Executor``; None: here).
      progress: show progress bars.

    Returns:
      The :class:`ReducedModel`; ``model.info`` reports k, singular values,
      rows, edges touched and offline timings.
    """
    method = settings.resolved_method(problem.weighting.affine)
    thetas, snapshots, timings = sample_and_solve(problem, settings, executor=executor, progress=progress)
    start = time.perf_counter()
    basis = pod_basis(snapshots, rank=settings.rank, energy=settings.energy, max_rank=settings.max_rank)
    timings["basis_s"] = time.perf_counter() - start
    return _assemble(problem, settings, basis, thetas, method, timings)


def sample_and_solve(problem: PageRankProblem, settings: ReductionSettings, *, executor: Executor | None = None,
                     progress: bool = True) -> tuple[np.ndarray, np.ndarray, dict]:
    """(thetas (m, p), snapshots (n, m), timings): the offline stage's sampled full solves.

    The snapshots are a memory-mapped file when ``settings.snapshot_path`` is set.
    """
    start = time.perf_counter()
    thetas = problem.weighting.sample(settings.samples, seed=settings.seed)
    out = None
    if settings.snapshot_path:
        # a read-only or immutable file, a full disk: checked paths can still refuse
        with refused_as_input_error(settings.snapshot_path, "choose another reduction.snapshot_file"):
            os.makedirs(os.path.dirname(os.path.abspath(settings.snapshot_path)), exist_ok=True)
            out = np.lib.format.open_memmap(settings.snapshot_path, mode="w+", dtype=np.float64,
                                            shape=(problem.graph.n, thetas.shape[0]))
    snapshots = solve_snapshots(problem, thetas, tol=settings.snapshot_tol, executor=executor, out=out,
                                progress=progress)
    return thetas, snapshots, {"snapshots_s": time.perf_counter() - start}


def model_meta(problem: PageRankProblem, settings: ReductionSettings, method: str, info: dict) -> dict:
    """The JSON header of a saved model file."""
    return {"format": FORMAT_VERSION, "fingerprint": problem.fingerprint(), "method": method,
            "settings": asdict(settings), "info": info, "param_names": list(problem.weighting.param_names)}


def enrich(model: ReducedModel, thetas: np.ndarray, *, executor: Executor | None = None,
           progress: bool = False) -> ReducedModel:
    """The model with full solves at ``thetas`` (m_new, p) added to its snapshots.

    The basis is updated from the old one and the new snapshots; interpolation
    rows are chosen again for the new basis.
    """
    start = time.perf_counter()
    thetas, new = solve_new_points(model, thetas, executor=executor, progress=progress)
    return extend_model(model, thetas, new, seconds=time.perf_counter() - start)


def solve_new_points(model, thetas: np.ndarray, *, executor: Executor | None = None,
                     progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(thetas (m_new, p), snapshots (n, m_new)): full solves, at the model's snapshot tolerance, of points to add."""
    thetas = np.atleast_2d(np.asarray(thetas, dtype=np.float64))
    return thetas, solve_snapshots(model.problem, thetas, tol=model.settings.snapshot_tol, executor=executor,
                                   progress=progress)


def extend_model(model: ReducedModel, thetas: np.ndarray, snapshots: np.ndarray, *,
                 seconds: float = 0.0) -> ReducedModel:
    """The model with already solved ``snapshots`` (n, m_new) at ``thetas`` (m_new, p) added.

    ``seconds``: time already spent on them, for the timings report.
    """
    start = time.perf_counter()
    new = snapshots
    settings = model.settings
    max_rank = max(settings.max_rank, model.rank + thetas.shape[0]) if settings.rank is None else None
    basis = extend_basis(model.basis, new, rank=None if settings.rank is None else model.rank + thetas.shape[0],
                         energy=settings.energy, max_rank=max_rank)
    timings = {"snapshots_s": 0.0, "enrich_s": seconds + time.perf_counter() - start}
    return _assemble(model.problem, settings, basis, np.vstack([model.thetas, thetas]), model.method, timings)


def load_reduced_model(path, problem: PageRankProblem) -> ReducedModel:
    """Load a model saved by :meth:`ReducedModel.save` for ``problem``.

    Raises:
      ModelMismatchError: the file was built for other data, weighting, damping,
        teleport or dangling policy.
      FitrankInputError: the file is missing or not a fitrank model.
    """
    path = os.fspath(path)
    meta, stored = read_model_file(path, problem)
    if meta.get("regions", 1) != 1:
        raise FitrankInputError(f"{path}: holds {meta['regions']} regional models; load it with "
                                "fitrank.regions.load_model")
    return model_from_stored(problem, meta, stored, path=path)


def read_model_file(path: str, problem: PageRankProblem) -> tuple[dict, dict[str, np.ndarray]]:
    """(meta, arrays) of a saved model file, after checking its format and fingerprint against ``problem``."""
    try:
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(str(data["meta"]))
            stored = {name: data[name] for name in data.files if name != "meta"}
    except (OSError, EOFError, zipfile.BadZipFile, KeyError, ValueError) as err:  # empty, cut short, not ours
        raise FitrankInputError(f"{path}: not a readable fitrank reduced model ({err})") from None
    if meta.get("format") != FORMAT_VERSION:
        raise FitrankInputError(f"{path}: model format {meta.get('format')} is not supported (expected {FORMAT_VERSION})")
    expected = problem.fingerprint()
    if meta["fingerprint"] != expected:
        raise ModelMismatchError(
            f"{path}: this reduced model was built for other data or settings (fingerprint {meta['fingerprint']}, "
            f"current {expected}); rebuild it with 'fitrank build' or point to the matching model")
    return meta, stored


def model_from_stored(problem: PageRankProblem, meta: dict, stored: dict[str, np.ndarray], *, prefix: str = "",
                      info: dict | None = None, path: str | None = None) -> ReducedModel:
    """The model whose :meth:`ReducedModel.stored_arrays` (under ``prefix``) are in ``stored``."""
    try:
        vectors, singular_values, lost_energy, rows, thetas = (
            stored[prefix + name] for name in ("vectors", "singular_values", "lost_energy", "rows", "thetas"))
    except KeyError as err:
        raise FitrankInputError(f"{path}: not a readable fitrank reduced model (no array {err})") from None
    settings = ReductionSettings(**meta["settings"])
    basis = PodBasis(vectors, singular_values, float(lost_energy))
    model = _assemble(problem, settings, basis, thetas, meta["method"], {"load_s": 0.0},
                      rows=rows if meta["method"] == "interpolation" else None)
    return replace(model, info=dict(meta["info"] if info is None else info, loaded_from=path))
