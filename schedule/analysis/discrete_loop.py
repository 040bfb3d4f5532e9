"""The sampled loop a discrete table runs in: zero-order hold, stability, bilinear image.

A discrete table runs at sample time ``T``: the controller ``x[k+1] = A x[k] + B y[k]``,
``u[k] = C x[k] + D y[k]`` holds its command over the sample (zero-order hold). The loop
checked here is the generalized plant discretized exactly by zero-order hold at ``T``
(:func:`zoh_plants`; every input, the exogenous ``w`` too, held over the sample),
closed with the discrete controller (the same lower LFT as in continuous time,
:func:`schedule.norms.closed_loop_many`). Its numbers:

- **stability**: spectral radius below one (:func:`discrete_stability`, the discrete
  counterpart of :func:`schedule.norms.stability`, with the same relative and
  rounding allowances);
- **H-infinity norm** ``sup_theta sigma_max(G(e^{j theta}))``, exactly, through the
  bilinear image: ``z = (1 + s) / (1 - s)`` maps the imaginary axis onto the unit
  circle (``s = j w`` goes to ``theta = 2 arctan w``) and the open left half plane
  into the open unit disc, so ``G_c(s) = G(z(s))`` has the same norm, and its state
  matrix has the eigenvalues ``(z - 1) / (z + 1)`` (stable exactly when the discrete
  one is). The image (:func:`bilinear_image`) is a continuous model whose norm the
  package's one norm route certifies (:func:`schedule.norms.h_infinity_norms`);
- **disk and classical margins**: a margin is a supremum or a crossing of a loop
  transfer over frequency, and the map only relabels the frequencies, so the margins
  of the discrete loop are those of the loop of the images
  (:mod:`schedule.margins`), and the images of plant and controller close the same
  loop as the image of the closed loop (the lower LFT is taken pointwise in z).

The image needs ``I + A`` invertible: an eigenvalue near ``z = -1`` (a Tustin
controller with a very fast pole, for example) makes it ill-conditioned. Then the
rotated map ``z = -(1 + s) / (1 - s)`` is used (the realization ``(-A, B, -C, D)`` of
``G(-z)``, whose norm on the circle is the same), chosen per point by the smaller
condition number of ``I + sign A`` over plant and controller. When both are above
:data:`MAX_BILINEAR_CONDITION` (eigenvalues near ``z = 1`` and ``z = -1`` at once) the
point is reported not certified stable, with the reason. The certified norm bound is
widened by the image's rounding, ``1 + BILINEAR_SAFETY cond eps`` (a first-order
forward-error bound of the solve, with a safety factor: common practice).

References
----------
G. F. Franklin, J. D. Powell, M. L. Workman, *Digital Control of Dynamic Systems*,
3rd ed., 1998, sec. 4.3 (zero-order hold) and 6.3 (the bilinear map).
K. Zhou, J. C. Doyle, K. Glover, *Robust and Optimal Control*, 1996, sec. 21.3 (the
state-space bilinear transformation between discrete and continuous time; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ..norms import STABILITY_EPS, STABILITY_RTOL, closed_loop_many

__all__ = [
    "DiscreteStability",
    "MAX_BILINEAR_CONDITION",
    "bilinear_image",
    "bilinear_signs",
    "discrete_check_arrays",
    "discrete_stability",
    "physical_frequency",
    "zoh_plants",
]

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")
_EPS = float(np.finfo(float).eps)

#: Largest condition number of ``I + sign A`` (plant or controller) for which the
#: bilinear image is trusted; above it on both signs the point is not certified.
MAX_BILINEAR_CONDITION = 1e10
#: Safety factor on the first-order rounding bound ``cond eps`` of the image.
BILINEAR_SAFETY = 100.0


# ----------------------------------------------------------------------------- plant
def zoh_plants(P: dict, sample_time: float) -> dict[str, np.ndarray]:
    """Generalized plants discretized exactly by zero-order hold at ``sample_time``.

    Every input (``w`` and ``u``) is held over the sample:
    ``[[Ad, Bd], [0, I]] = expm([[A, B], [0, 0]] T)`` with ``B = [B1 B2]``; C and D stay
    (Franklin, Powell and Workman 1998, sec. 4.3). The one zero-order hold of the
    package, :func:`schedule.export.discretize.discretize`, does the work.

    Parameters
    ----------
    P : the nine stacked plant arrays ``A ... D22``, each (M, rows, cols).
    sample_time : T > 0 in seconds.

    Returns
    -------
    dict of the nine discrete arrays.
    """
    from ..export.discretize import discretize

    P = {k: np.asarray(P[k], dtype=float) for k in PLANT_KEYS}
    nw = P["B1"].shape[2]
    B = np.concatenate([P["B1"], P["B2"]], axis=2)
    C = np.concatenate([P["C1"], P["C2"]], axis=1)
    D = np.concatenate([np.concatenate([P["D11"], P["D12"]], axis=2),
                        np.concatenate([P["D21"], P["D22"]], axis=2)], axis=1)
    Ad, Bd, _, _ = discretize(P["A"], B, C, D, sample_time, "zoh")
    out = dict(P)
    out["A"], out["B1"], out["B2"] = Ad, Bd[:, :, :nw], Bd[:, :, nw:]
    return out


# ----------------------------------------------------------------------------- stability
@dataclass(frozen=True)
class DiscreteStability:
    """Outcome of :func:`discrete_stability` for a stack of discrete state matrices.

    radius : (N,) spectral radius (0 without states); stable : (N,) the verdict;
    allowance : (N,) how far inside the unit circle every eigenvalue must lie.
    """

    radius: np.ndarray
    stable: np.ndarray
    allowance: np.ndarray

    def reason(self, i: int, what: str = "discrete closed loop") -> str:
        """One line saying why model ``i`` is not stable (empty when it is)."""
        if self.stable[i]:
            return ""
        r = float(self.radius[i])
        if r >= 1.0:
            return f"{what} unstable (spectral radius {r:.6g})"
        return (f"{what} not certified stable: spectral radius {r:.12g} lies within "
                f"{float(self.allowance[i]):.2g} of the unit circle (rounding and relative "
                f"allowance {STABILITY_RTOL:g})")


def discrete_stability(A) -> DiscreteStability:
    """Schur stability of stacked discrete state matrices (hidden modes count).

    A model is stable when every eigenvalue satisfies
    ``|z| < 1 - (STABILITY_RTOL + STABILITY_EPS eps ||A_bal||_1)``: the relative and
    rounding allowances of :func:`schedule.norms.stability` (eigenvalues on the unit
    circle up to rounding are not stable), with ``A_bal`` the balanced matrix (LAPACK
    dgebal through scipy), so the verdict does not depend on the state coordinates.
    """
    A = np.asarray(A, dtype=float)
    if A.ndim == 2:
        A = A[None]
    N, n = A.shape[0], A.shape[1]
    if n == 0:
        return DiscreteStability(np.zeros(N), np.ones(N, bool), np.zeros(N))
    radius = np.abs(np.linalg.eigvals(A)).max(axis=1)
    scale = np.abs(A).sum(axis=1).max(axis=1)
    allowance = STABILITY_RTOL + STABILITY_EPS * _EPS * scale
    stable = radius < 1.0 - allowance
    for i in np.flatnonzero(~stable & (radius < 1.0 - STABILITY_RTOL)):
        _, (d, _p) = scipy.linalg.matrix_balance(A[i], permute=False, separate=True)
        bal = float(np.abs(A[i] * (d[None, :] / d[:, None])).sum(axis=0).max())
        allowance[i] = STABILITY_RTOL + STABILITY_EPS * _EPS * bal
        stable[i] = bool(radius[i] < 1.0 - allowance[i])
    return DiscreteStability(radius, stable, allowance)


# ----------------------------------------------------------------------------- bilinear
def _conditions(A: np.ndarray, sign: float) -> np.ndarray:
    """cond(I + sign A) per stacked matrix (1 without states)."""
    if A.shape[1] == 0:
        return np.ones(A.shape[0])
    with np.errstate(all="ignore"):
        c = np.linalg.cond(np.eye(A.shape[1]) + sign * A)
    return np.where(np.isfinite(c), c, np.inf)


def bilinear_signs(*As) -> tuple[np.ndarray, np.ndarray]:
    """Per point the sign of the map (+1: ``z = (1+s)/(1-s)``, -1: ``z = -(1+s)/(1-s)``)
    with the smaller worst condition number of ``I + sign A`` over the stacks ``As``;
    returns ``(sign (N,), condition (N,))``."""
    plus = np.max([_conditions(np.asarray(A, float), 1.0) for A in As], axis=0)
    minus = np.max([_conditions(np.asarray(A, float), -1.0) for A in As], axis=0)
    sign = np.where(minus < plus, -1.0, 1.0)
    return sign, np.minimum(plus, minus)


def bilinear_image(A, B, C, D, sign=1.0):
    """Continuous model ``G_c(s) = G(sign (1 + s) / (1 - s))`` of discrete stacked models.

    With ``E = I + sign A`` (derivation: ``z I - A = E (s I - A_c) / (1 - s)`` for
    ``z = (1 + s)/(1 - s)``, and ``I - A_c = 2 E^-1``):

        A_c = E^-1 (sign A - I),   B_c = sqrt(2) E^-1 B,
        C_c = sqrt(2) sign C E^-1, D_c = D - sign C E^-1 B,

    computed with linear solves. ``G_c(j w) = G(sign e^{j 2 arctan w})``; the
    eigenvalues of ``A_c`` are ``(sign z - 1)/(sign z + 1)`` for the eigenvalues z of A.

    Parameters
    ----------
    A, B, C, D : (N, n, n), (N, n, m), (N, p, n), (N, p, m) discrete models.
    sign : scalar or (N,) array of +1 / -1 (see :func:`bilinear_signs`).
    """
    A, B, C, D = (np.asarray(x, dtype=float) for x in (A, B, C, D))
    N, n = A.shape[0], A.shape[1]
    s = np.broadcast_to(np.asarray(sign, dtype=float), (N,))[:, None, None]
    if n == 0:
        return A.copy(), B.copy(), C.copy(), D.copy()
    eye = np.eye(n)
    E = eye + s * A
    Ac = np.linalg.solve(E, s * A - eye)
    EB = np.linalg.solve(E, B)
    CE = np.swapaxes(np.linalg.solve(np.swapaxes(E, 1, 2), np.swapaxes(C, 1, 2)), 1, 2)
    root2 = np.sqrt(2.0)
    return Ac, root2 * EB, root2 * s * CE, D - s * (C @ EB)


def physical_frequency(omega, sample_time: float, sign) -> np.ndarray:
    """The discrete frequency in rad/s (0 .. pi/T) of the image frequency ``omega``.

    ``s = j w`` is ``z = sign e^{j theta}`` with ``theta = 2 arctan w`` (``w = inf``:
    ``theta = pi``); for sign -1 the angle is ``theta + pi``, i.e. ``pi - theta`` by the
    symmetry of real models. NaN stays NaN.
    """
    w = np.asarray(omega, dtype=float)
    theta = 2.0 * np.arctan(w)  # arctan(inf) = pi/2
    theta = np.where(np.asarray(sign, dtype=float) < 0, np.pi - theta, theta)
    return theta / float(sample_time)


def _image_plant(P: dict, sign) -> dict:
    nw, nz = P["B1"].shape[2], P["C1"].shape[1]
    B = np.concatenate([P["B1"], P["B2"]], axis=2)
    C = np.concatenate([P["C1"], P["C2"]], axis=1)
    D = np.concatenate([np.concatenate([P["D11"], P["D12"]], axis=2),
                        np.concatenate([P["D21"], P["D22"]], axis=2)], axis=1)
    Ac, Bc, Cc, Dc = bilinear_image(P["A"], B, C, D, sign)
    return {"A": Ac, "B1": Bc[:, :, :nw], "B2": Bc[:, :, nw:], "C1": Cc[:, :nz],
            "C2": Cc[:, nz:], "D11": Dc[:, :nz, :nw], "D12": Dc[:, :nz, nw:],
            "D21": Dc[:, nz:, :nw], "D22": Dc[:, nz:, nw:]}


def discrete_check_arrays(Pd: dict, Kd: dict, gamma: float, gamma_tolerance: float,
                          classical: bool, sample_time: float) -> dict[str, np.ndarray]:
    """The frozen-point numbers of :func:`schedule.check.check_arrays` for discrete loops.

    ``Pd`` are zero-order-hold plants (:func:`zoh_plants`), ``Kd`` discrete controllers
    at the same points. The norm and the margins are those of the bilinear images
    (module docstring), the peak frequency is converted back to rad/s of the discrete
    loop, the certified norm bound is widened by the image's rounding, and stability
    requires both the spectral radius test (:func:`discrete_stability`) and the
    image's stability. Extra keys: ``spectral_radius``, ``bilinear_condition``.
    A module-level function of arrays only (it runs on worker processes too).
    """
    from ..check import PassCriterion, check_arrays

    Pd = {k: np.asarray(Pd[k], dtype=float) for k in PLANT_KEYS}
    Kd = {k: np.asarray(Kd[k], dtype=float) for k in ("A", "B", "C", "D")}
    M = Pd["A"].shape[0]
    sign, cond = bilinear_signs(Pd["A"], Kd["A"])
    Pc = _image_plant(Pd, sign)
    Kc = dict(zip("ABCD", bilinear_image(Kd["A"], Kd["B"], Kd["C"], Kd["D"], sign),
                  strict=True))
    out = check_arrays(Pc, Kc, gamma, gamma_tolerance, classical)
    ds = discrete_stability(closed_loop_many(Pd, Kd)[0])
    stable = np.asarray(out["stable"], bool).copy()
    why = np.array(out["stability_status"], dtype=object)
    for i in range(M):
        if not ds.stable[i]:
            why[i] = ds.reason(i)
        elif not cond[i] <= MAX_BILINEAR_CONDITION:
            why[i] = (f"discrete closed loop not certified: eigenvalues near z = 1 and z = -1 "
                      f"make the bilinear image ill-conditioned (condition {cond[i]:.3g} > "
                      f"{MAX_BILINEAR_CONDITION:.0e}); counted as unstable")
        elif not stable[i]:
            why[i] = (f"bilinear image of the discrete closed loop (spectral radius "
                      f"{ds.radius[i]:.12g}): {why[i]}")
        else:
            continue
        stable[i] = False
    out["stable"] = stable
    out["stability_status"] = why
    out["norm_status"] = np.array([s if stable[i] else "" for i, s in
                                   enumerate(out["norm_status"])], dtype=object)
    widen = 1.0 + BILINEAR_SAFETY * _EPS * np.where(np.isfinite(cond), cond, np.inf)
    out["norm_bound"] = np.where(stable, out["norm_bound"] * widen, np.inf)
    out["norm"] = np.where(stable, out["norm"], np.inf)
    out["ratio"] = out["norm"] / gamma
    out["peak_frequency"] = physical_frequency(out["peak_frequency"], sample_time, sign)
    out["spectral_radius"] = ds.radius
    out["bilinear_condition"] = cond
    out["norm_ok"] = PassCriterion(float(gamma), float(gamma_tolerance)).norm_passes(out)
    return out
