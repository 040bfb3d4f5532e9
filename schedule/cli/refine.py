"""``schedule refine FAMILY --out REFINED --budget N``: add design points where checks fail."""

from __future__ import annotations

import json
import sys

import click
import numpy as np

from ..design_file import MAX_CHECK_SAMPLES
from ..errors import InputError
from ..sources import ignored_code_note
from .common import design_inputs, design_option, progress_bar


@click.command("refine")
@click.argument("family_file", type=click.Path(dir_okay=False))
@click.option("--out", "-o", required=True, type=click.Path(dir_okay=False),
              help="Refined family file to write (atomically).")
@click.option("--budget", type=click.IntRange(min=0), default=8, show_default=True,
              help="Maximum number of new design points over all rounds.")
@click.option("--samples", type=click.IntRange(min=0, max=MAX_CHECK_SAMPLES), default=None,
              help="Random in-between samples per check. Default: design [check].")
@click.option("--model", default=None,
              help="module:function for the plant at new points (overrides the design).")
@design_option
@click.option("--jobs", type=click.IntRange(min=1), default=1, show_default=True,
              help="Worker processes.")
@click.option("--cluster", default=None, metavar="ADDRESS",
              help="dask scheduler address (overrides --jobs).")
@click.option("--json", "as_json", is_flag=True, help="Print a machine-readable summary.")
@click.option("--strict-leave-one-out", "strict_loo", is_flag=True,
              help="Let failing leave-one-out predictions fail the check even when the "
                   "in-between points use the true plant (by default they are evidence only).")
@click.option("--quiet", "-q", is_flag=True, help="Print only the final verdict.")
def refine_command(family_file, out, budget, samples, model, design_file, jobs, cluster,
                   strict_loo, as_json, quiet):
    """Refine FAMILY_FILE: synthesize new points where frozen-point checks fail, refit, recheck.

    A rectangular family gains whole breakpoints (it stays rectangular, keeps its
    interpolant kind and the checks of its cell centres and edge midpoints); a
    scattered one gains the proposed points. The points added are printed. A
    refined family whose check is worse than its input's is not written (exit
    code 1, with the comparison).

    The plant at new points comes from --model, or from the model named in the
    design file given with --design; a model named only inside the family file
    is not imported (the file is data). Exit code 0 when the refined family
    passes every check, 1 when checks still fail (budget spent or nothing left
    to add) or the refined family would be worse, 2 for bad input.
    """
    bar = progress_bar(quiet, "read inputs")  # before the imports, which take a moment
    from ..check import CheckSettings, spec_for_family
    from ..paths import refuse_output_over_input
    from ..progress import stage_line
    from ..refine import refine_family
    from ..store import read_family, write_family

    refuse_output_over_input([out], [family_file, design_file])
    family = read_family(family_file)
    spec = spec_for_family(family, model=model, design=design_file)
    refuse_output_over_input([out], design_inputs(spec))
    if spec is not None and spec.source.model is None and spec.source.model_file is None:
        note = ignored_code_note(spec)
        if note:
            raise InputError(f"refinement needs the plant model at new points: {note}")
    settings = CheckSettings.from_spec(spec, samples=samples, gamma_opt=False,
                                       loo_gates=True if strict_loo else None)
    with bar:
        outcome = refine_family(family, spec, budget, settings, jobs=jobs, cluster=cluster,
                                progress=bar)
        written = not outcome.worse
        if written:
            stage_line(bar, "write")
            write_family(out, outcome.family)
    last = outcome.rounds[-1]
    names = last.variable_names
    if as_json:
        click.echo(json.dumps({
            "passed": outcome.passed, "stopped": outcome.stopped, "written": written,
            "rounds": [r.summary() for r in outcome.rounds],
            "added": [dict(zip(names, map(float, r), strict=True)) for r in outcome.added],
            "added_breakpoints": outcome.added_breakpoints,
            "rectangular": outcome.family.breakpoints is not None,
            "comparison": outcome.comparison.to_dict(),
            "out": str(out) if written else None}, indent=1))
    else:
        if not quiet:
            for i, r in enumerate(outcome.rounds):
                s = r.summary()
                click.echo(f"round {i}: {s['failed']} of {s['points']} points fail "
                           f"(design points {int(np.sum(r.kind == 'grid'))})")
            click.echo(f"added {len(outcome.added)} point(s); stopped: {outcome.stopped}")
            for n, values in outcome.added_breakpoints.items():
                click.echo(f"  new breakpoints of {n}: " + ", ".join(f"{x:.6g}" for x in values))
            for r in outcome.added[:50]:
                click.echo("  added (" + ", ".join(f"{n}={x:.6g}" for n, x in
                                                   zip(names, r, strict=True)) + ")")
            if len(outcome.added) > 50:
                click.echo(f"  ... and {len(outcome.added) - 50} more (--json lists all)")
            if outcome.family.breakpoints is not None:
                shape = " x ".join(str(len(b)) for b in outcome.family.breakpoints)
                click.echo(f"  the family stays rectangular: {shape} breakpoints")
        if not quiet or not written:
            click.echo("comparison with the input family:")
            for line in outcome.comparison.lines(names):
                click.echo(line)
        if written and outcome.passed:
            click.echo(f"PASS: refined family written to {out}")
        elif written:
            click.echo(f"FAIL: checks still fail ({outcome.stopped}); the refined family, no "
                       f"worse than its input, is written to {out}: refine it again or raise "
                       "--budget")
        else:
            click.echo(f"FAIL: the refined family is worse than {family_file}; nothing "
                       "written")
    if not outcome.passed or not written:
        sys.exit(1)
