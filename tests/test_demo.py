"""The README's demo command runs the whole job and leaves every promised file.

The README promises: `schedule demo` designs the crane family at a common
gamma, fits interpolants with leave-one-out evidence, checks in-between
points against the crane model, writes the report with plots, exports CSV,
JSON and C tables, and prints a closing summary of about a dozen lines. The
checks below read the files back with general-purpose readers (h5py, json,
csv, matplotlib's PNG decoder, the system C compiler) rather than with our
own code, so a broken writer cannot pass by agreeing with itself.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
import subprocess
from pathlib import Path

import h5py
import numpy as np
import pytest
from _readme_tool import load_readme_tool
from click.testing import CliRunner

from schedule.cli.main import main

README = Path(__file__).resolve().parents[1] / "README.md"
DESIGN = Path(__file__).resolve().parents[1] / "operating_points" / "crane_design.toml"


def _design_margin() -> float:
    """The common-gamma margin the bundled design file asks for (read with tomllib)."""
    try:
        import tomllib
    except ImportError:  # Python 3.10
        import tomli as tomllib
    return float(tomllib.loads(DESIGN.read_text())["gamma"]["margin"])


@pytest.fixture(scope="module")
def demo_run(readme_demo):
    """`schedule demo` as the README runs it, in an empty folder (shared, see conftest.py)."""
    return readme_demo.out, readme_demo.stdout


def test_readme_gives_the_demo_and_test_commands():
    text = README.read_text()
    first = text.split("\n\n")[1] if text.startswith("#") else text.split("\n\n")[0]
    assert "H-infinity" in first and "operating" in first  # the job paragraph comes first
    demo, test = load_readme_tool().two_commands(text)  # what .ci/run runs, verbatim
    assert demo.endswith("&& schedule demo") and test.endswith("&& python -m pytest -q")
    assert "--two-commands" in (README.parent / ".ci" / "run").read_text()
    assert "design aids" in text and "licensed practice" in text


def test_summary_lines(demo_run):
    out, output = demo_run
    # stage announcements ("== design") go to stderr; the summary is the rest, up to the
    # closing "next, ..." block of commands
    summary = output.split("\nnext, ")[0]
    lines = [ln for ln in summary.splitlines() if ln.strip() and not ln.startswith("==")]
    assert 10 <= len(lines) <= 16
    text = "\n".join(lines)
    for key in ("worst gamma_opt", "common gamma", "worst norm / gamma", "disk margins",
                "rate bound", "family file", "report", "tables", "design aids"):
        assert key in text, key
    gamma = float(re.search(r"common gamma\s+([0-9.eE+-]+)", text).group(1))
    worst_opt = float(re.search(r"worst gamma_opt\s+([0-9.eE+-]+)", text).group(1))
    # the common-gamma policy of the bundled design: max gamma_opt * (1 + margin)
    assert gamma == pytest.approx(worst_opt * (1 + _design_margin()), rel=2e-3)


def test_family_file_holds_the_common_gamma_and_controllers(demo_run):
    out, _ = demo_run
    with h5py.File(out / "crane-family.h5", "r") as f:
        gamma = float(f.attrs["gamma"])
        opt = f["points/gamma_opt"][()]
        status = [s.decode() if isinstance(s, bytes) else s for s in f["points/status"][()]]
        assert "interpolant" in f
        A = f["controller/A"][()]
    ok = np.array(status) == "ok"
    assert ok.all() and len(ok) == 35                      # 7 rope lengths x 5 masses
    assert gamma == pytest.approx(np.max(opt[ok]) * (1 + _design_margin()), rel=1e-9)
    assert np.isfinite(A).all()


def test_report_plots_and_pages(demo_run):
    import matplotlib.image as mpimg

    out, _ = demo_run
    report = out / "report"
    pngs = sorted(report.glob("*.png"))
    assert len(pngs) >= 4
    for p in pngs:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert mpimg.imread(p).ndim == 3
    md = (report / "summary.md").read_text()
    assert "design aids" in md and "licensed practice" in md
    assert (report / "summary.html").read_text().lstrip().lower().startswith("<!doctype html")


def test_demo_folder_holds_the_tour_inputs_and_prints_the_tour(demo_run):
    """The demo copies its design and envelope files and ends with the README's tour."""
    from schedule.design_file import load_design

    out, output = demo_run
    for name in ("crane_design.toml", "crane_envelope.h5"):
        assert (out / name).read_bytes() == (DESIGN.parent / name).read_bytes()
    spec = load_design(out / "crane_design.toml")  # the tour's first command's input
    assert spec.source.operating_points == (out / "crane_envelope.h5").resolve()
    with h5py.File(out / "crane-family.h5", "r") as f:  # designed from the copy
        assert Path(f.attrs["design_base_dir"]) == out.resolve()
    commands = []  # the tour: the indented block right after "next, ..."
    for ln in output.split("\nnext, ", 1)[1].splitlines()[1:]:
        if not ln.startswith("  "):
            break
        commands.append(ln.strip())
    assert commands[0] == "cd schedule-demo"  # the README runs it in the folder it starts in
    readme = README.read_text()
    for command in commands[1:]:
        assert command.startswith("schedule ") and f"$ {command}\n" in readme, command


