"""Pieces several verbs share: the ``--design`` option and what a design reads.

Code runs only when the user names it: ``check``, ``refine`` and ``simulate``
import a model given with ``--model`` or named in a design file given with
``--design``, never one named inside a family file (see
:func:`schedule.check.spec_for_family`).
"""

from __future__ import annotations

import click

__all__ = ["design_option", "design_inputs", "code_notes"]

design_option = click.option(
    "--design", "design_file", type=click.Path(dir_okay=False), default=None,
    help="Design file whose model entries (source.model / model_file / nonlinear_model) may "
         "be imported: normally the file the family was built from. The design stored inside "
         "a family file is data and never chooses code to run.")


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
