"""Read a table back from the generated C99 source or from an FMU, without running code.

The C source (:mod:`schedule.export.c_source`) carries the whole linear table: the
breakpoints, the node matrices ``A, B, C, D`` (and ``H``) as ``static const double``
arrays written in the shortest form that reads back to the same double, the signal
names as C string literals (octal escapes decoded byte for byte), the sample time as a
macro and the default limits; the header comment gives the method, the source family's
SHA-256 and the units. An FMU (:mod:`schedule.export.fmu`) carries the same two files
under ``sources/``. This module parses exactly that text with regular expressions (it
compiles and runs nothing), so ``schedule check --table`` checks the numbers the target
is built from.

What the C does not hold: the ``inside`` mask of a scattered family's table (every node
is read as inside: the C lookup uses the stand-in nodes too, so they are checked as
they run), the variable bounds (taken as the breakpoint range) and gamma to more than six
digits (the check uses the family's).
"""

from __future__ import annotations

import os
import re
import zipfile
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..types import SchedulingVariable
from .antiwindup import ActuatorLimits
from .table import ScheduledTable, validate_table

__all__ = ["read_c_table", "read_fmu_table", "table_from_c_text"]

#: largest C file read from a folder or an FMU (bytes)
MAX_SOURCE_BYTES = 1 << 30
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


def _fail(where: str, what: str) -> InputError:
    return InputError(f"{where}: {what}; give the {{prefix}}_table.h and .c that `schedule "
                      "export -f c` wrote, unchanged")


def _define(header: str, name: str, where: str) -> str:
    m = re.search(rf"^#define {name} (\S+)\s*$", header, re.M)
    if not m:
        raise _fail(where, f"the header defines no {name}")
    return m.group(1)


def _doubles(source: str, name: str, where: str, required: bool = True):
    m = re.search(rf"static const double {re.escape(name)}\[(\d+)\] = \{{([^}}]*)\}};", source)
    if not m:
        if required:
            raise _fail(where, f"the source has no array {name}")
        return None
    tokens = [t.strip() for t in m.group(2).split(",") if t.strip()]
    values = []
    for t in tokens:
        if t in ("DBL_MAX", "-DBL_MAX"):
            values.append(np.inf if t == "DBL_MAX" else -np.inf)
        elif re.fullmatch(_NUMBER, t):
            values.append(float(t))
        else:
            raise _fail(where, f"array {name} holds {t[:20]!r}, not a number")
    if len(values) != int(m.group(1)):
        raise _fail(where, f"array {name} declares {m.group(1)} values but holds {len(values)}")
    return np.array(values, dtype=float)


def _c_strings(source: str, name: str, where: str) -> list[str]:
    m = re.search(rf"const char \*const {re.escape(name)}\[[^\]]*\] = \{{(.*?)\}};", source)
    if not m:
        raise _fail(where, f"the source has no name list {name}")
    out = []
    for lit in re.findall(r'"((?:[^"\\]|\\[0-7]{3})*)"', m.group(1)):
        data = bytearray()
        i = 0
        while i < len(lit):
            if lit[i] == "\\":
                data.append(int(lit[i + 1:i + 4], 8))
                i += 4
            else:
                data += lit[i].encode("ascii", "replace")
                i += 1
        try:
            out.append(data.decode("utf-8", "surrogatepass"))
        except UnicodeDecodeError:
            raise _fail(where, f"name list {name} is not UTF-8") from None
    return out


def _comment_text(text: str) -> str:
    """Undo :func:`schedule.export.c_source.c_comment`'s ``<U+XXXX>`` spelling."""
    return re.sub(r"<U\+([0-9A-F]{4,6})>", lambda m: chr(int(m.group(1), 16)), text)


def _units(header: str, letter: str, count: int) -> tuple[str, ...]:
    units = [""] * count
    for m in re.finditer(rf"^ \*   {letter}\[(\d+)\] = (.*)$", header, re.M):
        i = int(m.group(1))
        u = re.search(r" \[([^\]]*)\](?:, \d+ breakpoints from .*| \(limits .*\))?$",
                      m.group(2))
        if i < count and u:
            units[i] = _comment_text(u.group(1))
    return tuple(units)


