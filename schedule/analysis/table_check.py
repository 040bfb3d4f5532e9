"""Check the shipped table: the exported controller as it runs, at every in-between point.

The family check (:func:`schedule.check.check_family`) closes the loop with the
family's interpolant in continuous time. What runs on the target is the table: node
matrices interpolated multilinearly (:func:`schedule.export.runtime.interpolate_matrices`,
the lookup the C code and the FMU use) and, for a discrete table, sampled at the table's
sample time. :func:`check_table` closes that loop at every check point:

- the plant is the true plant (the design's model, :func:`schedule.check.plants_at`;
  else the family's interpolated plant, labelled a weaker check), discretized exactly
  by zero-order hold at the table's sample time
  (:func:`schedule.analysis.discrete_loop.zoh_plants`); a continuous table is checked
  in continuous time;
- the controller is the table's lookup at the point, exactly as the runtime computes it;
- the numbers are stability (spectral radius), the closed-loop H-infinity norm against
  gamma (exact, through the bilinear image) and the disk and classical margins of the
  discrete loop (:func:`schedule.analysis.discrete_loop.discrete_check_arrays`), judged
  by the one pass criterion (:class:`schedule.check.PassCriterion`).

The check points are the family check's in-between points (cell centres, edge
midpoints, space-filling samples, a points file), the table's own nodes, cell centres
and edge midpoints (a table can be denser than the design grid), and the family's design
points. Points in a table cell with a stand-in node (outside a scattered family's hull,
``inside`` = 0) are left out and counted in a note.

Side by side at the same points (the cost of each step): the family's interpolant in
continuous time (what ``schedule check`` judges); for a discrete table the interpolant
discretized like the table (what an ever denser table tends to: the reference that
tells a failure breakpoints can fix from one they cannot); the family tabulated at the
table's breakpoints in continuous time (multilinear tabulation alone); and the table as
it runs (tabulation and discretization). The anti-windup gain H and the actuator
limits of the table do not enter: the linear check assumes the limits inactive.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace

import numpy as np

from ..errors import InputError, ScheduleError
from ..progress import stage_line
from ..types import Family, point_text

__all__ = ["TableCheck", "check_table", "table_check_points", "table_matrices", "LOOPS"]

#: the loops compared at every point: label -> description
LOOPS = {
    "interpolant": "family interpolant, continuous",
    "interpolant_discrete": "family interpolant, discretized",
    "table_continuous": "table lookup, continuous",
    "table": "table as it runs",
}
#: kinds of the table's own check points
TABLE_KINDS = ("node", "table_centre", "table_midpoint")
_COMPARED = ("ratio", "stable", "norm_bound", "in_gain_db", "in_phase_deg", "out_gain_db",
             "in_all_gain_db")


def _f(x):
    from ..check import _f as json_float

    return json_float(x)


# ----------------------------------------------------------------------------- points
def table_check_points(family: Family, table, settings, spec=None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """The points of the table check: ``(points (M, d), kinds (M,))``, each point once.

    Kinds: "node" (table nodes), the family check's in-between kinds ("centre",
    "midpoint", "sobol" / "latin_hypercube", "file"), "table_centre" and
    "table_midpoint" (the table's own cells, where they differ from the family's), and
    "grid" (design points that are not nodes).
    """
    from .. import envelope as env
    from ..check import check_points_for

    d = len(family.variables)
    parts: list[tuple[np.ndarray, object]] = [(table.nodes(), "node")]
    fam, fkinds = check_points_for(family, settings, spec)
    parts.append((fam, fkinds))
    grid = env.RectangularGrid(tuple(np.asarray(b, float) for b in table.breakpoints))
    between, bkinds = env.in_between_points(grid, settings.centres, settings.midpoints)
    parts.append((between, np.array(["table_" + str(k) for k in bkinds], dtype=object)))
    if settings.grid:
        ok = np.asarray(family.ok, bool)
        parts.append((np.asarray(family.points, float)[ok], "grid"))
    lo = np.array([v.lower for v in family.variables], float)
    span = np.array([v.upper - v.lower for v in family.variables], float)
    span = np.where(span > 0, span, 1.0)
    rows, kinds, seen = [], [], set()
    for pts, kind in parts:
        pts = np.asarray(pts, float).reshape(-1, d)
        for i, row in enumerate(pts):
            key = tuple(np.round((row - lo) / span, 10).tolist())
            if key in seen:
                continue
            seen.add(key)
            rows.append(row)
            kinds.append(kind if isinstance(kind, str) else str(kind[i]))
    return np.array(rows, float).reshape(-1, d), np.array(kinds, dtype=object)


def table_matrices(table, points) -> dict[str, np.ndarray]:
    """The table's controller at each point, by the runtime's own lookup
    (:func:`schedule.export.runtime.interpolate_matrices`): stacks ``A, B, C, D``."""
    from ..export.runtime import interpolate_matrices

    pts = np.asarray(points, float)
    out = {k: np.zeros((pts.shape[0],) + getattr(table, k).shape[1:]) for k in "ABCD"}
    for i, p in enumerate(pts):
        m = interpolate_matrices(table, p)
        for k in "ABCD":
            out[k][i] = m[k]
    return out


def _stand_in_cells(table, points) -> np.ndarray:
    """(M,) True where the lookup at the point uses a node outside the design hull."""
    from ..export.runtime import corners

    inside = np.asarray(table.inside, bool)
    if inside.all():
        return np.zeros(len(points), bool)
    out = np.zeros(len(points), bool)
    for i, p in enumerate(points):
        flat, weight = corners(table.breakpoints, p)
        out[i] = not inside[flat[weight > 0]].all()
    return out


# ----------------------------------------------------------------------------- result
@dataclass
class TableCheck:
    """The table checked as it runs, with the interpolant and the continuous lookup beside it.

    ``values`` are the numbers of the loop that runs (keys of
    :func:`schedule.check.check_arrays`, plus ``spectral_radius`` and
    ``bilinear_condition`` for discrete tables), ``passed`` / ``reasons`` its verdict by
    :class:`schedule.check.PassCriterion`; ``compared`` maps the other loops of
    :data:`LOOPS` ("interpolant"; for discrete tables "interpolant_discrete" and, when
    compared, "table_continuous") to the same numbers, ``compared_passed`` to their
    verdicts.
    """

    variable_names: tuple[str, ...]
    units: tuple[str, ...]
    gamma: float
    settings: object
    sample_time: float
    method: str
    shape: tuple[int, ...]
    points: np.ndarray
    kind: np.ndarray
    plant_source: np.ndarray
    values: dict
    passed: np.ndarray
    reasons: list
    compared: dict = field(default_factory=dict)
    compared_passed: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    seconds: float = 0.0
    source: str = ""

    @property
    def criterion(self):
        from ..check import PassCriterion

        return PassCriterion.from_settings(self.gamma, self.settings)

    @property
    def discrete(self) -> bool:
        return self.sample_time > 0

    @property
    def all_passed(self) -> bool:
        return bool(np.all(self.passed))

    @property
    def weaker(self) -> bool:
        return bool(np.any(self.plant_source == "interpolated"))

    @property
    def reference(self) -> str:
        """The loop an ever denser table tends to: the interpolant, discretized like the
        table for a discrete one."""
        return "interpolant_discrete" if "interpolant_discrete" in self.compared \
            else "interpolant"

    def fixable(self) -> np.ndarray:
        """Indices of failing points where the reference loop (:attr:`reference`) passes:
        the multilinear tabulation is at fault and breakpoints can fix it; worst first."""
        ok = self.compared_passed.get(self.reference, np.ones(len(self.passed), bool))
        idx = np.flatnonzero(~self.passed & ok)
        return idx[np.argsort(-self._ratio()[idx], kind="stable")]

    def unfixable(self) -> np.ndarray:
        """Indices of failing points where the reference loop fails too (the family, or
        its discretization, does not meet the criterion there); worst first."""
        ok = self.compared_passed.get(self.reference, np.ones(len(self.passed), bool))
        idx = np.flatnonzero(~self.passed & ~ok)
        return idx[np.argsort(-self._ratio()[idx], kind="stable")]

    def why_unfixable(self, i: int) -> str:
        """Which step fails at point ``i``: the family's interpolant or its discretization."""
        if not self.compared_passed["interpolant"][i]:
            return "the family's interpolant fails there too"
        return ("the interpolant passes in continuous time but fails discretized at "
                f"T = {self.sample_time:g} s ({self.method})")

    def _ratio(self) -> np.ndarray:
        return np.nan_to_num(np.asarray(self.values["ratio"], float), nan=np.inf)

    def worst(self, count: int = 10) -> np.ndarray:
        """Indices of the worst points: failures first, then by norm / gamma."""
        order = np.lexsort((-self._ratio(), self.passed))
        return order[:count]

    def loops(self) -> list[tuple[str, dict, np.ndarray]]:
        """``(label, values, passed)`` of each loop, interpolant first, the table last."""
        out = [(k, self.compared[k], self.compared_passed[k]) for k in LOOPS
               if k in self.compared]
        return out + [("table", self.values, self.passed)]

    def cost(self) -> dict:
        """The numbers of each loop over all points and the cost of each step.

        For every loop: failed points, unstable loops, worst norm / gamma, smallest input
        disk gain and phase margins. ``tabulation``: the continuous lookup minus the
        interpolant; ``discretization``: the discrete table minus the continuous lookup
        (continuous tables: ``tabulation`` only, the table minus the interpolant); each
        with the change of the worst values and the largest increase of norm / gamma at
        one point.
        """
        out: dict = {}
        for label, vals, passed in self.loops():
            out[label] = _loop_numbers(vals, passed) | {"loop": LOOPS[label]}
        if "table_continuous" in self.compared:
            steps = (("tabulation", "interpolant", "table_continuous"),
                     ("discretization", "table_continuous", "table"))
        elif "interpolant_discrete" in self.compared:
            steps = (("discretization", "interpolant", "interpolant_discrete"),
                     ("tabulation", "interpolant_discrete", "table"))
        else:
            steps = (("tabulation", "interpolant", "table"),)
        for name, a, b in steps:
            if a not in out or b not in out:
                continue
            va = self.compared[a]
            vb = self.values if b == "table" else self.compared[b]
            out[name] = {
                "max_ratio_change": _diff(out[b]["max_ratio"], out[a]["max_ratio"]),
                "min_input_gain_db_change": _diff(out[b]["min_input_gain_db"],
                                                  out[a]["min_input_gain_db"]),
                "min_input_phase_deg_change": _diff(out[b]["min_input_phase_deg"],
                                                    out[a]["min_input_phase_deg"]),
                "largest_ratio_increase": _f(_largest_increase(va["ratio"], vb["ratio"])),
            }
        return out

    def summary(self) -> dict:
        v = self.values
        by_kind = {}
        for k in dict.fromkeys(self.kind.tolist()):
            m = self.kind == k
            by_kind[k] = {"points": int(m.sum()), "failed": int((~self.passed[m]).sum()),
                          "max_ratio": _f(np.max(v["ratio"][m]))}
        M = len(self.passed)
        return {
            "gamma": self.gamma, "points": M, "failed": int((~self.passed).sum()),
            "passed": self.all_passed, "unstable": int((~np.asarray(v["stable"], bool)).sum()),
            "fixable": int(self.fixable().size), "reference": self.reference,
            "max_ratio": _f(np.max(v["ratio"])) if M else None,
            "min_input_gain_db": _f(np.min(v["in_gain_db"])) if M else None,
            "min_input_phase_deg": _f(np.min(v["in_phase_deg"])) if M else None,
            "max_spectral_radius": (_f(np.max(v["spectral_radius"]))
                                    if M and "spectral_radius" in v else None),
            "weaker_check": self.weaker, "seconds": round(float(self.seconds), 3),
            "by_kind": by_kind,
        }

    def to_dict(self) -> dict:
        """JSON-ready: the table, the summary, the cost of each step, notes and the points."""
        from ..check import point_rows

        rows = point_rows(self)
        for i, row in enumerate(rows):
            for label, vals in self.compared.items():
                row[f"{label}_ratio"] = _f(vals["ratio"][i])
                row[f"{label}_passed"] = bool(self.compared_passed[label][i])
        return {"source": self.source, "sample_time": self.sample_time, "method": self.method,
                "shape": dict(zip(self.variable_names, map(int, self.shape), strict=True)),
                "nodes": int(np.prod(self.shape)), "criterion": self.criterion.describe(),
                "settings": asdict(self.settings), "summary": self.summary(),
                "cost": self.cost(), "notes": list(self.notes), "points": rows}


