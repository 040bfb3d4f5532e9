"""A plain (non-editable) install ships the demo crane and its data files.

Builds the package from a copy of the sources into a fresh virtual environment
(``python -m venv --system-site-packages``, ``pip install --no-deps``: the
build backend named in pyproject.toml is fetched into pip's isolated build
environment, as on a user's fresh machine, whose venv has no ``wheel``), then,
from an unrelated working
directory, imports ``schedule.demo_crane`` from the installed copy and loads
the envelope file and the design file through importlib.resources. The
outside reference is pip/setuptools' own packaging: if package data or the
sub-package mapping are missing from pyproject.toml, the import or the file
look-up fails here. The copy keeps the repository clean (no build/ or
egg-info written into the work tree).
"""

from __future__ import annotations

import shutil
import site
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

CHECK = textwrap.dedent("""
    import importlib.resources, json, sys
    import schedule, schedule.demo_crane
    from schedule.demo_crane.crane import linear_plant_at
    from schedule.oppoints import read_operating_points
    from schedule.design_file import load_design
    data = importlib.resources.files("schedule.demo_crane")
    with importlib.resources.as_file(data / "crane_envelope.h5") as p:
        pts = read_operating_points(p)
    with importlib.resources.as_file(data / "crane_design.toml") as p:
        spec = load_design(p)
    P = linear_plant_at({"rope_length": 10.0, "payload_mass": 20000.0})
    print(json.dumps({"schedule": schedule.__file__, "demo": schedule.demo_crane.__file__,
                      "points": len(pts), "envelope_exists": spec.source.operating_points.is_file(),
                      "readme": (data / "README.md").is_file(), "states": P.A.shape[0]}))
""")


def test_plain_install_ships_demo_data(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        if (ROOT / name).is_file():
            shutil.copy2(ROOT / name, src / name)
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", "*.egg-info", "*.part")
    for name in ("schedule", "operating_points"):
        shutil.copytree(ROOT / name, src / name, ignore=ignore)
    if not (src / "README.md").is_file():
        pytest.fail("README.md (named by pyproject.toml) is missing: the package cannot build")

    env_dir = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", str(env_dir)],
                   check=True, capture_output=True)
    py = env_dir / ("Scripts/python.exe" if sys.platform == "win32" else "bin/python")
    # If the test itself runs inside a virtual environment, its dependencies live there rather
    # than in the base interpreter: make them visible too (appended after the new env's own
    # site-packages, so the fresh install still wins).
    purelib = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()"
                              "['purelib'])"], check=True, capture_output=True,
                             text=True).stdout.strip()
    outer = [p for p in site.getsitepackages() if Path(p).is_dir()]
    (Path(purelib) / "zz_outer_site.pth").write_text("\n".join(outer) + "\n")

    res = subprocess.run([str(py), "-m", "pip", "install", "-q", "--no-deps", str(src)],
                         capture_output=True, text=True, cwd=tmp_path)
    assert res.returncode == 0, f"pip install failed: {res.stderr[-2000:]}"

    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    res = subprocess.run([str(py), "-I", "-c", CHECK], capture_output=True, text=True,
                         cwd=elsewhere)
    assert res.returncode == 0, f"installed package failed: {res.stderr[-2000:]}"
    import json

    info = json.loads(res.stdout.strip().splitlines()[-1])
    venv_root = str(env_dir.resolve())
    assert str(Path(info["schedule"]).resolve()).startswith(venv_root), info
    assert str(Path(info["demo"]).resolve()).startswith(venv_root), info
    assert info["points"] == 35
    assert info["envelope_exists"] and info["readme"]
    assert info["states"] == 5
