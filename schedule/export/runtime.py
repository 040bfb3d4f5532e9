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
3. ``u = Cm x + Dm y``; ``u_lim`` = ``u`` limited in rate, then in magnitude
   (:func:`schedule.export.antiwindup.limit_command`); ``x <- Am x + Bm y + Hm (u_lim -
   u)`` (the last term only when a limit acted and anti-windup is on), each sum in
   column order from zero.

The controller state is carried across schedule changes: moving the scheduling
point only changes the matrices, never the state (no reset, no bump). A NaN or
infinite measurement or scheduling value is refused before anything changes (the C
step returns an error code in the same case). ``reset_steady`` starts bumpless.
"""

from __future__ import annotations

import os
from collections.abc import Mapping

import numpy as np

from ..errors import InputError
from .antiwindup import ActuatorLimits, bumpless_state, limit_command
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


def point_values(names, point) -> np.ndarray:
    """Scheduling values in variable order from a mapping ``name -> value`` (the documented
    way) or a sequence already in variable order."""
    if isinstance(point, Mapping):
        missing = [n for n in names if n not in point]
        if missing:
            raise InputError(f"scheduling point lacks {', '.join(missing)}; give every "
                             f"variable of {', '.join(names)}")
        unknown = [k for k in point if k not in names]
        if unknown:
            raise InputError(f"scheduling point names unknown variable {unknown[0]!r}; the "
                             f"table's variables are {', '.join(names)}")
        point = [point[n] for n in names]
    try:
        p = np.asarray(point, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"scheduling point {point!r} is not numbers; give a mapping "
                         f"{{name: value}} for {', '.join(names)}") from None
    if p.shape != (len(names),):
        raise InputError(f"scheduling point has {p.size} values; expected {len(names)} "
                         f"({', '.join(names)})")
    return p


def interpolate_matrices(table: ScheduledTable, point) -> dict[str, np.ndarray]:
    """The table's matrices at ``point`` by clamped multilinear interpolation.

    ``point`` is a mapping ``variable name -> value`` (as for :meth:`TableController.step`);
    a sequence in the table's variable order is accepted too. Returns ``"A"``, ``"B"``,
    ``"C"``, ``"D"`` and, when the table carries it, the anti-windup gain ``"H"``.
    """
    p = point_values([v.name for v in table.variables], point)
    flat, weight = corners(table.breakpoints, p)
    out = {}
    keys = ("A", "B", "C", "D", "H") if table.H is not None else ("A", "B", "C", "D")
    for k in keys:
        T = getattr(table, k)
        acc = np.zeros(T.shape[1:])
        for f, w in zip(flat, weight, strict=True):
            acc = acc + w * T[f]
        out[k] = acc
    return out


def _ordered_matvec(*pairs) -> np.ndarray:
    """``sum_k M_k v_k`` summed column by column from zero, pair after pair (the C loop order)."""
    s = np.zeros(pairs[0][0].shape[0])
    for M, v in pairs:
        for j in range(v.shape[0]):
            s = s + M[:, j] * v[j]
    return s


def read_table(path: str | os.PathLike) -> ScheduledTable:
    """Read a table in any format `schedule export` writes: CSV, JSON, HDF5, the C source
    (``PREFIX_table.c`` or ``.h``, or the folder holding them) or an FMU (its C sources,
    :mod:`schedule.export.c_reader`; nothing is compiled or run). The format comes from
    the suffix or the content."""
    from .c_reader import read_c_table, read_fmu_table

    path = str(path)
    if os.path.isdir(path):
        return read_c_table(path)
    if not os.path.isfile(path):
        raise InputError(f"table file {path} does not exist; export one with `schedule export`")
    from .csv_table import read_csv_table
    from .hdf5_table import read_hdf5_table
    from .json_table import read_json_table
    ext = os.path.splitext(path)[1].lower()
    readers = {".csv": read_csv_table, ".json": read_json_table, ".h5": read_hdf5_table,
               ".hdf5": read_hdf5_table, ".c": read_c_table, ".h": read_c_table,
               ".fmu": read_fmu_table}
    if ext in readers:
        return readers[ext](path)
    with open(path, "rb") as f:
        head = f.read(8)
    if head.startswith(b"\x89HDF"):
        return read_hdf5_table(path)
    if head.startswith(b"PK\x03\x04"):
        return read_fmu_table(path)
    if head.lstrip().startswith(b"{"):
        return read_json_table(path)
    if head.startswith(b"#"):
        return read_csv_table(path)
    raise InputError(f"{path}: unknown table format; use a .csv, .json, .h5, .c or .fmu table")


class TableController:
    """A scheduled discrete controller stepped from a table, with actuator limits.

    Parameters
    ----------
    table : ScheduledTable or path of a CSV / JSON / HDF5 table (discrete time).
    anti_windup : feed the observer the limited command (default); False keeps the
        linear controller's state update (the command is limited either way), which is
        what a controller that does not know its drive saturates does.

    Attributes
    ----------
    limits : :class:`~schedule.export.antiwindup.ActuatorLimits` applied to the command
        (from the table; replace it to change them).

    Examples
    --------
    >>> ctl = TableController("table.json")          # doctest: +SKIP
    >>> ctl.reset()                                   # doctest: +SKIP
    >>> u = ctl.step(y, {"rope_length": 12.0, "payload_mass": 8000.0})  # doctest: +SKIP
    """

    def __init__(self, table: ScheduledTable | str | os.PathLike, anti_windup: bool = True):
        if not isinstance(table, ScheduledTable):
            table = read_table(table)
        validate_table(table, "table")
        if not table.discrete:
            raise InputError("the table is continuous-time; export it with --sample-time to "
                             "step it")
        self.table = table
        self.names = tuple(v.name for v in table.variables)
        self.anti_windup = bool(anti_windup)
        self.limits: ActuatorLimits = table.actuator_limits
        self._x = np.zeros(table.n_states)
        self._u_last = np.zeros(table.n_outputs)

    @property
    def sample_time(self) -> float:
        return self.table.sample_time

    @property
    def state(self) -> np.ndarray:
        """A copy of the controller state."""
        return self._x.copy()

    @property
    def last_command(self) -> np.ndarray:
        """A copy of the last command sent (after the limits)."""
        return self._u_last.copy()

    def reset(self, x0=None, u_last=None) -> None:
        """Set the state to ``x0`` (default zero) and the last command to ``u_last``
        (default zero, the trim; the rate limit starts from it)."""
        n, nu = self.table.n_states, self.table.n_outputs
        x = np.zeros(n) if x0 is None else self._finite(x0, n, "initial state")
        u = np.zeros(nu) if u_last is None else self._finite(u_last, nu, "last command")
        self._x, self._u_last = x, u

    def reset_steady(self, y, u, point) -> None:
        """Bumpless start: the state for switching in while ``y`` and the command ``u`` are
        held (:func:`schedule.export.antiwindup.bumpless_state`); the next command is ``u``.

        Raises
        ------
        InputError
            Non-finite values, or a table without the anti-windup gain H.
        NumericalError
            The steady-state equations are singular at ``point``.
        """
        y = self._finite(y, self.table.n_inputs, "held measurement")
        u = self._finite(u, self.table.n_outputs, "held command")
        p = self._point(point)
        if self.table.H is None:
            raise InputError("this table has no anti-windup gain H (exported from a family "
                             "without a fitting generalized plant), so it cannot start "
                             "bumpless; use reset()")
        m = interpolate_matrices(self.table, p)
        self._x = bumpless_state(m["A"], m["B"], m["C"], m["D"], m["H"], y, u)
        self._u_last = u.copy()

    @staticmethod
    def _finite(values, size: int, what: str) -> np.ndarray:
        try:
            v = np.asarray(values, dtype=float).reshape(-1)
        except (TypeError, ValueError):
            raise InputError(f"{what} must hold {size} finite numbers, got {values!r}") from None
        if v.shape != (size,) or not np.isfinite(v).all():
            raise InputError(f"{what} must hold {size} finite numbers, got shape {v.shape}"
                             + ("" if v.shape != (size,) else " with NaN or inf"))
        return v.copy()

    def _point(self, point) -> np.ndarray:
        p = point_values(self.names, point)
        if not np.isfinite(p).all():
            raise InputError(f"scheduling point holds NaN or inf ({', '.join(self.names)} = "
                             f"{', '.join(f'{x:g}' for x in p)}); the state is unchanged")
        return p

    def matrices(self, point) -> dict[str, np.ndarray]:
        """The interpolated discrete matrices at ``point`` (clamped to the table; NaN goes
        to the first breakpoint, as in the C lookup)."""
        return interpolate_matrices(self.table, point_values(self.names, point))

    def step(self, y, point) -> np.ndarray:
        """One sample; returns the command sent (after the limits).

        ``u = Cm x + Dm y``; ``u_lim`` = ``u`` limited in rate and magnitude; then
        ``x <- Am x + Bm y + Hm (u_lim - u)`` (the last term only with anti-windup and when
        a limit acted). ``y`` holds the controller inputs (measured minus reference/trim)
        in the table's input order; ``point`` is a mapping by name (or a sequence in
        variable order). Non-finite ``y`` or ``point`` raise InputError and leave the state
        unchanged (the C step returns an error code in the same case).
        """
        y = np.asarray(y, dtype=float).reshape(-1)
        if y.shape != (self.table.n_inputs,) or not np.isfinite(y).all():
            raise InputError(f"controller input must hold {self.table.n_inputs} finite "
                             f"numbers ({', '.join(self.table.measured_names)}), got {y}; "
                             "the state is unchanged")
        m = interpolate_matrices(self.table, self._point(point))
        u = _ordered_matvec((m["C"], self._x), (m["D"], y))
        u_lim = limit_command(u, self._u_last, self.limits, self.table.sample_time)
        pairs = [(m["A"], self._x), (m["B"], y)]
        if self.anti_windup and "H" in m and np.any(u_lim != u):
            pairs.append((m["H"], u_lim - u))
        self._x = _ordered_matvec(*pairs)
        self._u_last = u_lim
        return u_lim.copy()
