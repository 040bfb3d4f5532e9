"""An invented container gantry crane: trolley, hoist rope and payload (demo plant).

The scenario is ours, with plausible invented numbers (not a real machine):
a trolley runs along the boom of a quay crane, driven by a motor whose force
follows the command with a first-order lag; a payload (container plus
spreader) hangs on the hoist rope; wind along the boom pushes on the payload.

Coordinates and signs
---------------------
``trolley_position`` x [m] along the boom, ``trolley_velocity`` v [m/s],
``sway_angle`` theta [rad] of the rope from the downward vertical (positive
when the payload is ahead of the trolley in +x), ``sway_rate`` omega
[rad/s], ``motor_force`` F [kN] on the trolley in +x. Inputs:
``force_command`` [kN], ``wind_speed`` [m/s] (air moving in +x),
``disturbance_force`` [kN] (any other horizontal force on the trolley: rail
slope, festoon-cable drag, wheel-rail irregularities; zero at trim). Outputs:
``trolley_position`` [m], ``sway_angle`` [rad], ``motor_force`` [kN].

Forces are in kilonewtons so that all signals are of order one (scaling the
variables is common practice before an H-infinity design, see Skogestad and
Postlethwaite, Multivariable Feedback Control, 2nd ed., 2005, section 1.4);
with newtons the Hamiltonian matrices of the synthesis span eleven decades.
The equations below are in SI units with F in newtons (F = 1000 F_kN).

Scheduling variables: ``rope_length`` L [m] (3 to 30, pivot to the payload's
centre of mass) and ``payload_mass`` m_p [kg] (2,000 to 40,000, the
container alone). For simulations with hoisting while travelling the
operating point may also carry ``rope_length_rate`` Ldot [m/s] and
``rope_length_accel`` Lddot [m/s^2] (zero when absent).

Equations of motion
-------------------
Trolley mass M, hanging mass m = m_p + m_s (container plus spreader, a point
mass at the rope end), rope massless and straight. The payload sits at
``(x + L sin theta, -L cos theta)``; Lagrange's equations with the prescribed
rope length L(t) give (standard cart-pendulum equations extended by the
hoisting terms)::

    (M + m) vdot + m L cos(th) omdot
        = F + F_d - F_f(v) + F_w - m (Lddot sin(th) + 2 Ldot omega cos(th) - L omega^2 sin(th))
    m cos(th) vdot + m L omdot = F_w cos(th) - m g sin(th) - 2 m Ldot omega
    tau_m Fdot = F_cmd - F

with the trolley friction (Coulomb plus viscous, smoothed near zero speed)
``F_f(v) = F_c tanh(v / v_s) + b v`` and the quadratic wind drag on the
payload ``F_w = 1/2 rho C_d A_p q |q|``, ``q = v_wind - (v + Ldot sin th +
L omega cos th)`` the wind speed relative to the payload. The rope-length
dependent inertia is m L^2 (second equation times L). ``2 Ldot omega`` is the
Coriolis term of hoisting. The 2x2 mass matrix has determinant
``m L (M + m sin^2 th) > 0``, so it is always invertible.

Trim
----
At rest under a steady wind v_w the drag is ``F_w = 1/2 rho C_d A_p v_w |v_w|``,
the rope leans by ``tan(theta) = F_w / (m g)`` and the motor holds the trolley
with ``F = F_cmd = -F_w`` (in kN: ``-F_w / 1000``); :func:`linear_plant_at` starts
the generic trim from this closed form and linearizes with the complex step.

Safety
------
A crane controller is safety critical. This model and the bundled design are
illustrative only; a real design needs a validated model, tests on the
machine, and compliance with the applicable codes and licensed practice.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np

from schedule.errors import InputError
from schedule.linearize import NonlinearModel, linearize, trim
from schedule.types import LinearPlant, SchedulingVariable

__all__ = ["CraneParameters", "VARIABLES", "STATE_NAMES", "INPUT_NAMES", "OUTPUT_NAMES",
           "STATE_UNITS", "INPUT_UNITS", "OUTPUT_UNITS",
           "crane_model", "trim_at_rest", "linear_plant_at", "energy", "horizontal_momentum"]

STATE_NAMES = ("trolley_position", "trolley_velocity", "sway_angle", "sway_rate", "motor_force")
INPUT_NAMES = ("force_command", "wind_speed", "disturbance_force")
OUTPUT_NAMES = ("trolley_position", "sway_angle", "motor_force")
STATE_UNITS = ("m", "m/s", "rad", "rad/s", "kN")
INPUT_UNITS = ("kN", "m/s", "kN")
OUTPUT_UNITS = ("m", "rad", "kN")

VARIABLES = (
    SchedulingVariable("rope_length", "m", 3.0, 30.0),
    SchedulingVariable("payload_mass", "kg", 2000.0, 40000.0),
)


@dataclass(frozen=True)
class CraneParameters:
    """Invented crane parameters (SI units).

    Attributes
    ----------
    trolley_mass : M, trolley with drives and cabin [kg] (18,000).
    spreader_mass : m_s, spreader and headblock, hangs with the container [kg] (9,000).
    gravity : g [m/s^2] (9.81).
    motor_time_constant : tau_m, force lag of the trolley drive [s] (0.15).
    motor_force_limit : largest drive force, for design checks and simulation
        (the model itself is not saturated) [kN] (90).
    coulomb_friction : F_c, trolley rolling/Coulomb friction level [N] (1,200).
    viscous_friction : b [N s/m] (600).
    friction_speed : v_s, tanh smoothing speed of the Coulomb term [m/s] (0.2).
    air_density : rho [kg/m^3] (1.225, sea level).
    drag_coefficient : C_d of a box-shaped container side [-] (1.2).
    payload_area : A_p, side face of a 40 ft container, 12.19 m x 2.59 m [m^2] (31.6).
    design_wind : steady wind along the boom used for trimming [m/s] (8.0).
    """

    trolley_mass: float = 18000.0
    spreader_mass: float = 9000.0
    gravity: float = 9.81
    motor_time_constant: float = 0.15
    motor_force_limit: float = 90.0
    coulomb_friction: float = 1200.0
    viscous_friction: float = 600.0
    friction_speed: float = 0.2
    air_density: float = 1.225
    drag_coefficient: float = 1.2
    payload_area: float = 31.6
    design_wind: float = 8.0

    @property
    def drag_factor(self) -> float:
        """``1/2 rho C_d A_p`` [kg/m], so that ``F_w = drag_factor q |q|``."""
        return 0.5 * self.air_density * self.drag_coefficient * self.payload_area

    def frictionless(self) -> CraneParameters:
        """The same crane without trolley friction and without wind drag (for checks)."""
        return replace(self, coulomb_friction=0.0, viscous_friction=0.0, drag_coefficient=0.0)


def _length_and_mass(point: Mapping[str, float], p: CraneParameters) -> tuple[float, float]:
    try:
        L = point["rope_length"]
        mp = point["payload_mass"]
    except KeyError as exc:
        raise InputError(f"the crane model needs {exc} in the operating point; give "
                         "rope_length [m] and payload_mass [kg]") from None
    if not (np.isfinite(np.real(L)) and np.real(L) > 0):
        raise InputError(f"rope_length must be a positive number of metres, got {L!r}")
    if not (np.isfinite(np.real(mp)) and np.real(mp) + p.spreader_mass > 0):
        raise InputError(f"payload_mass must be a non-negative number of kg, got {mp!r}")
    return L, mp + p.spreader_mass


def _make_functions(p: CraneParameters):
    M, g, tau = p.trolley_mass, p.gravity, p.motor_time_constant
    Fc, b, vs, kw = p.coulomb_friction, p.viscous_friction, p.friction_speed, p.drag_factor

    def dynamics(x, u, point):
        L, m = _length_and_mass(point, p)
        Ld = point.get("rope_length_rate", 0.0)
        Ldd = point.get("rope_length_accel", 0.0)
        _, v, th, om, F_kn = x[0], x[1], x[2], x[3], x[4]
        Fcmd_kn, vw = u[0], u[1]
        F = 1000.0 * (F_kn + u[2])  # drive force plus the external trolley force F_d
        s, c = np.sin(th), np.cos(th)
        q = vw - (v + Ld * s + L * om * c)
        # q |q| written as q^2 sign(Re q): equal for real q, complex-analytic for the complex step
        Fw = kw * q * q * np.sign(np.real(q))
        Ff = (Fc * np.tanh(v / vs) if Fc != 0.0 else 0.0) + b * v
        r1 = F - Ff + Fw - m * (Ldd * s + 2.0 * Ld * om * c - L * om * om * s)
        r2 = Fw * c - m * g * s - 2.0 * m * Ld * om
        den = M + m * s * s
        vdot = (r1 - c * r2) / den
        omdot = ((M + m) * r2 - m * c * r1) / (m * L * den)
        return np.array([v, vdot, om, omdot, (Fcmd_kn - F_kn) / tau])

    def outputs(x, u, point):
        return np.array([x[0], x[2], x[4]])

    return dynamics, outputs


@lru_cache(maxsize=16)
def crane_model(params: CraneParameters | None = None) -> NonlinearModel:
    """The crane as a :class:`schedule.linearize.NonlinearModel`.

    Parameters
    ----------
    params : CraneParameters, optional
        Default: the invented demo crane ``CraneParameters()``.

    Returns
    -------
    NonlinearModel
        States, inputs and outputs as in the module docstring, with their units
        (m, m/s, rad, rad/s, kN; wind in m/s); complex-safe,
        so ``linearize(..., method="complex")`` applies. Reads
        ``rope_length`` and ``payload_mass`` from the point, and the optional
        ``rope_length_rate`` / ``rope_length_accel`` for hoisting.
    """
    p = CraneParameters() if params is None else params
    dynamics, outputs = _make_functions(p)
    return NonlinearModel(
        state_names=STATE_NAMES, input_names=INPUT_NAMES, output_names=OUTPUT_NAMES,
        dynamics=dynamics, outputs=outputs,
        variable_names=tuple(v.name for v in VARIABLES),
        rate_terms=("rope_length_rate", "rope_length_accel"),
        state_scales=(1.0, 1.0, 0.1, 0.1, 10.0), input_scales=(10.0, 1.0, 10.0),
        complex_safe=True, state_units=STATE_UNITS, input_units=INPUT_UNITS,
        output_units=OUTPUT_UNITS,
        description="invented container gantry crane: trolley, hoist rope, payload, wind")


def trim_at_rest(point: Mapping[str, float], wind: float | None = None,
                 params: CraneParameters | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form equilibrium at rest under a steady wind (see module docstring).

    Returns ``x = [0, 0, atan2(F_w, m g), 0, -F_w / 1000]`` and
    ``u = [-F_w / 1000, wind, 0]`` (forces in kN).
    """
    p = CraneParameters() if params is None else params
    vw = p.design_wind if wind is None else float(wind)
    _, m = _length_and_mass(point, p)
    Fw = p.drag_factor * vw * abs(vw)
    th = float(np.arctan2(Fw, m * p.gravity))
    return np.array([0.0, 0.0, th, 0.0, -Fw / 1000.0]), np.array([-Fw / 1000.0, vw, 0.0])


