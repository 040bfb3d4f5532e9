"""Time simulation of a nonlinear model under the exported scheduled discrete controller.

The loop (sampled-data, sample time T of the table)::

    at t_k = t_0 + k T:  p_k = trajectory point,  y_k = measured(x) - reference(t_k)
                         u_k = u_trim + controller.step(y_k, p_k)      (table runtime)
    on [t_k, t_k + T):   plant integrated by classical fourth-order Runge-Kutta with
                         ``substeps`` fixed steps, controls held (zero-order hold),
                         scheduling point and exogenous inputs following the trajectory

Signals given to the controller are deviations: each measured output minus its
reference (for a position, the position error, so the controller regulates the error
to zero) and controls are added to the trim controls. The controller state is
carried across schedule changes (never reset).

Actuator limits: the command the controller returns is already limited (rate, then
magnitude; :class:`schedule.export.TableController` with the table's limits, which come
from the design file's ``[[limits]]``), so the drive receives at most what it can
deliver. With ``anti_windup`` (the default) the controller's observer is fed the limited
command; :func:`anti_windup_comparison` runs a reference step with and without that
path to show the wound-up overshoot it removes. Rates of the scheduling variables that
the model asks for (``<variable>_rate``, ``<variable>_accel`` in
``NonlinearModel.rate_terms``) are finite differences of the trajectory.

Runge-Kutta: Hairer, Norsett and Wanner, *Solving Ordinary Differential Equations I*,
2nd ed., Springer 1993, sec. II.1 (the classical method, order 4).
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError, NumericalError
from .export.runtime import TableController

_DIVERGED = 1e8


@dataclass(frozen=True)
class Trajectory:
    """Scheduling values, references and exogenous inputs over time.

    Attributes
    ----------
    time : (K,) strictly increasing seconds.
    points : (K, d) scheduling values, columns in ``variable_names`` order.
    variable_names : scheduling-variable names.
    references : measured-output name -> (K,) reference (missing = trim value).
    inputs : exogenous model-input name -> (K,) value (missing = trim value).
    """

    time: np.ndarray
    points: np.ndarray
    variable_names: tuple[str, ...]
    references: dict = field(default_factory=dict)
    inputs: dict = field(default_factory=dict)

    def at(self, t) -> np.ndarray:
        """Scheduling values at times ``t`` (linear in time, held beyond the ends)."""
        t = np.atleast_1d(np.asarray(t, dtype=float))
        return np.stack([np.interp(t, self.time, self.points[:, j])
                         for j in range(self.points.shape[1])], axis=-1)


@dataclass(frozen=True)
class SimulationResult:
    """Sampled time series of one simulation (index k = sample t_k)."""

    time: np.ndarray
    points: np.ndarray
    variable_names: tuple[str, ...]
    references: np.ndarray       # (K, ny) reference of each measured output
    measured: np.ndarray         # (K, ny) measured outputs (absolute)
    measured_names: tuple[str, ...]
    outputs: np.ndarray          # (K, p) all model outputs
    output_names: tuple[str, ...]
    inputs: np.ndarray           # (K, m) all model inputs (controls and exogenous)
    input_names: tuple[str, ...]
    states: np.ndarray           # (K, n) model states
    state_names: tuple[str, ...]
    control_names: tuple[str, ...]
    units: dict = field(default_factory=dict)  # signal or variable name -> unit
    notes: tuple[str, ...] = ()  # warnings (for example a trajectory clamped to the table)

    def unit(self, name: str) -> str:
        """Unit of a signal or scheduling variable ("" when unknown)."""
        return str(self.units.get(name, ""))

    def summary(self) -> dict:
        """Peak and final errors of the measured outputs and peak controls, with ``units``."""
        err = self.measured - self.references
        out = {"duration": float(self.time[-1] - self.time[0]), "samples": int(self.time.size)}
        for j, name in enumerate(self.measured_names):
            out[f"max_abs_error:{name}"] = float(np.max(np.abs(err[:, j])))
            out[f"final_error:{name}"] = float(err[-1, j])
        for name in self.control_names:
            j = self.input_names.index(name)
            out[f"max_abs:{name}"] = float(np.max(np.abs(self.inputs[:, j])))
        out["units"] = {n: self.unit(n) for n in (*self.measured_names, *self.control_names)}
        if self.notes:
            out["notes"] = list(self.notes)
        return out


def labelled(name: str, unit: str) -> str:
    """``name [unit]`` (just ``name`` when the unit is unknown)."""
    return f"{name} [{unit}]" if unit else name


def check_trajectory(trajectory: Trajectory, table) -> list[str]:
    """Refuse a trajectory that leaves the envelope; warn where the table clamps it.

    The envelope is the scheduling variables' bounds: outside them neither the model's
    linearizations nor the checks say anything, so the simulation is refused (InputError
    naming the variable, the first time and value, and how many samples are outside).
    Inside the bounds but outside the table's breakpoints the table holds its edge
    controller (clamps); that is returned as a warning line per variable.
    """
    notes = []
    t = trajectory.time
    for j, v in enumerate(table.variables):
        x = trajectory.points[:, j]
        out = (x < v.lower) | (x > v.upper)
        unit = f" {v.unit}" if v.unit else ""
        if out.any():
            k = int(np.argmax(out))
            raise InputError(f"the trajectory leaves the envelope: {v.name} = {x[k]:g}{unit} at "
                             f"t = {t[k]:g} s ({int(out.sum())} of {x.size} samples outside "
                             f"[{v.lower:g}, {v.upper:g}]{unit}); keep it inside the bounds "
                             "or widen them and design again")
        b = table.breakpoints[j]
        clamp = (x < b[0]) | (x > b[-1])
        if clamp.any():
            k = int(np.argmax(clamp))
            notes.append(f"{v.name} = {x[k]:g}{unit} at t = {t[k]:g} s is outside the table's "
                         f"breakpoints [{b[0]:g}, {b[-1]:g}]{unit} ({int(clamp.sum())} samples): "
                         "the table holds its edge controller there")
    return notes


def _smoothstep(t, t0, t1):
    """Quintic 0 -> 1 on [t0, t1] with zero velocity and acceleration at both ends."""
    s = np.clip((np.asarray(t, dtype=float) - t0) / (t1 - t0), 0.0, 1.0)
    return s * s * s * (10.0 - 15.0 * s + 6.0 * s * s)


def crane_trajectory(sample_time: float = 0.02, duration: float = 60.0,
                     payload_mass: float = 20000.0, travel: float = 20.0,
                     rope_start: float = 25.0, rope_end: float = 8.0,
                     move: tuple[float, float] = (2.0, 42.0),
                     gust: tuple[float, float, float] = (48.0, 54.0, 10.0)) -> Trajectory:
    """The demo crane scenario: travel 20 m while hoisting 25 m -> 8 m over 40 s, then a gust.

    The trolley-position reference and the rope length follow quintic smooth steps over
    ``move`` (s); the wind steps to ``gust[2]`` m/s from ``gust[0]`` to ``gust[1]`` s.
    """
    t = np.arange(0.0, duration + 0.5 * sample_time, sample_time)
    s = _smoothstep(t, *move)
    rope = rope_start + (rope_end - rope_start) * s
    wind = np.where((t >= gust[0]) & (t < gust[1]), gust[2], 0.0)
    return Trajectory(time=t, points=np.stack([rope, np.full_like(t, payload_mass)], axis=1),
                      variable_names=("rope_length", "payload_mass"),
                      references={"trolley_position": travel * s},
                      inputs={"wind_speed": wind})


def read_trajectory(path: str | os.PathLike, variable_names, measured_names,
                    exogenous_names) -> Trajectory:
    """Read a trajectory CSV: ``time,<each variable>[,ref:<measured>][,<exogenous input>]``.

    The header names the columns; ``time`` and every scheduling variable are required.
    """
    path = Path(path)
    try:
        rows = list(csv.reader(path.read_text(encoding="utf-8").splitlines()))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read trajectory {path}: {exc}") from None
    rows = [r for r in rows if r and not r[0].lstrip().startswith("#")]
    if len(rows) < 3:
        raise InputError(f"trajectory {path} needs a header and at least two rows")
    header = [h.strip() for h in rows[0]]
    allowed = (["time", *variable_names] + [f"ref:{m}" for m in measured_names]
               + list(exogenous_names))
    unknown = [h for h in header if h not in allowed]
    if unknown:
        raise InputError(f"trajectory {path}: unknown column {unknown[0]!r}; allowed: "
                         f"{', '.join(allowed)}")
    missing = [h for h in ["time", *variable_names] if h not in header]
    if missing:
        raise InputError(f"trajectory {path}: missing column {missing[0]!r}; give time and "
                         "every scheduling variable")
    try:
        data = np.array([[float(x) for x in r] for r in rows[1:]], dtype=float)
    except ValueError as exc:
        raise InputError(f"trajectory {path}: non-numeric cell ({exc})") from None
    if data.ndim != 2 or data.shape[1] != len(header) or not np.isfinite(data).all():
        raise InputError(f"trajectory {path}: every row needs {len(header)} finite numbers")
    col = {h: data[:, i] for i, h in enumerate(header)}
    t = col["time"]
    if np.any(np.diff(t) <= 0):
        raise InputError(f"trajectory {path}: time must increase strictly")
    return Trajectory(time=t, points=np.stack([col[v] for v in variable_names], axis=1),
                      variable_names=tuple(variable_names),
                      references={m: col[f"ref:{m}"] for m in measured_names
                                  if f"ref:{m}" in col},
                      inputs={u: col[u] for u in exogenous_names if u in col})


def step_trajectory(variable_names, point, measured: str, size: float,
                    duration: float = 120.0, sample_time: float = 0.02,
                    step_time: float = 1.0) -> Trajectory:
    """A reference step of ``size`` in output ``measured`` at ``step_time`` s, with the
    scheduling point held at ``point`` (a mapping by name or a sequence) for ``duration`` s."""
    names = tuple(variable_names)
    if isinstance(point, dict):
        point = [point[n] for n in names]
    pt = np.asarray(point, dtype=float).reshape(-1)
    if pt.shape != (len(names),) or not np.isfinite(pt).all():
        raise InputError(f"step point must give {len(names)} finite values "
                         f"({', '.join(names)})")
    if not (math.isfinite(size) and size != 0.0):
        raise InputError(f"step size {size!r} must be a finite non-zero number")
    if not (math.isfinite(duration) and duration > step_time + sample_time):
        raise InputError(f"step duration {duration!r} s must exceed the step time "
                         f"{step_time:g} s")
    t = np.arange(0.0, duration + 0.5 * sample_time, sample_time)
    ref = np.where(t >= step_time, float(size), 0.0)
    return Trajectory(time=t, points=np.tile(pt, (t.size, 1)), variable_names=names,
                      references={measured: ref})


def step_overshoot(result: SimulationResult, measured: str, size: float,
                   step_time: float = 1.0) -> dict:
    """Overshoot of a reference step, in percent of the step: ``100 max(sign (y - r_end)) /
    |size|`` after ``step_time``, with the final error and the time spent at a limit."""
    j = result.measured_names.index(measured)
    after = result.time >= step_time
    y = result.measured[after, j]
    target = float(result.references[-1, j])
    over = float(np.max(np.sign(size) * (y - target))) / abs(size)
    return {"overshoot_percent": 100.0 * max(over, 0.0),
            "final_error": float(result.measured[-1, j] - target)}


#: the runs of :func:`anti_windup_comparison`
COMPARISON_RUNS = ("anti_windup", "plain")


def anti_windup_comparison(model, table, trajectory: Trajectory, substeps: int = 4,
                           x0=None, u0=None, progress=None) -> dict[str, SimulationResult]:
    """Simulate ``trajectory`` twice under ``table`` with its actuator limits: with the
    observer fed the limited command (``"anti_windup"``) and with the linear state update
    of a controller that does not know its drive saturates (``"plain"``).
    ``progress(stage, done, total)`` is told per sample (stage "step <run>")."""
    from .progress import prefixed

    return {name: simulate(model, TableController(table, anti_windup=name == "anti_windup"),
                           trajectory, x0=x0, u0=u0, substeps=substeps,
                           progress=prefixed(progress, f"step {name.replace('_', '-')}"))
            for name in COMPARISON_RUNS}


def comparison_plot(runs: dict[str, SimulationResult], measured: str, title: str = "") -> bytes:
    """PNG (Agg backend): the stepped output and the commands of the comparison runs."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    first = next(iter(runs.values()))
    j = first.measured_names.index(measured)
    fig, axes = plt.subplots(1 + len(first.control_names), 1, figsize=(8, 5.5), sharex=True,
                             squeeze=False)
    styles = {"anti_windup": "-", "plain": "--"}
    labels = {"anti_windup": "with anti-windup", "plain": "without anti-windup"}
    ax = axes[0, 0]
    ax.plot(first.time, first.references[:, j], color="0.6", lw=1, label="reference")
    for name, res in runs.items():
        ax.plot(res.time, res.measured[:, j], styles.get(name, "-"), label=labels.get(name, name))
    ax.set_ylabel(labelled(measured, first.unit(measured)), fontsize=8)
    ax.legend(fontsize=7, loc="best")
    for k, control in enumerate(first.control_names, start=1):
        ax = axes[k, 0]
        for name, res in runs.items():
            i = res.input_names.index(control)
            ax.plot(res.time, res.inputs[:, i], styles.get(name, "-"), label=labels.get(name, name))
        ax.set_ylabel(labelled(control, first.unit(control)) + "\n(command)", fontsize=8)
    for ax in axes[:, 0]:
        ax.grid(True, alpha=0.3)
    return _finish(fig, axes, title)


