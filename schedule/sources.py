"""Where the linearized plants come from: an operating-point file or a user model.

- :func:`load_model` turns ``source.model = "module:function"`` or
  ``source.model_file`` + ``source.function`` into a callable
  ``point -> LinearPlant``. The user's function takes a dict
  ``{variable name: value}`` and returns a :class:`schedule.types.LinearPlant`
  or an ``(A, B, C, D)`` tuple (given generic names u1.., y1.., x1..).
- :func:`evaluate_model` calls it at one point and turns any failure (the
  function raised, returned NaN or inconsistent shapes) into a one-line reason.
- :func:`load_nonlinear_model` returns the model named by ``source.nonlinear_model``
  or ``source.nonlinear_model_file`` + ``source.nonlinear_function`` (the model
  itself or a factory with no arguments), for time simulation.
- :func:`operating_points_for` gives the design points and plants for either
  source, with the grid structure and a report of the holes.

User code is imported with importlib (``spec_from_file_location`` for a file),
and only from a design the user named: a design file given on the command line
or a ``--model`` option. A design read back from a family file is data; its
code entries are set aside unimported (:func:`without_code`, with a note from
:func:`ignored_code_note`) unless the user names them again
(:func:`with_code_from`). Nothing read from a data file is ever evaluated.
"""

from __future__ import annotations

import importlib
import importlib.util
import sys
from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path

import numpy as np

from .design_file import MAX_MATRIX_ENTRY, DesignSpec
from .envelope import RectangularGrid, ScatteredPoints, point_text
from .errors import InputError
from .names import check_names
from .types import LinearPlant

__all__ = ["load_model", "evaluate_model", "load_nonlinear_model", "nonlinear_model_from",
           "operating_points_for", "OperatingSet", "as_linear_plant", "check_consistent",
           "without_code", "with_code_from", "with_model", "ignored_code_note", "design_points",
           "evaluate_points", "model_source_digest", "file_points"]

ModelFn = Callable[[Mapping[str, float]], LinearPlant]


# --------------------------------------------------------------------------- whose code
def _code_entries(source) -> tuple[str, ...]:
    """The code a design's source names, as it would be written in the design file."""
    out = []
    if source.model is not None:
        out.append(f'source.model = "{source.model}"')
    if source.model_file is not None:
        out.append(f'source.model_file = "{source.model_file}" (function {source.function})')
    if source.nonlinear_model is not None:
        out.append(f'source.nonlinear_model = "{source.nonlinear_model}"')
    if source.nonlinear_model_file is not None:
        out.append(f'source.nonlinear_model_file = "{source.nonlinear_model_file}" '
                   f'(name {source.nonlinear_function})')
    return tuple(out)


def without_code(spec: DesignSpec) -> DesignSpec:
    """``spec`` with its code entries set aside (recorded in ``source.ignored``).

    For a design read from a data file (a family file's stored design text):
    a received file must not choose code to run, and its SHA-256 digest has no
    key, so anyone can edit the text and recompute it.
    """
    src = spec.source
    return replace(spec, source=replace(src, model=None, model_file=None, function=None,
                                        nonlinear_model=None, nonlinear_model_file=None,
                                        nonlinear_function=None, ignored=_code_entries(src)))


def with_code_from(spec: DesignSpec, trusted: DesignSpec) -> DesignSpec:
    """``spec`` with the code entries of ``trusted``, a design file the user named."""
    t = trusted.source
    return replace(spec, source=replace(spec.source, model=t.model, model_file=t.model_file,
                                        function=t.function, nonlinear_model=t.nonlinear_model,
                                        nonlinear_model_file=t.nonlinear_model_file,
                                        nonlinear_function=t.nonlinear_function, ignored=()))


