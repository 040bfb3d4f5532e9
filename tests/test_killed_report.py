"""A ``check --report`` killed while writing into an existing report folder leaves the old
report whole, never old pages next to new plots; the next run cleans up after it.

The kill is real (SIGKILL, which no clean-up code sees), sent by the process to
itself when it opens its third file for writing beside or in the report folder; the reference is the
SHA-256 of every file of the old report before and after.
"""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys

from _files import lag_family, run_cli

KILL_ON_THIRD_WRITE = """
import builtins, os, signal, sys
real_open = builtins.open
where = os.environ["REPORT_PARENT"]
count = [0]
def killing_open(path, mode="r", *args, **kw):
    if "w" in mode and str(path).startswith(where):
        count[0] += 1
        if count[0] == 3:
            os.kill(os.getpid(), signal.SIGKILL)
    return real_open(path, mode, *args, **kw)
builtins.open = killing_open
from schedule.cli.main import main
main(sys.argv[1:])
"""


def _digests(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir()}


def test_killed_report_leaves_the_old_one_whole(tmp_path):
    family = lag_family(tmp_path / "lag")
    report = tmp_path / "report"
    args = ["check", str(family), "--no-gamma-opt", "--quiet", "--report", str(report)]
    code, out, exc = run_cli(*args, "--samples", "2")
    assert exc is None and code in (0, 1), out
    old = _digests(report)
    assert "summary.md" in old and len(old) >= 4
    # the second report differs (other samples), so a mix would show
    killed = subprocess.run([sys.executable, "-c", KILL_ON_THIRD_WRITE, *args, "--samples", "5"],
                            capture_output=True, text=True,
                            env={**os.environ, "REPORT_PARENT": str(tmp_path)})
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    assert _digests(report) == old
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".report.")]
    assert leftovers  # the killed run's temporary folder (clean-up is the next run's job)
    code, out, exc = run_cli(*args, "--samples", "5")
    assert exc is None and code in (0, 1), out
    new = _digests(report)
    assert new["summary.md"] != old["summary.md"]
    page = (report / "summary.md").read_text()
    assert all(name in page for name in new if name.endswith(".png"))
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".report.")]
