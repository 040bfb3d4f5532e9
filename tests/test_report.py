"""The check report: valid PNG files (magic bytes, decoded by matplotlib) and complete pages."""

from __future__ import annotations

import numpy as np
import pytest

from schedule.check import CheckResult, CheckSettings
from schedule.errors import InputError
from schedule.report import CAUTION, markdown_summary, write_report
from schedule.types import SchedulingVariable

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


class _Family:
    variables = (SchedulingVariable("length", "m", 0.0, 1.0),
                 SchedulingVariable("mass", "kg", 0.0, 2.0))


class _Controller:
    """K(s) = k(p) / (s + 1), k = 1 + length: enough to draw the singular-value map."""

    def evaluate(self, pts):
        M = len(pts)
        return {"A": -np.ones((M, 1, 1)), "B": np.ones((M, 1, 1)),
                "C": (1.0 + pts[:, 0]).reshape(M, 1, 1), "D": np.zeros((M, 1, 1))}


def _result(n=30, d=2, fail_every=7):
    rng = np.random.default_rng(0)
    pts = rng.uniform(0, 1, size=(n, d)) * np.array([1.0, 2.0])[:d]
    ratio = 0.8 + 0.3 * pts[:, 0]
    ratio[::fail_every] = np.inf
    stable = np.isfinite(ratio)
    passed = stable & (ratio <= 1.02)
    values = {"ratio": ratio, "norm": ratio * 2.0, "stable": stable,
              "spectral_abscissa": np.where(stable, -1.0, 0.5),
              "gamma_opt": np.where(stable, 1.5, np.nan),
              "in_gain_db": np.full(n, 8.0), "in_phase_deg": np.full(n, 50.0),
              "out_gain_db": np.full(n, 9.0), "in_all_gain_db": np.full(n, 7.0)}
    kind = np.array(["grid"] * 4 + ["sobol"] * (n - 4), dtype=object)
    names = ("length", "mass")[:d]
    return CheckResult(names, ("m", "kg")[:d], 2.0, CheckSettings(), pts, kind,
                       np.array(["model"] * n, dtype=object), values, passed,
                       ["" if p else "closed loop unstable" for p in passed],
                       proposals=np.array([[0.5, 1.0][:d]]), proposed_breakpoints={"length": [0.5]})


@pytest.mark.parametrize("d", [1, 2])
def test_report_files_are_valid_png_and_pages(tmp_path, d):
    import matplotlib.image as mpimg

    res = _result(d=d)
    fam = _Family()
    fam.variables = _Family.variables[:d]
    out = write_report(res, fam, tmp_path / "rep", controller=_Controller())
    assert len(out["figures"]) == 4  # ratio, gamma_opt, margins, controller map
    for f in out["figures"]:
        data = f.read_bytes()
        assert data[:8] == PNG_MAGIC
        img = mpimg.imread(f)
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
        assert np.ptp(img[..., :3]) > 0.1  # not a blank canvas
    md = out["markdown"].read_text()
    for section in ("# Frozen-point check", "## Summary", "## Points by kind", "## Worst points",
                    "## Rate of variation", "## Proposed refinement", "## Figures", "## Caution"):
        assert section in md
    assert CAUTION in md and "FAIL" in md
    html = out["html"].read_text()
    assert html.startswith("<!DOCTYPE html>") and "<table>" in html and "<img" in html
    assert not list((tmp_path / "rep").glob("*.part"))  # no temp files left behind


def test_summary_counts_and_bad_folder(tmp_path):
    res = _result()
    md = markdown_summary(res)
    n_fail = int((~res.passed).sum())
    assert f"({n_fail} of {len(res.passed)} points fail)" in md
    f = tmp_path / "file"
    f.write_text("x")
    with pytest.raises(InputError, match="is a file"):
        write_report(res, _Family(), f)


# ----------------------------------------------------------------------------- the figures
def _margin_case(d, settings=None):
    """A check result with leave-one-out evidence rows and points below the requirement."""
    res = _result(d=d)
    if settings is not None:
        res.settings = settings
    res.kind[5:9] = "leave_one_out"
    res.gating = np.asarray(res.kind != "leave_one_out")
    res.values["in_gain_db"] = np.linspace(2.0, 12.0, len(res.passed))
    res.values["in_phase_deg"] = np.linspace(20.0, 70.0, len(res.passed))
    return res


def _boxes_overlap(a, b) -> bool:
    return a.x0 < b.x1 and b.x0 < a.x1 and a.y0 < b.y1 and b.y0 < a.y1