def _loop_numbers(vals: dict, passed: np.ndarray) -> dict:
    M = len(passed)
    if not M:
        return {"points": 0, "failed": 0, "unstable": 0, "max_ratio": None,
                "min_input_gain_db": None, "min_input_phase_deg": None}
    return {"points": M, "failed": int((~passed).sum()),
            "unstable": int((~np.asarray(vals["stable"], bool)).sum()),
            "max_ratio": _f(np.max(vals["ratio"])),
            "min_input_gain_db": _f(np.min(vals["in_gain_db"])),
            "min_input_phase_deg": _f(np.min(vals["in_phase_deg"]))}


def _diff(b, a):
    if b is None or a is None or isinstance(a, str) or isinstance(b, str):
        return None
    return _f(float(b) - float(a))


def _largest_increase(a, b) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    if not a.size:
        return float("nan")
    with np.errstate(invalid="ignore"):
        d = np.where(np.isfinite(a) & np.isfinite(b), b - a, np.where(np.isinf(b) & np.isfinite(a),
                                                                     np.inf, 0.0))
    return float(np.max(d))


# ----------------------------------------------------------------------------- driver
def _fits(family: Family, table) -> None:
    names = tuple(v.name for v in table.variables)
    if names != family.variable_names:
        raise InputError(f"the table schedules on {', '.join(names)} but the family on "
                         f"{', '.join(family.variable_names)}; check a table exported from "
                         "this family")
    K = family.controller
    want = (K["A"].shape[1], K["B"].shape[2], K["C"].shape[1])
    have = (table.n_states, table.n_inputs, table.n_outputs)
    if want != have:
        raise InputError(f"the table's controller has {have[0]} states, {have[1]} inputs and "
                         f"{have[2]} outputs, the family's {want[0]}, {want[1]} and {want[2]}; "
                         "check a table exported from this family")


