"""Tests of atomic output (fitrank.atomic) when the file system refuses a write.

The refusals are injected by replacing ``os.rename``, ``os.replace`` or
``tempfile.mkdtemp`` with functions raising the ``OSError`` a protected path
or a full disk raises (the tests run as root in CI, where permissions alone
refuse nothing). Each must end in one :class:`FitrankInputError` line naming
the path, with the earlier result untouched and no temporary entry left.
"""

from __future__ import annotations

import argparse
import errno
import os

import pytest

from fitrank import atomic
from fitrank.errors import FitrankInputError


def _refusing(real, marker: str, code: int = errno.EPERM):
    """``real`` (a two-path os function), except that a source path containing ``marker`` is refused."""
    def refuse(source, destination, *args, **kwargs):
        if marker in str(source):
            raise PermissionError(code, os.strerror(code))
        return real(source, destination, *args, **kwargs)
    return refuse


def _one_line(error: pytest.ExceptionInfo, *words: str) -> None:
    message = str(error.value)
    assert "\n" not in message and all(word in message for word in words), message


@pytest.mark.parametrize("step", [".tmp-", "run"])  # the new folder into place, or the earlier one aside
def test_a_refused_folder_swap_is_one_line_and_keeps_the_earlier_folder(tmp_path, monkeypatch, step):
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "a").write_text("earlier\n")
    monkeypatch.setattr(atomic.os, "rename", _refusing(os.rename, str(folder) if step == "run" else step))
    with pytest.raises(FitrankInputError) as error, atomic.staged_folder(folder) as staging:
        (staging / "b").write_text("new\n")
    _one_line(error, str(folder), "cannot be written", "Operation not permitted")
    assert [p.name for p in folder.iterdir()] == ["a"] and (folder / "a").read_text() == "earlier\n"
    assert [p.name for p in tmp_path.iterdir()] == ["run"]


def test_a_new_folder_that_cannot_be_staged_is_one_line(tmp_path, monkeypatch):
    def full_disk(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(atomic.tempfile, "mkdtemp", full_disk)
    with pytest.raises(FitrankInputError) as error, atomic.staged_folder(tmp_path / "out"):
        pytest.fail("the body must not run without a staging folder")
    _one_line(error, str(tmp_path / "out"), "No space left on device")
    assert list(tmp_path.iterdir()) == []


def test_a_refused_file_replacement_is_one_line_and_keeps_the_earlier_file(tmp_path, monkeypatch):
    target = tmp_path / "model.npz"
    target.write_bytes(b"earlier")
    monkeypatch.setattr(atomic.os, "replace", _refusing(os.replace, ".model-"))
    with pytest.raises(FitrankInputError) as error, atomic.staged_file(target) as temp:
        temp.write_bytes(b"new")
    _one_line(error, str(target), "cannot be written", "Operation not permitted")
    assert target.read_bytes() == b"earlier" and [p.name for p in tmp_path.iterdir()] == ["model.npz"]


def test_an_error_inside_the_body_is_not_relabelled(tmp_path):
    """Only the file system's refusal of the result is rewritten: the work's own OSError stays as it is."""
    with pytest.raises(FileNotFoundError), atomic.staged_folder(tmp_path / "out"):
        open(tmp_path / "missing.csv").close()
    assert list(tmp_path.iterdir()) == []


def test_a_copy_of_the_earlier_folder_that_cannot_be_removed_is_named_in_a_warning(tmp_path, monkeypatch):
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "a").write_text("earlier\n")
    monkeypatch.setattr(atomic.shutil, "rmtree", lambda *args, **kwargs: None)  # the copy will not go
    with pytest.warns(RuntimeWarning, match=r"the copy of the earlier run could not be removed") as caught:
        with atomic.staged_folder(folder) as staging:
            (staging / "a").write_text("new\n")
    assert (folder / "a").read_text() == "new\n"
    leftover = [entry for entry in tmp_path.iterdir() if entry.name.startswith(".run.old-")]
    assert len(leftover) == 1 and str(leftover[0]) in str(caught[0].message)


def test_the_command_line_prints_a_warning_as_one_line(monkeypatch, capsys):
    from fitrank import cli

    def warn_and_finish(args):
        import warnings
        warnings.warn("something to know,\nsaid over two lines", RuntimeWarning)
        return 0

    parser = cli._parser()
    monkeypatch.setattr(cli, "_parser", lambda: parser)
    monkeypatch.setattr(parser, "parse_args", lambda argv: argparse.Namespace(func=warn_and_finish, command="build"))
    assert cli.main(["build", "x.toml"]) == 0
    assert capsys.readouterr().err == "fitrank build: warning: something to know, said over two lines\n"
