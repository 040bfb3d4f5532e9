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
from .parallel import prestart, run_chunks, session
from .store import CONTROLLER_KEYS, PLANT_KEYS, read_partial, write_family, write_partial
from .types import Family, SchedulingVariable, point_text

__all__ = ["design_family", "run_design", "extend_family", "synthesize_family",
           "common_gamma", "partial_path", "DesignRun", "CHUNK_SIZE", "estimate_design",
           "Estimate", "envelope_size", "plants_for", "PlantSet"]

CHUNK_SIZE = 128  # points per chunk; fixed so results never depend on the backend
PARTIAL_WRITE_INTERVAL = 0.2  # seconds between rewrites of the partial file

Progress = Callable[[str, int, int], None]


@dataclass
class DesignRun:
    """What a design run did: the family plus counts for the summary.

    ``computed_plants`` / ``computed_gamma`` / ``computed_controllers`` count the
    points computed in THIS run; ``resumed_*`` those taken from the partial file of
    an earlier, interrupted run. ``stage_seconds`` holds the wall time of each stage
    ("plants", "gamma", "controllers", "fit", "write").
    """

    family: Family
    computed_gamma: int = 0
    computed_controllers: int = 0
    resumed_gamma: int = 0
    resumed_controllers: int = 0
    seconds: float = 0.0
    interpolant_error: str = ""
    notes: list[str] = field(default_factory=list)
    computed_plants: int = 0
    resumed_plants: int = 0
    stage_seconds: dict[str, float] = field(default_factory=dict)


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


def _stack_plants(plants: Sequence, idx: Sequence[int]) -> dict[str, np.ndarray]:
    return {k: np.stack([np.asarray(getattr(plants[i], k)) for i in idx]) for k in PLANT_KEYS}


def _remove_stale_temps(path: Path) -> None:
    """Delete temporary files left by a killed atomic write of ``path`` (see schedule.atomic)."""
    from .atomic import remove_stale_temps

    remove_stale_temps(path)


class _Tasks(Sequence):
    """Work items built only when :func:`schedule.parallel.run_chunks` sends them (so a
    large envelope never holds a second copy of its plants): item ``t`` is
    ``make(chunk_numbers[t])``."""

    def __init__(self, numbers: list[int], make: Callable[[int], tuple]):
        self.numbers, self.make = numbers, make

    def __len__(self) -> int:
        return len(self.numbers)

    def __getitem__(self, t: int) -> tuple:
        return self.make(self.numbers[t])


# ----------------------------------------------------------------------------- the plants
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
                     "states": tuple(ch.states)}
            # units ride along as "units/<group>" (one string per signal), so the
            # partial file keeps them as it keeps the names
            names.update({f"units/{g}": tuple(u) for g, u in (ch.units or {}).items()})
        plants.append(gp)
        out_reasons.append("")
    return plants, out_reasons, names or {}


def plant_chunk(spec, points: np.ndarray, first: int, linear: dict | None = None) -> dict:
    """Generalized plants at a chunk of design points (worker function).

    Parameters
    ----------
    spec : the DesignSpec (its model is loaded once per worker process).
    points : (k, d) the chunk's points; ``first`` is the index of its first point.
    linear : stacked linear plants ``{"A", "B", "C", "D", "names"}`` from an
        operating-point file, or None to evaluate the design's model.

    Returns
    -------
    dict with ``stack`` (the nine stacked matrices, zeros where a point failed, or None
    when none succeeded), ``valid`` (k,), ``reasons`` (k one-line strings), ``names``
    (the generalized plant's channel names) and ``signature`` (state, input and output
    names and sizes of the linear plants) so the caller can check that chunks agree.

    Raises
    ------
    InputError
        two points of the chunk give plants of different sizes or signal names.
    """
    from .sources import check_consistent, evaluate_points
    from .types import LinearPlant

    points = np.asarray(points, dtype=float)
    if linear is None:
        lin, lreasons = evaluate_points(spec, points)
    else:
        names = tuple(tuple(n) for n in linear["names"])
        lin = [LinearPlant(linear["A"][i], linear["B"][i], linear["C"][i], linear["D"][i],
                           *names) for i in range(points.shape[0])]
        lreasons = [""] * points.shape[0]
    try:
        check_consistent(lin, points, spec.variable_names)
    except InputError as exc:  # the message counts points in the chunk: name the envelope's
        raise InputError(f"{exc} (chunk starting at point {first})") from None
    plants, reasons, names = _generalized(spec, points, lin, lreasons)
    first_ok = next((p for p in lin if p is not None), None)
    signature = None if first_ok is None else (
        tuple(first_ok.state_names), tuple(first_ok.input_names), tuple(first_ok.output_names))
    valid = np.array([p is not None for p in plants], dtype=bool)
    stack = None
    if valid.any():
        template = plants[int(np.argmax(valid))]
        stack = {k: np.zeros((len(plants),) + np.shape(getattr(template, k))) for k in PLANT_KEYS}
        for i in np.flatnonzero(valid):
            for k in PLANT_KEYS:
                value = getattr(plants[i], k)
                if np.shape(value) != stack[k].shape[1:]:
                    where = point_text(spec.variable_names, points[i])
                    raise InputError(f"generalized plant at point {first + i} ({where}) has "
                                     f"{k} of shape {np.shape(value)}, other points "
                                     f"{stack[k].shape[1:]}; every point needs the same sizes")
                stack[k][i] = value
    return {"stack": stack, "valid": valid, "reasons": reasons, "names": names,
            "signature": signature}


@dataclass
class _Source:
    """Where the design points and their plants come from."""

    points: np.ndarray
    breakpoints: tuple[np.ndarray, ...] | None
    grid_index: np.ndarray | None
    notes: list[str]
    linear: Any = None  # an OperatingPoints (file source) or None (model source)


