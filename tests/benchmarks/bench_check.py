"""Benchmark: frozen-point checks per second (closed loop of order 16), serial, workers, dask.

Run: python tests/benchmarks/bench_check.py [N] [--compare]   (default N = 10000 points)

With ``--compare`` only the serial kernel is timed, side by side with the package at the
revision before the certified norm route (tests/benchmarks/_earlier.py), alternating old
and new three times on the same points with one BLAS thread; it prints the ratio.

Plant: three masses in a chain with scheduled spring stiffness and mass (6 states),
plus one performance-weight state and one effort-weight state: generalized plant of
order 8, controller of order 8, closed loop of order 16. The target is 10,000 points
checked in under 2 minutes on 2 cores. Timings are noisy on a shared machine; the
ratios printed are measured side by side in this one run.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one BLAS thread: the comparison is per core

import sys  # noqa: E402 (one BLAS thread first)
import tempfile  # noqa: E402 (one BLAS thread first)
import time  # noqa: E402 (one BLAS thread first)
from pathlib import Path  # noqa: E402 (one BLAS thread first)

import numpy as np  # noqa: E402 (one BLAS thread first)

MODEL = '''
import numpy as np
from schedule.types import LinearPlant

def plant_at(point):
    k, m = point["stiffness"], point["mass"]
    M = np.diag([1.0, m, 1.0])
    K = k * np.array([[1.0, -1.0, 0.0], [-1.0, 2.0, -1.0], [0.0, -1.0, 1.0]]) + 0.5 * np.eye(3)
    Cd = 0.05 * K + 0.1 * np.eye(3)
    Mi = np.linalg.inv(M)
    A = np.block([[np.zeros((3, 3)), np.eye(3)], [-Mi @ K, -Mi @ Cd]])
    B = np.zeros((6, 2))
    B[3:, 0] = Mi @ np.array([1.0, 0.0, 0.0])
    B[3:, 1] = Mi @ np.array([0.0, 0.0, 1.0])
    C = np.zeros((2, 6))
    C[0, 0] = 1.0
    C[1, 2] = 1.0
    return LinearPlant(A, B, C, np.zeros((2, 2)), tuple(f"x{i}" for i in range(6)),
                       ("force", "push"), ("pos1", "pos3"))
'''

TESTS = Path(__file__).resolve().parents[1]  # tests/_helpers.py builds the TOML tables


def design_text() -> str:
    """Three masses: stiffness and middle mass scheduled, one force, two positions measured."""
    sys.path.insert(0, str(TESTS))
    from _helpers import (
        SCHEDULED_MATRICES,
        performance_numbers,
        toml_channels,
        toml_variables,
        toml_weights,
    )

    return (toml_variables(("stiffness", "N/m", 1.0, 4.0), ("mass", "kg", 0.5, 2.0))
            + """[source]
