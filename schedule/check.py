"""Frozen-point checks of a scheduled controller at in-between points.

At every check point p the interpolated controller K(p) is closed with a plant
at p and judged frozen (p held fixed; Shamma and Athans 1990, 1991):

- closed-loop stability, by the package's one predicate
  (:func:`schedule.norms.stability`);
- the closed-loop H-infinity norm of the weighted loop against the family's
  gamma, passing when the certified norm is at most ``gamma (1 + gamma_tolerance)``
  (:class:`PassCriterion`, the one place the threshold is worked out). The norm comes
  from the package's one norm route, :func:`schedule.norms.h_infinity_norms`
  (two-step level-set method of Boyd, Balakrishnan and Kabamba 1989 and Bruinsma
  and Steinbuch 1990, batched over points, accurate to ``NORM_RTOL``): a point
  passes only when the certified upper bound is below the level, and a norm in doubt
  fails towards "above" with the reason;
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

from .design_file import CheckSpec
from .errors import InputError, ScheduleError
from .margins import classical_margins, disk_margins
from .norms import closed_loop_many, h_infinity_norms
from .progress import stage_line
from .types import Family, point_text

__all__ = [
    "CheckSettings",
    "CheckResult",
    "PassCriterion",
    "NORM_RTOL",
    "check_arrays",
    "check_points",
    "check_points_for",
    "check_family",
    "plants_at",
    "propose_points",
    "spec_for_family",
    "scheduled_loop",
]

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
NORM_RTOL = 1e-8  # relative accuracy of the closed-loop norms (certified upper bound)
_DEFAULTS = CheckSpec()  # the one list of check defaults (the design file's [check] table)
WEAKER = ("interpolated plant: the family's own interpolated model, not the true plant - a "
          "weaker check; add a model or a validation file to the design")


# ----------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class CheckSettings:
    """What to check and the pass thresholds.

    The defaults of the fields shared with the design file's [check] table come from
    :class:`schedule.design_file.CheckSpec` (one list).

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

    samples: int = _DEFAULTS.samples
    sampler: str = _DEFAULTS.sampler
    seed: int = _DEFAULTS.seed
    centres: bool = True
    midpoints: bool = True
    loo: bool = True
    grid: bool = True
    points_file: str | None = None
    gamma_tolerance: float = _DEFAULTS.gamma_tolerance
    gain_margin_db: float = _DEFAULTS.gain_margin_db
    phase_margin_deg: float = _DEFAULTS.phase_margin_deg
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


# ----------------------------------------------------------------------------- criterion
@dataclass(frozen=True)
class PassCriterion:
    """What a frozen point must meet to pass: the one place the thresholds are applied.

    A point passes when its closed loop is stable (:func:`schedule.norms.stability`), its
    certified closed-loop norm is at most ``norm_limit = gamma (1 + gamma_tolerance)`` and
    (for a stable loop) the loop-at-a-time disk margins at the plant input reach
    ``gain_margin_db`` and ``phase_margin_deg``. The command line and the report only
    display :meth:`describe` and :attr:`norm_limit`.
    """

    gamma: float
    gamma_tolerance: float = _DEFAULTS.gamma_tolerance
    gain_margin_db: float = _DEFAULTS.gain_margin_db
    phase_margin_deg: float = _DEFAULTS.phase_margin_deg

    @classmethod
    def from_settings(cls, gamma: float, settings: CheckSettings) -> PassCriterion:
        return cls(float(gamma), float(settings.gamma_tolerance),
                   float(settings.gain_margin_db), float(settings.phase_margin_deg))

    @property
    def norm_limit(self) -> float:
        """The largest certified closed-loop norm that passes, ``gamma (1 + tolerance)``."""
        return self.gamma * (1.0 + self.gamma_tolerance)

    def describe(self) -> str:
        """The criterion in one line (for the command line and the report)."""
        return (f"stable, certified closed-loop norm <= gamma (1 + {self.gamma_tolerance:g}) = "
                f"{self.norm_limit:.6g}, input disk margins >= {self.gain_margin_db:g} dB / "
                f"{self.phase_margin_deg:g} deg" + (
                    " (common practice)" if (self.gain_margin_db, self.phase_margin_deg)
                    == (_DEFAULTS.gain_margin_db, _DEFAULTS.phase_margin_deg) else ""))

    def norm_passes(self, values: dict) -> np.ndarray:
        """(M,) stable and certified norm upper bound at most :attr:`norm_limit`."""
        return np.asarray(values["stable"], bool) & (
            np.asarray(values["norm_bound"], float) <= self.norm_limit)

    def judge(self, values: dict) -> tuple[np.ndarray, list[str]]:
        """``(passed (M,), reasons)``: each reason a one-line text, "" for a pass."""
        M = len(values["norm"])
        ok_norm = self.norm_passes(values)
        passed = np.ones(M, dtype=bool)
        reasons: list[str] = []
        limit = self.norm_limit
        for i in range(M):
            why = []
            stable = bool(values["stable"][i])
            if not stable:
                why.append(str(values["stability_status"][i]))
            elif not ok_norm[i]:
                status = str(values["norm_status"][i])
                if status:
                    why.append(f"norm not certified below {limit:.4g} ({status}); "
                               f"counted as above")
                else:
                    why.append(f"norm {values['norm'][i]:.4g} > gamma (1 + tol) = {limit:.4g}")
            if stable and values["in_gain_db"][i] < self.gain_margin_db:
                why.append(f"input disk gain margin {values['in_gain_db'][i]:.2f} dB < "
                           f"{self.gain_margin_db:g} dB")
            if stable and values["in_phase_deg"][i] < self.phase_margin_deg:
                why.append(f"input disk phase margin {values['in_phase_deg'][i]:.1f} deg < "
                           f"{self.phase_margin_deg:g} deg")
            passed[i] = not why
            reasons.append("; ".join(why))
        return passed, reasons


