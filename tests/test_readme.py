"""The README's shown outputs are what a fresh run prints, at the digits shown.

README.md marks its console blocks with ``<!-- output -->`` comments;
docs/make_readme_outputs.py runs their ``$`` commands as one session in an empty
folder and rewrites them. Here the same functions run the same commands afresh
(the demo once per session, shared with tests/test_demo.py through the
``readme_demo`` fixture) and every number the README shows must equal the fresh
run's number rounded at the README's last digit, token by token, except the
wall-clock fields named in ``TIMING_FIELDS``; the words between the numbers
must match too (a separate test, so a reader sees which kind of drift it is).
The outside reference is the program itself run now, against text written
earlier: a change that moves a shown number without re-running the script
fails here. A failing comparison names the block, the line and both numbers;
the fix is ``python docs/make_readme_outputs.py``.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from _readme_tool import load_readme_tool

ROOT = Path(__file__).resolve().parents[1]
tool = load_readme_tool()


@pytest.fixture(scope="module")
def fresh(readme_demo):
    """Every marked block's body from a fresh run (the rest of the session after the demo)."""
    tool, session = readme_demo.tool, readme_demo.session
    bodies = list(readme_demo.bodies)
    bodies += [tool.run_block(session, b) for b in readme_demo.blocks[len(bodies):]]
    return bodies


def _assert_same(readme_demo, fresh, differences) -> None:
    """Every shown block against the fresh run's body, by ``differences(shown, body)``."""
    problems = [f"block '$ {block.commands[-1]}': {p}"
                for block, body in zip(readme_demo.blocks, fresh)
                for p in differences(block.shown, body)]
    assert not problems, ("README.md shows outputs a fresh run does not give; run "
                          "python docs/make_readme_outputs.py:\n" + "\n".join(problems))


def test_readme_numbers_match_a_fresh_run(readme_demo, fresh):
    _assert_same(readme_demo, fresh, tool.number_differences)


def test_readme_words_match_a_fresh_run(readme_demo, fresh):
    """The words too (numbers, timings and spacing aside): "kind delaunay" where a run
    prints "kind multilinear" is drift as well."""
    _assert_same(readme_demo, fresh, tool.word_differences)


def test_readme_pictures_come_from_the_run(readme_demo, fresh):
    """Every picture the README shows is one the script copies, and the run writes it."""
    shown = {ln.split("](", 1)[1].split(")", 1)[0]
             for ln in readme_demo.text.splitlines() if ln.startswith("![")}
    assert shown and shown == set(tool.PICTURES)
    for target, source in tool.PICTURES.items():
        assert (ROOT / target).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", target
        assert (readme_demo.start / source).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", source


def test_shown_outputs_hold_no_progress_or_stage_lines():
    """Progress bars and stage lines go to stderr on a terminal only; the README shows the
    standard output (plus stderr where marked, for the error example)."""
    for block in tool.blocks(tool.README.read_text()):
        assert "\r" not in block.shown and "\n== " not in block.shown, block.commands
        assert "it/s" not in block.shown and "ETA" not in block.shown, block.commands


def test_one_changed_digit_is_caught():
    """The comparison itself can fail: one digit changed in a shown number is reported,
    while a timing field that differs is not (the README compared with itself)."""
    shown = next(b.shown for b in tool.blocks(tool.README.read_text())
                 if "common gamma" in b.shown)
    assert tool.number_differences(shown, shown) == []
    line = next(ln for ln in shown.splitlines() if ln.startswith("common gamma"))
    number = line.split()[-1]
    last = number[-1]
    edited = shown.replace(line, line[:-1] + ("1" if last != "1" else "2"))
    assert len(tool.number_differences(edited, shown)) == 1
    timed = "computed 35 plants in 4.3 s (plants 0.5 s, fit 3.3 s)\ndone in 11 s. 3.69 s per check"
    again = "computed 35 plants in 9.1 s (plants 2.5 s, fit 6.0 s)\ndone in 17 s. 5.27 s per check"
    assert tool.number_differences(timed, again) == []
    assert tool.number_differences("computed 35 plants", "computed 36 plants") != []
    assert tool.word_differences(timed, again) == []
    assert tool.word_differences("kind delaunay, 15 of 35", "kind  multilinear, 8 of 35") != []
    assert tool.word_differences("kind multilinear, 15 of 35", "kind  multilinear, 8 of 35") == []


@pytest.mark.parametrize(("shown", "fresh", "same"), [
    # rounding at the last shown digit, half to even (common practice for printed figures)
    ("3.7335", "3.7335", True),
    ("3.7335", "3.73349", True),
    ("3.7335", "3.7336", False),
    ("2.34", "2.342", True),
    ("2.34", "2.346", False),
    ("8", "8", True),
    ("8", "15", False),
    ("4e+04", "4e+04", True),
    ("4e+04", "40000", True),
    ("4e+04", "41000", True),
    ("4e+04", "46000", False),
    ("-0.0007916", "-0.0007916", True),
    ("-0.0007916", "0.0007916", False),
])
def test_same_at_digits_shown(shown, fresh, same):
    assert tool.same_at_digits_shown(shown, fresh) is same


def test_every_shown_block_is_marked():
    """Each console block of the README is produced by the script (no hand-written one)."""
    text = (ROOT / "README.md").read_text()
    marked = sum(1 for ln in text.splitlines() if ln.startswith("<!-- output"))
    assert marked == text.count("```console\n") > 0