def table_from_c_text(header: str, source: str, where: str = "C table") -> ScheduledTable:
    """The :class:`ScheduledTable` written as ``header`` (``.h``) and ``source`` (``.c``)."""
    m = re.match(r"/\* (\w+)_table\.h: scheduled discrete controller", header)
    if not m:
        raise _fail(where, "the header is not a scheduled table's")
    p = m.group(1)
    P = p.upper()
    try:
        d, n, ny, nu = (int(_define(header, f"{P}_{k}", where))
                        for k in ("N_VARIABLES", "N_STATES", "N_INPUTS", "N_OUTPUTS"))
        T = float(_define(header, f"{P}_SAMPLE_TIME", where))
        aw = int(_define(header, f"{P}_ANTI_WINDUP", where))
    except ValueError:
        raise _fail(where, "a size or the sample time is not a number") from None
    bps = tuple(_doubles(source, f"{p}_bp{k}", where) for k in range(d))
    shape = tuple(len(b) for b in bps)
    M = int(np.prod(shape)) if d else 0
    mats = {}
    for key, rows, cols in (("A", n, n), ("B", n, ny), ("C", nu, n), ("D", nu, ny),
                            ("H", n, nu)):
        if rows * cols == 0:
            mats[key] = np.zeros((M, rows, cols))
            continue
        arr = _doubles(source, f"{p}_tab_{key}", where, required=key != "H" or bool(aw))
        if arr is None:
            mats[key] = None
            continue
        if arr.size != M * rows * cols:
            raise _fail(where, f"{key} holds {arr.size} values for {M} nodes of {rows} x {cols}")
        mats[key] = arr.reshape(M, rows, cols)
    if not aw:
        mats["H"] = None
    names = _c_strings(source, f"{p}_variable_names", where)
    inputs = _c_strings(source, f"{p}_input_names", where)[:ny]
    outputs = _c_strings(source, f"{p}_output_names", where)[:nu]
    if len(names) != d:
        raise _fail(where, f"{len(names)} variable names for {d} variables")
    var_units = _units(header, "p", d)
    variables = tuple(SchedulingVariable(name, unit, float(b[0]), float(b[-1]))
                      for name, unit, b in zip(names, var_units, bps, strict=True))
    method_m = re.search(r"method\s*\n?\s*\*?\s*(tustin|zoh)(?: \(pre-warp (\S+) rad/s\))?"
                         r", gamma (\S+)\.", header)
    if not method_m:
        raise _fail(where, "the header comment names no discretization method")
    sha = re.search(r"Source family SHA-256: ([0-9a-f]{64})\.", header)
    version = re.search(r"generated by schedule (\S+); do not edit", source)
    bounds = [_doubles(source, f"{p}_{k}0", where) for k in ("lower", "upper", "rate")]
    if any(b.size != nu for b in bounds):
        raise _fail(where, f"the default limits do not hold {nu} values each")
    limits = ActuatorLimits(*bounds)
    try:
        gamma = float(method_m.group(3))
    except ValueError:
        gamma = float("nan")
    table = ScheduledTable(
        variables=variables, breakpoints=bps, inside=np.ones(M, dtype=bool),
        sample_time=T, method=method_m.group(1),
        prewarp=float(method_m.group(2)) if method_m.group(2) else 0.0, gamma=gamma,
        measured_names=tuple(inputs), control_names=tuple(outputs),
        measured_units=_units(header, "y", ny), control_units=_units(header, "u", nu),
        source_sha256=sha.group(1) if sha else "",
        tool_version=version.group(1) if version else "",
        extra={"read_from": "c"}, H=mats["H"], limits=limits if limits.any else None,
        **{k: mats[k] for k in "ABCD"})
    validate_table(table, where)
    return table


def _read_text(path: Path, where: str) -> str:
    try:
        if path.stat().st_size > MAX_SOURCE_BYTES:
            raise InputError(f"{where}: {path.name} is larger than {MAX_SOURCE_BYTES} bytes; "
                             "not a table this tool wrote")
        return path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read {path}: {exc}") from None


def read_c_table(path: str | os.PathLike) -> ScheduledTable:
    """Read the table from ``PREFIX_table.h`` and ``PREFIX_table.c``: ``path`` is either
    file or the folder holding them."""
    path = Path(path)
    if path.is_dir():
        found = sorted(path.glob("*_table.h"))
        if len(found) != 1:
            raise InputError(f"{path} holds {len(found)} *_table.h files; name the .c or .h "
                             "file of the table to check")
        header = found[0]
    else:
        header = path.with_suffix(".h")
    source = header.with_suffix(".c")
    for f in (header, source):
        if not f.is_file():
            raise InputError(f"{f} is missing: the C table needs both {header.name} and "
                             f"{source.name} side by side")
    return table_from_c_text(_read_text(header, str(header)), _read_text(source, str(source)),
                             str(source))


def read_fmu_table(path: str | os.PathLike) -> ScheduledTable:
    """Read the table from the C sources inside an FMU (``sources/NAME_table.h`` and
    ``.c``); nothing in the unit is run or extracted to disk."""
    where = str(path)
    try:
        with zipfile.ZipFile(path) as zf:
            infos = {i.filename: i for i in zf.infolist()}
            heads = [n for n in infos if re.fullmatch(r"sources/\w+_table\.h", n)]
            if len(heads) != 1:
                raise InputError(f"{where}: the unit holds {len(heads)} table headers in "
                                 "sources/; it is not an FMU that `schedule export` wrote")
            texts = []
            for name in (heads[0], heads[0][:-2] + ".c"):
                info = infos.get(name)
                if info is None or info.file_size > MAX_SOURCE_BYTES:
                    raise InputError(f"{where}: {name} is missing or too large")
                texts.append(zf.read(info).decode("utf-8"))
    except (zipfile.BadZipFile, OSError, UnicodeDecodeError, KeyError) as exc:
        raise InputError(f"{where} is not a readable FMU ({exc}); export it again with "
                         "`schedule export -f fmu`") from None
    return table_from_c_text(texts[0], texts[1], f"{where}:{heads[0][:-2]}.c")
