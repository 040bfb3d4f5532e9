"""Benchmark of large envelopes: 900-point and 10,000-point designs, checks and export.

Run: python tests/benchmarks/bench_scale.py [--points 10000] [--repeats 3] [--no-dask]
     [--skip-crane] [--skip-large]

Prints, each measured side by side in one run (the machine is shared: ratios are the
figures to trust, medians of ``--repeats``; the load average is printed with them):

1. the 30 x 30 crane grid (900 points, state order 6): whole design (synthesis, the
   interpolant choice and fit) against synthesis alone (``--no-fit``); target <= 3x.
2. a 4-variable envelope of ``--points`` points (10 per axis for 10,000) of order-8
   generalized plants (tests/benchmarks/bench_family.py's invented plant): the
   estimate, synthesis alone, the whole design with time and peak memory per stage
   (targets: <= 3x synthesis, < 2 GB), checks of as many in-between points (Sobol,
   true plant from the model) and the export of the table (CSV, JSON, HDF5, C99).
3. a dask LocalCluster of 2 worker processes against serial, on the checks and on the
   design, on a ``--parallel-points`` envelope (target >= 1.6x; the local workers of
   --jobs 2 for comparison).

Peak memory per stage: the resident high-water mark (VmHWM), reset before each stage
through /proc/self/clear_refs (Linux). On a loaded machine wall-clock speed-ups mean
little, so part 3 also prints CPU figures from /proc: the total CPU of the parallel run
(parent and workers) relative to the serial run's, and the speed-up two idle cores
would give (the serial CPU over the largest of the parent's, the busiest worker's and
half the total: the parent, which holds the dask scheduler, shares the two cores).
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_family import design_text  # noqa: E402


def load() -> str:
    return "load {:.1f} {:.1f} {:.1f}".format(*os.getloadavg())


class Peak:
    """Resident high-water mark of this process, reset at will (Linux)."""

    def reset(self) -> None:
        try:
            with open("/proc/self/clear_refs", "w") as fh:
                fh.write("5")
        except OSError:
            pass

    def mb(self) -> float:
        try:
            with open("/proc/self/status") as fh:
                for line in fh:
                    if line.startswith("VmHWM:"):
                        return int(line.split()[1]) / 1024
        except OSError:
            pass
        import resource

        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


class StagePeaks:
    """A progress callback recording the peak memory of each design stage."""

    def __init__(self, peak: Peak):
        self.peak, self.stage, self.mb = peak, None, {}

    def __call__(self, stage: str, done: int, total: int) -> None:
        if stage != self.stage:
            self.close()
            self.stage = stage
            self.peak.reset()

    def close(self, then: str | None = None) -> None:
        if self.stage is not None:
            self.mb[self.stage] = max(self.mb.get(self.stage, 0.0), self.peak.mb())
        self.stage = then
        self.peak.reset()


def crane_grid_spec(tmp: Path, n: int = 30):
    """The bundled crane design on an n x n grid of its model (the issue's 900 points)."""
    from schedule.design_file import load_design

    text = (HERE.parents[1] / "operating_points" / "crane_design.toml").read_text()
    text = text.replace('operating_points = "crane_envelope.h5"\n', "")
    rope = [float(v) for v in np.linspace(3.0, 30.0, n)]
    mass = [float(v) for v in np.linspace(2000.0, 40000.0, n)]
    text = text.replace("[channels]", f"[grid]\nrope_length = {rope}\npayload_mass = {mass}"
                                      "\n\n[channels]")
    path = tmp / "crane_grid.toml"
    path.write_text(text)
    return load_design(path)


def ratio_runs(spec, repeats: int, **kw) -> tuple[list[float], list[float], object]:
    """Synthesis alone and the whole design, alternating, ``repeats`` times each."""
    from schedule.family import run_design

    syn, whole, last = [], [], None
    for _ in range(repeats):
        t = time.perf_counter()
        run_design(spec, None, fit=False, **kw)
        syn.append(time.perf_counter() - t)
        t = time.perf_counter()
        last = run_design(spec, None, fit=True, **kw)
        whole.append(time.perf_counter() - t)
    return syn, whole, last


def crane(args, tmp: Path) -> None:
    spec = crane_grid_spec(tmp)
    syn, whole, run = ratio_runs(spec, args.repeats)
    ratios = [w / s for w, s in zip(whole, syn, strict=True)]
    print(f"crane 30 x 30 (900 points): synthesis {np.median(syn):.1f} s, whole design "
          f"{np.median(whole):.1f} s, ratio median {np.median(ratios):.2f} (runs "
          f"{', '.join(f'{r:.2f}' for r in ratios)}; target <= 3); chosen "
          f"{run.family.extra.get('loo_chosen')}; {load()}", flush=True)


def large(args, tmp: Path) -> None:
    from schedule.check import CheckSettings, check_family
    from schedule.design_file import parse_design
    from schedule.export import build_table, write_table
    from schedule.family import estimate_design, run_design

    per_axis = max(2, int(round(args.points ** 0.25)))
    spec = parse_design(design_text("synthetic_plant_7", per_axis), str(tmp))
    peak = Peak()
    t = time.perf_counter()
    est = estimate_design(spec)
    print(f"envelope: {per_axis}^4 = {est.points} points, order 8; estimate {est.text()} "
          f"in {time.perf_counter() - t:.1f} s", flush=True)

    # synthesis alone against the whole design, side by side
    syn, whole = [], []
    stages, family_path = None, tmp / "large.h5"
    for r in range(args.repeats_large):
        t = time.perf_counter()
        run_design(spec, None, fit=False)
        syn.append(time.perf_counter() - t)
        stages = StagePeaks(peak)
        peak.reset()
        t = time.perf_counter()
        run = run_design(spec, family_path, progress=stages)
        whole.append(time.perf_counter() - t)
        stages.close()
        if r == 0:
            est_ratio = est.seconds / whole[0]
    ratios = [w / s for w, s in zip(whole, syn, strict=True)]
    print(f"synthesis alone {np.median(syn):.1f} s; whole design {np.median(whole):.1f} s; "
          f"ratio median {np.median(ratios):.2f} (runs {', '.join(f'{x:.2f}' for x in ratios)};"
          f" target <= 3); estimate / measured {est_ratio:.2f}; {load()}", flush=True)
    fam = run.family
    print("stage             seconds   peak MB")
    for stage, label in (("plants", "plants"), ("gamma", "gamma"), ("controllers",
                                                                   "controllers"),
                         ("interpolant", "fit"), ("write", "write")):
        sec = run.stage_seconds.get(label, float("nan"))
        print(f"  {label:<14} {sec:9.1f} {stages.mb.get(stage, float('nan')):9.0f}")
    print(f"  chosen {fam.extra.get('loo_chosen')}; notes: {'; '.join(run.notes)}", flush=True)

    # checks of as many in-between points (true plant from the model)
    n = est.points
    s = CheckSettings(samples=n, sampler="sobol", centres=False, midpoints=False, grid=False,
                      loo=False, gamma_opt=False, rate=False, chunk=500)
    peak.reset()
    t = time.perf_counter()
    result = check_family(fam, s)
    t_check = time.perf_counter() - t
    print(f"checks of {len(result.points)} in-between points: {t_check:.1f} s, peak "
          f"{peak.mb():.0f} MB, {int(result.passed.sum())} passed", flush=True)

    # export
    peak.reset()
    t = time.perf_counter()
    table = build_table(fam, sample_time=0.001)  # fastest closed-loop mode ~340 rad/s
    for fmt, name in (("csv", "table.csv"), ("json", "table.json"), ("hdf5", "table.h5"),
                      ("c", "c")):
        write_table(table, fmt, tmp / name, prefix="sched")
    print(f"export of {table.A.shape[0]} nodes (CSV, JSON, HDF5, C99): "
          f"{time.perf_counter() - t:.1f} s, peak {peak.mb():.0f} MB", flush=True)


def parallel(args, tmp: Path) -> None:
    """Serial, 2 local workers and a 2-worker dask LocalCluster, side by side."""
    import distributed

    from schedule.check import CheckSettings, check_points
    from schedule.design_file import parse_design
    from schedule.envelope import sobol
    from schedule.family import run_design

    per_axis = max(2, int(round(args.parallel_points ** 0.25)))
    spec = parse_design(design_text("synthetic_plant_7", per_axis), str(tmp))
    fam = run_design(spec, None).family
    from schedule.interpolate import ScheduledController

    sc = ScheduledController.from_family(fam)
    pts = sobol(fam.variables, args.parallel_points, seed=1)
    P, K = sc.plant_at(pts), sc.evaluate(pts)
    print(f"parallel: {len(fam.points)}-point envelope, {len(pts)} check points", flush=True)
    s2 = CheckSettings(samples=0, gamma_opt=False, rate=False)
    one = {k: "1" for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
    from schedule.parallel import _executor

    # silence_logs: a worker logs a warning for each task cancelled while it ran (the
    # leave-one-out norms stop reading once the ranking is decided)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, env=one,
                                  silence_logs=logging.ERROR) as lc, \
            distributed.Client(lc) as client:
        client.run(lambda: __import__("schedule.family"))
        dask_pids = list(client.run(os.getpid).values())
        _executor(2).submit(int).result()  # the local workers exist from here on
        loky_pids = [p.pid for p in _executor(2)._processes.values()]
        rows = {"checks": [], "synthesis": [], "design": []}
        for kw in ({}, {"jobs": 2}, {"cluster": client}):  # warm-up: imports in the workers
            check_points({k: v[:64] for k, v in P.items()}, {k: v[:64] for k, v in K.items()},
                         fam.gamma, s2, **kw)
            run_design(spec, None, fit=False, **kw)
        for _ in range(args.repeats):
            for what, fn in (
                    ("checks", lambda **kw: check_points(P, K, fam.gamma, s2, **kw)),
                    ("synthesis", lambda **kw: run_design(spec, None, fit=False, **kw)),
                    ("design", lambda **kw: run_design(spec, None, **kw))):
                times = []
                for kw, pids in (({}, []), ({"jobs": 2}, loky_pids),
                                 ({"cluster": client}, dask_pids)):
                    c0, w0 = _cpu_self(), [_cpu(p) for p in pids]
                    t = time.perf_counter()
                    fn(**kw)
                    times.append(time.perf_counter() - t)
                    busy = [_cpu(p) - c for p, c in zip(pids, w0, strict=True)]
                    times.append((_cpu_self() - c0, busy))
                rows[what].append(times)
        for what, runs in rows.items():
            wall = np.array([[r[0], r[2], r[4]] for r in runs])
            serial_cpu = np.median([r[1][0] for r in runs])
            line = (f"{what:<10} serial {np.median(wall[:, 0]):6.1f} s; 2 local workers "
                    f"{np.median(wall[:, 0] / wall[:, 1]):.2f}x; dask LocalCluster 2 workers "
                    f"{np.median(wall[:, 0] / wall[:, 2]):.2f}x (runs "
                    f"{', '.join(f'{x:.2f}' for x in wall[:, 0] / wall[:, 2])}; target >= 1.6)")
            for label, k in (("local", 3), ("dask", 5)):
                parent = np.median([r[k][0] for r in runs])
                workers = np.median([max(r[k][1]) for r in runs])
                total = np.median([r[k][0] + sum(r[k][1]) for r in runs])
                # CPU seconds, not wall: the speed-up two idle cores would give (the
                # parent shares the cores: no better than serial CPU over half the total)
                line += (f"; {label}: CPU {total / serial_cpu:.2f}x serial's (parent "
                         f"{parent:.1f} s, busiest worker {workers:.1f} s), idle-core speed-up "
                         f"{serial_cpu / max(parent, workers, total / 2):.2f}x")
            print(line, flush=True)
    print(load())


def _cpu(pid: int) -> float:
    """CPU seconds (user + system) used so far by process ``pid`` (Linux /proc)."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except OSError:
        return float("nan")


def _cpu_self() -> float:
    t = os.times()
    return t.user + t.system


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--points", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=3, help="for the ratios")
    parser.add_argument("--repeats-large", type=int, default=2,
                        help="for the large design's ratio")
    parser.add_argument("--no-dask", action="store_true")
    parser.add_argument("--parallel-points", type=int, default=2401,
                        help="envelope and check points of the serial/workers/dask part")
    parser.add_argument("--skip-crane", action="store_true")
    parser.add_argument("--skip-large", action="store_true")
    args = parser.parse_args()
    print(f"{os.cpu_count()} cores; {load()}; ratios measured side by side", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        if not args.skip_crane:
            crane(args, Path(tmp))
        if not args.skip_large:
            large(args, Path(tmp))
        if not args.no_dask:
            parallel(args, Path(tmp))


if __name__ == "__main__":
    main()
