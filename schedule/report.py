"""The check report: PNG plots (matplotlib, Agg backend) and a summary page (Markdown + HTML).

Figures, in our own visual style (:data:`STYLE`):

- ``ratio_<a>_<b>.png``: closed-loop norm / gamma over each pair of
  scheduling variables, design points and failing points marked (one
  variable: norm / gamma along it);
- ``gamma_opt.png``: the optimal gamma a controller synthesized at each point
  would reach, against the family's common gamma;
- ``margins.png``: loop-at-a-time disk margins at the plant input (gain and
  phase) over the envelope, with the required margins of the pass criterion
  (:func:`margin_requirement`) marked on the colour bars (one variable: as
  lines) and the points below them crossed;
- ``controller_sv.png``: the controller's largest singular value over
  frequency along the scheduling variable (one variable) or along the
  diagonal line from the lower to the upper corner of the envelope;
- ``table_ratio.png`` (with a table check, ``schedule check --table``): norm /
  gamma of the table as it runs against that of the family's interpolant at the
  same points, and the table's input disk margins against the interpolant's;
- ``gain_vs_rate.png``: the certified induced-L2 gain bound gamma(nu) against
  the scheduling rate (when the rate certificate was computed).

With a table check (:mod:`schedule.analysis.table_check`) the summary page gains a
"Shipped table" section: family and table side by side at the same points, and what
multilinear tabulation and discretization cost.

Leave-one-out predictions that do not decide the verdict (evidence only) are
drawn apart, as hollow diamonds outside the colour scales.

The report folder is written whole: every figure and page is rendered in
memory and the folder is put in place in one step
(:func:`schedule.atomic.write_dir_atomic`), so a killed or failed run leaves
the previous report (or none), never a mix of old and new files.
"""

from __future__ import annotations

import html
import io
import itertools
import os
from pathlib import Path

import numpy as np

from .atomic import write_dir_atomic
from .check import CheckResult
from .errors import InputError
from .types import rate_unit

__all__ = ["STYLE", "CAUTION", "write_report", "markdown_summary"]

CAUTION = ("Results are design aids: validate in simulation and hardware tests and follow "
           "the applicable codes and licensed practice.")

#: Our visual style: muted ink, one accent for failures, light dotted grid.
STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.titleweight": "bold",
    "axes.labelsize": 9.0,
    "axes.edgecolor": "#4a4a4a",
    "axes.linewidth": 0.8,
    "axes.facecolor": "#fbfaf7",
    "figure.facecolor": "#ffffff",
    "axes.grid": True,
    "grid.color": "#c9c4b8",
    "grid.linestyle": ":",
    "grid.linewidth": 0.7,
    "xtick.color": "#4a4a4a",
    "ytick.color": "#4a4a4a",
    "legend.frameon": False,
    "legend.fontsize": 8.0,
    "image.cmap": "cividis",
}
INK = "#2b2b2b"
ACCENT = "#c0392b"  # failing points
DESIGN = "#1f4e79"  # design (grid) points
EVIDENCE = "#d68910"  # leave-one-out evidence that does not gate the verdict


class _AggFigures:
    """The pyplot calls we use, on bare Agg figures: no global backend switch, no GUI.

    Figures use matplotlib's constrained layout, which places colour bars and their
    labels beside their own axes, clear of the neighbouring panel's labels. ``save``
    renders a figure to PNG bytes kept in ``files`` (name -> bytes); the report
    folder is written from them in one step.
    """

    def __init__(self) -> None:
        self.files: dict[str, bytes] = {}

    def save(self, fig, path: Path) -> None:
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
        self.files[path.name] = buffer.getvalue()

    @staticmethod
    def subplots(*args, figsize=None, **kw):
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=figsize, layout="constrained")
        FigureCanvasAgg(fig)
        return fig, fig.subplots(*args, **kw)

    @staticmethod
    def close(fig) -> None:
        fig.clear()


def _report_member(name: str) -> bool:
    """A file name that an earlier report may have left in the folder (replaced, not kept)."""
    return name in ("summary.md", "summary.html", "gamma_opt.png", "margins.png",
                    "controller_sv.png", "table_ratio.png", "gain_vs_rate.png") or (
        name.startswith("ratio_") and name.endswith(".png"))


