"""Atomic output: a file or folder is either complete or not there.

Everything fitrank writes (generated datasets, run folders, models, plots) is
written under a temporary name beside its destination and renamed into place
at the end, so a crash or a bad input never leaves a half-written result and
never destroys an earlier complete one.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
import warnings
from pathlib import Path

from fitrank import interrupt
from fitrank.errors import ConfigError, FitrankInputError


def refuse_unwritable(target: str | Path, *, folder: bool, key: str | None = None) -> None:
    """Raise unless ``target`` can be written atomically.

    Checked before the work whose result it will hold, so that a bad output path
    fails in a second, not after minutes of solving.

    Args:
      target: the folder (``folder=True``) or file to be written beside itself.
      key: the config key that sets it: the error is then a ConfigError naming it.

    Raises:
      FitrankInputError (ConfigError with ``key``): a file or folder is in the way,
        or the nearest existing parent is not writable.
    """
    target = Path(target)
    reason = None
    if target.exists() and target.is_dir() != folder:
        reason = f"{target} is {'a file' if folder else 'a folder'}; choose another path"
    else:
        parent = target.parent
        while not parent.exists():
            parent = parent.parent
        if not parent.is_dir():
            reason = f"{target} cannot be created: {parent} is a file; choose another path"
        elif not os.access(parent, os.W_OK | os.X_OK):
            reason = f"{target} cannot be created: no permission to write in {parent}"
    if reason is not None:
        raise ConfigError(key, reason) if key else FitrankInputError(reason)


def refuse_replacing_foreign(folder: str | Path, *, own: frozenset[str], inputs=(), key: str | None = None) -> None:
    """Raise unless replacing ``folder`` as a whole loses nothing but an earlier result of the same kind.

    :func:`staged_folder` swaps the whole folder for the new one, so a folder
    that holds anything else (the input tables, the config, a user's notes)
    would be lost with it.

    Args:
      folder: the folder to be replaced.
      own: the names of the entries a result of this kind consists of.
      inputs: files the work reads or keeps apart from its result; none may lie inside ``folder``.
      key: the config key that sets ``folder`` (the error is then a ConfigError naming it).

    Raises:
      FitrankInputError (ConfigError with ``key``): ``folder`` holds an input or a foreign entry.
    """
    folder = Path(folder).resolve()
    reason = None
    inside = [Path(path) for path in inputs if path and Path(path).resolve().is_relative_to(folder)]
    if Path.cwd().resolve().is_relative_to(folder):
        reason = (f"{folder} holds the working directory, and a run replaces its whole folder (the shell would "
                  "be left in a deleted folder); choose another output folder")
    elif inside:
        reason = (f"{folder} holds {inside[0]}, which this run reads or keeps, and a run replaces its whole "
                  "folder; choose another output folder")
    elif folder.is_dir():
        foreign = sorted(entry.name for entry in folder.iterdir() if entry.name not in own)
        if foreign:
            listed = ", ".join(foreign[:3]) + (", ..." if len(foreign) > 3 else "")
            reason = (f"{folder} holds files that are not a run's ({listed}), and a run replaces its whole "
                      "folder; choose a new or empty folder")
    if reason is not None:
        raise ConfigError(key, reason) if key else FitrankInputError(reason)


@contextlib.contextmanager
def staged_folder(target: str | Path):
    """Yield a fresh temporary folder beside ``target``; on success it replaces ``target``.

    On an exception the temporary folder is removed and ``target`` (if it
    existed) is left exactly as it was.
    """
    target = Path(target)
    with refused_as_input_error(target):
        target.parent.mkdir(parents=True, exist_ok=True)
        staging = Path(tempfile.mkdtemp(prefix=f".{target.name}.tmp-", dir=target.parent))
    try:
        yield staging
        interrupt.checkpoint()  # an interrupted run never replaces an earlier result
        with refused_as_input_error(target):
            os.chmod(staging, 0o755)  # mkdtemp makes it private
            if target.exists():
                _swap_in(staging, target)
            else:
                os.rename(staging, target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def _swap_in(staging: Path, target: Path) -> None:
    """Replace the folder ``target`` by ``staging``; if either rename fails, ``target`` is as it was."""
    old = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=target.parent))
    try:
        os.rename(target, old / "previous")
        os.rename(staging, target)
    except BaseException:
        if not target.exists() and (old / "previous").exists():
            os.rename(old / "previous", target)  # never leave the earlier result hidden
        shutil.rmtree(old, ignore_errors=True)
        raise
    shutil.rmtree(old, ignore_errors=True)  # the earlier result is replaced whether or not its copy goes
    if old.exists():
        warnings.warn(f"{old}: the copy of the earlier {target.name} could not be removed (the new one is in "
                      "place); delete it by hand", RuntimeWarning, stacklevel=3)


@contextlib.contextmanager
def refused_as_input_error(target, advice: str = "check its permissions and free space, or write to another path"):
    """Turn the file system refusing to write ``target`` (permissions, an immutable file, a full disk) into one line.

    Args:
      target: the path being written, named in the message.
      advice: what the user can do about it.

    Raises:
      FitrankInputError: in place of any OSError raised inside the block.
    """
    try:
        yield
    except OSError as err:
        raise FitrankInputError(f"{target}: cannot be written ({err.strerror or err}); {advice}") from None


@contextlib.contextmanager
def staged_file(target: str | Path, suffix: str = ""):
    """Yield a temporary path beside ``target``; on success it replaces ``target`` (mode 0644)."""
    target = Path(target)
    with refused_as_input_error(target):
        target.parent.mkdir(parents=True, exist_ok=True)
        handle, temp = tempfile.mkstemp(prefix=f".{target.stem}-", suffix=suffix or target.suffix,
                                        dir=target.parent)
        os.close(handle)
    try:
        yield Path(temp)
        interrupt.checkpoint()
        with refused_as_input_error(target):  # an immutable or otherwise protected target is left as it was
            os.chmod(temp, 0o644)  # mkstemp makes it private
            os.replace(temp, target)
    finally:
        Path(temp).unlink(missing_ok=True)


def link_or_copy(source: str | Path, target: str | Path) -> None:
    """Replace ``target`` atomically by a hard link to ``source``, or by a copy where links are refused.

    A hard link shares the bytes without writing them again (a copy is made
    across file systems). Replacing either path later by rename, as
    :func:`staged_file` does, leaves the other with the old content.
    """
    with staged_file(target) as temp:
        temp.unlink()
        try:
            os.link(source, temp)
        except OSError:
            shutil.copyfile(source, temp)
