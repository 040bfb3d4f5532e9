"""Tests of the demo crane (operating_points/crane.py, installed as schedule.demo_crane).

References used (each check names its own):
- standard cart-pendulum result: a pendulum of length L and mass m hanging from a freely
  rolling cart of mass M oscillates (small angles) at omega^2 = g (M + m) / (M L); for
  M -> infinity this is the textbook simple-pendulum frequency sqrt(g / L);
- exact period of the simple pendulum at amplitude theta0: T = 4 sqrt(L/g) K(sin^2(theta0/2)),
  K the complete elliptic integral of the first kind (scipy.special.ellipk, parameter m = k^2);
- conservation of energy (conservative system) and of horizontal momentum (x is a cyclic
  coordinate: no horizontal external force without friction, wind and motor);
- angular momentum about the rope pivot for a fixed pivot and hoisting rope:
  d(m L^2 omega)/dt = -m g L sin(theta)  (Newton's second law in rotation);
- the drag equation F = 1/2 rho C_d A v^2 (any fluid-mechanics handbook) and
  Newton's second law for the payload.
The closed forms are written out in the tests; no value is copied from the code's output.
"""

from __future__ import annotations

import importlib.resources
from dataclasses import replace

import numpy as np
import pytest
import scipy.integrate
import scipy.special
from schedule.demo_crane import crane
from schedule.demo_crane.crane import CraneParameters, crane_model, linear_plant_at, trim_at_rest

from schedule.errors import InputError
from schedule.linearize import linearize, trim

G = 9.81
CORNERS = [(3.0, 2000.0), (3.0, 40000.0), (30.0, 2000.0), (30.0, 40000.0), (12.5, 17000.0)]


def _pt(L, mp):
    return {"rope_length": L, "payload_mass": mp}


@pytest.mark.parametrize("L,mp", CORNERS)
def test_coupled_pendulum_frequency_free_trolley(L, mp):
    # Standard cart-pendulum result: omega^2 = g (M + m) / (M L) for a frictionless trolley;
    # the other eigenvalues are 0, 0 (free trolley) and -1/tau (motor lag).
    p = CraneParameters().frictionless()
    model = crane_model(p)
    x0, u0 = trim_at_rest(_pt(L, mp), wind=0.0, params=p)
    P = linearize(model, x0, u0, _pt(L, mp), method="complex")
    M, m = p.trolley_mass, mp + p.spreader_mass
    w = np.sqrt(G * (M + m) / (M * L))
    lam = np.sort_complex(np.linalg.eigvals(P.A))
    want = np.sort_complex(np.array([0, 0, 1j * w, -1j * w, -1 / p.motor_time_constant]))
    np.testing.assert_allclose(lam, want, atol=1e-9 * w)


def test_heavy_trolley_gives_simple_pendulum_frequency():
    # Textbook simple pendulum: omega = sqrt(g / L) when the pivot cannot move (M -> inf).
    p = replace(CraneParameters().frictionless(), trolley_mass=1e13)
    for L in (3.0, 30.0):
        x0, u0 = trim_at_rest(_pt(L, 20000.0), wind=0.0, params=p)
        P = linearize(crane_model(p), x0, u0, _pt(L, 20000.0), method="complex")
        w = np.abs(np.linalg.eigvals(P.A[2:4, 2:4]).imag).max()
        assert w == pytest.approx(np.sqrt(G / L), rel=1e-8)


