"""Continuous to discrete time: Tustin (optional frequency pre-warp) and zero-order hold.

Both work on stacked controllers ``A (M, n, n)``, ``B (M, n, m)``, ``C (M, p, n)``,
``D (M, p, m)`` and return the stacked discrete matrices of the difference equation::

    x[k+1] = Ad x[k] + Bd y[k]
    u[k]   = Cd x[k] + Dd y[k]
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg

from ..errors import InputError, NumericalError

METHODS = ("tustin", "zoh")

# Largest condition number of I - (T/2) A accepted by the Tustin solve.
_MAX_CONDITION = 1e12


def _stack(A, B, C, D):
    A, B, C, D = (np.asarray(x, dtype=float) for x in (A, B, C, D))
    single = A.ndim == 2
    if single:
        A, B, C, D = A[None], B[None], C[None], D[None]
    if A.ndim != 3 or A.shape[1] != A.shape[2]:
        raise InputError(f"controller A has shape {A.shape}; expected (n, n) or (M, n, n)")
    M, n = A.shape[0], A.shape[1]
    if B.shape[:2] != (M, n) or C.shape[0] != M or C.shape[2] != n or \
            D.shape != (M, C.shape[1], B.shape[2]):
        raise InputError(f"controller shapes A{A.shape} B{B.shape} C{C.shape} D{D.shape} "
                         "do not fit together; fix the controller data")
    return A, B, C, D, single


def _check_condition(mats: np.ndarray, labels, message) -> None:
    """NumericalError ``message(where, condition)`` at the first of the stacked matrices
    whose condition number is not finite or above the Tustin bound."""
    if not mats.shape[0]:
        return
    cond = np.linalg.cond(mats)
    bad = ~np.isfinite(cond) | (cond > _MAX_CONDITION)
    if bad.any():
        k = int(np.argmax(bad))
        raise NumericalError(message(labels[k] if labels is not None else f"controller {k}",
                                     cond[k]))


def prewarped_step(sample_time: float, prewarp: float) -> float:
    """The step ``T' = 2 tan(w0 T / 2) / w0`` that makes Tustin exact at ``w0``.

    Tustin with pre-warp frequency ``w0`` substitutes ``s = (w0 / tan(w0 T/2)) (z-1)/(z+1)``
    (Franklin, Powell and Workman, *Digital Control of Dynamic Systems*, 3rd ed., 1998,
    sec. 6.3.2), i.e. plain Tustin ``s = (2/T')(z-1)/(z+1)`` with the step ``T'``.
    Returns ``T`` itself when ``w0 == 0``.
    """
    if prewarp == 0.0:
        return sample_time
    half = prewarp * sample_time / 2.0
    if not 0.0 < half < math.pi / 2.0:
        raise InputError(f"pre-warp frequency {prewarp:g} rad/s must be positive and below the "
                         f"Nyquist frequency pi/T = {math.pi / sample_time:g} rad/s; lower it")
    return 2.0 * math.tan(half) / prewarp


def discretize(A, B, C, D, sample_time: float, method: str = "tustin",
               prewarp: float = 0.0, labels=None):
    """Discretize one or many continuous controllers.

    Parameters
    ----------
    A, B, C, D : arrays (n, n), (n, m), (p, n), (p, m), or stacked with a leading M axis.
    sample_time : float
        Sample time T > 0 in seconds.
    method : {"tustin", "zoh"}
        ``"tustin"``: the bilinear transform ``s = (2/T)(z-1)/(z+1)`` in the state-space form
        ``Ad = (I - T/2 A)^-1 (I + T/2 A)``, ``Bd = (I - T/2 A)^-1 T B``,
        ``Cd = C (I - T/2 A)^-1``, ``Dd = D + (T/2) Cd B`` (computed with linear solves,
        never an explicit inverse). It exists when ``2/T`` is not an eigenvalue of A.
        ``"zoh"``: zero-order hold, ``[[Ad, Bd], [0, I]] = expm([[A, B], [0, 0]] T)``,
        ``Cd = C``, ``Dd = D`` (Franklin, Powell and Workman 1998, sec. 4.3; the matrix
        exponential by scaling and squaring, Al-Mohy and Higham, SIAM J. Matrix Anal.
        Appl. 31(3), 2009).
    prewarp : float
        Tustin only: frequency w0 (rad/s) at which the discrete frequency response equals
        the continuous one; 0 for none. Implemented as Tustin with the step of
        :func:`prewarped_step`.
    labels : sequence of str, optional
        One label per controller, used in error messages (for example the grid node).

    Returns
    -------
    (Ad, Bd, Cd, Dd) with the input's stacking.

    Raises
    ------
    InputError
        Non-positive sample time, unknown method, pre-warp with zero-order hold or above
        the Nyquist frequency.
    NumericalError
        ``I - T/2 A`` is singular or ill-conditioned (A has an eigenvalue near 2/T).
    """
    try:
        sample_time = float(sample_time)
        prewarp = float(prewarp)
    except (TypeError, ValueError):
        raise InputError(f"sample time {sample_time!r} and pre-warp {prewarp!r} must be "
                         "numbers") from None
    if not (math.isfinite(sample_time) and sample_time > 0):
        raise InputError(f"sample time {sample_time!r} must be a positive number of seconds")
    if method not in METHODS:
        raise InputError(f"unknown discretization method {method!r}; use one of "
                         f"{', '.join(METHODS)}")
    if not (math.isfinite(prewarp) and prewarp >= 0):
        raise InputError(f"pre-warp frequency {prewarp!r} must be >= 0 rad/s (0 = none)")
    A, B, C, D, single = _stack(A, B, C, D)
    M, n, m = A.shape[0], A.shape[1], B.shape[2]
    if method == "zoh":
        if prewarp:
            raise InputError("pre-warp applies to Tustin only; drop --prewarp or use "
                             "--method tustin")
        aug = np.zeros((M, n + m, n + m))
        aug[:, :n, :n] = A * sample_time
        aug[:, :n, n:] = B * sample_time
        E = scipy.linalg.expm(aug) if M else aug
        Ad, Bd, Cd, Dd = E[:, :n, :n], E[:, :n, n:], C.copy(), D.copy()
    else:
        T = prewarped_step(float(sample_time), float(prewarp))
        eye = np.eye(n)
        Mm = eye - (T / 2.0) * A
        if n:
            _check_condition(Mm, labels, lambda where, c: (
                f"Tustin at {where}: I - (T/2) A has condition number {c:.3g} (A has an "
                f"eigenvalue near 2/T = {2.0 / T:g}); change the sample time"))
            Ad = np.linalg.solve(Mm, eye + (T / 2.0) * A)
            Bd = np.linalg.solve(Mm, T * B)
            Cd = np.swapaxes(np.linalg.solve(np.swapaxes(Mm, 1, 2), np.swapaxes(C, 1, 2)), 1, 2)
            Dd = D + (T / 2.0) * (Cd @ B)
        else:
            Ad, Bd, Cd, Dd = A.copy(), B.copy(), C.copy(), D.copy()
    out = (Ad, Bd, Cd, Dd)
    for name, arr in zip("ABCD", out, strict=True):
        if not np.isfinite(arr).all():
            k = int(np.argmax(~np.isfinite(arr.reshape(M, -1)).all(axis=1)))
            where = labels[k] if labels is not None else f"controller {k}"
            raise NumericalError(f"discretization at {where} gave non-finite {name}d; "
                                 "check the controller and the sample time")
    if single:
        out = tuple(x[0] for x in out)
    return out


def discretize_gain(A, C, H, sample_time: float, method: str = "tustin",
                    prewarp: float = 0.0, labels=None) -> np.ndarray:
    """Discrete anti-windup gain ``Hd`` of stacked continuous controllers.

    The continuous controller with the anti-windup correction is
    ``x' = A x + B y + H (u_lim - u)``, ``u = C x + D y`` (docs/tables.md, "Actuator
    limits"); when the command is limited the state follows ``x' = (A - H C) x + ...``.
    The discrete table keeps the nominal ``(Ad, Bd, Cd, Dd)`` of :func:`discretize`
    unchanged and adds ``Hd``:

    ``"tustin"`` (step ``T`` or the pre-warped ``T'``):
        ``Hd = T M H (I + (T/2) Cd H)^-1`` with ``M = (I - (T/2) A)^-1``, ``Cd = C M``.
        Then ``Ad - Hd Cd`` equals the Tustin image of ``A - H C`` exactly
        (push-through identity; derivation in docs/tables.md), so the limited
        controller's dynamics are Schur stable exactly when ``A - H C`` is Hurwitz.
    ``"zoh"``:
        ``Hd = integral_0^T expm(A s) ds H``: the correction held over the sample
        interval like every other input of a zero-order-hold table (exact for that
        hold; ``Ad - Hd Cd`` agrees with ``expm((A - H C) T)`` to first order in T).

    Parameters
    ----------
    A, C, H : (M, n, n), (M, nu, n), (M, n, nu) continuous matrices (or unstacked).
    sample_time, method, prewarp, labels : as for :func:`discretize`.

    Returns
    -------
    Hd with the input's stacking.

    Raises
    ------
    NumericalError
        ``I + (T/2) Cd H`` singular, i.e. ``A - H C`` has an eigenvalue at ``2/T``.
    """
    A, H, C = (np.asarray(x, dtype=float) for x in (A, H, C))
    single = A.ndim == 2
    if single:
        A, H, C = A[None], H[None], C[None]
    M, n, nu = A.shape[0], A.shape[1], H.shape[2]
    if H.shape[:2] != (M, n) or C.shape != (M, nu, n):
        raise InputError(f"anti-windup shapes A{A.shape} C{C.shape} H{H.shape} do not fit "
                         "together; fix the controller data")
    if n == 0:
        return np.zeros((0, nu)) if single else np.zeros((M, 0, nu))
    if method == "zoh":
        aug = np.zeros((M, n + nu, n + nu))
        aug[:, :n, :n] = A * sample_time
        aug[:, :n, n:] = H * sample_time
        Hd = scipy.linalg.expm(aug)[:, :n, n:] if M else aug[:, :n, n:]
    else:
        T = prewarped_step(float(sample_time), float(prewarp))
        Mm = np.eye(n) - (T / 2.0) * A
        MH = np.linalg.solve(Mm, H)
        Cd = np.swapaxes(np.linalg.solve(np.swapaxes(Mm, 1, 2), np.swapaxes(C, 1, 2)), 1, 2)
        E = np.eye(nu) + (T / 2.0) * (Cd @ H)
        _check_condition(E, labels, lambda where, c: (
            f"anti-windup gain at {where}: I + (T/2) Cd H has condition number {c:.3g} "
            "(A - H C has an eigenvalue near 2/T); change the sample time"))
        # Hd = T M H E^-1, i.e. solve E' Hd' = (T M H)'
        Hd = np.swapaxes(np.linalg.solve(np.swapaxes(E, 1, 2), np.swapaxes(T * MH, 1, 2)), 1, 2)
    if not np.isfinite(Hd).all():
        k = int(np.argmax(~np.isfinite(Hd.reshape(M, -1)).all(axis=1)))
        where = labels[k] if labels is not None else f"controller {k}"
        raise NumericalError(f"anti-windup gain at {where} is not finite; check the controller "
                             "and the sample time")
    return Hd[0] if single else Hd
