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

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

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
        from .hinf import ObserverPieces, assemble_controller
        from .plant import GeneralizedPlant

        out = None
        for m in range(p.shape[0]):
            try:
                k = assemble_controller(
                    GeneralizedPlant.from_arrays({n: plants[n][m] for n in PLANT_KEYS}),
                    ObserverPieces.from_arrays({n: pieces[n][m] for n in pieces}), self.gamma)
            except ScheduleError as exc:
                point = ", ".join(f"{v:g}" for v in p[m])
                raise NumericalError(f"observer-form controller at point ({point}) could not "
                                     f"be assembled: {exc}") from None
            if out is None:
                out = {n: np.empty((p.shape[0],) + np.shape(a))
                       for n, a in zip(CONTROLLER_KEYS, k, strict=True)}
            for n, a in zip(CONTROLLER_KEYS, k, strict=True):
                out[n][m] = a
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
@dataclass(frozen=True)
class LooResult:
    """Leave-one-out evidence for one (form, kind) pair.

    Per "ok" point (arrays of length n_ok, in family order): ``point_index``
    (row in the family), ``rel_error`` (relative Frobenius error of the
    predicted ``[[AK, BK], [CK, DK]]``; nan when prediction failed),
    ``norm`` (closed-loop H-infinity norm of the predicted controller on the
    true plant; inf when unstable or failed), ``stable``. ``failure`` is a
    one-line reason when the whole candidate could not be fitted.
    """

    form: str
    kind: str
    gamma: float
    point_index: np.ndarray
    rel_error: np.ndarray
    norm: np.ndarray
    stable: np.ndarray
    failure: str = ""

    @property
    def norm_ratio(self) -> np.ndarray:
        return self.norm / self.gamma

    @property
    def n_unstable(self) -> int:
        return int(np.sum(~self.stable)) if not self.failure else int(len(self.stable))

    @property
    def max_norm_ratio(self) -> float:
        r = self.norm_ratio
        return float(np.max(r)) if r.size and not self.failure else float("inf")

    @property
    def max_stable_norm_ratio(self) -> float:
        r = self.norm_ratio[self.stable]
        return float(np.max(r)) if r.size and not self.failure else float("inf")

    @property
    def median_error(self) -> float:
        e = self.rel_error[np.isfinite(self.rel_error)]
        return float(np.median(e)) if e.size and not self.failure else float("nan")

    @property
    def label(self) -> str:
        return f"{self.form}/{self.kind}"

    def rank_key(self) -> tuple:
        """Fewest unstable, then lowest max norm/gamma over stable points, then median error."""
        med = self.median_error
        return (self.n_unstable, self.max_stable_norm_ratio, med if np.isfinite(med) else np.inf)

    def summary(self) -> dict:
        return {"form": self.form, "kind": self.kind, "n_points": int(len(self.stable)),
                "n_unstable": self.n_unstable, "max_norm_ratio": self.max_norm_ratio,
                "median_error": self.median_error, "failure": self.failure}


def _block(k: dict, m: int) -> np.ndarray:
    return np.block([[k["A"][m], k["B"][m]], [k["C"][m], k["D"][m]]])


def _closed_loop_norm(plant_arrays: dict, k: tuple) -> tuple[bool, float]:
    from .norms import closed_loop, h_infinity_norm, is_stable
    from .plant import GeneralizedPlant

    Acl, Bcl, Ccl, Dcl = closed_loop(GeneralizedPlant.from_arrays(plant_arrays), k)
    if not is_stable(Acl):
        return False, float("inf")
    return True, float(h_infinity_norm(Acl, Bcl, Ccl, Dcl, rtol=1e-6)[0])


def leave_one_out_controllers(family: Family, controller: ScheduledController
                              ) -> tuple[np.ndarray, dict[str, np.ndarray], np.ndarray]:
    """Controllers predicted at every "ok" point by a refit without that point.

    The refits reuse the hyperparameters of ``controller`` (fitted on all points).

    Returns
    -------
    rows : (n_ok,) family rows of the "ok" points.
    K : dict "A", "B", "C", "D" of stacked predicted controllers (n_ok, ...).
    good : (n_ok,) False where the prediction failed (refit or assembly error).
    """
    sc = controller
    rows = _ok_rows(family)
    pts = np.asarray(family.points, dtype=float)[rows]
    part_values = sc.part_layout.pack(family.controller if sc.form == "matrices"
                                      else family.pieces, rows)
    plant_values = sc.plant_layout.pack(family.plant, rows) if sc.form == "observer" else None
    n = rows.size
    K = {k: np.zeros((n,) + np.shape(family.controller[k])[1:]) for k in CONTROLLER_KEYS}
    good = np.zeros(n, dtype=bool)
    if n < 2:
        return rows, K, good
    for i in range(n):
        keep = np.arange(n) != i
        try:
            pred = sc.part_layout.unpack(sc.part.refit(pts[keep], part_values[keep])
                                         .evaluate(pts[i:i + 1]))
            if sc.form == "observer":
                plant = sc.plant.refit(pts[keep], plant_values[keep])
                pred = sc._assemble(pts[i:i + 1], pred,
                                    sc.plant_layout.unpack(plant.evaluate(pts[i:i + 1])))
            if not all(np.all(np.isfinite(pred[k])) for k in CONTROLLER_KEYS):
                continue
            for k in CONTROLLER_KEYS:
                K[k][i] = pred[k][0]
            good[i] = True
        except (ScheduleError, np.linalg.LinAlgError):
            continue
    return rows, K, good


