"""The frozen-point check on the crane: a too-coarse grid is flagged, the demo grid passes.

Outside reference: the crane model itself (schedule.demo_crane.crane, whose
linearization is checked against textbook pendulum physics in
tests/test_crane.py) linearized afresh at every check point - the true plant,
not anything the family stored. With only the four corners of the envelope
(rope 3 m and 30 m), the sway frequency sqrt(g/L) changes by sqrt(10) across
one cell, far more than an interpolated controller can follow, so in-between
points must fail; the bundled 7 x 5 grid (about even in log L) must pass.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import numpy as np

from schedule.check import CheckSettings, check_family
from schedule.design_file import load_design, parse_design
from schedule.family import design_family

BUNDLED = Path(str(resources.files("schedule.demo_crane").joinpath("crane_design.toml")))
SETTINGS = dict(samples=16, gamma_opt=False, rate=False, classical=False)


def test_corners_only_grid_is_flagged(tmp_path):
    text = BUNDLED.read_text()
    text = text.replace('operating_points = "crane_envelope.h5"\n', "")
    text = text.replace("[channels]", "[grid]\nrope_length = [3.0, 30.0]\n"
                        "payload_mass = [2000.0, 40000.0]\n\n[channels]")
    spec = parse_design(text, tmp_path)
    family = design_family(spec)
    assert family.ok.all() and len(family.points) == 4
    result = check_family(family, CheckSettings(**SETTINGS), spec=spec)
    assert not result.weaker                     # the crane model gave the true plant
    inbetween = np.isin(result.kind, ["centre", "midpoint", "sobol"])
    assert not result.all_passed
    assert (~result.passed[inbetween]).sum() >= inbetween.sum() // 2
    # the proposals ask for new rope-length breakpoints inside the one wide cell
    assert result.proposals is not None and len(result.proposals) >= 1
    assert np.all((result.proposals[:, 0] > 3.0) & (result.proposals[:, 0] < 30.0))


def test_bundled_grid_passes():
    spec = load_design(BUNDLED)
    family = design_family(spec)
    result = check_family(family, CheckSettings(**SETTINGS), spec=spec)
    assert not result.weaker
    assert result.all_passed, [result.reasons[i] for i in np.flatnonzero(~result.passed)][:3]
    gates = result.gates
    assert np.max(result.values["ratio"][gates]) <= 1 + result.settings.gamma_tolerance
    assert result.values["stable"][gates].all()