def _finish(fig, axes, title: str) -> bytes:
    """Time axis label, title, layout; the figure as PNG bytes (closed)."""
    import matplotlib.pyplot as plt

    axes[-1, 0].set_xlabel("time [s]")
    if title:
        axes[0, 0].set_title(title, fontsize=9)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    plt.close(fig)
    return buf.getvalue()


def _index(names, wanted, what):
    out = []
    for w in wanted:
        if w not in names:
            raise InputError(f"the table's {what} {w!r} is not a model signal (model has "
                             f"{', '.join(names)}); use the matching model")
        out.append(list(names).index(w))
    return out


def simulate(model, controller: TableController, trajectory: Trajectory, x0=None, u0=None,
             substeps: int = 4, progress=None) -> SimulationResult:
    """Simulate ``model`` under the scheduled discrete ``controller`` along ``trajectory``.

    Parameters
    ----------
    model : schedule.linearize.NonlinearModel
        ``dynamics(x, u, point)`` and ``outputs(x, u, point)`` with names.
    controller : TableController (discrete table); its inputs must be model outputs and
        its outputs model inputs (matched by name).
    trajectory : scheduling values, references and exogenous inputs over time.
    x0, u0 : initial state and trim inputs (default zeros); references default to the
        measured outputs at (x0, u0).
    substeps : Runge-Kutta steps per sample interval.
    progress : optional callback ``(stage, done, total)``, told after every sample
        (stage "simulate").

    Raises
    ------
    InputError
        Names that do not match, a trajectory shorter than one sample, bad substeps.
    NumericalError
        The state becomes non-finite or exceeds 1e8 (the message names time and point).
    """
    table = controller.table
    T = table.sample_time
    names = tuple(v.name for v in table.variables)
    if tuple(trajectory.variable_names) != names:
        raise InputError(f"trajectory variables {trajectory.variable_names} differ from the "
                         f"table's {names}")
    notes = check_trajectory(trajectory, table)
    if int(substeps) < 1:
        raise InputError(f"substeps {substeps} must be a positive integer")
    substeps = int(substeps)
    y_idx = _index(model.output_names, table.measured_names, "input")
    u_idx = _index(model.input_names, table.control_names, "output")
    exo = [i for i in range(len(model.input_names)) if i not in u_idx]
    for name in trajectory.inputs:
        if name not in model.input_names or model.input_names.index(name) in u_idx:
            raise InputError(f"trajectory input {name!r} is not an exogenous model input")
    n, m = len(model.state_names), len(model.input_names)
    x = np.zeros(n) if x0 is None else np.asarray(x0, dtype=float).reshape(n).copy()
    u_trim = np.zeros(m) if u0 is None else np.asarray(u0, dtype=float).reshape(m).copy()
    t0, t_end = float(trajectory.time[0]), float(trajectory.time[-1])
    K = int(math.floor((t_end - t0) / T + 1e-9)) + 1
    if K < 2:
        raise InputError(f"trajectory lasts {t_end - t0:g} s, shorter than one sample "
                         f"({T:g} s)")
    h = T / substeps
    # every time the integrator needs: samples and RK4 half steps
    fine = t0 + np.arange(2 * substeps * (K - 1) + 1) * (h / 2.0)
    fine_pts = trajectory.at(fine)
    rate_cols = {}
    for j, v in enumerate(names):
        rates = [r for r in (f"{v}_rate", f"{v}_accel") if r in getattr(model, "rate_terms", ())]
        if rates:
            d1 = np.gradient(trajectory.points[:, j], trajectory.time)
            rate_cols[f"{v}_rate"] = np.interp(fine, trajectory.time, d1)
            if f"{v}_accel" in rates:
                rate_cols[f"{v}_accel"] = np.interp(fine, trajectory.time,
                                                    np.gradient(d1, trajectory.time))
    exo_fine = {i: (np.interp(fine, trajectory.time, trajectory.inputs[model.input_names[i]])
                    if model.input_names[i] in trajectory.inputs
                    else np.full(fine.shape, u_trim[i])) for i in exo}

    def point_at(f: int) -> dict:
        pt = {v: float(fine_pts[f, j]) for j, v in enumerate(names)}
        for key, arr in rate_cols.items():
            pt[key] = float(arr[f])
        return pt

    def inputs_at(f: int, u_ctrl: np.ndarray) -> np.ndarray:
        u = u_trim.copy()
        u[u_idx] = u_ctrl
        for i in exo:
            u[i] = exo_fine[i][f]
        return u

    y_trim = np.asarray(model.outputs(x, u_trim, point_at(0)), dtype=float)[y_idx]
    ref = np.empty((K, len(y_idx)))
    t_samples = t0 + np.arange(K) * T
    for j, name in enumerate(table.measured_names):
        if name in trajectory.references:
            ref[:, j] = np.interp(t_samples, trajectory.time, trajectory.references[name])
        else:
            ref[:, j] = y_trim[j]
    p_out = len(model.output_names)
    res = {"x": np.empty((K, n)), "u": np.empty((K, m)), "y": np.empty((K, p_out))}
    for k in range(K):
        if progress is not None:
            progress("simulate", k, K)
        f0 = 2 * substeps * k
        pt = point_at(f0)
        u_hold = inputs_at(f0, u_trim[u_idx])
        yk = np.asarray(model.outputs(x, u_hold, pt), dtype=float)
        u_ctrl = u_trim[u_idx] + controller.step(yk[y_idx] - ref[k], fine_pts[f0])
        u_now = inputs_at(f0, u_ctrl)
        res["x"][k], res["u"][k], res["y"][k] = x, u_now, yk
        if k == K - 1:
            break
        for s in range(substeps):
            fa = f0 + 2 * s
            ua, um, ub = inputs_at(fa, u_ctrl), inputs_at(fa + 1, u_ctrl), \
                inputs_at(fa + 2, u_ctrl)
            pa, pm, pb = point_at(fa), point_at(fa + 1), point_at(fa + 2)
            k1 = np.asarray(model.dynamics(x, ua, pa), dtype=float)
            k2 = np.asarray(model.dynamics(x + 0.5 * h * k1, um, pm), dtype=float)
            k3 = np.asarray(model.dynamics(x + 0.5 * h * k2, um, pm), dtype=float)
            k4 = np.asarray(model.dynamics(x + h * k3, ub, pb), dtype=float)
            x = x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
        if not np.isfinite(x).all() or np.max(np.abs(x)) > _DIVERGED:
            where = ", ".join(f"{v}={fine_pts[f0, j]:g}" for j, v in enumerate(names))
            raise NumericalError(f"simulation diverged at t = {t_samples[k + 1]:g} s ({where}); "
                                 "check the controller (schedule check) and the sample time")
    if progress is not None:
        progress("simulate", K, K)
    return SimulationResult(
        time=t_samples, points=trajectory.at(t_samples), variable_names=names,
        references=ref, measured=res["y"][:, y_idx], measured_names=tuple(table.measured_names),
        outputs=res["y"], output_names=tuple(model.output_names), inputs=res["u"],
        input_names=tuple(model.input_names), states=res["x"],
        state_names=tuple(model.state_names), control_names=tuple(table.control_names),
        units=_units(model, table), notes=tuple(notes))