def with_model(spec: DesignSpec, model: str) -> DesignSpec:
    """``spec`` whose plant comes from ``model`` ("module:function", named by the user)."""
    parts = model.split(":")
    if len(parts) != 2 or not all(p.isidentifier() for p in parts[0].split(".")) \
            or not parts[1].isidentifier():
        raise InputError(f"model {model!r} must be written module:function")
    return replace(spec, source=replace(spec.source, model=model, model_file=None,
                                        function=None, operating_points=None, ignored=()))


def ignored_code_note(spec: DesignSpec | None,
                      options: str = "--design FILE (a design file you trust) or --model "
                                     "module:function") -> str | None:
    """One line saying which code a family's stored design names and that it was not imported."""
    if spec is None or not spec.source.ignored:
        return None
    return (f"the family's stored design names {'; '.join(spec.source.ignored)}; it was not "
            "imported, because a data file never chooses code to run: pass "
            f"{options} to use it")


# --------------------------------------------------------------------------- import helpers
def import_entry(text: str, key: str, callable_only: bool = True) -> Callable:
    """Import ``module:function`` and return the callable (errors name key, module, function).

    With ``callable_only=False`` any object of that name is returned."""
    module_name, _, func_name = text.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        raise InputError(f"{key} = \"{text}\": module '{module_name}' cannot be imported "
                         f"({exc}); install it or fix the module path") from None
    except Exception as exc:  # the user's module raised while importing
        raise InputError(f"{key} = \"{text}\": importing '{module_name}' raised "
                         f"{type(exc).__name__}: {_one_line(exc)}; fix the module") from None
    fn = getattr(module, func_name, None)
    if fn is None:
        raise InputError(f"{key} = \"{text}\": module '{module_name}' has no '{func_name}'; "
                         "check the function name")
    if callable_only and not callable(fn):
        raise InputError(f"{key} = \"{text}\": '{func_name}' is not callable; name a function")
    return fn


def _import_file(path: Path, func_name: str, key: str = "source.model_file",
                 callable_only: bool = True):
    """The object ``func_name`` of the Python file ``path`` (errors name ``key``)."""
    if not path.is_file():
        raise InputError(f"{key} {path} does not exist; check the path (relative "
                         "to the design file)")
    mod_name = f"_schedule_user_model_{abs(hash(str(path)))}"
    spec = importlib.util.spec_from_file_location(mod_name, path)
    if spec is None or spec.loader is None:
        raise InputError(f"{key} {path} is not a Python file; give a .py file")
    module = importlib.util.module_from_spec(spec)
    sys.modules[mod_name] = module
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        sys.modules.pop(mod_name, None)
        raise InputError(f"{key} {path} raised {type(exc).__name__} while "
                         f"loading: {_one_line(exc)}; fix the file") from None
    fn = getattr(module, func_name, None)
    if fn is None or (callable_only and not callable(fn)):
        what = "function" if callable_only else "name"
        raise InputError(f"{key} {path} defines no {what} '{func_name}'; fix "
                         "the function name in the design or the file")
    return fn


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else "(no message)"


