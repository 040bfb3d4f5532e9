"""The CSV table: one row per grid node, one column per matrix entry.

Layout (see docs/tables.md)::

    # {"format": "schedule-table", "format_version": 1, ...metadata as one JSON line...}
    rope_length,payload_mass,inside,A[0,0],A[0,1],...,B[0,0],...,C[0,0],...,D[0,0],...,H[0,0],...
    3.0,2000.0,1,...

The ``H`` columns (anti-windup gain) are present when the metadata says
``"anti_windup": true``. Rows follow the flat node order (first variable slowest).
Numbers are written with Python's shortest round-trip representation, so reading gives
the same doubles.
"""

from __future__ import annotations

import csv
import io
import json
import os
from pathlib import Path

import numpy as np

from ..atomic import write_text_atomic
from ..errors import InputError
from .table import MATRICES, ScheduledTable, table_from_metadata


def _stacks(table: ScheduledTable) -> dict[str, np.ndarray]:
    """The stacked matrices written as columns: A, B, C, D and, when present, H."""
    out = {k: getattr(table, k) for k in MATRICES}
    if table.H is not None:
        out["H"] = table.H
    return out


def entry_names(table_or_shapes) -> list[str]:
    """Column names ``A[i,j]`` ... ``D[i,j]`` (then ``H[i,j]``) in row-major order."""
    if isinstance(table_or_shapes, ScheduledTable):
        shapes = {k: v.shape[1:] for k, v in _stacks(table_or_shapes).items()}
    else:
        shapes = table_or_shapes
    return [f"{k}[{i},{j}]" for k in shapes for i in range(shapes[k][0])
            for j in range(shapes[k][1])]


def csv_text(table: ScheduledTable) -> str:
    """The CSV table as text."""
    buf = io.StringIO()
    buf.write("# " + json.dumps(table.metadata(), separators=(",", ":")) + "\n")
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([v.name for v in table.variables] + ["inside"] + entry_names(table))
    nodes = table.nodes()
    M = nodes.shape[0]
    flat = np.concatenate([v.reshape(M, -1) for v in _stacks(table).values()], axis=1)
    for j in range(M):
        w.writerow([repr(float(x)) for x in nodes[j]] + [int(table.inside[j])]
                   + [repr(float(x)) for x in flat[j]])
    return buf.getvalue()


def write_csv_table(path: str | os.PathLike, table: ScheduledTable) -> Path:
    """Write the CSV table atomically; returns the path."""
    return write_text_atomic(path, csv_text(table), "CSV table")


def read_csv_table(path: str | os.PathLike) -> ScheduledTable:
    """Read a CSV table written by :func:`write_csv_table`."""
    path = Path(path)
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read CSV table {path}: {exc}") from None
    if not lines or not lines[0].startswith("#"):
        raise InputError(f"{path} has no '# {{...}}' metadata line; it is not a scheduled "
                         "table")
    try:
        meta = json.loads(lines[0][1:])
        rows = list(csv.reader(lines[1:]))
    except (json.JSONDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: malformed CSV table ({exc}); re-export it") from None
    if not isinstance(meta, dict):
        raise InputError(f"{path}: the metadata line is not a JSON object; re-export the table")
    try:
        d = len(meta["variables"])
        n = int(meta["n_states"])
        ny, nu = len(meta["inputs"]), len(meta["outputs"])
    except (KeyError, TypeError, ValueError):
        raise InputError(f"{path}: metadata line lacks variables, inputs, outputs or "
                         "n_states; re-export the table") from None
    shapes = {"A": (n, n), "B": (n, ny), "C": (nu, n), "D": (nu, ny)}
    if meta.get("anti_windup") is True:
        shapes["H"] = (n, nu)
    expected = [v["name"] for v in meta["variables"]] + ["inside"] + entry_names(shapes)
    if not rows or rows[0] != expected:
        raise InputError(f"{path}: header row does not match the metadata (expected "
                         f"{len(expected)} columns starting {expected[:d + 2]}); re-export")
    try:
        data = np.array([[float(x) for x in r] for r in rows[1:]], dtype=float)
    except ValueError as exc:
        raise InputError(f"{path}: non-numeric cell ({exc}); re-export the table") from None
    if data.ndim != 2 or data.shape[1] != len(expected):
        raise InputError(f"{path}: rows do not all have {len(expected)} cells; re-export")
    mats, col = {}, d + 1
    for k in shapes:
        size = shapes[k][0] * shapes[k][1]
        mats[k] = data[:, col:col + size].reshape((-1,) + shapes[k])
        col += size
    table = table_from_metadata(meta, mats, data[:, d] != 0, str(path))
    if not np.array_equal(table.nodes(), data[:, :d]):
        raise InputError(f"{path}: node columns do not follow the breakpoints in the metadata; "
                         "re-export the table")
    return table
