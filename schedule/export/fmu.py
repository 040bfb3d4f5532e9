"""FMI 2.0 co-simulation unit (FMU) of a scheduled discrete controller.

:func:`write_fmu` writes ``NAME.fmu``, a zip archive laid out as the Functional
Mock-up Interface standard 2.0 asks (Modelica Association, FMI 2.0.x, section 4):

    modelDescription.xml          variables, units, sample time, source-file list
    binaries/<platform>/NAME.so   built here with the system C compiler (when found)
    sources/NAME_table.h/.c       the table's C99 code (:mod:`schedule.export.c_source`)
    sources/NAME_fmi2.c           the FMI wrapper written here
    documentation/README.txt      variables, timing, rebuild command, caution
    documentation/licenses/       licence of the FMI headers used to build the binary

The FMI headers (``fmi2Functions.h``, ``fmi2FunctionTypes.h``,
``fmi2TypesPlatform.h``) are the standard's own files, vendored unchanged in
``schedule/export/fmi2/`` with their BSD licence (a test checks them against the copies
that ship with fmpy); the standard leaves them out of ``sources/``, importers bring
their own. NAME (the file name's stem) is the FMI model identifier: a C identifier.

Variables (docs/tables.md, "FMU"): the measurements (controller inputs, deviations from
reference or trim) and the scheduling variables are inputs; the limited control
commands are outputs (discrete, changing at the samples); the sample time (fixed), the
per-control magnitude and rate limits (tunable), the command held before the start
and, when the table carries the anti-windup gain, the switches ``anti_windup``
(tunable) and ``bumpless_start`` (fixed) are parameters.

Timing: the controller samples at ``t0 + k T``; a ``fmi2DoStep(t, h)`` runs every
sample in ``[t, t + h)`` with the inputs last set, so the command computed from the
inputs at ``t_k`` is the output from the end of that step on.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
import tempfile
import time
import uuid
import zipfile
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from xml.etree import ElementTree

import numpy as np

from ..atomic import write_file_atomic
from ..errors import InputError
from ..types import rate_unit
from .c_source import c_comment, c_source_text, check_prefix
from .table import ScheduledTable

FMI_HEADERS = ("fmi2Functions.h", "fmi2FunctionTypes.h", "fmi2TypesPlatform.h")
#: the FMI wrapper's C text (str.format fields, doubled braces), package data
WRAPPER_TEMPLATE = "fmi2_wrapper.c.tmpl"
#: flags of the host build; tests add -Werror
BUILD_FLAGS = ("-std=c99", "-O2", "-Wall", "-Wextra", "-pedantic", "-fPIC", "-shared",
               "-fvisibility=hidden")
_NO_LIMIT = "1.7976931348623157e+308"  # DBL_MAX: "no limit" in the XML start values
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)  # fixed time stamps: the same table gives the same bytes


@dataclass(frozen=True)
class FmuVariable:
    """One ScalarVariable of the unit (value references are unique over all types)."""

    name: str
    value_reference: int
    kind: str  # "Real" or "Boolean"
    causality: str
    variability: str
    initial: str | None
    start: str | None
    unit: str
    description: str


@dataclass(frozen=True)
class FmuOutcome:
    """What :func:`write_fmu` wrote: the path, the platform of the binary (None for a
    source-only unit), the build time in seconds and a note (why there is no binary)."""

    path: Path
    platform: str | None
    build_seconds: float
    note: str = ""


def fmi2_header_dir() -> Path:
    """Folder of the vendored FMI 2.0 headers."""
    return Path(str(resources.files("schedule.export").joinpath("fmi2")))


def host_platform() -> tuple[str, str] | None:
    """FMI 2.0 platform folder and shared-library suffix of this machine, or None."""
    bits = "64" if sys.maxsize > 2 ** 32 else "32"
    if sys.platform.startswith("linux"):
        return "linux" + bits, ".so"
    if sys.platform == "darwin":
        return "darwin" + bits, ".dylib"
    if sys.platform == "win32":
        return "win" + bits, ".dll"
    return None


def find_compiler() -> str | None:
    """The system C compiler: ``$CC`` if set and found, else ``cc``, ``gcc`` or ``clang``."""
    env = os.environ.get("CC", "").strip()
    for name in ([env] if env else []) + ["cc", "gcc", "clang"]:
        found = shutil.which(name)
        if found:
            return found
    return None


def model_identifier(path: str | os.PathLike) -> str:
    """The FMI model identifier of ``path``: its stem, which must be a C identifier."""
    path = Path(path)
    if path.suffix.lower() != ".fmu":
        raise InputError(f"FMU path {path} must end in .fmu (for example controller.fmu)")
    stem = path.stem
    try:
        return check_prefix(stem)
    except InputError:
        raise InputError(f"FMU file name {path.name!r}: the stem is the FMI model identifier "
                         "and must be a C identifier (a letter, then letters, digits and "
                         "underscores, at most 31 characters); for example "
                         "crane_controller.fmu") from None


# ----------------------------------------------------------------------------- variables
def _check_name(name: str, what: str) -> str:
    bad = [ch for ch in name if ord(ch) < 32 or ord(ch) == 127 or 0xD800 <= ord(ch) < 0xE000
           or ord(ch) in (0xFFFE, 0xFFFF)]
    if bad or not name:
        why = (f"{what} {name!r} cannot be an FMI variable name (it holds the control "
               f"character U+{ord(bad[0]):04X})" if bad else
               f"{what} is empty and cannot be an FMI variable name")
        raise InputError(why + "; rename the signal in the design and export again")
    return name


def fmu_variables(table: ScheduledTable) -> list[FmuVariable]:
    """The unit's variables in value-reference order (see the module docstring)."""
    out: list[FmuVariable] = []

    def add(name, kind, causality, variability, initial, start, unit, description):
        out.append(FmuVariable(name, len(out), kind, causality, variability, initial, start,
                               unit, description))

    units_y = table.measured_units or ("",) * table.n_inputs
    units_u = table.control_units or ("",) * table.n_outputs
    for name, unit in zip(table.measured_names, units_y, strict=True):
        add(_check_name(name, "measured signal"), "Real", "input", "continuous", None, "0.0",
            unit, f"controller input: {name} minus its reference or trim value")
    measured = set(table.measured_names)
    for v, b in zip(table.variables, table.breakpoints, strict=True):
        name = _check_name(v.name, "scheduling variable")
        if name in measured:
            name += ".schedule"
        mid = 0.5 * (float(b[0]) + float(b[-1]))
        add(name, "Real", "input", "continuous", None, repr(mid), v.unit,
            f"scheduling variable {v.name} (clamped to the table, {b[0]:g} .. {b[-1]:g})")
    for name, unit in zip(table.control_names, units_u, strict=True):
        add(_check_name(name, "control"), "Real", "output", "discrete", "calculated", None, unit,
            f"command {name} after the limits: deviation to add to the trim control")
    add("sample_time", "Real", "parameter", "fixed", "exact", repr(float(table.sample_time)),
        "s", "sample time of the discrete controller (fixed by the table)")
    lim = table.actuator_limits
    for key, values, none, what in (("lower", lim.lower, "-" + _NO_LIMIT, "lower limit"),
                                    ("upper", lim.upper, _NO_LIMIT, "upper limit"),
                                    ("rate", lim.rate, _NO_LIMIT, "rate limit (per second)")):
        for i, (name, unit) in enumerate(zip(table.control_names, units_u, strict=True)):
            v = float(values[i])
            start = repr(v) if np.isfinite(v) else none
            add(f"{name}.{key}", "Real", "parameter", "tunable", "exact", start,
                rate_unit(unit).strip() if key == "rate" and unit else unit,
                f"{what} of {name} (+-1.8e308: none)")
    for name, unit in zip(table.control_names, units_u, strict=True):
        add(f"{name}.start", "Real", "parameter", "fixed", "exact", "0.0", unit,
            f"command {name} held before the start (the rate limit starts from it)")
    if table.H is not None:
        add("anti_windup", "Boolean", "parameter", "tunable", "exact", "true", "",
            "feed the controller state the limited command (observer-form anti-windup)")
        add("bumpless_start", "Boolean", "parameter", "fixed", "exact", "false", "",
            "start from the state that holds the inputs and the start commands steady "
            "(no jump at switch-in)")
    seen: dict[str, int] = {}
    for var in out:
        if var.name in seen:
            raise InputError(f"FMI variable name {var.name!r} is used twice (signal names "
                             "clash with the unit's own names); rename the signal")
        seen[var.name] = var.value_reference
    return out