# --------------------------------------------------------------------------- plants
def as_linear_plant(result) -> LinearPlant:
    """Wrap a model's result as a LinearPlant and validate shapes and finiteness.

    Raises
    ------
    InputError
        wrong type, inconsistent shapes, NaN/inf, or names that do not match
        the sizes; the message is the reason reported for the point.
    """
    units = ((), (), ())
    if isinstance(result, LinearPlant):
        A, B, C, D = result.A, result.B, result.C, result.D
        names = (result.state_names, result.input_names, result.output_names)
        units = (result.state_units, result.input_units, result.output_units)
    elif isinstance(result, (tuple, list)) and len(result) == 4:
        A, B, C, D = result
        names = None
    else:
        raise InputError(f"the model returned {type(result).__name__}; return a LinearPlant or "
                         "an (A, B, C, D) tuple")
    mats = {}
    for label, M in (("A", A), ("B", B), ("C", C), ("D", D)):
        if np.iscomplexobj(M):
            M = np.asarray(M)
            if np.any(M.imag != 0):
                raise InputError(f"the model returned a complex {label} (imaginary parts up "
                                 f"to {np.max(np.abs(M.imag)):.3g}); return the real matrices "
                                 "of a real state-space model")
            M = M.real
        mats[label] = M
    try:
        A, B, C, D = (np.atleast_2d(np.asarray(mats[k], dtype=float)) for k in "ABCD")
    except (TypeError, ValueError):
        raise InputError("the model returned matrices that are not numeric arrays; return "
                         "float arrays") from None
    n = A.shape[0]
    if A.ndim != 2 or A.shape != (n, n) or n == 0:
        raise InputError(f"the model returned A of shape {A.shape}; A must be square (n, n)")
    if B.ndim != 2 or B.shape[0] != n or C.ndim != 2 or C.shape[1] != n \
            or D.shape != (C.shape[0], B.shape[1]):
        raise InputError(f"the model returned inconsistent shapes A{A.shape} B{B.shape} "
                         f"C{C.shape} D{D.shape}; need B (n, m), C (p, n), D (p, m)")
    for label, M in (("A", A), ("B", B), ("C", C), ("D", D)):
        if not np.isfinite(M).all():
            raise InputError(f"the model returned NaN or inf in {label}; fix the linearization")
        if M.size and np.abs(M).max() > MAX_MATRIX_ENTRY:
            raise InputError(f"the model returned {label} with an entry of magnitude "
                             f"{np.abs(M).max():.3g}, beyond {MAX_MATRIX_ENTRY:g}; rescale the "
                             "plant's units (signals of order one)")
    m, p = B.shape[1], C.shape[0]
    if names is None or not any(names):
        states = tuple(f"x{i + 1}" for i in range(n))
        ins = tuple(f"u{i + 1}" for i in range(m))
        outs = tuple(f"y{i + 1}" for i in range(p))
    else:
        states, ins, outs = (tuple(str(s) for s in x) for x in names)
    for label, nm, size in (("state", states, n), ("input", ins, m), ("output", outs, p)):
        if len(nm) != size:
            raise InputError(f"the model returned {len(nm)} {label} names for {size} "
                             f"{label}s; give one name per {label}")
        if len(set(nm)) != len(nm):
            raise InputError(f"the model returned duplicate {label} names; make them unique")
        check_names(nm, f"the model returned {label} names")
    for label, un, size in zip(("state", "input", "output"), units, (n, m, p), strict=True):
        if len(un) not in (0, size):
            raise InputError(f"the model returned {len(un)} {label} units for {size} "
                             f"{label}s; give one unit per {label} (\"\" for none) or none")
        check_names(un, f"the model returned {label} units")
    return LinearPlant(A, B, C, D, states, ins, outs, *(tuple(str(u) for u in un)
                                                        for un in units))


def load_model(spec: DesignSpec) -> ModelFn:
    """The design's model as a callable ``point -> LinearPlant``.

    ``point`` may be a mapping {variable name: value} or a (d,) sequence in the
    order of the design's variables; the user's function always receives a
    dict. The returned plant is validated (see :func:`as_linear_plant`), so a
    bad result raises InputError; use :func:`evaluate_model` to get a reason
    string instead.
    """
    src = spec.source
    if src.model is not None:
        fn = import_entry(src.model, "source.model")
    elif src.model_file is not None:
        fn = _import_file(Path(src.model_file), src.function or "")
    else:
        raise InputError(ignored_code_note(spec) or f"{spec.name}: the design has no model "
                         "(source.model or source.model_file); add one or use the "
                         "operating-point file")
    names = spec.variable_names

    def model(point) -> LinearPlant:
        if isinstance(point, Mapping):
            p = {n: float(point[n]) for n in names}
        else:
            arr = np.asarray(point, dtype=float).reshape(-1)
            if arr.size != len(names):
                raise InputError(f"point has {arr.size} values for {len(names)} variables; "
                                 "give one per variable")
            p = dict(zip(names, arr.tolist(), strict=False))
        return as_linear_plant(fn(p))

    model.__name__ = getattr(fn, "__name__", "model")
    return model


