"""Weights in requirement terms and the mixed-sensitivity generalized plant.

Every weight is a SISO transfer function, stated in the terms of the
requirement it encodes (docs/design-file.md):

- **performance** (peak sensitivity ``M``, bandwidth ``wB`` in rad/s,
  low-frequency error ``A``), the usual first-order performance weight
  (Skogestad and Postlethwaite, Multivariable Feedback Control, 2nd ed. 2005,
  sec. 2.8, eq. 2.72; from memory)::

      W_P(s) = (s / M + wB) / (s + wB A)

  so ``|W_P(0)| = 1 / A`` (errors above A cost more than 1 at low frequency),
  ``|W_P(j inf)| = 1 / M`` (an error amplification up to M is tolerated at
  high frequency) and ``|W_P(j wB)|^2 = (1 + 1/M^2) / (1 + A^2)``, close to 1
  when A << 1 << M: the weight crosses 1 near the bandwidth;
- **effort** (actuator limit ``u_max``; optionally the actuator bandwidth
  ``wa`` in rad/s and the command ``u_hf`` the actuator still follows at high
  frequency)::

      W_u(s) = 1 / u_max                                 (limit only)
      W_u(s) = (s + wa) / (u_hf s + u_max wa)            (with a bandwidth)

  so ``|W_u(0)| = 1 / u_max``, ``|W_u(j inf)| = 1 / u_hf`` and the rise
  starts at the zero ``s = -wa``: above the actuator bandwidth the allowed
  command falls from u_max towards u_hf;
- **noise** and **disturbance** (``level``, the size of the sensor noise or of
  the disturbance in the signal's unit): the static gain ``W = level``;
- **static** ``gain`` and **transfer** ``W(s) = k prod(s - z_i) / prod(s - p_j)``
  (zeros, poles and the leading gain k) for anything else.

The first-order forms are the same function
``W(s) = (H s + a L) / (s + a)`` with ``L = |W(0)|``, ``H = |W(j inf)|`` and
pole ``a``, realized as ``xdot = -a x + a v``, ``out = (L - H) x + H v``: the
state is the weighted signal low-pass filtered at ``a``, so it means the same
thing at every operating point. A transfer weight is realized in controllable
canonical form (scipy.signal.zpk2ss); its poles are constant, so its state
coordinates are too. A static gain has no state. (Mixed-sensitivity design:
Zhou, Doyle and Glover 1996, ch. 6; Skogestad and Postlethwaite 2005, sec. 3.8.)

The arrangement (see docs/design-file.md)::

    w = [w_d (one per disturbance input); w_n (one per measured output)]
    d = Wd w_d, n = Wn w_n
    plant: xdot = A x + B_u u + B_d d,   y_all = C x + D_u u + D_d d
    z = [Wp_i y_perf_i for each performance output; Wu_j u_j for each control]
    y = y_meas + n

Plant inputs that are neither controls nor disturbances are held at zero.
States: the plant states first, then the weight states in the order
w_perf, w_effort, w_noise, w_dist, so the state coordinates are the same at
every operating point.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .design_file import DesignSpec, WeightSpec, number_at
from .errors import InputError
from .types import LinearPlant, point_text

__all__ = ["Weight", "NamedChannels", "performance_weight", "effort_weight", "static_weight",
           "transfer_weight", "weight_at", "channel_names", "build_generalized_plant",
           "build_generalized_plant_named", "point_dict"]

# Prefixes of the weight states, in the order they are appended.
STATE_PREFIX = {"performance": "w_perf", "effort": "w_effort", "noise": "w_noise",
                "disturbance": "w_dist"}


@dataclass(frozen=True, eq=False)
class Weight:
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
        eye = np.eye(self.n)
        out = [self.c @ np.linalg.solve(1j * w * eye - self.a, self.b) + self.d
               for w in omega.ravel()]
        return np.array([complex(o[0, 0]) for o in out]).reshape(omega.shape)


@dataclass(frozen=True)
class NamedChannels:
    """Signal names of a generalized plant built by :func:`build_generalized_plant_named`.

    ``units`` maps each group ("exogenous", "performance", "measured",
    "controls", "states") to one unit per signal ("" when unknown). For the
    exogenous and performance channels it is the unit of the plant signal
    behind the channel (w and z themselves are weighted, normalized signals).
    """

    exogenous: tuple[str, ...]
    performance: tuple[str, ...]
    measured: tuple[str, ...]
    controls: tuple[str, ...]
    states: tuple[str, ...]
    units: Mapping[str, tuple[str, ...]] | None = None


def _lag_weight(low: float, high: float, pole: float) -> Weight:
    """``W(s) = (H s + a L)/(s + a)`` realized as ``xdot = -a x + a v``, ``out = (L-H) x + H v``."""
    return Weight(np.array([[-pole]]), np.array([[pole]]), np.array([[low - high]]),
                  np.array([[high]]))


def _positive(**numbers: float) -> None:
    for name, x in numbers.items():
        if not (np.isfinite(x) and x > 0):
            raise InputError(f"{name} = {x:g} must be a finite number > 0")


def performance_weight(peak_sensitivity: float, bandwidth: float,
                       low_frequency_error: float) -> Weight:
    """The first-order performance weight ``W_P(s) = (s / M + wB) / (s + wB A)``.

    Skogestad and Postlethwaite, Multivariable Feedback Control, 2nd ed. 2005,
    sec. 2.8, eq. 2.72 (from memory): ``1 / |W_P|`` bounds the weighted
    signal's transfer, so

    - ``|W_P(0)| = wB / (wB A) = 1 / A``: at low frequency the error may be A;
    - ``|W_P(j inf)| = 1 / M``: at high frequency a peak amplification M is allowed;
    - ``|W_P(j wB)|^2 = (wB^2/M^2 + wB^2) / (wB^2 + wB^2 A^2) = (1 + 1/M^2) / (1 + A^2)``.

    Parameters
    ----------
    peak_sensitivity : M > 0, the largest amplification tolerated (at high frequency).
    bandwidth : wB > 0 in rad/s, where the weight falls through about 1.
    low_frequency_error : A, 0 < A < M, the error tolerated at low frequency.

    Returns
    -------
    Weight with one state (pole at ``-wB A``).

    Raises
    ------
    InputError
        A number is not positive and finite, or A >= M (the weight would not
        fall with frequency).
    """
    M, wB, A = float(peak_sensitivity), float(bandwidth), float(low_frequency_error)
    _positive(peak_sensitivity=M, bandwidth=wB, low_frequency_error=A)
    if not A < M:
        raise InputError(f"low_frequency_error = {A:g} is not below peak_sensitivity = {M:g}, "
                         "so the weight does not fall with frequency; give A < M")
    return _lag_weight(1.0 / A, 1.0 / M, wB * A)


def effort_weight(limit: float, bandwidth: float | None = None,
                  high_frequency_limit: float | None = None) -> Weight:
    """The effort weight of an actuator with a command limit and a bandwidth.

    ``W_u = 1 / u_max`` (limit only), or ``W_u(s) = (s + wa) / (u_hf s + u_max wa)``:

    - ``|W_u(0)| = wa / (u_max wa) = 1 / u_max``: a command of the size of the
      limit costs 1 at low frequency;
    - ``|W_u(j inf)| = 1 / u_hf``: at high frequency only u_hf is allowed;
    - the zero at ``-wa`` starts the rise at the actuator bandwidth
      (``|W_u(j wa)| = sqrt(2) / sqrt(u_hf^2 + u_max^2)``, about sqrt(2) / u_max).

    Parameters
    ----------
    limit : u_max > 0, the largest command (in the control's unit).
    bandwidth : wa > 0 in rad/s, the actuator bandwidth (None: a static weight).
    high_frequency_limit : u_hf, 0 < u_hf < u_max, the command followed at high
        frequency; required with ``bandwidth``.
    """
    u_max = float(limit)
    _positive(limit=u_max)
    if bandwidth is None and high_frequency_limit is None:
        return static_weight(1.0 / u_max)
    if bandwidth is None or high_frequency_limit is None:
        raise InputError("an effort weight with a bandwidth needs both bandwidth and "
                         "high_frequency_limit; give both or only limit")
    wa, u_hf = float(bandwidth), float(high_frequency_limit)
    _positive(bandwidth=wa, high_frequency_limit=u_hf)
    if not u_hf < u_max:
        raise InputError(f"high_frequency_limit = {u_hf:g} is not below limit = {u_max:g}; "
                         "the command allowed above the actuator bandwidth must be smaller")
    # (s + wa)/(u_hf s + u_max wa) = (H s + a L)/(s + a) with H = 1/u_hf, L = 1/u_max,
    # a = wa u_max / u_hf
    return _lag_weight(1.0 / u_max, 1.0 / u_hf, wa * u_max / u_hf)


def static_weight(gain: float) -> Weight:
    """A static gain as a weight with no state."""
    return Weight(np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)),
                  np.array([[float(gain)]]))


def transfer_weight(zeros: Sequence[complex], poles: Sequence[complex], gain: float) -> Weight:
    """``W(s) = k prod(s - z_i) / prod(s - p_j)`` in controllable canonical form.

    Complex zeros and poles must come with their conjugates. The weight must be
    proper (no more zeros than poles), stable (poles in the open left half
    plane) and have no zero on the imaginary axis (the generalized plant would
    lose its rank conditions there).

    Raises
    ------
    InputError
        Naming the offending zero or pole.
    """
    import scipy.signal

    z = np.asarray(list(zeros), dtype=complex).reshape(-1)
    p = np.asarray(list(poles), dtype=complex).reshape(-1)
    k = float(gain)
    if not (np.isfinite(k) and k > 0):
        raise InputError(f"gain = {k:g} must be a finite number > 0")
    if z.size > p.size:
        raise InputError(f"{z.size} zeros and {p.size} poles: the weight is not proper; give "
                         "at least as many poles as zeros")
    for what, roots in (("zero", z), ("pole", p)):
        if not np.isfinite(roots).all():
            raise InputError(f"a {what} is not finite; give finite numbers")
        for r in roots:
            if abs(r.imag) > 0 and not np.any(np.isclose(roots, np.conj(r), rtol=1e-12,
                                                         atol=0.0)):
                raise InputError(f"{what} {r:g} has no conjugate; give complex {what}s as "
                                 "[real, imaginary] pairs (the conjugate is implied)")
    bad = p[p.real >= 0]
    if bad.size:
        raise InputError(f"pole {bad[0]:g} is not in the open left half plane; a weight must "
                         "be stable")
    onaxis = z[np.abs(z.real) <= 1e-12 * np.maximum(1.0, np.abs(z))]
    if onaxis.size:
        raise InputError(f"zero {onaxis[0]:g} lies on the imaginary axis; the generalized "
                         "plant would lose rank there: move it into the left half plane")
    if p.size == 0:
        return static_weight(k)
    a, b, c, d = scipy.signal.zpk2ss(z, p, k)
    return Weight(np.asarray(a, float), np.asarray(b, float).reshape(-1, 1),
                  np.asarray(c, float).reshape(1, -1), np.asarray(d, float).reshape(1, 1))


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


def weight_at(w: WeightSpec, point: Mapping[str, float]) -> Weight:
    """Evaluate a (possibly scheduled) weight of the design at ``point``.

    Raises
    ------
    InputError
        The weight's numbers are invalid there (the message names the key
        path and the point).
    """
    n = {k: number_at(v, point) for k, v in w.numbers().items()}
    try:
        if w.kind == "performance":
            return performance_weight(n["peak_sensitivity"], n["bandwidth"],
                                      n["low_frequency_error"])
        if w.kind == "effort":
            return effort_weight(n["limit"], n.get("bandwidth"), n.get("high_frequency_limit"))
        if w.kind == "level":
            _positive(level=n["level"])
            return static_weight(n["level"])
        if w.kind == "transfer":
            return transfer_weight(w.zeros, w.poles, n["gain"])
        if w.kind == "static":
            _positive(gain=n["gain"])
            return static_weight(n["gain"])
    except InputError as exc:
        where = f" at {point_text(point)}" if point else ""
        raise InputError(f"{w.key}{where}: {exc}") from None
    raise InputError(f"{w.key}: unknown weight kind {w.kind!r}")  # pragma: no cover


def _order(w: WeightSpec) -> int:
    """Number of states of a weight of the design (the same at every point)."""
    if w.kind == "performance" or (w.kind == "effort" and w.bandwidth is not None):
        return 1
    return len(w.poles) if w.kind == "transfer" else 0


def channel_names(spec: DesignSpec, plant: LinearPlant) -> NamedChannels:
    """Signal and state names of the generalized plant (the same at every point), with units.

    A unit comes from ``channels.units`` of the design, else from the plant
    (:class:`schedule.types.LinearPlant` units), else it is "". A weight state
    that low-pass filters a plant signal (performance and effort weights) has
    that signal's unit; the states of noise and disturbance weights (driven by
    normalized inputs) and of transfer weights have none.
    """
    c, ws = spec.channels, spec.weights

    def units(names, kind):
        return tuple(c.unit_of(n, plant, kind) for n in names)

    n = np.shape(plant.A)[0]
    states = list(plant.state_names) or [f"x{i + 1}" for i in range(n)]
    state_units = list(plant.state_units) if len(plant.state_units) == n else [""] * n
    kinds = {"performance": "output", "effort": "input"}
    for group in ("performance", "effort", "noise", "disturbance"):
        for w in getattr(ws, group):
            order = _order(w)
            states += ([f"{STATE_PREFIX[group]}:{w.channel}"] if order == 1 else
                       [f"{STATE_PREFIX[group]}:{w.channel}:{k + 1}" for k in range(order)])
            filtered = group in kinds and w.kind != "transfer"
            state_units += [c.unit_of(w.channel, plant, kinds[group]) if filtered else ""] * order
    unit_map = {
        "exogenous": units(c.disturbances, "input") + units(c.measured, "output"),
        "performance": units(c.performance, "output") + units(c.controls, "input"),
        "measured": units(c.measured, "output"), "controls": units(c.controls, "input"),
        "states": tuple(state_units)}
    return NamedChannels(
        exogenous=tuple(f"d:{n}" for n in c.disturbances) + tuple(f"n:{n}" for n in c.measured),
        performance=tuple(f"e:{n}" for n in c.performance) + tuple(f"u:{n}" for n in c.controls),
        measured=tuple(c.measured), controls=tuple(c.controls), states=tuple(states),
        units=unit_map)


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


def _given_generalized_plant(A, B, C, D, ch, ins, outs, plant):
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
    n = A.shape[0]
    su = tuple(plant.state_units) if len(plant.state_units) == n else ("",) * n

    def units(names, kind):
        return tuple(ch.unit_of(s, plant, kind) for s in names)

    names = NamedChannels(exogenous=tuple(ch.disturbances), performance=tuple(ch.performance),
                          measured=tuple(ch.measured), controls=tuple(ch.controls),
                          states=tuple(plant.state_names) or tuple(f"x{k + 1}"
                                                                   for k in range(n)),
                          units={"exogenous": units(ch.disturbances, "input"),
                                 "performance": units(ch.performance, "output"),
                                 "measured": units(ch.measured, "output"),
                                 "controls": units(ch.controls, "input"), "states": su})
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
        return _given_generalized_plant(A, B, C, D, ch, ins, outs, linear_plant)
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
                rows = slice(k - offs[group], k - offs[group] + w.n)
                out[i, k:k + w.n] += w.c[0]
                deriv[rows] = w.b[:, :1] * inputs[i]
                deriv[rows, k:k + w.n] += w.a
                k += w.n
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