def model_description_xml(table: ScheduledTable, identifier: str, guid: str,
                          source_files: list[str], variables: list[FmuVariable]) -> str:
    """The modelDescription.xml text (FMI 2.0, co-simulation)."""
    from .. import __version__

    names = ", ".join(v.name for v in table.variables)
    root = ElementTree.Element("fmiModelDescription", {
        "fmiVersion": "2.0", "modelName": identifier, "guid": guid,
        "description": (f"Scheduled discrete H-infinity controller over {names}: "
                        f"{int(np.prod(table.shape))} table nodes, sample time "
                        f"{table.sample_time:g} s. Results are design aids: validate in "
                        "simulation and hardware tests and follow the applicable codes and "
                        "licensed practice."),
        "generationTool": f"schedule {__version__}", "variableNamingConvention": "flat",
        "numberOfEventIndicators": "0"})
    cs = ElementTree.SubElement(root, "CoSimulation", {
        "modelIdentifier": identifier, "needsExecutionTool": "false",
        "canHandleVariableCommunicationStepSize": "true", "canInterpolateInputs": "false",
        "maxOutputDerivativeOrder": "0", "canRunAsynchronuously": "false",
        "canBeInstantiatedOnlyOncePerProcess": "false",
        "canNotUseMemoryManagementFunctions": "false", "canGetAndSetFMUstate": "false",
        "canSerializeFMUstate": "false", "providesDirectionalDerivative": "false"})
    files = ElementTree.SubElement(cs, "SourceFiles")
    for name in source_files:
        ElementTree.SubElement(files, "File", {"name": name})
    units = sorted({v.unit for v in variables if v.unit})
    if units:
        defs = ElementTree.SubElement(root, "UnitDefinitions")
        for unit in units:
            ElementTree.SubElement(defs, "Unit", {"name": _check_name(unit, "unit")})
    ElementTree.SubElement(root, "DefaultExperiment", {
        "startTime": "0.0", "stepSize": repr(float(table.sample_time))})
    mv = ElementTree.SubElement(root, "ModelVariables")
    for v in variables:
        attrs = {"name": v.name, "valueReference": str(v.value_reference),
                 "description": v.description, "causality": v.causality,
                 "variability": v.variability}
        if v.initial:
            attrs["initial"] = v.initial
        sv = ElementTree.SubElement(mv, "ScalarVariable", attrs)
        tattrs = {}
        if v.start is not None:
            tattrs["start"] = v.start
        if v.unit and v.kind == "Real":
            tattrs["unit"] = v.unit
        ElementTree.SubElement(sv, v.kind, tattrs)
    ms = ElementTree.SubElement(root, "ModelStructure")
    outputs = ElementTree.SubElement(ms, "Outputs")
    initial = ElementTree.SubElement(ms, "InitialUnknowns")
    for index, v in enumerate(variables, start=1):
        if v.causality == "output":
            ElementTree.SubElement(outputs, "Unknown", {"index": str(index)})
            ElementTree.SubElement(initial, "Unknown", {"index": str(index)})
    ElementTree.indent(root, space="  ")
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            + ElementTree.tostring(root, encoding="unicode") + "\n")


