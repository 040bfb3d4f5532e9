"""The check report: PNG plots (matplotlib, Agg backend) and a summary page (Markdown + HTML).

Figures, in our own visual style (:data:`STYLE`):

- ``ratio_<a>_<b>.png``: closed-loop norm / gamma over each pair of
  scheduling variables, design points and failing points marked (one
  variable: norm / gamma along it);
- ``gamma_opt.png``: the optimal gamma a controller synthesized at each point
  would reach, against the family's common gamma;
- ``margins.png``: loop-at-a-time disk margins at the plant input (gain and
  phase) over the envelope;
- ``controller_sv.png``: the controller's largest singular value over
  frequency along the diagonal line from the lower to the upper corner of
  the envelope;
- ``gain_vs_rate.png``: the certified induced-L2 gain bound gamma(nu) against
  the scheduling rate (when the rate certificate was computed).

Every file is written to a temporary name in the target folder and renamed,
so a failed run never leaves a half-written file.
"""

from __future__ import annotations

import html
import itertools
import os
from pathlib import Path

import numpy as np

from .atomic import write_file_atomic, write_text_atomic
from .check import CheckResult
from .errors import InputError

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
    """The two pyplot calls we use, on bare Agg figures: no global backend switch, no GUI."""

    @staticmethod
    def subplots(*args, figsize=None, **kw):
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=figsize)
        FigureCanvasAgg(fig)
        return fig, fig.subplots(*args, **kw)

    @staticmethod
    def close(fig) -> None:
        fig.clear()


def _save_figure(fig, path: Path) -> None:
    write_file_atomic(path, lambda tmp: fig.savefig(tmp, format="png", dpi=110,
                                                    bbox_inches="tight"), "figure")


def _label(result: CheckResult, j: int) -> str:
    unit = result.units[j] if j < len(result.units) else ""
    return f"{result.variable_names[j]} [{unit}]" if unit else result.variable_names[j]


def _finite(x, cap: float) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return np.where(np.isfinite(a), a, cap)


def _ratio_plots(plt, result: CheckResult, out: Path) -> list[Path]:
    # Points that count in the verdict carry the colour scale; leave-one-out
    # predictions shown as evidence only are marked where they fail, apart.
    keep = result.gates
    evidence_fail = ~result.passed & ~keep
    evidence_pts = result.points[evidence_fail]
    result = _subset(result, keep)
    v = result.values
    ratio = _finite(v["ratio"], np.nan)
    shown = np.where(np.isfinite(ratio), ratio, np.nanmax(ratio, initial=1.0) * 1.2)
    fail = ~result.passed
    grid = result.kind == "grid"
    d = result.points.shape[1]
    paths = []
    pairs = list(itertools.combinations(range(d), 2)) if d >= 2 else [(0, None)]
    for a, b in pairs:
        fig, ax = plt.subplots(figsize=(5.2, 4.0))
        if b is None:
            order = np.argsort(result.points[:, a])
            ax.plot(result.points[order, a], shown[order], "o", ms=3.5, color=INK,
                    label="check points")
            ax.axhline(1.0 + result.settings.gamma_tolerance, color=ACCENT, lw=1.0, ls="--",
                       label="gamma (1 + tolerance)")
            ax.set_ylabel("closed-loop norm / gamma")
            ax.plot(result.points[fail, a], shown[fail], "x", color=ACCENT, ms=7,
                    label="failing")
            ax.plot(result.points[grid, a], shown[grid], "s", mfc="none", color=DESIGN,
                    label="design points")
            name = f"ratio_{result.variable_names[a]}.png"
        else:
            sc = ax.scatter(result.points[:, a], result.points[:, b], c=shown, s=22,
                            vmin=np.nanmin(shown), vmax=max(np.nanmax(shown), 1.0))
            fig.colorbar(sc, ax=ax, label="closed-loop norm / gamma")
            ax.scatter(result.points[grid, a], result.points[grid, b], marker="s", s=46,
                       facecolors="none", edgecolors=DESIGN, label="design points")
            if fail.any():
                ax.scatter(result.points[fail, a], result.points[fail, b], marker="x", s=50,
                           color=ACCENT, label="failing")
            if len(evidence_pts):
                ax.scatter(evidence_pts[:, a], evidence_pts[:, b], marker="D", s=30,
                           facecolors="none", edgecolors=EVIDENCE, linewidths=1.0,
                           label="leave-one-out above gamma (evidence)")
            ax.set_ylabel(_label(result, b))
            name = f"ratio_{result.variable_names[a]}_{result.variable_names[b]}.png"
        ax.set_xlabel(_label(result, a))
        ax.set_title("Norm over gamma at frozen points")
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.14), ncol=2)
        path = out / name
        _save_figure(fig, path)
        plt.close(fig)
        paths.append(path)
    return paths


def _envelope_axes(result: CheckResult):
    d = result.points.shape[1]
    x = result.points[:, 0]
    y = result.points[:, 1] if d >= 2 else None
    return x, y


def _scatter_panel(fig, ax, result, values, label, title):
    x, y = _envelope_axes(result)
    if y is None:
        ax.plot(x, values, "o", ms=3.5, color=INK)
        ax.set_ylabel(label)
    else:
        sc = ax.scatter(x, y, c=values, s=22)
        fig.colorbar(sc, ax=ax, label=label)
        ax.set_ylabel(_label(result, 1))
    ax.set_xlabel(_label(result, 0))
    ax.set_title(title)


