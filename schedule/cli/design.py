"""``schedule design SPEC.toml --out family.h5``: synthesize the controller family."""

from __future__ import annotations

import json
import sys

import click
import numpy as np

from ..errors import InputError
from ..family import CHUNK_SIZE, CONFIRM_MEMORY_FRACTION, CONFIRM_SECONDS
from ..types import point_text
from .common import design_inputs, progress_bar


def _summary(run, out: str) -> dict:
    f = run.family
    ok = f.ok
    names = f.variable_names
    opt = np.asarray(f.gamma_opt, dtype=float)
    finite = np.isfinite(opt)
    info: dict = {
        "out": out, "points": int(len(f.points)), "ok": int(ok.sum()),
        "failed": int((~ok).sum()), "gamma": float(f.gamma),
        "computed": {"plants": run.computed_plants, "gamma_opt": run.computed_gamma,
                     "controllers": run.computed_controllers},
        "resumed": {"plants": run.resumed_plants, "gamma_opt": run.resumed_gamma,
                    "controllers": run.resumed_controllers},
        "seconds": round(run.seconds, 3),
        "stage_seconds": {k: round(v, 3) for k, v in run.stage_seconds.items()},
        "interpolant": None if f.interpolant is None else dict(f.interpolant.get("attrs", {})),
        "interpolant_error": run.interpolant_error or None,
        "notes": list(run.notes),
        "failures": [{"index": int(i), "point": dict(zip(names, map(float, f.points[i]),
                                                          strict=True)),
                      "reason": f.reasons[i]} for i in np.flatnonzero(~ok)],
    }
    if finite.any():
        lo, hi = int(np.nanargmin(opt)), int(np.nanargmax(opt))
        info["gamma_opt_min"] = {"value": float(opt[lo]), "index": lo,
                                 "point": dict(zip(names, map(float, f.points[lo]), strict=True))}
        info["gamma_opt_max"] = {"value": float(opt[hi]), "index": hi,
                                 "point": dict(zip(names, map(float, f.points[hi]), strict=True))}
    return info


def _print_table(info: dict) -> None:
    rows = [("family file", info["out"]),
            ("points", f"{info['points']} ({info['ok']} ok, {info['failed']} failed)")]
    if info.get("estimate"):
        rows.append(("estimate", f"{info['estimate']['seconds']:.1f} s (timed on "
                                 f"{info['estimate']['sample']} points before the run)"))
    if "gamma_opt_min" in info:
        lo, hi = info["gamma_opt_min"], info["gamma_opt_max"]
        rows.append(("gamma_opt min", f"{lo['value']:.5g} at {point_text(lo['point'])}"))
        rows.append(("gamma_opt max", f"{hi['value']:.5g} at {point_text(hi['point'])}"))
    rows.append(("common gamma", f"{info['gamma']:.5g}"))
    stages = ", ".join(f"{k} {v:.1f} s" for k, v in info["stage_seconds"].items())
    rows.append(("computed", f"{info['computed']['plants']} plants, "
                             f"{info['computed']['gamma_opt']} gamma_opt, "
                             f"{info['computed']['controllers']} controllers in "
                             f"{info['seconds']:.1f} s ({stages})"))
    if any(info["resumed"].values()):
        rows.append(("resumed", f"{info['resumed']['plants']} plants, "
                                f"{info['resumed']['gamma_opt']} gamma_opt, "
                                f"{info['resumed']['controllers']} controllers"))
    if info["interpolant"]:
        attrs = info["interpolant"]
        rows.append(("interpolant", f"{attrs.get('form', '?')} form, {attrs.get('kind', '?')} "
                                    "(chosen by leave-one-out evidence unless the design "
                                    "names one)"))
    elif info["interpolant_error"]:
        rows.append(("interpolant", f"not fitted: {info['interpolant_error']}"))
    width = max(len(r[0]) for r in rows)
    for key, value in rows:
        click.echo(f"{key:<{width}}  {value}")
    for note in info["notes"]:
        click.echo(f"note: {note}")
    if info["failures"]:
        click.echo("failed points:")
        for item in info["failures"]:
            click.echo(f"  [{item['index']}] {point_text(item['point'])}: {item['reason']}")


