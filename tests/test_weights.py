"""Tests of schedule/weights.py: weights in requirement terms and the mixed-sensitivity plant.

Outside references:
- the performance weight against the textbook formula W_P(s) = (s/M + wB) /
  (s + wB A) (Skogestad and Postlethwaite, Multivariable Feedback Control,
  2nd ed. 2005, sec. 2.8, eq. 2.72; from memory): |W_P(0)| = 1/A,
  |W_P(j inf)| = 1/M and |W_P(j wB)|^2 = (1 + 1/M^2)/(1 + A^2), derived by hand
  below, and scipy.signal.freqresp of that transfer function;
- the effort weight W_u(s) = (s + wa)/(u_hf s + u_max wa): |W_u(0)| = 1/u_max,
  |W_u(j inf)| = 1/u_hf, |W_u(j wa)|^2 = 2/(u_hf^2 + u_max^2) (derived by hand),
  and scipy.signal.freqresp;
- transfer weights against scipy.signal.freqresp of the (zeros, poles, gain) form;
- the generalized plant is checked against the frequency-domain
  interconnection built independently from scipy.signal.freqresp of each
  piece, and its closed loop with a static controller against the lower LFT
  formula P11 + P12 K (I - P22 K)^-1 P21 (Zhou, Doyle and Glover 1996,
  section 10.1, with u = K y).
"""

from __future__ import annotations

import numpy as np
import pytest
from _helpers import performance_numbers, toml_channels, toml_variables, toml_weights
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from schedule.design_file import parse_design
from schedule.errors import InputError
from schedule.types import LinearPlant
from schedule.weights import (
    build_generalized_plant,
    build_generalized_plant_named,
    effort_weight,
    performance_weight,
    static_weight,
    transfer_weight,
)


def tf_response(num, den, omega):
    return signal.freqresp((num, den), omega)[1]


def ss_response(a, b, c, d, omega):
    return np.array([c @ np.linalg.solve(1j * w * np.eye(a.shape[0]) - a, b) + d
                     for w in omega])


def performance_tf(M, wB, A):
    """The textbook weight (s/M + wB)/(s + wB A) as (numerator, denominator)."""
    return [1.0 / M, wB], [1.0, wB * A]


def effort_tf(u_max, wa, u_hf):
    """(s + wa)/(u_hf s + u_max wa) as (numerator, denominator)."""
    return [1.0, wa], [u_hf, u_max * wa]


@settings(max_examples=30, deadline=None)
@given(M=st.floats(1.05, 10.0), A=st.floats(1e-4, 0.9), wB=st.floats(1e-2, 1e2))
def test_performance_weight_against_the_textbook_formula(M, A, wB):
    w = performance_weight(M, wB, A)
    big = 1e9 * max(wB, 1.0) / A
    mag = np.abs(w.response(np.array([0.0, wB, big])))
    # |W(0)| = wB / (wB A) = 1/A; |W(j inf)| = 1/M; at wB:
    # |j wB/M + wB|^2 / |j wB + wB A|^2 = (1/M^2 + 1)/(1 + A^2) (all derived by hand)
    np.testing.assert_allclose(mag[0], 1.0 / A, rtol=1e-12)
    np.testing.assert_allclose(mag[1], np.sqrt((1 + 1 / M**2) / (1 + A**2)), rtol=1e-12)
    np.testing.assert_allclose(mag[2], 1.0 / M, rtol=1e-6)
    omega = np.logspace(-3, 3, 25) * wB
    np.testing.assert_allclose(w.response(omega), tf_response(*performance_tf(M, wB, A), omega),
                               rtol=1e-10)
    # and the realization through scipy's own state-space frequency response
    ref = signal.freqresp(signal.StateSpace(w.a, w.b, w.c, w.d), omega)[1]
    np.testing.assert_allclose(w.response(omega), ref, rtol=1e-10)


@settings(max_examples=30, deadline=None)
@given(u_max=st.floats(0.1, 1e3), ratio=st.floats(1.5, 1e3), wa=st.floats(1e-2, 1e3))
def test_effort_weight_against_its_formula(u_max, ratio, wa):
    u_hf = u_max / ratio
    w = effort_weight(u_max, wa, u_hf)
    mag = np.abs(w.response(np.array([0.0, wa, 1e9 * wa * ratio])))
    # |W(0)| = wa/(u_max wa); |W(j wa)|^2 = |j wa + wa|^2 / |j u_hf wa + u_max wa|^2
    # = 2/(u_hf^2 + u_max^2); |W(j inf)| = 1/u_hf (derived by hand)
    np.testing.assert_allclose(mag[0], 1.0 / u_max, rtol=1e-12)
    np.testing.assert_allclose(mag[1], np.sqrt(2.0 / (u_hf**2 + u_max**2)), rtol=1e-12)
    np.testing.assert_allclose(mag[2], 1.0 / u_hf, rtol=1e-6)
    omega = np.logspace(-3, 3, 25) * wa
    np.testing.assert_allclose(w.response(omega), tf_response(*effort_tf(u_max, wa, u_hf), omega),
                               rtol=1e-10)
    # the limit alone: a static weight 1/u_max
    s = effort_weight(u_max)
    assert s.n == 0 and s.d[0, 0] == pytest.approx(1.0 / u_max, rel=1e-15)


