"""Coordinate-consistency diagnostic for a set of linearized plants.

Entry-wise interpolation (of plants, or of controllers whose states estimate
the plant's states) assumes that every operating point uses the same state
coordinates. A similarity transform ``x -> T x`` changes the matrices
``(T A T^-1, T B, C T^-1, D)`` but not the frequency response
``C (sI - A)^-1 B + D``. So when two neighbouring points differ much more in
their matrices than in their frequency responses, their state coordinates
probably differ (states reordered, rescaled, sign-flipped, or a balanced or
minimal realization computed per point).

For each pair of neighbouring points i, j this module computes

- the relative matrix difference ``|M_i - M_j|_F / max(|M_i|_F, |M_j|_F)`` with
  ``M = [[A, B], [C, D]]``, and
- the relative response difference ``max_w |G_i(jw) - G_j(jw)|_F /
  max(|G_i(jw)|_F, |G_j(jw)|_F)`` (relative at each frequency) on a
  logarithmic frequency grid spanning the eigenvalue moduli of all A's,

and flags the pair when the matrix difference exceeds ``min_difference`` and
either ``ratio`` times the response difference or ``relative`` times the
median quotient (matrix / response difference) over all pairs. Points that take part in a
flagged pair and whose median quotient over their neighbour pairs exceeds
``relative`` times the overall median are named as suspects.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .types import Family

REMEDY = ("linearize all points in the same state coordinates: same state order, units and "
          "sign; avoid balanced or minimal realizations per point")


@dataclass(frozen=True)
class CoordinateReport:
    """Result of :func:`check_coordinates`.

    Attributes
    ----------
    pairs : (P, 2) indices of neighbouring points (into the given arrays).
    matrix_difference, response_difference : (P,) relative differences.
    flagged : (P,) True where the matrices differ much more than the responses.
    suspects : point indices most likely linearized in other coordinates.
    message : one line naming the suspects and the remedy ("" when all is well).
    """

    pairs: np.ndarray
    matrix_difference: np.ndarray
    response_difference: np.ndarray
    flagged: np.ndarray
    suspects: tuple[int, ...]
    message: str

    @property
    def ok(self) -> bool:
        return not bool(np.any(self.flagged))


def neighbour_pairs(points, grid_index=None) -> np.ndarray:
    """Pairs of neighbouring points.

    With integer ``grid_index`` (N, d): points one grid step apart along one
    axis. Otherwise the edges of a Delaunay triangulation of the points scaled
    to the unit box (sorted order in one dimension).
    """
    p = np.asarray(points, dtype=float)
    if p.ndim != 2 or p.shape[0] < 2:
        raise InputError(f"need at least two points as an (N, d) array, got shape {p.shape}")
    n, d = p.shape
    if grid_index is not None:
        g = np.asarray(grid_index, dtype=int)
        diff = np.abs(g[:, None, :] - g[None, :, :]).sum(axis=-1)
        i, j = np.nonzero(np.triu(diff == 1))
        return np.stack([i, j], axis=1)
    if d == 1:
        order = np.argsort(p[:, 0])
        return np.sort(np.stack([order[:-1], order[1:]], axis=1), axis=1)
    span = np.ptp(p, axis=0)
    x = (p - p.min(axis=0)) / np.where(span > 0, span, 1.0)
    try:
        from scipy.spatial import Delaunay

        simplices = Delaunay(x).simplices
        edges = {tuple(sorted((int(s[a]), int(s[b]))))
                 for s in simplices for a in range(d + 1) for b in range(a + 1, d + 1)}
    except Exception:  # degenerate (collinear) sets: nearest neighbours instead
        dist = np.sum((x[:, None] - x[None]) ** 2, axis=-1) + np.diag(np.full(n, np.inf))
        near = np.argsort(dist, axis=1)[:, :min(d + 1, n - 1)]
        edges = {tuple(sorted((i, int(j)))) for i in range(n) for j in near[i]}
    return np.array(sorted(edges), dtype=int).reshape(-1, 2)


def _frequency_grid(A: np.ndarray, count: int = 80) -> np.ndarray:
    """Log grid one decade beyond the smallest and largest nonzero eigenvalue moduli."""
    mags = np.abs(np.linalg.eigvals(A)).ravel()
    mags = mags[mags > 1e-9 * max(mags.max(initial=0.0), 1e-300)]
    if mags.size == 0:
        return np.logspace(-2, 2, count)
    return np.logspace(np.log10(mags.min()) - 1, np.log10(mags.max()) + 1, count)


def _responses(A, B, C, D, omega) -> np.ndarray:
    """G(jw) for every point: (N, len(omega), p, m), by stacked solves."""
    n_pts, n = A.shape[:2]
    s = 1j * omega
    M = s[None, :, None, None] * np.eye(n) - A[:, None]
    X = np.linalg.solve(M, np.broadcast_to(B[:, None], (n_pts, len(omega)) + B.shape[1:]))
    return np.einsum("kpn,kwnm->kwpm", C, X) + D[:, None]


def check_coordinates(points, A, B, C, D, grid_index=None, omega=None, ratio: float = 10.0,
                      relative: float = 3.0, min_difference: float = 0.2,
                      names=None) -> CoordinateReport:
    """Flag neighbouring plants whose matrices differ much more than their responses.

    Parameters
    ----------
    points : (N, d) scheduling values.
    A, B, C, D : stacked state-space matrices, (N, n, n), (N, n, m), (N, p, n), (N, p, m).
    grid_index : optional (N, d) integer grid indices (neighbours along grid lines).
    omega : optional frequency grid in rad/s (default: log grid from the eigenvalues).
    ratio : a pair is flagged when matrix difference > ratio * response difference, or
    relative : when the quotient matrix/response difference exceeds ``relative`` times
        its median over all pairs (at least 4 pairs; neighbours far apart legitimately
        differ in both), provided that
    min_difference : the matrix difference exceeds min_difference.
    names : optional (d,) variable names for the message.

    Returns
    -------
    CoordinateReport
    """
    A, B, C, D = (np.asarray(v, dtype=float) for v in (A, B, C, D))
    p = np.asarray(points, dtype=float)
    n_pts = p.shape[0]
    if not (A.ndim == 3 and A.shape[0] == B.shape[0] == C.shape[0] == D.shape[0] == n_pts):
        raise InputError("A, B, C, D must be stacked (N, rows, cols) with one entry per point; "
                         "stack the point index first")
    pairs = neighbour_pairs(p, grid_index)
    w = _frequency_grid(A) if omega is None else np.asarray(omega, dtype=float).ravel()
    G = _responses(A, B, C, D, w)
    gnorm = np.sqrt(np.sum(np.abs(G) ** 2, axis=(2, 3)))  # (N, W)
    M = np.concatenate([np.concatenate([A, B], axis=2), np.concatenate([C, D], axis=2)], axis=1)
    mnorm = np.sqrt(np.sum(M ** 2, axis=(1, 2)))
    i, j = pairs[:, 0], pairs[:, 1]
    mat = np.sqrt(np.sum((M[i] - M[j]) ** 2, axis=(1, 2))) / np.maximum(
        np.maximum(mnorm[i], mnorm[j]), 1e-300)
    # Relative difference frequency by frequency, then the largest: a norm taken
    # over all frequencies at once is dominated by integrators and resonances and
    # hides real changes elsewhere (a crane's sway mode next to its position
    # integrator). A floor keeps transmission zeros from dividing by ~0.
    gmax = np.maximum(gnorm[i], gnorm[j])
    floor = 1e-6 * gmax.max(axis=1, keepdims=True)
    gd = np.sqrt(np.sum(np.abs(G[i] - G[j]) ** 2, axis=(2, 3)))
    resp = (gd / np.maximum(np.maximum(gmax, floor), 1e-300)).max(axis=1)
    excess = mat / np.maximum(resp, 1e-12)
    baseline = float(np.median(excess)) if excess.size >= 4 else np.inf
    # "much more": the matrices must differ more than the responses in any case
    # (by 2x at least), and by ``ratio`` or ``relative`` x the typical pair.
    flagged = ((mat > min_difference) & (excess > 2.0)
               & ((excess > ratio) | (excess > relative * baseline)))
    score = np.zeros(n_pts)
    for k in range(n_pts):
        mine = (i == k) | (j == k)
        if mine.any() and np.isfinite(baseline) and baseline > 0:
            score[k] = np.median(excess[mine]) / baseline
    suspects = [k for k in range(n_pts) if score[k] > relative
                and np.any(flagged[(i == k) | (j == k)])]
    if flagged.any() and not suspects:
        counts = np.bincount(pairs[flagged].ravel(), minlength=n_pts)
        suspects = [k for k in range(n_pts) if counts[k] == counts.max()]
    message = ""
    if flagged.any():
        def at(k):
            vals = ", ".join(f"{'' if names is None else names[c] + '='}{v:g}"
                             for c, v in enumerate(p[k]))
            return f"point {k} ({vals})"

        who = suspects or sorted({int(v) for v in pairs[flagged].ravel()})
        worst = int(np.argmax(np.where(flagged, excess, 0)))
        message = (f"plant matrices of {', '.join(at(k) for k in who[:5])}"
                   f"{' ...' if len(who) > 5 else ''} differ from their neighbours much more "
                   f"than their frequency responses (worst pair {pairs[worst, 0]}-"
                   f"{pairs[worst, 1]}: matrices {mat[worst]:.2g}, responses {resp[worst]:.2g}); "
                   f"{REMEDY}")
    return CoordinateReport(pairs, mat, resp, flagged, tuple(suspects), message)


def check_family_coordinates(family: Family, **options) -> CoordinateReport:
    """:func:`check_coordinates` on the generalized plants of a family's "ok" points.

    The report's indices refer to rows of the family (not to the "ok" subset).
    """
    rows = np.flatnonzero(family.ok)
    if rows.size < 2:
        raise InputError("the coordinate check needs at least two 'ok' operating points")
    P = {k: np.asarray(v, dtype=float)[rows] for k, v in family.plant.items()}
    B = np.concatenate([P["B1"], P["B2"]], axis=2)
    C = np.concatenate([P["C1"], P["C2"]], axis=1)
    D = np.concatenate([np.concatenate([P["D11"], P["D12"]], axis=2),
                        np.concatenate([P["D21"], P["D22"]], axis=2)], axis=1)
    gi = None if family.grid_index is None else np.asarray(family.grid_index)[rows]
    rep = check_coordinates(np.asarray(family.points, float)[rows], P["A"], B, C, D,
                            grid_index=gi, names=family.variable_names, **options)
    # map indices back to family rows
    msg = rep.message
    if msg:
        import re

        msg = re.sub(r"point (\d+)", lambda m: f"point {rows[int(m.group(1))]}", msg)
        msg = re.sub(r"pair (\d+)-(\d+)", lambda m: f"pair {rows[int(m.group(1))]}-"
                     f"{rows[int(m.group(2))]}", msg)
    return CoordinateReport(rows[rep.pairs], rep.matrix_difference, rep.response_difference,
                            rep.flagged, tuple(int(rows[k]) for k in rep.suspects), msg)
