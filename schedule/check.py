"""Frozen-point checks of a scheduled controller at in-between points.

At every check point p the interpolated controller K(p) is closed with a plant
at p and judged frozen (p held fixed; Shamma and Athans 1990, 1991):

- closed-loop stability (spectral abscissa of the lower-LFT state matrix);
- the closed-loop H-infinity norm of the weighted loop against the family's
  gamma, passing when ``norm <= gamma (1 + gamma_tolerance)``. The norm is
  computed for all points at once on a frequency grid with golden-section
  refinement (a lower bound); the verdict is then certified by the
  Hamiltonian test at the level ``gamma (1 + tol)`` (Boyd, Balakrishnan and
  Kabamba 1989: for stable A and sigma_max(D) < level, the norm is below the
  level iff the Hamiltonian has no imaginary-axis eigenvalue), batched over
  points; points whose certificate fails get the exact norm from
  :func:`schedule.norms.h_infinity_norm`;
- disk margins (loop at a time and all loops at once) at the plant input and
  output and classical margins at the plant input (:mod:`schedule.margins`),
  on the physical loop ``u -> y``. It is taken from the generalized plant's
  block ``(A, B2, C2, D22)``: the mixed-sensitivity arrangement adds weight
  states that are uncontrollable from u or unobservable from y, so this block
  has exactly the plant's transfer from controls to measurements;
- optionally gamma_opt at the point (what a controller synthesized right there
  would reach: the price of interpolation) and the rate bound (:mod:`schedule.rate`).

The plant at a check point comes, in order of preference, from the design's
model (the true plant), from the validation file (at its own points), or
from the interpolated generalized plant of the family - the weaker check,
labelled "interpolated" in every output.

Margin requirements: the loop-at-a-time disk margins at the plant input must
give at least ``gain_margin_db`` (upper gain) and ``phase_margin_deg``
(defaults 6 dB and 45 deg, common practice). Output margins are reported.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace

import numpy as np

from .errors import InputError, ScheduleError
from .margins import (
    FrequencyResponder,
    classical_margins,
    default_frequencies,
    disk_margins,
    sigma_max,
)
from .types import Family, point_text

__all__ = [
    "CheckSettings",
    "CheckResult",
    "closed_loop_many",
    "hinf_norms_many",
    "check_arrays",
    "check_points",
    "check_points_for",
    "check_family",
    "propose_points",
    "spec_for_family",
    "scheduled_loop",
]

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
WEAKER = ("interpolated plant: the family's own interpolated model, not the true plant - a "
          "weaker check; add a model or a validation file to the design")


# ----------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class CheckSettings:
    """What to check and the pass thresholds.

    samples, sampler, seed : random in-between samples ("sobol" or "latin_hypercube").
    centres, midpoints, loo, grid : include grid cell centres, grid edge
        midpoints, leave-one-out predictions at the design points, and the
        design points themselves (the baseline).
    points_file : optional CSV of extra check points (header = variable names).
    gamma_tolerance : pass when norm <= gamma (1 + tolerance).
    gain_margin_db, phase_margin_deg : required disk margins at the plant input
        (common practice 6 dB / 45 deg).
    loo_gates : whether leave-one-out predictions count in the overall verdict.
        They predict each design point from a grid with that point removed,
        i.e. at twice the grid spacing (and by extrapolation at the edges), so
        they are pessimistic evidence. None (default): they count only when the
        in-between points could not be checked on a true plant (no model, no
        validation file); otherwise they are reported point by point but do
        not fail the check.
    gamma_opt : compute the optimal gamma at each check point (costly).
    rate : compute the scheduling-rate bound.
    rate_certificate : compute the certified rates and gain bounds of
        :mod:`schedule.analysis` (LMIs; minutes on a big family), configured by
        the design's [rate_certificate] table.
    classical : compute classical margins at the plant input.
    chunk : points per work chunk (parallel runs).
    """

    samples: int = 64
    sampler: str = "sobol"
    seed: int = 0
    centres: bool = True
    midpoints: bool = True
    loo: bool = True
    grid: bool = True
    points_file: str | None = None
    gamma_tolerance: float = 0.02
    gain_margin_db: float = 6.0
    phase_margin_deg: float = 45.0
    loo_gates: bool | None = None
    gamma_opt: bool = True
    rate: bool = True
    rate_certificate: bool = False
    classical: bool = True
    chunk: int = 500

    @classmethod
    def from_spec(cls, spec, **overrides) -> CheckSettings:
        """Settings from a design's [check] table, with explicit overrides (None = keep)."""
        base = cls()
        if spec is not None:
            c = spec.check
            base = replace(base, samples=c.samples, sampler=c.sampler, seed=c.seed,
                           gamma_tolerance=c.gamma_tolerance, gain_margin_db=c.gain_margin_db,
                           phase_margin_deg=c.phase_margin_deg)
        kw = {k: v for k, v in overrides.items() if v is not None}
        out = replace(base, **kw)
        out.validate()
        return out

    def validate(self) -> None:
        if self.sampler not in ("sobol", "latin_hypercube"):
            raise InputError(f"sampler {self.sampler!r} is unknown; use 'sobol' or "
                             "'latin_hypercube'")
        if int(self.samples) != self.samples or self.samples < 0:
            raise InputError(f"samples={self.samples!r} must be a non-negative integer")
        if not self.gamma_tolerance >= 0:
            raise InputError(f"gamma_tolerance={self.gamma_tolerance!r} must be >= 0")
        if int(self.chunk) != self.chunk or self.chunk < 1:
            raise InputError(f"chunk={self.chunk!r} must be a positive integer")


