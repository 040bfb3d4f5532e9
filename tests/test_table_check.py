"""The shipped table checked as it runs, on the bundled crane; export adds what it needs.

Outside references: the crane model itself (schedule.demo_crane.crane, checked against
pendulum physics in tests/test_crane.py), linearized afresh at every check point - the
true plant; scipy.signal.cont2discrete for the zero-order hold of the plant and Tustin's
rule of the controller at a node, with the closed loop evaluated on the unit circle by
the plain lower-LFT formula (an evaluation that shares nothing with the bilinear
image); and the sampling argument that a slower sample rate adds delay at the loop's
crossover: at T = 0.1 s the discretized crane loop loses input phase margin no table
density can restore.
"""

from __future__ import annotations

import dataclasses
import json
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
from click.testing import CliRunner

from schedule.analysis.table_check import check_table
from schedule.check import CheckSettings, plants_at
from schedule.cli.main import main
from schedule.design_file import load_design
from schedule.export import build_table, write_fmu, write_table
from schedule.export.checked import build_checked_table
from schedule.family import design_family
from schedule.store import write_family

BUNDLED = Path(str(resources.files("schedule.demo_crane").joinpath("crane_design.toml")))


@pytest.fixture(scope="module")
def crane(tmp_path_factory):
    spec = load_design(BUNDLED)
    family = design_family(spec)
    path = tmp_path_factory.mktemp("crane") / "crane.h5"
    write_family(path, family)
    settings = CheckSettings.from_spec(spec, samples=8, gamma_opt=False, rate=False)
    return spec, family, path, settings


def _closed_loop_on_circle(P, K, theta):
    """sigma_max of P11 + P12 K (I - P22 K)^-1 P21 at z = e^{j theta} (plain formula)."""
    def resp(A, B, C, D, z):
        n = A.shape[0]
        M = z[:, None, None] * np.eye(n) - A
        return C @ np.linalg.solve(M, np.broadcast_to(B.astype(complex), (z.size,) + B.shape)) + D

    z = np.exp(1j * theta)
    B = np.hstack([P["B1"], P["B2"]])
    C = np.vstack([P["C1"], P["C2"]])
    D = np.block([[P["D11"], P["D12"]], [P["D21"], P["D22"]]])
    G = resp(P["A"], B, C, D, z)
    nz, nw = P["C1"].shape[0], P["B1"].shape[1]
    G11, G12, G21, G22 = G[:, :nz, :nw], G[:, :nz, nw:], G[:, nz:, :nw], G[:, nz:, nw:]
    Kz = resp(K["A"], K["B"], K["C"], K["D"], z)
    eye = np.eye(G22.shape[1])
    T = G11 + G12 @ Kz @ np.linalg.solve(eye - G22 @ Kz, G21)
    return np.linalg.svd(T, compute_uv=False)[:, 0]


def test_demo_table_passes_its_own_check(crane):
    """The demo's table (design grid, T = 0.02 s, Tustin) passes on the true plant, and at
    the worst node the discrete closed-loop norm agrees with an independent evaluation:
    scipy's ZOH of the crane's generalized plant and Tustin of the family's controller,
    the loop closed by the plain LFT formula on a dense unit circle."""
    spec, family, _, settings = crane
    table = build_table(family, sample_time=0.02, method="tustin", limits=spec.limits)
    tc = check_table(family, table, settings, spec)
    assert not tc.weaker and tc.discrete
    assert tc.all_passed, [tc.reasons[i] for i in np.flatnonzero(~tc.passed)][:3]
    cost = tc.cost()
    assert set(cost) >= {"interpolant", "interpolant_discrete", "table_continuous", "table",
                         "tabulation", "discretization"}
    # the discretized loop costs a little and is still below gamma (1 + tol)
    assert cost["table"]["max_ratio"] <= 1 + settings.gamma_tolerance
    nodes = np.flatnonzero(tc.kind == "node")
    i = nodes[np.argmax(tc.values["ratio"][nodes])]
    p = tc.points[i:i + 1]
    P = {k: v[0] for k, v in plants_at(family, p, spec)[0].items()}
    row = int(np.flatnonzero(np.all(np.isclose(family.points, p), axis=1))[0])
    Kc = [family.controller[k][row] for k in "ABCD"]
    T = 0.02
    Kd = dict(zip("ABCD", scipy.signal.cont2discrete(tuple(Kc), T, method="bilinear")[:4],
                  strict=True))
    B = np.hstack([P["B1"], P["B2"]])
    Ad, Bd = scipy.signal.cont2discrete((P["A"], B, np.zeros((1, B.shape[0])),
                                         np.zeros((1, B.shape[1]))), T, method="zoh")[:2]
    nw = P["B1"].shape[1]
    Pd = dict(P, A=Ad, B1=Bd[:, :nw], B2=Bd[:, nw:])
    w0 = tc.values["peak_frequency"][i] * T
    # (from 1e-4: the trolley's integrator puts an open-loop pole at z = 1)
    theta = np.concatenate([np.linspace(1e-4, np.pi, 20001),
                            np.linspace(max(w0 - 0.01, 0.0), min(w0 + 0.01, np.pi), 20001)])
    sweep = _closed_loop_on_circle(Pd, Kd, theta).max()
    assert sweep <= tc.values["norm_bound"][i]
    assert sweep >= tc.values["norm"][i] * (1 - 1e-6)


