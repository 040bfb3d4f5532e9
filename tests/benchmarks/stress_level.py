"""Stress run (on demand): a search for false "below" answers of the H-infinity level test.

Run: python tests/benchmarks/stress_level.py [SEED] [TRIALS]   (defaults 1, 60)

Each trial draws a stable model of 2..6 modes (natural frequencies 0.1..10 rad/s, damping
1e-4..0.5, one or two inputs and outputs) and puts it into random state coordinates T of
condition 1e2, 1e5, 1e7, 1e8 and 1e9. The model actually tested is the rounded
realization (T^-1 A T, T^-1 B, C T); its true norm comes from mapping it back with T in
40-digit arithmetic (mpmath) and a dense sweep refined by scipy (the norm is invariant
under a change of state coordinates; Zhou, Doyle and Glover 1996, ch. 3, from memory),
taking the larger of that and the certified norm of the mapped-back model. The level test
(`h_infinity_norms(..., level=)`) is asked at 0.99 and 0.999 of the true norm, where
"below" is always wrong, and at 1.01, where "below" is right but may be refused in
ill-conditioned coordinates. Prints the counts; a wrong "below" is a defect.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
from scipy.stats import ortho_group

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_norms import _modes, _rounded_back, _swept_norm  # noqa: E402 (the tests' references)

from schedule.norms import h_infinity_norms  # noqa: E402


def random_modes(rng) -> tuple[np.ndarray, ...]:
    """A stable model in real modal form with random input and output couplings."""
    k = int(rng.integers(2, 7))
    A = _modes(rng, k)
    m = int(rng.integers(1, 3))
    B, C = rng.standard_normal((2 * k, m)), rng.standard_normal((m, 2 * k))
    D = 0.1 * rng.standard_normal((m, m)) * rng.integers(0, 2)
    return A, B, C, D


def main(seed: int, trials: int) -> None:
    rng = np.random.default_rng(seed)
    wrong = doubt = above = total = unstable = 0
    per: dict[int, list[int]] = {}
    t0 = time.process_time()
    for trial in range(trials):
        A, B, C, D = random_modes(rng)
        n = A.shape[0]
        for cond_exp in (2, 5, 7, 8, 9):
            T = (ortho_group.rvs(n, random_state=rng)
                 @ np.diag(10.0 ** np.linspace(-cond_exp / 2, cond_exp / 2, n))
                 @ ortho_group.rvs(n, random_state=rng))
            Ti = np.linalg.inv(T)
            At, Bt, Ct = Ti @ A @ T, Ti @ B, C @ T
            A2, B2, C2 = _rounded_back(At, Bt, Ct, T)
            if np.linalg.eigvals(A2).real.max() >= 0:  # rounding made it unstable
                unstable += 1
                continue
            ref = float(h_infinity_norms(A2[None], B2[None], C2[None], D[None]).norm[0])
            try:
                ref = max(ref, _swept_norm(A2, B2, C2, D))
            except ValueError:  # peak at the end of the sweep: keep the certified norm
                pass
            for d in (1e-3, 1e-2):
                level = (1 - d) * ref
                cert = h_infinity_norms(At[None], Bt[None], Ct[None], D[None], level=level)
                total += 1
                if cert.below(level)[0]:
                    wrong += 1
                    print(f"WRONG 'below': trial {trial}, cond 1e{cond_exp}, level "
                          f"{1 - d} x norm {ref:.9g}")
                elif cert.status[0]:
                    doubt += 1
                else:
                    above += 1
            level = 1.01 * ref
            ok = bool(h_infinity_norms(At[None], Bt[None], Ct[None], D[None],
                                       level=level).below(level)[0])
            per.setdefault(cond_exp, [0, 0])
            per[cond_exp][0] += 1
            per[cond_exp][1] += ok
    print(f"levels below the norm: {total}; wrong 'below' {wrong}; 'in doubt' {doubt}; "
          f"certified above {above}")
    print("certified below at 1.01 x norm, by log10 cond(T): "
          + ", ".join(f"{k}: {v[1]}/{v[0]}" for k, v in sorted(per.items())))
    print(f"models unstable after rounding (skipped): {unstable}; "
          f"CPU {time.process_time() - t0:.1f} s")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1,
         int(sys.argv[2]) if len(sys.argv) > 2 else 60)
