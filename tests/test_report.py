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
