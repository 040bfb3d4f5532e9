"""Benchmark: cost of one crane linearization (the check stage calls it at many points).

Run ``python tests/benchmarks/bench_crane.py``. Prints the time per call of
``linear_plant_at`` (target: well under 5 ms) and, measured side by side in
the same run, the ratios of the variants: central differences with the
step-size check versus the complex step, and a trim started from zeros
versus one started from the closed-form equilibrium.
"""

from __future__ import annotations

import time

import numpy as np
from schedule.demo_crane.crane import crane_model, linear_plant_at, trim_at_rest

from schedule.linearize import linearize, trim


def _per_call(fun, points, repeat=5) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        for p in points:
            fun(p)
        best = min(best, (time.perf_counter() - t0) / len(points))
    return best


def main() -> None:
    rng = np.random.default_rng(0)
    points = [{"rope_length": L, "payload_mass": m}
              for L, m in zip(rng.uniform(3, 30, 100), rng.uniform(2000, 40000, 100))]
    model = crane_model()
    free = dict(free_states=("sway_angle", "motor_force"), free_inputs=("force_command",))

    def complex_step(p):
        x, u = trim_at_rest(p)
        return linearize(model, *trim(model, p, x0=x, u0=u, tol=1e-10, **free), p,
                         method="complex")

    def central(p):
        x, u = trim_at_rest(p)
        return linearize(model, *trim(model, p, x0=x, u0=u, tol=1e-10, **free), p,
                         method="central")

    def cold_trim(p):
        return trim(model, p, x0=np.zeros(5), u0=[0.0, 8.0, 0.0], tol=1e-10, **free)

    def warm_trim(p):
        x, u = trim_at_rest(p)
        return trim(model, p, x0=x, u0=u, tol=1e-10, **free)

    t_call = _per_call(linear_plant_at, points)
    t_cx, t_ce = _per_call(complex_step, points), _per_call(central, points)
    t_cold, t_warm = _per_call(cold_trim, points), _per_call(warm_trim, points)
    print(f"linear_plant_at: {t_call * 1e3:.3f} ms per call (100 random points, best of 5)")
    print(f"central (with step check) / complex step: {t_ce / t_cx:.2f}  "
          f"({t_ce * 1e3:.3f} ms vs {t_cx * 1e3:.3f} ms)")
    print(f"trim from zeros / trim from closed form: {t_cold / t_warm:.2f}  "
          f"({t_cold * 1e3:.3f} ms vs {t_warm * 1e3:.3f} ms)")


if __name__ == "__main__":
    main()
