"""Tests of schedule/envelope.py.

Outside references: grid counts and cell/edge counts are elementary
combinatorics (a grid with n_j breakpoints has prod(n_j - 1) cells and
sum_j (n_j - 1) prod_{k != j} n_k edges); the Latin hypercube property (one
sample in each of the n equal strata of every axis) is its definition (McKay,
Beckman and Conover 1979); Sobol' points are compared with scipy.stats.qmc
directly.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import qmc

from schedule.envelope import (
    RectangularGrid,
    ScatteredPoints,
    cell_centres,
    edge_midpoints,
    in_between_points,
    latin_hypercube,
    points_from_file,
    sobol,
)
from schedule.errors import InputError
from schedule.types import SchedulingVariable

V = (SchedulingVariable("length", "m", 3.0, 30.0), SchedulingVariable("mass", "kg", 2e3, 4e4))


def test_grid_points_order_and_holes():
    g = RectangularGrid(([3.0, 10.0, 30.0], [2e3, 4e4]), holes=[[3.0, 4e4]], variables=V)
    # C order, last variable fastest, minus the hole
    np.testing.assert_array_equal(g.points, [[3, 2e3], [10, 2e3], [10, 4e4], [30, 2e3],
                                             [30, 4e4]])
    np.testing.assert_array_equal(g.grid_index, [[0, 0], [1, 0], [1, 1], [2, 0], [2, 1]])
    assert g.report() == ("grid point length=3, mass=40000 skipped (hole)",)
    assert not g.is_point((0, 1)) and g.is_point((2, 1))


@pytest.mark.parametrize("kwargs, needle", [
    (dict(breakpoints=([3.0, 3.0, 30.0], [2e3]), variables=V), "repeat 3, 3"),
    (dict(breakpoints=([10.0, 3.0], [2e3]), variables=V), "not increasing"),
    (dict(breakpoints=([3.0, np.nan], [2e3]), variables=V), "NaN"),
    (dict(breakpoints=([3.0, 31.0], [2e3]), variables=V), "outside [3, 30]"),
    (dict(breakpoints=([3.0, 30.0], [2e3]), holes=[[4.0, 2e3]], variables=V),
     "length = 4 is not a breakpoint"),
    (dict(breakpoints=([3.0, 30.0], [2e3]), holes=[[3.0, 2e3], [30.0, 2e3]]),
     "every grid point is a hole"),
    (dict(breakpoints=([3.0, 30.0], [2e3]), holes=[[3.0, 2e3], [3.0, 2e3]]), "twice"),
])
def test_grid_validation(kwargs, needle):
    with pytest.raises(InputError) as info:
        RectangularGrid(**kwargs)
    assert needle in str(info.value) and "\n" not in str(info.value)


def test_scattered_validation():
    ScatteredPoints(np.array([[3.0, 2e3], [5.0, 8e3]]), V)
    with pytest.raises(InputError, match=r"points 0 and 2 coincide \(length=3, mass=2000\)"):
        ScatteredPoints(np.array([[3.0, 2e3], [5.0, 8e3], [3.0, 2e3]]), V)
    with pytest.raises(InputError, match="NaN"):
        ScatteredPoints(np.array([[3.0, np.nan]]), V)
    with pytest.raises(InputError, match="mass outside"):
        ScatteredPoints(np.array([[3.0, 1e5]]), V)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(1, 5), min_size=1, max_size=3))
def test_cell_and_edge_counts(sizes):
    bps = tuple(np.cumsum(np.arange(1, s + 1, dtype=float)) for s in sizes)
    g = RectangularGrid(bps)
    c = cell_centres(g)
    assert len(c) == int(np.prod([max(s - 1, 1) for s in sizes]))
    e = edge_midpoints(g)
    expected = sum((sizes[j] - 1) * int(np.prod([sizes[k] for k in range(len(sizes)) if k != j]))
                   for j in range(len(sizes)))
    assert len(e) == expected
    # every centre lies strictly inside its cell along axes with more than one breakpoint
    for j, b in enumerate(bps):
        if len(b) > 1:
            assert np.all((c[:, j] > b[0]) & (c[:, j] < b[-1]))


def test_centres_and_midpoints_values():
    g = RectangularGrid(([0.0, 2.0, 6.0], [1.0, 3.0]), holes=[[6.0, 3.0]])
    np.testing.assert_array_equal(cell_centres(g), [[1.0, 2.0], [4.0, 2.0]])
    np.testing.assert_array_equal(cell_centres(g, skip_hole_cells=True), [[1.0, 2.0]])
    # edges whose ends are both grid points: (6,3) is a hole, so 2 of the 4 x-edges... count:
    # x-edges: (0,1)-(2,1), (0,3)-(2,3), (2,1)-(6,1); y-edges: (0,1)-(0,3), (2,1)-(2,3)
    np.testing.assert_array_equal(edge_midpoints(g), [[1.0, 1.0], [1.0, 3.0], [4.0, 1.0],
                                                      [0.0, 2.0], [2.0, 2.0]])


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(1, 5), min_size=1, max_size=3))
def test_in_between_points_once_each(sizes):
    """Centres and midpoints coincide exactly when a cell is an edge: when at most one
    variable has more than one breakpoint (combinatorics: a cell spans every axis with
    two or more breakpoints, an edge spans one). Each point is then checked once."""
    bps = tuple(np.cumsum(np.arange(1, s + 1, dtype=float)) for s in sizes)
    g = RectangularGrid(bps)
    pts, kinds = in_between_points(g)
    assert len({tuple(r) for r in pts.tolist()}) == len(pts)  # no point twice
    cells = int(np.prod([max(s - 1, 1) for s in sizes]))
    edges = sum((sizes[j] - 1) * int(np.prod([sizes[k] for k in range(len(sizes)) if k != j]))
                for j in range(len(sizes)))
    wide = sum(s > 1 for s in sizes)
    assert len(pts) == cells + (0 if wide == 1 else edges)
    assert (kinds == "centre").sum() == cells
    # the one-variable case the checks met: 7 breakpoints, 6 points, all centres
    one, k1 = in_between_points(RectangularGrid((np.arange(7.0),)))
    assert len(one) == 6 and set(k1) == {"centre"}


@pytest.mark.parametrize("n", [1, 7, 16, 50])
def test_samplers_inside_bounds_and_reproducible(n):
    for fn in (latin_hypercube, sobol):
        a, b = fn(V, n, seed=3), fn(V, n, seed=3)
        assert a.shape == (n, 2)
        np.testing.assert_array_equal(a, b)
        assert np.all(a >= [3.0, 2e3]) and np.all(a <= [30.0, 4e4])
        if n > 1:
            assert not np.array_equal(a, fn(V, n, seed=4))


def test_latin_hypercube_strata():
    n = 40
    x = latin_hypercube(V, n, seed=1)
    for j, v in enumerate(V):
        strata = np.floor((x[:, j] - v.lower) / (v.upper - v.lower) * n).astype(int)
        # McKay et al. 1979: exactly one sample per stratum along each axis
        assert sorted(strata.tolist()) == list(range(n))


def test_sobol_matches_scipy():
    x = sobol(V, 16, seed=5)
    ref = qmc.scale(qmc.Sobol(d=2, scramble=True, seed=np.random.default_rng(5)).random(16),
                    [3.0, 2e3], [30.0, 4e4])
    np.testing.assert_allclose(x, ref, rtol=1e-14)
    # a balanced base-2 block: one point in each of 16 elementary intervals of width 1/16
    u = (x[:, 0] - 3.0) / 27.0
    assert sorted(np.floor(u * 16).astype(int).tolist()) == list(range(16))


def test_points_from_file(tmp_path):
    p = tmp_path / "pts.csv"
    p.write_text("mass,length\n# a comment\n2000,3\n40000,30\n\n")
    np.testing.assert_array_equal(points_from_file(p, V), [[3.0, 2000.0], [30.0, 40000.0]])
    p.write_text("mass,width\n1,2\n")
    with pytest.raises(InputError, match="column 'width' is not a scheduling variable"):
        points_from_file(p, V)
    p.write_text("mass,length\n2000,abc\n")
    with pytest.raises(InputError, match="line 2 holds a non-number"):
        points_from_file(p, V)
    p.write_text("mass,length\n2000,31\n")
    with pytest.raises(InputError, match="outside"):
        points_from_file(p, V)
    with pytest.raises(InputError, match="does not exist"):
        points_from_file(tmp_path / "nope.csv", V)