def _family_lookup(family: Family, table, notes: list):
    """The family tabulated at the table's breakpoints in continuous time (None if it
    cannot be built); a note when the table's matrices are not what this family exports
    at the table's settings (another family, or edited)."""
    from ..export.discretize import discretize
    from ..export.table import build_table

    try:
        bps = {v.name: np.asarray(b, float) for v, b in zip(table.variables, table.breakpoints,
                                                           strict=True)}
        cont = build_table(family, breakpoints=bps, sample_time=0.0)
    except ScheduleError as exc:
        notes.append(f"the family could not be tabulated at the table's breakpoints ({exc}); "
                     "the continuous lookup is not compared")
        return None
    mats = (cont.A, cont.B, cont.C, cont.D)
    if table.discrete:
        try:
            mats = discretize(*mats, table.sample_time, table.method, table.prewarp)
        except ScheduleError:
            mats = None
    if mats is not None:
        inside = np.asarray(table.inside, bool)
        scale = max(float(np.max(np.abs(getattr(table, k)[inside]))) for k in "ABCD") or 1.0
        diff = max(float(np.max(np.abs(getattr(table, k)[inside] - m[inside])))
                   for k, m in zip("ABCD", mats, strict=True))
        if diff > 1e-9 * scale:
            notes.append(f"the table's matrices differ from what this family exports at the "
                         f"table's breakpoints and settings (largest difference {diff:.3g}, "
                         f"{diff / scale:.2g} of the largest entry): exported from another "
                         "family or edited; the check is of the table as it is")
    return cont


