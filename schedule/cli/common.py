"""Pieces several verbs share: the ``--design`` option and what a design reads.

Code runs only when the user names it: ``check``, ``refine`` and ``simulate``
import a model given with ``--model`` or named in a design file given with
``--design``, never one named inside a family file (see
:func:`schedule.check.spec_for_family`).
"""

from __future__ import annotations

import sys

import click

__all__ = ["design_option", "design_inputs", "code_notes", "progress_bar"]

design_option = click.option(
    "--design", "design_file", type=click.Path(dir_okay=False), default=None,
    help="Design file whose model entries (source.model / model_file / nonlinear_model) may "
         "be imported: normally the file the family was built from. The design stored inside "
         "a family file is data and never chooses code to run.")


def progress_bar(quiet: bool = False, first: str | None = None):
    """The verb's :class:`schedule.progress.ProgressBar` (stderr), closed when the command
    ends, also on an error before its message is printed; ``first`` opens a stage line at
    once (reading the inputs and importing the model come before any counted stage)."""
    from ..progress import ProgressBar, stage_line

    bar = ProgressBar(enabled=False if quiet else None)
    ctx = click.get_current_context(silent=True)
    if ctx is not None:
        # closed while an error propagates: clear the line for the error's message
        ctx.call_on_close(lambda: bar.close(erase=isinstance(sys.exc_info()[1], Exception)))
    if first:
        stage_line(bar, first)
    return bar


def design_inputs(spec) -> list:
    """The files a design reads (operating points, model file, validation points)."""
    if spec is None:
        return []
    src = spec.source
    return [src.operating_points, src.model_file, src.validation]


def code_notes(family, spec, design_file) -> list[str]:
    """Notes for the user: code named by the stored design and not imported; a --design
    file that differs from the stored design."""
    from ..sources import ignored_code_note

    notes = []
    note = ignored_code_note(spec)
    if note:
        notes.append(note)
    if design_file is not None and family.design_text and spec is not None:
        from ..design_file import load_design

        if load_design(design_file).text.removeprefix("\ufeff") != \
                family.design_text.removeprefix("\ufeff"):
            notes.append(f"the design file {design_file} differs from the design stored in the "
                         "family; only its model entries were used")
    return notes
