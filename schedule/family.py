"""Synthesis of the controller family over the envelope at one common gamma.

Two phases, both split into fixed chunks of point indices (so the result is
the same bit for bit whatever the backend or number of workers, and an
interrupted run can resume chunk by chunk):

1. **gamma phase** - the optimal gamma of every operating point's
   generalized plant by the Riccati gamma-iteration (Glover and Doyle 1988;
   Doyle, Glover, Khargonekar and Francis 1989, "DGKF"; Zhou, Doyle and Glover
   1996, ch. 16-17): gamma is feasible when the two Hamiltonians give
   stabilizing X >= 0 and Y >= 0 and rho(XY) < gamma^2. A point whose model
   raised, holds NaN, violates a rank / imaginary-axis condition or whose
   iteration fails is marked "failed" with a one-line reason; the run goes on.
2. **controller phase** - the common gamma (policy ``"common"``:
   ``max(gamma_opt over ok points) * (1 + margin)``; policy ``"fixed"``: the
   given value, points with ``gamma_opt >= value`` fail), then the central
   controller at that gamma at every ok point, keeping its observer-form
   pieces (state-feedback gain, worst-disturbance gain, observer gain, Z)
   for observer-form interpolation (Stilwell and Rugh 1999).

Results of finished chunks go to a sidecar partial file (``<out stem>.partial.h5``,
rewritten atomically) so a killed run restarted with ``resume=True`` only
computes what is missing; the family file itself is written atomically at
the end.
"""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError, ScheduleError
from .parallel import prestart, run_chunks
from .store import CONTROLLER_KEYS, PLANT_KEYS, read_partial, write_family, write_partial
from .types import Family, SchedulingVariable, point_text

__all__ = ["design_family", "run_design", "extend_family", "synthesize_family",
           "common_gamma", "partial_path", "DesignRun", "CHUNK_SIZE"]

CHUNK_SIZE = 128  # points per chunk; fixed so results never depend on the backend
PARTIAL_WRITE_INTERVAL = 0.2  # seconds between rewrites of the partial file

Progress = Callable[[str, int, int], None]


@dataclass
class DesignRun:
    """What a design run did: the family plus counts for the summary.

    ``computed_gamma`` / ``computed_controllers`` count the points computed in
    THIS run; ``resumed_gamma`` / ``resumed_controllers`` those taken from the
    partial file of an earlier, interrupted run.
    """

    family: Family
    computed_gamma: int = 0
    computed_controllers: int = 0
    resumed_gamma: int = 0
    resumed_controllers: int = 0
    seconds: float = 0.0
    interpolant_error: str = ""
    notes: list[str] = field(default_factory=list)


# ----------------------------------------------------------------------------- chunk workers
def _plant_objects(stack: dict[str, np.ndarray]) -> list:
    from .plant import GeneralizedPlant

    k = stack["A"].shape[0]
    stack = {key: np.asarray(stack[key], dtype=np.float64) for key in PLANT_KEYS}
    # the stacks hold plants validated when they were built: no second validation here
    return [GeneralizedPlant.from_validated({key: stack[key][i] for key in PLANT_KEYS})
            for i in range(k)]


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if isinstance(exc, ScheduleError) else f"{type(exc).__name__}: {text}"


def gamma_chunk(stack: dict[str, np.ndarray], rtol: float) -> tuple[np.ndarray, list[str]]:
    """Optimal gamma of each plant of a stacked chunk: ``(gamma_opt (k,), reasons)``.

    A failure gives ``nan`` and a one-line reason, never an exception.
    """
    from .hinf import synthesize_many

    plants = _plant_objects(stack)
    gam = np.full(len(plants), np.nan)
    reasons = [""] * len(plants)
    try:
        results = synthesize_many(plants, gamma=None, rtol=rtol)
    except (ScheduleError, NotImplementedError):  # one plant at a time
        results = [_gamma_one(p, rtol) for p in plants]
    for i, (g, _ctrl, reason) in enumerate(results):
        if reason:
            reasons[i] = " ".join(str(reason).split())
        elif g is None or not np.isfinite(g) or g <= 0:
            reasons[i] = f"gamma-iteration returned gamma_opt={g}"
        else:
            gam[i] = float(g)
    return gam, reasons


def _gamma_one(plant, rtol: float) -> tuple[float, None, str]:
    from .hinf import optimal_gamma

    try:
        return optimal_gamma(plant, rtol=rtol), None, ""
    except ScheduleError as exc:
        return float("nan"), None, _one_line(exc)
    except (np.linalg.LinAlgError, ArithmeticError) as exc:
        return float("nan"), None, _one_line(exc)


