"""Atomic writes: a file or a directory appears whole or not at all.

Every output of the package (family files, operating-point files, tables,
reports, simulations) goes through here: the content is written to a
temporary name beside the target, flushed, given the usual permissions (0666
or 0777 less the process umask, not mkstemp's 0600) and renamed over the
target with ``os.replace``. A failure (disk full, quota, file-size limit,
permissions) raises a one-line :class:`~schedule.errors.InputError` and
leaves the target as it was and no temporary behind.

Temporary names are ``.<target name>.<pid>.<random>.part`` (files and
folders) and ``.<target name>.<pid>.<random>.old`` (a folder being swapped
out). A process killed mid-write cannot remove its temporary; the next write
of the same target does (:func:`remove_stale_temps`), once the process named
in the temporary's name is gone.
"""

from __future__ import annotations

import ctypes
import errno
import os
import re
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

from .errors import InputError

__all__ = ["write_file_atomic", "write_bytes_atomic", "write_text_atomic", "write_dir_atomic",
           "remove_stale_temps", "write_error"]

# Temporaries this process is writing right now (never removed as stale).
_ACTIVE: set[str] = set()
_NO_SPACE = (errno.ENOSPC, errno.EDQUOT, errno.EFBIG)


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


def write_error(what: str, path: Path | str, exc: BaseException) -> InputError:
    """The one-line error for a failed write of ``what`` at ``path``."""
    code = getattr(exc, "errno", None)
    reason = os.strerror(code) if isinstance(code, int) and code > 0 else \
        (" ".join(str(getattr(exc, "strerror", None) or exc).split()) or type(exc).__name__)
    fix = "free some space or choose another --out" if code in _NO_SPACE else \
        "choose another --out"
    return InputError(f"cannot write {what} {path}: {reason[:160]}; {fix}")


# ----------------------------------------------------------------------------- stale temps
def _temp_name_pattern(path: Path) -> re.Pattern:
    return re.compile(r"\." + re.escape(path.name) + r"\.(\d+)\.[A-Za-z0-9_]+\.(part|old)\Z")


def _writer_alive(pid: int, mtime: float, full: str) -> bool:
    """Could process ``pid`` still be writing the temporary ``full`` (modified at ``mtime``)?"""
    if pid == os.getpid():
        return os.path.abspath(full) in _ACTIVE
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, another user's
        return True
    except OSError:
        return True
    try:  # a pid reused since: the process started after the temporary was last written
        with open(f"/proc/{pid}/stat", "rb") as fh:
            start_ticks = int(fh.read().rsplit(b")", 1)[1].split()[19])
        with open("/proc/stat", "rb") as fh:
            boot = next(int(line.split()[1]) for line in fh if line.startswith(b"btime"))
        started = boot + start_ticks / os.sysconf("SC_CLK_TCK")
        return started <= mtime + 2.0
    except (OSError, ValueError, IndexError, StopIteration):
        return True


def remove_stale_temps(path: str | os.PathLike) -> list[Path]:
    """Remove the temporaries that killed writes of ``path`` left beside it.

    A temporary is removed only when the process named in its name no longer
    runs (or its number has been reused by a process started later), so a
    concurrent write of the same target is left alone. Returns the removed paths.
    """
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    pattern = _temp_name_pattern(path)
    removed = []
    try:
        entries = list(os.scandir(parent))
    except OSError:
        return removed
    for entry in entries:
        m = pattern.match(entry.name)
        if m is None:
            continue
        try:
            mtime = entry.stat(follow_symlinks=False).st_mtime
        except OSError:
            continue
        if _writer_alive(int(m.group(1)), mtime, entry.path):
            continue
        try:
            if entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path)
            else:
                os.unlink(entry.path)
            removed.append(Path(entry.path))
        except OSError:
            pass
    return removed


def _temp_prefix(path: Path) -> str:
    return f".{path.name}.{os.getpid()}."


