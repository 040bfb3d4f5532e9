"""``schedule simulate FAMILY --out DIR``: the nonlinear model under the scheduled table."""

from __future__ import annotations

import json

import click

from ..errors import InputError
from .common import design_option


def _model_entry(family) -> str | None:
    """``source.nonlinear_model`` of the family's design text (None when absent)."""
    text = family.design_text or ""
    try:
        import tomllib
    except ImportError:  # pragma: no cover - Python 3.10
        import tomli as tomllib
    try:
        source = tomllib.loads(text).get("source", {})
    except (tomllib.TOMLDecodeError, RecursionError):
        return None
    value = source.get("nonlinear_model") if isinstance(source, dict) else None
    return value if isinstance(value, str) else None


def _load_model(entry: str):
    from ..sources import nonlinear_model_from
    return nonlinear_model_from(entry, "nonlinear model")


def _trusted_entry(model_entry: str | None, design_file: str | None, family) -> str:
    """The nonlinear model the user named (--model, or --design FILE); never the family's."""
    if model_entry:
        return model_entry
    if design_file is not None:
        from ..design_file import load_design
        entry = load_design(design_file).source.nonlinear_model
        if entry is None:
            raise InputError(f"design file {design_file} names no source.nonlinear_model; add "
                             "it to [source] or pass --model module:function")
        return entry
    stored = _model_entry(family)
    if stored:
        raise InputError(f"the family's stored design names source.nonlinear_model = "
                         f"\"{stored}\"; it was not imported, because a data file never "
                         f"chooses code to run: pass --model {stored} or --design FILE")
    raise InputError("no nonlinear model to simulate: pass --model module:function or "
                     "--design FILE naming source.nonlinear_model")


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
              help="module:function returning the nonlinear model. Default: "
                   "source.nonlinear_model of the --design file.")
@design_option
@click.option("--substeps", type=click.IntRange(1, 1000), default=4, show_default=True,
              help="Runge-Kutta steps per sample interval.")
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary.")
def simulate_command(family_file, out, trajectory, table_file, sample_time, method,
                     model_entry, design_file, substeps, as_json):
    """Simulate the nonlinear model of FAMILY_FILE under its scheduled discrete controller.

    The controller sees each measured output minus its reference (the position error
    for a position) and adds its output to the trim controls; its state is carried
    across schedule changes. The model comes from --model or from the design file
    given with --design; one named only inside the family file is not imported.
    """
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
    entry = _trusted_entry(model_entry, design_file, family)
    model = _load_model(entry)
    if table_file is not None:
        controller = TableController(table_file)
    else:
        settings = export_settings(family)
        T = sample_time if sample_time is not None else (settings["sample_time"] or 0.02)
        if not T > 0:
            raise InputError(f"--sample-time {T:g} must be > 0 s for a simulation")
        table = build_table(family, sample_time=T, method=method or settings["method"],
                            prewarp=settings["prewarp"] if (method or settings["method"])
                            == "tustin" else 0.0, source_sha256=file_sha256(family_file))
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
    result = simulate(model, controller, traj, substeps=substeps)
    summary = result.summary()
    summary.update({"family": str(family_file), "model": entry,
                    "sample_time": controller.sample_time, "method": controller.table.method})
    files = {"simulation.csv": result_csv(result),
             "summary.json": json.dumps(summary, indent=1) + "\n"}
    files.update(result_plots(result, title=f"{entry} under the scheduled table "
                                            f"(T = {controller.sample_time:g} s)"))
    paths = write_dir_atomic(out, files, "simulation folder")
    if as_json:
        summary["paths"] = [str(p) for p in paths]
        click.echo(json.dumps(summary, indent=1))
        return
    click.echo(f"simulated {summary['duration']:g} s in {summary['samples']} samples "
               f"(T = {controller.sample_time:g} s, {controller.table.method})")
    for key, value in summary.items():
        if key.startswith(("max_abs", "final_error")):
            click.echo(f"  {key:<40} {value:.4g}")
    for p in paths:
        click.echo(f"wrote {p}")
