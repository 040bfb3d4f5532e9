"""The parameter-dependent Lyapunov LMIs of a rate-bounded LPV loop: assemble, solve, verify.

For the loop ``x' = A(p) x + B(p) w``, ``z = C(p) x + D(p) w`` with
``|dp_j/dt| <= nu_j`` and ``P(p) = sum_k f_k(p) P_k`` (Becker and Packard
1994; Wu, Yang, Packard and Becker 1996; Apkarian and Adams 1998), the LMI at
a point p and a vertex v of the rate box (``v_j = +-nu_j``) is

    L(p, v) = [ A'P + P A + sum_j v_j dP/dp_j   P B      C'     ]
              [ B'P                            -gamma I  D'     ]  < 0     (gain)
              [ C                               D       -gamma I ]

and its top-left block alone for stability. The LMI is affine in the rate,
so holding it at the vertices of the rate box holds it for every rate inside
(Apkarian and Adams 1998). If ``L(p, v) < 0`` for every p of the envelope and
every vertex, ``V = x' P(p) x`` proves exponential stability (and induced
L2 gain below gamma) for every trajectory of p inside the envelope whose
rates stay in the box.

This module imposes ``-L(p_i, v) - mu I >= 0`` at given points (a margin mu,
maximized for stability) as positive semidefinite cones of a conic program in
the free entries of the ``P_k`` (and gamma), solves it with Clarabel (Goulart and Chen 2024) through
its own API, or through cvxpy (Diamond and Boyd 2016) with any installed
conic solver for a second opinion, and evaluates ``L`` at any other points
(:func:`lmi_worst`): the a-posteriori check that the driver
(:mod:`schedule.analysis.lpv_certificate`) uses to certify, since an LMI holds
only where it is imposed.

Matrices are symmetric and enter the cones as "svec" vectors: the upper
triangle by columns, off-diagonal entries times sqrt(2) (Clarabel's
convention; ``<svec X, svec Y> = trace(X Y)``).

References
----------
G. Becker, A. Packard, "Robust performance of linear parametrically varying
systems using parametrically-dependent linear feedback", Systems & Control
Letters 23(3), 1994, doi:10.1016/0167-6911(94)90006-X.
F. Wu, X. H. Yang, A. Packard, G. Becker, "Induced L2-norm control for LPV
systems with bounded parameter variation rates", Int. J. Robust Nonlinear
Control 6(9-10), 1996.
P. Apkarian, R. J. Adams, "Advanced gain-scheduling techniques for uncertain
systems", IEEE Trans. Control Systems Technology 6(1), 1998,
doi:10.1109/87.654874.
P. J. Goulart, Y. Chen, "Clarabel: an interior-point solver for conic
programs with quadratic objectives", arXiv:2405.12762, 2024.
S. Boyd, L. El Ghaoui, E. Feron, V. Balakrishnan, "Linear matrix
inequalities in system and control theory", SIAM, 1994 (the reduced form of
the gain LMI).
S. Diamond, S. Boyd, "CVXPY: a Python-embedded modeling language for convex
optimization", J. Machine Learning Research 17(83), 2016.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..errors import InputError, NumericalError

__all__ = ["LmiSolution", "svec", "smat", "solve_lmi", "lmi_worst", "lmi_blocks", "largest_scale",
           "SOLVERS"]

#: Solver names: "clarabel" (its own API, the default) or "cvxpy:<SOLVER>" (for example
#: "cvxpy:SCS", "cvxpy:CLARABEL").
SOLVERS = ("clarabel", "cvxpy:CLARABEL", "cvxpy:SCS")
#: statuses of a finished solve (Clarabel's and cvxpy's words)
SOLVED = ("Solved", "AlmostSolved", "optimal", "optimal_inaccurate")


# ----------------------------------------------------------------------------- svec
@lru_cache(maxsize=32)
def _svec_matrix(m: int) -> np.ndarray:
    """U (m(m+1)/2, m*m): svec(X) = U vec(X) for symmetric X (vec by columns), U U' = I."""
    rows = [(r, c) for c in range(m) for r in range(c + 1)]
    U = np.zeros((len(rows), m * m))
    s = 1.0 / np.sqrt(2.0)
    for i, (r, c) in enumerate(rows):
        if r == c:
            U[i, r + c * m] = 1.0
        else:
            U[i, r + c * m] = U[i, c + r * m] = s
    U.setflags(write=False)
    return U


