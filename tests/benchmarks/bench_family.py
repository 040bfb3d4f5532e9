"""Benchmark of the family synthesis: points per second, 1 vs 2 workers, dask vs local.

Run: python tests/benchmarks/bench_family.py [--points 2000] [--points-20 N] [--repeats 3]
     python tests/benchmarks/bench_family.py --compare [--points 600]

``--compare`` times one worker only, side by side with the package at the revision before
the certified controllers (tests/benchmarks/_earlier.py), alternating old and new runs
with one BLAS thread, and prints the ratio of the medians.
Prints the measured rates and ratios side by side from one run: the crane
envelope, then synthetic 4-variable envelopes of order-8 and order-20
generalized plants with 1 and 2 local workers and 2 dask workers (the machine
has 2 cores and is shared, so each figure is a median of repeats and the load
average is printed with it).
"""

from __future__ import annotations

import argparse
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one BLAS thread: the comparison is per core

import sys  # noqa: E402 (one BLAS thread first)
import time  # noqa: E402 (one BLAS thread first)
from pathlib import Path  # noqa: E402 (one BLAS thread first)

import numpy as np  # noqa: E402 (one BLAS thread first)

from schedule.design_file import load_design  # noqa: E402 (one BLAS thread first)
from schedule.family import run_design  # noqa: E402 (one BLAS thread first)
from schedule.types import LinearPlant  # noqa: E402 (one BLAS thread first)

ORDER = 7  # plant order; the first-order performance weight adds one state


def _model(order: int, seed: int = 3):
    rng = np.random.default_rng(seed)
    A0 = rng.normal(size=(order, order)) / np.sqrt(order)
    A0 -= (np.max(np.linalg.eigvals(A0).real) + 1.0) * np.eye(order)
    Ai = [0.1 * rng.normal(size=(order, order)) / np.sqrt(order) for _ in range(4)]
    return A0, Ai, rng.normal(size=(order, 2)), rng.normal(size=(2, order))


_CACHE: dict = {}


def synthetic_plant(point):
    """A stable invented plant whose A moves affinely with four scheduling variables."""
    order = int(point.get("order", ORDER)) if "order" in point else _CACHE.get("order", ORDER)
    if order not in _CACHE:
        _CACHE[order] = _model(order)
    A0, Ai, B, C = _CACHE[order]
    A = A0 + sum(point[f"p{i + 1}"] * a for i, a in enumerate(Ai))
    plant_type = LinearPlant
    if os.environ.get("BENCH_EARLIER"):  # the earlier revision checks its own type
        from schedule_old.types import LinearPlant as plant_type
    return plant_type(A, B, C, np.zeros((2, 2)), tuple(f"x{i}" for i in range(order)),
                      ("u", "d"), ("y1", "y2"))


def synthetic_plant_7(point):
    _CACHE["order"] = 7
    return synthetic_plant(point)


def synthetic_plant_19(point):
    _CACHE["order"] = 19
    return synthetic_plant(point)


def design_text(function: str, per_axis: int) -> str:
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/_helpers.py
    from _helpers import performance_numbers, toml_channels, toml_variables, toml_weights

    axis = [float(x) for x in np.linspace(0.0, 1.0, per_axis)]
    grid = "".join(f"p{i} = {axis}\n" for i in range(1, 5))
    return (toml_variables(*[(f"p{i}", "-", 0.0, 1.0) for i in range(1, 5)])
            + f"""
[source]
model_file = "{Path(__file__).resolve()}"
function = "{function}"
[grid]
{grid}
"""
            + toml_channels(["u"], ["y1", "y2"], ["d"], ["y1"])
            + toml_weights(performance=[("y1", performance_numbers(2.0, 0.435, 0.1))],
                           effort=[("u", 0.1)],
                           noise=[("y1", 0.01), ("y2", 0.01)], disturbance=[("d", 1.0)]))


def timed(spec, repeats: int, **kw) -> tuple[float, float, int]:
    """(median seconds, first-run seconds, points) of run_design (no file, no fit)."""
    times, n = [], 0
    for _ in range(repeats):
        t0 = time.perf_counter()
        run = run_design(spec, None, fit=False, **kw)
        times.append(time.perf_counter() - t0)
        n = len(run.family.points)
    return float(np.median(times)), times[0], n


