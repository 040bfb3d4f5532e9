"""Benchmark: the shipped-table check on the bundled crane, side by side with the family check.

Run: python tests/benchmarks/bench_table_check.py

Designs the crane family (7 x 5 grid, the bundled design), then times, alternating three
times in this one run with one BLAS thread: the family check (`check_family`, no
gamma_opt, no rate bound), the table check of the demo table (`check_table`, T = 0.02 s,
Tustin, with the continuous lookup compared) and the export-time check of a corners-only
table that must gain breakpoints (`build_checked_table`). It prints the medians, the
ratios to the family check and what the table check found (worst norm / gamma and input
disk margins of the interpolant and of the table, breakpoints added). The machine is
shared: the ratios measured side by side are what to compare.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one BLAS thread: the comparison is per core

import statistics  # noqa: E402 (one BLAS thread first)
import time  # noqa: E402 (one BLAS thread first)
from importlib import resources  # noqa: E402 (one BLAS thread first)
from pathlib import Path  # noqa: E402 (one BLAS thread first)


def main() -> None:
    from schedule.analysis.table_check import check_table
    from schedule.check import CheckSettings, check_family
    from schedule.design_file import load_design
    from schedule.export import build_table
    from schedule.export.checked import build_checked_table
    from schedule.family import design_family

    design = Path(str(resources.files("schedule.demo_crane").joinpath("crane_design.toml")))
    spec = load_design(design)
    family = design_family(spec)
    settings = CheckSettings.from_spec(spec, gamma_opt=False, rate=False)
    table = build_table(family, sample_time=0.02, method="tustin", limits=spec.limits)
    corners = {"rope_length": [3.0, 30.0], "payload_mass": [2000.0, 40000.0]}
    runs = {"family check": lambda: check_family(family, settings, spec=spec),
            "table check": lambda: check_table(family, table, settings, spec),
            "export, corners table": lambda: build_checked_table(
                family, corners, 0.02, "tustin", settings=settings, spec=spec)}
    times: dict[str, list[float]] = {k: [] for k in runs}
    last = {}
    for _ in range(3):
        for name, run in runs.items():
            t0 = time.perf_counter()
            last[name] = run()
            times[name].append(time.perf_counter() - t0)
    base = statistics.median(times["family check"])
    for name, ts in times.items():
        med = statistics.median(ts)
        print(f"{name:<24} {med:7.2f} s  ({med / base:.2f}x the family check)")
    fam = last["family check"].summary()
    tc = last["table check"]
    cost = tc.cost()
    print(f"family check: {fam['points']} points, worst norm/gamma {fam['max_ratio']:.4g}")
    print(f"table check: {len(tc.passed)} points, {int((~tc.passed).sum())} fail")
    for label in ("interpolant", "interpolant_discrete", "table_continuous", "table"):
        c = cost[label]
        print(f"  {c['loop']:<32} worst norm/gamma {c['max_ratio']:.4g}, input disk margins "
              f"{c['min_input_gain_db']:.3g} dB / {c['min_input_phase_deg']:.3g} deg")
    out = last["export, corners table"]
    shape = " x ".join(str(n) for n in out.rounds[-1]["shape"].values())
    print(f"corners table: {len(out.rounds)} checks, "
          f"{sum(len(v) for v in out.added.values())} breakpoints added, {shape} nodes, "
          f"passes: {out.passed}")


if __name__ == "__main__":
    main()
