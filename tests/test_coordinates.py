"""The coordinate-consistency diagnostic on the crane envelope.

Outside reference: a similarity transform x -> T x leaves the frequency
response C (sI - A)^-1 B + D unchanged (basic linear-system theory, e.g. Zhou,
Doyle and Glover 1996, sec. 3.1), so a point re-expressed in other state
coordinates has the same response as before while its matrices change. The
crane envelope is linearized in one set of named states at every point, so it
must come out clean; the same envelope with one point's states permuted and
rescaled must name that point.
"""

from __future__ import annotations

from importlib import resources

import numpy as np

from schedule.coordinates import check_coordinates
from schedule.oppoints import read_operating_points


def _crane():
    path = resources.files("schedule.demo_crane").joinpath("crane_envelope.h5")
    return read_operating_points(str(path))


def _grid_index(ops):
    return np.stack([np.searchsorted(bp, ops.values[:, j])
                     for j, bp in enumerate(ops.breakpoints)], axis=1)


def test_crane_envelope_is_consistent():
    ops = _crane()
    rep = check_coordinates(ops.values, ops.A, ops.B, ops.C, ops.D,
                            grid_index=_grid_index(ops))
    assert not rep.flagged.any(), rep.message


def test_one_point_in_other_coordinates_is_named():
    ops = _crane()
    A, B, C = ops.A.copy(), ops.B.copy(), ops.C.copy()
    k = 17                                   # an interior grid point
    n = A.shape[1]
    T = np.diag([1.0, -3.0, 50.0, 1.0, 0.01])[np.roll(np.arange(n), 1)]
    Ti = np.linalg.inv(T)
    A[k], B[k], C[k] = T @ A[k] @ Ti, T @ B[k], C[k] @ Ti
    rep = check_coordinates(ops.values, A, B, C, ops.D, grid_index=_grid_index(ops))
    assert rep.flagged.any()
    assert k in rep.suspects
    assert "same state coordinates" in rep.message
