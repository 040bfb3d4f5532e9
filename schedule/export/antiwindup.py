"""Actuator limits, the observer-form anti-windup gain and the bumpless start.

The exported controller limits its command (magnitude and rate, per control) and
feeds its state the limited command, the observer-form anti-windup:

    u      = C x + D y                      (the linear command)
    u_lim  = limit(u)                       (rate, then magnitude; :func:`limit_command`)
    x'     = A x + B y + H (u_lim - u)      (continuous; discrete tables use Hd)

When nothing is limited the correction is zero and the controller is the table's
linear controller, bit for bit. When a command is limited the state follows
``x' = (A - H C) x + (B - H D) y + H u_lim``: it keeps estimating the plant driven by
the command the drive really applies, instead of winding up on a command the drive
never delivered.

Where H comes from. The central H-infinity controller is an observer of the
generalized plant (Zhou, Doyle and Glover 1996, sec. 17.1; the formulas in
:mod:`schedule.hinf`): with the plant's control input matrix ``B2`` it reads
``x' = F0 x + G0 (y - D22 u) + B2 u`` with F0, G0 independent of u. Substituting
``u = C x + D y`` gives the table's ``A = F0 + H C``, ``B = G0 + H D`` with::

    H = (B2 - B D22) (I - D D22)^-1          (= B2 when D22 = 0)

so feeding the observer the limited command means ``H (u_lim - u)``. This is the
observer-based anti-windup (Astrom and Rundqwist 1989); the conditioning technique of
Hanus, Kinnaert and Henrotte (1987) is the special case ``H = B D^-1``, which needs an
invertible D and the central controller's D is usually zero (Kothare, Campo, Morari and
Nett 1994 put both in one framework). Limited operation is stable only when ``A - H C``
is (Hurwitz, or Schur for the discrete table): :func:`saturated_dynamics_radius`
checks it at every table node.

Bumpless start (common practice): :func:`bumpless_state` gives the state from which the
controller, switched in while the measurements ``y0`` and the command ``u0`` are held,
outputs exactly ``u0`` and which equals the controller's own steady state whenever
``(y0, u0)`` is one.

References (bibliographic details from memory)
----------------------------------------------
R. Hanus, M. Kinnaert and J.-L. Henrotte, "Conditioning technique, a general anti-windup
and bumpless transfer method", Automatica 23(6), 729-739, 1987.
K. J. Astrom and L. Rundqwist, "Integrator windup and how to avoid it", Proc. American
Control Conference, 1693-1698, 1989.
M. V. Kothare, P. J. Campo, M. Morari and C. N. Nett, "A unified framework for the study
of anti-windup designs", Automatica 30(12), 1869-1883, 1994.
K. Zhou, J. C. Doyle and K. Glover, Robust and Optimal Control, Prentice Hall, 1996.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import InputError, NumericalError

#: Largest condition number accepted for the bumpless-start solves.
_MAX_CONDITION = 1e12


@dataclass(frozen=True, eq=False)
class ActuatorLimits:
    """Per-control limits on the controller output (deviation from the trim control).

    Attributes
    ----------
    lower, upper : (nu,) magnitude limits, ``-inf`` / ``inf`` where none.
    rate : (nu,) largest ``|du/dt|`` per second, ``inf`` where none.
    """

    lower: np.ndarray
    upper: np.ndarray
    rate: np.ndarray

    @classmethod
    def none(cls, nu: int) -> ActuatorLimits:
        """No limit on any of ``nu`` controls."""
        return cls(np.full(nu, -math.inf), np.full(nu, math.inf), np.full(nu, math.inf))

    @classmethod
    def from_specs(cls, control_names: Sequence[str], specs) -> ActuatorLimits:
        """From ``[[limits]]`` entries (objects with control, lower, upper, rate) or a mapping
        ``control -> (lower, upper, rate)``; controls not named are unlimited."""
        names = list(control_names)
        out = cls.none(len(names))
        items = specs.items() if isinstance(specs, Mapping) else \
            ((s.control, (s.lower, s.upper, s.rate)) for s in (specs or ()))
        for name, (lo, hi, rate) in items:
            if name not in names:
                raise InputError(f"limits name control {name!r}, which is not a controller "
                                 f"output ({', '.join(names)}); name one of them")
            i = names.index(name)
            out.lower[i], out.upper[i], out.rate[i] = float(lo), float(hi), float(rate)
        out.validate("limits", names)
        return out

    @property
    def any(self) -> bool:
        """True when some control has a finite limit."""
        return bool(np.isfinite(self.lower).any() or np.isfinite(self.upper).any()
                    or np.isfinite(self.rate).any())

    def validate(self, where: str, names: Sequence[str]) -> None:
        """``lower <= 0 <= upper``, ``lower < upper``, ``rate > 0``, no NaN; else InputError."""
        nu = len(names)
        for arr in (self.lower, self.upper, self.rate):
            if np.shape(arr) != (nu,):
                raise InputError(f"{where}: limits for {np.size(arr)} controls, the controller "
                                 f"has {nu}; give one entry per control")
        for i, name in enumerate(names):
            lo, hi, rate = float(self.lower[i]), float(self.upper[i]), float(self.rate[i])
            if math.isnan(lo) or math.isnan(hi) or math.isnan(rate):
                raise InputError(f"{where}: limit of {name!r} is NaN; give numbers")
            if not (lo <= 0.0 <= hi and lo < hi):
                raise InputError(f"{where}: limits of {name!r} are [{lo:g}, {hi:g}]; they apply "
                                 "to the deviation from the trim control, so they must contain 0")
            if not rate > 0.0:
                raise InputError(f"{where}: rate limit of {name!r} is {rate:g}; give a positive "
                                 "number per second")

    def to_metadata(self, names: Sequence[str]) -> list[dict]:
        """JSON-ready list, one entry per control; ``None`` where there is no limit."""
        def num(x):
            return float(x) if math.isfinite(x) else None
        return [{"name": n, "lower": num(self.lower[i]), "upper": num(self.upper[i]),
                 "rate": num(self.rate[i])} for i, n in enumerate(names)]

    @classmethod
    def from_metadata(cls, items, names: Sequence[str], where: str) -> ActuatorLimits:
        """Inverse of :meth:`to_metadata` (``None`` or absent means no limit)."""
        out = cls.none(len(names))
        if items is None:
            return out
        if not isinstance(items, list) or len(items) != len(names):
            raise InputError(f"{where}: 'limits' must list one entry per control "
                             f"({', '.join(names)}); re-export the table")
        for i, (item, name) in enumerate(zip(items, names, strict=True)):
            if not isinstance(item, dict) or item.get("name") != name:
                raise InputError(f"{where}: limits entry {i} should name control {name!r}; "
                                 "re-export the table")
            for key, arr, default in (("lower", out.lower, -math.inf),
                                      ("upper", out.upper, math.inf),
                                      ("rate", out.rate, math.inf)):
                v = item.get(key)
                if v is None:
                    arr[i] = default
                elif isinstance(v, bool) or not isinstance(v, (int, float)):
                    raise InputError(f"{where}: limits entry {i} has {key} {v!r}; give a "
                                     "number or null")
                else:
                    arr[i] = float(v)
        out.validate(where, names)
        return out


def limit_command(u: np.ndarray, u_last: np.ndarray, limits: ActuatorLimits,
                  sample_time: float) -> np.ndarray:
    """The command sent to the drive: ``u`` limited in rate, then in magnitude.

    Rate: ``u_last - rate T <= u_lim <= u_last + rate T`` (``u_last`` = the command sent at
    the previous sample); magnitude: ``lower <= u_lim <= upper``, which wins when the two
    disagree. Written comparison by comparison like the generated C, so both give the
    same doubles.
    """
    step = limits.rate * sample_time
    lo, hi = u_last - step, u_last + step
    v = np.where(u < lo, lo, u)
    v = np.where(v > hi, hi, v)
    v = np.where(v < limits.lower, limits.lower, v)
    return np.where(v > limits.upper, limits.upper, v)


def observer_input_gain(B2, D22, BK, DK) -> np.ndarray:
    """``H = (B2 - BK D22) (I - DK D22)^-1`` on stacks (see the module docstring).

    Parameters
    ----------
    B2 : (M, n, nu) control input matrix of the generalized plant.
    D22 : (M, ny, nu) its feedthrough from u to y.
    BK, DK : (M, n, ny), (M, nu, ny) the controller's B and D (continuous).

    Raises
    ------
    NumericalError
        ``I - DK D22`` is singular (the loop with D22 is ill-posed).
    """
    B2, D22, BK, DK = (np.asarray(x, dtype=float) for x in (B2, D22, BK, DK))
    G = B2 - BK @ D22
    if not np.any(D22):
        return G
    E = np.eye(B2.shape[2]) - DK @ D22
    cond = np.linalg.cond(E)
    if not np.isfinite(cond).all() or np.max(cond) > _MAX_CONDITION:
        k = int(np.argmax(np.where(np.isfinite(cond), cond, np.inf)))
        raise NumericalError(f"anti-windup gain: I - DK D22 has condition number {cond[k]:.3g} "
                             f"at controller {k}; the loop with D22 is ill-posed")
    # G E^-1: solve E' X' = G'
    return np.swapaxes(np.linalg.solve(np.swapaxes(E, 1, 2), np.swapaxes(G, 1, 2)), 1, 2)


def saturated_dynamics_radius(A, C, H, discrete: bool) -> np.ndarray:
    """Per controller: spectral abscissa (continuous) or spectral radius (discrete) of
    ``A - H C``, the state matrix while the command is limited. Stable when < 0 / < 1."""
    A, C, H = (np.asarray(x, dtype=float) for x in (A, C, H))
    if A.shape[-1] == 0:
        return np.full(A.shape[0], -math.inf if not discrete else 0.0)
    ev = np.linalg.eigvals(A - H @ C)
    return np.max(np.abs(ev), axis=-1) if discrete else np.max(ev.real, axis=-1)


def bumpless_state(A, B, C, D, H, y0, u0) -> np.ndarray:
    """Controller state for switching in while ``y0`` and ``u0`` are held (common practice).

    1. ``x_s`` solves ``x_s = (A - H C) x_s + (B - H D) y0 + H u0``: the state the
       observer-form controller settles to when it sees ``y0`` and the applied command
       ``u0`` (tracking mode); discrete matrices.
    2. ``x0 = x_s + H (C H)^-1 (u0 - C x_s - D y0)`` moves it along H, the direction in
       which the command enters the observer, until the output is exactly ``u0``.

    Then the first command equals ``u0`` (no jump), and ``x0`` is the controller's own
    steady state whenever ``(y0, u0)`` is one (then the correction is zero). The result
    does not depend on the state coordinates (H and x transform alike, C H is invariant).

    Raises
    ------
    NumericalError
        ``I - A + H C`` or ``C H`` is singular or ill-conditioned (condition > 1e12).
    """
    A, B, C, D, H = (np.asarray(x, dtype=float) for x in (A, B, C, D, H))
    y0, u0 = np.asarray(y0, dtype=float), np.asarray(u0, dtype=float)
    n = A.shape[0]
    if n == 0:
        return np.zeros(0)
    S = np.eye(n) - A + H @ C
    G = C @ H
    for name, mat in (("I - A + H C", S), ("C H", G)):
        cond = np.linalg.cond(mat)
        if not np.isfinite(cond) or cond > _MAX_CONDITION:
            raise NumericalError(f"bumpless start: {name} has condition number {cond:.3g}; "
                                 "start from the zero state instead")
    xs = np.linalg.solve(S, (B - H @ D) @ y0 + H @ u0)
    return xs + H @ np.linalg.solve(G, u0 - C @ xs - D @ y0)
