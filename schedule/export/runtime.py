"""The Python runtime: step a scheduled discrete controller from a table.

The lookup is the multilinear (tensor-product linear) interpolation of the node
matrices with clamping at the bounds, written operation for operation like the
generated C (``c_source.py``), so both give the same numbers:

1. per variable k: clamp ``p_k`` into ``[b_0, b_last]`` (NaN goes to ``b_0``); find the
   interval ``i_k`` with ``b_i <= p_k`` (the last interval at the upper bound) and
   ``t_k = (p_k - b_i) / (b_{i+1} - b_i)`` (``t_k = 0`` for a single breakpoint);
2. for the 2^d corners ``c`` (bit k of c chooses ``i_k`` or ``i_k + 1``), in increasing
   order: weight ``w_c = prod_k (t_k or 1 - t_k)`` (product in variable order), and
   accumulate ``M += w_c M[corner]`` from zero;
3. ``u = Cm x + Dm y`` and ``x <- Am x + Bm y``, each sum in column order from zero.

The controller state is carried across schedule changes: moving the scheduling
point only changes the matrices, never the state (no reset, no bump).
"""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputError
from .table import ScheduledTable, validate_table


def interval_weights(breakpoints, point) -> tuple[list[int], list[float]]:
    """Per-variable interval index and fraction ``(i_k, t_k)`` with clamping."""
    idx, frac = [], []
    for b, p in zip(breakpoints, point, strict=True):
        p = float(p)
        n = len(b)
        lo, hi = float(b[0]), float(b[n - 1])
        if not p >= lo:
            p = lo
        if not p <= hi:
            p = hi
        if n == 1:
            idx.append(0)
            frac.append(0.0)
            continue
        # binary search: largest i in [0, n-2] with b[i] <= p
        a, z = 0, n - 2
        while a < z:
            mid = (a + z + 1) // 2
            if float(b[mid]) <= p:
                a = mid
            else:
                z = mid - 1
        idx.append(a)
        frac.append((p - float(b[a])) / (float(b[a + 1]) - float(b[a])))
    return idx, frac


def corners(breakpoints, point) -> tuple[np.ndarray, np.ndarray]:
    """Flat node indices and weights of the 2^d corners around ``point`` (clamped)."""
    shape = [len(b) for b in breakpoints]
    idx, frac = interval_weights(breakpoints, point)
    d = len(shape)
    flat = np.zeros(1 << d, dtype=np.int64)
    weight = np.zeros(1 << d)
    for c in range(1 << d):
        w = 1.0
        f = 0
        for k in range(d):
            bit = (c >> k) & 1
            j = min(idx[k] + bit, shape[k] - 1)
            f = f * shape[k] + j
            w = w * (frac[k] if bit else 1.0 - frac[k])
        flat[c] = f
        weight[c] = w
    return flat, weight


def interpolate_matrices(table: ScheduledTable, point) -> dict[str, np.ndarray]:
    """The table's matrices at ``point`` by clamped multilinear interpolation."""
    flat, weight = corners(table.breakpoints, point)
    out = {}
    for k in ("A", "B", "C", "D"):
        T = getattr(table, k)
        acc = np.zeros(T.shape[1:])
        for f, w in zip(flat, weight, strict=True):
            acc = acc + w * T[f]
        out[k] = acc
    return out


def _ordered_matvec(M1: np.ndarray, v1: np.ndarray, M2: np.ndarray, v2: np.ndarray):
    """``M1 v1 + M2 v2`` summed column by column from zero (the C loop order)."""
    s = np.zeros(M1.shape[0])
    for j in range(v1.shape[0]):
        s = s + M1[:, j] * v1[j]
    for j in range(v2.shape[0]):
        s = s + M2[:, j] * v2[j]
    return s


