"""The frozen-Lyapunov rate bound against closed forms, finite differences and simulation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import solve_continuous_lyapunov

from schedule.errors import InputError, NumericalError
from schedule.rate import (
    lyapunov_certificates,
    lyapunov_sensitivity,
    rate_bounds,
    simulate_varying,
    trajectory_function,
)


def test_scalar_closed_form():
    """xdot = a(p) x with a(p) = -1 - p^2 on p in [0, 2].

    From a P + P a = -1: P = -1/(2a); dP/dp = a'/(2 a^2) = -p/(1 + p^2)^2.
    |dP/dp| peaks at p = 1/sqrt 3 with 9/(16 sqrt 3), so the bound is
    16 sqrt(3)/9 = 3.0792 (derived here). The exact answer is "any rate":
    x(t) = x0 exp(int a dt) decays whenever a <= -1 - so the bound is only
    sufficient, and must be positive and finite.
    """
    p = np.linspace(0.0, 2.0, 2001)
    A = (-1.0 - p**2)[:, None, None]
    dA = (-2.0 * p)[:, None, None, None]
    rb = rate_bounds(A, dA, names=["p"])
    assert rb.single[0] == pytest.approx(16 * np.sqrt(3) / 9, rel=1e-6)
    assert rb.joint[0] == rb.single[0]
    assert p[rb.worst_index[0]] == pytest.approx(1 / np.sqrt(3), abs=2e-3)
    np.testing.assert_allclose(rb.dP_norm[:, 0], p / (1 + p**2) ** 2, rtol=1e-9, atol=1e-14)
    # any rate is fine for the scalar loop: a fast oscillation still decays exactly
    t, x = simulate_varying(lambda q: np.array([[-1.0 - q[0] ** 2]]),
                            lambda tt: np.array([1.0 + np.sin(50.0 * tt)]), [1.0], 3.0)
    assert abs(x[-1, 0]) < np.exp(-3.0) * 1.001


def A_sw(p):
    """Convex combination of Liberzon's two stable foci (Switching in Systems and Control,
    2003, sec. 2.1.1, from memory): A1 = [[-0.1, -1], [2, -0.1]], A2 = [[-0.1, -2], [1, -0.1]].
    A(p) = (1 - p) A1 + p A2 has eigenvalues -0.1 +- j sqrt((1 + p)(2 - p)): Hurwitz for
    every frozen p in [0, 1]."""
    return np.array([[-0.1, -1.0 - p], [2.0 - p, -0.1]])


def test_dP_matches_finite_difference_of_scipy_lyapunov():
    """Eq. (3) against a central difference of scipy's Lyapunov solutions."""
    p, h = 0.37, 1e-5

    def P(q):
        return solve_continuous_lyapunov(A_sw(q).T, -np.eye(2))

    fd = (P(p + h) - P(p - h)) / (2 * h)
    A = A_sw(p)[None]
    dA = np.array([[[0.0, -1.0], [-1.0, 0.0]]])
    dP = lyapunov_sensitivity(A, lyapunov_certificates(A), dA)[0]
    np.testing.assert_allclose(dP, fd, rtol=1e-6, atol=1e-8)


def test_fast_switching_destabilizes_but_slow_variation_below_the_bound_does_not():
    ps = np.linspace(0.0, 1.0, 101)
    A = np.stack([A_sw(q) for q in ps])
    dA = np.broadcast_to(np.array([[0.0, -1.0], [-1.0, 0.0]]), (101, 1, 2, 2))
    rb = rate_bounds(A, dA)
    r = float(rb.single[0])
    assert 0 < r < np.inf

    # below the bound: p(t) = 0.5 + 0.5 sin(nu t), max rate 0.5 nu = 0.9 r. V = x'P(p)x
    # must decrease monotonically (the bound's own claim, checked by simulation).
    nu = 1.8 * r
    traj = lambda t: np.array([0.5 + 0.5 * np.sin(nu * t)])  # noqa: E731
    t, x = simulate_varying(lambda q: A_sw(q[0]), traj, [1.0, 0.0], 30.0, samples=600)
    V = np.array([xx @ solve_continuous_lyapunov(A_sw(traj(tt)[0]).T, -np.eye(2)) @ xx
                  for tt, xx in zip(t, x, strict=True)])
    assert np.all(np.diff(V) < 0)

    # fast switching (Liberzon 2003, from memory): A1 in quadrants 1 and 3, A2 in 2 and 4.
    # Each half turn then grows the radius by about sqrt 2 * sqrt 2 = 2 against damping
    # exp(-0.1 * ~2.2), so the state grows without bound although every frozen A is stable.
    sol = solve_ivp(lambda t, xx: A_sw(0.0 if xx[0] * xx[1] > 0 else 1.0) @ xx, (0, 20.0),
                    [1.0, 0.0], max_step=0.01, rtol=1e-8)
    assert np.linalg.norm(sol.y[:, -1]) > 50.0


def test_unstable_frozen_loop_and_bad_trajectory_raise():
    with pytest.raises(NumericalError, match="unstable"):
        rate_bounds(np.array([[[0.5]]]), np.zeros((1, 1, 1, 1)))
    with pytest.raises(InputError, match="trajectory"):
        trajectory_function([0.0, 0.0], [[1.0], [2.0]])
    p = trajectory_function([0.0, 1.0, 2.0], [[0.0], [2.0], [2.0]])
    assert p(0.5)[0] == pytest.approx(1.0) and p(5.0)[0] == 2.0


def test_balancing_removes_the_effect_of_badly_scaled_states():
    """A constant change of state units must not wreck the bound.

    Outside reference: a similarity transform x = S z leaves every frozen loop
    and every trajectory's stability unchanged (basic linear algebra), so a
    sensible bound should not shrink by the 1e8 that S = diag(1, 1e4)
    inflicts on the raw Lyapunov sensitivity. Balancing (Parlett and Reinsch
    1969) recovers the well-scaled bound up to the powers of two it uses.
    """
    from schedule.rate import rate_bounds

    p = np.linspace(0.0, 1.0, 7)
    A = np.stack([np.array([[-1.0, 2.0 + p_], [-(2.0 + p_), -1.5]]) for p_ in p])
    dA = np.stack([np.array([[0.0, 1.0], [-1.0, 0.0]])[None] for _ in p])
    S = np.diag([1.0, 1e4])
    Si = np.diag([1.0, 1e-4])
    A_bad = Si @ A @ S
    dA_bad = Si @ dA @ S
    good = rate_bounds(A, dA, balance=False).single[0]
    raw = rate_bounds(A_bad, dA_bad, balance=False).single[0]
    balanced = rate_bounds(A_bad, dA_bad).single[0]
    assert raw < 1e-3 * good          # the raw bound collapses with the units
    assert 0.25 * good < balanced < 4.0 * good