def _units(model, table) -> dict:
    """Units by name: the model's signals, then the table's signals and variables."""
    out: dict[str, str] = {}
    for kind in ("state", "input", "output"):
        names = tuple(getattr(model, f"{kind}_names", ()))
        units = tuple(getattr(model, f"{kind}_units", ()) or ())
        if len(units) == len(names):
            out.update({n: u for n, u in zip(names, units, strict=True) if u})
    for names, units in ((table.measured_names, table.measured_units),
                         (table.control_names, table.control_units)):
        if len(units) == len(names):
            out.update({n: u for n, u in zip(names, units, strict=True) if u})
    out.update({v.name: v.unit for v in table.variables if v.unit})
    return out


def result_csv(result: SimulationResult) -> str:
    """The time series as CSV: time, variables, ref:<y>, y:<output>, u:<input>, x:<state>."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["time", *result.variable_names, *[f"ref:{s}" for s in result.measured_names],
                *[f"y:{s}" for s in result.output_names], *[f"u:{s}" for s in result.input_names],
                *[f"x:{s}" for s in result.state_names]])
    data = np.concatenate([result.time[:, None], result.points, result.references,
                           result.outputs, result.inputs, result.states], axis=1)
    for row in data:
        w.writerow([repr(float(v)) for v in row])
    return buf.getvalue()


def result_plots(result: SimulationResult, title: str = "") -> dict[str, bytes]:
    """PNG plots (Agg backend): ``response.png`` (outputs vs references, controls) and
    ``schedule.png`` (scheduling variables and exogenous inputs)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t = result.time
    u = result.unit
    panels = []
    for j, name in enumerate(result.measured_names):
        panels.append((labelled(name, u(name)), [(result.measured[:, j], name, "-"),
                                                 (result.references[:, j], "reference", "--")]))
    for j, name in enumerate(result.output_names):
        if name not in result.measured_names:
            panels.append((labelled(name, u(name)), [(result.outputs[:, j], name, "-")]))
    for name in result.control_names:
        j = result.input_names.index(name)
        panels.append((labelled(name, u(name)) + "\n(controller output)",
                       [(result.inputs[:, j], name, "-")]))
    out = {}
    for fname, groups in (("response.png", panels), ("schedule.png", None)):
        if groups is None:
            groups = [(labelled(v, u(v)), [(result.points[:, j], v, "-")])
                      for j, v in enumerate(result.variable_names)]
            groups += [(labelled(s, u(s)), [(result.inputs[:, j], s, "-")])
                       for j, s in enumerate(result.input_names)
                       if s not in result.control_names]
        fig, axes = plt.subplots(len(groups), 1, figsize=(8, 1.9 * len(groups) + 0.6),
                                 sharex=True, squeeze=False)
        for ax, (label, lines) in zip(axes[:, 0], groups, strict=True):
            for y, lab, style in lines:
                ax.plot(t, y, style, label=lab)
            ax.set_ylabel(label, fontsize=8)
            ax.grid(True, alpha=0.3)
            if len(lines) > 1:
                ax.legend(fontsize=7, loc="best")
        out[fname] = _finish(fig, axes, title)
    return out
