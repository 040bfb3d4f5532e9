"""Benchmark of the rate certificate: LMI time on the crane (35 points) and a 2,401-point envelope.

Run: python tests/benchmarks/bench_rate_certificate.py [--family crane.h5] [--full]

Prints, from one run, side by side:

- the crane (7 x 5 = 35 design points, closed loop of order 12, the design's
  [rate_certificate] basis): time to evaluate the loop at the dense check
  points, one stability LMI and one gain LMI imposed at the 35 design points at
  both vertices of |d rope_length/dt| <= 0.4 m/s, time per imposed cone, the
  gain LMI in its reduced form against the full form (as solved before), one
  cutting-plane attempt at 0.4 m/s with the cuts spread over grid cells against
  the previous spacing (2 % of the range), and
  the a-posteriori dense check against the solve; with ``--full`` the whole
  certificate (bisection, cutting planes, gain curve, witness) as
  ``schedule check --rate-certificate`` runs it;
- a synthetic 4-variable envelope of 7^4 = 2,401 points (the invented plants of
  bench_family.py at order 2: closed loop of order 6, affine basis): one
  stability LMI at all 2,401 points with p1 moving (4,802 cones) and the dense
  check over the 16 vertices of the joint rate box.

The machine is shared (2 cores): read the ratios, not the absolute seconds;
the load average is printed with each block.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parent))  # bench_family.py

_MODEL: dict = {}


def synthetic_plant_2(point):
    """bench_family's invented plant, order 2 (A affine in p1..p4)."""
    from bench_family import _model

    from schedule.types import LinearPlant

    if "m" not in _MODEL:
        _MODEL["m"] = _model(2)
    A0, Ai, B, C = _MODEL["m"]
    A = A0 + sum(point[f"p{i + 1}"] * a for i, a in enumerate(Ai))
    return LinearPlant(A, B, C, np.zeros((2, 2)), ("x0", "x1"), ("u", "d"), ("y1", "y2"))


