"""docs/tutorial.md really works: its files are written and its commands run, in order.

The tutorial's convention (stated in it): a fenced block whose first line is
``# file: NAME`` or ``/* file: NAME */`` is saved as NAME; every ``$ `` line of
a ``console`` block is run in the same folder. ``schedule`` commands run
in-process through click's CliRunner, the rest (python3, cc, the compiled
program) as subprocesses.

Checks against things outside the code under test:
- the tutorial's arm model, linearized by the package, against the Jacobian
  derived by hand from its equations of motion (A[3, 2] = -(k + (m_a/2 + m_p)
  g L cos(angle)) / J_l, A[3, 0] = k / J_l, A[1, 1] = -(b_emf + c) / J_m);
- the C table compiled by the system C compiler (cc, -Werror -pedantic) runs
  and prints the same controller outputs as the Python runtime on the JSON
  table (docs/tables.md promises agreement to 1e-12 relative; the tutorial
  prints 9 decimals);
- exit codes as documented: 0 for success, `schedule check` 0 or 1, and the
  final check of the refined family 0.
"""

from __future__ import annotations

import math
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from schedule.cli.main import main

TUTORIAL = Path(__file__).resolve().parents[1] / "docs" / "tutorial.md"
FENCE = re.compile(r"^```([\w+-]*)\n(.*?)^```", re.S | re.M)
FILE_TAG = re.compile(r"^(?:#|/\*)\s*file:\s*(\S+?)(?:\s*\*/)?\s*$")


def tutorial_blocks() -> list[tuple[str, str]]:
    """(language, body) of every fenced block, in order."""
    return [(m.group(1), m.group(2)) for m in FENCE.finditer(TUTORIAL.read_text())]


def tutorial_files() -> dict[str, str]:
    files = {}
    for _, body in tutorial_blocks():
        first = body.splitlines()[0] if body else ""
        m = FILE_TAG.match(first)
        if m:
            files[m.group(1)] = body
    return files


def tutorial_commands() -> list[str]:
    return [line[2:].strip() for lang, body in tutorial_blocks() if lang == "console"
            for line in body.splitlines() if line.startswith("$ ")]


def test_tutorial_lists_files_and_the_whole_path():
    files = tutorial_files()
    assert {"arm.py", "arm.toml", "main.c", "motor.py", "motor.toml", "motor_main.c"} <= set(files)
    verbs = [shlex.split(c)[1] for c in tutorial_commands() if c.startswith("schedule ")]
    for verb in ("design", "inspect", "check", "export"):
        assert verb in verbs, f"the tutorial must run `schedule {verb}`"
    assert any(c.startswith("cc ") for c in tutorial_commands())
    assert any("--report" in c for c in tutorial_commands())
    assert any("--format c" in c for c in tutorial_commands())


def _run(command: str, folder: Path) -> tuple[int, str]:
    argv = shlex.split(command)
    if argv[0] == "schedule":
        result = CliRunner().invoke(main, argv[1:], catch_exceptions=False)
        return result.exit_code, result.output
    if argv[0] == "python3":
        argv[0] = sys.executable
    elif argv[0] == "cc":
        pass
    elif not argv[0].startswith("./"):
        raise AssertionError(f"the tutorial runs an unexpected program: {command}")
    proc = subprocess.run(argv, cwd=folder, capture_output=True, text=True, timeout=120)
    return proc.returncode, proc.stdout + proc.stderr


def _numbers(output: str) -> list[float]:
    rows = [ln.split() for ln in output.strip().splitlines()]
    return [float(r[1]) for r in rows if len(r) == 2 and r[0].isdigit()]


@pytest.mark.skipif(shutil.which("cc") is None, reason="needs a C compiler (cc)")
def test_tutorial_runs_end_to_end(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(tmp_path))  # the model module, for the hand check below
    for name, body in tutorial_files().items():
        (tmp_path / name).write_text(body)
    outputs = {}
    checks = []
    for command in tutorial_commands():
        code, out = _run(command, tmp_path)
        outputs[command] = out
        if command.startswith("schedule check"):
            # documented: 0 all checks pass, 1 some check failed (2 would be bad input)
            assert code in (0, 1), f"{command} -> exit {code}:\n{out}"
            checks.append(code)
        else:
            assert code == 0, f"{command} -> exit {code}:\n{out}"
    # the tutorial ends with a passing check of the refined family
    assert checks and checks[-1] == 0

    for name in ("motor-tables/table.csv", "motor-tables/table.json", "motor-tables/table.fmu",
                 "motor-tables/c/motor_table.c", "motor_demo"):
        assert (tmp_path / name).is_file(), f"{name} was not produced"
    motor = _numbers(outputs["./motor_demo"])
    # angle below its reference -> positive voltage, rising (sign check, as for the arm)
    assert len(motor) == 5 and 0 < motor[0] < motor[-1]
    for name in ("arm-family.h5", "arm-refined.h5", "arm-table.json",
                 "arm_c/arm_table.h", "arm_c/arm_table.c", "arm_demo",
                 "report/summary.md", "report/summary.html"):
        assert (tmp_path / name).is_file(), f"{name} was not produced"
    assert list((tmp_path / "report").glob("*.png"))
    assert not list(tmp_path.glob("*.tmp")) and not list(tmp_path.glob("*.partial.h5"))

    _check_prose(outputs)
    c_out = _numbers(outputs["./arm_demo"])
    py_out = _numbers(outputs["python3 api.py"])
    assert len(c_out) == 5 and all(math.isfinite(v) for v in c_out)
    np.testing.assert_allclose(c_out, py_out, rtol=1e-8, atol=1e-12)
    # link below its reference -> positive voltage (raise the arm), growing (sign check)
    assert c_out[0] > 0 and c_out[-1] > c_out[0]


