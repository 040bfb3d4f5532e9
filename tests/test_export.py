"""Tests of schedule.export.table and schedule.export.discretize."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st
from test_export_fixtures import analytic_evaluator, controller_at, make_family

from schedule.errors import InputError, NumericalError
from schedule.export import build_table, discretize, parse_breakpoints
from schedule.export import table as table_mod
from schedule.export.discretize import prewarped_step


def _random_stable(rng, n, m, p):
    A = rng.standard_normal((n, n)) - (n + 1.0) * np.eye(n)
    return A, rng.standard_normal((n, m)), rng.standard_normal((p, n)), rng.standard_normal((p, m))


def _assert_matches_scipy(seed, n, p, T, ours, theirs):
    """Our discretization of a random stable (n, 2, p) model against scipy.signal.cont2discrete."""
    rng = np.random.default_rng(seed)
    sys = _random_stable(rng, n, 2, p)
    ref = scipy.signal.cont2discrete(sys, T, method=theirs)[:4]
    got = discretize(*sys, T, ours)
    for g, r in zip(got, ref, strict=True):
        np.testing.assert_allclose(g, r, rtol=1e-10, atol=1e-12)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(1, 5), T=st.floats(1e-3, 0.5))
def test_tustin_matches_scipy_bilinear(seed, n, T):
    # Reference: scipy.signal.cont2discrete(method="bilinear") (Tustin, gbt alpha=1/2).
    _assert_matches_scipy(seed, n, 3, T, "tustin", "bilinear")


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(1, 5), T=st.floats(1e-3, 0.5))
def test_zoh_matches_scipy_zoh(seed, n, T):
    # Reference: scipy.signal.cont2discrete(method="zoh").
    _assert_matches_scipy(seed, n, 1, T, "zoh", "zoh")


def test_stacked_discretization_equals_one_by_one():
    rng = np.random.default_rng(3)
    systems = [_random_stable(rng, 3, 2, 1) for _ in range(4)]
    stacked = [np.stack([s[i] for s in systems]) for i in range(4)]
    for method in ("tustin", "zoh"):
        got = discretize(*stacked, 0.05, method)
        for k, s in enumerate(systems):
            ref = scipy.signal.cont2discrete(s, 0.05, method="bilinear" if method == "tustin"
                                             else "zoh")[:4]
            for g, r in zip(got, ref, strict=True):
                np.testing.assert_allclose(g[k], r, rtol=1e-10, atol=1e-12)


def _freq(A, B, C, D, s):
    return C @ np.linalg.solve(s * np.eye(A.shape[0]) - A, B) + D


@pytest.mark.parametrize("w0", [1.0, 10.0, 40.0])
def test_prewarp_matches_continuous_response_at_w0(w0):
    # Analytic property of pre-warped Tustin (Franklin, Powell & Workman, Digital Control of
    # Dynamic Systems, 3rd ed., sec. 6.3.2): Hd(exp(j w0 T)) = Hc(j w0) exactly.
    rng = np.random.default_rng(11)
    sys = _random_stable(rng, 4, 2, 2)
    T = 0.05
    Ad, Bd, Cd, Dd = discretize(*sys, T, "tustin", prewarp=w0)
    hd = _freq(Ad, Bd, Cd, Dd, np.exp(1j * w0 * T))
    hc = _freq(*sys, 1j * w0)
    np.testing.assert_allclose(hd, hc, rtol=1e-10, atol=1e-12)
    # plain Tustin does not match there (frequency warping), so the check can fail
    hd0 = _freq(*discretize(*sys, T, "tustin"), np.exp(1j * w0 * T))
    assert np.max(np.abs(hd0 - hc)) > 1e-6
    # and it equals scipy's bilinear transform at the warped step 2 tan(w0 T/2)/w0
    Tw = 2.0 * math.tan(w0 * T / 2.0) / w0
    ref = scipy.signal.cont2discrete(sys, Tw, method="gbt", alpha=0.5)[:4]
    for g, r in zip((Ad, Bd, Cd, Dd), ref, strict=True):
        np.testing.assert_allclose(g, r, rtol=1e-10, atol=1e-12)


def test_discretize_errors():
    sys = (np.array([[-1.0]]), np.array([[1.0]]), np.array([[1.0]]), np.array([[0.0]]))
    for bad in (0.0, -0.1, float("nan"), "x"):
        with pytest.raises(InputError, match="sample time"):
            discretize(*sys, bad)
    with pytest.raises(InputError, match="method"):
        discretize(*sys, 0.1, "euler")
    with pytest.raises(InputError, match="Nyquist"):
        discretize(*sys, 0.1, "tustin", prewarp=40.0)  # pi/T = 31.4 rad/s
    with pytest.raises(InputError, match="Tustin only"):
        discretize(*sys, 0.1, "zoh", prewarp=1.0)
    # A with eigenvalue exactly 2/T: I - T/2 A is singular
    with pytest.raises(NumericalError, match="2/T"):
        discretize(np.array([[20.0]]), *sys[1:], 0.1, "tustin")
    with pytest.raises(ValueError):
        prewarped_step(0.1, -1.0)


def test_parse_breakpoints_syntax():
    fam = make_family()
    got = parse_breakpoints("rope_length=3:30:28,payload_mass=2000,5000,20000", fam.variables)
    np.testing.assert_allclose(got["rope_length"], np.linspace(3, 30, 28))
    np.testing.assert_array_equal(got["payload_mass"], [2000.0, 5000.0, 20000.0])
    got = parse_breakpoints("payload_mass = 2e3; 1.5e4 ;2.0E4", fam.variables)
    np.testing.assert_array_equal(got["payload_mass"], [2000.0, 15000.0, 20000.0])


def test_parse_breakpoints_file(tmp_path):
    fam = make_family()
    f = tmp_path / "bp.txt"
    f.write_text("# denser rope\nrope_length = 3:30:4\npayload_mass = 2000, 20000\n")
    got = parse_breakpoints(str(f), fam.variables)
    np.testing.assert_allclose(got["rope_length"], [3, 12, 21, 30])


@pytest.mark.parametrize("text,msg", [
    ("rope_length=2:30:5", "outside its bounds"),
    ("rope_length=3,40", "outside its bounds"),
    ("rope_length=10,5", "increase strictly"),
    ("speed=1,2", "unknown variable"),
    ("3,4", "before any"),
    ("rope_length=3,abc", "not a number"),
    ("rope_length=3:30:1", "at least 2"),
    ("rope_length=3,rope_length=4", "twice"),
])
def test_parse_breakpoints_errors(text, msg):
    with pytest.raises(InputError, match=msg) as exc:
        parse_breakpoints(text, make_family().variables)
    assert "\n" not in str(exc.value)


def test_table_at_design_breakpoints_reproduces_local_controllers():
    # Reference: the family's own controllers (table must hold them unchanged).
    fam = make_family()
    tab = build_table(fam)
    assert tab.method == "continuous" and tab.inside.all()
    np.testing.assert_array_equal(tab.nodes(), fam.points)
    for k in "ABCD":
        np.testing.assert_array_equal(getattr(tab, k), fam.controller[k])


def test_discrete_table_at_breakpoints_matches_scipy():
    fam = make_family()
    tab = build_table(fam, sample_time=0.02, method="tustin")
    for j in range(fam.points.shape[0]):
        ref = scipy.signal.cont2discrete(tuple(fam.controller[k][j] for k in "ABCD"), 0.02,
                                         method="bilinear")[:4]
        for k, r in zip("ABCD", ref, strict=True):
            np.testing.assert_allclose(getattr(tab, k)[j], r, rtol=1e-12, atol=1e-14)
    assert tab.sample_time == 0.02 and tab.gamma == fam.gamma


def test_denser_breakpoints_filled_from_interpolant(monkeypatch):
    # Stand-in interpolant = the analytic controller formula (tests/test_export_fixtures.py),
    # so nodes between design points must equal the formula and design nodes the family.
    fam = make_family()
    # perturb the family's own controllers so "family" and "formula" differ at design nodes
    fam.controller["D"] = fam.controller["D"] + 1.0
    monkeypatch.setattr(table_mod, "_evaluate_interpolant", analytic_evaluator)
    tab = build_table(fam, breakpoints="rope_length=3,6.5,10,20,30")
    nodes = tab.nodes()
    for j, p in enumerate(nodes):
        design = np.flatnonzero(np.all(fam.points == p, axis=1))
        if design.size:
            ref = [fam.controller[k][design[0]] for k in "ABCD"]
        else:
            ref = controller_at(p)
        for k, r in zip("ABCD", ref, strict=True):
            np.testing.assert_allclose(getattr(tab, k)[j], r, rtol=1e-14)
    assert tab.shape == (5, 2)


def test_failed_points_are_filled_from_interpolant(monkeypatch):
    fam = make_family(failed=(1,))
    calls = []

    def spy(family, nodes):
        calls.append(np.array(nodes))
        return analytic_evaluator(family, nodes)

    monkeypatch.setattr(table_mod, "_evaluate_interpolant", spy)
    tab = build_table(fam)
    assert len(calls) == 1 and calls[0].shape == (1, 2)
    np.testing.assert_array_equal(calls[0][0], fam.points[1])
    np.testing.assert_allclose(tab.A[1], controller_at(fam.points[1])[0])


def test_scattered_family_grid_and_hull_mask(monkeypatch):
    # A triangle of points in the unit square: nodes in the upper-right corner lie outside
    # the hull (checked against the half-plane x + y <= 1 by hand).
    pts = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [0.3, 0.3]])
    fam = make_family(breakpoints=((0.0, 1.0), (0.0, 1.0)), scattered_points=pts)
    monkeypatch.setattr(table_mod, "_evaluate_interpolant", analytic_evaluator)
    tab = build_table(fam, breakpoints="rope_length=0:1:5,payload_mass=0:1:5")
    nodes = tab.nodes()
    expected_inside = nodes.sum(axis=1) <= 1.0 + 1e-12
    np.testing.assert_array_equal(tab.inside, expected_inside)
    assert np.isfinite(tab.A).all()
    # inside nodes that are data points take the family's controller exactly
    j = int(np.flatnonzero(np.all(nodes == [1.0, 0.0], axis=1))[0])
    np.testing.assert_array_equal(tab.A[j], fam.controller["A"][1])
    # a node outside holds its nearest inside node's controller
    j = int(np.flatnonzero(np.all(nodes == [1.0, 1.0], axis=1))[0])
    assert not tab.inside[j]


def test_build_table_errors():
    fam = make_family()
    with pytest.raises(InputError, match="outside its bounds"):
        build_table(fam, breakpoints={"rope_length": [1.0, 3.0, 30.0]})
    with pytest.raises(InputError, match="sample time"):
        build_table(fam, sample_time=-1.0)
    with pytest.raises(InputError, match="pre-warp needs"):
        build_table(fam, prewarp=3.0)
    bad = make_family(failed=range(6))
    with pytest.raises(InputError, match="no successful"):
        build_table(bad)


def test_denser_breakpoints_with_the_real_multilinear_interpolant():
    # Analytic: a multilinear interpolant at the midpoint between two design breakpoints
    # is the mean of the two neighbours; design nodes keep the family's controllers.
    from schedule.interpolate import ScheduledController
    fam = make_family()
    fam.interpolant = ScheduledController.fit(fam, form="matrices",
                                              kind="multilinear").to_arrays()
    tab = build_table(fam, breakpoints="rope_length=3,6.5,10,20,30")
    for k in "ABCD":
        M = getattr(tab, k).reshape((5, 2) + getattr(tab, k).shape[1:])
        F = fam.controller[k].reshape((3, 2) + fam.controller[k].shape[1:])
        np.testing.assert_array_equal(M[[0, 2, 4]], F)
        np.testing.assert_allclose(M[1], (F[0] + F[1]) / 2, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(M[3], (F[1] + F[2]) / 2, rtol=1e-12, atol=1e-14)


# ----------------------------------------------------------------------------- sample time
def _loop_family(k: float, with_plant: bool = True):
    """Plant x' = -x + u, y = x with the controller x_K' = -x_K + y, u = -k x_K at two points.

    Closed loop [[-1, -k], [1, -1]]: eigenvalues -1 +- j sqrt(k), modulus sqrt(1 + k)
    (derived by hand). Without the plant, the controller's own mode is at 1 rad/s.
    """
    from schedule.types import Family, SchedulingVariable

    N = 2
    one = np.ones((N, 1, 1))
    zero = np.zeros((N, 1, 1))
    plant = {"A": -one, "B1": zero, "B2": one, "C1": zero, "C2": one, "D11": zero,
             "D12": zero, "D21": zero, "D22": zero}
    if not with_plant:
        plant = {key: np.zeros((N, 1, 2)) for key in plant}  # does not fit the controller
    return Family(variables=(SchedulingVariable("p", "", 0.0, 1.0),),
                  points=np.array([[0.0], [1.0]]), status=np.array(["ok", "ok"]),
                  reasons=("", ""), gamma_opt=np.ones(N), gamma=2.0, plant=plant,
                  controller={"A": -one, "B": one, "C": -k * one, "D": zero}, pieces={},
                  measured_names=("y",), control_names=("u",),
                  breakpoints=(np.array([0.0, 1.0]),), grid_index=np.array([[0], [1]]))


def test_sample_time_against_the_fastest_closed_loop_mode():
    # k = 24: closed-loop modes of modulus sqrt(1 + 24) = 5 rad/s (analytic, above).
    fam = _loop_family(24.0)
    w, _, what = table_mod.fastest_mode(fam)
    assert w == pytest.approx(5.0, rel=1e-12) and what == "closed-loop"
    # Nyquist: w T >= pi is refused, with the numbers; 10 samples per period (common
    # practice) means T <= 2 pi / (10 w) = 0.1257 s.
    with pytest.raises(InputError, match=r"fastest closed-loop mode, 5 rad/s .* above the "
                                         r"Nyquist frequency pi/T = 4.49 rad/s; give a "
                                         r"sample time of at most 0.126 s"):
        build_table(fam, sample_time=0.7)
    warned = build_table(fam, sample_time=0.2)
    assert "6.3 samples per period" in warned.extra["sample_time_note"]
    assert "at most 0.126 s" in warned.extra["sample_time_note"]
    assert "sample_time_note" not in build_table(fam, sample_time=0.12).extra
    # no plant that fits: the controller's own mode (1 rad/s) is the reference
    w, _, what = table_mod.fastest_mode(_loop_family(24.0, with_plant=False))
    assert w == pytest.approx(1.0) and what == "controller"