# ----------------------------------------------------------------------------- wrapper
def wrapper_source(table: ScheduledTable, identifier: str, guid: str,
                   variables: list[FmuVariable]) -> str:
    """The FMI 2.0 co-simulation wrapper (C99) around ``<identifier>_table``."""
    from .. import __version__

    p, P = identifier, identifier.upper()
    ny, nv, nu = table.n_inputs, len(table.variables), table.n_outputs
    aw = table.H is not None
    mids = ", ".join(repr(0.5 * (float(b[0]) + float(b[-1]))) for b in table.breakpoints)
    vr_bool = [v.value_reference for v in variables if v.kind == "Boolean"]
    vr_t = ny + nv + nu
    template = resources.files("schedule.export").joinpath(WRAPPER_TEMPLATE).read_text()
    return template.format(
        p=p, P=P, version=c_comment(__version__), guid=guid, ny=ny, nv=nv, nu=nu,
        vr_p=ny, vr_u=ny + nv, vr_t=vr_t, vr_lower=vr_t + 1, vr_upper=vr_t + 1 + nu,
        vr_rate=vr_t + 1 + 2 * nu, vr_start=vr_t + 1 + 3 * nu,
        vr_aw=vr_bool[0] if aw else -1, vr_bumpless=vr_bool[1] if aw else -1,
        vr_reals=vr_t + 1 + 4 * nu, mids=mids, aw=int(aw))




