"""Benchmark: vectorized evaluation of scheduled controllers, and the leave-one-out choice.

Run: ``python tests/benchmarks/bench_interpolate.py``. Not collected by pytest.

A crane-sized family (d = 2 on a 7 x 5 grid, generalized plant of order 8,
controller with 2 measurements and 1 control, so 64 + 16 + 8 + 2 = 90 entries
per point) is designed with the real synthesis at a common gamma. Then:

1. every interpolant kind evaluates the matrices-form controller at 100,000
   points; entries per second are printed side by side (target for
   multilinear: >= 1e6 entries/s on one core);
2. the observer form (re-assembly per point) at 2,000 points;
3. the whole leave-one-out choice (6 kinds x 2 forms x 35 refits + closed-loop
   norms), which must stay well under a minute.
"""

from __future__ import annotations

import time

import numpy as np

from schedule.hinf import central_controller, optimal_gamma
from schedule.interpolants import KINDS
from schedule.interpolate import CONTROLLER_KEYS, ScheduledController, choose_interpolant
from schedule.plant import GeneralizedPlant
from schedule.types import Family, SchedulingVariable

ROPE = np.array([3.0, 6.0, 10.0, 15.0, 20.0, 25.0, 30.0])
MASS = np.array([2000.0, 10000.0, 20000.0, 30000.0, 40000.0])


def crane_like_plant(rope: float, payload: float) -> GeneralizedPlant:
    """An invented order-8 generalized plant: trolley + pendulum + actuator lag + weights.

    States: trolley position/speed, sway angle/rate, actuator force, wind filter,
    two performance-weight filter states. w = [wind, noise1, noise2], u = force
    command, z = [weighted position, weighted sway, effort], y = [position, sway] + noise.
    """
    g, trolley, tau = 9.81, 5000.0, 0.2
    m = payload
    A = np.zeros((8, 8))
    A[0, 1] = 1.0
    A[1, 2] = m * g / trolley
    A[1, 4] = 1000.0 / trolley  # actuator force in kN
    A[1, 5] = 2000.0 / trolley  # wind force state in units of 2 kN
    A[2, 3] = 1.0
    A[3, 2] = -(trolley + m) * g / (trolley * rope)
    A[3, 4] = -1000.0 / (trolley * rope)
    A[3, 5] = -2000.0 / (trolley * rope)
    A[3, 3] = -0.01
    A[4, 4] = -1.0 / tau
    A[5, 5] = -0.5
    A[6, 6], A[6, 0] = -0.05, 0.05
    A[7, 7], A[7, 2] = -0.1, 0.1
    B1 = np.zeros((8, 3))
    B1[5, 0] = 1.0
    B2 = np.zeros((8, 1))
    B2[4, 0] = 1.0 / tau
    C1 = np.zeros((3, 8))
    C1[0, 6], C1[0, 0] = 10.0, 0.5
    C1[1, 7], C1[1, 2] = 10.0, 0.5
    D12 = np.array([[0.0], [0.0], [0.05]])
    C2 = np.zeros((2, 8))
    C2[0, 0], C2[1, 2] = 1.0, 1.0
    D21 = np.array([[0.0, 0.01, 0.0], [0.0, 0.0, 0.01]])
    return GeneralizedPlant(A=A, B1=B1, B2=B2, C1=C1, C2=C2, D11=np.zeros((3, 3)), D12=D12,
                            D21=D21, D22=np.zeros((2, 1)))


def crane_family() -> Family:
    points = np.array([[a, b] for a in ROPE for b in MASS])
    plants = [crane_like_plant(*p) for p in points]
    gamma = 1.05 * max(optimal_gamma(p) for p in plants)
    ks = [central_controller(p, gamma) for p in plants]
    n = len(points)

    def stack(items):
        return {k: np.stack([it[k] for it in items]) for k in items[0]}

    return Family(
        variables=(SchedulingVariable("rope_length", "m", 3.0, 30.0),
                   SchedulingVariable("payload_mass", "kg", 2000.0, 40000.0)),
        points=points, status=np.array(["ok"] * n, dtype="<U6"), reasons=("",) * n,
        gamma_opt=np.full(n, np.nan), gamma=gamma,
        plant=stack([p.to_arrays() for p in plants]),
        controller=stack([dict(zip(CONTROLLER_KEYS, k.as_tuple(), strict=True)) for k in ks]),
        pieces=stack([k.pieces.to_arrays() for k in ks]),
        breakpoints=(ROPE, MASS),
        grid_index=np.array([[i, j] for i in range(len(ROPE)) for j in range(len(MASS))]))


def _best_of(fn, repeats: int = 3) -> float:
    best = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main() -> None:
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)  # one core, as the target says
    except ImportError:
        pass
    t = time.perf_counter()
    fam = crane_family()
    print(f"crane-sized family: {len(fam.points)} points, controller order "
          f"{fam.controller['A'].shape[1]}, gamma {fam.gamma:.4g} "
          f"(designed in {time.perf_counter() - t:.1f} s)")
    rng = np.random.default_rng(0)
    M = 100_000
    q = np.column_stack([rng.uniform(3, 30, M), rng.uniform(2e3, 4e4, M)])
    entries = sum(int(np.prod(fam.controller[k].shape[1:])) for k in CONTROLLER_KEYS)
    print(f"\nmatrices form, {M} points x {entries} entries, best of 3, one BLAS thread")
    print(f"{'kind':<18} {'seconds':>8} {'entries/s':>12} {'vs 1e6 target':>14} "
          f"{'vs multilinear':>15}")
    base = None
    for kind in KINDS:
        sc = ScheduledController.fit(fam, "matrices", kind)
        sec = _best_of(lambda sc=sc: sc.evaluate(q))
        rate = M * entries / sec
        base = base or rate
        print(f"{kind:<18} {sec:>8.3f} {rate:>12.3e} {rate / 1e6:>14.1f} {rate / base:>15.3f}")
    m2 = 2000
    sc = ScheduledController.fit(fam, "observer", "multilinear")
    sec = _best_of(lambda: sc.evaluate(q[:m2]), 1)
    print(f"\nobserver form (re-assembly per point), multilinear, {m2} points: {sec:.3f} s, "
          f"{m2 * entries / sec:.3e} entries/s ({m2 / sec:.0f} controllers/s)")
    t = time.perf_counter()
    best, evidence = choose_interpolant(fam)
    sec = time.perf_counter() - t
    print(f"\nleave-one-out choice, {len(evidence)} candidates x {len(fam.points)} refits: "
          f"{sec:.1f} s (target: well under 60 s) -> {best.form}/{best.kind}")
    for r in evidence:
        print(f"  {r.label:<28} unstable {r.n_unstable:>2}/{len(r.stable)}  "
              f"max |T|/gamma {r.max_stable_norm_ratio:7.4f}  median err {r.median_error:.3g}"
              + (f"  FAILED: {r.failure}" if r.failure else ""))


if __name__ == "__main__":
    main()
