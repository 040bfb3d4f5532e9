"""The operating-point file: linearized plants over an envelope (HDF5).

Layout (format "schedule-operating-points", version 1; see docs/format.md)::

    /                      attrs: format, format_version, description
    /variables/names       (d,) UTF-8 strings
    /variables/units       (d,) UTF-8 strings
    /variables/lower       (d,) float64
    /variables/upper       (d,) float64
    /variables/breakpoints/<name>   (only for rectangular grids) float64
    /points/values         (N, d) float64 scheduling values
    /points/A  (N, n, n)   /points/B (N, n, m)   /points/C (N, p, n)   /points/D (N, p, m)
    /names/states (n,)  /names/inputs (m,)  /names/outputs (p,)   UTF-8 strings

All plants share one state coordinate system, named by /names/states.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from .design_file import MAX_MATRIX_ENTRY
from .errors import InputError
from .h5util import (
    H5Contents,
    atomic_h5,
    check_format,
    decode,
    expect,
    open_checked,
    read_variables,
    strings,
    write_variables,
)
from .names import check_names
from .types import LinearPlant, SchedulingVariable, point_text

FORMAT_NAME = "schedule-operating-points"
FORMAT_VERSION = 1
_FIX = "regenerate or re-export the operating-point file"


@dataclass(frozen=True)
class OperatingPoints:
    """Linearized plants at N operating points, stacked, with names."""

    variables: tuple[SchedulingVariable, ...]
    values: np.ndarray  # (N, d)
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    state_names: tuple[str, ...]
    input_names: tuple[str, ...]
    output_names: tuple[str, ...]
    breakpoints: tuple[np.ndarray, ...] | None = None
    description: str = ""

    def __len__(self) -> int:
        return int(self.values.shape[0])

    def plant(self, k: int) -> LinearPlant:
        """The linear plant at point ``k``."""
        return LinearPlant(self.A[k], self.B[k], self.C[k], self.D[k],
                           self.state_names, self.input_names, self.output_names)


def write_operating_points(path: str | os.PathLike, points: OperatingPoints) -> None:
    """Write ``points`` to ``path`` atomically (temporary file, then rename).

    Raises
    ------
    InputError
        The points are inconsistent (shapes, NaN, names, bounds) or the output
        folder does not exist.
    """
    path = Path(path)
    _validate(points, str(path))

    def fill(f: h5py.File) -> None:
        f.attrs["format"] = FORMAT_NAME
        f.attrs["format_version"] = FORMAT_VERSION
        f.attrs["description"] = points.description
        write_variables(f, points.variables, points.breakpoints)
        p = f.create_group("points", track_order=True)
        p["values"] = np.asarray(points.values, dtype=float)
        for key in ("A", "B", "C", "D"):
            p[key] = np.asarray(getattr(points, key), dtype=float)
        n = f.create_group("names", track_order=True)
        n["states"] = strings(points.state_names)
        n["inputs"] = strings(points.input_names)
        n["outputs"] = strings(points.output_names)

    atomic_h5(path, fill)


def read_operating_points(path: str | os.PathLike) -> OperatingPoints:
    """Read and validate an operating-point file; raise InputError naming the problem.

    The file's structure, dtypes and shapes are checked from its metadata
    (:func:`schedule.h5util.open_checked`, :func:`_check_layout`) before any
    array is read, so a damaged or forged file costs no more memory than its size.
    """
    path = Path(path)
    with open_checked(path, "operating-point file", _FIX) as (f, contents):
        check_format(f, path, FORMAT_NAME, FORMAT_VERSION, "operating-point file", _FIX)
        _check_layout(contents, path)
        variables, breakpoints = read_variables(f)
        description = f.attrs.get("description", "")
        pts = OperatingPoints(
            variables=variables,
            values=np.asarray(f["points/values"][()], dtype=float),
            A=f["points/A"][()], B=f["points/B"][()], C=f["points/C"][()],
            D=f["points/D"][()],
            state_names=decode(f["names/states"]), input_names=decode(f["names/inputs"]),
            output_names=decode(f["names/outputs"]), breakpoints=breakpoints,
            description=description if isinstance(description, str) else "")
    _validate(pts, str(path))
    return pts


def _check_layout(c: H5Contents, path: Path) -> None:
    """Dtypes and shapes of every dataset, consistent with one another, before reading."""
    d = expect(c, path, "variables/names", "string", (None,), "(d,)")[0]
    for key in ("units", "lower", "upper"):
        expect(c, path, f"variables/{key}", "string" if key == "units" else "number", (d,),
               f"({d},), one per variable")
    N = expect(c, path, "points/values", "number", (None, d), f"(N, {d})")[0]
    n = expect(c, path, "points/A", "number", (N, None, None), f"({N}, n, n)")[1]
    expect(c, path, "points/A", "number", (N, n, n), f"({N}, n, n)")
    m = expect(c, path, "points/B", "number", (N, n, None), f"({N}, {n}, m)")[2]
    p = expect(c, path, "points/C", "number", (N, None, n), f"({N}, p, {n})")[1]
    expect(c, path, "points/D", "number", (N, p, m), f"({N}, {p}, {m})")
    for key, size in (("states", n), ("inputs", m), ("outputs", p)):
        expect(c, path, f"names/{key}", "string", (size,), f"({size},), one name per "
               f"{key[:-1]}")
    bps = [name for name in c.datasets if name.startswith("variables/breakpoints/")]
    for name in bps:
        expect(c, path, name, "number", (None,), "(k,), one list per variable")
    if bps and len(bps) != d:
        raise InputError(f"{path}: variables/breakpoints holds {len(bps)} lists for {d} "
                         "variables; give one per variable or none")


def _validate(pts: OperatingPoints, where: str) -> None:
    values = np.asarray(pts.values)
    d = len(pts.variables)
    if values.ndim != 2 or values.shape[1] != d:
        raise InputError(f"{where}: points/values has shape {values.shape}, expected (N, {d})")
    N = values.shape[0]
    if N == 0:
        raise InputError(f"{where}: the file holds no operating points")
    for name, arr in (("values", values), ("A", pts.A), ("B", pts.B), ("C", pts.C),
                      ("D", pts.D)):
        if np.iscomplexobj(arr):
            raise InputError(f"{where}: points/{name} holds complex numbers; give the real "
                             "matrices of a real state-space model")
        if np.asarray(arr).dtype.kind not in "biuf":
            raise InputError(f"{where}: points/{name} holds {np.asarray(arr).dtype} values, "
                             "expected real numbers")
    A, B, C, D = (np.asarray(x) for x in (pts.A, pts.B, pts.C, pts.D))
    if A.ndim != 3 or A.shape[0] != N or A.shape[1] != A.shape[2]:
        raise InputError(f"{where}: points/A has shape {A.shape}, expected ({N}, n, n)")
    n = A.shape[1]
    m = B.shape[2] if B.ndim == 3 else -1
    p = C.shape[1] if C.ndim == 3 else -1
    for name, arr, shape in (("B", B, (N, n, m)), ("C", C, (N, p, n)), ("D", D, (N, p, m))):
        if arr.shape != shape or min(shape) < 1:
            raise InputError(f"{where}: points/{name} has shape {arr.shape}, expected {shape}")
    for name, arr in (("values", values), ("A", A), ("B", B), ("C", C), ("D", D)):
        bad = ~np.isfinite(arr.reshape(N, -1)).all(axis=1)
        if bad.any():
            k = int(np.argmax(bad))
            raise InputError(f"{where}: points/{name} holds NaN or inf at point {k} "
                             f"({point_text([v.name for v in pts.variables], values[k])}); "
                             "fix the linearization")
        huge = np.abs(arr.reshape(N, -1)).max(axis=1, initial=0.0) > MAX_MATRIX_ENTRY
        if name != "values" and huge.any():
            k = int(np.argmax(huge))
            raise InputError(f"{where}: points/{name} holds an entry of magnitude "
                             f"{np.abs(arr[k]).max():.3g} at point {k}, beyond "
                             f"{MAX_MATRIX_ENTRY:g}; rescale the plant's units (signals of "
                             "order one)")
    for label, names, size in (("states", pts.state_names, n), ("inputs", pts.input_names, m),
                               ("outputs", pts.output_names, p)):
        if len(names) != size:
            raise InputError(f"{where}: names/{label} has {len(names)} names for {size} "
                             f"{label}; give one name per {label[:-1]}")
        if len(set(names)) != len(names):
            raise InputError(f"{where}: names/{label} has duplicate names; make them unique")
        check_names(names, f"{where}: names/{label}")
    check_names([v.name for v in pts.variables], f"{where}: variables/names")
    check_names([v.unit for v in pts.variables], f"{where}: variables/units")
    for j, v in enumerate(pts.variables):
        if not (np.isfinite(v.lower) and np.isfinite(v.upper) and v.lower < v.upper):
            raise InputError(f"{where}: scheduling variable '{v.name}' has bounds "
                             f"[{v.lower}, {v.upper}]; need finite lower < upper")
        col = values[:, j]
        out = (col < v.lower) | (col > v.upper)
        if out.any():
            k = int(np.argmax(out))
            raise InputError(f"{where}: point {k} has {v.name} = {col[k]:g} outside its bounds "
                             f"[{v.lower:g}, {v.upper:g}]; widen the bounds or drop the point")

