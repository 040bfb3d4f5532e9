"""Small frozen dataclasses that give names to the arrays crossing module boundaries."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


def point_text(names, values=None) -> str:
    """``"name=value, ..."`` for messages that name an operating point.

    ``names`` and ``values`` in order, or one mapping {name: value}.
    """
    if values is None:
        names, values = list(names), list(names.values())
    return ", ".join(f"{n}={float(x):g}" for n, x in zip(names, values))


def rate_unit(unit: str) -> str:
    """The unit of a rate of change of a quantity in ``unit``: ``" m/s"``, ``" (1/s)/s"``
    for a unit with a slash, ``" per s"`` for none (with the leading space)."""
    unit = str(unit or "").strip()
    if unit in ("", "-"):
        return " per s"
    return f" ({unit})/s" if "/" in unit else f" {unit}/s"


@dataclass(frozen=True)
class SchedulingVariable:
    """One scheduling variable: a name, a unit and closed bounds ``lower <= p <= upper``."""

    name: str
    unit: str
    lower: float
    upper: float


@dataclass(frozen=True)
class LinearPlant:
    """A linearized plant ``xdot = A x + B u``, ``y = C x + D u`` with signal names.

    ``input_names`` names the columns of B and D, ``output_names`` the rows of C
    and D, ``state_names`` the states. Every plant of one envelope must use the
    same state coordinates (same names, same meaning, same order).

    ``state_units``, ``input_units``, ``output_units`` (optional) give one unit
    per state, input and output ("m", "kN", "rad/s"; "" when unknown); empty
    tuples when the model gives none. The matrices are in these units.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    state_names: tuple[str, ...] = ()
    input_names: tuple[str, ...] = ()
    output_names: tuple[str, ...] = ()
    state_units: tuple[str, ...] = ()
    input_units: tuple[str, ...] = ()
    output_units: tuple[str, ...] = ()

    def unit_of(self, kind: str, name: str) -> str:
        """Unit of the ``kind`` ("state", "input" or "output") signal ``name`` ("" if unknown)."""
        names = getattr(self, f"{kind}_names")
        units = getattr(self, f"{kind}_units")
        if name in names and len(units) == len(names):
            return str(units[list(names).index(name)])
        return ""


@dataclass
class Family:
    """The controller family: everything the family file holds, as arrays.

    N is the number of operating points that were attempted (grid holes are
    not points). Stacked arrays have the point index first.

    Attributes
    ----------
    variables : scheduling variables (names, units, bounds), length d.
    points : (N, d) scheduling values of the operating points.
    breakpoints : per-variable breakpoints for a rectangular grid, else None.
    grid_index : (N, d) integer grid indices for a rectangular grid, else None.
    status : (N,) strings, "ok" or "failed".
    reasons : (N,) strings, empty for "ok", one line for "failed".
    gamma_opt : (N,) per-point optimal gamma (nan where failed).
    gamma : the common design gamma.
    plant : stacked generalized-plant matrices "A","B1","B2","C1","C2","D11",
        "D12","D21","D22", each (N, rows, cols) (zeros where failed).
    controller : stacked controller matrices "A","B","C","D" (u = K y).
    pieces : stacked observer-form pieces, name -> (N, ...) array.
    measured_names, control_names : controller inputs (y) and outputs (u).
    exogenous_names, performance_names : generalized plant w and z names.
    state_names : generalized-plant (and controller) state names.
    units : group ("measured", "controls", "exogenous", "performance", "states")
        -> one unit per signal of that group ("" when unknown; an absent group:
        no units). For w and z, the unit of the plant signal behind the
        channel (w and z themselves are weighted, normalized signals).
    design_text : the design file's text; tool_version, created : provenance.
    design_base_dir : folder the design file's relative paths refer to.
    interpolant : plain arrays and attributes of the fitted interpolant, or None.
    extra : anything else a stage stores (for example leave-one-out tables).
    """

    variables: tuple[SchedulingVariable, ...]
    points: np.ndarray
    status: np.ndarray
    reasons: tuple[str, ...]
    gamma_opt: np.ndarray
    gamma: float
    plant: dict[str, np.ndarray]
    controller: dict[str, np.ndarray]
    pieces: dict[str, np.ndarray]
    measured_names: tuple[str, ...] = ()
    control_names: tuple[str, ...] = ()
    exogenous_names: tuple[str, ...] = ()
    performance_names: tuple[str, ...] = ()
    state_names: tuple[str, ...] = ()
    breakpoints: tuple[np.ndarray, ...] | None = None
    grid_index: np.ndarray | None = None
    design_text: str = ""
    tool_version: str = ""
    created: str = ""
    design_base_dir: str = ""
    interpolant: dict | None = None
    extra: dict = field(default_factory=dict)
    units: dict = field(default_factory=dict)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of points whose synthesis succeeded."""
        return np.asarray(self.status) == "ok"

    @property
    def variable_names(self) -> tuple[str, ...]:
        return tuple(v.name for v in self.variables)

    def units_of(self, group: str) -> tuple[str, ...]:
        """One unit per signal of ``group`` (see ``units``); "" for each when unknown."""
        names = getattr(self, _NAME_ATTR[group])
        units = tuple(self.units.get(group, ()))
        return units if len(units) == len(names) else ("",) * len(names)


_NAME_ATTR = {"measured": "measured_names", "controls": "control_names",
              "exogenous": "exogenous_names", "performance": "performance_names",
              "states": "state_names"}