# The pass criterion's numbers, read where the verdict reads them (the check's settings),
# never a second copy of 6 dB / 45 deg: the plots mark these two.
def margin_requirement(result: CheckResult) -> tuple[float, float]:
    """The required input disk margins ``(gain dB, phase deg)`` of the pass criterion."""
    c = result.criterion
    return float(c.gain_margin_db), float(c.phase_margin_deg)


def ratio_limit(result: CheckResult) -> float:
    """The largest passing closed-loop norm / gamma: ``1 + gamma_tolerance``."""
    return float(result.criterion.norm_limit / result.gamma)


def _label(result: CheckResult, j: int) -> str:
    unit = result.units[j] if j < len(result.units) else ""
    return f"{result.variable_names[j]} [{unit}]" if unit else result.variable_names[j]


def _finite(x, cap: float) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return np.where(np.isfinite(a), a, cap)


EVIDENCE_LABEL = "leave-one-out (evidence only)"


def _evidence(ax, x, y, label: str = EVIDENCE_LABEL) -> None:
    """Evidence-only points: hollow diamonds outside the colour scale."""
    if len(x):
        ax.scatter(x, y, marker="D", s=30, facecolors="none", edgecolors=EVIDENCE,
                   linewidths=1.0, label=label, zorder=3)


def _bar_requirement(ax, mappable, cbar, level: float, label: str) -> None:
    """Mark ``level`` on the colour bar (a line kept inside the colour range) and in the
    legend of ``ax``."""
    lo, hi = mappable.get_clim()
    lo, hi = min(lo, level), max(hi, level)
    pad = 0.05 * (hi - lo) if hi > lo else 0.05 * max(abs(level), 1.0)
    mappable.set_clim(lo - pad * (level <= lo), hi + pad * (level >= hi))
    cbar.ax.axhline(level, color=ACCENT, lw=2.0)
    ax.plot([], [], color=ACCENT, lw=2.0, label=label)


def _ratio_figures(plt, result: CheckResult) -> list[tuple[str, object]]:
    """(file name, figure) of norm / gamma over each pair of variables (or along one)."""
    # Points that count in the verdict carry the colour scale; leave-one-out
    # predictions shown as evidence only are drawn apart where they fail.
    keep = result.gates
    evidence_fail = ~result.passed & ~keep
    evidence_pts = result.points[evidence_fail]
    evidence_ratio = _finite(result.values["ratio"][evidence_fail], np.nan)
    level = ratio_limit(result)
    result = _subset(result, keep)
    v = result.values
    ratio = _finite(v["ratio"], np.nan)
    shown = np.where(np.isfinite(ratio), ratio, np.nanmax(ratio, initial=1.0) * 1.2)
    fail = ~result.passed
    grid = result.kind == "grid"
    d = result.points.shape[1]
    out = []
    pairs = list(itertools.combinations(range(d), 2)) if d >= 2 else [(0, None)]
    for a, b in pairs:
        fig, ax = plt.subplots(figsize=(5.2, 4.0))
        if b is None:
            order = np.argsort(result.points[:, a])
            ax.plot(result.points[order, a], shown[order], "o", ms=3.5, color=INK,
                    label="check points")
            ax.axhline(level, color=ACCENT, lw=1.0, ls="--", label="gamma (1 + tolerance)")
            ax.set_ylabel("closed-loop norm / gamma")
            ax.plot(result.points[fail, a], shown[fail], "x", color=ACCENT, ms=7,
                    label="failing")
            ax.plot(result.points[grid, a], shown[grid], "s", mfc="none", color=DESIGN,
                    label="design points")
            cap = np.nanmax(shown, initial=level) * 1.2
            _evidence(ax, evidence_pts[:, a], np.where(np.isfinite(evidence_ratio),
                                                        evidence_ratio, cap),
                      "leave-one-out above gamma (evidence only)")
            name = f"ratio_{result.variable_names[a]}.png"
        else:
            sc = ax.scatter(result.points[:, a], result.points[:, b], c=shown, s=22,
                            vmin=np.nanmin(shown), vmax=max(np.nanmax(shown), level))
            cbar = fig.colorbar(sc, ax=ax, label="closed-loop norm / gamma")
            _bar_requirement(ax, sc, cbar, level, f"pass limit {level:g} (line on the bar)")
            ax.scatter(result.points[grid, a], result.points[grid, b], marker="s", s=46,
                       facecolors="none", edgecolors=DESIGN, label="design points")
            if fail.any():
                ax.scatter(result.points[fail, a], result.points[fail, b], marker="x", s=50,
                           color=ACCENT, label="failing")
            _evidence(ax, evidence_pts[:, a], evidence_pts[:, b],
                      "leave-one-out above gamma (evidence only)")
            ax.set_ylabel(_label(result, b))
            name = f"ratio_{result.variable_names[a]}_{result.variable_names[b]}.png"
        ax.set_xlabel(_label(result, a))
        ax.set_title("Norm over gamma at frozen points")
        _figure_legend(fig, [ax])
        out.append((name, fig))
    return out


