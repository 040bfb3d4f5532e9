"""The family file: a controller family at a common gamma, stored as HDF5.

Layout (format ``"schedule-family"``, version 1; every dataset and attribute is
documented with shapes and units in docs/format.md)::

    /                        attrs: format, format_version, gamma, design_text,
                                    design_base_dir, tool_version, created,
                                    content_sha256
    /variables/names, units, lower, upper          (d,)
    /variables/breakpoints/<name>                  (rectangular grids only)
    /points/values (N, d)  grid_index (N, d)  status (N,)  reasons (N,)  gamma_opt (N,)
    /plant/<A, B1, B2, C1, C2, D11, D12, D21, D22>  (N, rows, cols)
    /controller/<A, B, C, D>                        (N, rows, cols)
    /pieces/<name>                                  (N, ...)
    /names/<measured, controls, exogenous, performance, states>
    /names/units/<measured, controls, ...>          one unit per name (optional)
    /interpolant  attrs = interpolant["attrs"];  /interpolant/arrays/<name>
    /extra/<name>                                   arrays or UTF-8 strings

Only plain numeric arrays, UTF-8 strings and scalar attributes are stored:
nothing is pickled and nothing read from a file is ever evaluated. Files are
written atomically (temporary file in the same folder, then ``os.replace``)
with fixed creation properties, so writing the same family twice gives files
that differ only in the ``created`` attribute. A SHA-256 digest of the
content (``content_sha256``) lets :func:`read_family` detect flipped bytes in
the raw data, which HDF5 itself does not check.

The module also keeps the small "partial result" files of an interrupted
design run (:func:`write_partial`, :func:`read_partial`).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import os
from collections.abc import Mapping
from pathlib import Path

import h5py
import numpy as np

from .design_file import MAX_MATRIX_ENTRY
from .errors import InputError
from .h5util import STR as _STR
from .h5util import H5Contents, check_format, expect, open_checked, read_variables, write_variables
from .h5util import atomic_h5 as _atomic_h5
from .h5util import decode as _decode
from .h5util import decode_one as _decode_one
from .h5util import strings as _strings
from .names import check_names
from .types import Family

FORMAT_NAME = "schedule-family"
FORMAT_VERSION = 1
PARTIAL_FORMAT_NAME = "schedule-family-partial"
PARTIAL_FORMAT_VERSION = 1
_FIX = "re-run 'schedule design' or restore the file"

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
CONTROLLER_KEYS = ("A", "B", "C", "D")
_NAME_FIELDS = (("measured", "measured_names"), ("controls", "control_names"),
                ("exogenous", "exogenous_names"), ("performance", "performance_names"),
                ("states", "state_names"))


# ----------------------------------------------------------------------------- helpers
def _is_string_array(arr: np.ndarray) -> bool:
    return arr.dtype.kind in "USO"


def _put(group: h5py.Group, name: str, value) -> None:
    """Store a numeric array, a string or an array of strings as a dataset."""
    if isinstance(value, str):
        group.create_dataset(name, data=value, dtype=_STR)
        return
    arr = np.asarray(value)
    if _is_string_array(arr):
        group.create_dataset(name, data=np.array([str(v) for v in arr.ravel()], dtype=_STR)
                             .reshape(arr.shape), dtype=_STR)
        return
    if arr.dtype.kind not in "biuf":
        raise InputError(f"cannot store '{group.name}/{name}' of dtype {arr.dtype}; store "
                         "numbers or strings only")
    group.create_dataset(name, data=arr)


def _get(ds: h5py.Dataset):
    """Inverse of :func:`_put`: a numeric ndarray, a str or an ndarray of str."""
    if h5py.check_string_dtype(ds.dtype) is not None:
        if ds.shape == ():
            return _decode_one(ds[()])
        data = ds[()]
        return np.array([_decode_one(v) for v in data.ravel()], dtype=str).reshape(data.shape)
    return np.asarray(ds[()])


def _attr_value(value):
    """Normalize an attribute value read from h5py to str / int / float / bool / ndarray."""
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, np.ndarray):
        if _is_string_array(value):
            return np.array([_decode_one(v) for v in value.ravel()], dtype=str)
        return value
    return value


def _set_attr(obj, name: str, value) -> None:
    if isinstance(value, str):
        obj.attrs.create(name, value, dtype=_STR)
    elif isinstance(value, (bool, np.bool_)):
        obj.attrs[name] = np.bool_(value)
    elif isinstance(value, (int, np.integer)):
        obj.attrs[name] = np.int64(value)
    elif isinstance(value, (float, np.floating)):
        obj.attrs[name] = np.float64(value)
    else:
        arr = np.asarray(value)
        if _is_string_array(arr):
            obj.attrs.create(name, [str(v) for v in arr.ravel()], dtype=_STR)
        elif arr.dtype.kind in "biuf":
            obj.attrs[name] = arr
        else:
            raise InputError(f"cannot store attribute '{name}' of type {type(value).__name__}; "
                             "use a string, a number or an array of numbers")


def _digest(f: h5py.File) -> str:
    """SHA-256 over every dataset (path, dtype, shape, bytes) and every attribute.

    The ``created`` and ``content_sha256`` root attributes are left out, so the
    digest only depends on the content.
    """
    h = hashlib.sha256()

    def add_attrs(obj, path: str) -> None:
        for key in sorted(obj.attrs.keys()):
            if path == "/" and key in ("created", "content_sha256"):
                continue
            h.update(f"@{path}:{key}=".encode())
            h.update(repr(_canonical(_attr_value(obj.attrs[key]))).encode("utf-8"))

    add_attrs(f, "/")
    names: list[str] = []
    f.visit(names.append)
    for name in sorted(names):
        obj = f[name]
        add_attrs(obj, name)
        if isinstance(obj, h5py.Dataset):
            value = _get(obj)
            h.update(f"#{name}:".encode())
            if isinstance(value, str):
                h.update(b"s" + value.encode("utf-8"))
            elif _is_string_array(value):
                h.update(f"S{value.shape}".encode())
                for v in value.ravel():
                    b = str(v).encode("utf-8")
                    h.update(len(b).to_bytes(8, "little") + b)
            else:
                h.update(f"{value.dtype.str}{value.shape}".encode())
                h.update(np.ascontiguousarray(value).tobytes())
    return h.hexdigest()


def _canonical(value):
    if isinstance(value, np.ndarray):
        return (value.dtype.str, value.shape, value.tolist())
    return value


# ----------------------------------------------------------------------------- family file
def family_base_dir(family: Family) -> str:
    """The design file's folder recorded with the family ('' when unknown)."""
    return str(family.design_base_dir or "")