def controller_chunk(stack: dict[str, np.ndarray], gamma: float
                     ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray], list[str]]:
    """Central controller at ``gamma`` for each plant of a stacked chunk.

    Returns ``(controller, pieces, reasons)``: stacks (first axis = plant) of the
    controller matrices and observer pieces (zeros where a plant failed) and one
    reason per plant ("" on success). Stacks keep the hand-back to the caller cheap.
    """
    from .hinf import central_controllers

    k = stack["A"].shape[0]
    ctrl: dict[str, np.ndarray] = {}
    pieces: dict[str, np.ndarray] = {}
    reasons = [""] * k
    # the plant conditions were checked in the gamma phase; certification is batched
    try:
        made = central_controllers(_plant_objects(stack), gamma)
    except ScheduleError as exc:  # a bad gamma: every plant fails the same way
        made = [(None, _one_line(exc))] * k
    for i, (c, why) in enumerate(made):
        if c is None:
            reasons[i] = " ".join(why.split())
            continue
        try:
            mats = {key: np.asarray(getattr(c, key), dtype=float) for key in CONTROLLER_KEYS}
            bad = [key for key, v in mats.items() if not np.isfinite(v).all()]
            if bad:
                reasons[i] = f"controller matrix {bad[0]} holds NaN or inf at gamma={gamma:.6g}"
                continue
            pcs = c.pieces.to_arrays()
            if not ctrl:
                ctrl = {key: np.zeros((k,) + v.shape) for key, v in mats.items()}
                pieces = {key: np.zeros((k,) + v.shape) for key, v in pcs.items()}
            for key, v in mats.items():
                ctrl[key][i] = v
            for key, v in pcs.items():
                pieces[key][i] = v
        except ScheduleError as exc:
            reasons[i] = _one_line(exc)
        except (np.linalg.LinAlgError, ArithmeticError) as exc:
            reasons[i] = _one_line(exc)
    return ctrl, pieces, reasons


# ----------------------------------------------------------------------------- helpers
def common_gamma(gamma_opt: np.ndarray, ok: np.ndarray, policy: str = "common",
                 margin: float = 0.05, value: float | None = None) -> float:
    """The design gamma shared by every point.

    ``"common"``: ``max(gamma_opt[ok]) * (1 + margin)``; ``"fixed"``: ``value``.
    Raises InputError when no point is ok or the policy is unknown.
    """
    ok = np.asarray(ok, dtype=bool)
    if policy == "fixed":
        if value is None or not np.isfinite(value) or value <= 0:
            raise InputError(f"gamma policy 'fixed' needs a positive [gamma] value, got {value}")
        return float(value)
    if policy != "common":
        raise InputError(f"gamma policy {policy!r} is unknown; use 'common' or 'fixed'")
    if not ok.any():
        raise InputError("no operating point has a finite optimal gamma; see the failure "
                         "reasons and fix the model or the weights")
    if margin < 0:
        raise InputError(f"gamma margin {margin} is negative; give a margin >= 0")
    return float(np.max(np.asarray(gamma_opt)[ok]) * (1.0 + margin))


def partial_path(out: str | os.PathLike) -> Path:
    """The sidecar partial-result file of a run writing ``out`` (``family.h5`` ->
    ``family.partial.h5``)."""
    out = Path(out)
    return out.with_name(out.stem + ".partial.h5")


def _chunks(N: int, size: int) -> list[np.ndarray]:
    return [np.arange(s, min(s + size, N)) for s in range(0, N, size)]


def _pending(chunks: list[np.ndarray], done, mask: np.ndarray, plants: Sequence, arg):
    """Work items ``(stacked plants, arg)`` for the chunks not done yet, and their numbers.

    Only the points of ``mask`` are sent; a chunk with none left is marked done.
    """
    tasks, numbers = [], []
    for c, idx in enumerate(chunks):
        if done[c]:
            continue
        idx = idx[mask[idx]]
        if idx.size == 0:
            done[c] = 1
            continue
        tasks.append((_stack_plants(plants, idx), arg))
        numbers.append(c)
    return tasks, numbers


def _stack_plants(plants: Sequence, idx: Sequence[int]) -> dict[str, np.ndarray]:
    return {k: np.stack([np.asarray(getattr(plants[i], k)) for i in idx]) for k in PLANT_KEYS}


def _fingerprint(points: np.ndarray, plant_stack: dict, build_reasons: Sequence[str],
                 extra_text: str) -> str:
    h = hashlib.sha256()
    h.update(extra_text.encode("utf-8"))
    h.update(np.ascontiguousarray(points, dtype=float).tobytes())
    for k in PLANT_KEYS:
        h.update(np.ascontiguousarray(plant_stack[k]).tobytes())
    for r in build_reasons:
        h.update(r.encode("utf-8") + b"\0")
    return h.hexdigest()


def _remove_stale_temps(path: Path) -> None:
    """Delete temporary files left by a killed atomic write of ``path`` (see schedule.atomic)."""
    from .atomic import remove_stale_temps

    remove_stale_temps(path)


