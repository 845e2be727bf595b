"""Config files: defaults, paths, every wrong key/type/value, overrides, round trip."""

import tomllib
from dataclasses import fields
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fitrank.config import (SECTIONS, Config, config_keys, config_reference_markdown, effective_config,
                            load_config, parse_config, parse_override, with_overrides)
from fitrank.errors import ConfigError, FitrankInputError
from fitrank.objective import ObjectiveSpec
from fitrank.train import LoopSettings

MINIMAL = '[data]\nedges = "edges.csv"\npairs = "tables/pairs.csv"\n'


@pytest.fixture
def config_file(tmp_path):
    (tmp_path / "tables").mkdir()
    (tmp_path / "edges.csv").write_text("source,target\n1,2\n")
    (tmp_path / "tables" / "pairs.csv").write_text("preferred,other\n1,2\n")
    path = tmp_path / "conf" / "run.toml"
    path.parent.mkdir()
    path.write_text(MINIMAL.replace('"edges.csv"', '"../edges.csv"').replace('"tables/', '"../tables/'))
    return path


def _raw(**sections):
    raw = {"data": {"edges": "/d/e.csv", "pairs": "/d/p.csv"}}
    for name, table in sections.items():
        raw.setdefault(name, {}).update(table)
    return raw


def _error(raw=None, overrides=()):
    with pytest.raises(ConfigError) as info:
        parse_config(raw if raw is not None else _raw(), overrides=overrides)
    return info.value


def test_defaults_and_paths_relative_to_the_config_file(config_file, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path / "tables")  # somewhere else: must not matter
    config = load_config(config_file)
    assert config.data.edges == (tmp_path / "edges.csv").resolve()
    assert config.data.pairs == (tmp_path / "tables" / "pairs.csv").resolve()
    assert config.data.nodes is None
    assert config.output.folder == (config_file.parent / "run").resolve()
    assert config.graph.damping == 0.85 and config.training.optimizer == "lbfgs"
    assert config.training.temperature is None and config.reduction.rank is None
    assert config.source == config_file.resolve()
    # The training section maps onto the trainer's own settings and defaults.
    assert config.training.loop_settings() == LoopSettings()
    assert config.training.objective_spec() == ObjectiveSpec("logistic", None, 1e-3)


