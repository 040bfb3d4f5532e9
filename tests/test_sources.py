"""Tests of schedule/sources.py.

Outside reference: a mass-spring-damper m x'' + c x' + k x = F + d whose
linear model A = [[0, 1], [-k/m, -c/m]], B = [[0, 0], [1/m, 1/m]] is textbook
(e.g. Ogata, Modern Control Engineering, 5th ed., section 2.4); the plant
returned through the sources must equal it at every point. The rest checks
the error contract (one-line InputError naming the thing and the fix).
"""

from __future__ import annotations

import textwrap

import numpy as np
import pytest

from schedule.design_file import parse_design
from schedule.errors import InputError
from schedule.oppoints import OperatingPoints, write_operating_points
from schedule.sources import (
    evaluate_model,
    load_model,
    load_nonlinear_model,
    operating_points_for,
)
from schedule.types import LinearPlant, SchedulingVariable

MODEL = textwrap.dedent('''
    import numpy as np
    from schedule.types import LinearPlant

    def msd(p):
        m, k, c = p["mass"], p["stiffness"], 0.4
        if m > 9.5:
            raise RuntimeError("no trim above 9.5 kg")
        A = np.array([[0.0, 1.0], [-k / m, -c / m]])
        B = np.array([[0.0, 0.0], [1.0 / m, 1.0 / m]])
        C = np.array([[1.0, 0.0], [0.0, 1.0]])
        return LinearPlant(A, B, C, np.zeros((2, 2)), ("pos", "vel"), ("force", "dist"),
                           ("position", "velocity"))

    def as_tuple(p):
        return (np.array([[-p["mass"]]]), np.array([[1.0]]), np.array([[1.0]]),
                np.array([[0.0]]))

    def nan_model(p):
        return (np.array([[np.nan]]), np.array([[1.0]]), np.array([[1.0]]), np.array([[0.0]]))

    def bad_shape(p):
        return (np.eye(2), np.ones((3, 1)), np.ones((1, 2)), np.zeros((1, 1)))

    def grows(p):
        n = 1 if p["mass"] < 5 else 2
        return (-np.eye(n), np.ones((n, 1)), np.ones((1, n)), np.zeros((1, 1)))

    class Sim:
        pass

    def factory():
        return Sim()
''')

DESIGN = """
[[variable]]
name = "mass"
unit = "kg"
lower = 1.0
upper = 10.0
[[variable]]
name = "stiffness"
unit = "N/m"
lower = 1.0
upper = 4.0
[source]
{source}
[grid]
{grid}
[channels]
controls = ["force"]
disturbances = ["dist"]
measured = ["position"]
performance = ["position"]
[[weights.performance]]
output = "position"
gain = 1.0
[[weights.effort]]
input = "force"
gain = 0.1
[[weights.noise]]
output = "position"
gain = 0.01
[[weights.disturbance]]
input = "dist"
gain = 1.0
"""

GRID = 'mass = [1.0, 5.0, 10.0]\nstiffness = [1.0, 4.0]\nholes = [[1.0, 4.0]]'


@pytest.fixture()
def folder(tmp_path):
    (tmp_path / "usermodel.py").write_text(MODEL)
    return tmp_path


def design(folder, source='model_file = "usermodel.py"\nfunction = "msd"', grid=GRID):
    return parse_design(DESIGN.format(source=source, grid=grid), folder, name="d.toml")


def test_model_file_plant_is_the_textbook_model(folder):
    model = load_model(design(folder))
    for m, k in ((1.0, 1.0), (2.5, 3.0)):
        p = model({"mass": m, "stiffness": k})
        np.testing.assert_allclose(p.A, [[0.0, 1.0], [-k / m, -0.4 / m]], rtol=1e-15)
        np.testing.assert_allclose(p.B, [[0.0, 0.0], [1 / m, 1 / m]], rtol=1e-15)
        assert p.input_names == ("force", "dist")
    # a sequence in the order of the design's variables works too
    np.testing.assert_allclose(model([2.0, 3.0]).A[1, 0], -1.5)


def test_module_function_and_tuple_wrapping(folder, monkeypatch):
    monkeypatch.syspath_prepend(str(folder))
    model = load_model(design(folder, 'model = "usermodel:as_tuple"'))
    p = model({"mass": 2.0, "stiffness": 1.0})
    assert isinstance(p, LinearPlant)
    assert (p.state_names, p.input_names, p.output_names) == (("x1",), ("u1",), ("y1",))


@pytest.mark.parametrize("source, needle", [
    ('model = "no_such_module_xyz:f"', "module 'no_such_module_xyz' cannot be imported"),
    ('model = "usermodel:missing"', "module 'usermodel' has no 'missing'"),
    ('model_file = "nope.py"\nfunction = "msd"', "does not exist"),
    ('model_file = "usermodel.py"\nfunction = "other"', "defines no function 'other'"),
])
def test_load_errors(folder, monkeypatch, source, needle):
    monkeypatch.syspath_prepend(str(folder))
    with pytest.raises(InputError) as info:
        load_model(design(folder, source))
    assert needle in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize("function, needle", [
    ("msd", "the model raised RuntimeError: no trim above 9.5 kg"),
    ("nan_model", "NaN or inf in A"),
    ("bad_shape", "inconsistent shapes"),
])
def test_evaluate_model_reasons(folder, function, needle):
    model = load_model(design(folder, f'model_file = "usermodel.py"\nfunction = "{function}"'))
    plant, reason = evaluate_model(model, {"mass": 10.0, "stiffness": 1.0})
    assert plant is None and needle in reason and "\n" not in reason