class _PartialState:
    """The in-memory copy of everything the partial file holds."""

    def __init__(self, N: int, n_chunks: int, fingerprint: str, chunk_size: int):
        self.N, self.n_chunks, self.fingerprint, self.chunk_size = N, n_chunks, fingerprint, \
            chunk_size
        self.gamma_done = np.zeros(n_chunks, dtype=np.int8)
        self.gamma_opt = np.full(N, np.nan)
        self.gamma_reasons = [""] * N
        self.ctrl_done = np.zeros(n_chunks, dtype=np.int8)
        self.ctrl_gamma = float("nan")
        self.ctrl_reasons = [""] * N
        self.controller: dict[str, np.ndarray] | None = None
        self.pieces: dict[str, np.ndarray] | None = None

    def arrays(self) -> tuple[dict, dict]:
        arrays: dict[str, Any] = {
            "gamma/done": self.gamma_done, "gamma/gamma_opt": self.gamma_opt,
            "gamma/reasons": np.array(self.gamma_reasons, dtype=str).reshape(self.N),
            "controller/done": self.ctrl_done,
            "controller/reasons": np.array(self.ctrl_reasons, dtype=str).reshape(self.N),
        }
        if self.controller is not None:
            for k, v in self.controller.items():
                arrays[f"controller/matrices/{k}"] = v
            for k, v in (self.pieces or {}).items():
                arrays[f"controller/pieces/{k}"] = v
        attrs = {"fingerprint": self.fingerprint, "points": self.N, "chunks": self.n_chunks,
                 "chunk_size": self.chunk_size, "controller_gamma": self.ctrl_gamma}
        return arrays, attrs

    def load(self, arrays: dict, attrs: dict, where: Path) -> None:
        if attrs.get("fingerprint") != self.fingerprint or attrs.get("points") != self.N or \
                attrs.get("chunk_size") != self.chunk_size:
            raise InputError(f"partial file {where} belongs to a different design or envelope; "
                             "delete it or run without --resume")
        try:
            self.gamma_done = np.asarray(arrays["gamma/done"], dtype=np.int8)
            self.gamma_opt = np.asarray(arrays["gamma/gamma_opt"], dtype=float)
            self.gamma_reasons = [str(r) for r in arrays["gamma/reasons"]]
            self.ctrl_done = np.asarray(arrays["controller/done"], dtype=np.int8)
            self.ctrl_reasons = [str(r) for r in arrays["controller/reasons"]]
            self.ctrl_gamma = float(attrs.get("controller_gamma", float("nan")))
            mats = {k.split("/")[-1]: v for k, v in arrays.items()
                    if k.startswith("controller/matrices/")}
            pcs = {k.split("/")[-1]: v for k, v in arrays.items()
                   if k.startswith("controller/pieces/")}
        except KeyError as exc:
            raise InputError(f"partial file {where} lacks {exc}; delete it and run without "
                             "--resume") from None
        self.controller = mats or None
        self.pieces = pcs if mats else None
        if self.gamma_done.shape != (self.n_chunks,) or self.ctrl_done.shape != (self.n_chunks,):
            raise InputError(f"partial file {where} has inconsistent chunk tables; delete it and "
                             "run without --resume")


class _PartialWriter:
    """Rewrites the partial file at most every ``interval`` seconds, and never more often
    than keeps the writing below about 4 % of the run (a write of ``d`` seconds waits
    ``25 d`` before the next)."""

    def __init__(self, path: Path | None, state: _PartialState,
                 interval: float = PARTIAL_WRITE_INTERVAL):
        self.path, self.state, self.interval = path, state, interval
        self.last = time.monotonic()
        self.wait = interval
        self.dirty = False

    def mark(self) -> None:
        self.dirty = True
        if self.path is not None and time.monotonic() - self.last >= self.wait:
            self.flush()

    def flush(self) -> None:
        if self.path is None or not self.dirty:
            return
        t0 = time.monotonic()
        write_partial(self.path, *self.state.arrays())
        self.last = time.monotonic()
        self.wait = max(self.interval, 25.0 * (self.last - t0))
        self.dirty = False