def test_corner_table_gains_breakpoints_until_it_passes(crane):
    """A table of the four envelope corners only cannot follow the sway frequency
    sqrt(g/L) across a tenfold rope length: it fails, and export adds whole breakpoints
    (the table stays rectangular, design nodes keep the family's own controllers) until
    the table passes its check."""
    spec, family, _, settings = crane
    settings = dataclasses.replace(settings, samples=0)  # the grids' centres and midpoints
    corners = {"rope_length": [3.0, 30.0], "payload_mass": [2000.0, 40000.0]}
    out = build_checked_table(family, corners, 0.02, "tustin", settings=settings, spec=spec)
    assert out.rounds[0]["failed"] > 0 and out.rounds[0]["fixable"] > 0
    assert out.passed, out.stopped
    assert len(out.rounds) >= 2 and out.added
    t = out.table
    for name, b in zip(("rope_length", "payload_mass"), t.breakpoints, strict=True):
        assert np.all(np.diff(b) > 0)
        assert set(corners[name]) <= set(b.tolist())
        assert set(out.added.get(name, [])) <= set(b.tolist())
    assert t.A.shape[0] == np.prod(t.shape)
    # a node on a design point holds the family's controller, Tustin-discretized
    nodes = t.nodes()
    k = int(np.flatnonzero(np.all(nodes == [30.0, 40000.0], axis=1))[0])
    row = int(np.flatnonzero(np.all(family.points == [30.0, 40000.0], axis=1))[0])
    Kd = scipy.signal.cont2discrete(tuple(family.controller[m][row] for m in "ABCD"), 0.02,
                                    method="bilinear")
    np.testing.assert_allclose(t.A[k], Kd[0], rtol=1e-9, atol=1e-12)
    # the final table passes a check of its own, afresh
    assert check_table(family, t, settings, spec, compare=False).all_passed


def test_long_sample_time_fails_at_once_and_nothing_is_written(crane, tmp_path):
    """At T = 0.1 s the sampling delay costs the crane loop phase margin at the design
    nodes themselves (discretization, not tabulation): export stops after one check,
    names the worst point and the reason, exits 1 and writes nothing."""
    spec, family, path, _ = crane
    out = tmp_path / "t.json"
    res = CliRunner().invoke(main, ["export", str(path), "--design", str(BUNDLED), "-f",
                                    "json", "-o", str(out), "--sample-time", "0.1"])
    assert res.exit_code == 1, res.output
    assert not out.exists()
    assert "fails discretized at T = 0.1 s" in res.output
    assert "worst point: (rope_length=" in res.output and "nothing written" in res.output
    assert "1 check(s)" in res.output


def test_check_table_reads_every_format_and_reports_json(crane, tmp_path):
    """`schedule check --table` accepts CSV, JSON, HDF5, the C source (folder) and the FMU;
    they all give the same table, and --json carries the `table` part."""
    from schedule.export import read_table

    spec, family, path, _ = crane
    table = build_table(family, sample_time=0.02, method="tustin", limits=spec.limits)
    files = {"csv": tmp_path / "t.csv", "json": tmp_path / "t.json", "hdf5": tmp_path / "t.h5",
             "c": tmp_path / "c"}
    for fmt, target in files.items():
        write_table(table, fmt, target)
    fmu = write_fmu(tmp_path / "tab.fmu", table, binary=False).path
    for p in [*files.values(), files["c"] / "sched_table.h", fmu]:
        got = read_table(p)
        for k in "ABCDH":
            np.testing.assert_array_equal(getattr(got, k), getattr(table, k), err_msg=str(p))
        assert [b.tolist() for b in got.breakpoints] == [b.tolist() for b in table.breakpoints]
        assert got.sample_time == table.sample_time and got.method == "tustin"
    res = CliRunner().invoke(main, ["check", str(path), "--design", str(BUNDLED), "--table",
                                    str(files["c"]), "--json", "--samples", "0",
                                    "--no-gamma-opt"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.output)
    part = data["table"]
    assert part["summary"]["passed"] and part["sample_time"] == 0.02
    assert part["shape"] == {"rope_length": 7, "payload_mass": 5}
    assert {"interpolant", "table", "discretization", "tabulation"} <= set(part["cost"])
    assert len(part["points"]) == part["summary"]["points"]
    assert "rate_certificate" not in part  # room for the rate certificate's own part
