"""Benchmark: the cost of drawing progress, check with and without a bar, side by side.

Run: python tests/benchmarks/bench_progress.py [SAMPLES] [REPEATS]   (default 1000, 3)

On the bundled crane (designed once here, serial), times alternately, on the same
points in one run: (a) the frozen-point kernel :func:`schedule.check.check_points`
(one chunk without progress; chunks timed by :func:`schedule.progress.timed_slices`
with it) and (b) the whole :func:`schedule.check.check_family` with SAMPLES in-between
samples, once with ``progress=None`` and once with a :class:`ProgressBar` drawing
(with its redraw thread) into a string buffer. It prints the median times and their
ratio; the target is an overhead below about 2 %. Timings are noisy on a shared
machine: the ratio of medians measured side by side is what to read.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one BLAS thread: the comparison is per core

import io  # noqa: E402 (one BLAS thread first)
import statistics  # noqa: E402 (one BLAS thread first)
import sys  # noqa: E402 (one BLAS thread first)
import time  # noqa: E402 (one BLAS thread first)


def main(samples: int = 1000, repeats: int = 3) -> None:
    from schedule import envelope as env
    from schedule.check import CheckSettings, check_family, check_points
    from schedule.demo import bundled_design_path
    from schedule.design_file import load_design
    from schedule.family import design_family
    from schedule.interpolate import ScheduledController
    from schedule.progress import ProgressBar

    spec = load_design(bundled_design_path())
    family = design_family(spec)
    sc = ScheduledController.from_family(family)
    pts = env.sobol(family.variables, samples, seed=1)
    P, K = sc.plant_at(pts), sc.evaluate(pts)
    settings = CheckSettings.from_spec(spec, samples=samples)

    def bar():
        return ProgressBar(enabled=True, stream=io.StringIO())

    runs = {
        "kernel": (lambda: check_points(P, K, family.gamma, settings),
                   lambda b: check_points(P, K, family.gamma, settings, progress=b)),
        "check_family": (lambda: check_family(family, settings, spec=spec),
                         lambda b: check_family(family, settings, spec=spec, progress=b)),
    }
    for name, (plain, drawn) in runs.items():
        t_plain, t_drawn = [], []
        for _ in range(repeats):
            t = time.perf_counter()
            plain()
            t_plain.append(time.perf_counter() - t)
            b = bar()
            t = time.perf_counter()
            drawn(b)
            b.close()
            t_drawn.append(time.perf_counter() - t)
        a, d = statistics.median(t_plain), statistics.median(t_drawn)
        print(f"{name:<13} {samples} samples: without progress {a:.3f} s, with {d:.3f} s "
              f"(medians of {repeats}); ratio {d / a:.3f}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