# ----------------------------------------------------------------------------- the core
def synthesize_family(points: np.ndarray, plants: Sequence, build_reasons: Sequence[str], *,
                      variables: Sequence[SchedulingVariable],
                      names: dict[str, Any],
                      policy: str = "common", margin: float = 0.05,
                      gamma_value: float | None = None,
                      breakpoints: tuple[np.ndarray, ...] | None = None,
                      grid_index: np.ndarray | None = None,
                      design_text: str = "", base_dir: str = "",
                      partial: str | os.PathLike | None = None, resume: bool = False,
                      jobs: int = 1, cluster: Any = None, progress: Progress | None = None,
                      rtol: float = 1e-4, chunk_size: int = CHUNK_SIZE) -> DesignRun:
    """Synthesize the family from generalized plants already built.

    Parameters
    ----------
    points : (N, d) scheduling values.
    plants : N GeneralizedPlant objects, ``None`` where the plant could not be
        built (then ``build_reasons[k]`` says why).
    names : "measured", "controls", "exogenous", "performance", "states" name tuples;
        optional "units": the same groups -> unit tuples (``Family.units``).
    policy, margin, gamma_value : the common-gamma policy (see :func:`common_gamma`).
    partial : sidecar partial-result file (None: keep nothing on disk).
    resume : take finished chunks from ``partial`` (it must belong to the same
        points and plants, else InputError).
    jobs, cluster : see :func:`schedule.parallel.run_chunks`.
    rtol : relative tolerance of the gamma-iteration.

    Returns
    -------
    DesignRun
    """
    t0 = time.perf_counter()
    points = np.asarray(points, dtype=float)
    N = points.shape[0]
    if N == 0:
        raise InputError("the envelope holds no operating points; give a grid or a point file")
    if len(plants) != N or len(build_reasons) != N:
        raise InputError(f"{len(plants)} plants and {len(build_reasons)} reasons for {N} points")
    valid = np.array([p is not None for p in plants])
    if not valid.any():
        first = next((r for r in build_reasons if r), "unknown reason")
        raise InputError(f"no generalized plant could be built at any point (first reason: "
                         f"{first}); fix the model or the design file")
    template = plants[int(np.argmax(valid))]
    shapes = {k: np.shape(getattr(template, k)) for k in PLANT_KEYS}
    for i in np.flatnonzero(valid):
        for k in PLANT_KEYS:
            if np.shape(getattr(plants[i], k)) != shapes[k]:
                where = point_text([v.name for v in variables], points[i])
                raise InputError(f"generalized plant at point {i} ({where}) has {k} of shape "
                                 f"{np.shape(getattr(plants[i], k))}, other points {shapes[k]}; "
                                 "every point needs the same sizes")
    plant_stack = {k: np.zeros((N,) + shapes[k]) for k in PLANT_KEYS}
    for i in np.flatnonzero(valid):
        for k in PLANT_KEYS:
            plant_stack[k][i] = getattr(plants[i], k)

    chunks = _chunks(N, chunk_size)
    fp = _fingerprint(points, plant_stack, build_reasons, f"{design_text}\0{rtol!r}")
    state = _PartialState(N, len(chunks), fp, chunk_size)
    partial = Path(partial) if partial is not None else None
    run = DesignRun(family=None)  # type: ignore[arg-type]
    if partial is not None:
        _remove_stale_temps(partial)
        if resume:
            loaded = read_partial(partial)
            if loaded is not None:
                state.load(*loaded, partial)
            else:
                run.notes.append(f"no partial file {partial} found; starting from the beginning")
    writer = _PartialWriter(partial, state)

    # ---- phase 1: optimal gamma per point
    run.resumed_gamma = int(sum(valid[chunks[c]].sum() for c in range(len(chunks))
                                if state.gamma_done[c]))
    tasks, task_chunks = _pending(chunks, state.gamma_done, valid, plants, rtol)
    total, done = int(valid.sum()), run.resumed_gamma
    if progress:
        progress("gamma", done, total)
    for t, (gam, reasons) in run_chunks(gamma_chunk, tasks, jobs=jobs, cluster=cluster):
        c = task_chunks[t]
        idx = chunks[c][valid[chunks[c]]]
        state.gamma_opt[idx] = gam
        for i, r in zip(idx, reasons, strict=False):
            state.gamma_reasons[i] = r
        state.gamma_done[c] = 1
        run.computed_gamma += idx.size
        done += idx.size
        writer.mark()
        if progress:
            progress("gamma", done, total)
    writer.flush()

    status_ok = valid & np.isfinite(state.gamma_opt) & np.array(
        [not r for r in state.gamma_reasons])
    reasons = [build_reasons[i] if not valid[i] else
               (f"gamma-iteration: {state.gamma_reasons[i]}" if not status_ok[i] else "")
               for i in range(N)]
    gamma_opt = np.where(status_ok, state.gamma_opt, np.nan)
    if not status_ok.any():
        first = next(r for r in reasons if r)
        raise InputError(f"no operating point reached a finite optimal gamma (first: {first}); "
                         "fix the model or the weights")
    gamma = common_gamma(gamma_opt, status_ok, policy, margin, gamma_value)
    if policy == "fixed":
        over = status_ok & (gamma_opt >= gamma)
        for i in np.flatnonzero(over):
            reasons[i] = (f"gamma_opt={gamma_opt[i]:.6g} is not below the fixed gamma="
                          f"{gamma:.6g}; raise [gamma] value or use policy 'common'")
        status_ok &= ~over
        if not status_ok.any():
            raise InputError(f"no operating point is feasible at the fixed gamma={gamma:.6g} "
                             f"(smallest gamma_opt {np.nanmin(gamma_opt):.6g}); raise [gamma] "
                             "value or use policy 'common'")

    # ---- phase 2: controllers at the common gamma
    if not (state.ctrl_gamma == gamma):  # new gamma (or nan): earlier controllers are stale
        state.ctrl_done[:] = 0
        state.ctrl_reasons = [""] * N
        state.controller = state.pieces = None
        state.ctrl_gamma = gamma
    run.resumed_controllers = int(sum(status_ok[chunks[c]].sum() for c in range(len(chunks))
                                      if state.ctrl_done[c]))
    tasks, task_chunks = _pending(chunks, state.ctrl_done, status_ok, plants, gamma)
    total, done = int(status_ok.sum()), run.resumed_controllers
    if progress:
        progress("controllers", done, total)
    for t, (ctrl, pieces, creasons) in run_chunks(controller_chunk, tasks, jobs=jobs,
                                                  cluster=cluster):
        c = task_chunks[t]
        idx = chunks[c][status_ok[chunks[c]]]
        for i, reason in zip(idx, creasons, strict=True):
            state.ctrl_reasons[i] = reason
        if ctrl:
            if state.controller is None:
                state.controller = {k: np.zeros((N,) + v.shape[1:]) for k, v in ctrl.items()}
                state.pieces = {k: np.zeros((N,) + v.shape[1:]) for k, v in pieces.items()}
            good = np.array([not r for r in creasons], dtype=bool)
            for k, v in ctrl.items():
                state.controller[k][idx[good]] = v[good]
            for k, v in pieces.items():
                if k not in state.pieces or state.pieces[k].shape[1:] != v.shape[1:]:
                    raise InputError(f"observer pieces '{k}' have shape {v.shape[1:]} in chunk "
                                     f"{c}, unlike other chunks; report this as a bug")
                state.pieces[k][idx[good]] = v[good]
        state.ctrl_done[c] = 1
        run.computed_controllers += idx.size
        done += idx.size
        writer.mark()
        if progress:
            progress("controllers", done, total)
    writer.flush()

    for i in np.flatnonzero(status_ok):
        if state.ctrl_reasons[i]:
            reasons[i] = f"controller at gamma={gamma:.6g}: {state.ctrl_reasons[i]}"
            status_ok[i] = False
    if not status_ok.any() or state.controller is None:
        first = next(r for r in reasons if r)
        raise InputError(f"no controller could be built at gamma={gamma:.6g} (first: {first}); "
                         "raise the gamma margin")
    controller = {k: np.where(_mask(status_ok, v), v, 0.0) for k, v in state.controller.items()}
    pieces = {k: np.where(_mask(status_ok, v), v, 0.0) for k, v in (state.pieces or {}).items()}
    plant_out = {k: np.where(_mask(valid, v), v, 0.0) for k, v in plant_stack.items()}
    family = Family(
        variables=tuple(variables), points=points,
        status=np.array(["ok" if s else "failed" for s in status_ok], dtype=str),
        reasons=tuple(reasons), gamma_opt=gamma_opt, gamma=gamma, plant=plant_out,
        controller=controller, pieces=pieces,
        measured_names=tuple(names.get("measured", ())),
        control_names=tuple(names.get("controls", ())),
        exogenous_names=tuple(names.get("exogenous", ())),
        performance_names=tuple(names.get("performance", ())),
        state_names=tuple(names.get("states", ())),
        breakpoints=breakpoints, grid_index=grid_index, design_text=design_text,
        design_base_dir=str(base_dir) if base_dir else "", units=dict(names.get("units") or {}))
    run.family = family
    run.seconds = time.perf_counter() - t0
    return run