def _vec(X: np.ndarray) -> np.ndarray:
    m = X.shape[-1]
    return np.swapaxes(X, -1, -2).reshape(X.shape[:-2] + (m * m,))


def svec(X) -> np.ndarray:
    """svec of symmetric matrices (..., m, m) -> (..., m(m+1)/2)."""
    X = np.asarray(X, dtype=float)
    return _vec(X) @ _svec_matrix(X.shape[-1]).T


def smat(y, m: int) -> np.ndarray:
    """Inverse of :func:`svec`: (..., m(m+1)/2) -> symmetric (..., m, m)."""
    v = np.asarray(y, dtype=float) @ _svec_matrix(m)
    return np.swapaxes(v.reshape(v.shape[:-1] + (m, m)), -1, -2)


# ----------------------------------------------------------------------------- LMI maps
def _check_arrays(A, B, C, D, F, dF, vertices):
    A = np.asarray(A, dtype=float)
    N, n = A.shape[0], A.shape[1]
    B = np.zeros((N, n, 0)) if B is None else np.asarray(B, dtype=float)
    C = np.zeros((N, 0, n)) if C is None else np.asarray(C, dtype=float)
    D = np.zeros((N, C.shape[1], B.shape[2])) if D is None else np.asarray(D, dtype=float)
    F = np.asarray(F, dtype=float)
    dF = np.asarray(dF, dtype=float)
    vertices = np.asarray(vertices, dtype=float).reshape(-1, dF.shape[2] if dF.ndim == 3 else 0)
    if (A.ndim != 3 or A.shape[2] != n or B.shape[:2] != (N, n) or C.shape[0] != N
            or C.shape[2] != n or D.shape != (N, C.shape[1], B.shape[2])
            or F.shape[0] != N or dF.shape[:2] != F.shape or vertices.shape[1] != dF.shape[2]):
        raise InputError(f"LMI data of inconsistent shapes: A {A.shape}, B {B.shape}, C "
                         f"{C.shape}, D {D.shape}, F {F.shape}, dF {dF.shape}, vertices "
                         f"{vertices.shape}; pass stacks over the same points")
    for name, X in (("A", A), ("B", B), ("C", C), ("D", D), ("F", F), ("dF", dF),
                    ("vertices", vertices)):
        if not np.all(np.isfinite(X)):
            raise NumericalError(f"LMI data {name} holds NaN or inf; check the loop and the "
                                 "basis functions at the points")
    return A, B, C, D, F, dF, vertices


