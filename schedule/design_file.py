"""The TOML design file: scheduling variables, source, channels, weights, gamma, checks, export.

``load_design(path)`` reads a file, ``parse_design(text, base_dir)`` parses text
(the family file keeps the text and later stages re-parse it with the base
folder stored beside it). Both return a frozen :class:`DesignSpec`.

Validation is strict and happens before any numerical work: unknown keys,
missing required keys, wrong types, NaN, bounds with ``lower >= upper``,
duplicate names, unsorted breakpoints, weights that do not match the channels.
Every problem raises :class:`schedule.errors.InputError` with one line naming
the file, the key path (for example ``weights.performance[1].bandwidth``) and
the fix. Paths in the file are relative to the design file's folder; they are
resolved here but their existence is checked only when they are opened
(``schedule.sources``), so a family file can be re-checked on another machine.

The full reference of keys is in docs/design-file.md.
"""

from __future__ import annotations

import itertools
import math
import os
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError
from .names import name_problem
from .table_files import FORMATS as EXPORT_FORMATS
from .types import LinearPlant, SchedulingVariable

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "DesignSpec", "SourceSpec", "GridSpec", "ChannelSpec", "WeightSpec", "WeightsSpec",
    "ScheduledNumber", "GammaSpec", "InterpolationSpec", "CheckSpec", "ExportSpec",
    "LimitSpec", "load_design", "parse_design", "validate_against_plant",
    "GAMMA_POLICIES", "INTERPOLATION_FORMS", "INTERPOLATION_KINDS", "SAMPLERS",
    "EXPORT_METHODS", "EXPORT_FORMATS",
]

GAMMA_POLICIES = ("common", "fixed")
INTERPOLATION_FORMS = ("auto", "matrices", "observer")
INTERPOLATION_KINDS = ("auto", "multilinear", "spline", "delaunay", "polynomial", "rbf",
                       "gaussian_process")
SAMPLERS = ("sobol", "latin_hypercube")
EXPORT_METHODS = ("tustin", "zoh")

# The weight groups: table name -> (key naming the channel, channel list it refers to)
WEIGHT_GROUPS = {
    "performance": ("output", "performance"),
    "effort": ("input", "controls"),
    "noise": ("output", "measured"),
    "disturbance": ("input", "disturbances"),
}
# The requirement form of each group: kind -> the numbers it takes (required ones first)
REQUIREMENT_FORMS = {
    "performance": ("performance", ("peak_sensitivity", "bandwidth", "low_frequency_error"),
                    ()),
    "effort": ("effort", ("limit",), ("bandwidth", "high_frequency_limit")),
    "noise": ("level", ("level",), ()),
    "disturbance": ("level", ("level",), ()),
}
WEIGHT_NUMBERS = ("gain", "peak_sensitivity", "bandwidth", "low_frequency_error", "limit",
                  "high_frequency_limit", "level")

# Sizes beyond which a design file is refused before any memory is spent on it.
MAX_DESIGN_BYTES = 4_000_000  # a design file is a few kB of text
MAX_CHECK_SAMPLES = 100_000  # the checks hold every sample's plant and controller in memory
MAX_GRID_POINTS = 1_000_000  # product of the breakpoint counts, less the holes
MAX_GAMMA_MARGIN = 10.0  # 1000 % above the worst optimum; beyond it use policy "fixed"
MAX_GAMMA_VALUE = 1e100  # gamma**2 must stay far from overflow
MAX_MATRIX_ENTRY = 1e100  # plant and controller entries: products must stay far from overflow


# --------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True, eq=False)
class ScheduledNumber:
    """A weight number that varies over some scheduling variables (multilinear table).

    ``values`` has shape ``tuple(len(b) for b in breakpoints)``; between the
    breakpoints the number is interpolated multilinearly, outside them it is
    held at the nearest edge (clamped).
    """

    over: tuple[str, ...]
    breakpoints: tuple[np.ndarray, ...]
    values: np.ndarray

    def at(self, point: Mapping[str, float]) -> float:
        """The number at ``point`` (a mapping from variable name to value)."""
        from scipy.interpolate import RegularGridInterpolator

        x = []
        for name, bp in zip(self.over, self.breakpoints, strict=False):
            if name not in point:
                raise InputError(f"scheduled weight number needs variable '{name}' but the "
                                 f"point gives only {sorted(point)}; pass every variable")
            x.append(float(np.clip(float(point[name]), bp[0], bp[-1])))
        if any(len(bp) == 1 for bp in self.breakpoints):
            # A single breakpoint means constant along that axis.
            keep = [k for k, bp in enumerate(self.breakpoints) if len(bp) > 1]
            vals = self.values.reshape([len(bp) for bp in self.breakpoints if len(bp) > 1]
                                       or [1])
            if not keep:
                return float(vals.reshape(-1)[0])
            interp = RegularGridInterpolator(tuple(self.breakpoints[k] for k in keep), vals)
            return float(interp([x[k] for k in keep])[0])
        interp = RegularGridInterpolator(self.breakpoints, self.values)
        return float(interp(x)[0])


Number = float | ScheduledNumber


def number_at(value: Number, point: Mapping[str, float]) -> float:
    """Evaluate a constant or scheduled weight number at ``point``."""
    return value.at(point) if isinstance(value, ScheduledNumber) else float(value)


@dataclass(frozen=True)
class WeightSpec:
    """One diagonal weight on one channel, in the terms of its requirement.

    ``kind`` is one of (numbers not used by the kind are None):

    - ``"performance"``: ``peak_sensitivity``, ``bandwidth`` (rad/s), ``low_frequency_error``;
    - ``"effort"``: ``limit`` and optionally ``bandwidth`` (rad/s) with
      ``high_frequency_limit``;
    - ``"level"``: ``level`` (noise or disturbance size);
    - ``"static"``: ``gain``;
    - ``"transfer"``: ``zeros``, ``poles`` (constant) and the leading ``gain``.

    ``key`` is the key path in the design file, used in error messages. The
    transfer functions are in :mod:`schedule.weights`.
    """

    channel: str
    kind: str
    gain: Number | None = None
    peak_sensitivity: Number | None = None
    bandwidth: Number | None = None
    low_frequency_error: Number | None = None
    limit: Number | None = None
    high_frequency_limit: Number | None = None
    level: Number | None = None
    zeros: tuple[complex, ...] = ()
    poles: tuple[complex, ...] = ()
    key: str = ""

    def numbers(self) -> dict[str, Number]:
        """The numbers this weight uses, by key."""
        return {k: getattr(self, k) for k in WEIGHT_NUMBERS if getattr(self, k) is not None}


