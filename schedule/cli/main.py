"""The ``schedule`` command group. Thin: each verb lives in its own module.

Any :class:`schedule.errors.ScheduleError` becomes ``error: <message>`` on
stderr and exit code 2, never a traceback; so does an option-parser error
(unknown option, bad value, missing argument), in one line naming the help
to read.
"""

from __future__ import annotations

import importlib
import sys

import click

from .. import __version__
from ..errors import ScheduleError

# (module under schedule.cli, attribute holding the click command)
_VERBS = [
    ("design", "design_command"),
    ("inspect", "inspect_command"),
    ("check", "check_command"),
    ("refine", "refine_command"),
    ("export", "export_command"),
    ("simulate", "simulate_command"),
    ("demo", "demo_command"),
]


# click >= 8.2 signals "no arguments, show the help" with a UsageError subclass
_NO_ARGS = getattr(click.exceptions, "NoArgsIsHelpError", ())


class _Group(click.Group):
    """A click group that turns ScheduleError into a one-line error and exit code 2."""

    def list_commands(self, ctx):
        """The verbs in the order of the job, not alphabetically."""
        order = [name for name, _ in _VERBS]
        return sorted(self.commands, key=lambda c: order.index(c) if c in order else len(order))

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except ScheduleError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(2)

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True,
             **extra):
        """Like click's, but a usage error is one line ``error: ... (see '... --help')``
        with exit code 2 (click's own shows usage, a hint and the error on four lines)."""
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        try:
            rv = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except _NO_ARGS as exc:  # `schedule` alone or a verb without arguments: the help
            exc.show()
            sys.exit(exc.exit_code)
        except click.UsageError as exc:
            message = " ".join(exc.format_message().split())
            path = exc.ctx.command_path if exc.ctx is not None else "schedule"
            click.echo(f"error: {message} (see '{path} --help')", err=True)
            sys.exit(2)
        except click.ClickException as exc:
            exc.show()
            sys.exit(exc.exit_code)
        except click.Abort:
            click.echo("Aborted!", err=True)
            sys.exit(1)
        sys.exit(rv if isinstance(rv, int) else 0)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, "--version", prog_name="schedule",
                      message="%(prog)s %(version)s")
def main() -> None:
    """Build a gain-scheduled H-infinity controller over an operating envelope.

    Typical run: `schedule design SPEC.toml --out family.h5`, then
    `schedule check family.h5 --design SPEC.toml --report report/`, then
    `schedule export family.h5 --design SPEC.toml --format c --out table/`
    (--design lets check and export use the model SPEC.toml names: a family
    file is data and never chooses code to run). `schedule demo` runs all of it
    on the bundled crane envelope.

    Results are design aids: validate in simulation and hardware tests and
    follow the applicable codes and licensed practice.
    """


for _module, _attr in _VERBS:
    main.add_command(getattr(importlib.import_module(f".{_module}", __package__), _attr))


if __name__ == "__main__":  # python -m schedule.cli.main
    main()
