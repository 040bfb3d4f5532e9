"""The table formats and the file names they get in an output folder: one list for all.

``schedule export`` with several formats and ``schedule demo`` both write a folder
with these names (a C folder holding ``<prefix>_table.h`` and ``.c``). This module
imports nothing heavy, so the command line's ``--help`` stays fast.
"""

from __future__ import annotations

from pathlib import Path

#: table formats, in the order they are listed and written
FORMATS = ("csv", "json", "hdf5", "c", "fmu")
#: name of each format's output inside a folder ("c" is a folder itself)
FILE_NAMES = {"csv": "table.csv", "json": "table.json", "hdf5": "table.h5", "c": "c",
              "fmu": "table.fmu"}
#: prefix of the C names (``sched_table.h``, ``sched_step``...)
DEFAULT_PREFIX = "sched"
#: file-name suffix that names each single-file format (an output path with another
#: format's suffix is refused)
SUFFIXES = {"csv": (".csv",), "json": (".json",), "hdf5": (".h5", ".hdf5"),
            "fmu": (".fmu",), "c": (".c", ".h")}


def folder_target(folder: str | Path, fmt: str) -> Path:
    """Where format ``fmt`` goes inside the output folder ``folder``."""
    return Path(folder) / FILE_NAMES[fmt]


def format_of_suffix(path: str | Path) -> str | None:
    """The format whose suffix ``path`` carries (None when the suffix names none)."""
    suffix = Path(path).suffix.lower()
    return next((fmt for fmt, sufs in SUFFIXES.items() if suffix in sufs), None)


def listing() -> str:
    """``table.csv, table.json, table.h5, c/, table.fmu`` for help texts."""
    return ", ".join(name + ("/" if fmt == "c" else "") for fmt, name in FILE_NAMES.items())