# ----------------------------------------------------------------------------- the kernel
def _stacked(P: dict, keys) -> dict:
    out = {}
    for k in keys:
        a = np.asarray(P[k], dtype=float)
        out[k] = a[None] if a.ndim == 2 else a
    return out


def check_arrays(P: dict, K: dict, gamma: float,
                 gamma_tolerance: float = _DEFAULTS.gamma_tolerance,
                 classical: bool = True) -> dict[str, np.ndarray]:
    """All frozen-point numbers for stacked plants ``P`` and controllers ``K`` (plain arrays).

    Returns a dict of arrays over the M points: ``spectral_abscissa``, ``stable`` and
    ``stability_status`` (the package's one predicate and its one-line reason, "" when
    stable); ``norm`` (an attained value of sigma_max: a lower bound), ``norm_bound`` (the
    certified upper bound, inf where not certified), ``norm_status`` ("" or why the norm is
    in doubt), ``peak_frequency``, ``ratio`` (norm / gamma), ``norm_ok``
    (:meth:`PassCriterion.norm_passes`); disk margins ``in_loop_alpha`` (M, nu),
    ``in_all_alpha``, ``out_loop_alpha`` (M, ny), ``out_all_alpha`` and the derived
    ``in_gain_db``, ``in_phase_deg`` (worst channel, loop at a time),
    ``in_all_gain_db``, ``in_all_phase_deg``, ``out_gain_db``, ``out_phase_deg``,
    ``out_all_gain_db``, ``out_all_phase_deg``; with ``classical`` also
    ``in_classical_gain_db``, ``in_classical_phase_deg`` (worst channel). A
    module-level function of arrays only, so it can run on worker processes or a dask
    cluster.
    """
    P = _stacked(P, PLANT_KEYS)
    K = _stacked(K, ("A", "B", "C", "D"))
    Acl, Bcl, Ccl, Dcl = closed_loop_many(P, K)
    cert = h_infinity_norms(Acl, Bcl, Ccl, Dcl, rtol=NORM_RTOL)
    st = cert.stability
    M = Acl.shape[0]
    if st is None:  # no closed-loop states: a static loop is stable
        sa, stable = np.full(M, -np.inf), np.ones(M, bool)
        why = np.array([""] * M, dtype=object)
    else:
        sa, stable = st.abscissa, st.stable
        why = np.array([st.reason(i) for i in range(M)], dtype=object)
    status = np.array([s if stable[i] else "" for i, s in enumerate(cert.status)], dtype=object)
    out: dict[str, np.ndarray] = {
        "spectral_abscissa": sa, "stable": stable, "stability_status": why,
        "norm": cert.norm, "norm_bound": cert.upper, "norm_status": status,
        "peak_frequency": cert.peak, "ratio": cert.norm / gamma,
    }
    out["norm_ok"] = PassCriterion(float(gamma), float(gamma_tolerance)).norm_passes(out)
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


