"""Certified scheduling rates and induced-L2 gain bounds of a scheduled loop.

The frozen-Lyapunov bound of :mod:`schedule.rate` uses one Lyapunov matrix
per frozen point and is often orders of magnitude below the rates a loop
survives. Here one parameter-dependent Lyapunov function ``V = x' P(p) x``,
``P(p) = sum_k f_k(p) P_k`` (:mod:`.basis`), serves every point and every
rate in the box ``|dp_j/dt| <= nu_j`` at once (Becker and Packard 1994; Wu,
Yang, Packard and Becker 1996; Apkarian and Adams 1998). The LMIs are in
:mod:`.lmi`.

How a rate box is certified (:meth:`Certifier.attempt`):

1. impose the LMIs at a set of points (the design points to start with) and
   every vertex of the rate box, and solve (stability: the largest margin;
   gain: the smallest gamma);
2. check the P(p) found a posteriori on a much denser set of points (and at
   the imposed ones): the largest eigenvalue of L(p, v) over the vertices,
   relative to the size of its terms, must be negative, and P(p) positive
   definite, at every point;
3. if the check fails, add the worst violating points (with their violated
   vertices; at least half a grid cell apart, so that one round cuts in every
   failing cell) to the imposed set and solve again (a cutting-plane loop), up to
   ``max_rounds`` times, or until the violation stops shrinking.

Only what step 2 confirms is certified; the solver's own status is never
trusted (a gridded LMI holds only where imposed: on an 8 x 4 crane grid the
LMIs were feasible up to 3 m/s of hoisting while the P found violated them at
points of a 40 x 12 grid). A failure names the point, the round and the
eigenvalue. The dense check is itself a sample: the report says how many
points it used.

The largest certified rate of each variable alone (the others frozen) and of
all of them together (one common scaling of reference rates) comes from a
geometric bisection on the rate, with the imposed points kept across steps
(they remain valid cuts). Feasibility is monotone: a P(p) certified at a rate
box also certifies every smaller box (the LMI is affine in the rate), and a
certified P(p) is pushed to the largest rate it still certifies at every
check point (:meth:`Certifier.extend`, a generalized eigenvalue per point).
If a constant P passes, every rate is certified (quadratic stability).

Scaling: the states are first balanced (one constant diagonal scaling,
:func:`schedule.rate.balancing_scaling`) and then whitened by the mean of the
frozen Lyapunov matrices (one constant congruence), so that P(p) is near the
identity and the conic solver's ~1e-8 relative accuracy is not wasted on a
badly scaled basis. Constant changes of state coordinates leave the
certificate valid; the basis is orthonormalized over the dense points (same
span, same certificate).

References
----------
G. Becker, A. Packard, Systems & Control Letters 23(3), 1994.
F. Wu, X. H. Yang, A. Packard, G. Becker, Int. J. Robust Nonlinear Control
6(9-10), 1996.
P. Apkarian, R. J. Adams, IEEE Trans. Control Systems Technology 6(1), 1998.
J. E. Kelley, "The cutting-plane method for solving convex programs", J.
SIAM 8(4), 1960 (the cutting-plane idea).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..types import SchedulingVariable, point_text, rate_unit
from .basis import LyapunovBasis, parse_basis
from .lmi import SOLVERS, largest_scale, lmi_worst, solve_lmi

__all__ = ["CertificateSettings", "RateAttempt", "RateCertificate", "Certifier",
           "certify_loop", "LoopFunction"]

#: points (M, d) -> (A (M,n,n), B (M,n,nw), C (M,nz,n), D (M,nz,nw)): the frozen loop.
LoopFunction = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]

#: a dense-check eigenvalue counts as negative below -CHECK_TOL x (size of its terms)
CHECK_TOL = 1e-9
#: smallest distance between two cuts of one round, in grid cells (of the start points)
CUT_SPACING = 0.5


@dataclass(frozen=True)
class CertificateSettings:
    """Settings of the rate certificate (design file [rate_certificate], docs/design-file.md).

    basis : basis function expressions of P(p); None: constant and affine.
    rates : reference rates {variable: units/s}: the rates the loop should
        tolerate. Variables named here are analysed alone (the others frozen)
        and together (a common scaling of these rates). Empty: every variable
        alone, and together with the per-variable certified rates as reference.
    gain : also compute induced-L2 gain bounds gamma(nu) (else stability only).
    dense : dense-check points: subdivisions of each grid interval (rectangular
        families) - the a-posteriori check uses about ``(dense * cells + 1)``
        points per axis.
    samples : extra space-filling (Sobol) dense-check points (also the whole
        dense set for scattered families).
    max_rounds : cutting-plane rounds per rate box.
    cuts : violating points added per round.
    tolerance : relative width at which the bisection on a rate stops.
    curve : points of the gamma(nu) curve per variable (0 to the certified rate).
    solver : "clarabel" (default) or "cvxpy:SCS", "cvxpy:CLARABEL".
    witness : search parameter trajectories for the largest observed gain and
        for destabilizing rates (:mod:`.witness`).
    """

    basis: tuple[str, ...] | None = None
    rates: tuple[tuple[str, float], ...] = ()
    gain: bool = True
    dense: int = 12
    samples: int = 256
    max_rounds: int = 8
    cuts: int = 32
    tolerance: float = 0.1
    curve: int = 3
    solver: str = "clarabel"
    witness: bool = True

    def validate(self, names: Sequence[str]) -> None:
        for n, r in self.rates:
            if n not in names:
                raise InputError(f"rate_certificate.rates names '{n}', which is not a scheduling "
                                 f"variable; use one of {', '.join(names)}")
            if not (np.isfinite(r) and r > 0):
                raise InputError(f"rate_certificate.rates.{n} = {r!r} must be a positive rate "
                                 "(units per second)")
        for key, v, lo in (("dense", self.dense, 1), ("max_rounds", self.max_rounds, 1),
                           ("cuts", self.cuts, 1), ("curve", self.curve, 0),
                           ("samples", self.samples, 0)):
            if int(v) != v or v < lo:
                raise InputError(f"rate_certificate.{key} = {v!r} must be an integer >= {lo}")
        if not 0 < self.tolerance < 1:
            raise InputError(f"rate_certificate.tolerance = {self.tolerance!r} must be between "
                             "0 and 1 (relative width of the rate bisection)")
        if self.solver not in SOLVERS:
            raise InputError(f"rate_certificate.solver {self.solver!r} is unknown; use one of "
                             f"{', '.join(SOLVERS)}")


@dataclass(frozen=True)
class RateAttempt:
    """The outcome of certifying one rate box (see :meth:`Certifier.attempt`).

    certified : True only when the dense check confirmed the LMIs everywhere.
    rates : (d,) the rate box |dp_j/dt| <= rates_j (units/s).
    gamma : the gain bound (None for stability only; nan when not certified).
    worst : largest relative LMI eigenvalue over the dense and imposed points
        (negative = holds), and ``worst_point`` where it occurs.
    p_min : smallest relative eigenvalue of P(p) over those points.
    dense_points, imposed_points, rounds : the effort.
    reason : why not certified ("" when certified).
    Pk : the coefficient matrices (analysis coordinates), or None.
    constant : True when a constant P certified it (any rate).
    """

    certified: bool
    rates: np.ndarray
    gamma: float | None
    worst: float
    worst_point: np.ndarray
    p_min: float
    dense_points: int
    imposed_points: int
    rounds: int
    reason: str = ""
    Pk: np.ndarray | None = None
    constant: bool = False


@dataclass(frozen=True)
class RateCertificate:
    """Certified rates and gain bounds of a scheduled loop (plain data; ``to_dict()``).

    certified_rate : {variable: largest certified |dp/dt| with the others frozen}
        (inf: any rate; 0: not even the frozen loop is certified with this basis).
    joint_rate : {variable: rate} certified with all of them moving at once.
    gain_bound : {variable: gamma at certified_rate (at the target rate when any rate
        is certified)}, and "joint" at joint_rate.
    gain_curve : {variable: ((rate, gamma), ...)} from 0 to that rate, through the
        target rate when there is one (nan where the gain could not be certified).
    frozen_gain : largest frozen H-infinity norm over the dense points (a lower
        bound of every gamma(nu)).
    checks : {variable or "joint": the RateAttempt that certified it}.
    reasons : {variable or "joint": why the next larger rate was not certified}.
    frozen_bound : {variable: (single, joint)} the frozen-Lyapunov bound of
        :mod:`schedule.rate` for comparison (filled by the caller, may be empty).
    targets : the reference rates of the settings.
    witness : the :class:`schedule.analysis.witness.WitnessResult` or None.
    """

    names: tuple[str, ...]
    units: tuple[str, ...]
    basis: tuple[str, ...]
    certified_rate: dict
    joint_rate: dict
    gain_bound: dict
    gain_curve: dict
    frozen_gain: float
    checks: dict
    reasons: dict
    targets: dict
    seconds: float
    solves: int
    frozen_bound: dict = field(default_factory=dict)
    witness: object = None
    notes: tuple[str, ...] = ()

    @property
    def meets_targets(self) -> bool:
        """True when every reference rate is certified alone and jointly."""
        if not self.targets:
            return True
        alone = all(self.certified_rate.get(n, 0.0) >= r for n, r in self.targets.items())
        joint = all(self.joint_rate.get(n, 0.0) >= r * (1 - 1e-12)
                    for n, r in self.targets.items())
        return alone and joint

    def _unit(self, name: str) -> str:
        return rate_unit(dict(zip(self.names, self.units, strict=True)).get(name, ""))

    def text_lines(self) -> list[str]:
        """A few lines for the terminal: rates alone and jointly, gains, checks, witness."""
        L = [f"rate certificate (parameter-dependent Lyapunov function on {len(self.basis)} "
             "basis functions; LPV model = the frozen-matrix loop):"]
        for n, r in self.certified_rate.items():
            u = self._unit(n)
            line = f"  |d {n}/dt| <= {_num(r)}{u} certified alone"
            if n in self.frozen_bound:
                line += f" (frozen-Lyapunov bound {_num(self.frozen_bound[n][0])}{u})"
            if n in self.targets:
                ok = r >= self.targets[n]
                line += f"; target {_num(self.targets[n])}{u}: {'met' if ok else 'NOT MET'}"
            L.append(line)
            if n in self.gain_bound:
                at_target = [g for x, g in self.gain_curve.get(n, ())
                             if n in self.targets and x == self.targets[n]]
                L.append(f"    induced L2 gain <= {_num(self.gain_bound[n])} at that rate"
                         + (f", <= {_num(at_target[0])} at the target" if at_target else "")
                         + f" (largest frozen H-infinity norm {_num(self.frozen_gain)})")
            if n in self.checks:
                a = self.checks[n]
                L.append(f"    checked at {a.dense_points} points: worst relative LMI "
                         f"eigenvalue {a.worst:.2e}")
            elif self.reasons.get(n):
                L.append(f"    not certified: {self.reasons[n]}")
        if len(self.joint_rate) > 1:
            rates = ", ".join(f"{_num(r)}{self._unit(n)}" for n, r in self.joint_rate.items())
            L.append(f"  all together: {rates}"
                     + (f"; gain <= {_num(self.gain_bound['joint'])}"
                        if "joint" in self.gain_bound else ""))
        w = self.witness
        if w is not None:
            for n in w.unstable_rate:
                u = self._unit(n)
                if np.isfinite(w.unstable_rate[n]):
                    L.append(f"  witness: unstable at |d {n}/dt| = {_num(w.unstable_rate[n])}{u} "
                             f"({w.unstable_trajectory[n]})")
                else:
                    L.append(f"  witness: no destabilizing trajectory of {n} found up to "
                             f"{_num(w.searched_up_to[n])}{u}")
                if np.isfinite(w.observed_gain.get(n, np.nan)):
                    L.append(f"  witness: largest gain observed at the certified rate "
                             f"{_num(w.observed_gain[n])} ({w.observed_trajectory[n]})")
        return L

    def markdown_lines(self) -> list[str]:
        """The report section (Markdown lines)."""
        L = ["A parameter-dependent Lyapunov function V = x' P(p) x, P(p) = sum_k f_k(p) P_k "
             f"with f_k in {{{', '.join(self.basis)}}}, satisfies the rate-bounded LMIs "
             "(Becker and Packard 1994; Wu, Yang, Packard and Becker 1996) at every vertex "
             "of the rate box, checked a posteriori at the dense points listed. It proves "
             "stability and the induced L2 gain for every trajectory of the scheduling "
             "variables inside the envelope with rates in the box - for the frozen-matrix "
             "loop; the nonlinear plant under moving parameters has extra terms (Shamma "
             "and Athans 1990), so simulate it too.", "",
             "| variable | certified rate alone | all together | gain bound | frozen-Lyapunov "
             "bound | target | witness: unstable from |", "|---|---:|---:|---:|---:|---:|---:|"]
        for n, r in self.certified_rate.items():
            u = self._unit(n).strip()
            fb = _num(self.frozen_bound[n][0]) if n in self.frozen_bound else "-"
            tg = _num(self.targets[n]) if n in self.targets else "-"
            wu = (_num(self.witness.unstable_rate.get(n, np.inf)) if self.witness is not None
                  else "-")
            L.append(f"| {n} [{u}] | {_num(r)} | {_num(self.joint_rate.get(n, np.nan))} | "
                     f"{_num(self.gain_bound.get(n, np.nan))} | {fb} | {tg} | {wu} |")
        L.append("")
        for n, curve in self.gain_curve.items():
            pts = ", ".join(f"{_num(x)}{self._unit(n)}: {_num(g)}" for x, g in curve)
            L.append(f"- gain bound gamma(nu) while {n} moves: {pts}")
        for k, a in self.checks.items():
            L.append(f"- {k}: LMIs imposed at {a.imposed_points} points, checked at "
                     f"{a.dense_points}; worst relative LMI eigenvalue {a.worst:.2e} at "
                     f"({point_text(self.names, a.worst_point)})")
        for k, why in self.reasons.items():
            if why:
                L.append(f"- {k}: the next larger rate was not certified: {why}")
        if self.witness is not None:
            for n, g in self.witness.observed_gain.items():
                if np.isfinite(g):
                    L.append(f"- witness, {n}: gain {_num(g)} observed at the certified rate "
                             f"({self.witness.observed_trajectory[n]})")
        L += [f"- {n}" for n in self.notes]
        return L

    def to_dict(self) -> dict:
        """JSON-ready dict (the ``rate_certificate`` part of ``check --json``)."""
        def f(x):
            if x is None:
                return None
            x = float(x)
            return x if np.isfinite(x) else ("inf" if x > 0 else ("-inf" if x < 0 else "nan"))

        checks = {}
        for k, a in self.checks.items():
            checks[k] = {"rates": {n: f(r) for n, r in zip(self.names, a.rates, strict=True)},
                         "worst_relative_eigenvalue": f(a.worst),
                         "worst_point": dict(zip(self.names, map(float, a.worst_point),
                                                 strict=True)),
                         "min_relative_P_eigenvalue": f(a.p_min),
                         "dense_points": a.dense_points, "imposed_points": a.imposed_points,
                         "rounds": a.rounds}
        return {
            "units": dict(zip(self.names, self.units, strict=True)),
            "basis": list(self.basis),
            "certified_rate": {n: f(v) for n, v in self.certified_rate.items()},
            "joint_rate": {n: f(v) for n, v in self.joint_rate.items()},
            "gain_bound": {n: f(v) for n, v in self.gain_bound.items()},
            "gain_curve": {n: [[f(a), f(b)] for a, b in c] for n, c in self.gain_curve.items()},
            "frozen_gain": f(self.frozen_gain),
            "frozen_bound": {n: {"single": f(s), "joint": f(j)}
                             for n, (s, j) in self.frozen_bound.items()},
            "targets": {n: f(v) for n, v in self.targets.items()},
            "meets_targets": self.meets_targets,
            "a_posteriori_check": checks,
            "not_certified_beyond": dict(self.reasons),
            "witness": None if self.witness is None else self.witness.to_dict(),
            "notes": list(self.notes),
            "seconds": round(self.seconds, 3), "lmi_solves": self.solves,
        }


# ----------------------------------------------------------------------------- the engine
class Certifier:
    """The loop sampled once at imposed and dense points, in analysis coordinates.

    Parameters
    ----------
    loop : (A, B, C, D) stacks at the points ``points`` (M, d).
    points : (M, d) the first ``n_imposed`` rows are imposed from the start, all
        rows are dense-check points.
    variables : the scheduling variables (names, units, bounds).
    basis : the :class:`LyapunovBasis`.
    settings : :class:`CertificateSettings`.
    """

    def __init__(self, loop, points: np.ndarray, n_imposed: int,
                 variables: Sequence[SchedulingVariable], basis: LyapunovBasis,
                 settings: CertificateSettings):
        from ..norms import h_infinity_norm_many
        from ..rate import balancing_scaling, lyapunov_certificates

        A, B, C, D = (np.asarray(x, dtype=float) for x in loop)
        self.points = np.asarray(points, dtype=float)
        self.variables = tuple(variables)
        self.names = tuple(v.name for v in variables)
        self.settings = settings
        self.basis = basis
        M = A.shape[0]
        if self.points.shape != (M, len(self.names)):
            raise InputError(f"{M} loops for points of shape {self.points.shape}; pass one "
                             "loop per point")
        ev = np.linalg.eigvals(A)
        sa = ev.real.max(axis=1)
        bad = sa >= -1e-9 * np.maximum(1.0, np.abs(ev).max(axis=1))
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"the frozen loop is not stable at "
                             f"({point_text(self.names, self.points[i])}) (spectral abscissa "
                             f"{sa[i]:.3g}); no rate can be certified - fix the design there "
                             "first")
        # coordinates: balance (diagonal), then whiten by the mean frozen Lyapunov matrix
        t = balancing_scaling(A)
        Ab = A * t[None, None, :] / t[None, :, None]
        imp = np.arange(int(n_imposed))
        Pf = lyapunov_certificates(Ab[imp])
        size = np.linalg.norm(Pf, ord=2, axis=(1, 2))
        Pbar = np.mean(Pf / size[:, None, None], axis=0)
        w, U = np.linalg.eigh(0.5 * (Pbar + Pbar.T))
        T2 = U @ np.diag(w ** -0.5) @ U.T  # Pbar^(-1/2)
        T = t[:, None] * T2  # x = T z
        Ti = np.linalg.inv(T)
        self.T = T
        self.A = Ti @ A @ T
        self.B = Ti @ B
        self.C = C @ T
        self.D = D
        self.gamma_frozen, _ = h_infinity_norm_many(A, B, C, D) if B.shape[2] and C.shape[1] \
            else (np.zeros(M), None)
        F, dF = basis.evaluate(self.points)
        span = np.array([v.upper - v.lower for v in self.variables], float)
        # orthonormal basis over the points (same span): F = Q R, f~ = f R^-1
        Q, R = np.linalg.qr(F)
        rdiag = np.abs(np.diag(R))
        if rdiag.min() <= 1e-10 * rdiag.max():
            k = int(np.argmin(rdiag))
            raise InputError(f"basis function {basis.texts[k]!r} is (nearly) a combination of "
                             "the others over the envelope; drop it from the basis")
        Ri = np.linalg.inv(R)
        self.F = F @ Ri
        self.dF = np.einsum("ikj,kl->ilj", dF, Ri)
        self.span = span
        self.n_start = int(n_imposed)
        # spacing coordinates of the cuts: per variable, the fractional index among the
        # distinct values of the start points (cells of a rectangular grid have width 1,
        # however unevenly the breakpoints are spaced)
        self.cell_coords = np.zeros_like(self.points)
        cells = np.zeros(len(self.names))
        for j in range(len(self.names)):
            knots = np.unique(self.points[:self.n_start, j])
            if knots.size > 1:
                self.cell_coords[:, j] = np.interp(self.points[:, j], knots,
                                                   np.arange(knots.size, dtype=float))
                cells[j] = knots.size - 1
        # half a cell, or less on coarse grids: room for at least 2 x cuts points per round
        self.cut_spacing = CUT_SPACING
        while (np.prod(cells / self.cut_spacing + 1) < 2 * int(settings.cuts)
               and self.cut_spacing > 1e-3):
            self.cut_spacing /= 2.0
        # cut points (point index, vertex signs), kept apart for the stability and the gain
        # LMIs: the points where one is tight need not be those where the other is
        self.pools: dict[bool, list[tuple[int, tuple]]] = {False: [], True: []}
        # margin of the reduced gain LMI R = gamma x (Schur complement of L), see solve_lmi
        self.gain_margin = 1e-4 * max(float(np.max(self.gamma_frozen)), 1e-12) ** 2
        self.solves = 0
        self.log: Callable[[str], None] = lambda msg: None
        self.solve_seconds = 0.0
        self.check_seconds = 0.0

    # -- one rate box ---------------------------------------------------------------
    @staticmethod
    def signs(rates) -> np.ndarray:
        """(V, d) sign patterns of the vertices of the box (+1 for frozen variables)."""
        rates = np.asarray(rates, dtype=float)
        moving = np.flatnonzero(rates > 0)
        out = np.ones((2 ** moving.size, rates.size))
        if moving.size:
            grid = np.array(np.meshgrid(*[[1.0, -1.0]] * moving.size, indexing="ij"))
            out[:, moving] = grid.reshape(moving.size, -1).T
        return out

    def vertices(self, rates) -> np.ndarray:
        """(V, d) signed vertices of the box ``|dp_j/dt| <= rates_j`` (zero rates fixed)."""
        rates = np.asarray(rates, dtype=float)
        return self.signs(rates) * rates

    @property
    def cuts(self) -> list:
        """All cut points so far (stability and gain)."""
        return self.pools[False] + self.pools[True]

    def _cones_for(self, rates, gain: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Imposed (point index, signed vertex) pairs for a box: every start point at every
        vertex, plus the cuts so far (their signs mapped onto this box)."""
        signs = self.signs(rates)
        moving = np.asarray(rates) > 0
        pairs = {(i, tuple(sg)) for i in range(self.n_start) for sg in signs}
        for i, sg in self.pools[bool(gain)]:
            pairs.add((i, tuple(np.where(moving, sg, 1.0))))
        pairs = sorted(pairs)
        idx = np.array([i for i, _ in pairs], dtype=int)
        vert = np.array([sg for _, sg in pairs], dtype=float) * np.asarray(rates)[None]
        return idx, vert

    def attempt(self, rates, gain: bool = False, constant: bool = False) -> RateAttempt:
        """Certify the rate box ``rates`` (d,): solve, check densely, cut, repeat.

        ``constant``: look for a constant P (then the rates do not matter).
        """
        s = self.settings
        if constant:
            M, d = self.F.shape[0], self.dF.shape[2]
            Fb, dFb = np.ones((M, 1)), np.zeros((M, 1, d))
        else:
            Fb, dFb = self.F, self.dF
        rates = np.asarray(rates, dtype=float)
        signs = self.signs(rates)
        verts = signs * rates
        A, B, C, D = self.A, self.B, self.C, self.D
        margin = self.gain_margin if gain else 0.0
        last = None
        first = 0.0
        for rnd in range(1, int(s.max_rounds) + 1):
            I, V = self._cones_for(rates, gain)
            t0 = time.perf_counter()
            sol = solve_lmi(A[I], Fb[I], dFb[I], V, B[I], C[I], D[I], gain=gain,
                            margin=margin, solver=s.solver)
            self.solves += 1
            self.solve_seconds += time.perf_counter() - t0
            self.log(f"  solve {self.solves}: rates {np.round(rates, 6).tolist()}"
                     f"{' gain' if gain else ''}{' constant P' if constant else ''}, "
                     f"{I.size} cones at {np.unique(I).size} points, {sol.status}, "
                     f"{time.perf_counter() - t0:.1f} s")
            if not sol.feasible:
                return self._fail(rates, rnd, f"the LMIs are infeasible at the "
                                  f"{np.unique(I).size} imposed points ({sol.status}): no "
                                  "P(p) in the span of the basis works at this rate")
            if not np.all(np.isfinite(sol.Pk)):
                return self._fail(rates, rnd, f"the LMI solver gave no solution "
                                  f"({sol.status}) at {np.unique(I).size} imposed points")
            gamma = float(sol.gamma) * (1.0 + 1e-6) if gain else None
            t0 = time.perf_counter()
            eig, scale, pmin, pnorm = lmi_worst(A, B, C, D, Fb, dFb, sol.Pk, gamma, verts)
            self.check_seconds += time.perf_counter() - t0
            rel = eig / scale[:, None]  # (M, V)
            prel = pmin / np.maximum(pnorm, 1e-300)
            viol = np.maximum(rel + CHECK_TOL, (-prel + CHECK_TOL)[:, None])
            worst = rel.max(axis=1)
            k = int(np.argmax(worst))
            last = (worst, prel)
            if not np.any(viol > 0):
                return RateAttempt(True, rates, gamma, float(worst[k]), self.points[k],
                                   float(prel.min()), len(self.points), np.unique(I).size,
                                   rnd, Pk=sol.Pk, constant=constant)
            new = self._new_cuts(viol, signs, set(zip(I.tolist(), map(tuple, V.tolist()))),
                                 rates)
            if not new:
                return self._fail(rates, rnd, f"the LMI fails at imposed points (worst relative "
                                  f"eigenvalue {worst[k]:.2e} at ({self._pt(k)})): the "
                                  f"solver's answer ({sol.status}) is not accurate enough", last)
            self.pools[bool(gain)].extend(new)
            first = worst[k] if rnd == 1 else first
            if rnd >= 3 and worst[k] > 0.25 * first:
                return self._fail(rates, rnd, f"the cutting planes do not converge (worst "
                                  f"relative eigenvalue {worst[k]:+.2e} at ({self._pt(k)}) after "
                                  f"{rnd} rounds, {first:+.2e} after the first)", last)
        worst = last[0]
        k = int(np.argmax(worst))
        return self._fail(rates, int(s.max_rounds),
                          f"the dense check still fails after {s.max_rounds} rounds (worst "
                          f"relative eigenvalue {worst[k]:+.2e} at ({self._pt(k)}))", last)

    def _new_cuts(self, viol: np.ndarray, signs: np.ndarray, imposed: set, rates) -> list:
        """Up to ``cuts`` violating points (worst first, spread out), each with its violated
        vertices, that are not imposed yet.

        Spread out: no two cuts of a round closer than ``cut_spacing`` of a grid cell
        (in every variable; half a cell, less on grids too coarse for ``cuts`` points at
        that spacing), so that one round cuts wherever the check fails rather than many
        times around the worst point (the LMI then fails in most cells at once).
        """
        u = self.cell_coords
        point_viol = viol.max(axis=1)
        chosen: list[int] = []
        out = []
        for i in np.argsort(-point_viol):
            if point_viol[i] <= 0 or len(chosen) >= int(self.settings.cuts):
                break
            sg = [tuple(signs[v]) for v in np.flatnonzero(viol[i] > 0)]
            fresh = [g for g in sg if (int(i), tuple(np.asarray(g) * rates)) not in imposed]
            if not fresh:
                continue
            if chosen:
                dist = np.abs(u[chosen] - u[i]).max(axis=1)
                if dist.min() < self.cut_spacing:
                    continue
            chosen.append(int(i))
            out.extend((int(i), g) for g in fresh)
        return out

    def extend(self, attempt: RateAttempt, direction, gain: bool = False) -> float:
        """The largest scale c with the box ``c * direction`` certified by the P(p) (and
        gamma) of a certified ``attempt`` at every check point, confirmed by the check."""
        direction = np.asarray(direction, dtype=float)
        if attempt.constant:
            return float("inf")
        verts = self.signs(direction) * direction
        c = largest_scale(self.A, self.B, self.C, self.D, self.F, self.dF, attempt.Pk,
                          attempt.gamma, verts)
        c = float(np.min(c)) * (1.0 - 1e-3)
        if not np.isfinite(c):
            return float("inf")
        eig, scale, pmin, pnorm = lmi_worst(self.A, self.B, self.C, self.D, self.F, self.dF,
                                            attempt.Pk, attempt.gamma, c * verts)
        ok = np.all(eig / scale[:, None] < -CHECK_TOL) and np.all(pmin > CHECK_TOL * pnorm)
        return c if ok else 0.0

    def _pt(self, k: int) -> str:
        return point_text(self.names, self.points[k])

    def _fail(self, rates, rounds: int, reason: str, last=None) -> RateAttempt:
        if last is not None:
            worst, prel = last
            k = int(np.argmax(worst))
            return RateAttempt(False, rates, None, float(worst[k]), self.points[k],
                               float(prel.min()), len(self.points), self.n_start + len(self.cuts),
                               rounds, reason)
        return RateAttempt(False, rates, None, float("nan"), np.full(len(self.names), np.nan),
                           float("nan"), len(self.points), self.n_start + len(self.cuts), rounds,
                           reason)

    # -- the largest certified rate ----------------------------------------------------
    def largest(self, direction, start: float, gain: bool = False
                ) -> tuple[float, RateAttempt | None, RateAttempt | None]:
        """Largest scale ``c`` with the box ``c * direction`` certified (geometric bisection).

        Returns ``(c, attempt that certified it, failed attempt just above)``; c = 0
        when even the frozen loop is not certified with this basis, inf when a
        constant P certifies it (any rate).
        """
        direction = np.asarray(direction, dtype=float)
        tol = float(self.settings.tolerance)
        lo, lo_att, hi, hi_att = 0.0, None, np.inf, None
        cap = self._cap(direction)
        c = min(float(start), cap)
        downs = 0
        while True:
            a = self.attempt(c * direction, gain)
            if a.certified:
                lo, lo_att = max(c, self.extend(a, direction, gain)), a
                if not np.isfinite(lo):
                    return float("inf"), a, None
            else:
                hi, hi_att = c, a
                if lo_att is None and downs == 0:  # nothing certified: is the frozen loop?
                    frozen = self.attempt(0.0 * direction, gain)
                    if not frozen.certified:
                        return 0.0, None, frozen
                    lo, lo_att = min(self.extend(frozen, direction, gain), hi), frozen
            if lo >= cap:
                const = self._constant_P(direction, gain)
                return (float("inf"), const, None) if const is not None else (lo, lo_att, None)
            if np.isfinite(hi) and lo > 0:
                if hi / lo <= 1.0 + tol:
                    return lo, lo_att, hi_att
                c = float(np.sqrt(lo * hi))
            elif np.isfinite(hi):  # only the frozen loop is certified: look lower, a few times
                downs += 1
                if downs > 6:
                    return lo, lo_att, hi_att
                c = c / 4.0
            else:
                c = min(4.0 * lo, cap)

    def _cap(self, direction) -> float:
        """A scale beyond which rates count as 'any': every moving variable crosses its range
        in 1e-3 of the fastest time constant of the loop."""
        fastest = float(np.max(np.abs(np.linalg.eigvals(self.A))))
        moving = direction > 0
        return float(np.min(self.span[moving] / direction[moving]) * fastest * 1e3)

    def _constant_P(self, direction, gain: bool) -> RateAttempt | None:
        """A constant P (quadratic stability / gain): certifies every rate, or None."""
        a = self.attempt(direction, gain, constant=True)
        return a if a.certified else None


