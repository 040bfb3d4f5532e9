"""The whole job on the bundled crane envelope, in one call.

:func:`run_demo` designs the crane family at a common gamma (with the
interpolant chosen by leave-one-out evidence), checks it at in-between points
against the crane model, writes the report, exports the scheduled tables
(CSV, JSON, C99 and an FMI 2.0 co-simulation unit, with the drive's 90 kN limit
and the anti-windup gain), simulates the nonlinear crane under the exported discrete
controller while hoisting and travelling, and returns a short summary.

The exported table is checked as it runs before it is written (the runtime's lookup
at every in-between point, the crane model discretized by zero-order hold at the
table's sample time: :func:`schedule.export.checked.build_checked_table`, the same
step as ``schedule export``); the report shows family and table side by side.

The demo copies its design file and envelope file into the output folder and
designs from those copies, so every ``schedule`` command of the tour (printed
at the end, :data:`NEXT_COMMANDS`) works from that folder. Tables get the
names ``schedule export`` gives them (:mod:`schedule.table_files`).

The crane is an invented scenario (see ``operating_points/README.md``). A
crane controller is safety critical: the demo is illustrative; real designs
need validation on the machine and compliance with the applicable codes and
licensed practice.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np

from .errors import InputError
from .progress import stage_line
from .types import rate_unit

CAUTION = ("Results are design aids: validate in simulation and hardware tests and follow the "
           "applicable codes and licensed practice.")

#: file and folder names inside the demo output folder (tables: schedule.table_files)
DESIGN_FILE = "crane_design.toml"
ENVELOPE_FILE = "crane_envelope.h5"
FAMILY_FILE = "crane-family.h5"
REPORT_DIR = "report"
TABLE_DIR = "tables"
SIMULATION_DIR = "simulation"
SUMMARY_FILE = "summary.json"
TABLE_FORMATS = ("csv", "json", "c", "fmu")

#: the tour, stage by stage, run from the demo folder (README.md, "A short tour")
NEXT_COMMANDS = (
    f"schedule design {DESIGN_FILE} --out crane.h5",
    "schedule inspect crane.h5",
    f"schedule check crane.h5 --design {DESIGN_FILE} --report check-report",
    f"schedule export crane.h5 --design {DESIGN_FILE} --format c --out table",
    f"schedule check crane.h5 --design {DESIGN_FILE} --table table --no-gamma-opt -q",
    f"schedule simulate crane.h5 --design {DESIGN_FILE} --out sim",
)


@dataclass
class DemoOutcome:
    """What the demo produced: the summary lines, a JSON-ready dict and the files."""

    lines: list[str]
    summary: dict
    files: dict[str, Path] = field(default_factory=dict)
    checks_passed: bool = True


def bundled_design_path() -> Path:
    """Path of the demo design file shipped with the package."""
    return Path(str(resources.files("schedule.demo_crane").joinpath(DESIGN_FILE)))


def copy_demo_inputs(out: Path) -> Path:
    """Copy the bundled design and envelope files into ``out``; return the design's copy.

    A copy already there is left alone when it is byte-for-byte the bundled file;
    a changed one is refused (InputError) rather than overwritten: it may be the
    user's own edit.
    """
    from .atomic import write_file_atomic

    source = bundled_design_path().parent
    for name in (DESIGN_FILE, ENVELOPE_FILE):
        data = (source / name).read_bytes()
        target = out / name
        if target.exists():
            if target.is_file() and target.read_bytes() == data:
                continue
            raise InputError(f"{target} exists and differs from the bundled {name}; move it "
                             "away or give another --out (the demo does not overwrite it)")
        write_file_atomic(target, lambda tmp, data=data: Path(tmp).write_bytes(data), name)
    return out / DESIGN_FILE


def run_demo(out_dir: str | os.PathLike = "schedule-demo", jobs: int = 2,
             progress: Callable[[str, int, int], None] | None = None,
             stage: Callable[[str], None] | None = None) -> DemoOutcome:
    """Run design, check, report, export and simulation on the bundled crane envelope.

    Parameters
    ----------
    out_dir : folder for every output (created; files in it are replaced).
    jobs : local worker processes for synthesis and checks.
    progress : callback ``(stage, done, total)`` for the progress bars.
    stage : callback announcing each stage by name.

    Returns
    -------
    DemoOutcome
    """
    from .atomic import write_dir_atomic, write_text_atomic
    from .check import CheckSettings, check_family
    from .design_file import load_design
    from .export import file_sha256, write_tables
    from .export.checked import build_checked_table
    from .family import design_family
    from .paths import refuse_output_over_input
    from .report import write_report
    from .simulate import crane_trajectory, result_csv, result_plots, simulate
    from .sources import load_nonlinear_model
    from .table_files import folder_target

    announce = stage or (lambda name: None)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"demo output {out} is a file; give a folder path with --out")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create demo output folder {out}: {exc.strerror}; choose "
                         "another --out") from None
    design_path = copy_demo_inputs(out)
    spec = load_design(design_path)
    tables = out / TABLE_DIR
    refuse_output_over_input(
        [out / FAMILY_FILE, out / SUMMARY_FILE]
        + [folder_target(tables, f) for f in TABLE_FORMATS if f != "c"],
        [design_path, spec.source.operating_points, spec.source.validation,
         bundled_design_path(), bundled_design_path().parent / ENVELOPE_FILE],
        folders=[out / REPORT_DIR, out / SIMULATION_DIR, folder_target(tables, "c")])
    names = [v.name for v in spec.variables]
    units = [v.unit for v in spec.variables]
    files: dict[str, Path] = {}
    t0 = time.perf_counter()

    announce("design")
    family_path = out / FAMILY_FILE
    family = design_family(spec, out=family_path, jobs=jobs, progress=progress)
    files["family"] = family_path

    announce("check")
    settings = CheckSettings.from_spec(spec)
    result = check_family(family, settings, spec=spec, jobs=jobs, progress=progress)

    announce("export")
    checked = build_checked_table(family, sample_time=spec.export.sample_time,
                                  method=spec.export.method, prewarp=spec.export.prewarp,
                                  source_sha256=file_sha256(family_path), limits=spec.limits,
                                  settings=settings, spec=spec, jobs=jobs, progress=progress,
                                  source=f"{TABLE_DIR}/")
    if not checked.passed:
        raise InputError(f"the demo's table fails its own check ({checked.stopped}); worst "
                         f"point {checked.worst_point()}")
    table = checked.table
    report = write_report(result, family, out / REPORT_DIR, table_check=checked.check,
                          progress=progress)
    files["report"] = Path(report["markdown"])
    try:
        tables.mkdir(exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create folder {tables}: {exc.strerror}; choose another "
                         "--out") from None
    stage_line(progress, "write tables")
    paths, (fmu,) = write_tables(table, TABLE_FORMATS, tables)
    for p in paths:
        key = {".h": "c_header", ".c": "c_source"}.get(p.suffix, p.suffix.lstrip("."))
        files[key] = p

    announce("simulate")
    from .export import TableController

    model = load_nonlinear_model(spec)
    controller = TableController(table)
    sim = simulate(model, controller, crane_trajectory(sample_time=controller.sample_time),
                   progress=progress)
    sim_files = {"simulation.csv": result_csv(sim)}
    stage_line(progress, "plots")
    sim_files.update(result_plots(sim, title="Crane under the scheduled table (hoisting while "
                                             "travelling, then a gust)"))
    write_dir_atomic(out / SIMULATION_DIR, sim_files, "simulation folder")
    files["simulation"] = out / SIMULATION_DIR

    summary = _summary(family, result, sim.summary(), names, units, files, out,
                       time.perf_counter() - t0)
    summary["table_check"] = _table_summary(checked)
    summary["fmu"] = {"platform": fmu.platform, "note": fmu.note}
    summary_path = out / SUMMARY_FILE
    write_text_atomic(summary_path, json.dumps(summary, indent=1, default=str) + "\n",
                      "demo summary")
    files["summary"] = summary_path
    return DemoOutcome(_lines(summary) + next_steps(out), summary, files,
                       bool(result.all_passed))


def _summary(family, result, sim: dict, names, units, files, out: Path, seconds: float) -> dict:
    ok = family.ok
    opt = np.where(ok, np.asarray(family.gamma_opt, dtype=float), np.nan)
    worst_opt = int(np.nanargmax(opt))
    ratio = np.nan_to_num(np.asarray(result.values["ratio"], dtype=float), nan=np.inf)
    gates = result.gates
    worst = int(np.flatnonzero(gates)[np.argmax(ratio[gates])])
    loo = np.asarray(result.kind) == "leave_one_out"
    s = result.summary()
    rate = None
    if result.rate is not None:
        rate = {n: float(v) for n, v in zip(result.rate.names, result.rate.single)}
    interp = (family.interpolant or {}).get("attrs", {})
    return {
        "points": int(len(ok)), "points_ok": int(ok.sum()),
        "gamma_opt_worst": float(opt[worst_opt]),
        "gamma_opt_worst_at": dict(zip(names, map(float, family.points[worst_opt]))),
        "gamma": float(family.gamma),
        "interpolant": {k: (v if isinstance(v, (str, int, float)) else str(v))
                        for k, v in interp.items() if k in ("form", "kind")},
        "check_points": int(s["points"]), "check_failed": int(s["failed"]),
        "check_passed": bool(s["passed"]), "weaker_check": bool(s["weaker_check"]),
        "worst_ratio": float(ratio[worst]),
        "worst_at": dict(zip(names, map(float, result.points[worst]))),
        "worst_kind": str(result.kind[worst]),
        "loo_points": int(loo.sum()), "loo_failed": int((loo & ~result.passed).sum()),
        "loo_worst_ratio": float(np.max(ratio[loo])) if loo.any() else None,
        "min_input_gain_margin_db": s["min_input_gain_db"],
        "min_input_phase_margin_deg": s["min_input_phase_deg"],
        "rate_bound": rate, "units": dict(zip(names, units)),
        "simulation": {k: v for k, v in sim.items() if isinstance(v, (int, float))},
        "files": {k: str(v) for k, v in files.items()}, "out": str(out),
        "seconds": round(seconds, 1), "caution": CAUTION,
    }


def _table_summary(checked) -> dict:
    tc = checked.check
    s, cost = tc.summary(), tc.cost()
    return {"passed": bool(tc.all_passed), "points": s["points"], "failed": s["failed"],
            "sample_time": tc.sample_time, "method": tc.method,
            "shape": list(checked.rounds[-1]["shape"].values()),
            "added_breakpoints": sum(len(v) for v in checked.added.values()),
            "worst_ratio": s["max_ratio"],
            "interpolant_worst_ratio": cost["interpolant"]["max_ratio"],
            "min_input_gain_margin_db": s["min_input_gain_db"],
            "min_input_phase_margin_deg": s["min_input_phase_deg"],
            "seconds": round(tc.seconds, 2)}


def _lines(s: dict) -> list[str]:
    names = list(s["gamma_opt_worst_at"])
    units = s["units"]

    def where(d: dict) -> str:
        return ", ".join(f"{k} = {d[k]:.4g} {units.get(k, '')}".rstrip() for k in names)

    verdict = "all passed" if s["check_passed"] else f"{s['check_failed']} FAILED"
    lines = [
        f"operating points      {s['points_ok']} of {s['points']} synthesized",
        f"worst gamma_opt       {s['gamma_opt_worst']:.4g} at {where(s['gamma_opt_worst_at'])}",
        f"common gamma          {s['gamma']:.4g}",
        "interpolant           " + (", ".join(f"{k} {v}" for k, v in s["interpolant"].items())
                                    or "none"),
        f"in-between checks     {s['check_points']} points, {verdict}"
        + (" (weaker check: interpolated plant)" if s["weaker_check"] else ""),
        f"worst norm / gamma    {s['worst_ratio']:.4g} at {where(s['worst_at'])} "
        f"({s['worst_kind']})",
        f"leave-one-out         {s['loo_failed']} of {s['loo_points']} predictions above "
        f"gamma, worst norm / gamma {_num(s['loo_worst_ratio'])} (evidence)",
        f"input disk margins    >= {_num(s['min_input_gain_margin_db'])} dB, "
        f">= {_num(s['min_input_phase_margin_deg'])} deg",
    ]
    t = s.get("table_check")
    if t:
        lines.append(
            f"table as it runs      {t['points']} points, "
            + ("all passed" if t["passed"] else f"{t['failed']} FAILED")
            + f" (T = {t['sample_time']:g} s, {t['method']}); worst norm / gamma "
            f"{_num(t['worst_ratio'])}, margins >= {_num(t['min_input_gain_margin_db'])} dB, "
            f">= {_num(t['min_input_phase_margin_deg'])} deg")
    if s["rate_bound"]:
        lines.append("rate bound            " + ", ".join(
            f"|d {k}/dt| < {v:.3g}{rate_unit(units.get(k, ''))}"
            for k, v in s["rate_bound"].items()))
    lines += [
        f"family file           {s['files']['family']}",
        f"report                {s['files']['report']}",
        f"tables                {Path(s['files']['csv']).parent} (CSV, JSON, c/, FMU"
        + (f" for {s['fmu']['platform']})" if s.get("fmu", {}).get("platform") else
           ", source only)"),
        f"simulation            {s['files']['simulation']}",
        f"done in {s['seconds']:.0f} s. {CAUTION}",
    ]
    return lines


def next_steps(out: str | os.PathLike) -> list[str]:
    """The closing lines: the tour's commands to try in the demo folder."""
    return ["", f"next, stage by stage in {out} (its design and envelope files are there):",
            f"  cd {out}"] + [f"  {c}" for c in NEXT_COMMANDS] + [
            "the rate bound above is the frozen-Lyapunov one; rates certified while the schedule "
            "moves (LMIs, about 10 min on 2 cores):",
            f"  schedule check crane.h5 --design {DESIGN_FILE} --rate-certificate -q"]


def _num(x) -> str:
    try:
        return f"{float(x):.3g}"
    except (TypeError, ValueError):
        return str(x)