def test_transfer_weight_against_scipy_zpk():
    zeros, poles, k = [-3.0], [-1.0 + 2.0j, -1.0 - 2.0j, -10.0], 4.0
    w = transfer_weight(zeros, poles, k)
    omega = np.logspace(-2, 3, 31)
    ref = signal.freqresp(signal.ZerosPolesGain(zeros, poles, k), omega)[1]
    np.testing.assert_allclose(w.response(omega), ref, rtol=1e-10)
    assert w.n == 3


def test_weight_examples_and_errors():
    s = static_weight(2.5)
    assert s.n == 0 and np.all(s.response(np.array([0.0, 10.0])) == 2.5)
    with pytest.raises(InputError, match="not below peak_sensitivity"):
        performance_weight(2.0, 1.0, 3.0)
    with pytest.raises(InputError, match="bandwidth = -1 must be"):
        performance_weight(2.0, -1.0, 0.1)
    with pytest.raises(InputError, match="high_frequency_limit = 5 is not below limit = 2"):
        effort_weight(2.0, 1.0, 5.0)
    with pytest.raises(InputError, match="needs both bandwidth and high_frequency_limit"):
        effort_weight(2.0, 1.0)
    with pytest.raises(InputError, match="not in the open left half plane"):
        transfer_weight([], [0.5], 1.0)
    with pytest.raises(InputError, match="imaginary axis"):
        transfer_weight([0.0], [-1.0], 1.0)
    with pytest.raises(InputError, match="not proper"):
        transfer_weight([-1.0, -2.0], [-3.0], 1.0)


# The arrangement test uses every form: a performance weight with a scheduled bandwidth,
# a static one, an effort weight with an actuator bandwidth, a limit alone, noise levels,
# a first-order transfer weight on a noise channel and a second-order one on a disturbance.
SPEC = (toml_variables(("p", "", 0.0, 1.0))
        + """[source]
model = "m:f"
[grid]
p = [0.0, 1.0]
"""
        + toml_channels(["u1", "u2"], ["y1", "y2"], ["d1"], ["y3", "y1"])
        + toml_weights(
            performance=[("y1", performance_numbers(
                2.0, '{ over = ["p"], breakpoints = [[0.0, 1.0]], values = [1.0, 3.0] }', 0.02)),
                ("y3", 2.0)],
            effort=[("u1", {"limit": 20.0, "bandwidth": 4.0, "high_frequency_limit": 0.2}),
                    ("u2", {"limit": 3.0})],
            noise=[("y1", {"level": 0.01}),
                   ("y2", {"zeros": "[-50.0]", "poles": "[-500.0]", "gain": 0.2})],
            disturbance=[("d1", {"zeros": "[-3.0]", "poles": "[[-1.0, 2.0]]", "gain": 4.0})]))


def random_plant(seed=0):
    rng = np.random.default_rng(seed)
    n = 4
    A = rng.standard_normal((n, n)) - 3.0 * np.eye(n)
    B = rng.standard_normal((n, 4))
    C = rng.standard_normal((3, n))
    D = 0.1 * rng.standard_normal((3, 4))
    # inputs in a deliberately different order from the design; "spare" unused
    return LinearPlant(A, B, C, D, ("x1", "x2", "x3", "x4"), ("d1", "u2", "spare", "u1"),
                       ("y1", "y2", "y3"))


def plant_response(lp, omega):
    return ss_response(lp.A, lp.B, lp.C, lp.D, omega)  # (k, p, m)