def _ratio_plots(plt, result: CheckResult, out: Path) -> list[Path]:
    paths = []
    for name, fig in _ratio_figures(plt, result):
        plt.save(fig, out / name)
        plt.close(fig)
        paths.append(out / name)
    return paths


def _envelope_axes(result: CheckResult):
    d = result.points.shape[1]
    x = result.points[:, 0]
    y = result.points[:, 1] if d >= 2 else None
    return x, y


def _scatter_panel(fig, ax, result, values, label, title, requirement=None, evidence=None,
                   unit=""):
    """Values over the envelope (coloured in 2-D, along the variable in 1-D).

    ``requirement`` (a number in the values' unit) draws a line on the colour bar (2-D)
    or across the axes (1-D) and crosses the points below it; ``evidence`` masks the
    points that do not decide the verdict: they are drawn apart, off the colour scale.
    """
    v = np.asarray(values, dtype=float)
    evidence = np.zeros(v.size, bool) if evidence is None else np.asarray(evidence, bool)
    x, y = _envelope_axes(result)
    gate = ~evidence
    below = gate & (v < requirement) if requirement is not None else np.zeros(v.size, bool)
    if y is None:
        order = np.argsort(x[gate])
        ax.plot(x[gate][order], v[gate][order], "o", ms=3.5, color=INK, label="check points")
        if requirement is not None:
            ax.axhline(requirement, color=ACCENT, lw=1.0, ls="--",
                       label=f"required {requirement:g} {unit}".rstrip())
        _evidence(ax, x[evidence], v[evidence])
        ax.set_ylabel(label)
    else:
        sc = ax.scatter(x[gate], y[gate], c=v[gate], s=22)
        cbar = fig.colorbar(sc, ax=ax, label=label)
        if requirement is not None:
            text = f"required {requirement:g} {unit}".rstrip()
            _bar_requirement(ax, sc, cbar, requirement, f"{text} (line on the bar)")
        _evidence(ax, x[evidence], y[evidence])
        ax.set_ylabel(_label(result, 1))
    if below.any():
        yy = v if y is None else y
        ax.scatter(x[below], yy[below], marker="x", s=40, color=ACCENT, zorder=4,
                   label="below the requirement")
    ax.set_xlabel(_label(result, 0))
    ax.set_title(title)


def _figure_legend(fig, axes) -> None:
    """One legend below the figure for the labelled artists of ``axes`` (each label once);
    constrained layout keeps room for it."""
    entries: dict[str, object] = {}
    for ax in axes:
        for handle, text in zip(*ax.get_legend_handles_labels(), strict=True):
            entries.setdefault(text, handle)
    if entries:
        fig.legend(list(entries.values()), list(entries), loc="outside lower center",
                   ncol=min(len(entries), 3))


def _gamma_opt_figure(plt, result: CheckResult):
    g = np.asarray(result.values.get("gamma_opt", []), dtype=float)
    # leave-one-out rows sit at the design points with the design points' plants: their
    # gamma_opt repeats the design points' and is left out
    keep = np.isfinite(g) & (np.asarray(result.kind) != "leave_one_out")
    if not keep.any():
        return None
    sub = _subset(result, keep)
    fig, ax = plt.subplots(figsize=(5.2, 4.0))
    _scatter_panel(fig, ax, sub, g[keep] / result.gamma, "gamma_opt / family gamma",
                   "Price of interpolation: local optimum vs common gamma")
    _figure_legend(fig, [ax])
    return fig


