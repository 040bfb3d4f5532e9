"""Names and units given by users: plain single-line text, checked where they enter.

Names of variables, signals (channels, states, inputs, outputs) and units end
up in tables, C sources, reports and terminal output. They are refused at the
door (design file, operating-point file, family file, a model's result) when
they hold characters that change how text is read rather than what it says:
control characters (newline, carriage return, escape, NUL...), format
characters (bidirectional overrides, zero-width joiners), line and paragraph
separators, surrogates, private-use and unassigned code points.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterable

from .errors import InputError

__all__ = ["name_problem", "check_names"]

_REFUSED = {"Cc": "a control character", "Cf": "a format character", "Zl": "a line separator",
            "Zp": "a paragraph separator", "Cs": "a surrogate", "Co": "a private-use character",
            "Cn": "an unassigned character"}


def name_problem(text: str) -> str | None:
    """Why ``text`` cannot be a name or unit (naming the first bad character), or None."""
    for i, ch in enumerate(text):
        kind = _REFUSED.get(unicodedata.category(ch))
        if kind is not None:
            return f"holds {kind} (U+{ord(ch):04X}) at position {i}"
    return None


def check_names(names: Iterable[str], where: str, fix: str = "use printable characters only"
                ) -> None:
    """Raise InputError for the first of ``names`` holding a refused character.

    ``where`` names the field in the message, e.g. "design.toml: channels.measured".
    """
    for name in names:
        problem = name_problem(str(name))
        if problem is not None:
            raise InputError(f"{where}: {str(name)[:40]!r} {problem}; {fix}")