def test_colour_bar_labels_clear_of_the_next_panel():
    """Geometry, measured on the drawn figure: no axis or colour-bar label box intersects
    another label or another panel (the colour-bar label used to run into the right
    panel's y-label)."""
    from schedule import report

    fig = report._margins_figure(report._AggFigures(), _margin_case(2))
    renderer = fig.canvas.get_renderer()
    fig.draw(renderer)
    owners = [ax for ax in fig.axes if ax.yaxis.label.get_text()]
    assert len(owners) == 4  # two panels, two colour bars
    boxes = [ax.yaxis.label.get_window_extent(renderer) for ax in owners]
    texts = [ax.yaxis.label.get_text() for ax in owners]
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            assert not _boxes_overlap(boxes[i], boxes[j]), (texts[i], texts[j])
    for owner, box, text in zip(owners, boxes, texts, strict=True):
        for ax in fig.axes:
            if ax is not owner:
                assert not _boxes_overlap(box, ax.get_window_extent(renderer)), text


@pytest.mark.parametrize("d", [1, 2])
def test_requirement_lines_come_from_the_pass_criterion(d):
    """The 6 dB / 45 deg lines are the settings' numbers: other settings move them."""
    from schedule import report

    settings = CheckSettings(gain_margin_db=3.5, phase_margin_deg=31.0)
    res = _margin_case(d, settings)
    assert report.margin_requirement(res) == (3.5, 31.0)
    fig = report._margins_figure(report._AggFigures(), res)
    ys = {round(float(y), 9) for ax in fig.axes for line in ax.lines
          for y in np.atleast_1d(line.get_ydata()) if len(np.atleast_1d(line.get_ydata()))}
    assert {3.5, 31.0} <= ys
    assert not {6.0, 45.0} & ys
    # the points below the requirement (gating ones only) are crossed
    crossed = [c for ax in fig.axes for c in ax.collections
               if c.get_label() == "below the requirement"]
    gain_low = (res.values["in_gain_db"] < 3.5) & res.gates
    assert len(crossed[0].get_offsets()) == int(gain_low.sum())


@pytest.mark.parametrize("d", [1, 2])
def test_evidence_points_are_drawn_apart(d):
    """Leave-one-out rows that do not gate the verdict are neither on the colour scale
    nor drawn like the points that decide it."""
    from schedule import report

    res = _margin_case(d)
    fig = report._margins_figure(report._AggFigures(), res)
    ax = fig.axes[0]
    evidence = [c for c in ax.collections if c.get_label() == report.EVIDENCE_LABEL]
    assert len(evidence) == 1
    x_evidence = np.sort(evidence[0].get_offsets()[:, 0])
    np.testing.assert_allclose(x_evidence, np.sort(res.points[~res.gates, 0]))
    if d == 2:
        coloured = [c for c in ax.collections if c.get_array() is not None]
        assert len(coloured) == 1 and len(coloured[0].get_offsets()) == int(res.gates.sum())
    else:
        drawn = np.concatenate([line.get_xdata() for line in ax.lines
                                if line.get_label() == "check points"])
        assert np.sort(drawn).tolist() == np.sort(res.points[res.gates, 0]).tolist()
    # gamma_opt: leave-one-out rows repeat the design points' values and are left out
    g = report._gamma_opt_figure(report._AggFigures(), res)
    n_shown = sum(len(c.get_offsets()) for c in g.axes[0].collections) if d == 2 else \
        sum(len(line.get_xdata()) for line in g.axes[0].lines)
    assert n_shown == int((np.isfinite(res.values["gamma_opt"])
                           & (res.kind != "leave_one_out")).sum())


def test_one_variable_envelope_is_drawn_along_the_variable():
    from schedule import report

    fam = _Family()
    fam.variables = _Family.variables[:1]
    fig = report._controller_sv_figure(report._AggFigures(), _Controller(), fam)
    ax = fig.axes[0]
    assert ax.get_ylabel() == "length [m]" and "diagonal" not in ax.get_title()
    assert ax.get_ylim()[0] <= 0.0 and ax.get_ylim()[1] >= 1.0  # the variable's bounds


def test_rate_table_gives_each_variable_its_unit():
    from schedule.rate import RateBound

    res = _result()
    # single = 1 / worst and joint = 1 / (d worst) (the bound's definition, schedule.rate)
    res.rate = RateBound(names=("length", "mass"), dP_norm=np.array([[2.0, 0.5]]),
                         worst=np.array([2.0, 0.5]), worst_index=np.array([0, 0]),
                         single=np.array([0.5, 2.0]), joint=np.array([0.25, 1.0]))
    md = markdown_summary(res)
    assert "[unit/s]" not in md
    assert "| length | 2 | 0.5 m/s | 0.25 m/s |" in md and "| mass | 0.5 | 2 kg/s | 1 kg/s |" in md
