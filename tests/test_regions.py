"""Regional reduced models against full solves, finite differences and their own parts."""

from __future__ import annotations

import functools
from dataclasses import replace

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.stats import kendalltau

from fitrank.errors import FitrankInputError, ModelMismatchError
from fitrank.pagerank import PageRankProblem
from fitrank.reduced import ReducedModel, ReductionSettings, load_reduced_model
from fitrank.regions import (RegionalModel, build_model, enrich_model, load_model, nearest_centre,
                             region_centres, region_members)
from fitrank.weightings import make_weighting

from tests._datasets import generated

# the feature weighting needs about 90 directions on these graphs, so each region needs ~100 samples
# The regions' k differ (energy rule) in the first three: the stacked scorer's padding is exercised
CASES = [("mixture", "galerkin", 128, 4), ("mixture", "interpolation", 128, 4), ("scale", "interpolation", 128, 4),
         ("features", "interpolation", 256, 3)]


@functools.lru_cache(maxsize=None)
def _problem(kind: str) -> PageRankProblem:
    dataset, _, _ = generated(kind)
    return PageRankProblem(dataset.graph, make_weighting(kind, dataset.graph))


@functools.lru_cache(maxsize=None)
def _model(kind: str, method: str, samples: int, regions: int) -> RegionalModel:
    settings = ReductionSettings(method=method, samples=samples, regions=regions)
    return build_model(_problem(kind), settings, progress=False)


@functools.lru_cache(maxsize=None)
def _fresh(kind: str, count: int = 12):
    problem = _problem(kind)
    thetas = problem.weighting.sample(count, seed=424242)
    return thetas, [problem.solve(theta, tol=1e-12).x for theta in thetas]


@pytest.mark.slow
@pytest.mark.parametrize("kind,method,samples,regions", CASES)
def test_regional_model_matches_full_solves_at_fresh_points(kind, method, samples, regions):
    model = _model(kind, method, samples, regions)
    assert isinstance(model, RegionalModel) and len(model.parts) == regions
    thetas, exact = _fresh(kind)
    used = {model.region_of(theta) for theta in thetas}
    assert len(used) >= 2, "the fresh points should exercise more than one region"
    for theta, x in zip(thetas, exact):
        y = model.vector(theta)
        top = np.argsort(-x)[:100]
        # Kendall tau by the general-purpose reference implementation (scipy.stats.kendalltau)
        assert kendalltau(x[top], y[top]).statistic >= 0.999, (kind, theta)
        assert np.abs(x[top] - y[top]).sum() / x[top].sum() <= 1e-3
        assert abs(y.sum() - 1.0) <= 1e-12
        assert np.abs(x - y).sum() <= model.certified_bound(theta, y) * (1 + 1e-9) + 1e-15
        # the region's own model is what answers
        part = model.parts[model.region_of(theta)]
        np.testing.assert_array_equal(y, part.vector(theta))


@pytest.mark.slow
@pytest.mark.parametrize("kind,method,samples,regions", CASES)
def test_regional_scorer_picks_the_region_inside_jit_and_its_gradient_matches_finite_differences(
        kind, method, samples, regions):
    model = _model(kind, method, samples, regions)
    nodes = np.arange(0, model.problem.graph.n, 37)
    scorer = model.scorer(nodes)
    values = jax.jit(scorer.fn)
    thetas, _ = _fresh(kind)
    # and one sampled point that each region answers: its padded, stacked arrays must give its own values
    own = [next(t for t in part.thetas if model.region_of(t) == region) for region, part in enumerate(model.parts)]
    for theta in np.vstack([thetas, own]):
        np.testing.assert_allclose(np.asarray(values(jnp.asarray(theta), scorer.arrays)), model.vector(theta)[nodes],
                                   rtol=1e-10, atol=1e-15)
    weights = np.random.default_rng(5).normal(size=nodes.size)

    def objective(theta, arrays):
        return jnp.dot(weights, jnp.log(scorer.fn(theta, arrays)))

    step = 1e-6
    # a point whose central differences stay inside one region (the function jumps at region boundaries)
    theta = next(t for t in thetas
                 if len({model.region_of(t + s * e) for e in np.eye(t.size) for s in (-step, 0.0, step)}) == 1)
    g = np.asarray(jax.jit(jax.grad(objective))(jnp.asarray(theta), scorer.arrays))
    value = jax.jit(objective)
    fd = np.array([(value(jnp.asarray(theta + step * e), scorer.arrays)
                    - value(jnp.asarray(theta - step * e), scorer.arrays)) / (2 * step) for e in np.eye(theta.size)])
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-8 * np.abs(fd).max())
    # differences of scores (what the training objective reads) stay per region too
    first, second = np.arange(0, 20), np.arange(20, 40)
    margins = scorer.differences(first, second, scale=2.0)
    x = np.asarray(values(jnp.asarray(theta), scorer.arrays))
    np.testing.assert_allclose(np.asarray(jax.jit(margins.fn)(jnp.asarray(theta), margins.arrays)),
                               2.0 * (x[first] - x[second]), rtol=1e-12, atol=1e-15)


@pytest.mark.slow
def test_a_float32_regional_scorer_gives_the_float64_values_within_float32_rounding():
    model = _model("features", "interpolation", 128, 4)
    nodes = np.arange(0, model.problem.graph.n, 37)
    wide, narrow = model.scorer(nodes), model.scorer(nodes, dtype=np.float32)
    values = jax.jit(wide.fn)
    for theta in _fresh("features")[0]:
        x64, x32 = np.asarray(values(jnp.asarray(theta), wide.arrays)), np.asarray(values(jnp.asarray(theta), narrow.arrays))
        part = model.parts[model.region_of(theta)]
        # (k + 2) u sum_i |c_i U_ji|, u = 2^-24 (Higham, "Accuracy and Stability of Numerical Algorithms", sec. 3.1)
        bound = (part.rank + 2) * 2.0 ** -24 * (np.abs(part.basis.vectors[nodes]) @ np.abs(part.coefficients(theta)))
        assert x32.dtype == np.float32 and np.all(np.abs(x32 - x64) <= bound)