@dataclass(frozen=True)
class WeightsSpec:
    """The weights, one per channel, in the order of the [channels] lists."""

    performance: tuple[WeightSpec, ...] = ()
    effort: tuple[WeightSpec, ...] = ()
    noise: tuple[WeightSpec, ...] = ()
    disturbance: tuple[WeightSpec, ...] = ()


@dataclass(frozen=True)
class SourceSpec:
    """Where the linearized plants come from (paths resolved against the design folder).

    ``ignored`` lists the code entries (model, model_file, nonlinear_model) of a
    design read from a data file and set aside unimported
    (:func:`schedule.sources.without_code`); empty for a design file the user gave.
    """

    operating_points: Path | None = None
    model: str | None = None
    model_file: Path | None = None
    function: str | None = None
    nonlinear_model: str | None = None
    validation: Path | None = None
    nonlinear_model_file: Path | None = None
    nonlinear_function: str | None = None
    ignored: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class GridSpec:
    """Design points for a model source: breakpoints (with holes) or a scattered set."""

    breakpoints: tuple[np.ndarray, ...] | None = None
    holes: np.ndarray | None = None
    points: np.ndarray | None = None


@dataclass(frozen=True)
class ChannelSpec:
    """Plant signal names: controls, disturbances (inputs); measured, performance (outputs).

    ``arrangement`` is "mixed_sensitivity" (the tool adds the weights) or
    "generalized" (the source already gives the generalized plant: disturbances
    are its exogenous inputs w, performance its error outputs z, taken as they
    are, and [weights] must be absent).

    ``units`` pairs (signal name, unit) from ``channels.units``; the plant's own
    units fill in the rest (:meth:`unit_of`).
    """

    controls: tuple[str, ...]
    disturbances: tuple[str, ...]
    measured: tuple[str, ...]
    performance: tuple[str, ...]
    arrangement: str = "mixed_sensitivity"
    units: tuple[tuple[str, str], ...] = ()

    def unit_of(self, name: str, plant: LinearPlant | None = None, kind: str = "") -> str:
        """Unit of signal ``name``: the design file's, else the plant's ``kind`` signal's."""
        given = dict(self.units)
        if name in given:
            return given[name]
        return plant.unit_of(kind, name) if plant is not None and kind else ""


@dataclass(frozen=True)
class GammaSpec:
    """Common-gamma policy: "common" (max of optima times 1 + margin) or "fixed" (value)."""

    policy: str = "common"
    margin: float = 0.05
    value: float | None = None


@dataclass(frozen=True)
class InterpolationSpec:
    form: str = "auto"
    kind: str = "auto"
    costly_kinds_max_points: int = 200  # "auto" tries the costly kinds up to this many points


@dataclass(frozen=True)
class CheckSpec:
    """The [check] table. Its field defaults are the package's one list of check defaults
    (``schedule.check.CheckSettings`` and the command line take theirs from here)."""

    samples: int = 64
    sampler: str = "sobol"
    seed: int = 0
    gamma_tolerance: float = 0.02
    gain_margin_db: float = 6.0  # common practice
    phase_margin_deg: float = 45.0  # common practice


@dataclass(frozen=True)
class ExportSpec:
    sample_time: float = 0.0
    method: str = "tustin"
    prewarp: float = 0.0
    formats: tuple[str, ...] = ("csv", "json", "hdf5", "c")


@dataclass(frozen=True)
class LimitSpec:
    """Actuator limits of one control, on the controller output (deviation from trim).

    ``lower <= u <= upper`` (``-inf`` / ``inf`` when not given) and ``|du/dt| <= rate``
    per second (``inf`` when not given). The exported controller limits its command and
    feeds its observer the limited value (docs/tables.md, "Actuator limits").
    """

    control: str
    lower: float = -math.inf
    upper: float = math.inf
    rate: float = math.inf


@dataclass(frozen=True, eq=False)
class DesignSpec:
    """Everything the design file says, validated. ``text`` is the raw TOML."""

    text: str
    base_dir: Path
    title: str
    variables: tuple[SchedulingVariable, ...]
    source: SourceSpec
    grid: GridSpec
    channels: ChannelSpec
    weights: WeightsSpec
    gamma: GammaSpec = field(default_factory=GammaSpec)
    interpolation: InterpolationSpec = field(default_factory=InterpolationSpec)
    check: CheckSpec = field(default_factory=CheckSpec)
    export: ExportSpec = field(default_factory=ExportSpec)
    name: str = "<design text>"
    limits: tuple[LimitSpec, ...] = ()
    #: [rate_certificate]: a schedule.analysis.lpv_certificate.CertificateSettings, or None
    rate_certificate: Any = None

    @property
    def variable_names(self) -> tuple[str, ...]:
        return tuple(v.name for v in self.variables)

    @property
    def lower(self) -> np.ndarray:
        return np.array([v.lower for v in self.variables], dtype=float)

    @property
    def upper(self) -> np.ndarray:
        return np.array([v.upper for v in self.variables], dtype=float)