def _gamma_opt_plot(plt, result: CheckResult, out: Path) -> Path | None:
    fig = _gamma_opt_figure(plt, result)
    if fig is None:
        return None
    path = out / "gamma_opt.png"
    plt.save(fig, path)
    plt.close(fig)
    return path


def _subset(result: CheckResult, mask) -> CheckResult:
    from dataclasses import replace

    return replace(result, points=result.points[mask], kind=result.kind[mask],
                   plant_source=result.plant_source[mask],
                   values={k: v[mask] for k, v in result.values.items()},
                   passed=result.passed[mask],
                   reasons=[r for r, m in zip(result.reasons, mask, strict=True) if m],
                   gating=None if result.gating is None else np.asarray(result.gating)[mask])


def _margins_figure(plt, result: CheckResult):
    v = result.values
    fig, axes = plt.subplots(1, 2, figsize=(10.0, 4.0))
    gain = _finite(v["in_gain_db"], 40.0)
    phase = np.asarray(v["in_phase_deg"], dtype=float)
    need_gain, need_phase = margin_requirement(result)
    evidence = ~result.gates
    _scatter_panel(fig, axes[0], result, np.minimum(gain, 40.0), "gain margin [dB] (cap 40)",
                   "Disk gain margin at the plant input", need_gain, evidence, "dB")
    _scatter_panel(fig, axes[1], result, phase, "phase margin [deg]",
                   "Disk phase margin at the plant input", need_phase, evidence, "deg")
    _figure_legend(fig, axes)
    return fig


def _margins_plot(plt, result: CheckResult, out: Path) -> Path:
    fig = _margins_figure(plt, result)
    path = out / "margins.png"
    plt.save(fig, path)
    plt.close(fig)
    return path


def _controller_sv_figure(plt, controller, family):
    """The controller's largest singular value over frequency: along the variable (1-D),
    or along the diagonal from the lower to the upper corner of the envelope."""
    lo = np.array([v.lower for v in family.variables])
    hi = np.array([v.upper for v in family.variables])
    t = np.linspace(0.0, 1.0, 41)
    pts = lo + t[:, None] * (hi - lo)
    K = controller.evaluate(pts)
    from .margins import FrequencyResponder

    R = FrequencyResponder(K["A"], K["B"], K["C"], K["D"])
    mod = np.abs(R.eigenvalues)
    mod = mod[mod > 0]
    wlo = mod.min() / 100 if mod.size else 1e-2
    whi = mod.max() * 100 if mod.size else 1e2
    w = np.logspace(np.log10(wlo), np.log10(whi), 200)
    with np.errstate(all="ignore"):
        sv = np.linalg.norm(R(w), ord=2, axis=(2, 3))
    db = 20 * np.log10(np.maximum(sv, 1e-300))
    fig, ax = plt.subplots(figsize=(6.0, 4.0))
    one = len(family.variables) == 1
    im = ax.pcolormesh(w, pts[:, 0] if one else t, db, shading="auto")
    ax.set_xscale("log")
    fig.colorbar(im, ax=ax, label="largest singular value of K(jw) [dB]")
    ax.set_xlabel("frequency [rad/s]")
    if one:
        v = family.variables[0]
        ax.set_ylabel(f"{v.name} [{v.unit}]" if v.unit else v.name)
        ax.set_title(f"Controller gain along {v.name}")
    else:
        ax.set_ylabel("position on the diagonal (0 = lower corner, 1 = upper)")
        ax.set_title("Controller gain along the envelope diagonal")
    ax.grid(False)
    return fig


def _controller_sv_plot(plt, result: CheckResult, controller, family, out: Path) -> Path | None:
    if controller is None:
        return None
    fig = _controller_sv_figure(plt, controller, family)
    path = out / "controller_sv.png"
    plt.save(fig, path)
    plt.close(fig)
    return path