def _mask(ok: np.ndarray, v: np.ndarray) -> np.ndarray:
    return ok.reshape((-1,) + (1,) * (np.ndim(v) - 1))


# ----------------------------------------------------------------------------- from a design
@dataclass
class _Envelope:
    points: np.ndarray
    plants: list
    reasons: list[str]
    names: dict[str, tuple[str, ...]]
    breakpoints: tuple[np.ndarray, ...] | None
    grid_index: np.ndarray | None
    notes: list[str]


def _linear_plants_from_source(spec) -> tuple:
    """(points, [LinearPlant | None], [reason], breakpoints, grid_index, notes) from the spec."""
    from . import sources

    result = sources.operating_points_for(spec)
    points, lin, breakpoints, grid_index = result[0], result[1], result[2], result[3]
    holes = result[4] if len(result) > 4 else None
    points = np.asarray(points, dtype=float)
    if hasattr(lin, "plant") and callable(lin.plant):  # stacked OperatingPoints-like
        lin = [lin.plant(k) for k in range(points.shape[0])]
    given = list(getattr(result, "reasons", ()) or ())
    plants, reasons = [], []
    for k, item in enumerate(lin):
        plants.append(item)
        why = str(given[k]) if k < len(given) and given[k] else ""
        reasons.append(why if item is None and why else
                       ("" if item is not None else "the model gave no plant at this point"))
    notes = []
    if holes:
        notes.append(str(holes) if not isinstance(holes, (list, tuple)) else
                     "; ".join(map(str, holes)))
    return points, plants, reasons, breakpoints, grid_index, notes