# --------------------------------------------------------------------------- the reader
class _Reader:
    """Typed access to the TOML tables with one-line errors naming the key path."""

    def __init__(self, name: str):
        self.name = name

    def fail(self, key: str, problem: str, fix: str) -> InputError:
        where = f"{key}: " if key else ""
        return InputError(f"{self.name}: {where}{problem}; {fix}")

    def table(self, data: Any, key: str) -> dict:
        if not isinstance(data, dict):
            raise self.fail(key, f"expected a table, got {_tname(data)}",
                            f"write it as [{key}] with keys under it")
        return data

    def keys(self, data: dict, key: str, allowed: tuple[str, ...],
             required: tuple[str, ...] = ()) -> None:
        for k in data:
            if k not in allowed:
                table = f"table [{key}]" if key else "the top level"
                raise self.fail(_join(key, k), f"unknown key '{k}' in {table}",
                                f"allowed keys are {', '.join(allowed)}")
        for k in required:
            if k not in data:
                raise self.fail(_join(key, k), "missing required key",
                                f"add {k} = ... to {f'[{key}]' if key else 'the file'}")

    def number(self, data: dict, key: str, k: str, default: float | None = None, *,
               positive: bool = False, nonneg: bool = False) -> float | None:
        path = _join(key, k)
        if k not in data:
            return default
        v = data[k]
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.fail(path, f"expected a number, got {_tname(v)}", "write a number")
        v = float(v)
        if not math.isfinite(v):
            raise self.fail(path, f"value {v} is not finite", "give a finite number")
        if positive and v <= 0:
            raise self.fail(path, f"value {v:g} must be > 0", "give a positive number")
        if nonneg and v < 0:
            raise self.fail(path, f"value {v:g} must be >= 0", "give a number >= 0")
        return v

    def integer(self, data: dict, key: str, k: str, default: int, *, minimum: int) -> int:
        path = _join(key, k)
        if k not in data:
            return default
        v = data[k]
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(path, f"expected an integer, got {_tname(v)}", "write an integer")
        if v < minimum:
            raise self.fail(path, f"value {v} must be >= {minimum}",
                            f"give an integer >= {minimum}")
        return int(v)

    def string(self, data: dict, key: str, k: str, default: str | None = None) -> str | None:
        path = _join(key, k)
        if k not in data:
            return default
        v = data[k]
        if not isinstance(v, str):
            raise self.fail(path, f"expected a string, got {_tname(v)}", 'write it in "quotes"')
        if not v.strip():
            raise self.fail(path, "empty string", "give a non-empty value or remove the key")
        return v

    def choice(self, data: dict, key: str, k: str, default: str, allowed: tuple[str, ...]) -> str:
        v = self.string(data, key, k, default)
        if v not in allowed:
            raise self.fail(_join(key, k), f"'{v}' is not allowed",
                            f"use one of {', '.join(allowed)}")
        return v

    def names(self, data: dict, key: str, k: str, *, required: bool) -> tuple[str, ...]:
        path = _join(key, k)
        if k not in data:
            if required:
                raise self.fail(path, "missing required key",
                                f'add {k} = ["name", ...] to [{key}]')
            return ()
        v = data[k]
        if not isinstance(v, list) or not all(isinstance(s, str) and s for s in v):
            raise self.fail(path, f"expected a list of names, got {_tname(v)}",
                            'write ["name1", "name2"]')
        if required and not v:
            raise self.fail(path, "empty list", "name at least one signal")
        dup = _first_duplicate(v)
        if dup is not None:
            raise self.fail(path, f"name '{dup}' appears twice", "list each name once")
        for name in v:
            self.plain(path, name)
        return tuple(v)

    def plain(self, path: str, text: str) -> str:
        """Refuse control, format and separator characters in a name, unit or title."""
        problem = name_problem(text)
        if problem is not None:
            raise self.fail(path, f"{text[:40]!r} {problem}",
                            "use printable characters only (no newlines, tabs or escapes)")
        return text

    def float_array(self, v: Any, path: str, ndim: int) -> np.ndarray:
        try:
            if isinstance(v, bool) or _has_non_number(v):
                raise TypeError
            arr = np.array(v, dtype=float)
        except (TypeError, ValueError):
            raise self.fail(path, "expected a list of numbers",
                            "write numbers in [brackets]" if ndim == 1
                            else "write a list of [a, b, ...] rows of equal length") from None
        if arr.ndim != ndim or arr.size == 0:
            shape = "[x1, x2, ...]" if ndim == 1 else "[[a, b], [c, d], ...]"
            raise self.fail(path, f"expected {ndim}-d list of numbers, got shape {arr.shape}",
                            f"write it as {shape}")
        if not np.isfinite(arr).all():
            raise self.fail(path, "holds NaN or inf", "give finite numbers")
        return arr


def _has_non_number(v: Any) -> bool:
    if isinstance(v, list):
        return any(_has_non_number(x) for x in v)
    return isinstance(v, bool) or not isinstance(v, (int, float))


def _tname(v: Any) -> str:
    return {dict: "a table", list: "a list", str: "a string", bool: "a boolean",
            int: "an integer", float: "a number"}.get(type(v), type(v).__name__)


def _join(key: str, k: str) -> str:
    return f"{key}.{k}" if key else k


def _first_duplicate(items) -> Any:
    seen = set()
    for x in items:
        if x in seen:
            return x
        seen.add(x)
    return None


# --------------------------------------------------------------------------- entry points
ARRANGEMENTS = ("mixed_sensitivity", "generalized")
TOP_KEYS = ("title", "variable", "source", "grid", "channels", "weights", "gamma",
            "interpolation", "check", "export", "limits", "rate_certificate")


def load_design(path: str | os.PathLike) -> DesignSpec:
    """Read and validate a TOML design file.

    Parameters
    ----------
    path : path of the design file; relative paths inside it are resolved
        against its folder.

    Returns
    -------
    DesignSpec

    Raises
    ------
    InputError
        The file is missing or unreadable, is not valid TOML, or breaks the
        schema (docs/design-file.md); the one-line message names the file, the
        key path and the fix.
    """
    from .paths import input_file

    path = input_file(path, "design file")
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_DESIGN_BYTES + 1)
    except OSError as exc:
        raise InputError(f"design file {path} cannot be read ({exc.strerror}); check the "
                         "file") from None
    if len(data) > MAX_DESIGN_BYTES:
        raise InputError(f"design file {path} is larger than {MAX_DESIGN_BYTES // 1000} kB; "
                         "a design file is a short TOML text, give the right file")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"design file {path} is not UTF-8 text (byte {exc.start}); save it "
                         "as UTF-8") from None
    return parse_design(text, path.resolve().parent, name=str(path))


def parse_design(text: str, base_dir: str | os.PathLike, name: str = "<design text>"
                 ) -> DesignSpec:
    """Parse and validate design-file text; relative paths resolve against ``base_dir``.

    ``name`` is used in error messages (the file name when called from
    :func:`load_design`).
    """
    try:
        return _parse(text, base_dir, name)
    except RecursionError:
        raise InputError(f"{name}: tables or arrays are nested too deeply; a design file "
                         "needs only a few levels") from None


