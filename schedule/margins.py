"""Disk margins and classical gain / phase margins of the plant loop, batched over points.

Sign convention (the package's): the controller is ``u = K y`` and the plant is
``y = G u``. Nothing flips a sign in between, so the loop is closed with
*positive* feedback: ``u = K G u``. Written in the usual negative-feedback form
``u = -L u`` the loop transfer broken at the plant input is ``L_in = -K G`` and
at the plant output ``L_out = -G K``. The sensitivities are

    S_in  = (I + L_in)^-1  = (I - K G)^-1   (additive signal at u  -> u)
    S_out = (I + L_out)^-1 = (I - G K)^-1   (additive signal at y  -> y)

Balanced disk margin (skew sigma = 0; Blight, Dailey and Gangsaas 1994; Seiler,
Packard and Gahinet 2020, eq. for alpha_max): the loop stays stable for every
multiplicative perturbation ``f`` in the disk
``D(alpha) = {(1 + alpha delta / 2) / (1 - alpha delta / 2) : |delta| < 1}`` iff

    alpha < alpha_max = 1 / || S - I/2 ||_inf      (one loop)
    alpha < 1 / sup_w mu_Delta(S(jw) - I/2)        (all loops at once, diagonal Delta)

since ``S - I/2 = (S - T) / 2`` with ``T = I - S``. The disk's real axis gives the
gain range ``[(1 - a/2)/(1 + a/2), (1 + a/2)/(1 - a/2)]`` (``[0, inf)`` for
``a >= 2``) and its unit-circle points the phase margin ``2 arctan(a/2)``.
Loop at a time uses the diagonal entry ``(S - I/2)_ii`` (one channel perturbed,
the others closed). For all loops at once mu is bounded from above by
``inf_D sigma_max(D M D^-1)`` over positive diagonal D (Doyle 1982; equal to mu for up
to three complex blocks). ``sigma_max(e^X M e^-X)`` is convex in the diagonal X
(Sezginer and Overton 1990), so the infimum is found by golden-section search in log D
(one variable for two loops, nested for three; coordinate sweeps from Osborne (1960)
balancing beyond three, where the result is an upper bound of mu only). The worst
frequency is refined the same way: the grid point with the largest optimized bound
(re-optimizing until the maximum sits on an optimized point) and then golden section
in frequency between its neighbours, with the D scaling optimized at every trial
frequency. For up to three loops the all-loops margin is therefore the margin itself
(to the refinement accuracy, about 1e-7 relative at the refined peak); beyond three it
is a guaranteed (lower) bound, flagged ``all_is_bound``.

Classical margins use the loop seen at channel i with the other loops closed,
``L_i = 1 / (S_in)_ii - 1`` (identity of the scalar sensitivity); phase
crossings (Im L_i = 0, Re L_i < 0) and gain crossings (|L_i| = 1) are found on
the frequency grid and refined by a vectorized bracketing root search (Illinois
false position with bisection safeguard; the same guarantee as brentq).

All margins assume the nominal closed loop is stable; an unstable loop gets
alpha = 0 and NaN classical margins.

References
----------
J. D. Blight, R. L. Dailey, D. Gangsaas, "Practical control law design for
aircraft using multivariable techniques", Int. J. Control 59(1), 1994.
P. Seiler, A. Packard, P. Gahinet, "An introduction to disk margins", IEEE
Control Systems Magazine 40(5), 2020, doi:10.1109/MCS.2020.3005277.
J. C. Doyle, "Analysis of feedback systems with structured uncertainties",
IEE Proc. D 129(6), 1982.
E. E. Osborne, "On pre-conditioning of matrices", J. ACM 7(4), 1960.
N. Sezginer and M. L. Overton, "The largest singular value of e^X A e^-X is convex on
convex sets of commuting matrices", IEEE Trans. Automatic Control 35(2), 1990.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import PlantError
from .norms import sigma_max, stability_from_eigenvalues

__all__ = [
    "DiskMargins",
    "ClassicalMargins",
    "FrequencyResponder",
    "loop_sensitivity",
    "disk_margins",
    "classical_margins",
    "disk_gain_range",
    "disk_phase_margin",
    "mu_upper_bound",
    "default_frequencies",
]

_CHUNK_ELEMENTS = 4_000_000  # complex entries per chunk of batched responses


# ----------------------------------------------------------------------------
# small closed forms
# ----------------------------------------------------------------------------
def disk_gain_range(alpha) -> tuple[np.ndarray, np.ndarray]:
    """Gain range ``(low, high)`` guaranteed by a balanced disk margin ``alpha``.

    ``low = (1 - alpha/2) / (1 + alpha/2)``, ``high = (1 + alpha/2) / (1 - alpha/2)``;
    for ``alpha >= 2`` the range is ``[0, inf)`` (Seiler, Packard and Gahinet 2020).
    """
    a = np.asarray(alpha, dtype=float) / 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        finite = a < 1.0 - 1e-9  # alpha within roundoff of 2 covers every positive gain
        low = np.where(finite, (1.0 - a) / (1.0 + a), 0.0)
        high = np.where(finite, (1.0 + a) / (1.0 - a), np.inf)
    return low, high


def disk_phase_margin(alpha) -> np.ndarray:
    """Phase margin in degrees guaranteed by a balanced disk margin: ``2 arctan(alpha/2)``."""
    return np.degrees(2.0 * np.arctan(np.asarray(alpha, dtype=float) / 2.0))


def _gain_db(high) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.asarray(high, dtype=float))


# ----------------------------------------------------------------------------
# batched state space and frequency responses
# ----------------------------------------------------------------------------
def _stack(M, name: str, ndim: int = 3) -> np.ndarray:
    a = np.asarray(M, dtype=float)
    if a.ndim == ndim - 1:
        a = a[None]
    if a.ndim != ndim:
        raise PlantError(f"{name} has shape {a.shape}; pass a (rows, cols) or "
                         "(N, rows, cols) array")
    if not np.all(np.isfinite(a)):
        raise PlantError(f"{name} holds NaN or inf entries; fix the plant or controller data")
    return a


def loop_sensitivity(G, K, at: str = "input"):
    """State space of the sensitivity of the plant loop, batched over points.

    Parameters
    ----------
    G : tuple (A, B, C, D) of the physical plant, controls -> measured outputs,
        each (n, .) or stacked (N, ., .).
    K : tuple (A, B, C, D) of the controller, ``u = K y``, same stacking.
    at : "input" for ``S_in = (I - K G)^-1`` (additive signal at the plant
        input to the plant input) or "output" for ``S_out = (I - G K)^-1``.

    Returns
    -------
    (A, B, C, D) stacked, the closed loop driven by the loop-breaking signal.

    Raises
    ------
    PlantError
        If the loop is not well posed (``I - D_K D_G`` singular).
    """
    Ag, Bg, Cg, Dg = (_stack(M, f"plant {k}") for k, M in zip("ABCD", G, strict=True))
    Ak, Bk, Ck, Dk = (_stack(M, f"controller {k}") for k, M in zip("ABCD", K, strict=True))
    N = max(Ag.shape[0], Ak.shape[0])
    Ag, Bg, Cg, Dg = (np.broadcast_to(M, (N,) + M.shape[1:]) for M in (Ag, Bg, Cg, Dg))
    Ak, Bk, Ck, Dk = (np.broadcast_to(M, (N,) + M.shape[1:]) for M in (Ak, Bk, Ck, Dk))
    m, p = Bg.shape[2], Cg.shape[1]
    if Dk.shape[1:] != (m, p):
        raise PlantError(f"controller D is {Dk.shape[1:]} but the plant has {m} controls and "
                         f"{p} measurements; check the channel selection")
    if at == "input":
        W = np.eye(m) - Dk @ Dg
    elif at == "output":
        W = np.eye(p) - Dg @ Dk
    else:
        raise PlantError(f"loop break point {at!r} is unknown; use 'input' or 'output'")
    cond = np.linalg.cond(W)
    if np.any(~np.isfinite(cond)) or np.any(cond > 1e12):
        i = int(np.nanargmax(np.where(np.isfinite(cond), cond, np.inf)))
        raise PlantError(f"plant loop is not well posed at point {i} (I - D_K D_G has condition "
                         f"{cond[i]:.2e}); the controller feedthrough cancels the plant's")
    E = np.linalg.inv(W)
    if at == "input":
        EDkCg = E @ Dk @ Cg
        ECk = E @ Ck
        top = np.concatenate([Ag + Bg @ EDkCg, Bg @ ECk], axis=2)
        bot = np.concatenate([Bk @ (Cg + Dg @ EDkCg), Ak + Bk @ Dg @ ECk], axis=2)
        B = np.concatenate([Bg @ E, Bk @ Dg @ E], axis=1)
        C = np.concatenate([EDkCg, ECk], axis=2)
    else:
        ECg = E @ Cg
        EDgCk = E @ Dg @ Ck
        top = np.concatenate([Ag + Bg @ Dk @ ECg, Bg @ (Ck + Dk @ EDgCk)], axis=2)
        bot = np.concatenate([Bk @ ECg, Ak + Bk @ EDgCk], axis=2)
        B = np.concatenate([Bg @ Dk @ E, Bk @ E], axis=1)
        C = np.concatenate([ECg, EDgCk], axis=2)
    A = np.concatenate([top, bot], axis=1)
    return A, B, C, E.copy()


class FrequencyResponder:
    """Batched frequency responses ``H_i(jw) = D_i + C_i (jw I - A_i)^-1 B_i``.

    Uses one eigendecomposition per point, ``A = V diag(lambda) V^-1``, so that a
    response at K frequencies costs O(K n p m) instead of K linear solves. Points
    whose eigenvector matrix is ill-conditioned (cond > 1e8, near-defective A)
    fall back to direct complex solves.
    """

    def __init__(self, A, B, C, D):
        self.A, self.B, self.C, self.D = (np.asarray(M, dtype=float) for M in (A, B, C, D))
        self.N, self.n = self.A.shape[0], self.A.shape[1]
        if self.n == 0:
            lam, V, cond = np.zeros((self.N, 0), complex), np.zeros((self.N, 0, 0)), np.ones(self.N)
        else:
            lam, V = np.linalg.eig(self.A)
            with np.errstate(all="ignore"):
                cond = np.linalg.cond(V)
        self.eigenvalues = lam
        self.direct = ~np.isfinite(cond) | (cond > 1e8)
        good = ~self.direct
        self.CV = np.zeros((self.N,) + (self.C.shape[1], self.n), dtype=complex)
        self.WB = np.zeros((self.N, self.n, self.B.shape[2]), dtype=complex)
        if np.any(good):
            Vg = V[good]
            self.CV[good] = self.C[good] @ Vg
            self.WB[good] = np.linalg.solve(Vg, self.B[good].astype(complex))

    @property
    def spectral_abscissa(self) -> np.ndarray:
        """Largest real part of the eigenvalues of A, per point."""
        if self.n == 0:
            return np.full(self.N, -np.inf)
        return self.eigenvalues.real.max(axis=1)

    def __call__(self, omega, index=None) -> np.ndarray:
        """Responses at ``omega``: (K,) shared or (N, K) per point -> (N, K, p, m).

        ``index`` (optional integer array) restricts to those points; then
        ``omega`` is (len(index), K).
        """
        idx = np.arange(self.N) if index is None else np.asarray(index)
        w = np.asarray(omega, dtype=float)
        if w.ndim == 1:
            w = np.broadcast_to(w, (idx.size, w.size))
        Kf = w.shape[1]
        p, m = self.C.shape[1], self.B.shape[2]
        out = np.empty((idx.size, Kf, p, m), dtype=complex)
        per_point = max(1, Kf * self.n * max(p, m))
        step = max(1, _CHUNK_ELEMENTS // per_point)
        for s in range(0, idx.size, step):
            sl = slice(s, s + step)
            ii = idx[sl]
            ww = w[sl]
            res = np.empty((ii.size, Kf, p, m), dtype=complex)
            good = ~self.direct[ii]
            if np.any(good):
                g = ii[good]
                with np.errstate(divide="ignore", invalid="ignore"):
                    r = 1.0 / (1j * ww[good][:, :, None] - self.eigenvalues[g][:, None, :])
                    res[good] = (self.CV[g][:, None] * r[:, :, None, :]) @ self.WB[g][:, None]
            for j in np.flatnonzero(~good):
                q = ii[j]
                M = 1j * ww[j][:, None, None] * np.eye(self.n) - self.A[q]
                with np.errstate(all="ignore"):
                    X = np.linalg.solve(M, np.broadcast_to(self.B[q].astype(complex),
                                                           (Kf,) + self.B[q].shape))
                res[j] = self.C[q] @ X
            out[sl] = res + self.D[ii][:, None]
        return out


def default_frequencies(eigenvalues: np.ndarray, count: int = 160) -> np.ndarray:
    """Per-point frequency grids (N, count + n + 1): zero, a log grid and the poles' moduli.

    The log grid spans two decades below the slowest and two above the fastest
    closed-loop eigenvalue modulus; adding every ``|lambda|`` puts a sample on
    each lightly damped resonance.
    """
    lam = np.atleast_2d(eigenvalues)
    mod = np.abs(lam)
    pos = np.where(mod > 0, mod, np.nan)
    lo = np.where(np.isnan(pos), np.inf, pos).min(axis=1, initial=np.inf)
    hi = np.where(np.isnan(pos), -np.inf, pos).max(axis=1, initial=-np.inf)
    lo = np.where(np.isfinite(lo), lo, 1.0)
    hi = np.where(np.isfinite(hi), hi, 1.0)
    t = np.linspace(0.0, 1.0, count)
    grid = 10.0 ** (np.log10(lo / 100.0)[:, None]
                    + t[None, :] * (np.log10(hi * 100.0) - np.log10(lo / 100.0))[:, None])
    extra = np.concatenate([np.zeros((lam.shape[0], 1)), np.abs(lam.imag), mod], axis=1)
    return np.sort(np.concatenate([grid, extra], axis=1), axis=1)


def _golden(fun, a, b, iterations: int = 40, maximize: bool = True):
    """Vectorized golden-section search of ``fun`` on the rows' brackets [a, b].

    ``fun`` maps an array of abscissae (shape of ``a``) to values of that shape;
    one call per iteration. Returns (best value, its abscissa) per entry.
    """
    sgn = 1.0 if maximize else -1.0
    g = (np.sqrt(5.0) - 1.0) / 2.0
    a = np.array(a, dtype=float)
    b = np.array(b, dtype=float)
    c = b - g * (b - a)
    d = a + g * (b - a)
    fc, fd = sgn * fun(c), sgn * fun(d)
    for _ in range(iterations):
        left = fc > fd  # the optimum lies in [a, d]
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        x = np.where(left, b - g * (b - a), a + g * (b - a))
        fx = sgn * fun(x)
        c, d, fc, fd = (np.where(left, x, d), np.where(left, c, x),
                        np.where(left, fx, fd), np.where(left, fc, fx))
    take_c = fc >= fd
    return sgn * np.where(take_c, fc, fd), np.where(take_c, c, d)


def _neighbours(w_grid: np.ndarray, wbest: np.ndarray):
    """Per row, the grid frequencies strictly below and above ``wbest`` (the grid may repeat
    values; ``wbest`` itself where there is none): the bracket of a peak refinement."""
    below = np.where(w_grid < wbest[:, None], w_grid, -np.inf).max(axis=1)
    above = np.where(w_grid > wbest[:, None], w_grid, np.inf).min(axis=1)
    return (np.where(np.isfinite(below), below, wbest),
            np.where(np.isfinite(above), above, wbest))


def _refine_peak(fun, w_grid: np.ndarray, values: np.ndarray, iterations: int = 40):
    """Refine the grid maximum of ``fun`` per row by golden section between neighbours.

    ``fun(w)`` maps an (R,) frequency vector (one per row) to (R,) values.
    Returns (peak values, peak frequencies); never below the grid maximum.
    """
    R, K = values.shape
    rows = np.arange(R)
    k = np.argmax(np.nan_to_num(values, nan=-np.inf), axis=1)
    best = values[rows, k]
    wbest = w_grid[rows, k]
    a, b = _neighbours(w_grid, wbest)
    cand, wcand = _golden(fun, a, b, iterations)
    better = cand > best
    return np.where(better, cand, best), np.where(better, wcand, wbest)


# ----------------------------------------------------------------------------
# mu upper bound (diagonal complex scalings)
# ----------------------------------------------------------------------------
def _osborne(M: np.ndarray, sweeps: int = 12) -> np.ndarray:
    """Osborne balancing of the off-diagonal moduli of stacked square M (..., m, m)."""
    m = M.shape[-1]
    Ma = np.abs(M)
    logd = np.zeros(M.shape[:-1])
    off = ~np.eye(m, dtype=bool)
    for _ in range(sweeps):
        for i in range(m):
            d = np.exp(logd)
            S = Ma * d[..., :, None] / d[..., None, :]
            r = np.sqrt(np.sum((S[..., i, :] * off[i]) ** 2, axis=-1))
            c = np.sqrt(np.sum((S[..., :, i] * off[:, i]) ** 2, axis=-1))
            ok = (r > 0) & (c > 0)
            logd[..., i] += np.where(ok, 0.5 * (np.log(np.where(ok, c, 1.0))
                                                - np.log(np.where(ok, r, 1.0))), 0.0)
    return logd


def _scaled_sigma(M: np.ndarray, logd: np.ndarray) -> np.ndarray:
    d = np.exp(logd - logd[..., :1])
    S = M * d[..., :, None] / d[..., None, :]
    return sigma_max(S)


D_SEARCH_HALF_WIDTH = 4.0  # first golden bracket: log d within +-4 of the start
D_SEARCH_ITERATIONS = 44  # bracket shrinks by 0.618^44 (about 6e-10 of its width)


def _golden_min(f, x0: np.ndarray, iterations: int = D_SEARCH_ITERATIONS,
                half: float = D_SEARCH_HALF_WIDTH):
    """Minimum of a convex f per entry, starting around x0: golden section on
    [x0 - half, x0 + half], the bracket moved out (up to 4 times) while the minimum sits
    at one of its ends. Returns (value, abscissa)."""
    lo, hi = x0 - half, x0 + half
    val, x = _golden(f, lo, hi, iterations, maximize=False)
    for _ in range(4):
        width = hi - lo
        at_lo = x - lo < 1e-3 * width
        at_hi = hi - x < 1e-3 * width
        move = at_lo | at_hi
        if not move.any():
            break
        lo = np.where(at_lo, lo - 0.9 * width, np.where(at_hi, hi - 0.1 * width, lo))
        hi = lo + width
        v2, x2 = _golden(f, lo, hi, iterations, maximize=False)
        better = move & (v2 < val)
        val, x = np.where(better, v2, val), np.where(better, x2, x)
    return val, x


def _optimal_scaling(M: np.ndarray, logd: np.ndarray, best: np.ndarray):
    """inf over positive diagonal D of sigma_max(D M D^-1), from the start ``logd``.

    Two loops: one variable (golden section, the function being convex in log d,
    Sezginer and Overton 1990). Three: nested golden sections (the inner minimum of a
    jointly convex function is convex in the outer variable). More: three sweeps of
    coordinate-wise golden sections (an upper bound, not necessarily the infimum).
    """
    m = M.shape[-1]
    if m == 2:
        def f(x):
            ld = np.stack([np.zeros_like(x), x], axis=-1)
            return _scaled_sigma(M, ld)

        val, x = _golden_min(f, logd[..., 1] - logd[..., 0])
        better = val < best
        return np.where(better, val, best), np.where(
            better[..., None], np.stack([np.zeros_like(x), x], axis=-1), logd)
    if m == 3:
        base = logd - logd[..., :1]

        def inner(x1):
            def g(x2):
                return _scaled_sigma(M, np.stack([np.zeros_like(x1), x1, x2], axis=-1))
            return _golden_min(g, base[..., 2], iterations=34)

        def outer(x1):
            return inner(x1)[0]

        val, x1 = _golden_min(outer, base[..., 1], iterations=34)
        _, x2 = inner(x1)
        val = _scaled_sigma(M, np.stack([np.zeros_like(x1), x1, x2], axis=-1))
        better = val < best
        return np.where(better, val, best), np.where(
            better[..., None], np.stack([np.zeros_like(x1), x1, x2], axis=-1), logd)
    logd = logd.copy()
    for _ in range(3):
        for i in range(1, m):

            def f(x, i=i):
                ld = logd.copy()
                ld[..., i] = x
                return _scaled_sigma(M, ld)

            val, x = _golden(f, logd[..., i] - 3.0, logd[..., i] + 3.0, 30, maximize=False)
            better = val < best
            logd[..., i] = np.where(better, x, logd[..., i])
            best = np.where(better, val, best)
    return best, logd


def mu_upper_bound(M: np.ndarray, refine: bool = True, sweeps: int = 3) -> np.ndarray:
    """Upper bound on mu of stacked square complex M (..., m, m) for diagonal complex Delta.

    ``mu(M) <= inf_{D > 0 diagonal} sigma_max(D M D^-1)`` (Doyle 1982; equality for
    m <= 3). Osborne balancing gives a first D; with ``refine`` the infimum is searched
    in log D (see :func:`_optimal_scaling`): to about 1e-9 relative for m <= 3, an upper
    bound for m > 3. Any D gives a valid upper bound, so the result is never below mu.
    """
    return _mu_bound(np.asarray(M, dtype=complex), refine)[0]


def _mu_two(M: np.ndarray):
    """Exact ``inf_D sigma_max(D M D^-1)`` for 2 x 2 M (equal to mu, Doyle 1982).

    With ``D M D^-1 = [[a, b t], [c / t, d]]``, ``sigma_max^2 = (F + sqrt(F^2 - 4 |det|^2)) / 2``
    where ``F = ||D M D^-1||_F^2`` and ``det = ad - bc`` does not depend on t; sigma_max grows
    with F, and ``F = |a|^2 + |d|^2 + |b|^2 t^2 + |c|^2 / t^2`` is smallest at
    ``t^2 = |c| / |b|``: ``F = |a|^2 + |d|^2 + 2 |b| |c|`` (derived here).
    """
    a, b = M[..., 0, 0], M[..., 0, 1]
    c, d = M[..., 1, 0], M[..., 1, 1]
    ab, ac = np.abs(b), np.abs(c)
    F = np.abs(a) ** 2 + np.abs(d) ** 2 + 2.0 * ab * ac
    det2 = np.abs(a * d - b * c) ** 2
    val = np.sqrt(np.maximum(0.5 * (F + np.sqrt(np.maximum(F * F - 4.0 * det2, 0.0))), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where((ab > 0) & (ac > 0), 0.5 * (np.log(ac) - np.log(np.where(ab > 0, ab, 1.0))),
                     0.0)
    return val, np.stack([np.zeros_like(x), x], axis=-1)


def _mu_bound(M: np.ndarray, refine: bool, start: np.ndarray | None = None):
    """(bound, log d) of :func:`mu_upper_bound`; ``start`` optionally replaces Osborne's
    first D (a warm start from a neighbouring frequency)."""
    m = M.shape[-1]
    if m == 1:
        return np.abs(M[..., 0, 0]), np.zeros(M.shape[:-1])
    if m == 2:
        return _mu_two(M)
    if start is not None:
        return _optimal_scaling(M, start, _scaled_sigma(M, start))
    logd = _osborne(M)
    best = _scaled_sigma(M, logd)
    plain = sigma_max(M)
    worse = plain < best  # Osborne balancing is a heuristic: keep D = I when it is better
    logd = np.where(worse[..., None], 0.0, logd)
    best = np.minimum(best, plain)
    if not refine:
        return best, logd
    return _optimal_scaling(M, logd, best)


# ----------------------------------------------------------------------------
# disk margins
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class DiskMargins:
    """Balanced disk margins at one loop-breaking point for N points.

    Attributes
    ----------
    at : "input" or "output".
    loop_alpha : (N, m) loop-at-a-time disk margins alpha_i.
    loop_frequency : (N, m) frequency (rad/s) of the worst case per channel.
    all_alpha : (N,) all-loops-at-once disk margin (from the D-scaled mu bound).
    all_frequency : (N,) its frequency.
    stable : (N,) nominal closed-loop stability of the plant loop (the package's one
        predicate, :func:`schedule.norms.stability`).
    all_is_bound : True when ``all_alpha`` is only a lower bound of the margin (more than
        three loops: the D-scaled bound may exceed mu); False when it is the margin to
        the refinement accuracy.
    """

    at: str
    loop_alpha: np.ndarray
    loop_frequency: np.ndarray
    all_alpha: np.ndarray
    all_frequency: np.ndarray
    stable: np.ndarray
    all_is_bound: bool = False

    @property
    def loop_gain_db(self) -> np.ndarray:
        """Upper gain margin (dB) of each channel from its disk margin."""
        return _gain_db(disk_gain_range(self.loop_alpha)[1])

    @property
    def loop_gain_low_db(self) -> np.ndarray:
        """Lower gain margin (dB, negative) of each channel."""
        return _gain_db(disk_gain_range(self.loop_alpha)[0])

    @property
    def loop_phase_deg(self) -> np.ndarray:
        return disk_phase_margin(self.loop_alpha)

    @property
    def all_gain_db(self) -> np.ndarray:
        return _gain_db(disk_gain_range(self.all_alpha)[1])

    @property
    def all_phase_deg(self) -> np.ndarray:
        return disk_phase_margin(self.all_alpha)


def _sensitivity_responder(G, K, at):
    A, B, C, D = loop_sensitivity(G, K, at)
    return FrequencyResponder(A, B, C, D - 0.5 * np.eye(D.shape[1])[None])


FREQUENCY_ITERATIONS = 36  # golden steps in frequency at the worst point (0.618^36 ~ 3e-8)


def disk_margins(G, K, at: str = "input", omega=None,
                 _responder: FrequencyResponder | None = None) -> DiskMargins:
    """Balanced (sigma = 0) disk margins of the loop ``u = K y``, ``y = G u``.

    Parameters
    ----------
    G, K : (A, B, C, D) tuples, single or stacked over N points (see
        :func:`loop_sensitivity`). G is the physical plant (controls -> measured).
    at : "input" (break at the plant input) or "output" (at the plant output).
    omega : optional (K,) or (N, K) frequency grid in rad/s; by default
        :func:`default_frequencies` of the closed-loop eigenvalues.

    Returns
    -------
    DiskMargins
        ``alpha_i = 1 / sup_w |(S - I/2)_ii|`` per channel and
        ``alpha = 1 / sup_w mu_bound(S - I/2)`` for all channels at once, the
        sup taken on the grid, refined by golden section around the grid peak,
        and including w = infinity. Loops that are not stable by the package's one
        predicate get alpha = 0.

    Examples
    --------
    ``L = 2/(s - 1)`` in negative feedback (so ``G = 2/(s-1)``, ``K = -1``) has
    ``S - 1/2 = (s - 3) / (2 (s + 1))``, peak 3/2 at w = 0, alpha = 2/3.
    """
    R = _responder or _sensitivity_responder(G, K, at)
    N, m = R.N, R.B.shape[2]
    stable = stability_from_eigenvalues(R.A, R.eigenvalues).stable
    w = default_frequencies(R.eigenvalues) if omega is None else np.asarray(omega, float)
    if w.ndim == 1:
        w = np.broadcast_to(w, (N, w.size))
    H = R(w)  # (N, K, m, m)
    Dinf = R.D  # response at w = infinity
    loop_alpha = np.zeros((N, m))
    loop_freq = np.zeros((N, m))
    for i in range(m):
        vals = np.abs(H[:, :, i, i])

        def fun(ww, i=i):
            return np.abs(R(ww[:, None])[:, 0, i, i])

        peak, wpk = _refine_peak(fun, w, vals)
        inf_val = np.abs(Dinf[:, i, i])
        wpk = np.where(inf_val > peak, np.inf, wpk)
        peak = np.maximum(peak, inf_val)
        with np.errstate(divide="ignore"):
            loop_alpha[:, i] = np.where(stable, 1.0 / peak, 0.0)
        loop_freq[:, i] = wpk
    if m == 1:
        all_alpha = loop_alpha[:, 0].copy()
        all_freq = loop_freq[:, 0].copy()
    else:
        peak, wpk = _worst_mu(R, w, H)
        inf_val = mu_upper_bound(Dinf, refine=True)
        wpk = np.where(inf_val > peak, np.inf, wpk)
        peak = np.maximum(peak, inf_val)
        with np.errstate(divide="ignore"):
            all_alpha = np.where(stable, 1.0 / peak, 0.0)
        all_freq = wpk
    return DiskMargins(at, loop_alpha, loop_freq, all_alpha, all_freq, stable, m > 3)


def _worst_mu(R: FrequencyResponder, w: np.ndarray, H: np.ndarray):
    """sup over frequency of the optimized mu bound of ``H = R(w)``: (value, frequency).

    Osborne bounds everywhere; the optimized bound at the grid maximum, repeated until
    the maximum sits on an optimized frequency (Osborne values are upper bounds of the
    optimized ones, so no other grid point can exceed it); then golden section in
    frequency between the neighbours of that grid point, optimizing D at every trial.
    """
    N = R.N
    rows = np.arange(N)
    vals, logd = _mu_bound(H, refine=False)
    done = np.zeros(vals.shape, dtype=bool)
    done[:] = H.shape[-1] == 2  # the two-loop bound is exact already
    for _ in range(vals.shape[1]):
        k = np.argmax(vals, axis=1)
        todo = ~done[rows, k]
        if not todo.any():
            break
        r = rows[todo]
        vals[r, k[todo]], logd[r, k[todo]] = _mu_bound(H[r, k[todo]], refine=True)
        done[r, k[todo]] = True
    k = np.argmax(vals, axis=1)
    best = vals[rows, k]
    wbest = w[rows, k]
    start = logd[rows, k]
    a, b = _neighbours(w, wbest)

    def fun(ww):
        return _mu_bound(R(ww[:, None])[:, 0], refine=True, start=start)[0]

    cand, wcand = _golden(fun, a, b, FREQUENCY_ITERATIONS)
    better = cand > best
    return np.where(better, cand, best), np.where(better, wcand, wbest)


# ----------------------------------------------------------------------------
# classical margins
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class ClassicalMargins:
    """Classical loop-at-a-time margins at the plant input, (N, m) arrays.

    gain_db : upper gain margin in dB (inf when the phase never reaches -180 deg
        with |L| < 1). gain_low_db : lower gain margin in dB (-inf when none).
    gain_frequency : phase-crossover frequency of ``gain_db`` (nan when none).
    phase_deg : phase margin in degrees, the smallest over all gain crossings
        (inf when |L| never crosses 1). phase_frequency : gain-crossover frequency.
    """

    gain_db: np.ndarray
    gain_low_db: np.ndarray
    gain_frequency: np.ndarray
    phase_deg: np.ndarray
    phase_frequency: np.ndarray


def classical_margins(G, K, at: str = "input", omega=None,
                      _responder: FrequencyResponder | None = None) -> ClassicalMargins:
    """Classical gain and phase margins of each channel, the other loops closed.

    The scalar loop seen at channel i is ``L_i = 1 / S_ii - 1`` in negative
    feedback form (``S = (I - K G)^-1`` at the input). Phase crossovers solve
    ``Im L_i(jw) = 0`` with ``Re L_i < 0``: the gain margin there is
    ``1 / |L_i|`` (upper when above 1, lower when below 1). Gain crossovers solve
    ``|L_i(jw)| = 1``: the phase margin is ``180 - |angle L_i|`` degrees. Sign
    changes are found on the frequency grid and refined for all crossings of
    all points at once by a bracketing root search (:func:`_bisect_many`).
    """
    R = _responder
    if R is None:
        A, B, C, D = loop_sensitivity(G, K, at)
        R = FrequencyResponder(A, B, C, D)
    N, m = R.N, R.B.shape[2]
    stable = stability_from_eigenvalues(R.A, R.eigenvalues).stable
    w = default_frequencies(R.eigenvalues, count=240) if omega is None else np.asarray(omega, float)
    if w.ndim == 1:
        w = np.broadcast_to(w, (N, w.size))
    w = np.where(w > 0, w, np.nan)
    H = R(np.nan_to_num(w, nan=1.0))
    shape = (N, m)
    gm = np.full(shape, np.inf)
    gml = np.full(shape, -np.inf)
    gmf = np.full(shape, np.nan)
    pm = np.full(shape, np.inf)
    pmf = np.full(shape, np.nan)
    with np.errstate(all="ignore"):
        L = 1.0 / H[..., np.arange(m), np.arange(m)] - 1.0  # (N, K, m)
    fin = np.isfinite(L) & np.isfinite(w)[:, :, None]

    def Lat(q, i, x):  # L_i at points q, frequencies x (vectors of equal length)
        with np.errstate(all="ignore"):
            h = R(np.asarray(x, float)[:, None], index=q)[:, 0]
            return 1.0 / h[np.arange(len(q)), i, i] - 1.0

    # Gain crossovers may lie below the lowest grid frequency (|L(0)| just above
    # 1), so their scan starts at w = 0; phase crossings at w = 0 are handled
    # with the ends below (Im L(0) = 0 for every real loop).
    with np.errstate(all="ignore"):
        L0 = 1.0 / R(np.zeros(1))[:, 0][:, np.arange(m), np.arange(m)] - 1.0  # (N, m)
    at_zero = np.concatenate([np.ones((N, 1), bool), ~(w > 0)], axis=1)  # w = 0 (or unset)
    w_gain = np.where(at_zero, 0.0, np.concatenate([np.zeros((N, 1)), w], axis=1))
    L_gain = np.where(at_zero[:, :, None], L0[:, None, :],
                      np.concatenate([L0[:, None, :], L], axis=1))
    fin_gain = np.isfinite(L_gain)
    # phase crossovers (Im L = 0, Re L < 0) and gain crossovers (|L| = 1), all at once
    for what, f, ww, LL, ff in (("phase", lambda z: z.imag, w, L, fin),
                                ("gain", lambda z: np.abs(z) - 1.0, w_gain, L_gain, fin_gain)):
        q, j, i = _brackets(f(LL), ff)
        roots = _bisect_many(lambda x, q=q, i=i, f=f: f(Lat(q, i, x)),
                             ww[q, j], ww[q, j + 1]) if q.size else np.zeros(0)
        Lx = Lat(q, i, roots) if q.size else np.zeros(0, complex)
        for qq, ii, x, z in zip(q, i, roots, Lx, strict=True):
            if not stable[qq]:
                continue
            if what == "phase":
                _phase_crossing(qq, ii, x, z, gm, gml, gmf)
            else:
                ph = 180.0 - abs(np.degrees(np.angle(z)))
                if ph < pm[qq, ii]:
                    pm[qq, ii], pmf[qq, ii] = ph, x
    # phase crossings at w = 0 and w = infinity (L real there), all points at once
    with np.errstate(all="ignore"):
        h0 = R(np.zeros(1))[:, 0]
        ends = [1.0 / h0[:, np.arange(m), np.arange(m)] - 1.0,
                1.0 / R.D[:, np.arange(m), np.arange(m)].astype(complex) - 1.0]
    for z in ends:
        for qq, ii in zip(*np.nonzero(np.isfinite(z) & (np.abs(z.imag) < 1e-12)
                                      & stable[:, None]), strict=True):
            _phase_crossing(qq, ii, np.nan, z[qq, ii], gm, gml, gmf)
    unstable = ~stable
    gm[unstable], gml[unstable], pm[unstable] = np.nan, np.nan, np.nan
    del shape
    return ClassicalMargins(gm, gml, gmf, pm, pmf)


def _phase_crossing(q, i, x, z, gm, gml, gmf) -> None:
    """Record a phase crossover with loop value z (real, negative) as upper or lower margin."""
    if not np.isfinite(z) or np.real(z) >= 0:
        return
    g = -20.0 * np.log10(abs(z))
    if 0 < g < gm[q, i]:
        gm[q, i], gmf[q, i] = g, x
    elif g < 0 and g > gml[q, i]:
        gml[q, i] = g


def _brackets(values: np.ndarray, finite: np.ndarray):
    """Sign changes along axis 1 of (N, K, m) samples: (point, grid index, channel) arrays.

    A sample that is exactly zero is bracketed by its own interval and its left
    neighbour's, so it is found (twice at most; duplicates do not change a margin).
    """
    sg = np.sign(np.where(finite, values, np.nan))
    hit = (sg[:, :-1] * sg[:, 1:] <= 0) & finite[:, :-1] & finite[:, 1:]
    hit &= ~((sg[:, :-1] == 0) & (sg[:, 1:] == 0))
    q, j, i = np.nonzero(hit)
    return q, j, i


def _bisect_many(fun, a: np.ndarray, b: np.ndarray, iterations: int = 100) -> np.ndarray:
    """Roots of many scalar functions at once on brackets [a, b] with a sign change.

    ``fun(x)`` evaluates all functions at the vector x (one call per step). The
    Illinois variant of false position (Dowell and Jarratt 1971), with a
    bisection step every fourth iteration as a safeguard, run until every
    bracket is 1e-13 relative wide. This is the vectorized stand-in for one
    ``scipy.optimize.brentq`` call per root (same bracketing guarantee).
    """
    a = np.array(a, float)
    b = np.array(b, float)
    fa, fb = fun(a), fun(b)  # working values (halved by the Illinois rule)
    ta, tb = np.abs(fa), np.abs(fb)  # true |f| at the ends
    last = np.zeros(a.shape, dtype=int)
    for k in range(iterations):
        if np.all(np.abs(b - a) <= 1e-13 * np.maximum(np.abs(a), np.abs(b))):
            break
        with np.errstate(all="ignore"):
            x = (a * fb - b * fa) / (fb - fa)
        bad = ~np.isfinite(x) | (x <= np.minimum(a, b)) | (x >= np.maximum(a, b))
        if k % 4 == 3:
            bad[:] = True
        x = np.where(bad, 0.5 * (a + b), x)
        fx = fun(x)
        keep_b = np.sign(fx) == np.sign(fa)  # root in [x, b]: x replaces a
        a, fa, ta = (np.where(keep_b, x, a), np.where(keep_b, fx, fa),
                     np.where(keep_b, np.abs(fx), ta))
        b, fb, tb = (np.where(keep_b, b, x), np.where(keep_b, fb, fx),
                     np.where(keep_b, tb, np.abs(fx)))
        fb = np.where(keep_b & (last == 1), 0.5 * fb, fb)  # b kept twice: halve f(b)
        fa = np.where(~keep_b & (last == -1), 0.5 * fa, fa)  # a kept twice: halve f(a)
        last = np.where(keep_b, 1, -1)
    return np.where(ta <= tb, a, b)
