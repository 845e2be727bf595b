"""The fit pipeline end to end: recovery of a known truth, full vs reduced training, the check, the run folder."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fitrank.atomic import staged_file
from fitrank.cli import main
from fitrank.pipeline import fit, summary_lines
from fitrank.metrics import pair_accuracy
from fitrank.pagerank import PageRankProblem

from tests._datasets import generated

pytestmark = pytest.mark.slow  # every test here runs whole fits

# Fast, deterministic settings shared by these tests (the defaults are for real data).
FAST = ["reduction.samples=48", "training.steps=60", "output.plots=false"]


def _config(tmp_path: Path, kind: str, extra: str = "", **generator) -> Path:
    dataset, truth, folder = generated(kind, noise=0.05, **generator)
    path = tmp_path / "run.toml"
    path.write_text(
        f'[data]\nedges = "{folder / "edges.csv"}"\npairs = "{folder / "pairs.csv"}"\n'
        f'[weighting]\nkind = "{kind}"\n[output]\nfolder = "{tmp_path / "out"}"\n{extra}'
    )
    return path


def _truth_accuracy(result, truth: dict, split: str) -> float:
    problem: PageRankProblem = result.problem
    theta = np.array([truth["theta"][name] for name in problem.weighting.param_names])
    x = problem.solve(theta, tol=1e-12).x
    return pair_accuracy(x, result.dataset.pairs.subset(split))


@pytest.mark.parametrize("kind", ["mixture", "scale", "features"])
def test_fit_recovers_held_out_accuracy_of_the_ground_truth(tmp_path, kind):
    # Recovery of a known ground truth: pairs drawn from PageRank at theta* (5% labels flipped).
    result = fit(_config(tmp_path, kind), overrides=FAST, write=False, progress=False, log=lambda m: None)
    _, truth, _ = generated(kind, noise=0.05)
    learned = result.record["metrics"]["full"]["test"]["accuracy"]
    at_truth = _truth_accuracy(result, truth, "test")
    problem = result.problem
    x0 = problem.solve(problem.weighting.theta0, tol=1e-12).x
    at_theta0 = pair_accuracy(x0, result.dataset.pairs.subset("test"))
    assert learned >= at_truth - 0.01, (kind, learned, at_truth)
    assert learned >= at_theta0 + 0.05, (kind, learned, at_theta0)
    assert result.record["check"]["passed"]


@pytest.mark.parametrize("kind", ["scale", "features"])
def test_reduced_and_full_space_training_agree(tmp_path, kind):
    reduced = fit(_config(tmp_path, kind), overrides=FAST, write=False, progress=False, log=lambda m: None)
    full = fit(_config(tmp_path, kind), overrides=FAST + ["training.space=full"], write=False, progress=False,
               log=lambda m: None)
    a = reduced.record["metrics"]["full"]["test"]["accuracy"]
    b = full.record["metrics"]["full"]["test"]["accuracy"]
    assert abs(a - b) <= 0.005, (kind, a, b)


def test_check_catches_a_too_small_basis_and_enrichment_repairs_it(tmp_path):
    overrides = FAST + ["reduction.samples=6", "reduction.rank=3", "reduction.rows=8", "check.enrich_rounds=3"]
    result = fit(_config(tmp_path, "scale"), overrides=overrides, write=False, progress=False, log=lambda m: None)
    rounds = result.record["rounds"]
    assert not rounds[0]["check"]["passed"]
    assert rounds[-1]["check"]["passed"]
    assert rounds[-1]["k"] > rounds[0]["k"]
    # the certified bound held in every round
    for entry in rounds:
        assert entry["check"]["l1_error"] <= entry["check"]["certified_bound"] * (1 + 1e-9)


def test_training_beyond_the_sampled_box_is_reported_and_enrichment_follows_it(tmp_path):
    # A box far narrower than the truth: theta* lands outside, where the reduced model
    # extrapolates. Enrichment (energy rule, no fixed rank) must follow theta* out until the
    # check passes; the record and the summary name the parameters that left the box.
    overrides = FAST + ["weighting.bound=0.05", "check.enrich_rounds=3"]
    result = fit(_config(tmp_path, "scale"), overrides=overrides, write=False, progress=False, log=lambda m: None)
    rounds = result.record["rounds"]
    assert not rounds[0]["check"]["passed"]
    assert result.record["check"]["passed"]
    assert rounds[-1]["k"] > rounds[0]["k"]
    outside = [name for name, value in result.record["params"].items() if abs(value) > 0.05]
    assert outside and result.record["outside_sampled_box"] == outside
    assert any("outside the box sampled offline" in line for line in summary_lines(result))


def test_same_config_same_numbers(tmp_path):
    config = _config(tmp_path, "scale")
    first = fit(config, overrides=FAST, write=False, progress=False, log=lambda m: None).record
    second = fit(config, overrides=FAST, write=False, progress=False, log=lambda m: None).record
    for record in (first, second):
        record.pop("timings")
        for entry in record["rounds"]:
            entry.pop("per_step_s"), entry.pop("check_s")
    assert json.dumps(first, sort_keys=True) == json.dumps(second, sort_keys=True)


def test_run_folder_contents_and_model_reuse(tmp_path):
    config = _config(tmp_path, "mixture")
    assert main(["fit", str(config), "--quiet", "--set", "reduction.samples=32"]) == 0
    out = tmp_path / "out"
    record = json.loads((out / "result.json").read_text())
    assert set(record["params"]) == {"mix:link_a", "mix:link_b", "mix:link_c"}
    assert isinstance(record["check"]["passed"], bool)
    history = pd.read_csv(out / "history.csv")
    assert {"step", "loss", "grad_norm", "valid_acc", "seconds", "round"} <= set(history.columns)
    scores = pd.read_parquet(out / "scores.parquet")
    assert scores["score"].sum() == pytest.approx(1.0, abs=1e-12)
    assert list(scores["rank"]) == list(range(1, len(scores) + 1))
    for png in ("loss.png", "weights.png", "singular_values.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the saved model is found and reused by the next fit on the same data and settings
    again = fit(config, overrides=["reduction.samples=32", "output.plots=false"], progress=False,
                log=lambda m: None)
    assert again.record["model"]["reused"] is True


def test_a_shared_model_file_is_created_by_the_first_fit_and_reused_by_the_next(tmp_path):
    # reduction.model names a file "to reuse or create": a fit into another run folder must find it
    config = _config(tmp_path, "scale")
    shared = tmp_path / "models" / "shared.npz"
    settings = ["reduction.samples=24", "output.plots=false", f'reduction.model="{shared}"']
    first = fit(config, overrides=settings, out=tmp_path / "run1", progress=False, log=lambda m: None)
    assert first.record["model"]["reused"] is False and shared.is_file()
    second = fit(config, overrides=settings, out=tmp_path / "run2", progress=False, log=lambda m: None)
    assert second.record["model"]["reused"] is True
    assert second.model.rank == first.model.rank
    # the model the first fit built is written once: the shared file is a link to its run folder's copy
    kept = shared.read_bytes()
    assert (tmp_path / "run1" / "model.npz").stat().st_ino == shared.stat().st_ino
    with np.load(shared) as built, np.load(tmp_path / "run2" / "model.npz") as reused:  # the model it used
        assert sorted(built.files) == sorted(reused.files)
        for name in set(built.files) - {"meta"}:
            np.testing.assert_array_equal(built[name], reused[name])
    # replacing the shared file (as an enriching fit does) leaves the runs' models as they were
    with staged_file(shared) as temp:
        temp.write_bytes(b"another model")
    assert (tmp_path / "run1" / "model.npz").read_bytes() == kept


def test_a_model_is_not_reused_by_other_snapshot_tolerances_or_other_data(tmp_path):
    config = _config(tmp_path, "scale")
    shared = tmp_path / "shared.npz"
    settings = ["reduction.samples=16", "output.plots=false", f'reduction.model="{shared}"']
    fit(config, overrides=settings, out=tmp_path / "run1", progress=False, log=lambda m: None)
    # snapshots solved to another tolerance make another basis: rebuilt, and the run records what it used
    logged = []
    looser = fit(config, overrides=settings + ["reduction.snapshot_tol=1e-3"], out=tmp_path / "run2",
                 progress=False, log=logged.append)
    assert looser.record["model"]["reused"] is False and looser.model.settings.snapshot_tol == 1e-3
    assert any("other reduction settings" in line for line in logged), logged
    logged.clear()
    other = fit(config, overrides=settings + ["graph.damping=0.8"], out=tmp_path / "run3", progress=False,
                log=logged.append)
    assert other.record["model"]["reused"] is False
    assert any("built for other data or settings" in line and "building a new one" in line
               for line in logged), logged


@pytest.mark.parametrize("override,key", [
    ("training.lerning_rate=0.1", "training.lerning_rate"),
    ("training.steps=-3", "training.steps"),
    ("reduction.method=fancy", "reduction.method"),
    ("graph.damping=1.5", "graph.damping"),
])
def test_bad_config_exits_2_with_one_line_and_leaves_earlier_run_intact(tmp_path, capsys, override, key):
    config = _config(tmp_path, "scale")
    out = tmp_path / "out"
    out.mkdir()
    (out / "result.json").write_text('{"earlier": true}')
    assert main(["fit", str(config), "--quiet", "--set", override]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and key in err and "Traceback" not in err
    assert json.loads((out / "result.json").read_text()) == {"earlier": True}
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".out")] == []


def test_a_regional_model_fits_end_to_end_and_is_reused(tmp_path, capsys):
    # Recovery of a known ground truth as above, through one local model per region of the domain.
    config = _config(tmp_path, "scale")
    settings = ["reduction.samples=96", "reduction.regions=3", "training.steps=60"]
    assert main(["build", str(config)] + [arg for setting in settings for arg in ("--set", setting)]) == 0
    assert "regions: 3, k per region" in capsys.readouterr().out
    result = fit(config, overrides=settings + ["output.plots=false"], progress=False, log=lambda m: None)
    assert result.record["model"]["reused"] is True
    assert len(result.model.parts) == 3
    _, truth, _ = generated("scale", noise=0.05)
    assert result.record["metrics"]["full"]["test"]["accuracy"] >= _truth_accuracy(result, truth, "test") - 0.01
    assert result.record["check"]["passed"]
    # other regional settings are not reused
    other = fit(config, overrides=["reduction.samples=96", "reduction.regions=2", "output.plots=false",
                                   "training.steps=5"], write=False, progress=False, log=lambda m: None)
    assert other.record["model"]["reused"] is False and len(other.model.parts) == 2
