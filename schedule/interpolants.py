"""Interpolant kinds over the scheduling variables, stored as plain arrays.

Every kind speaks one small vocabulary:

- ``fit(points (N, d), values (N, k)) -> self``
- ``evaluate(points (M, d)) -> (M, k)`` (vectorized)
- ``derivative(points (M, d), variable_index) -> (M, k)`` (per physical unit)
- ``to_arrays() -> (arrays, attrs)`` and the classmethod ``from_arrays(arrays, attrs)``
- ``refit(points, values)``: a new interpolant of the same kind fitted with the
  hyperparameters (degree, smoothing, kernel) of this one frozen;
- ``leave_one_out(points, values) -> (predictions, ok)``: row i is what ``refit``
  without point i predicts at point i. Every kind computes all rows without N
  refits: the linear smoothers from one factorization (Gaussian process:
  Rasmussen and Williams 2006, sec. 5.4.2; RBF: Rippa 1999; polynomial least
  squares: the hat-matrix identity), the grid kinds by dropping one breakpoint
  row at a time, the Delaunay kind by re-triangulating around each point only.
  ``leave_one_out_by_refit`` is the definition (N refits), kept as the reference.

Inputs are scaled to the unit box ``[0, 1]^d`` with the scheduling-variable
bounds before anything else. A loaded interpolant evaluates with numpy (and
scipy's Delaunay point location for the ``delaunay`` kind) only; scikit-learn
is used to FIT the Gaussian-process kind and never stored.

Kinds
-----
``multilinear``, ``spline``
    Tensor-product piecewise-linear / cubic (not-a-knot) interpolation on a
    rectangular grid. Grid nodes without data (holes) are filled before the
    fit by linear interpolation along the grid lines through the hole
    with the kind's own 1-D rule (linear, resp. cubic not-a-knot through the
    known nodes of that line), averaged over the lines that bracket the hole,
    else extrapolated; nodes with no known node on any line get the nearest
    node's value. Outside the grid the boundary cell is extended.
``delaunay``
    Linear interpolation on a Delaunay triangulation of scattered points
    (scipy.spatial.Delaunay, Qhull: Barber, Dobkin and Huhdanpaa 1996).
    Outside the convex hull the value is extrapolated linearly from the
    simplex whose smallest barycentric coordinate is largest (the "nearest"
    simplex); ``outside_hull(points)`` flags such points.
``polynomial``
    Least squares on all monomials of total degree <= q; q chosen by K-fold
    cross-validation on standardized values.
``rbf``
    Radial basis functions with a low-degree polynomial tail and smoothing
    (the system solved by scipy.interpolate.RBFInterpolator); the smoothing is
    chosen from a small ladder by Rippa's (1999) closed-form leave-one-out
    error.
``gaussian_process``
    Gaussian-process regression (Rasmussen and Williams 2006, ch. 2 and 5)
    with an anisotropic squared-exponential or Matern-5/2 kernel plus white
    noise, hyperparameters by maximum marginal likelihood (scikit-learn);
    ``evaluate_std`` gives the predictive standard deviation of the latent
    function (eq. 2.26, without the white-noise term).

References
----------
Barber, C.B., Dobkin, D.P., Huhdanpaa, H. (1996). The Quickhull algorithm for
convex hulls. ACM TOMS 22(4), 469-483. doi:10.1145/235815.235821
de Boor, C. (1978). A Practical Guide to Splines. Springer.
Rippa, S. (1999). An algorithm for selecting a good value for the parameter c
in radial basis function interpolation. Adv. Comput. Math. 11, 193-210.
doi:10.1023/A:1018975909870
Rasmussen, C.E., Williams, C.K.I. (2006). Gaussian Processes for Machine
Learning. MIT Press.
"""

from __future__ import annotations

import hashlib
import itertools
import warnings

import numpy as np
from scipy import linalg

from .errors import InputError, NumericalError

FORMAT_VERSION = 1
_GRID_TOL = 1e-9  # relative (unit-box) tolerance for matching points to grid nodes


# ----------------------------------------------------------------------------- validation
def _as_points(points, d: int | None = None, what: str = "points") -> np.ndarray:
    x = np.asarray(points, dtype=float)
    if x.ndim == 1 and d is not None:
        x = x.reshape(-1, d) if d > 1 else x.reshape(-1, 1)
    if x.ndim != 2:
        raise InputError(f"{what} must be a 2-D array (M, d), got shape {x.shape}; reshape it")
    if d is not None and x.shape[1] != d:
        raise InputError(f"{what} have {x.shape[1]} columns but the interpolant has {d} "
                         "scheduling variables; pass one column per variable")
    if not np.all(np.isfinite(x)):
        raise InputError(f"{what} contain NaN or inf; remove or fix those rows")
    return x


def _as_values(values, n: int) -> np.ndarray:
    y = np.asarray(values, dtype=float)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2 or y.shape[0] != n:
        raise InputError(f"values must be an (N, k) array with N = {n} rows like the points, "
                         f"got shape {y.shape}; stack one row per point")
    if not np.all(np.isfinite(y)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(y), axis=1))[0])
        raise InputError(f"values at point {bad} contain NaN or inf; drop failed points before "
                         "fitting")
    return y


