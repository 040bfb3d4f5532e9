"""``schedule export FAMILY --format csv|json|hdf5|c|fmu --out PATH``: write a scheduled table.

The table is checked as it runs before anything is written
(:func:`schedule.export.checked.build_checked_table`): breakpoints are added where it
fails and the family's interpolant passes; a table that still fails is not written
(exit code 1). ``--no-table-check`` writes the table unchecked.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import click

from ..errors import InputError
from ..table_files import DEFAULT_PREFIX, FORMATS, folder_target, format_of_suffix, listing
from .common import code_notes, design_inputs, design_option, progress_bar


def export_settings(family) -> dict:
    """The [export] settings of the family's design text (defaults when absent).

    Parsed with :func:`schedule.design_file.parse_design`; if the full design no longer
    parses on this machine (for example its operating-point file is elsewhere), only the
    [export] and [[limits]] tables are read. ``limits`` maps a control to
    ``(lower, upper, rate)`` (the design's actuator limits).
    """
    defaults = {"sample_time": 0.0, "method": "tustin", "prewarp": 0.0, "formats": None,
                "limits": {}}
    text = family.design_text or ""
    if not text.strip():
        return defaults
    base = family.design_base_dir or "."
    try:
        from ..design_file import parse_design
        spec = parse_design(text, base, name="family design text")
        ex = spec.export
        return {"sample_time": float(ex.sample_time), "method": str(ex.method),
                "prewarp": float(ex.prewarp), "formats": tuple(ex.formats),
                "limits": {s.control: (s.lower, s.upper, s.rate) for s in spec.limits}}
    except (ImportError, ValueError):
        pass
    try:
        import tomllib
    except ImportError:  # pragma: no cover - Python 3.10
        import tomli as tomllib
    try:
        t = tomllib.loads(text).get("export", {})
    except tomllib.TOMLDecodeError:
        return defaults
    out = dict(defaults)
    for key in ("sample_time", "prewarp"):
        if isinstance(t.get(key), (int, float)):
            out[key] = float(t[key])
    if isinstance(t.get("method"), str):
        out["method"] = t["method"]
    if isinstance(t.get("formats"), list):
        out["formats"] = tuple(str(f) for f in t["formats"])
    out["limits"] = _raw_limits(tomllib.loads(text).get("limits", []))
    return out


def _raw_limits(items) -> dict:
    """``[[limits]]`` read without the rest of the design (checked later by the table)."""
    import math

    out = {}
    for item in items if isinstance(items, list) else [items]:
        if not isinstance(item, dict) or not isinstance(item.get("control"), str):
            raise InputError("the family's design text has a malformed [[limits]] entry; fix "
                             "the design file and design again")
        try:
            out[item["control"]] = tuple(float(item.get(k, default)) for k, default in
                                         (("lower", -math.inf), ("upper", math.inf),
                                          ("rate", math.inf)))
        except (TypeError, ValueError):
            raise InputError(f"[[limits]] of {item['control']!r} in the family's design text "
                             "are not numbers; fix the design file and design again") from None
    return out


def _refuse_overwrite(family_file, formats, out, breakpoints, others=()) -> None:
    """No table may replace the family file, a breakpoints file or another input (the
    design file and what it reads; see docs/tables.md)."""
    from ..paths import refuse_output_over_input

    inputs = [family_file, *others]
    if breakpoints and os.path.isfile(breakpoints):
        inputs.append(breakpoints)
    out = Path(out)
    if len(formats) == 1:
        files, folders = ([], [out]) if formats[0] == "c" else ([out], [])
    else:
        files = [folder_target(out, f) for f in formats if f != "c"]
        folders = [folder_target(out, "c")] if "c" in formats else []
    refuse_output_over_input(files, inputs, folders=folders)


@click.command("export")
@click.argument("family_file", type=click.Path(dir_okay=False))
@click.option("--format", "-f", "formats", multiple=True,
              type=click.Choice(FORMATS),
              help="Table format; repeat for several (then --out is a folder). fmu: an FMI "
                   "2.0 co-simulation unit. Default: the design file's [export] formats.")
@click.option("--out", "-o", required=True, type=click.Path(),
              help="Output file (csv/json/hdf5; fmu: NAME.fmu, NAME a C identifier), folder "
                   "(c: <prefix>_table.h and .c), or, for several formats, a folder receiving "
                   f"{listing()}.")
@click.option("--sample-time", type=float, default=None,
              help="Sample time in s; 0 = continuous table. Default: design [export].")
@click.option("--method", type=click.Choice(["tustin", "zoh"]), default=None,
              help="Discretization: Tustin (bilinear) or zero-order hold. Default: design "
                   "[export], else tustin.")
@click.option("--prewarp", type=float, default=None,
              help="Tustin pre-warp frequency in rad/s (0 = none). Default: design [export].")
@click.option("--breakpoints", "breakpoints", default=None,
              help='Table breakpoints, e.g. "rope_length=3:30:28,payload_mass=2000,5000,20000" '
                   "(start:stop:count or a list; unnamed variables keep the design grid), or "
                   "a file in that syntax.")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True,
              help="Prefix of all C names (format c).")
@click.option("--no-binary", is_flag=True,
              help="Format fmu: write a source-only unit (no host build).")
@click.option("--no-table-check", "no_check", is_flag=True,
              help="Write the table without checking it (by default it is checked as it runs "
                   "and breakpoints are added where it fails; a failing table is not written).")
@click.option("--model", default=None,
              help="module:function giving the true plant for the table check (overrides the "
                   "design's source).")
@design_option
@click.option("--jobs", type=click.IntRange(min=1), default=1, show_default=True,
              help="Worker processes for the table check.")
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary.")
def export_command(family_file, formats, out, sample_time, method, prewarp, breakpoints,
                   prefix, no_binary, no_check, model, design_file, jobs, as_json):
    """Export the scheduled controller table of FAMILY_FILE (docs/tables.md in the source).

    Actuator limits ([[limits]] of the design file) and the anti-windup gain go into
    every format.

    The table is checked first as the target runs it (its multilinear lookup at every
    in-between point; a discrete table in the loop with the plant discretized by
    zero-order hold), with the design's [check] thresholds. Where it fails and the
    family's interpolant passes, breakpoints are added (new nodes take the
    interpolant's value) until it passes; a table that still fails is not written
    (exit code 1, the worst point named). The true plant comes from --model or the
    model of the design file given with --design; otherwise the family's interpolated
    plant (a weaker check).
    """
    bar = progress_bar(False, "read inputs")  # before the imports, which take a moment
    from ..export import file_sha256
    from ..export.c_source import check_prefix
    from ..export.fmu import model_identifier
    from ..store import read_family

    if no_check and (model is not None or design_file is not None):
        raise InputError("--model and --design choose the plant of the table check; drop them "
                         "or drop --no-table-check")
    family = read_family(family_file)
    settings = export_settings(family)
    if not formats:
        formats = settings["formats"] or ("json",)
    formats = tuple(dict.fromkeys(formats))
    sample_time = settings["sample_time"] if sample_time is None else sample_time
    if method is not None and sample_time == 0:
        raise InputError(f"--method {method} discretizes, but the sample time is 0 (a "
                         "continuous table); give --sample-time > 0 s or drop --method")
    method = method or settings["method"]
    prewarp = (settings["prewarp"] if method == "tustin" else 0.0) if prewarp is None \
        else prewarp
    if sample_time < 0 or sample_time != sample_time:
        raise InputError(f"--sample-time {sample_time:g} must be > 0 s (or 0 for a continuous "
                         "table)")
    if "c" in formats:
        check_prefix(prefix)
    spec = None
    if not no_check:
        spec = _check_spec(family, model, design_file)
    _refuse_overwrite(family_file, formats, out, breakpoints,
                      [design_file, *design_inputs(spec)])
    for fmt in ("c", "fmu"):
        if fmt in formats and sample_time == 0:
            raise InputError(f"format {fmt} needs a discrete table; give --sample-time "
                             "(seconds)")
    if formats == ("fmu",):
        model_identifier(out)
    if len(formats) == 1:
        named = format_of_suffix(out)
        if named is not None and named != formats[0]:
            raise InputError(f"--out {out} names a {named} file but the format is "
                             f"{formats[0]}; give --out with a matching suffix or -f {named}")
    build = {"breakpoints": breakpoints, "sample_time": sample_time, "method": method,
             "prewarp": prewarp, "source_sha256": file_sha256(family_file),
             "limits": settings["limits"]}
    with bar:
        checked, table, written, notes = _build_and_write(
            family, build, spec, no_check, jobs, bar, formats, out, prefix, no_binary)
    if checked is not None:
        checked.check.notes[:0] = code_notes(family, spec, design_file)
    if table is None:
        _print_check(checked, as_json, failed=True)
        sys.exit(1)
    info = {"family": str(family_file), "formats": list(formats),
            "paths": [str(p) for p in written], "nodes": int(table.A.shape[0]),
            "shape": dict(zip([v.name for v in table.variables], table.shape, strict=True)),
            "inside": int(table.inside.sum()), "sample_time": table.sample_time,
            "method": table.method, "prewarp": table.prewarp, "gamma": table.gamma,
            "states": table.n_states, "inputs": list(table.measured_names),
            "outputs": list(table.control_names), "source_sha256": table.source_sha256,
            "limits": table.actuator_limits.to_metadata(table.control_names),
            "anti_windup": table.anti_windup, "notes": notes
            + [table.extra[k] for k in ("anti_windup_note",) if table.extra.get(k)],
            "warnings": [table.extra[k] for k in ("sample_time_note",) if table.extra.get(k)]}
    if checked is not None:
        info["table_check"] = checked.to_dict()
    for warning in info["warnings"]:
        click.echo(f"warning: {warning}", err=True)
    if as_json:
        click.echo(json.dumps(info, indent=1))
        return
    shape = " x ".join(f"{n} {k}" for k, n in info["shape"].items())
    timing = "continuous time" if not table.discrete else \
        f"T = {table.sample_time:g} s, {table.method}" + \
        (f", pre-warp {table.prewarp:g} rad/s" if table.prewarp else "")
    click.echo(f"table: {info['nodes']} nodes ({shape}), {timing}, {table.n_states} states, "
               f"gamma {table.gamma:.5g}")
    if info["inside"] < info["nodes"]:
        click.echo(f"note: {info['nodes'] - info['inside']} nodes lie outside the design "
                   "points' hull (inside = 0); they hold the nearest inside controller")
    for item, unit in zip(info["limits"], table.control_units or ("",) * table.n_outputs,
                          strict=False):
        if any(item[k] is not None for k in ("lower", "upper", "rate")):
            u = f" {unit}" if unit else ""
            rate = "none" if item["rate"] is None else f"{item['rate']:g}{u} per s"
            click.echo(f"limits: {item['name']} from {_limit(item['lower'])} to "
                       f"{_limit(item['upper'])}{u}, rate {rate}"
                       + (" (anti-windup)" if table.anti_windup else ""))
    for note in info["notes"]:
        click.echo(f"note: {note}")
    if checked is not None:
        _print_check(checked, False, failed=False)
    else:
        click.echo("table check: skipped (--no-table-check)")
    for p in written:
        click.echo(f"wrote {p}")

def _build_and_write(family, build, spec, no_check, jobs, bar, formats, out, prefix, no_binary):
    """Build (and check) the table, then write it: ``(checked, table, written, notes)``;
    ``table`` is None when the table fails its check (nothing written)."""
    from ..export import build_table, write_fmu, write_table
    from ..progress import stage_line

    checked = None
    if no_check:
        stage_line(bar, "build table")
        table = build_table(family, **build)
    else:
        from ..check import CheckSettings
        from ..export.checked import build_checked_table

        try:
            checked = build_checked_table(family, **build, settings=CheckSettings.from_spec(spec),
                                          spec=spec, jobs=jobs, progress=bar)
        except InputError as exc:
            raise InputError(f"the table check could not run: {exc}; or write the table "
                             "unchecked with --no-table-check") from None
        table = checked.table
        if not checked.passed:
            return checked, None, [], []
    out = Path(out)
    written = []
    notes = []

    def write(fmt: str, target: Path) -> list[Path]:
        stage_line(bar, f"write {fmt}")
        if fmt != "fmu":
            return write_table(table, fmt, target, prefix=prefix)
        outcome = write_fmu(target, table, binary=not no_binary)
        if outcome.note:
            notes.append(outcome.note)
        else:
            notes.append(f"FMU binary for {outcome.platform} built in "
                         f"{outcome.build_seconds:.2f} s")
        return [outcome.path]

    if len(formats) == 1:
        written += write(formats[0], out)
    else:
        if out.exists() and not out.is_dir():
            raise InputError(f"--out {out} is a file; several formats need a folder")
        if not out.exists():
            if not out.parent.is_dir() and str(out.parent):
                raise InputError(f"cannot write folder {out}: folder {out.parent} does not "
                                 "exist; create it or choose another --out")
            try:
                os.mkdir(out)
            except OSError as exc:
                raise InputError(f"cannot create folder {out}: {exc.strerror}; choose another "
                                 "--out") from None
        for fmt in formats:
            written += write(fmt, folder_target(out, fmt))
    return checked, table, written, notes



def _check_spec(family, model, design_file):
    """The design behind the table check's plant (None: the interpolated plant)."""
    from ..check import spec_for_family

    if model is not None or design_file is not None:
        return spec_for_family(family, model=model, design=design_file)
    if family.design_text:
        try:
            return spec_for_family(family)
        except InputError:
            return None
    return None


def _print_check(checked, as_json: bool, failed: bool) -> None:
    """The table check's verdict, what it cost, the breakpoints added, the worst point."""
    tc = checked.check
    s = tc.summary()
    if as_json:
        if failed:
            click.echo(json.dumps({"written": False, "table_check": checked.to_dict()},
                                  indent=1))
        return
    how = (f"discrete loop, T = {tc.sample_time:g} s, plant by zero-order hold"
           if tc.discrete else "continuous loop")
    plant = "interpolated plant (weaker)" if tc.weaker else "true plant"
    click.echo(f"table check: {'FAIL' if failed else 'PASS'}, {s['failed']} of {s['points']} "
               f"points fail ({how}, {plant}; {tc.criterion.describe()})")
    cost = tc.cost()
    a, b = cost["interpolant"], cost["table"]
    click.echo(f"  worst norm/gamma {_n(b['max_ratio'])} (interpolant {_n(a['max_ratio'])}); "
               f"min input disk margins {_n(b['min_input_gain_db'], '.3g')} dB / "
               f"{_n(b['min_input_phase_deg'], '.3g')} deg (interpolant "
               f"{_n(a['min_input_gain_db'], '.3g')} dB / {_n(a['min_input_phase_deg'], '.3g')}"
               f" deg); {tc.seconds:.2f} s per check, {len(checked.rounds)} check(s)")
    for name, values in checked.added.items():
        click.echo(f"  added {len(values)} breakpoint(s) for {name}: "
                   + ", ".join(f"{x:.6g}" for x in values))
    if checked.added:
        shape = " x ".join(str(n) for n in checked.rounds[-1]["shape"].values())
        click.echo(f"  table grown to {shape} nodes")
    for n in tc.notes:
        click.echo(f"  note: {n}")
    if failed:
        click.echo(f"  stopped: {checked.stopped}")
        click.echo(f"  worst point: {checked.worst_point()}")
        click.echo("FAIL: nothing written (to write this table unchecked, add "
                   "--no-table-check)")


def _n(x, spec: str = ".4g") -> str:
    if x is None:
        return "-"
    x = float(x)
    return format(x, spec) if x == x and abs(x) != float("inf") else str(x)


def _limit(value) -> str:
    return "none" if value is None else f"{value:g}"