def leave_one_out(family: Family, form: str = "matrices", kind: str = "multilinear",
                  fitted: ScheduledController | None = None) -> LooResult:
    """Leave-one-out evidence for one (form, kind) pair (see the module notes).

    Parameters
    ----------
    family : the controller family (only "ok" points are used).
    form, kind : the interpolation form and interpolant kind.
    fitted : optional controller already fitted on all points with the same
        form and kind (its hyperparameters are reused).

    Returns
    -------
    LooResult
        per-point relative matrix error, closed-loop norm and stability, plus
        the summary (max norm/gamma, count unstable, median matrix error).
    """
    _check_form_kind(form, kind)
    full = fitted if fitted is not None else ScheduledController.fit(family, form, kind)
    if (full.form, full.kind) != (form, kind):
        raise InputError(f"fitted controller is {full.form}/{full.kind}, not {form}/{kind}; "
                         "pass a controller of the same form and kind")
    rows, K, good = leave_one_out_controllers(family, full)
    n = rows.size
    err = np.full(n, np.nan)
    norm = np.full(n, np.inf)
    stable = np.zeros(n, dtype=bool)
    if n < 2:
        return LooResult(form, kind, family.gamma, rows, err, norm, stable,
                         failure="leave-one-out needs at least 2 ok points")
    for i in np.flatnonzero(good):
        k_true = _block(family.controller, rows[i])
        err[i] = np.linalg.norm(_block(K, i) - k_true) / max(np.linalg.norm(k_true), 1e-300)
        truth = {name: np.asarray(family.plant[name][rows[i]], float) for name in PLANT_KEYS}
        try:
            stable[i], norm[i] = _closed_loop_norm(truth, tuple(K[k][i] for k in CONTROLLER_KEYS))
        except (ScheduleError, np.linalg.LinAlgError):
            stable[i], norm[i] = False, np.inf
    return LooResult(form, kind, family.gamma, rows, err, norm, stable)


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


def choose_interpolant(family: Family, spec_form: str = "auto", spec_kind: str = "auto",
                       progress: Callable[[str], None] | None = None
                       ) -> tuple[ScheduledController, list[LooResult]]:
    """Run leave-one-out for the candidate pairs and fit the best one on all points.

    The best pair has the fewest unstable LOO predictions, then the lowest
    max norm/gamma over the stable ones, then the lowest median matrix error.
    A candidate that cannot be fitted is kept in the evidence with its
    one-line reason. Returns the fitted controller and the evidence table.

    Raises
    ------
    InputError
        no candidate could be fitted (the reasons are joined in the message).
    """
    with _single_thread_blas():
        return _choose(family, spec_form, spec_kind, progress)


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


def _choose(family, spec_form, spec_kind, progress):
    evidence: list[LooResult] = []
    fitted: dict[tuple[str, str], ScheduledController] = {}
    rows = _ok_rows(family)
    for form, kind in candidate_pairs(family, spec_form, spec_kind):
        if progress is not None:
            progress(f"{form}/{kind}")
        try:
            full = ScheduledController.fit(family, form, kind)
            fitted[(form, kind)] = full
            evidence.append(leave_one_out(family, form, kind, fitted=full))
        except (ScheduleError, np.linalg.LinAlgError) as exc:
            msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            evidence.append(LooResult(form, kind, family.gamma, rows,
                                      np.full(rows.size, np.nan), np.full(rows.size, np.inf),
                                      np.zeros(rows.size, dtype=bool), failure=msg))
    usable = [r for r in evidence if not r.failure]
    if not usable:
        reasons = "; ".join(f"{r.label}: {r.failure}" for r in evidence)
        raise InputError(f"no interpolant could be fitted ({reasons}); check the family")
    best = min(usable, key=LooResult.rank_key)
    return fitted[(best.form, best.kind)], evidence


# ----------------------------------------------------------------------------- evidence I/O
def evidence_to_arrays(evidence: list[LooResult], chosen: str = "") -> dict:
    """Plain arrays/strings (for ``family.extra``) holding the LOO evidence table."""
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
        "loo_chosen": chosen,
    }


def evidence_from_arrays(extra: dict) -> list[LooResult] | None:
    """Inverse of :func:`evidence_to_arrays`; None when ``extra`` holds no LOO table."""
    if "loo_candidates" not in extra:
        return None
    try:
        labels = [str(v) for v in np.atleast_1d(extra["loo_candidates"])]
        failures = [str(v) for v in np.atleast_1d(extra.get("loo_failure", [""] * len(labels)))]
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
                                 .astype(bool), failures[c]))
    except (ValueError, TypeError, IndexError, KeyError) as exc:
        if isinstance(exc, ScheduleError):
            raise
        msg = " ".join(str(exc).split())[:100]
        raise InputError(f"the family's stored leave-one-out table is damaged ({msg}); re-run "
                         "`schedule design`") from None
    return out


def fit_for_family(family: Family, form: str = "auto", kind: str = "auto",
                   progress: Callable[[str], None] | None = None) -> tuple[dict, dict]:
    """For the design stage: choose and fit the interpolant, return what the file stores.

    Returns
    -------
    interpolant : dict ``{"arrays": ..., "attrs": ...}`` for ``family.interpolant``.
    evidence : dict of plain arrays/strings for ``family.extra`` (the LOO table).
    """
    controller, evidence = choose_interpolant(family, form, kind, progress=progress)
    chosen = f"{controller.form}/{controller.kind}"
    return controller.to_arrays(), evidence_to_arrays(evidence, chosen)
