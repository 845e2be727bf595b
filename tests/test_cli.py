"""The command line: build, settings, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tomllib

import numpy as np

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
    assert "held-out check at 4 fresh points" in out
    with np.load(tmp_path / "m.npz") as saved:
        held_out = json.loads(str(saved["meta"]))["info"]["held_out"]
    assert held_out["points"] == 4 and held_out["bound_max"] >= held_out["error_max"]
    # the printed verdict is the saved one (24 samples may or may not reach tau 0.999 here)
    assert ("-> within check.tau_min" in out) == held_out["passed"]
    assert f"worst tau@100 {held_out['tau_topk_min']:.5f}" in out


def test_build_says_when_the_held_out_check_misses_the_tolerances(tmp_path, capsys):
    config = _config(tmp_path)
    assert main(["build", str(config), "--set", f'reduction.model="{tmp_path / "m.npz"}"', "--set",
                 "reduction.rank=2", "--set", "check.build_points=2"]) == 0
    out = capsys.readouterr().out
    assert "held-out check at 2 fresh points" in out and "-> outside check.tau_min" in out


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


def test_fit_keeps_compiled_programs_on_disk_and_reuses_them(tmp_path):
    # Two fits in fresh processes with one compile cache: the first writes programs there,
    # the second runs from them and gives the same result.json numbers.
    config = _config(tmp_path, extra="plots = false\n")
    cache = tmp_path / "compiled"
    env = {**os.environ, "FITRANK_COMPILE_CACHE": str(cache)}
    outputs = []
    for run in ("first", "second"):
        out = tmp_path / run
        done = subprocess.run([sys.executable, "-m", "fitrank.cli", "fit", str(config), "--quiet", "--out", str(out)],
                              env=env, capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        if run == "first":
            written = sorted(path.name for path in cache.iterdir())
            assert written, "no compiled program was kept"
        outputs.append(json.loads((out / "result.json").read_text()))
    assert outputs[0]["params"] == outputs[1]["params"]
    assert outputs[0]["metrics"] == outputs[1]["metrics"]
    assert sorted(path.name for path in cache.iterdir()) == written  # the second run found them all


def test_unwritable_output_paths_are_refused_before_any_work(tmp_path, capsys):
    # a file where a folder of the output path should be: found before the offline stage, not after it
    config = _config(tmp_path)
    blocker = tmp_path / "blocker"
    blocker.write_text("not a folder\n")
    assert main(["build", str(config), "--set", f'reduction.model="{blocker / "m.npz"}"']) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "reduction.model" in err and "blocker is a file" in err, err
    assert main(["fit", str(config), "--quiet", "--out", str(blocker / "run")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "output.folder" in err and "blocker is a file" in err, err
    assert main(["build", str(config), "--set", f'reduction.model="{tmp_path}"']) == 2
    assert "is a folder" in capsys.readouterr().err
    # fit with a shared model file under a file, and generate into a folder under a file
    assert main(["fit", str(config), "--quiet", "--out", str(tmp_path / "run"),
                 "--set", f'reduction.model="{blocker / "m.npz"}"']) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "reduction.model" in err and "blocker is a file" in err, err
    for out in (blocker, blocker / "data"):
        assert main(["generate", str(out), "--nodes", "50"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and "blocker is a file" in err, err
    assert blocker.read_text() == "not a folder\n" and sorted(p.name for p in tmp_path.iterdir()) == ["blocker", "run.toml"]