def lmi_blocks(A, B, C, D, F, dF, Pk, gamma, vertices) -> np.ndarray:
    """The LMI matrices L(p_i, v) of the module docstring, (N, V, m, m).

    ``gamma=None`` gives the stability block ``A'P + P A + sum_j v_j dP/dp_j`` only
    (m = n); otherwise the full gain block (m = n + nw + nz).
    """
    A, B, C, D, F, dF, vertices = _check_arrays(A, B, C, D, F, dF, vertices)
    Pk = np.asarray(Pk, dtype=float)
    P = np.einsum("ik,kab->iab", F, Pk)
    dP = np.einsum("ikj,kab->ijab", dF, Pk)
    At = np.swapaxes(A, 1, 2)
    base = At @ P + P @ A
    rate = np.einsum("vj,ijab->ivab", vertices, dP)
    Ls = base[:, None] + rate
    if gamma is None:
        return Ls
    N, V, n = Ls.shape[0], Ls.shape[1], Ls.shape[2]
    nw, nz = B.shape[2], C.shape[1]
    m = n + nw + nz
    out = np.zeros((N, V, m, m))
    out[:, :, :n, :n] = Ls
    PB = (P @ B)[:, None]
    out[:, :, :n, n:n + nw] = PB
    out[:, :, n:n + nw, :n] = np.swapaxes(PB, 2, 3)
    out[:, :, :n, n + nw:] = np.swapaxes(C, 1, 2)[:, None]
    out[:, :, n + nw:, :n] = C[:, None]
    out[:, :, n:n + nw, n + nw:] = np.swapaxes(D, 1, 2)[:, None]
    out[:, :, n + nw:, n:n + nw] = D[:, None]
    idx = np.arange(n, m)
    out[:, :, idx, idx] = -float(gamma)
    return out


def lmi_worst(A, B, C, D, F, dF, Pk, gamma, vertices, chunk: int = 256):
    """The a-posteriori check at points: LMI eigenvalues at every rate vertex.

    Returns
    -------
    (eig, scale, p_min, p_norm)
        ``eig`` (N, V): largest eigenvalue of L(p_i, v) per point and vertex;
        ``scale`` (N,): the size of the terms it is made of (``||A'P + PA|| +
        sum_j max|v_j| ||dP_j||``, for the gain plus ``||P B|| + ||C|| + ||D|| +
        gamma``), so that ``eig / scale`` is a relative, rounding-aware measure;
        ``p_min``, ``p_norm`` (N,): smallest and largest |eigenvalue| of P(p_i).
    """
    A, B, C, D, F, dF, vertices = _check_arrays(A, B, C, D, F, dF, vertices)
    Pk = np.asarray(Pk, dtype=float)
    N = A.shape[0]
    eig, scale = np.empty((N, vertices.shape[0])), np.empty(N)
    p_min, p_norm = np.empty(N), np.empty(N)
    rate = np.abs(vertices).max(axis=0)
    for a in range(0, N, chunk):
        sl = slice(a, a + chunk)
        L = lmi_blocks(A[sl], B[sl], C[sl], D[sl], F[sl], dF[sl], Pk, gamma, vertices)
        eig[sl] = np.linalg.eigvalsh(L)[..., -1]
        P = np.einsum("ik,kab->iab", F[sl], Pk)
        ev = np.linalg.eigvalsh(P)
        p_min[sl], p_norm[sl] = ev[:, 0], np.abs(ev).max(axis=1)
        dP = np.einsum("ikj,kab->ijab", dF[sl], Pk)
        rate_size = (np.abs(np.linalg.eigvalsh(dP)).max(axis=2) @ rate if dP.shape[1]
                     else 0.0)
        Asl = A[sl]
        sym = np.swapaxes(Asl, 1, 2) @ P + P @ Asl
        sz = np.abs(np.linalg.eigvalsh(sym)).max(axis=1) + rate_size
        if gamma is not None:
            sz = sz + _norm2(P @ B[sl]) + _norm2(C[sl]) + _norm2(D[sl]) + float(gamma)
        scale[sl] = sz
    return eig, scale, p_min, p_norm


