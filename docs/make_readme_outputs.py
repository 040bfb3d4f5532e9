"""Rewrite the README's shown outputs and pictures from a real run.

    python docs/make_readme_outputs.py

README.md marks every console block it shows as output with two HTML comments
(invisible when the markdown is rendered)::

    <!-- output -->
    ```console
    $ schedule demo
    ...
    ```
    <!-- end output -->

``<!-- output: stdout+stderr -->`` shows what goes to the standard error too
(an error message); plain ``<!-- output -->`` shows the standard output only,
which is where the results go (progress bars and stage lines go to the
standard error, and only on a terminal).

The script takes the ``$ ...`` lines of the marked blocks, in order, as one
shell session that starts in an empty temporary folder: ``schedule ...``
commands run as subprocesses (the ``schedule`` command installed beside this
Python), ``cd DIR`` changes the folder for the commands after it, ``echo $?``
prints the previous command's exit code. Any other command is refused: the
README's commands are what runs. A ``schedule`` command must exit 0 unless the
block shows its exit code with ``echo $?`` on the next line. Then each block is
rewritten with the commands and their fresh output, and the pictures in
``PICTURES`` are copied from the run into docs/images/.

``tests/test_readme.py`` runs the same session with these functions and fails
when a number shown in README.md differs from the fresh run's at the digits
shown (the fields in ``TIMING_FIELDS`` excepted), or when its words differ. Only the Python standard
library is used, so ``.ci/run`` can call ``--two-commands`` before anything is
installed.
"""

from __future__ import annotations

import argparse
import os
import re
import shlex
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass, field
from decimal import ROUND_HALF_EVEN, Decimal, InvalidOperation
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"

#: picture in the repository -> the file of the run it is copied from (relative to the
#: folder the session starts in)
PICTURES = {
    "docs/images/check-norm-over-gamma.png":
        "schedule-demo/check-report/ratio_rope_length_payload_mass.png",
    "docs/images/simulation-response.png": "schedule-demo/sim/response.png",
}

#: Wall-clock times in the shown outputs: they vary from run to run, so the test removes
#: these fields from both texts before comparing numbers. Name -> regular expression.
TIMING_FIELDS = {
    "demo: done in N s": r"done in [0-9.]+ s\b",
    "design: computed ... in N s (stage times)": r"\bin [0-9.]+ s \((?:[a-z_ ]+ [0-9.]+ s,? ?)+\)",
    "export: N s per check": r"[0-9.]+ s per check",
}

BLOCK = re.compile(
    r"(?P<open><!-- output(?::\s*(?P<streams>[a-z+]+))? -->\n)"
    r"```console\n(?P<body>.*?)```\n"
    r"(?P<close><!-- end output -->)",
    re.S,
)
NUMBER = re.compile(r"[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?")


@dataclass
class Block:
    """One marked console block of the README."""

    start: int  # span of the whole block (markers included) in the README text
    end: int
    streams: str  # "stdout" or "stdout+stderr"
    commands: list[str]
    shown: str  # the block's body as it stands (commands and output)


@dataclass
class Session:
    """A shell-like session: the current folder and the last exit code."""

    cwd: Path
    last_rc: int = 0
    log: list[str] = field(default_factory=list)


def blocks(text: str) -> list[Block]:
    """The marked console blocks of a README text, in order."""
    found = []
    for m in BLOCK.finditer(text):
        streams = m.group("streams") or "stdout"
        if streams not in ("stdout", "stdout+stderr"):
            raise ValueError(f"README output marker names streams {streams!r}; "
                             "use <!-- output --> or <!-- output: stdout+stderr -->")
        body = m.group("body")
        commands = [ln[2:] for ln in body.splitlines() if ln.startswith("$ ")]
        if not commands:
            raise ValueError(f"README output block at offset {m.start()} has no '$ ' command")
        found.append(Block(m.start(), m.end(), streams, commands, body))
    if not found:
        raise ValueError("README.md has no <!-- output --> ... <!-- end output --> block")
    return found


def two_commands(text: str) -> tuple[str, str]:
    """The README's two commands (section "Two commands"): the demo one and the test one."""
    section = text.split("\n## Two commands", 1)[1].split("\n## ", 1)[0]
    code = section.split("```sh\n", 1)[1].split("```", 1)[0]
    lines = [ln.strip() for ln in code.splitlines()
             if ln.strip() and not ln.strip().startswith("#")]
    demo = [ln for ln in lines if "schedule demo" in ln]
    test = [ln for ln in lines if "pytest" in ln]
    if len(lines) != 2 or len(demo) != 1 or len(test) != 1:
        raise ValueError("README 'Two commands' must hold exactly two command lines, one "
                         f"running 'schedule demo' and one running pytest; found {lines}")
    return demo[0], test[0]


def schedule_executable() -> str:
    """The ``schedule`` command installed beside this Python (else the one on PATH)."""
    here = Path(sys.executable).parent / ("schedule.exe" if os.name == "nt" else "schedule")
    if here.is_file():
        return str(here)
    found = shutil.which("schedule")
    if found is None:
        raise RuntimeError("the schedule command is not installed; pip install -e . first")
    return found


