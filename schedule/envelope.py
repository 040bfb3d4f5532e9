"""The operating envelope: scheduling variables, point sets and in-between points.

- :class:`RectangularGrid`: breakpoints per variable, minus optional holes;
  points are listed with the last variable varying fastest (C order).
- :class:`ScatteredPoints`: an arbitrary set of distinct points.
- In-between points for the frozen-point checks: :func:`cell_centres`,
  :func:`edge_midpoints` (both, each point once: :func:`in_between_points`),
  :func:`latin_hypercube` (McKay, Beckman and Conover
  1979), :func:`sobol` (Sobol' 1967, scrambled as in Owen 1998; both via
  ``scipy.stats.qmc``), and :func:`points_from_file` (CSV).

All functions return plain ``(M, d)`` float arrays in the order of the
variables; every validation failure raises a one-line
:class:`schedule.errors.InputError` naming the point and the fix.
"""

from __future__ import annotations

import csv
import itertools
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError
from .types import SchedulingVariable

__all__ = ["RectangularGrid", "ScatteredPoints", "validate_variables", "check_inside",
           "cell_centres", "edge_midpoints", "in_between_points", "latin_hypercube", "sobol",
           "points_from_file", "point_text"]


def point_text(names: Sequence[str], row) -> str:
    """``name=value, ...`` for messages."""
    return ", ".join(f"{n}={float(x):g}" for n, x in zip(names, row, strict=False))


def validate_variables(variables: Sequence[SchedulingVariable]) -> tuple[SchedulingVariable, ...]:
    """Check names (unique, non-empty) and bounds (finite, lower < upper)."""
    variables = tuple(variables)
    if not variables:
        raise InputError("no scheduling variables; define at least one")
    seen = set()
    for v in variables:
        if not v.name:
            raise InputError("a scheduling variable has an empty name; name every variable")
        if v.name in seen:
            raise InputError(f"scheduling variable '{v.name}' is defined twice; give each "
                             "variable a unique name")
        seen.add(v.name)
        lo, hi = float(v.lower), float(v.upper)
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise InputError(f"scheduling variable '{v.name}' has bounds [{lo:g}, {hi:g}]; "
                             "need finite lower < upper")
    return variables


def check_inside(points: np.ndarray, variables: Sequence[SchedulingVariable],
                 what: str = "point") -> np.ndarray:
    """Validate an (M, d) array: finite and inside the bounds; returns it as float."""
    pts = np.asarray(points, dtype=float)
    names = [v.name for v in variables]
    if pts.ndim == 1 and len(variables) == 1:
        pts = pts[:, None]
    if pts.ndim != 2 or pts.shape[1] != len(variables):
        raise InputError(f"{what}s have shape {pts.shape}; expected (M, {len(variables)}) "
                         f"with columns {', '.join(names)}")
    bad = ~np.isfinite(pts).all(axis=1)
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"{what} {k} holds NaN or inf; give finite values")
    for j, v in enumerate(variables):
        out = (pts[:, j] < v.lower) | (pts[:, j] > v.upper)
        if out.any():
            k = int(np.argmax(out))
            raise InputError(f"{what} {k} ({point_text(names, pts[k])}) has {v.name} outside "
                             f"[{v.lower:g}, {v.upper:g}]; move it inside or widen the bounds")
    return pts


def _check_breakpoints(name: str, bp, variable: SchedulingVariable | None) -> np.ndarray:
    arr = np.asarray(bp, dtype=float).reshape(-1)
    if arr.size == 0:
        raise InputError(f"breakpoints of '{name}' are empty; give at least one value")
    if not np.isfinite(arr).all():
        raise InputError(f"breakpoints of '{name}' hold NaN or inf; give finite values")
    steps = np.diff(arr)
    if np.any(steps <= 0):
        k = int(np.argmax(steps <= 0))
        what = "repeat" if steps[k] == 0 else "are not increasing at"
        raise InputError(f"breakpoints of '{name}' {what} {arr[k]:g}, {arr[k + 1]:g}; sort "
                         "them and remove duplicates")
    if variable is not None and (arr[0] < variable.lower or arr[-1] > variable.upper):
        bad = arr[0] if arr[0] < variable.lower else arr[-1]
        raise InputError(f"breakpoint {bad:g} of '{name}' is outside [{variable.lower:g}, "
                         f"{variable.upper:g}]; move it inside or widen the bounds")
    return arr