def test_operating_points_from_model_grid(folder):
    ops = operating_points_for(design(folder))
    points, plants, breakpoints, grid_index, holes = ops
    np.testing.assert_array_equal(points, [[1, 1], [5, 1], [5, 4], [10, 1], [10, 4]])
    np.testing.assert_array_equal(grid_index, [[0, 0], [1, 0], [1, 1], [2, 0], [2, 1]])
    assert holes == ("grid point mass=1, stiffness=4 skipped (hole)",)
    # the model fails above 9.5 kg: reported per point, the run continues
    assert [p is None for p in plants] == [False, False, False, True, True]
    assert ops.reasons[3].startswith("the model raised RuntimeError")
    assert ops.reasons[0] == "" and list(ops.ok) == [True, True, True, False, False]


def test_operating_points_scattered_and_inconsistent(folder):
    ops = operating_points_for(design(folder, grid="points = [[2.0, 1.0], [3.0, 2.0]]"))
    assert ops.breakpoints is None and ops.grid_index is None and len(ops.plants) == 2
    with pytest.raises(InputError, match=r"point 1 \(mass=6, stiffness=1\) has \(states, "
                                         r"inputs, outputs\) = \(2, 1, 1\) but point 0"):
        operating_points_for(design(folder, 'model_file = "usermodel.py"\nfunction = "grows"',
                                    grid="points = [[2.0, 1.0], [6.0, 1.0]]"))


def write_envelope(path, names=("mass", "stiffness"), drop_last=True):
    bps = (np.array([1.0, 5.0]), np.array([1.0, 4.0]))
    vals = np.array([[1.0, 1.0], [1.0, 4.0], [5.0, 1.0], [5.0, 4.0]])
    if drop_last:
        vals = vals[:3]
    N = len(vals)
    A = np.stack([[[0.0, 1.0], [-k / m, -0.4 / m]] for m, k in vals])
    B = np.stack([[[0.0, 0.0], [1 / m, 1 / m]] for m, _ in vals])
    C = np.tile(np.eye(2), (N, 1, 1))
    D = np.zeros((N, 2, 2))
    variables = (SchedulingVariable(names[0], "kg", 1.0, 10.0),
                 SchedulingVariable(names[1], "N/m", 1.0, 4.0))
    write_operating_points(path, OperatingPoints(
        variables, vals, A, B, C, D, ("pos", "vel"), ("force", "dist"),
        ("position", "velocity"), breakpoints=bps))


def test_operating_points_from_file(folder):
    write_envelope(folder / "env.h5")
    spec = parse_design(DESIGN.format(source='operating_points = "env.h5"', grid="")
                        .replace("[grid]\n", ""), folder)
    ops = operating_points_for(spec)
    assert ops.source == "file" and len(ops.plants) == 3
    np.testing.assert_array_equal(ops.grid_index, [[0, 0], [0, 1], [1, 0]])
    assert ops.holes_report == ("grid point mass=5, stiffness=4 skipped (not in the file)",)
    np.testing.assert_allclose(ops.plants[2].A, [[0, 1], [-1 / 5, -0.4 / 5]])


def test_file_variables_must_match(folder):
    write_envelope(folder / "env.h5", names=("stiffness", "mass"))
    spec = parse_design(DESIGN.format(source='operating_points = "env.h5"', grid="")
                        .replace("[grid]\n", ""), folder, name="d.toml")
    with pytest.raises(InputError, match=r"has scheduling variables \['stiffness', 'mass'\] "
                                         r"but the design d.toml has \['mass', 'stiffness'\]"):
        operating_points_for(spec)
    missing = parse_design(DESIGN.format(source='operating_points = "gone.h5"', grid="")
                           .replace("[grid]\n", ""), folder)
    with pytest.raises(InputError, match="does not exist"):
        operating_points_for(missing)


def test_nonlinear_model(folder, monkeypatch):
    monkeypatch.syspath_prepend(str(folder))
    spec = design(folder, 'model_file = "usermodel.py"\nfunction = "msd"\n'
                          'nonlinear_model = "usermodel:factory"')
    assert type(load_nonlinear_model(spec)).__name__ == "Sim"
    with pytest.raises(InputError, match="has no nonlinear model"):
        load_nonlinear_model(design(folder))


def test_nonlinear_model_file_beside_the_design(folder):
    """``nonlinear_model_file`` is a path relative to the design file (schema, like
    ``model_file``); it names the model itself or a factory with no arguments."""
    sub = folder / "models"
    sub.mkdir()
    (sub / "plantmodel.py").write_text(textwrap.dedent('''
        import numpy as np
        from schedule.linearize import NonlinearModel

        MODEL = NonlinearModel(("x",), ("u",), ("y",), lambda x, u, p: -x + u,
                               lambda x, u, p: x, description="first order")

        def make():
            return MODEL
    '''))
    for name in ("MODEL", "make"):
        spec = design(folder, 'model_file = "usermodel.py"\nfunction = "msd"\n'
                              'nonlinear_model_file = "models/plantmodel.py"\n'
                              f'nonlinear_function = "{name}"')
        assert load_nonlinear_model(spec).description == "first order"
    with pytest.raises(InputError, match="nonlinear_function: missing"):
        design(folder, 'model_file = "usermodel.py"\nfunction = "msd"\n'
                       'nonlinear_model_file = "models/plantmodel.py"')
    gone = design(folder, 'model_file = "usermodel.py"\nfunction = "msd"\n'
                          'nonlinear_model_file = "plantmodel.py"\nnonlinear_function = "make"')
    with pytest.raises(InputError, match="nonlinear_model_file .*plantmodel.py does not exist"):
        load_nonlinear_model(gone)