def _output_of(outputs: dict, start: str) -> str:
    return next(out for command, out in outputs.items() if command.startswith(start))


def _check_prose(outputs: dict) -> None:
    """The tutorial's prose quotes results of its own commands; they must stay true (at
    the digits it shows), like the README's shown outputs."""
    text = TUTORIAL.read_text()
    design = _output_of(outputs, "schedule design")
    lo = float(re.search(r"gamma_opt min\s+([\d.]+)", design).group(1))
    hi = float(re.search(r"gamma_opt max\s+([\d.]+)", design).group(1))
    common = float(re.search(r"common gamma\s+([\d.]+)", design).group(1))
    assert f"about {lo:.2f} to {hi:.2f} here" in text
    assert f"(about {common:.2f})" in text
    inspect = _output_of(outputs, "schedule inspect")
    limit = [ln for ln in inspect.splitlines() if ln.startswith("limit")]
    assert len(limit) == 1 and "at all 18 points is set by the state-feedback" in limit[0]
    assert "z 'e:link_angle', 'u:voltage' / w 'd:load_torque'" in limit[0]
    assert "the state-feedback sub-problem (the X Riccati bound) at all 18" in text
    refine = _output_of(outputs, "schedule refine")
    assert "new breakpoints of payload: 0.2, 0.45" in refine
    assert "new breakpoints of angle: 0.6" in refine
    assert "added 14 point(s)" in refine and "8 x 4 breakpoints" in refine
    export = _output_of(outputs, "schedule export arm-refined.h5 --design arm.toml --format c")
    worst = float(re.search(r"worst norm/gamma ([\d.]+)", export).group(1))
    assert f"at 2 ms the worst is {100 * (worst - 1):.1f} % above gamma" in \
        " ".join(text.split())
    assert "true plant" in export and "interpolated plant" not in export
    # section 8: the floor 0.001 / 0.01 = 0.1 (noise level over the low-frequency error,
    # the tutorial's own arithmetic), set by the output-injection sub-problem
    motor = _output_of(outputs, "schedule design motor.toml")
    lo = float(re.search(r"gamma_opt min\s+([\d.]+)", motor).group(1))
    hi = float(re.search(r"gamma_opt max\s+([\d.]+)", motor).group(1))
    assert 0.1 <= lo <= hi <= 0.1 * (1 + 1e-3)
    limit = [ln for ln in _output_of(outputs, "schedule inspect motor").splitlines()
             if ln.startswith("limit")]
    assert len(limit) == 1 and "at all 7 points is set by the output-injection" in limit[0]
    assert "z 'e:angle' / w 'n:angle'" in limit[0]
    check = _output_of(outputs, "schedule check motor-family.h5")
    (rate,) = [ln for ln in check.splitlines() if "rate bound" in ln]
    assert check.startswith("PASS") and "alone" not in rate


def test_tutorial_model_matches_hand_jacobian(tmp_path, monkeypatch):
    (tmp_path / "arm.py").write_text(tutorial_files()["arm.py"])
    monkeypatch.syspath_prepend(str(tmp_path))
    sys.modules.pop("arm", None)
    import arm

    payload, angle = 1.3, 0.55
    plant = arm.linear_plant_at({"payload": payload, "angle": angle})
    k, c, L = arm.SHAFT_STIFFNESS, arm.DAMPING, arm.ARM_LENGTH
    Jm = arm.MOTOR_INERTIA
    Jl = arm.ARM_MASS * L ** 2 / 3 + payload * L ** 2
    gravity_stiffness = (arm.ARM_MASS / 2 + payload) * arm.GRAVITY * L * math.cos(angle)
    # hand-derived Jacobian of the tutorial's equations of motion
    A = np.array([[0.0, 1.0, 0.0, 0.0],
                  [-k / Jm, -(arm.BACK_EMF + c) / Jm, k / Jm, c / Jm],
                  [0.0, 0.0, 0.0, 1.0],
                  [k / Jl, c / Jl, -(k + gravity_stiffness) / Jl, -c / Jl]])
    B = np.array([[0.0, 0.0], [arm.MOTOR_GAIN / Jm, 0.0], [0.0, 0.0], [0.0, 1.0 / Jl]])
    np.testing.assert_allclose(plant.A, A, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(plant.B, B, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(plant.C, [[1, 0, 0, 0], [0, 0, 1, 0]], atol=1e-12)
    sys.modules.pop("arm", None)
