"""Tests of schedule.simulate and the `schedule simulate` command.

Reference for the sampled-data loop: the exact zero-order-hold discretization of a
linear plant (scipy.signal.cont2discrete, method "zoh") closed with the same discrete
controller by hand; the simulation integrates the plant with Runge-Kutta 4, so the
two agree to the integrator's error (O(h^4)).
"""

from __future__ import annotations

import sys
import textwrap

import numpy as np
import pytest
import scipy.signal
from click.testing import CliRunner

from schedule.cli.main import main
from schedule.errors import InputError, NumericalError
from schedule.export import TableController, build_table
from schedule.linearize import NonlinearModel
from schedule.simulate import Trajectory, crane_trajectory, read_trajectory, simulate
from schedule.store import write_family
from schedule.types import Family, SchedulingVariable

# plant: xdot = Ap x + Bp [u; w], outputs y = x (two states, a lightly damped oscillator)
AP = np.array([[0.0, 1.0], [-4.0, -0.4]])
BP = np.array([[0.0, 0.0], [1.0, 0.5]])


def _plant_model(rate_terms=()):
    return NonlinearModel(
        state_names=("pos", "vel"), input_names=("force", "gust"), output_names=("pos", "vel"),
        dynamics=lambda x, u, p: AP @ x + BP @ u, outputs=lambda x, u, p: np.array(x),
        variable_names=("speed",), rate_terms=rate_terms)


