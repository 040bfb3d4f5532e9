"""Benchmark: H-infinity norm by the level-set method against a 10,000-point sweep.

Run ``python tests/benchmarks/bench_norms.py [--per-call]``. With ``--per-call`` it
times, side by side in one run with one BLAS thread, ``h_infinity_norm`` against a plain
two-step Hamiltonian loop written here (Bruinsma-Steinbuch lower bound, level sets,
midpoints; none of the certificate's checks), against main at the start of the speed
work and against the revision before the certified route (tests/benchmarks/_earlier.py),
and prints the speed ratios (plain/now >= 1: the certified norm is at least on par).

Without it: for each order (4, 8, 16, 32) and
damping class (well damped, lightly damped) it times, side by side in one run,

* ``h_infinity_norm`` (Boyd-Balakrishnan-Kabamba / Bruinsma-Steinbuch),
* a 10,000-point log-spaced vectorized sweep with stacked shifted solves
  (``solve((j w I - A), B)`` for all w at once, then a stacked SVD),
* the same sweep through the modal form (``singular_values``, one
  eigen-decomposition then vectorized sums: the fastest sweep we have),

and prints the time ratios and the sweep's relative shortfall
``(norm - sweep) / norm`` (the sweep can only under-estimate a supremum; the
level-set result is accurate to rtol = 1e-8 and is checked against an
independent dense sweep in tests/test_norms.py). Timings are medians of
repeated runs; the machine is shared, so expect noise.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one BLAS thread: the comparison is per core

import sys  # noqa: E402 (one BLAS thread first)
import time  # noqa: E402 (one BLAS thread first)
import warnings  # noqa: E402 (one BLAS thread first)

import numpy as np  # noqa: E402 (one BLAS thread first)

from schedule.norms import _sv, h_infinity_norm, h_infinity_norms, singular_values  # noqa: E402 (one BLAS thread first)

N_SWEEP = 10_000


def random_model(rng, n, p, m, damping):
    """Stable real model with modes of damping in ``damping`` and random coupling."""
    Ad = np.zeros((n, n))
    k = 0
    while k < n:
        wn = 10 ** rng.uniform(-1, 2)
        if n - k >= 2:
            z = 10 ** rng.uniform(*np.log10(damping))
            wd = wn * np.sqrt(1 - z * z)
            Ad[k:k + 2, k:k + 2] = [[-z * wn, wd], [-wd, -z * wn]]
            k += 2
        else:
            Ad[k, k] = -wn
            k += 1
    T = np.eye(n) + 0.3 * rng.standard_normal((n, n))
    A = T @ Ad @ np.linalg.inv(T)
    return (A, rng.standard_normal((n, m)), rng.standard_normal((p, n)),
            0.1 * rng.standard_normal((p, m)))


def sweep_solve(A, B, C, D, w):
    """Vectorized sweep: stacked shifted solves, chunked, then stacked SVD."""
    n = A.shape[0]
    best = 0.0
    eye = np.eye(n)
    for start in range(0, w.size, 2000):
        s = 1j * w[start:start + 2000]
        M = s[:, None, None] * eye - A
        G = C @ np.linalg.solve(M, np.broadcast_to(B, (s.size,) + B.shape)) + D
        best = max(best, float(_sv(G, only_max=True).max()))
    return best


def median_time(fn, repeat, *args, clock=time.perf_counter):
    times = []
    out = None
    for _ in range(repeat):
        t = clock()
        out = fn(*args)
        times.append(clock() - t)
    return float(np.median(times)), out


def plain_two_step(A, B, C, D, rtol=1e-8):
    """A plain two-step Hamiltonian loop (Bruinsma and Steinbuch 1990): lower bound from 0,
    the pole frequencies and D, then level sets and midpoints by direct solves. No
    stability predicate, no scaling, no consistency tests: the speed floor."""
    n = A.shape[0]
    lam = np.linalg.eigvals(A)
    if lam.real.max() >= 0:
        return np.inf

    def sig(w):
        M = 1j * np.asarray(w)[:, None, None] * np.eye(n) - A
        G = C @ np.linalg.solve(M, np.broadcast_to(B.astype(complex), (len(w),) + B.shape)) + D
        return np.linalg.norm(G, 2, axis=(1, 2))

    cand = np.concatenate([[0.0], np.abs(lam.imag), np.abs(lam)])
    lb = max(sig(cand).max(), np.linalg.norm(D, 2))
    for _ in range(60):
        g = (1 + 2 * rtol) * lb
        R = g * g * np.eye(D.shape[1]) - D.T @ D
        X = np.linalg.solve(R, np.hstack([D.T @ C, B.T]))
        Ah = A + B @ X[:, :n]
        H = np.block([[Ah, B @ X[:, n:]], [-(C.T @ C + C.T @ D @ X[:, :n]), -Ah.T]])
        ev = np.linalg.eigvals(H)
        w = np.sort(ev.imag[(np.abs(ev.real) <= 1e-6 * np.abs(ev)) & (ev.imag > 0)])
        if w.size < 2:
            return lb
        m = sig(0.5 * (w[:-1] + w[1:]))
        if m.max() <= g:
            return lb
        lb = m.max()
    return lb


def per_call() -> None:
    """h_infinity_norm per call against a plain loop, main at the start of the speed work
    and the revision before the certified route, all side by side in one run."""
    import importlib

    import _earlier

    _earlier.load()
    _earlier.load(_earlier.START, "schedule_start")
    old = importlib.import_module("schedule_old.norms")
    start = importlib.import_module("schedule_start.norms")

    rng = np.random.default_rng(2024)
    fns = (("plain", plain_two_step), ("before", old.h_infinity_norm),
           ("start", start.h_infinity_norm), ("now", h_infinity_norm))
    print("CPU ms per call (process time: the machine is shared; median of 9, mean over 8 "
          "models, two alternating rounds); ratios > 1: plain is slower")
    print(f"{'n':>3} {'damping':>10} {'plain':>7} {'before':>7} {'start':>7} {'now':>7} "
          f"{'plain/start':>12} {'plain/now':>10} {'start/now':>10}")
    for n in (4, 8, 12, 16, 32):
        for label, damping in (("0.05-0.7", (0.05, 0.7)), ("1e-4-1e-2", (1e-4, 1e-2))):
            models = [random_model(rng, n, 2, 2, damping) for _ in range(8)]
            ts = dict.fromkeys(dict(fns), 0.0)
            for mdl in models:
                for _ in range(2):  # alternate the variants twice: load drifts
                    for name, fn in fns:
                        t, _ = median_time(fn, 9, *mdl, clock=time.process_time)
                        ts[name] += t
            ms = {k: 1e3 * v / 16 for k, v in ts.items()}
            print(f"{n:>3} {label:>10} {ms['plain']:7.3f} {ms['before']:7.3f} {ms['start']:7.3f} "
                  f"{ms['now']:7.3f} {ts['plain'] / ts['start']:12.2f} "
                  f"{ts['plain'] / ts['now']:10.2f} {ts['start'] / ts['now']:10.2f}")


def main() -> None:
    rng = np.random.default_rng(2024)
    print(f"{'n':>3} {'damping':>14} {'t_norm ms':>10} {'t_sweep ms':>11} {'ratio':>7} "
          f"{'t_modal ms':>11} {'ratio':>7} {'sweep rel err':>14}")
    ratios, ratios_modal = [], []
    for n in (4, 8, 16, 32):
        for label, damping in (("0.05-0.7", (0.05, 0.7)), ("1e-4-1e-2", (1e-4, 1e-2))):
            models = [random_model(rng, n, 2, 2, damping) for _ in range(5)]
            tn = ts = tm = 0.0
            errs = []
            for A, B, C, D in models:
                lam = np.abs(np.linalg.eigvals(A))
                w = np.geomspace(lam.min() / 100, lam.max() * 100, N_SWEEP)
                t1, cert = median_time(h_infinity_norms, 7, A[None], B[None], C[None], D[None])
                norm = float(cert.norm[0])
                t2, sweep = median_time(sweep_solve, 3, A, B, C, D, w)
                t3, _ = median_time(singular_values, 3, A, B, C, D, w)
                tn, ts, tm = tn + t1, ts + t2, tm + t3
                errs.append((norm - sweep) / norm)
            ratios.append(ts / tn)
            ratios_modal.append(tm / tn)
            print(f"{n:>3} {label:>14} {1e3 * tn / 5:>10.3f} {1e3 * ts / 5:>11.2f} "
                  f"{ts / tn:>7.1f} {1e3 * tm / 5:>11.2f} {tm / tn:>7.1f} "
                  f"{max(errs):>14.2e}")
    print(f"median speed-up vs solve sweep: {np.median(ratios):.1f}x, "
          f"vs modal sweep: {np.median(ratios_modal):.1f}x (target >= 20x vs the sweep)")

    print("\nlockstep h_infinity_norms on 500 models vs a loop of it on one model at a time (2x2)")
    for n in (4, 8, 16, 20):
        models = [random_model(rng, n, 2, 2, (1e-3, 0.7)) for _ in range(500)]
        stacks = [np.stack([mdl[k] for mdl in models]) for k in range(4)]
        t = time.perf_counter()
        loop = [h_infinity_norms(*(x[None] for x in mdl)) for mdl in models]
        t_loop = time.perf_counter() - t
        t = time.perf_counter()
        many = h_infinity_norms(*stacks)
        t_many = time.perf_counter() - t
        norm_loop = np.array([c.norm[0] for c in loop])
        sure = np.isfinite(many.upper) & np.isfinite([c.upper[0] for c in loop])
        diff = float(np.max(np.abs(many.norm - norm_loop)[sure] / norm_loop[sure]))
        print(f"  n={n:>2}: loop {1e3 * t_loop / 500:.3f} ms/model, lockstep "
              f"{1e3 * t_many / 500:.3f} ms/model, ratio {t_loop / t_many:.1f}x, "
              f"max rel diff {diff:.1e}; in doubt (ill-conditioned, counted as above): "
              f"{int((~np.isfinite(many.upper)).sum())} of 500")


if __name__ == "__main__":
    # h_infinity_norm warns where rounding allows no bound within 3 rtol (sharp peaks in
    # skewed coordinates); the timings are what is measured here
    warnings.simplefilter("ignore", RuntimeWarning)
    per_call() if "--per-call" in sys.argv else main()