def test_linear_entries_match_hand_derivation():
    # Small-angle cart-pendulum, derived by hand from the module's equations at theta = 0:
    # vdot = (F + F_d + m g theta - F_f'(0) v) / M,
    # omdot = -(M + m) g theta / (M L) - (F + F_d - F_f'(0) v) / (M L),
    # F_f'(0) = F_c / v_s + b (derivative of F_c tanh(v/v_s) + b v), F in kN (x 1000).
    p = CraneParameters()
    L, mp = 10.0, 15000.0
    M, m = p.trolley_mass, mp + p.spreader_mass
    x0, u0 = trim_at_rest(_pt(L, mp), wind=0.0, params=p)
    P = linearize(crane_model(p), x0, u0, _pt(L, mp), method="complex")
    c = p.coulomb_friction / p.friction_speed + p.viscous_friction
    A = np.zeros((5, 5))
    A[0, 1] = 1.0
    A[1, 1], A[1, 2], A[1, 4] = -c / M, m * G / M, 1000.0 / M
    A[2, 3] = 1.0
    A[3, 1], A[3, 2], A[3, 4] = c / (M * L), -(M + m) * G / (M * L), -1000.0 / (M * L)
    A[4, 4] = -1.0 / p.motor_time_constant
    np.testing.assert_allclose(P.A, A, rtol=1e-12, atol=1e-12)
    assert P.B[4, 0] == pytest.approx(1.0 / p.motor_time_constant, rel=1e-12)
    # an external trolley force F_d [kN] acts like the drive force, without the lag
    np.testing.assert_allclose(P.B[:, 2], [0, 1000.0 / M, 0, -1000.0 / (M * L), 0], rtol=1e-12,
                               atol=1e-15)
    np.testing.assert_array_equal(P.C, np.eye(5)[[0, 2, 4]])


@pytest.mark.parametrize("L,mp", CORNERS)
def test_trim_under_design_wind(L, mp):
    # Drag equation F_w = 1/2 rho C_d A v^2 with rho = 1.225 kg/m^3, C_d = 1.2, A = 31.6 m^2,
    # v = 8 m/s; static balance of the hanging mass: tan(theta) = F_w / (m g); the drive
    # holds the trolley with F = -F_w (in kN).
    p = CraneParameters()
    Fw = 0.5 * 1.225 * 1.2 * 31.6 * 8.0**2
    m = mp + p.spreader_mass
    model = crane_model()
    res = trim(model, _pt(L, mp), x0=np.zeros(5), u0=[0.0, 8.0, 0.0],
               free_states=["sway_angle", "motor_force"], free_inputs=["force_command"],
               tol=1e-12)
    assert np.tan(res.x[2]) == pytest.approx(Fw / (m * G), rel=1e-9)
    assert res.x[4] == pytest.approx(-Fw / 1000.0, rel=1e-9)
    assert res.u[0] == pytest.approx(-Fw / 1000.0, rel=1e-9)
    # the residual reported and an independent evaluation of the dynamics
    assert res.residual <= 1e-12
    assert np.max(np.abs(model.dynamics(res.x, res.u, _pt(L, mp)))) < 1e-11
    P = linear_plant_at(_pt(L, mp))
    assert P.state_names == crane.STATE_NAMES and P.input_names == crane.INPUT_NAMES


def test_wind_pushes_payload_by_newton():
    # Payload at rest hanging straight down, wind v: the only horizontal force on the payload
    # is the drag, so its acceleration xddot + L thetaddot = F_w / m (Newton), trolley
    # acceleration 0 (the rope is vertical and carries no horizontal force yet).
    p = CraneParameters()
    L, mp, v = 20.0, 25000.0, 12.0
    f = crane_model(p).dynamics(np.zeros(5), np.array([0.0, v, 0.0]), _pt(L, mp))
    Fw = 0.5 * p.air_density * p.drag_coefficient * p.payload_area * v * v
    assert f[1] == pytest.approx(0.0, abs=1e-12)
    assert f[1] + L * f[3] == pytest.approx(Fw / (mp + p.spreader_mass), rel=1e-12)


