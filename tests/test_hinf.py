"""Tests of schedule.hinf against outside references.

References used here:
- closed-form scalar problem (derived in the docstring of test_scalar_problem_closed_form);
- the LMI characterization of Gahinet and Apkarian (1994), solved with cvxpy + clarabel;
- closed-loop norms by an independent dense frequency sweep with local refinement
  (scipy.optimize.minimize_scalar), not by the package's own norm code;
- the H2 limit gamma -> inf (Doyle, Glover, Khargonekar and Francis 1989, section V:
  the central controller tends to the LQG controller), LQR/Kalman from
  scipy.linalg.solve_continuous_are;
- the loop-shift identity K = K0 (I + D22 K0)^-1 (Zhou, Doyle and Glover 1996, sec. 17.2)
  checked on frequency responses.
"""

from __future__ import annotations

import cvxpy as cp
import numpy as np
import pytest
import scipy.linalg as sla
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize_scalar

from schedule.errors import (
    InfeasibleGammaError,
    InputError,
    NumericalError,
    PlantError,
    ScheduleError,
)
from schedule.hinf import (
    PIECE_KEYS,
    Controller,
    ObserverPieces,
    assemble_controller,
    central_controller,
    gamma_lower_bound,
    optimal_gamma,
)
from schedule.plant import GeneralizedPlant

# ------------------------------------------------------------------ helpers (independent)


def random_plant(rng, n, nw, nu, nz, ny, d11=0.3, d22=0.5):
    """Random plant with every D block nonzero and D12/D21 not normalized."""
    r = rng.standard_normal
    return GeneralizedPlant(
        A=r((n, n)),
        B1=r((n, nw)),
        B2=r((n, nu)),
        C1=r((nz, n)),
        C2=r((ny, n)),
        D11=d11 * r((nz, nw)),
        D12=r((nz, nu)),
        D21=r((ny, nw)),
        D22=d22 * r((ny, nu)),
    )


def lower_lft(p, K):
    """Closed loop of plant p with u = K y (K = (Ak, Bk, Ck, Dk)), written out by hand."""
    Ak, Bk, Ck, Dk = K
    n, nk = p.n, Ak.shape[0]
    E = np.linalg.inv(np.eye(p.nu) - Dk @ p.D22)
    Fu = E @ np.hstack([Dk @ p.C2, Ck])
    Gu = E @ Dk @ p.D21
    Fy = np.hstack([p.C2, np.zeros((p.ny, nk))]) + p.D22 @ Fu
    Gy = p.D21 + p.D22 @ Gu
    A = np.block([[p.A, np.zeros((n, nk))], [np.zeros((nk, n)), Ak]]) + np.vstack(
        [p.B2 @ Fu, Bk @ Fy]
    )
    B = np.vstack([p.B1 + p.B2 @ Gu, Bk @ Gy])
    C = np.hstack([p.C1, np.zeros((p.nz, nk))]) + p.D12 @ Fu
    D = p.D11 + p.D12 @ Gu
    return A, B, C, D


def freq_response(A, B, C, D, w):
    """G(jw) for a vector of frequencies via stacked solves."""
    n = A.shape[0]
    M = 1j * np.asarray(w)[:, None, None] * np.eye(n) - A
    return C @ np.linalg.solve(M, np.broadcast_to(B, (len(w),) + B.shape)) + D


