"""The package as it was at an earlier commit, importable side by side as ``schedule_old``.

Benchmarks compare the current code with an earlier revision in one run (same machine,
same load): ``load(rev)`` extracts ``schedule/`` at ``rev`` with ``git archive`` into a
temporary folder, renames it ``schedule_old`` (absolute ``schedule.`` imports rewritten)
and puts it on ``sys.path``.
"""

from __future__ import annotations

import io
import re
import subprocess
import sys
import tarfile
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
BEFORE = "d8336cd"  # the revision before the certified-numbers work (issue 16)
START = "27fa358"  # main before the speed work on the certified route (issue 16, speed)


def load(rev: str = BEFORE, name: str = "schedule_old"):
    """Import the package at ``rev`` as ``name`` (default ``schedule_old``) and return it
    (import its modules as ``<name>.<module>``); several revisions can be loaded side by
    side under different names."""
    data = subprocess.run(["git", "-C", str(ROOT), "archive", rev, "schedule"],
                          check=True, capture_output=True).stdout
    tmp = Path(tempfile.mkdtemp(prefix="schedule_old_"))
    with tarfile.open(fileobj=io.BytesIO(data)) as tar:
        tar.extractall(tmp, filter="data")
    pkg = tmp / name
    (tmp / "schedule").rename(pkg)
    for f in pkg.rglob("*.py"):
        text = f.read_text()
        new = re.sub(r"\bfrom schedule\.", f"from {name}.", text)
        new = re.sub(r"\bimport schedule\b", f"import {name}", new)
        if new != text:
            f.write_text(new)
    sys.path.insert(0, str(tmp))
    import importlib

    return importlib.import_module(name)
