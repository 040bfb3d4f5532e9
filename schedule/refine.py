"""Refinement: add design points where the frozen-point checks fail, never making it worse.

One round: check the family (:func:`schedule.check.check_family`), choose new design
points where failures cluster, synthesize controllers there through the design's model
(:func:`schedule.family.extend_family`, which keeps or raises the common gamma), refit
the interpolant and check again. The in-between points of the first round are
re-checked in every later round (kind "previous"), so a failure cannot disappear just
because the check points moved.

Rectangular families gain whole breakpoints (:func:`grid_lines`): each failing
in-between point asks for the midpoint of every interval that holds it strictly inside
(a failing leave-one-out prediction, when it gates, for the midpoints of the intervals
next to its design point); breakpoints are taken worst first as long as the whole grid
lines they add fit in the point budget. The family stays rectangular, so every
interpolant kind (grid kinds too) stays available, its interpolant keeps its form and
kind, and the checks keep the cell centres and edge midpoints of the finer grid.
Scattered families gain the proposed points themselves
(:func:`schedule.check.propose_points`).

The loop stops when every check passes, when the point budget is spent, or when no
proposal is left (for example when only the design points themselves fail: more points
cannot fix a local design). Then the input family is checked once more at every point of
the refined family's last check (its in-between points and its new design points are
in-between points of the input), and :func:`compare_checks` compares the two on the same
points: a refined family that is worse than its input (see there) is reported as such,
and ``schedule refine`` does not write it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from .check import CheckResult, CheckSettings, check_family
from .errors import InputError
from .progress import prefixed
from .types import Family

__all__ = ["RefineOutcome", "Comparison", "compare_checks", "grid_lines", "refine_family"]

_IN_BETWEEN = ("centre", "midpoint", "sobol", "latin_hypercube", "file", "previous")


@dataclass(frozen=True)
class Comparison:
    """The refined family's check against its input's.

    before, after : summaries ``{"failed", "points", "max_ratio", "min_input_gain_db",
        "min_input_phase_deg"}`` over the points both checks judge and that decide both
        verdicts (the same point; leave-one-out predictions only with leave-one-out
        predictions).
    common : the number of those points, ``failed_before`` / ``failed_after`` the
        failures among them.
    new_failures : indices (into ``before``) of common points that passed before and fail
        after.
    worse : the verdict; ``reasons`` why (empty when not worse).
    """

    before: dict
    after: dict
    common: int
    failed_before: int
    failed_after: int
    new_failures: np.ndarray
    worse: bool
    reasons: tuple[str, ...]

    def lines(self, names=()) -> list[str]:
        """The comparison in a few lines for the command line."""
        def row(label, s):
            return (f"  {label:<7} {s['failed']} of {s['points']} points fail, worst norm/gamma "
                    f"{_num(s['max_ratio'])}, min input disk margins "
                    f"{_num(s['min_input_gain_db'], '.3g')} dB / "
                    f"{_num(s['min_input_phase_deg'], '.3g')} deg")
        out = [f"  on the {self.common} points both families are checked at:",
               row("input", self.before), row("refined", self.after),
               f"  {len(self.new_failures)} point(s) that passed with the input fail with the "
               "refined family"]
        if self.reasons:
            out.append("  worse: " + "; ".join(self.reasons))
        return out

    def to_dict(self) -> dict:
        return {"before": self.before, "after": self.after, "common_points": self.common,
                "common_failed_before": self.failed_before,
                "common_failed_after": self.failed_after,
                "new_failures": int(len(self.new_failures)), "worse": self.worse,
                "reasons": list(self.reasons)}


def _num(x, spec: str = ".4g") -> str:
    if x is None or isinstance(x, str):
        return str(x)
    return format(float(x), spec)


def _keys(result: CheckResult) -> list[tuple]:
    """Point identity across two checks: the point, and whether it is a leave-one-out
    prediction (an in-between point of one family may be a design point of the other)."""
    return [(str(k) == "leave_one_out", tuple(np.round(p, 9).tolist()))
            for k, p in zip(result.kind, result.points, strict=True)]


def _summary_at(result: CheckResult, idx: np.ndarray) -> dict:
    v = result.values

    def pick(key, fn):
        return _f(fn(v[key][idx])) if idx.size else None

    return {"failed": int((~result.passed[idx]).sum()), "points": int(idx.size),
            "max_ratio": pick("ratio", np.max), "min_input_gain_db": pick("in_gain_db", np.min),
            "min_input_phase_deg": pick("in_phase_deg", np.min)}


def _f(x):
    from .check import _f as json_float

    return json_float(x)


def compare_checks(before: CheckResult, after: CheckResult, rtol: float = 1e-9) -> Comparison:
    """Is the refined family (``after``) worse than its input (``before``)?

    Compared on the points both checks judge and that decide both verdicts (give both
    the same points: :func:`refine_family` checks the input again at the refined
    check's points). A refined family that passes every check is not worse. One that
    fails is worse when the input passes all the common points, when it fails more of
    them, or when its worst closed-loop norm / gamma among them is larger than the
    input's (relative ``rtol``).
    """
    bk, ak = _keys(before), _keys(after)
    bg, ag = before.gates, after.gates
    after_at = {k: i for i, k in enumerate(ak) if ag[i]}
    pairs = [(i, after_at[k]) for i, k in enumerate(bk) if bg[i] and k in after_at]
    bi = np.array([p[0] for p in pairs], dtype=int)
    ai = np.array([p[1] for p in pairs], dtype=int)
    b, a = _summary_at(before, bi), _summary_at(after, ai)
    fb, fa = b["failed"], a["failed"]
    new = bi[before.passed[bi] & ~after.passed[ai]] if bi.size else np.zeros(0, int)
    reasons = []
    if not after.all_passed and pairs:
        if fb == 0 and fa > 0:
            reasons.append("the input passes at every common point and the refined family "
                           "does not")
        elif fa > fb:
            reasons.append(f"it fails {fa} of the {len(pairs)} common points, the input {fb}")
        rb, ra = (float(x) for x in (b["max_ratio"], a["max_ratio"]))
        if ra > rb * (1 + rtol):
            reasons.append(f"its worst norm/gamma {ra:.4g} exceeds the input's {rb:.4g}")
    return Comparison(b, a, len(pairs), fb, fa, new, bool(reasons), tuple(reasons))


@dataclass
class RefineOutcome:
    """The refined family, the check of every round, the points added and why it stopped.

    ``added_breakpoints`` (rectangular families): variable -> new breakpoints.
    ``baseline``: the input family checked at the points of the last check;
    ``comparison``: the last check against it (:func:`compare_checks`).
    """

    family: Family
    rounds: list[CheckResult] = field(default_factory=list)
    added: np.ndarray | None = None
    stopped: str = ""
    added_breakpoints: dict = field(default_factory=dict)
    baseline: CheckResult | None = None
    comparison: Comparison | None = None

    @property
    def passed(self) -> bool:
        return bool(self.rounds) and self.rounds[-1].all_passed

    @property
    def worse(self) -> bool:
        return self.comparison is not None and self.comparison.worse


def _refit(family: Family, spec, like: Family | None = None, progress=None) -> Family:
    """Fit the interpolant of the extended family: the form and kind of ``like``'s (the
    input family's) when it fits, else the design's choice."""
    from .interpolants import GRID_KINDS
    from .interpolate import fit_for_family

    form, kind = spec.interpolation.form, spec.interpolation.kind
    attrs = (like.interpolant or {}).get("attrs", {}) if like is not None else {}
    if attrs.get("form") and attrs.get("kind"):
        form, kind = str(attrs["form"]), str(attrs["kind"])
    if kind in GRID_KINDS and family.breakpoints is None:
        kind = "auto"  # the refined set is scattered; let leave-one-out choose
    interpolant, evidence = fit_for_family(family, form, kind, progress=progress)
    family.interpolant = interpolant
    family.extra = {**family.extra, **evidence}
    return family


def grid_lines(family: Family, result: CheckResult, budget: int
               ) -> tuple[tuple[np.ndarray, ...] | None, np.ndarray, dict, str]:
    """Whole new breakpoints of a rectangular family where its checks fail.

    Each failing in-between point that decides the verdict asks for the midpoint of
    every interval that holds it strictly inside; a failing leave-one-out prediction
    (when it decides) for the midpoints of the intervals next to its design point.
    Breakpoints are taken in the order of the worst norm / gamma they serve as long as
    the new grid's new nodes (whole lines: old holes stay holes) fit in ``budget``.

    Returns
    -------
    (breakpoints of the new grid or None, new points (M, d), {variable: new
    breakpoints}, why none when none).
    """
    names = family.variable_names
    bps = [np.asarray(b, float) for b in family.breakpoints]
    fail = np.flatnonzero(~result.passed & result.gates & (result.kind != "grid"))
    ratio = np.nan_to_num(result.values["ratio"][fail], nan=np.inf)
    fail = fail[np.argsort(-ratio, kind="stable")]
    wanted: list[tuple[int, float]] = []
    for i in fail:
        p = result.points[i]
        for j, b in enumerate(bps):
            if b.size < 2:
                continue
            k = int(np.clip(np.searchsorted(b, p[j], side="right") - 1, 0, b.size - 2))
            tol = 1e-9 * (b[k + 1] - b[k])
            if result.kind[i] == "leave_one_out":
                at = int(np.argmin(np.abs(b - p[j])))
                cand = [0.5 * (b[at - 1] + b[at])] if at > 0 else []
                cand += [0.5 * (b[at] + b[at + 1])] if at + 1 < b.size else []
            elif b[k] + tol < p[j] < b[k + 1] - tol:
                cand = [0.5 * (b[k] + b[k + 1])]
            else:
                cand = []
            wanted += [(j, float(c)) for c in cand if (j, float(c)) not in wanted]
    if not wanted:
        return None, np.zeros((0, len(names))), {}, (
            "no new breakpoint to add: the remaining failures lie on grid lines (design "
            "points, a local design issue) or nothing fails that decides the verdict")
    old_nodes = int(np.prod([b.size for b in bps]))
    chosen: list[list[float]] = [[] for _ in bps]
    for j, c in wanted:
        trial = [sorted(chosen[q] + ([c] if q == j else [])) for q in range(len(bps))]
        nodes = int(np.prod([bps[q].size + len(trial[q]) for q in range(len(bps))]))
        if nodes - old_nodes <= budget:
            chosen = trial
    if not any(chosen):
        j, c = wanted[0]
        line = int(np.prod([b.size for q, b in enumerate(bps) if q != j]))
        return None, np.zeros((0, len(names))), {}, (
            f"the point budget of {budget} cannot buy one whole grid line ({names[j]} = {c:.6g} "
            f"adds {line} points); raise --budget")
    new_bps = tuple(np.union1d(b, c) for b, c in zip(bps, chosen, strict=True))
    mesh = np.stack(np.meshgrid(*new_bps, indexing="ij"), axis=-1).reshape(-1, len(bps))
    is_new = np.zeros(mesh.shape[0], bool)
    for j, c in enumerate(chosen):
        if c:
            is_new |= np.isin(mesh[:, j], c)
    added = {n: [float(x) for x in c] for n, c in zip(names, chosen, strict=True) if c}
    return new_bps, mesh[is_new], added, ""


def refine_family(family: Family, spec, budget: int, settings: CheckSettings | None = None,
                  jobs: int = 1, cluster=None, max_rounds: int = 10,
                  progress: Callable[[str, int, int], None] | None = None) -> RefineOutcome:
    """Add at most ``budget`` design points where checks fail; recheck after each round.

    Parameters
    ----------
    family : the family with its interpolant.
    spec : the DesignSpec; it must have a model (the plant at new points).
    budget : maximum number of new design points over all rounds.
    settings : check settings (default: the design's [check] table).
    jobs, cluster : parallel synthesis and checks.
    max_rounds : safety stop on the number of rounds.
    progress : callback ``(stage, done, total)``; the stages of round r read
        "round r: ..." (its check), "round r: new ..." (the points it adds: plants,
        gamma, controllers) and "round r: refit ..."; the final comparison's "input: ...".

    Returns
    -------
    RefineOutcome
        With the last check of the final family and its comparison with the first
        (``outcome.worse``: the refined family must not replace its input).

    Raises
    ------
    InputError
        For a negative budget or a design without a model.
    """
    if int(budget) != budget or budget < 0:
        raise InputError(f"budget={budget!r} must be a non-negative integer number of points")
    if spec is None or (spec.source.model is None and spec.source.model_file is None):
        raise InputError("refinement needs the design's model (source.model or model_file, or "
                         "--model) to linearize the plant at new points")
    from .family import extend_family

    s = settings or CheckSettings.from_spec(spec)
    out = RefineOutcome(family)
    previous = None
    added: list[np.ndarray] = []
    added_bps: dict[str, list[float]] = {}
    spent = 0
    checked = False
    for r in range(max_rounds):
        say = prefixed(progress, f"round {r}:")
        result = check_family(out.family, s, spec=spec, jobs=jobs, cluster=cluster,
                              extra_points=previous, progress=say)
        out.rounds.append(result)
        checked = True
        if previous is None:
            # later rounds re-check exactly these points (no new random samples); a
            # rectangular family keeps the centres and midpoints of its finer grid
            previous = result.points[np.isin(result.kind, _IN_BETWEEN)]
            s = replace(s, samples=0, points_file=None)
            if out.family.breakpoints is None:
                s = replace(s, centres=False, midpoints=False)
        if result.all_passed:
            out.stopped = "all checks pass"
            break
        room = int(budget) - spent
        rectangular = out.family.breakpoints is not None and out.family.grid_index is not None
        if rectangular:
            new_bps, take, bps_added, why = grid_lines(out.family, result, max(room, 0))
            if new_bps is None:
                out.stopped = why if room > 0 else f"point budget of {budget} spent"
                break
        else:
            props = result.proposals if result.proposals is not None else np.zeros((0, 0))
            if len(props) == 0:
                out.stopped = ("no new point to add: the remaining failures are at design "
                               "points (a local design issue, not interpolation) or at points "
                               "already in the family")
                break
            if room <= 0:
                out.stopped = f"point budget of {budget} spent"
                break
            take, new_bps, bps_added = props[:room], None, {}
        out.family = _refit(extend_family(out.family, spec, take, jobs=jobs, cluster=cluster,
                                          breakpoints=new_bps,
                                          progress=prefixed(progress, f"round {r}: new")),
                            spec, like=family, progress=prefixed(progress, f"round {r}: refit"))
        checked = False
        added.append(take)
        for n, v in bps_added.items():
            added_bps[n] = sorted(added_bps.get(n, []) + v)
        spent += len(take)
        # a new design point is no longer an in-between point
        keep = ~np.any(np.all(np.isclose(previous[:, None, :], take[None, :, :]), axis=2),
                       axis=1)
        previous = previous[keep]
    else:
        out.stopped = f"stopped after {max_rounds} rounds"
    if not checked:  # the last extension has not been checked yet
        out.rounds.append(check_family(out.family, s, spec=spec, jobs=jobs, cluster=cluster,
                                       extra_points=previous,
                                       progress=prefixed(progress, "final:")))
    out.added = np.vstack(added) if added else np.zeros((0, len(family.variables)))
    out.added_breakpoints = added_bps
    baseline = out.rounds[0]
    if added:
        # the input at every point of the refined family's last check
        last = out.rounds[-1]
        where = last.points[last.kind != "leave_one_out"]
        baseline = check_family(family, replace(s, samples=0, centres=False, midpoints=False,
                                                points_file=None),
                                spec=spec, jobs=jobs, cluster=cluster, extra_points=where,
                                progress=prefixed(progress, "input:"))
    out.baseline = baseline
    out.comparison = compare_checks(baseline, out.rounds[-1])
    return out
