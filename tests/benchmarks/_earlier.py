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


def load(rev: str = BEFORE):
    """Import the package at ``rev`` as ``schedule_old`` and return it (import its modules
    as ``schedule_old.<module>``)."""
    data = subprocess.run(["git", "-C", str(ROOT), "archive", rev, "schedule"],
                          check=True, capture_output=True).stdout
    tmp = Path(tempfile.mkdtemp(prefix="schedule_old_"))
    with tarfile.open(fileobj=io.BytesIO(data)) as tar:
        tar.extractall(tmp, filter="data")
    pkg = tmp / "schedule_old"
    (tmp / "schedule").rename(pkg)
    for f in pkg.rglob("*.py"):
        text = f.read_text()
        new = re.sub(r"\bfrom schedule\.", "from schedule_old.", text)
        new = re.sub(r"\bimport schedule\b", "import schedule_old", new)
        if new != text:
            f.write_text(new)
    sys.path.insert(0, str(tmp))
    import schedule_old

    return schedule_old