def _plants(family: Family, pts: np.ndarray, spec, sc, cache: dict | None, progress=None):
    """:func:`schedule.check.plants_at`, reusing the points kept in ``cache``."""
    from ..check import plants_at

    if cache is None:
        return plants_at(family, pts, spec, sc, progress)
    keys = [tuple(np.round(p, 12).tolist()) for p in pts]
    todo = [i for i, k in enumerate(keys) if k not in cache]
    if todo:
        P, src, ok, why = plants_at(family, pts[todo], spec, sc, progress)
        for j, i in enumerate(todo):
            cache[keys[i]] = ({k: v[j] for k, v in P.items()}, src[j], bool(ok[j]), why[j])
    rows = [cache[k] for k in keys]
    P = {k: np.stack([r[0][k] for r in rows]) for k in rows[0][0]}
    return (P, np.array([r[1] for r in rows], dtype=object), np.array([r[2] for r in rows]),
            [r[3] for r in rows])


def check_table(family: Family, table, settings=None, spec=None, jobs: int = 1, cluster=None,
                progress: Callable[[str, int, int], None] | None = None,
                compare: bool = True, controller=None, source: str = "",
                plant_cache: dict | None = None) -> TableCheck:
    """Check a scheduled table as it runs, at every in-between point (module docstring).

    Parameters
    ----------
    family : the family the table was exported from (variables, gamma, interpolant, and
        the design behind the true plant).
    table : :class:`schedule.export.table.ScheduledTable` (discrete or continuous).
    settings : :class:`schedule.check.CheckSettings` (points and pass thresholds; default
        the design's [check] table).
    spec : the DesignSpec with the model (the true plant); None: the interpolated plant.
    jobs, cluster : parallel checks.
    compare : also check the continuous lookup of the family at the table's breakpoints
        (discrete tables; the cost of discretization). The interpolant is always checked
        beside the table (it tells which failures the table adds).
    controller : the family's ScheduledController (default: the stored one).
    source : a label for the table (its file), shown in the output.
    plant_cache : a dict kept between calls with the same family, spec and sample time
        (the export's rounds): the plants at points already seen are reused.

    Returns
    -------
    TableCheck

    Raises
    ------
    InputError
        A table that does not fit the family (variables, sizes), or no point to check.
    """
    from ..check import CheckSettings, PassCriterion, check_points
    from ..interpolate import ScheduledController

    t0 = time.perf_counter()
    _fits(family, table)
    s = settings or CheckSettings.from_spec(spec)
    s.validate()
    notes: list[str] = []
    sc = controller or ScheduledController.from_family(family)
    gamma = float(family.gamma)
    digits = 1e-5 if table.extra.get("read_from") == "c" else 1e-9  # C keeps 6 digits
    if np.isfinite(table.gamma) and abs(table.gamma - gamma) > digits * gamma:
        notes.append(f"the table records gamma {table.gamma:.6g}, the family {gamma:.6g}; the "
                     "check uses the family's")
    stage_line(progress, "table points")
    pts, kinds = table_check_points(family, table, s, spec)
    stand_in = _stand_in_cells(table, pts)
    if stand_in.any():
        notes.append(f"{int(stand_in.sum())} check point(s) in table cells with stand-in nodes "
                     "(outside the design points' hull, inside = 0) are not checked")
        pts, kinds = pts[~stand_in], kinds[~stand_in]
    lo = np.array([b[0] for b in table.breakpoints])
    hi = np.array([b[-1] for b in table.breakpoints])
    clamped = np.any((pts < lo - 1e-12 * np.abs(lo)) | (pts > hi + 1e-12 * np.abs(hi)), axis=1)
    if clamped.any():
        notes.append(f"{int(clamped.sum())} check point(s) lie beyond the table's breakpoints; "
                     "the lookup clamps there (the edge controller), as on the target")
    if not len(pts):
        raise InputError("there is nothing to check in the table: every point lies in a cell "
                         "with stand-in nodes; export denser breakpoints")
    P, src, ok, why = _plants(family, pts, spec, sc, plant_cache, progress)
    for i in np.flatnonzero(~ok):
        notes.append(f"check point ({point_text(family.variable_names, pts[i])}) skipped: "
                     f"{why[i]}")
    if not ok.any():
        raise InputError(f"the model failed at every check point of the table ({why[0]}); fix "
                         "the model or check with the interpolated plant")
    pts, kinds, src = pts[ok], kinds[ok], src[ok]
    P = {k: v[ok] for k, v in P.items()}
    criterion = PassCriterion.from_settings(gamma, s)
    stage_line(progress, "table lookup")
    Kt = table_matrices(table, pts)
    if table.discrete:
        from .discrete_loop import zoh_plants

        Pd = zoh_plants(P, table.sample_time)
        values = check_points(Pd, Kt, gamma, s, jobs=jobs, cluster=cluster, progress=progress,
                              sample_time=table.sample_time, stage="table check")
    else:
        values = check_points(P, Kt, gamma, s, jobs=jobs, cluster=cluster, progress=progress,
                              stage="table check")
    passed, reasons = criterion.judge(values)
    light = replace(s, classical=False)
    compared, compared_passed = {}, {}
    stage_line(progress, "compare")
    Ki = sc.evaluate(pts)
    loops = [("interpolant", Ki, P, 0.0)]
    if table.discrete:
        from ..export.discretize import discretize

        Kid = dict(zip("ABCD", discretize(Ki["A"], Ki["B"], Ki["C"], Ki["D"],
                                          table.sample_time, table.method, table.prewarp),
                       strict=True))
        loops.append(("interpolant_discrete", Kid, Pd, table.sample_time))
    if compare and table.discrete:
        cont = _family_lookup(family, table, notes)
        if cont is not None:
            loops.append(("table_continuous", table_matrices(cont, pts), P, 0.0))
    for label, K, plant, T in loops:
        vals = check_points(plant, K, gamma, light, jobs=jobs, cluster=cluster, sample_time=T,
                            progress=progress, stage=f"vs {label.replace('_', ' ')}")
        compared[label] = {k: vals[k] for k in _COMPARED}
        compared_passed[label] = criterion.judge(vals)[0]
    result = TableCheck(
        family.variable_names, tuple(v.unit for v in family.variables), gamma, s,
        float(table.sample_time), str(table.method), tuple(int(n) for n in table.shape),
        pts, kinds, src, values, passed, reasons, compared, compared_passed, notes,
        source=source)
    if result.weaker:
        from ..check import WEAKER

        notes.append(WEAKER)
    result.seconds = time.perf_counter() - t0
    return result