def _source(spec) -> _Source:
    """The design points (no model evaluated yet)."""
    from . import sources

    if spec.source.operating_points is not None:
        file, points, bp, gi, holes = sources.file_points(spec, Path(spec.source.operating_points))
    else:
        file = None
        points, bp, gi, holes = sources.design_points(spec)
    notes = ["; ".join(map(str, holes))] if holes else []
    return _Source(np.asarray(points, dtype=float),
                   None if bp is None else tuple(np.asarray(b, dtype=float) for b in bp),
                   None if gi is None else np.asarray(gi, dtype=np.int64), notes, file)


def _fingerprint(spec_text: str, points: np.ndarray, source_digest: str, rtol: float,
                 chunk_size: int) -> str:
    h = hashlib.sha256()
    h.update(f"{spec_text}\0{rtol!r}\0{chunk_size}\0{source_digest}\0".encode())
    h.update(np.ascontiguousarray(points, dtype=float).tobytes())
    return h.hexdigest()


# ----------------------------------------------------------------------------- partial state
STAGES = ("plants", "gamma", "controller")
_NAME_LABELS = ("measured", "controls", "exogenous", "performance", "states")


def _hash_strings(h, texts) -> None:
    for t in texts:
        b = str(t).encode("utf-8")
        h.update(len(b).to_bytes(8, "little") + b)


class _PartialState:
    """The in-memory copy of everything the partial file holds, with a SHA-256 digest per
    finished chunk and stage (over the chunk's rows of every array of the stage)."""

    def __init__(self, N: int, chunks: list[np.ndarray], fingerprint: str, chunk_size: int):
        self.N, self.chunks, self.fingerprint, self.chunk_size = N, chunks, fingerprint, \
            chunk_size
        n = len(chunks)
        self.done = {s: np.zeros(n, dtype=np.int8) for s in STAGES}
        self.digest = {s: [""] * n for s in STAGES}
        self.valid = np.zeros(N, dtype=bool)
        self.plant_reasons = [""] * N
        self.plant: dict[str, np.ndarray] | None = None
        self.names: dict[str, tuple[str, ...]] | None = None
        self.signature: tuple | None = None
        self.gamma_opt = np.full(N, np.nan)
        self.gamma_reasons = [""] * N
        self.ctrl_gamma = float("nan")
        self.ctrl_reasons = [""] * N
        self.controller: dict[str, np.ndarray] | None = None
        self.pieces: dict[str, np.ndarray] | None = None

    # -- digests ------------------------------------------------------------------
    def chunk_digest(self, stage: str, c: int) -> str:
        idx = self.chunks[c]
        h = hashlib.sha256(f"{self.fingerprint}|{stage}|{c}|".encode())
        if stage == "plants":
            h.update(self.valid[idx].astype(np.int8).tobytes())
            _hash_strings(h, (self.plant_reasons[i] for i in idx))
            for k in PLANT_KEYS if self.plant is not None else ():
                h.update(np.ascontiguousarray(self.plant[k][idx]).tobytes())
            for label in _NAME_LABELS if self.names else ():
                _hash_strings(h, (label, *self.names.get(label, ())))
        elif stage == "gamma":
            h.update(np.ascontiguousarray(self.gamma_opt[idx]).tobytes())
            _hash_strings(h, (self.gamma_reasons[i] for i in idx))
        else:
            h.update(repr(float(self.ctrl_gamma)).encode())
            _hash_strings(h, (self.ctrl_reasons[i] for i in idx))
            for group in (self.controller or {}), (self.pieces or {}):
                for k in sorted(group):
                    h.update(k.encode() + np.ascontiguousarray(group[k][idx]).tobytes())
        return h.hexdigest()

    def finish(self, stage: str, c: int) -> None:
        self.done[stage][c] = 1
        self.digest[stage][c] = self.chunk_digest(stage, c)

    def reset_controllers(self, gamma: float) -> None:
        self.done["controller"][:] = 0
        self.digest["controller"] = [""] * len(self.chunks)
        self.ctrl_reasons = [""] * self.N
        self.controller = self.pieces = None
        self.ctrl_gamma = gamma

    # -- file form ----------------------------------------------------------------
    def arrays(self) -> tuple[dict, dict]:
        strings = lambda v: np.array(v, dtype=str).reshape(len(v))  # noqa: E731
        arrays: dict[str, Any] = {
            "plants/done": self.done["plants"], "plants/valid": self.valid.astype(np.int8),
            "plants/reasons": strings(self.plant_reasons),
            "gamma/done": self.done["gamma"], "gamma/gamma_opt": self.gamma_opt,
            "gamma/reasons": strings(self.gamma_reasons),
            "controller/done": self.done["controller"],
            "controller/reasons": strings(self.ctrl_reasons),
        }
        for s in STAGES:
            arrays[f"digests/{s}"] = strings(self.digest[s])
        for k, v in (self.plant or {}).items():
            arrays[f"plants/matrices/{k}"] = v
        for label, names in (self.names or {}).items():
            arrays[f"plants/names/{label}"] = strings(list(names))
        if self.signature is not None:
            for label, names in zip(("states", "inputs", "outputs"), self.signature,
                                    strict=True):
                arrays[f"plants/signature/{label}"] = strings(list(names))
        if self.controller is not None:
            for k, v in self.controller.items():
                arrays[f"controller/matrices/{k}"] = v
            for k, v in (self.pieces or {}).items():
                arrays[f"controller/pieces/{k}"] = v
        attrs = {"fingerprint": self.fingerprint, "points": self.N, "chunks": len(self.chunks),
                 "chunk_size": self.chunk_size, "controller_gamma": self.ctrl_gamma}
        return arrays, attrs

    def load(self, arrays: dict, attrs: dict, where: Path) -> None:
        """Take the finished chunks of a partial file, after checking every chunk's digest.

        Raises
        ------
        InputError
            the file belongs to another design or envelope, lacks a table, has tables
            of the wrong size, or a finished chunk does not match its digest (damaged or
            edited data are never carried into a family).
        """
        if attrs.get("fingerprint") != self.fingerprint or attrs.get("points") != self.N or \
                attrs.get("chunk_size") != self.chunk_size:
            raise InputError(f"partial file {where} belongs to a different design or envelope; "
                             "delete it or run without --resume")
        n = len(self.chunks)
        try:
            done = {s: np.asarray(arrays[f"{s}/done"], dtype=np.int8) for s in STAGES}
            digest = {s: [str(v) for v in np.atleast_1d(arrays[f"digests/{s}"])] for s in STAGES}
            flags = np.asarray(arrays["plants/valid"])
            valid = flags.astype(bool)
            plant_reasons = [str(r) for r in np.atleast_1d(arrays["plants/reasons"])]
            gamma_opt = np.asarray(arrays["gamma/gamma_opt"], dtype=float)
            gamma_reasons = [str(r) for r in np.atleast_1d(arrays["gamma/reasons"])]
            ctrl_reasons = [str(r) for r in np.atleast_1d(arrays["controller/reasons"])]
            ctrl_gamma = float(attrs.get("controller_gamma", float("nan")))
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"partial file {where} lacks or garbles {exc}; delete it and run "
                             "without --resume") from None
        group = lambda prefix: {k[len(prefix):]: np.asarray(v, dtype=float)  # noqa: E731
                                for k, v in arrays.items() if k.startswith(prefix)}
        plant, mats, pcs = (group("plants/matrices/"), group("controller/matrices/"),
                            group("controller/pieces/"))
        names = {k[len("plants/names/"):]: tuple(str(x) for x in np.atleast_1d(v))
                 for k, v in arrays.items() if k.startswith("plants/names/")}
        sig = [tuple(str(x) for x in np.atleast_1d(arrays[f"plants/signature/{label}"]))
               for label in ("states", "inputs", "outputs")
               if f"plants/signature/{label}" in arrays]
        sizes_ok = (all(d.shape == (n,) for d in done.values())
                    and all(len(d) == n for d in digest.values())
                    and valid.shape == (self.N,) and gamma_opt.shape == (self.N,)
                    and len(plant_reasons) == len(gamma_reasons) == len(ctrl_reasons) == self.N
                    and all(v.ndim >= 1 and v.shape[0] == self.N
                            for g in (plant, mats, pcs) for v in g.values())
                    and (not plant or set(plant) == set(PLANT_KEYS)))
        flags_ok = all(np.isin(t, (0, 1)).all() for t in (flags, *done.values()))
        if not sizes_ok or not flags_ok:
            raise InputError(f"partial file {where} has inconsistent tables (damaged or "
                             "edited; no digest can vouch for it); delete it and run without "
                             "--resume")
        self.valid, self.plant_reasons, self.plant = valid, plant_reasons, plant or None
        self.names, self.signature = names or None, tuple(sig) if len(sig) == 3 else None
        self.gamma_opt, self.gamma_reasons = gamma_opt, gamma_reasons
        self.ctrl_gamma, self.ctrl_reasons = ctrl_gamma, ctrl_reasons
        self.controller, self.pieces = (mats or None), (pcs if mats else None)
        for s in STAGES:
            self.done[s] = done[s]
            self.digest[s] = digest[s]
            for c in np.flatnonzero(done[s]):
                if digest[s][c] != self.chunk_digest(s, int(c)):
                    raise InputError(f"partial file {where}: chunk {int(c)} of stage '{s}' does "
                                     "not match its digest (damaged or edited); delete the "
                                     "file and run without --resume")


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


