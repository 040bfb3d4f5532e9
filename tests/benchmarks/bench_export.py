"""Benchmark: Python runtime step vs the generated C step, side by side in one run, and
the FMU build time (system C compiler).

Run: python tests/benchmarks/bench_export.py   (prints times per step and their ratio)

The table is the bundled crane's (designed here, 35 nodes, 6 states, Tustin at 20 ms)
with its 90 kN limit; the random inputs make the limit act on about half of the
samples, so both steps run the limiter and the anti-windup path.
"""

from __future__ import annotations

import ctypes
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_export_formats import c_state_type  # noqa: E402

from schedule.demo import bundled_design_path  # noqa: E402
from schedule.design_file import load_design  # noqa: E402
from schedule.export import TableController, build_table, write_fmu, write_table  # noqa: E402


def main() -> None:
    from schedule.family import design_family

    spec = load_design(bundled_design_path())
    fam = design_family(spec)
    t0 = time.perf_counter()
    tab = build_table(fam, sample_time=0.02, method="tustin", limits=spec.limits)
    t_build = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        write_table(tab, "c", Path(tmp) / "c", prefix="b")
        lib = Path(tmp) / "libb.so"
        subprocess.run(["cc", "-std=c99", "-O2", "-shared", "-fPIC", "-o", str(lib),
                        str(Path(tmp) / "c" / "b_table.c")], check=True)
        so = ctypes.CDLL(str(lib))
        state = c_state_type(tab)()
        dp = ctypes.POINTER(ctypes.c_double)
        so.b_init(ctypes.byref(state), None)
        rng = np.random.default_rng(0)
        K = 3000
        Y = rng.standard_normal((K, 2)) * [5.0, 0.2]
        P = np.stack([rng.uniform(3, 30, K), rng.uniform(2000, 40000, K)], axis=1)
        u = np.zeros(1)
        t0 = time.perf_counter()
        for k in range(K):
            so.b_step(ctypes.byref(state), Y[k].ctypes.data_as(dp), P[k].ctypes.data_as(dp),
                      u.ctypes.data_as(dp))
        t_c = (time.perf_counter() - t0) / K
        ctl = TableController(tab)
        t0 = time.perf_counter()
        for k in range(K):
            ctl.step(Y[k], P[k])
        t_py = (time.perf_counter() - t0) / K
        t0 = time.perf_counter()
        outcome = write_fmu(Path(tmp) / "bench_unit.fmu", tab)
        t_fmu = time.perf_counter() - t0
    print(f"FMU written in {t_fmu:.2f} s, of which the binary build took "
          f"{outcome.build_seconds:.2f} s ({outcome.platform or outcome.note})")
    print(f"table build (35 nodes, 6 states, Tustin): {t_build * 1e3:.2f} ms")
    print(f"C step via ctypes: {t_c * 1e6:.2f} us, Python runtime step: {t_py * 1e6:.2f} us, "
          f"ratio Python/C = {t_py / t_c:.1f}")


if __name__ == "__main__":
    main()