def _generalized(spec, points: np.ndarray, linear: Sequence, reasons: Sequence[str]):
    from .weights import build_generalized_plant_named

    plants, out_reasons, names = [], [], None
    for i, lp in enumerate(linear):
        if lp is None:
            plants.append(None)
            out_reasons.append(f"model: {reasons[i]}" if reasons[i] else "model gave no plant")
            continue
        try:
            gp, ch = build_generalized_plant_named(spec, lp, points[i])
        except ScheduleError as exc:
            plants.append(None)
            out_reasons.append(f"generalized plant: {_one_line(exc)}")
            continue
        except (ValueError, np.linalg.LinAlgError, ArithmeticError) as exc:
            plants.append(None)
            out_reasons.append(f"generalized plant: {_one_line(exc)}")
            continue
        if names is None:
            names = {"measured": tuple(ch.measured), "controls": tuple(ch.controls),
                     "exogenous": tuple(ch.exogenous), "performance": tuple(ch.performance),
                     "states": tuple(ch.states), "units": dict(ch.units or {})}
        plants.append(gp)
        out_reasons.append("")
    return plants, out_reasons, names or {}


def _envelope(spec) -> _Envelope:
    points, linear, reasons, bp, gi, notes = _linear_plants_from_source(spec)
    plants, reasons, names = _generalized(spec, points, linear, reasons)
    return _Envelope(points, plants, reasons, names,
                     None if bp is None else tuple(np.asarray(b, dtype=float) for b in bp),
                     None if gi is None else np.asarray(gi, dtype=np.int64), notes)


def run_design(spec, out: str | os.PathLike | None = None, jobs: int = 1, cluster: Any = None,
               resume: bool = False, progress: Progress | None = None, fit: bool = True,
               rtol: float = 1e-4, chunk_size: int = CHUNK_SIZE) -> DesignRun:
    """Like :func:`design_family` but returns the :class:`DesignRun` with the counts."""
    out = Path(out) if out is not None else None
    if out is not None and not (out.parent if str(out.parent) else Path(".")).is_dir():
        raise InputError(f"output folder {out.parent} does not exist; create it first")
    prestart(jobs, cluster)  # worker start-up overlaps with building the plants
    env = _envelope(spec)
    run = synthesize_family(
        env.points, env.plants, env.reasons, variables=spec.variables, names=env.names,
        policy=spec.gamma.policy, margin=spec.gamma.margin, gamma_value=spec.gamma.value,
        breakpoints=env.breakpoints, grid_index=env.grid_index, design_text=spec.text,
        base_dir=str(spec.base_dir), partial=partial_path(out) if out is not None else None,
        resume=resume, jobs=jobs, cluster=cluster, progress=progress, rtol=rtol,
        chunk_size=chunk_size)
    run.notes[:0] = env.notes
    if fit:
        _fit_interpolant(run, spec)
    if out is not None:
        _remove_stale_temps(out)
        write_family(out, run.family)
        try:
            os.unlink(partial_path(out))
        except FileNotFoundError:
            pass
    return run


def _fit_interpolant(run: DesignRun, spec) -> None:
    try:
        from .interpolate import fit_for_family
    except ImportError:
        run.notes.append("interpolation module not available; no interpolant stored")
        return
    try:
        interpolant, evidence = fit_for_family(run.family, spec.interpolation.form,
                                               spec.interpolation.kind)
    except ScheduleError as exc:
        run.interpolant_error = _one_line(exc)
        run.family.extra["interpolant_error"] = run.interpolant_error
        return
    run.family.interpolant = interpolant
    for k, v in (evidence or {}).items():
        run.family.extra[str(k)] = v


def design_family(spec, out: str | os.PathLike | None = None, jobs: int = 1,
                  cluster: Any = None, resume: bool = False,
                  progress: Progress | None = None) -> Family:
    """Design the controller family of ``spec`` at a common gamma; write it to ``out``.

    Parameters
    ----------
    spec : schedule.design_file.DesignSpec.
    out : family file to write (atomically); the partial results live in
        :func:`partial_path` ``(out)`` meanwhile. None: return the family only.
    jobs : local worker processes (joblib/loky); ``cluster``: a dask scheduler
        address. Results are identical bit for bit for every choice.
    resume : continue an interrupted run from its partial file.
    progress : callback ``(stage, done, total)``, e.g. a
        :class:`schedule.progress.ProgressBar`.

    Returns
    -------
    Family (also written to ``out``), with the interpolant fitted by
    :func:`schedule.interpolate.fit_for_family` when that module is present.

    Raises
    ------
    InputError
        No point could be synthesized, sizes differ between points, or the
        partial file does not belong to this design.
    """
    return run_design(spec, out, jobs=jobs, cluster=cluster, resume=resume,
                      progress=progress).family


