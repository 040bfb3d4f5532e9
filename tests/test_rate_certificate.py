"""Rate-bounded certificates against closed forms, a second solver and simulations.

Systems used (each with its source):

- the rotating system A(theta) = R(theta) A0 R(theta)' (closed-form rate, derived below);
- a scalar LPV system (closed-form rate for a fixed basis, closed-form gain);
- the switched pair of Liberzon (2003) that fast switching destabilizes;
- a lightly damped oscillator with a moving stiffness (gain curve vs frozen norms).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.linalg import expm, solve, svdvals

from schedule.analysis.basis import parse_basis
from schedule.analysis.lmi import lmi_blocks, lmi_worst, solve_lmi
from schedule.analysis.lpv_certificate import CertificateSettings, Certifier, certify_loop
from schedule.analysis.witness import Trajectory, floquet_multiplier, path_loop, search_witness
from schedule.errors import InputError
from schedule.norms import h_infinity_norm
from schedule.types import SchedulingVariable


def _stability_only(A):
    N, n = A.shape[0], A.shape[1]
    return A, np.zeros((N, n, 0)), np.zeros((N, 0, n)), np.zeros((N, 0, 0))


# ----------------------------------------------------------------------------- rotating system
# A(theta) = R(theta) A0 R(theta)', R the rotation by theta, A0 = [[-a, k], [0, -a]].
# With z = R' x:  z' = (A0 - thetadot J) z,  J = [[0, -1], [1, 0]]  (R' R' ... worked out:
# dR/dtheta = R J, so d(R')/dt x = -thetadot J z). For a Lyapunov matrix P(theta) in the span
# of {1, cos 2theta, sin 2theta} (which contains R P0 R'), averaging Q(theta) = R' P R over a
# period removes the dQ/dtheta term, so the best certificate is a common quadratic Lyapunov
# function of the two vertices A0 +- nu J. For 2 x 2 matrices such a function exists iff
# A1 A2 and A1 A2^-1 have no negative real eigenvalue (Shorten and Narendra 2003, from
# memory); here A1 A2 = [[a^2 + nu^2 - k nu, -2ak], [0, a^2 + nu^2 + k nu]] (triangular) and
# A1 + t A2 is singular for some t > 0 iff nu^2 u^2 - k nu u + a^2 = 0 has a root |u| < 1.
# Both give the same threshold: for k > 2a the largest certified rate is
#     nu* = k/2 - sqrt(k^2/4 - a^2),
# which is also the smallest constant rotation rate that makes z' = (A0 - w J) z unstable
# (eigenvalues -a +- sqrt(-w (k + w))): the certificate is exact for this system.
ROT_A, ROT_K = 1.0, 5.0
ROT_RATE = ROT_K / 2 - np.sqrt(ROT_K ** 2 / 4 - ROT_A ** 2)
THETA = [SchedulingVariable("theta", "rad", 0.0, np.pi)]
TRIG = ("1", "cos(2*theta)", "sin(2*theta)")


def _rotating(T=None):
    A0 = np.array([[-ROT_A, ROT_K], [0.0, -ROT_A]])

    def loop_at(p):
        th = np.asarray(p, float)[:, 0]
        c, s = np.cos(th), np.sin(th)
        R = np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)
        A = R @ A0 @ np.swapaxes(R, 1, 2)
        if T is not None:
            A = np.linalg.inv(T) @ A @ T
        return _stability_only(A)

    return loop_at


def _rot_settings(**kw):
    base = dict(basis=TRIG, gain=False, witness=False, tolerance=0.01)
    base.update(kw)
    return CertificateSettings(**base)


def test_rotating_system_certified_rate_is_the_closed_form():
    cert = certify_loop(_rotating(), THETA, np.linspace(0, np.pi, 9)[:, None],
                        np.linspace(0, np.pi, 181)[:, None], _rot_settings())
    rate = cert.certified_rate["theta"]
    assert rate <= ROT_RATE * (1 + 1e-6)  # never above the exact value
    assert rate >= ROT_RATE * (1 - 0.012)  # within the bisection tolerance
    a = cert.checks["theta"]
    assert a.certified and a.worst < 0 and a.dense_points >= 181
    # the constant-rotation instability at the threshold (closed form above)
    w = ROT_RATE * 1.01
    Az = np.array([[-ROT_A, ROT_K - w], [w, -ROT_A]])  # A0 - (-w) J: rotation at rate -w
    assert np.max(np.linalg.eigvals(Az).real) > 0


@pytest.mark.parametrize("T", [
    np.diag([1e4, 1e-3]),  # a change of units (7 decades apart)
    np.array([[3.0, 1.0], [-2.0, 0.5]]),  # a general change of state coordinates
])
def test_certificate_does_not_depend_on_state_coordinates(T):
    # same loop in other coordinates, same certified rate (common practice: results must
    # not change with units or state coordinates); the analysis balances and whitens first
    pts = np.linspace(0, np.pi, 9)[:, None], np.linspace(0, np.pi, 91)[:, None]
    a = certify_loop(_rotating(), THETA, *pts, _rot_settings()).certified_rate["theta"]
    b = certify_loop(_rotating(T), THETA, *pts, _rot_settings()).certified_rate["theta"]
    assert b == pytest.approx(a, rel=0.012)
    assert b == pytest.approx(ROT_RATE, rel=0.012)


# ----------------------------------------------------------------------------- scalar system
def test_scalar_rate_for_a_fixed_basis_and_gain_closed_forms():
    # x' = -a(p) x + b w, z = c x, a(p) = 1 + p, p in [1, 3].
    # (i) With the basis {p} alone, P(p) = c1 p and the LMI reads c1 (v - 2 p (1 + p)) < 0
    #     for v = +-nu: it holds for all p in [1, 3] iff nu < min_p 2 p (1 + p) = 4 (p = 1).
    # (ii) With a constant P (quadratic stability), any rate is certified: scalar linear
    #     time-varying systems with a(p) > 0 are stable at any rate (x = exp(-int a) x0).
    # (iii) Gain: with constant P the LMI is P^2 b^2 - 2 a gamma P + c^2 < 0, solvable iff
    #     gamma > |b c| / a for every p, i.e. gamma = |b c| / min a = 6 / 2 = 3, which is also
    #     the largest frozen norm: gamma(nu) = 3 for every nu.
    b_, c_ = 2.0, 3.0
    var = [SchedulingVariable("p", "-", 1.0, 3.0)]

    def loop_at(p):
        p = np.asarray(p, float)[:, 0]
        N = p.size
        return (-(1 + p)[:, None, None], np.full((N, 1, 1), b_), np.full((N, 1, 1), c_),
                np.zeros((N, 1, 1)))

    imp, dense = np.linspace(1, 3, 5)[:, None], np.linspace(1, 3, 201)[:, None]
    s = CertificateSettings(basis=("p",), gain=False, witness=False, tolerance=0.005)
    rate = certify_loop(loop_at, var, imp, dense, s).certified_rate["p"]
    assert 4.0 * (1 - 0.006) <= rate <= 4.0
    s = CertificateSettings(basis=("1", "p"), gain=True, witness=False, curve=3)
    cert = certify_loop(loop_at, var, imp, dense, s)
    assert cert.certified_rate["p"] == np.inf
    cert2 = Certifier(loop_at(np.vstack([imp, dense])), np.vstack([imp, dense]), 5, var,
                      parse_basis(("1", "p"), ("p",)), s)
    for nu in (0.0, 1.0, 100.0):
        a = cert2.attempt([nu], gain=True)
        assert a.certified
        assert a.gamma == pytest.approx(b_ * c_ / 2.0, rel=1e-3)
    assert cert.frozen_gain == pytest.approx(3.0, rel=1e-7)


# ----------------------------------------------------------------------------- switching
# Liberzon, Switching in Systems and Control, Birkhaeuser 2003, sec. 1.1 (from memory): two
# stable spirals A1, A2 whose switching, fast enough and at the right moments, diverges.
# Every frozen convex combination A(p) = (1 - p) A1 + p A2 is stable (eigenvalues
# -0.1 +- j sqrt((1 + p)(2 - p))), so only the rate of p can destabilize the loop.
A1 = np.array([[-0.1, -1.0], [2.0, -0.1]])
A2 = np.array([[-0.1, -2.0], [1.0, -0.1]])
P_VAR = [SchedulingVariable("p", "", 0.0, 1.0)]


def _switched(p):
    q = np.asarray(p, float)[:, 0][:, None, None]
    return _stability_only((1 - q) * A1 + q * A2)


def _monodromy_expm(traj, steps=2000):
    """Transition matrix over one period by a product of matrix exponentials (midpoint
    rule) - independent of the witness's scipy.integrate route."""
    h = traj.period / steps
    q = np.array([traj((k + 0.5) * h)[0] for k in range(steps)])[:, None, None]
    E = expm(h * ((1 - q) * A1 + q * A2))  # batched over the steps
    Phi = np.eye(2)
    for k in range(steps):
        Phi = E[k] @ Phi
    return Phi


