"""Synthetic controller families for the export tests (no synthesis needed).

The controllers are an analytic function of the scheduling point so that tests can
compare table entries against the formula (an outside reference independent of the
export code).
"""

from __future__ import annotations

import numpy as np

from schedule.types import Family, SchedulingVariable


def controller_at(p: np.ndarray, n: int = 3, ny: int = 2, nu: int = 1, seed: int = 7):
    """A stable continuous controller whose entries depend smoothly on p."""
    rng = np.random.default_rng(seed)
    A0 = rng.standard_normal((n, n)) * 0.3
    B0 = rng.standard_normal((n, ny))
    C0 = rng.standard_normal((nu, n))
    D0 = rng.standard_normal((nu, ny)) * 0.1
    s = float(np.sum(np.sin(np.asarray(p, dtype=float) * (np.arange(len(p)) + 1.0) / 7.0)))
    A = A0 - (2.0 + s) * np.eye(n)
    return A, B0 * (1.0 + 0.2 * s), C0 * (1.0 - 0.1 * s), D0 + 0.05 * s


def make_family(breakpoints=((3.0, 10.0, 30.0), (2000.0, 20000.0)), n=3, ny=2, nu=1,
                failed=(), scattered_points=None, with_plant=False) -> Family:
    """A rectangular (or, with ``scattered_points``, scattered) family of analytic controllers.

    With ``with_plant`` the family also holds a generalized plant whose B2 (small, so that
    A - B2 C stays stable) and D22 (zero) fit the controllers: the table then carries the
    anti-windup gain H = B2.
    """
    names = ("rope_length", "payload_mass", "wind")[: len(breakpoints)]
    units = ("m", "kg", "m/s")[: len(breakpoints)]
    if scattered_points is None:
        bps = tuple(np.asarray(b, dtype=float) for b in breakpoints)
        idx = np.stack(np.meshgrid(*[np.arange(len(b)) for b in bps], indexing="ij"),
                       axis=-1).reshape(-1, len(bps))
        points = np.stack([bps[k][idx[:, k]] for k in range(len(bps))], axis=1)
        variables = tuple(SchedulingVariable(nm, un, float(b[0]), float(b[-1]))
                          for nm, un, b in zip(names, units, bps, strict=True))
    else:
        points = np.asarray(scattered_points, dtype=float)
        bps, idx = None, None
        variables = tuple(SchedulingVariable(nm, un, float(lo), float(hi))
                          for nm, un, (lo, hi) in zip(names, units, breakpoints, strict=True))
    N = points.shape[0]
    mats = [controller_at(p, n, ny, nu) for p in points]
    status = np.array(["ok"] * N, dtype=object)
    for k in failed:
        status[k] = "failed"
        mats[k] = tuple(np.zeros_like(m) for m in mats[k])
    controller = {k: np.stack([m[i] for m in mats]) for i, k in enumerate("ABCD")}
    # placeholder plant: one state, one exogenous input and one error output, with the
    # controller's measured outputs (ny) and controls (nu), as the family format requires
    rows = {"A": 1, "B1": 1, "B2": 1, "C1": 1, "C2": ny, "D11": 1, "D12": 1, "D21": ny, "D22": ny}
    cols = {"A": 1, "B1": 1, "B2": nu, "C1": 1, "C2": 1, "D11": 1, "D12": nu, "D21": 1, "D22": nu}
    plant = {k: np.zeros((N, rows[k], cols[k])) for k in rows}
    if with_plant:
        rng = np.random.default_rng(11)
        plant.update({"A": np.zeros((N, n, n)), "B1": np.zeros((N, n, 1)),
                      "B2": np.repeat(0.1 * rng.standard_normal((1, n, nu)), N, axis=0),
                      "C1": np.zeros((N, 1, n)), "C2": np.zeros((N, ny, n)),
                      "D11": np.zeros((N, 1, 1)), "D12": np.zeros((N, 1, nu)),
                      "D21": np.zeros((N, ny, 1)), "D22": np.zeros((N, ny, nu))})
    return Family(
        variables=variables, points=points, status=status.astype(str),
        reasons=tuple("" if s == "ok" else "synthetic failure" for s in status),
        gamma_opt=np.full(N, 1.5), gamma=1.6, plant=plant, controller=controller, pieces={},
        measured_names=tuple(f"meas{i}" for i in range(ny)),
        control_names=tuple(f"act{i}" for i in range(nu)),
        breakpoints=bps, grid_index=idx)


def analytic_evaluator(family, nodes):
    """Stand-in for the interpolant: the exact analytic controller at ``nodes``."""
    n = family.controller["A"].shape[1]
    ny = family.controller["B"].shape[2]
    nu = family.controller["C"].shape[1]
    mats = [controller_at(p, n, ny, nu) for p in np.asarray(nodes)]
    return {k: np.stack([m[i] for m in mats]) for i, k in enumerate("ABCD")}


def test_fixture_is_a_valid_family():
    from schedule.store import _validate_family
    fam = make_family()
    _validate_family(fam, "fixture")
    assert fam.ok.all()
    A = fam.controller["A"]
    assert np.all(np.linalg.eigvals(A).real < 0)  # stable controllers