@dataclass(frozen=True, eq=False)
class RectangularGrid:
    """A rectangular grid of operating points with optional holes.

    Parameters
    ----------
    breakpoints : one increasing sequence per variable.
    holes : (k, d) grid points to skip (each must be a grid point).
    variables : optional scheduling variables; names the axes and checks bounds.

    Attributes (computed)
    ---------------------
    points : (N, d) the grid points that are not holes, last variable fastest.
    grid_index : (N, d) integer indices of those points into the breakpoints.
    hole_index : (k, d) integer indices of the holes.
    """

    breakpoints: tuple[np.ndarray, ...]
    holes: np.ndarray | None = None
    variables: tuple[SchedulingVariable, ...] | None = None

    def __post_init__(self) -> None:
        bps = tuple(self.breakpoints)
        if not bps:
            raise InputError("a rectangular grid needs breakpoints for at least one variable")
        variables = None
        if self.variables is not None:
            variables = validate_variables(self.variables)
            if len(variables) != len(bps):
                raise InputError(f"{len(bps)} breakpoint lists for {len(variables)} "
                                 "variables; give one list per variable")
        names = self.names if variables is None else [v.name for v in variables]
        bps = tuple(_check_breakpoints(n, b, None if variables is None else variables[j])
                    for j, (n, b) in enumerate(zip(names, bps, strict=False)))
        object.__setattr__(self, "breakpoints", bps)
        object.__setattr__(self, "variables", variables)
        shape = tuple(len(b) for b in bps)
        full = np.array(list(itertools.product(*[range(s) for s in shape])), dtype=int)
        keep = np.ones(len(full), dtype=bool)
        hole_index = np.zeros((0, len(bps)), dtype=int)
        if self.holes is not None and np.size(self.holes):
            holes = np.asarray(self.holes, dtype=float)
            if holes.ndim == 1:
                holes = holes[None, :]
            if holes.shape[1] != len(bps):
                raise InputError(f"holes have {holes.shape[1]} values per row for {len(bps)} "
                                 "variables; give one value per variable")
            idx = []
            for i, row in enumerate(holes):
                ij = []
                for j, x in enumerate(row):
                    hit = np.flatnonzero(np.isclose(bps[j], x, rtol=1e-12, atol=0.0))
                    if hit.size == 0:
                        raise InputError(f"hole {i} ({point_text(names, row)}) is not a grid "
                                         f"point: {names[j]} = {x:g} is not a breakpoint; use "
                                         "breakpoint values")
                    ij.append(int(hit[0]))
                flat = int(np.ravel_multi_index(ij, shape))
                if not keep[flat]:
                    raise InputError(f"hole {i} ({point_text(names, row)}) is listed twice; "
                                     "list each hole once")
                keep[flat] = False
                idx.append(ij)
            hole_index = np.array(idx, dtype=int)
            if not keep.any():
                raise InputError("every grid point is a hole; keep at least one point")
        object.__setattr__(self, "holes", None if not len(hole_index) else
                           self._values(hole_index))
        object.__setattr__(self, "hole_index", hole_index)
        object.__setattr__(self, "grid_index", full[keep])
        object.__setattr__(self, "points", self._values(full[keep]))

    def _values(self, index: np.ndarray) -> np.ndarray:
        return np.column_stack([self.breakpoints[j][index[:, j]]
                                for j in range(len(self.breakpoints))]).astype(float)

    @property
    def names(self) -> list[str]:
        if self.variables is not None:
            return [v.name for v in self.variables]
        return [f"p{j + 1}" for j in range(len(self.breakpoints))]

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(b) for b in self.breakpoints)

    @property
    def d(self) -> int:
        return len(self.breakpoints)

    def is_point(self, index) -> bool:
        """Whether the grid index tuple is a point (inside the grid and not a hole)."""
        index = tuple(int(i) for i in index)
        if any(i < 0 or i >= s for i, s in zip(index, self.shape, strict=False)):
            return False
        return not any(tuple(h) == index for h in self.hole_index.tolist())

    def report(self) -> tuple[str, ...]:
        """One line per hole, saying which grid point is skipped."""
        if self.holes is None:
            return ()
        return tuple(f"grid point {point_text(self.names, h)} skipped (hole)"
                     for h in self.holes)