def _parse(text: str, base_dir: str | os.PathLike, name: str) -> DesignSpec:
    r = _Reader(name)
    text = text.removeprefix("\ufeff")  # a UTF-8 byte-order mark is not content
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc).splitlines()[0] if str(exc) else "syntax error"
        raise InputError(f"{name}: not valid TOML ({msg}); fix the syntax at that line"
                         ) from None
    base = Path(base_dir)
    r.keys(data, "", TOP_KEYS, required=("variable", "source", "channels"))
    title = r.plain("title", r.string(data, "", "title", "") or "")
    variables = _parse_variables(r, data["variable"])
    source = _parse_source(r, r.table(data["source"], "source"), base)
    grid = _parse_grid(r, data.get("grid"), variables, source)
    channels = _parse_channels(r, r.table(data["channels"], "channels"))
    if channels.arrangement == "generalized":
        if "weights" in data:
            raise r.fail("weights", "given with channels.arrangement = \"generalized\"",
                         "drop [weights]: a generalized plant carries its weights already")
        weights = WeightsSpec()
    else:
        if "weights" not in data:
            raise r.fail("weights", "missing required key", "add the [[weights.*]] tables (see "
                         "docs/design-file.md) or set channels.arrangement = \"generalized\"")
        weights = _parse_weights(r, r.table(data["weights"], "weights"), channels, variables)
    gamma = _parse_gamma(r, r.table(data.get("gamma", {}), "gamma"))
    interp = _parse_interpolation(r, r.table(data.get("interpolation", {}), "interpolation"))
    check = _parse_check(r, r.table(data.get("check", {}), "check"))
    export = _parse_export(r, r.table(data.get("export", {}), "export"))
    limits = _parse_limits(r, data.get("limits", []), channels)
    rates = (_parse_rate_certificate(r, r.table(data["rate_certificate"], "rate_certificate"),
                                     variables) if "rate_certificate" in data else None)
    return DesignSpec(text=text, base_dir=base, title=title, variables=variables, source=source,
                      grid=grid, channels=channels, weights=weights, gamma=gamma,
                      interpolation=interp, check=check, export=export, name=name,
                      limits=limits, rate_certificate=rates)


# --------------------------------------------------------------------------- the tables
def _parse_variables(r: _Reader, items: Any) -> tuple[SchedulingVariable, ...]:
    if isinstance(items, dict):
        items = [items]
    if not isinstance(items, list) or not items:
        raise r.fail("variable", "expected one or more [[variable]] tables",
                     "add [[variable]] with name, unit, lower, upper")
    out = []
    for i, item in enumerate(items):
        key = f"variable[{i}]"
        item = r.table(item, key)
        r.keys(item, key, ("name", "unit", "lower", "upper"), ("name", "lower", "upper"))
        name = r.plain(_join(key, "name"), r.string(item, key, "name"))
        if not name.isidentifier():
            raise r.fail(_join(key, "name"), f"'{name}' is not a plain identifier",
                         "use letters, digits and underscores (it names grid keys)")
        unit = item.get("unit", "")
        if not isinstance(unit, str):
            raise r.fail(_join(key, "unit"), f"expected a string, got {_tname(unit)}",
                         'write the unit in "quotes" ("" for none)')
        r.plain(_join(key, "unit"), unit)
        lo = r.number(item, key, "lower")
        hi = r.number(item, key, "upper")
        if lo >= hi:
            raise r.fail(key, f"lower = {lo:g} is not below upper = {hi:g}",
                         "give lower < upper")
        out.append(SchedulingVariable(name, unit, lo, hi))
    dup = _first_duplicate(v.name for v in out)
    if dup is not None:
        raise r.fail("variable", f"two variables are named '{dup}'", "give each a unique name")
    return tuple(out)


def _parse_source(r: _Reader, t: dict, base: Path) -> SourceSpec:
    key = "source"
    r.keys(t, key, ("operating_points", "model", "model_file", "function", "nonlinear_model",
                    "nonlinear_model_file", "nonlinear_function", "validation"))
    op = r.string(t, key, "operating_points")
    model = r.string(t, key, "model")
    model_file = r.string(t, key, "model_file")
    function = r.string(t, key, "function")
    nonlinear = r.string(t, key, "nonlinear_model")
    validation = r.string(t, key, "validation")
    if op is None and model is None and model_file is None:
        raise r.fail(key, "no source of linearized plants",
                     "give operating_points = \"file.h5\", model = \"module:function\" or "
                     "model_file = \"file.py\" with function = \"name\"")
    if model is not None and model_file is not None:
        raise r.fail(key, "both model and model_file are given", "keep exactly one of them")
    if model_file is not None and function is None:
        raise r.fail("source.function", "missing (model_file needs it)",
                     "add function = \"name of the function in the file\"")
    if function is not None and model_file is None:
        raise r.fail("source.function", "given without model_file",
                     "add model_file = \"file.py\" or remove function")
    if function is not None and not function.isidentifier():
        raise r.fail("source.function", f"'{function}' is not a function name",
                     "give the bare function name defined in model_file")
    for k, v in (("model", model), ("nonlinear_model", nonlinear)):
        if v is not None:
            _check_entry_point(r, f"source.{k}", v)
    nonlinear_file = r.string(t, key, "nonlinear_model_file")
    nonlinear_function = r.string(t, key, "nonlinear_function")
    if nonlinear is not None and nonlinear_file is not None:
        raise r.fail(key, "both nonlinear_model and nonlinear_model_file are given",
                     "keep exactly one of them")
    if (nonlinear_file is None) != (nonlinear_function is None):
        given, lack = (("nonlinear_model_file", "nonlinear_function") if nonlinear_function is None
                       else ("nonlinear_function", "nonlinear_model_file"))
        raise r.fail(f"source.{lack}", f"missing (given {given})",
                     "give nonlinear_model_file = \"file.py\" with nonlinear_function = "
                     "\"name of the model or of its factory in the file\"")
    if nonlinear_function is not None and not nonlinear_function.isidentifier():
        raise r.fail("source.nonlinear_function", f"'{nonlinear_function}' is not a name",
                     "give the bare name defined in nonlinear_model_file")

    def resolve(p: str | None) -> Path | None:
        return None if p is None else (base / p).resolve() if not Path(p).is_absolute() \
            else Path(p)

    return SourceSpec(operating_points=resolve(op), model=model, model_file=resolve(model_file),
                      function=function, nonlinear_model=nonlinear,
                      validation=resolve(validation),
                      nonlinear_model_file=resolve(nonlinear_file),
                      nonlinear_function=nonlinear_function)


def _check_entry_point(r: _Reader, key: str, text: str) -> None:
    parts = text.split(":")
    if (len(parts) != 2 or not all(p.isidentifier() for p in parts[0].split("."))
            or not parts[1].isidentifier()):
        raise r.fail(key, f"'{text}' is not of the form module:function",
                     'write "package.module:function"')


