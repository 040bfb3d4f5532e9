"""Stabilizing solutions of (possibly indefinite) algebraic Riccati equations.

Sign convention used throughout the package::

    A' X + X A + X R X + Q = 0,        R = R', Q = Q' (both may be indefinite),

with Hamiltonian ``H = [A, R; -Q, -A']``. The stabilizing solution X makes
``A + R X`` Hurwitz; it exists iff H has no imaginary-axis eigenvalues and the
stable invariant subspace ``range [U1; U2]`` is complementary to
``range [0; I]`` (U1 invertible), and then ``X = U2 U1^-1`` (Laub 1979;
Zhou, Doyle and Glover 1996, section 13.1). For the H-infinity X Riccati,
``R = gamma^-2 B1 B1' - B2 B2'`` in the normalized case.

The solver computes an ordered real Schur form of H (stable eigenvalues first)
and never raises in the hot path: failure comes back as a reason string.

References
----------
(bibliographic details from memory)

A. J. Laub, "A Schur method for solving algebraic Riccati equations",
IEEE Trans. Automatic Control 24(6), 913-921, 1979. doi:10.1109/TAC.1979.1102178
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

__all__ = [
    "RiccatiResult",
    "solve_riccati",
    "ordered_schur",
    "stable_solution",
    "hamiltonian",
    "axis_distance",
    "AXIS_RTOL",
    "AXIS_ATOL",
    "RESIDUAL_RTOL",
]

# An eigenvalue lam of H counts as on the imaginary axis when
#     |Re lam| <= AXIS_RTOL |lam| + AXIS_ATOL ||H||.
# The relative part catches axis eigenvalues moved off the axis by rounding (a defective
# pair splits by about sqrt(eps) |lam|); the absolute part catches eigenvalues at the
# origin. A slow but genuine pole (a weight pole at 0.004 rad/s in a plant with
# ||H|| = 1e5, or an integrator moved to s = -1e-4) is not on the axis.
AXIS_RTOL = 1e-6
AXIS_ATOL = 1e-12
COND_MAX = 1e12  # condition number of U1 above this: no usable solution
RESIDUAL_RTOL = 1e-6  # relative residual above this: solution rejected
SCALING_EXP = 30  # symplectic scaling d within [2^-30, 2^30]


@dataclass(frozen=True)
class RiccatiResult:
    """Outcome of :func:`solve_riccati`.

    Attributes
    ----------
    X : (n, n) symmetric stabilizing solution, or None when it failed.
    reason : "" on success, else one line saying why (with the number).
    residual : relative residual ``||A'X + XA + XRX + Q|| / (||A'X|| + ||XRX|| + ||Q|| + 1)``.
    axis_margin : smallest ``|Re lam| / (AXIS_RTOL |lam| + AXIS_ATOL ||H||)`` over the
        eigenvalues lam of H (below 1: on the imaginary axis).
    cond_u1 : condition number of U1.
    eigenvalues : ascending eigenvalues of X (None on failure).
    balanced_eigenvalues : ascending eigenvalues of ``D X D``, the solution in the
        coordinates of the balanced Hamiltonian (same inertia as X, by Sylvester's law;
        its natural size is 1, so sign decisions are made on it).
    """

    X: np.ndarray | None
    reason: str
    residual: float = np.nan
    axis_margin: float = np.nan
    cond_u1: float = np.nan
    eigenvalues: np.ndarray | None = None
    balanced_eigenvalues: np.ndarray | None = None

    @property
    def ok(self) -> bool:
        return self.X is not None


def hamiltonian(A: np.ndarray, R: np.ndarray, Q: np.ndarray) -> np.ndarray:
    """The Hamiltonian ``[A, R; -Q, -A']`` of ``A'X + XA + XRX + Q = 0``."""
    n = A.shape[0]
    H = np.empty((2 * n, 2 * n))
    H[:n, :n] = A
    H[:n, n:] = R
    H[n:, :n] = -Q
    H[n:, n:] = -A.T
    return H


def axis_distance(eigenvalues: np.ndarray, hnorm: float) -> np.ndarray:
    """``|Re lam| / (AXIS_RTOL |lam| + AXIS_ATOL ||H||)``; at most 1 means on the axis."""
    lam = np.asarray(eigenvalues)
    return np.abs(lam.real) / (AXIS_RTOL * np.abs(lam) + AXIS_ATOL * hnorm + 1e-300)


def _fro(M: np.ndarray) -> float:
    return float(np.sqrt(np.vdot(M, M).real))


def relative_residual(A: np.ndarray, R: np.ndarray, Q: np.ndarray, X: np.ndarray) -> float:
    """Relative residual of ``A'X + XA + XRX + Q = 0`` (Frobenius norms).

    ``||A'X + XA + XRX + Q|| / (||Q|| + 2||A|| ||X|| + ||R|| ||X||^2 + f)`` with the floor
    ``f = 1e-8 (2||A|| + ||R|| + ||Q||)``; the floor keeps the measure meaningful when X
    and Q are both (near) zero.
    """
    AX = A.T @ X
    res = AX + AX.T + X @ R @ X + Q
    na, nr, nq, nx = _fro(A), _fro(R), _fro(Q), _fro(X)
    denom = nq + 2 * na * nx + nr * nx * nx + 1e-8 * (2 * na + nr + nq) + 1e-300
    return _fro(res) / denom


def ordered_schur(H: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]:
    """Real Schur form ``H = Z T Z'`` with the eigenvalues of negative real part leading.

    Calls LAPACK directly: ``dgees`` without sorting, then ``dtrsen`` with the
    selection ``Re lambda < 0``. This is what ``dgees`` does internally when asked
    to sort (its selection callback runs in Python once per eigenvalue), so the
    result is the same, without the callbacks and the workspace query of each call.

    Returns
    -------
    T, Z : the reordered Schur form and Schur vectors.
    wr, wi : real and imaginary parts of the eigenvalues, in the order of T.
    status : number of selected (stable) eigenvalues, -1 when the factorization did
        not converge, -2 when the reordering failed (eigenvalues too close to swap).
    """
    m = H.shape[0]
    lwork = _LWORK.get(m)
    if lwork is None:
        work = _GEES(_no_select, H, compute_v=1, sort_t=0, lwork=-1)[5]
        lwork = _LWORK[m] = max(int(work[0].real), 3 * m, 1)
    T, _sdim, wr, wi, Z, _work, info = _GEES(_no_select, H, compute_v=1, sort_t=0, lwork=lwork)
    if info != 0:
        return T, Z, wr, wi, -1
    select = wr < 0.0
    k = int(np.count_nonzero(select))
    if 0 < k < m and not select[:k].all():
        T, Z, wr, wi, _k, _s, _sep, info = _TRSEN(
            select.astype(np.int32), T, Z, job="N", overwrite_t=1, overwrite_q=1
        )
        if info != 0:
            return T, Z, wr, wi, -2
    return T, Z, wr, wi, k


def _no_select(_re: float, _im: float) -> int:  # dgees needs a callback even when not sorting
    return 0


_GEES = sla.lapack.dgees
_TRSEN = sla.lapack.dtrsen
_LWORK: dict[int, int] = {}


def stable_solution(H: np.ndarray, n: int, hnorm: float):
    """Stable-subspace solution ``X = U2 U1^-1`` of the Hamiltonian H (2n x 2n).

    The shared core of :func:`solve_riccati` and of the quick feasibility tests of
    :mod:`schedule.hinf`: ordered real Schur form, imaginary-axis test, the solve for X
    and the exact condition number of U1 (from the eigenvalues of X). No residual check.

    Returns
    -------
    (X, ev, code, value, margin, axis): X symmetric and its ascending eigenvalues ``ev``
    on success (``code`` 0, ``value`` the condition number of U1); ``margin`` the axis
    margin ``min |Re lambda| / (AXIS_RTOL |lambda| + AXIS_ATOL hnorm)``; ``axis`` a signed
    measure of the distance to an imaginary-axis collision (see Notes); otherwise X is None and
    ``code`` says why: 1 Hamiltonian eigenvalue on the imaginary axis (``value`` the
    axis margin, with ``ev`` = ``(|lambda|, |Re lambda|)`` of the closest one),
    2 ordering failed, 3 U1 singular, 4 U1 ill-conditioned (``value`` its condition).

    Notes
    -----
    When a parameter of H moves the eigenvalues onto the imaginary axis, a pair
    ``lambda = j w0 +- a`` (a real) meets at ``j w0`` and splits along the axis as
    ``j (w0 +- delta)``; to first order ``a^2`` and ``delta^2`` are linear in the
    parameter with opposite signs. ``axis`` is ``-min (Re lambda)^2`` when no eigenvalue
    is on the axis and ``+delta^2`` (half the smallest gap between axis eigenvalues,
    squared) when some are, so it passes through zero at the collision; nan when
    fewer than two eigenvalues are on the axis.
    """
    _T, Z, wr, wi, k = ordered_schur(H)
    if k < 0:
        return None, None, 2, np.nan, np.nan, np.nan
    mod = np.hypot(wr, wi)
    ratio = np.abs(wr) / (AXIS_RTOL * mod + (AXIS_ATOL * hnorm + 1e-300))
    j = int(ratio.argmin())
    margin = float(ratio[j])
    if margin <= 1.0 or k != n:
        on = np.sort(wi[ratio <= 1.0])
        axis = 0.25 * float(np.diff(on).min()) ** 2 if on.size > 1 else np.nan
        return None, (float(mod[j]), float(abs(wr[j]))), 1, margin, margin, axis
    axis = -float((wr * wr).min())
    try:
        X = np.linalg.solve(Z[:n, :n].T, Z[n:, :n].T)  # X' = U1'^-1 U2'; X = U2 U1^-1
    except np.linalg.LinAlgError:
        return None, None, 3, np.inf, margin, axis
    X = 0.5 * (X + X.T)
    # [U1; U2] has orthonormal columns and U2 = X U1, so U1'U1 = (I + X^2)^-1: the
    # singular values of U1 are 1 / sqrt(1 + lambda_i(X)^2), which gives cond(U1) exactly.
    ev = np.linalg.eigvalsh(X)
    lam2 = ev * ev
    cond = float(np.sqrt((1.0 + lam2.max()) / (1.0 + lam2.min())))
    if not cond <= COND_MAX:
        return None, ev, 4, cond, margin, axis
    return X, ev, 0, cond, margin, axis


def solve_riccati(A: np.ndarray, R: np.ndarray, Q: np.ndarray) -> RiccatiResult:
    """Stabilizing solution of ``A'X + XA + XRX + Q = 0`` by ordered real Schur.

    Parameters
    ----------
    A : (n, n) real matrix.
    R, Q : (n, n) real symmetric matrices (either may be indefinite).

    Returns
    -------
    RiccatiResult
        with ``X`` (symmetric, ``A + R X`` Hurwitz) or ``X=None`` and a reason:
        Hamiltonian eigenvalue on the imaginary axis (smallest ``|Re|``
        relative to ``||H||``), ill-conditioned U1 (its condition number) or a
        residual too large (the relative residual).

    Notes
    -----
    The Hamiltonian is first balanced by a symplectic diagonal similarity
    ``diag(D, D^-1)`` (it keeps the Hamiltonian structure and the solution
    maps back as ``X = D^-1 Xs D^-1``), which reduces the spread of ``X``'s
    entries when the states have very different scales. The ordered Schur form
    comes from :func:`ordered_schur` (LAPACK ``dgees`` + ``dtrsen``, Laub 1979).

    Examples
    --------
    >>> import numpy as np
    >>> A = np.array([[0.0, 1.0], [-2.0, -0.5]]); R = -np.eye(2); Q = np.eye(2)
    >>> X = solve_riccati(A, R, Q).X
    >>> bool(np.allclose(A.T @ X + X @ A + X @ R @ X + Q, 0))
    True
    """
    n = A.shape[0]
    d = _symplectic_scaling(A, R, Q)
    scaled = d is not None
    if scaled:
        dd = d[:, None] * d[None, :]
        H = hamiltonian(A * (d[None, :] / d[:, None]), R / dd, Q * dd)  # D^-1 A D, .., D Q D
    else:
        H = hamiltonian(A, R, Q)
    hnorm = max(float(np.abs(H).sum(axis=0).max()), 1e-300)
    Xs, ev, code, value, margin, _axis = stable_solution(H, n, hnorm)
    if code == 2:
        return RiccatiResult(
            None, "Hamiltonian eigenvalues on the imaginary axis (ordering failed)"
        )
    if code == 1:
        return RiccatiResult(
            None,
            "Hamiltonian eigenvalue on the imaginary axis "
            f"(|lambda|={ev[0]:.3g}, |Re|={ev[1]:.2e}, ||H||={hnorm:.3g})",
            axis_margin=value,
        )
    if code == 3:
        return RiccatiResult(
            None,
            "U1 singular (condition number inf), no stabilizing solution",
            axis_margin=margin,
            cond_u1=np.inf,
        )
    if code == 4:
        return RiccatiResult(
            None,
            f"U1 ill-conditioned (condition number {value:.2e}), no usable stabilizing solution",
            axis_margin=margin,
            cond_u1=value,
        )
    cond = value
    evs = ev
    if scaled:
        X = Xs / dd  # D^-1 Xs D^-1
        ev = np.linalg.eigvalsh(X)
    else:
        X = Xs
    res = relative_residual(A, R, Q, X)
    if not np.isfinite(res) or res > RESIDUAL_RTOL:
        return RiccatiResult(
            None,
            f"Riccati residual too large (relative residual {res:.2e})",
            residual=res,
            axis_margin=margin,
            cond_u1=cond,
        )
    return RiccatiResult(X, "", residual=res, axis_margin=margin, cond_u1=cond, eigenvalues=ev,
                         balanced_eigenvalues=evs)


def _symplectic_scaling(A: np.ndarray, R: np.ndarray, Q: np.ndarray) -> np.ndarray | None:
    """Diagonal D (powers of 2) balancing the Hamiltonian, or None when D = I.

    Uses the structure-preserving similarity ``diag(D, D^-1)``: ``A -> D^-1 A D``,
    ``R -> D^-1 R D^-1``, ``Q -> D Q D``. Row i of Q scales with d_i^2 and of R with
    d_i^-2. With ``m_i = max(sqrt(||R_i|| ||Q_i||), ||A||)`` (1-norms), ``d_i^2 = ||R_i|| /
    m_i`` when ``||R_i|| >= ||Q_i||`` and ``m_i / ||Q_i||`` otherwise: the two blocks meet at
    ``sqrt(||R_i|| ||Q_i||)`` (``d_i = (||R_i|| / ||Q_i||)^(1/4)``) when that is above the
    size of A, and the larger block is brought down to the size of A otherwise (for
    example Q = 0 with a huge R, as in the one-block problem at small gamma, where the
    eigenvalues of H are those of A and -A'). Rows where both are (nearly) zero are left
    alone; d is limited to [2^-30, 2^30] and rounded to powers of two so the scaling adds
    no rounding error.
    """
    qn = np.abs(Q).sum(axis=1)
    rn = np.abs(R).sum(axis=1)
    an = float(np.abs(A).sum(axis=1).max())
    tiny = 1e-8 * max(an, float(qn.max()), float(rn.max()))
    ok = (qn > tiny) | (rn > tiny)
    if not ok.any() or tiny == 0.0:
        return None
    with np.errstate(divide="ignore", invalid="ignore"):
        m = np.maximum(np.sqrt(rn * qn), an)
        m = np.where(m > 0, m, np.maximum(rn, qn))
        d2 = np.where(rn >= qn, rn / m, m / qn)
    e = np.zeros(A.shape[0])
    e[ok] = np.clip(np.rint(0.5 * np.log2(d2[ok])), -SCALING_EXP, SCALING_EXP)
    if not e.any():
        return None
    return np.exp2(e)