# ----------------------------------------------------------------------------- the stages
class _Stages:
    """One design run: the three chunked stages on a :class:`_PartialState`."""

    def __init__(self, state: _PartialState, writer: _PartialWriter, run: DesignRun,
                 points: np.ndarray, variables, jobs: int, cluster: Any,
                 progress: Progress | None):
        self.state, self.writer, self.run = state, writer, run
        self.points, self.variables = points, variables
        self.jobs, self.cluster, self.progress = jobs, cluster, progress

    def _report(self, stage: str, done: int, total: int) -> None:
        if self.progress:
            self.progress(stage, done, total)

    def _timed(self, stage: str, t0: float) -> None:
        self.run.stage_seconds[stage] = self.run.stage_seconds.get(stage, 0.0) + \
            time.perf_counter() - t0

    def plants(self, spec, linear) -> None:
        """Stage 1: model evaluation and generalized plants, chunk by chunk."""
        st, t0 = self.state, time.perf_counter()
        todo = [c for c in range(len(st.chunks)) if not st.done["plants"][c]]
        total = st.N
        done = total - sum(st.chunks[c].size for c in todo)
        self.run.resumed_plants = done
        self._report("plants", done, total)

        def make(c: int) -> tuple:
            idx = st.chunks[c]
            lin = None
            if linear is not None:
                lin = {"A": linear.A[idx], "B": linear.B[idx], "C": linear.C[idx],
                       "D": linear.D[idx], "names": (linear.state_names, linear.input_names,
                                                     linear.output_names)}
            return self.points[idx], int(idx[0]), lin

        tasks = _Tasks(todo, make)
        for t, res in run_chunks(plant_chunk, tasks, jobs=self.jobs, cluster=self.cluster,
                                 shared=(spec,)):
            c = todo[t]
            idx = st.chunks[c]
            self._take_plants(c, idx, res)
            st.finish("plants", c)
            self.run.computed_plants += idx.size
            done += idx.size
            self.writer.mark()
            self._report("plants", done, total)
        self.writer.flush()
        self._timed("plants", t0)

    def _take_plants(self, c: int, idx: np.ndarray, res: dict) -> None:
        st = self.state
        if res["signature"] is not None:
            if st.signature is None:
                st.signature = res["signature"]
            elif st.signature != res["signature"]:
                where = point_text([v.name for v in self.variables], self.points[idx[0]])
                raise InputError(f"the plants of the chunk starting at point {int(idx[0])} "
                                 f"({where}) have state/input/output names "
                                 f"{list(res['signature'])}, earlier points "
                                 f"{list(st.signature)}; use the same names at every point")
        if res["names"] and st.names is None:
            st.names = {k: tuple(v) for k, v in res["names"].items()}
        stack = res["stack"]
        if stack is not None:
            if st.plant is None:
                st.plant = {k: np.zeros((st.N,) + v.shape[1:]) for k, v in stack.items()}
            for k, v in stack.items():
                if st.plant[k].shape[1:] != v.shape[1:]:
                    where = point_text([x.name for x in self.variables], self.points[idx[0]])
                    raise InputError(f"generalized plants from point {int(idx[0])} ({where}) "
                                     f"have {k} of shape {v.shape[1:]}, earlier points "
                                     f"{st.plant[k].shape[1:]}; every point needs the same sizes")
                st.plant[k][idx] = v
        st.valid[idx] = res["valid"]
        for i, r in zip(idx, res["reasons"], strict=True):
            st.plant_reasons[i] = str(r)

    def _stack(self, idx: np.ndarray) -> dict[str, np.ndarray]:
        return {k: self.state.plant[k][idx] for k in PLANT_KEYS}

    def _run(self, stage: str, label: str, mask: np.ndarray, func, arg, take) -> None:
        """One of the synthesis stages on the points of ``mask``: the chunks not finished
        yet (a chunk without such points is finished at once) run on the workers and
        ``take(points, chunk, result)`` stores each result."""
        st, t0 = self.state, time.perf_counter()
        todo, pick = [], {}
        for c, idx in enumerate(st.chunks):
            if st.done[stage][c]:
                continue
            sel = idx[mask[idx]]
            if sel.size == 0:
                st.finish(stage, c)
                continue
            todo.append(c)
            pick[c] = sel
        total = int(mask.sum())
        done = total - sum(pick[c].size for c in todo)
        setattr(self.run, f"resumed_{label}", done)
        self._report(label, done, total)
        tasks = _Tasks(todo, lambda c: (self._stack(pick[c]), arg))
        for t, res in run_chunks(func, tasks, jobs=self.jobs, cluster=self.cluster):
            c = todo[t]
            take(pick[c], c, res)
            st.finish(stage, c)
            setattr(self.run, f"computed_{label}",
                    getattr(self.run, f"computed_{label}") + pick[c].size)
            done += pick[c].size
            self.writer.mark()
            self._report(label, done, total)
        self.writer.flush()
        self._timed(label, t0)

    def gamma(self, rtol: float) -> None:
        """Stage 2: the optimal gamma of every valid point."""
        st = self.state

        def take(sel: np.ndarray, _c: int, res) -> None:
            gam, reasons = res
            st.gamma_opt[sel] = gam
            for i, r in zip(sel, reasons, strict=False):
                st.gamma_reasons[i] = r

        self._run("gamma", "gamma", st.valid, gamma_chunk, rtol, take)

    def controllers(self, status_ok: np.ndarray, gamma: float) -> None:
        """Stage 3: the central controller at the common gamma at every ok point."""
        st = self.state
        if not (st.ctrl_gamma == gamma):  # new gamma (or nan): earlier controllers are stale
            st.reset_controllers(gamma)

        def take(sel: np.ndarray, c: int, res) -> None:
            ctrl, pieces, creasons = res
            for i, reason in zip(sel, creasons, strict=True):
                st.ctrl_reasons[i] = reason
            if not ctrl:
                return
            if st.controller is None:
                st.controller = {k: np.zeros((st.N,) + v.shape[1:]) for k, v in ctrl.items()}
                st.pieces = {k: np.zeros((st.N,) + v.shape[1:]) for k, v in pieces.items()}
            good = np.array([not r for r in creasons], dtype=bool)
            for k, v in ctrl.items():
                st.controller[k][sel[good]] = v[good]
            for k, v in pieces.items():
                if k not in st.pieces or st.pieces[k].shape[1:] != v.shape[1:]:
                    raise InputError(f"observer pieces '{k}' have shape {v.shape[1:]} in "
                                     f"chunk {c}, unlike other chunks; report this as a bug")
                st.pieces[k][sel[good]] = v[good]

        self._run("controller", "controllers", status_ok, controller_chunk, gamma, take)


