"""Closed-loop interconnection and system norms of continuous-time state-space models.

A model is the four arrays ``(A, B, C, D)`` of

    xdot = A x + B w,    z = C x + D w,    G(s) = C (sI - A)^-1 B + D.

This module computes the lower linear fractional transformation (LFT) of a
generalized plant with a controller ``u = K y`` (:func:`closed_loop`), the
H-infinity norm with its peak frequency (:func:`h_infinity_norm`), the H2 norm
(:func:`h2_norm`), frequency responses and singular values on a grid
(:func:`frequency_response`, :func:`singular_values`) and the spectral abscissa
(:func:`spectral_abscissa`).

Stability is internal stability: every eigenvalue of ``A`` must lie in the open
left half plane (hidden unstable modes count). The norms of an unstable model
are infinite.

The functions take plain numpy arrays, validate them once in a private helper
and keep the per-call Python overhead small: the frozen-point checks evaluate
thousands of closed loops.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.linalg

from schedule.errors import InputError, NumericalError, PlantError

__all__ = [
    "closed_loop",
    "frequency_response",
    "h2_norm",
    "h_infinity_norm",
    "h_infinity_norm_many",
    "singular_values",
    "spectral_abscissa",
    "is_stable",
]

_EPS = float(np.finfo(float).eps)

#: Relative stability margin: an eigenvalue ``lam`` of A counts as unstable when
#: ``Re(lam) >= -STABILITY_RTOL * |lam| - 100 eps ||A||_1`` (so a pole at the
#: origin up to rounding, or on the imaginary axis up to a relative 1e-10, is
#: unstable).
STABILITY_RTOL = 1e-10

#: Relative tolerance used to decide that a Hamiltonian eigenvalue lies on the
#: imaginary axis. It is generous on purpose: an eigenvalue wrongly taken as
#: imaginary only adds one test frequency, whereas a missed one could stop the
#: iteration early (see :func:`h_infinity_norm`, Notes).
AXIS_RTOL = 1e-6

#: Largest condition number of ``I - D22 DK`` accepted as a well-posed loop.
WELL_POSED_COND = 1e12

#: Largest condition number of the eigenvector matrix for which frequency
#: responses use the modal (diagonal) form; above it shifted solves are used.
MODAL_COND = 1e6

_MAX_ITER = 60


# --------------------------------------------------------------------------- validation


def _as_matrix(value: Any, name: str) -> np.ndarray:
    arr = np.asarray(value)
    if arr.dtype.kind not in "fiub":
        if arr.dtype.kind == "c":
            raise PlantError(f"{name} is complex; state-space matrices must be real")
        raise PlantError(f"{name} has dtype {arr.dtype}; pass a real numeric array")
    arr = arr.astype(float, copy=False)
    if arr.ndim == 0:
        arr = arr.reshape(1, 1)
    elif arr.ndim != 2:
        raise PlantError(f"{name} has {arr.ndim} dimensions; pass a 2-D array")
    return arr


def _check_abcd(A: Any, B: Any, C: Any, D: Any) -> tuple[np.ndarray, ...]:
    """Return float copies-or-views of (A, B, C, D) after checking shapes and finiteness."""
    A = _as_matrix(A, "A")
    B = _as_matrix(B, "B")
    C = _as_matrix(C, "C")
    D = _as_matrix(D, "D")
    n = A.shape[0]
    if A.shape[1] != n:
        raise PlantError(f"A has shape {A.shape}; it must be square (n x n)")
    if n == 0:
        # empty state: only D matters; accept B (0 x m) / C (p x 0) of any compatible size
        p, m = D.shape
        B = B.reshape(0, m) if B.size == 0 else B
        C = C.reshape(p, 0) if C.size == 0 else C
    if B.shape[0] != n:
        raise PlantError(f"B has {B.shape[0]} rows but A has {n} states; give B n rows")
    if C.shape[1] != n:
        raise PlantError(f"C has {C.shape[1]} columns but A has {n} states; give C n columns")
    if D.shape != (C.shape[0], B.shape[1]):
        raise PlantError(
            f"D has shape {D.shape} but C and B imply {(C.shape[0], B.shape[1])}; fix D"
        )
    for name, arr in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.isfinite(arr).all():
            raise PlantError(f"{name} contains NaN or inf; give finite state-space matrices")
    return A, B, C, D


def _check_omega(omega: Any) -> np.ndarray:
    w = np.asarray(omega)
    if w.dtype.kind not in "fiu":
        raise InputError(f"omega has dtype {w.dtype}; pass real frequencies in rad/s")
    w = np.atleast_1d(w.astype(float, copy=False))
    if w.ndim != 1:
        raise InputError(f"omega has {w.ndim} dimensions; pass a 1-D array of frequencies")
    if np.isnan(w).any():
        raise InputError("omega contains NaN; pass real frequencies in rad/s")
    return w


# --------------------------------------------------------------------------- stability


def spectral_abscissa(A: Any) -> float:
    """Largest real part of the eigenvalues of ``A``.

    Parameters
    ----------
    A : (n, n) array_like

    Returns
    -------
    float
        ``max Re(eig(A))``; ``-inf`` for a matrix with no states (n = 0).
    """
    A = _as_matrix(A, "A")
    if A.shape[0] != A.shape[1]:
        raise PlantError(f"A has shape {A.shape}; it must be square (n x n)")
    if A.shape[0] == 0:
        return float("-inf")
    if not np.isfinite(A).all():
        raise PlantError("A contains NaN or inf; give finite state-space matrices")
    return float(np.linalg.eigvals(A).real.max())


def _unstable(poles: np.ndarray, norm_a: float) -> bool:
    if poles.size == 0:
        return False
    margin = STABILITY_RTOL * np.abs(poles) + 100.0 * _EPS * norm_a
    return bool((poles.real >= -margin).any())


def is_stable(A: Any) -> bool:
    """True when every eigenvalue of ``A`` lies in the open left half plane.

    An eigenvalue counts as unstable when ``Re(lam) >= -1e-10 |lam| - 100 eps ||A||_1``
    (see :data:`STABILITY_RTOL`), so poles on the imaginary axis up to rounding are
    unstable.
    """
    A = _as_matrix(A, "A")
    if A.shape[0] != A.shape[1]:
        raise PlantError(f"A has shape {A.shape}; it must be square (n x n)")
    if A.shape[0] == 0:
        return True
    if not np.isfinite(A).all():
        raise PlantError("A contains NaN or inf; give finite state-space matrices")
    return not _unstable(np.linalg.eigvals(A), float(np.abs(A).sum(axis=0).max()))


# --------------------------------------------------------------------------- closed loop


def _controller_arrays(controller: Any) -> tuple[Any, Any, Any, Any]:
    if isinstance(controller, (tuple, list)):
        if len(controller) != 4:
            raise InputError(
                f"controller tuple has {len(controller)} items; pass (AK, BK, CK, DK)"
            )
        return tuple(controller)  # type: ignore[return-value]
    try:
        return controller.A, controller.B, controller.C, controller.D
    except AttributeError:
        raise InputError(
            f"controller of type {type(controller).__name__} has no A, B, C, D; "
            "pass a Controller or a tuple (AK, BK, CK, DK)"
        ) from None


def closed_loop(plant: Any, controller: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                       np.ndarray]:
    """Lower LFT of a generalized plant with a controller ``u = K y``.

    The plant is

        xdot = A x + B1 w + B2 u,   z = C1 x + D11 w + D12 u,   y = C2 x + D21 w + D22 u,

    and the controller ``xKdot = AK xK + BK y``, ``u = CK xK + DK y`` (positive
    feedback in the LFT sense). With ``M = (I - D22 DK)^-1`` and
    ``N = (I - DK D22)^-1 = I + DK M D22`` the closed loop from w to z is

        Acl = [[A + B2 DK M C2,  B2 N CK], [BK M C2,  AK + BK M D22 CK]]
        Bcl = [[B1 + B2 DK M D21], [BK M D21]]
        Ccl = [C1 + D12 DK M C2,  D12 N CK]
        Dcl = D11 + D12 DK M D21

    with state order ``[x; xK]`` (Zhou, Doyle and Glover 1996, sec. 10.1, the
    lower LFT ``F_l(P, K) = P11 + P12 K (I - P22 K)^-1 P21``).

    Parameters
    ----------
    plant : object with attributes A, B1, B2, C1, C2, D11, D12, D21, D22
        For example a :class:`schedule.plant.GeneralizedPlant`.
    controller : Controller or tuple (AK, BK, CK, DK)
        Any object with attributes A, B, C, D, or a 4-tuple. A static gain has
        ``AK`` of shape (0, 0).

    Returns
    -------
    (A, B, C, D) : tuple of ndarray
        The closed-loop matrices, ``A`` of order ``n + nK``.

    Raises
    ------
    PlantError
        Shapes do not match, entries are not finite, or the loop is not well
        posed: ``I - D22 DK`` is singular or has condition number above
        :data:`WELL_POSED_COND`.

    References
    ----------
    K. Zhou, J. C. Doyle and K. Glover, Robust and Optimal Control, Prentice
    Hall, 1996, ch. 10 (linear fractional transformations, well-posedness).
    """
    try:
        pa = [plant.A, plant.B1, plant.B2, plant.C1, plant.C2,
              plant.D11, plant.D12, plant.D21, plant.D22]
    except AttributeError:
        raise InputError(
            f"plant of type {type(plant).__name__} lacks A, B1, B2, C1, C2, D11, D12, D21, D22;"
            " pass a GeneralizedPlant"
        ) from None
    names = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
    A, B1, B2, C1, C2, D11, D12, D21, D22 = (_as_matrix(v, f"plant.{k}")
                                             for k, v in zip(names, pa, strict=True))
    n = A.shape[0]
    nw, nu, nz, ny = B1.shape[1], B2.shape[1], C1.shape[0], C2.shape[0]
    expected = {"A": (n, n), "B1": (n, nw), "B2": (n, nu), "C1": (nz, n), "C2": (ny, n),
                "D11": (nz, nw), "D12": (nz, nu), "D21": (ny, nw), "D22": (ny, nu)}
    for k, arr in zip(names, (A, B1, B2, C1, C2, D11, D12, D21, D22), strict=True):
        if arr.shape != expected[k]:
            raise PlantError(f"plant.{k} has shape {arr.shape}, expected {expected[k]}; "
                             "fix the generalized plant")

    AK, BK, CK, DK = (_as_matrix(v, f"controller.{k}")
                      for k, v in zip("ABCD", _controller_arrays(controller), strict=True))
    nk = AK.shape[0] if AK.size else 0
    if nk == 0:
        AK = np.zeros((0, 0))
        BK = BK.reshape(0, ny) if BK.size == 0 else BK
        CK = CK.reshape(nu, 0) if CK.size == 0 else CK
    kexp = {"A": (nk, nk), "B": (nk, ny), "C": (nu, nk), "D": (nu, ny)}
    for k, arr in zip("ABCD", (AK, BK, CK, DK), strict=True):
        if arr.shape != kexp[k]:
            raise PlantError(
                f"controller.{k} has shape {arr.shape}, expected {kexp[k]} for a plant with "
                f"{ny} measurements and {nu} controls; fix the controller"
            )
    # finiteness: one cheap test on the inputs, the culprit is named only on failure
    if not np.isfinite(sum(float(np.abs(x).sum()) for x in
                           (A, B1, B2, C1, C2, D11, D12, D21, D22, AK, BK, CK, DK))):
        for k, arr in zip(names + ("AK", "BK", "CK", "DK"),
                          (A, B1, B2, C1, C2, D11, D12, D21, D22, AK, BK, CK, DK), strict=True):
            if not np.isfinite(arr).all():
                owner = "controller" if k.endswith("K") else "plant"
                raise PlantError(f"{owner}.{k[0] if owner == 'controller' else k} contains NaN "
                                 "or inf; give finite matrices")
        raise PlantError("plant and controller entries are too large (sum overflows); rescale")

    if ny and nu and np.any(D22) and np.any(DK):
        E = np.eye(ny) - D22 @ DK
        sv = np.linalg.svd(E, compute_uv=False)
        if sv[-1] <= sv[0] / WELL_POSED_COND:
            cond = np.inf if sv[-1] == 0 else sv[0] / sv[-1]
            raise PlantError(
                f"loop not well posed: I - D22 DK has condition number {cond:.3g} "
                f"(smallest singular value {sv[-1]:.3g}); change DK or remove D22"
            )
        # M = E^-1; DK M = (I - DK D22)^-1 DK
        MC2 = np.linalg.solve(E, C2)
        MD21 = np.linalg.solve(E, D21)
        MD22CK = np.linalg.solve(E, D22 @ CK)
        NCK = CK + DK @ MD22CK
    else:
        MC2, MD21, NCK = C2, D21, CK
        MD22CK = D22 @ CK

    Acl = np.block([[A + B2 @ DK @ MC2, B2 @ NCK],
                    [BK @ MC2, AK + BK @ MD22CK]])
    Bcl = np.vstack([B1 + B2 @ DK @ MD21, BK @ MD21])
    Ccl = np.hstack([C1 + D12 @ DK @ MC2, D12 @ NCK])
    Dcl = D11 + D12 @ DK @ MD21
    return Acl, Bcl, Ccl, Dcl


# --------------------------------------------------------------------------- frequency response


def _response_solve(A, B, C, D, s: np.ndarray) -> np.ndarray:
    """G(s_k) for complex points s by stacked shifted solves, (k, p, m)."""
    n = A.shape[0]
    k = s.shape[0]
    p, m = D.shape
    if n == 0:
        return np.broadcast_to(D.astype(complex), (k, p, m)).copy()
    out = np.empty((k, p, m), dtype=complex)
    chunk = max(1, int(4_000_000 // max(n * n, 1)))
    eye = np.eye(n)
    for start in range(0, k, chunk):
        sl = slice(start, min(k, start + chunk))
        M = s[sl, None, None] * eye - A
        X = np.linalg.solve(M, np.broadcast_to(B, (M.shape[0], n, m)))
        out[sl] = C @ X + D
    return out


def _response(A, B, C, D, omega: np.ndarray, modal: bool | None = None) -> np.ndarray:
    """G(j omega) as a (k, p, m) complex array; +-inf frequencies give D."""
    k = omega.shape[0]
    p, m = D.shape
    n = A.shape[0]
    finite = np.isfinite(omega)
    out = np.empty((k, p, m), dtype=complex)
    out[~finite] = D
    wf = omega[finite]
    if wf.size == 0:
        return out
    if n == 0:
        out[finite] = D
        return out
    use_modal = modal
    if use_modal is None:
        use_modal = wf.size > 4 * n
    if use_modal:
        lam, V = np.linalg.eig(A)
        sv = np.linalg.svd(V, compute_uv=False)
        if sv[-1] > 0 and sv[0] / sv[-1] <= MODAL_COND:
            CV = C @ V
            VB = np.linalg.solve(V, B)
            r = 1.0 / (1j * wf[:, None] - lam[None, :])  # (k, n)
            W = (CV.T[:, :, None] * VB[:, None, :]).reshape(n, p * m)  # rank-one terms
            out[finite] = (r @ W).reshape(-1, p, m) + D
            return out
    out[finite] = _response_solve(A, B, C, D, 1j * wf)
    return out


def frequency_response(A: Any, B: Any, C: Any, D: Any, omega: Any) -> np.ndarray:
    """Frequency response ``G(j omega) = C (j omega I - A)^-1 B + D`` on a grid.

    Uses the modal form ``C V diag(1/(j omega - lam)) V^-1 B + D`` when the
    eigenvector matrix ``V`` of ``A`` has condition number below
    :data:`MODAL_COND` (one eigen-decomposition, then cheap vectorized sums;
    accurate for lightly damped modes because each resonance is one exact
    scalar term), and stacked shifted solves otherwise. ``omega = +-inf``
    gives ``D``.

    Parameters
    ----------
    A, B, C, D : array_like
        State-space matrices, shapes (n, n), (n, m), (p, n), (p, m).
    omega : array_like
        Frequencies in rad/s.

    Returns
    -------
    ndarray, complex, shape (len(omega), p, m)
    """
    A, B, C, D = _check_abcd(A, B, C, D)
    return _response(A, B, C, D, _check_omega(omega))


def _sv(G: np.ndarray, only_max: bool = False) -> np.ndarray:
    p, m = G.shape[-2:]
    if min(p, m) == 1:
        v = np.sqrt((G.real ** 2 + G.imag ** 2).sum(axis=(-2, -1)))
        return v if only_max else v[..., None]
    if min(p, m) == 0:
        return np.zeros(G.shape[:-2] + ((0,) if not only_max else ()))
    s = np.linalg.svd(G, compute_uv=False)
    return s[..., 0] if only_max else s


def singular_values(A: Any, B: Any, C: Any, D: Any, omega: Any) -> np.ndarray:
    """Singular values of ``G(j omega)`` on a frequency grid, largest first.

    Parameters
    ----------
    A, B, C, D : array_like
        State-space matrices, shapes (n, n), (n, m), (p, n), (p, m).
    omega : array_like
        Frequencies in rad/s (``inf`` allowed: gives the singular values of D).

    Returns
    -------
    ndarray, shape (len(omega), min(p, m))
        Row k holds ``sigma_1 >= sigma_2 >= ...`` of ``G(j omega_k)``.

    Notes
    -----
    The response is computed by :func:`frequency_response` (modal form when
    well conditioned, shifted solves otherwise), then a stacked SVD.
    """
    A, B, C, D = _check_abcd(A, B, C, D)
    return _sv(_response(A, B, C, D, _check_omega(omega)))


# --------------------------------------------------------------------------- H-infinity norm


def _sigma_max_at(A, B, C, D, omega: np.ndarray) -> np.ndarray:
    return _sv(_response(A, B, C, D, omega, modal=False), only_max=True)


def h_infinity_norm(A: Any, B: Any, C: Any, D: Any,
                    rtol: float = 1e-8) -> tuple[float, float]:
    """H-infinity norm ``sup_omega sigma_max(G(j omega))`` and the peak frequency.

    The two-step (quadratically convergent) level-set method of Boyd,
    Balakrishnan and Kabamba (1989) and Bruinsma and Steinbuch (1990). For a
    stable ``A`` and ``gamma > sigma_max(D)``, ``gamma`` is a singular value of
    ``G(j omega)`` if and only if ``j omega`` is an eigenvalue of the Hamiltonian

        H(gamma) = [[A + B R^-1 D' C,           B R^-1 B'            ],
                    [-C' (I + D R^-1 D') C,     -(A + B R^-1 D' C)'  ]],
        R = gamma^2 I - D' D > 0.

    Algorithm:

    1. Lower bound ``lb = max sigma_max(G(j omega))`` over omega = 0, inf
       (via D), the pole moduli ``|lam_i|`` and the imaginary parts of the poles
       (the rule of Bruinsma and Steinbuch, widened to every pole so that
       lightly damped modes are hit near their peak).
    2. ``gamma = (1 + 2 rtol) lb``; the eigenvalues of ``H(gamma)`` on the
       imaginary axis ``j omega_1 < ... < j omega_k`` bound the intervals where
       some singular value exceeds ``gamma``. Evaluate ``sigma_max`` at every
       midpoint ``(omega_i + omega_{i+1}) / 2`` and raise ``lb`` to the largest.
    3. Stop when no midpoint exceeds ``gamma``: then ``lb <= ||G||_inf <= gamma``.

    Parameters
    ----------
    A, B, C, D : array_like
        State-space matrices, shapes (n, n), (n, m), (p, n), (p, m).
    rtol : float, optional
        Relative accuracy; the result satisfies
        ``norm <= ||G||_inf <= (1 + 2 rtol) norm``.

    Returns
    -------
    norm : float
        A value of ``sigma_max(G(j peak_frequency))`` (an attained lower bound
        within the relative accuracy above). ``inf`` for an unstable ``A``.
    peak_frequency : float
        Frequency in rad/s where ``norm`` is attained: ``0.0`` for a static gain
        (n = 0) or a peak at DC, ``inf`` when the supremum is reached as
        ``omega -> inf`` (``norm = sigma_max(D)``), ``nan`` for an unstable ``A``.

    Raises
    ------
    PlantError
        Bad shapes or non-finite entries.
    InputError
        ``rtol`` outside (0, 0.1).
    NumericalError
        No convergence within 60 iterations (should not happen; the message
        gives the bracket reached).

    Notes
    -----
    Eigenvalues are taken as imaginary when ``|Re lam| <= 1e-6 |lam| + 1e-9
    ||H||``. Wrongly accepting one only adds a test frequency (every lower
    bound is an evaluated ``sigma_max``, and a subinterval of a true interval
    still has its midpoint above ``gamma``); the tolerance is therefore
    generous, so that imaginary eigenvalues perturbed by rounding are not
    missed. Stability is tested on the eigenvalues of ``A`` with the relative
    margin :data:`STABILITY_RTOL`.

    References
    ----------
    S. Boyd, V. Balakrishnan and P. Kabamba, "A bisection method for computing
    the H-infinity norm of a transfer matrix and related problems", Math.
    Control Signals Systems 2 (1989) 207-219, doi:10.1007/BF02551385.
    N. A. Bruinsma and M. Steinbuch, "A fast algorithm to compute the
    H-infinity-norm of a transfer function matrix", Systems & Control Letters
    14 (1990) 287-293, doi:10.1016/0167-6911(90)90049-Z.

    Examples
    --------
    >>> import numpy as np
    >>> zeta = 1e-3  # 1/(s^2 + 2 zeta s + 1): peak 1/(2 zeta sqrt(1 - zeta^2))
    >>> A = np.array([[0.0, 1.0], [-1.0, -2 * zeta]]); B = np.array([[0.0], [1.0]])
    >>> C = np.array([[1.0, 0.0]]); D = np.zeros((1, 1))
    >>> norm, w = h_infinity_norm(A, B, C, D)
    >>> bool(abs(norm * 2 * zeta * np.sqrt(1 - zeta**2) - 1) < 1e-7)
    True
    """
    A, B, C, D = _check_abcd(A, B, C, D)
    return _hinf(A, B, C, D, _check_rtol(rtol))


def _check_rtol(rtol) -> float:
    """The relative accuracy of the H-infinity norm as a float in (0, 0.1)."""
    try:
        rtol = float(rtol)
    except (TypeError, ValueError):
        raise InputError(f"rtol={rtol!r} is not a number; pass e.g. rtol=1e-8") from None
    if not (0.0 < rtol < 0.1):
        raise InputError(f"rtol={rtol} is outside (0, 0.1); pass e.g. rtol=1e-8")
    return rtol


def _hinf(A, B, C, D, rtol):
    n = A.shape[0]
    p, m = D.shape
    sd = float(_sv(D[None], only_max=True)[0]) if p and m else 0.0
    if n == 0 or p == 0 or m == 0:
        return sd, 0.0
    poles, V = np.linalg.eig(A)
    norm_a = float(np.abs(A).sum(axis=0).max())
    if _unstable(poles, norm_a):
        return float("inf"), float("nan")

    # step 1: lower bound from 0, pole moduli, pole imaginary parts; inf via D.
    # The candidates are screened cheaply in modal form; the best few are then
    # evaluated by direct solves, so the lower bound is an accurately computed
    # sigma_max even when the eigenvectors are ill-conditioned.
    ap = np.abs(poles)
    cand = np.unique(np.concatenate(([0.0], ap, np.abs(poles.imag))))
    if cand.size > 3:
        try:
            VB = np.linalg.solve(V, B)
        except np.linalg.LinAlgError:
            VB = None
        if VB is not None:
            r = 1.0 / (1j * cand[:, None] - poles[None, :])
            approx = _sv((C @ V)[None, :, :] * r[:, None, :] @ VB + D, only_max=True)
            approx = np.where(np.isfinite(approx), approx, 0.0)
            cand = cand[np.argsort(approx)[-3:]]
    sig = _sigma_max_at(A, B, C, D, cand)
    i = int(np.argmax(sig))
    lb, peak = float(sig[i]), float(cand[i])
    if sd >= lb:
        lb, peak = sd, float("inf")
    if lb == 0.0:
        # zero at n + 1 distinct points: check more before calling it the zero system
        extra = np.geomspace(1e-3, 1e3, 2 * n + 2) * max(float(ap.max()), 1.0)
        sig = _sigma_max_at(A, B, C, D, extra)
        i = int(np.argmax(sig))
        if sig[i] == 0.0:
            return 0.0, 0.0
        lb, peak = float(sig[i]), float(extra[i])

    DtC = D.T @ C
    DtD = D.T @ D
    BBt = B @ B.T
    CtC = C.T @ C
    has_d = bool(np.any(D))
    eye_m = np.eye(m)
    for _ in range(_MAX_ITER):
        gamma = (1.0 + 2.0 * rtol) * lb
        if has_d:
            R = gamma * gamma * eye_m - DtD
            RinvX = np.linalg.solve(R, np.hstack([DtC, B.T]))
            Ah = A + B @ RinvX[:, :n]
            G = B @ RinvX[:, n:]
            Q = CtC + DtC.T @ RinvX[:, :n]
        else:
            Ah = A
            G = BBt / (gamma * gamma)
            Q = CtC
        H = np.block([[Ah, G], [-Q, -Ah.T]])
        ev = np.linalg.eigvals(H)
        norm_h = float(np.abs(H).sum(axis=0).max())
        on_axis = np.abs(ev.real) <= AXIS_RTOL * np.abs(ev) + 1e-9 * norm_h
        w = np.unique(np.abs(ev.imag[on_axis]))
        if w.size < 2:
            return lb, peak
        mid = 0.5 * (w[:-1] + w[1:])
        sig = _sigma_max_at(A, B, C, D, mid)
        i = int(np.argmax(sig))
        if sig[i] <= gamma:
            return lb, peak
        lb, peak = float(sig[i]), float(mid[i])
    raise NumericalError(
        f"H-infinity norm iteration did not converge in {_MAX_ITER} steps "
        f"(lower bound {lb:.6g} at {peak:.6g} rad/s); loosen rtol or rescale the model"
    )


def _as_stack(value: Any, name: str) -> np.ndarray:
    arr = np.asarray(value)
    if arr.dtype.kind not in "fiub":
        raise PlantError(f"{name} has dtype {arr.dtype}; pass a real numeric (N, rows, cols) array")
    if arr.ndim != 3:
        raise PlantError(f"{name} has {arr.ndim} dimensions; pass a stacked (N, rows, cols) array")
    return arr.astype(float, copy=False)


def _sv_max_stack(G: np.ndarray) -> np.ndarray:
    return _sv(G, only_max=True) if G.shape[0] else np.zeros(0)


def h_infinity_norm_many(A: Any, B: Any, C: Any, D: Any,
                         rtol: float = 1e-8) -> tuple[np.ndarray, np.ndarray]:
    """H-infinity norms and peak frequencies of N models of equal size, in lockstep.

    The same method and the same guarantees as :func:`h_infinity_norm`
    (Boyd, Balakrishnan and Kabamba 1989; Bruinsma and Steinbuch 1990), run on
    stacked arrays: every step (eigenvalues of A, the Hamiltonians, the
    frequency evaluations) is one stacked numpy call over the models still
    iterating, which removes most per-model Python overhead.

    Parameters
    ----------
    A, B, C, D : array_like
        Stacked matrices, shapes (N, n, n), (N, n, m), (N, p, n), (N, p, m).
    rtol : float, optional
        Relative accuracy: ``norm[i] <= ||G_i||_inf <= (1 + 2 rtol) norm[i]``.

    Returns
    -------
    norm : (N,) ndarray
        ``inf`` where ``A[i]`` is unstable.
    peak_frequency : (N,) ndarray
        As in :func:`h_infinity_norm` (``inf`` for a peak at infinity, ``nan``
        where unstable).

    Raises
    ------
    PlantError, InputError, NumericalError
        As :func:`h_infinity_norm`; the message names the first model at fault.
    """
    A = _as_stack(A, "A")
    B = _as_stack(B, "B")
    C = _as_stack(C, "C")
    D = _as_stack(D, "D")
    N, n = A.shape[0], A.shape[1]
    p, m = D.shape[1], D.shape[2]
    want = {"A": (N, n, n), "B": (N, n, m), "C": (N, p, n), "D": (N, p, m)}
    for k, arr in zip("ABCD", (A, B, C, D), strict=True):
        if arr.shape != want[k]:
            raise PlantError(f"{k} has shape {arr.shape}, expected {want[k]} from A and D; "
                             "stack models of equal size")
        if not np.isfinite(arr).all():
            i = int(np.flatnonzero(~np.isfinite(arr).reshape(N, -1).all(axis=1))[0])
            raise PlantError(f"{k}[{i}] contains NaN or inf; give finite state-space matrices")
    rtol = _check_rtol(rtol)

    norm = np.zeros(N)
    peak = np.zeros(N)
    if N == 0 or p == 0 or m == 0:
        return norm, peak
    sd = _sv_max_stack(D)
    if n == 0:
        return sd, peak

    poles, V = np.linalg.eig(A)
    norm_a = np.abs(A).sum(axis=1).max(axis=1)
    margin = STABILITY_RTOL * np.abs(poles) + 100.0 * _EPS * norm_a[:, None]
    unstable = (poles.real >= -margin).any(axis=1)
    norm[unstable] = np.inf
    peak[unstable] = np.nan
    idx = np.flatnonzero(~unstable)
    if idx.size == 0:
        return norm, peak
    A, B, C, D, poles, V, sd = A[idx], B[idx], C[idx], D[idx], poles[idx], V[idx], sd[idx]
    M = idx.size
    eye = np.eye(n)

    def sigma_max_of_selected(sel: np.ndarray, w: np.ndarray) -> np.ndarray:
        """sigma_max(G_sel(j w)) by direct stacked solves, sel and w of equal length."""
        Ms = 1j * w[:, None, None] * eye - A[sel]
        return _sv_max_stack(C[sel] @ np.linalg.solve(Ms, B[sel]) + D[sel])

    # step 1: candidates 0, |lam|, |Im lam|, screened in modal form, best 3 solved directly
    cand = np.concatenate([np.zeros((M, 1)), np.abs(poles), np.abs(poles.imag)], axis=1)
    try:
        VB = np.linalg.solve(V, B)
        r = 1.0 / (1j * cand[:, :, None] - poles[:, None, :])            # (M, k, n)
        CV = C @ V                                                        # (M, p, n)
        Gm = np.einsum("ipn,ikn,inm->ikpm", CV, r, VB) + D[:, None]
        approx = _sv(Gm, only_max=True)
        approx = np.where(np.isfinite(approx), approx, 0.0)
        top = np.argsort(approx, axis=1)[:, -3:]
        cand = np.take_along_axis(cand, top, axis=1)
    except np.linalg.LinAlgError:
        pass
    k = cand.shape[1]
    sel = np.repeat(np.arange(M), k)
    sig = sigma_max_of_selected(sel, cand.ravel()).reshape(M, k)
    best = np.argmax(sig, axis=1)
    lb = sig[np.arange(M), best]
    pk = cand[np.arange(M), best]
    at_inf = sd >= lb
    lb = np.where(at_inf, sd, lb)
    pk = np.where(at_inf, np.inf, pk)
    zero = lb == 0.0
    if zero.any():  # fall back to the single-model routine for the rare zero lower bound
        for i in np.flatnonzero(zero):
            lb[i], pk[i] = _hinf(A[i], B[i], C[i], D[i], rtol)
    active = ~zero
    DtD = np.swapaxes(D, 1, 2) @ D
    DtC = np.swapaxes(D, 1, 2) @ C
    Bt = np.swapaxes(B, 1, 2)
    CtC = np.swapaxes(C, 1, 2) @ C
    eye_m = np.eye(m)
    for _ in range(_MAX_ITER):
        act = np.flatnonzero(active)
        if act.size == 0:
            break
        gamma = (1.0 + 2.0 * rtol) * lb[act]
        R = gamma[:, None, None] ** 2 * eye_m - DtD[act]
        X = np.linalg.solve(R, np.concatenate([DtC[act], Bt[act]], axis=2))
        Ah = A[act] + B[act] @ X[:, :, :n]
        G = B[act] @ X[:, :, n:]
        Q = CtC[act] + np.swapaxes(DtC[act], 1, 2) @ X[:, :, :n]
        H = np.concatenate([np.concatenate([Ah, G], axis=2),
                            np.concatenate([-Q, -np.swapaxes(Ah, 1, 2)], axis=2)], axis=1)
        ev = np.linalg.eigvals(H)
        norm_h = np.abs(H).sum(axis=1).max(axis=1)
        on_axis = (np.abs(ev.real) <= AXIS_RTOL * np.abs(ev) + 1e-9 * norm_h[:, None]) & (
            ev.imag > 0)
        w = np.sort(np.where(on_axis, ev.imag, np.inf), axis=1)
        mid = 0.5 * (w[:, :-1] + w[:, 1:])
        ok = np.isfinite(mid) & (w[:, 1:] > w[:, :-1])
        rows, cols = np.nonzero(ok)
        done = np.ones(act.size, dtype=bool)
        if rows.size:
            sig = np.full(mid.shape, -np.inf)
            sig[rows, cols] = sigma_max_of_selected(act[rows], mid[rows, cols])
            j = np.argmax(sig, axis=1)
            s = sig[np.arange(act.size), j]
            up = s > gamma
            lb[act[up]] = s[up]
            pk[act[up]] = mid[np.flatnonzero(up), j[up]]
            done = ~up
        active[act[done]] = False
    else:
        i = int(np.flatnonzero(active)[0])
        raise NumericalError(
            f"H-infinity norm iteration did not converge in {_MAX_ITER} steps for model "
            f"{idx[i]} (lower bound {lb[i]:.6g}); loosen rtol or rescale the model"
        )
    norm[idx] = lb
    peak[idx] = pk
    return norm, peak


# --------------------------------------------------------------------------- H2 norm


def h2_norm(A: Any, B: Any, C: Any, D: Any) -> float:
    """H2 norm ``sqrt(trace(C P C'))`` with ``A P + P A' + B B' = 0``.

    ``||G||_2^2 = (1/2pi) int trace(G(jw)^H G(jw)) dw``, finite only for a
    stable, strictly proper model (Zhou, Doyle and Glover 1996, Lemma 4.4).
    The controllability Gramian ``P`` is solved with
    :func:`scipy.linalg.solve_continuous_lyapunov` (Bartels-Stewart) and its
    residual is checked.

    Returns
    -------
    float
        ``inf`` when ``D != 0`` (any nonzero entry) or ``A`` is unstable;
        ``0.0`` for a model without states and ``D = 0``.

    Raises
    ------
    PlantError
        Bad shapes or non-finite entries.
    NumericalError
        The Lyapunov residual ``||A P + P A' + B B'||_1`` exceeds ``1e-8`` times
        ``2 ||A||_1 ||P||_1 + ||B B'||_1`` (the model is nearly unstable or badly
        scaled).

    References
    ----------
    R. H. Bartels and G. W. Stewart, "Solution of the matrix equation
    AX + XB = C", Comm. ACM 15 (1972) 820-826, doi:10.1145/361573.361582.
    """
    A, B, C, D = _check_abcd(A, B, C, D)
    if np.any(D):
        return float("inf")
    n = A.shape[0]
    if n == 0 or B.shape[1] == 0 or C.shape[0] == 0:
        return 0.0
    norm_a = float(np.abs(A).sum(axis=0).max())
    if _unstable(np.linalg.eigvals(A), norm_a):
        return float("inf")
    BBt = B @ B.T
    P = scipy.linalg.solve_continuous_lyapunov(A, -BBt)
    P = 0.5 * (P + P.T)
    res = A @ P + P @ A.T + BBt
    scale = 2.0 * norm_a * np.abs(P).sum(axis=0).max() + np.abs(BBt).sum(axis=0).max()
    r = float(np.abs(res).sum(axis=0).max())
    if not np.isfinite(r) or r > 1e-8 * scale:
        raise NumericalError(
            f"H2 norm: Lyapunov residual {r:.3g} is {r / scale:.3g} relative "
            "(limit 1e-8); the model is nearly unstable or badly scaled, rescale it"
        )
    val = float(np.trace(C @ P @ C.T))
    return float(np.sqrt(max(val, 0.0)))