@dataclass(frozen=True, eq=False)
class ScatteredPoints:
    """A scattered set of distinct operating points, (N, d), validated."""

    values: np.ndarray
    variables: tuple[SchedulingVariable, ...] | None = None

    def __post_init__(self) -> None:
        vals = np.asarray(self.values, dtype=float)
        if self.variables is not None:
            variables = validate_variables(self.variables)
            object.__setattr__(self, "variables", variables)
            vals = check_inside(vals, variables)
            names = [v.name for v in variables]
        else:
            if vals.ndim != 2 or vals.shape[0] == 0:
                raise InputError(f"scattered points have shape {vals.shape}; expected (N, d)")
            if not np.isfinite(vals).all():
                k = int(np.argmax(~np.isfinite(vals).all(axis=1)))
                raise InputError(f"point {k} holds NaN or inf; give finite values")
            names = [f"p{j + 1}" for j in range(vals.shape[1])]
        if vals.shape[0] == 0:
            raise InputError("the scattered set is empty; give at least one point")
        _, first, inverse = np.unique(vals, axis=0, return_index=True, return_inverse=True)
        inverse = np.asarray(inverse).reshape(-1)
        if len(first) != len(vals):
            k = next(i for i in range(len(vals)) if first[inverse[i]] != i)
            raise InputError(f"points {int(first[inverse[k]])} and {k} coincide "
                             f"({point_text(names, vals[k])}); remove the duplicate")
        object.__setattr__(self, "values", vals)

    @property
    def points(self) -> np.ndarray:
        return self.values


# --------------------------------------------------------------------------- in-between
def cell_centres(grid: RectangularGrid, skip_hole_cells: bool = False) -> np.ndarray:
    """Centres of all grid cells, (prod(len(b) - 1), d), last variable fastest.

    A variable with a single breakpoint contributes that value. With
    ``skip_hole_cells`` the cells that have a hole at a corner are left out.
    """
    mids, ranges = [], []
    for b in grid.breakpoints:
        mids.append(0.5 * (b[:-1] + b[1:]) if len(b) > 1 else b.copy())
        ranges.append(range(max(len(b) - 1, 1)))
    rows, keep = [], []
    for idx in itertools.product(*ranges):
        rows.append([mids[j][i] for j, i in enumerate(idx)])
        if skip_hole_cells:
            corners = itertools.product(*[(i, i + 1) if len(grid.breakpoints[j]) > 1 else (i,)
                                          for j, i in enumerate(idx)])
            keep.append(all(grid.is_point(c) for c in corners))
        else:
            keep.append(True)
    out = np.array(rows, dtype=float).reshape(-1, grid.d)
    return out[np.array(keep, dtype=bool)]


def edge_midpoints(grid: RectangularGrid) -> np.ndarray:
    """Midpoints of every grid edge whose two ends are grid points (not holes).

    Ordered by axis, then by the lower end in grid order; shape (M, d).
    """
    rows = []
    pts = {tuple(i) for i in grid.grid_index.tolist()}
    for j in range(grid.d):
        for idx in grid.grid_index.tolist():
            nxt = list(idx)
            nxt[j] += 1
            if tuple(nxt) in pts:
                row = [grid.breakpoints[k][idx[k]] for k in range(grid.d)]
                row[j] = 0.5 * (grid.breakpoints[j][idx[j]] + grid.breakpoints[j][idx[j] + 1])
                rows.append(row)
    return np.array(rows, dtype=float).reshape(-1, grid.d)


