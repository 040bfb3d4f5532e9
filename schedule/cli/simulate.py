"""``schedule simulate FAMILY --out DIR``: the nonlinear model under the scheduled table."""

from __future__ import annotations

import json

import click

from ..errors import InputError
from ..progress import stage_line
from .common import design_option, progress_bar


def _model_entry(family) -> str | None:
    """The nonlinear model the family's design text names, as written there (None if none)."""
    text = family.design_text or ""
    try:
        import tomllib
    except ImportError:  # pragma: no cover - Python 3.10
        import tomli as tomllib
    try:
        source = tomllib.loads(text).get("source", {})
    except (tomllib.TOMLDecodeError, RecursionError):
        return None
    if not isinstance(source, dict):
        return None
    for key in ("nonlinear_model", "nonlinear_model_file"):
        if isinstance(source.get(key), str):
            return f'source.{key} = "{source[key]}"'
    return None


def _load_model(entry: str):
    from ..sources import import_entry, nonlinear_model_from

    obj = import_entry(entry, "nonlinear model", callable_only=False)
    return nonlinear_model_from(obj, f"nonlinear model \"{entry}\"")


def _trusted_model(model_entry: str | None, design_file: str | None, family):
    """``(model, label)``: the nonlinear model the user named (--model, or the --design
    file's ``nonlinear_model`` / ``nonlinear_model_file``); never one named only inside the
    family file, which is data."""
    if model_entry:
        return _load_model(model_entry), model_entry
    if design_file is not None:
        from ..design_file import load_design
        from ..sources import load_nonlinear_model

        spec = load_design(design_file)
        src = spec.source
        label = src.nonlinear_model or f"{src.nonlinear_model_file}:{src.nonlinear_function}"
        return load_nonlinear_model(spec), label
    stored = _model_entry(family)
    if stored:
        raise InputError(f"the family's stored design names {stored}; it was not imported, "
                         "because a data file never chooses code to run: pass --design FILE "
                         "(the design file you trust) or --model module:function")
    raise InputError("no nonlinear model to simulate: pass --model module:function or "
                     "--design FILE naming source.nonlinear_model or nonlinear_model_file")


#: the bundled crane's large step: trolley 60 m at the longest rope and the heaviest payload
CRANE_STEP = ("trolley_position", 60.0, {"rope_length": 30.0, "payload_mass": 40000.0})
STEP_DURATION = 120.0  # s


def _parse_step(text: str, measured) -> tuple[str, float]:
    name, sep, value = (text or "").partition("=")
    name = name.strip()
    if not sep or name not in measured:
        raise InputError(f"--step {text!r}: write MEASURED=SIZE with MEASURED one of "
                         f"{', '.join(measured)}")
    try:
        size = float(value)
    except ValueError:
        raise InputError(f"--step {text!r}: the size {value!r} is not a number") from None
    return name, size


def _parse_assignments(text: str, names, option: str) -> dict[str, float]:
    """``name=value,...`` with names from ``names``, as a mapping of the names given."""
    out: dict[str, float] = {}
    for tok in (t.strip() for t in (text or "").split(",") if t.strip()):
        key, sep, value = tok.partition("=")
        key = key.strip()
        if not sep or key not in names:
            raise InputError(f"{option} {text!r}: write name=value,... with names from "
                             f"{', '.join(names)}")
        try:
            out[key] = float(value)
        except ValueError:
            raise InputError(f"{option} {text!r}: {value!r} is not a number") from None
    return out


def _parse_point(text: str, names) -> dict[str, float]:
    """``--step-at name=value,...``: every scheduling variable must be given."""
    out = _parse_assignments(text, names, "--step-at")
    missing = [n for n in names if n not in out]
    if missing:
        raise InputError(f"--step-at {text!r} lacks {', '.join(missing)}; give every variable")
    return out


def _parse_values(text: str | None, names, option: str) -> list[float] | None:
    """``name=value,...`` over ``names`` (missing names 0) as a list, None when not given."""
    if text is None:
        return None
    given = _parse_assignments(text, names, option)
    return [given.get(n, 0.0) for n in names]


def _looks_like_crane(model) -> bool:
    return (tuple(getattr(model, "variable_names", ())) == ("rope_length", "payload_mass")
            and "trolley_position" in model.output_names and "wind_speed" in model.input_names)


@click.command("simulate")
@click.argument("family_file", type=click.Path(dir_okay=False))
@click.option("--out", "-o", required=True, type=click.Path(),
              help="Folder for simulation.csv, response.png, schedule.png, summary.json "
                   "(written atomically).")
@click.option("--trajectory", type=click.Path(dir_okay=False), default=None,
              help="CSV with columns time,<variables>[,ref:<measured>][,<exogenous input>]. "
                   "Default for the crane: travel 20 m while hoisting 25 m -> 8 m, then a gust.")
@click.option("--table", "table_file", type=click.Path(dir_okay=False), default=None,
              help="Use this exported CSV/JSON/HDF5 table instead of exporting one now.")