def test_fast_variation_destabilizes_above_the_certified_rate():
    s = CertificateSettings(basis=("1", "p", "p**2"), gain=False, witness=False)
    cert = certify_loop(_switched, P_VAR, np.linspace(0, 1, 5)[:, None],
                        np.linspace(0, 1, 201)[:, None], s)
    rate = cert.certified_rate["p"]
    assert 0 < rate < np.inf
    w = search_witness(_switched, P_VAR, {"p": rate}, gain=False, waves=("sine", "triangle"),
                       growth=1.5, steps=8)
    bad = w.unstable_rate["p"]
    assert np.isfinite(bad) and rate < bad  # the certificate stays below what destabilizes
    # confirm the witness with an independent integration of the same trajectory
    traj = w.unstable_path["p"]
    assert traj.rate == pytest.approx(bad, rel=1e-9)
    rho = np.max(np.abs(np.linalg.eigvals(_monodromy_expm(traj))))
    assert rho > 1.0
    # and the same shape, slowed down to the certified rate, is stable (Floquet < 1)
    slow = Trajectory(traj.base, 0, traj.centre, traj.amplitude, traj.frequency * rate / bad,
                      traj.wave)
    path = path_loop(_switched, traj.base, 0, 0.0, 1.0)
    assert floquet_multiplier(path, slow) < 1.0
    assert np.max(np.abs(np.linalg.eigvals(_monodromy_expm(slow)))) < 1.0