def _controller_family(n=1):
    # the same continuous controller at every point (a lead-like PD with a filter state)
    Ac = np.array([[-10.0]])[:n, :n]
    Bc = np.array([[1.0, 0.0]])[:n]
    Cc = np.array([[-30.0]])[:, :n]
    Dc = np.array([[-8.0, -3.0]])
    N = 3
    pts = np.array([[0.0], [5.0], [10.0]])
    return Family(
        variables=(SchedulingVariable("speed", "m/s", 0.0, 10.0),), points=pts,
        status=np.array(["ok"] * N), reasons=("",) * N, gamma_opt=np.ones(N), gamma=1.1,
        # placeholder plant with the controller's two measured outputs and one control
        plant={k: np.zeros((N, 2 if k in ("C2", "D21", "D22") else 1, 1)) for k in
               ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")},
        controller={"A": np.repeat(Ac[None], N, 0), "B": np.repeat(Bc[None], N, 0),
                    "C": np.repeat(Cc[None], N, 0), "D": np.repeat(Dc[None], N, 0)},
        pieces={}, measured_names=("pos", "vel"), control_names=("force",),
        breakpoints=(pts[:, 0],), grid_index=np.arange(N)[:, None],
        design_text='[source]\nnonlinear_model = "h4_testmodel:make"\n')


@pytest.mark.parametrize("n_ctrl", [0, 1])
def test_sampled_data_loop_matches_exact_zoh_discretization(n_ctrl):
    T = 0.05
    fam = _controller_family(n_ctrl)
    ctl = TableController(build_table(fam, sample_time=T, method="tustin"))
    t = np.arange(0.0, 12.0 + T / 2, T)
    ref = np.where(t >= 0.5, 1.0, 0.0)
    gust = np.full_like(t, 0.7)  # constant: the plant input is then exactly held
    traj = Trajectory(time=t, points=(t / 12.0 * 10.0)[:, None], variable_names=("speed",),
                      references={"pos": ref}, inputs={"gust": gust})
    res = simulate(_plant_model(), ctl, traj, substeps=8)
    # Reference loop by hand with the exact ZOH plant (scipy) and the table's matrices.
    Ad, Bd = scipy.signal.cont2discrete((AP, BP, np.eye(2), np.zeros((2, 2))), T,
                                        method="zoh")[:2]
    m = ctl.matrices([5.0])
    x, xc = np.zeros(2), np.zeros(n_ctrl)
    for k in range(t.size):
        y = x - np.array([ref[k], 0.0])
        u = m["C"] @ xc + m["D"] @ y
        np.testing.assert_allclose(res.states[k], x, atol=2e-7)
        np.testing.assert_allclose(res.inputs[k, 0], u[0], atol=2e-5)
        xc = m["A"] @ xc + m["B"] @ y
        x = Ad @ x + Bd @ np.array([u[0], gust[k]])
    # Analytic steady state: 0 = -4 x + u + 0.5 g with u = K0 (x - r), K0 the controller's
    # DC gain from the position error (Tustin keeps DC gains): x = (0.5 g - K0 r) / (4 - K0).
    Ac, Bc, Cc, Dc = (fam.controller[k][0] for k in "ABCD")
    K0 = (Dc - (Cc @ np.linalg.solve(Ac, Bc) if n_ctrl else 0.0))[0, 0]
    assert res.measured[-1, 0] == pytest.approx((0.5 * 0.7 - K0) / (4.0 - K0), abs=1e-4)
    np.testing.assert_array_equal(res.references[:, 0], ref)


def test_rate_terms_come_from_the_trajectory():
    # Model xdot = speed_rate: for speed(t) = 2 t the state must be 2 t (analytic).
    model = NonlinearModel(
        state_names=("s",), input_names=("force", "gust"), output_names=("pos", "vel"),
        dynamics=lambda x, u, p: np.array([p["speed_rate"]]),
        outputs=lambda x, u, p: np.array([x[0], 0.0]), variable_names=("speed",),
        rate_terms=("speed_rate",))
    fam = _controller_family(1)
    fam.controller["D"] = np.zeros_like(fam.controller["D"])
    fam.controller["C"] = np.zeros_like(fam.controller["C"])
    ctl = TableController(build_table(fam, sample_time=0.1))
    t = np.linspace(0.0, 4.0, 41)
    res = simulate(model, ctl, Trajectory(t, (2.0 * t)[:, None], ("speed",)))
    np.testing.assert_allclose(res.states[:, 0], 2.0 * res.time, atol=1e-9)


def test_divergence_is_reported_with_time():
    fam = _controller_family(0)
    fam.controller["D"] = np.repeat(np.array([[[500.0, 0.0]]]), 3, 0)  # positive feedback
    ctl = TableController(build_table(fam, sample_time=0.05))
    t = np.linspace(0.0, 30.0, 601)
    traj = Trajectory(t, np.zeros((t.size, 1)), ("speed",), references={"pos": np.ones_like(t)})
    with pytest.raises(NumericalError, match=r"diverged at t = [0-9.]+ s \(speed=0\)"):
        simulate(_plant_model(), ctl, traj)


def test_name_mismatch_and_short_trajectory():
    fam = _controller_family(1)
    fam.measured_names = ("pos", "angle")
    ctl = TableController(build_table(fam, sample_time=0.05))
    t = np.linspace(0.0, 1.0, 11)
    with pytest.raises(InputError, match="angle"):
        simulate(_plant_model(), ctl, Trajectory(t, np.zeros((11, 1)), ("speed",)))
    ctl = TableController(build_table(_controller_family(0), sample_time=0.5))
    with pytest.raises(InputError, match="shorter than one sample"):
        simulate(_plant_model(), ctl, Trajectory(t[:2], np.zeros((2, 1)), ("speed",)))


def test_crane_trajectory_shape():
    # The documented scenario: 20 m travel, rope 25 m -> 8 m, a 10 m/s gust after the move.
    tr = crane_trajectory(sample_time=0.02)
    assert tr.references["trolley_position"][0] == 0.0
    assert tr.references["trolley_position"][-1] == pytest.approx(20.0)
    assert tr.points[0, 0] == 25.0 and tr.points[-1, 0] == pytest.approx(8.0)
    assert tr.inputs["wind_speed"].max() == 10.0


@pytest.mark.parametrize("text,msg", [
    ("time,speed,bogus\n0,1,2\n1,1,2\n", "unknown column 'bogus'"),
    ("time,ref:pos\n0,1\n1,1\n", "missing column 'speed'"),
    ("time,speed\n0,1\n0,1\n", "increase strictly"),
    ("time,speed\n0,1\n1,x\n", "non-numeric"),
])
def test_trajectory_csv_errors(tmp_path, text, msg):
    f = tmp_path / "traj.csv"
    f.write_text(text)
    with pytest.raises(InputError, match=msg):
        read_trajectory(f, ("speed",), ("pos", "vel"), ("gust",))


MODULE = textwrap.dedent("""
    import numpy as np
    from schedule.linearize import NonlinearModel
    AP = np.array([[0.0, 1.0], [-4.0, -0.4]])
    BP = np.array([[0.0, 0.0], [1.0, 0.5]])
    def make():
        return NonlinearModel(
            state_names=("pos", "vel"), input_names=("force", "gust"),
            output_names=("pos", "vel"), dynamics=lambda x, u, p: AP @ x + BP @ u,
            outputs=lambda x, u, p: np.array(x), variable_names=("speed",))
""")


def test_simulate_command(tmp_path, monkeypatch):
    (tmp_path / "h4_testmodel.py").write_text(MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.delitem(sys.modules, "h4_testmodel", raising=False)
    fam_path = tmp_path / "fam.h5"
    write_family(fam_path, _controller_family(1))
    traj = tmp_path / "traj.csv"
    traj.write_text("time,speed,ref:pos,gust\n0,0,0,0\n0.5,2,1,0\n4,10,1,0.5\n")
    out = tmp_path / "sim"
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out),
                                    "--trajectory", str(traj), "--sample-time", "0.05",
                                    "--model", "h4_testmodel:make"])
    assert res.exit_code == 0, res.output
    names = sorted(p.name for p in out.iterdir())
    assert names == ["response.png", "schedule.png", "simulation.csv", "summary.json"]
    assert (out / "response.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    header = (out / "simulation.csv").read_text().splitlines()[0].split(",")
    assert header[:3] == ["time", "speed", "ref:pos"]
    # bad trajectory: exit 2, one-line error, nothing written
    bad = tmp_path / "bad.csv"
    bad.write_text("time,speed,wind\n0,0,0\n1,1,1\n")
    out2 = tmp_path / "sim2"
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out2),
                                    "--trajectory", str(bad), "--model", "h4_testmodel:make"])
    assert res.exit_code == 2 and "unknown column 'wind'" in res.output
    assert not out2.exists()
    # an exported table brings its own sample time: --sample-time would be ignored
    table = tmp_path / "t.json"
    assert CliRunner().invoke(main, ["export", str(fam_path), "-f", "json", "-o", str(table),
                                     "--sample-time", "0.05", "--no-table-check"]).exit_code == 0
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out2), "--table",
                                    str(table), "--sample-time", "0.1",
                                    "--trajectory", str(traj)])
    assert res.exit_code == 2 and "--sample-time would be ignored" in res.output
    assert not out2.exists()
    # a trajectory leaving the envelope (speed bounds 0..10 m/s) is refused, naming it; it is
    # linear between its rows, so its extremes are rows: the first outside is t = 2 s
    far = tmp_path / "far.csv"
    far.write_text("time,speed\n0,9\n1,10\n2,12\n3,12\n")
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out2),
                                    "--trajectory", str(far), "--sample-time", "0.05",
                                    "--model", "h4_testmodel:make"])
    assert res.exit_code == 2 and "the trajectory leaves the envelope: speed =" in res.output
    assert "speed = 12 m/s at t = 2 s (2 of 4 samples outside [0, 10] m/s)" in res.output
    assert not out2.exists()
    # no model named anywhere
    fam = _controller_family(1)
    fam.design_text = ""
    write_family(fam_path, fam)
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out2)])
    assert res.exit_code == 2 and "nonlinear_model" in res.output


