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


def test_version():
    import schedule

    res = CliRunner().invoke(main, ["--version"])
    assert res.exit_code == 0 and schedule.__version__ in res.output