def sweep_norm(A, B, C, D):
    """H-infinity norm by a dense log grid plus the pole frequencies, refined locally."""
    poles = np.linalg.eigvals(A)
    scale = max(1.0, np.abs(poles).max())
    w = np.concatenate([[0.0], np.logspace(-5, np.log10(scale) + 3, 3000), np.abs(poles.imag)])
    sv = np.linalg.norm(freq_response(A, B, C, D, w), ord=2, axis=(1, 2))
    k = int(np.argmax(sv))
    best = max(sv[k], np.linalg.norm(D, 2))
    lo, hi = (w[k] * 0.98, w[k] * 1.02) if w[k] > 0 else (0.0, 1e-5)

    def f(x):
        return -np.linalg.norm(freq_response(A, B, C, D, [x])[0], 2)

    r = minimize_scalar(f, bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
    return max(best, -r.fun)


def assert_meets(plant, K, gamma):
    A, B, C, D = lower_lft(plant, K)
    assert np.max(np.linalg.eigvals(A).real) < 0, "closed loop unstable"
    nrm = sweep_norm(A, B, C, D)
    assert nrm < gamma, f"closed-loop norm {nrm} >= gamma {gamma}"
    return nrm


# ------------------------------------------------------------------ analytic scalar problem


def scalar_plant(a):
    return GeneralizedPlant(
        A=[[a]],
        B1=[[1.0, 0.0]],
        B2=[[1.0]],
        C1=[[1.0], [0.0]],
        C2=[[1.0]],
        D11=np.zeros((2, 2)),
        D12=[[0.0], [1.0]],
        D21=[[0.0, 1.0]],
        D22=[[0.0]],
    )


@pytest.mark.parametrize("a", [-3.0, -1.0, -0.2, 0.0, 0.5, 1.0, 4.0])
def test_scalar_problem_closed_form(a):
    """xdot = a x + w1 + u, z = [x; u], y = x + w2 (derived by hand, no reference program).

    The data are normalized (D12 = [0; 1], D21 = [0 1], D12'C1 = 0, B1 D21' = 0, D11 = 0),
    so with c = 1 - gamma^-2 the X Riccati equation is
        2 a X - c X^2 + 1 = 0,   stabilizing root X = (a + sqrt(a^2 + c)) / c
    (closed loop a - c X = -sqrt(a^2 + c) < 0). The Y equation is identical (duality:
    B1 B1' = C1'C1 = 1, C2'C2 = B2 B2' = 1), so Y = X and rho(XY) = X^2.
    Full-information bound: X exists and X >= 0 iff gamma > 1 for a >= 0, and iff
    gamma > 1 / sqrt(1 + a^2) for a < 0 (a^2 + c > 0).
    Coupling X < gamma: at X = gamma the Riccati equation reads gamma^2 - 2 a gamma - 2 = 0,
    whose positive root gamma* = a + sqrt(a^2 + 2) is the stabilizing one
    (a - c gamma* = -(a + sqrt(a^2 + 2)) / 2 < 0). X(gamma) decreases with gamma, so
        gamma_opt = a + sqrt(a^2 + 2)   (e.g. sqrt(2) for a = 0).
    """
    p = scalar_plant(a)
    g_star = a + np.sqrt(a * a + 2.0)
    g = optimal_gamma(p, rtol=1e-5)
    assert g_star * (1 - 1e-9) <= g <= g_star * (1 + 2e-5)
    g_fi = 1.0 if a >= 0 else 1.0 / np.sqrt(1.0 + a * a)
    lb = gamma_lower_bound(p)
    assert g_fi * (1 - 2e-3) <= lb <= g_fi * (1 + 1e-9)
    below = 0.99 * g_star
    # which condition fails first below gamma*: the coupling one unless gamma is also
    # below the full-information bound (a = -3: 0.99 gamma* < 1/sqrt(10))
    expected = "coupling condition" if below > g_fi else "X Riccati"
    with pytest.raises(InfeasibleGammaError, match=expected):
        central_controller(p, below)
    K = central_controller(p, 1.05 * g_star)
    assert_meets(p, K.as_tuple(), 1.05 * g_star)


def test_scalar_below_full_information_bound_names_x_riccati():
    # a = 1: gamma = 0.9 < 1 gives c < 0 and a^2 + c = 1 - 1/0.81 + 1 > 0 but the stabilizing
    # root X = (a + sqrt(a^2 + c)) / c is negative (hand algebra): "X not positive semidefinite".
    with pytest.raises(InfeasibleGammaError, match="X not positive semidefinite"):
        central_controller(scalar_plant(1.0), 0.9)


# ------------------------------------------------------------------ LMI reference


def lmi_optimal_gamma(p):
    """Gahinet and Apkarian (1994), Theorem 4.3: minimize gamma over R, S symmetric with
    N_R'(...)N_R < 0, N_S'(...)N_S < 0, [R I; I S] >= 0 (D22 = 0 form; gamma_opt does not
    depend on D22 because K <-> K (I - D22 K)^-1 is a bijection of well-posed controllers)."""
    n, nw, nz = p.n, p.nw, p.nz
    NR = sla.null_space(np.hstack([p.B2.T, p.D12.T]))
    NS = sla.null_space(np.hstack([p.C2, p.D21]))
    R = cp.Variable((n, n), symmetric=True)
    S = cp.Variable((n, n), symmetric=True)
    g = cp.Variable()
    A, B1, C1, D11 = p.A, p.B1, p.C1, p.D11
    M1 = cp.bmat(
        [
            [A @ R + R @ A.T, R @ C1.T, B1],
            [C1 @ R, -g * np.eye(nz), D11],
            [B1.T, D11.T, -g * np.eye(nw)],
        ]
    )
    M2 = cp.bmat(
        [
            [A.T @ S + S @ A, S @ B1, C1.T],
            [B1.T @ S, -g * np.eye(nw), D11.T],
            [C1, D11, -g * np.eye(nz)],
        ]
    )
    T1 = sla.block_diag(NR, np.eye(nw))
    T2 = sla.block_diag(NS, np.eye(nz))
    L1 = T1.T @ M1 @ T1
    L2 = T2.T @ M2 @ T2
    eps = 1e-7
    cons = [
        0.5 * (L1 + L1.T) << -eps * np.eye(L1.shape[0]),
        0.5 * (L2 + L2.T) << -eps * np.eye(L2.shape[0]),
        cp.bmat([[R, np.eye(n)], [np.eye(n), S]]) >> 0,
    ]
    prob = cp.Problem(cp.Minimize(g), cons)
    prob.solve(solver=cp.CLARABEL)
    return float(g.value), prob.status


@pytest.mark.filterwarnings("ignore:Solution may be inaccurate")
@pytest.mark.parametrize("seed, n", [(11, 3), (12, 4), (13, 5), (14, 6), (15, 8), (16, 10)])
def test_optimal_gamma_matches_lmi(seed, n):
    rng = np.random.default_rng(seed)
    dims = [(3, 2, 3, 2), (2, 1, 2, 1), (3, 1, 2, 2), (4, 2, 3, 1)][seed % 4]
    for _ in range(5):  # an SDP answer flagged inaccurate by the solver is no reference: redraw
        p = random_plant(rng, n, *dims)
        ref, status = lmi_optimal_gamma(p)
        if status == cp.OPTIMAL:
            break
    assert status == cp.OPTIMAL
    g = optimal_gamma(p)
    assert abs(g / ref - 1) < 1e-3, (g, ref)


# ------------------------------------------------------------------ controllers


@pytest.mark.parametrize("seed", range(6))
def test_controller_meets_gamma_frequency_sweep(seed):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(2, 7))
    nu, ny = int(rng.integers(1, 3)), int(rng.integers(1, 3))
    p = random_plant(rng, n, ny + int(rng.integers(0, 3)), nu, nu + int(rng.integers(0, 3)), ny)
    g = optimal_gamma(p)
    for factor in (1.05, 1.5):
        K = central_controller(p, factor * g)
        assert isinstance(K, Controller) and K.gamma == factor * g
        nrm = assert_meets(p, K.as_tuple(), factor * g)
        if factor == 1.05:
            # the central controller is near-optimal: the bound is nearly attained
            # (common practice, loose: within 15 % of the optimum)
            assert nrm > 0.85 * g


