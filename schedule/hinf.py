"""H-infinity sub-optimal output feedback by the Riccati route.

Problem: for the generalized plant ``P`` (see :mod:`schedule.plant`) find a
controller ``u = K y`` that stabilizes the lower LFT ``F_l(P, K)`` and keeps
``||F_l(P, K)||_inf < gamma``.

Method (Glover and Doyle 1988; Doyle, Glover, Khargonekar and Francis 1989;
Zhou, Doyle and Glover 1996, ch. 14 and section 17.1 "general case"):

1. Normalization. Orthogonal rotations of ``z`` and ``w`` and invertible
   scalings of ``u`` and ``y`` (from SVDs) give ``D12 = [0; I]`` and
   ``D21 = [0, I]``; a diagonal change of state coordinates balances the plant and
   one scalar each for ``z`` and ``w`` brings gamma near 1
   (:meth:`schedule.plant.GeneralizedPlant.scaling`). None of this changes what is
   achievable (gamma scales with the units of z and w), and all of it is undone in the
   controller (``K = Tu K~ Ty`` in the plant's state coordinates), so the answers do not
   depend on units or coordinates.
2. D22 is removed by loop shifting: design ``K0`` for ``D22 = 0`` and use
   ``K = K0 (I + D22 K0)^-1`` (well-posed when ``I + D22 D_K0`` is
   invertible).
3. With ``D1. = [D11 D12]``, ``D.1 = [D11; D21]``,
   ``R = D1.'D1. - diag(gamma^2 I, 0)`` and ``Rt = D.1 D.1' - diag(gamma^2 I, 0)``,
   the X and Y Riccati equations (with all cross terms) are::

       X = Ric([A 0; -C1'C1 -A'] - [B; -C1'D1.] R^-1 [D1.'C1, B'])
       Y = Ric([A' 0; -B1B1' -A] - [C'; -B1D.1'] Rt^-1 [D.1B1', C])

   ``F = -R^-1 (D1.'C1 + B'X) = [F1; F2]`` (F1 = [F11; F12] the worst
   disturbance, F2 the state feedback) and
   ``L = -(B1 D.1' + Y C') Rt^-1 = [L1, L2]`` (L1 = [L11, L12], L2 the
   observer gain).
   A controller exists iff ``gamma > max(sigma_max[D1111, D1112],
   sigma_max[D1111', D1121'])`` (Parrott-type bound), the stabilizing
   X >= 0 and Y >= 0 exist, and ``rho(XY) < gamma^2``.
4. Central controller with ``Z = (I - gamma^-2 Y X)^-1``::

       Dk = -D1121 D1111' (gamma^2 I - D1111 D1111')^-1 D1112 - D1122
       Bk = -Z L2 + Z (B2 + L12) Dk
       Ck = F2 - Dk (C2 + F12)
       Ak = A + B F - Bk (C2 + F12)

   In the familiar case D11 = 0, D12'C1 = 0, B1 D21' = 0 this is
   ``Ak = A + gamma^-2 B1 B1'X - B2 B2'X - Z Y C2' C2``, ``Bk = Z Y C2'``,
   ``Ck = -B2'X``: the controller state is an estimate of the plant state.

Every controller returned is certified on the plant (:func:`certify_controller`): the
closed loop is stable and its norm at most gamma (1 + 1e-6), or a NumericalError says
why (ill-conditioning near the optimum or for large gamma) and what to do.

Sign convention: ``u = K y``, closed loop = lower LFT (see
:func:`schedule.norms.closed_loop`).

References
----------
(bibliographic details from memory)

K. Glover and J. C. Doyle, "State-space formulae for all stabilizing
controllers that satisfy an H-infinity norm bound and relations to risk
sensitivity", Systems & Control Letters 11(3), 167-172, 1988.
doi:10.1016/0167-6911(88)90055-2

J. C. Doyle, K. Glover, P. P. Khargonekar and B. A. Francis, "State-space
solutions to standard H2 and H-infinity control problems", IEEE Trans.
Automatic Control 34(8), 831-847, 1989. doi:10.1109/9.29425

K. Zhou, J. C. Doyle and K. Glover, Robust and Optimal Control, Prentice
Hall, 1996, ch. 14-17.

M. G. Safonov, D. J. N. Limebeer and R. Y. Chiang, "Simplifying the
H-infinity theory via loop-shifting, matrix-pencil and descriptor concepts",
Int. J. Control 50(6), 2467-2488, 1989. doi:10.1080/00207178908953510

D. J. Stilwell and W. J. Rugh, "Interpolation of observer state feedback
controllers for gain scheduling", IEEE Trans. Automatic Control 44(6),
1225-1229, 1999.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from .errors import (
    InfeasibleGammaError,
    InputError,
    NumericalError,
    PlantError,
    ScheduleError,
)
from .norms import closed_loop_many, h_infinity_norms
from .plant import PLANT_KEYS, GeneralizedPlant
from .riccati import (
    RESIDUAL_RTOL,
    SCALING_EXP,
    _symplectic_scaling,
    axis_distance,
    solve_riccati,
    stable_solution,
)

__all__ = [
    "Controller",
    "ObserverPieces",
    "Normalized",
    "normalize",
    "parrott_bound",
    "gamma_lower_bound",
    "optimal_gamma",
    "central_controller",
    "central_controller_checked",
    "certify_controller",
    "central_controllers",
    "assemble_controller",
    "feasibility",
    "synthesize_many",
    "GammaLimit",
    "gamma_opt_limits",
    "limit_channels",
    "LIMIT_CAUSES",
]

PSD_RTOL = 1e-8  # min eig >= -PSD_RTOL max(1, ||X||) of the balanced X counts as X >= 0
COUPLING_RTOL = 1e-9  # rho(XY) must be below gamma^2 (1 - COUPLING_RTOL)
Z_COND_WARN = 1e10  # warn above this condition number of Z
GAMMA_MAX = 1e12  # doubling stops here (scaled gamma): no upper bound means infeasible
ZERO_INFIMUM = 1e-10  # scaled gamma below which a search with no lower end stops
NEAR_SINGULAR_RATIO = 1e-5  # D12 / D21 singular value ratio named when the search fails
DESIGN_MARGIN = 1e-3  # smallest relative step above gamma_opt we advise for a controller
CONTROLLER_RTOL = 1e-6  # a controller's certified closed-loop norm may exceed gamma by this
RESCALE_FACTOR = 8.0  # the quick test re-balances its Hamiltonian when gamma moves this much
SHIFT_COND_MAX = 1e10  # condition number of I + Dk D22 above this: loop shift ill-posed

PIECE_KEYS = (
    "state_feedback",
    "worst_disturbance",
    "observer_gain",
    "performance_injection",
    "Z",
)


# ============================================================== data classes
@dataclass(frozen=True)
class ObserverPieces:
    """Observer-form pieces of the central controller, in the plant's own signals.

    The gains act on the ORIGINAL u, w, y and z (not on the normalized ones),
    so they do not depend on the arbitrary signs and bases of the SVDs used
    for normalization and vary smoothly with the operating point. With
    ``F = [F1; F2]`` and ``L = [L1, L2]`` of the normalized problem (see the
    module docstring) and ``w = Sw' w~``, ``u = Tu u~``, ``z~ = Sz z``,
    ``y~ = Ty y``:

    Attributes
    ----------
    state_feedback : (nu, n) ``Tu F2``: the full-information control law
        ``u = state_feedback @ x`` (``-B2'X`` in the normalized case).
    worst_disturbance : (nw, n) ``Sw' F1``: the worst disturbance
        ``w = worst_disturbance @ x`` (``gamma^-2 B1'X`` in the normalized case).
    observer_gain : (n, ny) ``L2 Ty`` (``-Y C2' (D21 D21')^-1`` when
        ``B1 D21' = 0``); the controller injects ``-Z L2`` times the output error.
    performance_injection : (n, nz) ``L1 Sz``.
    Z : (n, n) ``(I - gamma^-2 Y X)^-1``.

    :func:`assemble_controller` rebuilds the controller from these pieces, the
    plant matrices and gamma (no Riccati solve), so interpolating the plant
    and the pieces separately gives an observer-form scheduled controller
    (Stilwell and Rugh 1999).
    """

    state_feedback: np.ndarray
    worst_disturbance: np.ndarray
    observer_gain: np.ndarray
    performance_injection: np.ndarray
    Z: np.ndarray

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Fixed key set (``PIECE_KEYS``), fixed shapes for a given plant size."""
        return {k: np.array(getattr(self, k), dtype=np.float64) for k in PIECE_KEYS}

    @classmethod
    def from_arrays(cls, d: dict[str, np.ndarray]) -> ObserverPieces:
        """Inverse of :meth:`to_arrays`."""
        missing = [k for k in PIECE_KEYS if k not in d]
        if missing:
            raise PlantError(f"observer pieces lack {', '.join(missing)}; give all of {PIECE_KEYS}")
        return cls(**{k: np.array(d[k], dtype=np.float64) for k in PIECE_KEYS})


@dataclass(frozen=True)
class Controller:
    """A controller ``xk' = A xk + B y``, ``u = C xk + D y`` (``u = K y``).

    ``gamma`` is the bound it was designed for; ``pieces`` the observer-form
    pieces; ``z_condition`` the condition number of ``I - gamma^-2 Y X``
    (large near the optimal gamma: the controller becomes ill-conditioned).
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    gamma: float
    pieces: ObserverPieces
    z_condition: float = float("nan")

    def as_tuple(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        return self.A, self.B, self.C, self.D


@dataclass(frozen=True)
class Normalized:
    """The plant in the scaled coordinates of :meth:`GeneralizedPlant.scaling`.

    ``D12 = [0; I]``, ``D21 = [0, I]`` (up to rounding); the states are
    ``x~ = diag(t)^-1 x``; ``z~ = Sz z``, ``w = Sw' w~``, ``u = Tu u~``, ``y~ = Ty y``;
    the gamma of this problem is ``gamma / gamma_scale`` (near 1 for a problem whose
    optimum is of the order of its data). ``d11_bound`` is the Parrott-type bound in
    these units.
    """

    A: np.ndarray
    B1: np.ndarray
    B2: np.ndarray
    C1: np.ndarray
    C2: np.ndarray
    D11: np.ndarray
    D12: np.ndarray
    D21: np.ndarray
    Sz: np.ndarray
    Sw: np.ndarray
    Tu: np.ndarray
    Ty: np.ndarray
    dims: tuple[int, int, int, int, int] = field(default=(0, 0, 0, 0, 0))
    d11_bound: float = float("nan")
    x_side: _Side | None = None
    y_side: _Side | None = None
    t: np.ndarray | None = None
    gamma_scale: float = 1.0
    d12_ratio: float = 1.0
    d21_ratio: float = 1.0


# ============================================================ normalization
def normalize(plant: GeneralizedPlant) -> Normalized:
    """The plant in well-scaled coordinates: ``D12 = [0; I]``, ``D21 = [0, I]``, balanced
    states and a gamma normalized near 1 (see :class:`schedule.plant.PlantScaling`).

    With the SVDs ``D12 = U S V'`` and ``D21 = U2 [S2 0] V2'``:
    ``Sz = [U(:, nu:)'; U(:, :nu)'] / sigma_z``, ``Tu = sigma_z V S^-1``,
    ``Sw = sigma_w [V2(:, ny:)'; V2(:, :ny)']``, ``Ty = S2^-1 U2' / sigma_w`` and the
    balanced state coordinates ``x = diag(t) x~``; gamma of the scaled problem is
    ``gamma / gamma_scale``, ``gamma_scale = sigma_z / sigma_w``.
    """
    if isinstance(plant, GeneralizedPlant):  # kept on the plant (by content)
        return plant.memo("normalized", lambda: _normalize(plant))
    return _normalize(plant)


def _normalize(plant: GeneralizedPlant) -> Normalized:
    sc = plant.scaling()
    Sz = sc.Rz / sc.sigma_z
    Tu = sc.Tu0 * sc.sigma_z
    Sw = sc.Rw * sc.sigma_w
    Ty = sc.Ty0 / sc.sigma_w
    return _apply_transforms(plant, Sz, Sw, Tu, Ty, sc)


def _apply_transforms(plant, Sz, Sw, Tu, Ty, sc) -> Normalized:
    t = sc.t
    A = plant.A * (t[None, :] / t[:, None])
    B1 = (plant.B1 / t[:, None]) @ Sw.T
    B2 = (plant.B2 / t[:, None]) @ Tu
    C1 = Sz @ (plant.C1 * t[None, :])
    C2 = Ty @ (plant.C2 * t[None, :])
    D11 = Sz @ plant.D11 @ Sw.T
    D12 = Sz @ plant.D12 @ Tu
    D21 = Ty @ plant.D21 @ Sw.T
    dims = (plant.n, plant.nw, plant.nu, plant.nz, plant.ny)
    return Normalized(
        A=A,
        B1=B1,
        B2=B2,
        C1=C1,
        C2=C2,
        D11=D11,
        D12=D12,
        D21=D21,
        Sz=Sz,
        Sw=Sw,
        Tu=Tu,
        Ty=Ty,
        dims=dims,
        d11_bound=_parrott_of(D11, dims),
        x_side=_side(A, B1, B2, C1, D11, D12),
        y_side=_side(A.T, C1.T, C2.T, B1.T, D11.T, D21.T),
        t=t,
        gamma_scale=sc.gamma_scale,
        d12_ratio=sc.d12_ratio,
        d21_ratio=sc.d21_ratio,
    )


def _d11_blocks(P: Normalized):
    return _d11_split(P.D11, P.dims)


def _d11_split(D: np.ndarray, dims):
    _, nw, nu, nz, ny = dims
    r, c = nz - nu, nw - ny
    return D[:r, :c], D[:r, c:], D[r:, :c], D[r:, c:]


def parrott_bound(plant: GeneralizedPlant | Normalized) -> float:
    """``max(sigma_max[D1111, D1112], sigma_max[D1111', D1121'])`` of the normalized D11,
    in the plant's own units.

    Every achievable gamma is strictly larger (Glover and Doyle 1988; Zhou,
    Doyle and Glover 1996, Theorem 17.1). Zero when D11 = 0.
    """
    P = plant if isinstance(plant, Normalized) else normalize(plant)
    return P.d11_bound * P.gamma_scale


def _parrott_of(D11: np.ndarray, dims) -> float:
    if not D11.any():
        return 0.0
    d1111, d1112, d1121, _ = _d11_split(D11, dims)
    top = np.hstack([d1111, d1112])
    left = np.vstack([d1111, d1121])
    a = float(np.linalg.svd(top, compute_uv=False)[0]) if top.size else 0.0
    b = float(np.linalg.svd(left, compute_uv=False)[0]) if left.size else 0.0
    return max(a, b)


# ============================================================= Riccati data
@dataclass(frozen=True)
class _Side:
    """The gamma-independent data of one Riccati equation (X, or Y through the dual)."""

    A: np.ndarray
    B: np.ndarray  # [B1 B2]
    nw: int
    DtD: np.ndarray  # D1.'D1.
    S: np.ndarray  # D1.'C1
    SBt: np.ndarray  # [S, B']
    CtC: np.ndarray  # C1'C1


def _side(A, B1, B2, C1, D11, D12) -> _Side:
    B = np.hstack([B1, B2])
    D1 = np.hstack([D11, D12])
    S = D1.T @ C1
    return _Side(A, B, B1.shape[1], D1.T @ D1, S, np.hstack([S, B.T]), C1.T @ C1)


def _cancelled(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a - b`` with the entries that cancel to rounding level set to exactly zero.

    ``Q = C1'C1 - C1'D1. Rm^-1 D1.'C1`` vanishes identically in some problems (the
    one-block problem); computed, it is rounding noise of size ``eps ||C1'C1||``, and the
    symplectic balancing at small gamma scales Q up by ``||R|| / ||A||``, which turns that
    noise into a spurious indefinite X. An entry is kept when it exceeds 64 eps times the
    sizes of the two terms it came from.
    """
    d = a - b
    d[np.abs(d) <= 64.0 * np.finfo(float).eps * (np.abs(a) + np.abs(b))] = 0.0
    return d


def _x_data(side: _Side, gamma: float):
    """Riccati data (Ah, Rh, Qh) of the X equation and the pieces needed for F.

    ``A'X + XA + XRX + Q = 0`` form with ``Rm = D1.'D1. - diag(gamma^2 I, 0)``,
    ``Ah = A - B Rm^-1 D1.'C1``, ``Rh = -B Rm^-1 B'``, ``Qh = C1'C1 - C1'D1. Rm^-1 D1.'C1``.
    """
    n = side.A.shape[0]
    Rm = side.DtD.copy()
    k = np.arange(side.nw)
    Rm[k, k] -= gamma * gamma
    sol = np.linalg.solve(Rm, side.SBt)
    Ah = side.A - side.B @ sol[:, :n]
    Rh = -side.B @ sol[:, n:]
    Qh = _cancelled(side.CtC, side.S.T @ sol[:, :n])
    Rh = 0.5 * (Rh + Rh.T)
    Qh = 0.5 * (Qh + Qh.T)
    return Ah, Rh, Qh, Rm, side.S, side.B


def _dual(P: Normalized):
    """Data of the Y equation written as an X equation of the dual problem."""
    return P.A.T, P.C1.T, P.C2.T, P.B1.T, P.D11.T, P.D21.T


def _primal(P: Normalized):
    return P.A, P.B1, P.B2, P.C1, P.D11, P.D12


def _solve_side(data, gamma: float, name: str, gain: bool = True, shown: float | None = None):
    """Solve one Riccati side at the scaled gamma; returns (X, gain or None, reason).

    ``shown`` is gamma in the plant's units, for the messages."""
    shown = gamma if shown is None else shown
    try:
        Ah, Rh, Qh, Rm, S, B = _x_data(data, gamma)
    except np.linalg.LinAlgError:
        return (
            None,
            None,
            (f"{name} Riccati data singular at gamma={shown:.6g} (gamma at the D11 bound)"),
        )
    res = solve_riccati(Ah, Rh, Qh)
    if not res.ok:
        return (
            None,
            None,
            (f"{name} Riccati has no stabilizing solution at gamma={shown:.6g} ({res.reason})"),
        )
    X = res.X
    ev = res.balanced_eigenvalues  # the sign is decided where X has its natural size 1
    m = float(ev[0] / max(1.0, abs(ev[0]), abs(ev[-1])))
    if m < -PSD_RTOL:
        return (
            None,
            None,
            (
                f"{name} not positive semidefinite at gamma={shown:.6g} "
                f"(min eigenvalue {m:.3e} relative to max(1, ||{name}||) in balanced coordinates)"
            ),
        )
    F = -np.linalg.solve(Rm, S + B.T @ X) if gain else None
    return X, F, ""


def feasibility(plant: GeneralizedPlant | Normalized, gamma: float) -> str:
    """Empty string when gamma is achievable, else the one-line reason it is not.

    Tests, in order: the Parrott-type D11 bound, the X Riccati (stabilizing,
    X >= 0), the Y Riccati (stabilizing, Y >= 0) and ``rho(XY) < gamma^2``, all in the
    scaled coordinates of :func:`normalize` (the answer does not depend on units).
    """
    P = plant if isinstance(plant, Normalized) else normalize(plant)
    return _solve_all(P, gamma, gains=False)[-1]


def _solve_all(P: Normalized, gamma: float, gains: bool = True):
    """The existence test at ``gamma`` (in the plant's units) on the scaled plant.

    Returns ``(X, Y, F, L, rho, reason)`` of the scaled problem (``rho`` is rho(XY) there,
    to be compared with the scaled gamma squared)."""
    g = gamma / P.gamma_scale
    pb = P.d11_bound
    if not g > pb * (1 + 1e-12):
        return (
            None,
            None,
            None,
            None,
            np.nan,
            (
                f"gamma={gamma:.6g} is not above the D11 bound {pb * P.gamma_scale:.6g} "
                "(max sigma_max of [D1111 D1112] and [D1111; D1121])"
            ),
        )
    X, F, reason = _solve_side(P.x_side, g, "X", gains, gamma)
    if reason:
        return None, None, None, None, np.nan, reason
    Y, Ft, reason = _solve_side(P.y_side, g, "Y", gains, gamma)
    if reason:
        return None, None, None, None, np.nan, reason
    rho = float(np.max(np.abs(np.linalg.eigvals(X @ Y))))
    if rho >= g * g * (1 - COUPLING_RTOL):
        return (
            None,
            None,
            None,
            None,
            rho,
            (
                f"coupling condition rho(XY)/gamma^2={rho / (g * g):.6g} >= 1 "
                f"at gamma={gamma:.6g}"
            ),
        )
    return X, Y, F, (Ft.T if gains else None), rho, ""


# ================================================== quick feasibility tests
# columns of the measure arrays of the quick tests (see _Quick)
M_XPSD, M_YPSD, M_COUPLING, M_XAXIS, M_YAXIS = range(5)
N_MEASURES = 5
_NANS = (np.nan,) * N_MEASURES


def _side_measure(ev: np.ndarray) -> float:
    """``-1 / lambda`` for the eigenvalue of X largest in modulus (nan when X = 0).

    As gamma falls to the optimum of a Riccati sub-problem, one eigenvalue of X grows
    without bound and comes back from minus infinity below it (U1 loses rank), so
    ``-1 / lambda`` passes smoothly through zero: negative above, positive below.
    """
    lam = ev[0] if -ev[0] > ev[-1] else ev[-1]
    return -1.0 / lam if lam != 0.0 else np.nan


class _QuickSide:
    """gamma-independent data of one Riccati equation for the quick test.

    With ``Rm = D1.'D1. - gamma^2 diag(I, 0)``, the Hamiltonian of the X equation
    (module docstring, step 3) is ``H = H0 + W Rm^-1 [D1.'C1, B']`` where
    ``H0 = [A, 0; -C1'C1, -A']`` and ``W = [-B; C1'D1.]``: one small solve, one
    product and one sum per gamma. A symplectic diagonal scaling (as in
    :func:`schedule.riccati.solve_riccati`) is chosen at the first gamma and chosen
    again when gamma moves by more than a factor ``RESCALE_FACTOR`` from there (the
    blocks of H grow like gamma^-2 at small gamma).
    """

    __slots__ = ("n", "H0u", "Wu", "SBtu", "H0", "W", "SBt", "DtD", "E", "dd", "g0")

    def __init__(self, side: _Side):
        A = side.A
        n = A.shape[0]
        m = side.DtD.shape[0]
        self.n = n
        H0 = np.zeros((2 * n, 2 * n))
        H0[:n, :n] = A
        H0[n:, :n] = -side.CtC
        H0[n:, n:] = -A.T
        self.H0u = self.H0 = H0
        self.Wu = self.W = np.vstack([-side.B, side.S.T])
        self.SBtu = self.SBt = side.SBt
        self.DtD = side.DtD
        E = np.zeros((m, m))
        E[np.arange(side.nw), np.arange(side.nw)] = 1.0
        self.E = E
        self.dd = None
        self.g0 = None

    def _scale(self, gamma: float, sol_u: np.ndarray) -> None:
        """Choose the symplectic scaling for the unscaled H at this gamma."""
        n = self.n
        H = self.H0u + self.Wu @ sol_u
        d = _symplectic_scaling(H[:n, :n], H[:n, n:], -H[n:, :n])
        self.g0 = gamma
        if d is None:
            self.H0, self.W, self.SBt, self.dd = self.H0u, self.Wu, self.SBtu, None
            return
        left = np.concatenate([1.0 / d, d])
        right = np.concatenate([d, 1.0 / d])
        self.H0 = self.H0u * left[:, None] * right[None, :]
        self.W = self.Wu * left[:, None]
        self.SBt = self.SBtu * right[None, :]
        self.dd = d[:, None] * d[None, :]

    def solve(self, gamma: float) -> tuple[np.ndarray | None, float, float, float]:
        """(X or None, psd measure, axis measure, largest eigenvalue of X): X >= 0
        stabilizing, else None; see :func:`_side_measure` and
        :func:`schedule.riccati.stable_solution`."""
        Rm = self.DtD - (gamma * gamma) * self.E
        try:
            if self.g0 is None or not (1.0 / RESCALE_FACTOR < gamma / self.g0 < RESCALE_FACTOR):
                self._scale(gamma, np.linalg.solve(Rm, self.SBtu))
            sol = np.linalg.solve(Rm, self.SBt)
        except np.linalg.LinAlgError:
            return None, np.nan, np.nan, np.nan
        H = self.H0 + self.W @ sol
        n = self.n
        H[n:, :n] = -_cancelled(-self.H0[n:, :n], (self.W[n:] @ sol)[:, :n])
        hnorm = float(np.abs(H).sum(axis=0).max()) + 1e-300
        X, ev, code, _value, _margin, axis = stable_solution(H, self.n, hnorm)
        if code:
            return None, np.nan, (axis if code == 1 and axis > 0 else np.nan), np.nan
        negative = ev[0] < -PSD_RTOL * max(1.0, abs(ev[0]), abs(ev[-1]))  # balanced X
        if self.dd is not None:
            X = X / self.dd
            ev = np.linalg.eigvalsh(X)
        meas = _side_measure(ev)
        if negative:
            return None, (meas if meas > 0 else np.nan), np.nan, np.nan
        return X, meas, axis, float(ev[-1])


class _Quick:
    """Quick existence test at gamma for one normalized plant (no residual, no reasons).

    Same conditions as :func:`feasibility` (D11 bound, stabilizing X >= 0 and Y >= 0,
    ``rho(XY) < gamma^2``) through :func:`schedule.riccati.stable_solution`, with all
    gamma-independent work done once. Returns ``(feasible, measures)``: five numbers,
    continuous in gamma near the boundary of their condition and negative where it
    holds (columns ``M_XPSD`` ... ``M_YAXIS``): X >= 0 and Y >= 0 from
    :func:`_side_measure` (X blowing up), ``rho(XY)/gamma^2 - 1``, and the
    imaginary-axis measures of the two Hamiltonians (``axis`` of
    :func:`schedule.riccati.stable_solution`). At an infeasible gamma only the
    failing condition's measure is given (nan when it has none). When
    ``lmax(X) lmax(Y) < gamma^2 / 4`` the coupling condition holds by the bound
    ``rho(XY) <= lmax(X) lmax(Y)`` and its measure is not computed (nan).
    """

    __slots__ = ("pb", "x", "y")

    def __init__(self, P: Normalized):
        self.pb = P.d11_bound
        self.x = _QuickSide(P.x_side)
        self.y = _QuickSide(P.y_side)

    def __call__(self, gamma: float) -> tuple[bool, tuple[float, float, float]]:
        nan = np.nan
        if not gamma > self.pb * (1 + 1e-12):
            return False, _NANS
        X, mx, ax, xmax = quick_side_solve(self.x, gamma)
        if X is None:
            return False, (mx, nan, nan, ax, nan)
        Y, my, ay, ymax = quick_side_solve(self.y, gamma)
        if Y is None:
            return False, (nan, my, nan, nan, ay)
        g2 = gamma * gamma
        if xmax * ymax < 0.25 * g2:  # rho(XY) <= lmax(X) lmax(Y) (X, Y >= 0): far inside
            return True, (mx, my, nan, ax, ay)
        mc = float(np.abs(np.linalg.eigvals(X @ Y)).max()) / g2 - 1.0
        if mc >= -COUPLING_RTOL:
            return False, (nan, nan, mc, nan, nan)
        return True, (mx, my, mc, ax, ay)


def quick_side_solve(side: _QuickSide, gamma: float):
    """One side of the quick test (module-level so benchmarks can count the calls)."""
    return side.solve(gamma)


# regula falsi only once the bracket is this narrow in log(gamma) (25 %): on wider brackets
# the measures are far from linear and bisection is faster
SECANT_WIDTH = math.log(1.25)
# extrapolate while stepping only with warm-start steps (at most 50 %): far from the
# optimum (cold start) the measures are not linear enough to be worth it
EXTRAPOLATE_STEP = 1.5


def _search_one(test, pb: float, rtol: float, hint: float | None = None) -> float:
    """Scalar twin of :func:`_search` (same steps, plain floats): ``test(gamma) ->
    (feasible, measures)``. Returns the feasible end, nan when nothing up to
    GAMMA_MAX is feasible."""
    lo = float(pb)
    hi = math.inf
    m_lo = list(_NANS)
    m_hi = list(_NANS)
    # unhalved measures of the current and the previous end on each side, for extrapolation
    r_lo, r_hi, p_lo, p_hi = list(_NANS), list(_NANS), list(_NANS), list(_NANS)
    x_plo = x_phi = math.nan
    last = 0
    start, step = (2.0 * lo if lo > 0 else 1.0), 4.0
    if hint is not None and math.isfinite(hint) and hint > lo:
        start, step = float(hint), 1.03
    tested = False
    eps = 0.3 * math.log1p(rtol)
    close = 0.4 * math.log1p(rtol)
    for _ in range(400):
        if hi < math.inf and (hi <= lo * (1 + rtol) or (lo == 0 and hi < ZERO_INFIMUM)):
            break
        up = hi == math.inf
        down = not up and lo * step < hi
        if not tested:
            g = start
        elif up:
            g = lo * step
            xl = math.log(lo) if lo > 0 else -math.inf
            for m, mp in zip(r_lo if step <= EXTRAPOLATE_STEP else (), p_lo, strict=False):
                if 0 < m < mp:  # false for nan: extrapolate to the root
                    xs = xl + (xl - x_plo) * m / (mp - m)
                    x = xs + 0.1 * (xs - xl) + close
                    g = math.exp(min(max(x, xl + eps), xl + 2 * math.log(step)))
                    break
        elif down:
            g = hi / step
            xh = math.log(hi)
            best = -math.inf
            for m, mp in zip(r_hi if step <= EXTRAPOLATE_STEP else (), p_hi, strict=False):
                if mp < m < 0:  # false for nan
                    best = max(best, xh - m * (xh - x_phi) / (m - mp))
            if best > -math.inf:
                x = best - 0.1 * (xh - best) - close
                x = min(max(x, xh - 2 * math.log(step)), xh - eps)
                if lo > 0:
                    x = max(x, math.log(lo) + eps)
                g = math.exp(x)
        else:
            xl, xh = math.log(lo), math.log(hi)
            x = xl + 0.5 * (xh - xl)
            if 2 * eps < xh - xl <= SECANT_WIDTH:
                for pl, ph in zip(m_lo, m_hi, strict=True):
                    if pl > 0 and ph < 0:  # false for nan
                        x = xl + pl / (pl - ph) * (xh - xl) + (-close if last == 1 else close)
                        x = min(max(x, xl + eps), xh - eps)
                        break
            g = math.exp(x)
        if tested and (up or down):
            step = min(step * step, 1e4)
        tested = True
        feas, meas = test(g)
        if feas:
            if last == 1:
                m_lo = [0.5 * v for v in m_lo]
            if hi < math.inf:
                x_phi, p_hi = math.log(hi), r_hi
            hi, m_hi, r_hi, last = g, list(meas), list(meas), 1
        else:
            if last == -1:
                m_hi = [0.5 * v for v in m_hi]
            if g > lo:
                if lo > 0:
                    x_plo, p_lo = math.log(lo), r_lo
                lo, m_lo, r_lo = g, list(meas), list(meas)
            last = -1
            if g > GAMMA_MAX:
                return math.nan
    return hi if hi < math.inf else math.nan


# ============================================================= gamma bounds
def _check_gamma(gamma: float) -> float:
    try:
        g = float(gamma)
    except (TypeError, ValueError):
        raise InputError(f"gamma={gamma!r} is not a number; give a positive float") from None
    if not math.isfinite(g) or g <= 0:
        raise InputError(f"gamma={g} must be a finite positive number; give gamma > 0")
    return g


def _bisect(test, lo: float, hi: float, rtol: float) -> tuple[float, float]:
    """Bisect in log(gamma): test(lo) fails, test(hi) passes; returns the final bracket."""
    while hi > lo * (1 + rtol):
        mid = math.sqrt(lo * hi) if lo > 0 else hi / 2
        if test(mid):
            hi = mid
        else:
            lo = mid
    return lo, hi


def _bracket(test, start: float, floor: float, what: str) -> tuple[float, float, str]:
    """Find lo < hi with test(lo) False (or lo = floor), test(hi) True, by doubling/halving."""
    g = start
    if test(g):
        hi = g
        lo = g / 2
        for _ in range(60):
            if lo <= floor * (1 + 1e-9) or not test(lo):
                break
            hi = lo
            lo = lo / 2
        return max(lo, floor), hi, ""
    lo = g
    while g < GAMMA_MAX:
        g *= 2
        if test(g):
            return lo, g, ""
        lo = g
    return lo, g, f"no feasible gamma up to {GAMMA_MAX:.0e} ({what})"


def _side_ok(P: Normalized, side: str):
    """Test of one Riccati side at a SCALED gamma."""
    data = P.x_side if side == "X" else P.y_side

    def test(g: float) -> bool:
        return not _solve_side(data, g, side, shown=g * P.gamma_scale)[2]

    return test


def gamma_lower_bound(plant: GeneralizedPlant, rtol: float = 1e-3) -> float:
    """A lower bound of the optimal output-feedback gamma.

    The largest of the Parrott-type D11 bound and the optimal gammas of the
    full-information (X Riccati only) and full-control (Y Riccati only)
    sub-problems, each located by bisection to ``rtol`` and reported at the
    lower end of its bracket, so the value never exceeds the true optimum
    (Doyle, Glover, Khargonekar and Francis 1989, section IV: the X and Y
    conditions are necessary for the output-feedback problem). The bisection runs
    on the scaled problem of :func:`normalize`.

    Raises
    ------
    PlantError
        when a partition or rank condition fails (from normalization).
    """
    P = normalize(plant)
    pb = P.d11_bound
    bound = pb
    start = max(2 * pb, 1.0)
    for side in ("X", "Y"):
        test = _side_ok(P, side)
        lo, hi, _ = _bracket(test, max(start, bound * 1.01), pb, side)
        if not test(hi):
            continue
        lo, hi = _bisect(test, lo, hi, rtol)
        bound = max(bound, lo)
    return float(bound * P.gamma_scale)


def optimal_gamma(plant: GeneralizedPlant, rtol: float = 1e-4, hint: float | None = None) -> float:
    """The optimal gamma to relative accuracy ``rtol``, returned at the feasible end.

    Bisection in log(gamma) between the Parrott-type D11 bound (a lower
    bound) and an upper bound found by repeated multiplication; feasibility at
    gamma is the existence test of
    Glover and Doyle (1988): stabilizing X >= 0 and Y >= 0 and
    ``rho(XY) < gamma^2`` (plus the Parrott-type D11 bound). The search runs on the
    scaled problem of :func:`normalize` (balanced states, unit-free u and y, gamma
    near 1), so the result scales exactly with the units of z and w and does not
    depend on the state coordinates. ``hint`` (e.g. the optimal gamma of a
    neighbouring operating point) starts the bracket there with a 3 % step, which
    roughly halves the number of Riccati solves; the result does not depend on it
    beyond ``rtol``.

    The returned gamma is achievable, but it is within ``rtol`` of the optimum where the
    central controller becomes ill-conditioned (``I - gamma^-2 Y X`` nearly singular):
    :func:`central_controller` may refuse it or warn. Design at least
    ``gamma_opt (1 + DESIGN_MARGIN)`` above it (a few percent is the usual practice).
    When the infimum is zero (nothing limits the performance, e.g. a one-block problem
    whose P11 can be cancelled), the search stops at ``ZERO_INFIMUM`` times the
    problem's natural scale (``gamma_scale``); every larger gamma is achievable in exact
    arithmetic, but so far below the scale the closed-loop norm cannot be certified in
    floating point (the Hamiltonian of the loop grows like ``gamma^-2``). The value
    returned is then the smallest of ``ZERO_INFIMUM``, ``10 ZERO_INFIMUM``, ... (times
    the scale) at which the central controller is certified (see
    :func:`_certifiable_floor`), so that :func:`central_controller` succeeds there too.

    Raises
    ------
    PlantError
        when :meth:`GeneralizedPlant.check_conditions` fails, or when D12 or D21 is
        so close to singular that no gamma can be found (names the singular value
        ratio and the remedy).
    InfeasibleGammaError
        when no feasible gamma exists up to 1e12 times the natural scale (names the
        failing condition).
    """
    plant.check_conditions()
    if not (0 < rtol < 1):
        raise InputError(f"rtol={rtol} must lie in (0, 1); give e.g. 1e-4")
    P = normalize(plant)
    return _certifiable_floor(plant, P, _optimal_gamma(P, rtol, hint))


def _certifiable_floor(plant: GeneralizedPlant, P: Normalized, gamma: float) -> float:
    """``gamma`` unless it is the stop of a search with no lower end (zero infimum, scaled
    gamma at most ``ZERO_INFIMUM (1 + 1e-6)``): then the smallest of ``gamma``, ``10
    gamma``, ... (at most the natural scale) at which the central controller is
    certified (:func:`certify_controller`). A loop whose exact norm is 0 but whose
    realization is of unit size has a closed-loop Hamiltonian of norm ``~gamma^-2``,
    whose computed eigenvalues say nothing far below the scale; higher up the
    certificate holds."""
    gs = P.gamma_scale
    if not (math.isfinite(gamma) and gamma <= ZERO_INFIMUM * (1 + 1e-6) * gs):
        return gamma
    g = gamma
    while g <= gs:
        try:
            _central(plant, P, g)
            return g
        except (NumericalError, InfeasibleGammaError):
            g *= 10.0
    return g


def _optimal_gamma(P: Normalized, rtol: float, hint: float | None = None) -> float:
    """optimal_gamma on a normalized plant: quick search on the scaled gamma, full check
    at the end; returns gamma in the plant's units."""
    gs = P.gamma_scale
    h = None if hint is None or not math.isfinite(hint) else float(hint) / gs
    g = _search_one(_Quick(P), P.d11_bound, rtol, h)
    if math.isfinite(g) and not _solve_all(P, g * gs, gains=False)[-1]:
        return g * gs
    # the quick test and the full check disagree (or nothing was found): search again
    # with the full check at every step; it decides and explains

    def test(_idx, gk):
        out = [_solve_all(P, float(x) * gs, gains=False) for x in gk]
        ok = np.array([not r[-1] for r in out])
        phi = np.array([r[-2] / (x * x) - 1.0 for r, x in zip(out, gk, strict=True)])
        return ok, phi

    hints = None if not math.isfinite(g) else np.array([g])
    g = float(_search(test, np.array([P.d11_bound]), rtol, hints)[0])
    if not np.isfinite(g):
        raise _no_gamma_error(P)
    return g * gs


def _no_gamma_error(P: Normalized) -> ScheduleError:
    """The error for a plant where no gamma up to GAMMA_MAX (scaled) is feasible: a nearly
    singular D12 or D21 is named with its ratio and remedy, else the failing condition."""
    for name, ratio, what in (("D12", P.d12_ratio, "control effort"),
                              ("D21", P.d21_ratio, "measurement noise")):
        if ratio < NEAR_SINGULAR_RATIO:
            return PlantError(
                f"{name} is nearly singular (smallest/largest singular value {ratio:.2e}) and "
                f"no gamma up to {GAMMA_MAX * P.gamma_scale:.3g} could be found; give every "
                f"{'control' if name == 'D12' else 'measurement'} a weight of comparable "
                f"size (a small weight on the missing {what} channel)"
            )
    top = GAMMA_MAX * P.gamma_scale
    return InfeasibleGammaError(
        f"no feasible gamma up to {top:.3g}; at that gamma: {_solve_all(P, top)[-1]}"
    )


# ====================================================== controller assembly
def _controller_normalized(P: Normalized, pieces: ObserverPieces, gamma: float):
    """Central controller of the scaled plant with D22 = 0 (Zhou et al. 1996, Thm 17.1),
    in the scaled coordinates; ``gamma`` in the plant's units."""
    _, nw, nu, nz, ny = P.dims
    t = P.t
    g = gamma / P.gamma_scale
    # pieces are stored in the plant's own signals and state coordinates: map them to
    # the scaled ones (x = diag(t) x~)
    F2 = np.linalg.solve(P.Tu, pieces.state_feedback * t[None, :])
    F1 = np.linalg.solve(P.Sw.T, pieces.worst_disturbance * t[None, :])
    L1 = np.linalg.solve(P.Sz.T, (pieces.performance_injection / t[:, None]).T).T
    L2 = np.linalg.solve(P.Ty.T, (pieces.observer_gain / t[:, None]).T).T
    Z = pieces.Z / t[:, None] * t[None, :]
    d1111, d1112, d1121, d1122 = _d11_blocks(P)
    r = nz - nu
    if r > 0:
        M = g * g * np.eye(r) - d1111 @ d1111.T
        Dk = -d1121 @ d1111.T @ np.linalg.solve(M, d1112) - d1122
    else:
        Dk = -d1122
    F12 = F1[nw - ny :]
    L12 = L1[:, nz - nu :]
    C2F = P.C2 + F12
    Bk = -Z @ L2 + Z @ (P.B2 + L12) @ Dk
    Ck = F2 - Dk @ C2F
    Ak = P.A + P.B1 @ F1 + P.B2 @ F2 - Bk @ C2F
    return Ak, Bk, Ck, Dk


def assemble_controller(
    plant: GeneralizedPlant, pieces: ObserverPieces, gamma: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Rebuild the central controller ``(A, B, C, D)`` from the plant, the pieces and gamma.

    No Riccati equation is solved: the plant is normalized (SVDs of D12 and
    D21), the pieces mapped to the normalized signals, the normalized central
    controller formed (Glover and Doyle 1988), the transforms undone
    (``K0 = Tu K~ Ty``) and D22 put back by the loop shift ``K = K0 (I + D22 K0)^-1``.

    Raises
    ------
    PlantError
        when D12 or D21 is rank deficient (normalization impossible).
    NumericalError
        when ``I + D_K0 D22`` is singular (the loop with D22 is ill-posed).
    """
    gamma = _check_gamma(gamma)
    return _assemble(normalize(plant), plant.D22, pieces, gamma)


def _assemble(P: Normalized, D22: np.ndarray, pieces: ObserverPieces, gamma: float):
    """:func:`assemble_controller` on a normalized plant (``D22`` of the original one)."""
    Ak, Bk, Ck, Dk = _controller_normalized(P, pieces, gamma)
    Tu, Ty, t = P.Tu, P.Ty, P.t
    # back to the plant's signals and state coordinates (x = diag(t) x~)
    Ak = Ak * (t[:, None] / t[None, :])
    Bk = t[:, None] * (Bk @ Ty)
    Ck = (Tu @ Ck) / t[None, :]
    Dk = Tu @ Dk @ Ty
    if not np.any(D22):
        return Ak, Bk, Ck, Dk
    E = np.eye(D22.shape[1]) + Dk @ D22
    cond = np.linalg.cond(E)
    if not np.isfinite(cond) or cond > SHIFT_COND_MAX:
        raise NumericalError(
            f"loop shift for D22 ill-posed: I + Dk D22 has condition number {cond:.2e}; "
            "reduce D22 or pick another gamma"
        )
    M = np.linalg.inv(E)
    MC = M @ Ck
    MD = M @ Dk
    A = Ak - Bk @ D22 @ MC
    B = Bk - Bk @ D22 @ MD
    return A, B, MC, MD


def _pieces_at(P: Normalized, gamma: float):
    """Solve the Riccati equations at gamma; (pieces, z_condition) or raise."""
    X, Y, F, L, _rho, reason = _solve_all(P, gamma)
    if reason:
        raise InfeasibleGammaError(f"{reason}; choose a larger gamma (see optimal_gamma)")
    _, nw, nu, nz, ny = P.dims
    n = X.shape[0]
    g = gamma / P.gamma_scale
    Zinv = np.eye(n) - (Y @ X) / (g * g)
    zc = float(np.linalg.cond(Zinv))
    if not np.isfinite(zc) or zc > 1e14:
        raise NumericalError(
            f"I - gamma^-2 Y X is singular at gamma={gamma:.6g} (condition number {zc:.2e}); "
            "design a few percent above the optimal gamma"
        )
    if zc > Z_COND_WARN:
        warnings.warn(
            f"central controller ill-conditioned at gamma={gamma:.6g}: cond(I - Y X/gamma^2)="
            f"{zc:.2e}; design a few percent above the optimal gamma",
            RuntimeWarning,
            stacklevel=3,
        )
    Z = np.linalg.inv(Zinv)
    t = P.t
    # in the plant's own signals and state coordinates (x = diag(t) x~)
    pieces = ObserverPieces(
        state_feedback=(P.Tu @ F[nw:]) / t[None, :],
        worst_disturbance=(P.Sw.T @ F[:nw]) / t[None, :],
        observer_gain=t[:, None] * (L[:, nz:] @ P.Ty),
        performance_injection=t[:, None] * (L[:, :nz] @ P.Sz),
        Z=Z * (t[:, None] / t[None, :]),
    )
    return pieces, zc


def central_controller(plant: GeneralizedPlant, gamma: float) -> Controller:
    """The central H-infinity controller at ``gamma`` (``u = K y``, lower LFT).

    The closed loop ``F_l(P, K)`` is internally stable with
    ``||F_l(P, K)||_inf < gamma`` whenever gamma is above the optimum
    (Glover and Doyle 1988; Zhou, Doyle and Glover 1996, Theorem 17.1).

    Raises
    ------
    PlantError
        a plant condition fails (:meth:`GeneralizedPlant.check_conditions`).
    InfeasibleGammaError
        gamma below the optimum; the message names the failed condition (X or Y
        Riccati without stabilizing solution, X or Y not positive semidefinite,
        coupling condition rho(XY) >= gamma^2, or the D11 bound).
    NumericalError
        Z singular (gamma at the optimum) or the D22 loop shift ill-posed.
    """
    gamma = _check_gamma(gamma)
    plant.check_conditions()
    return _central(plant, normalize(plant), gamma)


def _central(plant: GeneralizedPlant, P: Normalized, gamma: float,
             certify: bool = True) -> Controller:
    """The central controller of a plant whose conditions were already checked, certified
    (:func:`certify_controller`) unless ``certify`` is False (the caller certifies)."""
    pieces, zc = _pieces_at(P, gamma)
    A, B, C, D = _assemble(P, plant.D22, pieces, gamma)
    K = Controller(A=A, B=B, C=C, D=D, gamma=gamma, pieces=pieces, z_condition=zc)
    if certify:
        certify_controller(plant, K, gamma)
    return K


def certify_controller(plant: GeneralizedPlant, controller, gamma: float) -> None:
    """Check that ``controller`` meets ``gamma`` on ``plant``.

    The closed loop (lower LFT, :func:`schedule.norms.closed_loop_many`) must be stable by
    the package's predicate and its H-infinity norm, by the level test of
    :func:`schedule.norms.h_infinity_norms` (certified, relative accuracy 1e-9), at most
    ``gamma (1 + CONTROLLER_RTOL)``. In exact arithmetic the central controller at any
    gamma above the optimum meets this (Glover and Doyle 1988); in floating point a problem
    that is ill-conditioned at gamma (close to the optimum, or a large gamma_opt with a
    strongly unstable A) can give a controller that misses it.

    Raises
    ------
    NumericalError
        naming gamma, the closed-loop norm (or why the loop is not stable or the norm not
        certified), the conditioning of ``I - gamma^-2 Y X`` and the remedy: design
        further above the optimal gamma.
    """
    reason = _certify_many([plant], [controller], gamma)[0]
    if reason:
        raise NumericalError(reason)


def _certify_many(plants, controllers, gamma: float) -> list[str]:
    """:func:`certify_controller` for many plants at one gamma, batched over the plants of
    equal sizes (one call of the norm route per size): one reason per plant, "" when the
    controller is certified."""
    reasons = [""] * len(plants)
    groups: dict[tuple, list[int]] = {}
    for i, (p, K) in enumerate(zip(plants, controllers, strict=True)):
        groups.setdefault((p.A.shape, p.B1.shape, p.C1.shape, np.shape(K.A)), []).append(i)
    limit = gamma * (1.0 + CONTROLLER_RTOL)
    for idx in groups.values():
        if len(idx) == 1:  # one plant (central_controller): views, no copies
            P = {k: getattr(plants[idx[0]], k)[None] for k in PLANT_KEYS}
            Kd = {k: np.asarray(getattr(controllers[idx[0]], k), dtype=float)[None]
                  for k in "ABCD"}
        else:
            P = {k: np.stack([getattr(plants[i], k) for i in idx]) for k in PLANT_KEYS}
            Kd = {k: np.stack([np.asarray(getattr(controllers[i], k), dtype=float)
                               for i in idx]) for k in "ABCD"}
        try:
            loops = closed_loop_many(P, Kd)
        except ScheduleError:  # an ill-posed loop in the group: one plant at a time
            if len(idx) == 1:
                reasons[idx[0]] = (f"the central controller at gamma={gamma:.6g} gives an "
                                   "ill-posed loop (I - D22 DK singular); design at another "
                                   "gamma or reduce D22")
                continue
            for i in idx:
                reasons[i] = _certify_many([plants[i]], [controllers[i]], gamma)[0]
            continue
        cert = h_infinity_norms(*loops, rtol=1e-9, level=limit)
        st = cert.stability
        for j, i in enumerate(idx):
            zc = getattr(controllers[i], "z_condition", float("nan"))
            cond = f"cond(I - Y X/gamma^2) = {zc:.2g}; " if np.isfinite(zc) else ""
            remedy = ("design further above the optimal gamma (a few percent is the usual "
                      "practice) or rescale the weights")
            if st is not None and not st.stable[j]:
                reasons[i] = (f"the central controller at gamma={gamma:.6g} does not stabilize "
                              f"the loop in floating point ({st.reason(j)}); {cond}the problem "
                              f"is ill-conditioned there: {remedy}")
            elif not cert.upper[j] <= limit:
                norm = float(cert.norm[j])
                what = (f"closed-loop norm at least {norm:.9g} = {norm / gamma:.9f} gamma"
                        if not cert.status[j] else
                        f"closed-loop norm not certified ({cert.status[j]}; attained "
                        f"{norm / gamma:.9f} gamma)")
                reasons[i] = (f"the central controller at gamma={gamma:.6g} misses its bound "
                              f"in floating point: {what}, tolerance {CONTROLLER_RTOL:g}; "
                              f"{cond}{remedy}")
    return reasons


def central_controllers(plants, gamma: float) -> list[tuple[Controller | None, str]]:
    """:func:`central_controller_checked` for many plants at one common gamma, with the
    certification (:func:`certify_controller`) batched over the plants of equal sizes.

    Returns one ``(controller, "")`` or ``(None, reason)`` per plant (never raises per
    plant). The plants must have passed :meth:`GeneralizedPlant.check_conditions`.
    """
    gamma = _check_gamma(gamma)
    out: list[tuple[Controller | None, str]] = []
    for p in plants:
        try:
            out.append((_central(p, normalize(p), gamma, certify=False), ""))
        except ScheduleError as exc:
            out.append((None, str(exc)))
        except (np.linalg.LinAlgError, ArithmeticError) as exc:
            out.append((None, f"{type(exc).__name__}: {exc}"))
    done = [i for i, (K, _r) in enumerate(out) if K is not None]
    if done:
        reasons = _certify_many([plants[i] for i in done], [out[i][0] for i in done], gamma)
        for i, r in zip(done, reasons, strict=True):
            if r:
                out[i] = (None, r)
    return out


def central_controller_checked(plant: GeneralizedPlant, gamma: float) -> Controller:
    """:func:`central_controller` for a plant that already passed
    :meth:`GeneralizedPlant.check_conditions` (e.g. in the gamma phase of a family run):
    the same controller, without checking the conditions again."""
    return _central(plant, normalize(plant), _check_gamma(gamma))


# ================================================== many plants in lockstep
class _StackedSide:
    """gamma-independent data of one Riccati equation for many plants (see :class:`_QuickSide`)."""

    def __init__(self, sides: list[_Side]):
        A = np.stack([s.A for s in sides])
        K, n = A.shape[0], A.shape[1]
        self.n, self.nw = n, sides[0].nw
        H0 = np.zeros((K, 2 * n, 2 * n))
        H0[:, :n, :n] = A
        H0[:, n:, :n] = -np.stack([s.CtC for s in sides])
        H0[:, n:, n:] = -np.swapaxes(A, 1, 2)
        self.H0 = H0
        self.W = np.concatenate(
            [-np.stack([s.B for s in sides]), np.swapaxes(np.stack([s.S for s in sides]), 1, 2)],
            axis=1,
        )
        self.SBt = np.stack([s.SBt for s in sides])
        self.DtD = np.stack([s.DtD for s in sides])

    def solve(self, idx: np.ndarray, gamma: np.ndarray):
        """Batched side test for the plants ``idx`` at ``gamma`` (one per plant).

        Returns ``(ok, X, psd, axis)``: ok where a stabilizing X >= 0 passed the checks,
        X (k, n, n), and the measures of :func:`_side_measure` and of the distance to an
        imaginary-axis collision (``axis`` of :func:`schedule.riccati.stable_solution`);
        where the test failed only the failing condition's measure is kept.
        Eigen-decomposition of the stacked Hamiltonians (one LAPACK call per
        stack through numpy's gufuncs); the stable invariant subspace is spanned by the
        eigenvectors of the n eigenvalues with negative real part.
        """
        n, nw = self.n, self.nw
        k = idx.size
        Rm = self.DtD[idx]
        j = np.arange(nw)
        Rm[:, j, j] -= (gamma * gamma)[:, None]
        SBt = self.SBt[idx]
        ok = np.ones(k, dtype=bool)
        try:
            sol = np.linalg.solve(Rm, SBt)
        except np.linalg.LinAlgError:
            sol = np.zeros(SBt.shape)
            for i in range(k):
                try:
                    sol[i] = np.linalg.solve(Rm[i], SBt[i])
                except np.linalg.LinAlgError:
                    ok[i] = False
        H = self.H0[idx] + self.W[idx] @ sol
        H[:, n:, :n] = -_cancelled(-self.H0[idx, n:, :n], (self.W[idx, n:] @ sol)[:, :, :n])
        H[~ok] = np.eye(2 * n)  # placeholders; already failed
        d = _symplectic_scaling_many(H, n)  # as schedule.riccati.solve_riccati, per plant
        left = np.concatenate([1.0 / d, d], axis=1)
        H = H * left[:, :, None] / left[:, None, :]
        w, V = np.linalg.eig(H)
        order = np.argsort(w.real, axis=1)
        wr = np.take_along_axis(w.real, order, axis=1)
        hnorm = np.abs(H).sum(axis=1).max(axis=1) + 1e-300
        ok &= (wr[:, n - 1] < 0) & (wr[:, n] > 0)
        on = axis_distance(w, hnorm[:, None]) <= 1.0
        on_axis = on.any(axis=1)
        ok &= ~on_axis
        axis = -(wr * wr).min(axis=1)
        if on_axis.any():
            with np.errstate(invalid="ignore"):
                gaps = np.diff(np.sort(np.where(on, w.imag, np.inf), axis=1), axis=1)
            gap = np.where(np.isfinite(gaps), gaps, np.inf).min(axis=1)
            axis = np.where(on_axis, np.where(np.isfinite(gap), 0.25 * gap * gap, np.nan), axis)
        axis[~on_axis & ~ok] = np.nan
        U = np.take_along_axis(V, order[:, None, :n], axis=2)
        U1, U2 = U[:, :n], U[:, n:]
        try:
            Xc = np.swapaxes(np.linalg.solve(np.swapaxes(U1, 1, 2), np.swapaxes(U2, 1, 2)), 1, 2)
        except np.linalg.LinAlgError:
            Xc = np.zeros((k, n, n), dtype=complex)
            for i in np.flatnonzero(ok):
                try:
                    Xc[i] = np.linalg.solve(U1[i].T, U2[i].T).T
                except np.linalg.LinAlgError:
                    ok[i] = False
        X = Xc.real
        X = 0.5 * (X + np.swapaxes(X, 1, 2))
        xn = np.sqrt((X * X).sum(axis=(1, 2)))
        ok &= np.sqrt((Xc.imag**2).sum(axis=(1, 2))) <= 1e-6 * (xn + 1e-300)
        # relative residual (same measure as schedule.riccati.relative_residual)
        Ah, Rh, Qh = H[:, :n, :n], H[:, :n, n:], -H[:, n:, :n]
        AX = np.swapaxes(Ah, 1, 2) @ X
        res = AX + np.swapaxes(AX, 1, 2) + X @ Rh @ X + Qh
        na, nr, nq = (np.sqrt((M * M).sum(axis=(1, 2))) for M in (Ah, Rh, Qh))
        denom = nq + 2 * na * xn + nr * xn * xn + 1e-8 * (2 * na + nr + nq) + 1e-300
        with np.errstate(invalid="ignore"):
            ok &= np.sqrt((res * res).sum(axis=(1, 2))) / denom <= RESIDUAL_RTOL
        X[~ok] = 0.0
        evb = np.linalg.eigvalsh(X)  # balanced X: the sign is decided at its natural size 1
        psd = evb[:, 0] >= -PSD_RTOL * np.maximum(1.0, np.abs(evb).max(axis=1))
        X = X / (d[:, :, None] * d[:, None, :])  # back from the symplectic scaling
        ev = np.linalg.eigvalsh(X)
        big = np.where(-ev[:, 0] > ev[:, -1], ev[:, 0], ev[:, -1])
        with np.errstate(divide="ignore"):
            meas = np.where(ok & (big != 0), -1.0 / np.where(big != 0, big, 1.0), np.nan)
        with np.errstate(invalid="ignore"):
            meas = np.where(psd | (meas > 0), meas, np.nan)
        axis[ok & ~psd] = np.nan
        return ok & psd, X, meas, axis


class _Stacked:
    """Quick batched existence test for plants of equal sizes (see :class:`_Quick`)."""

    def __init__(self, Ps: list[Normalized]):
        self.pb = np.array([P.d11_bound for P in Ps])
        self.x = _StackedSide([P.x_side for P in Ps])
        self.y = _StackedSide([P.y_side for P in Ps])
        self.fails = [0, 0]  # failures of the X and the Y side so far

    def __call__(self, idx: np.ndarray, gamma: np.ndarray):
        """``(feasible (k,), measures (k, N_MEASURES))`` for the plants ``idx`` at ``gamma``.

        The side (X or Y) that has failed more often so far is solved first; plants
        that fail it skip the other one.
        """
        idx = np.asarray(idx)
        gamma = np.asarray(gamma, dtype=float)
        k = idx.size
        meas = np.full((k, N_MEASURES), np.nan)
        feas = gamma > self.pb[idx] * (1 + 1e-12)
        a = np.flatnonzero(feas)
        sides = [(0, self.x, M_XPSD, M_XAXIS), (1, self.y, M_YPSD, M_YAXIS)]
        if self.fails[1] > self.fails[0]:
            sides.reverse()
        sols: list[np.ndarray] = []
        for j, (which, side, c_psd, c_axis) in enumerate(sides):
            if a.size == 0:
                return feas, meas
            ok, X, m_psd, m_axis = side.solve(idx[a], gamma[a])
            meas[a, c_psd] = m_psd
            meas[a, c_axis] = m_axis
            bad = a[~ok]
            feas[bad] = False
            self.fails[which] += bad.size
            if j == 1:  # keep only the failing side's measures
                meas[bad, sides[0][2]] = np.nan
                meas[bad, sides[0][3]] = np.nan
            a = a[ok]
            sols = [S[ok] for S in sols] + [X[ok]]
        if a.size == 0:
            return feas, meas
        g2 = gamma[a] ** 2
        mc = np.abs(np.linalg.eigvals(sols[0] @ sols[1])).max(axis=1) / g2 - 1.0
        meas[a, M_COUPLING] = mc
        fail_c = mc >= -COUPLING_RTOL
        bad_c = a[fail_c]
        feas[bad_c] = False
        # at an infeasible gamma keep only the failing condition's measure
        meas[bad_c] = np.nan
        meas[bad_c, M_COUPLING] = mc[fail_c]
        return feas, meas


def _symplectic_scaling_many(H: np.ndarray, n: int) -> np.ndarray:
    """Per plant, the diagonal d of :func:`schedule.riccati._symplectic_scaling` for the
    stacked Hamiltonians H (K, 2n, 2n) (the same rule, vectorized): (K, n)."""
    A, R, Q = H[:, :n, :n], H[:, :n, n:], -H[:, n:, :n]
    qn = np.abs(Q).sum(axis=2)
    rn = np.abs(R).sum(axis=2)
    an = np.abs(A).sum(axis=2).max(axis=1, keepdims=True)
    tiny = 1e-8 * np.maximum(an, np.maximum(qn.max(axis=1, keepdims=True),
                                            rn.max(axis=1, keepdims=True)))
    ok = ((qn > tiny) | (rn > tiny)) & (tiny > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        m = np.maximum(np.sqrt(rn * qn), an)
        m = np.where(m > 0, m, np.maximum(rn, qn))
        d2 = np.where(rn >= qn, rn / m, m / qn)
        e = np.where(ok, np.clip(np.rint(0.5 * np.log2(d2)), -SCALING_EXP, SCALING_EXP), 0.0)
    return np.exp2(e)


def _search(test, pbs: np.ndarray, rtol: float, hints=None) -> np.ndarray:
    """Bracket and shrink in log(gamma) many problems in lockstep.

    ``test(indices, gammas) -> (feasible, measures)`` with ``measures`` of shape
    ``(k, N_MEASURES)``: the continuous measures of :class:`_Quick` (a 1-D array
    is taken as the coupling measure ``rho(XY)/gamma^2 - 1`` alone). Each problem
    starts at its hint (a neighbour's optimal gamma) with a first step of 3 %, or
    at ``2 * D11 bound`` (1 when the bound is 0) with a first step of 4; the step
    is squared after every move (capped at 1e4) until the optimum is bracketed.
    With warm-start steps (at most 50 %), once two tests lie on the same side the
    measure of the failing condition (or, above the optimum, the first measure to
    reach zero) is extrapolated linearly to its root and the next test is placed
    just past it (within twice the current step). The bracket then shrinks by
    regula falsi in log(gamma) with the Illinois modification (Dowell and Jarratt
    1971) on the measure of the condition that failed at the lower end, where it
    is known at both ends and the bracket is narrower than 25 %, and by bisection
    elsewhere, until ``hi <= lo (1 + rtol)``. Each secant step aims 0.4 rtol past
    its estimate, at the side of the end that stayed put, so that a good estimate
    closes the bracket. Every accepted point is a feasibility test, so the answer
    is as safe as plain bisection. Returns the feasible ends, nan where no gamma
    up to GAMMA_MAX is feasible.
    """
    K = len(pbs)
    lo = np.asarray(pbs, dtype=float).copy()  # known infeasible (gamma must exceed the bound)
    hi = np.full(K, np.inf)  # known feasible
    m_lo = np.full((K, N_MEASURES), np.nan)
    m_hi = np.full((K, N_MEASURES), np.nan)
    # unhalved measures of the current and the previous end on each side, for extrapolation
    r_lo, r_hi = m_lo.copy(), m_hi.copy()
    p_lo, p_hi = m_lo.copy(), m_hi.copy()
    x_plo = np.full(K, np.nan)
    x_phi = np.full(K, np.nan)
    last = np.zeros(K, dtype=int)  # +1: hi moved last, -1: lo moved last
    start = np.where(lo > 0, 2.0 * lo, 1.0)
    step = np.full(K, 4.0)
    if hints is not None:
        h = np.asarray(hints, dtype=float)
        use = np.isfinite(h) & (h > lo)
        start[use] = h[use]
        step[use] = 1.03
    tested = np.zeros(K, dtype=bool)
    failed = np.zeros(K, dtype=bool)
    eps = 0.3 * math.log1p(rtol)
    close = 0.4 * math.log1p(rtol)
    for _ in range(400):
        done = failed | (np.isfinite(hi) & (hi <= lo * (1 + rtol)))
        done |= np.isfinite(hi) & (lo == 0) & (hi < ZERO_INFIMUM)
        active = np.flatnonzero(~done)
        if active.size == 0:
            break
        l, h, st = lo[active], hi[active], step[active]
        first = ~tested[active]
        up = np.isinf(h)
        down = ~up & (l * st < h)  # bracket still wide: keep stepping down
        g = np.where(first, start[active], np.where(up, l * st, h / st))
        with np.errstate(invalid="ignore", divide="ignore"):
            # stepping with two tests on the same side: extrapolate the measure to its root
            xl = np.log(np.where(l > 0, l, 1.0))
            xh = np.log(np.where(np.isfinite(h), h, 1.0))
            lst = np.log(st)
            m, mp = r_lo[active], p_lo[active]
            usable = (m > 0) & (m < mp)
            kk = usable.argmax(axis=1)
            rows = np.arange(active.size)
            mk, mpk = m[rows, kk], mp[rows, kk]
            xs = xl + (xl - x_plo[active]) * mk / (mpk - mk)
            x_up = np.minimum(np.maximum(xs + 0.1 * (xs - xl) + close, xl + eps), xl + 2 * lst)
            near = st <= EXTRAPOLATE_STEP
            ext_up = ~first & up & near & usable.any(axis=1)
            m, mp = r_hi[active], p_hi[active]
            usable = (mp < m) & (m < 0)
            roots = np.where(usable, xh[:, None] - m * (xh - x_phi[active])[:, None] / (m - mp),
                             -np.inf)
            best = roots.max(axis=1)
            x_dn = best - 0.1 * (xh - best) - close
            x_dn = np.minimum(np.maximum(x_dn, xh - 2 * lst), xh - eps)
            x_dn = np.where(l > 0, np.maximum(x_dn, xl + eps), x_dn)
            ext_dn = ~first & down & near & usable.any(axis=1)
        g = np.where(ext_up, np.exp(x_up), np.where(ext_dn, np.exp(x_dn), g))
        shrink = ~first & ~up & ~down
        if shrink.any():
            xl = np.log(np.where(shrink, l, 1.0))
            xh = np.log(np.where(shrink, h, 1.0))
            pl, ph = m_lo[active], m_hi[active]
            with np.errstate(invalid="ignore"):
                usable = (pl > 0) & (ph < 0)  # false where either is nan
            kk = usable.argmax(axis=1)
            secant = shrink & usable.any(axis=1) & ((xh - xl) > 2 * eps)
            secant &= (xh - xl) <= SECANT_WIDTH
            rows = np.arange(active.size)
            pk, hk = pl[rows, kk], ph[rows, kk]
            with np.errstate(invalid="ignore", divide="ignore"):
                frac = np.where(secant, pk / (pk - hk), 0.5)
            x = xl + frac * (xh - xl)
            # aim just past the estimate, at the side of the end that stayed put, so
            # that a good estimate closes the bracket in one more step
            shifted = x + np.where(last[active] == 1, -close, close)
            x = np.where(secant, np.clip(shifted, xl + eps, xh - eps), x)
            g = np.where(shrink, np.exp(x), g)
        moved = ~first & (up | down)
        step[active[moved]] = np.minimum(st[moved] ** 2, 1e4)
        tested[active] = True
        result = test(active, g)
        if isinstance(result, tuple):
            feas = np.asarray(result[0], dtype=bool)
            meas = np.asarray(result[1], dtype=float)
            if meas.ndim == 1:
                phi = meas
                meas = np.full((active.size, N_MEASURES), np.nan)
                meas[:, M_COUPLING] = phi
        else:
            feas = np.asarray(result, dtype=bool)
            meas = np.full((active.size, N_MEASURES), np.nan)
        a_f, a_i = active[feas], active[~feas]
        # Illinois: the end that stays put twice in a row has its measures halved
        m_lo[a_f[last[a_f] == 1]] *= 0.5
        m_hi[a_i[last[a_i] == -1]] *= 0.5
        moved = a_f[np.isfinite(hi[a_f])]
        x_phi[moved] = np.log(hi[moved])
        p_hi[moved] = r_hi[moved]
        hi[a_f] = g[feas]
        m_hi[a_f] = meas[feas]
        r_hi[a_f] = meas[feas]
        moved = a_i[lo[a_i] > 0]
        x_plo[moved] = np.log(lo[moved])
        p_lo[moved] = r_lo[moved]
        lo[a_i] = np.maximum(lo[a_i], g[~feas])
        m_lo[a_i] = meas[~feas]
        r_lo[a_i] = meas[~feas]
        last[a_f], last[a_i] = 1, -1
        failed[a_i[g[~feas] > GAMMA_MAX]] = True
    out = hi.copy()
    out[failed | ~np.isfinite(hi)] = np.nan
    return out


WARM_STRIDES = (64, 16, 4, 1)  # plants solved in each pass (by list position)


def _features(Ps: list[Normalized]) -> np.ndarray:
    """Plant data as points of a Euclidean space (each coordinate scaled by its spread
    over the plants), to find the plant nearest to another: the operating points are
    not known here, but plants of nearby points have nearby matrices."""
    F = np.stack([np.concatenate([P.A.ravel(), P.B1.ravel(), P.B2.ravel(), P.C1.ravel(),
                                  P.C2.ravel(), P.D11.ravel()]) for P in Ps])
    spread = F.std(axis=0)
    keep = spread > 1e-12 * (np.abs(F).max(axis=0) + 1e-300)
    return F[:, keep] / spread[keep]


def _passes(Ps: list[Normalized], pbs: np.ndarray, rtol: float) -> np.ndarray:
    """Lockstep search (on the scaled gammas) in passes: every 64th plant from a cold start,
    then every 16th, every 4th and all others, each warm-started from the optimum of the
    plant already solved that is nearest in plant data (see :func:`_features`)."""
    K = len(Ps)
    test = _Stacked(Ps)
    scales = np.array([P.gamma_scale for P in Ps])
    out = np.full(K, np.nan)
    done = np.zeros(K, dtype=bool)
    F = _features(Ps) if K > 1 else np.zeros((K, 0))
    for stride in WARM_STRIDES:
        now = np.flatnonzero(~done & (np.arange(K) % stride == 0))
        if now.size == 0:
            continue
        hints = None
        solved = np.flatnonzero(done & np.isfinite(out))
        if solved.size:
            d2 = ((F[now, None, :] - F[None, solved, :]) ** 2).sum(axis=2)
            near = solved[d2.argmin(axis=1)]
            # the scaled gammas of two plants differ by the ratio of their gamma scales
            hints = out[near] * scales[near] / scales[now]

        def sub_test(act, g, now=now):
            return test(now[act], g)

        out[now] = _search(sub_test, pbs[now], rtol, hints=hints)
        done[now] = True
    return out


def synthesize_many(
    plants,
    gamma: float | None = None,
    rtol: float = 1e-4,
    gamma_opt=None,
) -> list[tuple[float, Controller | None, str]]:
    """Optimal gammas (and controllers at a common gamma) of many plants in lockstep.

    Parameters
    ----------
    plants : sequence of GeneralizedPlant (any sizes; plants of equal sizes are
        iterated together).
    gamma : common design gamma; when given, the central controller of every
        plant is computed at it (ordered-Schur Riccati route, full checks).
    rtol : relative accuracy of the optimal gammas.
    gamma_opt : optional per-plant optimal gammas already known (skips the
        iteration; nan marks a plant to skip).

    Returns
    -------
    list of ``(gamma_opt, controller or None, reason)``; ``reason`` is "" on
    success, else one line (never raised per plant). ``gamma_opt`` is nan where
    the plant failed.

    Notes
    -----
    The search of :func:`optimal_gamma` is run for all plants at once: each
    step stacks the Hamiltonians of the active plants into ``(K, 2n, 2n)``
    arrays and calls one batched eigen-decomposition, so the per-call Python
    overhead is paid once per step, not once per plant. The stable invariant
    subspace comes from the eigenvectors. Every 64th plant is solved first, then
    every 16th, every 4th and the others, each starting from the optimal gamma of
    the solved plant with the nearest matrices (warm start). Every gamma found is
    re-checked with the ordered-Schur solver of :func:`feasibility`, and the
    scalar :func:`optimal_gamma` is used where the two disagree.
    """
    plants = list(plants)
    if gamma is not None:
        gamma = _check_gamma(gamma)
    if not (0 < rtol < 1):
        raise InputError(f"rtol={rtol} must lie in (0, 1); give e.g. 1e-4")
    N = len(plants)
    gopt = np.full(N, np.nan)
    reasons = [""] * N
    normalized: list[Normalized | None] = [None] * N
    for i, p in enumerate(plants):
        try:
            p.check_conditions()
            normalized[i] = normalize(p)
        except ScheduleError as exc:
            reasons[i] = str(exc)
    if gamma_opt is not None:
        known = np.asarray(gamma_opt, dtype=float)
        if known.shape != (N,):
            raise InputError(f"gamma_opt has shape {known.shape}, expected ({N},); fix gamma_opt")
        gopt = known.copy()
        for i in range(N):
            if not reasons[i] and not np.isfinite(gopt[i]):
                reasons[i] = "no optimal gamma given for this plant"
    else:
        groups: dict[tuple, list[int]] = {}
        for i, P in enumerate(normalized):
            if P is not None:
                groups.setdefault(P.dims, []).append(i)
        for idx in groups.values():
            Ps = [normalized[i] for i in idx]
            pbs = np.array([P.d11_bound for P in Ps])
            found = _passes(Ps, pbs, rtol)
            for i, g in zip(idx, found, strict=True):
                P = normalized[i]
                g = float(g) * P.gamma_scale
                if np.isfinite(g) and not _solve_all(P, g, gains=False)[-1]:
                    gopt[i] = g
                    continue
                try:  # disagreement or failure: the scalar path decides and explains
                    gopt[i] = _optimal_gamma(P, rtol)
                except ScheduleError as exc:
                    reasons[i] = str(exc)
            for i in idx:
                if not reasons[i]:
                    gopt[i] = _certifiable_floor(plants[i], normalized[i], float(gopt[i]))
    results: list[tuple[float, Controller | None, str]] = []
    todo = [i for i in range(N) if not reasons[i] and gamma is not None]
    made: dict[int, tuple[Controller | None, str]] = {}
    if todo:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            for i, res in zip(todo, central_controllers([plants[i] for i in todo], gamma),
                              strict=True):
                made[i] = res
    for i in range(N):
        if i not in made:
            results.append((float(gopt[i]) if not reasons[i] else float("nan"), None, reasons[i]))
        else:
            K, why = made[i]
            results.append((float(gopt[i]), K, why))
    return results


# ====================================================== what sets gamma_opt
LIMIT_RTOL = 1e-3  # a condition sets gamma_opt when it fails at gamma_opt (1 - LIMIT_RTOL)

LIMIT_CAUSES = {
    "d11": "the D11 bound",
    "state_feedback": "the state-feedback sub-problem (X Riccati bound)",
    "output_injection": "the output-injection sub-problem (Y Riccati bound)",
    "sub_problems": "both sub-problems (X and Y Riccati bounds)",
    "coupling": "the coupling condition rho(XY) < gamma^2",
    "none": "no bound within 0.1 % (gamma_opt is not tight here)",
}


@dataclass(frozen=True)
class GammaLimit:
    """What sets one plant's optimal gamma (see :func:`gamma_opt_limits`).

    ``cause`` is a key of ``LIMIT_CAUSES``. For ``"d11"``: ``bound`` is the D11 bound
    in the plant's units (the norm of the D11 block that sets it), ``z`` and ``w`` the
    indices of the performance output and the exogenous input that carry the largest
    share of that block's top singular vectors, ``z_share`` and ``w_share`` those shares
    (squared components, 1 when one channel carries it all) and ``block`` ``"row"`` (the
    z directions the controls cannot reach, all w) or ``"column"`` (the w directions the
    measurements do not see, all z). Otherwise ``bound`` is nan and the indices -1.
    """

    cause: str
    bound: float = float("nan")
    z: int = -1
    w: int = -1
    z_share: float = float("nan")
    w_share: float = float("nan")
    block: str = ""


def _d11_limit(P: Normalized) -> GammaLimit:
    """The D11 block that sets the Parrott-type bound, mapped back to the plant's z and w.

    ``z~ = Sz z`` and ``w = Sw' w~`` with ``Sz``, ``Sw`` orthogonal up to one scalar each
    (:func:`normalize`), so a unit direction of z~ is the z direction ``Sz' e`` (up to
    that scalar), and likewise ``Sw' e`` for w.
    """
    _, nw, nu, nz, ny = P.dims
    r, c = nz - nu, nw - ny
    best: tuple[float, np.ndarray, np.ndarray, str] | None = None
    if r and nw:
        U, s, Vt = np.linalg.svd(P.D11[:r, :])
        best = (float(s[0]), P.Sz[:r].T @ U[:, 0], P.Sw.T @ Vt[0], "row")
    if c and nz:
        U, s, Vt = np.linalg.svd(P.D11[:, :c])
        if best is None or s[0] > best[0]:
            best = (float(s[0]), P.Sz.T @ U[:, 0], P.Sw[:c].T @ Vt[0], "column")
    if best is None:
        return GammaLimit("d11", 0.0)
    value, zd, wd = best[0], best[1] ** 2, best[2] ** 2
    zs, ws = zd / zd.sum(), wd / wd.sum()
    iz, iw = int(np.argmax(zs)), int(np.argmax(ws))
    return GammaLimit("d11", value * P.gamma_scale, iz, iw, float(zs[iz]), float(ws[iw]),
                      best[3])


def gamma_opt_limits(plants, gamma_opt, rtol: float = LIMIT_RTOL) -> list[GammaLimit]:
    """Which condition sets each plant's optimal gamma.

    gamma_opt is the smallest gamma at which all existence conditions of the
    output-feedback problem hold (Glover and Doyle 1988; Doyle, Glover, Khargonekar and
    Francis 1989): gamma above the Parrott-type D11 bound, a stabilizing X >= 0 (the
    state-feedback, i.e. full-information, sub-problem), a stabilizing Y >= 0 (the
    output-injection, i.e. full-control, sub-problem) and ``rho(XY) < gamma^2``. The
    first three are lower bounds on gamma in their own right. Just below gamma_opt, at
    ``gamma_opt (1 - rtol)``, at least one condition fails; the one that fails sets
    gamma_opt (its own bound is within ``rtol`` of gamma_opt): the D11 bound when gamma
    is not above it, else the X and/or Y Riccati, else the coupling condition. Where
    none fails, gamma_opt is not tight to ``rtol`` (for example an infimum of zero).

    The test is one batched quick existence test per plant (the one the gamma search
    uses), so it costs a small fraction of the search; no model code runs.

    Parameters
    ----------
    plants : GeneralizedPlant objects (any sizes).
    gamma_opt : their optimal gammas in the plants' units (nan: skipped, cause "none").
    rtol : relative distance below gamma_opt at which the conditions are tested; it
        must exceed the relative accuracy of gamma_opt (1e-4 in ``schedule design``).

    Returns
    -------
    list of :class:`GammaLimit`, one per plant.
    """
    plants = list(plants)
    gopt = np.asarray(gamma_opt, dtype=float).reshape(-1)
    if gopt.shape != (len(plants),):
        raise InputError(f"{gopt.size} gamma_opt values for {len(plants)} plants; give one "
                         "per plant")
    if not (0 < rtol < 1):
        raise InputError(f"rtol={rtol} must lie in (0, 1); give e.g. 1e-3")
    out = [GammaLimit("none")] * len(plants)
    groups: dict[tuple, list[tuple[int, Normalized]]] = {}
    for i, p in enumerate(plants):
        if not (np.isfinite(gopt[i]) and gopt[i] > 0):
            continue
        try:
            P = normalize(p)
        except ScheduleError:
            continue
        g = gopt[i] * (1.0 - rtol) / P.gamma_scale
        if not g > P.d11_bound * (1 + 1e-12):
            out[i] = _d11_limit(P)
            continue
        groups.setdefault(P.dims, []).append((i, P))
    for members in groups.values():
        idx = np.array([i for i, _ in members])
        Ps = [P for _, P in members]
        g = gopt[idx] * (1.0 - rtol) / np.array([P.gamma_scale for P in Ps])
        every = np.arange(len(Ps))
        ok_x, X, _, _ = _StackedSide([P.x_side for P in Ps]).solve(every, g)
        ok_y, Y, _, _ = _StackedSide([P.y_side for P in Ps]).solve(every, g)
        rho = np.abs(np.linalg.eigvals(X @ Y)).max(axis=1) / (g * g)
        for k, i in enumerate(idx):
            if not ok_x[k] and not ok_y[k]:
                out[i] = GammaLimit("sub_problems")
            elif not ok_x[k]:
                out[i] = GammaLimit("state_feedback")
            elif not ok_y[k]:
                out[i] = GammaLimit("output_injection")
            elif rho[k] >= 1.0 - COUPLING_RTOL:
                out[i] = GammaLimit("coupling")
    return out


def limit_channels(plant: GeneralizedPlant, gamma_opt: float, rtol: float = LIMIT_RTOL,
                   factor: float = 0.5) -> tuple[list[int], list[int]]:
    """The performance outputs z_i and exogenous inputs w_j that set ``gamma_opt``.

    A channel sets it when scaling that channel alone by ``factor`` (< 1) makes gamma
    achievable at ``gamma_opt (1 - rtol)`` (full existence test of :func:`feasibility`).
    Scaling one row of (C1, D11, D12) or one column of (B1, D11, D21) down can only
    lower the closed-loop norm of every controller (``||S T|| <= ||T||`` for
    ``S = diag(1, .., factor, .., 1)``), so gamma_opt never rises; it falls below
    ``gamma_opt (1 - rtol)`` only when that channel takes part in the limiting
    condition (for example a sensor noise passed at low frequency into a heavily
    weighted error). Costs ``nz + nw`` existence tests.

    Returns
    -------
    (z indices, w indices), each in channel order; empty when no single channel does.
    """
    g = float(gamma_opt) * (1.0 - rtol)
    P = plant

    def scaled_z(s):  # one row of (C1, D11, D12) scaled
        c = s[:, None]
        return GeneralizedPlant(P.A, P.B1, P.B2, P.C1 * c, P.C2, P.D11 * c, P.D12 * c,
                                P.D21, P.D22)

    def scaled_w(s):  # one column of (B1, D11, D21) scaled
        r = s[None, :]
        return GeneralizedPlant(P.A, P.B1 * r, P.B2, P.C1, P.C2, P.D11 * r, P.D12,
                                P.D21 * r, P.D22)

    found: list[list[int]] = []
    for count, scaled in ((P.nz, scaled_z), (P.nw, scaled_w)):
        found.append([])
        for i in range(count):
            s = np.ones(count)
            s[i] = factor
            try:
                if not feasibility(scaled(s), g):
                    found[-1].append(i)
            except ScheduleError:
                continue
    return found[0], found[1]
