"""The command line: build, settings, and one-line errors with exit code 2."""

from __future__ import annotations

import tomllib

from fitrank.cli import main
from fitrank.config import config_keys

from tests._datasets import generated


def _config(tmp_path, kind="scale", extra=""):
    _, _, folder = generated(kind)
    path = tmp_path / "run.toml"
    path.write_text(f'[data]\nedges = "{folder / "edges.csv"}"\npairs = "{folder / "pairs.csv"}"\n'
                    f'[weighting]\nkind = "{kind}"\n[reduction]\nsamples = 24\n'
                    f'[output]\nfolder = "{tmp_path / "out"}"\n{extra}')
    return path


def test_build_saves_the_model_and_reports_it(tmp_path, capsys):
    config = _config(tmp_path)
    assert main(["build", str(config), "--set", f'reduction.model="{tmp_path / "m.npz"}"']) == 0
    out = capsys.readouterr().out
    assert (tmp_path / "m.npz").is_file()
    for words in ("k = ", "singular values", "rows chosen", "edges touched", "offline time"):
        assert words in out


def test_settings_prints_every_key_and_round_trips(tmp_path, capsys):
    config = _config(tmp_path)
    assert main(["settings", str(config), "--set", "training.learning_rate=0.2"]) == 0
    parsed = tomllib.loads(capsys.readouterr().out)
    assert parsed["training"]["learning_rate"] == 0.2
    for key in config_keys():
        section, name = key.key.split(".")
        assert name in parsed[section], key.key


def test_missing_config_file_is_one_line_exit_2(tmp_path, capsys):
    assert main(["fit", str(tmp_path / "nope.toml")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "nope.toml" in err


def test_bad_data_file_is_one_line_exit_2(tmp_path, capsys):
    bad = tmp_path / "edges.csv"
    bad.write_text("source,target,weight\na,b,1\nb,c,-2\n")
    pairs = tmp_path / "pairs.csv"
    pairs.write_text("preferred,other\na,b\n")
    config = tmp_path / "bad.toml"
    config.write_text(f'[data]\nedges = "{bad}"\npairs = "{pairs}"\n[output]\nfolder = "{tmp_path / "out"}"\n')
    assert main(["fit", str(config), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "edges.csv" in err and "row 2" in err
    assert not (tmp_path / "out").exists()
