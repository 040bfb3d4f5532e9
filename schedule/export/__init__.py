"""Scheduled tables: build, discretize, write (CSV / JSON / HDF5 / C99) and run.

``build_table(family, ...)`` makes a :class:`ScheduledTable`; ``write_table(table,
fmt, out)`` writes it; ``read_table(path)`` reads CSV / JSON / HDF5 back;
``TableController`` steps the scheduled discrete controller. Formats are described
in docs/tables.md.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError
from .c_source import c_source_text, write_c_source
from .csv_table import read_csv_table, write_csv_table
from .discretize import discretize
from .hdf5_table import read_hdf5_table, write_hdf5_table
from .json_table import read_json_table, write_json_table
from .runtime import TableController, interpolate_matrices, read_table
from .table import ScheduledTable, build_table, file_sha256, parse_breakpoints

FORMATS = ("csv", "json", "hdf5", "c")

__all__ = ["FORMATS", "ScheduledTable", "TableController", "build_table", "c_source_text",
           "discretize", "file_sha256", "interpolate_matrices", "parse_breakpoints",
           "read_csv_table", "read_hdf5_table", "read_json_table", "read_table",
           "write_c_source", "write_csv_table", "write_hdf5_table", "write_json_table",
           "write_table"]


def write_table(table: ScheduledTable, fmt: str, out: str | os.PathLike,
                prefix: str = "sched") -> list[Path]:
    """Write ``table`` in format ``fmt`` ("csv", "json", "hdf5" or "c") to ``out``.

    For "c", ``out`` is a folder that receives ``<prefix>_table.h`` and
    ``<prefix>_table.c``; otherwise a file. Writes are atomic. Returns the paths written.
    """
    if fmt == "csv":
        return [write_csv_table(out, table)]
    if fmt == "json":
        return [write_json_table(out, table)]
    if fmt == "hdf5":
        return [write_hdf5_table(out, table)]
    if fmt == "c":
        return write_c_source(out, table, prefix)
    raise InputError(f"unknown table format {fmt!r}; use one of {', '.join(FORMATS)}")