# ----------------------------------------------------------------------------- batched LFT
def _stacked(P: dict, keys) -> dict:
    out = {}
    for k in keys:
        a = np.asarray(P[k], dtype=float)
        out[k] = a[None] if a.ndim == 2 else a
    return out


def closed_loop_many(P: dict, K: dict):
    """Lower LFT of stacked generalized plants with stacked controllers ``u = K y``.

    Same formulas as :func:`schedule.norms.closed_loop` (Zhou, Doyle and Glover
    1996, sec. 10.1), vectorized over the leading point index:
    with ``M = (I - D22 DK)^-1``, ``N = I + DK M D22``::

        Acl = [[A + B2 DK M C2, B2 N CK], [BK M C2, AK + BK M D22 CK]]
        Bcl = [[B1 + B2 DK M D21], [BK M D21]]
        Ccl = [C1 + D12 DK M C2, D12 N CK]
        Dcl = D11 + D12 DK M D21

    Raises
    ------
    ScheduleError (PlantError)
        If ``I - D22 DK`` is singular at a point (the message names it).
    """
    from .errors import PlantError

    P = _stacked(P, PLANT_KEYS)
    K = _stacked(K, ("A", "B", "C", "D"))
    A, B1, B2, C1, C2 = (P[k] for k in ("A", "B1", "B2", "C1", "C2"))
    D11, D12, D21, D22 = (P[k] for k in ("D11", "D12", "D21", "D22"))
    AK, BK, CK, DK = (K[k] for k in ("A", "B", "C", "D"))
    ny = C2.shape[1]
    W = np.eye(ny) - D22 @ DK
    cond = np.linalg.cond(W)
    bad = ~np.isfinite(cond) | (cond > 1e12)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise PlantError(f"closed loop is not well posed at check point {i} (I - D22 DK has "
                         f"condition {cond[i]:.2e}); the controller feedthrough is too large")
    M = np.linalg.inv(W)
    DKM = DK @ M
    N = np.eye(DK.shape[1]) + DKM @ D22
    Acl = np.concatenate([
        np.concatenate([A + B2 @ DKM @ C2, B2 @ N @ CK], axis=2),
        np.concatenate([BK @ M @ C2, AK + BK @ M @ D22 @ CK], axis=2)], axis=1)
    Bcl = np.concatenate([B1 + B2 @ DKM @ D21, BK @ M @ D21], axis=1)
    Ccl = np.concatenate([C1 + D12 @ DKM @ C2, D12 @ N @ CK], axis=2)
    Dcl = D11 + D12 @ DKM @ D21
    return Acl, Bcl, Ccl, Dcl


def _below_level(A, B, C, D, level: np.ndarray) -> np.ndarray:
    """Hamiltonian test, batched: True where ||G||_inf < level (A assumed stable).

    With ``R = level^2 I - D'D > 0`` the norm is below the level iff
    ``H = [[A + B R^-1 D'C, B R^-1 B'], [-C'(I + D R^-1 D')C, -(A + B R^-1 D'C)']]``
    has no eigenvalue on the imaginary axis (Boyd, Balakrishnan and Kabamba 1989).
    """
    M = A.shape[0]
    out = np.zeros(M, dtype=bool)
    sd = sigma_max(D) if D.size else np.zeros(M)
    ok = sd < level
    if not np.any(ok):
        return out
    A, B, C, D, lv = A[ok], B[ok], C[ok], D[ok], level[ok]
    Dt = np.swapaxes(D, 1, 2)
    R = lv[:, None, None] ** 2 * np.eye(D.shape[2]) - Dt @ D
    Ri = np.linalg.inv(R)
    Ah = A + B @ Ri @ Dt @ C
    Ct = np.swapaxes(C, 1, 2)
    H = np.concatenate([
        np.concatenate([Ah, B @ Ri @ np.swapaxes(B, 1, 2)], axis=2),
        np.concatenate([-Ct @ (np.eye(D.shape[1]) + D @ Ri @ Dt) @ C, -np.swapaxes(Ah, 1, 2)],
                       axis=2)], axis=1)
    lam = np.linalg.eigvals(H)
    # candidates: eigenvalues near the axis (loose tolerance); each is confirmed by
    # evaluating sigma_max at its frequency (Bruinsma and Steinbuch 1990), so a
    # slow stable mode mistaken for an axis eigenvalue cannot fail a point.
    near = np.abs(lam.real) <= 1e-6 * np.maximum(1.0, np.abs(lam))
    res = np.ones(lam.shape[0], dtype=bool)
    for i in np.flatnonzero(near.any(axis=1)):
        w = np.unique(np.abs(lam[i][near[i]].imag))
        G = C[i] @ np.linalg.solve(1j * w[:, None, None] * np.eye(A.shape[1]) - A[i],
                                   np.broadcast_to(B[i], (w.size,) + B[i].shape)) + D[i]
        sig = sigma_max(G)
        res[i] = not np.any(sig >= lv[i] * (1.0 - 1e-6))
    out[ok] = res
    return out