model_file = "model.py"
function = "plant_at"
[grid]
stiffness = [1.0, 1.75, 2.5, 3.25, 4.0]
mass = [0.5, 1.25, 2.0]
"""
            + toml_channels(["force"], ["pos1", "pos3"], ["push"], ["pos3"])
            + toml_weights(performance=[("pos3", performance_numbers(2.0, 0.173, 0.02))],
                           effort=[("force", {"limit": 20.0, "bandwidth": 5.0,
                                             "high_frequency_limit": 0.5})],
                           noise=[("pos1", 0.01), ("pos3", 0.01)], disturbance=[("push", 1.0)])
            + SCHEDULED_MATRICES)


def main(n: int = 10000, compare: bool = False) -> None:
    from schedule.check import CheckSettings, check_arrays, check_family, check_points
    from schedule.design_file import load_design
    from schedule.family import design_family
    from schedule.interpolate import ScheduledController

    tmp = Path(tempfile.mkdtemp(prefix="bench_check_"))
    (tmp / "model.py").write_text(MODEL)
    (tmp / "design.toml").write_text(design_text())
    spec = load_design(tmp / "design.toml")
    fam = design_family(spec)
    sc = ScheduledController.from_family(fam)
    order = fam.plant["A"].shape[1] + fam.controller["A"].shape[1]
    print(f"family: {len(fam.points)} points, closed-loop order {order}, gamma {fam.gamma:.4g}")

    from schedule.envelope import sobol

    pts = sobol(fam.variables, n, seed=1)
    t0 = time.perf_counter()
    P = sc.plant_at(pts)
    K = sc.evaluate(pts)
    t_eval = time.perf_counter() - t0
    print(f"interpolant evaluation (plant + controller) at {n} points: {t_eval:.2f} s")

    if compare:
        import _earlier

        _earlier.load()
        import schedule_old.check as old_check

        from schedule.check import check_arrays as new_kernel

        times = {"before": [], "now": []}
        for _ in range(3):
            for label, kern in (("before", old_check.check_arrays), ("now", new_kernel)):
                t = time.perf_counter()
                v = kern(P, K, fam.gamma, 0.02, True)
                times[label].append(time.perf_counter() - t)
                ok = int(v["norm_ok"].sum())
            print(f"  before {times['before'][-1]:7.2f} s   now {times['now'][-1]:7.2f} s   "
                  f"(points passing the norm check now: {ok} of {n})")
        tb, tn = min(times["before"]), min(times["now"])
        print(f"serial check kernel, {n} points, best of 3: before {tb:.2f} s, now {tn:.2f} s, "
              f"now / before = {tn / tb:.2f}")
        return

    s = CheckSettings(samples=0, gamma_opt=False, rate=False, chunk=1000)
    s_noclass = CheckSettings(samples=0, gamma_opt=False, rate=False, classical=False,
                              chunk=1000)
    rows = []

    def run(label, fn):
        t = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t
        rows.append((label, dt))
        print(f"{label:<52} {dt:8.2f} s  {n / dt:9.0f} checks/s")
        return out

    small = {k: v[:200] for k, v in P.items()}
    smallK = {k: v[:200] for k, v in K.items()}
    t = time.perf_counter()
    check_arrays(small, smallK, fam.gamma)
    per = (time.perf_counter() - t) / 200
    print(f"(warm-up: {1 / per:.0f} checks/s on 200 points)")

    v1 = run("serial, all checks (norm, disk, classical)",
             lambda: check_points(P, K, fam.gamma, s, jobs=1))
    run("serial, without classical margins", lambda: check_points(P, K, fam.gamma, s_noclass))
    v2 = run("2 worker processes (joblib/loky)",
             lambda: check_points(P, K, fam.gamma, s, jobs=2))
    try:
        from distributed import Client, LocalCluster

        # one BLAS thread per worker process, as joblib/loky does by itself
        one = {k: "1" for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          dashboard_address=None, env=one) as lc, Client(lc) as client:
            client.run(lambda: __import__("schedule.check"))  # warm the workers' imports
            v3 = run("dask LocalCluster, 2 workers", lambda: check_points(
                P, K, fam.gamma, s, cluster=client))
        assert np.array_equal(v1["norm_ok"], v3["norm_ok"])
    except ImportError:
        print("dask.distributed not installed: dask path skipped")
    assert np.array_equal(v1["norm_ok"], v2["norm_ok"])
    print(f"failing points: {int((~v1['norm_ok']).sum())} of {n} (norm or stability)")

    m = min(n, 2000)
    s_model = CheckSettings(samples=m, gamma_opt=False, rate=False, centres=False,
                            midpoints=False, loo=False, grid=False)
    t = time.perf_counter()
    check_family(fam, s_model, spec=spec, jobs=1)
    dt = time.perf_counter() - t
    print(f"{'check_family, true plant from the model, ' + str(m) + ' pts':<52} {dt:8.2f} s  "
          f"{m / dt:9.0f} checks/s (includes model calls and weights)")
    serial = rows[0][1]
    for label, dt in rows[1:]:
        print(f"speed-up vs serial: {label:<40} {serial / dt:5.2f}x")
    best = min(dt for _, dt in rows) + t_eval
    print(f"10,000-point target (<120 s): best path {best * 10000 / n:.1f} s for 10,000 points")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    main(int(args[0]) if args else 10000, compare="--compare" in sys.argv)
