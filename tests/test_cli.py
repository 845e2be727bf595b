"""The command line: build, settings, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tomllib

import numpy as np
import pytest

from fitrank import native
from fitrank.cli import main
from fitrank.config import config_keys

from tests._ctrl_c import press_ctrl_c_inside
from tests._datasets import generated


def _config(tmp_path, kind="scale", extra=""):
    _, _, folder = generated(kind)
    path = tmp_path / "run.toml"
    path.write_text(f'[data]\nedges = "{folder / "edges.csv"}"\npairs = "{folder / "pairs.csv"}"\n'
                    f'[weighting]\nkind = "{kind}"\n[reduction]\nsamples = 24\n'
                    f'[output]\nfolder = "{tmp_path / "out"}"\n{extra}')
    return path


def _one_line_error(capsys, *words: str) -> str:
    """The stderr of the last command, after checking it is one line holding every one of ``words``."""
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and all(word in err for word in words), err
    return err


def _build_refused(capsys, config, settings: dict, *words: str) -> str:
    """Check that ``fitrank build`` with these ``--set`` path settings exits 2 with one line holding ``words``."""
    overrides = [part for key, path in settings.items() for part in ("--set", f'{key}="{path}"')]
    assert main(["build", str(config), *overrides]) == 2
    return _one_line_error(capsys, *words)


def test_build_saves_the_model_and_reports_it(tmp_path, capsys):
    config = _config(tmp_path)
    assert main(["build", str(config), "--set", f'reduction.model="{tmp_path / "m.npz"}"']) == 0
    out = capsys.readouterr().out
    assert (tmp_path / "m.npz").is_file()
    for words in ("k = ", "singular values", "rows chosen", "edges touched", "offline time"):
        assert words in out
    assert ("online least squares: native BLAS/LAPACK kernel" in out) == native.available()
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
    _one_line_error(capsys, "nope.toml")


@pytest.mark.parametrize("argv", [["generate", "out", "--nodes", "many"], ["generate", "out", "--format", "xlsx"],
                                  ["fit"], ["nonsense"]])
def test_bad_command_line_arguments_are_one_line_exit_2(argv):
    command = [sys.executable, "-m", "fitrank.cli", *argv]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 2 and done.stdout == ""
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("fitrank") and "--help" in lines[0], done.stderr


def test_bad_data_file_is_one_line_exit_2(tmp_path, capsys):
    bad = tmp_path / "edges.csv"
    bad.write_text("source,target,weight\na,b,1\nb,c,-2\n")
    pairs = tmp_path / "pairs.csv"
    pairs.write_text("preferred,other\na,b\n")
    config = tmp_path / "bad.toml"
    config.write_text(f'[data]\nedges = "{bad}"\npairs = "{pairs}"\n[output]\nfolder = "{tmp_path / "out"}"\n')
    assert main(["fit", str(config), "--quiet"]) == 2
    _one_line_error(capsys, "edges.csv", "row 2")
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
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
    _build_refused(capsys, config, {"reduction.model": blocker / "m.npz"}, "reduction.model", "blocker is a file")
    assert main(["fit", str(config), "--quiet", "--out", str(blocker / "run")]) == 2
    _one_line_error(capsys, "output.folder", "blocker is a file")
    _build_refused(capsys, config, {"reduction.model": tmp_path}, "is a folder")
    # fit with a shared model file under a file, and generate into a folder under a file
    assert main(["fit", str(config), "--quiet", "--out", str(tmp_path / "run"),
                 "--set", f'reduction.model="{blocker / "m.npz"}"']) == 2
    _one_line_error(capsys, "reduction.model", "blocker is a file")
    for out in (blocker, blocker / "data"):
        assert main(["generate", str(out), "--nodes", "50"]) == 2
        _one_line_error(capsys, "blocker is a file")
    assert blocker.read_text() == "not a folder\n" and sorted(p.name for p in tmp_path.iterdir()) == ["blocker", "run.toml"]


def _snapshot(folder):
    return {path.relative_to(folder): path.read_bytes() for path in sorted(folder.rglob("*")) if path.is_file()}


@pytest.mark.slow
def test_a_run_never_replaces_a_folder_holding_its_inputs_or_other_files(tmp_path, capsys):
    # a run replaces its whole folder, so a folder with the data, the config or anything not a run's is refused
    data = tmp_path / "data"
    data.mkdir()
    for name in ("edges.csv", "pairs.csv"):
        (data / name).write_bytes((generated("scale")[2] / name).read_bytes())
    config = data / "run.toml"
    config.write_text('[data]\nedges = "edges.csv"\npairs = "pairs.csv"\n[reduction]\nsamples = 16\n'
                      '[output]\nfolder = "."\nplots = false\n')
    before = _snapshot(data)
    assert main(["fit", str(config), "--quiet"]) == 2
    _one_line_error(capsys, "output.folder", "run.toml")
    # a shared model or a snapshot file inside the run folder would go with it
    for key, name in (("reduction.model", "shared.npz"), ("reduction.snapshot_file", "snapshots.npy")):
        assert main(["fit", str(config), "--quiet", "--out", str(tmp_path / "run"), "--set",
                     f'{key}="{tmp_path / "run" / name}"']) == 2
        assert name in capsys.readouterr().err
    notes = tmp_path / "notes"
    notes.mkdir()
    (notes / "todo.txt").write_text("mine\n")
    assert main(["fit", str(config), "--quiet", "--out", str(notes)]) == 2
    _one_line_error(capsys, "todo.txt", "not a run's")
    assert _snapshot(data) == before and (notes / "todo.txt").read_text() == "mine\n"
    # (an earlier run folder holds only a run's files and is replaced: test_fit's reuse tests write one twice)


def test_snapshot_file_paths_are_checked_and_a_foreign_file_is_never_overwritten(tmp_path, capsys):
    config = _config(tmp_path)
    precious = tmp_path / "precious.csv"
    precious.write_text("a,b\n1,2\n")
    _build_refused(capsys, config, {"reduction.snapshot_file": precious}, "reduction.snapshot_file",
                   "not a snapshot matrix")
    assert precious.read_text() == "a,b\n1,2\n"
    # a .npy of the user's own (not a 2-d float64 matrix) is theirs too
    vector = tmp_path / "userdata.npy"
    np.save(vector, np.arange(10.0))
    before = vector.read_bytes()
    _build_refused(capsys, config, {"reduction.snapshot_file": vector}, "reduction.snapshot_file", "userdata.npy",
                   "not a snapshot matrix")
    assert vector.read_bytes() == before
    archive = tmp_path / "arrays.npy"  # an .npz archive under an .npy name: read, closed, refused and kept
    with open(archive, "wb") as handle:
        np.savez(handle, a=np.ones((3, 2)))
    before = archive.read_bytes()
    _build_refused(capsys, config, {"reduction.snapshot_file": archive}, "arrays.npy", "not a snapshot matrix")
    assert archive.read_bytes() == before
    # the model would be written over the snapshots
    shared = tmp_path / "both.npy"
    _build_refused(capsys, config, {"reduction.snapshot_file": shared, "reduction.model": shared},
                   "reduction.snapshot_file", "also reduction.model")
    _build_refused(capsys, config, {"reduction.snapshot_file": tmp_path}, "is a folder")
    # a missing folder is created, as for the model file; an earlier snapshot file is rewritten
    snapshots = tmp_path / "new" / "snapshots.npy"
    for _ in range(2):
        assert main(["build", str(config), "--set", f'reduction.snapshot_file="{snapshots}"',
                     "--set", "check.build_points=0"]) == 0
        assert np.load(snapshots, mmap_mode="r").shape[1] == 24


@pytest.mark.slow
def test_a_model_path_never_overwrites_what_is_not_a_model_and_an_empty_file_is_rebuilt(tmp_path, capsys):
    config = _config(tmp_path)
    model = tmp_path / "m.npz"
    common = ["--quiet", "--set", f'reduction.model="{model}"', "--set", "output.plots=false"]
    assert main(["fit", str(config), *common]) == 0
    whole = model.read_bytes()
    # cut short it is no model any more, and it might be anything: refused, left as it is
    model.write_bytes(whole[: len(whole) // 2])
    assert main(["fit", str(config), *common]) == 2
    _one_line_error(capsys, "reduction.model", "not a fitrank model file")
    assert model.read_bytes() == whole[: len(whole) // 2]
    edges = generated("scale")[2] / "edges.csv"
    before = edges.read_bytes()
    _build_refused(capsys, config, {"reduction.model": edges}, "not a fitrank model file")
    assert edges.read_bytes() == before
    model.write_bytes(b"")  # nothing to lose: rebuilt, not a traceback
    assert main(["fit", str(config), *common]) == 0
    assert model.read_bytes()[:4] == b"PK\x03\x04"
    capsys.readouterr()


def test_the_snapshot_file_is_checked_even_when_no_run_folder_is_written(tmp_path):
    from fitrank.errors import ConfigError
    from fitrank.pipeline import fit

    notes = tmp_path / "notes.csv"
    notes.write_text("mine\n")
    with pytest.raises(ConfigError, match="reduction.snapshot_file.*not a snapshot matrix"):
        fit(_config(tmp_path), overrides=[f'reduction.snapshot_file="{notes}"'], write=False, progress=False,
            log=lambda message: None)
    assert notes.read_text() == "mine\n"


def test_a_run_folder_holding_the_working_directory_is_refused(tmp_path, capsys, monkeypatch):
    config = _config(tmp_path)
    here = tmp_path / "here"
    here.mkdir()
    monkeypatch.chdir(here)
    assert main(["fit", str(config), "--quiet", "--out", "."]) == 2
    _one_line_error(capsys, "working directory")
    assert here.is_dir() and list(here.iterdir()) == []


@pytest.mark.slow
def test_a_ctrl_c_that_had_to_wait_still_stops_the_run_before_it_replaces_the_earlier_one(tmp_path, capsys,
                                                                                         monkeypatch):
    import signal

    import fitrank.pipeline

    config = _config(tmp_path)
    run = tmp_path / "run"
    assert main(["fit", str(config), "--quiet", "--out", str(run)]) == 0
    before = _snapshot(run)
    real_write = fitrank.pipeline.write_run
    # Ctrl-C arriving while JAX code runs only records the request (raised there, it could crash the
    # interpreter or be dropped); the write's commit point must raise it
    def interrupted_write(*args, **kwargs):
        press_ctrl_c_inside()
        return real_write(*args, **kwargs)

    monkeypatch.setattr(fitrank.pipeline, "write_run", interrupted_write)
    assert main(["fit", str(config), "--quiet", "--out", str(run), "--set", "training.steps=3"]) == 130
    assert capsys.readouterr().err.strip().splitlines()[-1] == "fitrank fit: interrupted"
    assert _snapshot(run) == before and sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # restored after the command


def test_a_command_that_ends_with_a_ctrl_c_still_waiting_reports_it(tmp_path, capsys, monkeypatch):
    import fitrank.config

    real = fitrank.config.effective_config

    def pressed(*args, **kwargs):
        press_ctrl_c_inside()  # waits: no checkpoint before the command returns
        return real(*args, **kwargs)

    monkeypatch.setattr(fitrank.config, "effective_config", pressed)
    assert main(["settings", str(_config(tmp_path))]) == 130
    assert capsys.readouterr().err.strip() == "fitrank settings: interrupted"


def test_an_error_after_a_ctrl_c_is_reported_as_the_interruption(tmp_path, capsys, monkeypatch):
    # a second Ctrl-C inside compiled JAX code reaches the command as JAX's own error, not KeyboardInterrupt
    import fitrank.config

    def pressed_then_failed(*args, **kwargs):
        press_ctrl_c_inside()
        raise RuntimeError("what JAX raises for an exception in a host callback")

    monkeypatch.setattr(fitrank.config, "effective_config", pressed_then_failed)
    assert main(["settings", str(_config(tmp_path))]) == 130
    assert capsys.readouterr().err.strip() == "fitrank settings: interrupted"
    monkeypatch.setattr(fitrank.config, "effective_config", lambda *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):  # without a Ctrl-C an error stays an error
        main(["settings", str(_config(tmp_path))])


@pytest.mark.slow
def test_a_solve_that_fails_in_a_worker_process_is_one_line(tmp_path):
    # the worker's ConvergenceError must come back whole (it had broken the pool, ending in a traceback)
    from fitrank.errors import ConvergenceError
    from fitrank.pagerank import PageRankProblem
    from fitrank.snapshots import local_executor, solve_snapshots
    from fitrank.weightings import make_weighting

    graph = generated("scale")[0].graph
    problem = PageRankProblem(graph, make_weighting("scale", graph))
    with local_executor(1) as pool, pytest.raises(ConvergenceError, match="did not converge: 5 iterations"):
        solve_snapshots(problem, problem.weighting.sample(2), tol=1e-30, maxiter=5, executor=pool, progress=False)


def test_unreachable_tolerances_and_lost_workers_end_in_one_line(tmp_path, capsys, monkeypatch):
    from concurrent.futures.process import BrokenProcessPool

    import fitrank.reduced
    from fitrank.errors import ConvergenceError

    config = _config(tmp_path)

    def unconverged(*args, **kwargs):
        raise ConvergenceError("PageRank solve", 10_000, 3.7e-17, 2.1e-16, 1e-30)

    monkeypatch.setattr(fitrank.reduced, "solve_snapshots", unconverged)
    assert main(["build", str(config)]) == 2
    _one_line_error(capsys, "fitrank build: error: PageRank solve did not converge", "loosen tol")

    def killed(*args, **kwargs):
        raise BrokenProcessPool("A child process terminated abruptly, the process pool is not usable anymore")

    monkeypatch.setattr(fitrank.reduced, "solve_snapshots", killed)
    assert main(["build", str(config)]) == 1
    _one_line_error(capsys, "fitrank build: error: a worker process stopped", "no model or run was saved")