def write_family(path: str | os.PathLike, family: Family) -> None:
    """Write ``family`` to ``path`` atomically in the family-file format.

    Parameters
    ----------
    path : output file; its folder must exist. An existing file is replaced
        only once the new one is complete.
    family : the family. The design file's folder ``family.design_base_dir``
        is kept as a root attribute.

    Raises
    ------
    InputError
        When the family is inconsistent (sizes, status values) or holds data
        that cannot be stored as plain arrays.
    """
    path = Path(path)
    _validate_family(family, str(path))
    created = family.created or _dt.datetime.now(_dt.timezone.utc).replace(
        microsecond=0).isoformat()
    if not family.tool_version:
        from . import __version__
        tool_version = __version__
    else:
        tool_version = family.tool_version

    def fill(f: h5py.File) -> None:
        f.attrs["format"] = FORMAT_NAME
        f.attrs["format_version"] = np.int64(FORMAT_VERSION)
        f.attrs["gamma"] = np.float64(family.gamma)
        _set_attr(f, "design_text", family.design_text)
        _set_attr(f, "design_base_dir", family_base_dir(family))
        _set_attr(f, "tool_version", tool_version)
        _set_attr(f, "created", created)
        write_variables(f, family.variables, family.breakpoints)
        p = f.create_group("points", track_order=True)
        p["values"] = np.asarray(family.points, dtype=float)
        if family.grid_index is not None:
            p["grid_index"] = np.asarray(family.grid_index, dtype=np.int64)
        p["status"] = _strings(family.status)
        p["reasons"] = _strings(family.reasons)
        p["gamma_opt"] = np.asarray(family.gamma_opt, dtype=float)
        for group, data, keys in (("plant", family.plant, PLANT_KEYS),
                                  ("controller", family.controller, CONTROLLER_KEYS),
                                  ("pieces", family.pieces, tuple(family.pieces))):
            grp = f.create_group(group, track_order=True)
            for key in keys:
                grp[key] = np.asarray(data[key], dtype=float)
        n = f.create_group("names", track_order=True)
        for label, attr in _NAME_FIELDS:
            n[label] = _strings(getattr(family, attr))
        if any(any(family.units_of(label)) for label, _ in _NAME_FIELDS):
            u = n.create_group("units", track_order=True)
            for label, _ in _NAME_FIELDS:
                u[label] = _strings(family.units_of(label))
        if family.interpolant is not None:
            _write_interpolant(f, family.interpolant)
        e = f.create_group("extra", track_order=True)
        for key, value in family.extra.items():
            _put(e, key, value)
        f.attrs["content_sha256"] = _digest(f)

    _atomic_h5(path, fill)