def test_assemble_reproduces_central_controller_and_pieces_roundtrip():
    rng = np.random.default_rng(7)
    p = random_plant(rng, 5, 3, 2, 3, 2)
    gamma = 1.1 * optimal_gamma(p)
    K = central_controller(p, gamma)
    d = K.pieces.to_arrays()
    assert tuple(d) == PIECE_KEYS
    n = p.n
    shapes = {
        "state_feedback": (p.nu, n),
        "worst_disturbance": (p.nw, n),
        "observer_gain": (n, p.ny),
        "performance_injection": (n, p.nz),
        "Z": (n, n),
    }
    assert {k: v.shape for k, v in d.items()} == shapes
    rebuilt = assemble_controller(p, ObserverPieces.from_arrays(d), gamma)
    for a, b in zip(rebuilt, K.as_tuple(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * max(1, np.abs(b).max()))


def test_h2_limit_large_gamma():
    # Normalized plant with D12'C1 = 0, B1 D21' = 0, D11 = D22 = 0: as gamma -> inf the
    # central controller tends to the LQG controller (DGKF 1989, sec. V):
    # Ck -> -B2' X2, Bk -> Y2 C2', with X2, Y2 from scipy's solve_continuous_are.
    rng = np.random.default_rng(3)
    n = 4
    A = rng.standard_normal((n, n))
    B2 = rng.standard_normal((n, 1))
    C2 = rng.standard_normal((1, n))
    Cz = rng.standard_normal((2, n))
    Bw = rng.standard_normal((n, 2))
    p = GeneralizedPlant(
        A=A,
        B1=np.hstack([Bw, np.zeros((n, 1))]),
        B2=B2,
        C1=np.vstack([Cz, np.zeros((1, n))]),
        C2=C2,
        D11=np.zeros((3, 3)),
        D12=np.array([[0.0], [0.0], [1.0]]),
        D21=np.array([[0.0, 0.0, 1.0]]),
        D22=np.zeros((1, 1)),
    )
    X2 = sla.solve_continuous_are(A, B2, Cz.T @ Cz, np.eye(1))
    Y2 = sla.solve_continuous_are(A.T, C2.T, Bw @ Bw.T, np.eye(1))
    K = central_controller(p, 1e7)
    np.testing.assert_allclose(K.C, -B2.T @ X2, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(K.B, Y2 @ C2.T, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(K.D, 0.0, atol=1e-12)


def test_loop_shift_identity_on_frequency_response():
    # K for the plant with D22 must equal K0 (I + D22 K0)^-1 with K0 designed for D22 = 0
    # (u = K y convention); checked on K(jw) at a few frequencies.
    rng = np.random.default_rng(21)
    p = random_plant(rng, 4, 3, 2, 3, 2, d22=0.7)
    d = p.to_arrays()
    d["D22"] = np.zeros_like(d["D22"])
    p0 = GeneralizedPlant(**d)
    gamma = 1.2 * optimal_gamma(p)
    assert abs(optimal_gamma(p0) / optimal_gamma(p) - 1) < 1e-3  # gamma_opt independent of D22
    K = central_controller(p, gamma)
    K0 = central_controller(p0, gamma)
    w = np.array([0.0, 0.3, 2.0, 15.0])
    Kw = freq_response(*K.as_tuple(), w)
    K0w = freq_response(*K0.as_tuple(), w)
    for k in range(len(w)):
        ref = K0w[k] @ np.linalg.inv(np.eye(p.ny) + p.D22 @ K0w[k])
        np.testing.assert_allclose(Kw[k], ref, rtol=1e-8, atol=1e-10)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**31 - 1),
    n=st.integers(1, 5),
    nu=st.integers(1, 2),
    ny=st.integers(1, 2),
    extra_w=st.integers(0, 2),
    extra_z=st.integers(0, 2),
    sparse=st.booleans(),
)
def test_property_named_failure_or_controller_meeting_gamma(
    seed, n, nu, ny, extra_w, extra_z, sparse
):
    rng = np.random.default_rng(seed)
    p = random_plant(rng, n, ny + extra_w, nu, nu + extra_z, ny)
    if sparse:  # knock out entries to provoke uncontrollable/unobservable/rank-deficient cases
        d = p.to_arrays()
        for k in ("A", "B2", "C2", "D12", "D21"):
            d[k] = d[k] * (rng.random(d[k].shape) < 0.5)
        p = GeneralizedPlant(**d)
    try:
        g = optimal_gamma(p)
        K = central_controller(p, 1.1 * g)
    except ScheduleError as exc:
        msg = str(exc)
        assert msg and "\n" not in msg
        # a closed loop whose norm rounding leaves in doubt (slow poles beside fast ones,
        # e.g. seed 71396: ||A|| 9e4, pole spread 1e-3) is refused with the numbers
        certify = isinstance(exc, NumericalError) and "central controller at gamma" in msg
        assert isinstance(exc, (PlantError, InfeasibleGammaError)) or certify
        return
    assert_meets(p, K.as_tuple(), 1.1 * g)


# ------------------------------------------------------------------ bad input


def test_gamma_not_positive():
    p = scalar_plant(1.0)
    for bad in (0.0, -1.0, float("nan"), float("inf")):
        with pytest.raises(InputError, match="gamma"):
            central_controller(p, bad)


def test_gamma_below_optimum_names_condition():
    rng = np.random.default_rng(8)
    p = random_plant(rng, 4, 3, 1, 2, 2)
    g = optimal_gamma(p)
    with pytest.raises(InfeasibleGammaError) as err:
        central_controller(p, 0.9 * g)
    msg = str(err.value)
    assert "\n" not in msg
    assert any(
        k in msg
        for k in (
            "X Riccati",
            "Y Riccati",
            "X not positive",
            "Y not positive",
            "coupling condition",
            "D11 bound",
        )
    )
    assert "gamma=" in msg


def test_gamma_below_parrott_bound():
    # D11 = [[2]] with D12 = [0;1]-type structure: z1 = 2 w1 cannot be touched by u or seen
    # by y, so every closed loop has norm >= 2 (Parrott; hand argument).
    p = GeneralizedPlant(
        A=[[-1.0]],
        B1=[[1.0, 0.0]],
        B2=[[1.0]],
        C1=[[1.0], [0.0]],
        C2=[[1.0]],
        D11=[[2.0, 0.0], [0.0, 0.0]],
        D12=[[0.0], [1.0]],
        D21=[[0.0, 1.0]],
        D22=[[0.0]],
    )
    assert gamma_lower_bound(p) >= 2.0
    assert optimal_gamma(p) >= 2.0
    with pytest.raises(InfeasibleGammaError, match="D11 bound 2"):
        central_controller(p, 1.5)


def test_synthesis_checks_plant_conditions():
    d = scalar_plant(1.0).to_arrays()
    d["D12"] = np.zeros((2, 1))
    with pytest.raises(PlantError, match="D12"):
        optimal_gamma(GeneralizedPlant(**d))
    with pytest.raises(PlantError, match="D12"):
        central_controller(GeneralizedPlant(**d), 10.0)
    d = scalar_plant(0.0).to_arrays()
    d["C1"] = np.zeros((2, 1))  # integrator invisible in z: zero at w = 0
    with pytest.raises(PlantError, match="w=0"):
        optimal_gamma(GeneralizedPlant(**d))


# ------------------------------------------------------------------ many plants in lockstep


def test_synthesize_many_agrees_with_scalar_path_and_reports_failures():
    from schedule.hinf import synthesize_many

    rng = np.random.default_rng(31)
    base = random_plant(rng, 5, 3, 2, 3, 2)
    plants = []
    for _ in range(6):
        d = base.to_arrays()
        for k in d:
            d[k] = d[k] + 0.05 * rng.standard_normal(d[k].shape)
        plants.append(GeneralizedPlant(**d))
    bad = plants[2].to_arrays()
    bad["D12"] = np.zeros_like(bad["D12"])  # rank-deficient: must come back as a reason
    plants.insert(2, GeneralizedPlant(**bad))
    plants.append(scalar_plant(1.0))  # other sizes are grouped separately
    res = synthesize_many(plants)
    assert len(res) == len(plants)
    assert np.isnan(res[2][0]) and res[2][1] is None and "D12" in res[2][2]
    for i, (g, K, reason) in enumerate(res):
        if i == 2:
            continue
        assert reason == "" and K is None
        ref = optimal_gamma(plants[i])
        assert abs(g / ref - 1) < 2e-4
    # the analytic value for the scalar plant (see test_scalar_problem_closed_form)
    assert abs(res[-1][0] / (1 + np.sqrt(3.0)) - 1) < 2e-4
    gamma = 1.1 * max(r[0] for r in res if not r[2])
    res2 = synthesize_many(plants, gamma=gamma, gamma_opt=[r[0] for r in res])
    for i, (_g, K, reason) in enumerate(res2):
        if i == 2:
            assert K is None and "D12" in reason
            continue
        assert reason == ""
        ref = central_controller(plants[i], gamma)
        for a, b in zip(K.as_tuple(), ref.as_tuple(), strict=True):
            np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-10 * max(1, np.abs(b).max()))
        assert_meets(plants[i], K.as_tuple(), gamma)


