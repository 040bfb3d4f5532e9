"""The HDF5 table.

Layout (see docs/tables.md)::

    /                 attrs: format="schedule-table", format_version=1, metadata (JSON text)
    /breakpoints/<variable>   (n_k,) float64, attrs unit
    /inside           (M,) uint8
    /A (M, n, n)   /B (M, n, ny)   /C (M, nu, n)   /D (M, nu, ny)   float64
    /H (M, n, nu)  float64, present when the metadata says "anti_windup": true
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from ..atomic import write_file_atomic
from ..errors import InputError
from ..h5util import new_h5, open_checked
from .table import FORMAT_NAME, FORMAT_VERSION, MATRICES, ScheduledTable, table_from_metadata


def write_hdf5_table(path: str | os.PathLike, table: ScheduledTable) -> Path:
    """Write the HDF5 table atomically; returns the path."""
    meta = table.metadata()

    def writer(tmp: str) -> None:
        with new_h5(tmp) as f:  # built in memory: a full disk cannot crash HDF5
            f.attrs["format"] = FORMAT_NAME
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["metadata"] = json.dumps(meta)
            g = f.create_group("breakpoints", track_order=True)
            for v, b in zip(table.variables, table.breakpoints, strict=True):
                g[v.name] = np.asarray(b, dtype=float)
                g[v.name].attrs["unit"] = v.unit
            f["inside"] = np.asarray(table.inside, dtype=np.uint8)
            for k in MATRICES:
                f[k] = np.asarray(getattr(table, k), dtype=float)
            if table.H is not None:
                f["H"] = np.asarray(table.H, dtype=float)

    return write_file_atomic(path, writer, "HDF5 table")


def read_hdf5_table(path: str | os.PathLike) -> ScheduledTable:
    """Read an HDF5 table written by :func:`write_hdf5_table`."""
    path = Path(path)
    try:
        with open_checked(path, "HDF5 table", "re-export it") as (f, _contents):
            if f.attrs.get("format") != FORMAT_NAME:
                raise InputError(f"{path} is not a scheduled table (attribute 'format' should "
                                 f"be '{FORMAT_NAME}')")
            meta = json.loads(f.attrs["metadata"])
            if not isinstance(meta, dict):
                raise InputError(f"{path}: the 'metadata' attribute is not a JSON object; "
                                 "re-export the table")
            mats = {k: f[k][()] for k in MATRICES}
            if meta.get("anti_windup") is True:
                mats["H"] = f["H"][()]
            inside = f["inside"][()] != 0
    except InputError:
        raise
    except (OSError, KeyError, ValueError) as exc:
        raise InputError(f"cannot read HDF5 table {path} ({exc}); re-export it") from None
    return table_from_metadata(meta, mats, inside, str(path))