def test_simulate_step_comparison_with_limits(tmp_path, monkeypatch):
    # The [[limits]] of the design text reach the simulated controller: the force never
    # exceeds them (the limiter is the drive's), and --step runs the comparison runs.
    import json
    (tmp_path / "h4_testmodel.py").write_text(MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.delitem(sys.modules, "h4_testmodel", raising=False)
    fam = _controller_family(1)
    fam.design_text += '[[limits]]\ncontrol = "force"\nlower = -2.0\nupper = 2.0\n'
    fam_path = tmp_path / "fam.h5"
    write_family(fam_path, fam)
    traj = tmp_path / "traj.csv"
    traj.write_text("time,speed,ref:pos,gust\n0,0,0,0\n0.5,2,1,0\n4,10,1,0.5\n")
    out = tmp_path / "sim"
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(out),
                                    "--trajectory", str(traj), "--sample-time", "0.05",
                                    "--step", "pos=3", "--step-at", "speed=5",
                                    "--model", "h4_testmodel:make"])
    assert res.exit_code == 0, res.output
    assert {"step.png", "step.csv"} <= {p.name for p in out.iterdir()}
    summary = json.loads((out / "summary.json").read_text())
    assert summary["max_abs:force"] <= 2.0
    assert summary["limits"] == [{"name": "force", "lower": -2.0, "upper": 2.0, "rate": None}]
    assert set(summary["step"]["overshoot_percent"]) == {"anti_windup", "plain"}
    assert summary["step"]["peak_command"]["plain"]["force"] <= 2.0
    # a step needs limits to compare with and without anti-windup
    write_family(fam_path, _controller_family(1))
    res = CliRunner().invoke(main, ["simulate", str(fam_path), "--out", str(tmp_path / "s2"),
                                    "--trajectory", str(traj), "--step", "pos=3",
                                    "--model", "h4_testmodel:make"])
    assert res.exit_code == 2 and "no actuator limits" in res.output


def test_trajectory_inside_the_bounds_but_beyond_the_table_is_a_warning():
    """The table clamps beyond its breakpoints: inside the envelope that is said, not
    silent; outside the envelope (the bounds) the simulation is refused."""
    from types import SimpleNamespace

    from schedule.simulate import check_trajectory

    table = SimpleNamespace(variables=(SchedulingVariable("speed", "m/s", 0.0, 10.0),),
                            breakpoints=(np.array([2.0, 5.0, 8.0]),))
    t = np.array([0.0, 1.0, 2.0, 3.0])
    notes = check_trajectory(Trajectory(t, np.array([[3.0], [5.0], [9.0], [9.5]]),
                                        ("speed",)), table)
    assert len(notes) == 1
    assert notes[0].startswith("speed = 9 m/s at t = 2 s is outside the table's breakpoints "
                               "[2, 8] m/s (2 samples)")
    assert check_trajectory(Trajectory(t, np.full((4, 1), 4.0), ("speed",)), table) == []
    with pytest.raises(InputError, match=r"speed = -1 m/s at t = 3 s \(1 of 4 samples"):
        check_trajectory(Trajectory(t, np.array([[3.0], [5.0], [0.0], [-1.0]]), ("speed",)),
                         table)