def test_gridded_lmi_holds_only_where_imposed_and_the_cutting_planes_repair_it():
    # The failure mode reported while filing the issue: with P(p) cubic and the LMIs imposed
    # at p = 0 and p = 1 only, P and dP/dp are free at both ends, so the gridded LMIs are
    # feasible at ANY rate (take dP/dp = 0 there) - e.g. at 2 /s, far above the rates that
    # destabilize the loop (previous test) - but the P found violates them in between.
    basis = ("1", "p", "p**2", "p**3")
    ends = np.array([[0.0], [1.0]])
    F, dF = parse_basis(basis, ("p",)).evaluate(ends)
    rates = np.array([[2.0], [-2.0], [2.0], [-2.0]])
    idx = [0, 0, 1, 1]
    A = _switched(ends)[0]
    sol = solve_lmi(A[idx], F[idx], dF[idx], rates)
    assert sol.feasible and sol.level > 0
    dense = np.linspace(0, 1, 201)[:, None]
    Fd, dFd = parse_basis(basis, ("p",)).evaluate(dense)
    eig, scale, _, _ = lmi_worst(*_switched(dense), Fd, dFd, sol.Pk, None, [[2.0], [-2.0]])
    assert np.max(eig / scale[:, None]) > 1e-3  # violated between the imposed points
    # the certifier starts from the same two points, cuts, and certifies only below the
    # destabilizing rate found by the witness
    s = CertificateSettings(basis=basis, gain=False, witness=False, max_rounds=12, cuts=4)
    c = Certifier(_switched(np.vstack([ends, dense])), np.vstack([ends, dense]), 2, P_VAR,
                  parse_basis(basis, ("p",)), s)
    a = c.attempt([2.0])
    assert not a.certified and a.reason
    c = Certifier(_switched(np.vstack([ends, dense])), np.vstack([ends, dense]), 2, P_VAR,
                  parse_basis(basis, ("p",)), s)
    b = c.attempt([0.2])
    assert b.certified and b.rounds > 1 and b.imposed_points > 2


# ----------------------------------------------------------------------------- gain curve
OSC = [SchedulingVariable("stiffness", "-", 0.0, 1.0)]