def read_table(path: str | os.PathLike) -> ScheduledTable:
    """Read a CSV, JSON or HDF5 table; the format comes from the suffix or the content."""
    path = str(path)
    if not os.path.isfile(path):
        raise InputError(f"table file {path} does not exist; export one with `schedule export`")
    from .csv_table import read_csv_table
    from .hdf5_table import read_hdf5_table
    from .json_table import read_json_table
    ext = os.path.splitext(path)[1].lower()
    readers = {".csv": read_csv_table, ".json": read_json_table, ".h5": read_hdf5_table,
               ".hdf5": read_hdf5_table}
    if ext in readers:
        return readers[ext](path)
    with open(path, "rb") as f:
        head = f.read(8)
    if head.startswith(b"\x89HDF"):
        return read_hdf5_table(path)
    if head.lstrip().startswith(b"{"):
        return read_json_table(path)
    if head.startswith(b"#"):
        return read_csv_table(path)
    raise InputError(f"{path}: unknown table format; use a .csv, .json or .h5 table")


class TableController:
    """A scheduled discrete controller stepped from a table.

    Parameters
    ----------
    table : ScheduledTable or path of a CSV / JSON / HDF5 table (discrete time).

    Examples
    --------
    >>> ctl = TableController("table.json")          # doctest: +SKIP
    >>> ctl.reset()                                   # doctest: +SKIP
    >>> u = ctl.step(y, {"rope_length": 12.0, "payload_mass": 8000.0})  # doctest: +SKIP
    """

    def __init__(self, table: ScheduledTable | str | os.PathLike):
        if not isinstance(table, ScheduledTable):
            table = read_table(table)
        validate_table(table, "table")
        if not table.discrete:
            raise InputError("the table is continuous-time; export it with --sample-time to "
                             "step it")
        self.table = table
        self.names = tuple(v.name for v in table.variables)
        self._x = np.zeros(table.n_states)

    @property
    def sample_time(self) -> float:
        return self.table.sample_time

    @property
    def state(self) -> np.ndarray:
        """A copy of the controller state."""
        return self._x.copy()

    def reset(self, x0=None) -> None:
        """Set the state to ``x0`` (default zero)."""
        n = self.table.n_states
        if x0 is None:
            self._x = np.zeros(n)
            return
        x0 = np.asarray(x0, dtype=float).reshape(-1)
        if x0.shape != (n,) or not np.isfinite(x0).all():
            raise InputError(f"initial state must hold {n} finite numbers, got shape "
                             f"{x0.shape}")
        self._x = x0.copy()

    def _point(self, point) -> np.ndarray:
        if isinstance(point, dict):
            missing = [n for n in self.names if n not in point]
            if missing:
                raise InputError(f"scheduling point lacks {', '.join(missing)}; give every "
                                 f"variable of {', '.join(self.names)}")
            point = [point[n] for n in self.names]
        p = np.asarray(point, dtype=float).reshape(-1)
        if p.shape != (len(self.names),):
            raise InputError(f"scheduling point has {p.size} values; expected "
                             f"{len(self.names)} ({', '.join(self.names)})")
        return p

    def matrices(self, point) -> dict[str, np.ndarray]:
        """The interpolated discrete matrices at ``point`` (clamped to the table)."""
        return interpolate_matrices(self.table, self._point(point))

    def step(self, y, point) -> np.ndarray:
        """One sample: ``u = Cm x + Dm y``, then ``x <- Am x + Bm y``; returns u.

        ``y`` holds the controller inputs (measured minus reference/trim) in the table's
        input order; ``point`` is a dict by name or a sequence in variable order.
        """
        y = np.asarray(y, dtype=float).reshape(-1)
        if y.shape != (self.table.n_inputs,) or not np.isfinite(y).all():
            raise InputError(f"controller input must hold {self.table.n_inputs} finite "
                             f"numbers ({', '.join(self.table.measured_names)}), got {y}")
        m = self.matrices(point)
        u = _ordered_matvec(m["C"], self._x, m["D"], y)
        self._x = _ordered_matvec(m["A"], self._x, m["B"], y)
        return u
