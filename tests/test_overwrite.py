"""No output may overwrite an input: every verb refuses, with one line and exit code 2.

Each case names an output that is one of the command's inputs, by the same
name, through a symbolic link or through a hard link (same inode), and checks
that the input survives byte for byte (SHA-256 before and after) and that
nothing else was written. The reference for "same file" is the operating
system: ``os.stat`` (device and inode) of the two paths.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pytest
from _files import lag_design, lag_family, run_cli

from schedule.errors import InputError
from schedule.paths import refuse_output_over_input


def _sha(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lag")
    return lag_family(folder), folder / "design.toml"


def _alias(tmp_path: Path, target: Path, how: str) -> Path:
    """``target`` itself, a symbolic link to it or a hard link to it, beside it."""
    if how == "same":
        return target
    link = tmp_path / f"alias-{how}{target.suffix}"
    if how == "symlink":
        link.symlink_to(target)
    else:
        os.link(target, link)
    assert os.stat(link).st_ino == os.stat(target).st_ino  # the OS says: one file
    return link


def _refused(args, inputs, tmp_path):
    before = {p: _sha(p) for p in inputs}
    listing = sorted(p.name for p in tmp_path.iterdir())
    code, out, exc = run_cli(*args)
    assert exc is None and code == 2, out
    assert out.startswith("error: ") and len(out.strip().splitlines()) == 1, out
    assert "input" in out
    assert {p: _sha(p) for p in inputs} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == listing


@pytest.mark.parametrize("how", ["same", "symlink", "hardlink"])
def test_design_and_export_refuse_to_replace_their_input(made, tmp_path, how):
    family_src, _design = made
    design = lag_design(tmp_path)
    fam = tmp_path / "family.h5"
    fam.write_bytes(Path(family_src).read_bytes())
    _refused(["design", design, "--out", _alias(tmp_path, design, how)],
             [design], tmp_path)
    _refused(["design", design, "--out", _alias(tmp_path, tmp_path / "lag.py", how)],
             [tmp_path / "lag.py"], tmp_path)  # the model file the design names
    _refused(["export", fam, "--format", "json", "--out", _alias(tmp_path, fam, how)],
             [fam], tmp_path)


@pytest.mark.parametrize("how", ["same", "hardlink"])
def test_refine_refuses_to_replace_its_family_or_design(made, tmp_path, how):
    family_src, design_src = made
    fam = tmp_path / "family.h5"
    fam.write_bytes(Path(family_src).read_bytes())
    design = lag_design(tmp_path)
    _refused(["refine", fam, "--design", design, "--out", _alias(tmp_path, fam, how)],
             [fam, design], tmp_path)
    _refused(["refine", fam, "--design", design, "--out", _alias(tmp_path, design, how)],
             [fam, design], tmp_path)


def test_folder_outputs_refuse_to_swallow_an_input(made, tmp_path):
    """check --report, simulate --out and export --format c replace a folder whole."""
    family_src, _design = made
    folder = tmp_path / "out"
    folder.mkdir()
    fam = folder / "family.h5"
    fam.write_bytes(Path(family_src).read_bytes())
    points = folder / "summary.md"  # a name the report would write
    points.write_text("pole\n1.2\n")
    _refused(["check", fam, "--report", folder], [fam], tmp_path)
    outside = tmp_path / "family.h5"
    outside.write_bytes(fam.read_bytes())
    _refused(["check", outside, "--points", points, "--report", folder], [outside, points],
             tmp_path)
    _refused(["simulate", outside, "--model", "x:y", "--trajectory", points, "--out", folder],
             [outside, points], tmp_path)
    link_dir = tmp_path / "linked"
    link_dir.symlink_to(folder)
    _refused(["export", fam, "--format", "c", "--sample-time", "0.1", "--out", link_dir],
             [fam], tmp_path)


def test_demo_refuses_an_output_folder_holding_its_bundled_inputs(tmp_path):
    from schedule.demo import REPORT_DIR, bundled_design_path, run_demo

    out = tmp_path / "demo"
    out.mkdir()
    (out / REPORT_DIR).symlink_to(bundled_design_path().parent)
    before = _sha(bundled_design_path())
    with pytest.raises(InputError, match="holds the input"):
        run_demo(out)
    assert _sha(bundled_design_path()) == before


def test_helper_compares_files_by_identity(tmp_path):
    a = tmp_path / "a.txt"
    a.write_text("x")
    b = tmp_path / "b.txt"
    b.write_text("x")  # equal content, another file: allowed
    refuse_output_over_input([b], [a])
    refuse_output_over_input([tmp_path / "new.txt"], [a, None])
    with pytest.raises(InputError, match="is an input"):
        refuse_output_over_input([tmp_path / "sub" / ".." / "a.txt"], [a])
