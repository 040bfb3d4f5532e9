"""The scheduled table: a rectangular grid of controllers, filled from a family.

The table stores one controller ``(A, B, C, D)`` at every node of a rectangular grid
of breakpoints over the scheduling variables. Nodes are flattened in C order: the
first scheduling variable varies slowest, the last fastest, so node
``(i_1, ..., i_d)`` has flat index ``((i_1 n_2 + i_2) n_3 + i_3) ...``.

Filling rules:

* at a node that is a successful design point of the family, the family's own
  controller is used (the table reproduces the local controllers exactly);
* anywhere else (denser breakpoints, grid holes, failed points, scattered families)
  the family's interpolant :class:`schedule.interpolate.ScheduledController` is
  evaluated;
* for scattered families the grid spans the variable bounds; nodes outside the
  convex hull of the design points get ``inside = False`` and hold the controller of
  the nearest inside node (a finite stand-in, flagged, never an extrapolation).
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from ..errors import InputError, NumericalError
from ..types import Family, SchedulingVariable
from .antiwindup import ActuatorLimits, observer_input_gain, saturated_dynamics_radius
from .discretize import discretize, discretize_gain

FORMAT_NAME = "schedule-table"
FORMAT_VERSION = 2
#: table format versions this tool reads (1: no limits, no anti-windup gain)
READABLE_VERSIONS = (1, 2)
MATRICES = ("A", "B", "C", "D")
PLANT_INPUTS = ("B2", "D22")


@dataclass(frozen=True)
class ScheduledTable:
    """Controllers on a rectangular grid of breakpoints, with their metadata.

    Attributes
    ----------
    variables : scheduling variables (name, unit, bounds), length d.
    breakpoints : d strictly increasing float arrays; ``n_k = len(breakpoints[k])``.
    A, B, C, D : stacked controller matrices, (M, n, n), (M, n, ny), (M, nu, n),
        (M, nu, ny) with ``M = prod(n_k)`` nodes in C order (last variable fastest).
    inside : (M,) bool, False for nodes outside the design points' convex hull.
    sample_time : seconds; 0 for a continuous-time table.
    method : "continuous", "tustin" or "zoh".
    prewarp : Tustin pre-warp frequency in rad/s (0 = none).
    gamma : the family's common design gamma.
    measured_names, control_names : controller inputs y and outputs u (u = K y).
    measured_units, control_units : units of those signals ("" when unknown).
    source_sha256 : SHA-256 of the family file the table came from ("" if in memory).
    tool_version : version of this package that wrote the table.
    H : (M, n, nu) anti-windup gain (``x <- ... + H (u_lim - u)``, see
        :mod:`schedule.export.antiwindup`), or None when the family gives none.
    limits : actuator limits on the controller outputs (None: no limits).
    """

    variables: tuple[SchedulingVariable, ...]
    breakpoints: tuple[np.ndarray, ...]
    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    inside: np.ndarray
    sample_time: float = 0.0
    method: str = "continuous"
    prewarp: float = 0.0
    gamma: float = float("nan")
    measured_names: tuple[str, ...] = ()
    control_names: tuple[str, ...] = ()
    measured_units: tuple[str, ...] = ()
    control_units: tuple[str, ...] = ()
    source_sha256: str = ""
    tool_version: str = ""
    extra: dict = field(default_factory=dict)
    H: np.ndarray | None = None
    limits: ActuatorLimits | None = None

    @property
    def shape(self) -> tuple[int, ...]:
        """Number of breakpoints per variable."""
        return tuple(len(b) for b in self.breakpoints)

    @property
    def n_states(self) -> int:
        return int(self.A.shape[1])

    @property
    def n_inputs(self) -> int:
        """Number of controller inputs (measurements y)."""
        return int(self.B.shape[2])

    @property
    def n_outputs(self) -> int:
        """Number of controller outputs (controls u)."""
        return int(self.C.shape[1])

    @property
    def discrete(self) -> bool:
        return self.sample_time > 0

    @property
    def actuator_limits(self) -> ActuatorLimits:
        """The limits, with ``inf`` where a control has none."""
        return self.limits if self.limits is not None else ActuatorLimits.none(self.n_outputs)

    @property
    def anti_windup(self) -> bool:
        """True when the table carries the anti-windup gain H."""
        return self.H is not None

    def nodes(self) -> np.ndarray:
        """(M, d) scheduling values of the nodes, in flat (C) order."""
        mesh = np.meshgrid(*self.breakpoints, indexing="ij")
        return np.stack([m.ravel() for m in mesh], axis=1) if mesh else np.zeros((1, 0))

    def metadata(self) -> dict:
        """Everything but the matrices, as JSON-ready plain values."""
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "tool_version": self.tool_version,
            "source_sha256": self.source_sha256,
            "gamma": _json_float(self.gamma),
            "sample_time": float(self.sample_time),
            "method": self.method,
            "prewarp": float(self.prewarp),
            "variables": [{"name": v.name, "unit": v.unit, "lower": float(v.lower),
                           "upper": float(v.upper)} for v in self.variables],
            "breakpoints": [[float(x) for x in b] for b in self.breakpoints],
            "inputs": [{"name": n, "unit": u} for n, u in
                       zip(self.measured_names, _units(self.measured_units,
                                                       self.measured_names), strict=True)],
            "outputs": [{"name": n, "unit": u} for n, u in
                        zip(self.control_names, _units(self.control_units,
                                                       self.control_names), strict=True)],
            "n_states": self.n_states,
            "limits": self.actuator_limits.to_metadata(self.control_names),
            "anti_windup": self.anti_windup,
        }


def _json_float(x: float):
    x = float(x)
    return x if math.isfinite(x) else None


def _units(units, names) -> tuple[str, ...]:
    units = tuple(units)
    return units if len(units) == len(names) else ("",) * len(names)


def table_from_metadata(meta: dict, mats: dict, inside, where: str) -> ScheduledTable:
    """Rebuild and validate a table from its metadata and stacked matrices (used by readers)."""
    try:
        if meta.get("format") != FORMAT_NAME:
            raise InputError(f"{where} is not a scheduled table (format should be "
                             f"'{FORMAT_NAME}'); export it with `schedule export`")
        version = meta.get("format_version", -1)
        if isinstance(version, bool) or not isinstance(version, int) \
                or version not in READABLE_VERSIONS:
            raise InputError(f"{where} has table format version {version!r}; this tool reads "
                             f"versions {', '.join(map(str, READABLE_VERSIONS))}")
        variables = tuple(SchedulingVariable(str(v["name"]), str(v["unit"]), float(v["lower"]),
                                             float(v["upper"])) for v in meta["variables"])
        bps = tuple(np.asarray(b, dtype=float) for b in meta["breakpoints"])
        gamma = meta.get("gamma")
        table = ScheduledTable(
            variables=variables, breakpoints=bps,
            A=np.asarray(mats["A"], dtype=float), B=np.asarray(mats["B"], dtype=float),
            C=np.asarray(mats["C"], dtype=float), D=np.asarray(mats["D"], dtype=float),
            inside=np.asarray(inside, dtype=bool),
            sample_time=float(meta["sample_time"]), method=str(meta["method"]),
            prewarp=float(meta.get("prewarp", 0.0)),
            gamma=float("nan") if gamma is None else float(gamma),
            measured_names=tuple(str(s["name"]) for s in meta["inputs"]),
            control_names=tuple(str(s["name"]) for s in meta["outputs"]),
            measured_units=tuple(str(s.get("unit", "")) for s in meta["inputs"]),
            control_units=tuple(str(s.get("unit", "")) for s in meta["outputs"]),
            source_sha256=str(meta.get("source_sha256", "")),
            tool_version=str(meta.get("tool_version", "")),
            H=None if mats.get("H") is None else np.asarray(mats["H"], dtype=float))
        if version >= 2:
            limits = ActuatorLimits.from_metadata(meta.get("limits"), table.control_names, where)
            if bool(meta.get("anti_windup")) != (table.H is not None):
                raise InputError(f"{where}: metadata says anti_windup = "
                                 f"{bool(meta.get('anti_windup'))} but the gain H is "
                                 f"{'absent' if table.H is None else 'present'}; re-export")
            table = replace(table, limits=limits if limits.any else None)
    except InputError:
        raise
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{where}: table metadata is malformed ({exc!r}); re-export the "
                         "table") from None
    validate_table(table, where)
    return table


def validate_table(table: ScheduledTable, where: str = "table") -> None:
    """Check shapes, finiteness and breakpoint order; raise InputError naming the problem."""
    d = len(table.variables)
    if len(table.breakpoints) != d or d == 0:
        raise InputError(f"{where}: {len(table.breakpoints)} breakpoint lists for {d} "
                         "scheduling variables; give one list per variable")
    for v, b in zip(table.variables, table.breakpoints, strict=True):
        if b.ndim != 1 or b.size < 1 or not np.isfinite(b).all() or np.any(np.diff(b) <= 0):
            raise InputError(f"{where}: breakpoints of '{v.name}' must be finite and strictly "
                             "increasing")
    M = int(np.prod(table.shape))
    A, B, C, D = table.A, table.B, table.C, table.D
    if A.ndim != 3 or A.shape[0] != M or A.shape[1] != A.shape[2]:
        raise InputError(f"{where}: A has shape {A.shape}, expected ({M}, n, n)")
    n = A.shape[1]
    if B.ndim != 3 or C.ndim != 3 or D.ndim != 3:
        raise InputError(f"{where}: B, C and D must be stacked (M, rows, cols) arrays")
    ny, nu = B.shape[2], C.shape[1]
    for name, arr, shape in (("B", B, (M, n, ny)), ("C", C, (M, nu, n)), ("D", D, (M, nu, ny))):
        if arr.shape != shape:
            raise InputError(f"{where}: {name} has shape {arr.shape}, expected {shape}")
        if not np.isfinite(arr).all():
            raise InputError(f"{where}: {name} holds NaN or inf; re-export the table")
    if not np.isfinite(A).all():
        raise InputError(f"{where}: A holds NaN or inf; re-export the table")
    if table.H is not None:
        if table.H.shape != (M, n, nu):
            raise InputError(f"{where}: H has shape {table.H.shape}, expected {(M, n, nu)}")
        if not np.isfinite(table.H).all():
            raise InputError(f"{where}: H holds NaN or inf; re-export the table")
    if table.inside.shape != (M,):
        raise InputError(f"{where}: inside mask has shape {table.inside.shape}, expected ({M},)")
    if len(table.measured_names) != ny or len(table.control_names) != nu:
        raise InputError(f"{where}: {len(table.measured_names)} input and "
                         f"{len(table.control_names)} output names for a controller with "
                         f"{ny} inputs and {nu} outputs")
    if table.method not in ("continuous", "tustin", "zoh"):
        raise InputError(f"{where}: unknown method {table.method!r}")
    if (table.method == "continuous") != (table.sample_time == 0):
        raise InputError(f"{where}: method {table.method!r} does not fit sample time "
                         f"{table.sample_time:g}")
    if table.limits is not None:
        table.limits.validate(where, table.control_names)


# --------------------------------------------------------------------------- breakpoints

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


def parse_breakpoints(text: str, variables) -> dict[str, np.ndarray]:
    """Parse the breakpoint syntax of ``schedule export --breakpoints``.

    ``"name=v1,v2,v3,other=start:stop:count"``: a token ``name=`` starts a variable;
    its values follow, comma separated; ``start:stop:count`` means ``count`` equally
    spaced values from ``start`` to ``stop`` inclusive. Semicolons and newlines also
    separate tokens. When ``text`` names an existing file, the file holds the same
    syntax (one variable per line is convenient; ``#`` starts a comment).
    Values must lie within the variable's bounds and increase strictly.
    """
    names = [v.name for v in variables]
    by_name = {v.name: v for v in variables}
    src = str(text)
    if os.path.isfile(src):
        try:
            src = "\n".join(line.split("#", 1)[0] for line in Path(src).read_text().splitlines())
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"cannot read breakpoint file {text}: {exc}") from None
    tokens = [t.strip() for t in re.split(r"[,;\n]", src) if t.strip()]
    out: dict[str, list[float]] = {}
    current = None
    for tok in tokens:
        if "=" in tok:
            current, tok = (s.strip() for s in tok.split("=", 1))
            if current not in by_name:
                raise InputError(f"--breakpoints names unknown variable {current!r}; "
                                 f"known: {', '.join(names)}")
            if current in out:
                raise InputError(f"--breakpoints gives variable {current!r} twice; give it once")
            out[current] = []
            if not tok:
                continue
        if current is None:
            raise InputError(f"--breakpoints token {tok!r} comes before any 'name='; write "
                             "name=v1,v2,... or name=start:stop:count")
        if re.fullmatch(rf"{_NUMBER}:{_NUMBER}:\d+", tok):
            a, b, c = tok.split(":")
            count = int(c)
            if count < 2:
                raise InputError(f"--breakpoints range {tok!r} needs a count of at least 2")
            out[current].extend(np.linspace(float(a), float(b), count).tolist())
        elif re.fullmatch(_NUMBER, tok):
            out[current].append(float(tok))
        else:
            raise InputError(f"--breakpoints value {tok!r} for {current!r} is not a number or "
                             "start:stop:count")
    result = {}
    for name, vals in out.items():
        v = by_name[name]
        arr = np.asarray(vals, dtype=float)
        if arr.size == 0:
            raise InputError(f"--breakpoints gives no values for {name!r}")
        if np.any(np.diff(arr) <= 0):
            raise InputError(f"--breakpoints for {name!r} must increase strictly; sort them "
                             "and drop repeats")
        tol = 1e-12 * max(1.0, abs(v.lower), abs(v.upper))
        if arr[0] < v.lower - tol or arr[-1] > v.upper + tol:
            raise InputError(f"--breakpoints for {name!r} run from {arr[0]:g} to {arr[-1]:g}, "
                             f"outside its bounds [{v.lower:g}, {v.upper:g}]; keep them inside")
        result[name] = np.clip(arr, v.lower, v.upper)
    return result


def default_scattered_count(n_points: int, d: int) -> int:
    """Breakpoints per variable for a scattered family: ``min(41, max(5, ceil(2 N^(1/d))))``."""
    return int(min(41, max(5, math.ceil(2.0 * n_points ** (1.0 / d)))))


# --------------------------------------------------------------------------- filling

def _node_label(variables, row) -> str:
    return "node (" + ", ".join(f"{v.name}={x:g}"
                                for v, x in zip(variables, row, strict=True)) + ")"


def _inside_hull(points: np.ndarray, nodes: np.ndarray, variables) -> np.ndarray:
    d = points.shape[1]
    span = np.array([v.upper - v.lower for v in variables], dtype=float)
    lo = np.array([v.lower for v in variables], dtype=float)
    P = (points - lo) / span
    X = (nodes - lo) / span
    if d == 1:
        return (X[:, 0] >= P[:, 0].min() - 1e-12) & (X[:, 0] <= P[:, 0].max() + 1e-12)
    from scipy.spatial import Delaunay, QhullError
    try:
        tri = Delaunay(P)
    except (QhullError, ValueError) as exc:
        raise InputError(f"the family's scattered points span no {d}-dimensional hull "
                         f"({str(exc).splitlines()[0] if str(exc) else 'degenerate'}); add "
                         "points off the common line or plane") from None
    return tri.find_simplex(X, tol=1e-10) >= 0


def _evaluate_interpolant(family: Family, nodes: np.ndarray) -> dict[str, np.ndarray]:
    try:
        from ..interpolate import ScheduledController
    except ImportError as exc:  # pragma: no cover - only while the module is missing
        raise InputError(f"filling table nodes between design points needs the interpolant "
                         f"({exc}); export at the design breakpoints instead") from None
    sc = ScheduledController.from_family(family)
    vals = sc.evaluate(np.asarray(nodes, dtype=float))
    return {k: np.asarray(vals[k], dtype=float) for k in MATRICES}


def _plant_inputs_at(family: Family, nodes: np.ndarray) -> dict[str, np.ndarray]:
    """The interpolated generalized plant's B2 and D22 at ``nodes`` (for the anti-windup gain)."""
    from ..interpolate import ScheduledController

    plant = ScheduledController.from_family(family).plant_at(np.asarray(nodes, dtype=float))
    return {k: np.asarray(plant[k], dtype=float) for k in PLANT_INPUTS}


def _fitting_plant(family: Family, n: int, ny: int, nu: int) -> dict[str, np.ndarray] | None:
    """The family's B2 (N, n, nu) and D22 (N, ny, nu) if they fit the controllers, else None."""
    plant = family.plant or {}
    N = np.asarray(family.points).shape[0]
    want = {"B2": (N, n, nu), "D22": (N, ny, nu)}
    got = {k: np.asarray(plant[k], dtype=float) for k in PLANT_INPUTS if k in plant}
    if len(got) != 2 or any(got[k].shape != want[k] for k in PLANT_INPUTS):
        return None
    return got


def _anti_windup_gain(table: ScheduledTable, H: np.ndarray | None, continuous: dict,
                      labels, limits_given: bool) -> tuple[np.ndarray | None, str]:
    """Discretize the anti-windup gain like the table and check the limited dynamics.

    Returns ``(H, note)``: H None with a reason when the family gives no usable gain.
    A limited-operation state matrix ``A - H C`` that is not stable at some node is an
    error when limits are given, otherwise the gain is dropped with the reason.
    """
    if H is None:
        return None, ("the family holds no generalized plant that fits its controllers, so "
                      "the table carries no anti-windup gain")
    if table.discrete:
        H = discretize_gain(continuous["A"], continuous["C"], H, table.sample_time,
                            table.method, table.prewarp, labels=labels)
    radius = saturated_dynamics_radius(table.A, table.C, H, table.discrete)
    bound = 1.0 if table.discrete else 0.0
    bad = ~(radius < bound)
    if bad.any():
        j = int(np.argmax(np.where(bad, radius, -np.inf)))
        what = "spectral radius" if table.discrete else "spectral abscissa"
        reason = (f"the controller limited at {labels[j]} would be unstable (A - H C has "
                  f"{what} {radius[j]:.6g})")
        if limits_given:
            raise NumericalError(f"{reason}; the observer-form anti-windup does not apply "
                                 "there: check the design or drop the [[limits]]")
        return None, reason
    return H, ""


def _match_index(values: np.ndarray, design: np.ndarray) -> np.ndarray:
    """Index into ``design`` of each value (relative match 1e-12), -1 where none."""
    out = np.full(values.shape, -1, dtype=int)
    scale = max(1.0, float(np.max(np.abs(design))))
    for i, x in enumerate(values):
        hit = np.flatnonzero(np.abs(design - x) <= 1e-12 * scale)
        if hit.size:
            out[i] = int(hit[0])
    return out


#: sample at least this many times per period of the fastest closed-loop mode (common
#: practice)
SAMPLES_PER_PERIOD = 10


def fastest_mode(family: Family) -> tuple[float, int, str]:
    """The fastest mode the discrete table must follow: ``(|lambda| in rad/s, point, what)``.

    The largest eigenvalue modulus of the closed loops (generalized plant with the
    controller, lower LFT) at the family's successful design points; when the family
    holds no plant that fits its controllers, that of the controllers themselves
    (``what`` says which).
    """
    ok = np.flatnonzero(np.asarray(family.ok, dtype=bool))
    K = {k: np.asarray(family.controller[k], dtype=float)[ok] for k in MATRICES}
    A, what = K["A"], "controller"
    plant = {k: np.asarray(v, dtype=float) for k, v in (family.plant or {}).items()}
    n, ny, nu = K["A"].shape[1], K["B"].shape[2], K["C"].shape[1]
    nx = plant["A"].shape[1] if "A" in plant and np.ndim(plant["A"]) == 3 else 0
    want = {"A": (nx, nx), "B2": (nx, nu), "C2": (ny, nx), "D22": (ny, nu)}
    fits = nx > 0 and all(k in plant and plant[k].shape[1:] == shape
                          for k, shape in want.items())
    if fits and n == nx:
        from ..check import PLANT_KEYS, closed_loop_many
        from ..errors import ScheduleError

        try:
            A = closed_loop_many({k: plant[k][ok] for k in PLANT_KEYS}, K)[0]
            what = "closed-loop"
        except (ScheduleError, KeyError, ValueError, np.linalg.LinAlgError):
            pass
    if A.shape[1] == 0:
        return 0.0, int(ok[0]) if ok.size else 0, what
    speed = np.abs(np.linalg.eigvals(A)).max(axis=1)
    j = int(np.argmax(speed))
    return float(speed[j]), int(ok[j]), what


def check_sample_time(family: Family, sample_time: float) -> str:
    """Refuse a sample time the table cannot follow; warn about one slower than common practice.

    With ``w`` the fastest mode of :func:`fastest_mode` and ``T`` the sample time:
    ``w T >= pi`` puts the mode above the Nyquist frequency (InputError); fewer than
    :data:`SAMPLES_PER_PERIOD` samples per period ``2 pi / w`` returns a warning
    (common practice), else "". Both say the numbers and the sample time to use.
    """
    T = float(sample_time)
    if not T > 0:
        return ""
    w, k, what = fastest_mode(family)
    if w <= 0:
        return ""
    names = family.variable_names
    where = ", ".join(f"{n}={x:g}" for n, x in zip(names, np.asarray(family.points)[k],
                                                   strict=True))
    advice = 2.0 * math.pi / (SAMPLES_PER_PERIOD * w)
    if w * T >= math.pi:
        raise InputError(f"sample time {T:g} s is too slow: the fastest {what} mode, "
                         f"{w:.3g} rad/s at ({where}), lies above the Nyquist frequency "
                         f"pi/T = {math.pi / T:.3g} rad/s; give a sample time of at most "
                         f"{advice:.3g} s ({SAMPLES_PER_PERIOD} samples per period, common "
                         "practice)")
    per_period = 2.0 * math.pi / (w * T)
    if per_period < SAMPLES_PER_PERIOD:
        return (f"sample time {T:g} s gives {per_period:.1f} samples per period of the "
                f"fastest {what} mode ({w:.3g} rad/s at {where}); common practice takes at "
                f"least {SAMPLES_PER_PERIOD}: a sample time of at most {advice:.3g} s")
    return ""


def build_table(family: Family, breakpoints=None, sample_time: float = 0.0,
                method: str = "tustin", prewarp: float = 0.0, source_sha256: str = "",
                tool_version: str | None = None, limits=None) -> ScheduledTable:
    """Build the scheduled table of ``family``.

    Parameters
    ----------
    family : the controller family.
    breakpoints : None (design breakpoints; for scattered families a regular grid of
        :func:`default_scattered_count` values per variable over the bounds), a dict
        ``name -> values`` (variables not named keep their default), or the string
        syntax of :func:`parse_breakpoints`.
    sample_time : 0 for a continuous table, else T > 0 seconds.
    method, prewarp : discretization (see :func:`schedule.export.discretize.discretize`).
    source_sha256 : hash of the family file, stored in the metadata.
    limits : actuator limits of the controls: ``[[limits]]`` entries of the design file
        (:class:`schedule.design_file.LimitSpec`), a mapping ``control -> (lower, upper,
        rate)``, an :class:`~schedule.export.antiwindup.ActuatorLimits` or None.

    The table also carries the anti-windup gain H at every node (from the family's
    generalized plant, :func:`schedule.export.antiwindup.observer_input_gain`), so the
    exported controller can feed its observer the limited command.

    Raises
    ------
    InputError
        Unknown variables, breakpoints outside the bounds, an empty family, a sample
        time slower than the Nyquist limit of the fastest mode (:func:`check_sample_time`;
        a sample time merely slower than common practice leaves a warning in
        ``table.extra["sample_time_note"]`` instead).
    NumericalError
        A discretization fails at a node (the message names the node).
    """
    from .. import __version__

    variables = tuple(family.variables)
    d = len(variables)
    if d == 0:
        raise InputError("the family has no scheduling variables; re-run the design")
    ok = np.asarray(family.ok, dtype=bool)
    if not ok.any():
        raise InputError("the family has no successful operating point; re-run the design "
                         "with a larger gamma")
    points = np.asarray(family.points, dtype=float).reshape(-1, d)
    if isinstance(breakpoints, str):
        breakpoints = parse_breakpoints(breakpoints, variables)
    breakpoints = dict(breakpoints or {})
    unknown = set(breakpoints) - {v.name for v in variables}
    if unknown:
        raise InputError(f"breakpoints given for unknown variable(s) {sorted(unknown)}; known: "
                         f"{', '.join(v.name for v in variables)}")
    rectangular = family.breakpoints is not None and family.grid_index is not None
    if rectangular:
        defaults = [np.asarray(b, dtype=float) for b in family.breakpoints]
    else:
        count = default_scattered_count(int(ok.sum()), d)
        defaults = [np.linspace(v.lower, v.upper, count) for v in variables]
    bps = tuple(np.asarray(breakpoints.get(v.name, defaults[k]), dtype=float)
                for k, v in enumerate(variables))
    for v, b in zip(variables, bps, strict=True):
        if b.ndim != 1 or b.size == 0 or np.any(np.diff(b) <= 0) or not np.isfinite(b).all():
            raise InputError(f"breakpoints of {v.name!r} must be finite and strictly increasing")
        tol = 1e-12 * max(1.0, abs(v.lower), abs(v.upper))
        if b[0] < v.lower - tol or b[-1] > v.upper + tol:
            raise InputError(f"breakpoints of {v.name!r} run from {b[0]:g} to {b[-1]:g}, "
                             f"outside its bounds [{v.lower:g}, {v.upper:g}]; keep them inside")
    mesh = np.meshgrid(*bps, indexing="ij")
    nodes = np.stack([m.ravel() for m in mesh], axis=1)
    M = nodes.shape[0]
    ctrl = {k: np.asarray(family.controller[k], dtype=float) for k in MATRICES}
    n, ny, nu = ctrl["A"].shape[1], ctrl["B"].shape[2], ctrl["C"].shape[1]
    mats = {"A": np.zeros((M, n, n)), "B": np.zeros((M, n, ny)),
            "C": np.zeros((M, nu, n)), "D": np.zeros((M, nu, ny))}
    plant = _fitting_plant(family, n, ny, nu)
    if plant is not None:
        # the plant's B2 and D22 travel with the controllers: the anti-windup gain needs them
        ctrl.update(plant)
        mats.update({"B2": np.zeros((M, n, nu)), "D22": np.zeros((M, ny, nu))})
    keys = tuple(mats)
    have = np.zeros(M, dtype=bool)
    inside = np.ones(M, dtype=bool)

    if rectangular:
        # Nodes that coincide with successful design points take the family's own controller.
        grid_index = np.asarray(family.grid_index, dtype=int)
        design_bps = [np.asarray(b, dtype=float) for b in family.breakpoints]
        match = [_match_index(b, db) for b, db in zip(bps, design_bps, strict=True)]
        lookup = {tuple(grid_index[k]): k for k in range(grid_index.shape[0]) if ok[k]}
        node_idx = np.stack(np.meshgrid(*[np.arange(len(b)) for b in bps], indexing="ij"),
                            axis=-1).reshape(M, d)
        for j in range(M):
            key = tuple(int(match[a][node_idx[j, a]]) for a in range(d))
            k = lookup.get(key, None) if min(key) >= 0 else None
            if k is not None:
                for name in keys:
                    mats[name][j] = ctrl[name][k]
                have[j] = True
    else:
        inside = _inside_hull(points[ok], nodes, variables)
        if not inside.any():
            raise InputError("no table node lies inside the hull of the family's points; "
                             "give denser --breakpoints")
        scale = np.array([v.upper - v.lower for v in variables], dtype=float)
        for j in np.flatnonzero(inside):
            dist = np.max(np.abs(points[ok] - nodes[j]) / scale, axis=1)
            k = int(np.argmin(dist))
            if dist[k] <= 1e-12:
                for name in keys:
                    mats[name][j] = ctrl[name][np.flatnonzero(ok)[k]]
                have[j] = True
    todo = np.flatnonzero(~have & inside)
    if todo.size:
        vals = _evaluate_interpolant(family, nodes[todo])
        if plant is not None:
            vals.update(_plant_inputs_at(family, nodes[todo]))
        for name in keys:
            arr = vals[name].reshape((todo.size,) + mats[name].shape[1:])
            bad = ~np.isfinite(arr.reshape(todo.size, -1)).all(axis=1)
            if bad.any():
                j = int(todo[np.argmax(bad)])
                raise InputError(f"the interpolant gives non-finite {name} at "
                                 f"{_node_label(variables, nodes[j])}; refit the interpolant "
                                 "or choose other breakpoints")
            mats[name][todo] = arr
    if not inside.all():
        # Outside the hull: copy the nearest inside node (flagged by inside=False).
        idx_in = np.flatnonzero(inside)
        scale = np.array([v.upper - v.lower for v in variables], dtype=float)
        for j in np.flatnonzero(~inside):
            k = idx_in[int(np.argmin(np.sum(((nodes[idx_in] - nodes[j]) / scale) ** 2,
                                            axis=1)))]
            for name in keys:
                mats[name][j] = mats[name][k]

    continuous = {k: mats[k] for k in MATRICES}
    H = None if plant is None else observer_input_gain(mats["B2"], mats["D22"], mats["B"],
                                                       mats["D"])
    labels = [_node_label(variables, row) for row in nodes]
    sampling_note = check_sample_time(family, sample_time) if sample_time else ""
    if sample_time:
        disc = discretize(mats["A"], mats["B"], mats["C"], mats["D"], sample_time, method,
                          prewarp, labels=labels)
        mats = dict(zip(MATRICES, disc, strict=True))
        sample_time, method_out = float(sample_time), method
    else:
        if prewarp:
            raise InputError("pre-warp needs a sample time; give --sample-time or drop "
                             "--prewarp")
        sample_time, method_out, prewarp = 0.0, "continuous", 0.0
    table = ScheduledTable(
        variables=variables, breakpoints=bps, inside=inside,
        sample_time=sample_time, method=method_out, prewarp=float(prewarp),
        gamma=float(family.gamma),
        measured_names=tuple(family.measured_names) or tuple(f"y{i + 1}" for i in range(ny)),
        control_names=tuple(family.control_names) or tuple(f"u{i + 1}" for i in range(nu)),
        measured_units=family.units_of("measured") if family.measured_names else ("",) * ny,
        control_units=family.units_of("controls") if family.control_names else ("",) * nu,
        source_sha256=source_sha256,
        tool_version=__version__ if tool_version is None else tool_version,
        **{k: mats[k] for k in MATRICES})
    if isinstance(limits, ActuatorLimits):
        limits.validate("limits", table.control_names)
    else:
        limits = ActuatorLimits.from_specs(table.control_names, limits)
    H, note = _anti_windup_gain(table, H, continuous, labels, limits.any)
    extra = {"anti_windup_note": note} if note else {}
    if sampling_note:
        extra["sample_time_note"] = sampling_note
    table = replace(table, H=H, limits=limits if limits.any else None, extra=extra)
    validate_table(table, "table")
    return table


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 hex digest of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
