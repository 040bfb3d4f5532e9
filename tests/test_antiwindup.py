"""Actuator limits, the observer-form anti-windup and the bumpless start.

Outside references:

* scipy.signal.cont2discrete (bilinear and zoh): the discrete anti-windup gain makes
  the limited controller's state matrix the Tustin image of the continuous one;
* the loop-shift algebra written out in the test (Zhou, Doyle and Glover 1996,
  sec. 17.2; from memory) for H = (B2 - B D22)(I - D D22)^-1;
* the central controller rebuilt by hand from its Riccati pieces in observer form
  (Zhou, Doyle and Glover 1996, Theorem 16.4, the case D11 = 0, D12'C1 = 0,
  B1 D21' = 0 of the bundled crane): the observer's plant-input term is B2 u, so
  "observer fed the saturated signal" is independent of our H;
* two reference simulations of the saturating crane loop written with scipy: the
  exact discrete loop (plant by scipy zoh, controller by scipy bilinear in observer
  form), which the runtime must match to 1e-9, and the continuous loop integrated by
  scipy.integrate.solve_ivp, which the sampled loop approaches as T -> 0;
* the classic windup symptom (Astrom and Rundqwist 1989; from memory): a large step
  that saturates the drive overshoots more when the controller state winds up on the
  commands the drive never delivered; with the observer fed the limited command the
  overshoot returns to that of the linear design.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.integrate
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from schedule.demo import bundled_design_path
from schedule.design_file import load_design, parse_design
from schedule.errors import InputError
from schedule.export import ActuatorLimits, TableController, build_table
from schedule.export.antiwindup import bumpless_state, limit_command, observer_input_gain
from schedule.export.discretize import discretize, discretize_gain
from schedule.types import Family, SchedulingVariable

POINT = {"rope_length": 30.0, "payload_mass": 40000.0}
STEP = 60.0  # m of trolley travel: the 90 kN drive saturates for seconds
LIMIT = 90.0  # kN


def _random_controller(rng, n, ny, nu):
    A = rng.standard_normal((n, n)) - (n + 2.0) * np.eye(n)
    return A, rng.standard_normal((n, ny)), rng.standard_normal((nu, n)), \
        rng.standard_normal((nu, ny)) * 0.1


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(1, 6), nu=st.integers(1, 3),
       T=st.floats(1e-3, 0.3), warp=st.booleans())
def test_tustin_gain_makes_limited_dynamics_the_tustin_image(seed, n, nu, T, warp):
    # Reference: scipy's bilinear transform of A - H C (at the pre-warped step if any).
    rng = np.random.default_rng(seed)
    A, B, C, D = _random_controller(rng, n, 2, nu)
    H = rng.standard_normal((n, nu)) * 0.3
    w0 = 1.0 / T if warp else 0.0
    Ad, _, Cd, _ = discretize(A, B, C, D, T, "tustin", w0)
    Hd = discretize_gain(A, C, H, T, "tustin", w0)
    Ts = 2.0 * math.tan(w0 * T / 2.0) / w0 if warp else T
    Fd = scipy.signal.cont2discrete((A - H @ C, H, C, np.zeros((nu, nu))), Ts,
                                    method="bilinear")[0]
    np.testing.assert_allclose(Ad - Hd @ Cd, Fd, rtol=1e-9, atol=1e-11)


def test_zoh_gain_is_the_held_input_matrix():
    # Reference: scipy zoh of the controller with the correction as an extra held input.
    rng = np.random.default_rng(4)
    A, B, C, D = _random_controller(rng, 4, 2, 2)
    H = rng.standard_normal((4, 2))
    ref = scipy.signal.cont2discrete((A, np.hstack([B, H]), C, np.zeros((2, 4))), 0.05,
                                     method="zoh")[1][:, 2:]
    np.testing.assert_allclose(discretize_gain(A, C, H, 0.05, "zoh"), ref, rtol=1e-10,
                               atol=1e-12)


def test_gain_with_d22_is_the_observer_input():
    # Loop shift by hand: K0 = (F0 + B2 Ck0, G0 + B2 Dk0, Ck0, Dk0) is an observer whose
    # plant input enters through B2, designed for y~ = y - D22 u. With K = K0 (I + D22 K0)^-1
    # the observer reads x' = F0 x + G0 (y - D22 u) + B2 u, so the coefficient of the
    # applied u is B2 - G0 D22, and A - H C = F0, B - H D = G0 must hold.
    rng = np.random.default_rng(7)
    n, ny, nu = 4, 2, 2
    F0, G0 = rng.standard_normal((n, n)), rng.standard_normal((n, ny))
    B2, D22 = rng.standard_normal((n, nu)), 0.3 * rng.standard_normal((ny, nu))
    Ck0, Dk0 = rng.standard_normal((nu, n)), 0.2 * rng.standard_normal((nu, ny))
    Ak0, Bk0 = F0 + B2 @ Ck0, G0 + B2 @ Dk0
    M = np.linalg.inv(np.eye(nu) + Dk0 @ D22)
    A, B = Ak0 - Bk0 @ D22 @ M @ Ck0, Bk0 - Bk0 @ D22 @ M @ Dk0
    C, D = M @ Ck0, M @ Dk0
    H = observer_input_gain(B2[None], D22[None], B[None], D[None])[0]
    np.testing.assert_allclose(H, B2 - G0 @ D22, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(A - H @ C, F0, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(B - H @ D, G0, rtol=1e-10, atol=1e-12)


def test_limiter_rate_then_magnitude():
    # Hand-worked: rate 10/s at T = 0.1 allows 1 per sample from the last command.
    lim = ActuatorLimits(np.array([-2.0, -5.0]), np.array([2.0, 5.0]), np.array([10.0, math.inf]))
    out = limit_command(np.array([4.0, -9.0]), np.array([1.5, 0.0]), lim, 0.1)
    np.testing.assert_array_equal(out, [2.0, -5.0])  # 2.5 by rate, then 2 by magnitude
    out = limit_command(np.array([-4.0, 3.0]), np.array([1.5, 0.0]), lim, 0.1)
    np.testing.assert_array_equal(out, [0.5, 3.0])
    with pytest.raises(InputError, match="contain 0"):
        ActuatorLimits.from_specs(["u"], {"u": (1.0, 2.0, math.inf)})
    with pytest.raises(InputError, match="positive"):
        ActuatorLimits.from_specs(["u"], {"u": (-1.0, 2.0, 0.0)})


# ------------------------------------------------------------------------- the crane
@pytest.fixture(scope="module")
def crane():
    """The bundled crane design at one point: generalized plant, central controller, table."""
    from schedule.demo_crane.crane import linear_plant_at

    from schedule.hinf import central_controller, optimal_gamma
    from schedule.sources import operating_points_for
    from schedule.weights import build_generalized_plant

    spec = load_design(bundled_design_path())
    # the design's common gamma: (1 + margin) times the largest optimum over the envelope
    ops = operating_points_for(spec)
    gamma = (1.0 + spec.gamma.margin) * max(
        optimal_gamma(build_generalized_plant(spec, pl, pt))
        for pl, pt in zip(ops.plants, ops.points, strict=True))
    plant = linear_plant_at(POINT)
    gp = build_generalized_plant(spec, plant, POINT)
    K = central_controller(gp, gamma)
    # two design points with the same controller: the table holds it exactly
    N = 2
    stack = {k: np.repeat(np.asarray(getattr(K, k))[None], N, 0) for k in "ABCD"}
    pstack = {k: np.repeat(np.asarray(getattr(gp, k))[None], N, 0)
              for k in ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")}
    fam = Family(
        variables=(SchedulingVariable("rope_length", "m", 29.0, 31.0),), points=np.array(
            [[29.0], [31.0]]), status=np.array(["ok"] * N), reasons=("", ""),
        gamma_opt=np.full(N, gamma / 1.2), gamma=gamma, plant=pstack, controller=stack,
        pieces={}, measured_names=tuple(spec.channels.measured),
        control_names=tuple(spec.channels.controls), breakpoints=(np.array([29.0, 31.0]),),
        grid_index=np.arange(N)[:, None])
    table = build_table(fam, sample_time=0.02, method="tustin", limits=spec.limits)
    return {"spec": spec, "plant": plant, "gp": gp, "K": K, "gamma": gamma, "table": table}


def test_crane_design_file_states_the_90_kN_limit(crane):
    # The bundled design file says the drive delivers at most 90 kN (CraneParameters).
    lim = crane["table"].limits
    assert lim.lower.tolist() == [-LIMIT] and lim.upper.tolist() == [LIMIT]
    assert crane["table"].H is not None


def test_central_controller_is_an_observer_fed_through_B2(crane):
    # Theorem 16.4 (ZDG 1996) in the plant's own signals: xh' = A xh + B1 wh + B2 u
    # + Z L (C2 xh + D21 wh - y), wh = W xh, u = F xh. Built here from the pieces only.
    gp, K = crane["gp"], crane["K"]
    assert not np.any(gp.D11) and not np.any(gp.D22) and not np.any(K.D)
    pc = K.pieces
    W, F, ZL = pc.worst_disturbance, pc.state_feedback, pc.Z @ pc.observer_gain
    obs_F = gp.A + gp.B1 @ W + ZL @ (gp.C2 + gp.D21 @ W)  # everything but the B2 u term
    np.testing.assert_allclose(obs_F + gp.B2 @ F, K.A, rtol=1e-8, atol=1e-8 * np.abs(K.A).max())
    np.testing.assert_allclose(-ZL, K.B, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(F, K.C, rtol=1e-10)
    # so the observer's input matrix of the applied command is B2, which is our H
    H = observer_input_gain(gp.B2[None], gp.D22[None], K.B[None], K.D[None])[0]
    np.testing.assert_array_equal(H, gp.B2)


def _plant_zoh(crane, T):
    p = crane["plant"]
    yi = [p.output_names.index(m) for m in crane["table"].measured_names]
    ui = [p.input_names.index(c) for c in crane["table"].control_names]
    Ad, Bd = scipy.signal.cont2discrete((p.A, p.B[:, ui], p.C[yi], np.zeros((len(yi), 1))), T,
                                        method="zoh")[:2]
    return Ad, Bd, p.C[yi]


def _reference_loop(crane, K_steps, aw):
    """Scipy reference: plant by zoh; controller by scipy bilinear in observer form."""
    tab, K, gp = crane["table"], crane["K"], crane["gp"]
    T = tab.sample_time
    Ap, Bp, Cp = _plant_zoh(crane, T)
    Ad, Bd, Cd, Dd = scipy.signal.cont2discrete((K.A, K.B, K.C, K.D), T, method="bilinear")[:4]
    # the observer fed the saturated signal: A - H C in Tustin form, H from the pieces' B2
    Fd = scipy.signal.cont2discrete((K.A - gp.B2 @ K.C, gp.B2, K.C, np.zeros((1, 1))), T,
                                    method="bilinear")[0]
    Hd = np.linalg.lstsq(Cd.T, (Ad - Fd).T, rcond=None)[0].T  # Ad - Hd Cd = Fd
    np.testing.assert_allclose(Ad - Hd @ Cd, Fd, atol=1e-12)
    x, xc, ys, us = np.zeros(Ap.shape[0]), np.zeros(Ad.shape[0]), [], []
    for k in range(K_steps):
        ref = np.array([STEP if k * T >= 1.0 else 0.0, 0.0])
        y = Cp @ x - ref
        u = Cd @ xc + Dd @ y
        ul = np.clip(u, -LIMIT, LIMIT)
        xc = (Ad - Hd @ Cd) @ xc + (Bd - Hd @ Dd) @ y + Hd @ ul if aw else Ad @ xc + Bd @ y
        x = Ap @ x + Bp @ ul
        ys.append(Cp[0] @ x)
        us.append(ul[0])
    return np.array(ys), np.array(us)


def _runtime_loop(crane, K_steps, aw, limits=True):
    tab = crane["table"]
    T = tab.sample_time
    Ap, Bp, Cp = _plant_zoh(crane, T)
    ctl = TableController(tab, anti_windup=aw)
    if not limits:
        ctl.limits = ActuatorLimits.none(1)
    x, ys, us = np.zeros(Ap.shape[0]), [], []
    for k in range(K_steps):
        ref = np.array([STEP if k * T >= 1.0 else 0.0, 0.0])
        u = ctl.step(Cp @ x - ref, {"rope_length": 30.0})
        x = Ap @ x + Bp @ u
        ys.append(Cp[0] @ x)
        us.append(u[0])
    return np.array(ys), np.array(us)


def _overshoot(ys):
    return 100.0 * (ys.max() - STEP) / STEP


@pytest.fixture(scope="module")
def loops(crane):
    K_steps = 4000  # 80 s
    return {(name, aw): fn(crane, K_steps, aw) for name, fn in
            (("ref", _reference_loop), ("ours", _runtime_loop)) for aw in (True, False)} | \
        {("linear", True): _runtime_loop(crane, K_steps, True, limits=False)}


def test_runtime_matches_scipy_reference_loop(loops):
    for aw in (True, False):
        ys_ref, us_ref = loops[("ref", aw)]
        ys, us = loops[("ours", aw)]
        np.testing.assert_allclose(us, us_ref, rtol=1e-9, atol=1e-9 * LIMIT)
        np.testing.assert_allclose(ys, ys_ref, rtol=1e-9, atol=1e-9 * STEP)
    assert np.mean(np.abs(loops[("ours", True)][1]) >= LIMIT) > 0.05  # the drive saturates


def test_wound_up_overshoot_is_gone(loops):
    # Classic symptom: without the anti-windup path the step overshoots clearly more than
    # the linear design does; with it the overshoot is the linear design's again.
    plain = _overshoot(loops[("ours", False)][0])
    with_aw = _overshoot(loops[("ours", True)][0])
    linear = _overshoot(loops[("linear", True)][0])
    assert plain > linear + 3.0, (plain, linear)
    assert abs(with_aw - linear) < 1.0, (with_aw, linear)


def test_sampled_loop_approaches_the_continuous_reference(crane):
    # scipy.integrate.solve_ivp of the continuous loop: plant x' = A x + Bu sat(u), observer
    # xh' = (AK - B2 CK) xh + BK y + B2 sat(u), u = CK xh (the observer fed the saturated
    # command). The sampled Tustin loop at T = 5 ms follows it within 1 % of the step.
    K, gp, p = crane["K"], crane["gp"], crane["plant"]
    tab = crane["table"]
    yi = [p.output_names.index(m) for m in tab.measured_names]
    Bu = p.B[:, [p.input_names.index(tab.control_names[0])]]
    Cy = p.C[yi]
    n = p.A.shape[0]
    r = np.array([STEP, 0.0])

    def rhs(t, s):
        x, xh = s[:n], s[n:]
        u = np.clip(K.C @ xh, -LIMIT, LIMIT)
        y = Cy @ x - r
        return np.concatenate([p.A @ x + Bu @ u, (K.A - gp.B2 @ K.C) @ xh + K.B @ y + gp.B2 @ u])

    t_end = 40.0
    sol = scipy.integrate.solve_ivp(rhs, (0.0, t_end), np.zeros(n + K.A.shape[0]), rtol=1e-9,
                                    atol=1e-9, dense_output=True, max_step=0.01)
    fam_table = build_table(Family(
        variables=tab.variables, points=np.array([[29.0], [31.0]]), status=np.array(["ok"] * 2),
        reasons=("", ""), gamma_opt=np.ones(2), gamma=crane["gamma"],
        plant={k: np.repeat(np.asarray(getattr(gp, k))[None], 2, 0) for k in
               ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")},
        controller={k: np.repeat(np.asarray(getattr(K, k))[None], 2, 0) for k in "ABCD"},
        pieces={}, measured_names=tab.measured_names, control_names=tab.control_names,
        breakpoints=(np.array([29.0, 31.0]),), grid_index=np.arange(2)[:, None]),
        sample_time=0.005, limits={"force_command": (-LIMIT, LIMIT, math.inf)})
    T = 0.005
    Ap, Bp = scipy.signal.cont2discrete((p.A, Bu, Cy, np.zeros((2, 1))), T, method="zoh")[:2]
    ctl = TableController(fam_table)
    x, worst = np.zeros(n), 0.0
    for k in range(int(t_end / T)):
        u = ctl.step(Cy @ x - r, [30.0])
        x = Ap @ x + Bp @ u
        worst = max(worst, abs(x[0] - sol.sol((k + 1) * T)[0]))
    assert worst < 0.01 * STEP, worst


def test_bumpless_state_properties(crane):
    # (1) The first command equals the held one (no jump); (2) when the held pair is a
    # steady state of the linear controller, the state is that steady state (the
    # correction is zero, so nothing moves); (3) coordinate-free: a change of the
    # controller's state coordinates changes the state but not the command sequence.
    tab = crane["table"]
    m = TableController(tab).matrices([30.0])
    y0, u0 = np.array([0.5, 0.01]), np.array([20.0])
    ctl = TableController(tab)
    ctl.reset_steady(y0, u0, [30.0])
    np.testing.assert_allclose(ctl.step(y0, [30.0]), u0, rtol=1e-10)
    xs = np.linalg.solve(np.eye(m["A"].shape[0]) - m["A"], m["B"] @ y0)
    u_steady = m["C"] @ xs + m["D"] @ y0
    x0 = bumpless_state(m["A"], m["B"], m["C"], m["D"], m["H"], y0, u_steady)
    np.testing.assert_allclose(x0, xs, rtol=1e-9, atol=1e-12 * np.abs(xs).max())
    rng = np.random.default_rng(2)
    S = rng.standard_normal(m["A"].shape) + 3.0 * np.eye(m["A"].shape[0])
    Si = np.linalg.inv(S)
    x1 = bumpless_state(S @ m["A"] @ Si, S @ m["B"], m["C"] @ Si, m["D"], S @ m["H"], y0, u0)
    x2 = bumpless_state(m["A"], m["B"], m["C"], m["D"], m["H"], y0, u0)
    np.testing.assert_allclose(x1, S @ x2, rtol=1e-8, atol=1e-10 * np.abs(x1).max())


def test_design_file_limits_section():
    base = bundled_design_path().read_text()
    spec = parse_design(base, bundled_design_path().parent)
    assert [(s.control, s.lower, s.upper, s.rate) for s in spec.limits] == \
        [("force_command", -90.0, 90.0, math.inf)]
    for extra, msg in (('[[limits]]\ncontrol = "wind_speed"\nupper = 1.0\n', "channels.controls"),
                       ('[[limits]]\ncontrol = "force_command"\n', "no limit given"),
                       ('[[limits]]\ncontrol = "force_command"\nrate = -1.0\n', "> 0"),
                       ('[[limits]]\ncontrol = "force_command"\nlower = 5.0\n', "lower <= 0"),
                       ('[[limits]]\ncontrol = "force_command"\nspeed = 5.0\n', "unknown key")):
        text = base.split("[[limits]]")[0] + extra
        with pytest.raises(InputError, match=msg) as exc:
            parse_design(text, bundled_design_path().parent)
        assert "\n" not in str(exc.value)