def _standardize(y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Column means and scales (standard deviation, or max |y|, or 1 for constant columns)."""
    mean = y.mean(axis=0)
    scale = y.std(axis=0)
    big = np.max(np.abs(y), axis=0)
    scale = np.where(scale > 1e-12 * np.maximum(big, 1e-300), scale, 1.0)
    return mean, scale


class Interpolant:
    """Base class: unit-box scaling and the shared vocabulary.

    Parameters
    ----------
    lower, upper : (d,) physical bounds of the scheduling variables; points are
        mapped to ``(p - lower) / (upper - lower)``. When omitted, the bounds
        of the fitted points are used.
    """

    kind = "base"

    def __init__(self, lower=None, upper=None):
        self.lower = None if lower is None else np.atleast_1d(np.asarray(lower, dtype=float))
        self.upper = None if upper is None else np.atleast_1d(np.asarray(upper, dtype=float))
        self.d_: int | None = None
        self.k_: int | None = None

    # -- scaling -------------------------------------------------------------------
    def _set_bounds(self, x: np.ndarray) -> None:
        d = x.shape[1]
        lo = x.min(axis=0) if self.lower is None else self.lower
        hi = x.max(axis=0) if self.upper is None else self.upper
        if lo.shape != (d,) or hi.shape != (d,):
            raise InputError(f"bounds have {lo.size} entries but the points have {d} columns; "
                             "give one lower and upper bound per scheduling variable")
        width = hi - lo
        if np.any(~(width > 0)):
            j = int(np.flatnonzero(~(width > 0))[0])
            raise InputError(f"scheduling variable {j} has lower {lo[j]:g} >= upper {hi[j]:g}; "
                             "give a range with upper > lower")
        self.lower, self.upper, self.d_ = lo.astype(float), hi.astype(float), d

    def _unit(self, points) -> np.ndarray:
        if self.d_ is None:
            raise InputError(f"the {self.kind} interpolant is not fitted; call fit() first")
        x = _as_points(points, self.d_)
        return (x - self.lower) / (self.upper - self.lower)

    def _check_fit_input(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        x = _as_points(points)
        y = _as_values(values, x.shape[0])
        if x.shape[0] == 0:
            raise InputError("no points to fit; at least one operating point must be 'ok'")
        self._set_bounds(x)
        self.k_ = y.shape[1]
        return (x - self.lower) / (self.upper - self.lower), y

    def _check_index(self, j: int) -> int:
        if not (0 <= int(j) < self.d_):
            raise InputError(f"variable index {j} out of range 0..{self.d_ - 1}; "
                             "pass the position of the scheduling variable")
        return int(j)

    # -- vocabulary ----------------------------------------------------------------
    def fit(self, points, values) -> Interpolant:
        raise NotImplementedError

    def evaluate(self, points) -> np.ndarray:
        raise NotImplementedError

    def derivative(self, points, variable_index: int) -> np.ndarray:
        raise NotImplementedError

    def evaluate_std(self, points) -> np.ndarray:
        """Interpolation uncertainty; only the Gaussian-process kind provides it."""
        raise InputError(f"the {self.kind} interpolant has no uncertainty estimate; use kind "
                         "'gaussian_process' for an interpolation-uncertainty map")

    def refit(self, points, values) -> Interpolant:
        """A new interpolant of this kind fitted with this one's hyperparameters frozen."""
        new = type(self)(self.lower, self.upper)
        return new.fit(points, values)

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions with this interpolant's hyperparameters frozen.

        Row i is the value at ``points[i]`` of :meth:`refit` on all the other points
        (Stone 1974). Kinds that are linear smoothers compute all rows from one
        factorization (see their ``leave_one_out``); this base version refits N times.

        Returns
        -------
        predictions : (N, k) array (rows where ``ok`` is False hold zeros).
        ok : (N,) bool, False where the refit without that point is impossible (too few
            points left, a singular system).
        """
        x, y = self._loo_input(points, values)
        return self.leave_one_out_by_refit(x, y)

    def leave_one_out_by_refit(self, points, values, rows=None
                               ) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions by refitting once per left-out point (the definition;
        the reference for the closed forms). ``rows`` limits the work to those points."""
        x, y = self._loo_input(points, values)
        n = x.shape[0]
        pred = np.zeros((n, y.shape[1]))
        ok = np.zeros(n, dtype=bool)
        for i in (range(n) if rows is None else rows):
            keep = np.arange(n) != i
            try:
                pred[i] = self.refit(x[keep], y[keep]).evaluate(x[i:i + 1])[0]
            except (InputError, NumericalError, np.linalg.LinAlgError):
                continue
            ok[i] = bool(np.all(np.isfinite(pred[i])))
        return pred, ok

    def _loo_input(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        if self.d_ is None:
            raise InputError(f"the {self.kind} interpolant is not fitted; call fit() first")
        x = _as_points(points, self.d_)
        return x, _as_values(values, x.shape[0])

    def _base_arrays(self) -> tuple[dict, dict]:
        arrays = {"lower": self.lower.copy(), "upper": self.upper.copy()}
        attrs = {"kind": self.kind, "format_version": FORMAT_VERSION,
                 "n_variables": int(self.d_), "n_values": int(self.k_)}
        return arrays, attrs

    def _load_base(self, arrays: dict, attrs: dict) -> None:
        if attrs.get("kind") != self.kind:
            raise InputError(f"stored interpolant is of kind {attrs.get('kind')!r}, not "
                             f"{self.kind!r}; load it with from_arrays of the right kind")
        if int(attrs.get("format_version", 0)) > FORMAT_VERSION:
            raise InputError(f"stored interpolant has format version {attrs['format_version']}; "
                             f"this version reads <= {FORMAT_VERSION}, upgrade the package")
        self.lower = np.asarray(arrays["lower"], dtype=float).ravel()
        self.upper = np.asarray(arrays["upper"], dtype=float).ravel()
        self.d_ = int(attrs["n_variables"])
        self.k_ = int(attrs["n_values"])

    def to_arrays(self) -> tuple[dict, dict]:
        raise NotImplementedError

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> Interpolant:
        raise NotImplementedError


# ----------------------------------------------------------------------------- grids
def _grid_axes(x: np.ndarray, breakpoints) -> list[np.ndarray]:
    """Unit-box breakpoints per axis: given ones, or the distinct coordinates of the points."""
    if breakpoints is not None:
        return [np.unique(np.asarray(b, dtype=float)) for b in breakpoints]
    axes = []
    for j in range(x.shape[1]):
        v = np.sort(x[:, j])
        keep = np.concatenate([[True], np.diff(v) > _GRID_TOL])
        axes.append(v[keep])
    return axes


def _locate_nodes(x: np.ndarray, axes: list[np.ndarray]) -> np.ndarray:
    idx = np.empty(x.shape, dtype=int)
    for j, ax in enumerate(axes):
        dist = np.abs(x[:, j:j + 1] - ax[None, :])
        i = np.argmin(dist, axis=1)
        miss = dist[np.arange(x.shape[0]), i] > 1e-7
        if np.any(miss):
            bad = int(np.flatnonzero(miss)[0])
            raise InputError(f"point {bad} does not lie on the grid breakpoints of variable {j}; "
                             "use a scattered kind ('delaunay', 'rbf', 'polynomial', "
                             "'gaussian_process')")
        idx[:, j] = i
    return idx


def _node_estimate(grid: np.ndarray, known: np.ndarray, axes: list[np.ndarray], node: tuple,
                   degree: int):
    """The hole-filling estimate of one grid node from the known nodes of the grid lines
    through it (see :func:`_fill_holes`); None when no line through it has a known node."""
    from scipy.interpolate import make_interp_spline

    interp, extrap = [], []
    for j, ax in enumerate(axes):
        line = list(node)
        line[j] = slice(None)
        line = tuple(line)
        kn = np.flatnonzero(known[line])
        if kn.size == 0:
            continue
        i = node[j]
        vals = grid[line][kn]
        if kn.size == 1:
            est = vals[0]
        else:
            k = min(degree, kn.size - 1)
            est = make_interp_spline(ax[kn], vals, k=k, axis=0)(ax[i])
        (interp if kn[0] < i < kn[-1] else extrap).append(est)
    if interp:
        return np.mean(interp, axis=0)
    if extrap:
        return np.mean(extrap, axis=0)
    return None


def _place_on_grid(x: np.ndarray, y: np.ndarray, axes: list[np.ndarray]):
    """Node index of every point (unit box), the mask of nodes with data and the grid
    of values (zeros at the holes)."""
    idx = _locate_nodes(x, axes)
    shape = tuple(len(a) for a in axes)
    present = np.zeros(shape, dtype=bool)
    grid = np.zeros(shape + (y.shape[1],))
    flat = np.ravel_multi_index(tuple(idx.T), shape)
    if np.unique(flat).size != flat.size:
        raise InputError("two points fall on the same grid node; remove the duplicate "
                         "operating point")
    present[tuple(idx.T)] = True
    grid[tuple(idx.T)] = y
    return idx, present, grid


def _fill_holes(grid: np.ndarray, present: np.ndarray, axes: list[np.ndarray],
                degree: int = 1) -> np.ndarray:
    """Fill grid nodes without data by interpolation along the grid lines through them.

    Each pass estimates every missing node from the known nodes on each grid
    line through it with the kind's own 1-D rule: a spline of degree
    ``min(degree, known - 1)`` through the known nodes of the line
    (scipy.interpolate.make_interp_spline; degree 1 is linear interpolation
    between the nearest known neighbours, linear extrapolation beyond them),
    averaged over the lines whose known nodes bracket the hole, else over the
    lines that extrapolate. Affine data are reproduced exactly. Nodes with no
    known node on any line take the value of the nearest known node
    (unit-box distance).
    """
    grid = grid.copy()
    known = present.copy()
    shape = present.shape
    while not known.all():
        estimates = {}
        for node in zip(*np.nonzero(~known), strict=True):
            est = _node_estimate(grid, known, axes, node, degree)
            if est is not None:
                estimates[node] = est
        if not estimates:  # no known node on any line through a hole: nearest known node
            coords = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(axes))
            kflat = np.flatnonzero(known.ravel())
            for flat in np.flatnonzero(~known.ravel()):
                dist = np.sum((coords[kflat] - coords[flat]) ** 2, axis=1)
                node = np.unravel_index(flat, shape)
                estimates[node] = grid[np.unravel_index(kflat[np.argmin(dist)], shape)]
        for node, value in estimates.items():
            grid[node] = value
            known[node] = True
    return grid


def _row_drop_estimates(grid: np.ndarray, axes: list[np.ndarray], degree: int
                        ) -> np.ndarray:
    """For every node of a grid without holes, the estimate :func:`_fill_holes` makes when
    that node alone is missing, computed by dropping one breakpoint row at a time.

    Dropping breakpoint b of axis j and interpolating along axis j (the kind's 1-D rule
    through the remaining breakpoints, evaluated at the dropped one) gives the line
    estimate of every node of that row at once; the estimates of a node are then averaged
    over the axes that bracket it, else over the axes that extrapolate, as for one hole.
    Cost: one 1-D spline fit per breakpoint, O(nodes x values x sum of breakpoints).
    """
    from scipy.interpolate import make_interp_spline

    shape = grid.shape[:-1]
    s_in, s_ex = np.zeros(grid.shape), np.zeros(grid.shape)
    c_in, c_ex = np.zeros(shape), np.zeros(shape)
    for j, ax in enumerate(axes):
        n = len(ax)
        if n < 2:
            continue
        for b in range(n):
            keep = np.delete(np.arange(n), b)
            if n == 2:
                est = np.take(grid, keep[0], axis=j)
            elif degree == 1:  # the straight line through the nearest remaining pair
                lo, hi = (b - 1, b + 1) if 0 < b < n - 1 else ((1, 2) if b == 0 else
                                                                (n - 3, n - 2))
                t = (ax[b] - ax[lo]) / (ax[hi] - ax[lo])
                est = (1.0 - t) * np.take(grid, lo, axis=j) + t * np.take(grid, hi, axis=j)
            else:
                vals = np.take(grid, keep, axis=j)
                est = make_interp_spline(ax[keep], vals, k=min(degree, n - 2), axis=j)(ax[b])
            row = (slice(None),) * j + (b,)
            if 0 < b < n - 1:
                s_in[row] += est
                c_in[row] += 1
            else:
                s_ex[row] += est
                c_ex[row] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where((c_in > 0)[..., None], s_in / c_in[..., None],
                        s_ex / c_ex[..., None])


def _tensor_evaluate(coef: np.ndarray, spans: list[np.ndarray],
                     weights: list[np.ndarray]) -> np.ndarray:
    """Sum over the local tensor-product stencil: coef[i0+a, i1+b, ...] * w0[a] * w1[b] ...

    ``spans[j]`` (M,) is the first coefficient index along axis j and
    ``weights[j]`` (M, m_j) the m_j local basis values; coef is (n_0, ..., k).
    """
    d = len(spans)
    k = coef.shape[-1]
    flat = coef.reshape(-1, k)
    strides = np.cumprod([1] + [coef.shape[j] for j in range(d - 1, 0, -1)])[::-1]
    base = np.zeros(spans[0].shape[0], dtype=np.intp)
    for j in range(d):
        base += spans[j] * strides[j]
    out = np.zeros((base.shape[0], k))
    for combo in itertools.product(*[range(w.shape[1]) for w in weights]):
        offset = sum(c * s for c, s in zip(combo, strides, strict=True))
        w = weights[0][:, combo[0]].copy()
        for j in range(1, d):
            w *= weights[j][:, combo[j]]
        out += w[:, None] * flat[base + offset]
    return out


def _chunks(m: int, k: int, budget: int = 4_000_000):
    step = max(1, budget // max(k, 1))
    for start in range(0, m, step):
        yield slice(start, min(m, start + step))


def _constant_axis(xj: np.ndarray, deriv: bool):
    """Stencil of an axis with a single breakpoint: the value is constant along it."""
    return np.zeros(xj.shape[0], dtype=np.intp), np.full((xj.shape[0], 1), 0.0 if deriv else 1.0)


class _GridInterpolant(Interpolant):
    """Common part of the rectangular-grid kinds (grid detection, hole filling)."""

    _fill_degree = 1

    def __init__(self, lower=None, upper=None, breakpoints=None):
        super().__init__(lower, upper)
        self.breakpoints = breakpoints

    def refit(self, points, values) -> Interpolant:
        new = type(self)(self.lower, self.upper, breakpoints=self._phys_axes())
        return new.fit(points, values)

    def _phys_axes(self):
        return [self.lower[j] + a * (self.upper[j] - self.lower[j])
                for j, a in enumerate(self.axes_)]

    def _grid_values(self, points, values) -> np.ndarray:
        x, y = self._check_fit_input(points, values)
        bp = None
        if self.breakpoints is not None:
            if len(self.breakpoints) != self.d_:
                raise InputError(f"{len(self.breakpoints)} breakpoint lists for {self.d_} "
                                 "scheduling variables; give one list per variable")
            bp = [(np.asarray(b, float) - self.lower[j]) / (self.upper[j] - self.lower[j])
                  for j, b in enumerate(self.breakpoints)]
        axes = _grid_axes(x, bp)
        n_nodes = int(np.prod([len(a) for a in axes]))
        if n_nodes > max(4 * x.shape[0], 16):
            raise InputError(f"the {x.shape[0]} points do not form a rectangular grid (they span "
                             f"{n_nodes} grid nodes); use a scattered kind ('delaunay', 'rbf', "
                             "'polynomial' or 'gaussian_process')")
        _idx, present, grid = _place_on_grid(x, y, axes)
        self.axes_ = axes
        self.filled_ = ~present
        return _fill_holes(grid, present, axes, self._fill_degree)

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions without refitting.

        With a node left out the refit fills it as a hole (see :func:`_fill_holes`), and
        both grid kinds reproduce node values, so the prediction at the node is its
        hole-filling estimate. For nodes whose grid lines hold no other hole every
        estimate comes from :func:`_row_drop_estimates` (one breakpoint row dropped at a
        time); nodes on a line with a hole get the same estimate node by node; a node
        with no other node on any of its lines is refitted.
        """
        x, y = self._loo_input(points, values)
        u = (x - self.lower) / (self.upper - self.lower)
        idx, present, grid = _place_on_grid(u, y, self.axes_)
        nodes = tuple(idx.T)
        line_full = np.ones(present.shape, dtype=bool)
        for j in range(present.ndim):
            line_full &= np.all(present, axis=j, keepdims=True)
        pred = np.zeros_like(y)
        ok = np.ones(x.shape[0], dtype=bool)
        fast = line_full[nodes]
        if fast.any():
            pred[fast] = _row_drop_estimates(grid, self.axes_, self._fill_degree)[nodes][fast]
        slow = []
        for i in np.flatnonzero(~fast):
            known = present.copy()
            node = tuple(int(v) for v in idx[i])
            known[node] = False
            est = _node_estimate(grid, known, self.axes_, node, self._fill_degree)
            if est is None:
                slow.append(i)
            else:
                pred[i] = est
        if slow:
            p2, ok2 = self.leave_one_out_by_refit(x, y, rows=slow)
            pred[slow], ok[slow] = p2[slow], ok2[slow]
        return pred, ok

    def _grid_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._base_arrays()
        for j, a in enumerate(self.axes_):
            arrays[f"axis{j}"] = a.copy()
        arrays["filled"] = self.filled_.astype(np.int8)
        return arrays, attrs

    def _coefficients(self) -> np.ndarray:
        """The (n_0, ..., n_{d-1}, k) tensor the stencil weights multiply."""
        raise NotImplementedError

    def _axis_stencil(self, j: int, xj: np.ndarray, deriv: bool):
        """First coefficient index (M,) and local basis values (M, m_j) along axis j."""
        raise NotImplementedError

    def _stencil(self, x: np.ndarray, deriv: int | None = None):
        """Per axis: first coefficient index (M,) and local weights (M, m_j); ``deriv`` = d/dx_j."""
        pairs = [self._axis_stencil(j, x[:, j], deriv == j) for j in range(x.shape[1])]
        return [p[0] for p in pairs], [p[1] for p in pairs]

    def evaluate(self, points) -> np.ndarray:
        x = self._unit(points)
        coef = self._coefficients()
        out = np.empty((x.shape[0], self.k_))
        for sl in _chunks(x.shape[0], self.k_):
            spans, weights = self._stencil(x[sl])
            out[sl] = _tensor_evaluate(coef, spans, weights)
        return out

    def derivative(self, points, variable_index: int) -> np.ndarray:
        """Derivative per physical unit; at a breakpoint the right-hand cell's slope is used."""
        j = self._check_index(variable_index)
        x = self._unit(points)
        spans, weights = self._stencil(x, deriv=j)
        return (_tensor_evaluate(self._coefficients(), spans, weights)
                / (self.upper[j] - self.lower[j]))

    def _load_grid(self, arrays, attrs) -> None:
        self._load_base(arrays, attrs)
        self.axes_ = [np.asarray(arrays[f"axis{j}"], dtype=float) for j in range(self.d_)]
        self.filled_ = np.asarray(arrays["filled"]).astype(bool)


class MultilinearGrid(_GridInterpolant):
    """Tensor-product piecewise-linear interpolation on a rectangular grid.

    On the cell ``[a_i, a_{i+1}] x ...`` the value is the multilinear blend
    ``sum_v prod_j w_j(v) f(v)`` of the 2^d corner values with
    ``w_j = (x_j - a_i) / (a_{i+1} - a_i)`` or its complement. It reproduces
    data that are multilinear (in particular affine) exactly. Outside the grid
    the boundary cell is extended linearly.
    """

    kind = "multilinear"

    def fit(self, points, values) -> MultilinearGrid:
        self.grid_ = self._grid_values(points, values)
        return self

    def _coefficients(self) -> np.ndarray:
        return self.grid_

    def _axis_stencil(self, j: int, xj: np.ndarray, deriv: bool):
        ax = self.axes_[j]
        if len(ax) == 1:
            return _constant_axis(xj, deriv)
        i = np.clip(np.searchsorted(ax, xj, side="right") - 1, 0, len(ax) - 2)
        h = ax[i + 1] - ax[i]
        if deriv:
            return i, np.stack([-1.0 / h, 1.0 / h], axis=1)
        t = (xj - ax[i]) / h
        return i, np.stack([1.0 - t, t], axis=1)

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._grid_arrays()
        arrays["grid"] = self.grid_.copy()
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> MultilinearGrid:
        self = cls()
        self._load_grid(arrays, attrs)
        self.grid_ = np.asarray(arrays["grid"], dtype=float)
        return self


# ----------------------------------------------------------------------------- B-splines
def _bspline_basis(t: np.ndarray, k: int, x: np.ndarray, deriv: bool = False):
    """Span index and the k+1 nonzero B-spline basis values (or first derivatives).

    Cox-de Boor recursion in the triangular form of de Boor (1978), ch. X;
    the derivative uses dB_{r,k} = k B_{r,k-1}/(t_{r+k}-t_r) - k B_{r+1,k-1}/(t_{r+k+1}-t_{r+1}).
    Points outside the knot span use the first/last polynomial piece.
    """
    n = len(t) - k - 1
    i = np.clip(np.searchsorted(t, x, side="right") - 1, k, n - 1)
    m = x.shape[0]
    top = k - 1 if deriv else k
    N = np.zeros((m, k + 1))
    N[:, 0] = 1.0
    left = np.zeros((m, k + 1))
    right = np.zeros((m, k + 1))
    for j in range(1, top + 1):
        left[:, j] = x - t[i + 1 - j]
        right[:, j] = t[i + j] - x
        saved = np.zeros(m)
        for r in range(j):
            temp = N[:, r] / (right[:, r + 1] + left[:, j - r])
            N[:, r] = saved + right[:, r + 1] * temp
            saved = left[:, j - r] * temp
        N[:, j] = saved
    if not deriv:
        return i - k, N
    # N[:, :k] hold B_{i-k+1..i, k-1}
    D = np.zeros((m, k + 1))
    for jj in range(k + 1):
        r = i - k + jj
        if jj >= 1:
            D[:, jj] += k * N[:, jj - 1] / (t[r + k] - t[r])
        if jj <= k - 1:
            D[:, jj] -= k * N[:, jj] / (t[r + k + 1] - t[r + 1])
    return i - k, D


class CubicSplineGrid(_GridInterpolant):
    """Tensor-product cubic spline interpolation (not-a-knot ends) on a rectangular grid.

    The coefficients come from scipy.interpolate.make_interp_spline applied
    axis by axis (tensor-product interpolation is separable, de Boor 1978,
    ch. XVII); evaluation and derivatives use our own B-spline basis. Axes
    with fewer than 4 breakpoints use degree ``len(axis) - 1``.
    """

    kind = "spline"
    _fill_degree = 3

    def fit(self, points, values) -> CubicSplineGrid:
        from scipy.interpolate import make_interp_spline

        coef = self._grid_values(points, values)
        self.knots_, self.degrees_ = [], []
        for j, ax in enumerate(self.axes_):
            k = min(3, len(ax) - 1)
            if k == 0:
                self.knots_.append(np.array([ax[0] - 1.0, ax[0] + 1.0]))
                self.degrees_.append(0)
                continue
            spl = make_interp_spline(ax, coef, k=k, axis=j)
            coef = np.moveaxis(np.asarray(spl.c), 0, j)  # scipy puts the axis first
            self.knots_.append(np.asarray(spl.t, dtype=float))
            self.degrees_.append(k)
        self.coef_ = coef
        return self

    def _coefficients(self) -> np.ndarray:
        return self.coef_

    def _axis_stencil(self, j: int, xj: np.ndarray, deriv: bool):
        k = self.degrees_[j]
        if k == 0:
            return _constant_axis(xj, deriv)
        return _bspline_basis(self.knots_[j], k, xj, deriv=deriv)

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._grid_arrays()
        arrays["coef"] = self.coef_.copy()
        for j, t in enumerate(self.knots_):
            arrays[f"knots{j}"] = t.copy()
        arrays["degrees"] = np.asarray(self.degrees_, dtype=np.int64)
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> CubicSplineGrid:
        self = cls()
        self._load_grid(arrays, attrs)
        self.coef_ = np.asarray(arrays["coef"], dtype=float)
        self.knots_ = [np.asarray(arrays[f"knots{j}"], dtype=float) for j in range(self.d_)]
        self.degrees_ = [int(v) for v in np.asarray(arrays["degrees"]).ravel()]
        return self


# ----------------------------------------------------------------------------- Delaunay
def _triangulate(x: np.ndarray) -> np.ndarray:
    """Simplices (S, d+1) of the Delaunay triangulation of unit-box points (n, d).

    In one dimension the sorted intervals. Qhull's triangulated output may hold flat
    simplices (co-circular grid points); they contain no point strictly and are dropped.
    """
    n, d = x.shape
    if n < d + 1:
        raise InputError(f"Delaunay interpolation in {d} variables needs at least {d + 1} "
                         f"points, got {n}; add points or use kind 'polynomial'")
    if d == 1:
        order = np.argsort(x[:, 0])
        if np.any(np.diff(x[order, 0]) <= _GRID_TOL):
            raise InputError("two points share the same scheduling value; remove the "
                             "duplicate operating point")
        return np.stack([order[:-1], order[1:]], axis=1)
    from scipy.spatial import Delaunay, QhullError

    try:
        tri = Delaunay(x)
    except QhullError as exc:
        raise InputError(f"Delaunay triangulation failed ({str(exc).splitlines()[0]}); "
                         "the points may be collinear/coplanar, use kind "
                         "'polynomial' or 'rbf'") from None
    simplices = tri.simplices.astype(np.int64)
    edges = np.transpose(x[simplices[:, :-1]] - x[simplices[:, -1:]], (0, 2, 1))
    vol = np.abs(np.linalg.det(edges))
    return simplices[vol > 1e-12 * max(vol.max(), 1e-300)]


def _barycentric_all(x: np.ndarray, simplices: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Barycentric coordinates (S, d+1) of the point p in every simplex (same convention as
    :meth:`DelaunayLinear._barycentric`: the last vertex is the origin)."""
    r = x[simplices[:, -1]]
    M = np.transpose(x[simplices[:, :-1]] - r[:, None, :], (0, 2, 1))
    b = np.einsum("mij,mj->mi", np.linalg.inv(M), p[None, :] - r)
    return np.concatenate([b, 1.0 - b.sum(axis=1, keepdims=True)], axis=1)


def _local_prediction(x: np.ndarray, local: np.ndarray, i: int):
    """(vertices, weights) of the point x[i] in the triangulation of x[local], by the rule
    of :meth:`DelaunayLinear._locate` (the first simplex holding it, else the simplex whose
    smallest barycentric coordinate is largest), and whether a simplex holds it."""
    simplices = _triangulate(x[local])
    b = _barycentric_all(x[local], simplices, x[i])
    low = b.min(axis=1)
    inside = np.flatnonzero(low >= -1e-10)
    s = int(inside[0]) if inside.size else int(np.argmax(low))
    return local[simplices[s]], b[s], bool(inside.size)


_DELAUNAY_LOO: dict = {}  # the last point set's leave-one-out weights


def _delaunay_loo_weights(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per point of x (n, d): the d+1 points and weights that predict it by linear
    interpolation on the Delaunay triangulation of the other points (see
    :meth:`DelaunayLinear.leave_one_out`), and whether that is possible."""
    n, d = x.shape
    idx = np.zeros((n, d + 1), dtype=np.intp)
    w = np.zeros((n, d + 1))
    ok = np.zeros(n, dtype=bool)
    if n < d + 2:
        return idx, w, ok
    simplices = _triangulate(x)
    flat = simplices.ravel()
    order = np.argsort(flat, kind="stable")
    starts = np.searchsorted(flat[order], np.arange(n + 1))
    owner = order // (d + 1)  # simplex of each incidence, grouped by vertex

    def ring(vertices: np.ndarray) -> np.ndarray:
        rows = np.concatenate([owner[starts[v]:starts[v + 1]] for v in vertices])
        return np.unique(simplices[rows])

    for i in range(n):
        link = ring(np.array([i]))
        link = link[link != i]
        try:
            if link.size >= d + 1:
                verts, bary, inside = _local_prediction(x, link, i)
            else:
                inside = False
            if not inside:
                wide = ring(link)
                verts, bary, _ = _local_prediction(x, wide[wide != i], i)
        except (InputError, np.linalg.LinAlgError):
            continue
        idx[i], w[i], ok[i] = verts, bary, True
    return idx, w, ok


class DelaunayLinear(Interpolant):
    """Piecewise-linear interpolation on a Delaunay triangulation of scattered points.

    Inside a simplex with vertices v_0..v_d the value is ``sum_i b_i f(v_i)``
    with barycentric coordinates b (b >= 0, sum b = 1); affine data are
    reproduced exactly. Outside the convex hull the affine function of the
    simplex whose smallest barycentric coordinate is largest is extended
    (documented choice: finite values everywhere, flagged by ``outside_hull``).
    In one dimension the "triangulation" is the sorted sequence of intervals.
    """

    kind = "delaunay"

    def fit(self, points, values) -> DelaunayLinear:
        x, y = self._check_fit_input(points, values)
        simplices = _triangulate(x)
        self.x_, self.values_, self.simplices_ = x, y, simplices
        self._prepare()
        return self

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions by re-triangulating only around each left-out point.

        Deleting a vertex from a Delaunay triangulation changes only the simplices
        around it: the hole is filled by the Delaunay simplices of its neighbours
        (Devillers 2002). A point inside the hull of the others is therefore
        predicted from the triangulation of its neighbours; a point outside it
        (extrapolated by the nearest-simplex rule of :meth:`evaluate`) from the
        triangulation of its neighbours and theirs. The weights depend on the points
        only and are shared by every value set on the same points. For points in
        general position this is the refit without the point; where the points are
        degenerate (co-circular grid cells) Qhull may split a cell either way in
        either computation, so the two can differ there.

        References
        ----------
        Devillers, O. (2002). On deletion in Delaunay triangulations. Int. J. Comput.
        Geom. Appl. 12(3), 193-205. doi:10.1142/S0218195902000827
        """
        x, y = self._loo_input(points, values)
        u = (x - self.lower) / (self.upper - self.lower)
        key = (u.shape, hashlib.sha256(np.ascontiguousarray(u).tobytes()).hexdigest())
        if key not in _DELAUNAY_LOO:  # the weights serve every value set on these points
            _DELAUNAY_LOO.clear()
            _DELAUNAY_LOO[key] = _delaunay_loo_weights(u)
        idx, w, ok = _DELAUNAY_LOO[key]
        pred = np.einsum("nv,nvk->nk", w, y[idx])
        pred[~ok] = 0.0
        return pred, ok

    def _prepare(self) -> None:
        x, s = self.x_, self.simplices_
        # barycentric: b[:d] = T (p - r), r = last vertex
        r = x[s[:, -1]]
        M = np.transpose(x[s[:, :-1]] - r[:, None, :], (0, 2, 1))  # (S, d, d)
        cond = np.linalg.cond(M)
        if np.any(~np.isfinite(cond)) or np.any(cond > 1e12):
            raise NumericalError(f"Delaunay simplex {int(np.argmax(cond))} is degenerate "
                                 f"(condition {np.max(cond):.1e}); remove nearly coincident "
                                 "points")
        self._T = np.linalg.inv(M)
        self._r = r
        self._cand = None

    def _barycentric(self, x: np.ndarray, s: np.ndarray) -> np.ndarray:
        b = np.einsum("mij,mj->mi", self._T[s], x - self._r[s])
        return np.concatenate([b, 1.0 - b.sum(axis=1, keepdims=True)], axis=1)

    def _buckets(self):
        """Uniform cell grid over the points' bounding box; per cell the candidate simplices.

        Each simplex is listed in every cell its bounding box touches, so a point
        inside the hull finds its simplex among the candidates of its cell.
        """
        if getattr(self, "_cand", None) is not None:
            return self._cand
        x, s = self.x_, self.simplices_
        d = x.shape[1]
        nb = max(1, int(np.ceil(len(s) ** (1.0 / d))))
        lo, hi = x.min(axis=0), x.max(axis=0)
        width = np.where(hi > lo, (hi - lo) / nb, 1.0)
        verts = x[s]  # (S, d+1, d)
        c_lo = np.clip(np.floor((verts.min(axis=1) - lo) / width - 1e-9), 0, nb - 1).astype(int)
        c_hi = np.clip(np.floor((verts.max(axis=1) - lo) / width + 1e-9), 0, nb - 1).astype(int)
        lists: list[list[int]] = [[] for _ in range(nb ** d)]
        strides = nb ** np.arange(d - 1, -1, -1)
        for si in range(len(s)):
            ranges = [range(c_lo[si, j], c_hi[si, j] + 1) for j in range(d)]
            for cell in itertools.product(*ranges):
                lists[int(np.dot(cell, strides))].append(si)
        width_c = max(len(v) for v in lists)
        cand = np.full((nb ** d, max(width_c, 1)), -1, dtype=np.intp)
        for ci, v in enumerate(lists):
            cand[ci, :len(v)] = v
        self._cand = (cand, lo, width, nb, strides)
        return self._cand

    def _locate(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Simplex index per point and an outside-hull flag."""
        m, d = x.shape
        if d == 1:
            xs = self.x_[self.simplices_[:, 0], 0]
            simplex = np.clip(np.searchsorted(xs, x[:, 0], side="right") - 1, 0,
                              len(xs) - 1)
            lo = self.x_[self.simplices_[0, 0], 0]
            hi = self.x_[self.simplices_[-1, 1], 0]
            outside = (x[:, 0] < lo - 1e-12) | (x[:, 0] > hi + 1e-12)
            return simplex, outside
        cand, lo, width, nb, strides = self._buckets()
        cells = np.clip(np.floor((x - lo) / width), 0, nb - 1).astype(np.intp) @ strides
        c = cand[cells]  # (m, C)
        simplex = np.full(m, -1, dtype=np.intp)
        for col in range(c.shape[1]):
            todo = (simplex < 0) & (c[:, col] >= 0)
            if not todo.any():
                continue
            sc = c[todo, col]
            inside = self._barycentric(x[todo], sc).min(axis=1) >= -1e-10
            simplex[np.flatnonzero(todo)[inside]] = sc[inside]
        outside = simplex < 0
        if outside.any():  # nearest simplex: largest smallest barycentric coordinate
            xo = x[outside]
            best = np.full(xo.shape[0], -np.inf)
            pick = np.zeros(xo.shape[0], dtype=np.intp)
            for si in range(len(self.simplices_)):
                mn = self._barycentric(xo, np.full(xo.shape[0], si)).min(axis=1)
                upd = mn > best
                best = np.where(upd, mn, best)
                pick = np.where(upd, si, pick)
            simplex[outside] = pick
        return simplex, outside

    def outside_hull(self, points) -> np.ndarray:
        """Boolean mask of points outside the convex hull (values there are extrapolated)."""
        return self._locate(self._unit(points))[1]

    def evaluate(self, points) -> np.ndarray:
        x = self._unit(points)
        out = np.empty((x.shape[0], self.k_))
        for sl in _chunks(x.shape[0], self.k_ * (self.d_ + 1)):
            s, _ = self._locate(x[sl])
            b = self._barycentric(x[sl], s)
            verts = self.simplices_[s]  # (m, d+1)
            out[sl] = np.einsum("mi,mik->mk", b, self.values_[verts])
        return out

    def derivative(self, points, variable_index: int) -> np.ndarray:
        """Gradient of the simplex's affine piece (constant per simplex) per physical unit."""
        j = self._check_index(variable_index)
        x = self._unit(points)
        s, _ = self._locate(x)
        db = self._T[s][:, :, j]  # (m, d)
        db = np.concatenate([db, -db.sum(axis=1, keepdims=True)], axis=1)
        verts = self.simplices_[s]
        return np.einsum("mi,mik->mk", db, self.values_[verts]) / (self.upper[j] - self.lower[j])

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._base_arrays()
        arrays.update(points=self.x_.copy(), values=self.values_.copy(),
                      simplices=self.simplices_.copy())
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> DelaunayLinear:
        self = cls()
        self._load_base(arrays, attrs)
        self.x_ = np.asarray(arrays["points"], dtype=float)
        self.values_ = np.asarray(arrays["values"], dtype=float)
        self.simplices_ = np.asarray(arrays["simplices"]).astype(np.int64)
        self._prepare()
        return self


# ----------------------------------------------------------------------------- polynomial
def _monomials(x: np.ndarray, exps: np.ndarray, deriv: int | None = None) -> np.ndarray:
    """Design matrix prod_j x_j^e_j (M, T); with ``deriv`` = j its d/dx_j."""
    out = np.ones((x.shape[0], exps.shape[0]))
    for j in range(x.shape[1]):
        e = exps[:, j]
        if deriv == j:
            out *= e * np.power(x[:, j:j + 1], np.maximum(e - 1, 0))
        else:
            out *= np.power(x[:, j:j + 1], e)
    return out


def _kfold_scores(x: np.ndarray, z: np.ndarray, d: int, degrees: list[int], folds: int
                  ) -> np.ndarray:
    """K-fold cross-validated mean squared error of least squares of each degree.

    The folds are those of scikit-learn's ``KFold(folds, shuffle=True, random_state=0)``
    (a seeded permutation cut into near-equal consecutive parts); each degree's design
    matrix is the first columns of the largest one (monomials ordered by degree).
    """
    n = x.shape[0]
    parts = np.array_split(np.random.RandomState(0).permutation(n), folds)
    phi_all = _monomials(x, _poly_exponents(d, max(degrees)))
    scores = []
    for q in degrees:
        phi = phi_all[:, :_poly_exponents(d, q).shape[0]]
        errs = []
        for test in parts:
            train = np.setdiff1d(np.arange(n), test, assume_unique=True)
            coef = linalg.lstsq(phi[train], z[train])[0]
            errs.append(np.mean((phi[test] @ coef - z[test]) ** 2))
        scores.append(np.mean(errs))
    return np.asarray(scores)


class PolynomialLeastSquares(Interpolant):
    """Least-squares polynomial in the unit-box coordinates, degree by cross-validation.

    Fits ``f(x) ~ sum_t c_t prod_j x_j^{e_tj}`` over all monomials of total
    degree <= q. When ``degree`` is None, q is chosen among 1..max_degree
    (terms fewer than the points) by K-fold cross-validated mean squared error
    of the standardized values (:func:`_kfold_scores`; Hastie, Tibshirani and
    Friedman 2009, sec. 7.10). Stored: exponents (T, d) and
    coefficients (T, k).
    """

    kind = "polynomial"

    def __init__(self, lower=None, upper=None, degree: int | None = None, max_degree: int = 5,
                 folds: int = 5):
        super().__init__(lower, upper)
        self.degree = degree
        self.max_degree = max_degree
        self.folds = folds

    def refit(self, points, values) -> PolynomialLeastSquares:
        return PolynomialLeastSquares(self.lower, self.upper, degree=self.degree_).fit(
            points, values)

    def fit(self, points, values) -> PolynomialLeastSquares:
        from math import comb

        x, y = self._check_fit_input(points, values)
        n, d = x.shape
        mean, scale = _standardize(y)
        z = (y - mean) / scale
        if self.degree is not None:
            q = int(self.degree)
            if comb(q + d, d) > n:
                raise InputError(f"polynomial degree {q} in {d} variables has {comb(q + d, d)} "
                                 f"terms but only {n} points; lower the degree")
        else:
            folds = min(self.folds, n)
            candidates = [q for q in range(0, self.max_degree + 1)
                          if comb(q + d, d) <= n - int(np.ceil(n / folds))]
            if not candidates or folds < 2:
                q = 0
            else:
                scores = _kfold_scores(x, z, d, candidates, folds)
                # smallest degree within 1 % of the best score (parsimony); scores are in
                # standardized units, so 1e-12 counts as an exact fit
                q = candidates[int(np.flatnonzero(scores <= scores.min() * 1.01 + 1e-12)[0])]
        exps = _poly_exponents(d, q)
        phi = _monomials(x, exps)
        coef, *_ = np.linalg.lstsq(phi, z, rcond=None)
        self.degree_, self.exponents_ = q, exps
        self.coef_ = coef * scale
        self.coef_[np.all(exps == 0, axis=1)] += mean
        return self

    def evaluate(self, points) -> np.ndarray:
        x = self._unit(points)
        out = np.empty((x.shape[0], self.k_))
        for sl in _chunks(x.shape[0], max(self.k_, len(self.exponents_))):
            out[sl] = _monomials(x[sl], self.exponents_) @ self.coef_
        return out

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions of the least-squares fit of degree ``degree_``.

        The hat-matrix identity (e.g. Hastie, Tibshirani and Friedman 2009, sec. 7.10.1):
        with Q an orthonormal basis of the design matrix's columns and leverages
        ``h_i = |Q_i|^2``, the refit without point i predicts
        ``y_i - (y_i - yhat_i) / (1 - h_i)``. The fit includes the constant monomial,
        so standardizing the values changes nothing. Points of leverage ~1 (the rest
        cannot determine the fit) are refitted.
        """
        from math import comb

        x, y = self._loo_input(points, values)
        n = x.shape[0]
        if comb(self.degree_ + self.d_, self.d_) > n - 1:
            return np.zeros_like(y), np.zeros(n, dtype=bool)
        phi = _monomials((x - self.lower) / (self.upper - self.lower), self.exponents_)
        # orthonormal basis of the column space, with the rank cut-off of lstsq (rcond
        # None): a rank-deficient basis (more monomials than distinct values on an axis)
        # still fixes the fitted values, and the identity holds where h_i < 1
        U, sv, _ = np.linalg.svd(phi, full_matrices=False)
        rank = int(np.sum(sv > sv[0] * np.finfo(float).eps * max(phi.shape))) if sv.size else 0
        Q = U[:, :rank]
        h = np.sum(Q * Q, axis=1)
        resid = y - Q @ (Q.T @ y)
        ok = (1.0 - h) > 1e-8
        pred = np.zeros_like(y)
        pred[ok] = y[ok] - resid[ok] / (1.0 - h[ok])[:, None]
        if not ok.all():
            rows = np.flatnonzero(~ok)
            p2, ok2 = self.leave_one_out_by_refit(x, y, rows=rows)
            pred[rows], ok[rows] = p2[rows], ok2[rows]
        return pred, ok

    def derivative(self, points, variable_index: int) -> np.ndarray:
        j = self._check_index(variable_index)
        x = self._unit(points)
        return _monomials(x, self.exponents_, deriv=j) @ self.coef_ / (self.upper[j]
                                                                        - self.lower[j])

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._base_arrays()
        arrays.update(exponents=self.exponents_.copy(), coef=self.coef_.copy())
        attrs["degree"] = int(self.degree_)
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> PolynomialLeastSquares:
        self = cls()
        self._load_base(arrays, attrs)
        self.exponents_ = np.asarray(arrays["exponents"]).astype(np.int64)
        self.coef_ = np.asarray(arrays["coef"], dtype=float)
        self.degree_ = int(attrs["degree"])
        return self


# ----------------------------------------------------------------------------- RBF
_RBF_MIN_DEGREE = {"linear": 0, "thin_plate_spline": 1, "cubic": 1, "quintic": 2,
                   "multiquadric": 0, "inverse_multiquadric": -1, "inverse_quadratic": -1,
                   "gaussian": -1}


def _rbf_kernel(name: str, r: np.ndarray) -> np.ndarray:
    """Kernel values on scaled distances r (same definitions as scipy's RBFInterpolator)."""
    if name == "linear":
        return -r
    if name == "thin_plate_spline":
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(r > 0, r * r * np.log(np.where(r > 0, r, 1.0)), 0.0)
    if name == "cubic":
        return r ** 3
    if name == "quintic":
        return -r ** 5
    if name == "multiquadric":
        return -np.sqrt(1.0 + r * r)
    if name == "inverse_multiquadric":
        return 1.0 / np.sqrt(1.0 + r * r)
    if name == "inverse_quadratic":
        return 1.0 / (1.0 + r * r)
    return np.exp(-r * r)  # gaussian


def _rbf_kernel_slope(name: str, r: np.ndarray) -> np.ndarray:
    """phi'(r) / r, so that grad phi(|x - c|) = (phi'(r) / r) (x - c) (finite at r = 0)."""
    if name == "linear":
        with np.errstate(divide="ignore"):
            return np.where(r > 0, -1.0 / np.where(r > 0, r, 1.0), 0.0)
    if name == "thin_plate_spline":
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(r > 0, 2.0 * np.log(np.where(r > 0, r, 1.0)) + 1.0, 0.0)
    if name == "cubic":
        return 3.0 * r
    if name == "quintic":
        return -5.0 * r ** 3
    if name == "multiquadric":
        return -1.0 / np.sqrt(1.0 + r * r)
    if name == "inverse_multiquadric":
        return -(1.0 + r * r) ** -1.5
    if name == "inverse_quadratic":
        return -2.0 / (1.0 + r * r) ** 2
    return -2.0 * np.exp(-r * r)


def _poly_exponents(d: int, degree: int) -> np.ndarray:
    if degree < 0:
        return np.zeros((0, d), dtype=np.int64)
    exps = [e for q in range(degree + 1)
            for e in itertools.product(range(q + 1), repeat=d) if sum(e) == q]
    return np.asarray(exps, dtype=np.int64).reshape(-1, d)


class RadialBasis(Interpolant):
    """Radial-basis-function interpolation with a polynomial tail and smoothing.

    Solves the saddle-point system (the one scipy.interpolate.RBFInterpolator
    solves; Wendland 2005, ch. 8; Fasshauer 2007, ch. 6)::

        [ Phi + s I   P ] [c]   [f]
        [ P'          0 ] [b] = [0],   Phi_ij = phi(eps |x_i - x_j|),

    with P the monomials of degree <= ``degree`` in the unit-box coordinates.
    With ``smoothing`` None, s is chosen from a small ladder by the mean of
    Rippa's (1999) leave-one-out errors e_i = c_i / (A^-1)_ii of the
    standardized values.
    """

    kind = "rbf"
    _LADDER = (0.0, 1e-8, 1e-6, 1e-4, 1e-3, 1e-2, 1e-1)

    def __init__(self, lower=None, upper=None, kernel: str = "thin_plate_spline",
                 epsilon: float = 1.0, degree: int | None = None,
                 smoothing: float | None = None):
        super().__init__(lower, upper)
        if kernel not in _RBF_MIN_DEGREE:
            raise InputError(f"unknown RBF kernel {kernel!r}; choose one of "
                             f"{', '.join(sorted(_RBF_MIN_DEGREE))}")
        self.kernel = kernel
        self.epsilon = float(epsilon)
        self.degree = max(1, _RBF_MIN_DEGREE[kernel]) if degree is None else int(degree)
        if self.degree < _RBF_MIN_DEGREE[kernel]:
            raise InputError(f"RBF kernel {kernel!r} needs a polynomial degree >= "
                             f"{_RBF_MIN_DEGREE[kernel]}, got {self.degree}; raise the degree")
        self.smoothing = smoothing

    def refit(self, points, values) -> RadialBasis:
        return RadialBasis(self.lower, self.upper, self.kernel, self.epsilon, self.degree,
                           self.smoothing_).fit(points, values)

    def _system(self, x: np.ndarray, s: float) -> np.ndarray:
        n = x.shape[0]
        r = np.sqrt(np.sum((x[:, None, :] - x[None, :, :]) ** 2, axis=-1)) * self.epsilon
        phi = _rbf_kernel(self.kernel, r) + s * np.eye(n)
        P = _monomials(x, self.exponents_)
        t = P.shape[1]
        return np.block([[phi, P], [P.T, np.zeros((t, t))]])

    def fit(self, points, values) -> RadialBasis:
        x, y = self._check_fit_input(points, values)
        n, d = x.shape
        self.exponents_ = _poly_exponents(d, self.degree)
        t = self.exponents_.shape[0]
        if n < t:
            raise InputError(f"RBF with a degree-{self.degree} polynomial tail needs at least "
                             f"{t} points, got {n}; lower the degree or add points")
        mean, scale = _standardize(y)
        rhs = np.vstack([y, np.zeros((t, y.shape[1]))])
        if self.smoothing is None:
            z = np.vstack([(y - mean) / scale, np.zeros((t, y.shape[1]))])
            best = (np.inf, None)
            for s in self._LADDER:
                A = self._system(x, s)
                try:
                    Ainv = linalg.inv(A)
                except linalg.LinAlgError:
                    continue
                c = Ainv @ z
                err = c[:n] / np.diag(Ainv)[:n, None]
                score = float(np.mean(err ** 2))
                if np.isfinite(score) and score < best[0] * (1 - 1e-6):
                    best = (score, s)
            if best[1] is None:
                raise NumericalError("RBF system is singular for every smoothing value; "
                                     "remove duplicate points or change the kernel")
            s = best[1]
        else:
            s = float(self.smoothing)
        A = self._system(x, s)
        sol, rcond = self._solve(A, rhs)
        self.smoothing_ = s
        self.centres_ = x
        self.coef_ = sol[:n]
        self.poly_coef_ = sol[n:]
        return self

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions at the fitted smoothing, from one inverse.

        Rippa (1999): for the symmetric system ``A [c; b] = [f; 0]`` the refit without
        point i misses f_i by ``c_i / (A^-1)_ii`` (the polynomial tail and the
        smoothing included: the reduced system is A without row and column i).
        Points where ``(A^-1)_ii`` vanishes (the reduced system is singular) are
        refitted.
        """
        x, y = self._loo_input(points, values)
        u = (x - self.lower) / (self.upper - self.lower)
        n, t = x.shape[0], self.exponents_.shape[0]
        if n - 1 < t:
            return np.zeros_like(y), np.zeros(n, dtype=bool)
        try:
            Ainv = linalg.inv(self._system(u, self.smoothing_))
        except (linalg.LinAlgError, ValueError):
            return self.leave_one_out_by_refit(x, y)
        g = np.diag(Ainv)[:n]
        c = Ainv[:n, :n] @ y
        ok = np.abs(g) > 1e-12 * np.max(np.abs(Ainv))
        pred = np.zeros_like(y)
        pred[ok] = y[ok] - c[ok] / g[ok, None]
        if not ok.all():
            rows = np.flatnonzero(~ok)
            p2, ok2 = self.leave_one_out_by_refit(x, y, rows=rows)
            pred[rows], ok[rows] = p2[rows], ok2[rows]
        return pred, ok

    @staticmethod
    def _solve(A: np.ndarray, rhs: np.ndarray):
        try:
            lu = linalg.lu_factor(A, check_finite=True)
        except (linalg.LinAlgError, ValueError):
            raise NumericalError("RBF system could not be factored; remove duplicate points "
                                 "or add smoothing") from None
        rcond = 1.0 / max(np.linalg.cond(A), 1e-300)
        if rcond < 1e-15:
            raise NumericalError(f"RBF system is singular (reciprocal condition {rcond:.1e}); "
                                 "remove duplicate points or add smoothing")
        return linalg.lu_solve(lu, rhs), rcond

    def evaluate(self, points) -> np.ndarray:
        x = self._unit(points)
        out = np.empty((x.shape[0], self.k_))
        n = self.centres_.shape[0]
        for sl in _chunks(x.shape[0], max(n, self.k_) * self.d_):
            xs = x[sl]
            r = np.sqrt(np.sum((xs[:, None, :] - self.centres_[None]) ** 2, axis=-1))
            out[sl] = (_rbf_kernel(self.kernel, r * self.epsilon) @ self.coef_
                       + _monomials(xs, self.exponents_) @ self.poly_coef_)
        return out

    def derivative(self, points, variable_index: int) -> np.ndarray:
        j = self._check_index(variable_index)
        x = self._unit(points)
        diff = x[:, None, :] - self.centres_[None]
        r = np.sqrt(np.sum(diff ** 2, axis=-1)) * self.epsilon
        g = _rbf_kernel_slope(self.kernel, r) * self.epsilon ** 2 * diff[:, :, j]
        out = g @ self.coef_ + _monomials(x, self.exponents_, deriv=j) @ self.poly_coef_
        return out / (self.upper[j] - self.lower[j])

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._base_arrays()
        arrays.update(centres=self.centres_.copy(), coef=self.coef_.copy(),
                      poly_coef=self.poly_coef_.copy(), exponents=self.exponents_.copy())
        attrs.update(kernel=self.kernel, epsilon=float(self.epsilon), degree=int(self.degree),
                     smoothing=float(self.smoothing_))
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> RadialBasis:
        self = cls(kernel=str(attrs["kernel"]), epsilon=float(attrs["epsilon"]),
                   degree=int(attrs["degree"]), smoothing=float(attrs["smoothing"]))
        self._load_base(arrays, attrs)
        self.smoothing_ = float(attrs["smoothing"])
        self.centres_ = np.asarray(arrays["centres"], dtype=float)
        self.coef_ = np.asarray(arrays["coef"], dtype=float)
        self.poly_coef_ = np.asarray(arrays["poly_coef"], dtype=float)
        self.exponents_ = np.asarray(arrays["exponents"]).astype(np.int64)
        return self


# ----------------------------------------------------------------------------- GP
def _gp_kernel(name: str, x: np.ndarray, z: np.ndarray, scale: np.ndarray,
               amplitude: float) -> np.ndarray:
    """Anisotropic stationary kernel k(x, z): squared exponential or Matern 5/2."""
    diff = (x[:, None, :] - z[None, :, :]) / scale
    r2 = np.sum(diff ** 2, axis=-1)
    if name == "rbf":
        return amplitude * np.exp(-0.5 * r2)
    r = np.sqrt(5.0 * r2)
    return amplitude * (1.0 + r + r * r / 3.0) * np.exp(-r)


def _gp_kernel_grad(name: str, x: np.ndarray, z: np.ndarray, scale: np.ndarray,
                    amplitude: float, j: int) -> np.ndarray:
    """d k(x, z) / d x_j."""
    diff = (x[:, None, :] - z[None, :, :]) / scale
    r2 = np.sum(diff ** 2, axis=-1)
    dj = diff[:, :, j] / scale[j]
    if name == "rbf":
        return -amplitude * np.exp(-0.5 * r2) * dj
    r = np.sqrt(5.0 * r2)
    return -amplitude * (5.0 / 3.0) * (1.0 + r) * np.exp(-r) * dj


class GaussianProcess(Interpolant):
    """Gaussian-process regression with numpy-only prediction of mean and std.

    Model (Rasmussen and Williams 2006, ch. 2): standardized values
    z = (y - mean) / scale ~ GP(0, k) + white noise s^2, with
    ``k(x, x') = a * rho(r)``, ``r^2 = sum_j ((x_j - x'_j) / l_j)^2`` and rho the
    squared exponential ``exp(-r^2 / 2)`` or Matern 5/2. Hyperparameters (a, l, s^2)
    maximize the log marginal likelihood (eq. 5.8) summed over the value
    columns (scikit-learn ``GaussianProcessRegressor``). With L = chol(K + s^2 I)
    and alpha = L' \\ (L \\ z) the prediction is (eqs. 2.25-2.26)::

        mean(x*) = k*' alpha,    var(x*) = k(x*, x*) - |L \\ k*|^2,

    the latter the variance of the latent function (noise excluded), scaled
    back per value column.
    """

    kind = "gaussian_process"
    _JITTER = 1e-10

    def __init__(self, lower=None, upper=None, kernel: str = "rbf",
                 hyperparameters: dict | None = None, restarts: int = 1):
        super().__init__(lower, upper)
        if kernel not in ("rbf", "matern"):
            raise InputError(f"unknown Gaussian-process kernel {kernel!r}; choose 'rbf' or "
                             "'matern'")
        self.kernel = kernel
        self.hyperparameters = hyperparameters
        self.restarts = restarts

    def refit(self, points, values) -> GaussianProcess:
        hp = {"amplitude": self.amplitude_, "length_scales": self.length_scales_.copy(),
              "noise": self.noise_}
        return GaussianProcess(self.lower, self.upper, self.kernel, hp).fit(points, values)

    def fit(self, points, values) -> GaussianProcess:
        x, y = self._check_fit_input(points, values)
        n, d = x.shape
        mean, scale = _standardize(y)
        z = (y - mean) / scale
        if self.hyperparameters is None:
            amplitude, ls, noise = self._optimize(x, z)
        else:
            hp = self.hyperparameters
            amplitude, noise = float(hp["amplitude"]), float(hp["noise"])
            ls = np.broadcast_to(np.asarray(hp["length_scales"], float), (d,)).copy()
        K = _gp_kernel(self.kernel, x, x, ls, amplitude) + (noise + self._JITTER) * np.eye(n)
        try:
            L = linalg.cholesky(K, lower=True)
        except linalg.LinAlgError:
            raise NumericalError("Gaussian-process covariance is not positive definite; "
                                 "remove duplicate points or raise the noise level") from None
        alpha = linalg.cho_solve((L, True), z)
        self.amplitude_, self.length_scales_, self.noise_ = amplitude, ls, noise
        self.x_, self.L_, self.alpha_ = x, L, alpha
        self.y_mean_, self.y_scale_ = mean, scale
        return self

    def leave_one_out(self, points, values) -> tuple[np.ndarray, np.ndarray]:
        """Leave-one-out predictions with the fitted hyperparameters, from one inverse.

        Rasmussen and Williams (2006), sec. 5.4.2, eq. 5.12: for zero-mean data d with
        covariance K (noise included) the prediction at point i from the others is
        ``d_i - [K^-1 d]_i / [K^-1]_ii``. The refit standardizes the values with the
        mean m_i of the other points (the scale cancels), so with ``u = K^-1 y`` and
        ``v = K^-1 1`` it predicts ``y_i - u_i / g_i + m_i v_i / g_i``, g = diag(K^-1).
        """
        x, y = self._loo_input(points, values)
        n = x.shape[0]
        if n < 2:
            return np.zeros_like(y), np.zeros(n, dtype=bool)
        u = (x - self.lower) / (self.upper - self.lower)
        K = (_gp_kernel(self.kernel, u, u, self.length_scales_, self.amplitude_)
             + (self.noise_ + self._JITTER) * np.eye(n))
        try:
            L = linalg.cholesky(K, lower=True)
        except linalg.LinAlgError:
            return self.leave_one_out_by_refit(x, y)
        Kinv = linalg.cho_solve((L, True), np.eye(n))
        g = np.diag(Kinv)
        uy = Kinv @ y
        v = Kinv.sum(axis=1)
        mean_rest = (y.sum(axis=0)[None, :] - y) / (n - 1)
        pred = y - uy / g[:, None] + mean_rest * (v / g)[:, None]
        return pred, np.all(np.isfinite(pred), axis=1)

    def _optimize(self, x: np.ndarray, z: np.ndarray):
        from sklearn.exceptions import ConvergenceWarning
        from sklearn.gaussian_process import GaussianProcessRegressor
        from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern, WhiteKernel

        d = x.shape[1]
        base = (RBF(length_scale=np.full(d, 0.5), length_scale_bounds=(1e-2, 1e2))
                if self.kernel == "rbf" else
                Matern(length_scale=np.full(d, 0.5), length_scale_bounds=(1e-2, 1e2), nu=2.5))
        kernel = (ConstantKernel(1.0, constant_value_bounds=(1e-3, 1e3)) * base
                  + WhiteKernel(1e-6, noise_level_bounds=(1e-6, 1e-1)))
        gpr = GaussianProcessRegressor(kernel=kernel, alpha=self._JITTER, normalize_y=False,
                                       n_restarts_optimizer=self.restarts, random_state=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            try:
                gpr.fit(x, z)
            except (np.linalg.LinAlgError, ValueError) as exc:
                raise NumericalError(f"Gaussian-process fit failed ({str(exc).splitlines()[0]}); "
                                     "use another interpolant kind") from None
        k = gpr.kernel_
        amplitude = float(k.k1.k1.constant_value)
        ls = np.broadcast_to(np.asarray(k.k1.k2.length_scale, float), (d,)).copy()
        noise = float(k.k2.noise_level)
        return amplitude, ls, noise

    def evaluate(self, points) -> np.ndarray:
        x = self._unit(points)
        out = np.empty((x.shape[0], self.k_))
        for sl in _chunks(x.shape[0], max(self.x_.shape[0], self.k_) * self.d_):
            ks = _gp_kernel(self.kernel, x[sl], self.x_, self.length_scales_, self.amplitude_)
            out[sl] = (ks @ self.alpha_) * self.y_scale_ + self.y_mean_
        return out

    def evaluate_std(self, points) -> np.ndarray:
        """Predictive standard deviation of the latent function per value column, (M, k)."""
        x = self._unit(points)
        out = np.empty((x.shape[0], self.k_))
        for sl in _chunks(x.shape[0], max(self.x_.shape[0], self.k_) * self.d_):
            ks = _gp_kernel(self.kernel, x[sl], self.x_, self.length_scales_, self.amplitude_)
            v = linalg.solve_triangular(self.L_, ks.T, lower=True)
            var = np.maximum(self.amplitude_ - np.sum(v * v, axis=0), 0.0)
            out[sl] = np.sqrt(var)[:, None] * self.y_scale_
        return out

    def derivative(self, points, variable_index: int) -> np.ndarray:
        j = self._check_index(variable_index)
        x = self._unit(points)
        g = _gp_kernel_grad(self.kernel, x, self.x_, self.length_scales_, self.amplitude_, j)
        return (g @ self.alpha_) * self.y_scale_ / (self.upper[j] - self.lower[j])

    def to_arrays(self) -> tuple[dict, dict]:
        arrays, attrs = self._base_arrays()
        arrays.update(train_points=self.x_.copy(), alpha=self.alpha_.copy(),
                      cholesky=self.L_.copy(), length_scales=self.length_scales_.copy(),
                      value_mean=self.y_mean_.copy(), value_scale=self.y_scale_.copy())
        attrs.update(kernel=self.kernel, amplitude=float(self.amplitude_),
                     noise=float(self.noise_))
        return arrays, attrs

    @classmethod
    def from_arrays(cls, arrays: dict, attrs: dict) -> GaussianProcess:
        self = cls(kernel=str(attrs["kernel"]))
        self._load_base(arrays, attrs)
        self.x_ = np.asarray(arrays["train_points"], dtype=float)
        self.alpha_ = np.asarray(arrays["alpha"], dtype=float)
        self.L_ = np.asarray(arrays["cholesky"], dtype=float)
        self.length_scales_ = np.asarray(arrays["length_scales"], dtype=float)
        self.y_mean_ = np.asarray(arrays["value_mean"], dtype=float)
        self.y_scale_ = np.asarray(arrays["value_scale"], dtype=float)
        self.amplitude_ = float(attrs["amplitude"])
        self.noise_ = float(attrs["noise"])
        return self


# ----------------------------------------------------------------------------- registry
KINDS: dict[str, type[Interpolant]] = {
    "multilinear": MultilinearGrid,
    "spline": CubicSplineGrid,
    "delaunay": DelaunayLinear,
    "polynomial": PolynomialLeastSquares,
    "rbf": RadialBasis,
    "gaussian_process": GaussianProcess,
}
GRID_KINDS = ("multilinear", "spline")


def make_interpolant(kind: str, lower=None, upper=None, breakpoints=None) -> Interpolant:
    """A new, unfitted interpolant of the named kind (unit box from lower/upper)."""
    if kind not in KINDS:
        raise InputError(f"unknown interpolant kind {kind!r}; choose one of {', '.join(KINDS)}")
    if kind in GRID_KINDS:
        return KINDS[kind](lower, upper, breakpoints=breakpoints)
    return KINDS[kind](lower, upper)


def interpolant_from_arrays(arrays: dict, attrs: dict) -> Interpolant:
    """Rebuild any kind from its stored arrays and attributes."""
    kind = attrs.get("kind")
    if kind not in KINDS:
        raise InputError(f"stored interpolant kind {kind!r} is unknown; expected one of "
                         f"{', '.join(KINDS)} (file written by a newer version?)")
    return KINDS[kind].from_arrays(arrays, attrs)