def reference_blocks(lp, p, omega):
    """P11, P12, P21, P22 of the arrangement, built in the frequency domain."""
    G = plant_response(lp, omega)
    ins, outs = list(lp.input_names), list(lp.output_names)
    iu = [ins.index("u1"), ins.index("u2")]
    idd = [ins.index("d1")]
    im = [outs.index("y1"), outs.index("y2")]
    ip = [outs.index("y3"), outs.index("y1")]
    wB = 1.0 + 2.0 * p  # the scheduled bandwidth, linear in p (analytic)
    Wp = [np.full(len(omega), 2.0), tf_response(*performance_tf(2.0, wB, 0.02), omega)]
    Wu = [tf_response(*effort_tf(20.0, 4.0, 0.2), omega), np.full(len(omega), 1.0 / 3.0)]
    Wn = [np.full(len(omega), 0.01),
          signal.freqresp(signal.ZerosPolesGain([-50.0], [-500.0], 0.2), omega)[1]]
    Wd = [signal.freqresp(signal.ZerosPolesGain([-3.0], [-1 + 2j, -1 - 2j], 4.0), omega)[1]]
    out = []
    for k in range(len(omega)):
        Gk = G[k]
        P11 = np.zeros((4, 3), complex)
        P12 = np.zeros((4, 2), complex)
        for r, o in enumerate(ip):
            P11[r, 0] = Wp[r][k] * Gk[o, idd[0]] * Wd[0][k]
            P12[r] = Wp[r][k] * Gk[o, iu]
        P12[2, 0], P12[3, 1] = Wu[0][k], Wu[1][k]
        P21 = np.zeros((2, 3), complex)
        P21[:, 0] = Gk[im, idd[0]] * Wd[0][k]
        P21[0, 1], P21[1, 2] = Wn[0][k], Wn[1][k]
        P22 = Gk[np.ix_(im, iu)]
        out.append((P11, P12, P21, P22))
    return out


@pytest.mark.parametrize("p", [0.0, 0.35, 1.0])
def test_generalized_plant_matches_frequency_domain_interconnection(p):
    spec = parse_design(SPEC, "/tmp")
    lp = random_plant()
    gp, names = build_generalized_plant_named(spec, lp, {"p": p})
    omega = np.logspace(-2, 2, 9)
    B = np.hstack([gp.B1, gp.B2])
    C = np.vstack([gp.C1, gp.C2])
    D = np.block([[gp.D11, gp.D12], [gp.D21, gp.D22]])
    P = ss_response(gp.A, B, C, D, omega)
    ref = reference_blocks(lp, p, omega)
    for k in range(len(omega)):
        P11, P12, P21, P22 = ref[k]
        np.testing.assert_allclose(P[k], np.block([[P11, P12], [P21, P22]]),
                                   rtol=1e-9, atol=1e-12)
    # closed loop with a static controller u = K y against the lower LFT formula
    K = np.array([[0.3, -0.2], [0.1, 0.05]])
    M = np.linalg.inv(np.eye(2) - K @ gp.D22)
    Acl = gp.A + gp.B2 @ M @ K @ gp.C2
    Bcl = gp.B1 + gp.B2 @ M @ K @ gp.D21
    Ccl = gp.C1 + gp.D12 @ M @ K @ gp.C2
    Dcl = gp.D11 + gp.D12 @ M @ K @ gp.D21
    T = ss_response(Acl, Bcl, Ccl, Dcl, omega)
    for k in range(len(omega)):
        P11, P12, P21, P22 = ref[k]
        lft = P11 + P12 @ K @ np.linalg.solve(np.eye(2) - P22 @ K, P21)
        np.testing.assert_allclose(T[k], lft, rtol=1e-8, atol=1e-12)
    # names and state layout from the schema
    assert names.exogenous == ("d:d1", "n:y1", "n:y2")
    assert names.performance == ("e:y3", "e:y1", "u:u1", "u:u2")
    assert names.measured == ("y1", "y2") and names.controls == ("u1", "u2")
    assert names.states == ("x1", "x2", "x3", "x4", "w_perf:y1", "w_effort:u1",
                            "w_noise:y2", "w_dist:d1:1", "w_dist:d1:2")
    assert gp.A.shape == (9, 9)
    # plant states first, unchanged
    np.testing.assert_array_equal(gp.A[:4, :4], lp.A)


def test_same_state_coordinates_at_every_point():
    spec = parse_design(SPEC, "/tmp")
    lp = random_plant()
    g0 = build_generalized_plant(spec, lp, [0.0])
    g1 = build_generalized_plant(spec, lp, [1.0])
    assert g0.A.shape == g1.A.shape
    # only the scheduled performance weight's pole changes (bandwidth 1 -> 3: wB A scales by 3)
    assert np.isclose(g1.A[4, 4], 3.0 * g0.A[4, 4])
    # the row of that weight state (xdot = -a x + a e) is the only one that changes
    diff = np.abs(g1.A - g0.A) > 0
    assert np.all(np.nonzero(diff)[0] == 4)
    np.testing.assert_allclose(g1.A[4], 3.0 * g0.A[4], rtol=1e-12)
    for key in ("B1", "B2"):
        g0m, g1m = getattr(g0, key), getattr(g1, key)
        np.testing.assert_allclose(g1m[4], 3.0 * g0m[4], rtol=1e-12)
        np.testing.assert_array_equal(np.delete(g1m, 4, axis=0), np.delete(g0m, 4, axis=0))
    for key in ("C1", "C2", "D11", "D12", "D21", "D22"):
        np.testing.assert_array_equal(getattr(g1, key), getattr(g0, key))