# ----------------------------------------------------------------------------- files
def write_file_atomic(path: str | os.PathLike, writer: Callable[[str], None],
                      what: str = "file") -> Path:
    """Call ``writer(tmp_path)`` on a temporary file beside ``path``, then rename it.

    Raises
    ------
    InputError
        The target is a folder, its folder is missing or not writable, or a
        write failed (disk full, quota, file-size limit...); nothing is left behind.
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(f"cannot write {what} {path}: it is a folder; give a file name")
    parent = _parent(path, what)
    remove_stale_temps(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=_temp_prefix(path), suffix=".part", dir=parent)
    except OSError as exc:
        raise write_error(what, path, exc) from None
    _ACTIVE.add(os.path.abspath(tmp))
    try:
        os.close(fd)
        writer(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, _mode(0o666))
        os.replace(tmp, path)
    except OSError as exc:
        raise write_error(what, path, exc) from None
    finally:
        _ACTIVE.discard(os.path.abspath(tmp))
        try:
            os.unlink(tmp)
        except OSError:
            pass
    return path


def write_bytes_atomic(path: str | os.PathLike, data: bytes, what: str = "file") -> Path:
    """Write ``data`` atomically."""
    def writer(tmp: str) -> None:
        with open(tmp, "wb") as f:
            f.write(data)
    return write_file_atomic(path, writer, what)


def write_text_atomic(path: str | os.PathLike, text: str, what: str = "file") -> Path:
    """Write ``text`` (UTF-8) atomically."""
    return write_bytes_atomic(path, text.encode("utf-8"), what)


# ----------------------------------------------------------------------------- folders
def _exchange(a: str, b: str) -> bool:
    """Swap two paths atomically (Linux renameat2 RENAME_EXCHANGE); False if unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    renameat2.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                          ctypes.c_uint]
    at_fdcwd, rename_exchange = -100, 2
    if renameat2(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
        return False
    raise OSError(code, os.strerror(code))


def write_dir_atomic(path: str | os.PathLike, files: dict[str, str | bytes],
                     what: str = "folder",
                     replaceable: Callable[[str], bool] | None = None) -> list[Path]:
    """Write ``files`` (name -> str as UTF-8, or bytes) into folder ``path`` atomically.

    The files go into a temporary folder beside ``path`` that is then renamed. An
    existing folder ``path`` is swapped with it in one step where the system allows
    (Linux ``renameat2``), else moved aside first; the old folder is removed only
    once the new one is in place. It must hold nothing but files this call would
    write or that ``replaceable(name)`` accepts (earlier outputs of the same
    kind), so no user data is ever deleted.

    Raises
    ------
    InputError
        A file of that name exists, the folder holds other files, or a write
        failed; the old folder is then left as it was.
    """
    path = Path(path)
    parent = _parent(path, what)
    if path.exists() or path.is_symlink():
        if path.is_symlink() or not path.is_dir():
            raise InputError(f"cannot write {what} {path}: a file of that name exists; give a "
                             "folder name")
        foreign = sorted(p.name for p in path.iterdir() if p.name not in files
                         and not (replaceable is not None and p.is_file()
                                  and not p.is_symlink() and replaceable(p.name)))
        if foreign:
            raise InputError(f"cannot write {what} {path}: it holds other files "
                             f"({', '.join(foreign[:3])}); choose an empty or new folder")
    remove_stale_temps(path)
    try:
        tmp = tempfile.mkdtemp(prefix=_temp_prefix(path), suffix=".part", dir=parent)
    except OSError as exc:
        raise write_error(what, path, exc) from None
    _ACTIVE.add(os.path.abspath(tmp))
    old = None
    try:
        for name, content in files.items():
            data = content if isinstance(content, bytes) else content.encode("utf-8")
            with open(os.path.join(tmp, name), "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
        os.chmod(tmp, _mode(0o777))
        if path.exists():
            if _exchange(tmp, str(path)):
                old = tmp  # tmp now holds the previous folder
            else:
                old = tempfile.mkdtemp(prefix=_temp_prefix(path), suffix=".old", dir=parent)
                _ACTIVE.add(os.path.abspath(old))
                os.rmdir(old)
                os.replace(path, old)
                os.replace(tmp, path)
        else:
            os.replace(tmp, path)
    except OSError as exc:
        if old is not None and old != tmp and not path.exists():
            os.replace(old, path)
            old = None
        raise write_error(what, path, exc) from None
    finally:
        for t in (tmp, old):
            if t is not None:
                if os.path.exists(t):
                    shutil.rmtree(t, ignore_errors=True)
                _ACTIVE.discard(os.path.abspath(t))
    return [path / name for name in files]