def in_between_points(grid: RectangularGrid, centres: bool = True, midpoints: bool = True
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Cell centres and edge midpoints, each point once: ``(points (M, d), kinds (M,))``.

    With one variable (or a variable with a single breakpoint) a cell is an edge, so its
    centre and its midpoint coincide; such a point is checked once, as a "centre".
    Kinds are "centre" and "midpoint", centres first.
    """
    parts = []
    if centres:
        parts.append((cell_centres(grid), "centre"))
    if midpoints:
        parts.append((edge_midpoints(grid), "midpoint"))
    rows, kinds, seen = [], [], set()
    for pts, kind in parts:
        for row in pts:
            key = tuple(row.tolist())
            if key not in seen:
                seen.add(key)
                rows.append(row)
                kinds.append(kind)
    return (np.array(rows, dtype=float).reshape(-1, grid.d),
            np.array(kinds, dtype=object))


def _scale(unit: np.ndarray, variables: Sequence[SchedulingVariable]) -> np.ndarray:
    lo = np.array([v.lower for v in variables], dtype=float)
    hi = np.array([v.upper for v in variables], dtype=float)
    return np.clip(lo + unit * (hi - lo), lo, hi)


def _count(n: int) -> int:
    if isinstance(n, bool) or int(n) != n or n < 0:
        raise InputError(f"number of samples {n!r} is not a non-negative integer; give one")
    return int(n)


def latin_hypercube(variables: Sequence[SchedulingVariable], n: int, seed: int = 0
                    ) -> np.ndarray:
    """``n`` Latin hypercube samples over the bounds (McKay, Beckman and Conover 1979).

    Seeded and reproducible (``scipy.stats.qmc.LatinHypercube``); shape (n, d).
    """
    from scipy.stats import qmc

    variables = validate_variables(variables)
    n = _count(n)
    if n == 0:
        return np.zeros((0, len(variables)))
    unit = qmc.LatinHypercube(d=len(variables), seed=np.random.default_rng(seed)).random(n)
    return _scale(unit, variables)


def sobol(variables: Sequence[SchedulingVariable], n: int, seed: int = 0) -> np.ndarray:
    """``n`` scrambled Sobol' samples over the bounds (Sobol' 1967; Owen 1998 scrambling).

    The first ``n`` points of a base-2 block of ``2**ceil(log2 n)`` points
    (``scipy.stats.qmc.Sobol``), so any ``n`` is accepted without a balance
    warning; seeded and reproducible; shape (n, d).
    """
    from scipy.stats import qmc

    variables = validate_variables(variables)
    n = _count(n)
    if n == 0:
        return np.zeros((0, len(variables)))
    m = max(0, math.ceil(math.log2(n)))
    unit = qmc.Sobol(d=len(variables), scramble=True,
                     seed=np.random.default_rng(seed)).random_base2(m)[:n]
    return _scale(unit, variables)


def points_from_file(path: str | os.PathLike, variables: Sequence[SchedulingVariable]
                     ) -> np.ndarray:
    """Read check points from a CSV file whose header names the variables.

    The columns may come in any order; they are returned in the order of
    ``variables``. Empty lines and lines starting with ``#`` are skipped.
    """
    path = Path(path)
    variables = validate_variables(variables)
    names = [v.name for v in variables]
    from .paths import input_file

    input_file(path, "points file")
    try:
        with path.open(newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.reader(fh)
                    if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"points file {path} cannot be read ({exc}); save it as UTF-8 "
                         "CSV") from None
    if not rows:
        raise InputError(f"points file {path} is empty; give a header line "
                         f"{','.join(names)} and one point per line")
    header = [c.strip() for c in rows[0]]
    for h in header:
        if h not in names:
            raise InputError(f"points file {path}: column '{h}' is not a scheduling variable; "
                             f"the header must name {', '.join(names)}")
    if len(set(header)) != len(header):
        raise InputError(f"points file {path}: the header repeats a column; name each "
                         "variable once")
    missing = [n for n in names if n not in header]
    if missing:
        raise InputError(f"points file {path}: no column '{missing[0]}'; the header must "
                         f"name {', '.join(names)}")
    order = [header.index(n) for n in names]
    out = np.zeros((len(rows) - 1, len(names)))
    for i, r in enumerate(rows[1:]):
        if len(r) != len(header):
            raise InputError(f"points file {path}: line {i + 2} has {len(r)} values for "
                             f"{len(header)} columns; give one value per column")
        try:
            out[i] = [float(r[k]) for k in order]
        except ValueError:
            raise InputError(f"points file {path}: line {i + 2} holds a non-number; write "
                             "plain numbers") from None
    if len(out) == 0:
        raise InputError(f"points file {path} has a header but no points; add points")
    return check_inside(out, variables, what=f"{path}: point")