def test_unknown_channel_and_bad_point():
    spec = parse_design(SPEC, "/tmp")
    lp = random_plant()
    bad = LinearPlant(lp.A, lp.B, lp.C, lp.D, lp.state_names, ("d1", "u2", "spare", "u9"),
                      lp.output_names)
    with pytest.raises(InputError, match=r"'u1' is not a plant input; the plant's inputs "
                                         r"are d1, u2, spare, u9"):
        build_generalized_plant(spec, bad, [0.5])
    with pytest.raises(InputError, match="1 scheduling variables"):
        build_generalized_plant(spec, lp, [0.5, 0.2])


def test_generalized_arrangement_takes_the_plant_as_it_is(tmp_path):
    """channels.arrangement = "generalized": the source's plant is partitioned, not weighted.

    Outside reference: the partition of a state-space plant into P11, P12, P21,
    P22 by input and output groups (Zhou, Doyle and Glover 1996, sec. 10.1);
    the blocks must equal the sub-matrices picked by name, and the optimal
    gamma of the scalar problem xdot = a x + w1 + u, z = [x; u],
    y = x + w2 must be the closed form a + sqrt(a^2 + 2) (derived in
    tests/test_hinf.py).
    """
    from schedule.design_file import parse_design
    from schedule.hinf import optimal_gamma
    from schedule.types import LinearPlant
    from schedule.weights import build_generalized_plant

    text = """
[[variable]]
name = "p"
unit = "-"
lower = 0.0
upper = 1.0
[source]
model = "no_module:f"
[grid]
p = [0.0, 1.0]
[channels]
arrangement = "generalized"
controls = ["u"]
disturbances = ["w1", "w2"]
measured = ["y"]
performance = ["zx", "zu"]
"""
    spec = parse_design(text, tmp_path)
    a = 0.5
    # inputs deliberately out of order: u first
    plant = LinearPlant(A=np.array([[a]]), B=np.array([[1.0, 1.0, 0.0]]),
                        C=np.array([[1.0], [0.0], [1.0]]),
                        D=np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]]),
                        state_names=("x",), input_names=("u", "w1", "w2"),
                        output_names=("zx", "zu", "y"))
    gp = build_generalized_plant(spec, plant, {"p": 0.0})
    np.testing.assert_array_equal(gp.B1, [[1.0, 0.0]])
    np.testing.assert_array_equal(gp.B2, [[1.0]])
    np.testing.assert_array_equal(gp.D12, [[0.0], [1.0]])
    np.testing.assert_array_equal(gp.D21, [[0.0, 1.0]])
    assert optimal_gamma(gp, rtol=1e-7) == pytest.approx(a + np.sqrt(a * a + 2), rel=1e-5)
    with pytest.raises(Exception, match="weights"):
        parse_design(text + "\n[[weights.performance]]\noutput = \"zx\"\ngain = 1.0\n", tmp_path)


def test_channel_units_from_the_design_and_the_plant():
    """Units of the generalized plant's signals: the design's channels.units first, then
    the plant's; weight states that filter a signal carry its unit (schema,
    docs/design-file.md)."""
    text = SPEC.replace('performance = ["y3", "y1"]\n',
                        'performance = ["y3", "y1"]\nunits = { u1 = "kN", y1 = "m" }\n')
    spec = parse_design(text, "/tmp")
    lp = random_plant()
    lp = LinearPlant(lp.A, lp.B, lp.C, lp.D, lp.state_names, lp.input_names, lp.output_names,
                     ("m", "m/s", "rad", "rad/s"), ("N", "", "", "kN"), ("m", "V", "A"))
    _, names = build_generalized_plant_named(spec, lp, {"p": 0.5})
    u = names.units
    assert u["measured"] == ("m", "V") and u["controls"] == ("kN", "")
    assert u["exogenous"] == ("N", "m", "V") and u["performance"] == ("A", "m", "kN", "")
    assert u["states"] == ("m", "m/s", "rad", "rad/s", "m", "kN", "", "", "")