def _gamma_opt_plot(plt, result: CheckResult, out: Path) -> Path | None:
    g = np.asarray(result.values.get("gamma_opt", []), dtype=float)
    keep = np.isfinite(g)
    if not keep.any():
        return None
    sub = _subset(result, keep)
    fig, ax = plt.subplots(figsize=(5.2, 4.0))
    _scatter_panel(fig, ax, sub, g[keep] / result.gamma, "gamma_opt / family gamma",
                   "Price of interpolation: local optimum vs common gamma")
    path = out / "gamma_opt.png"
    _save_figure(fig, path)
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


def _margins_plot(plt, result: CheckResult, out: Path) -> Path:
    v = result.values
    fig, axes = plt.subplots(1, 2, figsize=(10.0, 4.0))
    gain = _finite(v["in_gain_db"], 40.0)
    phase = np.asarray(v["in_phase_deg"], dtype=float)
    _scatter_panel(fig, axes[0], result, np.minimum(gain, 40.0), "gain margin [dB] (cap 40)",
                   "Disk gain margin at the plant input")
    _scatter_panel(fig, axes[1], result, phase, "phase margin [deg]",
                   "Disk phase margin at the plant input")
    path = out / "margins.png"
    _save_figure(fig, path)
    plt.close(fig)
    return path


def _controller_sv_plot(plt, result: CheckResult, controller, family, out: Path) -> Path | None:
    if controller is None:
        return None
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
    im = ax.pcolormesh(w, t, db, shading="auto")
    ax.set_xscale("log")
    fig.colorbar(im, ax=ax, label="largest singular value of K(jw) [dB]")
    ax.set_xlabel("frequency [rad/s]")
    ax.set_ylabel("position on the diagonal (0 = lower corner, 1 = upper)")
    ax.set_title("Controller gain along the envelope diagonal")
    ax.grid(False)
    path = out / "controller_sv.png"
    _save_figure(fig, path)
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
        unit = units.get(name, "")
        unit = "" if unit in ("", "-") else unit
        ax.set_xlabel(f"|d {name}/dt| [{unit}/s]" if unit else f"|d {name}/dt| [1/s]")
        ax.set_ylabel("induced L2 gain")
        ax.set_title(f"Gain bound while {name} moves")
        ax.legend(loc="best")
    path = out / "gain_vs_rate.png"
    _save_figure(fig, path)
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


def markdown_summary(result: CheckResult, figures: list[str] | None = None) -> str:
    """The summary page as Markdown: verdict, settings, tables, worst points, rate, caution."""
    s = result.summary()
    st = result.settings
    v = result.values
    L = ["# Frozen-point check of the scheduled controller", ""]
    L += ["## Summary", "",
          f"- Verdict: **{'PASS' if result.all_passed else 'FAIL'}** "
          f"({s['failed']} of {s['points']} points fail)",
          f"- Family gamma: {result.gamma:.6g}; a point passes when norm <= gamma "
          f"(1 + {st.gamma_tolerance:g}) = {result.gamma * (1 + st.gamma_tolerance):.6g}",
          f"- Margin requirement at the plant input (loop at a time, disk): "
          f"{st.gain_margin_db:g} dB and {st.phase_margin_deg:g} deg (common practice)",
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
    L += ["", "## Rate of variation", ""]
    if result.rate is None:
        L.append("Not computed.")
    else:
        L += ["Sufficient bound from the frozen Lyapunov functions P(p), A(p)'P + PA = -I "
              "(Shamma and Athans 1990; Desoer 1969): the loop stays exponentially stable "
              "when sum_j |dp_j/dt| max ||dP/dp_j||_2 < 1 (spectral norm, maximum over the "
              "check points).", "",
              "| variable | max ‖dP/dp‖ | bound alone [unit/s] | bound all at once [unit/s] |",
              "|---|---:|---:|---:|"]
        for n, w, a, b in zip(result.rate.names, result.rate.worst, result.rate.single,
                              result.rate.joint, strict=True):
            L.append(f"| {n} | {_fmt(w)} | {_fmt(a)} | {_fmt(b)} |")
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
                 controller=None) -> dict[str, Path]:
    """Write the plots and the summary page into ``out_dir`` (created if needed).

    ``controller`` (a ScheduledController) draws the controller-gain map; by
    default the family's stored interpolant is used when it has one.

    Returns ``{"markdown": path, "html": path, "figures": [paths]}``.

    Raises
    ------
    InputError
        If ``out_dir`` exists and is not a folder, or cannot be created.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"report folder {out} is a file; give a folder path")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create report folder {out} ({exc.strerror}); check the "
                         "path and permissions") from None
    if controller is None and getattr(family, "interpolant", None):
        from .errors import ScheduleError
        from .interpolate import ScheduledController

        try:
            controller = ScheduledController.from_family(family)
        except ScheduleError:
            controller = None  # the map of controller gains is then left out
    import matplotlib

    plt = _AggFigures()
    figures: list[Path] = []
    with matplotlib.rc_context(STYLE):
        if len(result.passed):
            figures += _ratio_plots(plt, result, out)
            g = _gamma_opt_plot(plt, result, out)
            if g is not None:
                figures.append(g)
            figures.append(_margins_plot(plt, result, out))
        c = _controller_sv_plot(plt, result, controller, family, out)
        if c is not None:
            figures.append(c)
        g = _gain_rate_plot(plt, result, out)
        if g is not None:
            figures.append(g)
    md = markdown_summary(result, [str(f) for f in figures])
    md_path = out / "summary.md"
    html_path = out / "summary.html"
    write_text_atomic(md_path, md, "report page")
    write_text_atomic(html_path, _html(md), "report page")
    return {"markdown": md_path, "html": html_path, "figures": figures}
