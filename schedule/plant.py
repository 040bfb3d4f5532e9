"""The generalized plant of the H-infinity output-feedback problem.

The plant maps the exogenous inputs ``w`` (disturbances, references, noise) and
the controls ``u`` to the performance outputs ``z`` and the measurements ``y``::

    xdot = A  x + B1  w + B2  u
    z    = C1 x + D11 w + D12 u
    y    = C2 x + D21 w + D22 u

The controller closes ``u = K y`` (lower linear fractional transformation).

This module validates the matrices (shapes, finiteness, empty partitions) and
checks the standard existence assumptions of the Riccati route (Glover and
Doyle 1988; Zhou, Doyle and Glover 1996, section 14.1 / 17.1):

(A1) (A, B2) stabilizable and (C2, A) detectable;
(A2) D12 has full column rank and D21 has full row rank;
(A3) [A - jwI, B2; C1, D12] has full column rank for every real w;
(A4) [A - jwI, B1; C2, D21] has full row rank for every real w.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, fields

import numpy as np
from scipy.linalg.lapack import dgebal as _GEBAL

from .errors import PlantError

__all__ = ["GeneralizedPlant", "PlantScaling", "PLANT_KEYS"]

PLANT_KEYS = ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21", "D22")

# Relative tolerances of the condition checks.
_RANK_RTOL = 1e-10  # singular value / largest singular value below this = rank deficient
# PBH test: smallest singular value of [A - lam I, ||A|| Q] relative to ||A|| (balanced A, Q an
# orthonormal basis of range(B2)); an exactly uncontrollable mode gives about eps ||A|| cond(lam)
_PBH_RTOL = 1e-8
# largest ratio of fast to slow scale of the scaled Riccati equations (see _check_cheapness)
CHEAP_LIMIT = 300.0
# a zero lam with |Re lam| <= _AXIS_RTOL |lam| + _AXIS_ATOL ||A|| is "on" the imaginary axis
# (same rule as the Riccati solver: slow but genuine poles and zeros are not on it)
_AXIS_RTOL = 1e-6
_AXIS_ATOL = 1e-12


def _fmt(x: complex | float) -> str:
    """Short form of a (possibly complex) number: real when the imaginary part is rounding."""
    z = complex(x)
    re = z.real + 0.0  # turn -0.0 into 0.0
    if abs(z.imag) <= 1e-12 * max(1.0, abs(z)):
        return f"{re:.4g}" if abs(re) > 1e-300 else "0"
    return f"{re:.4g}{'+' if z.imag >= 0 else '-'}{abs(z.imag):.4g}j"


@dataclass(frozen=True)
class GeneralizedPlant:
    """Generalized plant ``P = [A B1 B2; C1 D11 D12; C2 D21 D22]``.

    Parameters
    ----------
    A : (n, n) state matrix.
    B1, B2 : (n, nw) exogenous-input and (n, nu) control-input matrices.
    C1, C2 : (nz, n) performance-output and (ny, n) measurement matrices.
    D11, D12, D21, D22 : the feed-through blocks, (nz, nw), (nz, nu), (ny, nw), (ny, nu).

    All matrices must be 2-D and finite; every partition must be non-empty
    (n >= 1, nw, nu, nz, ny >= 1). Construction converts to float64 and
    raises :class:`~schedule.errors.PlantError` with a one-line message on bad
    input. The synthesis conditions are checked separately by
    :meth:`check_conditions`.
    """

    A: np.ndarray
    B1: np.ndarray
    B2: np.ndarray
    C1: np.ndarray
    C2: np.ndarray
    D11: np.ndarray
    D12: np.ndarray
    D21: np.ndarray
    D22: np.ndarray

    def __post_init__(self) -> None:
        arrays = _validated({f.name: getattr(self, f.name) for f in fields(self)})
        for key, value in arrays.items():
            object.__setattr__(self, key, value)

    # ----------------------------------------------------------------- sizes
    @property
    def n(self) -> int:
        """Number of states."""
        return self.A.shape[0]

    @property
    def nw(self) -> int:
        """Number of exogenous inputs w."""
        return self.B1.shape[1]

    @property
    def nu(self) -> int:
        """Number of controls u."""
        return self.B2.shape[1]

    @property
    def nz(self) -> int:
        """Number of performance outputs z."""
        return self.C1.shape[0]

    @property
    def ny(self) -> int:
        """Number of measurements y."""
        return self.C2.shape[0]

    # ----------------------------------------------------------- conversions
    @classmethod
    def from_abcd(
        cls,
        A: np.ndarray,
        B: np.ndarray,
        C: np.ndarray,
        D: np.ndarray,
        n_controls: int,
        n_measurements: int,
    ) -> GeneralizedPlant:
        """Split an ``(A, B, C, D)`` realization into the generalized plant.

        The controls are the LAST ``n_controls`` columns of B and D, the
        measurements the LAST ``n_measurements`` rows of C and D.
        """
        B = _as_2d("B", B)
        C = _as_2d("C", C)
        D = _as_2d("D", D)
        nu, ny = int(n_controls), int(n_measurements)
        if nu < 1 or nu >= B.shape[1]:
            raise PlantError(
                f"n_controls={nu} must be between 1 and {B.shape[1] - 1} (B has "
                f"{B.shape[1]} columns and w needs at least one); fix n_controls"
            )
        if ny < 1 or ny >= C.shape[0]:
            raise PlantError(
                f"n_measurements={ny} must be between 1 and {C.shape[0] - 1} (C has "
                f"{C.shape[0]} rows and z needs at least one); fix n_measurements"
            )
        if D.shape != (C.shape[0], B.shape[1]):
            raise PlantError(
                f"D has shape {D.shape}, expected {(C.shape[0], B.shape[1])} "
                "(rows of C, columns of B); fix D"
            )
        nw, nz = B.shape[1] - nu, C.shape[0] - ny
        return cls(
            A=A,
            B1=B[:, :nw],
            B2=B[:, nw:],
            C1=C[:nz],
            C2=C[nz:],
            D11=D[:nz, :nw],
            D12=D[:nz, nw:],
            D21=D[nz:, :nw],
            D22=D[nz:, nw:],
        )

    @classmethod
    def from_validated(cls, arrays: dict[str, np.ndarray]) -> GeneralizedPlant:
        """Build without validating again, from the arrays of plants that were validated
        before (e.g. slices of the stacked plants of a family run, handed to a worker).

        The arrays must be float64 2-D with consistent shapes; nothing is checked or
        copied. Use the normal constructor for anything that comes from a user.
        """
        obj = object.__new__(cls)
        for key in PLANT_KEYS:
            object.__setattr__(obj, key, arrays[key])
        return obj

    def to_arrays(self) -> dict[str, np.ndarray]:
        """The nine matrices by name (copies)."""
        return {k: getattr(self, k).copy() for k in PLANT_KEYS}

    @classmethod
    def from_arrays(cls, d: dict[str, np.ndarray]) -> GeneralizedPlant:
        """Build from a dict with exactly the nine keys of :meth:`to_arrays`."""
        missing = [k for k in PLANT_KEYS if k not in d]
        if missing:
            raise PlantError(f"plant arrays lack {', '.join(missing)}; give all of {PLANT_KEYS}")
        extra = sorted(set(d) - set(PLANT_KEYS))
        if extra:
            raise PlantError(f"unknown plant arrays {', '.join(extra)}; use only {PLANT_KEYS}")
        return cls(**{k: d[k] for k in PLANT_KEYS})

    # ----------------------------------------------------------------- memo
    def _digest(self) -> bytes:
        """Content digest of the nine matrices (BLAKE2b over shapes and bytes)."""
        h = hashlib.blake2b(digest_size=16)
        for key in PLANT_KEYS:
            a = getattr(self, key)
            h.update(repr(a.shape).encode())
            h.update(np.ascontiguousarray(a, dtype=np.float64).tobytes())
        return h.digest()

    def memo(self, name: str, build: Callable[[], object]) -> object:
        """``build()``, computed once per content of the plant and kept on it.

        The value is keyed by a digest of the matrices, so it is recomputed if an
        array was changed in place after it was stored. Used for work done by several
        stages on the same plant (the condition checks, the normalization).
        """
        digest = self._digest()
        cache = self.__dict__.get("_memo")
        if cache is None or cache[0] != digest:
            cache = (digest, {})
            object.__setattr__(self, "_memo", cache)
        store = cache[1]
        if name not in store:
            store[name] = build()
        return store[name]

    # --------------------------------------------------------------- scaling
    def scaling(self) -> PlantScaling:
        """The coordinates and units in which the plant is well scaled (kept on the plant).

        Every question the package asks of a generalized plant (the existence conditions,
        the gamma iteration, the central controller) has an answer that does not depend
        on the units of w, z, u, y nor on the state coordinates; the numbers it is
        computed from do. This scaling removes that dependence before any tolerance is
        applied (see :class:`PlantScaling`).

        Raises
        ------
        PlantError
            when D12 lacks full column rank or D21 full row rank (no normalization).
        """
        return self.memo("scaling", lambda: _plant_scaling(self))

    # ------------------------------------------------------------ conditions
    def check_conditions(self) -> None:
        """Check the existence assumptions (A1)-(A4) of the Riccati route.

        Raises
        ------
        PlantError
            naming the failing condition: the rank of D12 or D21, the uncontrollable /
            unobservable unstable mode, or the frequency of an invariant zero on the
            imaginary axis (with the usual remedy).

        Notes
        -----
        All tests run on the balanced realization of :meth:`scaling` (state coordinates
        balanced, u and y normalized by the SVDs of D12 and D21), with the control and
        measurement matrices replaced by orthonormal bases of their ranges scaled to
        ``||A||``: a rank decision then does not depend on units or state coordinates
        (a plant with a = 1e8 and B2 = 1 is stabilizable). Stabilizability and
        detectability use the PBH test on the eigenvalues with non-negative real part
        (Hautus 1969). For (A3), with D12 of full column rank,
        ``[A - sI, B2; C1, D12]`` loses column rank exactly at the unobservable
        eigenvalues of ``(U' C1, A - B2 D12^+ C1)`` where the columns of U span the
        orthogonal complement of range(D12); (A4) is the dual statement. A plant that
        passed is remembered (by content, see :meth:`memo`), so a second call costs a
        digest of the matrices.
        """
        self.memo("conditions", self._check_conditions)

    def _check_conditions(self) -> bool:
        sc = self.scaling()
        _check_cheapness(self, sc)
        t = sc.t
        A = self.A * (t[None, :] / t[:, None])  # T^-1 A T
        B1, B2 = self.B1 / t[:, None], self.B2 / t[:, None]
        C1, C2 = self.C1 * t[None, :], self.C2 * t[None, :]
        scale = _matrix_scale(A)
        eigs = np.linalg.eigvals(A)
        suspect = eigs[eigs.real >= -(_AXIS_RTOL * np.abs(eigs) + _AXIS_ATOL * scale)]
        bad = _pbh_defects(A, _range_basis(B2, columns=True), suspect, scale, columns=True)
        if bad.any():
            lam = suspect[np.argmax(bad)]
            raise PlantError(
                f"(A, B2) is not stabilizable: mode {_fmt(lam)} cannot be moved by the "
                "controls; add an actuator acting on it or remove it from the model"
            )
        bad = _pbh_defects(A, _range_basis(C2, columns=False), suspect, scale, columns=False)
        if bad.any():
            lam = suspect[np.argmax(bad)]
            raise PlantError(
                f"(C2, A) is not detectable: mode {_fmt(lam)} is not seen by the "
                "measurements; add a sensor seeing it or remove it from the model"
            )
        # (A3): zeros of [A - sI, B2; C1, D12] on the imaginary axis.
        u_, s_, vt = sc.svd12
        pinv = vt.T @ (u_[:, : self.nu].T / s_[:, None])
        Az = A - B2 @ pinv @ C1
        Cz = u_[:, self.nu :].T @ C1
        w = _axis_zero(Az, Cz)
        if w is not None:
            raise PlantError(
                f"[A - jwI, B2; C1, D12] loses rank at w={_fmt(w)} rad/s (invariant zero of the "
                "control-to-performance path on the imaginary axis); add a small weight on "
                "the control effort or move the pure integrator/oscillator slightly into the "
                "left half-plane (e.g. s -> s + 1e-4)"
            )
        # (A4): zeros of [A - sI, B1; C2, D21] on the imaginary axis (dual).
        u_, s_, vt = sc.svd21
        pinv = vt[: self.ny].T @ (u_.T / s_[:, None])
        Ay = A - B1 @ pinv @ C2
        By = B1 @ vt[self.ny :].T
        w = _axis_zero(Ay.T, By.T)
        if w is not None:
            raise PlantError(
                f"[A - jwI, B1; C2, D21] loses rank at w={_fmt(w)} rad/s (invariant zero of the "
                "disturbance-to-measurement path on the imaginary axis); add a small "
                "measurement-noise weight or move the pure integrator/oscillator slightly into "
                "the left half-plane (e.g. s -> s + 1e-4)"
            )
        return True


@dataclass(frozen=True)
class PlantScaling:
    """A change of state coordinates and of the units of w, z, u, y that scales a plant well.

    The synthesis works on ``x = diag(t) x~``, ``z~ = Sz z``, ``w = Sw' w~``,
    ``u = Tu u~``, ``y~ = Ty y`` with

    - ``t`` from balancing (Parlett and Reinsch 1969, LAPACK ``dgebal``, as in
      :func:`scipy.linalg.matrix_balance`) the nonnegative matrix whose state block is
      ``|A|`` and whose four extra rows / columns hold the row norms of ``B1`` and
      ``B2 Tu0`` and the column norms of ``C1`` and ``Ty0 C2`` (one row or column per
      signal group, whose own scaling is left free);
    - ``Tu0 = V S^-1`` and ``Ty0 = S2^-1 U2'`` from the SVDs ``D12 = U S V'`` and
      ``D21 = U2 [S2 0] V2'``, and the rotations ``Rz``, ``Rw`` that bring D12 to
      ``[0; I]`` and D21 to ``[0, I]`` (Zhou, Doyle and Glover 1996, section 17.1);
    - two scalars: ``sigma_z`` makes ``||B2~|| = ||C1~||`` and ``sigma_w`` makes
      ``||B1~|| = ||C2~||`` (Frobenius norms), so ``Sz = Rz / sigma_z``,
      ``Tu = sigma_z Tu0``, ``Sw = sigma_w Rw``, ``Ty = Ty0 / sigma_w``.

    Then ``gamma = gamma_scale * gamma~`` with ``gamma_scale = sigma_z / sigma_w``: a change
    of units of z or w by c changes gamma_scale by c and leaves the scaled problem the
    same up to rounding, and a change of u or y leaves it the same up to an orthogonal
    rotation of u~ or y~. State scalings change ``t`` (up to the powers of 2 that the
    balancing uses), not the balanced matrices.

    Attributes
    ----------
    t : (n,) state scaling. Rz, Rw : orthogonal rotations of z and w.
    Tu0, Ty0 : the unit-free normalizations of u and y.
    sigma_z, sigma_w : the scalars above. gamma_scale : ``sigma_z / sigma_w``.
    svd12, svd21 : the SVDs ``(U, s, V')`` of D12 and D21.
    d12_ratio, d21_ratio : smallest over largest singular value of D12 and D21.
    """

    t: np.ndarray
    Rz: np.ndarray
    Rw: np.ndarray
    Tu0: np.ndarray
    Ty0: np.ndarray
    sigma_z: float
    sigma_w: float
    svd12: tuple
    svd21: tuple

    @property
    def gamma_scale(self) -> float:
        return self.sigma_z / self.sigma_w

    @property
    def d12_ratio(self) -> float:
        s = self.svd12[1]
        return float(s[-1] / s[0])

    @property
    def d21_ratio(self) -> float:
        s = self.svd21[1]
        return float(s[-1] / s[0])


def _plant_scaling(p: GeneralizedPlant) -> PlantScaling:
    n, nu, ny = p.n, p.nu, p.ny
    u, s, vt = np.linalg.svd(p.D12)
    _check_rank("D12", p.D12, full="column", s=s)
    u2, s2, vt2 = np.linalg.svd(p.D21)
    _check_rank("D21", p.D21, full="row", s=s2)
    Rz = np.vstack([u[:, nu:].T, u[:, :nu].T])
    Tu0 = vt.T / s[None, :]
    Rw = np.vstack([vt2[ny:], vt2[:ny]])
    Ty0 = u2.T / s2[:, None]
    B2n = p.B2 @ Tu0
    C2n = Ty0 @ p.C2
    S = np.zeros((n + 4, n + 4))
    S[:n, :n] = np.abs(p.A)
    S[:n, n] = np.linalg.norm(p.B1, axis=1)
    S[:n, n + 1] = np.linalg.norm(B2n, axis=1)
    S[n + 2, :n] = np.linalg.norm(p.C1, axis=0)
    S[n + 3, :n] = np.linalg.norm(C2n, axis=0)
    t = np.ones(n)
    if np.all(np.isfinite(S)):  # LAPACK dgebal, scaling only (what matrix_balance calls)
        _ba, _lo, _hi, sc, info = _GEBAL(S, scale=1, permute=0)
        if info == 0:
            t = np.asarray(sc[:n], dtype=float)
    sigma_z = _ratio_root(np.linalg.norm(p.C1 * t[None, :]), np.linalg.norm(B2n / t[:, None]))
    sigma_w = _ratio_root(np.linalg.norm(C2n * t[None, :]), np.linalg.norm(p.B1 / t[:, None]))
    return PlantScaling(t=t, Rz=Rz, Rw=Rw, Tu0=Tu0, Ty0=Ty0, sigma_z=sigma_z, sigma_w=sigma_w,
                        svd12=(u, s, vt), svd21=(u2, s2, vt2))


def _check_cheapness(p: GeneralizedPlant, sc: PlantScaling) -> None:
    """(A2) in its quantitative form: no control (measurement) may be so lightly weighted
    relative to its effect that the Riccati equations become singularly perturbed.

    On the scaled plant (states balanced, u and y normalized by D12 and D21, z and w by
    the scalars of :class:`PlantScaling`; every number below is unit-free and does not
    depend on the state coordinates; Frobenius norms) the fast eigenvalues of the X
    Hamiltonian have size
    ``||B2|| ||C1||`` and the dynamics the problem is about have size
    ``max(||A||, ||B1|| ||C1||)``. Their ratio (the dual ratio ``||C2|| ||B1|| /
    max(||A||, ||C1|| ||B1||)`` for the Y equation) is about 1 for well-posed designs
    (at most about 7 over 200 random plants, 1.3 on the bundled crane); it grows like
    1 / sqrt(ratio of D12's singular values) as a control loses its weight, and the
    Riccati route loses accuracy beyond ``CHEAP_LIMIT`` (measured on random plants: gamma_opt
    accurate to 1e-5 up to about 700, off by 1e-3 to 2e-2 from about 800 on; the limit
    keeps a factor of 40 above the well-posed designs).
    """
    if p.n < 2:  # one state: a 2 x 2 Hamiltonian has a single pair, nothing to separate
        return
    t = sc.t
    A = p.A * (t[None, :] / t[:, None])
    B1 = (p.B1 / t[:, None]) * sc.sigma_w
    B2 = (p.B2 / t[:, None]) @ sc.Tu0 * sc.sigma_z
    C1 = (p.C1 * t[None, :]) / sc.sigma_z
    C2 = sc.Ty0 @ (p.C2 * t[None, :]) / sc.sigma_w
    a, b1, b2, c1, c2 = (float(np.sqrt((M * M).sum())) for M in (A, B1, B2, C1, C2))
    for name, fast, slow, ratio, what in (
        ("D12", b2 * c1, max(a, b1 * c1), sc.d12_ratio, "control"),
        ("D21", c2 * b1, max(a, c1 * b1), sc.d21_ratio, "measurement"),
    ):
        measure = fast / slow if slow > 0 else 0.0
        if measure > CHEAP_LIMIT:
            effort = "control effort" if what == "control" else "measurement noise"
            raise PlantError(
                f"{name} is nearly singular for this plant (smallest/largest singular value "
                f"{ratio:.2e}; a {what} is weighted {measure:.3g} times more lightly than its "
                f"effect, limit {CHEAP_LIMIT:g}), so the Riccati equations lose accuracy; give "
                f"every {what} a weight of comparable effect (a small weight on the missing "
                f"{effort} channel, or a larger one where it is too small)"
            )


def _ratio_root(num: float, den: float) -> float:
    """``sqrt(num / den)``, 1 where either is zero (nothing to balance) or not finite."""
    if not (num > 0 and den > 0 and np.isfinite(num) and np.isfinite(den)):
        return 1.0
    r = float(np.sqrt(num / den))
    return r if np.isfinite(r) and r > 0 else 1.0


def _matrix_scale(A: np.ndarray) -> float:
    """``||A||_F`` (within sqrt(n) of the spectral norm), or 1 for A = 0 (then every test is
    relative to the orthonormal bases)."""
    s = float(np.sqrt((A * A).sum())) if A.size else 0.0
    return s if s > 0 else 1.0


def _range_basis(M: np.ndarray, columns: bool) -> np.ndarray:
    """Orthonormal basis of the column space (``columns``) or row space of M, as columns
    (resp. rows); directions below 1e-12 of the largest singular value are dropped."""
    if M.size == 0:
        return M
    u, s, vt = np.linalg.svd(M, full_matrices=False)
    keep = s > 1e-12 * s[0] if s.size and s[0] > 0 else np.zeros(s.shape, bool)
    return u[:, keep] if columns else vt[keep]


# ---------------------------------------------------------------- helpers
def _as_2d(name: str, value: object) -> np.ndarray:
    try:
        arr = np.array(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise PlantError(f"{name} is not a numeric array ({exc}); give a real 2-D array") from None
    if arr.ndim != 2:
        raise PlantError(
            f"{name} must be a 2-D array, got {arr.ndim}-D with shape {arr.shape}; "
            "reshape it (use np.zeros((k, 0)) for an empty block)"
        )
    return arr


def _validated(raw: dict[str, object]) -> dict[str, np.ndarray]:
    """Convert to float64 2-D, check shapes against A, finiteness and partitions."""
    arrays = {k: _as_2d(k, raw[k]) for k in PLANT_KEYS}
    A = arrays["A"]
    if A.shape[0] != A.shape[1]:
        raise PlantError(f"A must be square, got shape {A.shape}; fix A")
    n = A.shape[0]
    if n == 0:
        raise PlantError("A is empty (no states); a static plant is not supported, give n >= 1")
    nw, nu = arrays["B1"].shape[1], arrays["B2"].shape[1]
    nz, ny = arrays["C1"].shape[0], arrays["C2"].shape[0]
    expected = {
        "B1": (n, nw),
        "B2": (n, nu),
        "C1": (nz, n),
        "C2": (ny, n),
        "D11": (nz, nw),
        "D12": (nz, nu),
        "D21": (ny, nw),
        "D22": (ny, nu),
    }
    for key, shape in expected.items():
        if arrays[key].shape != shape:
            raise PlantError(
                f"{key} has shape {arrays[key].shape}, expected {shape} "
                f"(n={n} from A, nw={nw} from B1, nu={nu} from B2, nz={nz} from C1, "
                f"ny={ny} from C2); fix {key}"
            )
    for key in PLANT_KEYS:
        if not np.all(np.isfinite(arrays[key])):
            bad = np.argwhere(~np.isfinite(arrays[key]))[0]
            raise PlantError(
                f"{key} contains NaN or inf (first at index {tuple(int(i) for i in bad)}); "
                "fix the model data"
            )
    for name, size, what in (
        ("nw", nw, "no exogenous input w (B1 has 0 columns)"),
        ("nu", nu, "no control u (B2 has 0 columns)"),
        ("nz", nz, "no performance output z (C1 has 0 rows)"),
        ("ny", ny, "no measurement y (C2 has 0 rows)"),
    ):
        if size == 0:
            raise PlantError(f"empty partition {name}=0: {what}; the problem needs at least one")
    return arrays


def _check_rank(name: str, D: np.ndarray, full: str, s: np.ndarray | None = None) -> None:
    rows, cols = D.shape
    if s is None:
        s = np.linalg.svd(D, compute_uv=False)
    need = cols if full == "column" else rows
    top = s[0] if s.size else 0.0
    rank = int(np.sum(s > _RANK_RTOL * top)) if top > 0 else 0
    if rank < need:
        what = "control effort" if name == "D12" else "measurement noise"
        raise PlantError(
            f"{name} ({rows}x{cols}) has rank {rank}, needs full {full} rank {need}; "
            f"add a weight on the {what} so every {'control' if name == 'D12' else 'measurement'} "
            "enters directly"
        )


def _pbh_defects(
    A: np.ndarray, Q: np.ndarray, lams: np.ndarray, scale: float, columns: bool
) -> np.ndarray:
    """PBH test at each of ``lams``: True where [A - lam I, scale Q] (columns=True) or
    [A - lam I; scale Q] (columns=False) has smallest singular value below
    ``_PBH_RTOL * scale``; Q is an orthonormal basis of the range of B (or of the row
    space of C) so that the test does not depend on the units of u or y (one stacked
    SVD for all lams)."""
    n = A.shape[0]
    if lams.size == 0:
        return np.zeros(0, dtype=bool)
    if Q.size == 0:
        return np.ones(lams.size, dtype=bool)
    shifted = A[None, :, :] - lams[:, None, None] * np.eye(n)[None]
    Ms = np.broadcast_to((scale * Q).astype(complex), (lams.size,) + Q.shape)
    block = np.concatenate([shifted, Ms], axis=2 if columns else 1)
    s = np.linalg.svd(block, compute_uv=False)
    return s[:, n - 1] < _PBH_RTOL * scale


def _axis_zero(A: np.ndarray, C: np.ndarray) -> float | None:
    """Frequency of an unobservable eigenvalue of (C, A) on the imaginary axis, else None
    (A and C in balanced coordinates)."""
    eigs = np.linalg.eigvals(A)
    scale = _matrix_scale(A)
    near = eigs[np.abs(eigs.real) <= _AXIS_RTOL * np.abs(eigs) + _AXIS_ATOL * scale]
    if near.size == 0:
        return None
    Q = _range_basis(C, columns=False)
    if Q.shape[0] == 0:
        return abs(float(near[0].imag))
    bad = _pbh_defects(A, Q, near, scale, columns=False)
    return abs(float(near[np.argmax(bad)].imag)) if bad.any() else None
