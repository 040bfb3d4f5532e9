"""Export what passes: build the table, check it as it runs, add breakpoints where it fails.

:func:`build_checked_table` builds the table (:func:`schedule.export.table.build_table`)
and checks it as the target runs it (:func:`schedule.analysis.table_check.check_table`:
the runtime's multilinear lookup, the plant discretized by zero-order hold for a
discrete table, every in-between point, the one pass criterion). Where the table fails
at a point where the family's interpolant passes (for a discrete table: the interpolant
discretized like the table, what an ever denser table tends to), the multilinear
tabulation is at fault: the interval of each variable that holds the point strictly
inside gains its midpoint as a new breakpoint, a whole grid line, so the table stays
rectangular. Design nodes keep the family's own controllers; the new nodes take the
approved interpolant's value. Then the table is checked again, until it passes or one
of these stops it:

- a failure where the reference fails too: the family's interpolant itself (refine or
  redesign the family), or its discretization (a shorter sample time or the other
  method): more breakpoints cannot fix either, so the loop stops at once;
- a failing point that lies on table nodes in every variable (nothing left to split);
- :data:`MAX_ROUNDS` rounds, or a table larger than ``max_nodes`` nodes.

The outcome names the worst remaining point; ``schedule export`` then writes nothing
and exits with code 1.

Observer-form families are tabulated as assembled controller matrices (the target
stays a pure lookup; docs/tables.md says why); the check measures the difference
between the lookup of assembled matrices and the observer-form interpolant, and the
added breakpoints make the table dense enough where it matters.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from ..types import Family, point_text

__all__ = ["CheckedExport", "build_checked_table", "split_breakpoints", "MAX_ROUNDS",
           "MAX_NODES"]

#: rounds of breakpoint insertion before the export gives up
MAX_ROUNDS = 6
#: largest table (nodes) the insertion may reach
MAX_NODES = 4096


@dataclass
class CheckedExport:
    """The table, its last check, what each round did, the breakpoints added, why it stopped.

    rounds : one dict per check: ``shape``, ``nodes``, ``points``, ``failed``,
        ``fixable`` (failures where the interpolant passes), ``max_ratio`` and ``added``
        (variable -> new breakpoints after that round).
    added : variable -> every breakpoint added (sorted).
    """

    table: object
    check: object
    rounds: list = field(default_factory=list)
    added: dict = field(default_factory=dict)
    stopped: str = ""

    @property
    def passed(self) -> bool:
        return bool(self.check.all_passed)

    def worst_point(self) -> str:
        """One line naming the worst failing point and why (empty when it passes)."""
        tc = self.check
        fails = [i for i in tc.worst(len(tc.passed)) if not tc.passed[i]]
        if not fails:
            return ""
        i = fails[0]
        ref = tc.compared_passed[tc.reference][i]
        why = "the family's interpolant passes there" if ref else tc.why_unfixable(i)
        return (f"({point_text(tc.variable_names, tc.points[i])}) [{tc.kind[i]}]: "
                f"{tc.reasons[i]} ({why})")

    def to_dict(self) -> dict:
        tc = self.check
        return {"passed": self.passed, "stopped": self.stopped, "rounds": self.rounds,
                "added_breakpoints": self.added, "summary": tc.summary(), "cost": tc.cost(),
                "criterion": tc.criterion.describe(), "notes": list(tc.notes),
                "worst_point": self.worst_point()}


def split_breakpoints(breakpoints, points, rtol: float = 1e-9) -> list[np.ndarray]:
    """New breakpoints (one array per variable) that split the intervals holding ``points``.

    For every point and every variable whose value lies strictly inside an interval
    ``(b_i, b_{i+1})`` (more than ``rtol`` of the interval's width from either end), the
    interval's midpoint; values that are breakpoints already are left out.
    """
    pts = np.asarray(points, float).reshape(-1, len(breakpoints))
    out = []
    for k, b in enumerate(breakpoints):
        b = np.asarray(b, float)
        new = set()
        if b.size >= 2:
            i = np.clip(np.searchsorted(b, pts[:, k], side="right") - 1, 0, b.size - 2)
            lo, hi = b[i], b[i + 1]
            tol = rtol * (hi - lo)
            inner = (pts[:, k] > lo + tol) & (pts[:, k] < hi - tol)
            new = {float(x) for x in 0.5 * (lo[inner] + hi[inner])}
        out.append(np.array(sorted(new - set(b.tolist())), float))
    return out


def build_checked_table(family: Family, breakpoints=None, sample_time: float = 0.0,
                        method: str = "tustin", prewarp: float = 0.0, source_sha256: str = "",
                        limits=None, settings=None, spec=None, jobs: int = 1, cluster=None,
                        max_rounds: int = MAX_ROUNDS, max_nodes: int = MAX_NODES,
                        progress: Callable[[str, int, int], None] | None = None,
                        source: str = "") -> CheckedExport:
    """Build the table of ``family`` and add breakpoints until it passes its own check.

    Parameters
    ----------
    family, breakpoints, sample_time, method, prewarp, source_sha256, limits : as for
        :func:`schedule.export.table.build_table` (``breakpoints`` is the starting grid).
    settings : :class:`schedule.check.CheckSettings` of the check (default: the design's
        [check] table); ``spec`` the DesignSpec with the true plant's model (None: the
        family's interpolated plant, a weaker check).
    jobs, cluster : parallel checks.
    max_rounds, max_nodes : where the insertion gives up.
    progress : callback ``(stage, done, total)`` (the later rounds' stages read
        "round r: ...").
    source : label of the table in messages.

    Returns
    -------
    CheckedExport
        ``passed`` tells whether the final table passes; ``stopped`` why the loop ended.
    """
    from ..analysis.table_check import check_table
    from ..check import CheckSettings
    from ..interpolate import ScheduledController
    from ..progress import prefixed, stage_line
    from .table import build_table, parse_breakpoints

    names = family.variable_names
    if isinstance(breakpoints, str):
        breakpoints = parse_breakpoints(breakpoints, family.variables)
    kw = {"sample_time": sample_time, "method": method, "prewarp": prewarp,
          "source_sha256": source_sha256, "limits": limits}
    stage_line(progress, "build table")
    table = build_table(family, breakpoints=breakpoints, **kw)
    s = settings or CheckSettings.from_spec(spec)
    s = replace(s, gamma_opt=False, rate=False, loo=False)
    controller = ScheduledController.from_family(family)
    out = CheckedExport(table, None)
    added: dict[str, set] = {n: set() for n in names}
    cache: dict = {}  # plants at the points already checked, for the later rounds
    for round_no in range(max_rounds + 1):
        say = prefixed(progress, f"round {round_no}:") if round_no else progress
        tc = check_table(family, table, s, spec, jobs=jobs, cluster=cluster, progress=say,
                         compare=False, controller=controller, source=source,
                         plant_cache=cache)
        out.table, out.check = table, tc
        fix = tc.fixable()
        info = {"shape": dict(zip(names, map(int, table.shape), strict=True)),
                "nodes": int(np.prod(table.shape)), "points": int(len(tc.passed)),
                "failed": int((~tc.passed).sum()), "fixable": int(fix.size),
                "max_ratio": tc.summary()["max_ratio"], "added": {}}
        out.rounds.append(info)
        if tc.all_passed:
            out.stopped = "the table passes its check"
            break
        bad = tc.unfixable()
        if bad.size:
            out.stopped = (f"{bad.size} failing point(s) where more breakpoints cannot help; "
                           f"at the worst, {tc.why_unfixable(int(bad[0]))}")
            break
        new = split_breakpoints(table.breakpoints, tc.points[fix])
        if not any(a.size for a in new):
            out.stopped = ("the failing points lie on table nodes, where nothing is left to "
                           "split")
            break
        bps = [np.union1d(b, a) for b, a in zip(table.breakpoints, new, strict=True)]
        nodes = int(np.prod([b.size for b in bps]))
        if round_no == max_rounds:
            out.stopped = f"still failing after {max_rounds} rounds of added breakpoints"
            break
        if nodes > max_nodes:
            out.stopped = (f"the next round would make {nodes} nodes, more than the limit of "
                           f"{max_nodes}")
            break
        info["added"] = {n: [float(x) for x in a] for n, a in zip(names, new, strict=True)
                         if a.size}
        for n, a in zip(names, new, strict=True):
            added[n].update(a.tolist())
        table = build_table(family, breakpoints=dict(zip(names, bps, strict=True)), **kw)
    out.added = {n: sorted(v) for n, v in added.items() if v}
    return out
