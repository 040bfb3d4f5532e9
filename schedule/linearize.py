"""Trim and linearization of a user's nonlinear model at an operating point.

A user describes the nonlinear plant once, as a :class:`NonlinearModel`
(state, input and output names plus two functions), and gets a
:class:`schedule.types.LinearPlant` at any operating point with
:func:`trim_and_linearize`. The function ``point -> LinearPlant`` that a design
file names under ``source.model`` is usually three lines on top of it.

Method
------
*Trim* solves ``f(x, u, p)_i = 0`` for the states i that must be steady, over
the chosen free states and inputs, with MINPACK's hybrid Powell method when
the system is square and a trust-region least-squares method otherwise
(scipy.optimize.root / least_squares; More, Garbow and Hillstrom, 1980).
The residual is checked afterwards in scaled units.

*Linearization* forms the Jacobians ``A = df/dx``, ``B = df/du``,
``C = dg/dx``, ``D = dg/du`` at the trim point by

- central differences with a per-variable step ``h_j = eps^(1/3) max(|z_j|, s_j)``
  (``s_j`` the variable's typical magnitude), which balances the O(h^2)
  truncation error against the O(eps/h) rounding error (Nocedal and Wright,
  Numerical Optimization, 2nd ed., 2006, section 8.1). Every Jacobian is
  computed a second time with twice the step; an entry whose two estimates
  disagree beyond the tolerance is reported by name (a kink, a table
  look-up or a discontinuity in the model is the usual cause);
- the complex step ``df/dz_j = Im f(z + i h e_j) / h`` with ``h = 1e-20 s_j``
  (Squire and Trapp, SIAM Review 40(1):110-112, 1998,
  doi:10.1137/S003614459631241X; Martins, Sturdza and Alonso, ACM TOMS
  29(3):245-262, 2003), exact to rounding when the model's functions are
  analytic and written for complex arguments (no ``abs``, no comparisons on
  the perturbed values, no ``.real``). The model must declare
  ``complex_safe=True``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.optimize

from .errors import InputError, NumericalError, ScheduleError
from .types import LinearPlant

__all__ = ["NonlinearModel", "TrimResult", "trim", "linearize", "trim_and_linearize"]

_EPS = np.finfo(float).eps


@dataclass(frozen=True)
class NonlinearModel:
    """A nonlinear plant ``xdot = f(x, u, p)``, ``y = g(x, u, p)`` with names.

    Parameters
    ----------
    state_names, input_names, output_names : tuple of str
        Names of the entries of x, u and y, in order. Every operating point
        uses the same state coordinates.
    dynamics : callable ``(x, u, point) -> xdot``
        ``x`` and ``u`` are 1-D numpy arrays, ``point`` a mapping from the
        scheduling-variable names to values; returns a 1-D array like ``x``.
    outputs : callable ``(x, u, point) -> y``
        Returns a 1-D array with one entry per output name.
    variable_names : tuple of str, optional
        The scheduling variables the model reads from ``point``.
    rate_terms : tuple of str, optional
        Extra keys of ``point`` that hold time derivatives of scheduling
        variables (for example ``"rope_length_rate"``). The dynamics treat a
        missing key as zero, so trim and linearization (frozen points) never
        need them; a time simulation with moving scheduling variables fills
        them in.
    state_scales, input_scales : tuple of float, optional
        Typical magnitudes (same units as the variables); they set the
        finite-difference steps and the trim residual scaling. Default 1.
    complex_safe : bool
        True when ``dynamics`` and ``outputs`` accept complex arrays and are
        analytic in them, which enables ``linearize(..., method="complex")``.
    description : str
        One line for reports.
    state_units, input_units, output_units : tuple of str, optional
        One unit per state, input and output ("m", "kN", "rad/s"); they travel
        with the linearized plants into the family, the tables and the
        simulation plots. Empty (the default) when not given.
    """

    state_names: tuple[str, ...]
    input_names: tuple[str, ...]
    output_names: tuple[str, ...]
    dynamics: Callable[[np.ndarray, np.ndarray, Mapping[str, float]], np.ndarray]
    outputs: Callable[[np.ndarray, np.ndarray, Mapping[str, float]], np.ndarray]
    variable_names: tuple[str, ...] = ()
    rate_terms: tuple[str, ...] = ()
    state_scales: tuple[float, ...] | None = None
    input_scales: tuple[float, ...] | None = None
    complex_safe: bool = False
    description: str = ""
    state_units: tuple[str, ...] = ()
    input_units: tuple[str, ...] = ()
    output_units: tuple[str, ...] = ()

    @property
    def n_states(self) -> int:
        return len(self.state_names)

    @property
    def n_inputs(self) -> int:
        return len(self.input_names)

    @property
    def n_outputs(self) -> int:
        return len(self.output_names)


@dataclass(frozen=True)
class TrimResult:
    """An equilibrium: states ``x``, inputs ``u``, and how well it holds.

    ``residual`` is the largest steady-state derivative in scaled units
    (``|xdot_i| / s_i``), ``xdot`` the full derivative vector at (x, u).
    Unpacks as ``x, u = result``.
    """

    x: np.ndarray
    u: np.ndarray
    residual: float
    xdot: np.ndarray

    def __iter__(self):
        return iter((self.x, self.u))


def _point_text(point: Mapping[str, float]) -> str:
    if not point:
        return "the operating point"
    return "point (" + ", ".join(f"{k}={float(np.real(v)):g}" for k, v in point.items()) + ")"


def _scales(given, n: int, what: str) -> np.ndarray:
    if given is None:
        return np.ones(n)
    s = np.asarray(given, dtype=float)
    if s.shape != (n,) or not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise InputError(f"model {what} must be {n} positive finite numbers, got {given!r}")
    return s


def _indices(names: Sequence[str] | None, all_names: tuple[str, ...], what: str,
             default_all: bool) -> np.ndarray:
    if names is None:
        return np.arange(len(all_names)) if default_all else np.arange(0)
    out = []
    for name in names:
        if isinstance(name, (int, np.integer)):
            if not 0 <= int(name) < len(all_names):
                raise InputError(f"{what} index {name} is out of range 0..{len(all_names) - 1}")
            out.append(int(name))
        elif name in all_names:
            out.append(all_names.index(name))
        else:
            raise InputError(f"unknown {what} '{name}'; choose from {', '.join(all_names)}")
    if len(set(out)) != len(out):
        raise InputError(f"{what} list {list(names)} names an entry twice; list each once")
    return np.array(out, dtype=int)


def _check_model(model: NonlinearModel) -> tuple[np.ndarray, np.ndarray]:
    if not isinstance(model, NonlinearModel):
        raise InputError(f"expected a schedule.linearize.NonlinearModel, got "
                         f"{type(model).__name__}; wrap the model functions in NonlinearModel")
    for label, names in (("state", model.state_names), ("input", model.input_names),
                         ("output", model.output_names)):
        if len(names) == 0 and label != "input":
            raise InputError(f"model has no {label} names; give at least one")
        if len(set(names)) != len(names):
            raise InputError(f"model {label} names {list(names)} have duplicates; make them unique")
        units = getattr(model, f"{label}_units", ())
        if units and (len(units) != len(names) or not all(isinstance(u, str) for u in units)):
            raise InputError(f"model {label}_units {list(units)!r} must be {len(names)} strings, "
                             f"one per {label} name; give one unit each (\"\" for none)")
    return (_scales(model.state_scales, model.n_states, "state_scales"),
            _scales(model.input_scales, model.n_inputs, "input_scales"))


def _vector(value, n: int, what: str, point) -> np.ndarray:
    v = np.asarray(value)
    if v.shape != (n,):
        raise InputError(f"{what} has shape {v.shape} at {_point_text(point)}, expected ({n},)")
    return v


def _evaluate(fun, x, u, point, n: int, what: str) -> np.ndarray:
    try:
        val = fun(x, u, point)
    except ScheduleError:
        raise
    except KeyError as exc:
        raise InputError(f"the model's {what} need {exc} in the operating point; add it "
                         "to the point dictionary") from None
    except (ArithmeticError, ValueError, TypeError, IndexError, AttributeError) as exc:
        msg = " ".join(str(exc).split())
        raise InputError(f"the model's {what} raised {type(exc).__name__} at "
                         f"{_point_text(point)}: {msg}; fix the model function") from None
    val = np.asarray(val)
    if val.shape != (n,):
        raise InputError(f"the model's {what} returned shape {val.shape} at "
                         f"{_point_text(point)}, expected ({n},); fix the model function")
    return val


def trim(model: NonlinearModel, point: Mapping[str, float], x0=None, u0=None,
         free_states: Sequence[str] | None = None, free_inputs: Sequence[str] | None = None,
         steady_states: Sequence[str] | None = None, tol: float = 1e-8,
         max_evaluations: int = 2000) -> TrimResult:
    """Find an equilibrium ``f(x, u, p)_i = 0`` (i in the steady states).

    Parameters
    ----------
    model : NonlinearModel
    point : mapping of scheduling-variable name to value.
    x0, u0 : array_like, optional
        Starting guess; entries that are not free stay fixed at these values
        (zeros by default). Fixed inputs such as a steady wind go in ``u0``.
    free_states : names (or indices), optional
        States the solver may move. Default: all states.
    free_inputs : names (or indices), optional
        Inputs the solver may move. Default: none (all inputs fixed at ``u0``).
    steady_states : names (or indices), optional
        States whose derivative must vanish. Default: all states. Leave out,
        for example, a position to trim at constant velocity.
    tol : float
        Largest accepted scaled residual ``max_i |xdot_i| / s_i`` (1/s).
    max_evaluations : int
        Budget of model evaluations for the solver.

    Returns
    -------
    TrimResult
        ``x``, ``u``, the scaled ``residual`` and the derivative ``xdot``.

    Raises
    ------
    NumericalError
        The solver did not reach ``tol``; the message names the point, the
        worst state derivative and its value.
    InputError
        Bad names, shapes, or a model function that fails.

    Notes
    -----
    A square system (as many free unknowns as steady equations) is solved
    with MINPACK's hybrid Powell method (scipy.optimize.root, ``hybr``), any
    other with the trust-region reflective least-squares method
    (scipy.optimize.least_squares, ``trf``). Unknowns and equations are
    scaled by the model's typical magnitudes. The result must satisfy
    ``max_i |f_i(x, u, p)| / s_i <= tol``.
    """
    sx, su = _check_model(model)
    n, m = model.n_states, model.n_inputs
    x = np.array(np.zeros(n) if x0 is None else _vector(x0, n, "x0", point), dtype=float)
    u = np.array(np.zeros(m) if u0 is None else _vector(u0, m, "u0", point), dtype=float)
    fs = _indices(free_states, model.state_names, "free state", True)
    fi = _indices(free_inputs, model.input_names, "free input", False)
    eq = _indices(steady_states, model.state_names, "steady state", True)
    if len(eq) == 0:
        raise InputError("trim needs at least one steady state; name the states whose "
                         "derivative must vanish")
    scale = np.concatenate([sx[fs], su[fi]])
    eq_scale = sx[eq]

    def unpack(zs):
        xx, uu = x.copy(), u.copy()
        xx[fs] = zs[:len(fs)] * sx[fs]
        uu[fi] = zs[len(fs):] * su[fi]
        return xx, uu

    def residual(zs):
        xx, uu = unpack(zs)
        return _evaluate(model.dynamics, xx, uu, point, n, "dynamics")[eq] / eq_scale

    z0 = np.concatenate([x[fs], u[fi]]) / scale
    r0 = residual(z0)
    if not np.all(np.isfinite(r0)):
        raise NumericalError(f"trim: the model's dynamics are not finite at the starting guess "
                             f"at {_point_text(point)}; give a better x0/u0")
    z = z0
    if len(z0) > 0 and np.max(np.abs(r0)) > tol:
        with np.errstate(all="ignore"):
            if len(z0) == len(eq):
                sol = scipy.optimize.root(residual, z0, method="hybr",
                                          options={"xtol": 1e-13, "maxfev": max_evaluations})
                z = sol.x
                if not np.max(np.abs(residual(z))) <= tol:  # fall back (also catches NaN)
                    sol = scipy.optimize.least_squares(residual, z0, method="trf", xtol=1e-14,
                                                       ftol=1e-14, gtol=1e-14,
                                                       max_nfev=max_evaluations)
                    z = sol.x
            else:
                sol = scipy.optimize.least_squares(residual, z0, method="trf", xtol=1e-14,
                                                   ftol=1e-14, gtol=1e-14,
                                                   max_nfev=max_evaluations)
                z = sol.x
    xt, ut = unpack(z)
    xdot = _evaluate(model.dynamics, xt, ut, point, n, "dynamics")
    r = np.abs(xdot[eq]) / eq_scale
    worst = float(np.max(r)) if np.all(np.isfinite(r)) else float("inf")
    if not worst <= tol:
        k = int(eq[np.argmax(np.nan_to_num(r, nan=np.inf))])
        raise NumericalError(
            f"trim did not converge at {_point_text(point)}: d({model.state_names[k]})/dt "
            f"= {xdot[k]:.3g} (scaled residual {worst:.3g} > {tol:g}); give a better x0/u0, "
            "free another state or input, or check that an equilibrium exists")
    return TrimResult(x=xt, u=ut, residual=worst, xdot=xdot)


def _jacobians_central(model, x, u, point, hx, hu):
    """Central-difference [A B; C D] with steps hx (states) and hu (inputs)."""
    n, m, p = model.n_states, model.n_inputs, model.n_outputs
    J = np.empty((n + p, n + m))

    def both(xx, uu):
        return np.concatenate([_evaluate(model.dynamics, xx, uu, point, n, "dynamics"),
                               _evaluate(model.outputs, xx, uu, point, p, "outputs")])

    for j in range(n + m):
        e = np.zeros(n + m)
        h = hx[j] if j < n else hu[j - n]
        e[j] = h
        fp = both(x + e[:n], u + e[n:])
        fm = both(x - e[:n], u - e[n:])
        J[:, j] = (fp - fm) / (2.0 * h)
    return J


def _jacobians_complex(model, x, u, point, hx, hu):
    n, m, p = model.n_states, model.n_inputs, model.n_outputs
    J = np.empty((n + p, n + m))
    xc, uc = x.astype(complex), u.astype(complex)
    for j in range(n + m):
        e = np.zeros(n + m, dtype=complex)
        h = hx[j] if j < n else hu[j - n]
        e[j] = 1j * h
        f = np.concatenate([
            _evaluate(model.dynamics, xc + e[:n], uc + e[n:], point, n, "dynamics"),
            _evaluate(model.outputs, xc + e[:n], uc + e[n:], point, p, "outputs")])
        J[:, j] = np.imag(f) / h
    return J


def linearize(model: NonlinearModel, x, u, point: Mapping[str, float],
              method: str = "central", step: float | None = None,
              check_tolerance: float | None = 1e-5) -> LinearPlant:
    """Linearize ``xdot = f(x, u, p)``, ``y = g(x, u, p)`` at (x, u).

    Parameters
    ----------
    model : NonlinearModel
    x, u : array_like
        The point to linearize at, usually from :func:`trim`.
    point : mapping of scheduling-variable name to value.
    method : {"central", "complex"}
        Central differences with a step-size check, or the complex step
        (needs ``model.complex_safe``).
    step : float, optional
        Relative step. Default ``eps**(1/3)`` (about 6e-6) for central
        differences, ``1e-20`` for the complex step. The absolute step for
        variable j is ``step * max(|z_j|, s_j)``.
    check_tolerance : float or None
        Central differences only: the Jacobian is recomputed with twice the
        step and each scaled entry ``J_ij s_j`` of the two estimates must
        agree to ``check_tolerance * (|J_ij s_j| + max_k |J_ik s_k|)``.
        None skips the check.

    Returns
    -------
    LinearPlant
        ``A = df/dx``, ``B = df/du``, ``C = dg/dx``, ``D = dg/du`` with the
        model's names and units.

    Raises
    ------
    NumericalError
        The two step sizes disagree (the message names the entry, both
        values, and suggests a step or the complex method), or a Jacobian
        entry is not finite.
    InputError
        Unknown method, complex step on a model that does not support it.

    Notes
    -----
    Central differences: ``J e_j = (F(z + h_j e_j) - F(z - h_j e_j)) / (2 h_j)``,
    truncation error O(h^2), rounding error O(eps / h) (Nocedal and Wright,
    2006, section 8.1). Complex step: ``J e_j = Im F(z + i h_j e_j) / h_j``,
    no subtractive cancellation (Squire and Trapp, 1998).
    """
    sx, su = _check_model(model)
    n, m = model.n_states, model.n_inputs
    x = np.asarray(_vector(x, n, "x", point), dtype=float)
    u = np.asarray(_vector(u, m, "u", point), dtype=float)
    if method == "central":
        rel = _EPS ** (1.0 / 3.0) if step is None else float(step)
    elif method == "complex":
        if not model.complex_safe:
            raise InputError("the model does not declare complex_safe=True; use "
                             "method='central' or make its functions complex-analytic")
        rel = 1e-20 if step is None else float(step)
    else:
        raise InputError(f"unknown linearization method '{method}'; use 'central' or 'complex'")
    if not (np.isfinite(rel) and rel > 0):
        raise InputError(f"linearization step must be a positive number, got {step!r}")
    hx = rel * np.maximum(np.abs(x), sx)
    hu = rel * np.maximum(np.abs(u), su)
    if method == "complex":
        J = _jacobians_complex(model, x, u, point, hx, hu)
    else:
        J = _jacobians_central(model, x, u, point, hx, hu)
    names_r = list(model.state_names) + list(model.output_names)
    names_c = list(model.state_names) + list(model.input_names)
    bad = ~np.isfinite(J)
    if bad.any():
        i, j = np.unravel_index(int(np.argmax(bad)), J.shape)
        raise NumericalError(f"linearization at {_point_text(point)}: d({names_r[i]})/"
                             f"d({names_c[j]}) is not finite; check the model near the trim point")
    if method == "central" and check_tolerance is not None:
        J2 = _jacobians_central(model, x, u, point, 2.0 * hx, 2.0 * hu)
        s = np.concatenate([sx, su])
        S1, S2 = J * s, J2 * s
        row = np.max(np.abs(S1), axis=1, keepdims=True)
        allowed = check_tolerance * (np.abs(S1) + row) + 1e3 * _EPS * row
        excess = np.abs(S1 - S2) - allowed
        if np.any(excess > 0) or not np.all(np.isfinite(J2)):
            i, j = np.unravel_index(int(np.argmax(np.nan_to_num(excess, nan=np.inf))), J.shape)
            dname = (f"d({names_r[i]}')" if i < n else f"d({names_r[i]})")
            raise NumericalError(
                f"linearization at {_point_text(point)}: {dname}/d({names_c[j]}) = {J[i, j]:.6g} "
                f"with step {rel:.2g} but {J2[i, j]:.6g} with twice the step; the model is not "
                "smooth there: pass another step, method='complex', or smooth the model")
    p = model.n_outputs
    return LinearPlant(A=J[:n, :n].copy(), B=J[:n, n:].copy(), C=J[n:n + p, :n].copy(),
                       D=J[n:n + p, n:].copy(), state_names=tuple(model.state_names),
                       input_names=tuple(model.input_names),
                       output_names=tuple(model.output_names),
                       state_units=tuple(model.state_units), input_units=tuple(model.input_units),
                       output_units=tuple(model.output_units))


def trim_and_linearize(model: NonlinearModel, point: Mapping[str, float], x0=None, u0=None,
                       free_states: Sequence[str] | None = None,
                       free_inputs: Sequence[str] | None = None,
                       steady_states: Sequence[str] | None = None, method: str = "central",
                       step: float | None = None, tol: float = 1e-8,
                       check_tolerance: float | None = 1e-5) -> LinearPlant:
    """Trim the model at ``point`` and linearize it there, in one call.

    Arguments are those of :func:`trim` and :func:`linearize`. This is what a
    ``source.model`` function usually wraps::

        def linear_plant_at(point):
            return trim_and_linearize(MODEL, point, u0=[0.0, 8.0],
                                      free_states=["angle", "force"],
                                      free_inputs=["force_command"])

    Returns
    -------
    LinearPlant
    """
    result = trim(model, point, x0=x0, u0=u0, free_states=free_states,
                  free_inputs=free_inputs, steady_states=steady_states, tol=tol)
    return linearize(model, result.x, result.u, point, method=method, step=step,
                     check_tolerance=check_tolerance)
