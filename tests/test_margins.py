"""Disk and classical margins against closed forms, scipy frequency responses and mu theory.

Sign convention: the package closes u = K y, y = G u; a textbook negative-feedback
loop L therefore uses G = L and K = -1.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy import optimize, signal

from schedule.errors import PlantError
from schedule.margins import (
    classical_margins,
    disk_gain_range,
    disk_margins,
    disk_phase_margin,
    mu_upper_bound,
)

NEG1 = (np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), np.array([[-1.0]]))


def realization(num, den):
    A, B, C, D = signal.tf2ss(num, den)
    return A, B, C, D


def test_disk_margin_unstable_first_order_closed_form():
    """L = 2/(s - 1): S - 1/2 = (s - 3)/(2(s + 1)), |.| peaks at w = 0 with 3/2.

    Derivation: S = (s - 1)/(s + 1); S - 1/2 = (2s - 2 - s - 1)/(2(s + 1)).
    |S - 1/2|^2 = (w^2 + 9)/(4(w^2 + 1)) decreases in w, so alpha = 2/3; the
    disk gain range (1 - 1/3)/(1 + 1/3) = 0.5 .. 2 and phase 2 atan(1/3)
    (Seiler, Packard and Gahinet 2020, balanced disk). The classical lower gain
    margin is exactly 0.5 (closed loop s - 1 + 2f is stable iff f > 1/2) and the
    phase margin 60 deg (|L| = 1 at w = sqrt 3, angle -120 deg).
    """
    G = realization([2.0], [1.0, -1.0])
    dm = disk_margins(G, NEG1)
    assert dm.loop_alpha[0, 0] == pytest.approx(2.0 / 3.0, rel=1e-9)
    low, high = disk_gain_range(dm.loop_alpha[0, 0])
    assert low == pytest.approx(0.5) and high == pytest.approx(2.0)
    assert dm.loop_phase_deg[0, 0] == pytest.approx(np.degrees(2 * np.arctan(1 / 3)))
    cm = classical_margins(G, NEG1)
    assert cm.gain_low_db[0, 0] == pytest.approx(20 * np.log10(0.5), abs=1e-9)
    assert np.isinf(cm.gain_db[0, 0])
    assert cm.phase_deg[0, 0] == pytest.approx(60.0, abs=1e-7)
    assert cm.phase_frequency[0, 0] == pytest.approx(np.sqrt(3.0), rel=1e-8)


@pytest.mark.parametrize("k", [0.5, 3.0, 40.0])
def test_integrator_loop(k):
    """L = k/s: S - 1/2 = (s - k)/(2(s + k)) is all-pass with modulus 1/2, so alpha = 2.

    Disk gain range [0, inf), disk phase margin 2 atan(1) = 90 deg; classical GM
    infinite, PM = 90 deg at w = k (textbook, e.g. Franklin, Powell and
    Emami-Naeini, from memory).
    """
    G = realization([k], [1.0, 0.0])
    dm = disk_margins(G, NEG1)
    assert dm.loop_alpha[0, 0] == pytest.approx(2.0, rel=1e-9)
    assert dm.loop_phase_deg[0, 0] == pytest.approx(90.0)
    assert disk_gain_range(dm.loop_alpha[0, 0])[1] > 1e6  # [0, inf) up to roundoff
    cm = classical_margins(G, NEG1)
    assert np.isinf(cm.gain_db[0, 0])
    assert cm.phase_deg[0, 0] == pytest.approx(90.0, abs=1e-8)
    assert cm.phase_frequency[0, 0] == pytest.approx(k, rel=1e-8)


@pytest.mark.parametrize("k", [1.5, 2.0, 5.0])
def test_third_order_lag_classical_margins(k):
    """L = k/(s+1)^3: phase -180 deg where 3 atan(w) = pi, w = sqrt 3, |L| = k/8.

    So GM = 8/k (20 log10). |L| = 1 at w = sqrt(k^(2/3) - 1), PM = 180 - 3 atan(w) deg.
    (Closed forms derived here; the Routh test gives instability at k = 8.)
    """
    G = realization([k], np.poly([-1.0, -1.0, -1.0]))
    cm = classical_margins(G, NEG1)
    assert cm.gain_db[0, 0] == pytest.approx(20 * np.log10(8.0 / k), abs=1e-8)
    assert cm.gain_frequency[0, 0] == pytest.approx(np.sqrt(3.0), rel=1e-8)
    wc = np.sqrt(k ** (2 / 3) - 1)
    assert cm.phase_deg[0, 0] == pytest.approx(180 - 3 * np.degrees(np.arctan(wc)), abs=1e-7)
    # the disk margin is never larger than the classical ones (it covers both at once)
    dm = disk_margins(G, NEG1)
    assert dm.loop_gain_db[0, 0] <= cm.gain_db[0, 0] + 1e-9
    assert dm.loop_phase_deg[0, 0] <= cm.phase_deg[0, 0] + 1e-9


def test_static_loop():
    """L = k (no dynamics): |S - 1/2| = |1 - k|/(2(1 + k)), alpha = 2(1 + k)/|1 - k|."""
    k = 0.6
    G = (np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), np.array([[k]]))
    dm = disk_margins(G, NEG1)
    assert dm.loop_alpha[0, 0] == pytest.approx(2 * (1 + k) / abs(1 - k))


@settings(max_examples=25, deadline=None)
@given(st.lists(st.floats(0.2, 5.0), min_size=2, max_size=3),
       st.floats(0.3, 4.0), st.floats(0.05, 3.0))
def test_disk_margin_matches_scipy_dense_response(poles, k, zero):
    """alpha = 1/max|S - 1/2| against scipy.signal.freqresp of S - 1/2 on a dense grid.

    S = den/(den + num) for L = num/den in negative feedback; the dense grid value
    can only be below the true sup, and our refined value must not be far above it.
    """
    num = k * np.array([1.0, zero])
    den = np.poly(-np.asarray(poles))
    cl = np.polyadd(den, num)
    if np.any(np.roots(cl).real >= -1e-6):
        return  # unstable closed loop: no margin to compare
    G = realization(num, den)
    dm = disk_margins(G, NEG1)
    w = np.concatenate([[0.0], np.logspace(-4, 4, 40000)])
    # S - 1/2 = (den - (den + num)/2) / (den + num) = (den - num) / (2 (den + num))
    sys = (np.polysub(den, num), 2 * cl)
    _, h = signal.freqresp(sys, w)
    # the grid maximum refined by scipy's bounded scalar search between its neighbours
    k = int(np.argmax(np.abs(h)))
    lo, hi = w[max(k - 1, 0)], w[min(k + 1, w.size - 1)]
    res = optimize.minimize_scalar(lambda x: -abs(signal.freqresp(sys, [x])[1][0]),
                                   bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12 * max(hi, 1e-300)})
    ref = max(np.max(np.abs(h)), -res.fun, 0.5)  # w -> inf limit is 1/2 for strictly proper L
    assert 1.0 / dm.loop_alpha[0, 0] == pytest.approx(ref, rel=1e-6)


def spinning_satellite(a=10.0):
    """The spinning satellite (Doyle; Skogestad and Postlethwaite 2005, sec. 3.7.1, from memory).

    G(s) = 1/(s^2 + a^2) [[s - a^2, a(s + 1)], [-a(s + 1), s - a^2]] with
    A = [[0, a], [-a, 0]], B = I, C = [[1, a], [-a, 1]], D = 0, controller K = I
    in negative feedback. Breaking one loop gives L1 = 1/s (infinite gain
    margin, 90 deg), yet small simultaneous changes destabilize.
    """
    A = np.array([[0.0, a], [-a, 0.0]])
    return A, np.eye(2), np.array([[1.0, a], [-a, 1.0]]), np.zeros((2, 2))


def test_spinning_satellite_loop_at_a_time_and_all_at_once():
    G = spinning_satellite()
    K = (np.zeros((0, 0)), np.zeros((0, 2)), np.zeros((2, 0)), -np.eye(2))
    dm = disk_margins(G, K, at="input")
    # loop at a time: L1 = 1/s, all-pass S - 1/2 (see test_integrator_loop) -> alpha = 2
    np.testing.assert_allclose(dm.loop_alpha[0], [2.0, 2.0], rtol=1e-6)
    cm = classical_margins(G, K)
    np.testing.assert_allclose(cm.phase_deg[0], [90.0, 90.0], atol=1e-6)
    # all loops at once: compare with mu computed by brute force. For complex diagonal
    # Delta, mu(M) = max over diagonal unitary U of rho(M U) (Doyle 1982, Thm); the
    # common phase is irrelevant so one angle suffices for 2 x 2.
    # S - I/2 = I/2 - T with T = [[1, a], [-a, 1]]/(s + 1) (Skogestad and Postlethwaite).
    a = 10.0
    ref = 0.0
    th = np.linspace(0, 2 * np.pi, 721)
    for w in np.concatenate([[0.0], np.logspace(-3, 3, 600)]):
        M = 0.5 * np.eye(2) - np.array([[1, a], [-a, 1]]) / (1j * w + 1)
        U = np.exp(1j * th)
        MU = M[None] * np.stack([np.ones_like(U), U], axis=1)[:, None, :]  # M diag(1, U)
        ref = max(ref, np.max(np.abs(np.linalg.eigvals(MU))))
    assert 1.0 / dm.all_alpha[0] == pytest.approx(ref, rel=2e-3)
    assert dm.all_alpha[0] < 0.25 * dm.loop_alpha[0].min()


def test_mu_bound_between_spectral_radius_and_sigma_max():
    """rho(M) <= mu(M) <= inf_D sigma(D M D^-1) <= sigma(M) (Doyle 1982)."""
    rng = np.random.default_rng(1)
    M = rng.normal(size=(200, 3, 3)) + 1j * rng.normal(size=(200, 3, 3))
    b = mu_upper_bound(M)
    assert np.all(b <= np.linalg.norm(M, 2, axis=(1, 2)) * (1 + 1e-9))
    assert np.all(b >= np.max(np.abs(np.linalg.eigvals(M)), axis=1) * (1 - 1e-9))
    # a diagonal matrix: mu = max |m_ii| exactly (D-scaling removes nothing needed)
    Dm = np.diag([0.3, 2.0, 1.1]).astype(complex)
    assert mu_upper_bound(Dm[None])[0] == pytest.approx(2.0)


def test_disk_margin_guarantees_stability_for_gains_in_range():
    """Inside the multiloop disk gain range every simultaneous real gain change keeps the
    loop stable (Blight, Dailey and Gangsaas 1994): sampled check with a random MIMO loop."""
    rng = np.random.default_rng(3)
    A = np.array([[-1.0, 2.0], [-0.5, -2.0]])
    B = np.array([[1.0, 0.2], [0.0, 1.0]])
    C = np.eye(2)
    D = np.zeros((2, 2))
    Kd = -np.array([[1.5, 0.3], [-0.2, 2.0]])
    K = (np.zeros((0, 0)), np.zeros((0, 2)), np.zeros((2, 0)), Kd)
    dm = disk_margins((A, B, C, D), K)
    low, high = disk_gain_range(dm.all_alpha[0])
    for _ in range(300):
        f = rng.uniform(low, min(high, 1e3), size=2)
        Acl = A + B @ np.diag(f) @ Kd @ C
        assert np.max(np.linalg.eigvals(Acl).real) < 0


def test_unstable_loop_has_zero_margin_and_bad_shapes_raise():
    G = realization([1.0], [1.0, -1.0])  # L = 1/(s - 1): closed loop s - 1 + 1 = s, not stable
    dm = disk_margins(G, NEG1)
    assert dm.loop_alpha[0, 0] == 0.0 and not dm.stable[0]
    with pytest.raises(PlantError, match="controller D"):
        disk_margins(realization([1.0], [1.0, 1.0]), (np.zeros((0, 0)), np.zeros((0, 2)),
                                               np.zeros((1, 0)), np.zeros((1, 2))))
    assert disk_phase_margin(2.0) == pytest.approx(90.0)


@settings(max_examples=20, deadline=None)
@given(st.floats(1.2, 6.0), st.lists(st.floats(0.3, 4.0), min_size=2, max_size=3))
@example(k=2.0, poles=[1.0, 1.99999])  # |L(0)| just above 1: crossover below the grid
def test_classical_margins_match_brentq_on_scipy_response(k, poles):
    """Gain and phase crossovers of L = k / prod(s + p_i) against scipy.optimize.brentq run on
    scipy.signal.freqresp values (the classical definitions: PM = 180 - |angle L| where
    |L| = 1; GM = 1/|L| where the phase is -180 deg)."""
    from scipy.optimize import brentq

    den = np.poly(-np.asarray(poles))
    if np.any(np.roots(np.polyadd(den, [k])).real >= -1e-6):
        return
    G = realization([k], den)

    def L(w):
        return signal.freqresp(([k], den), [w])[1][0]

    cm = classical_margins(G, NEG1)
    if abs(L(1e-6)) <= 1.0 + 1e-6:
        assert np.isinf(cm.phase_deg[0, 0])  # |L| < 1 everywhere: no gain crossover
        return
    wc = brentq(lambda w: abs(L(w)) - 1.0, 1e-6, 1e4, xtol=1e-14)
    assert cm.phase_deg[0, 0] == pytest.approx(180 - abs(np.degrees(np.angle(L(wc)))), abs=1e-6)
    if len(poles) == 3:  # three lags reach -180 deg exactly once
        assert L(1e-6).imag * L(1e4).imag < 0
        w180 = brentq(lambda w: L(w).imag, 1e-6, 1e4, xtol=1e-14)
        if L(w180).real < 0:
            assert cm.gain_db[0, 0] == pytest.approx(-20 * np.log10(abs(L(w180))), abs=1e-6)


# ----------------------------------------------------------------- all loops: brute force
def brute_mu(M):
    """mu of a complex matrix for diagonal complex Delta by brute force: mu(M) = max over
    diagonal unitary U of rho(M U) (Doyle 1982); the common phase is irrelevant, so
    m - 1 angles: a grid (361 points, or 41 x 41) refined by scipy (bounded / Nelder-Mead)."""
    m = M.shape[0]

    def rho(th):
        U = np.exp(1j * np.concatenate([[0.0], np.atleast_1d(th)]))
        return np.max(np.abs(np.linalg.eigvals(M * U[None, :])))

    if m == 2:
        th = np.linspace(0.0, 2 * np.pi, 361)
        vals = np.max(np.abs(np.linalg.eigvals(M[None] * np.stack(
            [np.ones_like(th), np.exp(1j * th)], axis=1)[:, None, :])), axis=1)
        k = int(np.argmax(vals))
        r = optimize.minimize_scalar(lambda x: -rho(x), bounds=(th[k] - 0.02, th[k] + 0.02),
                                     method="bounded", options={"xatol": 1e-12})
        return max(vals[k], -r.fun)
    g = np.linspace(0.0, 2 * np.pi, 41)
    t1, t2 = np.meshgrid(g, g, indexing="ij")
    U = np.stack([np.ones(t1.size), np.exp(1j * t1.ravel()), np.exp(1j * t2.ravel())], axis=1)
    vals = np.max(np.abs(np.linalg.eigvals(M[None] * U[:, None, :])), axis=1)
    k = int(np.argmax(vals))
    r = optimize.minimize(lambda x: -rho(x), [t1.ravel()[k], t2.ravel()[k]],
                          method="Nelder-Mead", options={"xatol": 1e-11, "fatol": 1e-15,
                                                         "maxiter": 4000})
    return max(vals[k], -r.fun)


def brute_all_loops_peak(G, K):
    """sup over w of mu(S(jw) - I/2) at the plant input, S = (I - K G)^-1 (static K), by a
    dense log grid of brute-force mu values and a bounded scalar refinement in w."""
    A, B, C, D = G
    m = B.shape[1]

    def M(w):
        Gw = C @ np.linalg.solve(1j * w * np.eye(A.shape[0]) - A, B) + D
        return np.linalg.inv(np.eye(m) - K @ Gw) - 0.5 * np.eye(m)

    w = np.concatenate([[0.0], np.geomspace(1e-2, 1e2, 240 if m == 2 else 90)])
    vals = np.array([brute_mu(M(x)) for x in w])
    k = int(np.argmax(vals))
    lo, hi = w[max(k - 1, 0)], w[min(k + 1, w.size - 1)]
    r = optimize.minimize_scalar(lambda x: -brute_mu(M(x)), bounds=(lo, hi), method="bounded",
                                 options={"xatol": 1e-10})
    return max(vals[k], -r.fun, brute_mu(np.linalg.inv(np.eye(m) - K @ D) - 0.5 * np.eye(m)))


@pytest.mark.parametrize("m, seed", [(2, 0), (2, 1), (2, 2), (2, 3), (2, 4), (2, 5),
                                     (3, 0), (3, 1)])
def test_all_loops_margin_against_brute_force_mu(m, seed):
    """The all-loops disk margin alpha = 1 / sup_w mu(S - I/2) (Seiler, Packard and Gahinet
    2020) against mu by brute force: within 1e-6 (the issue: optimistic by more than 1e-6
    in 27 of 60 multi-loop cases, worst 1.3 %, and conservative by up to 9 % elsewhere).
    For m <= 3 the D-scaled bound equals mu (Doyle 1982), so it is the margin itself."""
    rng = np.random.default_rng(100 * m + seed)
    for _ in range(50):
        n = 4
        A = rng.standard_normal((n, n)) - 1.5 * np.eye(n)
        B, C = rng.standard_normal((n, m)), rng.standard_normal((m, n))
        K = -0.4 * np.eye(m) + 0.2 * rng.standard_normal((m, m))
        if (np.linalg.eigvals(A).real.max() < -0.1
                and np.linalg.eigvals(A + B @ K @ C).real.max() < -0.05):
            break
    G = (A, B, C, np.zeros((m, m)))
    Ks = (np.zeros((0, 0)), np.zeros((0, m)), np.zeros((m, 0)), K)
    dm = disk_margins(G, Ks, at="input")
    ref = brute_all_loops_peak(G, K)
    assert not dm.all_is_bound
    assert 1.0 / dm.all_alpha[0] == pytest.approx(ref, rel=1e-6)


def test_more_than_three_loops_is_flagged_as_a_bound():
    """Beyond three complex blocks the D-scaled bound may exceed mu (Doyle 1982): the
    margin is then a guaranteed lower bound and says so."""
    rng = np.random.default_rng(4)
    A = rng.standard_normal((4, 4)) - 4.0 * np.eye(4)
    G = (A, rng.standard_normal((4, 4)), rng.standard_normal((4, 4)), np.zeros((4, 4)))
    K = (np.zeros((0, 0)), np.zeros((0, 4)), np.zeros((4, 0)), -0.1 * np.eye(4))
    dm = disk_margins(G, K, at="input")
    assert dm.all_is_bound and 0 < dm.all_alpha[0] <= dm.loop_alpha[0].min() * (1 + 1e-9)