def _family_from_state(st: _PartialState, stages: _Stages, *, variables, policy: str,
                       margin: float, gamma_value: float | None, breakpoints, grid_index,
                       design_text: str, base_dir: str, rtol: float,
                       names_given: dict | None = None) -> Family:
    """The gamma and controller stages on the plants of ``st`` and the resulting family."""
    N = st.N
    valid = st.valid.copy()
    if st.plant is None or not valid.any():
        first = next((r for r in st.plant_reasons if r), "unknown reason")
        raise InputError(f"no generalized plant could be built at any point (first reason: "
                         f"{first}); fix the model or the design file")
    stages.gamma(rtol)
    status_ok = valid & np.isfinite(st.gamma_opt) & np.array([not r for r in st.gamma_reasons])
    reasons = [st.plant_reasons[i] if not valid[i] else
               (f"gamma-iteration: {st.gamma_reasons[i]}" if not status_ok[i] else "")
               for i in range(N)]
    gamma_opt = np.where(status_ok, st.gamma_opt, np.nan)
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
    stages.controllers(status_ok, gamma)
    for i in np.flatnonzero(status_ok):
        if st.ctrl_reasons[i]:
            reasons[i] = f"controller at gamma={gamma:.6g}: {st.ctrl_reasons[i]}"
            status_ok[i] = False
    if not status_ok.any() or st.controller is None:
        first = next(r for r in reasons if r)
        raise InputError(f"no controller could be built at gamma={gamma:.6g} (first: {first}); "
                         "raise the gamma margin")
    controller = {k: np.where(_mask(status_ok, v), v, 0.0) for k, v in st.controller.items()}
    pieces = {k: np.where(_mask(status_ok, v), v, 0.0) for k, v in (st.pieces or {}).items()}
    plant_out = {k: np.where(_mask(valid, v), v, 0.0) for k, v in st.plant.items()}
    names = names_given if names_given is not None else (st.names or {})
    return Family(
        variables=tuple(variables), points=stages.points,
        status=np.array(["ok" if s else "failed" for s in status_ok], dtype=str),
        reasons=tuple(reasons), gamma_opt=gamma_opt, gamma=gamma, plant=plant_out,
        controller=controller, pieces=pieces,
        measured_names=tuple(names.get("measured", ())),
        control_names=tuple(names.get("controls", ())),
        exogenous_names=tuple(names.get("exogenous", ())),
        performance_names=tuple(names.get("performance", ())),
        state_names=tuple(names.get("states", ())),
        breakpoints=breakpoints, grid_index=grid_index, design_text=design_text,
        design_base_dir=str(base_dir) if base_dir else "",
        units=_units_of(names))


