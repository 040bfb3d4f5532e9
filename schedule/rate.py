"""How fast may the scheduling variables move? A frozen-Lyapunov rate bound, and simulation.

Frozen-point analysis (Desoer 1969; Shamma and Athans 1990, 1991) checks the
loop at fixed values of the scheduling variables p. When p moves, stability of
every frozen loop is not enough; a sufficient condition follows from one
Lyapunov function per frozen point. Let ``A(p)`` be the closed-loop state
matrix, Hurwitz for every p, and ``P(p)`` the solution of

    A(p)' P(p) + P(p) A(p) = -I.                                   (1)

Along a trajectory ``p(t)`` take ``V = x' P(p(t)) x``. Then

    dV/dt = -|x|^2 + x' (sum_j pdot_j dP/dp_j) x
          <= -(1 - sum_j |pdot_j| ||dP/dp_j||_2) |x|^2,

with ``||.||_2`` the spectral norm (largest |eigenvalue| of the symmetric
dP/dp_j). So the loop is exponentially stable whenever

    sum_j |pdot_j| max_p ||dP/dp_j(p)||_2 < 1.                     (2)

With only p_j moving: ``|pdot_j| < 1 / max_p ||dP/dp_j||_2`` (the "single"
bound); with all moving at once and an equal share each, ``|pdot_j| < 1 / (d
max_p ||dP/dp_j||_2)`` (the "joint" bound). The derivative of (1) along p_j is
again a Lyapunov equation,

    A' dP + dP A = -(dA' P + P dA),   dA = dA/dp_j.                 (3)

The bound depends on the state coordinates: any constant change of
coordinates x = T z gives another valid Lyapunov function V = z' P~(p) z with
P~ from (1) for T^-1 A(p) T. Badly scaled states (metres next to newtons)
make ||dP/dp|| huge and the bound useless, so :func:`rate_bounds` first
balances the closed loop with one constant diagonal T (Osborne/Parlett-Reinsch
balancing of the mean |A(p)| over the sample, scipy.linalg.matrix_balance)
and states the bound in those coordinates.

The max over p is taken over the sample of points given (check points and
grid points): it is a sampled maximum, not a proof over the whole envelope.
The bound is sufficient, not necessary, and often conservative.

References
----------
C. A. Desoer, "Slowly varying system xdot = A(t) x", IEEE Trans. Automatic
Control 14(6), 1969, doi:10.1109/TAC.1969.1099336.
J. S. Shamma, M. Athans, "Analysis of gain scheduled control for nonlinear
plants", IEEE Trans. Automatic Control 35(8), 1990; "Guaranteed properties of
gain scheduled control for linear parameter-varying plants", Automatica 27(3),
1991.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.linalg import matrix_balance, solve_continuous_lyapunov

from .errors import InputError, NumericalError
from .norms import stability

__all__ = [
    "RateBound",
    "lyapunov_certificates",
    "lyapunov_sensitivity",
    "rate_bounds",
    "simulate_varying",
    "trajectory_function",
]

RESIDUAL_TOL = 1e-8


def _stack(A, name: str) -> np.ndarray:
    a = np.asarray(A, dtype=float)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3 or a.shape[1] != a.shape[2]:
        raise InputError(f"{name} has shape {a.shape}; pass square (n, n) or (N, n, n) arrays")
    if not np.all(np.isfinite(a)):
        raise NumericalError(f"{name} holds NaN or inf entries; check the plant and controller")
    return a


def _solve(A: np.ndarray, Q: np.ndarray, what: str, k: int) -> np.ndarray:
    """Solve ``A' X + X A = Q`` (Bartels-Stewart via scipy) and check the residual."""
    X = solve_continuous_lyapunov(A.T, Q)
    X = 0.5 * (X + X.T)
    res = np.linalg.norm(A.T @ X + X @ A - Q)
    scale = 2.0 * np.linalg.norm(A) * np.linalg.norm(X) + np.linalg.norm(Q)
    if not np.isfinite(res) or res > RESIDUAL_TOL * max(scale, 1e-300):
        raise NumericalError(f"{what} at point {k}: Lyapunov residual {res:.2e} (relative "
                             f"{res / max(scale, 1e-300):.1e}); the closed loop is near the "
                             "stability boundary - refine the grid or lower the gamma")
    return X


def lyapunov_certificates(A) -> np.ndarray:
    """``P`` with ``A' P + P A = -I`` at each point, eq. (1); (N, n, n).

    Raises
    ------
    NumericalError
        If a frozen loop is not stable by the package's predicate
        (:func:`schedule.norms.stability`; no positive definite P exists) or the
        residual check fails; the message names the point.
    """
    A = _stack(A, "closed-loop A")
    out = np.empty_like(A)
    n = A.shape[1]
    st = stability(A)  # the package's one stability predicate
    for k in range(A.shape[0]):
        if not st.stable[k]:
            raise NumericalError(f"{st.reason(k, f'frozen closed loop at point {k}')}; no rate "
                                 "bound exists - fix the design there first")
        out[k] = _solve(A[k], -np.eye(n), "P", k)
    return out


def lyapunov_sensitivity(A, P, dA) -> np.ndarray:
    """``dP`` from eq. (3): ``A' dP + dP A = -(dA' P + P dA)`` at each point; (N, n, n)."""
    A = _stack(A, "closed-loop A")
    P = _stack(P, "P")
    dA = _stack(dA, "dA")
    out = np.empty_like(A)
    for k in range(A.shape[0]):
        out[k] = _solve(A[k], -(dA[k].T @ P[k] + P[k] @ dA[k]), "dP", k)
    return out


