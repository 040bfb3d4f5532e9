"""``schedule check FAMILY``: frozen-point checks of the scheduled controller between grid points.

Exit code 0 when every check passes, 1 when some check fails, 2 for bad input.
"""

from __future__ import annotations

import json
import sys

import click

from ..design_file import MAX_CHECK_SAMPLES, CheckSpec
from ..errors import InputError
from .common import code_notes, design_inputs, design_option, progress_bar

_DEFAULTS = CheckSpec()  # the one list of check defaults


def _fmt(x, spec=".4g") -> str:
    x = float(x)
    if x != x:
        return "-"
    if x in (float("inf"), float("-inf")):
        return "inf" if x > 0 else "-inf"
    return format(x, spec)


def print_result(result, quiet: bool = False) -> None:
    """Human-readable summary (a few lines; the worst points unless quiet)."""
    s = result.summary()
    click.echo(f"{'PASS' if result.all_passed else 'FAIL'}: {s['failed']} of {s['points']} "
               f"points fail (gamma {result.gamma:.5g}; a point passes when "
               f"{result.criterion.describe()})")
    for k, d in s["by_kind"].items():
        click.echo(f"  {k:<16} {d['points']:>6} points  {d['failed']:>5} failed  "
                   f"max norm/gamma {_fmt(float(d['max_ratio']))}"
                   + ("" if d["gates_verdict"] else "  (evidence only)"))
    if result.weaker:
        click.echo("  WEAKER CHECK: some points use the family's interpolated plant, not the "
                   "true plant")
    if quiet:
        return
    if result.rate is not None:
        from ..types import rate_unit

        units = dict(zip(result.variable_names, result.units, strict=True))
        for n, a, b in zip(result.rate.names, result.rate.single, result.rate.joint,
                           strict=True):
            u = rate_unit(units.get(n, "")) if units.get(n) else ""
            if len(result.rate.names) == 1:  # one variable: alone and joint are the same
                click.echo(f"  rate bound: |d {n}/dt| < {_fmt(a)}{u} (sufficient, "
                           "conservative)")
                continue
            click.echo(f"  rate bound: |d {n}/dt| < {_fmt(a)}{u} alone, {_fmt(b)}{u} with all "
                       "variables moving (sufficient, conservative)")
    if result.rate_certificate is not None:
        for line in result.rate_certificate.text_lines():
            click.echo(f"  {line}")
    gates = result.gates
    order = result.worst(len(result.passed))
    failing = [i for i in order if gates[i] and not result.passed[i]][:10]
    evidence = [i for i in order if not gates[i] and not result.passed[i]][:3]
    shown = failing or [i for i in order if gates[i]][:1]
    if shown:
        click.echo("  worst points:" if failing else "  worst point (passes):")
    for i in shown + evidence:
        pt = ", ".join(f"{n}={x:.4g}" for n, x in zip(result.variable_names, result.points[i],
                                                       strict=True))
        what = result.reasons[i] or f"norm / gamma {result.values['ratio'][i]:.4g}"
        tag = "" if gates[i] else ", evidence only"
        click.echo(f"    ({pt}) [{result.kind[i]}, {result.plant_source[i]} plant{tag}] "
                   f"{what}")
    import numpy as np

    own = int(np.sum((np.asarray(result.kind) == "grid") & ~np.asarray(result.passed)
                     & np.asarray(gates)))
    proposed = 0 if result.proposals is None else len(result.proposals)
    if own:
        click.echo(f"  {own} design point(s) fail with their own controller: new points "
                   "cannot fix that (" + (f"the {proposed} proposed are for the in-between "
                                          "failures" if proposed else "none proposed")
                   + "); retune the weights (or the [check] requirements) and design again")
    elif proposed:
        click.echo(f"  {proposed} new design point(s) proposed; `schedule refine` adds them")
    for n in result.notes:
        click.echo(f"  note: {n}")