def largest_scale(A, B, C, D, F, dF, Pk, gamma, vertices, chunk: int = 256) -> np.ndarray:
    """Per point, the largest c with ``L(p_i, c v) < 0`` for every given vertex v (N,).

    With ``L(p, c v) = L0 + c R_v`` (L0 the LMI at rest, negative definite where
    the frozen condition holds, ``R_v`` the rate term) the bound is the
    generalized eigenvalue ``c = 1 / lambda_max(R_v, -L0)`` (inf when
    ``lambda_max <= 0``), computed through the Cholesky factor of ``-L0``.
    Zero where ``L0`` itself is not negative definite.
    """
    A, B, C, D, F, dF, vertices = _check_arrays(A, B, C, D, F, dF, vertices)
    Pk = np.asarray(Pk, dtype=float)
    N, n = A.shape[0], A.shape[1]
    out = np.empty(N)
    zero = np.zeros((1, vertices.shape[1]))
    for a in range(0, N, chunk):
        sl = slice(a, a + chunk)
        L0 = lmi_blocks(A[sl], B[sl], C[sl], D[sl], F[sl], dF[sl], Pk, gamma, zero)[:, 0]
        dP = np.einsum("ikj,kab->ijab", dF[sl], Pk)
        R = np.einsum("vj,ijab->ivab", vertices, dP)  # (M, V, n, n)
        c = np.zeros(L0.shape[0])
        try:
            Lc = np.linalg.cholesky(-L0)
            ok = np.ones(L0.shape[0], dtype=bool)
        except np.linalg.LinAlgError:
            ev = np.linalg.eigvalsh(-L0)[:, 0]
            ok = ev > 0
            Lc = np.zeros_like(L0)
            if np.any(ok):
                Lc[ok] = np.linalg.cholesky(-L0[ok])
        if np.any(ok):
            Li = np.linalg.inv(Lc[ok])[:, :, :n]  # columns of the state block
            M = Li[:, None] @ R[ok] @ np.swapaxes(Li, 1, 2)[:, None]
            lam = np.linalg.eigvalsh(M)[..., -1].max(axis=1)
            with np.errstate(divide="ignore"):
                c[ok] = np.where(lam > 0, 1.0 / np.maximum(lam, 1e-300), np.inf)
        out[sl] = c
    return out


def _norm2(X: np.ndarray) -> np.ndarray:
    if X.shape[1] == 0 or X.shape[2] == 0:
        return np.zeros(X.shape[0])
    return np.linalg.norm(X, ord=2, axis=(1, 2))


# ----------------------------------------------------------------------------- the program
@dataclass(frozen=True)
class LmiSolution:
    """What the conic solver returned.

    Pk : (K, n, n) the coefficient matrices of P(p) (NaN when the solver gave none).
    gamma : the gain bound found (None for stability only).
    status : the solver's status text ("Solved", "AlmostSolved", "PrimalInfeasible"...).
    feasible : False when the solver proved the imposed LMIs infeasible.
    seconds, iterations : solver effort (assembly included).
    rows : conic rows of the program (its size).
    level : the optimal value: gamma (gain) or the margin t (stability; not
        positive means the imposed LMIs have no solution).
    """

    Pk: np.ndarray
    gamma: float | None
    status: str
    feasible: bool
    seconds: float
    iterations: int
    rows: int
    level: float = float("nan")


