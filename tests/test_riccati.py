"""Tests of schedule.riccati against scipy.linalg.solve_continuous_are and hand algebra."""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
from hypothesis import given, settings
from hypothesis import strategies as st

from schedule.riccati import hamiltonian, relative_residual, solve_riccati


def _stable(M):
    return np.max(np.linalg.eigvals(M).real) < 0


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 8), m=st.integers(1, 3))
def test_definite_case_matches_scipy(seed, n, m):
    # Reference: scipy.linalg.solve_continuous_are solves A'X + XA - X B Rr^-1 B' X + Q = 0;
    # in our convention R = -B Rr^-1 B'.
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, n))
    B = rng.standard_normal((n, m))
    Cq = rng.standard_normal((n, n))
    Q = Cq.T @ Cq + 1e-3 * np.eye(n)
    Rr = np.eye(m)
    ref = sla.solve_continuous_are(A, B, Q, Rr)
    res = solve_riccati(A, -B @ B.T, Q)
    assert res.ok, res.reason
    np.testing.assert_allclose(res.X, ref, rtol=1e-6, atol=1e-8 * max(1, np.abs(ref).max()))
    assert res.residual < 1e-9
    assert _stable(A - B @ B.T @ res.X)
    np.testing.assert_array_equal(res.X, res.X.T)


def test_scalar_closed_form():
    # a x + x a + r x^2 + q = 0 -> stabilizing x = (-a - sqrt(a^2 - r q)) / r (hand algebra,
    # the root giving a + r x = -sqrt(a^2 - r q) < 0).
    for a, r, q in [(1.0, -1.0, 1.0), (-2.0, -0.5, 3.0), (0.5, 0.25, -0.1), (-1.0, 0.5, 1.0)]:
        x = (-a - np.sqrt(a * a - r * q)) / r
        res = solve_riccati(np.array([[a]]), np.array([[r]]), np.array([[q]]))
        assert res.ok, res.reason
        assert abs(res.X[0, 0] - x) <= 1e-12 * max(1, abs(x))


def test_indefinite_case_residual_and_stability():
    # H-infinity type R = gamma^-2 B1 B1' - B2 B2' (indefinite); check the equation itself.
    rng = np.random.default_rng(3)
    n = 6
    A = rng.standard_normal((n, n))
    B1 = rng.standard_normal((n, 2))
    B2 = rng.standard_normal((n, 2))
    C1 = rng.standard_normal((3, n))
    gamma = 50.0
    R = B1 @ B1.T / gamma**2 - B2 @ B2.T
    Q = C1.T @ C1
    res = solve_riccati(A, R, Q)
    assert res.ok, res.reason
    X = res.X
    assert np.linalg.norm(A.T @ X + X @ A + X @ R @ X + Q) < 1e-9 * np.linalg.norm(Q)
    assert _stable(A + R @ X)


def test_imaginary_axis_eigenvalue_reported():
    # a = 0, r = 0: H = [0 0; -q 0] has a double eigenvalue at 0 -> no stabilizing solution.
    res = solve_riccati(np.zeros((1, 1)), np.zeros((1, 1)), np.ones((1, 1)))
    assert not res.ok and "imaginary axis" in res.reason
    # Oscillator without control: H has eigenvalues +-j (no stable subspace of dimension n).
    A = np.array([[0.0, 1.0], [-1.0, 0.0]])
    res = solve_riccati(A, np.zeros((2, 2)), np.eye(2))
    assert not res.ok and "imaginary axis" in res.reason and "\n" not in res.reason


def test_badly_scaled_states():
    # States in very different units (diagonal similarity with 1e4 spread): the solution
    # transforms as X -> T' X T, compare with scipy on the unscaled problem.
    rng = np.random.default_rng(5)
    n = 4
    A = rng.standard_normal((n, n))
    B = rng.standard_normal((n, 1))
    Q = np.eye(n)
    T = np.diag([1e-2, 1.0, 1e2, 1.0])
    Ti = np.linalg.inv(T)
    At, Bt, Qt = Ti @ A @ T, Ti @ B, T.T @ Q @ T
    ref = T.T @ sla.solve_continuous_are(A, B, Q, np.eye(1)) @ T
    res = solve_riccati(At, -Bt @ Bt.T, Qt)
    assert res.ok, res.reason
    np.testing.assert_allclose(res.X, ref, rtol=1e-7, atol=1e-10 * np.abs(ref).max())


def test_hamiltonian_and_residual_helpers():
    A = np.array([[1.0, 2.0], [0.0, -1.0]])
    R = -np.eye(2)
    Q = np.eye(2)
    H = hamiltonian(A, R, Q)
    J = np.block([[np.zeros((2, 2)), np.eye(2)], [-np.eye(2), np.zeros((2, 2))]])
    # Hamiltonian structure: J H is symmetric (definition of a Hamiltonian matrix).
    np.testing.assert_allclose(J @ H, (J @ H).T)
    assert relative_residual(A, R, Q, np.zeros((2, 2))) > 0.1


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 10))
def test_ordered_schur_matches_scipy_sorted_schur(seed, n):
    # Reference: scipy.linalg.schur(sort="lhp") (LAPACK dgees with its sort callback). Our
    # direct dgees + dtrsen does the same LAPACK work, so the factors agree to rounding and
    # the eigenvalues of negative real part lead.
    from schedule.riccati import ordered_schur

    rng = np.random.default_rng(seed)
    H = rng.standard_normal((2 * n, 2 * n))
    T, Z, wr, wi, k = ordered_schur(H)
    Tr, Zr, kr = sla.schur(H, output="real", sort="lhp")
    assert k == kr
    np.testing.assert_allclose(Z @ T @ Z.T, H, atol=1e-10 * np.abs(H).sum())
    np.testing.assert_allclose(np.abs(np.diag(T)), np.abs(np.diag(Tr)), rtol=1e-8, atol=1e-10)
    assert np.all(wr[:k] < 0) and np.all(wr[k:] >= 0)
    # the leading k Schur vectors span the same (stable) invariant subspace
    P1, P2 = Z[:, :k] @ Z[:, :k].T, Zr[:, :kr] @ Zr[:, :kr].T
    np.testing.assert_allclose(P1, P2, atol=1e-7)


def test_axis_measure_of_scalar_hamiltonian():
    # H = [a, r; -q, -a] has eigenvalues +-sqrt(a^2 - r q) (hand algebra). The signed
    # measure is -(a^2 - r q) on both sides of the collision at the origin.
    from schedule.riccati import hamiltonian, stable_solution

    for a, r, q in [(0.5, -1.0, 1.0), (0.1, 1.0, 0.5), (0.0, 1.0, 2.0), (2.0, 1.0, 3.0)]:
        H = hamiltonian(np.array([[a]]), np.array([[r]]), np.array([[q]]))
        X, _ev, code, _v, _m, axis = stable_solution(H, 1, float(np.abs(H).sum(axis=0).max()))
        disc = a * a - r * q
        assert abs(axis + disc) <= 1e-12 * max(1.0, abs(disc))
        assert (code == 0) == (disc > 0) and (X is None) == (disc < 0)
