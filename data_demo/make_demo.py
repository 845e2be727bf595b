"""Make the two invented demo datasets of fitrank: two community cookbooks.

Both scenarios are invented from start to finish (no real people, places,
brands or data). Each is a recipe catalogue run by volunteers:

* nodes are recipes;
* edges are the links between recipe pages, of three kinds:
  ``adapted_from`` (the author of A says A is a variation of B),
  ``serve_with`` (A's page suggests B as a side, drink or dessert) and
  ``see_also`` (a volunteer editor cross-linked A to B);
* ``weight`` is how many times page A links to B (mentions);
* two numeric edge features: ``shared_ingredients`` (share of ingredients the
  two recipes have in common, 0..1) and ``link_age_years`` (years since the
  link was added);
* preference pairs come from the cookbook's monthly "kitchen trials": a small
  panel of volunteer home cooks cooks two recipes side by side and votes which
  one deserves the front page. ``preferred`` is the panel's majority choice,
  ``weight`` the share of the panel that voted for it.

The panel's taste is hidden: each cook prefers recipe a to b with probability
x_a^kappa / (x_a^kappa + x_b^kappa) (a Bradley-Terry choice on a PageRank
score), where x is PageRank of the recipe graph with the relation-scale
weighting at a "true" theta. The true theta is written to ``truth.json`` so a
fit can be checked against it; split panels are the label noise.

The graph is grown in posting order (preferential attachment inside cuisine
styles), a different construction from ``fitrank generate``'s block model, so
fitrank is also exercised on data it was not built around.

Usage (deterministic: the same command writes the same bytes)::

    python data_demo/make_demo.py            # rewrites data_demo/pellmire and data_demo/corrabay

References:
  Bradley & Terry, "Rank analysis of incomplete block designs I", Biometrika
  39(3/4), 1952 (the paired-choice model of the panel); Barabasi & Albert,
  "Emergence of scaling in random networks", Science 286, 1999 (preferential
  attachment).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from fitrank.generate import sample_pairs  # noqa: E402
from fitrank.graph import SPLITS  # noqa: E402
from fitrank.metrics import pair_accuracy  # noqa: E402
from fitrank.pagerank import pagerank  # noqa: E402
from fitrank.tables import load_dataset, random_split  # noqa: E402
from fitrank.weightings import make_weighting  # noqa: E402

HERE = Path(__file__).resolve().parent
RELATIONS = ("adapted_from", "serve_with", "see_also")
COURSES = ("main", "side", "dessert", "drink")
YEARS = 9.0  # the cookbooks' age at the time of the snapshot
DAMPING = 0.85


@dataclass(frozen=True)
class Scenario:
    """One invented cookbook.

    Attributes:
      folder: sub-folder of data_demo/ the files go to.
      title: the cookbook's invented name.
      seed: root seed; every random draw descends from it.
      recipes: number of recipes n.
      styles: number of cuisine styles (communities of the link graph).
      theta: true relation-scale parameters, one per relation of RELATIONS
        (centred: they sum to 0, the representative nearest theta0 = 0).
      adapt_rate: share of recipes adapted from earlier ones.
      serve_rate: mean serve_with suggestions on a main course's page.
      see_also_rate: mean see_also links per page.
      trials: number of distinct kitchen trials (pairs).
      retrials: share of trials repeated later with a new panel.
      kappa: sharpness of a panel cook's choice (higher: fewer split panels).
      text_ids: recipe ids as text (``rcp-0001``) or as integers.
      node_table: write nodes.csv with teleport weights (seasonal index pages).
    """

    folder: str
    title: str
    seed: int
    recipes: int
    styles: int
    theta: tuple[float, float, float]
    adapt_rate: float
    serve_rate: float
    see_also_rate: float
    trials: int
    retrials: float
    kappa: float
    text_ids: bool
    node_table: bool


SCENARIOS = (
    Scenario(folder="pellmire", title="the Pellmire community cookbook", seed=20240611, recipes=4000, styles=24,
             theta=(1.2, 0.3, -1.5), adapt_rate=0.6, serve_rate=1.8, see_also_rate=2.5, trials=3000,
             retrials=0.03, kappa=12.0, text_ids=True, node_table=True),
    Scenario(folder="corrabay", title="the Corrabay kitchen collective", seed=20240917, recipes=2500, styles=16,
             theta=(-0.6, 1.4, -0.8), adapt_rate=0.4, serve_rate=2.6, see_also_rate=1.8, trials=2000,
             retrials=0.03, kappa=12.0, text_ids=False, node_table=False),
)


# --------------------------------------------------------------------------- the catalogue


@dataclass(frozen=True)
class Recipes:
    """Node attributes of a catalogue; arrays are (n,), index = posting order."""

    posted: np.ndarray  # years since the cookbook opened
    style: np.ndarray  # cuisine style, 0..styles-1
    course: np.ndarray  # index into COURSES
    appeal: np.ndarray  # latent appeal, standard normal
    stub: np.ndarray  # bool: a stub page that links nowhere


def draw_recipes(s: Scenario, rng: np.random.Generator) -> Recipes:
    """The n recipes of ``s`` with their posting time, style, course, appeal and stub flag."""
    n = s.recipes
    # More recipes are posted as the cookbook grows: posting times with density rising in time.
    posted = np.sort(YEARS * rng.random(n) ** 0.7)
    style = rng.choice(s.styles, size=n, p=rng.dirichlet(np.full(s.styles, 1.5)))
    course = rng.choice(len(COURSES), size=n, p=[0.45, 0.25, 0.2, 0.1])
    return Recipes(posted, style, course, rng.standard_normal(n), rng.random(n) < 0.08)


def _pick(rng: np.random.Generator, weights: np.ndarray, count: int) -> np.ndarray:
    """Up to ``count`` distinct indices drawn with probability proportional to ``weights`` (>= 0)."""
    count = min(count, int(np.count_nonzero(weights)))
    if count == 0:
        return np.zeros(0, dtype=np.int64)
    return rng.choice(weights.size, size=count, replace=False, p=weights / weights.sum())


def draw_links(s: Scenario, r: Recipes, rng: np.random.Generator) -> pd.DataFrame:
    """The links between recipe pages.

    Returns:
      (E,) rows of distinct (source, target, relation) with recipe indices,
      relation codes into RELATIONS, and ``weight`` = mentions (>= 1).
    """
    n = s.recipes
    links: list[tuple[np.ndarray, np.ndarray, int]] = []
    adapted_in = np.zeros(n)
    # adapted_from: a new recipe builds on earlier ones, mostly of its own style and
    # course, preferring those others already built on (preferential attachment).
    for i in range(1, n):
        if r.stub[i] or rng.random() >= s.adapt_rate:
            continue
        earlier = slice(0, i)
        weights = ((adapted_in[earlier] + 1.0) * np.exp(0.6 * r.appeal[earlier])
                   * np.where(r.style[earlier] == r.style[i], 6.0, 1.0)
                   * np.where(r.course[earlier] == r.course[i], 2.0, 1.0))
        chosen = _pick(rng, weights, 1 + rng.poisson(0.6))
        adapted_in[chosen] += 1.0
        links.append((np.full(chosen.size, i), chosen, 0))
    # serve_with: main courses (and a few sides) suggest recipes of other courses.
    popular = np.exp(0.8 * r.appeal) * (1.0 + adapted_in) ** 0.7
    for i in range(n):
        suggests = r.course[i] == 0 or (r.course[i] == 1 and rng.random() < 0.3)
        if r.stub[i] or not suggests:
            continue
        weights = popular * (r.course != r.course[i]) * np.where(r.style == r.style[i], 3.0, 1.0)
        chosen = _pick(rng, weights, rng.poisson(s.serve_rate))
        links.append((np.full(chosen.size, i), chosen, 1))
    # see_also: editors cross-link pages that are already well linked, mostly within a style.
    linked_in = np.bincount(np.concatenate([t for _, t, _ in links]), minlength=n).astype(np.float64)
    for i in range(n):
        if r.stub[i]:
            continue
        weights = (1.0 + linked_in) ** 0.8 * np.where(r.style == r.style[i], 5.0, 1.0)
        weights[i] = 0.0
        chosen = _pick(rng, weights, rng.poisson(s.see_also_rate))
        links.append((np.full(chosen.size, i), chosen, 2))
    src = np.concatenate([a for a, _, _ in links]).astype(np.int64)
    dst = np.concatenate([b for _, b, _ in links]).astype(np.int64)
    rel = np.concatenate([np.full(a.size, t) for a, _, t in links]).astype(np.int64)
    keep = src != dst
    frame = pd.DataFrame({"source": src[keep], "target": dst[keep], "relation": rel[keep]})
    frame = frame.drop_duplicates().sort_values(["source", "relation", "target"], kind="stable")
    frame = frame.reset_index(drop=True)
    frame["weight"] = 1 + rng.poisson(0.25, len(frame))
    return frame


def edge_features(links: pd.DataFrame, r: Recipes, rng: np.random.Generator) -> pd.DataFrame:
    """Add ``shared_ingredients`` (0..1) and ``link_age_years`` (>= 0) to ``links``."""
    src, dst, rel = (links[c].to_numpy() for c in ("source", "target", "relation"))
    # Variations share most ingredients, menu partners few, cross-links something in between.
    a, b = np.array([7.0, 1.2, 2.0]), np.array([3.0, 6.0, 3.5])
    shared = rng.beta(a[rel], b[rel]) + 0.1 * (r.style[src] == r.style[dst])
    # A link can be added once both pages exist, at any time up to the snapshot.
    first = np.maximum(r.posted[src], r.posted[dst])
    added = first + rng.random(src.size) * (YEARS - first)
    return links.assign(shared_ingredients=np.round(np.clip(shared, 0.0, 1.0), 3),
                        link_age_years=np.round(YEARS - added, 2))


# --------------------------------------------------------------------------- trials


def kitchen_trials(s: Scenario, x: np.ndarray, rng: np.random.Generator) -> pd.DataFrame:
    """Pairs of recipes close in true standing, judged by panels of 3 to 9 cooks.

    Returns:
      (Q,) rows of node indices ``preferred``, ``other`` (the panel's majority
      choice first), ``weight`` (majority share), ``truly_better_won`` (bool),
      ``split`` and ``retrial``.
    """
    better, worse = sample_pairs(x, s.trials, rng, top=600, top_share=0.75, window=0.25, min_gap=1e-3)
    split = random_split(s.trials, int(rng.integers(2**31)), (0.7, 0.15, 0.15))
    again = np.flatnonzero(rng.random(s.trials) < s.retrials)
    better, worse = np.concatenate([better, better[again]]), np.concatenate([worse, worse[again]])
    split = np.concatenate([split, split[again]])  # a retrial stays in its trial's split: no leak
    ratio = (x[worse] / x[better]) ** s.kappa
    p_better = 1.0 / (1.0 + ratio)
    panel = rng.choice(np.array([3, 5, 7, 9]), size=better.size)
    votes = rng.binomial(panel, p_better)
    won = 2 * votes > panel
    return pd.DataFrame({
        "preferred": np.where(won, better, worse),
        "other": np.where(won, worse, better),
        "weight": np.round(np.maximum(votes, panel - votes) / panel, 3),
        "truly_better_won": won,
        "split": np.asarray(SPLITS)[split],
        "retrial": np.arange(better.size) >= s.trials,
    })


# --------------------------------------------------------------------------- files


def _ids(s: Scenario) -> np.ndarray:
    """(n,) recipe ids in posting order: text (``rcp-0001``) or arbitrary integers."""
    if s.text_ids:
        return np.array([f"rcp-{i:04d}" for i in range(1, s.recipes + 1)], dtype=object)
    return 1000 + 7 * np.arange(s.recipes)  # arbitrary integers, not 0..n-1


def make_scenario(s: Scenario, staging: Path) -> dict:
    """Write edges.csv (and nodes.csv) and pairs.csv for ``s`` into ``staging``; return the truth record."""
    root = np.random.SeedSequence(s.seed)
    graph_rng, feature_rng, trial_rng = (np.random.default_rng(c) for c in root.spawn(3))
    recipes = draw_recipes(s, graph_rng)
    links = edge_features(draw_links(s, recipes, graph_rng), recipes, feature_rng)
    ids = _ids(s)
    edges = links.assign(source=ids[links["source"]], target=ids[links["target"]],
                         relation=np.asarray(RELATIONS)[links["relation"]])
    edges.to_csv(staging / "edges.csv", index=False)
    nodes_path = None
    if s.node_table:
        # Newcomers land mostly on the recipes of the seasonal index pages.
        seasonal = graph_rng.random(s.recipes) < 0.08
        nodes_path = staging / "nodes.csv"
        pd.DataFrame({"node": ids, "teleport": np.where(seasonal, 5.0, 1.0)}).to_csv(nodes_path, index=False)

    # The truth is computed on the graph exactly as fitrank's loader reads the files
    # (a one-row pair table stands in until the real one exists).
    pairs_path = staging / "pairs.csv"
    pd.DataFrame({"preferred": ids[:1], "other": ids[1:2]}).to_csv(pairs_path, index=False)
    graph = load_dataset(staging / "edges.csv", pairs_path, nodes_path).graph
    weighting = make_weighting("scale", graph)
    theta = np.array([dict(zip(RELATIONS, s.theta))[name] for name in graph.relation_names])
    # power iteration, not "auto": the files must not change when "auto" learns a new solver
    x_true = pagerank(graph, weighting, theta, damping=DAMPING, tol=1e-12, method="power").x
    x_default = pagerank(graph, weighting, weighting.theta0, damping=DAMPING, tol=1e-12, method="power").x

    trials = kitchen_trials(s, x_true, trial_rng)
    node_ids = np.asarray(graph.node_ids, dtype=object)
    pairs = trials.assign(preferred=node_ids[trials["preferred"]], other=node_ids[trials["other"]])
    pairs[["preferred", "other", "weight", "split"]].to_csv(pairs_path, index=False)
    dataset = load_dataset(staging / "edges.csv", pairs_path, nodes_path)
    return truth_record(s, dataset, weighting, theta, trials, x_true, x_default, staging)


def truth_record(s: Scenario, dataset, weighting, theta: np.ndarray, trials: pd.DataFrame, x_true: np.ndarray,
                 x_default: np.ndarray, staging: Path) -> dict:
    """What a fit can be checked against: the true theta and the accuracy ceiling it reaches.

    Args:
      s: the scenario.
      dataset: the files as fitrank loads them.
      weighting: the relation-scale weighting on ``dataset.graph``.
      theta: (3,) true parameters in ``dataset.graph.relation_names`` order.
      trials: the rows returned by :func:`kitchen_trials`.
      x_true, x_default: (n,) PageRank at theta and at theta0.
      staging: the folder the files were written to (removed from the notes).

    Returns:
      The JSON-ready record written to truth.json.
    """
    graph = dataset.graph
    accuracy = {}
    for name in SPLITS:
        pairs = dataset.pairs.subset(name)
        accuracy[name] = {"truth": pair_accuracy(x_true, pairs), "theta0": pair_accuracy(x_default, pairs)}
    return {
        "scenario": s.title,
        "invented": True,
        "weighting": "scale",
        "theta": weighting.named(theta),
        "theta0": weighting.named(weighting.theta0),
        "note": "the scale walk ignores a constant added to theta; theta is the representative with sum 0",
        "damping": DAMPING,
        "dangling": "teleport",
        "teleport": "nodes.csv" if s.node_table else "uniform",
        "panel": {"sizes": [3, 5, 7, 9], "kappa": s.kappa,
                  "choice": "P(cook prefers a to b) = x_a^kappa / (x_a^kappa + x_b^kappa), x = true PageRank"},
        "counts": {
            "recipes": graph.n,
            "links": graph.num_edges,
            "links_by_relation": {name: int(np.count_nonzero(graph.relation == t))
                                  for t, name in enumerate(graph.relation_names)},
            "pairs": len(dataset.pairs),
            "retrials": int(trials["retrial"].sum()),
            "majority_against_truth": int((~trials["truly_better_won"]).sum()),
        },
        "pair_accuracy": accuracy,
        # Notes name the staging folder; keep only the file names.
        "loader_notes": [note.replace(f"{staging}{os.sep}", "") for note in dataset.notes],
        "seed": s.seed,
        "made_by": "data_demo/make_demo.py",
    }


def write_scenario(s: Scenario, out_dir: Path) -> dict:
    """Make scenario ``s`` in a temporary folder beside ``out_dir``, then move its files into ``out_dir``.

    Each file is replaced by a rename, so none is ever half-written; truth.json
    moves last, so a folder whose truth.json is current holds current tables.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.tmp-", dir=out_dir.parent))
    try:
        truth = make_scenario(s, staging)
        (staging / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
        for path in sorted(staging.iterdir(), key=lambda p: p.name == "truth.json"):
            os.chmod(path, 0o644)
            os.replace(path, out_dir / path.name)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return truth


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write the invented demo datasets of fitrank.")
    parser.add_argument("--out", default=str(HERE), help="folder to write the scenario folders into")
    args = parser.parse_args(argv)
    for scenario in SCENARIOS:
        truth = write_scenario(scenario, Path(args.out) / scenario.folder)
        counts, acc = truth["counts"], truth["pair_accuracy"]["test"]
        print(f"{scenario.folder}: {counts['recipes']} recipes, {counts['links']} links, {counts['pairs']} pairs "
              f"({counts['majority_against_truth']} against the truth); test accuracy truth {acc['truth']:.3f}, "
              f"theta0 {acc['theta0']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
