"""The demo data, the example configs and the README, checked end to end.

* the committed demo files are what ``data_demo/make_demo.py`` writes (byte for byte,
  but for the last bits of the accuracies in ``truth.json``);
* every example config loads (every key exists, every data file is there);
* the demo config runs through ``fitrank fit`` (with smaller offline and
  training settings) and writes a run folder whose files parse, and its answer
  recovers the known ground truth of the invented data;
* the Python example of the README runs as written;
* the README's config reference is the one the code generates;
* a bad ``--set`` key exits with code 2, one line on stderr and no run folder.

Run ``python tests/test_demo.py --update-readme`` to paste a fresh config
reference into README.md after a change to fitrank/config.py.
"""

from __future__ import annotations

import contextlib
import importlib.util
import io
import json
import os
import re
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

REPO = Path(__file__).resolve().parents[1]
README = REPO / "README.md"
DEMO_CONFIG = REPO / "configs" / "demo.toml"
EXAMPLE_CONFIGS = sorted((REPO / "configs").glob("*.toml"))
REFERENCE_BEGIN = "<!-- config reference: begin (generated; python tests/test_demo.py --update-readme) -->"
REFERENCE_END = "<!-- config reference: end -->"
# Smaller than the demo's own settings: the test checks the pipeline and its files, not the demo's speed.
FAST = ("reduction.samples=32", "reduction.rank=16", "training.steps=40")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _load_make_demo(monkeypatch):
    spec = importlib.util.spec_from_file_location("make_demo", REPO / "data_demo" / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    monkeypatch.setitem(sys.modules, "make_demo", module)  # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


def _reference_section(text: str) -> str:
    begin, end = text.find(REFERENCE_BEGIN), text.find(REFERENCE_END)
    assert begin >= 0 and end > begin, "README.md lacks the config reference markers"
    return text[begin + len(REFERENCE_BEGIN):end].strip()


def _python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.DOTALL | re.MULTILINE)


def _centred(values: dict) -> dict:
    """The scale walk ignores a shift of all parameters: compare them with their mean removed."""
    mean = float(np.mean(list(values.values())))
    return {name: value - mean for name, value in values.items()}


# --------------------------------------------------------------------------- data and configs


def test_committed_demo_files_are_what_make_demo_writes(tmp_path, monkeypatch):
    make_demo = _load_make_demo(monkeypatch)
    with contextlib.redirect_stdout(io.StringIO()):
        assert make_demo.main(["--out", str(tmp_path)]) == 0
    for scenario in make_demo.SCENARIOS:
        committed = REPO / "data_demo" / scenario.folder
        made = tmp_path / scenario.folder
        names = sorted(p.name for p in made.iterdir())
        assert names == sorted(p.name for p in committed.iterdir()), scenario.folder
        for name in names:
            where = f"{scenario.folder}/{name}"
            if name.endswith(".json"):
                # the truth record holds accuracies from full solves: equal up to the last bits,
                # which differ between BLAS builds and CPUs (seen: 1 ulp)
                _assert_close_json(json.loads((made / name).read_text()),
                                   json.loads((committed / name).read_text()), where)
            else:
                assert (made / name).read_bytes() == (committed / name).read_bytes(), f"{where} differs"
            assert (committed / name).stat().st_size < 2_000_000


def _assert_close_json(made, committed, where: str) -> None:
    """The same JSON structure, strings and integers equal, floats within 1e-12 relative."""
    assert type(made) is type(committed), f"{where}: {made!r} against {committed!r}"
    if isinstance(made, dict):
        assert list(made) == list(committed), f"{where}: keys differ"
        for key in made:
            _assert_close_json(made[key], committed[key], f"{where}:{key}")
    elif isinstance(made, list):
        assert len(made) == len(committed), f"{where}: lengths differ"
        for index, (one, other) in enumerate(zip(made, committed)):
            _assert_close_json(one, other, f"{where}[{index}]")
    elif isinstance(made, float):
        assert made == pytest.approx(committed, rel=1e-12, abs=1e-300), f"{where} differs"
    else:
        assert made == committed, f"{where} differs"


def test_demo_data_loads_and_matches_its_truth_record():
    from fitrank.tables import load_dataset

    for folder in ("pellmire", "corrabay"):
        root = REPO / "data_demo" / folder
        truth = json.loads((root / "truth.json").read_text())
        nodes = root / "nodes.csv"
        dataset = load_dataset(root / "edges.csv", root / "pairs.csv", nodes if nodes.exists() else None)
        counts = truth["counts"]
        assert (dataset.graph.n, dataset.graph.num_edges, len(dataset.pairs)) == (
            counts["recipes"], counts["links"], counts["pairs"])
        assert dataset.graph.relation_names == ("adapted_from", "see_also", "serve_with")
        assert dataset.graph.feature_names == ("shared_ingredients", "link_age_years")
        # Learning has something to find: the truth orders held-out pairs far better than theta0.
        test = truth["pair_accuracy"]["test"]
        assert test["truth"] > test["theta0"] + 0.15


@pytest.mark.parametrize("path", EXAMPLE_CONFIGS, ids=[p.name for p in EXAMPLE_CONFIGS])
def test_example_config_loads(path):
    from fitrank.config import load_config

    config = load_config(path, check_files=True)
    assert Path(config.data.edges).is_relative_to(REPO / "data_demo")
    assert Path(config.output.folder).is_relative_to(REPO / "runs")


