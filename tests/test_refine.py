"""Refinement that never makes things worse: whole breakpoints, the comparison, no worse file.

Outside reference: the synthetic oscillator of tests/test_check.py, whose resonance moves
a decade over the envelope (10^stiffness rad/s), linearized afresh at every check point
(the true plant); on the 2 x 2 corner grid the in-between loops fail (one controller
cannot follow a tenfold resonance shift across one cell, as the crane's corners in
tests/test_crane_check.py), so refinement has work to do.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from click.testing import CliRunner
from test_check import _design

from schedule.check import CheckSettings
from schedule.cli.main import main
from schedule.refine import compare_checks, refine_family
from schedule.store import read_family, write_family


@pytest.fixture(scope="module")
def corners(tmp_path_factory):
    spec, fam = _design(tmp_path_factory.mktemp("corners"), [0.0, 1.0])
    settings = CheckSettings.from_spec(spec, samples=8, gamma_opt=False, rate=False,
                                       classical=False)
    return spec, fam, settings


def test_rectangular_family_gains_whole_breakpoints_and_is_never_worse(corners, tmp_path):
    spec, fam, settings = corners
    out = refine_family(fam, spec, budget=12, settings=settings)
    first, last = out.rounds[0], out.rounds[-1]
    assert not first.all_passed
    ref = out.family
    # rectangular: breakpoints and grid indices, every node of the product grid present
    assert ref.breakpoints is not None and ref.grid_index is not None
    shape = tuple(len(b) for b in ref.breakpoints)
    assert len(ref.points) == int(np.prod(shape)) == len(fam.points) + len(out.added)
    assert {tuple(r) for r in ref.grid_index.tolist()} == set(np.ndindex(*shape))
    for j, b in enumerate(ref.breakpoints):
        np.testing.assert_array_equal(ref.points[:, j], b[ref.grid_index[:, j]])
    for name, values in out.added_breakpoints.items():
        j = ref.variable_names.index(name)
        assert set(values) <= set(ref.breakpoints[j].tolist())
        assert set(values).isdisjoint(fam.breakpoints[j].tolist())
    assert 0 < len(out.added) <= 12
    # the interpolant keeps its form and kind; the design's base folder is carried over
    for key in ("form", "kind"):
        assert ref.interpolant["attrs"][key] == fam.interpolant["attrs"][key]
    assert ref.design_base_dir == fam.design_base_dir != ""
    # the finer grid's cell centres and edge midpoints are checked
    assert {"centre", "midpoint", "previous"} <= set(last.kind.tolist())
    # never worse: on the points both checks judge, no more failures, and the comparison
    # says so
    cmp = out.comparison
    assert cmp is not None and not cmp.worse
    assert cmp.common > 0 and cmp.failed_after <= cmp.failed_before
    # the refined family is a valid family file (grid indices checked by the reader)
    write_family(tmp_path / "r.h5", ref)
    back = read_family(tmp_path / "r.h5")
    np.testing.assert_array_equal(back.grid_index, ref.grid_index)


def test_compare_checks_orders_refinements(corners):
    """The same check is not worse than itself; a check that fails where the input passed
    is worse, and says so."""
    spec, fam, settings = corners
    from schedule.check import check_family

    r = check_family(fam, settings, spec=spec)
    assert not compare_checks(r, r).worse
    passed = dataclasses.replace(r, passed=np.ones_like(r.passed))
    cmp = compare_checks(passed, r)
    assert cmp.worse and "the input passes" in cmp.reasons[0]
    assert len(cmp.new_failures) == int((~r.passed & r.gates).sum())
    assert not compare_checks(r, passed).worse


def test_a_worse_refinement_is_not_written(tmp_path, monkeypatch):
    """Force a worse result. The grid stiffness = 0, 0.8, 1 fails at one edge midpoint of
    its wide cell (a 6.3-fold resonance shift); refining it honestly passes (checked
    first), but with the new design points' controller output flipped in sign and
    tripled (positive feedback where the design asked for negative) the refined family
    fails more of the points both are checked at: refine prints the comparison, exits
    1 and writes nothing."""
    import schedule.family as family_module

    spec, fam = _design(tmp_path / "wide", [0.0, 0.8, 1.0])
    settings = CheckSettings.from_spec(spec, samples=8, gamma_opt=False, rate=False)
    honest = refine_family(fam, spec, budget=4, settings=settings)
    assert not honest.rounds[0].all_passed and honest.passed and not honest.worse
    original = family_module.extend_family

    def spoiled(family, *args, **kwargs):
        out = original(family, *args, **kwargs)
        new = slice(len(family.points), None)
        out.controller["C"][new] *= -3.0
        out.controller["D"][new] *= -3.0
        if "F" in out.pieces:
            out.pieces["F"][new] *= -3.0
        return out

    monkeypatch.setattr(family_module, "extend_family", spoiled)
    src = spec.base_dir / "family.h5"
    target = tmp_path / "refined.h5"
    res = CliRunner().invoke(main, ["refine", str(src), "--out", str(target), "--budget", "4",
                                    "--samples", "8", "--design",
                                    str(spec.base_dir / "design.toml"), "--json"])
    assert res.exit_code == 1, res.output
    data = json.loads(res.output)
    assert data["written"] is False and data["out"] is None
    assert data["comparison"]["worse"] and data["comparison"]["reasons"]
    assert not target.exists()
    # the points it tried are listed, with the breakpoints of the rectangular family
    assert data["added"] and data["added_breakpoints"] and data["rectangular"]