@pytest.mark.parametrize("L,mp", CORNERS[:4])
def test_complex_step_agrees_with_independent_differences(L, mp):
    # Independent check: plain central differences written here, relative step 1e-4 (well
    # away from the module's default), with the truncation error removed by Richardson
    # extrapolation (4 D(h/2) - D(h)) / 3; compared with the complex-step plant.
    P = linear_plant_at(_pt(L, mp))
    model = crane_model()
    x0, u0 = trim_at_rest(_pt(L, mp))
    z0 = np.concatenate([x0, u0])
    s = np.array([1.0, 1.0, 0.1, 0.1, 10.0, 10.0, 1.0, 10.0])

    def F(z):
        return model.dynamics(z[:5], z[5:], _pt(L, mp))

    def D(h):
        J = np.empty((5, 8))
        for j in range(8):
            e = np.zeros(8)
            e[j] = h * s[j]
            J[:, j] = (F(z0 + e) - F(z0 - e)) / (2 * e[j])
        return J

    J = (4 * D(0.5e-4) - D(1e-4)) / 3
    got = np.hstack([P.A, P.B])
    scale = np.max(np.abs(got * s), axis=1, keepdims=True)
    assert np.all(np.abs((J - got) * s) <= 1e-8 * scale)
    # and the module's own central method (with its step check) agrees with the complex step
    Pc = linearize(model, x0, u0, _pt(L, mp), method="central")
    assert np.all(np.abs((np.hstack([Pc.A, Pc.B]) - got) * s) <= 1e-7 * scale)


def _energy(z, L, m, M):
    # E = T + V for trolley (M) and point payload (m) on a rope of fixed length L
    _, v, th, om = z[:4]
    vx = v + L * om * np.cos(th)
    vy = L * om * np.sin(th)
    return 0.5 * M * v**2 + 0.5 * m * (vx**2 + vy**2) - m * G * L * np.cos(th)


def test_energy_conserved_frictionless_windless_swing():
    # Conservation of energy: no friction, no wind, no motor force -> E constant,
    # here over a 1 rad swing (far outside the small-angle range).
    p = CraneParameters().frictionless()
    L, mp = 12.0, 30000.0
    f = crane_model(p).dynamics
    z0 = np.array([0.0, 0.3, 1.0, -0.1, 0.0])
    sol = scipy.integrate.solve_ivp(lambda t, z: f(z, np.zeros(3), _pt(L, mp)), (0, 20), z0,
                                    method="DOP853", rtol=1e-12, atol=1e-12, dense_output=True)
    assert sol.success
    m = mp + p.spreader_mass
    E = np.array([_energy(sol.sol(t), L, m, p.trolley_mass) for t in np.linspace(0, 20, 81)])
    assert np.max(np.abs(E - E[0])) <= 1e-9 * m * G * L


def test_horizontal_momentum_conserved_while_hoisting():
    # x is cyclic: without friction, wind and motor the horizontal momentum
    # (M + m) v + m (Ldot sin(th) + L omega cos(th)) is constant, also with L(t) moving
    # (checks the Lddot and Coriolis 2 Ldot omega terms of the hoisting equations).
    p = CraneParameters().frictionless()
    mp = 20000.0
    M, m = p.trolley_mass, mp + p.spreader_mass
    f = crane_model(p).dynamics

    def rope(t):
        return {"rope_length": 15.0 + 5.0 * np.sin(0.5 * t), "payload_mass": mp,
                "rope_length_rate": 2.5 * np.cos(0.5 * t),
                "rope_length_accel": -1.25 * np.sin(0.5 * t)}

    def momentum(t, z):
        r = rope(t)
        _, v, th, om = z[:4]
        L, Ld = r["rope_length"], r["rope_length_rate"]
        return (M + m) * v + m * (Ld * np.sin(th) + L * om * np.cos(th))

    z0 = np.array([0.0, 0.5, 0.3, 0.05, 0.0])
    sol = scipy.integrate.solve_ivp(lambda t, z: f(z, np.zeros(3), rope(t)), (0, 25), z0,
                                    method="DOP853", rtol=1e-12, atol=1e-12, dense_output=True)
    assert sol.success
    P = np.array([momentum(t, sol.sol(t)) for t in np.linspace(0, 25, 101)])
    assert np.max(np.abs(P - P[0])) <= 1e-9 * (M + m) * 1.0