@click.option("--sample-time", type=float, default=None,
              help="Sample time in s when exporting now. Default: design [export], else 0.02.")
@click.option("--method", type=click.Choice(["tustin", "zoh"]), default=None,
              help="Discretization when exporting now. Default: design [export], else tustin.")
@click.option("--model", "model_entry", default=None,
              help="module:name of the nonlinear model (or of a function returning it). "
                   "Default: source.nonlinear_model or nonlinear_model_file of the --design "
                   "file.")
@design_option
@click.option("--substeps", type=click.IntRange(1, 1000), default=4, show_default=True,
              help="Runge-Kutta steps per sample interval.")
@click.option("--step", "step_text", default=None,
              help="MEASURED=SIZE: also run a reference step with and without the anti-windup "
                   "path (needs actuator limits). Default for the crane: trolley_position=60.")
@click.option("--step-at", "step_at", default=None,
              help="Scheduling point of the step, name=value,... Default: the trajectory's "
                   "start (crane: rope_length=30,payload_mass=40000).")
@click.option("--initial-state", "initial_state", default=None, metavar="NAME=VALUE,...",
              help="Start state of the model (its state names; others 0). Default: all 0. "
                   "Give the operating point when the model's origin is not one (e.g. tank "
                   "levels).")
@click.option("--trim-input", "trim_input", default=None, metavar="NAME=VALUE,...",
              help="Trim values of the model inputs that the controller's output is added "
                   "to, and of the exogenous inputs the trajectory does not give (others "
                   "0). Default: all 0.")
@click.option("--no-step", is_flag=True, help="Skip the anti-windup step comparison.")
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary.")
def simulate_command(family_file, out, trajectory, table_file, sample_time, method,
                     model_entry, design_file, substeps, step_text, step_at, initial_state,
                     trim_input, no_step, as_json):
    """Simulate the nonlinear model of FAMILY_FILE under its scheduled discrete controller.

    The controller sees each measured output minus its reference (the position error
    for a position) and adds its output to the trim controls; its state is carried
    across schedule changes. Its command is limited as the design's [[limits]] say, and
    a large reference step is run with and without the anti-windup path (step.png).
    The model comes from --model or from the design file given with --design; one
    named only inside the family file is not imported.
    """
    bar = progress_bar(False, "read inputs")  # before the imports, which take a moment
    from ..atomic import write_dir_atomic
    from ..export import TableController, build_table, file_sha256
    from ..paths import input_file, refuse_output_over_input
    from ..simulate import crane_trajectory, read_trajectory, result_csv, result_plots, simulate
    from ..store import read_family
    from .export import export_settings

    refuse_output_over_input([], [family_file, trajectory, table_file, design_file],
                             folders=[out])
    for path, what in ((trajectory, "trajectory"), (table_file, "table file")):
        if path is not None:
            input_file(path, what)  # a folder, a device or a pipe is named as such
    family = read_family(family_file)
    if table_file is not None and (sample_time is not None or method is not None):
        given = "--sample-time" if sample_time is not None else "--method"
        raise InputError(f"{given} applies when the table is exported now, but --table "
                         f"{table_file} brings its own ({given} would be ignored); drop one")
    model, entry = _trusted_model(model_entry, design_file, family)
    if table_file is not None:
        controller = TableController(table_file)
    else:
        settings = export_settings(family)
        T = sample_time if sample_time is not None else (settings["sample_time"] or 0.02)
        if not T > 0:
            raise InputError(f"--sample-time {T:g} must be > 0 s for a simulation")
        table = build_table(family, sample_time=T, method=method or settings["method"],
                            prewarp=settings["prewarp"] if (method or settings["method"])
                            == "tustin" else 0.0, source_sha256=file_sha256(family_file),
                            limits=settings["limits"])
        if table.extra.get("sample_time_note"):
            click.echo(f"warning: {table.extra['sample_time_note']}", err=True)
        controller = TableController(table)
    names = tuple(v.name for v in controller.table.variables)
    exogenous = [u for u in model.input_names if u not in controller.table.control_names]
    if trajectory is not None:
        traj = read_trajectory(trajectory, names, controller.table.measured_names, exogenous)
    elif _looks_like_crane(model):
        traj = crane_trajectory(sample_time=controller.sample_time)
    else:
        raise InputError("no default trajectory for this model; give --trajectory CSV with "
                         f"columns time,{','.join(names)}")
    table = controller.table
    step = None
    if not no_step and (step_text is not None or (_looks_like_crane(model) and trajectory is None
                                                  and table.limits is not None)):
        if table.limits is None:
            raise InputError("--step compares the limited controller with and without "
                             "anti-windup, but the table has no actuator limits; add "
                             "[[limits]] to the design (or drop --step)")
        if step_text is not None:
            measured, size = _parse_step(step_text, table.measured_names)
            at = (_parse_point(step_at, names) if step_at else
                  dict(zip(names, map(float, traj.points[0]), strict=True)))
        else:
            measured, size, at = CRANE_STEP
            at = _parse_point(step_at, names) if step_at else dict(at)
        step = (measured, size, at)
    x0 = _parse_values(initial_state, model.state_names, "--initial-state")
    u0 = _parse_values(trim_input, model.input_names, "--trim-input")
    with bar:
        result = simulate(model, controller, traj, x0=x0, u0=u0, substeps=substeps,
                          progress=bar)
        summary = result.summary()
        summary.update({"family": str(family_file), "model": entry,
                        "sample_time": controller.sample_time,
                        "method": controller.table.method,
                        "limits": table.actuator_limits.to_metadata(table.control_names),
                        "anti_windup": table.anti_windup})
        files = {"simulation.csv": result_csv(result)}
        if step is not None:
            summary["step"], step_files = _step_comparison(model, table, step, substeps, x0,
                                                           u0, bar)
            files.update(step_files)
        files["summary.json"] = json.dumps(summary, indent=1) + "\n"
        what = getattr(model, "description", "") or "the nonlinear model"
        stage_line(bar, "plots")
        files.update(result_plots(result, title=f"Under the scheduled table (T = "
                                                f"{controller.sample_time:g} s): {what}"))
        stage_line(bar, "write")
        paths = write_dir_atomic(out, files, "simulation folder")
    for note in result.notes:
        click.echo(f"warning: {note}", err=True)
    if x0 is None and u0 is None and not _looks_like_crane(model) and _nothing_moved(result):
        click.echo("warning: nothing moved: the model stayed at its start (every state 0, "
                   "every input at its trim 0) for the whole run; if that is not an "
                   "operating point of the design, give --initial-state and --trim-input",
                   err=True)
    if as_json:
        summary["paths"] = [str(p) for p in paths]
        click.echo(json.dumps(summary, indent=1))
        return
    click.echo(f"simulated {summary['duration']:g} s in {summary['samples']} samples "
               f"(T = {controller.sample_time:g} s, {controller.table.method})")
    units = summary["units"]
    for key, value in summary.items():
        if key.startswith(("max_abs", "final_error")):
            unit = units.get(key.partition(":")[2], "")
            click.echo(f"  {key:<40} {value:.4g}" + (f" {unit}" if unit else ""))
    if step is not None:
        st = summary["step"]
        where = ", ".join(f"{k}={v:g}" for k, v in st["at"].items())
        over = st["overshoot_percent"]
        unit = units.get(st["output"], "")
        click.echo(f"step {st['size']:g}{' ' + unit if unit else ''} in {st['output']} at "
                   f"{where}: overshoot "
                   f"{over['anti_windup']:.1f} % with anti-windup, {over['plain']:.1f} % "
                   f"without (step.png)")
    for p in paths:
        click.echo(f"wrote {p}")