def print_table_result(tc, quiet: bool = False) -> None:
    """The table check in a few lines: verdict, the cost of each step, the worst points."""
    s = tc.summary()
    how = (f"discrete, T = {tc.sample_time:g} s ({tc.method}), plant by zero-order hold"
           if tc.discrete else "continuous")
    click.echo(f"TABLE {'PASS' if tc.all_passed else 'FAIL'}: {s['failed']} of {s['points']} "
               f"points fail ({tc.source or 'table'}: {' x '.join(map(str, tc.shape))} nodes, "
               f"{how})")
    cost = tc.cost()
    loops = [k for k in ("interpolant", "interpolant_discrete", "table_continuous", "table")
             if k in cost]
    heads = [cost[k]["loop"] for k in loops]
    click.echo(f"  {'':<28}" + " | ".join(heads))
    for key, label, spec in (("max_ratio", "worst norm/gamma", ".4g"),
                             ("min_input_gain_db", "min input disk gain [dB]", ".3g"),
                             ("min_input_phase_deg", "min input disk phase [deg]", ".3g"),
                             ("failed", "failing points", "")):
        vals = " | ".join(format(_fmt(_num(cost[k][key]), spec) if spec else str(cost[k][key]),
                                 f">{len(h)}") for k, h in zip(loops, heads, strict=True))
        click.echo(f"  {label:<28}{vals}")
    if tc.weaker:
        click.echo("  WEAKER CHECK: the table is closed with the family's interpolated plant")
    if quiet:
        return
    fails = [i for i in tc.worst(len(tc.passed)) if not tc.passed[i]][:10]
    if fails:
        click.echo("  worst table points:")
    for i in fails:
        pt = ", ".join(f"{n}={x:.4g}" for n, x in zip(tc.variable_names, tc.points[i],
                                                       strict=True))
        why = ("the family's interpolant passes there: more breakpoints fix it"
               if tc.compared_passed[tc.reference][i] else tc.why_unfixable(i))
        click.echo(f"    ({pt}) [{tc.kind[i]}] {tc.reasons[i]} ({why})")
    click.echo(f"  table check: {tc.seconds:.2f} s")
    for n in tc.notes:
        click.echo(f"  note: {n}")


def _num(x) -> float:
    return float("nan") if x is None else float(x)


@click.command("check")
@click.argument("family_file", type=click.Path(dir_okay=False))
@click.option("--samples", type=click.IntRange(min=0, max=MAX_CHECK_SAMPLES), default=None,
              help="Random in-between samples. Default: design [check] samples "
                   f"({_DEFAULTS.samples}).")
@click.option("--sampler", type=click.Choice(["sobol", "latin_hypercube"]), default=None,
              help="Space-filling sampler. Default: design [check] sampler "
                   f"({_DEFAULTS.sampler}).")
@click.option("--seed", type=int, default=None,
              help=f"Sampler seed. Default: design [check] seed ({_DEFAULTS.seed}).")
@click.option("--points", "points_file", type=click.Path(dir_okay=False), default=None,
              help="CSV of extra check points; the header names the scheduling variables.")
@click.option("--model", default=None,
              help="module:function giving the true plant at a point (overrides the "
                   "design's source for the checks).")
@design_option
@click.option("--table", "table_file", type=click.Path(), default=None,
              help="Also check this exported table as it runs (CSV, JSON, HDF5, the C source "
                   "(.c, .h or their folder) or an FMU): its lookup at every in-between "
                   "point, the loop discretized for a discrete table, side by side with the "
                   "family.")
@click.option("--json", "as_json", is_flag=True, help="Print the full result as JSON.")
@click.option("--report", "report_dir", type=click.Path(file_okay=False), default=None,
              help="Write plots and a summary page (Markdown and HTML) into this folder.")
@click.option("--jobs", type=click.IntRange(min=1), default=1, show_default=True,
              help="Worker processes for the batched checks and gamma_opt.")
@click.option("--cluster", default=None, metavar="ADDRESS",
              help="dask scheduler address (overrides --jobs).")
@click.option("--no-gamma-opt", is_flag=True,
              help="Skip the optimal gamma at each check point (faster).")
@click.option("--strict-leave-one-out", "strict_loo", is_flag=True,
              help="Let failing leave-one-out predictions fail the check even when the "
                   "in-between points use the true plant (by default they are evidence only).")
