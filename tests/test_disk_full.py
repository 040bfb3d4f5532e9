"""A full disk (or any failing write) ends in one line and exit code 2.

Two ways to make writes fail, each in a subprocess running the command line:

- a small tmpfs mounted in a private mount namespace (``unshare -rm``; skipped
  where user namespaces are not available): the real ENOSPC "No space left on
  device" of a full file system;
- ``RLIMIT_FSIZE`` with SIGXFSZ ignored: every write beyond the limit fails
  with EFBIG "File too large", on any Linux.

Before the fix, HDF5 met the error itself and the process printed hundreds of
ignored exceptions and crashed (SIGSEGV), leaving a temporary behind. Checked:
exit code 2 (not a signal), one ``error:`` line, no traceback, no temporary
(``.part`` / ``.old``) and no output file left, an earlier output untouched.
"""

from __future__ import annotations

import hashlib
import resource
import shlex
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from _files import lag_family


def _tmpfs_available() -> bool:
    if shutil.which("unshare") is None:
        return False
    probe = subprocess.run(["unshare", "-rm", "sh", "-c", "mount -t tmpfs -o size=64k tmpfs "
                            "/mnt 2>/dev/null || mount -t tmpfs -o size=64k tmpfs /tmp"],
                           capture_output=True)
    return probe.returncode == 0


@pytest.fixture(scope="module")
def family(tmp_path_factory):
    return lag_family(tmp_path_factory.mktemp("lag"))


def _cli(args) -> list[str]:
    return [sys.executable, "-m", "schedule.cli.main", *[str(a) for a in args]]


def _on_tmpfs(mount: Path, size: str, args) -> tuple[int, str, list[str]]:
    """Run the command with ``mount`` a fresh tmpfs of ``size``; (exit code, stderr, listing)."""
    mount.mkdir(exist_ok=True)
    script = (f"mount -t tmpfs -o size={size} tmpfs {shlex.quote(str(mount))} || exit 99; "
              f"cd {shlex.quote(str(mount))}; {shlex.join(_cli(args))}; echo \"RC=$?\" >&2; "
              "ls -A >&2")
    res = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    lines = res.stderr.splitlines()
    at = max(i for i, line in enumerate(lines) if line.startswith("RC="))
    return int(lines[at][3:]), "\n".join(lines[:at]) + res.stdout, lines[at + 1:]


def _limited(folder: Path, limit: int, args) -> tuple[int, str]:
    def limit_writes():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    res = subprocess.run(_cli(args), cwd=folder, capture_output=True, text=True,
                         preexec_fn=limit_writes)
    return res.returncode, res.stderr + res.stdout


def _one_error_line(code: int, out: str) -> None:
    assert code == 2, f"exit {code}:\n{out}"  # a crash would be negative (-11 = SIGSEGV)
    assert "Traceback" not in out and "Exception ignored" not in out, out
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: cannot write"), out


def _no_temporaries(names) -> None:
    assert not [n for n in names if n.endswith((".part", ".old"))], names


@pytest.mark.skipif(not _tmpfs_available(), reason="no user namespaces to mount a tmpfs")
def test_full_tmpfs_design_and_hdf5_export(family, tmp_path):
    design = family.parent / "design.toml"
    code, out, listing = _on_tmpfs(tmp_path / "mnt", "8k", ["design", design, "--out",
                                                            "family.h5", "--quiet"])
    _one_error_line(code, out)
    assert "No space left on device" in out
    _no_temporaries(listing)
    assert "family.h5" not in listing
    code, out, listing = _on_tmpfs(tmp_path / "mnt", "8k", [
        "export", family, "--format", "hdf5", "--out", "table.h5", "--breakpoints",
        "pole=1:2:200"])
    _one_error_line(code, out)
    _no_temporaries(listing)
    assert listing == []


def test_file_size_limit_design_and_report(family, tmp_path):
    design = family.parent / "design.toml"
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    code, out = _limited(out_dir, 6000, ["design", design, "--out", "family.h5", "--quiet"])
    _one_error_line(code, out)
    assert "File too large" in out
    names = [p.name for p in out_dir.iterdir()]
    _no_temporaries(names)
    assert "family.h5" not in names
    # an earlier report survives a failed rewrite byte for byte
    report = tmp_path / "report"
    args = ["check", family, "--samples", "2", "--no-gamma-opt", "--quiet", "--report", report]
    first = subprocess.run(_cli(args), capture_output=True, text=True)
    assert first.returncode in (0, 1), first.stderr
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in report.iterdir()}
    code, out = _limited(tmp_path, 10_000, args)
    _one_error_line(code, out)
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in report.iterdir()}
    assert after == before
    _no_temporaries([p.name for p in tmp_path.iterdir()])
