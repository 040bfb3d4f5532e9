"""Every command and every option of the command line explains itself."""

from __future__ import annotations

import click
import pytest
from click.testing import CliRunner

from schedule.cli.main import main

EXPECTED_VERBS = {"design", "inspect", "check", "refine", "export", "simulate", "demo"}


def test_every_verb_is_registered():
    assert EXPECTED_VERBS <= set(main.commands)


@pytest.mark.parametrize("verb", sorted(EXPECTED_VERBS))
def test_every_option_has_help_text(verb):
    command = main.commands[verb]
    assert (command.help or "").strip(), f"'schedule {verb}' has no help text"
    for param in command.params:
        if isinstance(param, click.Option):
            assert (param.help or "").strip(), (
                f"option {'/'.join(param.opts)} of 'schedule {verb}' has no help text")


@pytest.mark.parametrize("verb", sorted(EXPECTED_VERBS))
def test_help_runs_and_unknown_option_exits_2(verb):
    runner = CliRunner()
    res = runner.invoke(main, [verb, "--help"])
    assert res.exit_code == 0 and "Usage:" in res.output
    res = runner.invoke(main, [verb, "--no-such-option"])
    assert res.exit_code == 2
    assert "Traceback" not in res.output
    # one line, naming the option and the help to read (click alone prints four)
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert "--no-such-option" in lines[0] and f" {verb} --help')" in lines[0]


@pytest.mark.parametrize("args, needle", [
    (["export"], "Missing argument 'FAMILY_FILE'"),
    (["export", "f.h5", "-f", "xml", "-o", "t"], "'xml' is not one of"),
    (["nosuchverb"], "No such command 'nosuchverb'"),
])
def test_usage_errors_are_one_line(args, needle):
    res = CliRunner().invoke(main, args)
    lines = res.output.strip().splitlines()
    assert res.exit_code == 2 and len(lines) == 1
    assert lines[0].startswith("error: ") and needle in lines[0]


def test_version():
    import schedule

    res = CliRunner().invoke(main, ["--version"])
    assert res.exit_code == 0 and schedule.__version__ in res.output


def test_no_arguments_shows_the_help_not_an_error():
    res = CliRunner().invoke(main, [])
    assert "Usage:" in res.output and "error:" not in res.output
