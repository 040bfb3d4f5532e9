"""Tests of schedule.export.runtime.TableController (lookup and stepping)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
from test_export_fixtures import make_family

from schedule.errors import InputError
from schedule.export import TableController, build_table


def _ctl(**kw):
    fam = make_family(**kw)
    return TableController(build_table(fam, sample_time=0.05, method="zoh"))


def test_lookup_exact_at_nodes_and_bilinear_between():
    ctl = _ctl()
    tab = ctl.table
    for j, p in enumerate(tab.nodes()):
        m = ctl.matrices(p)
        for k in "ABCD":
            np.testing.assert_array_equal(m[k], getattr(tab, k)[j])
    # Analytic: bilinear interpolation at a cell centre is the mean of the four corners;
    # at a quarter along one edge it is 3/4 of one end plus 1/4 of the other.
    A = tab.A.reshape(3, 2, *tab.A.shape[1:])
    centre = ctl.matrices([6.5, 11000.0])["A"]
    np.testing.assert_allclose(centre, (A[0, 0] + A[0, 1] + A[1, 0] + A[1, 1]) / 4, rtol=1e-14)
    quarter = ctl.matrices([10.0 + 0.25 * 20.0, 2000.0])["A"]
    np.testing.assert_allclose(quarter, 0.75 * A[1, 0] + 0.25 * A[2, 0], rtol=1e-14)


def test_lookup_clamps_at_the_bounds():
    ctl = _ctl()
    A = ctl.table.A.reshape(3, 2, *ctl.table.A.shape[1:])
    np.testing.assert_array_equal(ctl.matrices([-100.0, -1e9])["A"], A[0, 0])
    np.testing.assert_array_equal(ctl.matrices([1e6, 1e9])["A"], A[2, 1])
    np.testing.assert_array_equal(ctl.matrices([float("nan"), 1e9])["A"], A[0, 1])
    by_name = ctl.matrices({"payload_mass": 1e9, "rope_length": 50.0})["A"]
    np.testing.assert_array_equal(by_name, A[2, 1])


def test_frozen_schedule_matches_scipy_dlsim():
    # Reference: scipy.signal.dlsim of the (frozen) discrete controller at that point.
    ctl = _ctl()
    p = [7.0, 15000.0]
    m = ctl.matrices(p)
    rng = np.random.default_rng(5)
    Y = rng.standard_normal((60, ctl.table.n_inputs))
    x0 = rng.standard_normal(ctl.table.n_states)
    _, u_ref, _ = scipy.signal.dlsim((m["A"], m["B"], m["C"], m["D"], 0.05), Y, x0=x0)
    ctl.reset(x0)
    u = np.array([ctl.step(y, p) for y in Y])
    np.testing.assert_allclose(u, u_ref.reshape(u.shape), rtol=1e-11, atol=1e-12)


def test_state_carried_across_schedule_change():
    # Independent recurrence: x[k+1] = A(p_k) x[k] + B(p_k) y[k] with p switching mid-run;
    # the state is never reset, so u right after the switch uses the old state.
    ctl = _ctl()
    rng = np.random.default_rng(8)
    ps = [[4.0, 3000.0]] * 10 + [[25.0, 18000.0]] * 10
    Y = rng.standard_normal((20, ctl.table.n_inputs))
    x = np.zeros(ctl.table.n_states)
    ctl.reset()
    for p, y in zip(ps, Y, strict=True):
        m = ctl.matrices(p)
        u_ref = m["C"] @ x + m["D"] @ y
        x = m["A"] @ x + m["B"] @ y
        np.testing.assert_allclose(ctl.step(y, p), u_ref, rtol=1e-13, atol=1e-14)
        np.testing.assert_allclose(ctl.state, x, rtol=1e-13, atol=1e-14)
    # the step across the switch is not a reset: the state before it is nonzero
    assert np.linalg.norm(x) > 0


def test_runtime_errors():
    fam = make_family()
    with pytest.raises(InputError, match="continuous"):
        TableController(build_table(fam))
    ctl = _ctl()
    with pytest.raises(InputError, match="2 finite"):
        ctl.step([1.0], [5.0, 3000.0])
    with pytest.raises(InputError, match="2 finite"):
        ctl.step([1.0, float("nan")], [5.0, 3000.0])
    with pytest.raises(InputError, match="lacks payload_mass"):
        ctl.step([1.0, 0.0], {"rope_length": 5.0})
    with pytest.raises(InputError, match="expected 2"):
        ctl.step([1.0, 0.0], [5.0])
    with pytest.raises(InputError, match="initial state"):
        ctl.reset([1.0])


def test_interpolate_matrices_takes_a_mapping():
    # Issue 13: the same point by name (documented) and as a sequence in variable order.
    from schedule.export import interpolate_matrices
    tab = _ctl().table
    by_name = interpolate_matrices(tab, {"payload_mass": 9000.0, "rope_length": 6.5})
    by_order = interpolate_matrices(tab, [6.5, 9000.0])
    for k in "ABCD":
        np.testing.assert_array_equal(by_name[k], by_order[k])
    with pytest.raises(InputError, match="lacks payload_mass"):
        interpolate_matrices(tab, {"rope_length": 6.5})
    with pytest.raises(InputError, match="unknown variable 'speed'"):
        interpolate_matrices(tab, {"rope_length": 6.5, "payload_mass": 1.0, "speed": 2.0})


def test_step_rejects_non_finite_point_and_keeps_state():
    ctl = _ctl()
    ctl.step([1.0, 0.5], [5.0, 3000.0])
    x = ctl.state
    for p in ([float("nan"), 3000.0], [5.0, float("inf")]):
        with pytest.raises(InputError, match="NaN or inf"):
            ctl.step([1.0, 0.5], p)
        np.testing.assert_array_equal(ctl.state, x)
