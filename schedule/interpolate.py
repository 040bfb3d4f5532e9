"""Scheduled controllers: interpolants of a controller family, and leave-one-out evidence.

Two forms of interpolation are offered:

``"matrices"``
    The controller matrices AK, BK, CK, DK are interpolated entry by entry.
    This is meaningful only when all local controllers share their state
    coordinates; the central H-infinity controller does (its state estimates
    the generalized plant's state), provided every plant is linearized in the
    same state coordinates (see :mod:`schedule.coordinates`).
``"observer"``
    The observer-form pieces (state-feedback gain, worst disturbance,
    observer gain, Z, normalizing transforms) and the generalized plant's
    matrices are interpolated separately and the controller is re-assembled at
    every evaluation point with :func:`schedule.hinf.assemble_controller`, so the
    controller keeps the structure "plant model + feedback of the estimate"
    everywhere (Stilwell and Rugh 1999).

Both forms also interpolate the generalized plant's nine matrices, available
through :meth:`ScheduledController.plant_at` (the weaker in-between check when
no plant model exists).

Leave-one-out (LOO) evidence: for every "ok" point the interpolant is refitted
without it and the controller predicted there is compared with the designed
one (relative Frobenius error of ``[[AK, BK], [CK, DK]]``) and closed with the
TRUE generalized plant stored at that point (stability, H-infinity norm
against gamma). Hyperparameters (polynomial degree, RBF smoothing, Gaussian-
process kernel parameters) are chosen once on all points and kept fixed in
the refits (only the linear part is refitted; this keeps the check fast and
slightly optimistic for those kinds). For the grid kinds the left-out point
becomes a grid hole, filled by linear interpolation along the grid lines
through it (see :mod:`schedule.interpolants`); a left-out boundary point is
thus linearly extrapolated from its neighbours.

References
----------
Stilwell, D.J., Rugh, W.J. (1999). Interpolation of observer state feedback
controllers for gain scheduling. IEEE Trans. Automatic Control 44(6),
1225-1229. doi:10.1109/9.769379
Rugh, W.J., Shamma, J.S. (2000). Research on gain scheduling. Automatica 36,
1401-1425. doi:10.1016/S0005-1098(00)00058-3
Stone, M. (1974). Cross-validatory choice and assessment of statistical
predictions. J. R. Stat. Soc. B 36(2), 111-147.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .design_file import InterpolationSpec
from .errors import InputError, NumericalError, ScheduleError
from .interpolants import (
    GRID_KINDS,
    KINDS,
    Interpolant,
    interpolant_from_arrays,
    make_interpolant,
)
from .types import Family

CONTROLLER_KEYS = ("A", "B", "C", "D")
PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
FORMS = ("matrices", "observer")
FORMAT_VERSION = 1


# ----------------------------------------------------------------------------- layout
@dataclass(frozen=True)
class Layout:
    """Names and per-point shapes of the matrices packed into one value row."""

    names: tuple[str, ...]
    shapes: tuple[tuple[int, ...], ...]

    @classmethod
    def of(cls, arrays: dict[str, np.ndarray], names) -> Layout:
        missing = [n for n in names if n not in arrays]
        if missing:
            raise InputError(f"family lacks the stacked arrays {', '.join(missing)}; write the "
                             "family with a complete controller/plant/pieces set")
        return cls(tuple(names), tuple(tuple(np.shape(arrays[n])[1:]) for n in names))

    @property
    def size(self) -> int:
        return int(sum(int(np.prod(s)) for s in self.shapes))

    def pack(self, arrays: dict[str, np.ndarray], rows: np.ndarray) -> np.ndarray:
        return np.concatenate([np.asarray(arrays[n], dtype=float)[rows].reshape(len(rows), -1)
                               for n in self.names], axis=1)

    def unpack(self, values: np.ndarray) -> dict[str, np.ndarray]:
        out, start = {}, 0
        for n, s in zip(self.names, self.shapes, strict=True):
            size = int(np.prod(s))
            out[n] = values[:, start:start + size].reshape((values.shape[0],) + s)
            start += size
        return out

    def to_arrays(self, prefix: str) -> tuple[dict, dict]:
        arrays = {f"{prefix}_shape_{n}": np.asarray(s, dtype=np.int64)
                  for n, s in zip(self.names, self.shapes, strict=True)}
        return arrays, {f"{prefix}_names": ",".join(self.names)}

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict, prefix: str) -> Layout:
        names = tuple(n for n in str(attrs[f"{prefix}_names"]).split(",") if n)
        shapes = tuple(tuple(int(v) for v in np.atleast_1d(arrays[f"{prefix}_shape_{n}"]))
                       if np.size(arrays[f"{prefix}_shape_{n}"]) else () for n in names)
        return cls(names, shapes)


def _split(arrays: dict, attrs: dict, prefix: str) -> tuple[dict, dict]:
    p = prefix + "_"
    return ({k[len(p):]: v for k, v in arrays.items() if k.startswith(p)},
            {k[len(p):]: v for k, v in attrs.items() if k.startswith(p)})


def _prefixed(arrays: dict, attrs: dict, prefix: str) -> tuple[dict, dict]:
    return ({f"{prefix}_{k}": v for k, v in arrays.items()},
            {f"{prefix}_{k}": v for k, v in attrs.items()})


def _bounds(family: Family) -> tuple[np.ndarray, np.ndarray]:
    lower = np.array([v.lower for v in family.variables], dtype=float)
    upper = np.array([v.upper for v in family.variables], dtype=float)
    pts = np.asarray(family.points, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != len(lower):
        raise InputError(f"family points have shape {pts.shape} but {len(lower)} scheduling "
                         "variables are declared; fix the family file")
    return lower, upper


def _ok_rows(family: Family) -> np.ndarray:
    rows = np.flatnonzero(family.ok)
    if rows.size == 0:
        raise InputError("no operating point of the family has status 'ok'; fix the failed "
                         "syntheses (see `schedule inspect`) before interpolating")
    return rows


def _breakpoints(family: Family, kind: str):
    if kind in GRID_KINDS and family.breakpoints is not None:
        return [np.asarray(b, dtype=float) for b in family.breakpoints]
    return None


def _check_form_kind(form: str, kind: str) -> None:
    if form not in FORMS:
        raise InputError(f"unknown interpolation form {form!r}; choose 'matrices' or 'observer'")
    if kind not in KINDS:
        raise InputError(f"unknown interpolant kind {kind!r}; choose one of {', '.join(KINDS)}")


# ----------------------------------------------------------------------------- controller
def assemble_each(gamma: float, pieces: dict, plants: dict
                  ) -> tuple[dict[str, np.ndarray] | None, np.ndarray, str]:
    """Observer-form controllers from stacked pieces and plants, point by point
    (:func:`schedule.hinf.assemble_controller`); a module-level function, so chunks of
    points can be assembled on workers.

    Returns ``(K, ok, error)``: the stacked "A", "B", "C", "D" (zeros where a point
    failed; None when every point failed), the mask of assembled points and the first
    failure's one-line reason ('' when none failed).
    """
    from .hinf import ObserverPieces, assemble_controller
    from .plant import GeneralizedPlant

    n = np.shape(plants["A"])[0]
    out, ok, error = None, np.zeros(n, dtype=bool), ""
    for m in range(n):
        try:
            k = assemble_controller(
                GeneralizedPlant.from_arrays({name: plants[name][m] for name in PLANT_KEYS}),
                ObserverPieces.from_arrays({name: pieces[name][m] for name in pieces}), gamma)
        except (ScheduleError, np.linalg.LinAlgError) as exc:
            error = error or (str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
            continue
        if out is None:
            out = {name: np.zeros((n,) + np.shape(a)) for name, a in
                   zip(CONTROLLER_KEYS, k, strict=True)}
        for name, a in zip(CONTROLLER_KEYS, k, strict=True):
            out[name][m] = a
        ok[m] = True
    return out, ok, error


class ScheduledController:
    """A controller scheduled over the operating envelope, ``u = K(p) y``.

    Build with :meth:`fit` (from a :class:`schedule.types.Family`),
    :meth:`from_family` (the interpolant stored in the family file) or
    :meth:`from_arrays`. Evaluation is vectorized over points.

    Attributes
    ----------
    form : "matrices" or "observer".
    kind : interpolant kind (see :data:`schedule.interpolants.KINDS`).
    gamma : the family's common gamma (used by the observer-form assembly).
    variable_names : names of the scheduling variables (column order of points).
    """

    def __init__(self, form: str, kind: str, gamma: float, variable_names: tuple[str, ...],
                 part: Interpolant, part_layout: Layout, plant: Interpolant,
                 plant_layout: Layout):
        _check_form_kind(form, kind)
        self.form, self.kind, self.gamma = form, kind, float(gamma)
        self.variable_names = tuple(variable_names)
        self.part, self.part_layout = part, part_layout
        self.plant, self.plant_layout = plant, plant_layout

    # -- construction ----------------------------------------------------------------
    @classmethod
    def fit(cls, family: Family, form: str = "matrices", kind: str = "multilinear"
            ) -> ScheduledController:
        """Fit the interpolants on the family's "ok" points.

        Raises
        ------
        InputError
            unknown form/kind, no "ok" point, observer form without stored pieces,
            or a grid kind on points that are not a rectangular grid.
        """
        _check_form_kind(form, kind)
        lower, upper = _bounds(family)
        rows = _ok_rows(family)
        pts = np.asarray(family.points, dtype=float)[rows]
        part_layout = cls._part_layout(family, form)
        plant_layout = Layout.of(family.plant, PLANT_KEYS)
        source = family.controller if form == "matrices" else family.pieces
        bp = _breakpoints(family, kind)
        part = make_interpolant(kind, lower, upper, bp).fit(pts, part_layout.pack(source, rows))
        plant = make_interpolant(kind, lower, upper, bp).fit(pts,
                                                             plant_layout.pack(family.plant, rows))
        return cls(form, kind, family.gamma, family.variable_names, part, part_layout, plant,
                   plant_layout)

    @staticmethod
    def _part_layout(family: Family, form: str) -> Layout:
        if form == "matrices":
            return Layout.of(family.controller, CONTROLLER_KEYS)
        if not family.pieces:
            raise InputError("the family stores no observer-form pieces; use form 'matrices' "
                             "or redesign the family")
        from .hinf import PIECE_KEYS

        return Layout.of(family.pieces, PIECE_KEYS)

    @classmethod
    def from_family(cls, family: Family) -> ScheduledController:
        """The scheduled controller stored in the family (``family.interpolant``).

        The stored arrays are tried at the first synthesized point: a damaged
        interpolant (arrays that do not fit together or give matrices of other
        shapes than the family's) raises InputError here, not a numpy error later.
        """
        if not family.interpolant:
            ok = int(np.sum(np.asarray(family.status) == "ok"))
            why = str(family.extra.get("interpolant_error", "") or "").strip()
            if ok < 2:
                raise InputError(f"the family holds {ok} synthesized operating point(s) and no "
                                 "interpolant: scheduling needs at least two; add design "
                                 "points and run `schedule design` again")
            raise InputError("the family file holds no interpolant"
                             + (f" (fitting failed: {why})" if why else "")
                             + "; run `schedule design` to fit one, or call "
                             "ScheduledController.fit(family, form, kind)")
        try:
            sc = cls.from_arrays(family.interpolant)
            rows = np.flatnonzero(np.asarray(family.status) == "ok")[:1]
            if rows.size:
                p = np.asarray(family.points, dtype=float)[rows]
                for got, want in ((sc.evaluate(p), family.controller),
                                  (sc.plant_at(p), family.plant)):
                    for k, v in want.items():
                        if k in got and (got[k].shape[1:] != np.shape(v)[1:]
                                         or not np.isfinite(got[k]).all()):
                            raise ValueError(f"it gives {k} of shape {got[k].shape[1:]} "
                                             f"(family: {np.shape(v)[1:]}) or non-finite")
        except ScheduleError:
            raise
        except (ValueError, TypeError, IndexError, KeyError, ArithmeticError,
                np.linalg.LinAlgError) as exc:
            msg = " ".join(str(exc).split())[:100]
            raise InputError(f"the family's stored interpolant is damaged ({msg}); re-run "
                             "`schedule design` or fit the interpolant again") from None
        return sc

    def to_arrays(self) -> dict:
        """The family-file dict ``{"arrays": {name: ndarray}, "attrs": {name: str|int|float}}``."""
        arrays: dict = {}
        attrs: dict = {"form": self.form, "kind": self.kind, "gamma": self.gamma,
                       "format_version": FORMAT_VERSION,
                       "variable_names": ",".join(self.variable_names)}
        for prefix, interp, layout in (("ctrl", self.part, self.part_layout),
                                       ("plant", self.plant, self.plant_layout)):
            a, t = _prefixed(*interp.to_arrays(), prefix)
            arrays.update(a)
            attrs.update(t)
            a, t = layout.to_arrays(prefix)
            arrays.update(a)
            attrs.update(t)
        return {"arrays": arrays, "attrs": attrs}

    @classmethod
    def from_arrays(cls, data: dict) -> ScheduledController:
        """Inverse of :meth:`to_arrays` (no scikit-learn needed)."""
        try:
            arrays, attrs = dict(data["arrays"]), dict(data["attrs"])
            if int(attrs.get("format_version", 0)) > FORMAT_VERSION:
                raise InputError(f"stored interpolant has format version "
                                 f"{attrs['format_version']}; upgrade the package to read it")
            parts = {}
            for prefix in ("ctrl", "plant"):
                a, t = _split(arrays, attrs, prefix)
                parts[prefix] = (interpolant_from_arrays(a, t),
                                 Layout.from_arrays(arrays, attrs, prefix))
            names = tuple(n for n in str(attrs.get("variable_names", "")).split(",") if n)
            return cls(str(attrs["form"]), str(attrs["kind"]), float(attrs["gamma"]), names,
                       *parts["ctrl"], *parts["plant"])
        except KeyError as exc:
            raise InputError(f"stored interpolant lacks {exc.args[0]!r}; the file is incomplete "
                             "or from another tool, fit the interpolant again") from None

    # -- evaluation -----------------------------------------------------------------
    def _points(self, points) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        d = self.part.d_
        if p.ndim == 1 and p.size == d:
            p = p.reshape(1, d)
        if p.ndim != 2 or p.shape[1] != d:
            raise InputError(f"points must have shape (M, {d}) (one column per scheduling "
                             f"variable {', '.join(self.variable_names)}), got {p.shape}")
        return p

    def plant_at(self, points) -> dict[str, np.ndarray]:
        """Interpolated generalized-plant matrices "A", "B1", ..., "D22", each (M, rows, cols)."""
        p = self._points(points)
        return self.plant_layout.unpack(self.plant.evaluate(p))

    def evaluate(self, points) -> dict[str, np.ndarray]:
        """Controller matrices "A", "B", "C", "D" at the points, each (M, rows, cols).

        Raises
        ------
        NumericalError
            observer form: re-assembly failed at a point (ill-posed D22 loop shift).
        """
        p = self._points(points)
        values = self.part.evaluate(p)
        if self.form == "matrices":
            return self.part_layout.unpack(values)
        return self._assemble(p, self.part_layout.unpack(values),
                              self.plant_layout.unpack(self.plant.evaluate(p)))

    def _assemble(self, p, pieces: dict, plants: dict) -> dict[str, np.ndarray]:
        out, ok, error = assemble_each(self.gamma, pieces, plants)
        if error:
            point = ", ".join(f"{v:g}" for v in p[int(np.argmin(ok))])
            raise NumericalError(f"observer-form controller at point ({point}) could not "
                                 f"be assembled: {error}")
        return out

    def derivative(self, points, variable_index: int) -> dict[str, np.ndarray]:
        """d(A, B, C, D)/dp_j per physical unit of variable j.

        Matrices form: the interpolant's analytic derivative. Observer form:
        central differences of :meth:`evaluate` with step 1e-6 of the
        variable's range (the assembly is a rational function of the pieces).
        """
        p = self._points(points)
        j = int(variable_index)
        if not 0 <= j < p.shape[1]:
            raise InputError(f"variable index {j} out of range 0..{p.shape[1] - 1}")
        if self.form == "matrices":
            return self.part_layout.unpack(self.part.derivative(p, j))
        h = 1e-6 * (self.part.upper[j] - self.part.lower[j])
        dp = np.zeros(p.shape[1])
        dp[j] = h
        hi, lo = self.evaluate(p + dp), self.evaluate(p - dp)
        return {n: (hi[n] - lo[n]) / (2 * h) for n in CONTROLLER_KEYS}

    def evaluate_std(self, points) -> dict[str, np.ndarray]:
        """Gaussian-process kind only: predictive std of the interpolated entries, by name."""
        p = self._points(points)
        return self.part_layout.unpack(self.part.evaluate_std(p))

    def describe(self) -> dict:
        """A short plain-dict description (for `schedule inspect`)."""
        _, attrs = self.part.to_arrays()
        keep = {k: v for k, v in attrs.items() if k not in ("format_version",)}
        return {"form": self.form, "kind": self.kind, "gamma": self.gamma,
                "variables": list(self.variable_names),
                "interpolated": list(self.part_layout.names), "settings": keep}


# ----------------------------------------------------------------------------- LOO
CUBIC_KINDS = ("rbf", "gaussian_process")  # fit and leave-one-out cost grow as N^3
# default: "auto" tries the costly kinds (see costly_kinds) up to this many ok points
COSTLY_KINDS_MAX_POINTS = InterpolationSpec.costly_kinds_max_points
NORM_RTOL = 1e-6  # relative accuracy of the leave-one-out closed-loop norms
RANK_TIE = 1e-5  # max norm/gamma within this relative distance counts as a tie
COMPLETE_EVIDENCE_LOOPS = 5000  # up to this many stable predictions, every norm is computed
NORM_PIECE = 32  # loops per norm call (fastest per loop, measured at order 16: 0.35 ms
#                  a loop in calls of 16-32 loops, 0.45 ms at 256, 0.57 ms at 600)
PREDICT_PIECE = 500  # rows per prediction task at most (assembly, loops, stability)
NORM_STATUS = ("complete", "bound", "skipped")


@dataclass(frozen=True)
class LooResult:
    """Leave-one-out evidence for one (form, kind) pair.

    Per "ok" point (arrays of length n_ok, in family order): ``point_index``
    (row in the family), ``rel_error`` (relative Frobenius error of the
    predicted ``[[AK, BK], [CK, DK]]``; nan when prediction failed),
    ``norm`` (closed-loop H-infinity norm of the predicted controller on the
    true plant; inf when unstable or failed, nan where not computed), ``stable``.
    ``failure`` is a one-line reason when the whole candidate could not be fitted.
    ``norm_status`` says how far the norms were computed: "complete" (every stable
    prediction), "bound" (stopped once one exceeded the best candidate's maximum:
    ``max_norm_ratio`` is then a lower bound) or "skipped" (more unstable predictions
    than the best candidate, so no norm can change the ranking).
    """

    form: str
    kind: str
    gamma: float
    point_index: np.ndarray
    rel_error: np.ndarray
    norm: np.ndarray
    stable: np.ndarray
    failure: str = ""
    norm_status: str = "complete"

    @property
    def norm_ratio(self) -> np.ndarray:
        return self.norm / self.gamma

    @property
    def n_unstable(self) -> int:
        return int(np.sum(~self.stable)) if not self.failure else int(len(self.stable))

    @property
    def max_norm_ratio(self) -> float:
        """Max norm/gamma over every prediction: inf when one is unstable or failed."""
        if self.failure or not self.stable.size or not self.stable.all():
            return float("inf")
        return self.max_stable_norm_ratio

    @property
    def max_stable_norm_ratio(self) -> float:
        """Max norm/gamma over the stable predictions (inf when there are none; nan when
        no norm was computed; a lower bound when ``norm_status`` is "bound")."""
        r = self.norm_ratio[self.stable]
        if self.failure or not r.size:
            return float("inf")
        if np.all(np.isnan(r)):
            return float("nan")
        return float(np.nanmax(r))

    @property
    def median_error(self) -> float:
        e = self.rel_error[np.isfinite(self.rel_error)]
        return float(np.median(e)) if e.size and not self.failure else float("nan")

    @property
    def label(self) -> str:
        return f"{self.form}/{self.kind}"

    def rank_key(self) -> tuple:
        """Fewest unstable, then lowest max norm/gamma over stable points, then median error.

        (Ties in max norm/gamma within :data:`RANK_TIE` are decided by
        :func:`best_candidate`, which is what the choice uses.)
        """
        med, mx = self.median_error, self.max_stable_norm_ratio
        return (self.n_unstable, np.inf if np.isnan(mx) else mx,
                med if np.isfinite(med) else np.inf)

    def summary(self) -> dict:
        return {"form": self.form, "kind": self.kind, "n_points": int(len(self.stable)),
                "n_unstable": self.n_unstable, "max_norm_ratio": self.max_norm_ratio,
                "median_error": self.median_error, "failure": self.failure,
                "norm_status": self.norm_status}


def best_candidate(evidence: list[LooResult]) -> LooResult | None:
    """The candidate the evidence ranks first, None when every candidate failed.

    Fewest unstable predictions; among those the lowest max norm/gamma over the stable
    predictions, values within :data:`RANK_TIE` of the lowest counting as equal (the
    norms are accurate to :data:`NORM_RTOL`); among those the lowest median matrix
    error; the earliest candidate on a complete tie.
    """
    usable = [r for r in evidence if not r.failure]
    if not usable:
        return None
    fewest = min(r.n_unstable for r in usable)
    group = [r for r in usable if r.n_unstable == fewest]
    peaks = [r.max_stable_norm_ratio for r in group]
    low = min((v for v in peaks if not np.isnan(v)), default=np.inf)
    tied = [r for r, v in zip(group, peaks, strict=True)
            if v == low or v <= low * (1.0 + RANK_TIE)]
    return min(tied, key=lambda r: r.median_error if np.isfinite(r.median_error) else np.inf)


def _rel_errors(K: dict, truth: dict, good: np.ndarray) -> np.ndarray:
    """Relative Frobenius errors of the stacked controller blocks [[A, B], [C, D]]."""
    def stacked(k):
        top = np.concatenate([k["A"], k["B"]], axis=2)
        bottom = np.concatenate([k["C"], k["D"]], axis=2)
        return np.concatenate([top, bottom], axis=1)

    err = np.full(good.shape[0], np.nan)
    if good.any():
        pred, true = stacked({n: K[n][good] for n in CONTROLLER_KEYS}), stacked(
            {n: truth[n][good] for n in CONTROLLER_KEYS})
        num = np.linalg.norm((pred - true).reshape(pred.shape[0], -1), axis=1)
        den = np.maximum(np.linalg.norm(true.reshape(true.shape[0], -1), axis=1), 1e-300)
        err[good] = num / den
    return err


def _closed_loops(plant: dict, K: dict, good: np.ndarray):
    """Closed loops (stacked A, B, C, D) of the controllers ``K`` on the plants ``plant``
    (stacked rows), for the rows where ``good``; a row whose loop is not well posed is
    dropped from good."""
    from .norms import closed_loop_many

    if not good.any():
        return (np.zeros((0, 0, 0)),) * 4, good
    plant = {n: plant[n][good] for n in PLANT_KEYS}
    ctrl = {n: K[n][good] for n in CONTROLLER_KEYS}
    try:
        return closed_loop_many(plant, ctrl), good
    except ScheduleError:  # not well posed somewhere: find where, one point at a time
        keep = np.zeros(int(good.sum()), dtype=bool)
        for j in range(keep.size):
            try:
                closed_loop_many({n: v[j:j + 1] for n, v in plant.items()},
                                 {n: v[j:j + 1] for n, v in ctrl.items()})
                keep[j] = True
            except ScheduleError:
                pass
        good = good.copy()
        good[np.flatnonzero(good)[~keep]] = False
        if not keep.any():
            return (np.zeros((0, 0, 0)),) * 4, good
        loops = closed_loop_many({n: v[keep] for n, v in plant.items()},
                                 {n: v[keep] for n, v in ctrl.items()})
        return loops, good


def _stable_many(A: np.ndarray) -> np.ndarray:
    """The package's one stability predicate (:func:`schedule.norms.stability`) on a stack."""
    from .norms import stability

    if A.shape[0] == 0:
        return np.zeros(0, dtype=bool)
    return np.asarray(stability(A).stable, dtype=bool)


def costly_kinds(d: int) -> tuple[str, ...]:
    """Kinds whose cost grows faster than about N log N with the number of points N: the
    kernel kinds (a dense N x N factorization, N^3) and, in three or more variables, the
    Delaunay kind (a triangulation of up to N^ceil(d/2) simplices, re-triangulated around
    every point for leave-one-out)."""
    return CUBIC_KINDS + (("delaunay",) if d >= 3 else ())


# -- worker functions of the leave-one-out evidence (module level: sent to workers) --------
def loop_norm_chunk(A: np.ndarray, B: np.ndarray, C: np.ndarray, D: np.ndarray
                    ) -> np.ndarray:
    """H-infinity norms of stacked stable loops (worker function), through the package's
    one norm route (:func:`schedule.norms.h_infinity_norms`); a loop whose norm is not
    certified gets inf (counted as above gamma, never as a pass)."""
    from .norms import h_infinity_norms

    cert = h_infinity_norms(A, B, C, D, rtol=NORM_RTOL)
    return np.where(np.isfinite(cert.upper), np.asarray(cert.norm, dtype=float), np.inf)


def loop_norm_rows(plant: dict, K: dict) -> np.ndarray:
    """:func:`loop_norm_chunk` of the loops of the controllers ``K`` on the plants
    ``plant`` (stacked rows with well-posed loops; worker function: the plants and
    controllers travel, smaller than the loops, which are closed on the worker)."""
    from .norms import closed_loop_many

    return loop_norm_chunk(*closed_loop_many(plant, K))


def fit_chunk(points: np.ndarray, lower: np.ndarray, upper: np.ndarray, breakpoints,
              kind: str, values: np.ndarray, fitted: Interpolant | None = None,
              loo: bool = True) -> tuple:
    """One interpolant fitted on all points (unless ``fitted`` is given) and its closed-form
    leave-one-out predictions (:meth:`Interpolant.leave_one_out`; worker function).

    Returns ``(interpolant, loo)``: the interpolant is a ScheduleError when the fit
    failed; ``loo`` is ``(values, ok)``, the exception that stopped it, or None (not
    asked for, or no fit).
    """
    interp = fitted
    if interp is None:
        try:
            interp = make_interpolant(kind, lower, upper, breakpoints).fit(points, values)
        except (ScheduleError, np.linalg.LinAlgError) as exc:
            return (exc if isinstance(exc, ScheduleError) else NumericalError(_one_line(exc)),
                    None)
    if not loo:
        return interp, None
    try:
        return interp, interp.leave_one_out(points, values)
    except (ScheduleError, np.linalg.LinAlgError) as exc:
        return interp, exc


def predict_chunk(gamma: float, shapes: dict, part: dict, ok: np.ndarray,
                  plant_loo: dict | None, plant: dict | None) -> tuple:
    """Leave-one-out controllers of one candidate at a piece of rows (worker function).

    ``part``: the unpacked leave-one-out predictions, ``ok`` where they exist: the
    controller matrices, or observer pieces assembled here with the predicted plants
    ``plant_loo`` (:func:`assemble_each`). Given the true plants ``plant``, the loops
    are closed (:func:`_closed_loops`) and their stability decided (:func:`_stable_many`).

    Returns ``(K, good, loop_good, stable)``: the controllers (zeros where none, shapes
    ``shapes``), the rows with a finite prediction, the rows with a well-posed loop and
    the stable rows (the last two None without ``plant``).
    """
    ok = np.array(ok, dtype=bool)
    n = ok.size
    K = {k: np.zeros((n,) + tuple(shapes[k])) for k in CONTROLLER_KEYS}
    if plant_loo is None:
        for k in CONTROLLER_KEYS:
            K[k][ok] = part[k][ok]
    else:
        sel = np.flatnonzero(ok)
        k, kok, _error = assemble_each(gamma, {n_: v[sel] for n_, v in part.items()},
                                       {n_: v[sel] for n_, v in plant_loo.items()})
        ok[sel] = kok
        for name in CONTROLLER_KEYS if k is not None else ():
            K[name][sel[kok]] = k[name][kok]
    finite = np.ones(n, dtype=bool)
    for k in CONTROLLER_KEYS:
        finite &= np.all(np.isfinite(K[k].reshape(n, -1)), axis=1)
    good = ok & finite
    if plant is None:
        return K, good, None, None
    loops, loop_good = _closed_loops(plant, K, good)
    stable = np.zeros(n, dtype=bool)
    stable[loop_good] = _stable_many(loops[0])
    return K, good, loop_good, stable


# -- the evidence of candidates, on the workers of jobs / cluster ---------------------------
class _Lazy(Sequence):
    """Chunk ``t`` is ``make(t)``, built only when :func:`schedule.parallel.run_chunks`
    sends it (memory stays bounded by the chunks in flight)."""

    def __init__(self, count: int, make: Callable[[int], tuple]):
        self.count, self.make = count, make

    def __len__(self) -> int:
        return self.count

    def __getitem__(self, t: int) -> tuple:
        return self.make(t)


@dataclass
class _Candidate:
    """A candidate under evaluation: its controller, predictions and verdicts (row arrays
    over the ok points)."""

    form: str
    kind: str
    controller: ScheduledController | None = None
    loo: tuple | None = None  # (values, ok) of the part's leave-one-out predictions
    plant_loo: tuple | None = None  # ... of the plant's (observer form)
    K: dict | None = None
    good: np.ndarray | None = None
    rel_error: np.ndarray | None = None
    stable: np.ndarray | None = None
    norm: np.ndarray | None = None
    status: str = "complete"
    failure: str = ""
    error: BaseException | None = None


def _evaluate(family: Family, fits: _Fits, cands: list[_Candidate], jobs: int = 1,
              cluster=None, progress: Callable[[str, int, int], None] | None = None,
              loops: bool = True) -> None:
    """Fits, leave-one-out predictions, matrix errors, closed loops and their stability for
    every candidate (no norms yet), in two rounds of worker tasks: the interpolants with
    their closed-form predictions (:func:`fit_chunk`, one task per role and kind), then
    the assembly and loops of every candidate, piece by piece (:func:`predict_chunk`). A
    candidate that cannot be evaluated gets its ``failure`` (and ``error``)."""
    from .parallel import run_chunks, work_chunk

    rows, total = fits.rows, len(cands)
    if progress is not None:
        progress("interpolant", 0, total)
    keys = [k for c in cands for k in ((c.form, c.kind),) + (
        (("plant", c.kind),) if c.form == "observer" else ())]
    fits.fit_all(keys, jobs, cluster, loo=rows.size >= 2)
    live = []
    for c in cands:
        try:
            part = fits.get(c.form, c.kind)
            plant = fits.get("plant", c.kind) if c.form == "observer" else None
            c.controller = ScheduledController(
                c.form, c.kind, family.gamma, family.variable_names, part,
                fits.layout(c.form), plant, fits.layout("plant"))
            if rows.size < 2:
                raise InputError("leave-one-out needs at least 2 ok points")
            c.loo = fits.loo_of(c.form, c.kind)
            c.plant_loo = fits.loo_of("plant", c.kind) if c.form == "observer" else None
        except (ScheduleError, np.linalg.LinAlgError) as exc:
            c.failure, c.error = _one_line(exc), exc
            continue
        live.append(c)
    finished = total - len(live)
    if progress is not None and finished:
        progress("interpolant", finished, total)
    if not live:
        return
    n = rows.size
    size = work_chunk(n, jobs, cluster, largest=PREDICT_PIECE)
    starts = list(range(0, n, size))
    shapes = {k: tuple(np.shape(family.controller[k])[1:]) for k in CONTROLLER_KEYS}
    plant = fits.true_plant() if loops else None
    inputs = []
    for c in live:
        values, ok = c.loo
        ploo = None
        if c.form == "observer":
            pv, pok = c.plant_loo
            ok, ploo = ok & pok, fits.layout("plant").unpack(pv)
        inputs.append((fits.layout(c.form).unpack(values), ok, ploo))
        c.K = {k: np.zeros((n,) + shapes[k]) for k in CONTROLLER_KEYS}
        c.good = np.zeros(n, dtype=bool)
        c.stable = np.zeros(n, dtype=bool)
    loop_good = [np.zeros(n, dtype=bool) for _ in live]

    def make(t: int) -> tuple:
        c, j = divmod(t, len(starts))
        sl = slice(starts[j], starts[j] + size)
        part, ok, ploo = inputs[c]
        return (float(family.gamma), shapes, {k: v[sl] for k, v in part.items()}, ok[sl],
                None if ploo is None else {k: v[sl] for k, v in ploo.items()},
                None if plant is None else {k: v[sl] for k, v in plant.items()})

    left = [len(starts)] * len(live)
    for t, (K, good, lgood, stable) in run_chunks(predict_chunk, _Lazy(len(live) * len(starts),
                                                                       make),
                                                  jobs=jobs, cluster=cluster):
        i, j = divmod(t, len(starts))
        sl, c = slice(starts[j], starts[j] + size), live[i]
        for k in CONTROLLER_KEYS:
            c.K[k][sl] = K[k]
        c.good[sl] = good
        if loops:
            loop_good[i][sl], c.stable[sl] = lgood, stable
        left[i] -= 1
        if not left[i]:
            finished += 1
            if progress is not None:
                progress("interpolant", finished, total)
    truth = {k: np.asarray(family.controller[k])[rows] for k in CONTROLLER_KEYS}
    for c, lgood in zip(live, loop_good, strict=True):
        c.rel_error = _rel_errors(c.K, truth, c.good)
        if loops:
            c.rel_error[c.good & ~lgood] = np.nan
            c.good = lgood
            c.norm = np.full(n, np.inf)
            c.norm[c.stable] = np.nan


def _norms_of(cand: _Candidate, fits: _Fits, jobs: int, cluster,
              stop_above: float = np.inf) -> None:
    """Norms of the candidate's stable predictions, worst matrix error first, in pieces of
    :data:`NORM_PIECE` loops on the workers; stops (status "bound") after the first piece,
    in that order, with a norm above ``stop_above``. Results are taken in piece order, so
    the norms kept are those of the serial run, whatever the workers finish first. With a
    finite ``stop_above`` the first piece runs in this process first (it decides most
    stops; on the workers a whole batch would be computed for nothing)."""
    from .parallel import run_chunks

    pos = np.flatnonzero(cand.stable)  # stable rows (their loops are well posed)
    if pos.size == 0:
        return
    err = cand.rel_error[pos]
    order = pos[np.argsort(-np.nan_to_num(err, nan=np.inf), kind="stable")]
    pieces = [order[a:a + NORM_PIECE] for a in range(0, order.size, NORM_PIECE)]
    plant = fits.true_plant()

    def piece(t: int) -> tuple:
        return ({k: v[pieces[t]] for k, v in plant.items()},
                {k: v[pieces[t]] for k, v in cand.K.items()})

    def keep(t: int, norms: np.ndarray) -> bool:
        """Store piece t's norms; True when the search stops there."""
        cand.norm[pieces[t]] = norms
        if np.nanmax(norms) > stop_above and t + 1 < len(pieces):
            cand.status = "bound"
            return True
        return False

    first = 0
    if np.isfinite(stop_above):  # the worst-error piece decides most stops: here, at once,
        first = 1                # not after a batch of pieces already sent to the workers
        if keep(0, loop_norm_rows(*piece(0))):
            return
    results = run_chunks(loop_norm_rows, _Lazy(len(pieces) - first, lambda t: piece(first + t)),
                         jobs=jobs, cluster=cluster)
    waiting: dict[int, np.ndarray] = {}
    nxt = first
    try:
        for t, norms in results:
            waiting[first + t] = norms
            while nxt in waiting:
                nxt += 1
                if keep(nxt - 1, waiting.pop(nxt - 1)):
                    return  # the tasks still running are cancelled
    finally:
        results.close()


def _result(cand: _Candidate, family: Family, rows: np.ndarray) -> LooResult:
    if cand.failure:
        return LooResult(cand.form, cand.kind, family.gamma, rows,
                         np.full(rows.size, np.nan), np.full(rows.size, np.inf),
                         np.zeros(rows.size, dtype=bool), failure=cand.failure)
    return LooResult(cand.form, cand.kind, family.gamma, rows, cand.rel_error, cand.norm,
                     cand.stable, norm_status=cand.status)


def _seeded(family: Family, controller: ScheduledController) -> _Fits:
    """The fits of ``family`` holding the interpolants of ``controller``."""
    fits = _Fits(family)
    fits.done[(controller.form, controller.kind)] = controller.part
    if controller.plant is not None:
        fits.done[("plant", controller.kind)] = controller.plant
    return fits


def leave_one_out_controllers(family: Family, controller: ScheduledController,
                              jobs: int = 1, cluster=None
                              ) -> tuple[np.ndarray, dict[str, np.ndarray], np.ndarray]:
    """Controllers predicted at every "ok" point by the interpolant without that point.

    The predictions reuse the hyperparameters of ``controller`` (fitted on all
    points) and come from each kind's closed form (:meth:`Interpolant.leave_one_out`),
    not from N refits; the observer-form assembly runs on the workers of ``jobs`` /
    ``cluster``.

    Returns
    -------
    rows : (n_ok,) family rows of the "ok" points.
    K : dict "A", "B", "C", "D" of stacked predicted controllers (n_ok, ...).
    good : (n_ok,) False where the prediction failed (refit or assembly error).
    """
    rows = _ok_rows(family)
    if rows.size < 2:
        K = {k: np.zeros((rows.size,) + np.shape(family.controller[k])[1:])
             for k in CONTROLLER_KEYS}
        return rows, K, np.zeros(rows.size, dtype=bool)
    cand = _Candidate(controller.form, controller.kind)
    with _single_thread_blas():
        _evaluate(family, _seeded(family, controller), [cand], jobs, cluster, loops=False)
    if cand.error is not None:
        raise cand.error
    return rows, cand.K, cand.good


def leave_one_out(family: Family, form: str = "matrices", kind: str = "multilinear",
                  fitted: ScheduledController | None = None, jobs: int = 1,
                  cluster=None) -> LooResult:
    """Leave-one-out evidence for one (form, kind) pair (see the module notes).

    Parameters
    ----------
    family : the controller family (only "ok" points are used).
    form, kind : the interpolation form and interpolant kind.
    fitted : optional controller already fitted on all points with the same
        form and kind (its hyperparameters are reused).
    jobs, cluster : workers for the predictions and the closed-loop norms
        (:func:`schedule.parallel.run_chunks`).

    Returns
    -------
    LooResult
        per-point relative matrix error, closed-loop norm and stability (every norm
        computed), plus the summary (max norm/gamma, count unstable, median error).
    """
    _check_form_kind(form, kind)
    full = fitted if fitted is not None else ScheduledController.fit(family, form, kind)
    if (full.form, full.kind) != (form, kind):
        raise InputError(f"fitted controller is {full.form}/{full.kind}, not {form}/{kind}; "
                         "pass a controller of the same form and kind")
    rows = _ok_rows(family)
    if rows.size < 2:
        return LooResult(form, kind, family.gamma, rows, np.full(rows.size, np.nan),
                         np.full(rows.size, np.inf), np.zeros(rows.size, dtype=bool),
                         failure="leave-one-out needs at least 2 ok points")
    cand = _Candidate(form, kind)
    fits = _seeded(family, full)
    with _single_thread_blas():
        _evaluate(family, fits, [cand], jobs, cluster)
        if cand.error is not None:
            raise cand.error
        _norms_of(cand, fits, jobs, cluster)
    return _result(cand, family, rows)


def candidate_pairs(family: Family, spec_form: str = "auto", spec_kind: str = "auto"
                    ) -> list[tuple[str, str]]:
    """The (form, kind) pairs that :func:`choose_interpolant` tries.

    "auto" form: both forms when the family stores observer pieces, else
    "matrices". "auto" kind: every kind, the grid kinds only when the family
    has breakpoints (a rectangular grid).
    """
    if spec_form != "auto" and spec_form not in FORMS:
        raise InputError(f"unknown interpolation form {spec_form!r}; choose 'auto', "
                         "'matrices' or 'observer'")
    if spec_kind != "auto" and spec_kind not in KINDS:
        raise InputError(f"unknown interpolant kind {spec_kind!r}; choose 'auto' or one of "
                         f"{', '.join(KINDS)}")
    forms = [spec_form] if spec_form != "auto" else (
        list(FORMS) if family.pieces else ["matrices"])
    if spec_kind != "auto":
        kinds = [spec_kind]
    else:
        kinds = [k for k in KINDS if k not in GRID_KINDS or family.breakpoints is not None]
    return [(f, k) for f in forms for k in kinds]


@dataclass(frozen=True)
class Choice:
    """What :func:`choose_interpolant` decided: the fitted controller, the evidence table
    and notes for the summary (kinds skipped for size, norms left out)."""

    controller: ScheduledController
    evidence: list
    notes: tuple[str, ...] = ()


def choose_interpolant(family: Family, spec_form: str = "auto", spec_kind: str = "auto",
                       progress: Callable[[str, int, int], None] | None = None,
                       costly_kinds_max_points: int = COSTLY_KINDS_MAX_POINTS, jobs: int = 1,
                       cluster=None) -> tuple[ScheduledController, list[LooResult]]:
    """Run leave-one-out for the candidate pairs and fit the best one on all points.

    The ranking is that of :func:`best_candidate`. Each candidate is fitted once;
    its leave-one-out predictions come from closed forms (no refits); the closed
    loops of all predictions are formed in one batch and their stability decided for
    every candidate. Norms are needed only where they can change the ranking: for
    the candidates with the fewest unstable predictions, computed worst matrix error
    first and stopped as soon as one exceeds the best maximum found so far (the
    evidence then says "bound"); when all candidates together have at most
    :data:`COMPLETE_EVIDENCE_LOOPS` stable predictions every norm is computed. With
    ``spec_kind`` "auto" the kinds of :func:`costly_kinds` are left out when the family
    has more than ``costly_kinds_max_points`` ok points (:func:`choose` says so in its
    notes). ``progress(stage, done, total)`` is told as each candidate is evaluated
    (stage "interpolant") and as each contender's norms are computed ("loo norms").

    Returns the fitted controller and the evidence table.

    Raises
    ------
    InputError
        no candidate could be fitted (the reasons are joined in the message).
    """
    choice = choose(family, spec_form, spec_kind, progress, costly_kinds_max_points, jobs,
                    cluster)
    return choice.controller, choice.evidence


def choose(family: Family, spec_form: str = "auto", spec_kind: str = "auto",
           progress: Callable[[str, int, int], None] | None = None,
           costly_kinds_max_points: int = COSTLY_KINDS_MAX_POINTS, jobs: int = 1,
           cluster=None) -> Choice:
    """:func:`choose_interpolant` with the notes for the summary (a :class:`Choice`)."""
    with _single_thread_blas():
        return _choose(family, spec_form, spec_kind, progress, int(costly_kinds_max_points),
                       jobs, cluster)


class _single_thread_blas:
    """Limit BLAS to one thread: the matrices here are tiny, and on a loaded machine
    threaded BLAS spends most of its time waiting (measured 2.5x slower)."""

    def __enter__(self):
        try:
            from threadpoolctl import threadpool_limits
        except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
            self._ctx = None
            return self
        self._ctx = threadpool_limits(limits=1, user_api="blas")
        return self

    def __exit__(self, *exc):
        if self._ctx is not None:
            self._ctx.unregister()
        return False


def _one_line(exc: BaseException) -> str:
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


class _Fits:
    """Interpolants fitted once per (role, kind) and shared by the candidates: role
    "matrices" (controller matrices), "observer" (observer pieces) or "plant"; with their
    closed-form leave-one-out predictions once :meth:`fit_all` has run."""

    def __init__(self, family: Family):
        self.family = family
        self.lower, self.upper = _bounds(family)
        self.rows = _ok_rows(family)
        self.pts = np.asarray(family.points, dtype=float)[self.rows]
        self.done: dict[tuple[str, str], Interpolant | ScheduleError] = {}
        self.loo: dict[tuple[str, str], tuple | BaseException | None] = {}
        self._plant: dict | None = None

    def layout(self, role: str) -> Layout:
        if role == "plant":
            return Layout.of(self.family.plant, PLANT_KEYS)
        return ScheduledController._part_layout(self.family, role)

    def _values(self, role: str) -> np.ndarray:
        f = self.family
        source = {"matrices": f.controller, "observer": f.pieces, "plant": f.plant}[role]
        return self.layout(role).pack(source, self.rows)

    def true_plant(self) -> dict[str, np.ndarray]:
        """The stored (true) generalized plants at the ok points, stacked."""
        if self._plant is None:
            self._plant = {n: np.asarray(self.family.plant[n], float)[self.rows]
                           for n in PLANT_KEYS}
        return self._plant

    def fit_all(self, keys, jobs: int = 1, cluster=None, loo: bool = True) -> None:
        """Fit the (role, kind) interpolants of ``keys`` not fitted yet and (``loo``) their
        leave-one-out predictions, one :func:`fit_chunk` task per key on the workers."""
        from .parallel import run_chunks

        todo, values = [], {}
        for key in dict.fromkeys(keys):
            got = self.done.get(key)
            if isinstance(got, ScheduleError) or (got is not None and (
                    not loo or key in self.loo)):
                continue
            role = key[0]
            if role not in values:
                try:
                    values[role] = self._values(role)
                except ScheduleError as exc:
                    values[role] = exc
            if isinstance(values[role], ScheduleError):
                self.done[key] = values[role]
                continue
            todo.append(key)

        def make(t: int) -> tuple:
            role, kind = todo[t]
            return (_breakpoints(self.family, kind), kind, values[role], self.done.get(todo[t]),
                    loo)

        for t, (interp, predictions) in run_chunks(
                fit_chunk, _Lazy(len(todo), make), jobs=jobs, cluster=cluster,
                shared=(self.pts, self.lower, self.upper)):
            self.done.setdefault(todo[t], interp)
            if loo:
                self.loo[todo[t]] = predictions

    def get(self, role: str, kind: str) -> Interpolant:
        key = (role, kind)
        if key not in self.done:
            self.fit_all([key], loo=False)  # in this process
        got = self.done[key]
        if isinstance(got, ScheduleError):
            raise got
        return got

    def loo_of(self, role: str, kind: str) -> tuple[np.ndarray, np.ndarray]:
        """``(values, ok)`` of the leave-one-out predictions (raises what stopped them)."""
        got = self.loo.get((role, kind))
        if isinstance(got, BaseException):
            raise got
        if got is None:
            raise NumericalError(f"no leave-one-out predictions of the {role} by {kind}")
        return got

    def controller(self, form: str, kind: str) -> ScheduledController:
        f = self.family
        return ScheduledController(form, kind, f.gamma, f.variable_names, self.get(form, kind),
                                   self.layout(form), self.get("plant", kind),
                                   self.layout("plant"))


def _choose(family, spec_form, spec_kind, progress, costly_kinds_max_points, jobs, cluster
            ) -> Choice:
    pairs = candidate_pairs(family, spec_form, spec_kind)
    fits = _Fits(family)
    rows = fits.rows
    notes: list[str] = []
    if spec_kind == "auto" and rows.size > costly_kinds_max_points:
        costly = costly_kinds(len(family.variables))
        dropped = [k for k in KINDS if k in costly and any(k == kk for _, kk in pairs)]
        pairs = [(f, k) for f, k in pairs if k not in costly]
        if dropped:
            notes.append(f"interpolant kinds {', '.join(dropped)} not tried: {rows.size} ok "
                         f"points > {costly_kinds_max_points} (their cost grows quickly with "
                         "the points; raise [interpolation] costly_kinds_max_points to try "
                         "them)")
    cands = [_Candidate(f, k) for f, k in pairs]
    _evaluate(family, fits, cands, jobs, cluster, progress)
    usable = [c for c in cands if not c.failure]
    if not usable and rows.size >= 2:
        reasons = "; ".join(f"{c.form}/{c.kind}: {c.failure}" for c in cands)
        raise InputError(f"no interpolant could be fitted ({reasons}); check the family")
    # norms only where they can change the ranking (the fewest unstable, best first),
    # unless all of them together are cheap
    fewest = min((int((~c.stable).sum()) for c in usable), default=0)
    complete = sum(int(c.stable.sum()) for c in usable) <= COMPLETE_EVIDENCE_LOOPS
    for c in usable:
        if int((~c.stable).sum()) > fewest and not complete:
            c.status, c.K = "skipped", None  # its predictions are not needed any more
    contenders = sorted((c for c in usable if c.status != "skipped"),
                        key=lambda c: np.nanmedian(c.rel_error)
                        if np.isfinite(c.rel_error).any() else np.inf)
    best = np.inf
    for i, c in enumerate(contenders):
        if progress is not None:
            progress("loo norms", i, len(contenders))
        try:  # the stored controller needs the plant interpolant too
            fits.get("plant", c.kind)
        except ScheduleError as exc:
            c.failure = f"plant interpolant: {_one_line(exc)}"
            continue
        stop = np.inf if complete else best * (1.0 + RANK_TIE) * family.gamma
        _norms_of(c, fits, jobs, cluster, stop_above=stop)
        c.K = None
        if c.status == "complete":
            peak = c.norm[c.stable]
            best = min(best, float(np.max(peak)) / family.gamma if peak.size else np.inf)
    if progress is not None and contenders:
        progress("loo norms", len(contenders), len(contenders))
    evidence = [_result(c, family, rows) for c in cands]
    top = best_candidate(evidence)
    if top is None:
        reasons = "; ".join(f"{r.label}: {r.failure}" for r in evidence)
        raise InputError(f"no interpolant could be fitted ({reasons}); check the family")
    controller = fits.controller(top.form, top.kind)
    left = [r.label for r in evidence if r.norm_status != "complete" and not r.failure]
    if left:
        notes.append(f"leave-one-out norms computed only as far as the ranking needs "
                     f"({len(left)} of {len(evidence)} candidates partly or not at all)")
    return Choice(controller, evidence, tuple(notes))


# ----------------------------------------------------------------------------- evidence I/O
def evidence_to_arrays(evidence: list[LooResult], chosen: str = "",
                       notes: tuple[str, ...] = ()) -> dict:
    """Plain arrays/strings (for ``family.extra``) holding the LOO evidence table and the
    notes of the choice (see :class:`Choice`)."""
    if not evidence:
        return {}
    return {
        "loo_candidates": np.array([r.label for r in evidence], dtype=str),
        "loo_failure": np.array([r.failure for r in evidence], dtype=str),
        "loo_point_index": np.asarray(evidence[0].point_index, dtype=np.int64),
        "loo_rel_error": np.stack([r.rel_error for r in evidence]),
        "loo_norm": np.stack([r.norm for r in evidence]),
        "loo_stable": np.stack([r.stable for r in evidence]).astype(np.int8),
        "loo_gamma": np.float64(evidence[0].gamma),
        "loo_max_norm_ratio": np.array([r.max_norm_ratio for r in evidence]),
        "loo_n_unstable": np.array([r.n_unstable for r in evidence], dtype=np.int64),
        "loo_median_error": np.array([r.median_error for r in evidence]),
        "loo_norm_status": np.array([r.norm_status for r in evidence], dtype=str),
        "loo_chosen": chosen,
        "loo_notes": np.array(list(notes), dtype=str),
    }


def evidence_from_arrays(extra: dict) -> list[LooResult] | None:
    """Inverse of :func:`evidence_to_arrays`; None when ``extra`` holds no LOO table."""
    if "loo_candidates" not in extra:
        return None
    try:
        labels = [str(v) for v in np.atleast_1d(extra["loo_candidates"])]
        failures = [str(v) for v in np.atleast_1d(extra.get("loo_failure", [""] * len(labels)))]
        status = [str(v) for v in np.atleast_1d(extra.get("loo_norm_status",
                                                          ["complete"] * len(labels)))]
        gamma = float(np.asarray(extra["loo_gamma"]))
        idx = np.atleast_1d(np.asarray(extra["loo_point_index"])).astype(np.int64)
        out = []
        for c, label in enumerate(labels):
            form, _, kind = label.partition("/")
            out.append(LooResult(form, kind, gamma, idx,
                                 np.asarray(extra["loo_rel_error"], float)
                                 .reshape(len(labels), -1)[c],
                                 np.asarray(extra["loo_norm"], float).reshape(len(labels), -1)[c],
                                 np.asarray(extra["loo_stable"]).reshape(len(labels), -1)[c]
                                 .astype(bool), failures[c],
                                 status[c] if status[c] in NORM_STATUS else "complete"))
    except (ValueError, TypeError, IndexError, KeyError) as exc:
        if isinstance(exc, ScheduleError):
            raise
        msg = " ".join(str(exc).split())[:100]
        raise InputError(f"the family's stored leave-one-out table is damaged ({msg}); re-run "
                         "`schedule design`") from None
    return out


def evidence_notes(extra: dict) -> list[str]:
    """The notes stored with the evidence (kinds left out for size, norms left out)."""
    return [str(v) for v in np.atleast_1d(extra.get("loo_notes", [])) if str(v)]


def fit_for_family(family: Family, form: str = "auto", kind: str = "auto",
                   progress: Callable[[str, int, int], None] | None = None,
                   costly_kinds_max_points: int = COSTLY_KINDS_MAX_POINTS, jobs: int = 1,
                   cluster=None) -> tuple[dict, dict]:
    """For the design stage: choose and fit the interpolant, return what the file stores.

    Returns
    -------
    interpolant : dict ``{"arrays": ..., "attrs": ...}`` for ``family.interpolant``.
    evidence : dict of plain arrays/strings for ``family.extra`` (the LOO table and the
        notes of the choice, ``loo_notes``).
    """
    choice = choose(family, form, kind, progress, costly_kinds_max_points, jobs, cluster)
    chosen = f"{choice.controller.form}/{choice.controller.kind}"
    return (choice.controller.to_arrays(),
            evidence_to_arrays(choice.evidence, chosen, choice.notes))