def linear_plant_at(point: Mapping[str, float]) -> LinearPlant:
    """Trim the demo crane at rest under the design wind (8 m/s) and linearize it.

    This is the ``source.model`` function of the bundled design file.

    Parameters
    ----------
    point : mapping
        ``{"rope_length": L [m], "payload_mass": m_p [kg]}``.

    Returns
    -------
    LinearPlant
        5 states, inputs (force_command, wind_speed, disturbance_force), outputs
        (trolley_position, sway_angle, motor_force); complex-step Jacobians at
        the trim point (trim residual checked to 1e-10 in scaled units).
    """
    model = crane_model()
    x0, u0 = trim_at_rest(point)
    result = trim(model, point, x0=x0, u0=u0,
                  free_states=("sway_angle", "motor_force"), free_inputs=("force_command",),
                  tol=1e-10)
    return linearize(model, result.x, result.u, point, method="complex")


def energy(x, point: Mapping[str, float], params: CraneParameters | None = None) -> float:
    """Mechanical energy [J]: trolley and payload kinetic energy plus payload potential energy.

    ``E = 1/2 (M + m) v^2 + m v L omega cos(th) + 1/2 m L^2 omega^2 - m g L cos(th)``
    (constant rope length). Conserved without friction, wind and motor force.
    """
    p = CraneParameters() if params is None else params
    L, m = _length_and_mass(point, p)
    _, v, th, om = x[0], x[1], x[2], x[3]
    return float(0.5 * (p.trolley_mass + m) * v * v + m * v * L * om * np.cos(th)
                 + 0.5 * m * L * L * om * om - m * p.gravity * L * np.cos(th))


def horizontal_momentum(x, point: Mapping[str, float],
                        params: CraneParameters | None = None) -> float:
    """Horizontal momentum [kg m/s] of trolley and payload.

    ``P = (M + m) v + m (Ldot sin(th) + L omega cos(th))``; conserved without
    friction, wind and motor force, also while hoisting (x is a cyclic coordinate).
    """
    p = CraneParameters() if params is None else params
    L, m = _length_and_mass(point, p)
    Ld = point.get("rope_length_rate", 0.0)
    _, v, th, om = x[0], x[1], x[2], x[3]
    return float((p.trolley_mass + m) * v + m * (Ld * np.sin(th) + L * om * np.cos(th)))
