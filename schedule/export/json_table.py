"""The JSON table: one object holding the metadata, the node mask and the matrices.

Layout (see docs/tables.md): the keys of :meth:`ScheduledTable.metadata` plus
``"inside"`` (list of M booleans) and ``"A"``, ``"B"``, ``"C"``, ``"D"`` (lists of M
matrices, each a list of rows; ``"H"`` too when ``"anti_windup"`` is true), nodes in
flat order (first variable slowest).
Floats round-trip exactly (shortest representation).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from ..atomic import write_text_atomic
from ..errors import InputError
from .table import MATRICES, ScheduledTable, table_from_metadata


def json_text(table: ScheduledTable) -> str:
    """The JSON table as text (one node's matrix per line for readability)."""
    obj = table.metadata()
    obj["inside"] = [bool(x) for x in table.inside]
    for k in MATRICES:
        obj[k] = getattr(table, k).tolist()
    if table.H is not None:
        obj["H"] = table.H.tolist()
    return json.dumps(obj, indent=1) + "\n"


def write_json_table(path: str | os.PathLike, table: ScheduledTable) -> Path:
    """Write the JSON table atomically; returns the path."""
    return write_text_atomic(path, json_text(table), "JSON table")


def read_json_table(path: str | os.PathLike) -> ScheduledTable:
    """Read a JSON table written by :func:`write_json_table`."""
    path = Path(path)
    try:
        obj = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"cannot read JSON table {path}: {exc}") from None
    if not isinstance(obj, dict) or any(k not in obj for k in MATRICES + ("inside",)):
        raise InputError(f"{path} lacks one of A, B, C, D, inside; it is not a scheduled table")
    try:
        import numpy as np
        n = int(obj["n_states"])
        ny, nu = len(obj["inputs"]), len(obj["outputs"])
        shapes = {"A": (n, n), "B": (n, ny), "C": (nu, n), "D": (nu, ny)}
        if obj.get("anti_windup") is True:
            if "H" not in obj:
                raise KeyError("H")
            shapes["H"] = (n, nu)
        mats = {k: np.asarray(obj[k], dtype=float).reshape((-1,) + shapes[k])
                for k in shapes}
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{path}: matrices do not fit the metadata ({exc}); re-export") \
            from None
    return table_from_metadata(obj, mats, obj["inside"], str(path))