def _gain_rate_plot(plt, result: CheckResult, out: Path) -> Path | None:
    """gamma(nu): the certified gain bound against the rate, one panel per variable."""
    rc = getattr(result, "rate_certificate", None)
    curves = {} if rc is None else {n: c for n, c in rc.gain_curve.items() if len(c)}
    if not curves:
        return None
    fig, axes = plt.subplots(1, len(curves), figsize=(5.2 * len(curves), 3.8), squeeze=False)
    units = dict(zip(rc.names, rc.units, strict=True))
    for ax, (name, curve) in zip(axes[0], curves.items(), strict=True):
        r = np.array([a for a, _ in curve], float)
        g = np.array([b for _, b in curve], float)
        ax.plot(r, g, marker="o", color=INK, label="certified bound gamma(nu)")
        ax.axhline(rc.frozen_gain, color=DESIGN, linestyle="--", linewidth=1.0,
                   label="largest frozen H-infinity norm")
        w = rc.witness
        if w is not None and np.isfinite(w.observed_gain.get(name, np.nan)) and r.size:
            ax.plot([r[-1]], [w.observed_gain[name]], marker="v", color=ACCENT, linestyle="none",
                    label="observed in simulation (witness)")
        fin = g[np.isfinite(g)]
        if fin.size and fin.max() > 20 * max(min(fin.min(), rc.frozen_gain), 1e-300):
            ax.set_yscale("log")  # the bound grows steeply near the certified rate
        ax.set_xlabel(f"|d {name}/dt| [{rate_unit(units.get(name, '')).strip()}]")
        ax.set_ylabel("induced L2 gain")
        ax.set_title(f"Gain bound while {name} moves")
        ax.legend(loc="best")
    path = out / "gain_vs_rate.png"
    plt.save(fig, path)
    plt.close(fig)
    return path


def _fmt(x, spec: str = ".4g") -> str:
    x = float(x)
    if np.isnan(x):
        return "-"
    if np.isinf(x):
        return "inf" if x > 0 else "-inf"
    return format(x, spec)


def _ptxt(result: CheckResult, row) -> str:
    return ", ".join(f"{n} = {x:.4g}" for n, x in zip(result.variable_names, row, strict=True))


def markdown_summary(result: CheckResult, figures: list[str] | None = None,
                     table_check=None) -> str:
    """The summary page as Markdown: verdict, settings, tables, worst points, rate, the
    shipped table (with ``table_check``), caution."""
    s = result.summary()
    v = result.values
    L = ["# Frozen-point check of the scheduled controller", ""]
    L += ["## Summary", "",
          f"- Verdict: **{'PASS' if result.all_passed else 'FAIL'}** "
          f"({s['failed']} of {s['points']} points fail)",
          f"- Family gamma: {result.gamma:.6g}; a point passes when "
          f"{result.criterion.describe()}",
          f"- Unstable frozen loops: {s['unstable']}",
          f"- Largest norm / gamma: {_fmt(_num(s['max_ratio']))}", ""]
    if s["evidence_points"]:
        L[-1:-1] = [f"- Evidence only (not in the verdict): {s['evidence_failed']} of "
                    f"{s['evidence_points']} leave-one-out predictions fail (see notes)"]
    if result.weaker:
        L += ["**Weaker check:** some points use the interpolated plant of the family, "
              "not the true plant (see notes).", ""]
    L += ["## Points by kind", "",
          "| kind | points | failed | max norm/gamma | counts in verdict |",
          "|---|---:|---:|---:|---|"]
    for k, d in s["by_kind"].items():
        L.append(f"| {k} | {d['points']} | {d['failed']} | {_fmt(_num(d['max_ratio']))} | "
                 f"{'yes' if d['gates_verdict'] else 'no (evidence)'} |")
    L += ["", "## Worst points", "",
          "| point | kind | plant | norm/gamma | gamma_opt/gamma | in. gain [dB] | "
          "in. phase [deg] | out. gain [dB] | all-loop in. gain [dB] | result |",
          "|---|---|---|---:|---:|---:|---:|---:|---:|---|"]
    for i in result.worst(12):
        L.append(f"| {_ptxt(result, result.points[i])} | {result.kind[i]} | "
                 f"{result.plant_source[i]} | {_fmt(v['ratio'][i])} | "
                 f"{_fmt(v['gamma_opt'][i] / result.gamma)} | {_fmt(v['in_gain_db'][i], '.2f')} | "
                 f"{_fmt(v['in_phase_deg'][i], '.1f')} | {_fmt(v['out_gain_db'][i], '.2f')} | "
                 f"{_fmt(v['in_all_gain_db'][i], '.2f')} | "
                 f"{'pass' if result.passed[i] else 'FAIL: ' + result.reasons[i]} |")
    if table_check is not None:
        L += [""] + table_section(table_check)
    L += ["", "## Rate of variation", ""]
    if result.rate is None:
        L.append("Not computed.")
    else:
        L += ["Sufficient bound from the frozen Lyapunov functions P(p), A(p)'P + PA = -I "
              "(Shamma and Athans 1990; Desoer 1969): the loop stays exponentially stable "
              "when sum_j |dp_j/dt| max ||dP/dp_j||_2 < 1 (spectral norm, maximum over the "
              "check points).", "",
              "| variable | max ‖dP/dp‖ | bound alone | bound all at once |",
              "|---|---:|---:|---:|"]
        units = dict(zip(result.variable_names, result.units, strict=False))
        for n, w, a, b in zip(result.rate.names, result.rate.worst, result.rate.single,
                              result.rate.joint, strict=True):
            per = rate_unit(units.get(n, ""))
            L.append(f"| {n} | {_fmt(w)} | {_fmt(a)}{per} | {_fmt(b)}{per} |")
    if getattr(result, "rate_certificate", None) is not None:
        L += ["", "## Certified scheduling rates", ""] + result.rate_certificate.markdown_lines()
    L += ["", "## Proposed refinement", ""]
    if result.proposals is None or len(result.proposals) == 0:
        L.append("None: no in-between point fails.")
    else:
        L.append("New design points where failures cluster (worst first):")
        L.append("")
        for r in result.proposals[:20]:
            L.append(f"- {_ptxt(result, r)}")
        for n, b in result.proposed_breakpoints.items():
            L.append(f"- new breakpoints for {n}: {', '.join(f'{x:.4g}' for x in b)}")
    if result.notes:
        L += ["", "## Notes", ""] + [f"- {n}" for n in result.notes]
    if figures:
        L += ["", "## Figures", ""] + [f"![{Path(f).stem}]({Path(f).name})" for f in figures]
    L += ["", "## Caution", "", CAUTION, ""]
    return "\n".join(L)