def _write_interpolant(f: h5py.Group, interpolant: Mapping) -> None:
    unknown = set(interpolant) - {"arrays", "attrs"}
    if unknown:
        raise InputError(f"interpolant has keys {sorted(unknown)}; only 'arrays' and 'attrs' "
                         "can be stored")
    g = f.create_group("interpolant", track_order=True)
    for key, value in dict(interpolant.get("attrs", {})).items():
        _set_attr(g, str(key), value)
    a = g.create_group("arrays", track_order=True)
    for key, value in dict(interpolant.get("arrays", {})).items():
        _put(a, str(key), value)


def _read_interpolant(g: h5py.Group) -> dict:
    attrs = {k: _attr_value(v) for k, v in g.attrs.items()}
    arrays: dict = {}
    if "arrays" in g:
        a = g["arrays"]

        def visit(name, obj):
            if isinstance(obj, h5py.Dataset):
                arrays[name] = _get(obj)

        a.visititems(visit)
    return {"arrays": arrays, "attrs": attrs}


def write_interpolant(path: str | os.PathLike, interpolant: dict | None,
                      extra: Mapping | None = None) -> None:
    """Replace the interpolant (and update ``extra``) of an existing family file, atomically."""
    family = read_family(path)
    family.interpolant = interpolant
    if extra:
        family.extra = {**family.extra, **dict(extra)}
    write_family(path, family)


def read_interpolant(path: str | os.PathLike) -> dict | None:
    """The stored interpolant ``{"arrays": ..., "attrs": ...}`` of a family file, or None."""
    return read_family(path).interpolant


def read_family(path: str | os.PathLike) -> Family:
    """Read and check a family file.

    The file's structure is checked from its metadata first
    (:func:`schedule.h5util.open_checked`: no links leaving the file, no
    virtual or external data, plain dtypes, declared sizes the file can hold,
    then :func:`_check_layout`: every shape consistent with the points and the
    signal counts), then the content digest, then the values
    (:func:`_validate_family`: finite numbers at the synthesized points, names).

    Raises
    ------
    InputError
        One line naming the file and the problem: missing, not a regular file,
        not HDF5 / truncated / corrupt (including a content digest that does not
        match), not a family file, an unsupported format version, or
        inconsistent sizes or values.
    """
    path = Path(path)
    with open_checked(path, "family file", _FIX) as (f, contents):
        check_format(f, path, FORMAT_NAME, FORMAT_VERSION, "family file",
                     "give a file written by 'schedule design'")
        _check_layout(f, contents, path)
        stored = _attr_value(f.attrs.get("content_sha256", ""))
        if stored != _digest(f):
            raise InputError(f"{path} is corrupt (content digest does not match); "
                             "re-run 'schedule design' or restore the file")
        family = _read_open_family(f)
    _validate_family(family, str(path))
    return family


