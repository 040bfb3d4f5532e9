"""Refinement: add design points where the frozen-point checks fail, until they pass.

One round: check the family (:func:`schedule.check.check_family`), take the
proposed points (the centres of the grid cells holding failing in-between
points, worst first; for scattered families the failing points), synthesize
controllers there through the design's model
(:func:`schedule.family.extend_family`, which keeps or raises the common
gamma), refit the interpolant (:func:`schedule.interpolate.fit_for_family`)
and check again. The in-between points of the first round are re-checked in
every later round (kind "previous"), so a failure cannot disappear just
because the grid became a scattered set. The loop stops when every check
passes, when the point budget is spent, or when no proposal is left (for
example when only the design points themselves fail: more points cannot fix
a local design).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from .check import CheckResult, CheckSettings, check_family
from .errors import InputError
from .types import Family

__all__ = ["RefineOutcome", "refine_family"]

_IN_BETWEEN = ("centre", "midpoint", "sobol", "latin_hypercube", "file", "previous")


@dataclass
class RefineOutcome:
    """The refined family, the check of every round, the points added and why it stopped."""

    family: Family
    rounds: list[CheckResult] = field(default_factory=list)
    added: np.ndarray | None = None
    stopped: str = ""

    @property
    def passed(self) -> bool:
        return bool(self.rounds) and self.rounds[-1].all_passed


def _refit(family: Family, spec) -> Family:
    from .interpolants import GRID_KINDS
    from .interpolate import fit_for_family

    kind = spec.interpolation.kind
    if kind in GRID_KINDS and family.breakpoints is None:
        kind = "auto"  # the refined set is scattered; let leave-one-out choose
    interpolant, evidence = fit_for_family(family, spec.interpolation.form, kind)
    family.interpolant = interpolant
    family.extra = {**family.extra, **evidence}
    return family


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

    Returns
    -------
    RefineOutcome

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
    spent = 0
    for _ in range(max_rounds):
        result = check_family(out.family, s, spec=spec, jobs=jobs, cluster=cluster,
                              extra_points=previous, progress=progress)
        out.rounds.append(result)
        if previous is None:
            # later rounds re-check exactly these points (no new random samples)
            previous = result.points[np.isin(result.kind, _IN_BETWEEN)]
            s = replace(s, samples=0, centres=False, midpoints=False, points_file=None)
        if result.all_passed:
            out.stopped = "all checks pass"
            break
        props = result.proposals if result.proposals is not None else np.zeros((0, 0))
        if len(props) == 0:
            out.stopped = ("no new point to add: the remaining failures are at design points "
                           "(a local design issue, not interpolation) or at points already "
                           "in the family")
            break
        room = int(budget) - spent
        if room <= 0:
            out.stopped = f"point budget of {budget} spent"
            break
        take = props[:room]
        out.family = _refit(extend_family(out.family, spec, take, jobs=jobs, cluster=cluster),
                            spec)
        added.append(take)
        spent += len(take)
        # a new design point is no longer an in-between point
        keep = ~np.any(np.all(np.isclose(previous[:, None, :], take[None, :, :]), axis=2),
                       axis=1)
        previous = previous[keep]
    else:
        out.stopped = f"stopped after {max_rounds} rounds"
    out.added = np.vstack(added) if added else np.zeros((0, len(family.variables)))
    return out
