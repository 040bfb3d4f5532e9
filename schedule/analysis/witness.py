"""Witnesses from the other side: parameter trajectories that make the loop look bad.

A certificate (:mod:`.lpv_certificate`) says "no trajectory with rates inside
the box can do worse than this". A witness is one trajectory inside the box
together with what a simulation of the frozen-matrix loop
``x' = A(p(t)) x + B(p(t)) w``, ``z = C(p(t)) x + D(p(t)) w`` shows for it:

- instability: p moves periodically, ``p_j(t) = c + a s(Omega t)`` with a sine
  or a triangle wave ``s``, the others held; the loop is then a periodic
  linear system and it is unstable exactly when its monodromy matrix (the
  state transition over one period) has an eigenvalue outside the unit circle
  (Floquet theory; e.g. Yakubovich and Starzhinskii 1975). The smallest rate
  at which such a trajectory is found unstable bounds the certifiable rate
  from above.
- gain: with x(0) = 0 and a sinusoidal input w at the frozen loop's peak
  frequency, ``(int |z|^2 / int |w|^2)^(1/2)`` over a finite horizon is a lower
  bound of the induced L2 gain along that trajectory, to be compared with the
  certified gamma(nu).

The periods tried are the loop's sensitive frequencies: modulation at twice
and once the damped frequency of its lightly damped modes (parametric
resonance, the Mathieu mechanism) and at the peak frequency of its frozen
gain. Simulations use :func:`schedule.rate.simulate_varying` (scipy's RK45).
The loop along the path is sampled once and interpolated linearly in p_j
between samples (``path_samples``), so the model is the frozen-matrix LPV loop
up to that interpolation.

This is a search, not a proof: finding nothing unstable up to some rate does
not prove stability there. The LPV loop itself is the frozen-matrix model; the
nonlinear plant under moving parameters has extra terms (Shamma and Athans
1990; Leith and Leithead 2000) that neither side sees - simulate the
nonlinear model too (``schedule simulate``).

References
----------
V. A. Yakubovich, V. M. Starzhinskii, Linear Differential Equations with
Periodic Coefficients, Wiley, 1975.
J. S. Shamma, M. Athans, IEEE Trans. Automatic Control 35(8), 1990.
D. J. Leith, W. E. Leithead, "Survey of gain-scheduling analysis and design",
Int. J. Control 73(11), 2000, doi:10.1080/002071700414149.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..types import SchedulingVariable, point_text

__all__ = ["Trajectory", "WitnessResult", "floquet_multiplier", "energy_gain",
           "search_witness", "path_loop"]


@dataclass(frozen=True)
class Trajectory:
    """``p(t) = base`` except ``p_j(t) = centre + amplitude * wave(frequency * t)``.

    wave : "sine" or "triangle" (period 2 pi / frequency). The largest rate is
    ``amplitude * frequency`` (sine) or ``2 amplitude frequency / pi`` (triangle).
    """

    base: np.ndarray
    index: int
    centre: float
    amplitude: float
    frequency: float
    wave: str = "sine"

    @property
    def rate(self) -> float:
        k = 1.0 if self.wave == "sine" else 2.0 / np.pi
        return float(self.amplitude * self.frequency * k)

    @property
    def period(self) -> float:
        return float(2.0 * np.pi / self.frequency)

    def __call__(self, t: float) -> np.ndarray:
        p = np.array(self.base, dtype=float)
        phase = self.frequency * t
        s = np.sin(phase)
        if self.wave == "triangle":  # same zeros and peaks as the sine, constant slope
            s = 2.0 / np.pi * np.arcsin(np.clip(s, -1.0, 1.0))
        p[self.index] = self.centre + self.amplitude * s
        return p

    def describe(self, names: Sequence[str]) -> str:
        j = self.index
        others = [i for i in range(len(names)) if i != j]
        held = point_text([names[i] for i in others], [self.base[i] for i in others])
        return (f"{names[j]} = {self.centre:.4g} + {self.amplitude:.4g} {self.wave}"
                f"({self.frequency:.4g} t)" + (f", {held}" if held else ""))


def path_loop(loop_at: Callable, base, index: int, lower: float, upper: float,
              samples: int = 65):
    """The loop along p_j in [lower, upper] (others at ``base``), sampled and interpolated.

    Returns ``p -> (A, B, C, D)`` (single matrices), linear in p_j between samples.
    """
    base = np.asarray(base, dtype=float)
    grid = np.linspace(lower, upper, int(samples)) if upper > lower else np.array([lower])
    pts = np.repeat(base[None], grid.size, axis=0)
    pts[:, index] = grid
    mats = [np.asarray(x, dtype=float) for x in loop_at(pts)]

    def at(p):
        x = float(p[index])
        if grid.size == 1:
            return tuple(m[0] for m in mats)
        k = int(np.clip(np.searchsorted(grid, x) - 1, 0, grid.size - 2))
        w = (x - grid[k]) / (grid[k + 1] - grid[k])
        w = min(max(w, 0.0), 1.0)
        return tuple((1 - w) * m[k] + w * m[k + 1] for m in mats)

    return at


def floquet_multiplier(loop_path, trajectory: Trajectory) -> float:
    """Spectral radius of the monodromy matrix over one period of ``trajectory``.

    The transition matrix Phi(T) solves ``Phi' = A(p(t)) Phi``, Phi(0) = I;
    integrated as ``vec(Phi)' = (I kron A) vec(Phi)`` with
    :func:`schedule.rate.simulate_varying`. Above 1: the periodic loop is unstable.
    """
    from ..rate import simulate_varying

    A0 = loop_path(trajectory(0.0))[0]
    n = A0.shape[0]
    eye = np.eye(n)

    def state_matrix(p):
        return np.kron(eye, loop_path(p)[0])

    _, X = simulate_varying(state_matrix, trajectory, eye.reshape(-1, order="F"),
                            trajectory.period, samples=2)
    Phi = X[-1].reshape(n, n, order="F")
    return float(np.max(np.abs(np.linalg.eigvals(Phi))))


def energy_gain(loop_path, trajectory: Trajectory, input_frequency: float, direction,
                periods: float = 20.0) -> float:
    """``sqrt(int |z|^2 / int |w|^2)`` from x(0) = 0, ``w = direction sin(omega t)``.

    A lower bound of the induced L2 gain of the loop along ``trajectory`` (the
    input, cut at the horizon, is one admissible L2 signal). The input is
    generated inside the simulation by an oscillator state, so the system is
    autonomous and :func:`schedule.rate.simulate_varying` applies.
    """
    from scipy.integrate import trapezoid

    from ..rate import simulate_varying

    A0, B0, C0, D0 = loop_path(trajectory(0.0))
    n, nw = B0.shape
    u = np.asarray(direction, dtype=float).reshape(nw)
    u = u / max(np.linalg.norm(u), 1e-300)
    om = float(input_frequency)
    horizon = periods * 2 * np.pi / om + 2 * trajectory.period
    samples = int(min(max(60 * horizon * om / (2 * np.pi), 400), 20000))

    def state_matrix(p):
        A, B, _, _ = loop_path(p)
        out = np.zeros((n + 2, n + 2))
        out[:n, :n] = A
        out[:n, n] = B @ u  # w = u xi_1, xi = (sin, cos)
        out[n, n + 1] = om
        out[n + 1, n] = -om
        return out

    x0 = np.zeros(n + 2)
    x0[n + 1] = 1.0  # xi_1 = sin(om t), xi_2 = cos(om t)
    t, X = simulate_varying(state_matrix, trajectory, x0, horizon, samples=samples,
                            max_step=0.05 * 2 * np.pi / om)
    z = np.empty((t.size, C0.shape[0]))
    for i, ti in enumerate(t):
        _, _, C, D = loop_path(trajectory(ti))
        z[i] = C @ X[i, :n] + D @ (u * X[i, n])
    ez = trapezoid(np.sum(z ** 2, axis=1), t)
    ew = trapezoid(X[:, n] ** 2, t)
    return float(np.sqrt(ez / max(ew, 1e-300)))


@dataclass(frozen=True)
class WitnessResult:
    """What the trajectory search found, per variable.

    unstable_rate : {variable: smallest rate at which a periodic trajectory was
        found unstable (inf: none found up to ``searched_up_to``)}.
    unstable_trajectory : {variable: its description, Floquet multiplier}.
    observed_gain : {variable: largest energy-ratio gain found at the certified
        rate (a lower bound of the true worst case)} and its trajectory.
    searched_up_to : {variable: the largest rate of the trajectories tried for
        instability (their amplitude is limited by the envelope)}.
    trajectories : number of simulated trajectories.
    unstable_path : {variable: the :class:`Trajectory` found unstable} (not in JSON).
    """

    unstable_rate: dict
    unstable_trajectory: dict
    observed_gain: dict
    observed_trajectory: dict
    searched_up_to: dict
    trajectories: int
    unstable_path: dict

    def to_dict(self) -> dict:
        def f(x):
            x = float(x)
            return x if np.isfinite(x) else ("inf" if x > 0 else "nan")

        return {"unstable_rate": {k: f(v) for k, v in self.unstable_rate.items()},
                "unstable_trajectory": dict(self.unstable_trajectory),
                "observed_gain": {k: f(v) for k, v in self.observed_gain.items()},
                "observed_trajectory": dict(self.observed_trajectory),
                "searched_up_to": {k: f(v) for k, v in self.searched_up_to.items()},
                "trajectories": self.trajectories}


def _sensitive_frequencies(A: np.ndarray, peak: float | None, count: int = 2) -> list[float]:
    """Modulation frequencies: 2 w_d and w_d of the least damped oscillatory modes."""
    ev = np.linalg.eigvals(A)
    osc = ev[ev.imag > 1e-9]
    out: list[float] = []
    if osc.size:
        zeta = -osc.real / np.abs(osc)
        for lam in osc[np.argsort(zeta)][:count]:
            out += [2.0 * lam.imag, lam.imag]
    if peak is not None and np.isfinite(peak) and peak > 0:
        out += [2.0 * peak]
    if not out:  # no oscillatory mode: modulate near the slowest time constant
        out = [float(np.min(np.abs(ev)))]
    return sorted(set(round(w, 12) for w in out if w > 0))


def search_witness(loop_at: Callable, variables: Sequence[SchedulingVariable],
                   certified: dict, centres: int = 3, path_samples: int = 65,
                   growth: float = 4.0, steps: int = 5, waves: Sequence[str] = ("sine",),
                   gain: bool = True) -> WitnessResult:
    """Search periodic trajectories of each variable for instability and large gain.

    Parameters
    ----------
    loop_at : points (M, d) -> (A, B, C, D) stacks of the frozen loop.
    variables : scheduling variables (bounds give the room for the trajectories).
    certified : {variable: certified rate} - the search starts there and
        multiplies the rate by ``growth`` up to ``steps`` times.
    centres : positions tried along each variable (and the other variables at
        their lower and upper bounds).

    Returns
    -------
    WitnessResult
    """
    from ..norms import h_infinity_norm

    names = [v.name for v in variables]
    lo = np.array([v.lower for v in variables], float)
    hi = np.array([v.upper for v in variables], float)
    unstable, unstable_traj, observed, observed_traj, searched = {}, {}, {}, {}, {}
    paths: dict = {}
    count = 0
    for name, rate in certified.items():
        if name not in names:
            raise InputError(f"witness: '{name}' is not a scheduling variable")
        j = names.index(name)
        others = [i for i in range(len(names)) if i != j]
        bases = []
        for corner in ([lo[others], hi[others]] if others else [np.zeros(0)]):
            for c in np.linspace(lo[j], hi[j], int(centres) + 2)[1:-1]:
                b = 0.5 * (lo + hi)
                b[others] = corner
                b[j] = c
                bases.append(b)
        start = float(rate) if np.isfinite(rate) and rate > 0 else 0.01 * (hi[j] - lo[j])
        best_rate, best_desc, best_path = np.inf, "", None
        best_gain, gain_desc = 0.0, ""
        top = 0.0
        for base in bases:
            path = path_loop(loop_at, base, j, lo[j], hi[j], path_samples)
            A, B, C, D = path(base)
            peak, direction = None, None
            if gain and B.shape[1] and C.shape[0]:
                _, peak = h_infinity_norm(A, B, C, D)
                peak = float(peak) if np.isfinite(peak) and peak > 0 else None
                if peak is not None:
                    G = C @ np.linalg.solve(1j * peak * np.eye(A.shape[0]) - A, B) + D
                    direction = np.real(np.linalg.svd(G)[2][0].conj())
            room = min(base[j] - lo[j], hi[j] - base[j])
            freqs = _sensitive_frequencies(A, peak)
            # gain at the certified rate
            if direction is not None and np.linalg.norm(direction) > 0:
                for om in freqs:
                    amp = min(room, start / om)
                    if amp <= 0:
                        continue
                    traj = Trajectory(base, j, base[j], amp, om)
                    g = energy_gain(path, traj, peak, direction)
                    count += 1
                    if g > best_gain:
                        best_gain, gain_desc = g, traj.describe(names)
            # instability from the certified rate upwards
            r = start
            for _ in range(int(steps) + 1):
                if r >= best_rate:
                    break
                for om in freqs:
                    for wave in waves:
                        k = 1.0 if wave == "sine" else 2.0 / np.pi
                        amp = min(room, r / (om * k))
                        if amp <= 0:
                            continue
                        traj = Trajectory(base, j, base[j], amp, om, wave)
                        mult = floquet_multiplier(path, traj)
                        count += 1
                        top = max(top, traj.rate)
                        if mult > 1.0 + 1e-6 and traj.rate < best_rate:
                            best_rate, best_path = traj.rate, traj
                            best_desc = (f"{traj.describe(names)}: Floquet multiplier "
                                         f"{mult:.4g} per period {traj.period:.4g} s")
                r *= float(growth)
        unstable[name] = best_rate
        if best_path is not None:
            paths[name] = best_path
        unstable_traj[name] = best_desc
        observed[name] = best_gain if gain else float("nan")
        observed_traj[name] = gain_desc
        searched[name] = top
    return WitnessResult(unstable, unstable_traj, observed, observed_traj, searched, count, paths)