def _num(x):
    return float("nan") if x is None else float(x)  # float("inf") parses the JSON-safe "inf"


def table_section(tc) -> list[str]:
    """The "Shipped table" section: the table's verdict, family and table side by side at
    the same points, the cost of tabulation and discretization, the worst table points."""
    s = tc.summary()
    how = (f"discrete, sample time {tc.sample_time:g} s ({tc.method}); the plant discretized "
           "exactly by zero-order hold" if tc.discrete else "continuous time")
    L = ["## Shipped table", "",
         f"- Table: {tc.source or '(in memory)'}, {' x '.join(map(str, tc.shape))} nodes, {how}",
         f"- Verdict: **{'PASS' if tc.all_passed else 'FAIL'}** ({s['failed']} of "
         f"{s['points']} points fail; {s['fixable']} of the failures where the family's "
         "interpolant passes)",
         f"- Points: the table's nodes, cell centres and edge midpoints with the family "
         f"check's in-between points; the controller is the table's multilinear lookup, as "
         f"the target computes it. Checked in {tc.seconds:.2f} s.",
         "- The anti-windup gain and the actuator limits do not enter this linear check "
         "(limits inactive).", ""]
    if tc.weaker:
        L += ["**Weaker check:** the table is closed with the family's interpolated plant.", ""]
    cost = tc.cost()
    loops = [k for k in ("interpolant", "interpolant_discrete", "table_continuous", "table")
             if k in cost]
    L += ["| at the same points | " + " | ".join(cost[k]["loop"] for k in loops) + " |",
          "|---|" + "---:|" * len(loops)]
    for key, label, spec in (("max_ratio", "worst norm/gamma", ".4g"),
                             ("failed", "failing points", ""),
                             ("unstable", "unstable loops", ""),
                             ("min_input_gain_db", "min input disk gain margin [dB]", ".3g"),
                             ("min_input_phase_deg", "min input disk phase margin [deg]",
                              ".3g")):
        L.append(f"| {label} | " + " | ".join(
            _fmt(_num(cost[k][key]), spec) if spec else str(cost[k][key]) for k in loops)
            + " |")
    L.append("")
    for step, what in (("tabulation", "Multilinear tabulation (continuous lookup vs "
                                      "interpolant)"),
                       ("discretization", "Discretization (table as it runs vs continuous "
                                          "lookup)")):
        if step in cost:
            c = cost[step]
            L.append(f"- {what}: worst norm/gamma {_signed(c['max_ratio_change'], '.3g')}, "
                     f"largest increase at one point {_signed(c['largest_ratio_increase'], '.3g')}"
                     f"; min input disk gain margin {_signed(c['min_input_gain_db_change'], '.3g')}"
                     f" dB, phase margin {_signed(c['min_input_phase_deg_change'], '.3g')} deg")
    fails = [i for i in tc.worst(len(tc.passed)) if not tc.passed[i]][:10]
    if fails:
        L += ["", "| point | kind | norm/gamma (table) | norm/gamma (interpolant) | "
              "in. gain [dB] | in. phase [deg] | result |", "|---|---|---:|---:|---:|---:|---|"]
        for i in fails:
            pt = ", ".join(f"{n} = {x:.4g}" for n, x in zip(tc.variable_names, tc.points[i],
                                                            strict=True))
            L.append(f"| {pt} | {tc.kind[i]} | {_fmt(tc.values['ratio'][i])} | "
                     f"{_fmt(tc.compared['interpolant']['ratio'][i])} | "
                     f"{_fmt(tc.values['in_gain_db'][i], '.2f')} | "
                     f"{_fmt(tc.values['in_phase_deg'][i], '.1f')} | FAIL: {tc.reasons[i]} |")
    if tc.notes:
        L += [""] + [f"- note: {n}" for n in tc.notes]
    return L