def _parse_grid(r: _Reader, t: Any, variables, source: SourceSpec) -> GridSpec:
    names = tuple(v.name for v in variables)
    has_model = source.model is not None or source.model_file is not None
    if t is None:
        if source.operating_points is None and has_model:
            raise r.fail("grid", "missing (a model source needs design points)",
                         "add [grid] with breakpoints per variable or points = [[...], ...]")
        return GridSpec()
    t = r.table(t, "grid")
    if source.operating_points is not None:
        raise r.fail("grid", "given together with source.operating_points (the file brings "
                     "its own points)", "remove [grid] or the operating_points source")
    r.keys(t, "grid", names + ("holes", "points"))
    given = [n for n in names if n in t]
    if "points" in t:
        if given or "holes" in t:
            raise r.fail("grid", "points and breakpoints/holes are both given",
                         "give either points = [[...]] or breakpoints per variable")
        pts = r.float_array(t["points"], "grid.points", 2)
        if pts.shape[1] != len(names):
            raise r.fail("grid.points", f"rows have {pts.shape[1]} values for {len(names)} "
                         "variables", f"give one value per variable ({', '.join(names)})")
        for i, row in enumerate(pts):
            _inside(r, f"grid.points[{i}]", row, variables)
        dup = _duplicate_row(pts)
        if dup is not None:
            raise r.fail(f"grid.points[{dup[1]}]", f"repeats grid.points[{dup[0]}]",
                         "remove the duplicate point")
        return GridSpec(points=pts)
    if not given:
        raise r.fail("grid", "neither breakpoints nor points are given",
                     f"add breakpoints for {', '.join(names)} or points = [[...]]")
    missing = [n for n in names if n not in t]
    if missing:
        raise r.fail(f"grid.{missing[0]}", "missing breakpoints for this variable",
                     f"add {missing[0]} = [x1, x2, ...]")
    bps = []
    for v in variables:
        key = f"grid.{v.name}"
        bp = r.float_array(t[v.name], key, 1)
        if np.any(np.diff(bp) <= 0):
            k = int(np.argmax(np.diff(bp) <= 0))
            raise r.fail(key, f"breakpoints are not strictly increasing at {bp[k]:g}, "
                         f"{bp[k + 1]:g}", "sort them and remove duplicates")
        if bp[0] < v.lower or bp[-1] > v.upper:
            bad = bp[0] if bp[0] < v.lower else bp[-1]
            raise r.fail(key, f"breakpoint {bad:g} is outside the bounds [{v.lower:g}, "
                         f"{v.upper:g}]", "move it inside or widen the variable's bounds")
        bps.append(bp)
    total = math.prod(len(b) for b in bps)
    if total > MAX_GRID_POINTS:
        raise r.fail("grid", f"the breakpoints span {total:.3g} grid points, more than "
                     f"{MAX_GRID_POINTS}", "use fewer breakpoints, or refine where the checks "
                     "fail")
    holes = None
    if "holes" in t:
        holes = r.float_array(t["holes"], "grid.holes", 2)
        if holes.shape[1] != len(names):
            raise r.fail("grid.holes", f"rows have {holes.shape[1]} values for {len(names)} "
                         "variables", f"give one value per variable ({', '.join(names)})")
        for i, row in enumerate(holes):
            for j, x in enumerate(row):
                if not np.any(np.isclose(bps[j], x, rtol=1e-12, atol=0.0)):
                    raise r.fail(f"grid.holes[{i}]", f"{names[j]} = {x:g} is not a breakpoint",
                                 "holes must be grid points; use breakpoint values")
        dup = _duplicate_row(holes)
        if dup is not None:
            raise r.fail(f"grid.holes[{dup[1]}]", f"repeats grid.holes[{dup[0]}]",
                         "list each hole once")
        if holes.shape[0] >= int(np.prod([len(b) for b in bps])):
            raise r.fail("grid.holes", "every grid point is a hole", "keep some points")
    return GridSpec(breakpoints=tuple(bps), holes=holes)


def _inside(r: _Reader, key: str, row, variables) -> None:
    for v, x in zip(variables, row, strict=False):
        if x < v.lower or x > v.upper:
            raise r.fail(key, f"{v.name} = {x:g} is outside its bounds [{v.lower:g}, "
                         f"{v.upper:g}]", "move the point inside or widen the bounds")


def _duplicate_row(arr: np.ndarray) -> tuple[int, int] | None:
    seen: dict[tuple, int] = {}
    for i, row in enumerate(arr):
        k = tuple(row.tolist())
        if k in seen:
            return seen[k], i
        seen[k] = i
    return None


def _parse_channels(r: _Reader, t: dict) -> ChannelSpec:
    key = "channels"
    r.keys(t, key, ("controls", "disturbances", "measured", "performance", "arrangement",
                    "units"))
    arrangement = r.string(t, key, "arrangement", "mixed_sensitivity")
    if arrangement not in ARRANGEMENTS:
        raise r.fail("channels.arrangement", f"unknown value {arrangement!r}",
                     f"use one of {', '.join(ARRANGEMENTS)}")
    generalized = arrangement == "generalized"
    controls = r.names(t, key, "controls", required=True)
    disturbances = r.names(t, key, "disturbances", required=generalized)
    measured = r.names(t, key, "measured", required=True)
    performance = r.names(t, key, "performance", required=generalized)
    if generalized:
        for a, b, what in ((measured, performance, "output"), (controls, disturbances, "input")):
            both = set(a) & set(b)
            if both:
                raise r.fail("channels", f"'{sorted(both)[0]}' is both a measured/control and "
                             f"an exogenous/performance {what}",
                             "in a generalized plant each signal has one role")
    both = set(controls) & set(disturbances)
    if both:
        n = sorted(both)[0]
        raise r.fail("channels.disturbances", f"'{n}' is also listed in channels.controls",
                     "a plant input is either a control or a disturbance")
    units = _parse_units(r, t.get("units", {}), controls + disturbances + measured + performance)
    return ChannelSpec(controls, disturbances, measured, performance, arrangement, units)


def _parse_units(r: _Reader, t: Any, names: tuple[str, ...]) -> tuple[tuple[str, str], ...]:
    """``channels.units``: {signal name = "unit"} for signals named in the channel lists."""
    key = "channels.units"
    if not isinstance(t, dict):
        raise r.fail(key, f"expected a table, got {_tname(t)}",
                     'write units = { signal = "unit", ... }')
    out = []
    for name, unit in t.items():
        if name not in names:
            known = ", ".join(dict.fromkeys(names))
            raise r.fail(_join(key, name), f"'{name}' is not a channel",
                         f"give units of the signals in [channels] ({known})")
        if not isinstance(unit, str):
            raise r.fail(_join(key, name), f"expected a string, got {_tname(unit)}",
                         'write the unit in "quotes" ("" for none)')
        out.append((name, r.plain(_join(key, name), unit)))
    return tuple(out)