def _check_layout(f: h5py.File, c: H5Contents, path: Path) -> None:
    """Dtypes and shapes of every dataset, consistent with one another, before reading data."""
    for key in ("gamma",):
        v = f.attrs.get(key)
        if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, float, np.integer,
                                                                 np.floating)):
            raise InputError(f"{path}: attribute '{key}' is not a number; {_FIX}")
    for key in ("design_text", "design_base_dir", "tool_version", "created",
                "content_sha256"):
        v = f.attrs.get(key, "")
        if not isinstance(v, (str, bytes)):
            raise InputError(f"{path}: attribute '{key}' is not text; {_FIX}")
    d = expect(c, path, "variables/names", "string", (None,), "(d,)")[0]
    for key in ("units", "lower", "upper"):
        expect(c, path, f"variables/{key}", "string" if key == "units" else "number", (d,),
               f"({d},), one per variable")
    N = expect(c, path, "points/values", "number", (None, d), f"(N, {d})")[0]
    expect(c, path, "points/grid_index", "number", (N, d), f"({N}, {d})", required=False)
    for key, kind in (("status", "string"), ("reasons", "string"), ("gamma_opt", "number")):
        expect(c, path, f"points/{key}", kind, (N,), f"({N},), one per point")
    n = expect(c, path, "plant/A", "number", (N, None, None), f"({N}, n, n)")[1]
    expect(c, path, "plant/A", "number", (N, n, n), f"({N}, n, n)")
    nw = expect(c, path, "plant/B1", "number", (N, n, None), f"({N}, {n}, w)")[2]
    nu = expect(c, path, "plant/B2", "number", (N, n, None), f"({N}, {n}, u)")[2]
    nz = expect(c, path, "plant/C1", "number", (N, None, n), f"({N}, z, {n})")[1]
    ny = expect(c, path, "plant/C2", "number", (N, None, n), f"({N}, y, {n})")[1]
    for key, rows, cols in (("D11", nz, nw), ("D12", nz, nu), ("D21", ny, nw), ("D22", ny, nu)):
        expect(c, path, f"plant/{key}", "number", (N, rows, cols), f"({N}, {rows}, {cols})")
    k = expect(c, path, "controller/A", "number", (N, None, None), f"({N}, k, k)")[1]
    for key, rows, cols in (("A", k, k), ("B", k, ny), ("C", nu, k), ("D", nu, ny)):
        expect(c, path, f"controller/{key}", "number", (N, rows, cols),
               f"({N}, {rows}, {cols})")
    for label, size in (("measured", ny), ("controls", nu), ("exogenous", nw),
                        ("performance", nz), ("states", n)):
        shape = expect(c, path, f"names/{label}", "string", (None,), f"({size},)")
        if shape[0] not in (0, size):
            raise InputError(f"{path}: names/{label} holds {shape[0]} names for {size} "
                             "signals; the file is inconsistent")
    for name, (shape, _dtype) in c.datasets.items():
        if name.startswith("pieces/"):
            expect(c, path, name, "number", (N,) + (None,) * (len(shape) - 1),
                   f"({N}, ...), one entry per point")
        elif name.startswith("variables/breakpoints/"):
            expect(c, path, name, "number", (None,), "(k,)")


def _read_open_family(f: h5py.File) -> Family:
    variables, breakpoints = read_variables(f)
    p = f["points"]
    status = np.array(_decode(p["status"]), dtype=str)
    reasons = _decode(p["reasons"])
    extra = {k: _get(v) for k, v in f["extra"].items()} if "extra" in f else {}
    base_dir = str(_attr_value(f.attrs.get("design_base_dir", "")))
    family = Family(
        variables=variables,
        points=np.asarray(p["values"][()], dtype=float),
        status=status,
        reasons=tuple(reasons),
        gamma_opt=np.asarray(p["gamma_opt"][()], dtype=float),
        gamma=float(_attr_value(f.attrs["gamma"])),
        plant={k: np.asarray(f["plant"][k][()]) for k in PLANT_KEYS},
        controller={k: np.asarray(f["controller"][k][()]) for k in CONTROLLER_KEYS},
        pieces={k: np.asarray(v[()]) for k, v in f["pieces"].items()},
        measured_names=_decode_names(f, "measured"),
        control_names=_decode_names(f, "controls"),
        exogenous_names=_decode_names(f, "exogenous"),
        performance_names=_decode_names(f, "performance"),
        state_names=_decode_names(f, "states"),
        breakpoints=breakpoints,
        grid_index=np.asarray(p["grid_index"][()]) if "grid_index" in p else None,
        design_text=str(_attr_value(f.attrs.get("design_text", ""))),
        tool_version=str(_attr_value(f.attrs.get("tool_version", ""))),
        created=str(_attr_value(f.attrs.get("created", ""))),
        design_base_dir=base_dir,
        interpolant=_read_interpolant(f["interpolant"]) if "interpolant" in f else None,
        extra=extra,
        units=_read_units(f),
    )
    return family


def _read_units(f: h5py.File) -> dict[str, tuple[str, ...]]:
    """``/names/units/<group>`` (absent in files written before units existed: no units)."""
    g = f["names"].get("units")
    if not isinstance(g, h5py.Group):
        return {}
    return {label: _decode(g[label]) for label, _ in _NAME_FIELDS if label in g}


def _decode_names(f: h5py.File, label: str) -> tuple[str, ...]:
    return _decode(f["names"][label])


