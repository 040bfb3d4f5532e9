"""Test-suite settings shared by every module.

Under CI (the environment variable CI is set, as `.ci/run` is run) hypothesis
draws the same examples every time (derandomize), so a submission's result
does not depend on luck; locally it explores new examples on every run.
The README's demo runs once per session (fixture `readme_demo`), shared by
tests/test_demo.py and tests/test_readme.py.
"""

from __future__ import annotations

import os

import pytest
from _readme_tool import load_readme_tool
from hypothesis import settings

settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI") else "dev")


@pytest.fixture(scope="session")
def readme_demo(tmp_path_factory):
    """The README's first shown command, `schedule demo`, run once per test session in an
    empty folder the way docs/make_readme_outputs.py runs it (a subprocess; its standard
    output). tests/test_demo.py checks what it wrote; tests/test_readme.py runs the rest of
    the README's commands in the same session."""
    from types import SimpleNamespace

    tool = load_readme_tool()
    text = tool.README.read_text()
    blocks = tool.blocks(text)
    assert blocks[0].commands == ["schedule demo"], blocks[0].commands
    start = tmp_path_factory.mktemp("readme").resolve()
    session = tool.Session(start)
    body = tool.run_block(session, blocks[0])
    return SimpleNamespace(tool=tool, text=text, blocks=blocks, start=start, session=session,
                           bodies=[body], out=start / "schedule-demo",
                           stdout=body.partition("\n")[2])
