"""Tests of schedule.plant: construction, validation and the existence conditions.

The rank/zero conditions are checked on plants whose defects are known by
construction (hand-derived: an integrator or an oscillator that the relevant
path cannot see), so the expected verdict and frequency come from the algebra,
not from the code.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from schedule.errors import PlantError, ScheduleError
from schedule.plant import PLANT_KEYS, GeneralizedPlant


def _good(n=2):
    rng = np.random.default_rng(0)
    return dict(
        A=rng.standard_normal((n, n)),
        B1=rng.standard_normal((n, 2)),
        B2=rng.standard_normal((n, 1)),
        C1=rng.standard_normal((2, n)),
        C2=rng.standard_normal((1, n)),
        D11=np.zeros((2, 2)),
        D12=np.array([[0.0], [1.0]]),
        D21=np.array([[0.0, 1.0]]),
        D22=np.zeros((1, 1)),
    )


def test_keyword_construction_and_sizes():
    p = GeneralizedPlant(**_good(3))
    assert (p.n, p.nw, p.nu, p.nz, p.ny) == (3, 2, 1, 2, 1)
    assert p.A.dtype == np.float64
    d = p.to_arrays()
    assert tuple(d) == PLANT_KEYS
    q = GeneralizedPlant.from_arrays(d)
    for k in PLANT_KEYS:
        np.testing.assert_array_equal(getattr(p, k), getattr(q, k))


def test_from_abcd_splits_controls_last_columns_and_measurements_last_rows():
    rng = np.random.default_rng(1)
    A = rng.standard_normal((3, 3))
    B = rng.standard_normal((3, 4))
    C = rng.standard_normal((5, 3))
    D = rng.standard_normal((5, 4))
    p = GeneralizedPlant.from_abcd(A, B, C, D, n_controls=1, n_measurements=2)
    np.testing.assert_array_equal(p.B2, B[:, 3:])
    np.testing.assert_array_equal(p.B1, B[:, :3])
    np.testing.assert_array_equal(p.C2, C[3:])
    np.testing.assert_array_equal(p.D12, D[:3, 3:])
    np.testing.assert_array_equal(p.D21, D[3:, :3])
    np.testing.assert_array_equal(p.D22, D[3:, 3:])
    with pytest.raises(PlantError, match="n_controls"):
        GeneralizedPlant.from_abcd(A, B, C, D, n_controls=4, n_measurements=2)


@pytest.mark.parametrize(
    "key, value, words",
    [
        ("A", np.zeros((2, 3)), ["A", "square"]),
        ("B2", np.zeros((3, 1)), ["B2", "shape", "(2, 1)"]),
        ("D12", np.zeros((2, 2)), ["D12", "expected (2, 1)"]),
        ("C1", np.array([[np.nan, 0.0], [0.0, 0.0]]), ["C1", "NaN"]),
        ("D21", np.array([[np.inf, 1.0]]), ["D21", "inf"]),
        ("B1", np.zeros(2), ["B1", "2-D"]),
        ("B2", np.zeros((2, 0)), ["nu=0"]),
        ("C2", np.zeros((0, 2)), ["ny=0"]),
    ],
)
def test_bad_input_one_line_error_naming_the_matrix(key, value, words):
    d = _good()
    d[key] = value
    if key == "B2" and value.shape[1] == 0:
        d["D12"] = np.zeros((2, 0))
        d["D22"] = np.zeros((1, 0))
    if key == "C2" and value.shape[0] == 0:
        d["D21"] = np.zeros((0, 2))
        d["D22"] = np.zeros((0, 1))
    with pytest.raises(PlantError) as err:
        GeneralizedPlant(**d)
    msg = str(err.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg
    assert isinstance(err.value, ScheduleError) and isinstance(err.value, ValueError)


def test_empty_w_and_z_partitions_named():
    d = _good()
    d.update(B1=np.zeros((2, 0)), D11=np.zeros((2, 0)), D21=np.zeros((1, 0)))
    with pytest.raises(PlantError, match="nw=0"):
        GeneralizedPlant(**d)
    d = _good()
    d.update(C1=np.zeros((0, 2)), D11=np.zeros((0, 2)), D12=np.zeros((0, 1)))
    with pytest.raises(PlantError, match="nz=0"):
        GeneralizedPlant(**d)


def test_good_plant_passes_conditions():
    GeneralizedPlant(**_good()).check_conditions()


def test_unstabilizable_mode_named():
    # A = diag(1, -1), B2 = [0; 1]: the mode at +1 is not reachable from u
    # (PBH: [A - I, B2] = [0 0 0; 0 -2 1] has rank 1 < 2).
    d = _good()
    d.update(A=np.diag([1.0, -1.0]), B2=np.array([[0.0], [1.0]]))
    with pytest.raises(PlantError, match=r"not stabilizable: mode 1"):
        GeneralizedPlant(**d).check_conditions()


def test_undetectable_mode_named():
    d = _good()
    d.update(A=np.diag([2.0, -1.0]), B2=np.array([[1.0], [1.0]]), C2=np.array([[0.0, 1.0]]))
    with pytest.raises(PlantError, match=r"not detectable: mode 2"):
        GeneralizedPlant(**d).check_conditions()


def test_rank_deficient_d12_and_d21():
    d = _good()
    d["D12"] = np.zeros((2, 1))
    with pytest.raises(PlantError, match=r"D12 \(2x1\) has rank 0"):
        GeneralizedPlant(**d).check_conditions()
    d = _good()
    d.update(B1=np.ones((2, 2)), D21=np.array([[1.0, 1.0]]), D22=np.zeros((1, 1)))
    d["D21"] = np.zeros((1, 2))
    with pytest.raises(PlantError, match=r"D21 \(1x2\) has rank 0"):
        GeneralizedPlant(**d).check_conditions()


def _integrator(C1, D12, B1, D21, A=None):
    A = np.zeros((1, 1)) if A is None else A
    n = A.shape[0]
    return GeneralizedPlant(
        A=A,
        B1=B1,
        B2=np.ones((n, 1)),
        C1=C1,
        C2=np.ones((1, n)),
        D11=np.zeros((C1.shape[0], B1.shape[1])),
        D12=D12,
        D21=D21,
        D22=np.zeros((1, 1)),
    )


def test_imaginary_axis_zero_of_control_path_reports_frequency():
    # Pure integrator xdot = u + w1, z = [0*x; u]: [A - sI, B2; C1, D12] = [-s 1; 0 0; 0 1]
    # loses column rank at s = 0 (hand-derived), i.e. w = 0.
    p = _integrator(
        C1=np.zeros((2, 1)),
        D12=np.array([[0.0], [1.0]]),
        B1=np.array([[1.0, 0.0]]),
        D21=np.array([[0.0, 1.0]]),
    )
    with pytest.raises(PlantError) as err:
        p.check_conditions()
    msg = str(err.value)
    assert "B2; C1, D12" in msg and "w=0 " in msg and "s + 1e-4" in msg and "\n" not in msg


def test_imaginary_axis_zero_of_oscillator_reports_its_frequency():
    # Undamped oscillator at 2 rad/s that z does not see (C1 = 0 on the states):
    # A - B2 D12^+ C1 = A has eigenvalues +-2j unobservable from U'C1 = 0 -> w = 2.
    A = np.array([[0.0, 2.0], [-2.0, 0.0]])
    p = GeneralizedPlant(
        A=A,
        B1=np.array([[1.0, 0.0], [0.0, 0.0]]),
        B2=np.array([[0.0], [1.0]]),
        C1=np.zeros((2, 2)),
        C2=np.array([[1.0, 0.0]]),
        D11=np.zeros((2, 2)),
        D12=np.array([[0.0], [1.0]]),
        D21=np.array([[0.0, 1.0]]),
        D22=np.zeros((1, 1)),
    )
    with pytest.raises(PlantError, match=r"w=2 rad/s"):
        p.check_conditions()


def test_imaginary_axis_zero_of_disturbance_path():
    # Integrator whose state the disturbance does not drive (B1 = 0):
    # [A - sI, B1; C2, D21] = [-s 0 0; 1 0 1] loses row rank at s = 0.
    p = _integrator(
        C1=np.array([[1.0], [0.0]]),
        D12=np.array([[0.0], [1.0]]),
        B1=np.zeros((1, 2)),
        D21=np.array([[0.0, 1.0]]),
    )
    with pytest.raises(PlantError) as err:
        p.check_conditions()
    assert "B1; C2, D21" in str(err.value) and "w=0 " in str(err.value)


def test_integrator_moved_into_left_half_plane_passes():
    # The remedy the message suggests (s -> s + 1e-4) must be accepted.
    p = _integrator(
        C1=np.zeros((2, 1)),
        D12=np.array([[0.0], [1.0]]),
        B1=np.array([[1.0, 0.0]]),
        D21=np.array([[0.0, 1.0]]),
        A=np.array([[-1e-4]]),
    )
    p.check_conditions()


def test_from_validated_skips_checks_but_holds_the_same_arrays():
    # The trusted constructor must give a plant equal to the checked one (reference: the
    # normal constructor) and must not copy (it is meant for slices of validated stacks).
    d = {k: np.asarray(v, dtype=np.float64) for k, v in _good(3).items()}
    p, q = GeneralizedPlant(**d), GeneralizedPlant.from_validated(d)
    for k in PLANT_KEYS:
        np.testing.assert_array_equal(getattr(p, k), getattr(q, k))
        assert getattr(q, k) is d[k]
    assert (q.n, q.nw, q.nu, q.nz, q.ny) == (p.n, p.nw, p.nu, p.nz, p.ny)
    q.check_conditions()


# ----------------------------------------------------------------- scale invariance
def _scaled(d, t, W=None, V=None):
    """x = diag(t) x~; u = W u~; y~ = V y (a change of coordinates and units)."""
    Ti = 1.0 / t
    e = dict(d, A=Ti[:, None] * d["A"] * t[None, :], B1=Ti[:, None] * d["B1"],
             B2=Ti[:, None] * d["B2"], C1=d["C1"] * t[None, :], C2=d["C2"] * t[None, :])
    if W is not None:
        e.update(B2=e["B2"] @ W, D12=e["D12"] @ W, D22=e["D22"] @ W)
    if V is not None:
        e.update(C2=V @ e["C2"], D21=V @ e["D21"], D22=V @ e["D22"])
    return e


def test_badly_scaled_plant_is_stabilizable():
    """a = 1e8, B2 = 1 (issue 12): [a - lam, b] at lam = a is [0, 1], full rank (PBH, Hautus
    1969); the earlier threshold grew with ||A|| and called it "not stabilizable"."""
    d = _good(1)
    d.update(A=np.array([[1e8]]), B2=np.ones((1, 1)), C2=np.ones((1, 1)))
    GeneralizedPlant(**d).check_conditions()


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31 - 1))
def test_conditions_do_not_depend_on_coordinates_or_units(seed):
    """The PBH rank of [A - lam I, B] and [A - lam I; C] is unchanged by x = T x~, u = W u~,
    y~ = V y with T, W, V invertible (Hautus 1969). Diagonal state scalings 1e-3..1e3 made
    26 of 60 plants "not stabilizable" before the fix; u / y changes of condition 1e6,
    11 of 20. An uncontrollable mode stays uncontrollable under the same changes."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 6))
    d = _good(n)
    d.update(A=rng.standard_normal((n, n)) + 0.5 * np.eye(n),
             B2=rng.standard_normal((n, 2)), C2=rng.standard_normal((2, n)),
             D12=np.vstack([np.zeros((1, 2)), np.eye(2)]), C1=rng.standard_normal((3, n)),
             D11=np.zeros((3, 3)), B1=rng.standard_normal((n, 3)),
             D21=np.hstack([np.zeros((2, 1)), np.eye(2)]), D22=np.zeros((2, 2)))
    try:
        GeneralizedPlant(**d).check_conditions()
    except PlantError:
        return  # a random plant may have an imaginary-axis zero: not this test's business
    t = 10.0 ** rng.uniform(-3, 3, n)
    W = np.diag([1.0, 1e-6])[rng.permutation(2)] * 10.0 ** rng.uniform(-3, 3)
    V = np.linalg.qr(rng.standard_normal((2, 2)))[0] @ np.diag([1.0, 1e-6]) * 10.0 ** (
        rng.uniform(-3, 3))
    GeneralizedPlant(**_scaled(d, t)).check_conditions()
    GeneralizedPlant(**_scaled(d, t, W, V)).check_conditions()
    # make mode 1 of A (in the eigenbasis) unreachable: A = diag(1, ...), B2 first row 0
    bad = dict(d, A=np.diag(np.concatenate([[1.0], -1.0 - rng.random(n - 1)])))
    bad["B2"] = bad["B2"].copy()
    bad["B2"][0] = 0.0
    with pytest.raises(PlantError, match=r"not stabilizable: mode 1\b"):
        GeneralizedPlant(**_scaled(bad, t, W, V)).check_conditions()
