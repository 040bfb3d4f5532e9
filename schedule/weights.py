"""Weights and the mixed-sensitivity generalized plant.

A first-order weight with low-frequency gain ``L = |W(0)|``, crossover ``wc``
(where ``|W(j wc)| = 1``) and high-frequency gain ``H = |W(j inf)|`` is::

    W(s) = (H s + a L) / (s + a),   a = wc * sqrt((1 - H^2) / (L^2 - 1))

because ``|W(j w)|^2 = (H^2 w^2 + a^2 L^2) / (w^2 + a^2)`` equals 1 at
``w = wc`` exactly for that ``a``; a real ``a > 0`` exists when L and H lie on
opposite sides of 1. Its realization is ``xdot = -a x + a v``,
``out = (L - H) x + H v``: the state is the input ``v`` low-pass filtered at
``a``, so it means the same thing at every operating point. A static gain has
no state. This is the usual loop-shaping weight of mixed-sensitivity H-infinity
design (Skogestad and Postlethwaite, Multivariable Feedback Control, 2nd ed.
2005, section 3.8 / eq. 2.72 for the performance weight form; Zhou, Doyle and
Glover 1996, ch. 6).

The arrangement (see docs/design-file.md)::

    w = [w_d (one per disturbance input); w_n (one per measured output)]
    d = Wd w_d, n = Wn w_n
    plant: xdot = A x + B_u u + B_d d,   y_all = C x + D_u u + D_d d
    z = [Wp_i y_perf_i for each performance output; Wu_j u_j for each control]
    y = y_meas + n

Plant inputs that are neither controls nor disturbances are held at zero.
States: the plant states first, then the weight states in the order
w_perf, w_effort, w_noise, w_dist (one per first-order weight), so the state
coordinates are the same at every operating point.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from .design_file import DesignSpec, WeightSpec, number_at
from .errors import InputError
from .types import LinearPlant, point_text

__all__ = ["FirstOrderWeight", "NamedChannels", "first_order_weight", "static_weight",
           "weight_at", "channel_names", "build_generalized_plant",
           "build_generalized_plant_named", "point_dict"]

# Prefixes of the weight states, in the order they are appended.
STATE_PREFIX = {"performance": "w_perf", "effort": "w_effort", "noise": "w_noise",
                "disturbance": "w_dist"}


@dataclass(frozen=True, eq=False)
class FirstOrderWeight:
    """A SISO weight as state space (a, b, c, d); a static gain has 0 states."""

    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray

    @property
    def n(self) -> int:
        return int(self.a.shape[0])

    def response(self, omega: np.ndarray) -> np.ndarray:
        """Complex frequency response W(j omega)."""
        omega = np.asarray(omega, dtype=float)
        if self.n == 0:
            return np.full(omega.shape, complex(self.d[0, 0]))
        return self.d[0, 0] + self.c[0, 0] * self.b[0, 0] / (1j * omega - self.a[0, 0])


@dataclass(frozen=True)
class NamedChannels:
    """Signal names of a generalized plant built by :func:`build_generalized_plant_named`."""

    exogenous: tuple[str, ...]
    performance: tuple[str, ...]
    measured: tuple[str, ...]
    controls: tuple[str, ...]
    states: tuple[str, ...]


def crossover_pole(low_frequency_gain: float, crossover: float,
                   high_frequency_gain: float) -> float:
    """The pole ``a`` of W(s) = (H s + a L)/(s + a) that puts |W(j crossover)| = 1.

    ``a = crossover * sqrt((1 - H^2) / (L^2 - 1))``; needs L and H on opposite
    sides of 1 (raises InputError otherwise).
    """
    L, wc, H = float(low_frequency_gain), float(crossover), float(high_frequency_gain)
    if not (np.isfinite(L) and np.isfinite(wc) and np.isfinite(H)) or L <= 0 or wc <= 0 \
            or H < 0:
        raise InputError(f"weight numbers L={L:g}, crossover={wc:g}, H={H:g} are invalid; "
                         "need L > 0, crossover > 0, H >= 0")
    ratio = (1.0 - H * H) / (L * L - 1.0) if L != 1.0 else -1.0
    if not ratio > 0:
        raise InputError(f"weight gains L={L:g} and H={H:g} do not straddle 1, so |W| never "
                         "crosses 1; make one gain > 1 and the other < 1")
    return wc * float(np.sqrt(ratio))


def first_order_weight(low_frequency_gain: float, crossover: float,
                       high_frequency_gain: float) -> FirstOrderWeight:
    """First-order weight ``W(s) = (H s + a L)/(s + a)`` with ``|W(j crossover)| = 1``.

    Parameters
    ----------
    low_frequency_gain : L = |W(0)| > 0.
    crossover : wc > 0 (rad/s), the frequency where |W(j wc)| = 1.
    high_frequency_gain : H = |W(j inf)| >= 0, on the other side of 1 from L.

    Returns
    -------
    FirstOrderWeight with a = [[-p]], b = [[p]], c = [[L - H]], d = [[H]],
    p = crossover_pole(L, wc, H).

    Examples
    --------
    >>> w = first_order_weight(100.0, 0.3, 0.5)
    >>> bool(abs(abs(w.response(np.array([0.3]))[0]) - 1.0) < 1e-12)
    True
    """
    p = crossover_pole(low_frequency_gain, crossover, high_frequency_gain)
    L, H = float(low_frequency_gain), float(high_frequency_gain)
    return FirstOrderWeight(np.array([[-p]]), np.array([[p]]), np.array([[L - H]]),
                            np.array([[H]]))


def static_weight(gain: float) -> FirstOrderWeight:
    """A static gain as a weight with no state."""
    return FirstOrderWeight(np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)),
                            np.array([[float(gain)]]))


def point_dict(spec: DesignSpec, point) -> dict[str, float]:
    """A point as {variable name: value}; accepts a mapping or a (d,) sequence."""
    names = spec.variable_names
    if isinstance(point, Mapping):
        missing = [n for n in names if n not in point]
        if missing:
            raise InputError(f"point lacks scheduling variable '{missing[0]}'; give values "
                             f"for {', '.join(names)}")
        return {n: float(point[n]) for n in names}
    arr = np.asarray(point, dtype=float).reshape(-1)
    if arr.size != len(names):
        raise InputError(f"point has {arr.size} values for {len(names)} scheduling variables "
                         f"({', '.join(names)}); give one value per variable")
    return dict(zip(names, arr.tolist(), strict=False))


def weight_at(w: WeightSpec, point: Mapping[str, float]) -> FirstOrderWeight:
    """Evaluate a (possibly scheduled) weight of the design at ``point``."""
    if w.kind == "static":
        g = number_at(w.gain, point)
        if not (np.isfinite(g) and g > 0):
            raise InputError(f"{w.key}.gain is {g:g} at {point_text(point)}; give a gain > 0")
        return static_weight(g)
    L = number_at(w.low_frequency_gain, point)
    wc = number_at(w.crossover, point)
    H = number_at(w.high_frequency_gain, point)
    try:
        return first_order_weight(L, wc, H)
    except InputError as exc:
        raise InputError(f"{w.key} at {point_text(point)}: {exc}") from None


def channel_names(spec: DesignSpec, plant: LinearPlant) -> NamedChannels:
    """Signal and state names of the generalized plant (the same at every point)."""
    c, ws = spec.channels, spec.weights
    states = list(plant.state_names) or [f"x{i + 1}" for i in range(np.shape(plant.A)[0])]
    for group in ("performance", "effort", "noise", "disturbance"):
        for w in getattr(ws, group):
            if w.kind == "first_order":
                states.append(f"{STATE_PREFIX[group]}:{w.channel}")
    return NamedChannels(
        exogenous=tuple(f"d:{n}" for n in c.disturbances) + tuple(f"n:{n}" for n in c.measured),
        performance=tuple(f"e:{n}" for n in c.performance) + tuple(f"u:{n}" for n in c.controls),
        measured=tuple(c.measured), controls=tuple(c.controls), states=tuple(states))


def build_generalized_plant(spec: DesignSpec, linear_plant: LinearPlant, point):
    """The mixed-sensitivity generalized plant of ``linear_plant`` at ``point``.

    See the module docstring for the arrangement. ``point`` is a mapping
    {variable: value} or a (d,) sequence in the order of the design's
    variables (scheduled weight numbers are evaluated there).

    Returns
    -------
    schedule.plant.GeneralizedPlant
    """
    return build_generalized_plant_named(spec, linear_plant, point)[0]


def _given_generalized_plant(A, B, C, D, ch, ins, outs, state_names):
    """Partition a plant that already is the generalized plant (arrangement "generalized").

    w = the plant inputs listed as disturbances, u = the controls; z = the
    outputs listed as performance, y = the measured ones (in the listed order).
    """
    from .plant import GeneralizedPlant

    iw = [ins.index(s) for s in ch.disturbances]
    iu = [ins.index(s) for s in ch.controls]
    iz = [outs.index(s) for s in ch.performance]
    iy = [outs.index(s) for s in ch.measured]
    gp = GeneralizedPlant(A=A, B1=B[:, iw], B2=B[:, iu], C1=C[iz], C2=C[iy],
                          D11=D[np.ix_(iz, iw)], D12=D[np.ix_(iz, iu)],
                          D21=D[np.ix_(iy, iw)], D22=D[np.ix_(iy, iu)])
    names = NamedChannels(exogenous=tuple(ch.disturbances), performance=tuple(ch.performance),
                          measured=tuple(ch.measured), controls=tuple(ch.controls),
                          states=tuple(state_names) or tuple(f"x{k + 1}"
                                                             for k in range(A.shape[0])))
    return gp, names


def build_generalized_plant_named(spec: DesignSpec, linear_plant: LinearPlant, point):
    """Like :func:`build_generalized_plant`, also returning the :class:`NamedChannels`.

    Raises
    ------
    InputError
        a channel is not a plant signal (names the channel and lists the
        plant's names), or a weight is invalid at this point.
    """
    from .design_file import validate_against_plant
    from .plant import GeneralizedPlant

    validate_against_plant(spec, linear_plant)
    pt = point_dict(spec, point)
    A = np.asarray(linear_plant.A, dtype=float)
    B = np.asarray(linear_plant.B, dtype=float)
    C = np.asarray(linear_plant.C, dtype=float)
    D = np.asarray(linear_plant.D, dtype=float)
    n = A.shape[0]
    if A.shape != (n, n) or B.shape[0] != n or C.shape[1] != n or D.shape != (C.shape[0],
                                                                               B.shape[1]):
        raise InputError(f"plant at {point_text(pt)} has inconsistent shapes A{A.shape} B{B.shape} "
                         f"C{C.shape} D{D.shape}; fix the model")
    for name, M in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.isfinite(M).all():
            raise InputError(f"plant matrix {name} at {point_text(pt)} holds NaN or inf; fix the "
                             "linearization")
    ch, ws = spec.channels, spec.weights
    ins, outs = list(linear_plant.input_names), list(linear_plant.output_names)
    if ch.arrangement == "generalized":
        return _given_generalized_plant(A, B, C, D, ch, ins, outs, linear_plant.state_names)
    iu = [ins.index(s) for s in ch.controls]
    idd = [ins.index(s) for s in ch.disturbances]
    im = [outs.index(s) for s in ch.measured]
    ip = [outs.index(s) for s in ch.performance]

    groups = {g: [weight_at(w, pt) for w in getattr(ws, g)]
              for g in ("performance", "effort", "noise", "disturbance")}
    counts = {g: sum(w.n for w in lst) for g, lst in groups.items()}
    nd, nm, nu = len(idd), len(im), len(iu)
    # Column layout of every signal map: [x, x_perf, x_eff, x_noise, x_dist | w_d, w_n | u]
    offs = {"plant": 0}
    o = n
    for g in ("performance", "effort", "noise", "disturbance"):
        offs[g] = o
        o += counts[g]
    nx = o
    nw = nd + nm
    ncol = nx + nw + nu
    col_wd, col_wn, col_u = nx, nx + nd, nx + nw

    def zeros(rows: int) -> np.ndarray:
        return np.zeros((rows, ncol))

    # Basic signals as linear maps of [X; w; u].
    xsig = zeros(n)
    xsig[:, :n] = np.eye(n)
    usig = zeros(nu)
    usig[:, col_u:col_u + nu] = np.eye(nu)

    def weight_outputs(group: str, inputs: np.ndarray):
        """Rows mapping [X; w; u] to the weight outputs, and the weight-state derivative rows."""
        out = zeros(len(groups[group]))
        deriv = zeros(counts[group])
        k = offs[group]
        for i, w in enumerate(groups[group]):
            out[i] = w.d[0, 0] * inputs[i]
            if w.n:
                out[i, k] += w.c[0, 0]
                deriv[k - offs[group]] = w.b[0, 0] * inputs[i]
                deriv[k - offs[group], k] += w.a[0, 0]
                k += 1
        return out, deriv

    wd_in = zeros(nd)
    wd_in[:, col_wd:col_wd + nd] = np.eye(nd)
    wn_in = zeros(nm)
    wn_in[:, col_wn:col_wn + nm] = np.eye(nm)
    dsig, dx_dist = weight_outputs("disturbance", wd_in)
    nsig, dx_noise = weight_outputs("noise", wn_in)

    Bu, Bd = B[:, iu], B[:, idd]
    dx_plant = A @ xsig + Bu @ usig + Bd @ dsig
    y_all = C @ xsig + D[:, iu] @ usig + D[:, idd] @ dsig
    zp, dx_perf = weight_outputs("performance", y_all[ip])
    zu, dx_eff = weight_outputs("effort", usig)
    ymeas = y_all[im] + nsig

    state_rows = np.vstack([dx_plant, dx_perf, dx_eff, dx_noise, dx_dist])
    z_rows = np.vstack([zp, zu])
    gp = GeneralizedPlant(
        A=state_rows[:, :nx], B1=state_rows[:, nx:nx + nw], B2=state_rows[:, col_u:],
        C1=z_rows[:, :nx], C2=ymeas[:, :nx],
        D11=z_rows[:, nx:nx + nw], D12=z_rows[:, col_u:],
        D21=ymeas[:, nx:nx + nw], D22=ymeas[:, col_u:])
    return gp, channel_names(spec, linear_plant)
