"""Benchmark: Python runtime step vs the generated C step, side by side in one run.

Run: python tests/benchmarks/bench_export.py   (prints times per step and their ratio)
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
from test_export_fixtures import make_family  # noqa: E402

from schedule.export import TableController, build_table, write_table  # noqa: E402


def main() -> None:
    fam = make_family(breakpoints=(np.linspace(3, 30, 7), np.linspace(2000, 40000, 5)),
                      n=6, ny=2, nu=1)
    t0 = time.perf_counter()
    tab = build_table(fam, sample_time=0.02, method="tustin")
    t_build = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        write_table(tab, "c", Path(tmp) / "c", prefix="b")
        lib = Path(tmp) / "libb.so"
        subprocess.run(["cc", "-std=c99", "-O2", "-shared", "-fPIC", "-o", str(lib),
                        str(Path(tmp) / "c" / "b_table.c")], check=True)
        so = ctypes.CDLL(str(lib))
        state = (ctypes.c_double * tab.n_states)()
        dp = ctypes.POINTER(ctypes.c_double)
        so.b_init(state, None)
        rng = np.random.default_rng(0)
        K = 3000
        Y = rng.standard_normal((K, 2))
        P = np.stack([rng.uniform(3, 30, K), rng.uniform(2000, 40000, K)], axis=1)
        u = np.zeros(1)
        t0 = time.perf_counter()
        for k in range(K):
            so.b_step(state, Y[k].ctypes.data_as(dp), P[k].ctypes.data_as(dp),
                      u.ctypes.data_as(dp))
        t_c = (time.perf_counter() - t0) / K
        ctl = TableController(tab)
        t0 = time.perf_counter()
        for k in range(K):
            ctl.step(Y[k], P[k])
        t_py = (time.perf_counter() - t0) / K
    print(f"table build (35 nodes, 6 states, Tustin): {t_build * 1e3:.2f} ms")
    print(f"C step via ctypes: {t_c * 1e6:.2f} us, Python runtime step: {t_py * 1e6:.2f} us, "
          f"ratio Python/C = {t_py / t_c:.1f}")


if __name__ == "__main__":
    main()