def _kernel_chunk(P: dict, K: dict, gamma: float, tol: float, classical: bool,
                  sample_time: float = 0.0) -> dict:
    if sample_time > 0:
        from .analysis.discrete_loop import discrete_check_arrays

        return discrete_check_arrays(P, K, gamma, tol, classical, sample_time)
    return check_arrays(P, K, gamma, tol, classical)


def _take(d: dict, idx) -> dict:
    return {k: v[idx] for k, v in d.items()}


def check_points(P: dict, K: dict, gamma: float, settings: CheckSettings | None = None,
                 jobs: int = 1, cluster=None,
                 progress: Callable[[str, int, int], None] | None = None,
                 sample_time: float = 0.0, stage: str = "check") -> dict:
    """:func:`check_arrays` over many points in chunks, serially, on workers or on dask
    (chunk and task sizes: :func:`schedule.parallel.work_chunk`).

    With ``sample_time`` > 0 the loops are discrete (zero-order-hold plants, discrete
    controllers) and each chunk goes to
    :func:`schedule.analysis.discrete_loop.discrete_check_arrays` instead.
    ``progress(stage, done, M)`` is told as chunks finish.
    """
    from .parallel import run_chunks, session, work_chunk

    s = settings or CheckSettings()
    P = _stacked(P, PLANT_KEYS)
    K = _stacked(K, ("A", "B", "C", "D"))
    M = P["A"].shape[0]
    parts: dict[int, dict] = {}
    done = 0
    if progress and cluster is None and jobs == 1:
        return _serial_with_progress(P, K, gamma, s, sample_time, progress, stage)
    with session(cluster) as client:
        size = work_chunk(M, jobs, client, largest=int(s.chunk))
        if progress:
            progress(stage, 0, M)
        starts = list(range(0, M, size))
        chunks = [(_take(P, slice(a, a + size)), _take(K, slice(a, a + size)), float(gamma),
                   s.gamma_tolerance, s.classical, float(sample_time)) for a in starts]
        for i, res in run_chunks(_kernel_chunk, chunks, jobs=jobs, cluster=client):
            parts[i] = res
            done += len(res["norm"])
            if progress:
                progress(stage, done, M)
    if not parts:
        return {}
    return {k: np.concatenate([parts[i][k] for i in range(len(chunks))]) for k in parts[0]}


def _serial_with_progress(P: dict, K: dict, gamma: float, s: CheckSettings,
                          sample_time: float, progress, stage: str) -> dict:
    """:func:`check_points` in this process, in chunks timed to report progress about
    once a second (:func:`schedule.progress.timed_slices`; every point is checked on its
    own, so the chunks change a result by round-off at most, as the worker split does)."""
    from .progress import timed_slices

    M = P["A"].shape[0]
    progress(stage, 0, M)
    parts = []
    for sl in timed_slices(M, largest=int(s.chunk)):
        parts.append(_kernel_chunk(_take(P, sl), _take(K, sl), float(gamma), s.gamma_tolerance,
                                   s.classical, float(sample_time)))
        progress(stage, sl.stop, M)
    if not parts:
        return {}
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


