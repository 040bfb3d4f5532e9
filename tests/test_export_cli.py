"""The `schedule export` command: formats, defaults from the design text, bad input."""

from __future__ import annotations

import dataclasses
import hashlib
import json

import numpy as np
import pytest
from click.testing import CliRunner
from test_export_fixtures import make_family

from schedule.cli.main import main
from schedule.export import read_table
from schedule.store import write_family


@pytest.fixture()
def family_file(tmp_path):
    path = tmp_path / "family.h5"
    write_family(path, make_family())
    return path


def _run(*args):
    # The synthetic families here have no interpolant and placeholder plants, so the
    # table check that export runs by default is skipped; it has its own tests
    # (tests/test_table_check.py).
    extra = ["--no-table-check"] if args and args[0] == "export" else []
    return CliRunner().invoke(main, [str(a) for a in args] + extra, catch_exceptions=False)


@pytest.mark.parametrize("fmt,name", [("csv", "t.csv"), ("json", "t.json"), ("hdf5", "t.h5")])
def test_export_file_formats(tmp_path, family_file, fmt, name):
    out = tmp_path / name
    res = _run("export", family_file, "--format", fmt, "--out", out, "--sample-time", 0.02,
               "--method", "zoh")
    assert res.exit_code == 0, res.output
    tab = read_table(out)
    assert tab.method == "zoh" and tab.sample_time == 0.02
    # Reference: hashlib over the family file's bytes.
    assert tab.source_sha256 == hashlib.sha256(family_file.read_bytes()).hexdigest()
    assert tab.shape == (3, 2)


def test_export_c_and_json_summary(tmp_path, family_file):
    out = tmp_path / "c"
    res = _run("export", family_file, "-f", "c", "-o", out, "--sample-time", 0.01,
               "--prefix", "crane", "--json")
    assert res.exit_code == 0, res.output
    info = json.loads(res.output)
    assert sorted(p.name for p in out.iterdir()) == ["crane_table.c", "crane_table.h"]
    assert info["nodes"] == 6 and info["method"] == "tustin"


def test_export_denser_breakpoints(tmp_path, family_file, monkeypatch):
    from test_export_fixtures import analytic_evaluator

    from schedule.export import table as table_mod
    monkeypatch.setattr(table_mod, "_evaluate_interpolant", analytic_evaluator)
    out = tmp_path / "t.json"
    res = _run("export", family_file, "-f", "json", "-o", out,
               "--breakpoints", "rope_length=3:30:10")
    assert res.exit_code == 0, res.output
    assert read_table(out).shape == (10, 2)


def test_defaults_from_design_text(tmp_path):
    fam = make_family()
    fam = dataclasses.replace(fam, design_text=(
        "[export]\nsample_time = 0.05\nmethod = \"tustin\"\nprewarp = 2.0\n"
        "formats = [\"csv\", \"hdf5\"]\n"))
    path = tmp_path / "fam.h5"
    write_family(path, fam)
    out = tmp_path / "tables"
    res = _run("export", path, "-o", out)
    assert res.exit_code == 0, res.output
    assert sorted(p.name for p in out.iterdir()) == ["table.csv", "table.h5"]
    tab = read_table(out / "table.csv")
    assert (tab.sample_time, tab.method, tab.prewarp) == (0.05, "tustin", 2.0)


@pytest.mark.parametrize("args,msg", [
    (["-f", "xml"], "Invalid value"),
    (["-f", "json", "--sample-time", "-0.1"], "sample"),
    (["-f", "json", "--breakpoints", "rope_length=1:30:5"], "outside its bounds"),
    (["-f", "json", "--breakpoints", "speed=1,2"], "unknown variable"),
    (["-f", "c"], "needs a discrete table"),
    (["-f", "c", "--sample-time", "0.1", "--prefix", "9x"], "prefix"),
    (["-f", "json", "--method", "zoh", "--sample-time", "0.1", "--prewarp", "1"], "Tustin only"),
    (["-f", "json", "--method", "zoh", "--sample-time", "0"], "--method zoh discretizes, but "
                                                              "the sample time is 0"),
    (["-f", "csv"], "names a json file but the format is csv"),
])
def test_bad_input_exit_2_one_line_no_output(tmp_path, family_file, args, msg):
    out = tmp_path / "out.json"
    res = _run("export", family_file, "-o", out, *args)
    assert res.exit_code == 2
    assert msg in res.output
    err = [line for line in res.output.splitlines() if line.startswith("error:")]
    if "Invalid value" not in msg:
        assert len(err) == 1 and "Traceback" not in res.output
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["family.h5"]


def test_unwritable_out_and_missing_family(tmp_path, family_file):
    res = _run("export", family_file, "-f", "json", "-o", tmp_path / "no" / "such" / "t.json")
    assert res.exit_code == 2 and "does not exist" in res.output
    res = _run("export", tmp_path / "missing.h5", "-f", "json", "-o", tmp_path / "t.json")
    assert res.exit_code == 2 and "error:" in res.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["family.h5"]


def test_exported_table_reproduces_family_controllers(tmp_path, family_file):
    out = tmp_path / "t.h5"
    assert _run("export", family_file, "-f", "hdf5", "-o", out).exit_code == 0
    tab = read_table(out)
    fam = make_family()
    for k in "ABCD":
        np.testing.assert_array_equal(getattr(tab, k), fam.controller[k])


def test_cli_format_list_is_the_library_list():
    from schedule.cli.export import export_command
    from schedule.export import FORMATS
    option = next(p for p in export_command.params if p.name == "formats")
    assert tuple(option.type.choices) == FORMATS