# ----------------------------------------------------------------------------- refinement
def _gamma_of(plants: Sequence, jobs: int, cluster: Any, rtol: float,
              chunk_size: int = CHUNK_SIZE) -> tuple[np.ndarray, list[str]]:
    """gamma_opt and reasons for a list of plants (None entries are skipped)."""
    M = len(plants)
    gam, reasons = np.full(M, np.nan), [""] * M
    valid = np.array([p is not None for p in plants], dtype=bool)
    chunks = [c[valid[c]] for c in _chunks(M, chunk_size)]
    chunks = [c for c in chunks if c.size]
    tasks = [(_stack_plants(plants, c), rtol) for c in chunks]
    for t, (g, r) in run_chunks(gamma_chunk, tasks, jobs=jobs, cluster=cluster):
        gam[chunks[t]] = g
        for i, text in zip(chunks[t], r, strict=False):
            reasons[i] = text
    return gam, reasons


def _controllers_of(plants: Sequence, idx: np.ndarray, gamma: float, jobs: int, cluster: Any,
                    chunk_size: int = CHUNK_SIZE) -> dict[int, tuple]:
    chunks = [c for c in (idx[s:s + chunk_size] for s in range(0, len(idx), chunk_size))
              if c.size]
    tasks = [(_stack_plants(plants, c), gamma) for c in chunks]
    out: dict[int, tuple] = {}
    for t, (ctrl, pieces, reasons) in run_chunks(controller_chunk, tasks, jobs=jobs,
                                                 cluster=cluster):
        for j, (i, reason) in enumerate(zip(chunks[t], reasons, strict=True)):
            if reason:
                out[int(i)] = (None, None, reason)
            else:
                out[int(i)] = ({k: v[j] for k, v in ctrl.items()},
                               {k: v[j] for k, v in pieces.items()}, "")
    return out