def _validate_family(family: Family, where: str) -> None:
    """Sizes and values that every reader may rely on; InputError naming the field.

    Used on write (a family built in Python) and on read (after the digest, so
    that a file edited with a recomputed digest is held to the same rules):
    shapes, real finite numbers wherever a point is 'ok' (failed points hold
    zeros), points inside the variable bounds, breakpoints and grid indices
    that agree with the points, finite interpolant arrays, plain names.
    """
    points = np.asarray(family.points)
    d = len(family.variables)
    if points.ndim != 2 or points.shape[1] != d:
        raise InputError(f"{where}: points have shape {points.shape}, expected (N, {d}) for "
                         f"{d} scheduling variables")
    N = points.shape[0]
    if N == 0:
        raise InputError(f"{where}: the family holds no operating points")
    status = np.asarray(family.status)
    if status.shape != (N,) or len(family.reasons) != N or np.shape(family.gamma_opt) != (N,):
        raise InputError(f"{where}: status/reasons/gamma_opt must each hold {N} entries (one "
                         "per point)")
    bad = sorted(set(map(str, status)) - {"ok", "failed"})
    if bad:
        raise InputError(f"{where}: point status {bad[0]!r} is not 'ok' or 'failed'")
    ok = status == "ok"
    for v in family.variables:
        if not (np.isfinite(v.lower) and np.isfinite(v.upper) and v.lower < v.upper):
            raise InputError(f"{where}: scheduling variable '{v.name}' has bounds "
                             f"[{v.lower}, {v.upper}]; need finite lower < upper")
    _real_finite(where, "points/values", points, np.ones(N, bool))
    lo = np.array([v.lower for v in family.variables])
    hi = np.array([v.upper for v in family.variables])
    outside = np.any((points < lo) | (points > hi), axis=1)
    if outside.any():
        k = int(np.argmax(outside))
        raise InputError(f"{where}: point {k} lies outside the scheduling-variable bounds; "
                         "the file is inconsistent")
    if family.breakpoints is not None:
        if len(family.breakpoints) != d:
            raise InputError(f"{where}: {len(family.breakpoints)} breakpoint lists for {d} "
                             "scheduling variables")
        for j, bp in enumerate(family.breakpoints):
            bp = np.asarray(bp, dtype=float)
            if bp.ndim != 1 or bp.size == 0 or not np.isfinite(bp).all() or \
                    np.any(np.diff(bp) <= 0):
                raise InputError(f"{where}: the breakpoints of {family.variables[j].name} are "
                                 "not finite and strictly increasing")
    if family.grid_index is not None:
        gi = np.asarray(family.grid_index)
        if gi.shape != (N, d):
            raise InputError(f"{where}: grid_index has shape {gi.shape}, expected ({N}, {d})")
        if family.breakpoints is None:
            raise InputError(f"{where}: grid_index is given without breakpoints")
        for j, bp in enumerate(family.breakpoints):
            col = gi[:, j]
            if gi.dtype.kind not in "iu" or np.any(col < 0) or np.any(col >= len(bp)) or \
                    not np.allclose(np.asarray(bp, dtype=float)[np.clip(col, 0, len(bp) - 1)],
                                    points[:, j], rtol=1e-12, atol=0.0):
                raise InputError(f"{where}: grid_index of {family.variables[j].name} does not "
                                 "point at the breakpoints of the points")
    if not (np.isfinite(family.gamma) and family.gamma > 0):
        raise InputError(f"{where}: common gamma {family.gamma} must be a positive number")
    opt = np.asarray(family.gamma_opt)
    if np.iscomplexobj(opt) or np.any(np.isinf(opt)) or np.any(opt[np.isfinite(opt)] <= 0):
        raise InputError(f"{where}: gamma_opt must hold positive numbers (NaN where not "
                         "computed)")
    for group, data, keys in (("plant", family.plant, PLANT_KEYS),
                              ("controller", family.controller, CONTROLLER_KEYS),
                              ("pieces", family.pieces, tuple(family.pieces))):
        for key in keys:
            if key not in data:
                raise InputError(f"{where}: {group}/{key} is missing")
            arr = np.asarray(data[key])
            if arr.ndim < 1 or arr.shape[0] != N:
                raise InputError(f"{where}: {group}/{key} has shape {arr.shape}; the first "
                                 f"axis must be the {N} points")
            _real_finite(where, f"{group}/{key}", arr, ok,
                         MAX_MATRIX_ENTRY if group in ("plant", "controller") else None)
    A = np.asarray(family.plant["A"])
    if A.ndim != 3 or A.shape[1] != A.shape[2]:
        raise InputError(f"{where}: plant/A has shape {A.shape}, expected (N, n, n)")
    n = A.shape[1]
    if family.state_names and len(family.state_names) != n:
        raise InputError(f"{where}: {len(family.state_names)} state names for {n} states")
    for label, attr in _NAME_FIELDS:
        check_names(getattr(family, attr), f"{where}: names/{label}")
        units = family.units.get(label)
        if units is not None and len(units) != len(getattr(family, attr)):
            raise InputError(f"{where}: {len(units)} units for {len(getattr(family, attr))} "
                             f"{label} signals; give one unit per signal")
        if units is not None:
            check_names(units, f"{where}: names/units/{label}")
    check_names([v.name for v in family.variables], f"{where}: variables/names")
    check_names([v.unit for v in family.variables], f"{where}: variables/units")
    if family.interpolant is not None:
        for key, value in dict(family.interpolant.get("arrays", {})).items():
            arr = np.asarray(value)
            if arr.dtype.kind in "USO":
                continue
            if np.iscomplexobj(arr) or arr.dtype.kind not in "biuf" or \
                    (arr.dtype.kind == "f" and not np.isfinite(arr).all()):
                raise InputError(f"{where}: interpolant array '{key}' holds NaN, inf or "
                                 "non-real values; the interpolant is damaged: re-run "
                                 "'schedule design' (or refit it)")