def evaluate_model(model: ModelFn, point) -> tuple[LinearPlant | None, str]:
    """Call ``model`` at ``point``; return ``(plant, "")`` or ``(None, reason)``.

    The reason is one line: what the model raised, or what is wrong with its
    result (NaN, shapes, names).
    """
    try:
        result = model(point)
        plant = as_linear_plant(result)
    except InputError as exc:
        return None, str(exc)
    except Exception as exc:  # the user's code failed; report, do not crash the run
        return None, f"the model raised {type(exc).__name__}: {_one_line(exc)}"
    return plant, ""


def load_nonlinear_model(spec: DesignSpec):
    """The design's nonlinear model, for time simulation.

    ``source.nonlinear_model = "module:name"`` or ``source.nonlinear_model_file``
    (a Python file, relative to the design file) with ``source.nonlinear_function``
    names either the model itself (a ``schedule.linearize.NonlinearModel``) or a
    factory with no arguments that returns it.
    """
    from .linearize import NonlinearModel

    src = spec.source
    if src.nonlinear_model_file is not None:
        where = f"source.nonlinear_function = \"{src.nonlinear_function}\""
        obj = _import_file(Path(src.nonlinear_model_file), src.nonlinear_function or "",
                           "source.nonlinear_model_file", callable_only=False)
    elif src.nonlinear_model is not None:
        where = f"source.nonlinear_model = \"{src.nonlinear_model}\""
        obj = import_entry(src.nonlinear_model, "source.nonlinear_model", callable_only=False)
    else:
        note = ignored_code_note(spec)
        if note:
            raise InputError(note)
        raise InputError(f"{spec.name}: the design has no nonlinear model; add "
                         "nonlinear_model = \"module:function\" or nonlinear_model_file = "
                         "\"file.py\" with nonlinear_function = \"name\" to [source]")
    return nonlinear_model_from(obj, where, NonlinearModel)


def nonlinear_model_from(obj, where: str, kind=None):
    """``obj`` if it is a model, else ``obj()`` (a factory); InputError naming ``where``."""
    if kind is None:
        from .linearize import NonlinearModel as kind
    if isinstance(obj, kind):
        return obj
    if not callable(obj):
        raise InputError(f"{where} is a {type(obj).__name__}, neither a NonlinearModel nor a "
                         "function returning one; name the model or its factory")
    try:
        model = obj()
    except Exception as exc:
        raise InputError(f"{where} raised {type(exc).__name__}: {_one_line(exc)}; fix the "
                         "model factory (it is called with no arguments)") from None
    if model is None:
        raise InputError(f"{where} returned None; return the model object")
    return model


# --------------------------------------------------------------------------- point sets
class OperatingSet(tuple):
    """``(points, plants, breakpoints, grid_index, holes_report)`` with extras.

    Unpacks as the 5-tuple; attributes ``points`` (N, d), ``plants`` (list of
    LinearPlant or None where the model failed), ``breakpoints`` (tuple of
    arrays or None), ``grid_index`` ((N, d) ints or None), ``holes_report``
    (tuple of lines), ``reasons`` (tuple, "" where ok), ``source`` ("file" or
    "model").
    """

    def __new__(cls, points, plants, breakpoints, grid_index, holes_report, reasons, source):
        self = super().__new__(cls, (points, plants, breakpoints, grid_index, holes_report))
        self.reasons = tuple(reasons)
        self.source = source
        return self

    points = property(lambda self: self[0])
    plants = property(lambda self: self[1])
    breakpoints = property(lambda self: self[2])
    grid_index = property(lambda self: self[3])
    holes_report = property(lambda self: self[4])

    @property
    def ok(self) -> np.ndarray:
        return np.array([p is not None for p in self.plants], dtype=bool)