# ----------------------------------------------------------------------------- where
def spec_for_family(family: Family, model: str | None = None, design=None):
    """The DesignSpec stored with a family, without its code (None when it holds no design).

    A family file is data: the model entries of its stored design text are
    set aside unimported (:func:`schedule.sources.without_code`; the checks then
    use the interpolated plant, labelled a weaker check) unless the user names
    the code: ``model`` ("module:function", the true plant at check points) or
    ``design`` (the path of a design file whose model entries the user trusts;
    without stored design text it gives the whole design).
    """
    from .sources import with_code_from, with_model, without_code

    trusted = None
    if design is not None:
        from .design_file import load_design

        trusted = load_design(design)
    if not family.design_text:
        if trusted is not None:
            return with_model(trusted, model) if model is not None else trusted
        if model is not None:
            raise InputError("the family holds no design text, so a --model cannot be "
                             "combined with weights; pass --design FILE too, or check with "
                             "the interpolated plant")
        return None
    from .design_file import parse_design
    from .store import family_base_dir

    base = family_base_dir(family) or "."
    spec = without_code(parse_design(family.design_text, base, name="the family's design"))
    if trusted is not None:
        spec = with_code_from(spec, trusted)
    if model is not None:
        spec = with_model(spec, model)
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
        between, between_kinds = env.in_between_points(grid, settings.centres,
                                                       settings.midpoints)
        for kind in ("centre", "midpoint"):
            add(between[between_kinds == kind], kind)
    if settings.samples:
        fn = env.sobol if settings.sampler == "sobol" else env.latin_hypercube
        add(fn(variables, int(settings.samples), seed=int(settings.seed)), settings.sampler)
    if settings.points_file:
        add(env.points_from_file(settings.points_file, variables), "file")
    if not pts:
        return np.zeros((0, len(variables))), np.array([], dtype=object)
    return np.vstack(pts), np.array(kinds, dtype=object)


def _true_plants(spec, points: np.ndarray, names: Sequence[str], progress=None,
                 stage: str = "plants"):
    """Generalized plants from the design's model at points: (stack | None, ok mask, reasons).

    ``progress(stage, done, total)`` is told after every point (the bar draws a few
    times a second)."""
    from .sources import evaluate_model, load_model
    from .weights import build_generalized_plant

    model = load_model(spec)
    mats = {k: [] for k in PLANT_KEYS}
    ok = np.zeros(len(points), dtype=bool)
    reasons = [""] * len(points)
    shapes = None
    M = len(points)
    if progress:
        progress(stage, 0, M)
    for i, row in enumerate(points):
        if progress and i:
            progress(stage, i, M)
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
    if progress:
        progress(stage, M, M)
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
    def criterion(self) -> PassCriterion:
        """The pass criterion the verdict applied (for display)."""
        return PassCriterion.from_settings(self.gamma, self.settings)

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
        rows = point_rows(self, self.gates)
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


def point_rows(result, gates=None) -> list[dict]:
    """One JSON-ready dict per checked point of ``result`` (a CheckResult or any object
    with ``variable_names``, ``points``, ``kind``, ``plant_source``, ``passed``,
    ``reasons`` and ``values``): the point, its kind and plant, the verdict (with
    ``gates_verdict`` when ``gates`` is given), the reason and every per-point value."""
    rows = []
    keys = [k for k in result.values if np.ndim(result.values[k]) == 1]
    for i in range(len(result.passed)):
        row = {"point": dict(zip(result.variable_names, map(float, result.points[i]),
                                 strict=True)),
               "kind": str(result.kind[i]), "plant": str(result.plant_source[i]),
               "passed": bool(result.passed[i])}
        if gates is not None:
            row["gates_verdict"] = bool(gates[i])
        row["reason"] = result.reasons[i]
        for k in keys:
            row[k] = _f(result.values[k][i])
        rows.append(row)
    return rows


def _f(x):
    """A JSON-safe float (inf and nan become strings; bools and strings stay)."""
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, str):
        return x
    x = float(x)
    if np.isnan(x):
        return "nan"
    if np.isinf(x):
        return "inf" if x > 0 else "-inf"
    return x


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


def _gamma_opt(P: dict, idx: np.ndarray, jobs: int, cluster, progress=None) -> np.ndarray:
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
    done = 0
    if progress:
        progress("gamma_opt", 0, idx.size)
    for i, (g, _reasons) in run_chunks(gamma_chunk, chunks, jobs=jobs, cluster=cluster):
        out[pieces[i]] = g
        done += pieces[i].size
        if progress:
            progress("gamma_opt", done, idx.size)
    return out