def test_example_configs_cover_each_weighting_and_method():
    from fitrank.config import load_config

    configs = [load_config(p) for p in EXAMPLE_CONFIGS]
    combos = {(c.weighting.kind, c.training.space, c.reduction.method) for c in configs}
    assert ("mixture", "reduced", "galerkin") in combos
    assert ("scale", "reduced", "interpolation") in combos
    assert ("features", "reduced", "interpolation") in combos
    assert any(space == "full" for _, space, _ in combos)
    assert any(c.weighting.kind == "features" and (c.reduction.edge_budget > 0 or c.reduction.gamma > 1)
               for c in configs)


# --------------------------------------------------------------------------- end to end


@pytest.mark.slow
def test_demo_config_end_to_end(tmp_path, capsys):
    from fitrank.cli import main
    from fitrank.config import load_config

    run = tmp_path / "demo"
    sets = [arg for item in FAST for arg in ("--set", item)]
    assert main(["fit", str(DEMO_CONFIG), "--out", str(run), "--quiet", *sets]) == 0
    printed = capsys.readouterr().out
    assert "learned parameters:" in printed and str(run) in printed

    record = json.loads((run / "result.json").read_text())
    assert set(record["params"]) == {"scale:adapted_from", "scale:see_also", "scale:serve_with"}
    assert isinstance(record["check"]["passed"], bool)
    history = pd.read_csv(run / "history.csv")
    assert {"step", "loss", "grad_norm", "valid_acc", "seconds", "round"} <= set(history.columns)
    assert len(history) >= 2 and np.isfinite(history["loss"]).all()
    scores = pd.read_parquet(run / "scores.parquet")
    assert list(scores.columns) == ["node", "score", "rank"]
    assert len(scores) == 4000 and scores["rank"].tolist() == list(range(1, 4001))
    assert scores["score"].sum() == pytest.approx(1.0, abs=1e-9)
    for name in ("loss.png", "weights.png", "singular_values.png"):
        data = (run / name).read_bytes()
        assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR", name
        width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
        assert width > 100 and height > 100, name
    assert load_config(run / "config.toml").reduction.samples == 32

    # Recovery of the known ground truth of the invented data (data_demo/make_demo.py wrote it).
    truth = json.loads((REPO / "data_demo" / "pellmire" / "truth.json").read_text())
    learned, true = _centred(record["params"]), _centred(truth["theta"])
    for name, value in true.items():
        assert abs(learned[name] - value) < 0.25, (name, learned[name], value)
    reached = record["metrics"]["full"]["test"]["accuracy"]
    ceiling = truth["pair_accuracy"]["test"]
    assert reached >= ceiling["truth"] - 0.02
    assert reached >= ceiling["theta0"] + 0.15


def test_readme_python_example_runs(tmp_path, monkeypatch):
    blocks = _python_blocks(README.read_text(encoding="utf-8"))
    assert blocks, "README.md has no ```python block"
    # The example is written for the repository root; give it that view, with outputs in tmp_path.
    for name in ("configs", "data_demo"):
        (tmp_path / name).symlink_to(REPO / name)
    monkeypatch.chdir(tmp_path)
    namespace: dict = {"__name__": "readme_example"}
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        for block in blocks:
            exec(compile(block, str(README), "exec"), namespace)
    assert printed.getvalue().strip(), "the README example prints nothing"
    runs = list((tmp_path / "runs").iterdir())
    assert runs and all((p / "result.json").is_file() for p in runs)
    assert not any(p.name.startswith(".") for p in runs)  # no staging folder left behind


def test_readme_config_reference_is_current():
    from fitrank.config import config_reference_markdown

    found = _reference_section(README.read_text(encoding="utf-8"))
    assert found == config_reference_markdown().strip(), (
        "README.md's config reference is out of date: run `python tests/test_demo.py --update-readme`")


def test_readme_names_every_subcommand(capsys):
    from fitrank.cli import main

    with pytest.raises(SystemExit):
        main(["--help"])
    # argparse lists each subcommand on its own line, indented under the COMMAND metavar.
    commands = re.findall(r"^ {4}([a-z]+) {2,}\S", capsys.readouterr().out, flags=re.MULTILINE)
    assert commands, "fitrank --help lists no subcommands"
    text = README.read_text(encoding="utf-8")
    for command in commands:
        assert f"fitrank {command}" in text, command


def test_fit_with_unknown_set_key_exits_2_and_writes_nothing(tmp_path, capsys):
    from fitrank.cli import main

    run = tmp_path / "run"
    code = main(["fit", str(DEMO_CONFIG), "--out", str(run), "--quiet", "--set", "training.learning_rat=0.1"])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1
    assert "training.learning_rat" in err and "learning_rate" in err
    assert not run.exists() and list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- README upkeep


def update_readme() -> None:
    """Paste the generated config reference between the README's markers (atomic write)."""
    sys.path.insert(0, str(REPO))
    from fitrank.config import config_reference_markdown

    text = README.read_text(encoding="utf-8")
    _reference_section(text)  # refuses a README without the markers
    head, rest = text.split(REFERENCE_BEGIN, 1)
    tail = rest.split(REFERENCE_END, 1)[1]
    new_text = f"{head}{REFERENCE_BEGIN}\n\n{config_reference_markdown().strip()}\n\n{REFERENCE_END}{tail}"
    handle, temp = tempfile.mkstemp(prefix=".README.", dir=REPO)
    with os.fdopen(handle, "w", encoding="utf-8") as out:
        out.write(new_text)
    os.chmod(temp, 0o644)
    os.replace(temp, README)
    print("README.md config reference " + ("unchanged" if new_text == text else "updated"))


if __name__ == "__main__":
    if sys.argv[1:] != ["--update-readme"]:
        sys.exit("usage: python tests/test_demo.py --update-readme")
    update_readme()