def _units_of(names: dict) -> dict[str, tuple[str, ...]]:
    """Signal units from a names mapping: its "units" mapping (given by a caller) or the
    "units/<group>" entries the plant stage adds (kept in the partial file)."""
    out = {k[len("units/"):]: tuple(v) for k, v in names.items() if k.startswith("units/")}
    out.update({k: tuple(v) for k, v in dict(names.get("units") or {}).items()})
    return out


def _mask(ok: np.ndarray, v: np.ndarray) -> np.ndarray:
    return ok.reshape((-1,) + (1,) * (np.ndim(v) - 1))


def _open_state(N: int, chunk_size: int, fingerprint: str, partial: Path | None,
                resume: bool, run: DesignRun) -> tuple[_PartialState, _PartialWriter]:
    state = _PartialState(N, _chunks(N, chunk_size), fingerprint, chunk_size)
    if partial is not None:
        _remove_stale_temps(partial)
        if resume:
            loaded = read_partial(partial)
            if loaded is not None:
                state.load(*loaded, partial)
            else:
                run.notes.append(f"no partial file {partial} found; starting from the beginning")
    return state, _PartialWriter(partial, state)


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
    stack = {k: np.zeros((N,) + shapes[k]) for k in PLANT_KEYS}
    for i in np.flatnonzero(valid):
        for k in PLANT_KEYS:
            if np.shape(getattr(plants[i], k)) != shapes[k]:
                where = point_text([v.name for v in variables], points[i])
                raise InputError(f"generalized plant at point {i} ({where}) has {k} of shape "
                                 f"{np.shape(getattr(plants[i], k))}, other points {shapes[k]}; "
                                 "every point needs the same sizes")
            stack[k][i] = getattr(plants[i], k)
    h = hashlib.sha256()
    for k in PLANT_KEYS:
        h.update(stack[k].tobytes())
    _hash_strings(h, build_reasons)
    fp = _fingerprint(design_text, points, h.hexdigest(), rtol, chunk_size)
    run = DesignRun(family=None)  # type: ignore[arg-type]
    state, writer = _open_state(N, chunk_size, fp, Path(partial) if partial else None, resume,
                                run)
    state.plant, state.valid = stack, valid
    state.plant_reasons = [str(r) for r in build_reasons]
    stages = _Stages(state, writer, run, points, variables, jobs, cluster, progress)
    run.family = _family_from_state(state, stages, variables=variables, policy=policy,
                                    margin=margin, gamma_value=gamma_value,
                                    breakpoints=breakpoints, grid_index=grid_index,
                                    design_text=design_text, base_dir=base_dir, rtol=rtol,
                                    names_given=names)
    run.seconds = time.perf_counter() - t0
    return run


@dataclass(frozen=True)
class PlantSet:
    """The generalized plants of a design's envelope, stacked: ``plant`` maps the nine
    keys to (N, rows, cols) arrays (zeros where ``valid`` is False, ``reasons`` says why),
    ``names`` the channel names."""

    points: np.ndarray
    plant: dict
    valid: np.ndarray
    reasons: tuple[str, ...]
    names: dict


def plants_for(spec, jobs: int = 1, cluster: Any = None, chunk_size: int = CHUNK_SIZE,
               progress: Progress | None = None) -> PlantSet:
    """The first stage of :func:`run_design` alone: the model (or the operating-point
    file) and the weights at every design point, chunk by chunk on the workers.

    Only the stacked results are kept, so the memory beyond them stays that of a few
    chunks whatever the number of points.
    """
    src = _source(spec)
    N = src.points.shape[0]
    run = DesignRun(family=None)  # type: ignore[arg-type]
    state, writer = _open_state(N, chunk_size, "", None, False, run)
    _Stages(state, writer, run, src.points, spec.variables, jobs, cluster,
            progress).plants(spec, src.linear)
    return PlantSet(src.points, state.plant or {}, state.valid, tuple(state.plant_reasons),
                    state.names or {})


def run_design(spec, out: str | os.PathLike | None = None, jobs: int = 1, cluster: Any = None,
               resume: bool = False, progress: Progress | None = None, fit: bool = True,
               rtol: float = 1e-4, chunk_size: int = CHUNK_SIZE,
               costly_kinds_max_points: int | None = None) -> DesignRun:
    """Design the family of ``spec`` and return the :class:`DesignRun` with the counts.

    The stages run chunk by chunk (model evaluation and generalized plants, optimal
    gamma, controllers at the common gamma), each on the workers of ``jobs`` /
    ``cluster``, with every finished chunk kept in the partial file (see
    :func:`design_family`); then the interpolant is chosen and fitted and the family
    written. ``run.stage_seconds`` holds the time of each stage.
    """
    out = Path(out) if out is not None else None
    if out is not None and not (out.parent if str(out.parent) else Path(".")).is_dir():
        raise InputError(f"output folder {out.parent} does not exist; create it first")
    with session(cluster) as client:  # one connection for every stage
        return _run_design(spec, out, jobs, client, resume, progress, fit, rtol, chunk_size,
                           costly_kinds_max_points)


