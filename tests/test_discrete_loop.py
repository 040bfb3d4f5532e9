"""The sampled loop of a discrete table: zero-order hold, stability, norm and margins.

Outside references, named at each test: scipy.signal.cont2discrete (zero-order hold);
numpy's eigenvalue moduli on matrices whose spectral radius is known by construction;
the closed form ||b / (z - a)||_inf = |b| / (1 - |a|) (derived below); the invariance
of the H-infinity norm under Tustin's rule (a frequency warping, Franklin, Powell and
Workman 1998, sec. 6.3; the continuous norm from scipy.signal.freqs_zpk); and
dense evaluations of the discrete transfer functions on the unit circle.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from schedule.analysis.discrete_loop import (
    bilinear_image,
    bilinear_signs,
    discrete_check_arrays,
    discrete_stability,
    zoh_plants,
)
from schedule.export.discretize import discretize

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")


def _response(A, B, C, D, z):
    """Transfer matrices at the complex points ``z`` by direct solves (a plain reference)."""
    n = A.shape[0]
    M = np.asarray(z)[:, None, None] * np.eye(n) - A
    return C @ np.linalg.solve(M, np.broadcast_to(B.astype(complex), (len(z),) + B.shape)) + D


def _as_loop(A, B, C, D):
    """A generalized plant whose closed loop with a do-nothing discrete controller is the
    model (A, B, C, D) itself (plus one decoupled controller state at z = 0.5)."""
    n, m, p = A.shape[0], B.shape[1], C.shape[0]
    P = {"A": A, "B1": B, "B2": np.zeros((n, 1)), "C1": C, "C2": np.zeros((1, n)),
         "D11": D, "D12": np.zeros((p, 1)), "D21": np.zeros((1, m)), "D22": np.zeros((1, 1))}
    K = {"A": np.array([[0.5]]), "B": np.zeros((1, 1)), "C": np.zeros((1, 1)),
         "D": np.zeros((1, 1))}
    return {k: v[None] for k, v in P.items()}, {k: v[None] for k, v in K.items()}


def _lightly_damped(zeta=0.02, w=3.0):
    A = np.array([[0.0, 1.0], [-w * w, -2 * zeta * w]])
    return A, np.array([[0.0], [w * w]]), np.array([[1.0, 0.0]]), np.zeros((1, 1))


def test_zoh_plants_against_scipy_cont2discrete():
    """Every input held over the sample: scipy.signal.cont2discrete(method="zoh")."""
    rng = np.random.default_rng(3)
    n, nw, nu, nz, ny = 4, 2, 1, 2, 2
    P = {"A": rng.normal(size=(n, n)) - 2 * np.eye(n), "B1": rng.normal(size=(n, nw)),
         "B2": rng.normal(size=(n, nu)), "C1": rng.normal(size=(nz, n)),
         "C2": rng.normal(size=(ny, n)), "D11": rng.normal(size=(nz, nw)),
         "D12": rng.normal(size=(nz, nu)), "D21": rng.normal(size=(ny, nw)),
         "D22": np.zeros((ny, nu))}
    T = 0.07
    got = zoh_plants({k: v[None] for k, v in P.items()}, T)
    B = np.hstack([P["B1"], P["B2"]])
    C = np.vstack([P["C1"], P["C2"]])
    D = np.block([[P["D11"], P["D12"]], [P["D21"], P["D22"]]])
    Ad, Bd, Cd, Dd, _ = scipy.signal.cont2discrete((P["A"], B, C, D), T, method="zoh")
    np.testing.assert_allclose(got["A"][0], Ad, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(np.hstack([got["B1"][0], got["B2"][0]]), Bd, rtol=1e-12,
                               atol=1e-13)
    for k in ("C1", "C2", "D11", "D12", "D21", "D22"):
        np.testing.assert_array_equal(got[k][0], P[k])


def test_discrete_stability_against_eigenvalue_moduli():
    """Spectral radius by construction: r times a rotation (radius r), a Jordan block
    (radius lambda, far from normal), the same in badly scaled coordinates; numpy's
    eigenvalue moduli agree, and radius 1 (a pure rotation) is not stable."""
    def rot(r, t):
        return r * np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])

    jordan = np.array([[0.95, 1e3], [0.0, 0.95]])
    S = np.diag([1e-6, 1e6])
    mats = [rot(0.9, 0.3), rot(1.0, 0.3), rot(1.01, 2.0), jordan, S @ jordan @ np.linalg.inv(S),
            np.diag([-0.999, 0.2])]
    st = discrete_stability(np.stack(mats))
    np.testing.assert_allclose(st.radius, [np.abs(np.linalg.eigvals(M)).max() for M in mats],
                               rtol=1e-9)
    assert st.stable.tolist() == [True, False, False, True, True, True]
    assert "unstable" in st.reason(1) or "not certified" in st.reason(1)
    assert "unstable (spectral radius 1.01" in st.reason(2)
    # inside the circle by less than the relative allowance: not certified stable
    near = discrete_stability(rot(1.0 - 1e-12, 0.4))
    assert not near.stable[0] and "not certified stable" in near.reason(0)


def test_discrete_norm_is_invariant_under_tustin():
    """Tustin's rule s = (2/T)(z-1)/(z+1) maps j w onto the unit circle (theta =
    2 arctan(w T / 2)), so ||Tustin(G)||_inf = ||G||_inf for every T, and the peak moves
    to the warped frequency. The continuous norm: scipy.signal.freqresp on a dense grid
    near the resonance (zeta = 0.02, w = 3: peak about 1 / (2 zeta)), from the zeros and
    poles (scipy.signal.freqs_zpk)."""
    A, B, C, D = _lightly_damped()
    w = np.linspace(2.5, 3.5, 200001)
    _, H = scipy.signal.freqs_zpk([], np.linalg.eigvals(A), 9.0, w)
    k = int(np.argmax(np.abs(H)))
    peak, wpk = float(np.abs(H[k])), float(w[k])
    for T in (0.01, 0.3):
        Ad, Bd, Cd, Dd = discretize(A, B, C, D, T, "tustin")
        P, K = _as_loop(Ad, Bd, Cd, Dd)
        out = discrete_check_arrays(P, K, gamma=1.0, gamma_tolerance=0.0, classical=False,
                                    sample_time=T)
        assert out["stable"][0]
        assert out["norm"][0] == pytest.approx(peak, rel=1e-8)
        assert out["norm"][0] <= out["norm_bound"][0] <= out["norm"][0] * (1 + 1e-6)
        warped = 2.0 / T * np.arctan(wpk * T / 2.0)
        assert out["peak_frequency"][0] == pytest.approx(warped, rel=1e-4)


def test_discrete_norm_against_a_dense_unit_circle_sweep():
    """A zero-order-hold model with two lightly damped modes: the maximum of sigma_max over
    200001 points of the unit circle never exceeds the certified bound and comes within
    1e-4 of the norm."""
    rng = np.random.default_rng(5)
    Ac = np.zeros((4, 4))
    Ac[:2, :2], Ac[2:, 2:] = _lightly_damped(0.01, 2.0)[0], _lightly_damped(0.03, 7.0)[0]
    Ac[0, 3] = 0.5
    Bc, Cc, Dc = rng.normal(size=(4, 2)), rng.normal(size=(2, 4)), 0.1 * rng.normal(size=(2, 2))
    T = 0.05
    Ad, Bd, Cd, Dd = discretize(Ac, Bc, Cc, Dc, T, "zoh")
    P, K = _as_loop(Ad, Bd, Cd, Dd)
    out = discrete_check_arrays(P, K, 1.0, 0.0, False, T)
    theta = np.linspace(0.0, np.pi, 200001)
    G = _response(Ad, Bd, Cd, Dd, np.exp(1j * theta))
    sweep = np.linalg.svd(G, compute_uv=False)[:, 0].max()
    assert sweep <= out["norm_bound"][0]
    assert sweep >= out["norm"][0] * (1 - 1e-4)


def test_closed_form_norm_with_a_pole_near_minus_one():
    """G(z) = b / (z - a) with -1 < a < 0 peaks at z = -1 (the Nyquist frequency):
    |G(e^{j theta})|^2 = b^2 / (1 - 2 a cos theta + a^2) is largest at cos theta = -1,
    so ||G|| = |b| / (1 + a) = |b| / (1 - |a|). With a = -(1 - 1.5e-10), stable beyond the
    stability allowance (1e-10), I + A has condition 1.3e10, too large to trust; the
    rotated map z = -(1+s)/(1-s) carries the computation."""
    a, b, T = -(1.0 - 1.5e-10), 1.5e-10, 0.2
    A = np.diag([a, 0.5])
    B = np.array([[b], [0.0]])
    C = np.array([[1.0, 0.0]])
    P, K = _as_loop(A, B, C, np.zeros((1, 1)))
    out = discrete_check_arrays(P, K, 1.0, 0.0, False, T)
    assert out["stable"][0]
    assert bilinear_signs(P["A"], K["A"])[0][0] == -1.0  # the rotated map is chosen
    assert out["bilinear_condition"][0] < 10.0  # and well conditioned
    assert out["norm"][0] == pytest.approx(b / (1 - abs(a)), rel=1e-5)
    assert out["peak_frequency"][0] == pytest.approx(np.pi / T, rel=1e-6)


def test_eigenvalues_near_both_ends_are_not_certified():
    """Eigenvalues 1 - 1.5e-10 and -(1 - 1.5e-10): inside the circle by more than the
    stability allowance, but I + A and I - A both have condition above 1e10: the point
    fails toward "unstable" with the reason."""
    r = 1.0 - 1.5e-10
    A = np.diag([r, -r])
    P, K = _as_loop(A, np.ones((2, 1)), np.ones((1, 2)), np.zeros((1, 1)))
    assert discrete_stability(A).stable[0]
    out = discrete_check_arrays(P, K, 1.0, 0.0, False, 0.1)
    assert not out["stable"][0]
    assert "ill-conditioned" in out["stability_status"][0]
    assert not out["norm_ok"][0]


def test_bilinear_image_matches_the_unit_circle():
    """G_c(j w) = G(sign e^{j 2 arctan w}) for both signs of the map (direct solves)."""
    rng = np.random.default_rng(9)
    A = rng.normal(size=(3, 3))
    A *= 0.9 / np.abs(np.linalg.eigvals(A)).max()
    B, C, D = rng.normal(size=(3, 2)), rng.normal(size=(2, 3)), rng.normal(size=(2, 2))
    w = np.array([0.0, 0.2, 1.0, 7.0, 300.0])
    for sign in (1.0, -1.0):
        Ac, Bc, Cc, Dc = (x[0] for x in bilinear_image(A[None], B[None], C[None], D[None], sign))
        got = _response(Ac, Bc, Cc, Dc, 1j * w)
        want = _response(A, B, C, D, sign * np.exp(2j * np.arctan(w)))
        np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)


def test_margins_of_the_discrete_loop_against_the_unit_circle():
    """Disk and classical margins are suprema and crossings over frequency, unchanged by
    the bilinear relabelling: compare with the discrete loop evaluated on 400001 points
    of the unit circle. Loop: ZOH of the lightly damped plant 9 / (s^2 + 0.12 s + 9) with
    the filtered PD controller K(s) = -(0.5 + 0.6 s / (0.05 s + 1)) by Tustin's rule
    (u = K y is positive feedback, so the loop transfer is L = -K G)."""
    T = 0.05
    A, B, C, D = _lightly_damped(0.02, 3.0)
    Ad, Bd, Cd, Dd = discretize(A, B, C, D, T, "zoh")
    kp, kd, tau = 0.5, 0.6, 0.05
    Kd = dict(zip("ABCD", discretize(np.array([[-1 / tau]]), np.array([[1.0]]),
                                     np.array([[kd / tau ** 2]]), np.array([[-(kp + kd / tau)]]),
                                     T, "tustin"), strict=True))
    P = {"A": Ad, "B1": Bd, "B2": Bd, "C1": Cd, "C2": Cd, "D11": Dd, "D12": Dd, "D21": Dd,
         "D22": Dd}
    out = discrete_check_arrays({k: v[None] for k, v in P.items()},
                                {k: v[None] for k, v in Kd.items()}, 10.0, 0.0, True, T)
    assert out["stable"][0]
    theta = np.linspace(1e-7, np.pi, 400001)
    z = np.exp(1j * theta)
    G = _response(Ad, Bd, Cd, Dd, z)[:, 0, 0]
    K = _response(Kd["A"], Kd["B"], Kd["C"], Kd["D"], z)[:, 0, 0]
    L = -K * G
    alpha = 1.0 / np.abs(1.0 / (1.0 + L) - 0.5).max()
    np.testing.assert_allclose(out["in_loop_alpha"][0, 0], alpha, rtol=1e-6)
    # gain margin where the phase of L crosses -180 deg (Im L = 0, Re L < 0): 1 / |L|
    cross = np.flatnonzero((np.sign(L.imag[:-1]) != np.sign(L.imag[1:])) & (L.real[:-1] < 0))
    gm = min(-20 * np.log10(abs(L[i].real)) for i in cross)
    assert out["in_classical_gain_db"][0] == pytest.approx(gm, abs=1e-3)
    # phase margin where |L| crosses 1: 180 deg - |angle L|
    cross = np.flatnonzero(np.sign(np.abs(L[:-1]) - 1) != np.sign(np.abs(L[1:]) - 1))
    pm = min(180.0 - abs(np.degrees(np.angle(L[i]))) for i in cross)
    assert out["in_classical_phase_deg"][0] == pytest.approx(pm, abs=1e-3)