def load() -> str:
    return "load average {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def crane(family_path: str | None, full: bool) -> None:
    from schedule.analysis.basis import parse_basis
    from schedule.analysis.family_rates import certify_family, dense_points, family_loop
    from schedule.analysis.lmi import lmi_worst, solve_lmi
    from schedule.analysis.lpv_certificate import CertificateSettings, Certifier
    from schedule.check import spec_for_family
    from schedule.design_file import load_design
    from schedule.family import run_design
    from schedule.store import read_family

    if family_path:
        fam = read_family(family_path)
    else:
        design = HERE.parents[2] / "operating_points" / "crane_design.toml"
        fam, t = _timed(lambda: run_design(load_design(design), None).family)
        print(f"crane family designed in {t:.1f} s")
    spec = spec_for_family(fam)
    s = spec.rate_certificate or CertificateSettings()
    loop_at, interpolated = family_loop(fam, spec)
    grid = np.asarray(fam.points, float)[fam.ok]
    dense = dense_points(fam, s)
    pts = np.vstack([grid, dense])
    loop, t_loop = _timed(lambda: loop_at(pts))
    basis = parse_basis(s.basis, fam.variable_names)
    cert = Certifier(loop, pts, len(grid), fam.variables, basis, s)
    n, K = cert.A.shape[1], len(basis)
    print(f"crane: {len(grid)} design points, {len(pts)} check points, closed loop of order "
          f"{n}, {K} basis functions ({K * n * (n + 1) // 2} LMI variables); {load()}")
    idx = np.repeat(np.arange(len(grid)), 2)
    rates = np.tile([[0.4, 0.0], [-0.4, 0.0]], (len(grid), 1))
    A, B, C, D = cert.A, cert.B, cert.C, cert.D
    st, t_st = _timed(lambda: solve_lmi(A[idx], cert.F[idx], cert.dF[idx], rates))
    gn, t_gn = _timed(lambda: solve_lmi(A[idx], cert.F[idx], cert.dF[idx], rates, B[idx],
                                        C[idx], D[idx], gain=True,
                                        margin=cert.gain_margin))
    # the same gain LMI in the full form (order n + nw + nz, as solved before): side by side
    gf = float(np.max(cert.gamma_frozen))
    full, t_full = _timed(lambda: solve_lmi(A[idx], cert.F[idx], cert.dF[idx], rates, B[idx],
                                            C[idx], D[idx], gain=True, margin=1e-4 * gf,
                                            reduced=False))
    verts = np.array([[0.4, 0.0], [-0.4, 0.0]])
    _, t_chk = _timed(lambda: lmi_worst(A, B, C, D, cert.F, cert.dF, st.Pk, None, verts))
    _, t_chk_g = _timed(lambda: lmi_worst(A, B, C, D, cert.F, cert.dF, gn.Pk, gn.gamma, verts))
    cones = idx.size
    print(f"  loop at {len(pts)} points: {t_loop:.2f} s ({1e3 * t_loop / len(pts):.2f} ms per "
          f"point, {'the interpolated plant' if interpolated else 'true plant from the model'})")
    print(f"  stability LMI, {cones} cones of size {n}: {t_st:.2f} s ({st.status}, "
          f"{st.iterations} iterations), {1e3 * t_st / cones:.0f} ms per cone")
    print(f"  gain LMI (reduced form), {cones} cones of size {B.shape[1] + B.shape[2]}: "
          f"{t_gn:.2f} s ({gn.status}, {gn.iterations} iterations, gamma {gn.gamma:.4g}), "
          f"{1e3 * t_gn / cones:.0f} ms per cone; gain / stability time {t_gn / t_st:.2f}")
    print(f"  gain LMI in the full form, cones of size {B.shape[1] + B.shape[2] + C.shape[1]}: "
          f"{t_full:.2f} s ({full.status}, {full.iterations} iterations, gamma "
          f"{full.gamma:.4g}); reduced / full time {t_gn / t_full:.2f}, gamma "
          f"{gn.gamma / full.gamma:.5f}")
    print(f"  dense check at {len(pts)} points x 2 vertices: stability {t_chk:.3f} s, gain "
          f"{t_chk_g:.3f} s; check / solve time {t_chk / t_st:.4f} (stability), "
          f"{t_chk_g / t_gn:.4f} (gain); per check point {1e6 * t_chk / len(pts):.0f} us vs per "
          f"imposed cone {1e6 * t_st / cones:.0f} us")
    # the failure mode of gridded LMIs (seen while filing the issue): imposed on an 8 x 4 grid
    # at 1 m/s only, checked on a 40 x 12 grid
    lo = np.array([v.lower for v in fam.variables])
    hi = np.array([v.upper for v in fam.variables])

    def grid_of(a, b):
        g = np.meshgrid(np.linspace(lo[0], hi[0], a), np.linspace(lo[1], hi[1], b),
                        indexing="ij")
        return np.stack([x.reshape(-1) for x in g], axis=1)

    coarse, fine = grid_of(8, 4), grid_of(40, 12)
    two = np.vstack([coarse, fine])
    c2 = Certifier(loop_at(two), two, len(coarse), fam.variables, basis, s)
    k = np.repeat(np.arange(len(coarse)), 2)
    r1 = np.tile([[1.0, 0.0], [-1.0, 0.0]], (len(coarse), 1))
    sol, t_c = _timed(lambda: solve_lmi(c2.A[k], c2.F[k], c2.dF[k], r1))
    eig, scale, _, _ = lmi_worst(c2.A, c2.B, c2.C, c2.D, c2.F, c2.dF, sol.Pk, None,
                                 np.array([[1.0, 0.0], [-1.0, 0.0]]))
    rel = (eig / scale[:, None]).max(axis=1)
    print(f"  gridded LMI at 8 x 4 points, 1 m/s: {sol.status}, margin {sol.level:.3g} at the "
          f"imposed points ({t_c:.1f} s); on the 40 x 12 grid: worst relative eigenvalue "
          f"{rel[len(coarse):].max():+.3g}, {(rel[len(coarse):] > 0).sum()} of {len(fine)} "
          "points violate (the cutting planes repair this)")
    # one cutting-plane attempt (stability at the target rate, from the design points), with
    # the cuts of a round spread over the grid cells (now) and 2 % of the range apart (before)
    attempts = {}
    for rule in ("before", "now"):
        c3 = Certifier(loop, pts, len(grid), fam.variables, basis, s)
        if rule == "before":
            c3.cell_coords = c3.points / np.where(c3.span > 0, c3.span, 1.0)
            c3.cut_spacing = 0.02
        a, t_a = _timed(lambda c3=c3: c3.attempt(np.array([0.4, 0.0])))
        attempts[rule] = (a, t_a, c3.solves)
        print(f"  cutting planes at 0.4 m/s, cuts spread {rule}: certified {a.certified} in "
              f"{a.rounds} rounds ({c3.solves} solves), imposed at {a.imposed_points} points, "
              f"{t_a:.1f} s; {load()}", flush=True)
    print(f"  cutting planes now / before: time {attempts['now'][1] / attempts['before'][1]:.2f}, "
          f"imposed points {attempts['now'][0].imposed_points}/"
          f"{attempts['before'][0].imposed_points} (the points every later solve carries)")
    if full:
        rc, t_full = _timed(lambda: certify_family(fam, spec, s, progress=None))
        print(f"  full certificate: {t_full:.0f} s, {rc.solves} LMI solves; {load()} (before "
              "this change: 1,990 s and 31 solves, measured 2026-12-01 - too long to repeat "
              "side by side)")
        for line in rc.text_lines():
            print("   ", line)