def run_command(session: Session, command: str, streams: str) -> str:
    """Run one README command in the session; return what it prints."""
    if command == "echo $?":
        rc, session.last_rc = session.last_rc, 0
        return f"{rc}\n"
    argv = shlex.split(command)
    if argv[0] == "cd" and len(argv) == 2:
        session.cwd = (session.cwd / argv[1]).resolve()
        session.last_rc = 0
        return ""
    if argv[0] != "schedule":
        raise ValueError(f"README output block runs {command!r}; only 'schedule ...', "
                         "'cd DIR' and 'echo $?' are run")
    res = subprocess.run([schedule_executable(), *argv[1:]], cwd=session.cwd,
                         stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                         stderr=subprocess.STDOUT if streams == "stdout+stderr"
                         else subprocess.PIPE, text=True)
    session.last_rc = res.returncode
    session.log.append(f"$ {command}  (exit {res.returncode})")
    if streams == "stdout" and res.stderr:
        session.log.append(res.stderr)
    return res.stdout


def run_block(session: Session, block: Block) -> str:
    """Run a block's commands; return its new body (commands and outputs)."""
    body = []
    for i, command in enumerate(block.commands):
        out = run_command(session, command, block.streams)
        shows_rc = i + 1 < len(block.commands) and block.commands[i + 1] == "echo $?"
        if session.last_rc != 0 and not shows_rc:
            tail = "\n".join(session.log[-2:])
            raise RuntimeError(f"README command {command!r} exited {session.last_rc} in "
                               f"{session.cwd}:\n{out}{tail}")
        body.append(f"$ {command}\n{out}")
        if out and not out.endswith("\n"):
            body.append("\n")
    return "".join(body)


def run_tour(text: str, start: Path) -> list[str]:
    """Run every marked block of a README text in one session started in ``start``."""
    session = Session(Path(start).resolve())
    return [run_block(session, b) for b in blocks(text)]


def rewrite(text: str, bodies: list[str]) -> str:
    """The README text with each marked block's body replaced by the fresh one."""
    out, pos = [], 0
    found = blocks(text)
    if len(found) != len(bodies):
        raise ValueError(f"{len(found)} output blocks in the README, {len(bodies)} outputs")
    for b, body in zip(found, bodies):
        marker = "<!-- output -->" if b.streams == "stdout" else f"<!-- output: {b.streams} -->"
        out.append(text[pos:b.start])
        out.append(f"{marker}\n```console\n{body}```\n<!-- end output -->")
        pos = b.end
    out.append(text[pos:])
    return "".join(out)


def without_timings(text: str) -> str:
    """The text with the ``TIMING_FIELDS`` replaced by a placeholder."""
    for pattern in TIMING_FIELDS.values():
        text = re.sub(pattern, "<time>", text)
    return text


def numbers(text: str) -> list[tuple[int, str]]:
    """Every number in a text (timing fields removed), with its line number."""
    found = []
    for lineno, line in enumerate(without_timings(text).splitlines(), start=1):
        found.extend((lineno, m.group()) for m in NUMBER.finditer(line))
    return found


def same_at_digits_shown(shown: str, fresh: str) -> bool:
    """Whether ``fresh`` rounds to ``shown`` at the last digit ``shown`` gives."""
    if shown == fresh:
        return True
    try:
        a, b = Decimal(shown), Decimal(fresh)
        return b.quantize(Decimal(1).scaleb(a.as_tuple().exponent),
                          rounding=ROUND_HALF_EVEN) == a
    except InvalidOperation:
        return False


def number_differences(shown: str, fresh: str) -> list[str]:
    """One line per number of ``shown`` that the ``fresh`` output does not reproduce."""
    a, b = numbers(shown), numbers(fresh)
    problems = [f"line {la}: README shows {x}, a fresh run gives {y}"
                for (la, x), (_, y) in zip(a, b) if not same_at_digits_shown(x, y)]
    if len(a) != len(b):
        problems.append(f"README shows {len(a)} numbers, a fresh run prints {len(b)}")
    return problems


def word_differences(shown: str, fresh: str) -> list[str]:
    """One line per line of ``shown`` whose words (numbers, timing fields and spacing
    aside) differ from the ``fresh`` output's line."""
    def words(text: str) -> list[str]:
        return [" ".join(NUMBER.sub("#", ln).split())
                for ln in without_timings(text).splitlines()]

    a, b = words(shown), words(fresh)
    problems = [f"line {i}: README shows {x!r}, a fresh run prints {y!r}"
                for i, (x, y) in enumerate(zip(a, b), start=1) if x != y]
    if len(a) != len(b):
        problems.append(f"README shows {len(a)} lines, a fresh run prints {len(b)}")
    return problems


def copy_pictures(start: Path, root: Path = ROOT) -> list[str]:
    """Copy the ``PICTURES`` from a finished run into the repository."""
    copied = []
    for target, source in PICTURES.items():
        src = Path(start) / source
        if not src.is_file():
            raise FileNotFoundError(f"the run did not write {source} (for {target})")
        dst = root / target
        tmp = dst.with_suffix(".part")
        shutil.copyfile(src, tmp)
        os.replace(tmp, dst)
        copied.append(target)
    return copied


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--two-commands", action="store_true",
                        help="print the README's demo and test commands, one a line, and stop")
    args = parser.parse_args(argv)
    text = README.read_text()
    if args.two_commands:
        print("\n".join(two_commands(text)))
        return 0
    with tempfile.TemporaryDirectory(prefix="readme-run-") as tmp:
        try:
            bodies = run_tour(text, Path(tmp))
            new = rewrite(text, bodies)
            copied = copy_pictures(Path(tmp))
        except (ValueError, RuntimeError, FileNotFoundError) as exc:
            print(f"error: {exc}\nREADME.md is unchanged", file=sys.stderr)
            return 1
    part = README.with_suffix(".md.part")
    part.write_text(new)
    os.replace(part, README)
    print(f"rewrote {len(bodies)} output blocks in README.md"
          f"{' (unchanged)' if new == text else ''}; copied {', '.join(copied)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