# ----------------------------------------------------------------------------- the unit
def fmu_sources(table: ScheduledTable, identifier: str) -> tuple[dict[str, str], str,
                                                                 list[FmuVariable]]:
    """``({file name: C text}, guid, variables)`` of the unit's sources/ folder."""
    if not table.discrete:
        raise InputError("an FMU needs a discrete table; give --sample-time (and --method)")
    header, source = c_source_text(table, identifier)
    variables = fmu_variables(table)
    digest = hashlib.sha256("\0".join([identifier, header, source]).encode("utf-8")).digest()
    guid = "{" + str(uuid.UUID(bytes=digest[:16])) + "}"
    files = {f"{identifier}_table.h": header, f"{identifier}_table.c": source,
             f"{identifier}_fmi2.c": wrapper_source(table, identifier, guid, variables)}
    return files, guid, variables


def build_binary(sources: dict[str, str], identifier: str, compiler: str, suffix: str,
                 extra_flags=()) -> bytes:
    """Compile the unit's sources into a shared library and return its bytes.

    Raises
    ------
    InputError
        The compiler failed (its first error line is quoted).
    """
    with tempfile.TemporaryDirectory(prefix="schedule-fmu-") as tmp:
        tmp = Path(tmp)
        for name, text in sources.items():
            (tmp / name).write_text(text, encoding="utf-8")
        out = tmp / f"{identifier}{suffix}"
        cmd = [compiler, *BUILD_FLAGS, *extra_flags, "-I", str(fmi2_header_dir()), "-I",
               str(tmp), "-o", str(out)] + [str(tmp / n) for n in sources if n.endswith(".c")]
        try:
            res = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise InputError(f"the C compiler {compiler} could not run ({exc}); fix it, set CC, "
                             "or write a source-only unit with --no-binary") from None
        if res.returncode != 0:
            lines = [ln for ln in (res.stderr or res.stdout).splitlines() if ln.strip()]
            first = next((ln for ln in lines if "error" in ln), lines[0] if lines else "")
            raise InputError(f"building the FMU binary with {compiler} failed: {first.strip()}; "
                             "fix the compiler (or set CC) or write a source-only unit with "
                             "--no-binary")
        return out.read_bytes()