def test_tables_load_with_general_readers(demo_run):
    """The demo's tables carry the names `schedule export` gives a folder and the channel
    units of the design file (read with csv, json, plain text and fmpy)."""
    out, _ = demo_run
    tables = out / "tables"
    names = sorted(p.name for p in tables.iterdir())
    assert names == ["c", "table.csv", "table.fmu", "table.json"]
    with open(tables / "table.csv", newline="") as fh:
        rows = [r for r in csv.reader(ln for ln in fh if not ln.startswith("#"))]
    assert len(rows) == 1 + 35
    doc = json.loads((tables / "table.json").read_text())
    assert [(s["name"], s["unit"]) for s in doc["inputs"]] == [("trolley_position", "m"),
                                                                 ("sway_angle", "rad")]
    assert [(s["name"], s["unit"]) for s in doc["outputs"]] == [("force_command", "kN")]
    header = (tables / "c" / "sched_table.h").read_text()
    assert "y[0] = trolley_position [m]" in header and "u[0] = force_command [kN]" in header


def test_demo_writes_a_valid_fmu(demo_run):
    # Reference: fmpy's validation (an independent FMI importer) finds no problem, and
    # its reader finds the units of the design file on the unit's variables.
    fmpy_validation = pytest.importorskip("fmpy.validation")
    from fmpy import read_model_description

    out, text = demo_run
    fmu = out / "tables" / "table.fmu"
    assert fmpy_validation.validate_fmu(str(fmu)) == []
    units = {v.name: v.unit for v in read_model_description(str(fmu)).modelVariables}
    assert units["force_command"] == "kN" and units["sway_angle"] == "rad"
    assert "FMU" in text


@pytest.mark.skipif(shutil.which("cc") is None, reason="no system C compiler")
def test_exported_c_compiles(demo_run, tmp_path):
    out, _ = demo_run
    c = out / "tables" / "c"
    subprocess.run(["cc", "-std=c99", "-Wall", "-Wextra", "-Werror", "-c",
                    str(c / "sched_table.c"), "-o", str(tmp_path / "t.o")], check=True)


def test_simulation_outputs(demo_run):
    out, _ = demo_run
    sim = out / "simulation"
    assert (sim / "response.png").read_bytes()[:4] == b"\x89PNG"
    with open(sim / "simulation.csv", newline="") as fh:
        data = list(csv.reader(ln for ln in fh if not ln.startswith("#")))
    assert len(data) > 100
    summary = json.loads((out / "summary.json").read_text())
    assert summary["points_ok"] == 35


def test_demo_into_a_file_path_is_a_clear_error(tmp_path):
    target = tmp_path / "afile"
    target.write_text("x")
    res = CliRunner().invoke(main, ["demo", "--out", str(target)])
    assert res.exit_code == 2
    assert "afile" in res.output and "Traceback" not in res.output


def test_readme_python_example_runs(tmp_path, monkeypatch):
    """The README's Python block runs as written (with the bundled design file beside it).

    Outside reference for its last lines: the scalar problem's optimal gamma in
    closed form, a + sqrt(a^2 + 2) = 2 for a = 0.5 (derived in tests/test_hinf.py).
    """
    import contextlib
    import io

    text = README.read_text()
    code = text.split("```python\n", 1)[1].split("```", 1)[0]
    for name in ("crane_design.toml", "crane_envelope.h5"):
        shutil.copy(DESIGN.parent / name, tmp_path / name)
    monkeypatch.chdir(tmp_path)
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(code, "README.md", "exec"), {})
    first, second = out.getvalue().splitlines()[:2]
    assert first.split()[0] == "True"
    g, ok = second.split()
    assert float(g) == pytest.approx(0.5 + np.sqrt(0.25 + 2), rel=1e-3) and ok == "True"


def test_demo_table_passes_its_own_check(demo_run):
    """The table the demo exported passes `schedule check --table` against the crane model
    (the true plant, linearized afresh at every point), as it runs: the C source's lookup,
    the crane discretized by zero-order hold at the table's sample time."""
    out, output = demo_run
    summary = json.loads((out / "summary.json").read_text())
    assert summary["table_check"]["passed"] and summary["table_check"]["failed"] == 0
    assert "table as it runs" in output
    res = CliRunner().invoke(main, ["check", str(out / "crane-family.h5"), "--design",
                                    str(out / "crane_design.toml"), "--table",
                                    str(out / "tables" / "c"), "--no-gamma-opt", "--samples",
                                    "16", "-q"])
    assert res.exit_code == 0, res.output
    assert "TABLE PASS" in res.output
    assert "Shipped table" in (out / "report" / "summary.md").read_text()