def envelope(points_per_axis: int) -> None:
    from bench_family import design_text

    from schedule.analysis.basis import parse_basis
    from schedule.analysis.family_rates import family_loop
    from schedule.analysis.lmi import lmi_worst, solve_lmi
    from schedule.analysis.lpv_certificate import CertificateSettings, Certifier
    from schedule.design_file import parse_design
    from schedule.family import run_design

    text = design_text("synthetic_plant_2", points_per_axis).replace(
        str(HERE.parent / "bench_family.py"), str(HERE))
    text += '[interpolation]\nform = "matrices"\nkind = "multilinear"\n'  # no LOO choice
    with tempfile.TemporaryDirectory() as tmp:
        spec = parse_design(text, tmp)
        fam, t_design = _timed(lambda: run_design(spec, None).family)
    print(f"  envelope designed in {t_design:.1f} s", flush=True)
    grid = np.asarray(fam.points, float)[fam.ok]
    loop_at, _ = family_loop(fam, spec)
    loop, t_loop = _timed(lambda: loop_at(grid))
    s = CertificateSettings(gain=False, witness=False)
    basis = parse_basis(None, fam.variable_names)
    cert, t_prep = _timed(lambda: Certifier(loop, grid, len(grid), fam.variables, basis, s))
    n, K = cert.A.shape[1], len(basis)
    print(f"envelope: {len(grid)} points, 4 variables, closed loop of order {n}, affine basis "
          f"({K * n * (n + 1) // 2} LMI variables); {load()}", flush=True)
    idx = np.repeat(np.arange(len(grid)), 2)
    rates = np.tile([[0.1, 0, 0, 0], [-0.1, 0, 0, 0]], (len(grid), 1))
    st, t_st = _timed(lambda: solve_lmi(cert.A[idx], cert.F[idx], cert.dF[idx], rates))
    verts = cert.vertices([0.1, 0.1, 0.1, 0.1])
    _, t_chk = _timed(lambda: lmi_worst(cert.A, cert.B, cert.C, cert.D, cert.F, cert.dF,
                                        st.Pk, None, verts))
    print(f"  loop at {len(grid)} points: {t_loop:.2f} s; coordinates and frozen norms "
          f"{t_prep:.2f} s", flush=True)
    print(f"  stability LMI, {idx.size} cones of size {n}: {t_st:.1f} s ({st.status}, "
          f"{st.iterations} iterations), {1e3 * t_st / idx.size:.1f} ms per cone")
    print(f"  dense check at {len(grid)} points x {len(verts)} vertices: {t_chk:.2f} s; "
          f"check / solve time {t_chk / t_st:.4f}; {load()}")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--family", default=None, help="a crane family file (else designed)")
    parser.add_argument("--full", action="store_true", help="also the whole crane certificate")
    parser.add_argument("--per-axis", type=int, default=7, help="envelope points per axis")
    parser.add_argument("--envelope-only", action="store_true", help="skip the crane")
    args = parser.parse_args()
    print(f"{os.cpu_count()} cores; {load()}", flush=True)
    if not args.envelope_only:
        crane(args.family, args.full)
    envelope(args.per_axis)


if __name__ == "__main__":
    main()