@click.command("design")
@click.argument("spec", type=click.Path(dir_okay=False))
@click.option("--out", "-o", required=True, type=click.Path(dir_okay=False),
              help="Family file to write (HDF5), replaced atomically at the end.")
@click.option("--jobs", "-j", default=1, show_default=True, type=click.IntRange(min=1),
              help="Worker processes on this machine.")
@click.option("--cluster", default=None, metavar="ADDRESS",
              help="dask.distributed scheduler address (needs the 'cluster' extra).")
@click.option("--resume", is_flag=True,
              help="Continue an interrupted run from its <out stem>.partial.h5 file.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar and no summary table.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON on stdout.")
@click.option("--no-fit", is_flag=True,
              help="Store the controllers only; fit the interpolant later.")
@click.option("--chunk-size", default=CHUNK_SIZE, type=click.IntRange(min=1), hidden=True,
              help="Points per work chunk (results are reproducible for a given size).")
@click.option("--yes", "-y", is_flag=True,
              help=f"Start without asking when the estimate before a large run exceeds "
                   f"{CONFIRM_SECONDS / 60:g} minutes or {CONFIRM_MEMORY_FRACTION:.0%} of the "
                   "available memory.")
def design_command(spec: str, out: str, jobs: int, cluster: str | None, resume: bool,
                   quiet: bool, as_json: bool, no_fit: bool, chunk_size: int,
                   yes: bool) -> None:
    """Synthesize H-infinity controllers over the envelope of SPEC at one common gamma.

    Computes the optimal gamma at every operating point, the common gamma of
    the design file's policy, the central controller at every point, fits the
    interpolant and writes the family file. Before a run of 256 points or more the
    time and memory are estimated from a small timed sample; above the limits of
    --yes the run starts only with --yes (or after a yes at the terminal).
    """
    bar = progress_bar(quiet, "read design")  # before the imports, which take a moment
    from ..design_file import load_design
    from ..family import partial_path, run_design
    from ..parallel import prestart
    from ..paths import refuse_output_over_input

    refuse_output_over_input([out, partial_path(out)], [spec])
    try:
        design = load_design(spec)
    except FileNotFoundError:
        raise InputError(f"design file {spec} does not exist; check the path") from None
    refuse_output_over_input([out, partial_path(out)], design_inputs(design))
    prestart(jobs, cluster)  # a bad --cluster fails here, before any work
    try:
        estimate = None if resume else _estimate(design, jobs, cluster, not no_fit, yes,
                                                 as_json, quiet, bar)
        run = run_design(design, out, jobs=jobs, cluster=cluster, resume=resume, progress=bar,
                         fit=not no_fit, chunk_size=chunk_size)
    finally:
        bar.close()
    info = _summary(run, out)
    if estimate is not None:
        info["estimate"] = estimate.to_dict()
    if as_json:
        click.echo(json.dumps(info, indent=2))
    elif not quiet:
        _print_table(info)


ESTIMATE_MIN_POINTS = 2 * CHUNK_SIZE  # smaller runs start at once (see the docstring)


def _estimate(design, jobs: int, cluster, fit: bool, yes: bool, as_json: bool, quiet: bool,
              bar=None):
    """The estimate of a large run; asks (or refuses) when it is above the thresholds."""
    from ..family import envelope_size, estimate_design
    from ..progress import stage_line

    if envelope_size(design) < ESTIMATE_MIN_POINTS:
        return None
    stage_line(bar, "estimate")
    est = estimate_design(design, jobs=jobs, cluster=cluster, fit=fit)
    if bar is not None:
        bar.close()  # before a question or a refusal
    why = est.needs_confirmation()
    if not why or yes:
        return est
    message = f"the run is estimated at {est.text()}: {why}"
    if as_json:
        click.echo(json.dumps({"estimate": est.to_dict(), "started": False,
                               "reason": why}, indent=2))
    elif not quiet and sys.stdin.isatty() and sys.stderr.isatty():
        if click.confirm(f"{message}. Start it?", default=False, err=True):
            return est
        raise InputError("run not started; pass --yes to start it without asking")
    raise InputError(f"{message}; pass --yes to start it")