def _signed(x, spec: str) -> str:
    x = _num(x)
    return "-" if np.isnan(x) else format(x, "+" + spec)


def _table_figure(plt, tc):
    """Norm / gamma and input disk gain margin: table as it runs vs the interpolant."""
    fig, axes = plt.subplots(1, 2, figsize=(10.0, 4.2))
    interp = tc.compared["interpolant"]
    limit = float(tc.criterion.norm_limit / tc.gamma)
    need_gain = float(tc.criterion.gain_margin_db)
    for ax, key, cap, level, title, label in (
            (axes[0], "ratio", 3.0, limit, "Closed-loop norm / gamma", "norm / gamma"),
            (axes[1], "in_gain_db", 40.0, need_gain, "Disk gain margin at the plant input",
             "gain margin [dB]")):
        x = np.minimum(_finite(interp[key], cap), cap)
        y = np.minimum(_finite(tc.values[key], cap), cap)
        lo, hi = float(min(x.min(), y.min(), level)), float(max(x.max(), y.max(), level))
        pad = 0.05 * (hi - lo or 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color=INK, lw=0.8,
                label="table = interpolant")
        ax.axhline(level, color=ACCENT, lw=1.5, label="pass limit")
        ax.axvline(level, color=ACCENT, lw=0.8, ls="--")
        ok = tc.passed
        ax.scatter(x[ok], y[ok], s=14, color=DESIGN, label="passes", zorder=3)
        ax.scatter(x[~ok], y[~ok], s=26, marker="x", color=ACCENT, label="fails", zorder=4)
        ax.set_xlabel(f"{label}, family interpolant (continuous)")
        ax.set_ylabel(f"{label}, table as it runs")
        ax.set_title(title)
    _figure_legend(fig, axes)
    return fig