def _run_design(spec, out: Path | None, jobs: int, cluster: Any, resume: bool,
                progress: Progress | None, fit: bool, rtol: float, chunk_size: int,
                costly_kinds_max_points: int | None) -> DesignRun:
    t0 = time.perf_counter()
    prestart(jobs, cluster)  # worker start-up overlaps with reading the envelope
    src = _source(spec)
    points = src.points
    N = points.shape[0]
    if N == 0:
        raise InputError("the envelope holds no operating points; give a grid or a point file")
    from .sources import model_source_digest

    fp = _fingerprint(spec.text, points, model_source_digest(spec), rtol, chunk_size)
    run = DesignRun(family=None)  # type: ignore[arg-type]
    partial = partial_path(out) if out is not None else None
    state, writer = _open_state(N, chunk_size, fp, partial, resume, run)
    stages = _Stages(state, writer, run, points, spec.variables, jobs, cluster, progress)
    stages.plants(spec, src.linear)
    run.family = _family_from_state(
        state, stages, variables=spec.variables, policy=spec.gamma.policy,
        margin=spec.gamma.margin, gamma_value=spec.gamma.value, breakpoints=src.breakpoints,
        grid_index=src.grid_index, design_text=spec.text, base_dir=str(spec.base_dir),
        rtol=rtol)
    run.notes[:0] = src.notes
    run.seconds = time.perf_counter() - t0
    if fit:
        t1 = time.perf_counter()
        limit = (spec.interpolation.costly_kinds_max_points if costly_kinds_max_points is None
                 else costly_kinds_max_points)
        _fit_interpolant(run, spec, jobs, cluster, limit, progress)
        run.stage_seconds["fit"] = time.perf_counter() - t1
    if out is not None:
        t1 = time.perf_counter()
        if progress:
            progress("write", 0, 1)
        _remove_stale_temps(out)
        write_family(out, run.family)
        try:
            os.unlink(partial_path(out))
        except FileNotFoundError:
            pass
        run.stage_seconds["write"] = time.perf_counter() - t1
        if progress:
            progress("write", 1, 1)
    run.seconds = time.perf_counter() - t0
    return run


def _fit_interpolant(run: DesignRun, spec, jobs: int = 1, cluster: Any = None,
                     limit: int = 200, progress: Progress | None = None) -> None:
    from .interpolate import evidence_notes, fit_for_family

    form, kind = spec.interpolation.form, spec.interpolation.kind
    try:
        interpolant, evidence = fit_for_family(run.family, form, kind, progress=progress,
                                               costly_kinds_max_points=limit, jobs=jobs,
                                               cluster=cluster)
    except ScheduleError as exc:
        run.interpolant_error = _one_line(exc)
        run.family.extra["interpolant_error"] = run.interpolant_error
        return
    run.family.interpolant = interpolant
    for k, v in (evidence or {}).items():
        run.family.extra[str(k)] = v
    run.notes.extend(evidence_notes(evidence or {}))


def design_family(spec, out: str | os.PathLike | None = None, jobs: int = 1,
                  cluster: Any = None, resume: bool = False,
                  progress: Progress | None = None) -> Family:
    """Design the controller family of ``spec`` at a common gamma; write it to ``out``.

    Parameters
    ----------
    spec : schedule.design_file.DesignSpec.
    out : family file to write (atomically); the partial results live in
        :func:`partial_path` ``(out)`` meanwhile, each finished chunk with its own
        SHA-256 digest (checked on resume). None: return the family only.
    jobs : local worker processes (joblib/loky); ``cluster``: a dask scheduler
        address. Results are identical bit for bit for every choice.
    resume : continue an interrupted run from its partial file.
    progress : callback ``(stage, done, total)``, e.g. a
        :class:`schedule.progress.ProgressBar`.

    Returns
    -------
    Family (also written to ``out``), with the interpolant fitted by
    :func:`schedule.interpolate.fit_for_family`.

    Raises
    ------
    InputError
        No point could be synthesized, sizes differ between points, or the
        partial file does not belong to this design or fails its digests.
    """
    return run_design(spec, out, jobs=jobs, cluster=cluster, resume=resume,
                      progress=progress).family


# ----------------------------------------------------------------------------- estimate
@dataclass(frozen=True)
class Estimate:
    """What a design run will take, extrapolated from a small timed sample.

    ``seconds`` is the whole run and ``stage_seconds`` its parts ("plants", "gamma",
    "controllers", "fit"); ``memory_bytes`` the peak memory of the process;
    ``sample`` the number of points timed and ``workers`` the workers assumed.
    """

    points: int
    seconds: float
    stage_seconds: dict
    memory_bytes: int
    sample: int
    workers: int

    def text(self) -> str:
        return (f"{self.points} points, about {_duration(self.seconds)} and "
                f"{self.memory_bytes / 2**20:.0f} MB (timed on {self.sample} points, "
                f"{self.workers} worker{'s' if self.workers > 1 else ''})")

    def needs_confirmation(self) -> str:
        """A reason to ask before starting ('' when the run is small enough): more than
        :data:`CONFIRM_SECONDS`, or more than :data:`CONFIRM_MEMORY_FRACTION` of the memory
        now available."""
        why = []
        if self.seconds > CONFIRM_SECONDS:
            why.append(f"longer than {_duration(CONFIRM_SECONDS)}")
        avail = _available_memory()
        if avail and self.memory_bytes > CONFIRM_MEMORY_FRACTION * avail:
            why.append(f"more than {CONFIRM_MEMORY_FRACTION:.0%} of the "
                       f"{avail / 2**30:.1f} GB available")
        return " and ".join(why)

    def to_dict(self) -> dict:
        return {"points": self.points, "seconds": round(self.seconds, 3),
                "stage_seconds": {k: round(v, 3) for k, v in self.stage_seconds.items()},
                "memory_bytes": int(self.memory_bytes), "sample": self.sample,
                "workers": self.workers}


CONFIRM_SECONDS = 600.0  # `design` asks for --yes above this estimated time ...
CONFIRM_MEMORY_FRACTION = 0.5  # ... or above this fraction of the available memory
ESTIMATE_SAMPLE = 64  # points timed for the estimate ...
ESTIMATE_BUDGET = 2.0  # ... or fewer (at least 8) once their plants took this many seconds
PARALLEL_EFFICIENCY = 0.85  # assumed speed-up per worker beyond the first
CHOICE_OVERHEAD = 2.5e-4  # s per point and candidate besides assembly and norms (measured)


def _duration(seconds: float) -> str:
    s = int(round(seconds))
    if s < 60:
        return f"{max(s, 1)} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {(s % 3600) // 60:02d} min"