def _parse_weights(r: _Reader, t: dict, ch: ChannelSpec, variables) -> WeightsSpec:
    r.keys(t, "weights", tuple(WEIGHT_GROUPS))
    out = {}
    for group, (chan_key, list_name) in WEIGHT_GROUPS.items():
        channels = getattr(ch, list_name)
        items = t.get(group, [])
        if isinstance(items, dict):
            items = [items]
        if not isinstance(items, list):
            raise r.fail(f"weights.{group}", f"expected [[weights.{group}]] tables, got "
                         f"{_tname(items)}", f"write one [[weights.{group}]] per channel")
        by_name: dict[str, WeightSpec] = {}
        for i, item in enumerate(items):
            key = f"weights.{group}[{i}]"
            w = _parse_weight(r, r.table(item, key), key, group, chan_key, variables)
            if w.channel not in channels:
                raise r.fail(_join(key, chan_key), f"'{w.channel}' is not in "
                             f"channels.{list_name} ({', '.join(channels) or 'empty'})",
                             f"name one of channels.{list_name} or add it there")
            if w.channel in by_name:
                raise r.fail(_join(key, chan_key), f"a second weight for '{w.channel}'",
                             "give one weight per channel")
            by_name[w.channel] = w
        for c in channels:
            if c not in by_name:
                raise r.fail(f"weights.{group}", f"no weight for channels.{list_name} '{c}'",
                             f"add [[weights.{group}]] with {chan_key} = \"{c}\"")
        out[group] = tuple(by_name[c] for c in channels)
    return WeightsSpec(**out)


def _parse_weight(r: _Reader, t: dict, key: str, group: str, chan_key: str,
                  variables) -> WeightSpec:
    kind, required, optional = REQUIREMENT_FORMS[group]
    own = required + optional
    r.keys(t, key, (chan_key,) + own + ("gain", "zeros", "poles"), required=(chan_key,))
    name = r.plain(_join(key, chan_key), r.string(t, key, chan_key))
    nums = {k: _parse_number(r, t[k], _join(key, k), variables) for k in WEIGHT_NUMBERS
            if k in t}
    forms = f"{', '.join(required)} (the {group} requirement), gain, or zeros/poles/gain"
    if "zeros" in t or "poles" in t:
        kind = "transfer"
        extra = [k for k in nums if k != "gain"]
        if extra:
            raise r.fail(_join(key, extra[0]), "given together with zeros/poles",
                         "a transfer weight takes zeros, poles and gain only")
        if "gain" not in nums:
            raise r.fail(_join(key, "gain"), "missing (a transfer weight needs it)",
                         "add gain = <leading coefficient k of k prod(s - z) / prod(s - p)>")
        # the gain may be scheduled; zeros and poles stay constant (fixed state coordinates)
        zeros = _parse_roots(r, t.get("zeros", []), _join(key, "zeros"))
        poles = _parse_roots(r, t.get("poles", []), _join(key, "poles"))
        w = WeightSpec(channel=name, kind=kind, gain=nums["gain"], zeros=zeros, poles=poles,
                       key=key)
    elif "gain" in nums:
        extra = [k for k in nums if k != "gain"]
        if extra:
            raise r.fail(_join(key, extra[0]), "given together with gain",
                         f"give either gain (a static weight) or {', '.join(own)}")
        w = WeightSpec(channel=name, kind="static", gain=nums["gain"], key=key)
    else:
        if not nums:
            raise r.fail(key, "no weight numbers", f"give {forms}")
        missing = [k for k in required if k not in nums]
        if missing:
            raise r.fail(_join(key, missing[0]), f"missing (the {group} weight needs "
                         f"{', '.join(required)})", f"add {missing[0]} = ...")
        if optional and 0 < sum(k in nums for k in optional) < len(optional):
            have = next(k for k in optional if k in nums)
            lack = next(k for k in optional if k not in nums)
            raise r.fail(_join(key, lack), f"missing (given {have})",
                         f"give {' and '.join(optional)} together, or neither")
        w = WeightSpec(channel=name, kind=kind, key=key, **nums)
    for k, v in w.numbers().items():
        _check_positive(r, v, _join(key, k))
    # Build the weight now, so that its errors name the key. A scheduled number is
    # multilinear between its breakpoints, and so is any difference of two numbers on the
    # cells of the union of their breakpoints: the conditions (positive, A < M,
    # u_hf < u_max) hold everywhere when they hold at the vertices of that grid.
    from .weights import weight_at

    axes: dict[str, set] = {}
    for v in w.numbers().values():
        if isinstance(v, ScheduledNumber):
            for name, bp in zip(v.over, v.breakpoints, strict=True):
                axes.setdefault(name, set()).update(bp.tolist())
    names = list(axes)
    for combo in itertools.islice(itertools.product(*(sorted(axes[n]) for n in names)),
                                  10000):
        try:
            weight_at(w, dict(zip(names, combo, strict=True)))
        except InputError as exc:
            raise InputError(f"{r.name}: {exc}") from None
    return w


def _parse_roots(r: _Reader, v: Any, key: str) -> tuple[complex, ...]:
    """Zeros or poles: numbers (real roots) or [real, imaginary] pairs (with the conjugate)."""
    if not isinstance(v, list):
        raise r.fail(key, f"expected a list, got {_tname(v)}",
                     "write [-1.0, [-0.5, 2.0]] (a real root, then a complex pair)")
    out: list[complex] = []
    for i, item in enumerate(v):
        if isinstance(item, list):
            if len(item) != 2 or _has_non_number(item):
                raise r.fail(f"{key}[{i}]", "a complex root must be [real, imaginary]",
                             "write two numbers; the conjugate is added for you")
            re, im = float(item[0]), float(item[1])
            if not (math.isfinite(re) and math.isfinite(im)) or im == 0:
                raise r.fail(f"{key}[{i}]", f"[{re:g}, {im:g}] is not a finite complex pair",
                             "give finite numbers with a non-zero imaginary part (or a plain "
                             "number for a real root)")
            out += [complex(re, im), complex(re, -im)]
        elif isinstance(item, bool) or not isinstance(item, (int, float)) \
                or not math.isfinite(item):
            raise r.fail(f"{key}[{i}]", "expected a finite number or [real, imaginary]",
                         "write numbers")
        else:
            out.append(complex(float(item), 0.0))
    return tuple(out)


def _check_positive(r: _Reader, v: Number, key: str, allow_zero: bool = False) -> None:
    """Every value of a constant or scheduled number is > 0 (>= 0 with ``allow_zero``)."""
    vals = v.values.ravel() if isinstance(v, ScheduledNumber) else np.array([v])
    bad = vals < 0 if allow_zero else vals <= 0
    if bad.any():
        rel = ">= 0" if allow_zero else "> 0"
        raise r.fail(key, f"value {vals[bad][0]:g} must be {rel}", f"give numbers {rel}")