def check_consistent(plants, points, names) -> None:
    """All non-None plants share sizes and signal names; name the first point that differs."""
    ref, k0 = None, -1
    for k, p in enumerate(plants):
        if p is None:
            continue
        if ref is None:
            ref, k0 = p, k
            continue
        sizes = (np.shape(p.A)[0], np.shape(p.B)[1], np.shape(p.C)[0])
        ref_sizes = (np.shape(ref.A)[0], np.shape(ref.B)[1], np.shape(ref.C)[0])
        if sizes != ref_sizes:
            raise InputError(f"the plant at point {k} ({point_text(names, points[k])}) has "
                             f"(states, inputs, outputs) = {sizes} but point {k0} has "
                             f"{ref_sizes}; every point needs the same sizes")
        for label in ("state_names", "input_names", "output_names"):
            if tuple(getattr(p, label)) != tuple(getattr(ref, label)):
                raise InputError(f"the plant at point {k} ({point_text(names, points[k])}) "
                                 f"has {label.replace('_', ' ')} {list(getattr(p, label))} but "
                                 f"point {k0} has {list(getattr(ref, label))}; use the same "
                                 "names and order at every point")


def operating_points_for(spec: DesignSpec, progress: Callable[[int], None] | None = None
                         ) -> OperatingSet:
    """The design points and their linear plants.

    With ``source.operating_points`` the file's points are used (its variables
    must match the design's: same names in the same order, points inside the
    design bounds). Otherwise the model is evaluated at the [grid] points
    (breakpoints minus holes, or the scattered points); a point where the
    model fails gets plant None and a one-line reason.

    Parameters
    ----------
    spec : the design.
    progress : optional callable receiving the number of points just done.

    Returns
    -------
    OperatingSet (unpacks as ``points, plants, breakpoints, grid_index, holes_report``).
    """
    names = spec.variable_names
    if spec.source.operating_points is not None:
        return _from_file(spec, Path(spec.source.operating_points))
    model = load_model(spec)
    pts, breakpoints, grid_index, holes = design_points(spec)
    plants, reasons = [], []
    for _k, row in enumerate(pts):
        plant, reason = evaluate_model(model, dict(zip(names, row.tolist(), strict=False)))
        plants.append(plant)
        reasons.append(reason)
        if progress is not None:
            progress(1)
    if not any(p is not None for p in plants):
        raise InputError(f"the model failed at every design point (point 0: {reasons[0]}); "
                         "fix the model")
    check_consistent(plants, pts, names)
    return OperatingSet(pts, plants, breakpoints, grid_index, holes, reasons, "model")


def _from_file(spec: DesignSpec, path: Path) -> OperatingSet:
    ops, pts, breakpoints, grid_index, holes = file_points(spec, path)
    plants = [ops.plant(k) for k in range(len(ops))]
    return OperatingSet(pts, plants, breakpoints, grid_index, holes, [""] * len(pts), "file")


def file_points(spec: DesignSpec, path: Path):
    """An operating-point file checked against the design, without per-point objects:
    ``(OperatingPoints, points, breakpoints, grid_index, holes report)``."""
    from .oppoints import read_operating_points

    ops = read_operating_points(path)
    names = spec.variable_names
    file_names = tuple(v.name for v in ops.variables)
    if file_names != names:
        raise InputError(f"{path} has scheduling variables {list(file_names)} but the design "
                         f"{spec.name} has {list(names)}; use the same names in the same "
                         "order")
    pts = np.asarray(ops.values, dtype=float)
    for j, v in enumerate(spec.variables):
        out = (pts[:, j] < v.lower) | (pts[:, j] > v.upper)
        if out.any():
            k = int(np.argmax(out))
            raise InputError(f"{path}: point {k} ({point_text(names, pts[k])}) is outside the "
                             f"design bounds of {v.name} [{v.lower:g}, {v.upper:g}]; widen the "
                             "bounds in the design file")
    ScatteredPoints(pts, spec.variables)  # duplicates, NaN
    breakpoints = grid_index = None
    holes: tuple[str, ...] = ()
    if ops.breakpoints is not None:
        breakpoints = tuple(np.asarray(b, dtype=float) for b in ops.breakpoints)
        grid_index = np.zeros(pts.shape, dtype=int)
        for j, b in enumerate(breakpoints):
            for k in range(len(pts)):
                hit = np.flatnonzero(np.isclose(b, pts[k, j], rtol=1e-12, atol=0.0))
                if hit.size == 0:
                    raise InputError(f"{path}: point {k} ({point_text(names, pts[k])}) is not "
                                     f"on the stored breakpoints of {names[j]}; fix the file's "
                                     "breakpoints or drop them")
                grid_index[k, j] = int(hit[0])
        present = {tuple(r) for r in grid_index.tolist()}
        full = RectangularGrid(breakpoints, None, spec.variables)
        holes = tuple(f"grid point {point_text(names, full.points[i])} skipped (not in the "
                      f"file)" for i, idx in enumerate(full.grid_index.tolist())
                      if tuple(idx) not in present)
    return ops, pts, breakpoints, grid_index, holes


