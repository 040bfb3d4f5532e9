"""``schedule demo [--out DIR]``: the whole job on the bundled crane envelope."""

from __future__ import annotations

import json

import click


@click.command("demo")
@click.option("--out", "-o", default="schedule-demo", show_default=True,
              type=click.Path(file_okay=False),
              help="Folder for the family file, report, tables and simulation.")
@click.option("--jobs", type=click.IntRange(min=1), default=2, show_default=True,
              help="Worker processes for synthesis and checks.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bars.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
def demo_command(out, jobs, quiet, as_json):
    """Design, check, export and simulate the bundled crane envelope in one go.

    The crane is an invented example. Results are design aids: validate in
    simulation and hardware tests and follow the applicable codes and licensed
    practice.
    """
    from ..demo import run_demo
    from ..progress import ProgressBar

    bar = ProgressBar(enabled=False if quiet else None)

    def stage(name: str) -> None:
        if bar.enabled:
            bar.close()
            click.echo(f"== {name}", err=True)

    try:
        outcome = run_demo(out, jobs=jobs, progress=bar, stage=stage)
    finally:
        bar.close()
    if as_json:
        click.echo(json.dumps(outcome.summary, indent=1, default=str))
    else:
        for line in outcome.lines:
            click.echo(line)