def test_missing_files_and_bad_toml(config_file, tmp_path):
    (tmp_path / "edges.csv").unlink()
    with pytest.raises(ConfigError, match="config key 'data.edges': file not found") as info:
        load_config(config_file)
    assert str(config_file.resolve()) in str(info.value)
    assert load_config(config_file, check_files=False).data.edges.name == "edges.csv"
    (tmp_path / "edges.csv").mkdir()  # a folder where the table should be is not "not found"
    with pytest.raises(ConfigError, match=r"config key 'data.edges': .*edges.csv is a folder; give the table file"):
        load_config(config_file)
    with pytest.raises(FitrankInputError, match="config file not found"):
        load_config(tmp_path / "nope.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text("[data\nedges = 1\n")
    with pytest.raises(FitrankInputError, match=r"broken.toml: not valid TOML.*line 1"):
        load_config(broken)


def test_a_byte_order_mark_before_the_toml_is_no_error(config_file):
    # some editors start UTF-8 files with one; it is not TOML, but it is no mistake of the user's either
    marked = config_file.with_name("marked.toml")
    marked.write_bytes(b"\xef\xbb\xbf" + config_file.read_bytes())
    assert load_config(marked).data == load_config(config_file).data


def test_required_keys():
    error = _error({"data": {"pairs": "p.csv"}})
    assert error.key == "data.edges" and "missing" in str(error)
    assert _error({}).key == "data.edges"


def _wrong_type(kind: str):
    return {"string": 3, "integer": "many", "float": "big", "boolean": "yes", "path": 5,
            "3 floats": "0.7,0.3"}.get(kind.split(":")[0].split(" or ")[0], [1, 2])


@pytest.mark.parametrize("info", config_keys(), ids=lambda info: info.key)
def test_every_key_refuses_a_wrong_type(info):
    section, key = info.key.split(".")
    error = _error(_raw(**{section: {key: _wrong_type(info.type)}}))
    assert error.key == info.key
    assert f"config key '{info.key}'" in str(error) and "expected" in str(error)
    assert "\n" not in str(error)


def _bad_values():
    """One out-of-range or unknown value per key that has a range or choices."""
    for section, cls in SECTIONS.items():
        for f in fields(cls):
            meta = f.metadata
            if meta["choices"]:
                yield f"{section}.{f.name}", "bogus"
            elif meta["low"] is not None:
                low = meta["low"]
                bad = low if meta["low_open"] else low - 1
                yield f"{section}.{f.name}", int(bad) if meta["kind"].startswith("int") else float(bad)
            if meta["high"] is not None:
                yield f"{section}.{f.name}", meta["high"] + (0 if meta["high_open"] else 1.0)
            if meta["kind"] in ("float", "float?"):
                yield f"{section}.{f.name}", float("nan")


@pytest.mark.parametrize(("key", "value"), list(_bad_values()), ids=lambda v: str(v))
def test_every_range_and_choice_is_checked(key, value):
    section, name = key.split(".")
    error = _error(_raw(**{section: {name: value}}))
    assert error.key == key


def test_more_wrong_values():
    for raw, key, message in [
        (_raw(data={"split": [0.5, 0.5, 0.5]}), "data.split", "sum to 1"),
        (_raw(data={"split": [0.0, 0.5, 0.5]}), "data.split", "train fraction"),
        (_raw(data={"nodes": "  "}), "data.nodes", "empty"),
        (_raw(training={"steps": 10.0}), "training.steps", "expected an integer"),
        (_raw(training={"plots": True}), "training.plots", "unknown key"),
        (_raw(training={"learning_rate": True}), "training.learning_rate", "expected a number"),
        (_raw(training={"loss": "logistc"}), "training.loss", "did you mean 'logistic'"),
        (_raw(trainng={"steps": 3}), "trainng", "unknown section (did you mean 'training'?)"),
        (_raw(graph={"damping": {"value": 0.8}}), "graph.damping", "not a table"),
        ({**_raw(), "damping": 0.85}, "damping", "inside a section"),
        ({**_raw(), "graph": 0.85}, "graph", "must be a table"),
        (_raw(reduction={"method": "galerkin"}), "reduction.method", "affine"),
        (_raw(reduction={"rank": 50, "rows": 20}), "reduction.rows", ">= rank"),
        (_raw(reduction={"rank": 50, "samples": 20}), "reduction.rank", "exceeds samples"),
        (_raw(reduction={"regions": 30, "samples": 20}), "reduction.regions", "need at least as many samples"),
        (_raw(training={"batch_pairs": 64}), "training.batch_pairs", "adam or sgd"),
    ]:
        error = _error(raw)
        assert error.key == key, (raw, str(error))
        assert message in str(error), str(error)
    # The same keys are fine in a consistent combination.
    ok = parse_config(_raw(weighting={"kind": "mixture"}, reduction={"method": "galerkin", "rank": 20, "rows": 20},
                           training={"optimizer": "adam", "batch_pairs": 64}))
    assert ok.reduction.rank == 20 and ok.training.batch_pairs == 64


def test_overrides_use_toml_values_and_bare_words(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    config = parse_config(_raw(), base_dir="/somewhere", overrides=[
        "training.learning_rate=0.01", "training.optimizer=adam", 'training.loss="sigmoid"',
        "data.split=[0.8, 0.1, 0.1]", "output.plots=false", "reduction.rank=40", "reduction.rank=auto",
        "data.nodes=nodes.csv", "training.temperature = 0.25",
    ])
    assert config.training.learning_rate == 0.01 and config.training.optimizer == "adam"
    assert config.training.loss == "sigmoid" and config.training.temperature == 0.25
    assert config.data.split == (0.8, 0.1, 0.1) and config.output.plots is False
    assert config.reduction.rank is None  # later overrides win
    assert config.data.nodes == (tmp_path / "nodes.csv").resolve()  # --set paths: relative to the cwd
    assert config.data.edges == Path("/d/e.csv")
    assert parse_override("graph.damping=0.9") == ("graph", "damping", 0.9)
    assert parse_override("weighting.kind=features") == ("weighting", "kind", "features")


def test_bad_overrides_name_the_key():
    for text, key, message in [("training.lerning_rate=0.1", "training.lerning_rate", "did you mean 'learning_rate'"),
                               ("training=3", "training", "section.key"),
                               ("training.steps", "training.steps", "section.key=value"),
                               ("training.steps=", "training.steps", "no value"),
                               ("a.b.c=1", "a.b.c", "section.key"),
                               ("training.steps=ten", "training.steps", "expected an integer")]:
        error = _error(overrides=[text])
        assert error.key == key and message in str(error), str(error)
        assert "--set" in str(error)


def test_effective_config_round_trips(config_file):
    config = load_config(config_file, overrides=["training.temperature=0.3", "reduction.rows=80",
                                                 "reduction.rank=40", "graph.dangling=self"])
    text = effective_config(config)
    again = parse_config(tomllib.loads(text), source=config.source)
    assert again == config
    for info in config_keys():  # every key is written out
        assert f"\n{info.key.split('.')[1]} = " in text
    assert with_overrides(config, ["check.top_k=50"]).check.top_k == 50


@given(
    damping=st.floats(0.01, 0.99),
    tol=st.floats(1e-14, 1e-3),
    steps=st.integers(0, 10**6),
    name=st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="/\x00"), min_size=1,
                 max_size=20),
)
def test_round_trip_of_awkward_values(damping, tol, steps, name):
    raw = _raw(graph={"damping": damping, "solver_tol": tol}, training={"steps": steps},
               output={"folder": f"/out/{name}"})
    config = parse_config(raw)
    assert config.output.folder.name == Path(f"/out/{name}").resolve().name
    assert parse_config(tomllib.loads(effective_config(config))) == config


def test_reference_lists_every_key_with_default_and_meaning():
    text = config_reference_markdown()
    for info in config_keys():
        section, key = info.key.split(".")
        assert f"### [{section}]" in text
        meaning = info.meaning.replace("|", "\\|")  # escaped inside a Markdown table cell
        row = next(line for line in text.splitlines() if line.startswith(f"| `{key}` |") and meaning in line)
        assert f"`{info.default}`" in row
    assert isinstance(Config(data=parse_config(_raw()).data), Config)
