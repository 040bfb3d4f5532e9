"""Tests of schedule/linearize.py against analytic results derived by hand.

Every reference value below is derived analytically in the comment next to
it (derivatives of closed-form functions, equilibria of closed-form
equations); none is copied from the code's own output.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from schedule.errors import InputError, NumericalError
from schedule.linearize import NonlinearModel, linearize, trim, trim_and_linearize


def _pendulum(complex_safe: bool = True) -> NonlinearModel:
    """Damped pendulum with torque u0 and a second, unused input: x = (angle, rate).

    thetaddot = -(g/l) sin(theta) - c thetadot + u0 / (m l^2), with g/l and c from the point.
    Output y = (l sin(theta), thetadot^2).
    """

    def f(x, u, p):
        return np.array([x[1], -p["w2"] * np.sin(x[0]) - p["c"] * x[1] + u[0] / p["J"]])

    def g(x, u, p):
        return np.array([p["l"] * np.sin(x[0]), x[1] ** 2 + 0.5 * u[1]])

    return NonlinearModel(("angle", "rate"), ("torque", "spare"), ("horizontal", "rate_sq"),
                          f, g, variable_names=("w2", "c", "J", "l"), complex_safe=complex_safe)


POINT = {"w2": 9.81 / 2.0, "c": 0.3, "J": 4.0, "l": 2.0}


def test_trim_matches_the_static_balance():
    # Analytic: at rest the torque balances gravity, w2 sin(theta) = u / J, so for a
    # given angle theta* the torque is u = J w2 sin(theta*) (pendulum statics).
    model = _pendulum()
    theta_star = 0.4
    res = trim(model, POINT, x0=[theta_star, 0.1], u0=[1.0, 0.0], free_states=["rate"],
               free_inputs=["torque"])
    assert res.x[0] == theta_star
    assert res.u[0] == pytest.approx(POINT["J"] * POINT["w2"] * np.sin(theta_star), rel=1e-10)
    assert abs(res.x[1]) < 1e-10
    assert res.residual <= 1e-8
    # the returned derivative really is (near) zero: independent evaluation
    assert np.max(np.abs(model.dynamics(res.x, res.u, POINT))) < 1e-8


def test_trim_angle_for_given_torque():
    # Analytic: for a fixed torque u, theta = asin(u / (J w2)).
    model = _pendulum()
    u = 5.0
    x, uu = trim(model, POINT, x0=[0.0, 0.0], u0=[u, 0.0])
    assert x[0] == pytest.approx(np.arcsin(u / (POINT["J"] * POINT["w2"])), rel=1e-9)
    assert uu[0] == u


def test_trim_failure_names_point_and_state():
    # Analytic: thetaddot = -w2 sin(theta) + u/J has no root when u/J > w2.
    model = _pendulum()
    with pytest.raises(NumericalError, match=r"trim did not converge at point \(w2=4\.905.*"
                                             r"d\(rate\)/dt"):
        trim(model, POINT, x0=[0.0, 0.0], u0=[100.0, 0.0])


def test_linearization_matches_hand_derivatives():
    # Analytic Jacobians of the pendulum at (theta0, rate0):
    # A = [[0, 1], [-w2 cos(theta0), -c]], B = [[0, 0], [1/J, 0]],
    # C = [[l cos(theta0), 0], [0, 2 rate0]], D = [[0, 0], [0, 0.5]].
    model = _pendulum()
    th, r = 0.7, -0.2
    A = np.array([[0, 1], [-POINT["w2"] * np.cos(th), -POINT["c"]]])
    B = np.array([[0, 0], [1 / POINT["J"], 0]])
    C = np.array([[POINT["l"] * np.cos(th), 0], [0, 2 * r]])
    D = np.array([[0, 0], [0, 0.5]])
    for method, tol in (("central", 1e-8), ("complex", 1e-14)):
        P = linearize(model, [th, r], [0.3, 0.0], POINT, method=method)
        for got, want in ((P.A, A), (P.B, B), (P.C, C), (P.D, D)):
            np.testing.assert_allclose(got, want, rtol=tol, atol=tol)
        assert P.state_names == ("angle", "rate")
        assert P.input_names == ("torque", "spare")
        assert P.output_names == ("horizontal", "rate_sq")


@settings(max_examples=25, deadline=None)
@given(st.integers(min_value=0, max_value=2**32 - 1))
def test_linear_model_gives_its_own_matrices(seed):
    # Analytic: the derivative of a linear map x -> A x + B u is (A, B) itself,
    # with scales spanning several decades (per-variable relative steps).
    rng = np.random.default_rng(seed)
    n, m, p = 4, 2, 3
    s = 10.0 ** rng.uniform(-3, 4, n + m)
    A, B = rng.normal(size=(n, n)) / s[:n], rng.normal(size=(n, m)) / s[n:]
    # every term of f and g is O(1) at x0, u0 (otherwise rounding in f limits any method)
    C, D = rng.normal(size=(p, n)) / s[:n], rng.normal(size=(p, m)) / s[n:]
    model = NonlinearModel(tuple(f"x{i}" for i in range(n)), ("u0", "u1"), ("y0", "y1", "y2"),
                           lambda x, u, pt: A @ x + B @ u, lambda x, u, pt: C @ x + D @ u,
                           state_scales=tuple(s[:n]), input_scales=tuple(s[n:]))
    x0, u0 = rng.normal(size=n) * s[:n], rng.normal(size=m) * s[n:]
    P = linearize(model, x0, u0, {})
    for got, want in ((P.A, A), (P.B, B), (P.C, C), (P.D, D)):
        np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-9 * np.max(np.abs(want)))


def test_step_size_check_catches_a_kink():
    # A kink at x = 1e-5 lies between the default central step (about 6e-6) and twice it,
    # so the two difference quotients differ (0 versus about 83): must raise, naming the entry.
    def f(x, u, p):
        return np.array([1e3 * np.maximum(x[0] - 1e-5, 0.0) + u[0]])

    model = NonlinearModel(("s",), ("u",), ("y",), f, lambda x, u, p: x.copy())
    with pytest.raises(NumericalError, match=r"d\(s'\)/d\(s\)"):
        linearize(model, [0.0], [0.0], {})
    # with the check off, the (one-sided blind) estimate is returned
    P = linearize(model, [0.0], [0.0], {}, check_tolerance=None)
    assert P.A[0, 0] == 0.0


def test_complex_step_needs_a_complex_safe_model():
    with pytest.raises(InputError, match="complex_safe"):
        linearize(_pendulum(complex_safe=False), [0.0, 0.0], [0.0, 0.0], POINT,
                  method="complex")
    with pytest.raises(InputError, match="unknown linearization method"):
        linearize(_pendulum(), [0.0, 0.0], [0.0, 0.0], POINT, method="forward")


def test_bad_inputs_are_one_line_errors():
    model = _pendulum()
    with pytest.raises(InputError, match="unknown free state 'angel'"):
        trim(model, POINT, free_states=["angel"])
    with pytest.raises(InputError, match=r"x0 has shape \(3,\)"):
        trim(model, POINT, x0=[0, 0, 0])
    with pytest.raises(InputError, match="need 'l' in the operating point"):
        linearize(model, [0, 0], [0, 0], {"w2": 1.0, "c": 0.0, "J": 1.0})
    for exc in (pytest.raises(InputError),):
        with exc as info:
            trim(model, POINT, free_inputs=["torque", "torque"])
        assert "\n" not in str(info.value)


def test_trim_and_linearize_hanging_pendulum_frequency():
    # Analytic: small oscillations about the downward rest have omega^2 = w2
    # (A = [[0, 1], [-w2, -c]] at theta = 0); eigenvalues -c/2 +- j sqrt(w2 - c^2/4).
    P = trim_and_linearize(_pendulum(), POINT, x0=[0.2, 0.1], method="complex")
    lam = np.linalg.eigvals(P.A)
    want = -POINT["c"] / 2 + 1j * np.sqrt(POINT["w2"] - POINT["c"] ** 2 / 4)
    assert np.min(np.abs(lam - want)) < 1e-10


def test_model_exceptions_become_one_line_input_errors():
    def f(x, u, p):
        return np.array([x[3]])  # IndexError: x has one entry

    model = NonlinearModel(("s",), ("u",), ("y",), f, lambda x, u, p: x.copy())
    with pytest.raises(InputError, match="raised IndexError") as info:
        linearize(model, [0.0], [0.0], {"a": 1.0})
    assert "\n" not in str(info.value)


def test_units_travel_from_the_model_to_the_linear_plant():
    """The model's units label the Jacobians' rows and columns (A in the state units per
    second...): the LinearPlant carries them; a wrong count is a one-line error."""
    import dataclasses

    model = dataclasses.replace(_pendulum(), state_units=("rad", "rad/s"),
                                input_units=("N m", ""), output_units=("m", "rad^2/s^2"))
    plant = linearize(model, np.zeros(2), np.zeros(2), POINT)
    assert plant.state_units == ("rad", "rad/s") and plant.input_units == ("N m", "")
    assert plant.unit_of("output", "horizontal") == "m"
    assert linearize(_pendulum(), np.zeros(2), np.zeros(2), POINT).state_units == ()
    bad = dataclasses.replace(_pendulum(), state_units=("rad",))
    with pytest.raises(InputError, match="state_units"):
        linearize(bad, np.zeros(2), np.zeros(2), POINT)