def _nothing_moved(result) -> bool:
    """True when every state of the run stayed exactly at zero."""
    import numpy as np

    return not np.any(np.asarray(result.states))


def _step_comparison(model, table, step, substeps, x0=None, u0=None,
                     progress=None) -> tuple[dict, dict]:
    """Run the step with and without anti-windup (and without limits); summary and files."""
    import csv
    import io

    import numpy as np

    from ..simulate import anti_windup_comparison, comparison_plot, step_overshoot, step_trajectory

    measured, size, at = step
    names = tuple(v.name for v in table.variables)
    traj = step_trajectory(names, at, measured, size, duration=STEP_DURATION,
                           sample_time=table.sample_time)
    runs = anti_windup_comparison(model, table, traj, substeps=substeps, x0=x0, u0=u0,
                                  progress=progress)
    info = {"output": measured, "size": size, "at": at, "duration": STEP_DURATION,
            "overshoot_percent": {}, "final_error": {}, "peak_command": {}}
    for name, res in runs.items():
        o = step_overshoot(res, measured, size)
        info["overshoot_percent"][name] = o["overshoot_percent"]
        info["final_error"][name] = o["final_error"]
        info["peak_command"][name] = {c: float(np.max(np.abs(res.inputs[:, res.input_names.index(
            c)]))) for c in res.control_names}
    j = runs["anti_windup"].measured_names.index(measured)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    controls = runs["anti_windup"].control_names
    w.writerow(["time", f"ref:{measured}"] + [f"{run}:{measured}" for run in runs]
               + [f"{run}:{c}" for run in runs for c in controls])
    first = runs["anti_windup"]
    for k in range(first.time.size):
        row = [first.time[k], first.references[k, j]]
        row += [res.measured[k, j] for res in runs.values()]
        row += [res.inputs[k, res.input_names.index(c)] for res in runs.values() for c in controls]
        w.writerow([repr(float(v)) for v in row])
    where = ", ".join(f"{k} = {v:g}" for k, v in at.items())
    stage_line(progress, "step plot")
    png = comparison_plot(runs, measured, title=f"Step {size:g} in {measured} at {where} "
                                                "(limited command)")
    return info, {"step.csv": buf.getvalue(), "step.png": png}