def _oscillator(p):
    q = np.asarray(p, float)[:, 0]
    N = q.size
    A = np.zeros((N, 2, 2))
    A[:, 0, 1] = 1.0
    A[:, 1, 0] = -(1.0 + 3.0 * q)
    A[:, 1, 1] = -0.6
    B = np.zeros((N, 2, 1))
    B[:, 1, 0] = 1.0
    C = np.zeros((N, 1, 2))
    C[:, 0, 0] = 1.0 + q
    return A, B, C, np.zeros((N, 1, 1))


def _dense_sweep_norm(A, B, C, D):
    """Reference H-infinity norm: largest singular value of C (jw - A)^-1 B + D on a dense
    frequency grid (scipy.linalg.solve, a lower bound), refined around the peak."""
    def peak(w):
        return max(svdvals(C @ solve(1j * x * np.eye(A.shape[0]) - A, B) + D)[0] for x in w)

    w = np.logspace(-2, 2, 2000)
    vals = [peak([x]) for x in w]
    k = int(np.argmax(vals))
    return float(max(vals[k], peak(np.linspace(w[max(k - 1, 0)], w[min(k + 1, w.size - 1)],
                                               400))))


def test_gain_bound_is_monotone_and_above_every_frozen_norm():
    imp, dense = np.linspace(0, 1, 5)[:, None], np.linspace(0, 1, 101)[:, None]
    pts = np.vstack([imp, dense])
    s = CertificateSettings(basis=("1", "stiffness", "stiffness**2"), gain=True, witness=False)
    c = Certifier(_oscillator(pts), pts, 5, OSC, parse_basis(s.basis, ("stiffness",)), s)
    gammas = []
    for nu in (0.0, 0.1, 0.3, 0.6):
        a = c.attempt([nu], gain=True)
        assert a.certified
        gammas.append(a.gamma)
    assert all(g2 >= g1 * (1 - 1e-6) for g1, g2 in zip(gammas, gammas[1:]))
    frozen = [_dense_sweep_norm(*(m[i] for m in _oscillator(dense))) for i in range(0, 101, 10)]
    ours = [h_infinity_norm(*(m[i] for m in _oscillator(dense)))[0] for i in range(0, 101, 10)]
    np.testing.assert_allclose(ours, frozen, rtol=1e-5)
    assert gammas[0] >= max(frozen) * (1 - 1e-6)
    assert c.gamma_frozen.max() == pytest.approx(max(frozen), rel=1e-5)


def test_second_solver_and_an_independent_formulation_agree():
    # The same gain LMI built from cvxpy atoms (Diamond and Boyd 2016) and solved by SCS
    # (O'Donoghue et al. 2016): an outside reference for both our assembly and our solver.
    # The atoms below are the full LMI (order n + nw + nz); ours is solved in the reduced
    # form (the z block eliminated by a Schur complement, Boyd et al. 1994, from memory),
    # which has the same optimal gamma; the strictness margins are not the same matrices,
    # so they are taken small enough not to matter at 1e-4.
    cp = pytest.importorskip("cvxpy")
    pts = np.linspace(0, 1, 4)[:, None]
    A, B, C, D = _oscillator(pts)
    F, dF = parse_basis(("1", "stiffness"), ("stiffness",)).evaluate(pts)
    nu, margin = 0.3, 1e-7
    idx = np.repeat(np.arange(4), 2)
    rates = np.tile([[nu], [-nu]], (4, 1))
    ours = solve_lmi(A[idx], F[idx], dF[idx], rates, B[idx], C[idx], D[idx], gain=True,
                     margin=margin)
    scs = solve_lmi(A[idx], F[idx], dF[idx], rates, B[idx], C[idx], D[idx], gain=True,
                    margin=margin, solver="cvxpy:SCS", tolerance=1e-9)
    P = [cp.Variable((2, 2), symmetric=True) for _ in range(2)]
    g = cp.Variable()
    cons = []
    for i in range(4):
        Pi = F[i, 0] * P[0] + F[i, 1] * P[1]
        dP = dF[i, 0, 0] * P[0] + dF[i, 1, 0] * P[1]
        for v in (nu, -nu):
            L = cp.bmat([[A[i].T @ Pi + Pi @ A[i] + v * dP, Pi @ B[i], C[i].T],
                         [B[i].T @ Pi, -g * np.eye(1), D[i].T],
                         [C[i], D[i], -g * np.eye(1)]])
            cons.append(-0.5 * (L + L.T) - margin * np.eye(4) >> 0)
    cp.Problem(cp.Minimize(g), cons).solve(solver="SCS", eps_abs=1e-9, eps_rel=1e-9,
                                           max_iters=200000)
    assert ours.gamma == pytest.approx(g.value, rel=1e-4)
    assert scs.gamma == pytest.approx(g.value, rel=1e-4)
    # our LMI blocks are the atoms' matrices at the solution
    Lb = lmi_blocks(A, B, C, D, F, dF, np.array([p.value for p in P]), g.value, [[nu]])
    Pi = F[0, 0] * P[0].value + F[0, 1] * P[1].value
    dP = dF[0, 0, 0] * P[0].value + dF[0, 1, 0] * P[1].value
    np.testing.assert_allclose(Lb[0, 0, :2, :2], A[0].T @ Pi + Pi @ A[0] + nu * dP, atol=1e-12)