def extend_family(family: Family, spec, new_points, jobs: int = 1,
                  cluster: Any = None, rtol: float = 1e-4, breakpoints=None) -> Family:
    """Synthesize controllers at ``new_points`` and append them to ``family``.

    The common gamma is kept unless a new point's optimum needs a larger one:
    with policy "common" the gamma is then raised to ``max(gamma_opt over all
    ok points) * (1 + margin)`` and every controller is re-synthesized at it;
    the change is recorded as a sentence in ``extra["gamma_raised"]``. With
    policy "fixed" (or when the new optimum stays below the common gamma) the
    old controllers are kept and new points infeasible at the gamma are
    failed with the reason. The interpolant is cleared, since it no longer
    matches the points; the design text and its base folder and the units are
    kept (the tool version and creation time are the writer's).

    ``breakpoints`` (one increasing array per variable) keeps the family
    rectangular: every point, old and new, must be a node of that grid (the
    caller adds whole grid lines), and the result carries these breakpoints and
    the grid indices of its points. Without it the grid structure is dropped (the
    set becomes scattered).

    Raises
    ------
    InputError
        When the spec has no model to evaluate at new points, the points
        have the wrong width, or a point is not a node of ``breakpoints``.
    """
    from .sources import evaluate_model, load_model

    new = np.atleast_2d(np.asarray(new_points, dtype=float))
    d = len(family.variables)
    if new.ndim != 2 or new.shape[1] != d or new.shape[0] == 0:
        raise InputError(f"new points have shape {new.shape}, expected (M, {d}) with M >= 1")
    if spec.source.model is None and spec.source.model_file is None:
        raise InputError("extending a family needs a model source ([source] model or "
                         "model_file); an operating-point file has no values between its points")
    grid_index = None
    if breakpoints is not None:
        bps = tuple(np.asarray(b, dtype=float).reshape(-1) for b in breakpoints)
        if len(bps) != d or any(b.size == 0 or np.any(np.diff(b) <= 0) for b in bps):
            raise InputError(f"breakpoints for extending must be {d} increasing lists, one per "
                             "variable")
        pts = np.vstack([np.asarray(family.points, dtype=float).reshape(-1, d), new])
        grid_index = np.zeros(pts.shape, dtype=np.int64)
        for j, b in enumerate(bps):
            k = np.clip(np.searchsorted(b, pts[:, j]), 0, b.size - 1)
            k = np.where((k > 0) & (np.abs(b[k - 1] - pts[:, j]) < np.abs(b[k] - pts[:, j])),
                         k - 1, k)
            off = np.abs(b[k] - pts[:, j]) > 1e-12 * max(1.0, float(np.abs(b).max()))
            if off.any():
                i = int(np.flatnonzero(off)[0])
                raise InputError(f"point ({point_text(family.variable_names, pts[i])}) is not "
                                 f"a node of the extended grid ({family.variable_names[j]}); "
                                 "add whole grid lines")
            grid_index[:, j] = k
        if len({tuple(r) for r in grid_index.tolist()}) != len(grid_index):
            raise InputError("two points of the extended family fall on the same grid node; "
                             "add only new nodes")
        breakpoints = bps
    model = load_model(spec)
    linear, lreasons = [], []
    for row in new:
        point = dict(zip(family.variable_names, row.tolist(), strict=True))
        lp, reason = evaluate_model(model, point)
        linear.append(lp)
        lreasons.append(reason or "")
    new_plants, new_reasons, _ = _generalized(spec, new, linear, lreasons)
    M, N = len(new), len(family.points)
    new_opt, greasons = _gamma_of(new_plants, jobs, cluster, rtol)
    new_ok = np.isfinite(new_opt) & np.array([p is not None for p in new_plants])
    for i in range(M):
        if new_plants[i] is not None and not new_ok[i]:
            new_reasons[i] = f"gamma-iteration: {greasons[i]}"
    gamma = family.gamma
    policy, margin = spec.gamma.policy, spec.gamma.margin
    old_ok = family.ok
    raised = False
    if policy == "common" and new_ok.any() and new_opt[new_ok].max() * (1 + margin) > gamma:
        all_opt = np.concatenate([family.gamma_opt[old_ok], new_opt[new_ok]])
        gamma = float(all_opt.max() * (1 + margin))
        raised = True
    elif new_ok.any():
        over = new_ok & (new_opt >= gamma)
        for i in np.flatnonzero(over):
            new_reasons[i] = (f"gamma_opt={new_opt[i]:.6g} is not below the common gamma="
                              f"{gamma:.6g}; raise [gamma] value")
        new_ok &= ~over
    plants = [_plant_from_family(family, i) if old_ok[i] else None for i in range(N)] + \
        list(new_plants)
    ok = np.concatenate([old_ok, new_ok])
    todo = np.flatnonzero(ok) if raised else N + np.flatnonzero(new_ok)
    results = _controllers_of(plants, todo, gamma, jobs, cluster)
    reasons = list(family.reasons) + new_reasons
    gamma_opt = np.concatenate([family.gamma_opt, np.where(new_ok, new_opt, np.nan)])

    shapes = {k: v.shape[1:] for k, v in family.plant.items()}
    plant = {k: np.concatenate([family.plant[k], np.zeros((M,) + shapes[k])]) for k in PLANT_KEYS}
    for j, p in enumerate(new_plants):
        if p is not None:
            for k in PLANT_KEYS:
                if np.shape(getattr(p, k)) != shapes[k]:
                    raise InputError(f"the plant at new point {j} has {k} of shape "
                                     f"{np.shape(getattr(p, k))}, the family {shapes[k]}; "
                                     "the sizes must stay the same")
                plant[k][N + j] = getattr(p, k)
    controller = {k: np.concatenate([v, np.zeros((M,) + v.shape[1:])])
                  for k, v in family.controller.items()}
    pieces = {k: np.concatenate([v, np.zeros((M,) + v.shape[1:])])
              for k, v in family.pieces.items()}
    for i, (ctrl, pcs, reason) in results.items():
        if ctrl is None:
            reasons[i] = f"controller at gamma={gamma:.6g}: {reason}"
            ok[i] = False
            for v in (*controller.values(), *pieces.values()):
                v[i] = 0.0
            continue
        for k, v in ctrl.items():
            controller[k][i] = v
        for k, v in pcs.items():
            if k not in pieces or pieces[k].shape[1:] != v.shape:
                raise InputError(f"observer pieces '{k}' at new point {i - N} have shape "
                                 f"{v.shape}, unlike the family; the sizes must stay the same")
            pieces[k][i] = v
    extra = dict(family.extra)
    if raised:
        extra["gamma_raised"] = (f"common gamma raised from {family.gamma:.6g} to {gamma:.6g} "
                                 "by the new points; all controllers re-synthesized")
    return Family(
        variables=family.variables, points=np.vstack([family.points, new]),
        status=np.array(["ok" if s else "failed" for s in ok], dtype=str),
        reasons=tuple(reasons), gamma_opt=gamma_opt, gamma=gamma, plant=plant,
        controller=controller, pieces=pieces, measured_names=family.measured_names,
        control_names=family.control_names, exogenous_names=family.exogenous_names,
        performance_names=family.performance_names, state_names=family.state_names,
        breakpoints=breakpoints, grid_index=grid_index, design_text=family.design_text,
        design_base_dir=family.design_base_dir, extra=extra, interpolant=None,
        units=dict(family.units))


def _plant_from_family(family: Family, i: int):
    from .plant import GeneralizedPlant

    return GeneralizedPlant(**{k: family.plant[k][i] for k in PLANT_KEYS})