def _readme(table: ScheduledTable, identifier: str, variables: list[FmuVariable],
            platform: str | None) -> str:
    rows = "\n".join(f"  {v.value_reference:4d}  {v.causality:<9} {v.kind:<7} {v.name}"
                     + (f" [{v.unit}]" if v.unit else "") + f": {v.description}"
                     for v in variables)
    binary = (f"binaries/{platform}/ holds a build for this platform." if platform else
              "This unit holds no binary (no C compiler was found when it was written).")
    return f"""{identifier}: FMI 2.0 co-simulation unit of a scheduled discrete controller.

Sample time {table.sample_time:g} s ({table.method}). At every sample t0 + k T the unit
reads its inputs, computes the command u = C(p) x + D(p) y, limits it (rate, then
magnitude) and updates its state, feeding it the limited command when anti_windup is
true. A doStep from t to t + h runs every sample in [t, t + h); the command computed
at t_k is the output from the end of that step on. NaN or infinite inputs make
fmi2DoStep return fmi2Error and leave the state unchanged.

{binary}
Rebuild for another target from sources/ with the FMI 2.0 headers of your tool, e.g.

  cc -std=c99 -O2 -fPIC -shared -fvisibility=hidden -I<fmi2 headers> -I sources \\
     -o {identifier}.so sources/{identifier}_table.c sources/{identifier}_fmi2.c

Variables (value reference, causality, type, name):
{rows}

Results are design aids: validate in simulation and hardware tests and follow the
applicable codes and licensed practice.
"""


def write_fmu(path: str | os.PathLike, table: ScheduledTable, binary: bool = True,
              compiler: str | None = None, extra_flags=()) -> FmuOutcome:
    """Write the FMI 2.0 co-simulation unit of ``table`` to ``path`` (``NAME.fmu``).

    Parameters
    ----------
    path : output file; its stem is the model identifier (a C identifier).
    table : a discrete scheduled table.
    binary : build the host-platform binary (when a compiler is found).
    compiler : C compiler to use (default :func:`find_compiler`).
    extra_flags : more compiler flags (the tests add ``-Werror``).

    Returns
    -------
    FmuOutcome; ``platform`` is None for a source-only unit, ``note`` says why.

    Raises
    ------
    InputError
        A bad file name, a continuous table, names that cannot be FMI names, or a failed
        build. The file is written atomically (whole or not at all).
    """
    path = Path(path)
    identifier = model_identifier(path)
    sources, guid, variables = fmu_sources(table, identifier)
    xml = model_description_xml(table, identifier, guid,
                                [n for n in sources if n.endswith(".c")], variables)
    note, platform, lib, seconds = "", None, b"", 0.0
    if binary:
        host = host_platform()
        cc = compiler or find_compiler()
        if host is None:
            note = f"no FMI platform name for {sys.platform}; wrote a source-only unit"
        elif cc is None:
            note = "no C compiler found (cc, gcc, clang or $CC); wrote a source-only unit"
        else:
            t0 = time.perf_counter()
            lib = build_binary(sources, identifier, cc, host[1], extra_flags)
            seconds = time.perf_counter() - t0
            platform = host[0]
    else:
        note = "source-only unit (--no-binary)"
    members: list[tuple[str, bytes, int]] = [("modelDescription.xml", xml.encode("utf-8"), 0o644)]
    if platform is not None:
        members.append((f"binaries/{platform}/{identifier}{host_platform()[1]}", lib, 0o755))
    members += [(f"sources/{name}", text.encode("utf-8"), 0o644)
                for name, text in sources.items()]
    members.append(("documentation/README.txt",
                    _readme(table, identifier, variables, platform).encode("utf-8"), 0o644))
    licence = (fmi2_header_dir() / "LICENSE.txt").read_bytes()
    members.append(("documentation/licenses/fmi2-headers.txt", licence, 0o644))

    def writer(tmp: str) -> None:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for name, data, mode in members:
                info = zipfile.ZipInfo(name, date_time=_ZIP_TIME)
                info.compress_type = zipfile.ZIP_DEFLATED
                info.external_attr = (0o100000 | mode) << 16
                zf.writestr(info, data)

    written = write_file_atomic(path, writer, "FMU")
    return FmuOutcome(written, platform, seconds, note)
