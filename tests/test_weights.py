"""Tests of schedule/weights.py: first-order weights and the mixed-sensitivity plant.

Outside references:
- the first-order weight W(s) = (H s + a L)/(s + a): |W(0)| = L, |W(j inf)| = H
  and |W(j wc)| = 1 follow analytically from |W(jw)|^2 = (H^2 w^2 + a^2 L^2) /
  (w^2 + a^2) (derived by hand); compared also with scipy.signal.freqresp of
  the transfer function built from its coefficients;
- the generalized plant is checked against the frequency-domain
  interconnection built independently from scipy.signal.freqresp of each
  piece, and its closed loop with a static controller against the lower LFT
  formula P11 + P12 K (I - P22 K)^-1 P21 (Zhou, Doyle and Glover 1996,
  section 10.1, with u = K y).
"""

from __future__ import annotations

import numpy as np
import pytest
from _helpers import toml_channels, toml_variables, toml_weights
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from schedule.design_file import parse_design
from schedule.errors import InputError
from schedule.types import LinearPlant
from schedule.weights import (
    build_generalized_plant,
    build_generalized_plant_named,
    first_order_weight,
    static_weight,
)


def tf_response(num, den, omega):
    return signal.freqresp((num, den), omega)[1]


def ss_response(a, b, c, d, omega):
    return np.array([c @ np.linalg.solve(1j * w * np.eye(a.shape[0]) - a, b) + d
                     for w in omega])


@settings(max_examples=30, deadline=None)
@given(L=st.floats(1.5, 1e4), H=st.floats(0.0, 0.9), wc=st.floats(1e-2, 1e2),
       flip=st.booleans())
def test_first_order_magnitudes(L, H, wc, flip):
    if flip:  # an effort-type weight: small at low frequency, large at high frequency
        L, H = 1.0 / L, (1.0 / H if H > 0.05 else 20.0)
    w = first_order_weight(L, wc, H)
    mag = np.abs(w.response(np.array([0.0, wc, 1e9 * max(wc, 1.0) * max(L, H)])))
    # analytic: |W(0)| = L, |W(j wc)| = 1, |W(j inf)| = H (derived by hand)
    np.testing.assert_allclose(mag[0], L, rtol=1e-9)
    np.testing.assert_allclose(mag[1], 1.0, rtol=1e-10)
    np.testing.assert_allclose(mag[2], H, rtol=1e-6, atol=1e-8)
    # same transfer function via scipy.signal.freqresp of (H s + a L)/(s + a)
    a = -w.a[0, 0]
    omega = np.logspace(-3, 3, 25) * wc
    np.testing.assert_allclose(w.response(omega), tf_response([H, a * L], [1.0, a], omega),
                               rtol=1e-10)
    # and the realization (a, b, c, d) via scipy's state-space frequency response
    ref = signal.freqresp(signal.StateSpace(w.a, w.b, w.c, w.d), omega)[1]
    np.testing.assert_allclose(w.response(omega), ref, rtol=1e-10)


def test_weight_examples_and_errors():
    w = first_order_weight(100.0, 0.3, 0.5)
    # hand computation: a = 0.3 sqrt((1 - 0.25)/(1e4 - 1)) = 0.3 * 0.0086607...
    assert np.isclose(-w.a[0, 0], 0.3 * np.sqrt(0.75 / 9999.0), rtol=1e-14)
    s = static_weight(2.5)
    assert s.n == 0 and np.all(s.response(np.array([0.0, 10.0])) == 2.5)
    with pytest.raises(InputError, match="do not straddle 1"):
        first_order_weight(2.0, 1.0, 3.0)
    with pytest.raises(InputError, match="invalid"):
        first_order_weight(-2.0, 1.0, 0.1)


SPEC = (toml_variables(("p", "", 0.0, 1.0))
        + """[source]
model = "m:f"
[grid]
p = [0.0, 1.0]
"""
        + toml_channels(["u1", "u2"], ["y1", "y2"], ["d1"], ["y3", "y1"])
        + toml_weights(
            performance=[("y1", 50.0, '{ over = ["p"], breakpoints = [[0.0, 1.0]], '
                                      'values = [1.0, 3.0] }', 0.2), ("y3", 2.0)],
            effort=[("u1", 0.05, 20.0, 5.0), ("u2", 0.3)],
            noise=[("y1", 0.01), ("y2", 0.02, 50.0, 2.0)],
            disturbance=[("d1", 10.0, 1.0, 0.1)]))


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


def weight_tf(L, wc, H):
    a = wc * np.sqrt((1 - H * H) / (L * L - 1))  # the documented formula (derived by hand)
    return [H, a * L], [1.0, a]


def reference_blocks(lp, p, omega):
    """P11, P12, P21, P22 of the arrangement, built in the frequency domain."""
    G = plant_response(lp, omega)
    ins, outs = list(lp.input_names), list(lp.output_names)
    iu = [ins.index("u1"), ins.index("u2")]
    idd = [ins.index("d1")]
    im = [outs.index("y1"), outs.index("y2")]
    ip = [outs.index("y3"), outs.index("y1")]
    wc_p = 1.0 + 2.0 * p  # the scheduled crossover, linear in p (analytic)
    Wp = [np.full(len(omega), 2.0), tf_response(*weight_tf(50.0, wc_p, 0.2), omega)]
    Wu = [tf_response(*weight_tf(0.05, 20.0, 5.0), omega), np.full(len(omega), 0.3)]
    Wn = [np.full(len(omega), 0.01), tf_response(*weight_tf(0.02, 50.0, 2.0), omega)]
    Wd = [tf_response(*weight_tf(10.0, 1.0, 0.1), omega)]
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
                            "w_noise:y2", "w_dist:d1")
    assert gp.A.shape == (8, 8)
    # plant states first, unchanged
    np.testing.assert_array_equal(gp.A[:4, :4], lp.A)


def test_same_state_coordinates_at_every_point():
    spec = parse_design(SPEC, "/tmp")
    lp = random_plant()
    g0 = build_generalized_plant(spec, lp, [0.0])
    g1 = build_generalized_plant(spec, lp, [1.0])
    assert g0.A.shape == g1.A.shape
    # only the scheduled performance weight's pole changes (crossover 1 -> 3: a scales by 3)
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