def _real_finite(where: str, name: str, arr: np.ndarray, rows: np.ndarray,
                 limit: float | None = None) -> None:
    """``arr`` holds real numbers, finite (and at most ``limit`` in magnitude) in the rows
    ``rows`` (the 'ok' points)."""
    arr = np.asarray(arr)
    if np.iscomplexobj(arr):
        raise InputError(f"{where}: {name} holds complex numbers; give real matrices")
    if arr.dtype.kind not in "biuf":
        raise InputError(f"{where}: {name} holds {arr.dtype} values, expected real numbers")
    if arr.dtype.kind == "f" and rows.any():
        sub = arr[rows].reshape(int(rows.sum()), -1)
        bad = ~np.isfinite(sub).all(axis=1)
        if bad.any():
            k = int(np.flatnonzero(rows)[np.argmax(bad)])
            raise InputError(f"{where}: {name} holds NaN or inf at point {k}, which is "
                             "marked 'ok'; the family is damaged: re-run 'schedule design'")
        if limit is not None:
            huge = np.abs(sub).max(axis=1, initial=0.0) > limit
            if huge.any():
                k = int(np.flatnonzero(rows)[np.argmax(huge)])
                raise InputError(f"{where}: {name} holds an entry beyond {limit:g} in "
                                 f"magnitude at point {k}; the family is damaged or badly "
                                 "scaled: rescale the plant and re-run 'schedule design'")


# ----------------------------------------------------------------------------- partial results
def write_partial(path: str | os.PathLike, arrays: Mapping[str, object],
                  attrs: Mapping[str, object]) -> None:
    """Write the partial results of an interrupted run atomically.

    ``arrays`` maps slash-separated names to numeric arrays or strings;
    ``attrs`` maps names to scalars/strings. The whole file is replaced at
    once, so a crash at any moment leaves either the previous or the new
    partial file, never a damaged one.
    """
    path = Path(path)

    def fill(f: h5py.File) -> None:
        f.attrs["format"] = PARTIAL_FORMAT_NAME
        f.attrs["format_version"] = np.int64(PARTIAL_FORMAT_VERSION)
        for key, value in attrs.items():
            _set_attr(f, key, value)
        for key, value in arrays.items():
            group, _, name = key.rpartition("/")
            target = f.require_group(group) if group else f
            _put(target, name, value)

    _atomic_h5(path, fill)


def read_partial(path: str | os.PathLike) -> tuple[dict, dict] | None:
    """Read a partial-result file: ``(arrays, attrs)``, or None when it is absent.

    Raises
    ------
    InputError
        When the file exists but is not a readable partial-result file.
    """
    path = Path(path)
    if not path.is_file():
        return None
    try:
        with h5py.File(path, "r") as f:
            if _attr_value(f.attrs.get("format", "")) != PARTIAL_FORMAT_NAME or \
                    _attr_value(f.attrs.get("format_version", -1)) != PARTIAL_FORMAT_VERSION:
                raise InputError(f"{path} is not a partial-result file of this tool version; "
                                 "delete it and run without --resume")
            attrs = {k: _attr_value(v) for k, v in f.attrs.items()}
            arrays: dict = {}

            def visit(name, obj):
                if isinstance(obj, h5py.Dataset):
                    arrays[name] = _get(obj)

            f.visititems(visit)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{path} is unreadable ({type(exc).__name__}); delete it and run "
                         "without --resume") from None
    return arrays, attrs
