"""Atomic writes: a file or a directory appears whole or not at all.

Every output of the package (family files, operating-point files, tables,
reports, simulations) goes through here: the content is written to a
temporary name beside the target, flushed, given the usual permissions (0666
or 0777 less the process umask, not mkstemp's 0600) and renamed over the
target with ``os.replace``. A failure leaves the target as it was and no
temporary behind.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

from .errors import InputError


def _mode(base: int) -> int:
    """``base`` less the process umask (what ``open`` would have given)."""
    umask = os.umask(0)
    os.umask(umask)
    return base & ~umask


def _parent(path: Path, what: str) -> Path:
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"cannot write {what} {path}: folder {parent} does not exist; "
                         "create it or choose another --out")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"cannot write {what} {path}: folder {parent} is not writable; "
                         "choose another --out")
    return parent


def write_file_atomic(path: str | os.PathLike, writer: Callable[[str], None],
                      what: str = "file") -> Path:
    """Call ``writer(tmp_path)`` on a temporary file beside ``path``, then rename it."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"cannot write {what} {path}: it is a folder; give a file name")
    parent = _parent(path, what)
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".part", dir=parent)
    except OSError as exc:
        raise InputError(f"cannot write {what} {path}: {exc.strerror}; choose another "
                         "--out") from None
    os.close(fd)
    try:
        writer(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, _mode(0o666))
        os.replace(tmp, path)
    except OSError as exc:
        raise InputError(f"cannot write {what} {path}: {exc.strerror or exc}; choose another "
                         "--out") from None
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def write_text_atomic(path: str | os.PathLike, text: str, what: str = "file") -> Path:
    """Write ``text`` (UTF-8) atomically."""
    def writer(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8", newline="\n") as f:
            f.write(text)
    return write_file_atomic(path, writer, what)


def write_dir_atomic(path: str | os.PathLike, files: dict[str, str | bytes],
                     what: str = "folder") -> list[Path]:
    """Write ``files`` (name -> str as UTF-8, or bytes) into folder ``path`` atomically.

    The files go into a temporary folder beside ``path`` that is then renamed. An
    existing ``path`` is swapped out and removed only after the new folder is in place;
    it must be a folder holding nothing but files this call would write (so no user
    data is ever deleted).
    """
    path = Path(path)
    parent = _parent(path, what)
    if path.exists():
        if not path.is_dir():
            raise InputError(f"cannot write {what} {path}: a file of that name exists; give a "
                             "folder name")
        foreign = sorted(p.name for p in path.iterdir() if p.name not in files)
        if foreign:
            raise InputError(f"cannot write {what} {path}: it holds other files "
                             f"({', '.join(foreign[:3])}); choose an empty or new folder")
    try:
        tmp = tempfile.mkdtemp(prefix="." + path.name + ".", suffix=".part", dir=parent)
    except OSError as exc:
        raise InputError(f"cannot write {what} {path}: {exc.strerror}; choose another "
                         "--out") from None
    old = None
    try:
        for name, content in files.items():
            if isinstance(content, bytes):
                with open(os.path.join(tmp, name), "wb") as f:
                    f.write(content)
            else:
                with open(os.path.join(tmp, name), "w", encoding="utf-8", newline="\n") as f:
                    f.write(content)
        os.chmod(tmp, _mode(0o777))
        if path.exists():
            old = tempfile.mkdtemp(prefix="." + path.name + ".", suffix=".old", dir=parent)
            os.rmdir(old)
            os.replace(path, old)
        os.replace(tmp, path)
    except OSError as exc:
        if old is not None and not path.exists():
            os.replace(old, path)
            old = None
        raise InputError(f"cannot write {what} {path}: {exc.strerror or exc}; choose another "
                         "--out") from None
    finally:
        if os.path.exists(tmp):
            shutil.rmtree(tmp, ignore_errors=True)
        if old is not None and os.path.exists(old):
            shutil.rmtree(old, ignore_errors=True)
    return [path / name for name in files]