def _parse_number(r: _Reader, v: Any, key: str, variables) -> Number:
    if isinstance(v, dict):
        return _parse_scheduled(r, v, key, variables)
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise r.fail(key, f"expected a number or a table {{over, breakpoints, values}}, got "
                     f"{_tname(v)}", "write a number")
    v = float(v)
    if not math.isfinite(v):
        raise r.fail(key, f"value {v} is not finite", "give a finite number")
    return v


def _parse_scheduled(r: _Reader, t: dict, key: str, variables) -> ScheduledNumber:
    r.keys(t, key, ("over", "breakpoints", "values"), ("over", "breakpoints", "values"))
    names = tuple(v.name for v in variables)
    over = r.names(t, key, "over", required=True)
    for n in over:
        if n not in names:
            raise r.fail(_join(key, "over"), f"'{n}' is not a scheduling variable",
                         f"use one of {', '.join(names)}")
    bps_raw = t["breakpoints"]
    if not isinstance(bps_raw, list) or len(bps_raw) != len(over):
        raise r.fail(_join(key, "breakpoints"), f"expected {len(over)} breakpoint lists (one "
                     "per variable in over)", "write breakpoints = [[x1, x2, ...], ...]")
    bps = []
    for j, b in enumerate(bps_raw):
        bp = r.float_array(b, f"{key}.breakpoints[{j}]", 1)
        if np.any(np.diff(bp) <= 0):
            raise r.fail(f"{key}.breakpoints[{j}]", "breakpoints are not strictly increasing",
                         "sort them and remove duplicates")
        bps.append(bp)
    shape = tuple(len(b) for b in bps)
    vals = t["values"]
    try:
        if _has_non_number(vals):
            raise TypeError
        arr = np.array(vals, dtype=float)
    except (TypeError, ValueError):
        raise r.fail(_join(key, "values"), "expected numbers",
                     "write values as a list of numbers") from None
    if arr.size != int(np.prod(shape)) or (arr.ndim > 1 and arr.shape != shape):
        raise r.fail(_join(key, "values"), f"{arr.size} values for a table of shape {shape}",
                     "give one value per breakpoint combination (last variable fastest)")
    if not np.isfinite(arr).all():
        raise r.fail(_join(key, "values"), "holds NaN or inf", "give finite numbers")
    return ScheduledNumber(over=over, breakpoints=tuple(bps), values=arr.reshape(shape))


def _parse_gamma(r: _Reader, t: dict) -> GammaSpec:
    r.keys(t, "gamma", ("policy", "margin", "value"))
    policy = r.choice(t, "gamma", "policy", "common", GAMMA_POLICIES)
    margin = r.number(t, "gamma", "margin", 0.05, nonneg=True)
    if margin > MAX_GAMMA_MARGIN:
        raise r.fail("gamma.margin", f"value {margin:g} is above {MAX_GAMMA_MARGIN:g} "
                     f"({MAX_GAMMA_MARGIN:.0%} above the worst optimum)",
                     "give a relative margin such as 0.05, or policy = \"fixed\" with a value")
    value = r.number(t, "gamma", "value", None, positive=True)
    if value is not None and value > MAX_GAMMA_VALUE:
        raise r.fail("gamma.value", f"value {value:g} is above {MAX_GAMMA_VALUE:g}",
                     "scale the weights so that gamma is near 1")
    if policy == "fixed" and value is None:
        raise r.fail("gamma.value", "missing (policy \"fixed\" needs it)",
                     "add value = <gamma > 0> or use policy = \"common\"")
    if policy == "common" and value is not None:
        raise r.fail("gamma.value", "given with policy \"common\"",
                     "remove value or set policy = \"fixed\"")
    return GammaSpec(policy=policy, margin=margin, value=value)


def _parse_interpolation(r: _Reader, t: dict) -> InterpolationSpec:
    r.keys(t, "interpolation", ("form", "kind", "costly_kinds_max_points"))
    return InterpolationSpec(form=r.choice(t, "interpolation", "form", "auto",
                                           INTERPOLATION_FORMS),
                             kind=r.choice(t, "interpolation", "kind", "auto",
                                           INTERPOLATION_KINDS),
                             costly_kinds_max_points=r.integer(
                                 t, "interpolation", "costly_kinds_max_points",
                                 InterpolationSpec.costly_kinds_max_points, minimum=0))


def _parse_check(r: _Reader, t: dict) -> CheckSpec:
    k = "check"
    r.keys(t, k, ("samples", "sampler", "seed", "gamma_tolerance", "gain_margin_db",
                  "phase_margin_deg"))
    dflt = CheckSpec()
    pm = r.number(t, k, "phase_margin_deg", dflt.phase_margin_deg, nonneg=True)
    if pm >= 180.0:
        raise r.fail("check.phase_margin_deg", f"value {pm:g} is not below 180",
                     "give a phase margin in degrees, 0 <= value < 180")
    samples = r.integer(t, k, "samples", dflt.samples, minimum=0)
    if samples > MAX_CHECK_SAMPLES:
        raise r.fail("check.samples", f"value {samples} is above {MAX_CHECK_SAMPLES}",
                     f"give at most {MAX_CHECK_SAMPLES} samples (refine where checks fail "
                     "instead)")
    return CheckSpec(samples=samples,
                     sampler=r.choice(t, k, "sampler", dflt.sampler, SAMPLERS),
                     seed=r.integer(t, k, "seed", dflt.seed, minimum=0),
                     gamma_tolerance=r.number(t, k, "gamma_tolerance", dflt.gamma_tolerance,
                                              nonneg=True),
                     gain_margin_db=r.number(t, k, "gain_margin_db", dflt.gain_margin_db,
                                             nonneg=True),
                     phase_margin_deg=pm)


def _parse_export(r: _Reader, t: dict) -> ExportSpec:
    k = "export"
    r.keys(t, k, ("sample_time", "method", "prewarp", "formats"))
    formats = r.names(t, k, "formats", required=False) if "formats" in t else None
    if formats is not None:
        if not formats:
            raise r.fail("export.formats", "empty list", f"name some of "
                         f"{', '.join(EXPORT_FORMATS)}")
        for f in formats:
            if f not in EXPORT_FORMATS:
                raise r.fail("export.formats", f"'{f}' is not a known format",
                             f"use some of {', '.join(EXPORT_FORMATS)}")
    method = r.choice(t, k, "method", "tustin", EXPORT_METHODS)
    sample_time = r.number(t, k, "sample_time", 0.0, nonneg=True)
    prewarp = r.number(t, k, "prewarp", 0.0, nonneg=True)
    if prewarp > 0 and method != "tustin":
        raise r.fail("export.prewarp", "prewarping applies to Tustin only",
                     "remove prewarp or set method = \"tustin\"")
    if prewarp > 0 and sample_time > 0 and prewarp >= math.pi / sample_time:
        raise r.fail("export.prewarp", f"{prewarp:g} rad/s is not below the Nyquist "
                     f"frequency {math.pi / sample_time:g} rad/s",
                     "choose a lower prewarp frequency or a shorter sample_time")
    return ExportSpec(sample_time=sample_time, method=method, prewarp=prewarp,
                      formats=formats if formats is not None else ExportSpec().formats)


