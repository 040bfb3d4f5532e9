"""Small HDF5 helpers shared by the file formats (family file, operating-point file).

- UTF-8 strings: :data:`STR`, :func:`strings` (to a dataset-ready array),
  :func:`decode_one` and :func:`decode` (back to Python ``str``).
- The ``/variables`` group (names, units, bounds, optional breakpoints) that
  both formats use: :func:`write_variables` and :func:`read_variables`.
- :func:`atomic_h5`: create a file through a temporary file in the same
  folder and ``os.replace``, with fixed creation properties (``track_order``,
  ``libver="earliest"``) so that equal content gives equal bytes.

Only plain arrays and UTF-8 strings go through here; nothing is pickled.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence

import h5py
import numpy as np

from .types import SchedulingVariable

__all__ = ["STR", "strings", "decode_one", "decode", "write_variables", "read_variables",
           "atomic_h5"]

STR = h5py.string_dtype("utf-8")


def strings(values) -> np.ndarray:
    """An array of UTF-8 strings (``str(v)`` of every value) ready for h5py."""
    return np.array([str(v) for v in values], dtype=STR)


def decode_one(v) -> str:
    """A string read from h5py (``bytes`` or ``str``) as ``str``."""
    return v.decode("utf-8") if isinstance(v, bytes) else str(v)


def decode(ds) -> tuple[str, ...]:
    """All strings of a string dataset (scalar or any shape, flattened) as a tuple of ``str``."""
    if ds.shape == (0,):
        return ()
    data = ds[()]
    if np.ndim(data) == 0:
        return (decode_one(data),)
    return tuple(decode_one(v) for v in np.ravel(data))


def write_variables(f: h5py.Group, variables: Sequence[SchedulingVariable],
                    breakpoints: Sequence | None = None) -> None:
    """Create ``/variables`` with names, units, lower, upper and (grids only) breakpoints."""
    g = f.create_group("variables", track_order=True)
    g["names"] = strings(v.name for v in variables)
    g["units"] = strings(v.unit for v in variables)
    g["lower"] = np.array([v.lower for v in variables], dtype=float)
    g["upper"] = np.array([v.upper for v in variables], dtype=float)
    if breakpoints is not None:
        b = g.create_group("breakpoints", track_order=True)
        for v, bp in zip(variables, breakpoints, strict=False):
            b[v.name] = np.asarray(bp, dtype=float)


def read_variables(f: h5py.Group) -> tuple[tuple[SchedulingVariable, ...],
                                           tuple[np.ndarray, ...] | None]:
    """Inverse of :func:`write_variables`: ``(variables, breakpoints or None)``."""
    names = decode(f["variables/names"])
    units = decode(f["variables/units"]) if names else ()
    lower = f["variables/lower"][()]
    upper = f["variables/upper"][()]
    variables = tuple(SchedulingVariable(n, u, float(lo), float(hi))
                      for n, u, lo, hi in zip(names, units, lower, upper, strict=False))
    breakpoints = None
    if "variables/breakpoints" in f:
        breakpoints = tuple(np.asarray(f["variables/breakpoints"][n][()], dtype=float)
                            for n in names)
    return variables, breakpoints


def atomic_h5(path: str | os.PathLike, fill: Callable[[h5py.File], None]) -> None:
    """Create ``path`` through a temporary file in the same folder and ``os.replace``.

    ``fill(f)`` writes the content into the open file. If it raises, the
    temporary file is removed and an existing ``path`` is left as it was.

    Raises
    ------
    InputError
        The output folder does not exist.
    """
    from .atomic import write_file_atomic

    def writer(tmp: str) -> None:
        # track_order and libver="earliest" fix the layout, so equal content
        # gives equal bytes (h5py does not store object times by default).
        with h5py.File(tmp, "w", track_order=True, libver="earliest") as f:
            fill(f)
            f.flush()

    write_file_atomic(path, writer, "HDF5 file")