# --------------------------------------------------------------------------- chunked evaluation
def design_points(spec: DesignSpec) -> tuple[np.ndarray, tuple | None, np.ndarray | None,
                                             tuple[str, ...]]:
    """The design points of a model source, without evaluating the model.

    Returns ``(points (N, d), breakpoints or None, grid_index or None, holes report)``:
    the [grid] breakpoints minus the holes (last variable fastest), or the scattered
    ``points``.
    """
    if spec.grid.points is not None:
        return ScatteredPoints(spec.grid.points, spec.variables).points, None, None, ()
    if spec.grid.breakpoints is not None:
        grid = RectangularGrid(spec.grid.breakpoints, spec.grid.holes, spec.variables)
        return grid.points, grid.breakpoints, grid.grid_index, grid.report()
    raise InputError(f"{spec.name}: [grid] gives no design points; add breakpoints per "
                     "variable or points = [[...]]")


_MODELS: dict = {}  # per process: the loaded model of each source (workers reuse it)


def _model_key(spec: DesignSpec) -> tuple:
    src = spec.source
    stamp = None
    if src.model_file is not None:
        try:
            stamp = Path(src.model_file).stat().st_mtime_ns
        except OSError:
            stamp = None
    return (src.model, str(src.model_file), src.function, stamp, spec.variable_names)


def evaluate_points(spec: DesignSpec, points: np.ndarray
                    ) -> tuple[list[LinearPlant | None], list[str]]:
    """The design's model at each row of ``points`` (a chunk of the envelope).

    The model is loaded once per process (:func:`load_model`), so worker processes
    that evaluate many chunks import it once. A point where the model fails gets
    ``None`` and a one-line reason (:func:`evaluate_model`).
    """
    key = _model_key(spec)
    if key not in _MODELS:
        _MODELS.clear()
        _MODELS[key] = load_model(spec)
    model = _MODELS[key]
    names = spec.variable_names
    plants, reasons = [], []
    for row in np.asarray(points, dtype=float):
        plant, reason = evaluate_model(model, dict(zip(names, row.tolist(), strict=True)))
        plants.append(plant)
        reasons.append(reason)
    return plants, reasons


def model_source_digest(spec: DesignSpec) -> str:
    """SHA-256 of the file the design's plants come from (the model's Python file, the
    module's source file or the operating-point file); '' when it cannot be read.

    A partial design run is resumed only when this is unchanged, so an edited model
    never mixes with plants computed by the old one. Finding a module's file may import
    its parent package (never the module itself).
    """
    import hashlib

    src = spec.source
    path = None
    if src.operating_points is not None:
        path = Path(src.operating_points)
    elif src.model_file is not None:
        path = Path(src.model_file)
    elif src.model is not None:
        try:
            found = importlib.util.find_spec(src.model.partition(":")[0])
            path = Path(found.origin) if found is not None and found.origin else None
        except (ImportError, ValueError):
            path = None
    if path is None:
        return ""
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return ""