def hinf_norms_many(A, B, C, D, level=None, responder: FrequencyResponder | None = None):
    """H-infinity norms of many stable systems at once.

    Returns ``(norm, peak_frequency, below)``: grid-plus-golden-section values
    (lower bounds, exact to the refinement tolerance at smooth peaks); where a
    ``level`` (M,) is given, ``below`` is the Hamiltonian certificate
    ``||G|| < level`` and every point where the certificate fails gets the
    exact value of :func:`schedule.norms.h_infinity_norm`.
    """
    from .margins import _refine_peak

    R = responder or FrequencyResponder(A, B, C, D)
    Mn = R.N
    w = default_frequencies(R.eigenvalues, count=120)
    H = R(w)
    vals = sigma_max(H)

    def fun(ww):
        return sigma_max(R(ww[:, None])[:, 0])

    norm, peak = _refine_peak(fun, w, vals, iterations=30)
    dinf = sigma_max(R.D) if R.D.size else np.zeros(Mn)
    peak = np.where(dinf > norm, np.inf, peak)
    norm = np.maximum(norm, dinf)
    if level is None:
        return norm, peak, None
    level = np.broadcast_to(np.asarray(level, dtype=float), (Mn,))
    below = _below_level(R.A, R.B, R.C, R.D, level)
    from .norms import h_infinity_norm

    for i in np.flatnonzero(~below & (norm < level)):
        try:
            nv, pf = h_infinity_norm(R.A[i], R.B[i], R.C[i], R.D[i], rtol=1e-8)
        except ScheduleError:
            continue
        norm[i], peak[i] = max(norm[i], float(nv)), float(pf)
    return norm, peak, below


# ----------------------------------------------------------------------------- the kernel
def check_arrays(P: dict, K: dict, gamma: float, gamma_tolerance: float = 0.02,
                 classical: bool = True) -> dict[str, np.ndarray]:
    """All frozen-point numbers for stacked plants ``P`` and controllers ``K`` (plain arrays).

    Returns a dict of arrays over the M points: ``spectral_abscissa``, ``stable``,
    ``norm``, ``peak_frequency``, ``ratio`` (norm / gamma), ``norm_ok``; disk
    margins ``in_loop_alpha`` (M, nu), ``in_all_alpha``, ``out_loop_alpha``
    (M, ny), ``out_all_alpha`` and the derived ``in_gain_db``, ``in_phase_deg``
    (worst channel, loop at a time), ``in_all_gain_db``, ``in_all_phase_deg``,
    ``out_gain_db``, ``out_phase_deg``, ``out_all_gain_db``, ``out_all_phase_deg``;
    with ``classical`` also ``in_classical_gain_db``, ``in_classical_phase_deg``
    (worst channel). A module-level function of arrays only, so it can run on
    worker processes or a dask cluster.
    """
    P = _stacked(P, PLANT_KEYS)
    K = _stacked(K, ("A", "B", "C", "D"))
    Acl, Bcl, Ccl, Dcl = closed_loop_many(P, K)
    R = FrequencyResponder(Acl, Bcl, Ccl, Dcl)
    sa = R.spectral_abscissa
    stable = sa < -1e-9 * np.maximum(1.0, np.abs(R.eigenvalues).max(axis=1, initial=0.0))
    M = Acl.shape[0]
    level = gamma * (1.0 + gamma_tolerance) * np.ones(M)
    norm = np.full(M, np.inf)
    peak = np.full(M, np.nan)
    below = np.zeros(M, dtype=bool)
    if np.any(stable):
        idx = np.flatnonzero(stable)
        sub = FrequencyResponder(Acl[idx], Bcl[idx], Ccl[idx], Dcl[idx])
        n_, p_, b_ = hinf_norms_many(None, None, None, None, level[idx], responder=sub)
        norm[idx], peak[idx], below[idx] = n_, p_, b_
    out: dict[str, np.ndarray] = {
        "spectral_abscissa": sa, "stable": stable, "norm": norm, "peak_frequency": peak,
        "ratio": norm / gamma, "norm_ok": stable & below,
    }
    G = (P["A"], P["B2"], P["C2"], P["D22"])
    Kt = (K["A"], K["B"], K["C"], K["D"])
    for at, tag in (("input", "in"), ("output", "out")):
        dm = disk_margins(G, Kt, at=at)
        out[f"{tag}_loop_alpha"] = dm.loop_alpha
        out[f"{tag}_all_alpha"] = dm.all_alpha
        out[f"{tag}_gain_db"] = dm.loop_gain_db.min(axis=1)
        out[f"{tag}_phase_deg"] = dm.loop_phase_deg.min(axis=1)
        out[f"{tag}_all_gain_db"] = dm.all_gain_db
        out[f"{tag}_all_phase_deg"] = dm.all_phase_deg
    if classical:
        cm = classical_margins(G, Kt, at="input")
        out["in_classical_gain_db"] = cm.gain_db.min(axis=1)
        out["in_classical_low_db"] = cm.gain_low_db.max(axis=1)
        out["in_classical_phase_deg"] = cm.phase_deg.min(axis=1)
    return out


