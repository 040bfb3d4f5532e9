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
left half plane (hidden unstable modes count), decided by the package's one
predicate, :func:`stability`. The norms of an unstable model are infinite.

The H-infinity norm has one route, :func:`h_infinity_norms` (batched; a
:class:`NormCertificate` with the attained value, a certified upper bound or the
reason it is in doubt; also the level test); :func:`h_infinity_norm` and
:func:`h_infinity_norm_many` are its raising forms.

The functions take plain numpy arrays, validate them once in a private helper
and keep the per-call Python overhead small: the frozen-point checks evaluate
thousands of closed loops.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import scipy.linalg

from schedule.errors import InputError, NumericalError, PlantError

__all__ = [
    "NormCertificate",
    "Stability",
    "closed_loop",
    "closed_loop_many",
    "frequency_response",
    "h2_norm",
    "h_infinity_norm",
    "h_infinity_norm_many",
    "h_infinity_norms",
    "is_stable",
    "sigma_max",
    "singular_values",
    "spectral_abscissa",
    "stability",
    "stability_from_eigenvalues",
]

_EPS = float(np.finfo(float).eps)

#: The stability predicate of the package (one rule, used by every check): an eigenvalue
#: ``lam`` of A counts as stable when
#: ``Re(lam) < -(STABILITY_RTOL |lam| + STABILITY_EPS eps ||A_bal||_1)``, with ``A_bal``
#: the balanced A (LAPACK dgebal). The relative part keeps poles on the imaginary axis up
#: to a relative 1e-10 unstable; the rounding part (what an eigenvalue at the origin
#: becomes in floating point) uses the balanced norm so that it does not depend on the
#: state coordinates.
STABILITY_RTOL = 1e-10
STABILITY_EPS = 100.0

#: Relative tolerance used to decide that a Hamiltonian eigenvalue lies on the
#: imaginary axis: ``|Re lam| <= AXIS_RTOL |lam| + AXIS_ATOL ||H||_1``. It is generous on
#: purpose: an eigenvalue wrongly taken as imaginary only adds test frequencies, whereas a
#: missed one could stop the iteration early (see :func:`h_infinity_norms`, Notes).
AXIS_RTOL = 1e-6
AXIS_ATOL = 1e-9
#: Looser band searched for crossings that rounding pushed off the axis before the
#: iteration is declared converged (each candidate is only a test frequency).
NEAR_AXIS_RTOL = 1e-3
#: An eigenvalue of a Hamiltonian whose mirror image -conj(lam) is missing by more than
#: this fraction of |lam| (and by more than half its distance to the axis) shows that
#: rounding has destroyed the spectrum's symmetry: the crossings cannot be counted.
UNPAIRED_RTOL = 0.1
#: Hamiltonian eigenvalues closer than ORIGIN_RTOL ||H||_1 to the origin are not counted
#: as crossings (a double eigenvalue at 0 splits by about sqrt(eps) ||H|| under rounding).
ORIGIN_RTOL = 1e-6

#: Largest condition number of ``I - D22 DK`` accepted as a well-posed loop.
WELL_POSED_COND = 1e12

#: Largest condition number of the eigenvector matrix for which frequency
#: responses use the modal (diagonal) form; above it shifted solves are used.
MODAL_COND = 1e6

#: Safety factor on the first-order bound ``eps ||H|| / s_i`` of the error of a computed
#: Hamiltonian eigenvalue (see :func:`_untrusted`): the rounding of a backward stable
#: solver is a modest multiple of eps ||H||, and first-order terms are only first order.
EIG_SAFETY = 10.0

#: A model whose poles are so ill-conditioned that rounding may move one by more than this
#: fraction of its distance to the imaginary axis (componentwise first-order bound, see
#: :func:`_pole_spread`) has sigma_max values near that pole that are unreliable at this
#: level: probes by sigma_max then confirm nothing, and every Hamiltonian eigenvalue must be
#: placed off the axis by its own error bound (see :func:`h_infinity_norms`, step 5).
#: Below it, the certified upper bound is widened by the same fraction.
POLE_RTOL = 1e-3

#: Relative steps above the attained value tried, in order, when rounding leaves the
#: Hamiltonian at ``(1 + 2 rtol) lb`` in doubt (step 6 of :func:`h_infinity_norms`).
RELAX_STEPS = (1e-6, 1e-4, 1e-2)

_MAX_ITER = 60
_PROBE = 10.0 ** -np.arange(1.0, 9.0)  # relative offsets probed around an unpaired crossing
_PROBE_REL = np.concatenate([1.0 - _PROBE, 1.0 + _PROBE, [0.5]])


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


class Stability:
    """Outcome of the stability predicate for a stack of state matrices.

    Attributes
    ----------
    stable : (N,) the verdict of :func:`stability`.
    eigenvalues : (N, n) the eigenvalues.
    abscissa : (N,) spectral abscissa ``max Re(lam)`` (``-inf`` without states).
    slack : (N, n) ``-Re(lam) - allowance`` per eigenvalue (positive where it passes), with
        the allowance ``STABILITY_RTOL |lam| + STABILITY_EPS eps ||A_bal||_1``.
    """

    __slots__ = ("stable", "eigenvalues", "slack")

    def __init__(self, stable, eigenvalues, slack):
        self.stable, self.eigenvalues, self.slack = stable, eigenvalues, slack

    @property
    def abscissa(self) -> np.ndarray:
        lam = self.eigenvalues
        if lam.shape[1] == 0:
            return np.full(lam.shape[0], -np.inf)
        return lam.real.max(axis=1)

    def reason(self, i: int, what: str = "closed loop") -> str:
        """One line saying why model ``i`` is not stable (empty when it is).

        The message is true to the test: a positive (or zero) abscissa is "unstable"; a
        negative one that is within the rounding allowance of the axis is "not certified
        stable" with the eigenvalue and the allowance.
        """
        if self.stable[i]:
            return ""
        sa = float(self.eigenvalues[i].real.max())
        if sa >= 0:
            return f"{what} unstable (spectral abscissa {sa:.3g})"
        k = int(np.argmin(self.slack[i]))
        lam = complex(self.eigenvalues[i, k])
        allow = -lam.real - float(self.slack[i, k])
        return (f"{what} not certified stable: eigenvalue {lam.real:.3g}{lam.imag:+.3g}j lies "
                f"within {allow:.2g} of the imaginary axis (rounding and relative allowance "
                f"{STABILITY_RTOL:g} |lambda|)")