def _conic_data(A, B, C, D, F, dF, rates, gain: bool, margin: float, reduced: bool = True):
    """``min q'x  s.t.  b - M x in PSD x ... x PSD (x SOC)`` for the imposed LMIs.

    x = [svec(P_1); ...; svec(P_K); g or t]. Gain: one cone per point i,
    ``svec(-R(p_i, rates_i) - margin I)`` with R the reduced gain LMI of
    :func:`solve_lmi` (order n + nw), minimize g = gamma^2 (``reduced=False``: the full
    ``svec(-L(p_i, rates_i) - margin I)``, minimize gamma). Stability: cones
    ``svec(-L(p_i, rates_i) - t I)`` and the second-order cone
    ``||(svec P_1, ..., svec P_K)|| <= 1``, maximize t (the largest margin; the
    LMI is homogeneous in P, so a bound on P is all the normalization needed).
    Returns (q, M, b, PSD cone sizes, nsv, K, SOC size or 0).
    """
    from scipy import sparse

    N, n = A.shape[0], A.shape[1]
    K = F.shape[1]
    nw = B.shape[2] if gain else 0
    nz = C.shape[1] if gain and not reduced else 0
    m = n + nw + nz  # reduced: the z block is eliminated (Schur complement), see solve_lmi
    Un, Um = _svec_matrix(n), _svec_matrix(m)
    nsv, sm = Un.shape[0], Um.shape[0]
    Jx = np.zeros((n, m))
    Jx[:, :n] = np.eye(n)
    # linear map vec(P) -> vec(L) without the rate term, per point (see module docstring):
    # vec(Jx' A'P Jx) = (Jx' kron Jx'A') vecP, vec(Jx' P A Jx) = ((A Jx)' kron Jx') vecP,
    # vec(Jx' P B Jw) = ((B Jw)' kron Jx') vecP, vec(Jw' B'P Jx) = (Jx' kron Jw'B') vecP.
    AJ = A @ Jx  # (N, n, m)
    JA = np.swapaxes(AJ, 1, 2)  # Jx' A' (N, m, n)
    JxT = np.broadcast_to(Jx.T, (N, m, n))
    kron = _kron_batch(JxT, JA) + _kron_batch(JA, JxT)
    if gain and nw:
        Jw = np.zeros((nw, m))
        Jw[:, n:n + nw] = np.eye(nw)
        BJ = np.swapaxes(B @ Jw, 1, 2)  # (B Jw)' (N, m, n)
        kron = kron + _kron_batch(BJ, JxT) + _kron_batch(JxT, BJ)
    G = Um @ kron @ Un.T  # (N, sm, nsv)
    H = Um @ np.kron(Jx.T, Jx.T) @ Un.T  # (sm, nsv): the rate term's embedding
    c = np.einsum("ikj,ij->ik", dF, rates)  # (N, K)
    if gain and reduced:  # [C D]' [C D], the constant part of the reduced gain LMI
        CD = np.concatenate([C, D], axis=2)
        L0 = np.swapaxes(CD, 1, 2) @ CD
    elif gain:  # the full LMI: C and D off the diagonal, -gamma I in the w and z blocks
        L0 = np.zeros((N, m, m))
        L0[:, :n, n + nw:] = np.swapaxes(C, 1, 2)
        L0[:, n + nw:, :n] = C
        L0[:, n:n + nw, n + nw:] = np.swapaxes(D, 1, 2)
        L0[:, n + nw:, n:n + nw] = D
    if gain:
        E = np.zeros((m, m))
        E[n:, n:] = -np.eye(m - n)
        g_col = svec(E)
    nx = K * nsv + 1  # the P_k, then gamma (gain) or the margin t (stability)
    blk = F[:, None, :, None] * G[:, :, None, :] + c[:, None, :, None] * H[None, :, None, :]
    rows = blk.reshape(N * sm, K * nsv)  # (N sm, K nsv)
    q = np.zeros(nx)
    q[-1] = 1.0
    if gain:  # -R - margin I >= 0, R = ... - g (w block)
        b = (-svec(L0) - margin * svec(np.eye(m))).reshape(-1)
        rows = np.hstack([rows, np.tile(g_col, N)[:, None]])
        return q, sparse.csc_matrix(rows), b, [m] * N, nsv, K, 0
    # stability: maximize t subject to -L - t I >= 0 and ||(P_1, ..., P_K)||_F <= 1
    rows = np.hstack([rows, np.tile(svec(np.eye(m)), N)[:, None]])
    soc = sparse.hstack([sparse.vstack([sparse.csr_matrix((1, K * nsv)),
                                        -sparse.identity(K * nsv)]),
                         sparse.csr_matrix((K * nsv + 1, 1))])
    M = sparse.vstack([sparse.csr_matrix(rows), soc]).tocsc()
    b = np.zeros(N * sm + K * nsv + 1)
    b[N * sm] = 1.0
    return -q, M, b, [m] * N, nsv, K, K * nsv + 1


