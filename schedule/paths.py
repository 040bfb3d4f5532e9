"""Paths given on the command line: inputs that are readable files, outputs that spare inputs.

- :func:`input_file`: an input must be an existing regular file; a folder, a
  device (``/dev/zero``), a pipe or an unreadable file gets its own one-line
  message instead of "does not exist".
- :func:`refuse_output_over_input`: the one check every verb runs before it
  writes: no output may be one of its inputs, not by name, not through a
  symbolic link and not through a hard link (same device and inode), and no
  output folder that is replaced whole may hold an input.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Iterable
from pathlib import Path

from .errors import InputError

__all__ = ["input_file", "refuse_output_over_input"]

PathLike = str | os.PathLike


def input_file(path: PathLike, what: str, fix: str = "check the path") -> Path:
    """``path`` as a Path after checking that it is a readable regular file.

    Parameters
    ----------
    path : the file named by the user (or by a design file).
    what : what the file is, for the message ("family file", "design file", ...).
    fix : what to do when it does not exist.

    Raises
    ------
    InputError
        One line: does not exist, is a folder, is not a regular file (a device,
        a pipe, a socket) or cannot be read.
    """
    path = Path(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if os.path.islink(path):
            raise InputError(f"{what} {path} is a symbolic link to a missing file; "
                             f"{fix}") from None
        raise InputError(f"{what} {path} does not exist; {fix}") from None
    except OSError as exc:
        raise InputError(f"{what} {path} cannot be examined ({exc.strerror}); "
                         "check the path") from None
    if stat.S_ISDIR(st.st_mode):
        raise InputError(f"{what} {path} is a folder; give the file itself")
    if not stat.S_ISREG(st.st_mode):
        kind = ("a character device" if stat.S_ISCHR(st.st_mode) else
                "a block device" if stat.S_ISBLK(st.st_mode) else
                "a pipe" if stat.S_ISFIFO(st.st_mode) else
                "a socket" if stat.S_ISSOCK(st.st_mode) else "not a regular file")
        raise InputError(f"{what} {path} is {kind}, not a regular file; give a file")
    if not os.access(path, os.R_OK):
        raise InputError(f"{what} {path} is not readable (permission denied); fix its "
                         "permissions or copy it")
    return path


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:  # one of them does not exist (yet): compare the resolved names
        return os.path.realpath(a) == os.path.realpath(b)


def _inside(inner: Path, folder: Path) -> bool:
    real_in, real_dir = os.path.realpath(inner), os.path.realpath(folder)
    try:
        return os.path.commonpath([real_in, real_dir]) == real_dir
    except ValueError:  # different drives (Windows)
        return False


def refuse_output_over_input(outputs: Iterable[PathLike | None],
                             inputs: Iterable[PathLike | None],
                             folders: Iterable[PathLike | None] = ()) -> None:
    """Raise before any work when an output would overwrite an input.

    Parameters
    ----------
    outputs : files the command writes (replaced atomically).
    inputs : files the command reads (None entries are skipped).
    folders : folders the command replaces whole (report, simulation, C
        source); an input inside one of them would be deleted with it.

    Raises
    ------
    InputError
        One line naming the output, the input and the fix. Paths are compared
        by identity (``os.path.samefile``: same device and inode, so symbolic
        and hard links count) and, for files not yet written, by resolved name.
    """
    ins = [Path(p) for p in inputs if p is not None]
    for out in (Path(p) for p in outputs if p is not None):
        for src in ins:
            if _same(out, src):
                same = "" if str(out) == str(src) else f" (the same file as {src})"
                raise InputError(f"output {out} is an input of this command{same}; "
                                 "choose another output path")
    for folder in (Path(p) for p in folders if p is not None):
        for src in ins:
            if _same(folder, src) or _inside(src, folder):
                raise InputError(f"output folder {folder} holds the input {src}, which "
                                 "replacing the folder would delete; choose another output "
                                 "folder")