def _parse_limits(r: _Reader, items: Any, ch: ChannelSpec) -> tuple[LimitSpec, ...]:
    """``[[limits]]``: per control ``lower``, ``upper`` (magnitude) and ``rate`` (per second)."""
    if isinstance(items, dict):
        items = [items]
    if not isinstance(items, list):
        raise r.fail("limits", f"expected [[limits]] tables, got {_tname(items)}",
                     "write one [[limits]] table per limited control")
    out: dict[str, LimitSpec] = {}
    for i, item in enumerate(items):
        key = f"limits[{i}]"
        t = r.table(item, key)
        r.keys(t, key, ("control", "lower", "upper", "rate"), required=("control",))
        name = r.string(t, key, "control")
        if name not in ch.controls:
            raise r.fail(_join(key, "control"), f"'{name}' is not in channels.controls "
                         f"({', '.join(ch.controls)})", "name one of the controls")
        if name in out:
            raise r.fail(_join(key, "control"), f"a second [[limits]] for '{name}'",
                         "give one table per control")
        if not any(k in t for k in ("lower", "upper", "rate")):
            raise r.fail(key, "no limit given", "give lower, upper and/or rate")
        lower = r.number(t, key, "lower", -math.inf)
        upper = r.number(t, key, "upper", math.inf)
        rate = r.number(t, key, "rate", math.inf, positive=True)
        if not lower <= 0.0 <= upper or lower == upper:
            raise r.fail(key, f"lower = {lower:g} and upper = {upper:g} must satisfy "
                         "lower <= 0 <= upper with lower < upper",
                         "limits apply to the controller output, the deviation from the trim "
                         "control: subtract the trim value from the actuator's own limits")
        out[name] = LimitSpec(name, lower, upper, rate)
    return tuple(out[c] for c in ch.controls if c in out)


def _parse_rate_certificate(r: _Reader, t: dict, variables):
    """[rate_certificate] -> schedule.analysis.lpv_certificate.CertificateSettings.

    The basis expressions are parsed (never evaluated as code) by
    schedule.analysis.expression; the keys and defaults are the fields of
    CertificateSettings (one list of them).
    """
    from dataclasses import fields

    from .analysis.basis import parse_basis
    from .analysis.lpv_certificate import CertificateSettings

    k = "rate_certificate"
    allowed = tuple(f.name for f in fields(CertificateSettings))
    r.keys(t, k, allowed)
    names = tuple(v.name for v in variables)
    kw: dict = {}
    if "basis" in t:
        basis = t["basis"]
        if not isinstance(basis, list) or not all(isinstance(x, str) for x in basis):
            raise r.fail(_join(k, "basis"), f"expected a list of expressions, got {_tname(basis)}",
                         'write ["1", "1/rope_length", ...]')
        try:
            parse_basis(basis, names)
        except InputError as exc:
            raise r.fail(_join(k, "basis"), str(exc), "fix the expression") from None
        kw["basis"] = tuple(basis)
    if "rates" in t:
        rates = r.table(t["rates"], _join(k, "rates"))
        for n in rates:
            if n not in names:
                raise r.fail(_join(k, f"rates.{n}"), f"'{n}' is not a scheduling variable",
                             f"use one of {', '.join(names)}")
        kw["rates"] = tuple((n, r.number(rates, _join(k, "rates"), n, positive=True))
                            for n in rates)
    for key in ("gain", "witness"):
        if key in t:
            if not isinstance(t[key], bool):
                raise r.fail(_join(k, key), f"expected true or false, got {_tname(t[key])}",
                             "write true or false")
            kw[key] = t[key]
    for key, lo in (("dense", 1), ("samples", 0), ("max_rounds", 1), ("cuts", 1), ("curve", 0)):
        if key in t:
            kw[key] = r.integer(t, k, key, 0, minimum=lo)
    if "tolerance" in t:
        kw["tolerance"] = r.number(t, k, "tolerance", positive=True)
    if "solver" in t:
        from .analysis.lmi import SOLVERS

        kw["solver"] = r.choice(t, k, "solver", "clarabel", SOLVERS)
    out = CertificateSettings(**kw)
    try:
        out.validate(names)
    except InputError as exc:
        raise r.fail(k, str(exc), "see docs/design-file.md") from None
    return out


# --------------------------------------------------------------------------- against a plant
def validate_against_plant(spec: DesignSpec, plant: LinearPlant) -> None:
    """Check that every channel named in the design exists in ``plant``.

    Raises
    ------
    InputError
        naming the first unknown channel and listing the plant's input or
        output names.
    """
    ins, outs = tuple(plant.input_names), tuple(plant.output_names)
    m = np.asarray(plant.B).shape[1] if np.asarray(plant.B).ndim == 2 else 0
    p = np.asarray(plant.C).shape[0] if np.asarray(plant.C).ndim == 2 else 0
    if len(ins) != m or len(outs) != p:
        raise InputError(f"{spec.name}: the plant has {len(ins)} input names for {m} inputs "
                         f"and {len(outs)} output names for {p} outputs; name every signal")
    c = spec.channels
    for list_name, names, plant_names, kind in (
            ("controls", c.controls, ins, "input"),
            ("disturbances", c.disturbances, ins, "input"),
            ("measured", c.measured, outs, "output"),
            ("performance", c.performance, outs, "output")):
        for n in names:
            if n not in plant_names:
                raise InputError(f"{spec.name}: channels.{list_name}: '{n}' is not a plant "
                                 f"{kind}; the plant's {kind}s are {', '.join(plant_names)}")
            given, own = dict(c.units).get(n, ""), plant.unit_of(kind, n)
            if given and own and given != own:
                raise InputError(f"{spec.name}: channels.units.{n} = \"{given}\" but the model "
                                 f"gives {kind} '{n}' in \"{own}\"; use the model's unit (the "
                                 "matrices are in it) or convert the model")