def _html(markdown: str) -> str:
    """A minimal Markdown-to-HTML rendering of our own page (headings, lists, tables, images)."""
    out = ["<!DOCTYPE html><html><head><meta charset='utf-8'><title>Frozen-point check"
           "</title><style>body{font-family:sans-serif;max-width:1100px;margin:2em auto;"
           "color:#2b2b2b}table{border-collapse:collapse}td,th{border:1px solid #c9c4b8;"
           "padding:2px 6px;font-size:90%}img{max-width:100%}</style></head><body>"]
    in_table = in_list = False
    for line in markdown.splitlines():
        esc = html.escape(line)
        esc = _bold(esc)
        if line.startswith("|"):
            cells = [c.strip() for c in line.strip("|").split("|")]
            if all(set(c) <= set("-:") for c in cells):
                continue
            if not in_table:
                out.append("<table>")
                in_table = True
                out.append("<tr>" + "".join(f"<th>{_bold(html.escape(c))}</th>" for c in cells)
                           + "</tr>")
            else:
                out.append("<tr>" + "".join(f"<td>{_bold(html.escape(c))}</td>" for c in cells)
                           + "</tr>")
            continue
        if in_table:
            out.append("</table>")
            in_table = False
        if line.startswith("- "):
            if not in_list:
                out.append("<ul>")
                in_list = True
            out.append(f"<li>{_bold(html.escape(line[2:]))}</li>")
            continue
        if in_list:
            out.append("</ul>")
            in_list = False
        if line.startswith("## "):
            out.append(f"<h2>{html.escape(line[3:])}</h2>")
        elif line.startswith("# "):
            out.append(f"<h1>{html.escape(line[2:])}</h1>")
        elif line.startswith("!["):
            src = line[line.index("(") + 1:-1]
            out.append(f"<p><img src='{html.escape(src)}' alt='{html.escape(src)}'></p>")
        elif line.strip():
            out.append(f"<p>{esc}</p>")
    if in_table:
        out.append("</table>")
    if in_list:
        out.append("</ul>")
    out.append("</body></html>")
    return "\n".join(out)


def _bold(text: str) -> str:
    parts = text.split("**")
    return "".join(p if i % 2 == 0 else f"<b>{p}</b>" for i, p in enumerate(parts))


def write_report(result: CheckResult, family, out_dir: str | os.PathLike,
                 controller=None, table_check=None, progress=None) -> dict[str, Path]:
    """Write the plots and the summary page into ``out_dir`` (created if needed).

    ``controller`` (a ScheduledController) draws the controller-gain map; by
    default the family's stored interpolant is used when it has one.
    ``table_check`` (a :class:`schedule.analysis.table_check.TableCheck`) adds the
    "Shipped table" section and ``table_ratio.png``. ``progress(stage, done, total)``
    is told as each plot is drawn (stage "report").

    Returns ``{"markdown": path, "html": path, "figures": [paths]}``.

    Raises
    ------
    InputError
        If ``out_dir`` is a file, holds files that are not an earlier report's,
        or cannot be written; the previous report is then left as it was.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"report folder {out} is a file; give a folder path")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the folder of report {out} ({exc.strerror}); check "
                         "the path and permissions") from None
    if controller is None and getattr(family, "interpolant", None):
        from .errors import ScheduleError
        from .interpolate import ScheduledController

        try:
            controller = ScheduledController.from_family(family)
        except ScheduleError:
            controller = None  # the map of controller gains is then left out
    steps = [0]
    total = 3 * bool(len(result.passed)) + 3 + (table_check is not None)

    def step() -> None:
        if progress:
            progress("report", steps[0], total)
        steps[0] += 1

    step()
    import matplotlib

    plt = _AggFigures()
    figures: list[Path] = []
    with matplotlib.rc_context(STYLE):
        if len(result.passed):
            figures += _ratio_plots(plt, result, out)
            step()
            g = _gamma_opt_plot(plt, result, out)
            if g is not None:
                figures.append(g)
            step()
            figures.append(_margins_plot(plt, result, out))
            step()
        c = _controller_sv_plot(plt, result, controller, family, out)
        if c is not None:
            figures.append(c)
        step()
        if table_check is not None and len(table_check.passed):
            fig = _table_figure(plt, table_check)
            plt.save(fig, out / "table_ratio.png")
            plt.close(fig)
            figures.append(out / "table_ratio.png")
        if table_check is not None:
            step()
        g = _gain_rate_plot(plt, result, out)
        if g is not None:
            figures.append(g)
        step()
    md = markdown_summary(result, [str(f) for f in figures], table_check)
    files: dict[str, str | bytes] = dict(plt.files)
    files["summary.md"] = md
    files["summary.html"] = _html(md)
    write_dir_atomic(out, files, "report folder", replaceable=_report_member)
    step()
    return {"markdown": out / "summary.md", "html": out / "summary.html", "figures": figures}