def _kron_batch(X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Batched Kronecker product: (N, a, b) x (N, c, d) -> (N, a c, b d)."""
    N, a, b = X.shape
    _, c, d = Y.shape
    return np.einsum("iab,icd->iacbd", X, Y).reshape(N, a * c, b * d)


def solve_lmi(A, F, dF, rates, B=None, C=None, D=None, gain: bool = False,
              margin: float = 1.0, solver: str = "clarabel", tolerance: float = 1e-6,
              max_iterations: int = 100, reduced: bool = True) -> LmiSolution:
    """Solve the imposed LMIs for P_k (and the smallest gamma).

    Stability (``gain=False``): the P(p) with the largest margin t,
    ``L(p_i, v_i) <= -t I`` at every given point and its vertex, among those with
    ``sum_k ||P_k||_F^2 <= 1`` (the LMI is homogeneous in P; the largest-margin
    solution is the most robust one between the points); the imposed LMIs have
    no solution when the solver finds ``t <= 0``. ``margin`` is not used.
    Gain: the smallest gamma, solved in the reduced form of the bounded real
    lemma (Boyd, El Ghaoui, Feron and Balakrishnan 1994, ch. 6, from memory): with
    ``Q = gamma P`` and ``g = gamma^2``, a Schur complement on the -gamma I
    block of the z outputs turns ``L(p, v) < 0`` into the equivalent

        R(p, v) = [ A'Q + Q A + sum_j v_j dQ/dp_j + C'C   Q B + C'D ]  < 0,
                  [ B'Q + D'C                            D'D - g I ]

    of order n + nw instead of n + nw + nz (cones of (n + nw)(n + nw + 1)/2
    rows instead of (n + nw + nz)(n + nw + nz + 1)/2: the solver's work per
    cone falls accordingly). It is imposed as ``R(p_i, v_i) <= -margin I``
    (the margin makes the solution strictly feasible, at the price of a
    slightly larger gamma), minimizing g; the result is returned in the terms
    of ``L``: ``gamma = sqrt(g)``, ``P_k = Q_k / gamma``, which the dense check
    (:func:`lmi_worst`) verifies in the full form.

    Parameters
    ----------
    A, B, C, D : (N, n, n), (N, n, nw), (N, nz, n), (N, nz, nw) the loop at N points.
    F, dF : (N, K), (N, K, d) basis values and derivatives at the points.
    rates : (N, d) the signed rate vertex v_i imposed at each point (a point with
        several vertices appears several times; zeros for frozen variables).
    solver : "clarabel" or "cvxpy:<NAME>" (see :data:`SOLVERS`).
    tolerance : the solver's relative gap and feasibility tolerance (the
        certificate never rests on it: :func:`lmi_worst` checks the answer).
    reduced : gain only: solve the reduced form (default); False: the full LMI
        ``L <= -margin I`` (slower; kept for comparisons).

    Returns
    -------
    LmiSolution
    """
    A, B, C, D, F, dF, _ = _check_arrays(A, B, C, D, F, dF, np.zeros((0, dF.shape[2])))
    rates = np.asarray(rates, dtype=float)
    if rates.shape != (A.shape[0], dF.shape[2]) or not np.all(np.isfinite(rates)):
        raise InputError(f"rates of shape {rates.shape} must be finite, (N, d) = "
                         f"{(A.shape[0], dF.shape[2])}: one signed rate vertex per point")
    if not gain:
        B, C, D = B[:, :, :0], C[:, :0, :], D[:, :0, :0]
    t0 = time.perf_counter()
    q, M, b, dims, nsv, K, soc = _conic_data(A, B, C, D, F, dF, rates, gain, margin,
                                             reduced)
    if solver == "clarabel":
        x, status, feasible, iters = _solve_clarabel(q, M, b, dims, soc, tolerance,
                                                     max_iterations)
    elif solver.startswith("cvxpy:"):
        x, status, feasible, iters = _solve_cvxpy(q, M, b, dims, soc, solver[6:], tolerance,
                                                  max_iterations)
    else:
        raise InputError(f"LMI solver {solver!r} is unknown; use one of {', '.join(SOLVERS)}")
    seconds = time.perf_counter() - t0
    n = A.shape[1]
    if x is None or not np.all(np.isfinite(x)):
        Pk = np.full((K, n, n), np.nan)
        gamma = None if not gain else float("nan")
        level = float("nan")
    else:
        Pk = smat(x[:K * nsv].reshape(K, nsv), n)
        gamma, level = None, float(x[-1])
        if gain and reduced:  # back from (Q, g) to (P, gamma) of the full LMI
            gamma = level = float(np.sqrt(max(x[-1], 1e-300)))
            Pk = Pk / gamma
        elif gain:
            gamma = level
    if not gain and not level > 0 and status in SOLVED:  # the largest margin is not
        feasible = False  # positive: no P exists at the imposed points
    return LmiSolution(Pk, gamma, status, feasible, seconds, iters, int(M.shape[0]), level)


def _solve_clarabel(q, M, b, dims, soc, tolerance, max_iterations):
    try:
        import clarabel
    except ImportError as exc:  # pragma: no cover - a runtime dependency
        raise InputError(f"the rate certificate needs clarabel ({exc}); pip install clarabel"
                         ) from None
    from scipy import sparse

    settings = clarabel.DefaultSettings()
    settings.verbose = False
    settings.max_iter = int(max_iterations)
    settings.tol_gap_abs = settings.tol_gap_rel = float(tolerance)
    settings.tol_feas = float(tolerance)
    settings.tol_ktratio = 1e-6
    cones = [clarabel.PSDTriangleConeT(int(m)) for m in dims]
    if soc:
        cones.append(clarabel.SecondOrderConeT(int(soc)))
    nx = q.size
    solver = clarabel.DefaultSolver(sparse.csc_matrix((nx, nx)), q, M, b, cones, settings)
    sol = solver.solve()
    status = str(sol.status)
    feasible = "PrimalInfeasible" not in status
    x = np.asarray(sol.x, dtype=float) if feasible else None
    return x, status, feasible, int(sol.iterations)


def _solve_cvxpy(q, M, b, dims, soc, name, tolerance, max_iterations):
    try:
        import cvxpy as cp
    except ImportError as exc:  # pragma: no cover - a runtime dependency
        raise InputError(f"solver 'cvxpy:{name}' needs cvxpy ({exc}); pip install cvxpy"
                         ) from None
    if name not in cp.installed_solvers():
        raise InputError(f"cvxpy has no solver {name!r} here; installed: "
                         f"{', '.join(cp.installed_solvers())}")
    x = cp.Variable(q.size)
    cons = []
    row = 0
    for m in dims:
        sm = m * (m + 1) // 2
        U = _svec_matrix(m)
        s = b[row:row + sm] - M[row:row + sm] @ x
        X = cp.reshape(U.T @ s, (m, m), order="F")
        cons.append(0.5 * (X + X.T) >> 0)
        row += sm
    if soc:
        s = b[row:row + soc] - M[row:row + soc] @ x
        cons.append(cp.SOC(s[0], s[1:]))
    prob = cp.Problem(cp.Minimize(q @ x), cons)
    kw = ({"max_iters": int(max_iterations) * 100, "eps_abs": float(tolerance),
           "eps_rel": float(tolerance)} if name == "SCS" else {})
    try:
        prob.solve(solver=name, **kw)
    except cp.error.SolverError as exc:
        return None, f"solver error ({exc})", True, 0
    status = str(prob.status)
    feasible = status not in ("infeasible", "infeasible_inaccurate")
    iters = int(getattr(prob.solver_stats, "num_iters", 0) or 0)
    return (x.value if feasible else None), status, feasible, iters