# ----------------------------------------------------------------------------- bad input
def test_bad_settings_and_unstable_frozen_loops_are_refused():
    with pytest.raises(InputError, match="not a scheduling variable"):
        CertificateSettings(rates=(("q", 1.0),)).validate(("p",))
    with pytest.raises(InputError, match="positive rate"):
        CertificateSettings(rates=(("p", -1.0),)).validate(("p",))
    with pytest.raises(InputError, match="solver"):
        CertificateSettings(solver="mosek").validate(("p",))

    def unstable(p):
        q = np.asarray(p, float)[:, 0]
        return _stability_only((q - 0.5)[:, None, None] * np.ones((1, 1, 1)))

    with pytest.raises(InputError, match=r"not stable at \(p=0.5\)|not stable at \(p=0.75\)"):
        certify_loop(unstable, P_VAR, np.array([[0.0], [0.5], [0.75]]),
                     np.linspace(0, 1, 5)[:, None], CertificateSettings(gain=False))


def test_result_to_dict_is_json():
    cert = certify_loop(_rotating(), THETA, np.linspace(0, np.pi, 5)[:, None],
                        np.linspace(0, np.pi, 31)[:, None], _rot_settings(tolerance=0.2))
    d = json.loads(json.dumps(cert.to_dict()))
    assert set(d) >= {"certified_rate", "joint_rate", "gain_bound", "a_posteriori_check",
                      "frozen_bound", "witness"}
    assert d["a_posteriori_check"]["theta"]["dense_points"] >= 31
    assert any("theta" in line for line in cert.text_lines())


def test_cuts_of_a_round_are_spread_over_the_grid_cells():
    # The documented rule (docs/methods.md, the cutting-plane check): the cuts of one round
    # are the worst violating points at least half a grid cell apart, cells counted between
    # the (unevenly spaced) start points; here a violation that grows towards p = 0, so the
    # worst points bunch there. Start points 0, 0.1, 0.3, 1 (3 cells), dense step 0.001.
    var = [SchedulingVariable("p", "", 0.0, 1.0)]
    start = np.array([[0.0], [0.1], [0.3], [1.0]])
    dense = np.linspace(0.0, 1.0, 1001)[:, None]
    pts = np.vstack([start, dense])
    s = CertificateSettings(basis=("1", "p"), gain=False, witness=False, cuts=3)
    c = Certifier(_switched(pts), pts, 4, var, parse_basis(s.basis, ("p",)), s)
    viol = (1.0 - pts[:, 0])[:, None]  # one vertex; worst at p = 0
    cuts = c._new_cuts(viol, np.ones((1, 1)), set(), np.zeros(1))
    chosen = np.array(sorted({i for i, _ in cuts}))
    assert chosen.size == 3
    cell = np.interp(pts[chosen, 0], start[:, 0], np.arange(4.0))  # cell coordinates
    assert np.min(np.diff(np.sort(cell))) >= 0.5 - 1e-12
    # a grid too coarse for the cuts at half a cell (one cell, 8 cuts): closer, never starved
    two = np.vstack([start[[0, 3]], dense])
    s8 = CertificateSettings(basis=("1", "p"), gain=False, witness=False, cuts=8)
    c = Certifier(_switched(two), two, 2, var, parse_basis(s8.basis, ("p",)), s8)
    cuts = c._new_cuts((1.0 - two[:, 0])[:, None], np.ones((1, 1)), set(), np.zeros(1))
    p8 = np.sort(two[[i for i, _ in cuts], 0])
    assert p8.size == 8 and np.min(np.diff(p8)) > 0.01