def stability_from_eigenvalues(A: np.ndarray, lam: np.ndarray) -> Stability:
    """:func:`stability` for stacked A (N, n, n) whose eigenvalues lam (N, n) are already
    known (e.g. from a modal decomposition): the same predicate, no second eigen-call."""
    N, n = lam.shape
    if n == 0:
        return Stability(np.ones(N, bool), lam, np.zeros((N, 0)))
    scale = np.abs(A).sum(axis=1).max(axis=1)
    mod = np.abs(lam)
    slack = -lam.real - (STABILITY_RTOL * mod + (STABILITY_EPS * _EPS) * scale[:, None])
    stable = slack.min(axis=1) > 0
    if not stable.all():
        # rounding allowance too large on the given coordinates: try the balanced norm
        relative_ok = (-lam.real > STABILITY_RTOL * mod).all(axis=1)
        for i in np.flatnonzero(relative_ok & ~stable):
            _, (d, _p) = scipy.linalg.matrix_balance(A[i], permute=False, separate=True)
            bal = float(np.abs(A[i] * (d[None, :] / d[:, None])).sum(axis=0).max())
            slack[i] = -lam[i].real - (STABILITY_RTOL * mod[i] + STABILITY_EPS * _EPS * bal)
            stable[i] = bool(slack[i].min() > 0)
    return Stability(stable, lam, slack)


def stability(A: Any) -> Stability:
    """The package's one stability predicate, for one state matrix or a stack.

    A model is stable when every eigenvalue of ``A`` (hidden modes count) satisfies
    ``Re(lam) < -(STABILITY_RTOL |lam| + STABILITY_EPS eps ||A_bal||_1)``: poles on the
    imaginary axis, or at the origin up to rounding, are not stable. The answer does not
    depend on the units of time nor on the state coordinates (the rounding allowance is
    taken on the balanced matrix, Parlett and Reinsch 1969).

    Parameters
    ----------
    A : (n, n) or (N, n, n) array_like

    Returns
    -------
    Stability
        arrays over the N models (N = 1 for a single matrix); ``reason(i)`` gives a
        one-line message that is true to the test.
    """
    A = np.asarray(A, dtype=float)
    if A.ndim == 2:
        A = A[None]
    if A.ndim != 3 or A.shape[1] != A.shape[2]:
        raise PlantError(f"A has shape {A.shape}; give square (n, n) or (N, n, n) arrays")
    if not np.isfinite(A).all():
        raise PlantError("A contains NaN or inf; give finite state-space matrices")
    lam = np.linalg.eigvals(A) if A.shape[1] else np.zeros((A.shape[0], 0), complex)
    return stability_from_eigenvalues(A, lam)


def is_stable(A: Any) -> bool:
    """True when every eigenvalue of ``A`` lies in the open left half plane, decided by the
    package's one predicate (:func:`stability`)."""
    A = _as_matrix(A, "A")
    if A.shape[0] != A.shape[1]:
        raise PlantError(f"A has shape {A.shape}; it must be square (n x n)")
    return bool(stability(A).stable[0])


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
    mats = (A, B1, B2, C1, C2, D11, D12, D21, D22, AK, BK, CK, DK)
    if not all(np.isfinite(x).all() for x in mats):
        for k, arr in zip(names + ("AK", "BK", "CK", "DK"), mats, strict=True):
            if not np.isfinite(arr).all():
                owner = "controller" if k.endswith("K") else "plant"
                raise PlantError(f"{owner}.{k[0] if owner == 'controller' else k} contains NaN "
                                 "or inf; give finite matrices")
    P = dict(zip(names, (x[None] for x in mats[:9]), strict=True))
    Kd = dict(zip("ABCD", (x[None] for x in mats[9:]), strict=True))
    Acl, Bcl, Ccl, Dcl = _lft(P, Kd, "the loop")
    return Acl[0], Bcl[0], Ccl[0], Dcl[0]


PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")


def _stack3(M: Any) -> np.ndarray:
    a = np.asarray(M, dtype=float)
    return a[None] if a.ndim == 2 else a


