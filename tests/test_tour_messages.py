"""Messages a new user met on a tour of the command line (issue 13 item 11).

One small design (the first-order lag of tests/_files.py, one scheduling variable) with
a margin requirement no controller of this problem meets, so that the design points
themselves fail:

- `check` says the design points fail with their own controller and that new points
  cannot fix that (before, it only proposed `schedule refine`);
- a one-variable rate bound is one number (alone and jointly are the same thing);
- a unit with a slash gets parentheses before "/s" (SI Brochure, 9th ed. 2019, sec.
  5.4.6: no more than one solidus without parentheses; from memory);
- "(common practice)" is said only of the default margins (6 dB / 45 deg);
- `refine` that cannot make the checks pass says why it still wrote a family.
"""

from __future__ import annotations

import json

import pytest
from _files import LAG_DESIGN, lag_design, run_cli

# the disk gain margin of this loop is about 18-20 dB at every point (measured on the
# tour); 40 dB is out of reach, so every point, the design points too, fails it
HARD = LAG_DESIGN.replace("gain_margin_db = 0.0", "gain_margin_db = 40.0")


@pytest.fixture(scope="module")
def hard_family(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hard")
    design = lag_design(folder, HARD)
    code, out, exc = run_cli("design", design, "--out", folder / "family.h5", "-q")
    assert exc is None and code == 0, out
    return folder, design, folder / "family.h5"


def test_check_says_design_points_fail_themselves(hard_family):
    folder, design, fam = hard_family
    code, out, exc = run_cli("check", fam, "--design", design, "--json")
    assert exc is None and code == 1
    res = json.loads(out)
    grid = [p for p in res["points"] if p["kind"] == "grid"]
    assert grid and not any(p["passed"] for p in grid)  # the premise of this test
    code, out, exc = run_cli("check", fam, "--design", design)
    assert exc is None and code == 1
    assert f"{len(grid)} design point(s) fail with their own controller" in out
    assert "new points cannot fix that" in out
    assert "`schedule refine` adds them" not in out
    # one variable: a single rate bound, its unit 1/s per second in parentheses
    (line,) = [ln for ln in out.splitlines() if "rate bound" in ln]
    assert "alone" not in line and "all variables moving" not in line
    assert line.rstrip().endswith("(1/s)/s (sufficient, conservative)")
    # margins of the design, not the defaults: not called common practice
    first = out.splitlines()[0]
    assert ">= 40 dB / 0 deg" in first and "common practice" not in first


def test_refine_that_cannot_pass_says_why_it_wrote(hard_family, tmp_path):
    folder, design, fam = hard_family
    out_file = tmp_path / "refined.h5"
    code, out, exc = run_cli("refine", fam, "--design", design, "--out", out_file,
                             "--budget", "0")
    assert exc is None and code == 1
    assert out_file.is_file()
    last = out.strip().splitlines()[-1]
    assert last.startswith("FAIL: checks still fail (point budget of 0 spent)")
    assert f"no worse than its input, is written to {out_file}" in last


def test_default_margins_are_called_common_practice(tmp_path):
    design = lag_design(tmp_path, LAG_DESIGN.replace("gain_margin_db = 0.0\n", "").replace(
        "phase_margin_deg = 0.0\n", ""))
    code, out, exc = run_cli("design", design, "--out", tmp_path / "f.h5", "-q")
    assert exc is None and code == 0, out
    code, out, exc = run_cli("check", tmp_path / "f.h5", "--design", design, "-q")
    assert exc is None and code in (0, 1), out
    assert ">= 6 dB / 45 deg (common practice)" in out.splitlines()[0]


TANK_MODEL = '''
import numpy as np
from schedule.linearize import NonlinearModel, trim_and_linearize

AREA, ORIFICE, GRAVITY = 0.5, 0.004, 9.81


def dynamics(x, u, point):
    return np.array([(u[0] + u[1] - ORIFICE * np.sqrt(2 * GRAVITY * x[0])) / AREA])


def outputs(x, u, point):
    return np.array([x[0]])


TANK = NonlinearModel(state_names=("level",), input_names=("pump", "inflow"),
                      output_names=("level",), dynamics=dynamics, outputs=outputs,
                      variable_names=("setpoint",), input_scales=(0.01, 0.01),
                      complex_safe=True, description="one tank")


def plant_at(point):
    return trim_and_linearize(TANK, point, x0=[point["setpoint"]], u0=[0.01, 0.0],
                              free_inputs=["pump"], steady_states=["level"], method="complex")
'''

TANK_DESIGN = '''title = "one tank"
[[variable]]
name = "setpoint"
unit = "m"
lower = 0.4
upper = 1.0

[source]
model_file = "tank.py"
function = "plant_at"
nonlinear_model_file = "tank.py"
nonlinear_function = "TANK"

[grid]
setpoint = [0.4, 0.7, 1.0]

[channels]
controls = ["pump"]
disturbances = ["inflow"]
measured = ["level"]
performance = ["level"]

[[weights.performance]]
output = "level"
peak_sensitivity = 2.0
bandwidth = 0.02
low_frequency_error = 0.05

[[weights.effort]]
input = "pump"
limit = 0.02

[[weights.noise]]
output = "level"
level = 0.002

[[weights.disturbance]]
input = "inflow"
level = 0.003

[check]
samples = 4

[export]
sample_time = 0.5
'''


def test_simulate_starts_where_it_is_told(tmp_path):
    # A tank is not operated at its origin (empty, pump off), which is an equilibrium of
    # the model: started there the simulation shows nothing at all. Now it says so, and
    # --initial-state / --trim-input start it at the operating point. Reference: the
    # tank's equilibrium by hand, pump = ORIFICE sqrt(2 g h) (Torricelli's law), at which
    # the model stays put: the error stays zero while the level is the set point.
    (tmp_path / "tank.py").write_text(TANK_MODEL)
    (tmp_path / "tank.toml").write_text(TANK_DESIGN)
    fam = tmp_path / "tank.h5"
    code, out, exc = run_cli("design", tmp_path / "tank.toml", "--out", fam, "-q")
    assert exc is None and code == 0, out
    h = 0.7
    bare = tmp_path / "bare.csv"  # no reference: the level is to stay where it starts
    bare.write_text("time,setpoint\n" + "".join(f"{t},{h}\n" for t in range(0, 61)))
    code, out, exc = run_cli("simulate", fam, "--design", tmp_path / "tank.toml",
                             "--trajectory", bare, "--no-step", "--out", tmp_path / "s0")
    assert exc is None and code == 0, out
    assert "warning: nothing moved" in out and "--initial-state" in out
    traj = tmp_path / "traj.csv"
    traj.write_text("time,setpoint,ref:level\n" + "".join(f"{t},{h},{h}\n" for t in range(0, 61)))
    common = ("simulate", fam, "--design", tmp_path / "tank.toml", "--trajectory", traj,
              "--no-step")
    pump = 0.004 * (2 * 9.81 * h) ** 0.5
    code, out, exc = run_cli(*common, "--out", tmp_path / "s1", "--json",
                             "--initial-state", f"level={h}", "--trim-input", f"pump={pump!r}")
    assert exc is None and code == 0, out
    summary = json.loads(out[out.index("{"):])
    assert summary["max_abs_error:level"] <= 1e-9 * h
    assert summary["max_abs:pump"] == pytest.approx(pump, rel=1e-9)
    assert "nothing moved" not in out
    code, out, exc = run_cli(*common, "--out", tmp_path / "s2", "--initial-state", "height=1")
    assert exc is None and code == 2
    assert "--initial-state 'height=1': write name=value,... with names from level" in out