def test_synthesize_many_below_optimum_gives_reason_not_exception():
    from schedule.hinf import synthesize_many

    res = synthesize_many([scalar_plant(0.0), scalar_plant(2.0)], gamma=2.0)
    # gamma_opt = a + sqrt(a^2 + 2): 1.414 (feasible at 2) and 4.449 (infeasible at 2)
    assert res[0][1] is not None and res[0][2] == ""
    assert res[1][1] is None and "gamma=2" in res[1][2]
    with pytest.raises(InputError):
        synthesize_many([scalar_plant(0.0)], gamma=-1.0)


# ------------------------------------------------------------------ coordinate invariance


def _orthogonal(rng, k):
    q, r = np.linalg.qr(rng.standard_normal((k, k)))
    return q * np.sign(np.diag(r))


def test_signal_coordinates_change_controller_as_theory_says():
    # Same problem in other signal coordinates (z' = Qz z, w = Qw' w', u = M u'):
    # ||z'|| = ||z||, ||w'|| = ||w||, so gamma_opt is unchanged, and the controller is
    # K' = M^-1 K on the same (plant-state) realization; the pieces transform the same way
    # (hand algebra on the definitions in ObserverPieces).
    rng = np.random.default_rng(41)
    p = random_plant(rng, 5, 3, 2, 4, 2)
    Qz, Qw = _orthogonal(rng, 4), _orthogonal(rng, 3)
    M = rng.standard_normal((2, 2)) + 2 * np.eye(2)
    q = GeneralizedPlant(
        A=p.A,
        B1=p.B1 @ Qw.T,
        B2=p.B2 @ M,
        C1=Qz @ p.C1,
        C2=p.C2,
        D11=Qz @ p.D11 @ Qw.T,
        D12=Qz @ p.D12 @ M,
        D21=p.D21 @ Qw.T,
        D22=p.D22 @ M,
    )
    g = optimal_gamma(p)
    assert abs(optimal_gamma(q) / g - 1) < 2e-4
    K = central_controller(p, 1.2 * g)
    Kq = central_controller(q, 1.2 * g)
    Mi = np.linalg.inv(M)
    tol = dict(rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(Kq.A, K.A, **tol)
    np.testing.assert_allclose(Kq.B, K.B, **tol)
    np.testing.assert_allclose(Kq.C, Mi @ K.C, **tol)
    np.testing.assert_allclose(Kq.D, Mi @ K.D, **tol)
    np.testing.assert_allclose(Kq.pieces.Z, K.pieces.Z, **tol)
    np.testing.assert_allclose(Kq.pieces.state_feedback, Mi @ K.pieces.state_feedback, **tol)
    np.testing.assert_allclose(Kq.pieces.worst_disturbance, Qw @ K.pieces.worst_disturbance, **tol)
    np.testing.assert_allclose(Kq.pieces.observer_gain, K.pieces.observer_gain, **tol)


def test_interpolated_pieces_give_nearby_controller():
    # Stilwell and Rugh (1999): interpolating the plant and the observer-form pieces
    # separately and re-assembling gives the controller of the in-between plant up to
    # O(h^2). Linear interpolation over a step h = 0.01 of a smooth path P0 + t P1.
    rng = np.random.default_rng(42)
    p0 = random_plant(rng, 4, 3, 2, 3, 2)
    p1 = random_plant(rng, 4, 3, 2, 3, 2)

    def at(t):
        return GeneralizedPlant(
            **{k: getattr(p0, k) + 0.3 * t * getattr(p1, k) for k in p0.to_arrays()}
        )

    gamma = 1.3 * max(optimal_gamma(at(0.0)), optimal_gamma(at(0.01)))
    a = central_controller(at(0.0), gamma).pieces.to_arrays()

    def error(h):
        b = central_controller(at(h), gamma).pieces.to_arrays()
        mid = ObserverPieces.from_arrays({k: 0.5 * (a[k] + b[k]) for k in a})
        K_interp = assemble_controller(at(h / 2), mid, gamma)
        K_true = central_controller(at(h / 2), gamma)
        scale = max(np.abs(y).max() for y in K_true.as_tuple())
        return (
            max(np.abs(x - y).max() for x, y in zip(K_interp, K_true.as_tuple(), strict=True))
            / scale
        )

    e1, e2 = error(0.01), error(0.005)
    assert e2 < 1e-3
    assert e2 / e1 < 0.35  # halving h divides the error by about 4: second order


def test_agrees_with_package_norms_module():
    # Integration with schedule.norms (another module, checked there against its own
    # references): same closed-loop poles as the hand-written LFT above, norm below gamma.
    norms = pytest.importorskip("schedule.norms")
    rng = np.random.default_rng(51)
    p = random_plant(rng, 4, 3, 2, 3, 2)
    gamma = 1.1 * optimal_gamma(p)
    K = central_controller(p, gamma)
    A, B, C, D = norms.closed_loop(p, K)
    A2 = lower_lft(p, K.as_tuple())[0]
    np.testing.assert_allclose(
        np.sort_complex(np.linalg.eigvals(A)),
        np.sort_complex(np.linalg.eigvals(A2)),
        rtol=1e-8,
        atol=1e-10,
    )
    nrm, _peak = norms.h_infinity_norm(A, B, C, D)
    assert nrm < gamma
    assert abs(nrm / sweep_norm(A, B, C, D) - 1) < 1e-4


def test_stiff_plant_with_slow_and_fast_modes():
    # The scalar problem above (a = 1) plus two decoupled stable modes at -0.004 and -1e5 that
    # neither w nor u excite and neither z nor y see: they change nothing, so gamma_opt is
    # still 1 + sqrt(3) (hand argument). The slow mode gives Hamiltonian eigenvalues +-0.004
    # with ||H|| ~ 1e5: a genuine slow pole, not an imaginary-axis eigenvalue.
    p = scalar_plant(1.0).to_arrays()
    p["A"] = np.diag([1.0, -0.004, -1e5])
    p["B1"] = np.vstack([p["B1"], np.zeros((2, 2))])
    p["B2"] = np.vstack([p["B2"], np.zeros((2, 1))])
    p["C1"] = np.hstack([p["C1"], np.zeros((2, 2))])
    p["C2"] = np.hstack([p["C2"], np.zeros((1, 2))])
    plant = GeneralizedPlant(**p)
    g_star = 1.0 + np.sqrt(3.0)
    assert abs(optimal_gamma(plant) / g_star - 1) < 2e-4
    K = central_controller(plant, 1.05 * g_star)
    assert_meets(plant, K.as_tuple(), 1.05 * g_star)


# ------------------------------------------------------------------ quick tests and searches


def _scalar_c(gamma):
    return 1.0 - gamma**-2


@pytest.mark.parametrize("a", [1.0, -3.0])
def test_quick_measures_match_scalar_closed_form(a):
    # Hand algebra (see test_scalar_problem_closed_form): the X Hamiltonian is
    # [a, -c; -1, -a] with eigenvalues +-sqrt(a^2 + c), c = 1 - gamma^-2, and
    # X = (a + sqrt(a^2 + c)) / c. So the imaginary-axis measure (-min Re(lambda)^2 above
    # the collision, +(half gap)^2 below) is -(a^2 + c) on both sides, the blow-up
    # measure is -1/X, and the coupling measure is X^2/gamma^2 - 1 (Y = X).
    from schedule.hinf import (
        M_COUPLING,
        M_XAXIS,
        M_XPSD,
        M_YAXIS,
        M_YPSD,
        _Quick,
        _Stacked,
        normalize,
    )

    P = normalize(scalar_plant(a))
    quick, stacked = _Quick(P), _Stacked([P])
    g_fi = 1.0 if a >= 0 else 1.0 / np.sqrt(1.0 + a * a)
    g_star = a + np.sqrt(a * a + 2.0)
    for gamma in (0.9 * g_fi, 0.99 * g_fi, 1.01 * g_star, 1.5 * g_star, 4 * g_star):
        c = _scalar_c(gamma)
        feas, m = quick(gamma)
        bf, bm = stacked(np.array([0]), np.array([gamma]))
        assert feas == bool(bf[0]) == (gamma > g_star)
        if gamma > g_star:
            X = (a + np.sqrt(a * a + c)) / c
            expect = {M_XPSD: -1 / X, M_YPSD: -1 / X, M_COUPLING: X * X / gamma**2 - 1,
                      M_XAXIS: -(a * a + c), M_YAXIS: -(a * a + c)}
        elif a < 0:  # below the full-information bound: eigenvalues on the axis
            expect = {M_XAXIS: -(a * a + c)}
        else:  # c < 0: X exists but is negative, -1/X > 0
            expect = {M_XPSD: -c / (a + np.sqrt(a * a + c))}
        for j, row in enumerate((np.asarray(m), bm[0])):
            for k in range(len(row)):
                if j == 0 and k == M_COUPLING and np.isnan(row[k]) and k in expect:
                    # the quick test skips rho(XY) when lmax(X) lmax(Y) < gamma^2 / 4
                    assert expect[k] + 1 < 0.25
                elif k in expect:
                    assert abs(row[k] - expect[k]) <= 1e-8 * max(1.0, abs(expect[k])), (k, row)
                else:
                    assert np.isnan(row[k]), (k, row)


def _fake_test(g_star, kind, shape):
    """Feasible iff gamma > g_star, with a measure of the given shape in column `kind`."""
    from schedule.hinf import N_MEASURES

    def meas(g):
        m = np.full(N_MEASURES, np.nan)
        m[kind] = {"log": np.log(g_star / g), "square": g_star**2 - g**2,
                   "none": np.nan}[shape]
        return g > g_star, m

    return meas


@pytest.mark.parametrize("shape", ["log", "square", "none"])
@pytest.mark.parametrize("hint", [None, 0.97, 1.2])
def test_scalar_and_lockstep_searches_find_analytic_root(shape, hint):
    # Reference: the root g_star of the made-up test (known exactly). The scalar search and
    # the lockstep search implement the same steps: both must bracket g_star to rtol,
    # end on the feasible side, and agree with each other to rounding.
    from schedule.hinf import M_YAXIS, _search, _search_one

    rtol = 1e-4
    for g_star, pb in ((2.5, 0.0), (0.013, 0.001), (3e4, 10.0)):
        f = _fake_test(g_star, M_YAXIS, shape)
        h = None if hint is None else hint * g_star
        calls = []

        def counted(g, f=f, calls=calls):
            calls.append(g)
            return f(g)

        one = _search_one(counted, pb, rtol, h)
        assert g_star < one <= g_star * (1 + rtol) ** 2
        many = _search(lambda _i, gs, f=f: tuple(map(np.array, zip(*[f(g) for g in gs],
                                                                     strict=True))),
                       np.array([pb, pb]), rtol, None if h is None else np.array([h, h]))
        np.testing.assert_allclose(many, one, rtol=1e-12)
        if shape != "none":
            # regula falsi on a smooth measure: once bracketed, a few tests instead of the
            # >= 8 halvings of bisection (log2(0.03 / 1e-4) = 8.2 even from a 3 % bracket)
            seen = [bool(g > g_star) for g in calls]
            i = next(i for i in range(len(seen)) if len(set(seen[: i + 1])) == 2)
            lo = max([pb] + [g for g in calls[: i + 1] if g <= g_star])
            hi = min(g for g in calls[: i + 1] if g > g_star)
            halvings = np.log2(np.log(hi / lo) / np.log1p(rtol))
            # from a warm start (bracket of a few %) a handful; from a cold start (wide
            # bracket, halved until it is 25 % wide) never more than plain bisection
            limit = 5 if hint is not None else np.ceil(halvings)
            assert len(calls) - (i + 1) <= limit, calls


@pytest.mark.filterwarnings("ignore:Solution may be inaccurate")
@pytest.mark.parametrize("seed", [21, 22])
def test_quick_path_equals_careful_path_and_lmi(seed):
    # The quick feasibility test (no residual, gamma-independent work done once) drives
    # optimal_gamma; the careful test (full checks at every step) must give the same
    # optimum, and both must match the LMI reference (Gahinet and Apkarian 1994).
    from schedule import hinf

    rng = np.random.default_rng(seed)
    p = random_plant(rng, 4, 3, 2, 3, 2)
    ref, status = lmi_optimal_gamma(p)
    P = hinf.normalize(p)

    def careful(_idx, gs):
        out = [hinf._solve_all(P, float(g), gains=False) for g in gs]
        return np.array([not r[-1] for r in out]), np.array(
            [r[-2] / g**2 - 1 for r, g in zip(out, gs, strict=True)])

    g_careful = float(hinf._search(careful, np.array([P.d11_bound]), 1e-5)[0])
    g_quick = optimal_gamma(p, rtol=1e-5)
    assert abs(g_quick / g_careful - 1) < 2e-5
    if status == cp.OPTIMAL:
        assert abs(g_quick / ref - 1) < 1e-3


def test_checked_controller_is_the_central_controller():
    # Same computation without the condition checks: identical bits (reference: the
    # checked path, itself tested against frequency sweeps above).
    from schedule.hinf import central_controller_checked

    rng = np.random.default_rng(41)
    p = random_plant(rng, 4, 3, 2, 3, 2)
    g = 1.2 * optimal_gamma(p)
    a, b = central_controller(p, g), central_controller_checked(p, g)
    for x, y in zip(a.as_tuple(), b.as_tuple(), strict=True):
        np.testing.assert_array_equal(x, y)
    assert_meets(p, b.as_tuple(), g)