def _available_memory() -> int:
    """Bytes of memory available to new work (MemAvailable on Linux), 0 when unknown."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return 0


def _resident_memory() -> int:
    """Bytes of memory this process holds now (resident set), 0 when unknown."""
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return 0


def estimate_design(spec, jobs: int = 1, cluster: Any = None, fit: bool = True,
                    sample: int = ESTIMATE_SAMPLE, rtol: float = 1e-4,
                    costly_kinds_max_points: int | None = None) -> Estimate:
    """Estimate the time and memory of :func:`run_design` from a timed sample of points.

    The sample (two runs of ``sample / 2`` consecutive points, at a quarter and at three
    quarters of the envelope, so that neighbours warm-start each other as they do in the
    real chunks; fewer when the model is slow, see :data:`ESTIMATE_BUDGET`) runs every
    stage in this process: model evaluation and generalized plants, the optimal gamma, the
    central controller at the sample's own common gamma, and, with ``fit``, one
    observer-form assembly and one closed-loop norm per point (the per-point work of
    the leave-one-out choice). The per-point times are scaled to the envelope and
    divided among the workers; the choice counts one assembly per observer-form
    candidate and two norms per point (the candidates the ranking needs), and the
    kernel kinds' cubic fits where they are tried. Memory is the process's present
    size plus the family's arrays, the working copies of the stages and the choice's
    predictions per point. The sample's results are not kept.
    """
    from .parallel import worker_count

    src = _source(spec)
    N = src.points.shape[0]
    if N == 0:
        raise InputError("the envelope holds no operating points; give a grid or a point file")
    # two runs of consecutive points, at a quarter and three quarters of the envelope:
    # neighbours warm-start each other in a chunk as they do in the real run
    half = max(1, min(N, int(sample)) // 2)
    starts = sorted({min(max(0, int(N * q) - half // 2), max(0, N - half)) for q in (0.25, 0.75)})
    idx = np.unique(np.concatenate([np.arange(a, min(N, a + half)) for a in starts]))
    lin = None
    if src.linear is not None:
        ops = src.linear
        lin = {"A": ops.A[idx], "B": ops.B[idx], "C": ops.C[idx], "D": ops.D[idx],
               "names": (ops.state_names, ops.input_names, ops.output_names)}
    warm = {k: v[:1] for k, v in lin.items() if k != "names"} if lin else None
    if warm is not None:
        warm["names"] = lin["names"]
    plant_chunk(spec, src.points[idx[:1]], 0, warm)  # model import and first calls
    parts, taken, t0 = [], 0, time.perf_counter()
    while taken < idx.size and (taken < 8 or time.perf_counter() - t0 < ESTIMATE_BUDGET):
        sl = slice(taken, min(idx.size, taken + 8))
        sub = None if lin is None else {k: (v[sl] if k != "names" else v) for k, v in
                                        lin.items()}
        parts.append(plant_chunk(spec, src.points[idx[sl]], 0, sub))
        taken = sl.stop
    t_plant = (time.perf_counter() - t0) / taken
    idx = idx[:taken]
    res = _join_plant_chunks(parts)
    valid = res["valid"]
    stage = {"plants": t_plant * N}
    per_point = {"gamma": 0.0, "controllers": 0.0, "assemble": 0.0, "norm": 0.0}
    sizes = 0
    if res["stack"] is not None and valid.any():
        stack = {k: v[valid] for k, v in res["stack"].items()}
        sizes = sum(int(np.prod(v.shape[1:])) for v in stack.values())
        first = {k: v[:1] for k, v in stack.items()}
        g1, _ = gamma_chunk(first, rtol)  # first calls (imports, caches) are not timed
        if np.isfinite(g1[0]):
            controller_chunk(first, float(g1[0]) * 1.1)
        t0 = time.perf_counter()
        gam, _reasons = gamma_chunk(stack, rtol)
        per_point["gamma"] = (time.perf_counter() - t0) / valid.sum()
        ok = np.isfinite(gam)
        if ok.any():
            g = (spec.gamma.value if spec.gamma.policy == "fixed" and spec.gamma.value
                 else float(np.max(gam[ok])) * (1.0 + spec.gamma.margin))
            sub = {k: v[ok] for k, v in stack.items()}
            t0 = time.perf_counter()
            ctrl, pieces, creasons = controller_chunk(sub, g)
            per_point["controllers"] = (time.perf_counter() - t0) / ok.sum()
            if ctrl:
                good = np.array([not r for r in creasons], dtype=bool)
                sizes += sum(int(np.prod(v.shape[1:])) for v in (*ctrl.values(),
                                                                 *pieces.values()))
                if fit and good.any():
                    per_point["assemble"], per_point["norm"] = _choice_costs(
                        {k: v[good] for k, v in sub.items()},
                        {k: v[good] for k, v in ctrl.items()},
                        {k: v[good] for k, v in pieces.items()}, g)
    workers = worker_count(jobs, cluster)
    speed = 1.0 + PARALLEL_EFFICIENCY * (workers - 1)
    n_ok = N * (valid.mean() if valid.size else 1.0)
    stage["plants"] /= speed
    stage["gamma"] = per_point["gamma"] * n_ok / speed
    stage["controllers"] = per_point["controllers"] * n_ok / speed
    limit = (spec.interpolation.costly_kinds_max_points if costly_kinds_max_points is None
             else costly_kinds_max_points)
    fit_bytes = 0
    if fit:
        stage["fit"], fit_bytes = _choice_estimate(spec, n_ok, per_point, src, limit, speed,
                                                   sizes)
    memory = _resident_memory() + int(n_ok * 8 * sizes * 3) + fit_bytes
    stage = {k: float(v) for k, v in stage.items()}
    return Estimate(N, float(sum(stage.values())), stage, memory, int(idx.size), workers)


def envelope_size(spec) -> int:
    """The number of design points of ``spec`` (nothing evaluated)."""
    return int(_source(spec).points.shape[0])


def _join_plant_chunks(parts: list[dict]) -> dict:
    valid = np.concatenate([p["valid"] for p in parts])
    stacks = [p["stack"] for p in parts]
    stack = None
    if any(st is not None for st in stacks):
        template = next(st for st in stacks if st is not None)
        stack = {k: np.concatenate([st[k] if st is not None else
                                    np.zeros((p["valid"].size,) + v.shape[1:])
                                    for st, p in zip(stacks, parts, strict=True)])
                 for k, v in template.items()}
    return {"valid": valid, "stack": stack}


def _choice_costs(plant: dict, ctrl: dict, pieces: dict, gamma: float) -> tuple[float, float]:
    """Seconds per point of one observer-form assembly and one closed-loop norm."""
    from .hinf import ObserverPieces, assemble_controller
    from .interpolate import loop_norm_chunk
    from .plant import GeneralizedPlant

    n = plant["A"].shape[0]
    t0 = time.perf_counter()
    for i in range(n):
        try:
            assemble_controller(GeneralizedPlant.from_arrays({k: v[i] for k, v in plant.items()}),
                                ObserverPieces.from_arrays({k: v[i] for k, v in pieces.items()}),
                                gamma)
        except ScheduleError:
            pass
    t_asm = (time.perf_counter() - t0) / n
    from .check import closed_loop_many

    t0 = time.perf_counter()
    try:
        loop_norm_chunk(*closed_loop_many(plant, ctrl))
    except ScheduleError:
        pass
    return t_asm, (time.perf_counter() - t0) / n


def _choice_estimate(spec, n_ok: float, per_point: dict, src: _Source, limit: int,
                     speed: float, sizes: int) -> tuple[float, int]:
    """Seconds and extra bytes of the interpolant choice (see :func:`estimate_design`)."""
    from .interpolants import GRID_KINDS, KINDS
    from .interpolate import CUBIC_KINDS, costly_kinds

    kind = spec.interpolation.kind
    kinds = [kind] if kind != "auto" else [k for k in KINDS if k not in GRID_KINDS
                                           or src.breakpoints is not None]
    if kind == "auto" and n_ok > limit:
        kinds = [k for k in kinds if k not in costly_kinds(len(spec.variables))]
    forms = 2 if spec.interpolation.form == "auto" else 1
    observer = len(kinds) if spec.interpolation.form in ("auto", "observer") else 0
    seconds = n_ok * (observer * per_point["assemble"] + 2.0 * per_point["norm"]
                      + CHOICE_OVERHEAD * len(kinds) * forms) / speed  # all on the workers
    cubic = [k for k in kinds if k in CUBIC_KINDS]
    seconds += len(cubic) * 3 * 2.5e-7 * n_ok ** 3  # kernel fits: measured ~2.5e-7 N^3 s
    per_candidate = 8 * (sizes + 400)  # predictions, closed loop and errors per point
    return seconds, int(n_ok * per_candidate * len(kinds) * forms)


# ----------------------------------------------------------------------------- refinement
def _gamma_of(plants: Sequence, jobs: int, cluster: Any, rtol: float,
              chunk_size: int = CHUNK_SIZE, progress: Progress | None = None
              ) -> tuple[np.ndarray, list[str]]:
    """gamma_opt and reasons for a list of plants (None entries are skipped)."""
    M = len(plants)
    gam, reasons = np.full(M, np.nan), [""] * M
    valid = np.array([p is not None for p in plants], dtype=bool)
    chunks = [c[valid[c]] for c in _chunks(M, chunk_size)]
    chunks = [c for c in chunks if c.size]
    tasks = [(_stack_plants(plants, c), rtol) for c in chunks]
    done, total = 0, sum(c.size for c in chunks)
    if progress:
        progress("gamma", 0, total)
    for t, (g, r) in run_chunks(gamma_chunk, tasks, jobs=jobs, cluster=cluster):
        gam[chunks[t]] = g
        for i, text in zip(chunks[t], r, strict=False):
            reasons[i] = text
        done += chunks[t].size
        if progress:
            progress("gamma", done, total)
    return gam, reasons


def _controllers_of(plants: Sequence, idx: np.ndarray, gamma: float, jobs: int, cluster: Any,
                    chunk_size: int = CHUNK_SIZE, progress: Progress | None = None
                    ) -> dict[int, tuple]:
    chunks = [c for c in (idx[s:s + chunk_size] for s in range(0, len(idx), chunk_size))
              if c.size]
    tasks = [(_stack_plants(plants, c), gamma) for c in chunks]
    out: dict[int, tuple] = {}
    if progress:
        progress("controllers", 0, len(idx))
    for t, (ctrl, pieces, reasons) in run_chunks(controller_chunk, tasks, jobs=jobs,
                                                 cluster=cluster):
        if progress:
            progress("controllers", len(out) + len(chunks[t]), len(idx))
        for j, (i, reason) in enumerate(zip(chunks[t], reasons, strict=True)):
            if reason:
                out[int(i)] = (None, None, reason)
            else:
                out[int(i)] = ({k: v[j] for k, v in ctrl.items()},
                               {k: v[j] for k, v in pieces.items()}, "")
    return out


def extend_family(family: Family, spec, new_points, jobs: int = 1,
                  cluster: Any = None, rtol: float = 1e-4, breakpoints=None,
                  progress: Progress | None = None) -> Family:
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
    set becomes scattered). ``progress(stage, done, total)`` is told as the model is
    evaluated ("plants") and as gamma_opt and the controllers are computed.

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
    for i, row in enumerate(new):
        if progress:
            progress("plants", i, len(new))
        point = dict(zip(family.variable_names, row.tolist(), strict=True))
        lp, reason = evaluate_model(model, point)
        linear.append(lp)
        lreasons.append(reason or "")
    if progress:
        progress("plants", len(new), len(new))
    new_plants, new_reasons, _ = _generalized(spec, new, linear, lreasons)
    M, N = len(new), len(family.points)
    new_opt, greasons = _gamma_of(new_plants, jobs, cluster, rtol, progress=progress)
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
    results = _controllers_of(plants, todo, gamma, jobs, cluster, progress=progress)
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