def _kernel_chunk(P: dict, K: dict, gamma: float, tol: float, classical: bool) -> dict:
    return check_arrays(P, K, gamma, tol, classical)


def _take(d: dict, idx) -> dict:
    return {k: v[idx] for k, v in d.items()}


def check_points(P: dict, K: dict, gamma: float, settings: CheckSettings | None = None,
                 jobs: int = 1, cluster=None,
                 progress: Callable[[str, int, int], None] | None = None) -> dict:
    """:func:`check_arrays` over many points in chunks, serially, on workers or on dask."""
    from .parallel import run_chunks

    s = settings or CheckSettings()
    P = _stacked(P, PLANT_KEYS)
    K = _stacked(K, ("A", "B", "C", "D"))
    M = P["A"].shape[0]
    size = int(s.chunk)
    if jobs > 1 or cluster is not None:  # at least two chunks per worker
        workers = max(int(jobs), 2)
        size = max(1, min(size, -(-M // (2 * workers))))
    starts = list(range(0, M, size))
    chunks = [(_take(P, slice(a, a + size)), _take(K, slice(a, a + size)), float(gamma),
               s.gamma_tolerance, s.classical) for a in starts]
    parts: dict[int, dict] = {}
    done = 0
    for i, res in run_chunks(_kernel_chunk, chunks, jobs=jobs, cluster=cluster):
        parts[i] = res
        done += len(res["norm"])
        if progress:
            progress("check", done, M)
    if not parts:
        return {}
    return {k: np.concatenate([parts[i][k] for i in range(len(chunks))]) for k in parts[0]}


# ----------------------------------------------------------------------------- where
def spec_for_family(family: Family, model: str | None = None):
    """The DesignSpec stored with a family (None when the family holds no design text).

    ``model`` ("module:function") overrides the design's source with a model
    for the true plant at check points.
    """
    if not family.design_text:
        if model is not None:
            raise InputError("the family holds no design text, so a --model cannot be "
                             "combined with weights; check with the interpolated plant")
        return None
    from .design_file import parse_design
    from .store import family_base_dir

    base = family_base_dir(family) or "."
    spec = parse_design(family.design_text, base)
    if model is not None:
        if ":" not in model:
            raise InputError(f"model {model!r} must be written module:function")
        spec = replace(spec, source=replace(spec.source, model=model, model_file=None,
                                            operating_points=None))
    return spec


def check_points_for(family: Family, settings: CheckSettings, spec=None):
    """The in-between points: (points (M, d), kinds (M,) strings)."""
    from . import envelope as env

    variables = family.variables
    pts, kinds = [], []

    def add(arr, kind):
        arr = np.asarray(arr, dtype=float).reshape(-1, len(variables))
        if arr.size:
            pts.append(arr)
            kinds.extend([kind] * arr.shape[0])

    if family.breakpoints is not None:
        bps = tuple(np.asarray(b, float) for b in family.breakpoints)
        holes = None
        if family.grid_index is not None:
            import itertools

            have = {tuple(r) for r in np.asarray(family.grid_index, int).tolist()}
            miss = [ij for ij in itertools.product(*[range(len(b)) for b in bps])
                    if tuple(ij) not in have]
            if miss:
                holes = np.array([[bps[j][i] for j, i in enumerate(ij)] for ij in miss])
        grid = env.RectangularGrid(bps, holes=holes, variables=variables)
        if settings.centres:
            add(env.cell_centres(grid), "centre")
        if settings.midpoints:
            add(env.edge_midpoints(grid), "midpoint")
    if settings.samples:
        fn = env.sobol if settings.sampler == "sobol" else env.latin_hypercube
        add(fn(variables, int(settings.samples), seed=int(settings.seed)), settings.sampler)
    if settings.points_file:
        add(env.points_from_file(settings.points_file, variables), "file")
    if not pts:
        return np.zeros((0, len(variables))), np.array([], dtype=object)
    return np.vstack(pts), np.array(kinds, dtype=object)


def _true_plants(spec, points: np.ndarray, names: Sequence[str]):
    """Generalized plants from the design's model at points: (stack | None, ok mask, reasons)."""
    from .sources import evaluate_model, load_model
    from .weights import build_generalized_plant

    model = load_model(spec)
    mats = {k: [] for k in PLANT_KEYS}
    ok = np.zeros(len(points), dtype=bool)
    reasons = [""] * len(points)
    shapes = None
    for i, row in enumerate(points):
        point = dict(zip(names, row.tolist(), strict=True))
        lp, reason = evaluate_model(model, point)
        if lp is None:
            reasons[i] = reason
            continue
        try:
            gp = build_generalized_plant(spec, lp, point).to_arrays()
        except ScheduleError as exc:
            reasons[i] = str(exc)
            continue
        if shapes is None:
            shapes = {k: gp[k].shape for k in PLANT_KEYS}
        ok[i] = True
        for k in PLANT_KEYS:
            mats[k].append(gp[k])
    if shapes is None:
        return None, ok, reasons
    stack = {k: np.zeros((len(points),) + shapes[k]) for k in PLANT_KEYS}
    for k in PLANT_KEYS:
        stack[k][ok] = np.stack(mats[k])
    return stack, ok, reasons


def _loo_controllers(sc, family: Family):
    """Controllers predicted at each ok design point with that point left out of the fit."""
    from .interpolate import leave_one_out_controllers

    return leave_one_out_controllers(family, sc)


# ----------------------------------------------------------------------------- result
@dataclass
class CheckResult:
    """Everything the check found (plain arrays); ``to_dict()`` for JSON.

    points (M, d), kind (M,) ("grid", "centre", "midpoint", "sobol",
    "latin_hypercube", "file", "validation", "leave_one_out"), plant_source (M,)
    ("model", "validation", "stored", "interpolated"), values: the arrays of
    :func:`check_arrays` (plus "gamma_opt"), passed (M,), reasons (M,).
    """

    variable_names: tuple[str, ...]
    units: tuple[str, ...]
    gamma: float
    settings: CheckSettings
    points: np.ndarray
    kind: np.ndarray
    plant_source: np.ndarray
    values: dict
    passed: np.ndarray
    reasons: list
    rate: object = None
    proposals: np.ndarray | None = None
    proposed_breakpoints: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    gating: np.ndarray | None = None
    rate_certificate: object = None

    @property
    def gates(self) -> np.ndarray:
        """(M,) True where the point counts in the overall verdict (see CheckSettings.loo_gates)."""
        if self.gating is None:
            return np.ones(len(self.passed), dtype=bool)
        return np.asarray(self.gating, dtype=bool)

    @property
    def all_passed(self) -> bool:
        return bool(np.all(self.passed[self.gates]))

    @property
    def weaker(self) -> bool:
        """True when some point was checked against the interpolated plant."""
        return bool(np.any(self.plant_source == "interpolated"))

    def worst(self, count: int = 10) -> np.ndarray:
        """Indices of the worst points: points that count in the verdict first, then
        failures, then by norm / gamma."""
        ratio = np.nan_to_num(self.values["ratio"], nan=np.inf)
        order = np.lexsort((-ratio, self.passed, ~self.gates))
        return order[:count]

    def summary(self) -> dict:
        v = self.values
        by_kind = {}
        for k in dict.fromkeys(self.kind.tolist()):
            m = self.kind == k
            by_kind[k] = {"points": int(m.sum()), "failed": int((~self.passed[m]).sum()),
                          "max_ratio": _f(np.max(v["ratio"][m])) if m.any() else None,
                          "gates_verdict": bool(np.all(self.gates[m]))}
        gates = self.gates
        return {
            "gamma": self.gamma, "points": int(gates.sum()),
            "failed": int((~self.passed & gates).sum()), "passed": self.all_passed,
            "evidence_points": int((~gates).sum()),
            "evidence_failed": int((~self.passed & ~gates).sum()),
            "unstable": int((~v["stable"] & gates).sum()),
            "max_ratio": _f(np.max(v["ratio"][gates])) if gates.any() else None,
            "min_input_gain_db": _f(np.min(v["in_gain_db"][gates])) if gates.any() else None,
            "min_input_phase_deg": (_f(np.min(v["in_phase_deg"][gates])) if gates.any()
                                    else None),
            "weaker_check": self.weaker, "by_kind": by_kind,
        }

    def to_dict(self) -> dict:
        """JSON-ready dict: settings, summary, per-point table, rate bound and proposals."""
        rows = []
        keys = [k for k in self.values if np.ndim(self.values[k]) == 1]
        for i in range(len(self.passed)):
            row = {"point": dict(zip(self.variable_names, map(float, self.points[i]),
                                     strict=True)),
                   "kind": str(self.kind[i]), "plant": str(self.plant_source[i]),
                   "passed": bool(self.passed[i]), "gates_verdict": bool(self.gates[i]),
                   "reason": self.reasons[i]}
            for k in keys:
                row[k] = _f(self.values[k][i])
            rows.append(row)
        rate = None
        if self.rate is not None:
            rate = {n: {"single": _f(s), "joint": _f(j), "max_dP_norm": _f(w)}
                    for n, s, j, w in zip(self.rate.names, self.rate.single, self.rate.joint,
                                          self.rate.worst, strict=True)}
        return {"settings": asdict(self.settings), "summary": self.summary(),
                "notes": list(self.notes), "rate_bound": rate,
                "rate_certificate": (None if self.rate_certificate is None
                                     else self.rate_certificate.to_dict()),
                "proposals": [] if self.proposals is None else
                [dict(zip(self.variable_names, map(float, r), strict=True))
                 for r in self.proposals],
                "proposed_breakpoints": {k: [float(x) for x in v]
                                         for k, v in self.proposed_breakpoints.items()},
                "points": rows}


def _f(x):
    """A JSON-safe float (inf and nan become strings; bools stay bools)."""
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    x = float(x)
    if np.isnan(x):
        return "nan"
    if np.isinf(x):
        return "inf" if x > 0 else "-inf"
    return x


def _verdict(values: dict, s: CheckSettings, gamma: float) -> tuple[np.ndarray, list]:
    M = len(values["norm"])
    passed = np.ones(M, dtype=bool)
    reasons = [[] for _ in range(M)]
    for i in range(M):
        if not values["stable"][i]:
            reasons[i].append(f"closed loop unstable (spectral abscissa "
                              f"{values['spectral_abscissa'][i]:.3g})")
        elif not values["norm_ok"][i]:
            reasons[i].append(f"norm {values['norm'][i]:.4g} > gamma (1 + tol) = "
                              f"{gamma * (1 + s.gamma_tolerance):.4g}")
        if values["stable"][i] and values["in_gain_db"][i] < s.gain_margin_db:
            reasons[i].append(f"input disk gain margin {values['in_gain_db'][i]:.2f} dB < "
                              f"{s.gain_margin_db:g} dB")
        if values["stable"][i] and values["in_phase_deg"][i] < s.phase_margin_deg:
            reasons[i].append(f"input disk phase margin {values['in_phase_deg'][i]:.1f} deg < "
                              f"{s.phase_margin_deg:g} deg")
        passed[i] = not reasons[i]
    return passed, ["; ".join(r) for r in reasons]


# ----------------------------------------------------------------------------- proposals
def propose_points(result: CheckResult, family: Family) -> tuple[np.ndarray, dict]:
    """New design points where failures cluster, worst first, and new breakpoints.

    For a rectangular grid: each failing in-between point lies in one grid
    cell; the proposal is that cell's centre, and the proposed breakpoints
    are the midpoints of the grid intervals that hold failing points. For
    scattered families the failing points themselves are proposed, and for a
    failing leave-one-out point the midpoint towards its nearest design
    point. Failing design points (kind "grid") are not proposed: adding
    points there changes nothing.
    """
    fail = np.flatnonzero(~result.passed & result.gates & (result.kind != "grid"))
    ratio = np.nan_to_num(result.values["ratio"][fail], nan=np.inf)
    fail = fail[np.argsort(-ratio, kind="stable")]
    names = result.variable_names
    if fail.size == 0:
        return np.zeros((0, len(names))), {}
    pts = result.points[fail].copy()
    fam_pts = np.asarray(family.points, float)[np.asarray(family.ok)]
    if family.breakpoints is None:
        # a failing leave-one-out point is a design point: propose the midpoint towards
        # its nearest other design point (distances in units of the variable ranges)
        span = np.array([v.upper - v.lower for v in family.variables], float)
        span = np.where(span > 0, span, 1.0)
        for r in np.flatnonzero(result.kind[fail] == "leave_one_out"):
            dist = np.linalg.norm((fam_pts - pts[r]) / span, axis=1)
            dist[dist < 1e-12] = np.inf
            if np.isfinite(dist).any():
                pts[r] = 0.5 * (pts[r] + fam_pts[int(np.argmin(dist))])
        props = pts
        bps: dict = {}
    else:
        bps = {n: set() for n in names}
        props = np.empty_like(pts)
        for j, b in enumerate(family.breakpoints):
            b = np.asarray(b, float)
            if b.size < 2:
                props[:, j] = pts[:, j]
                continue
            k = np.clip(np.searchsorted(b, pts[:, j], side="right") - 1, 0, b.size - 2)
            mid = 0.5 * (b[k] + b[k + 1])
            props[:, j] = mid
            bps[names[j]].update(mid.tolist())
        bps = {n: sorted(v) for n, v in bps.items() if v}
    # de-duplicate, keep order, and drop points the family already has
    seen, keep = set(), []
    existing = {tuple(np.round(r, 12)) for r in np.asarray(family.points, float)}
    for i, r in enumerate(props):
        key = tuple(np.round(r, 12))
        if key in seen or key in existing:
            continue
        seen.add(key)
        keep.append(i)
    return props[keep], bps


# ----------------------------------------------------------------------------- driver
GAMMA_OPT_CHUNK = 32  # check points per gamma_opt work chunk, whatever the worker count


def _gamma_opt(P: dict, idx: np.ndarray, jobs: int, cluster) -> np.ndarray:
    from .family import gamma_chunk
    from .parallel import run_chunks

    out = np.full(P["A"].shape[0], np.nan)
    if idx.size == 0:
        return out
    # Fixed chunks (not a function of jobs): warm starts inside a chunk then see
    # the same neighbours whatever the number of workers, so results are identical.
    size = GAMMA_OPT_CHUNK
    pieces = [idx[a:a + size] for a in range(0, idx.size, size)]
    chunks = [({k: P[k][c] for k in PLANT_KEYS}, 1e-3) for c in pieces]
    for i, (g, _reasons) in run_chunks(gamma_chunk, chunks, jobs=jobs, cluster=cluster):
        out[pieces[i]] = g
    return out


def _rate(family, sc, spec, pts, P, K, names) -> object:
    """Rate bound on the check points from central differences of the closed-loop A."""
    from .rate import rate_bounds

    d = pts.shape[1]
    lo = np.array([v.lower for v in family.variables])
    hi = np.array([v.upper for v in family.variables])
    Acl = closed_loop_many(P, K)[0]
    dA = np.zeros((pts.shape[0], d) + Acl.shape[1:])
    for j in range(d):
        h = 1e-4 * (hi[j] - lo[j])
        e = np.zeros(d)
        e[j] = h
        up, dn = np.minimum(pts + e, hi), np.maximum(pts - e, lo)
        step = (up - dn)[:, j]
        dK = sc.derivative(pts, j)
        Pu = _plants_at(family, sc, spec, up, names)[0]
        Pd = _plants_at(family, sc, spec, dn, names)[0]
        Ku = {k: K[k] + dK[k] * (up - pts)[:, j, None, None] for k in K}
        Kd = {k: K[k] + dK[k] * (dn - pts)[:, j, None, None] for k in K}
        dA[:, j] = (closed_loop_many(Pu, Ku)[0] - closed_loop_many(Pd, Kd)[0]) / step[:, None,
                                                                                     None]
    return rate_bounds(Acl, dA, names)


def _plants_at(family, sc, spec, pts, names):
    """Plants at points: (stack, source labels, ok mask, reasons)."""
    M = pts.shape[0]
    if spec is not None and (spec.source.model is not None or spec.source.model_file is not None):
        stack, ok, reasons = _true_plants(spec, pts, names)
        if stack is None:
            raise InputError(f"the model failed at every check point ({reasons[0]}); fix the "
                             "model or check without it")
        return stack, np.array(["model"] * M, dtype=object), ok, reasons
    stack = sc.plant_at(pts)
    return stack, np.array(["interpolated"] * M, dtype=object), np.ones(M, bool), [""] * M


def check_family(family: Family, settings: CheckSettings | None = None, spec=None,
                 jobs: int = 1, cluster=None, controller=None, extra_points=None,
                 progress: Callable[[str, int, int], None] | None = None) -> CheckResult:
    """Frozen-point checks of the family's scheduled controller over in-between points.

    Parameters
    ----------
    family : the family (with its fitted interpolant, or pass ``controller``).
    settings : :class:`CheckSettings` (default: from the design's [check] table).
    spec : the DesignSpec (default: parsed from the family's design text; None
        when it has none). Its model gives the true plant; its validation file
        adds validation points.
    jobs, cluster : parallel workers or a dask scheduler for the batched checks.
    controller : a :class:`schedule.interpolate.ScheduledController` to check
        instead of the stored one.
    extra_points : optional (k, d) further check points (kind "previous"; the
        refinement loop passes the earlier rounds' in-between points).

    Returns
    -------
    CheckResult
    """
    from .interpolate import ScheduledController

    notes: list[str] = []
    if spec is None and family.design_text:
        try:
            spec = spec_for_family(family)
        except InputError as exc:
            notes.append(f"the family's design text could not be used ({exc}); checking "
                         "against the interpolated plant")
    s = settings or CheckSettings.from_spec(spec)
    s.validate()
    sc = controller or ScheduledController.from_family(family)
    names = family.variable_names
    pts, kinds = check_points_for(family, s, spec)
    if extra_points is not None and np.size(extra_points):
        ep = np.asarray(extra_points, dtype=float).reshape(-1, len(names))
        pts = np.vstack([pts, ep])
        kinds = np.concatenate([kinds, np.array(["previous"] * len(ep), dtype=object)])
    P, src, ok, reasons = (_plants_at(family, sc, spec, pts, names) if len(pts) else
                           ({k: np.zeros((0,) + family.plant[k].shape[1:]) for k in PLANT_KEYS},
                            np.array([], dtype=object), np.zeros(0, bool), []))
    K = sc.evaluate(pts) if len(pts) else {k: np.zeros((0,) + family.controller[k].shape[1:])
                                            for k in ("A", "B", "C", "D")}
    all_pts, all_kinds, all_src, Ps, Ks = [pts[ok]], [kinds[ok]], [src[ok]], [
        {k: P[k][ok] for k in PLANT_KEYS}], [{k: K[k][ok] for k in K}]
    for i in np.flatnonzero(~ok):
        notes.append(f"check point ({point_text(names, pts[i])}) skipped: {reasons[i]}")
    rows = np.flatnonzero(family.ok)
    if s.grid and rows.size:
        all_pts.append(np.asarray(family.points, float)[rows])
        all_kinds.append(np.array(["grid"] * rows.size, dtype=object))
        all_src.append(np.array(["stored"] * rows.size, dtype=object))
        Ps.append({k: np.asarray(family.plant[k])[rows] for k in PLANT_KEYS})
        Ks.append({k: np.asarray(family.controller[k])[rows] for k in ("A", "B", "C", "D")})
    if s.loo and rows.size >= 2:
        lrows, LK, good = _loo_controllers(sc, family)
        all_pts.append(np.asarray(family.points, float)[lrows[good]])
        all_kinds.append(np.array(["leave_one_out"] * int(good.sum()), dtype=object))
        all_src.append(np.array(["stored"] * int(good.sum()), dtype=object))
        Ps.append({k: np.asarray(family.plant[k])[lrows[good]] for k in PLANT_KEYS})
        Ks.append({k: LK[k][good] for k in LK})
    if spec is not None and spec.source.validation is not None:
        from .oppoints import read_operating_points
        from .weights import build_generalized_plant

        ops = read_operating_points(spec.source.validation)
        vp = {k: [] for k in PLANT_KEYS}
        vpts = []
        for i in range(len(ops)):
            point = dict(zip([v.name for v in ops.variables], ops.values[i].tolist(),
                             strict=True))
            gp = build_generalized_plant(spec, ops.plant(i), point).to_arrays()
            for k in PLANT_KEYS:
                vp[k].append(gp[k])
            vpts.append([point[n] for n in names])
        if vpts:
            vpts = np.array(vpts, float)
            all_pts.append(vpts)
            all_kinds.append(np.array(["validation"] * len(vpts), dtype=object))
            all_src.append(np.array(["validation"] * len(vpts), dtype=object))
            Ps.append({k: np.stack(vp[k]) for k in PLANT_KEYS})
            Ks.append(sc.evaluate(vpts))
    pts_all = np.vstack(all_pts)
    if pts_all.shape[0] == 0:
        raise InputError("there is nothing to check: no grid, no samples and no points file; "
                         "ask for --samples N or give --points FILE")
    Pall = {k: np.concatenate([p[k] for p in Ps]) for k in PLANT_KEYS}
    Kall = {k: np.concatenate([q[k] for q in Ks]) for k in ("A", "B", "C", "D")}
    values = check_points(Pall, Kall, family.gamma, s, jobs=jobs, cluster=cluster,
                          progress=progress)
    kinds_all = np.concatenate(all_kinds)
    src_all = np.concatenate(all_src)
    values["gamma_opt"] = np.full(pts_all.shape[0], np.nan)
    if s.gamma_opt:
        idx = np.flatnonzero(kinds_all != "grid")
        values["gamma_opt"] = _gamma_opt(Pall, idx, jobs, cluster)
        if s.grid:
            grid_idx = np.flatnonzero(kinds_all == "grid")
            values["gamma_opt"][grid_idx] = np.asarray(family.gamma_opt, float)[rows]
    passed, why = _verdict(values, s, family.gamma)
    result = CheckResult(names, tuple(v.unit for v in family.variables), float(family.gamma), s,
                         pts_all, kinds_all, src_all, values, passed, why, notes=notes)
    if result.weaker:
        notes.append(WEAKER)
    loo_gates = s.loo_gates if s.loo_gates is not None else result.weaker
    result.gating = (kinds_all != "leave_one_out") | bool(loo_gates)
    if not loo_gates and np.any(kinds_all == "leave_one_out"):
        notes.append("leave-one-out predictions (twice the grid spacing, extrapolated at the "
                     "edges) are shown as evidence and do not gate the verdict, because the "
                     "in-between points were checked on the true plant")
    if s.rate:
        sel = np.flatnonzero(np.isin(kinds_all, ["centre", "midpoint", "sobol",
                                                  "latin_hypercube", "file", "previous"])
                             & values["stable"])
        if sel.size:
            try:
                subP = {k: Pall[k][sel] for k in PLANT_KEYS}
                subK = {k: Kall[k][sel] for k in Kall}
                result.rate = _rate(family, sc, spec, pts_all[sel], subP, subK, names)
            except ScheduleError as exc:
                notes.append(f"rate bound not computed: {exc}")
    if s.rate_certificate:
        result.rate_certificate = _rate_certificate(family, spec, sc, result, progress)
    result.proposals, result.proposed_breakpoints = propose_points(result, family)
    return result


def _rate_certificate(family, spec, sc, result, progress):
    """The hook into :mod:`schedule.analysis` (certified rates; None with a note on failure)."""
    from .analysis.family_rates import certify_family

    count = [0]

    def say(_message: str) -> None:
        count[0] += 1
        if progress:
            progress("rates", count[0], count[0] + 1)

    try:
        return certify_family(family, spec, controller=sc, frozen_bound=result.rate,
                              progress=say)
    except ScheduleError as exc:
        result.notes.append(f"rate certificate not computed: {exc}")
        return None


def scheduled_loop(family: Family, spec=None, controller=None):
    """``p -> A_cl(p)``: the frozen scheduled loop at p, for :func:`schedule.rate.simulate_varying`.

    The plant is the design's model linearized at p (with the design's weights)
    when there is one, else the family's interpolated plant; the controller is
    the scheduled controller at p. The closed-loop state is ``[x; x_K]``.
    """
    from .interpolate import ScheduledController

    if spec is None and family.design_text:
        spec = spec_for_family(family)
    sc = controller or ScheduledController.from_family(family)
    names = family.variable_names

    def state_matrix(p) -> np.ndarray:
        pts = np.asarray(p, dtype=float).reshape(1, -1)
        P, _src, ok, reasons = _plants_at(family, sc, spec, pts, names)
        if not ok[0]:
            raise InputError(f"the model failed at ({point_text(names, pts[0])}): {reasons[0]}")
        return closed_loop_many(P, sc.evaluate(pts))[0][0]

    return state_matrix


def default_jobs() -> int:
    """Worker count for --jobs 0 (all cores)."""
    return max(1, os.cpu_count() or 1)
