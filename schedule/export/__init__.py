"""Scheduled tables: build, discretize, write (CSV / JSON / HDF5 / C99 / FMU) and run.

``build_table(family, ...)`` makes a :class:`ScheduledTable`; ``write_table(table,
fmt, out)`` writes it; ``read_table(path)`` reads CSV / JSON / HDF5 back;
``TableController`` steps the scheduled discrete controller (with actuator limits and
the observer-form anti-windup, :mod:`schedule.export.antiwindup`); ``write_fmu``
writes an FMI 2.0 co-simulation unit. Formats are described in docs/tables.md.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError
from ..table_files import DEFAULT_PREFIX, FILE_NAMES, FORMATS, folder_target
from .antiwindup import ActuatorLimits
from .c_source import c_source_text, write_c_source
from .csv_table import read_csv_table, write_csv_table
from .discretize import discretize
from .fmu import write_fmu
from .hdf5_table import read_hdf5_table, write_hdf5_table
from .json_table import read_json_table, write_json_table
from .runtime import TableController, interpolate_matrices, read_table
from .table import ScheduledTable, build_table, file_sha256, parse_breakpoints

__all__ = ["FORMATS", "FILE_NAMES", "DEFAULT_PREFIX", "ActuatorLimits", "ScheduledTable",
           "TableController", "build_table",
           "c_source_text", "discretize", "file_sha256", "interpolate_matrices",
           "parse_breakpoints",
           "read_csv_table", "read_hdf5_table", "read_json_table", "read_table",
           "write_c_source", "write_csv_table", "write_hdf5_table", "write_json_table",
           "write_fmu", "write_table", "write_tables"]


def write_table(table: ScheduledTable, fmt: str, out: str | os.PathLike,
                prefix: str = DEFAULT_PREFIX) -> list[Path]:
    """Write ``table`` in format ``fmt`` (one of :data:`FORMATS`) to ``out``.

    For "c", ``out`` is a folder that receives ``<prefix>_table.h`` and
    ``<prefix>_table.c``; for "fmu" a ``NAME.fmu`` file (:func:`write_fmu`, with the host
    binary when a C compiler is found); otherwise a file. Writes are atomic. Returns the
    paths written.
    """
    if fmt == "csv":
        return [write_csv_table(out, table)]
    if fmt == "json":
        return [write_json_table(out, table)]
    if fmt == "hdf5":
        return [write_hdf5_table(out, table)]
    if fmt == "c":
        return write_c_source(out, table, prefix)
    if fmt == "fmu":
        return [write_fmu(out, table).path]
    raise InputError(f"unknown table format {fmt!r}; use one of {', '.join(FORMATS)}")


def write_tables(table: ScheduledTable, formats, folder: str | os.PathLike,
                 prefix: str = DEFAULT_PREFIX, binary: bool = True) -> tuple[list[Path], list]:
    """Write ``table`` in several formats into ``folder`` under the names of
    :data:`schedule.table_files.FILE_NAMES` (``table.csv``, ``c/<prefix>_table.c``...).

    The folder must exist. Returns ``(paths, fmu_outcomes)``.
    """
    paths: list[Path] = []
    outcomes = []
    for fmt in formats:
        target = folder_target(folder, fmt)
        if fmt == "fmu":
            outcome = write_fmu(target, table, binary=binary)
            outcomes.append(outcome)
            paths.append(outcome.path)
        else:
            paths += write_table(table, fmt, target, prefix=prefix)
    return paths, outcomes