def test_hoisting_angular_momentum_with_fixed_pivot():
    # Fixed pivot (trolley mass -> infinity): d(L^2 omega)/dt = -g L sin(theta), i.e.
    # omdot = -(g sin(theta) + 2 Ldot omega) / L (Newton's second law in rotation).
    p = replace(CraneParameters().frictionless(), trolley_mass=1e15)
    f = crane_model(p).dynamics
    rng = np.random.default_rng(1)
    for _ in range(20):
        th, om = rng.uniform(-1.2, 1.2), rng.uniform(-1, 1)
        L, Ld, Ldd = rng.uniform(3, 30), rng.uniform(-2, 2), rng.uniform(-1, 1)
        pt = {"rope_length": L, "payload_mass": 10000.0, "rope_length_rate": Ld,
              "rope_length_accel": Ldd}
        d = f(np.array([0.0, 0.0, th, om, 0.0]), np.zeros(3), pt)
        assert d[3] == pytest.approx(-(G * np.sin(th) + 2 * Ld * om) / L, rel=1e-9, abs=1e-12)


def test_large_angle_period_matches_elliptic_integral():
    # Exact period of the simple pendulum: T = 4 sqrt(L/g) K(m), m = sin^2(theta0/2).
    p = replace(CraneParameters().frictionless(), trolley_mass=1e15)
    L, th0 = 9.0, 1.2
    f = crane_model(p).dynamics

    def upward(t, z):
        return z[2]

    upward.direction = 1.0
    sol = scipy.integrate.solve_ivp(lambda t, z: f(z, np.zeros(3), _pt(L, 5000.0)), (0, 40),
                                    [0.0, 0.0, th0, 0.0, 0.0], method="DOP853", rtol=1e-12,
                                    atol=1e-12, events=upward)
    crossings = sol.t_events[0]
    assert len(crossings) >= 3
    period = np.diff(crossings).mean()
    T = 4 * np.sqrt(L / G) * scipy.special.ellipk(np.sin(th0 / 2) ** 2)
    assert period == pytest.approx(T, rel=1e-8)


def test_bad_points_are_one_line_input_errors():
    for bad, msg in (({"payload_mass": 1000.0}, "rope_length"),
                     ({"rope_length": -1.0, "payload_mass": 1000.0}, "positive"),
                     ({"rope_length": 5.0, "payload_mass": float("nan")}, "payload_mass")):
        with pytest.raises(InputError, match=msg) as info:
            linear_plant_at(bad)
        assert "\n" not in str(info.value)


def test_envelope_file_regenerates_bit_for_bit(tmp_path):
    from schedule.demo_crane import generate

    shipped = importlib.resources.files("schedule.demo_crane") / "crane_envelope.h5"
    out = generate.generate(tmp_path / "crane_envelope.h5")
    assert out.read_bytes() == shipped.read_bytes(), (
        "crane_envelope.h5 is stale: run python -m schedule.demo_crane.generate")


def test_envelope_file_content():
    # 7 x 5 grid, the documented breakpoints, and every stored plant equal to a fresh
    # linearization to the 12 significant digits the generator keeps.
    from schedule.oppoints import read_operating_points

    with importlib.resources.as_file(
            importlib.resources.files("schedule.demo_crane") / "crane_envelope.h5") as path:
        pts = read_operating_points(path)
    assert len(pts) == 35
    np.testing.assert_array_equal(pts.breakpoints[0], [3, 4.4, 6.5, 9.5, 14, 20.5, 30])
    np.testing.assert_array_equal(pts.breakpoints[1], [2000, 10000, 20000, 30000, 40000])
    assert [v.name for v in pts.variables] == ["rope_length", "payload_mass"]
    for k in (0, 17, 34):
        P = linear_plant_at(dict(zip(("rope_length", "payload_mass"), pts.values[k])))
        for key in "ABCD":
            np.testing.assert_allclose(getattr(pts, key)[k], getattr(P, key), rtol=1e-11,
                                       atol=0)


def test_design_file_loads_and_matches_the_plant():
    from schedule.design_file import load_design, validate_against_plant

    with importlib.resources.as_file(
            importlib.resources.files("schedule.demo_crane") / "crane_design.toml") as path:
        spec = load_design(path)
    assert spec.source.operating_points.name == "crane_envelope.h5"
    assert spec.source.operating_points.is_file()
    validate_against_plant(spec, linear_plant_at(_pt(10.0, 20000.0)))
    assert [v.name for v in spec.variables] == ["rope_length", "payload_mass"]