# ----------------------------------------------------------------------------- driver
def certify_loop(loop_at: LoopFunction, variables: Sequence[SchedulingVariable],
                 imposed: np.ndarray, dense: np.ndarray,
                 settings: CertificateSettings | None = None,
                 progress: Callable[[str], None] | None = None) -> RateCertificate:
    """Certified rates (alone and jointly) and gain bounds of a scheduled loop.

    Parameters
    ----------
    loop_at : points (M, d) -> (A, B, C, D) stacks of the frozen loop (the
        closed loop from the exogenous inputs w to the performance outputs z).
    variables : the scheduling variables.
    imposed : (Mi, d) points where the LMIs are imposed from the start (the
        design points and cell centres, typically).
    dense : (Md, d) the a-posteriori check points (cut points are taken from them).
    settings : :class:`CertificateSettings`.
    progress : optional callable receiving one-line progress messages.

    Returns
    -------
    RateCertificate
    """
    t_start = time.perf_counter()
    s = settings or CertificateSettings()
    names = tuple(v.name for v in variables)
    s.validate(names)
    basis = parse_basis(s.basis, names)
    imposed = np.asarray(imposed, dtype=float).reshape(-1, len(names))
    dense = np.asarray(dense, dtype=float).reshape(-1, len(names))
    pts = _unique_rows(np.vstack([imposed, dense]), imposed.shape[0])
    n_imp = min(imposed.shape[0], pts.shape[0])
    loop = loop_at(pts)
    cert = Certifier(loop, pts, n_imp, variables, basis, s)
    say = progress or (lambda msg: None)
    cert.log = say
    targets = dict(s.rates)
    alone = list(targets) if targets else list(names)
    certified, checks, reasons, gains, curves = {}, {}, {}, {}, {}
    for name in alone:
        j = names.index(name)
        direction = np.zeros(len(names))
        direction[j] = 1.0
        start = targets.get(name) or 0.01 * cert.span[j]
        say(f"rate certificate: largest certified |d {name}/dt| (others frozen)")
        c, ok, bad = cert.largest(direction, start)
        certified[name] = c
        if ok is not None:
            checks[name] = ok
        reasons[name] = bad.reason if bad is not None else ""
    # reference rates of the joint box: the targets, else the rates certified alone (1 % of
    # the range per second for a variable certified at any rate or at none)
    ref = np.array([targets.get(n, certified.get(n, 0.0)) if n in alone else 0.0
                    for n in names])
    ref = np.where(np.isfinite(ref) & (ref > 0), ref, 0.01 * cert.span)
    ref = np.where([n in alone for n in names], ref, 0.0)
    joint = {n: 0.0 for n in alone}
    if len(alone) > 1 and np.any(ref > 0):
        say("rate certificate: all variables moving together")
        c, ok, bad = cert.largest(ref, 1.0)
        joint = {n: float(c * ref[names.index(n)]) for n in alone}
        if ok is not None:
            checks["joint"] = ok
        reasons["joint"] = bad.reason if bad is not None else ""
    elif len(alone) == 1:
        joint = {alone[0]: certified[alone[0]]}
    if s.gain:
        for name in alone:
            say(f"rate certificate: gain bound gamma(nu) for {name}")
            j = names.index(name)
            top = certified[name]
            if not np.isfinite(top):  # any rate: the curve up to the target, if there is one
                top = targets.get(name, 0.0)
            rates_ = ([0.0] if s.curve <= 1 or top <= 0 else
                      list(np.linspace(0.0, top, int(s.curve))))
            if 0 < targets.get(name, 0.0) < top:  # the target itself, in place of the nearest
                k = int(np.argmin(np.abs(np.array(rates_[1:-1] or [np.inf]) - targets[name])))
                if len(rates_) > 2:
                    rates_[1 + k] = targets[name]
                else:
                    rates_.insert(1, targets[name])
            curve = []
            for r in rates_:
                box = np.zeros(len(names))
                box[j] = r
                a = cert.attempt(box, gain=True)
                curve.append((float(r), float(a.gamma) if a.certified else float("nan")))
            curves[name] = tuple(curve)
            gains[name] = curve[-1][1]
        if len(alone) > 1 and np.any(ref > 0):
            box = np.array([joint.get(n, 0.0) for n in names])
            a = cert.attempt(box, gain=True)
            gains["joint"] = float(a.gamma) if a.certified else float("nan")
    frozen_gain = float(np.max(cert.gamma_frozen)) if cert.gamma_frozen.size else float("nan")
    notes = (f"LMIs imposed at {cert.n_start} points and {len(cert.cuts)} cuts, checked at "
             f"{len(pts)} points; {cert.solves} conic solves in {cert.solve_seconds:.1f} s, "
             f"dense checks {cert.check_seconds:.1f} s",)
    return RateCertificate(names, tuple(v.unit for v in variables), basis.texts, certified,
                           joint, gains, curves, frozen_gain, checks, reasons, targets,
                           time.perf_counter() - t_start, cert.solves, notes=notes)


def _num(x) -> str:
    x = float(x)
    return "inf" if x == np.inf else ("-" if not np.isfinite(x) else f"{x:.4g}")


def _unique_rows(pts: np.ndarray, keep_first: int) -> np.ndarray:
    """Drop repeated rows (keeping order; the first ``keep_first`` rows are kept as given)."""
    seen, keep = set(), []
    for i, r in enumerate(pts):
        key = tuple(np.round(r, 12))
        if key in seen and i >= keep_first:
            continue
        seen.add(key)
        keep.append(i)
    return pts[keep]
