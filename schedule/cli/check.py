"""``schedule check FAMILY``: frozen-point checks of the scheduled controller between grid points.

Exit code 0 when every check passes, 1 when some check fails, 2 for bad input.
"""

from __future__ import annotations

import json
import sys

import click

from ..errors import InputError


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
    st = result.settings
    click.echo(f"{'PASS' if result.all_passed else 'FAIL'}: {s['failed']} of {s['points']} "
               f"points fail (gamma {result.gamma:.5g}, pass at norm <= "
               f"{result.gamma * (1 + st.gamma_tolerance):.5g}; input disk margins >= "
               f"{st.gain_margin_db:g} dB / {st.phase_margin_deg:g} deg, common practice)")
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
        units = dict(zip(result.variable_names, result.units, strict=True))
        for n, a, b in zip(result.rate.names, result.rate.single, result.rate.joint,
                           strict=True):
            u = f" {units[n]}/s" if units.get(n) else ""
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
    if result.proposals is not None and len(result.proposals):
        click.echo(f"  {len(result.proposals)} new design point(s) proposed; "
                   "`schedule refine` adds them")
    for n in result.notes:
        click.echo(f"  note: {n}")


@click.command("check")
@click.argument("family_file", type=click.Path(dir_okay=False))
@click.option("--samples", type=click.IntRange(min=0), default=None,
              help="Random in-between samples. Default: design [check] samples (64).")
@click.option("--sampler", type=click.Choice(["sobol", "latin_hypercube"]), default=None,
              help="Space-filling sampler. Default: design [check] sampler (sobol).")
@click.option("--seed", type=int, default=None, help="Sampler seed. Default: design [check].")
@click.option("--points", "points_file", type=click.Path(dir_okay=False), default=None,
              help="CSV of extra check points; the header names the scheduling variables.")
@click.option("--model", default=None,
              help="module:function giving the true plant at a point (overrides the "
                   "design's source for the checks).")
@click.option("--json", "as_json", is_flag=True, help="Print the full result as JSON.")
@click.option("--report", "report_dir", type=click.Path(file_okay=False), default=None,
              help="Write plots and a summary page (Markdown and HTML) into this folder.")
@click.option("--jobs", type=click.IntRange(min=1), default=1, show_default=True,
              help="Worker processes for the batched checks and gamma_opt.")
@click.option("--cluster", default=None, help="dask scheduler address (overrides --jobs).")
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
def check_command(family_file, samples, sampler, seed, points_file, model, as_json, report_dir,
                  jobs, cluster, no_gamma_opt, strict_loo, rate_certificate, quiet):
    """Check the scheduled controller of FAMILY_FILE at frozen in-between points.

    Stability, closed-loop norm against gamma, disk and classical margins, the
    price of interpolation (gamma_opt) and a scheduling-rate bound; with
    --rate-certificate also certified rates and gain bounds. Exit code 0 when
    all checks pass (and the design's target rates are certified), 1 when some
    fail, 2 for bad input.
    """
    from ..check import CheckSettings, check_family, spec_for_family
    from ..progress import ProgressBar
    from ..store import read_family

    family = read_family(family_file)
    spec = None
    if model is not None:
        spec = spec_for_family(family, model=model)
    elif family.design_text:
        try:
            spec = spec_for_family(family)
        except InputError:
            spec = None  # check_family notes it and uses the interpolated plant
    settings = CheckSettings.from_spec(spec, samples=samples, sampler=sampler, seed=seed,
                                       points_file=points_file,
                                       gamma_opt=False if no_gamma_opt else None,
                                       loo_gates=True if strict_loo else None,
                                       rate_certificate=True if rate_certificate else None)
    bar = ProgressBar(enabled=False if (quiet or as_json) else None)
    try:
        result = check_family(family, settings, spec=spec, jobs=jobs, cluster=cluster,
                              progress=bar)
    finally:
        bar.close()
    if report_dir is not None:
        from ..interpolate import ScheduledController
        from ..report import write_report

        write_report(result, family, report_dir, ScheduledController.from_family(family))
    if as_json:
        click.echo(json.dumps(result.to_dict(), indent=1))
    else:
        print_result(result, quiet)
        if report_dir is not None and not quiet:
            click.echo(f"  report: {report_dir}/summary.md")
    rc = result.rate_certificate
    if not result.all_passed or (rc is not None and not rc.meets_targets):
        sys.exit(1)