def load() -> str:
    return "load average {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def compare(points: int, repeats: int) -> None:
    """run_design (one worker, no fit) now against the earlier revision, alternating."""
    import tempfile

    import _earlier

    _earlier.load()
    import schedule_old.design_file as old_df
    import schedule_old.family as old_family

    from schedule.design_file import parse_design

    def run(mod, spec):
        t0 = time.perf_counter()
        out = mod.run_design(spec, None, fit=False)
        return time.perf_counter() - t0, len(out.family.points), int(np.sum(out.family.ok))

    crane = Path(__file__).resolve().parents[2] / "operating_points" / "crane_design.toml"
    cases = [("crane", lambda: old_df.load_design(crane), lambda: load_design(crane))]
    with tempfile.TemporaryDirectory() as tmp:
        for function, order in (("synthetic_plant_7", 8), ("synthetic_plant_19", 20)):
            per_axis = max(2, int(round(points ** 0.25)))
            text = design_text(function, per_axis)
            cases.append((f"order {order}", lambda t=text: old_df.parse_design(t, tmp),
                          lambda t=text: parse_design(t, tmp)))
        for label, old_spec, new_spec in cases:
            so, sn = old_spec(), new_spec()
            before, now = [], []
            for _ in range(repeats):
                os.environ["BENCH_EARLIER"] = "1"
                tb, n, okb = run(old_family, so)
                del os.environ["BENCH_EARLIER"]
                tn, _n, okn = run(sys.modules["schedule.family"], sn)
                before.append(tb)
                now.append(tn)
            b, w = float(np.median(before)), float(np.median(now))
            print(f"{label}: {n} points; before {n / b:.1f} points/s ({okb} ok), now "
                  f"{n / w:.1f} points/s ({okn} ok); now / before time = {w / b:.2f}; {load()}",
                  flush=True)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--points", type=int, default=2000, help="about this many points")
    parser.add_argument("--points-20", type=int, default=None,
                        help="points for the order-20 envelope (default: --points)")
    parser.add_argument("--repeats", type=int, default=3, help="median of this many runs")
    parser.add_argument("--no-dask", action="store_true")
    parser.add_argument("--compare", action="store_true",
                        help="one worker, now against the earlier revision")
    args = parser.parse_args()
    if args.compare:
        import schedule.family  # noqa: F401 (the current package, for sys.modules)

        compare(args.points, args.repeats)
        return
    import tempfile

    from schedule.design_file import parse_design

    print(f"{os.cpu_count()} cores; {load()}; median of {args.repeats} runs; "
          "2-worker and dask figures with warm workers (first run in brackets)")
    crane = Path(__file__).resolve().parents[2] / "operating_points" / "crane_design.toml"
    if crane.exists():
        try:
            t, _t0, n = timed(load_design(crane), args.repeats)
            print(f"crane envelope: {n} points in {t:.2f} s = {n / t:.1f} points/s (1 worker)")
        except Exception as exc:  # report and go on
            print(f"crane envelope: failed ({exc})")
    with tempfile.TemporaryDirectory() as tmp:
        for function, order, points in (("synthetic_plant_7", 8, args.points),
                                        ("synthetic_plant_19", 20, args.points_20 or args.points)):
            per_axis = max(2, int(round(points ** 0.25)))
            spec = parse_design(design_text(function, per_axis), tmp)
            t1, _f1, n = timed(spec, args.repeats, jobs=1)
            t2, f2, _ = timed(spec, args.repeats, jobs=2)
            line = (f"order {order}: {n} points; 1 worker {n / t1:.1f} points/s, 2 workers "
                    f"{n / t2:.1f} points/s ({n / f2:.1f} first), speed-up {t1 / t2:.2f}x "
                    "(target >= 1.7x)")
            if not args.no_dask:
                import distributed

                with distributed.LocalCluster(n_workers=2, threads_per_worker=1,
                                              dashboard_address=None) as cluster, \
                        distributed.Client(cluster) as client:
                    td, fd, _ = timed(spec, args.repeats, cluster=client)
                line += (f"; dask 2 workers {n / td:.1f} points/s ({n / fd:.1f} first), "
                         f"dask/local time {td / t2:.2f} (target <= 1.3)")
            print(line + f"; {load()}", flush=True)


if __name__ == "__main__":
    main()