def closed_loop_many(P: Any, K: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Lower LFT of stacked generalized plants with stacked controllers ``u = K y``.

    The batched form of :func:`closed_loop` (same formulas, the point index first):
    ``P`` maps the nine plant keys ``A ... D22`` to (N, ., .) stacks (or 2-D arrays,
    broadcast), ``K`` maps ``A, B, C, D`` to the controller stacks. Nothing is validated
    beyond well-posedness: give arrays that passed :class:`schedule.plant.GeneralizedPlant`.

    Raises
    ------
    PlantError
        If ``I - D22 DK`` has condition number above :data:`WELL_POSED_COND` at a point
        (the message names the first such point).
    """
    P = {k: _stack3(P[k]) for k in PLANT_KEYS}
    K = {k: _stack3(K[k]) for k in "ABCD"}
    return _lft(P, K, "check point")


def _lft(P: dict, K: dict, where: str):
    A, B1, B2, C1, C2 = (P[k] for k in ("A", "B1", "B2", "C1", "C2"))
    D11, D12, D21, D22 = (P[k] for k in ("D11", "D12", "D21", "D22"))
    AK, BK, CK, DK = (K[k] for k in "ABCD")
    ny = C2.shape[1]
    nu = B2.shape[2]
    if ny and nu and np.any(D22) and np.any(DK):
        W = np.eye(ny) - D22 @ DK
        sv = np.linalg.svd(W, compute_uv=False)
        with np.errstate(divide="ignore", invalid="ignore"):
            cond = sv[..., 0] / sv[..., -1]
        bad = ~np.isfinite(cond) | (cond > WELL_POSED_COND)
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            at = "" if W.shape[0] == 1 and where == "the loop" else f" at {where} {i}"
            raise PlantError(f"loop not well posed{at}: I - D22 DK has condition number "
                             f"{cond[i]:.3g} (smallest singular value {sv[i, -1]:.3g}); change "
                             "DK or remove D22")
        M = np.linalg.inv(W)
        DKM = DK @ M
        MC2, MD21 = M @ C2, M @ D21
        NCK = CK + DKM @ D22 @ CK
        MD22CK = M @ D22 @ CK
    else:
        DKM = DK
        MC2, MD21, NCK = C2, D21, CK
        MD22CK = D22 @ CK
    Acl = np.concatenate([
        np.concatenate([A + B2 @ DKM @ C2, B2 @ NCK], axis=2),
        np.concatenate([BK @ MC2, AK + BK @ MD22CK], axis=2)], axis=1)
    Bcl = np.concatenate([B1 + B2 @ DKM @ D21, BK @ MD21], axis=1)
    Ccl = np.concatenate([C1 + D12 @ DKM @ C2, D12 @ NCK], axis=2)
    Dcl = D11 + D12 @ DKM @ D21
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


class NormCertificate:
    """H-infinity norms of a stack of models, each with what it rests on.

    Attributes
    ----------
    norm : (N,) ``sigma_max(G(j peak))``: an attained value, so a certain lower bound of
        ``||G||_inf``; ``inf`` where the model is not stable.
    peak : (N,) its frequency in rad/s (``inf`` for a peak at infinity, ``nan`` when
        not stable).
    upper : (N,) a certified upper bound: ``norm (1 + 2 rtol)`` where the level-set
        iteration converged with consistent crossings; ``norm (1 + step)`` (a step of
        ``RELAX_STEPS``) where rounding allowed no closer bound; ``inf`` otherwise.
    status : list of N strings, "" where certified, else one line saying why not
        (unstable, not certified stable, iteration in doubt, out of range).
    stability : the :class:`Stability` of the A matrices (the package's predicate),
        None for models without states.
    """

    __slots__ = ("norm", "peak", "upper", "status", "stability")

    def __init__(self, norm, peak, upper, status, stability=None):
        self.norm, self.peak, self.upper, self.status = norm, peak, upper, status
        self.stability = stability

    def below(self, level) -> np.ndarray:
        """(N,) True where ``||G||_inf <= level`` is certified (the upper bound is at most
        the level). Anything in doubt is False."""
        return np.asarray(self.upper <= np.asarray(level, dtype=float))

    def why_above(self, i: int, level: float) -> str:
        """One line: why model ``i`` is not certified below ``level`` ("" when it is)."""
        if self.upper[i] <= level:
            return ""
        if self.status[i]:
            return self.status[i]
        return f"norm {self.norm[i]:.6g} > {level:.6g}"


def sigma_max(M: Any) -> np.ndarray:
    """Largest singular value of stacked matrices (..., r, c).

    Closed forms for one row / column (the vector norm) and for two (the larger
    eigenvalue of the 2 x 2 Gram matrix, ``(t + sqrt((a - d)^2 + 4 |b|^2)) / 2``);
    singular value decomposition otherwise.
    """
    M = np.asarray(M)
    r, c = M.shape[-2], M.shape[-1]
    if r == 0 or c == 0:
        return np.zeros(M.shape[:-2])
    if min(r, c) == 1:
        return np.sqrt(np.sum(M.real ** 2 + M.imag ** 2 if np.iscomplexobj(M) else M * M,
                              axis=(-2, -1)))
    if min(r, c) == 2:
        Mh = np.conj(np.swapaxes(M, -1, -2))
        G = M @ Mh if r == 2 else Mh @ M
        a, d = G[..., 0, 0].real, G[..., 1, 1].real
        b2 = np.abs(G[..., 0, 1]) ** 2
        disc = np.sqrt(np.maximum((a - d) ** 2 + 4.0 * b2, 0.0))
        return np.sqrt(np.maximum(0.5 * (a + d + disc), 0.0))
    return np.linalg.svd(M, compute_uv=False)[..., 0]


def h_infinity_norm(A: Any, B: Any, C: Any, D: Any,
                    rtol: float = 1e-8) -> tuple[float, float]:
    """H-infinity norm ``sup_omega sigma_max(G(j omega))`` and the peak frequency.

    The one-model form of :func:`h_infinity_norms` (the same computation, see there for
    the method and its certificate).

    Parameters
    ----------
    A, B, C, D : array_like
        State-space matrices, shapes (n, n), (n, m), (p, n), (p, m).
    rtol : float, optional
        Relative accuracy; the result satisfies ``norm <= ||G||_inf <= (1 + 3 rtol)
        norm`` (``2 rtol`` from the iteration, up to ``rtol`` more from the rounding of
        sigma_max near lightly damped poles); where rounding allows no such bound, a
        RuntimeWarning names the certified interval (the batched
        :func:`h_infinity_norms` returns it as ``upper``).

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
        The norm could not be certified (iteration in doubt or not converged, or a norm
        beyond the floating-point range); the message says which.

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
    rtol = _check_rtol(rtol)
    cert = _certify(A[None], B[None], C[None], D[None], rtol)
    _raise_uncertified(cert, "the model")
    norm, upper = float(cert.norm[0]), float(cert.upper[0])
    if upper > (1.0 + 3.0 * rtol) * norm:
        warnings.warn(
            f"H-infinity norm of the model certified only within [{norm:.9g}, {upper:.9g}] "
            f"(relative width {upper / norm - 1:.1e}, more than 3 rtol = {3 * rtol:.1e}): "
            "rounding near its lightly damped poles allows no closer bound; rescale its state "
            "coordinates for a tighter one", RuntimeWarning, stacklevel=2)
    return norm, float(cert.peak[0])


def _check_rtol(rtol) -> float:
    """The relative accuracy of the H-infinity norm as a float in (0, 0.1)."""
    try:
        rtol = float(rtol)
    except (TypeError, ValueError):
        raise InputError(f"rtol={rtol!r} is not a number; pass e.g. rtol=1e-8") from None
    if not (0.0 < rtol < 0.1):
        raise InputError(f"rtol={rtol} is outside (0, 0.1); pass e.g. rtol=1e-8")
    return rtol


def _raise_uncertified(cert: NormCertificate, what: str) -> None:
    """NumericalError for the first model whose norm is in doubt (unstable is an answer)."""
    for i, st in enumerate(cert.status):
        unstable = np.isinf(cert.norm[i]) and np.isnan(cert.peak[i])
        if st and not unstable:
            name = what if len(cert.status) == 1 else f"model {i}"
            raise NumericalError(f"H-infinity norm of {name} not certified: {st}")


def _as_stack(value: Any, name: str) -> np.ndarray:
    arr = np.asarray(value)
    if arr.dtype.kind not in "fiub":
        raise PlantError(f"{name} has dtype {arr.dtype}; pass a real numeric (N, rows, cols) array")
    if arr.ndim != 3:
        raise PlantError(f"{name} has {arr.ndim} dimensions; pass a stacked (N, rows, cols) array")
    return arr.astype(float, copy=False)


def _check_stacks(A, B, C, D):
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
    return A, B, C, D


def h_infinity_norms(A: Any, B: Any, C: Any, D: Any, rtol: float = 1e-8,
                     level: Any = None) -> NormCertificate:
    """Certified H-infinity norms of N models of equal size, in lockstep: the package's
    one norm route (every check and certificate uses it).

    Method: the two-step (quadratically convergent) level-set method of Boyd,
    Balakrishnan and Kabamba (1989) and Bruinsma and Steinbuch (1990). For a stable
    ``A`` and ``gamma > sigma_max(D)``, ``gamma`` is a singular value of ``G(j omega)``
    if and only if ``j omega`` is an eigenvalue of the Hamiltonian

        H(gamma) = [[A + B R^-1 D' C,           B R^-1 B'            ],
                    [-C' (I + D R^-1 D') C,     -(A + B R^-1 D' C)'  ]],
        R = gamma^2 I - D' D > 0.

    1. Each model is scaled by powers of 2 (time, input, output: exact in floating point)
       so that its entries are at most 1; the norm and the frequency are scaled back.
    2. Stability by the package's predicate (:func:`stability`); unstable models get
       ``inf``.
    3. Lower bound ``lb``: sigma_max at 0, at infinity (D), at the imaginary parts of the
       complex poles and the moduli of the real poles (Bruinsma and Steinbuch 1990; above
       order 16 the best three after a screening in modal form), evaluated by direct
       solves.
    4. ``gamma = (1 + 2 rtol) lb``. The eigenvalues of ``H(gamma)`` within
       ``AXIS_RTOL |lam| + AXIS_ATOL ||H||_1`` of the imaginary axis are candidate
       crossings ``omega_1 <= ... <= omega_k``. A crossing is confirmed only by the sign
       of ``sigma_max - gamma`` between neighbouring frequencies: sigma_max is evaluated
       at every midpoint and ``lb`` raised to the largest value above gamma; repeat.
    5. Before declaring convergence (no midpoint above gamma), three consistency tests.
       The spectrum must be symmetric about the axis (``lam`` and ``-conj(lam)``): an
       eigenvalue whose mirror image is missing by more than half its distance to the
       axis and by more than ``UNPAIRED_RTOL |lam|`` shows a spectrum destroyed by
       rounding (a badly conditioned model); a smaller asymmetry only leaves the side of
       that eigenvalue open, and it is probed as below. sigma_max is evaluated at the
       eigenvalues in the looser band ``NEAR_AXIS_RTOL |lam|`` (crossings that rounding
       pushed off the axis). The number of crossings must be even (sigma_max is below
       gamma at 0 and at infinity); an odd count adds test points on both sides of every
       crossing and of every eigenvalue whose side is open (relative offsets 1e-1 to
       1e-8 and half the frequency: the interval above gamma of an unpaired crossing
       starts or ends there, possibly at 0). If nothing then exceeds gamma while the
       count is odd or the spectrum unusable, the model stays in doubt. Last, every
       eigenvalue taken as off the axis without a probe must lie farther from it than
       its first-order error bound ``EIG_SAFETY eps ||H||_F / s_i`` (Wilkinson's
       condition number ``s_i``, Golub and Van Loan sec. 7.2.2; :func:`_untrusted`);
       the others are probed at and around their frequencies, and without a value
       above gamma the model is in doubt (status names the eigenvalue, ``1/s_i`` and
       the bound). In a model with fuzzy poles (:func:`_pole_spread`: sigma_max near a
       pole unreliable beyond ``POLE_RTOL``) a probe confirms nothing, so there every
       eigenvalue, including those in the looser band and near the origin, needs its
       bound; elsewhere the upper bound is widened by that ratio (the probes' rounding).
    6. A model left in doubt by step 5 gets the closest of the levels ``(1 + step) lb``
       (``RELAX_STEPS``) whose Hamiltonian has a symmetric spectrum with every eigenvalue
       beyond its bound as its upper bound (no probes: not widened).

    Every ``lb`` is an evaluated sigma_max, so ``norm`` is a lower bound up to the
    rounding of that evaluation (at most the pole spread of :func:`_pole_spread`);
    the upper bound ``(1 + 2 rtol) norm`` is certified only when step 5 passed. A model
    in doubt gets ``upper = inf`` and a status line: a level test on it says "above".

    With a ``level`` only the question "is ``||G||_inf <= level``?" is answered, more
    cheaply: a model whose lower bound (step 3) exceeds the level is above it (``upper`` is
    inf, ``norm`` that lower bound). This is decided first: in an ill-conditioned model
    the computed spectrum of the level's Hamiltonian can lie far from the axis although
    the level is crossed (a closed loop 9e-5 above the level had no eigenvalue within 0.5
    |lambda| of the axis). For the others the Hamiltonian at the level itself is tested
    next, and when none of its eigenvalues lies in the looser band, its spectrum is
    symmetric and every eigenvalue lies beyond its first-order error bound (as in step
    5; no crossing of the level) the model is certified below with ``upper = level`` and
    ``norm`` a lower bound only; the rest get the full computation.

    Parameters
    ----------
    A, B, C, D : array_like
        Stacked matrices, shapes (N, n, n), (N, n, m), (N, p, n), (N, p, m).
    rtol : float, optional
        Relative accuracy.
    level : float or (N,) array, optional
        The level of a level test (see above).

    Returns
    -------
    NormCertificate

    Raises
    ------
    PlantError, InputError
        Bad shapes, non-finite entries, ``rtol`` outside (0, 0.1). Per-model numerical
        trouble is not raised: it is in the certificate's status.

    References
    ----------
    S. Boyd, V. Balakrishnan and P. Kabamba, "A bisection method for computing
    the H-infinity norm of a transfer matrix and related problems", Math.
    Control Signals Systems 2 (1989) 207-219, doi:10.1007/BF02551385.
    N. A. Bruinsma and M. Steinbuch, "A fast algorithm to compute the
    H-infinity-norm of a transfer function matrix", Systems & Control Letters
    14 (1990) 287-293, doi:10.1016/0167-6911(90)90049-Z.
    """
    A, B, C, D = _check_stacks(A, B, C, D)
    if level is not None:
        level = np.broadcast_to(np.asarray(level, dtype=float), (A.shape[0],))
    return _certify(A, B, C, D, _check_rtol(rtol), level)


def h_infinity_norm_many(A: Any, B: Any, C: Any, D: Any,
                         rtol: float = 1e-8) -> tuple[np.ndarray, np.ndarray]:
    """H-infinity norms and peak frequencies of N models of equal size (see
    :func:`h_infinity_norms`, of which this is the raising form).

    Returns
    -------
    norm : (N,) ndarray
        ``inf`` where ``A[i]`` is not stable.
    peak_frequency : (N,) ndarray
        As in :func:`h_infinity_norm` (``inf`` for a peak at infinity, ``nan``
        where unstable).

    Raises
    ------
    PlantError, InputError
        As :func:`h_infinity_norms`.
    NumericalError
        A norm could not be certified; the message names the first model at fault.
    """
    cert = h_infinity_norms(A, B, C, D, rtol)
    _raise_uncertified(cert, "the model")
    return cert.norm, cert.peak


def _exponents(M: np.ndarray) -> np.ndarray:
    """Per model, the exponent e with max |M| = f 2^e, 0.5 <= f < 1 (0 for M = 0)."""
    N = M.shape[0]
    if M.size == 0:
        return np.zeros(N, dtype=int)
    return np.frexp(np.abs(M).reshape(N, -1).max(axis=1))[1]


_SAFE = 2.0 ** 100  # blocks with entries within [2^-100, 2^100] need no scaling
SCREEN_ORDER = 16  # above this order the pole candidates are screened in modal form


def _scale_models(A, B, C, D):
    """Exact power-of-2 scaling so that no entry exceeds 1 (see :func:`h_infinity_norms`,
    step 1): ``(A, B, C, D, et, ea)``, the norm scales back by ``2^et`` and the frequency
    by ``2^ea`` (``et``, ``ea`` None when the entries are all moderate and nothing was
    scaled)."""
    N, n = A.shape[0], A.shape[1]
    blocks = (A, B, C, D) if n else (D,)
    if N == 1:  # the common single-model call: scalar tests
        tops = [float(np.abs(M).max()) if M.size else 0.0 for M in blocks]
        if max(tops) <= _SAFE and all(t == 0.0 or t >= 1.0 / _SAFE for t in tops):
            return A, B, C, D, None, None
    maxima = [np.abs(M).reshape(N, -1).max(axis=1) if M.size else np.zeros(N)
              for M in (A, B, C, D)]
    big = np.max(maxima, axis=0)
    small = np.min([np.where(x > 0, x, _SAFE) for x in maxima], axis=0)
    if not (big > _SAFE).any() and not (small < 1.0 / _SAFE).any():
        return A, B, C, D, None, None
    zero = np.zeros(N, dtype=int)
    ea = np.frexp(maxima[0])[1] if n else zero
    A = np.ldexp(A, -ea[:, None, None])
    B = np.ldexp(B, -ea[:, None, None])
    eb = _exponents(B) if n else zero
    ec = np.frexp(maxima[2])[1] if n else zero
    et = np.maximum(eb + ec, np.frexp(maxima[3])[1])
    B = np.ldexp(B, -eb[:, None, None])
    C = np.ldexp(C, -(et - eb)[:, None, None])
    D = np.ldexp(D, -et[:, None, None])
    return A, B, C, D, et, ea


def _pole_spread(A: np.ndarray, lam: np.ndarray, V: np.ndarray) -> np.ndarray:
    """(k,) the largest ratio over the poles of a rounding bound to the pole's distance to
    the imaginary axis: sigma_max near that pole may be off by about that fraction (the
    resonance sits on a pole that rounding moves). sigma_max comes from LU solves of
    ``jw I - A``, whose backward error is componentwise, about ``eps |A|`` (Higham,
    Accuracy and Stability of Numerical Algorithms, 2nd ed., ch. 9), so the bound is the
    componentwise first-order one ``EIG_SAFETY eps |y_i|^T |A| |x_i| / |y_i^H x_i|``
    (right and left eigenvectors; Geurts 1982, from memory): sharp for graded models
    (poles -0.25 and -2.5e8 are both exact), large in ill-conditioned state coordinates.
    ``V`` holds the right eigenvectors of ``lam``; a singular ``V`` (defective poles)
    gives inf. The bound is pessimistic (a lightly damped model of order 4 with ratio 7e-6
    had sigma_max right to 7e-9 against 40-digit mpmath) but it is a bound."""
    W = _left_eigenvectors(V)
    ok = np.isfinite(W).all(axis=(1, 2))
    out = np.full(A.shape[0], np.inf)
    if ok.any():
        with np.errstate(all="ignore"):
            spread = np.einsum("kin,knm,kmi->ki", np.abs(W[ok]), np.abs(A[ok]), np.abs(V[ok]))
            ratio = EIG_SAFETY * _EPS * spread / np.abs(lam[ok].real)
            out[ok] = np.where(np.isnan(ratio), np.inf, ratio).max(axis=1, initial=0.0)
    return out


def _left_eigenvectors(V: np.ndarray) -> np.ndarray:
    """The rows ``y_i`` of ``V^-1`` for stacked right eigenvector matrices (so that
    ``y_i x_i = 1``); nan for a model whose ``V`` is singular."""
    with np.errstate(all="ignore"):
        try:
            return np.linalg.inv(V)
        except np.linalg.LinAlgError:
            W = np.full_like(V, np.nan)
            for i in range(V.shape[0]):
                try:
                    W[i] = np.linalg.inv(V[i])
                except np.linalg.LinAlgError:
                    pass
            return W


def _condition_numbers(V: np.ndarray) -> np.ndarray:
    """``1 / s_i = ||x_i|| ||y_i||`` for stacked right eigenvector matrices ``V`` (columns
    ``x_i``), the left eigenvectors ``y_i`` from :func:`_left_eigenvectors`; inf for every
    eigenvalue of a model whose ``V`` is singular."""
    W = _left_eigenvectors(V)
    with np.errstate(all="ignore"):
        k = np.linalg.norm(V, axis=1) * np.linalg.norm(W, axis=2)
    return np.where(np.isfinite(k), k, np.inf)


def _mirror_error(ev: np.ndarray) -> np.ndarray:
    """(k, 2n) the distance of each eigenvalue's mirror image ``-conj(lam)`` to the nearest
    other eigenvalue (0 for a symmetric spectrum: a Hamiltonian's eigenvalues come in pairs
    ``lam``, ``-conj(lam)``; Zhou, Doyle and Glover 1996, ch. 13)."""
    dist = np.abs(ev[:, :, None] + np.conj(ev)[:, None, :])
    d = np.arange(ev.shape[1])
    dist[:, d, d] = np.inf
    return dist.min(axis=2)


def _balance(H: np.ndarray) -> np.ndarray:
    """``D^-1 H D`` for stacked square matrices, ``D`` diagonal with powers of 2 (exact):
    the balancing of Parlett and Reinsch (1969), LAPACK dgebal without permutations."""
    out = np.empty_like(H)
    for i in range(H.shape[0]):
        out[i] = scipy.linalg.matrix_balance(H[i], permute=False)[0]
    return out


def _untrusted(H: np.ndarray, skip: Any = 0.0, eig=None,
               fuzzy: np.ndarray | None = None) -> tuple[np.ndarray, ...]:
    """Hamiltonian eigenvalues whose side of the imaginary axis rounding leaves open.

    A backward stable eigenvalue solver returns the eigenvalues of ``H + E`` with ``||E||``
    about ``eps ||H||``; to first order the computed ``lam_i`` then moves by at most
    ``||E|| / s_i``, ``s_i = |y_i^H x_i| / (||x_i|| ||y_i||)`` (Wilkinson's condition
    number, right and left eigenvectors ``x_i``, ``y_i``; Golub and Van Loan, Matrix
    Computations, 4th ed., sec. 7.2.2). An eigenvalue with ``|Re lam_i|`` at most
    ``EIG_SAFETY eps ||H||_F / s_i`` could be on the imaginary axis. Where the bound
    leaves doubt, ``H`` is balanced (:func:`_balance`) and the test repeated (the
    eigenvalue solver balances as well, and a badly scaled but well-conditioned problem,
    such as a Hamiltonian with a peak at infinity, would otherwise look ill-conditioned).
    The left eigenvectors
    are the rows of ``V^-1`` (normalized to ``y_i^H x_i = 1``); a singular ``V`` (a
    defective or nearly defective matrix) makes every eigenvalue of that model untrusted.

    Parameters
    ----------
    H : (k, 2n, 2n) real Hamiltonians.
    skip : float or (k, 1) array; eigenvalues with ``|Re lam| <= skip |lam|`` are never
        counted as untrusted
        (the caller probes them otherwise), nor real ones within ``ORIGIN_RTOL ||H||_1``
        of the origin (a double eigenvalue at 0, from a peak at w = 0, split by rounding:
        left out of every count, that region is decided by sigma_max(0)).
    fuzzy : (k,) bool, models with fuzzy poles (:func:`_pole_spread`): sigma_max(0) is
        unreliable there, so eigenvalues near the origin need their bound as well.

    Returns
    -------
    lam : (k, 2n) eigenvalues (of the eigenvector computation).
    doubt : (k, 2n) bool, the untrusted eigenvalues.
    kappa : (k, 2n) ``1 / s_i`` (inf where V is singular).
    bound : (k, 2n) the allowance ``EIG_SAFETY eps ||H||_F kappa``.
    """
    tiny = ORIGIN_RTOL * np.abs(H).sum(axis=1).max(axis=1)
    if fuzzy is not None:
        tiny[fuzzy] = 0.0
    skip = np.broadcast_to(np.asarray(skip, dtype=float).reshape(-1, 1), (H.shape[0], 1))
    lam, doubt, kappa, bound = _first_order(H, skip, tiny, eig)
    redo = np.flatnonzero(doubt.any(axis=1))
    if redo.size:  # balanced, the bound is usually smaller: the better of the two counts
        out = _first_order(_balance(H[redo]), skip[redo], tiny[redo])
        for whole, part in zip((lam, doubt, kappa, bound), out, strict=True):
            whole[redo] = part
    return lam, doubt, kappa, bound


def _first_order(H: np.ndarray, skip: np.ndarray, tiny: np.ndarray,
                 eig=None) -> tuple[np.ndarray, ...]:
    """:func:`_untrusted` for the matrices as given (no balancing)."""
    lam, V = np.linalg.eig(H) if eig is None else eig
    kappa = _condition_numbers(V)
    with np.errstate(all="ignore"):
        fro = np.sqrt(np.einsum("kij,kij->k", H, H))
        bound = (EIG_SAFETY * _EPS) * fro[:, None] * kappa
    are = np.abs(lam.real)
    mod = np.abs(lam)
    origin = (mod <= tiny[:, None]) & (lam.imag == 0)
    return lam, ~(are > bound) & (are > skip * mod) & ~origin, kappa, bound


def _certify(A, B, C, D, rtol, level=None) -> NormCertificate:
    """The computation of :func:`h_infinity_norms` on validated float stacks."""
    N, n = A.shape[0], A.shape[1]
    p, m = D.shape[1], D.shape[2]
    norm = np.zeros(N)
    peak = np.zeros(N)
    status = [""] * N
    if N == 0 or p == 0 or m == 0:
        return NormCertificate(norm, peak, norm.copy(), status)
    # 1. exact power-of-2 scaling where entries are extreme
    A, B, C, D, et, ea = _scale_models(A, B, C, D)
    sd = sigma_max(D)
    if n == 0:
        return _finish(sd, np.zeros(N), np.zeros(N, bool), status, et, ea, rtol)
    # 2. stability (the eigenvectors serve the pole spread and, above SCREEN_ORDER, the
    # screening of the candidates in 3.)
    screen = n > SCREEN_ORDER
    lam, V = np.linalg.eig(A)
    st = stability_from_eigenvalues(A, lam)
    good = st.stable
    upper = np.full(N, np.inf)
    if not good.all():
        for i in np.flatnonzero(~good):
            status[i] = st.reason(i, "model")
        norm[~good], peak[~good] = np.inf, np.nan
        if not good.any():
            return NormCertificate(norm, peak, upper, status, st)
        idx = np.flatnonzero(good)
        A, B, C, D, lam, sd, V = A[idx], B[idx], C[idx], D[idx], lam[idx], sd[idx], V[idx]
    else:
        idx = None
    # models whose sigma_max values near a pole are unreliable (ill-conditioned poles)
    spread = _pole_spread(A, lam, V)
    fuzzy = ~(spread <= POLE_RTOL)
    M = A.shape[0]
    Bc = B.astype(complex)
    eye = np.eye(n)

    def sigma_at(sel, w):
        """sigma_max(G_sel(j w)) by direct stacked complex solves (a true value; nan, from
        an overflow, and an exactly singular ``jw I - A`` in floating point count as inf:
        toward "above")."""
        if M == 1:  # one model: broadcast its matrices instead of copying them per point
            sel = np.zeros(w.size, dtype=int)
        Ms = 1j * w[:, None, None] * eye - A[sel]
        try:
            G = C[sel] @ np.linalg.solve(Ms, Bc[sel]) + D[sel]
        except np.linalg.LinAlgError:
            G = np.full((w.size, p, m), np.nan, dtype=complex)
            for t in range(w.size):
                try:
                    G[t] = C[sel[t]] @ np.linalg.solve(Ms[t], Bc[sel[t]]) + D[sel[t]]
                except np.linalg.LinAlgError:
                    pass
        s = sigma_max(G)
        s[s != s] = np.inf
        return s

    Dt = D.transpose(0, 2, 1)
    DtD = Dt @ D
    DtC_Bt = np.concatenate([Dt @ C, B.transpose(0, 2, 1)], axis=2)
    CtC = C.transpose(0, 2, 1) @ C
    eye_m = np.eye(m)

    def spectrum(act, gamma):
        """Eigenvalues of the Hamiltonians H(gamma) of the models act, ||H||_1, the
        Hamiltonians and their eigenvectors (for :func:`_untrusted`: one eigen-call)."""
        if act.size == M:  # every model: no copies
            a, b, dtd, rhs, ctc = A, B, DtD, DtC_Bt, CtC
        else:
            a, b, dtd, rhs, ctc = A[act], B[act], DtD[act], DtC_Bt[act], CtC[act]
        X = np.linalg.solve(gamma[:, None, None] ** 2 * eye_m - dtd, rhs)
        H = np.empty((act.size, 2 * n, 2 * n))
        Ah = np.add(a, b @ X[:, :, :n], out=H[:, :n, :n])
        np.matmul(b, X[:, :, n:], out=H[:, :n, n:])
        low = H[:, n:, :n]
        np.matmul(rhs[:, :, :n].transpose(0, 2, 1), X[:, :, :n], out=low)
        low += ctc
        np.negative(low, out=low)
        np.negative(Ah.transpose(0, 2, 1), out=H[:, n:, n:])
        lam, V = np.linalg.eig(H)
        return lam, np.abs(H).sum(axis=1).max(axis=1)[:, None], H, V

    lb = sd.copy()  # sigma_max at infinity: a lower bound of every norm
    pk = np.full(M, np.inf)
    sig0 = np.zeros(M)
    below_level = np.zeros(M, dtype=bool)
    settled = np.zeros(M, dtype=bool)  # decided against the level without the full norm
    if level is not None:
        lv = np.asarray(level, dtype=float)
        lv = lv if idx is None else lv[idx]
        if et is not None:
            lv = np.ldexp(lv, -(et if idx is None else et[idx]))
    rest = np.flatnonzero(~settled)
    # 3. lower bound: sigma_max at 0, at |Im lam| of the complex poles and |lam| of the
    # real ones (the best three of them after a modal screening for large orders), and
    # at infinity (D); each conjugate pair is taken once
    im = lam[rest].imag
    cand = np.where(im > 0, im, np.where(im == 0, np.abs(lam[rest].real), 0.0))
    if screen and rest.size:
        with np.errstate(all="ignore"):
            try:
                VB = np.linalg.solve(V[rest], Bc[rest])
                r = 1.0 / (1j * cand[:, :, None] - lam[rest][:, None, :])  # (k, c, n)
                Gm = (((C[rest] @ V[rest])[:, None, :, :] * r[:, :, None, :]) @ VB[:, None]
                      + D[rest][:, None])
                approx = sigma_max(Gm)
                approx = np.where(np.isfinite(approx), approx, 0.0)
                cand = np.take_along_axis(cand, np.argsort(approx, axis=1)[:, -3:], axis=1)
            except np.linalg.LinAlgError:
                pass
    cand = np.concatenate([np.zeros((rest.size, 1)), cand], axis=1)
    k = cand.shape[1]
    if rest.size:
        sig = sigma_at(np.repeat(rest, k), cand.ravel()).reshape(rest.size, k)
        sig0[rest] = sig[:, 0]  # sigma_max at 0
        best = sig.argmax(axis=1)
        top = sig[np.arange(rest.size), best]
        finite = top > sd[rest]
        lb[rest] = np.where(finite, top, sd[rest])
        pk[rest] = np.where(finite, cand[np.arange(rest.size), best], np.inf)
    for i in rest[lb[rest] == 0.0]:  # zero at 2n + 2 distinct points besides 0: G = 0
        amax = float(np.abs(lam[i]).max())
        extra = np.geomspace(1e-3, 1e3, 2 * n + 2) * (amax if amax > 0 else 1.0)
        s = sigma_at(np.full(extra.size, i), extra)
        j = int(np.argmax(s))
        lb[i], pk[i] = float(s[j]), float(extra[j])
    converged = lb == 0.0
    doubt = np.zeros(M, dtype=bool)
    why = np.zeros(M, dtype=int)  # 1 odd crossing count, 2 unpaired spectrum, 3 untrusted
    cond_info: dict[int, tuple[complex, float, float]] = {}
    if level is not None:
        # an attained value above the level: certainly above (decided first: the level's
        # own Hamiltonian can look clear of the axis in an ill-conditioned model)
        settled |= ~converged & (lb > lv)
        test_lv = np.flatnonzero(~settled & ~converged & (lv > sd))
        if test_lv.size:
            # the Hamiltonian at the level itself: no eigenvalue in the looser band and a
            # symmetric spectrum -> no crossing of the level, so the norm is below it
            ev, _, Hl, Vl = spectrum(test_lv, lv[test_lv])
            mod, are = np.abs(ev), np.abs(ev.real)
            clear = ((are > NEAR_AXIS_RTOL * mod) & (_mirror_error(ev) <= 0.5 * are)).all(axis=1)
            if clear.any():
                # and every eigenvalue far enough from the axis for its computed position
                # to be trusted (first-order bound): otherwise the full computation decides
                rows = np.flatnonzero(clear)
                doubt_l = _untrusted(Hl[rows], 0.0, (ev[rows], Vl[rows]), fuzzy[test_lv[rows]])[1]
                clear[rows[doubt_l.any(axis=1)]] = False
            below_level[test_lv[clear]] = settled[test_lv[clear]] = True
    def best_of(rows, test):
        """The largest sigma_max over the finite test frequencies of each row (models
        ``rows``): (value, frequency), -inf where a row has none."""
        rr, cc = np.nonzero(np.isfinite(test))
        sig = np.full(test.shape, -np.inf)
        if rr.size:
            sig[rr, cc] = sigma_at(rows[rr], test[rr, cc])
        j = sig.argmax(axis=1)
        r = np.arange(test.shape[0])
        return sig[r, j], test[r, j]

    act = np.flatnonzero(~converged & ~settled)
    for _ in range(_MAX_ITER):
        if act.size == 0:
            break
        gamma = (1.0 + 2.0 * rtol) * lb[act]
        ev, hn, Hi, Vi = spectrum(act, gamma)
        mod = np.abs(ev)
        are = np.abs(ev.real)
        upper_half = ev.imag > 0
        on = (are <= AXIS_RTOL * mod + AXIS_ATOL * hn) & upper_half
        # midpoints between neighbouring crossings (sign change of sigma_max - gamma)
        w = np.sort(np.where(on, ev.imag, np.inf), axis=1)
        s, f = best_of(act, 0.5 * (w[:, :-1] + w[:, 1:]))
        up = s > gamma
        st_ = np.flatnonzero(~up)  # would stop here: the consistency tests first
        if st_.size:
            ev, mod, are, on, hn = ev[st_], mod[st_], are[st_], on[st_], hn[st_]
            Hi, Vi = Hi[st_], Vi[st_]
            ups = upper_half[st_]
            # eigenvalues within ORIGIN_RTOL ||H|| of the origin: a double eigenvalue at 0
            # (a peak at w = 0 meeting the level) splits there by rounding along either
            # axis; the region is decided by sigma_max(0), so they are left out of counts
            origin = mod <= ORIGIN_RTOL * hn
            # parity: sigma_max - gamma < 0 at 0 and at infinity: crossings come in pairs
            odd = ((on & ~origin).sum(axis=1) % 2 == 1) & (sig0[act[st_]] < gamma[st_])
            # the spectrum of a Hamiltonian matrix is symmetric about the imaginary axis
            # (lam and -conj(lam)): an eigenvalue whose mirror image is missing by more
            # than half its distance to the axis cannot be placed on either side
            pair_error = _mirror_error(ev)
            sided = (pair_error <= 0.5 * are) | (are <= AXIS_ATOL * hn) | origin
            # mirror image off by more than UNPAIRED_RTOL |lam|: the spectrum is not usable
            unpaired = (~sided & (pair_error > UNPAIRED_RTOL * mod)).any(axis=1)
            # the looser-band eigenvalues and those whose side rounding leaves open, with
            # the midpoint towards 0; a crossing without its partner (odd count) or an
            # eigenvalue whose side is open: the interval above gamma starts or ends
            # there, so both of its sides are probed
            near = ((are <= NEAR_AXIS_RTOL * mod) | ~sided) & ups & ~on
            pts = [np.where(near, ev.imag, np.inf), np.where(near, 0.5 * ev.imag, np.inf)]
            lone = (odd[:, None] & on) | (~sided & ups & ~on)
            if lone.any():
                probe = np.where(lone[:, :, None], ev.imag[:, :, None] * _PROBE_REL, np.inf)
                pts.append(probe.reshape(st_.size, -1))
            s2, f2 = best_of(act[st_], np.concatenate(pts, axis=1))
            up2 = s2 > gamma[st_]
            s[st_[up2]], f[st_[up2]] = s2[up2], f2[up2]
            up[st_[up2]] = True
            bad = odd | unpaired
            # every eigenvalue taken as off the axis without a probe must be placed there
            # beyond its first-order error bound; the others are probed at and around
            # their frequencies, and without a value above gamma the model is in doubt
            chk = np.flatnonzero(~up2 & ~bad)
            if chk.size:
                # eigenvalues in the looser band were probed above: enough where sigma_max
                # is reliable; in models with fuzzy poles they too need their bound
                skip = np.where(fuzzy[act[st_[chk]]], 0.0, NEAR_AXIS_RTOL)[:, None]
                lu, du, ku, bu = _untrusted(Hi[chk], skip, (ev[chk], Vi[chk]),
                                            fuzzy[act[st_[chk]]])
                rows = np.flatnonzero(du.any(axis=1))
                if rows.size:
                    hit = du[rows] & (lu[rows].imag >= 0)
                    fr = np.abs(lu[rows].imag)[:, :, None] * np.append(_PROBE_REL, 1.0)
                    s3, f3 = best_of(act[st_[chk[rows]]],
                                     np.where(hit[:, :, None], fr, np.inf).reshape(rows.size, -1))
                    for r, sv, fv, hr in zip(rows, s3, f3, hit, strict=True):
                        j = st_[chk[r]]
                        if sv > gamma[j]:
                            s[j], f[j], up[j], up2[chk[r]] = sv, fv, True, True
                        else:
                            bad[chk[r]] = True
                            c = np.flatnonzero(hr if hr.any() else du[r])
                            c = c[np.argmax(bu[r, c] / np.maximum(np.abs(lu[r, c].real), 1e-300))]
                            why[act[j]] = 3
                            cond_info[act[j]] = (complex(lu[r, c]), float(ku[r, c]),
                                                 float(bu[r, c]))
            done = act[st_[~up2 & ~bad]]
            converged[done] = True
            doubt[act[st_[~up2 & bad]]] = True
            why[act[st_[~up2 & odd]]] = 1
            why[act[st_[~up2 & unpaired & ~odd]]] = 2
        lb[act[up]] = s[up]
        pk[act[up]] = f[up]
        act = act[up]
    # 6. eigenvalues too uncertain to place at (1 + 2 rtol) lb: the closest of the levels
    # (1 + RELAX_STEPS) lb whose Hamiltonian has a symmetric spectrum with every eigenvalue
    # off the axis beyond its bound is a certified upper bound (no crossing there)
    relaxed = np.full(M, np.nan)
    rows = np.flatnonzero(doubt & (why == 3))
    for step in RELAX_STEPS:
        if rows.size == 0:
            break
        L = (1.0 + step) * lb[rows]
        ev, _, H, V = spectrum(rows, L)
        are = np.abs(ev.real)
        ok = (_mirror_error(ev) <= 0.5 * are).all(axis=1) & (sig0[rows] < L)
        ok &= ~_untrusted(H, 0.0, (ev, V), fuzzy[rows])[1].any(axis=1)
        relaxed[rows[ok]] = L[ok]
        rows = rows[~ok]
    eased = np.isfinite(relaxed)
    doubt[eased] = False
    converged[eased] = True
    sub_status = [""] * M

    def shown(i, x):  # a value of model i in its own units
        if et is None:
            return x
        return float(np.ldexp(x, et[i] if idx is None else et[idx[i]]))

    for i in act:
        sub_status[i] = (f"level-set iteration did not converge in {_MAX_ITER} steps (lower "
                         f"bound {shown(i, lb[i]):.6g})")
    for i in np.flatnonzero(doubt):
        at = shown(i, (1 + 2 * rtol) * lb[i])
        if why[i] == 3:
            lam_i, kap, bnd = cond_info[i]
            tscale = 1.0 if ea is None else float(np.ldexp(1.0, ea[i if idx is None else idx[i]]))
            sub_status[i] = (
                f"the Hamiltonian at level {at:.6g} has the eigenvalue "
                f"{lam_i.real * tscale:.3g}{lam_i.imag * tscale:+.3g}j whose condition number "
                f"1/s = {kap:.3g} allows a rounding error of {bnd * tscale:.3g} (first-order "
                f"bound {EIG_SAFETY:g} eps ||H||_F / s, Golub and Van Loan sec. 7.2.2): it may lie "
                "on the imaginary axis, the upper bound is not certified (ill-conditioned "
                "model; balance or rescale its state coordinates)")
            continue
        sub_status[i] = (
            f"an odd number of imaginary-axis crossings of the Hamiltonian at level {at:.6g} "
            "(a crossing lost to rounding): the upper bound is not certified" if why[i] == 1
            else f"the Hamiltonian at level {at:.6g} has eigenvalues without their mirror "
                 "image -conj(lambda) (rounding in an ill-conditioned model): its crossings "
                 "cannot be counted, the upper bound is not certified")
    # models settled above the level: a lower bound above it, nothing certified from above
    uncertain = ~(converged | settled) | (settled & ~below_level)
    upper_scaled = np.where(below_level, lv if level is not None else 0.0, np.nan)
    e_t = et if (et is None or idx is None) else et[idx]
    e_a = ea if (ea is None or idx is None) else ea[idx]
    # probes by sigma_max confirmed the bound: it holds up to their rounding (step 5)
    # (not in models with fuzzy poles: there the Hamiltonian alone decided)
    sub = _finish(lb, pk, uncertain, sub_status, e_t, e_a, rtol,
                  grow=np.where(fuzzy, 0.0, spread))
    if below_level.any():  # certified below the level: the level is the upper bound
        sub.upper[below_level] = (upper_scaled[below_level] if e_t is None
                                  else np.ldexp(upper_scaled[below_level], e_t[below_level]))
    if eased.any():  # certified at a relaxed level only
        sub.upper[eased] = (relaxed[eased] if e_t is None
                            else np.ldexp(relaxed[eased], e_t[eased]))
    if idx is None:
        return NormCertificate(sub.norm, sub.peak, sub.upper, sub.status, st)
    norm[idx], peak[idx], upper[idx] = sub.norm, sub.peak, sub.upper
    for j, i in enumerate(idx):
        status[i] = sub.status[j]
    return NormCertificate(norm, peak, upper, status, st)


def _finish(lb, pk, uncertain, status, et, ea, rtol, grow=None) -> NormCertificate:
    """Undo the power-of-2 scaling; norms beyond the floating-point range are in doubt.
    The upper bound is ``(1 + 2 rtol) (1 + grow) lb`` (``grow``: the rounding of the
    sigma_max evaluations, :func:`_pole_spread`)."""
    if grow is not None:
        lb_up = lb * (1.0 + np.where(np.isfinite(grow), grow, 0.0))
    else:
        lb_up = lb
    if et is None:
        upper = (1.0 + 2.0 * rtol) * lb_up
        if uncertain.any():
            upper = np.where(uncertain, np.inf, upper)
        return NormCertificate(lb, pk, upper, status)
    with np.errstate(over="ignore"):
        norm = np.ldexp(lb, et)
        peak = np.where(np.isfinite(pk), np.ldexp(pk, ea), pk)
        upper = np.where(uncertain, np.inf, np.ldexp((1.0 + 2.0 * rtol) * lb_up, et))
    status = list(status)
    for i in np.flatnonzero(~np.isfinite(norm) | (~np.isfinite(upper) & ~uncertain)):
        status[i] = status[i] or ("the norm exceeds the floating-point range "
                                  f"(about 2^{int(et[i])}); rescale the inputs or outputs")
        upper[i] = np.inf
    return NormCertificate(norm, peak, upper, status)


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
    if not stability(A).stable[0]:
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