def _rate(family, sc, spec, pts, P, K, names, progress=None) -> object:
    """Rate bound on the check points from central differences of the closed-loop A
    (``progress`` counts the plants evaluated on either side of every point)."""
    from .rate import rate_bounds

    d = pts.shape[1]
    lo = np.array([v.lower for v in family.variables])
    hi = np.array([v.upper for v in family.variables])
    Acl = closed_loop_many(P, K)[0]
    dA = np.zeros((pts.shape[0], d) + Acl.shape[1:])
    M = pts.shape[0]
    count = [0]

    def step_progress(_stage: str, done: int, _total: int) -> None:
        if progress:
            progress("rate bound", count[0] + done, (2 * d + 1) * M)

    step_progress("", 0, 0)
    for j in range(d):
        h = 1e-4 * (hi[j] - lo[j])
        e = np.zeros(d)
        e[j] = h
        up, dn = np.minimum(pts + e, hi), np.maximum(pts - e, lo)
        step = (up - dn)[:, j]
        dK = sc.derivative(pts, j)
        Pu = _plants_at(family, sc, spec, up, names, step_progress)[0]
        count[0] += M
        Pd = _plants_at(family, sc, spec, dn, names, step_progress)[0]
        count[0] += M
        Ku = {k: K[k] + dK[k] * (up - pts)[:, j, None, None] for k in K}
        Kd = {k: K[k] + dK[k] * (dn - pts)[:, j, None, None] for k in K}
        dA[:, j] = (closed_loop_many(Pu, Ku)[0] - closed_loop_many(Pd, Kd)[0]) / step[:, None,
                                                                                     None]
        step_progress("", 0, 0)
    bound = rate_bounds(Acl, dA, names)
    count[0] += M
    step_progress("", 0, 0)
    return bound


def plants_at(family: Family, points, spec=None, controller=None, progress=None):
    """Generalized plants at ``points`` (M, d): the design's model where ``spec`` has one
    (the true plant), else the family's interpolated plant.

    Returns ``(stack, source (M,) "model" | "interpolated", ok (M,), reasons)``; a point
    where the model fails has ``ok`` False and its reason. ``progress(stage, done,
    total)`` is told as the model is evaluated.
    """
    from .interpolate import ScheduledController

    sc = controller or ScheduledController.from_family(family)
    pts = np.asarray(points, dtype=float).reshape(-1, len(family.variables))
    return _plants_at(family, sc, spec, pts, family.variable_names, progress)


def _plants_at(family, sc, spec, pts, names, progress=None, stage: str = "plants"):
    """Plants at points: (stack, source labels, ok mask, reasons); ``progress`` as in
    :func:`_true_plants` (the model is evaluated point by point)."""
    M = pts.shape[0]
    if spec is not None and (spec.source.model is not None or spec.source.model_file is not None):
        stack, ok, reasons = _true_plants(spec, pts, names, progress, stage)
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
    stage_line(progress, "check points")
    pts, kinds = check_points_for(family, s, spec)
    if extra_points is not None and np.size(extra_points):
        ep = np.asarray(extra_points, dtype=float).reshape(-1, len(names))
        pts = np.vstack([pts, ep])
        kinds = np.concatenate([kinds, np.array(["previous"] * len(ep), dtype=object)])
    P, src, ok, reasons = (_plants_at(family, sc, spec, pts, names, progress) if len(pts) else
                           ({k: np.zeros((0,) + family.plant[k].shape[1:]) for k in PLANT_KEYS},
                            np.array([], dtype=object), np.zeros(0, bool), []))
    stage_line(progress, "controllers")
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
        stage_line(progress, "leave-one-out")
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
        values["gamma_opt"] = _gamma_opt(Pall, idx, jobs, cluster, progress)
        if s.grid:
            grid_idx = np.flatnonzero(kinds_all == "grid")
            values["gamma_opt"][grid_idx] = np.asarray(family.gamma_opt, float)[rows]
    passed, why = PassCriterion.from_settings(family.gamma, s).judge(values)
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
                result.rate = _rate(family, sc, spec, pts_all[sel], subP, subK, names,
                                    progress)
            except ScheduleError as exc:
                notes.append(f"rate bound not computed: {exc}")
    if s.rate_certificate:
        result.rate_certificate = _rate_certificate(family, spec, sc, result, progress)
    result.proposals, result.proposed_breakpoints = propose_points(result, family)
    return result


def _rate_certificate(family, spec, sc, result, progress):
    """The hook into :mod:`schedule.analysis` (certified rates; None with a note on failure)."""
    from .analysis.family_rates import certify_family

    phase, solves = ["rate certificate"], [0]

    def say(message: str) -> None:
        # phases start "rate certificate: ..."; the lines between report finished solves
        if message.startswith("rate certificate"):
            phase[0], solves[0] = message, 0
        else:
            solves[0] += 1
        if progress:
            progress(phase[0], solves[0], 0)

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