def test_save_load_round_trip_and_refusals(tmp_path):
    model = _model("scale", "interpolation", 128, 4)
    path = model.save(tmp_path / "regional.npz")
    loaded = load_model(path, model.problem)
    assert isinstance(loaded, RegionalModel)
    np.testing.assert_array_equal(loaded.centres, model.centres)
    for theta in _fresh("scale")[0][:4]:
        assert loaded.region_of(theta) == model.region_of(theta)
        np.testing.assert_allclose(loaded.vector(theta), model.vector(theta), rtol=0, atol=1e-14)
    with pytest.raises(FitrankInputError, match="holds 4 regional models"):
        load_reduced_model(path, model.problem)
    other = PageRankProblem(model.problem.graph, model.problem.weighting, damping=0.8)
    with pytest.raises(ModelMismatchError, match="built for other data"):
        load_model(path, other)
    # one global model still loads through the same entry point
    single = build_model(model.problem, ReductionSettings(samples=32), progress=False)
    assert isinstance(load_model(single.save(tmp_path / "single.npz"), model.problem), ReducedModel)


def test_regions_from_a_memory_mapped_snapshot_file_match_the_in_memory_build(tmp_path):
    # the streamed path (one Gram matrix, sub-matrices per region) against thin SVDs of each
    # region's snapshots in memory: the same subspaces
    problem = _problem("scale")
    settings = ReductionSettings(samples=48, regions=3, rank=8)
    in_memory = build_model(problem, settings, progress=False)
    streamed = build_model(problem, replace(settings, snapshot_path=str(tmp_path / "x.npy")), progress=False)
    np.testing.assert_array_equal(streamed.centres, in_memory.centres)
    for one, other in zip(streamed.parts, in_memory.parts):
        np.testing.assert_array_equal(one.thetas, other.thetas)
        diff = one.basis.vectors @ one.basis.vectors.T - other.basis.vectors @ other.basis.vectors.T
        assert np.abs(diff).max() < 1e-7


def test_enrichment_goes_to_the_regions_a_point_joins():
    model = _model("scale", "interpolation", 128, 4)
    thetas = model.problem.weighting.sample(3, seed=31337)
    enriched = enrich_model(model, thetas)
    joins = region_members(model.problem.weighting.coordinates(thetas), model.centres)
    for region, (before, after) in enumerate(zip(model.parts, enriched.parts)):
        added = int(joins[region].sum())
        assert after.thetas.shape[0] == before.thetas.shape[0] + added
        if added == 0:
            assert after is before
    assert enriched.info["samples"] == model.info["samples"] + 3
    # an enriched region reproduces the full solve at its new point more closely than before
    theta = thetas[0]
    x = model.problem.solve(theta, tol=1e-12).x
    assert np.abs(enriched.vector(theta) - x).sum() < np.abs(model.vector(theta) - x).sum()


def test_regions_group_nearby_points_with_overlap():
    rng = np.random.default_rng(0)
    blobs = np.vstack([rng.normal(loc, 0.05, size=(30, 2)) for loc in ((0, 0), (1, 0), (0, 1))])
    centres = region_centres(blobs, 3, seed=0)
    assert centres.shape == (3, 2)
    members = region_members(blobs, centres)
    nearest = np.array([nearest_centre(point, centres) for point in blobs])
    # every point sits in its nearest region; well separated blobs share no point
    assert members[nearest, np.arange(blobs.shape[0])].all()
    assert members.sum() == blobs.shape[0]
    # the JAX and NumPy choices of the nearest centre agree
    assert all(int(nearest_centre(jnp.asarray(p), jnp.asarray(centres), xp=jnp)) == i for p, i in zip(blobs, nearest))
    # a point midway between two centres joins both
    midway = (centres[0] + centres[1]) / 2
    assert region_members(midway[None, :], centres)[:, 0].sum() >= 2


def test_weighting_coordinates_ignore_what_the_walk_ignores():
    problem = _problem("scale")
    theta = problem.weighting.sample(1, seed=3)[0]
    # a common shift of the scale weighting's theta changes no transition probability
    np.testing.assert_allclose(problem.weighting.coordinates(theta + 0.7), problem.weighting.coordinates(theta),
                               atol=1e-15)
    mixture = _problem("mixture").weighting
    w = mixture.coordinates(mixture.sample(5, seed=1))
    np.testing.assert_allclose(w.sum(axis=1), 1.0, rtol=1e-12)
    np.testing.assert_allclose(np.asarray(mixture.coordinates(jnp.asarray(mixture.theta0), xp=jnp)),
                               mixture.coordinates(mixture.theta0), rtol=1e-12)


def test_more_regions_than_samples_is_refused():
    with pytest.raises(FitrankInputError, match="5 regions need at least as many samples"):
        build_model(_problem("scale"), ReductionSettings(samples=4, regions=5), progress=False)


def test_a_region_whose_rows_do_not_fit_the_edge_budget_is_named():
    settings = ReductionSettings(method="interpolation", samples=24, rank=8, regions=2, edge_budget=20, gamma=0.0)
    with pytest.raises(FitrankInputError, match=r"^region 1 of 2 \(\d+ samples\): only \d+ interpolation rows fit "
                                                r".*edge_budget = 20"):
        build_model(_problem("scale"), settings, progress=False)