@click.option("--rate-certificate", "rate_certificate", is_flag=True,
              help="Also certify scheduling rates and gain bounds with a parameter-dependent "
                   "Lyapunov function (LMIs; configured by the design's [rate_certificate] "
                   "table; takes minutes on a big family).")
@click.option("--quiet", "-q", is_flag=True, help="Print only the verdict lines.")
def check_command(family_file, samples, sampler, seed, points_file, model, design_file,
                  table_file, as_json, report_dir, jobs, cluster, no_gamma_opt, strict_loo,
                  rate_certificate, quiet):
    """Check the scheduled controller of FAMILY_FILE at frozen in-between points.

    Stability, closed-loop norm against gamma, disk and classical margins, the
    price of interpolation (gamma_opt) and a scheduling-rate bound; with
    --rate-certificate also certified rates and gain bounds. Exit code 0 when
    all checks pass (and the design's target rates are certified), 1 when some
    fail, 2 for bad input.

    The true plant at the in-between points comes from --model, or from the
    model named in the design file given with --design. A model named only in
    the family file is not imported (the file is data); the checks then use the
    family's interpolated plant and say so (a weaker check).

    With --table the exported table is checked too, as the target runs it: the
    table's multilinear lookup and, for a discrete table, the plant discretized by
    zero-order hold at the table's sample time (exit code 1 when either fails).
    """
    bar = progress_bar(quiet, "read inputs")  # before the imports, which take a moment
    from ..check import CheckSettings, check_family, spec_for_family
    from ..paths import refuse_output_over_input
    from ..store import read_family

    refuse_output_over_input([], [family_file, points_file, design_file, table_file],
                             folders=[report_dir])
    family = read_family(family_file)
    table = None
    if table_file is not None:
        from ..export.runtime import read_table

        table = read_table(table_file)
    spec = None
    if model is not None or design_file is not None:
        spec = spec_for_family(family, model=model, design=design_file)
    elif family.design_text:
        try:
            spec = spec_for_family(family)
        except InputError:
            spec = None  # check_family notes it and uses the interpolated plant
    refuse_output_over_input([], design_inputs(spec), folders=[report_dir])
    settings = CheckSettings.from_spec(spec, samples=samples, sampler=sampler, seed=seed,
                                       points_file=points_file,
                                       gamma_opt=False if no_gamma_opt else None,
                                       loo_gates=True if strict_loo else None,
                                       rate_certificate=True if rate_certificate else None)
    with bar:
        result = check_family(family, settings, spec=spec, jobs=jobs, cluster=cluster,
                              progress=bar)
        table_result = None
        if table is not None:
            from ..analysis.table_check import check_table

            table_result = check_table(family, table, settings, spec=spec, jobs=jobs,
                                       cluster=cluster, progress=bar, source=str(table_file))
            _note_source(table_result, table, family_file)
        result.notes[:0] = code_notes(family, spec, design_file)
        if report_dir is not None:
            from ..interpolate import ScheduledController
            from ..report import write_report

            write_report(result, family, report_dir, ScheduledController.from_family(family),
                         table_check=table_result, progress=bar)
    if as_json:
        out = result.to_dict()
        if table_result is not None:
            out["table"] = table_result.to_dict()
        click.echo(json.dumps(out, indent=1))
    else:
        print_result(result, quiet)
        if table_result is not None:
            print_table_result(table_result, quiet)
        if report_dir is not None and not quiet:
            click.echo(f"  report: {report_dir}/summary.md")
    rc = result.rate_certificate
    if not result.all_passed or (table_result is not None and not table_result.all_passed) \
            or (rc is not None and not rc.meets_targets):
        sys.exit(1)


def _note_source(table_result, table, family_file) -> None:
    """A note when the table records another source family than ``family_file``."""
    if not table.source_sha256:
        return
    from ..export import file_sha256

    if table.source_sha256 != file_sha256(family_file):
        table_result.notes.append(f"the table records source family SHA-256 "
                                  f"{table.source_sha256[:12]}..., not that of {family_file}")