@dataclass(frozen=True)
class RateBound:
    """Sufficient bounds on the scheduling rates, per variable.

    Attributes
    ----------
    names : variable names (length d).
    dP_norm : (N, d) spectral norms ``||dP/dp_j||_2`` at the sample points.
    worst : (d,) their maximum over the sample.
    worst_index : (d,) index of the sample point where it occurs.
    single : (d,) ``1 / worst`` - the bound on |dp_j/dt| when only p_j moves.
    joint : (d,) ``1 / (d * worst)`` - the bound when all move at once.
    """

    names: tuple[str, ...]
    dP_norm: np.ndarray
    worst: np.ndarray
    worst_index: np.ndarray
    single: np.ndarray
    joint: np.ndarray


def balancing_scaling(A) -> np.ndarray:
    """One constant diagonal scaling t (length n) for a stack of state matrices.

    ``diag(1/t) A diag(t)`` is balanced (rows and columns of similar norm) for the
    mean of ``|A|`` over the stack (Parlett and Reinsch 1969, via
    scipy.linalg.matrix_balance without permutation).
    """
    A = _stack(A, "closed-loop A")
    if A.shape[1] == 0:
        return np.ones(0)
    _, (scale, _) = matrix_balance(np.mean(np.abs(A), axis=0), permute=False, separate=True)
    return np.asarray(scale, dtype=float)


def rate_bounds(A, dA, names: Sequence[str] | None = None, balance: bool = True) -> RateBound:
    """Rate bounds (2) from closed-loop matrices and their derivatives.

    Parameters
    ----------
    A : (N, n, n) closed-loop state matrices at N sample points, each Hurwitz.
    dA : (N, d, n, n) derivatives dA/dp_j at those points (per unit of p_j).
    names : optional variable names.
    balance : first change to the balanced coordinates of
        :func:`balancing_scaling` (one constant T for all points, so the bound
        stays valid); False keeps the given coordinates.

    Returns
    -------
    RateBound
    """
    A = _stack(A, "closed-loop A")
    dA = np.asarray(dA, dtype=float)
    if dA.ndim != 4 or dA.shape[0] != A.shape[0] or dA.shape[2:] != A.shape[1:]:
        raise InputError(f"dA has shape {dA.shape}; expected (N, d, n, n) matching A "
                         f"{A.shape}")
    N, d = dA.shape[:2]
    if balance:
        t = balancing_scaling(A)
        A = A * t[None, None, :] / t[None, :, None]
        dA = dA * t[None, None, None, :] / t[None, None, :, None]
    P = lyapunov_certificates(A)
    norms = np.empty((N, d))
    for j in range(d):
        dP = lyapunov_sensitivity(A, P, dA[:, j])
        norms[:, j] = np.max(np.abs(np.linalg.eigvalsh(dP)), axis=1)
    worst_index = np.argmax(norms, axis=0)
    worst = norms[worst_index, np.arange(d)]
    with np.errstate(divide="ignore"):
        single = 1.0 / worst
        joint = 1.0 / (d * worst)
    names = tuple(names) if names is not None else tuple(f"p{j + 1}" for j in range(d))
    return RateBound(names, norms, worst, worst_index, single, joint)


def trajectory_function(times, values) -> Callable[[float], np.ndarray]:
    """A piecewise-linear scheduling trajectory ``p(t)`` from a table (held at the ends)."""
    t = np.asarray(times, dtype=float).reshape(-1)
    v = np.asarray(values, dtype=float)
    if v.ndim == 1:
        v = v[:, None]
    if t.size < 2 or v.shape[0] != t.size or np.any(np.diff(t) <= 0):
        raise InputError("trajectory needs at least two strictly increasing times and one row "
                         "of scheduling values per time; fix the trajectory table")

    def p(time: float) -> np.ndarray:
        return np.array([np.interp(time, t, v[:, j]) for j in range(v.shape[1])])

    return p


def simulate_varying(state_matrix: Callable[[np.ndarray], np.ndarray],
                     trajectory: Callable[[float], np.ndarray], x0, t_final: float,
                     samples: int = 400, max_step: float = np.inf):
    """Simulate ``xdot = A(p(t)) x`` with frozen linearizations at each instant (solve_ivp).

    Parameters
    ----------
    state_matrix : p -> closed-loop A at p (for the scheduled loop: the plant's
        linearization at p closed with the interpolated controller at p).
    trajectory : t -> p(t), for example :func:`trajectory_function`.
    x0 : initial state; t_final : end time (s); samples : output times.

    Returns
    -------
    (t, x) : (samples,), (samples, n).

    Raises
    ------
    NumericalError
        If the integrator fails (the message gives scipy's reason).
    """
    x0 = np.asarray(x0, dtype=float).reshape(-1)
    if not t_final > 0:
        raise InputError(f"simulation end time {t_final!r} must be positive")
    t_eval = np.linspace(0.0, float(t_final), int(samples))

    def rhs(t, x):
        return state_matrix(trajectory(t)) @ x

    sol = solve_ivp(rhs, (0.0, float(t_final)), x0, t_eval=t_eval, method="RK45",
                    rtol=1e-7, atol=1e-10, max_step=max_step)
    if not sol.success:
        raise NumericalError(f"time simulation failed at t = {sol.t[-1]:.4g} s: {sol.message}; "
                             "shorten the horizon or check the trajectory")
    return sol.t, sol.y.T
