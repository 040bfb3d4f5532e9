"""Tests of schedule/design_file.py against the agreed design-file schema.

Reference for every expectation below: the design-file schema agreed by the
team (docs/design-file.md; key names, defaults, allowed values) and the TOML
1.0 specification (https://toml.io/en/v1.0.0) for what parses.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from schedule.design_file import (
    ScheduledNumber,
    load_design,
    parse_design,
    validate_against_plant,
)
from schedule.errors import InputError, ScheduleError
from schedule.types import LinearPlant

VALID = """
title = "toy"

[[variable]]
name = "speed"
unit = "m/s"
lower = 1.0
upper = 10.0

[[variable]]
name = "load"
unit = "kg"
lower = 0.0
upper = 5.0

[source]
model = "mypkg.mymod:plant_at"
validation = "extra.h5"

[grid]
speed = [1.0, 5.0, 10.0]
load = [0.0, 5.0]
holes = [[1.0, 5.0]]

[channels]
controls = ["u"]
disturbances = ["d"]
measured = ["y"]
performance = ["y"]

[[weights.performance]]
output = "y"
peak_sensitivity = 2.0
bandwidth = { over = ["speed"], breakpoints = [[1.0, 10.0]], values = [0.5, 2.0] }
low_frequency_error = 0.01

[[weights.effort]]
input = "u"
gain = 0.1

[[weights.noise]]
output = "y"
gain = 0.01

[[weights.disturbance]]
input = "d"
gain = 1.0
"""


def parse(text: str, base: str | Path = "/tmp") -> object:
    return parse_design(text, base, name="spec.toml")


def error_of(text: str) -> str:
    with pytest.raises(InputError) as info:
        parse(text)
    msg = str(info.value)
    assert "\n" not in msg, "errors must be one line"
    assert msg.startswith("spec.toml"), "errors must name the file"
    assert isinstance(info.value, ScheduleError) and isinstance(info.value, ValueError)
    return msg


def test_valid_file_and_defaults():
    spec = parse(VALID, "/some/folder")
    assert spec.title == "toy"
    assert [v.name for v in spec.variables] == ["speed", "load"]
    assert spec.variables[0].unit == "m/s" and spec.variables[1].upper == 5.0
    assert spec.source.model == "mypkg.mymod:plant_at"
    # paths are relative to the design file's folder (schema)
    assert spec.source.validation == Path("/some/folder/extra.h5")
    assert spec.source.operating_points is None
    np.testing.assert_array_equal(spec.grid.breakpoints[0], [1.0, 5.0, 10.0])
    np.testing.assert_array_equal(spec.grid.holes, [[1.0, 5.0]])
    assert spec.channels.controls == ("u",)
    # schema defaults: gamma common with margin 0.05, auto interpolation,
    # check 64 Sobol samples seed 0, tolerance 0.02, 6 dB / 45 deg (common practice)
    assert (spec.gamma.policy, spec.gamma.margin, spec.gamma.value) == ("common", 0.05, None)
    assert (spec.interpolation.form, spec.interpolation.kind) == ("auto", "auto")
    c = spec.check
    assert (c.samples, c.sampler, c.seed, c.gamma_tolerance) == (64, "sobol", 0, 0.02)
    assert (c.gain_margin_db, c.phase_margin_deg) == (6.0, 45.0)
    assert spec.export.sample_time == 0.0 and spec.export.method == "tustin"
    assert spec.text == VALID


def test_scheduled_number_is_multilinear():
    spec = parse(VALID)
    wc = spec.weights.performance[0].bandwidth
    assert isinstance(wc, ScheduledNumber)
    # linear interpolation between (1, 0.5) and (10, 2.0): analytic
    for s in (1.0, 4.0, 7.3, 10.0):
        assert math.isclose(wc.at({"speed": s, "load": 1.0}), 0.5 + (s - 1.0) / 9.0 * 1.5)
    # held at the edge outside the table
    assert math.isclose(wc.at({"speed": 20.0, "load": 0.0}), 2.0)


def test_two_dimensional_scheduled_number_bilinear():
    text = VALID.replace(
        'bandwidth = { over = ["speed"], breakpoints = [[1.0, 10.0]], values = [0.5, 2.0] }',
        'bandwidth = { over = ["speed", "load"], breakpoints = [[1.0, 10.0], [0.0, 5.0]], '
        'values = [[1.0, 2.0], [3.0, 5.0]] }')
    wc = parse(text).weights.performance[0].bandwidth
    # bilinear at the cell centre = mean of the four corners (analytic)
    assert math.isclose(wc.at({"speed": 5.5, "load": 2.5}), (1 + 2 + 3 + 5) / 4)


def test_load_design_from_file(tmp_path):
    p = tmp_path / "d.toml"
    p.write_text(VALID.replace('validation = "extra.h5"', 'validation = "sub/extra.h5"'))
    spec = load_design(p)
    assert spec.source.validation == (tmp_path / "sub" / "extra.h5").resolve()
    assert spec.base_dir == tmp_path.resolve()
    # the text is kept and re-parses to the same result with the stored base folder
    again = parse_design(spec.text, spec.base_dir)
    assert again.source.validation == spec.source.validation


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        load_design(tmp_path / "nope.toml")


def test_bad_toml_syntax():
    assert "not valid TOML" in error_of("title = \n")


@pytest.mark.parametrize("text, needle", [
    ("colour = 3\n" + VALID, "unknown key 'colour' in the top level"),
    (VALID.replace('unit = "m/s"', 'unit = "m/s"\nstep = 1'), "variable[0].step"),
    (VALID.replace("input = \"u\"\ngain = 0.1", "input = \"u\"\ngain = 0.1\nslope = 2"),
     "weights.effort[0].slope"),
    (VALID + "\n[check]\nsample = 3\n", "check.sample"),
], ids=["top", "variable", "weight", "check"])
def test_unknown_keys_named_with_allowed_list(text, needle):
    msg = error_of(text)
    assert needle in msg
    assert "allowed keys are" in msg


def test_unknown_key_lists_allowed_keys_of_the_table():
    msg = error_of(VALID + "\n[gamma]\npolicy = \"common\"\nmargn = 0.1\n")
    assert "gamma.margn" in msg and "policy, margin, value" in msg


@pytest.mark.parametrize("text, needle", [
    (VALID.replace("lower = 1.0", 'lower = "one"'), "variable[0].lower: expected a number"),
    (VALID.replace("lower = 1.0", "lower = true"), "variable[0].lower: expected a number"),
    (VALID.replace("gain = 0.1", 'gain = "big"'), "weights.effort[0].gain"),
    (VALID.replace('controls = ["u"]', 'controls = "u"'), "channels.controls"),
    (VALID + "\n[check]\nsamples = 2.5\n", "check.samples: expected an integer"),
    (VALID.replace('name = "speed"', "name = 3"), "variable[0].name: expected a string"),
], ids=["str", "bool", "gain", "list", "int", "name"])
def test_wrong_types(text, needle):
    assert needle in error_of(text)


@pytest.mark.parametrize("text, needle", [
    (VALID.replace("upper = 10.0", "upper = 1.0"), "lower = 1 is not below upper = 1"),
    (VALID.replace("upper = 10.0", "upper = nan"), "not finite"),
    (VALID.replace('name = "load"', 'name = "speed"'), "two variables are named 'speed'"),
    (VALID.replace("speed = [1.0, 5.0, 10.0]", "speed = [1.0, 10.0, 5.0]"),
     "grid.speed: breakpoints are not strictly increasing"),
    (VALID.replace("speed = [1.0, 5.0, 10.0]", "speed = [1.0, 5.0, 12.0]"),
     "outside the bounds"),
    (VALID.replace("holes = [[1.0, 5.0]]", "holes = [[2.0, 5.0]]"), "not a breakpoint"),
], ids=["bounds", "nan", "dup", "unsorted", "outside", "hole"])
def test_bounds_nan_duplicates_breakpoints(text, needle):
    assert needle in error_of(text)


def test_sources():
    no_source = VALID.replace('model = "mypkg.mymod:plant_at"\n', "")
    assert "no source of linearized plants" in error_of(no_source)
    two = VALID.replace('model = "mypkg.mymod:plant_at"',
                        'model = "a:b"\nmodel_file = "m.py"\nfunction = "f"')
    assert "both model and model_file" in error_of(two)
    nofunc = VALID.replace('model = "mypkg.mymod:plant_at"', 'model_file = "m.py"')
    assert "source.function" in error_of(nofunc)
    bad = VALID.replace('"mypkg.mymod:plant_at"', '"mypkg.mymod.plant_at"')
    assert "module:function" in error_of(bad)
    # a model source needs a grid
    nogrid = VALID.split("[grid]")[0] + "[channels]" + VALID.split("[channels]")[1]
    assert "grid: missing" in error_of(nogrid)
    # an operating-point file brings its own points; operating_points + model is allowed
    both = nogrid.replace('model = "mypkg', 'operating_points = "env.h5"\nmodel = "mypkg')
    spec = parse(both, "/x")
    assert spec.source.operating_points == Path("/x/env.h5")


def test_gamma_policy():
    assert "gamma.value: missing" in error_of(VALID + '\n[gamma]\npolicy = "fixed"\n')
    assert "must be >= 0" in error_of(VALID + "\n[gamma]\nmargin = -0.1\n")
    assert "must be > 0" in error_of(VALID + '\n[gamma]\npolicy = "fixed"\nvalue = 0.0\n')
    assert "'best' is not allowed" in error_of(VALID + '\n[gamma]\npolicy = "best"\n')
    spec = parse(VALID + '\n[gamma]\npolicy = "fixed"\nvalue = 3.0\n')
    assert spec.gamma.value == 3.0


@pytest.mark.parametrize("table, needle", [
    ('[interpolation]\nkind = "nearest"\n', "interpolation.kind"),
    ('[interpolation]\nform = "balanced"\n', "interpolation.form"),
    ('[check]\nsampler = "grid"\n', "check.sampler"),
    ('[export]\nmethod = "euler"\n', "export.method"),
    ('[export]\nformats = ["xml"]\n', "export.formats"),
])
def test_allowed_sets(table, needle):
    assert needle in error_of(VALID + "\n" + table)


def test_export_formats_are_the_exporters_formats():
    # The design file accepts every format `schedule export --format` writes (one list:
    # schedule.table_files.FORMATS); found on a new user's tour: "fmu" was refused here
    # while the command line took it.
    from schedule.table_files import FORMATS

    spec = parse(VALID + '\n[export]\nsample_time = 0.01\nformats = ["csv", "fmu"]\n')
    assert spec.export.formats == ("csv", "fmu")
    for fmt in ("csv", "json", "hdf5", "c", "fmu"):
        assert fmt in FORMATS
        parse(VALID + f'\n[export]\nsample_time = 0.01\nformats = ["{fmt}"]\n')


def test_weights_match_channels():
    unknown = VALID.replace('output = "y"\npeak_sensitivity', 'output = "z"\npeak_sensitivity')
    msg = error_of(unknown)
    assert "weights.performance[0].output" in msg and "'z'" in msg
    missing = VALID.replace('[[weights.noise]]\noutput = "y"\ngain = 0.01\n', "")
    msg = error_of(missing)
    assert "no weight for channels.measured 'y'" in msg and "[[weights.noise]]" in msg


def test_weight_forms_in_requirement_terms():
    """Each group takes its requirement form (schema), a static gain or a transfer function."""
    mixed = VALID.replace("input = \"u\"\ngain = 0.1", "input = \"u\"\ngain = 0.1\nlimit = 2.0")
    assert "given together with gain" in error_of(mixed)
    partial = VALID.replace("low_frequency_error = 0.01\n", "")
    assert "weights.performance[0].low_frequency_error: missing" in error_of(partial)
    # the weight must fall with frequency: A < M
    rising = VALID.replace("low_frequency_error = 0.01", "low_frequency_error = 3.0")
    assert "not below peak_sensitivity" in error_of(rising)
    # a requirement key of another group is an unknown key here
    assert "unknown key 'limit'" in error_of(VALID.replace("low_frequency_error = 0.01",
                                                           "low_frequency_error = 0.01\nlimit = 1"))
    effort = VALID.replace("input = \"u\"\ngain = 0.1", "input = \"u\"\nlimit = 20.0\n"
                           "bandwidth = 5.0\nhigh_frequency_limit = 0.5")
    w = parse(effort).weights.effort[0]
    assert (w.kind, w.limit, w.bandwidth, w.high_frequency_limit) == ("effort", 20.0, 5.0, 0.5)
    half = effort.replace("high_frequency_limit = 0.5\n", "")
    assert "weights.effort[0].high_frequency_limit: missing (given bandwidth)" in error_of(half)
    level = VALID.replace("output = \"y\"\ngain = 0.01", "output = \"y\"\nlevel = 0.01")
    assert parse(level).weights.noise[0].kind == "level"
    tf = VALID.replace("input = \"d\"\ngain = 1.0", "input = \"d\"\nzeros = [-3.0]\n"
                       "poles = [-10.0, [-1.0, 2.0]]\ngain = 4.0")
    w = parse(tf).weights.disturbance[0]
    assert w.kind == "transfer" and w.zeros == (-3.0,)
    assert w.poles == (-10.0, complex(-1.0, 2.0), complex(-1.0, -2.0))  # conjugate implied
    unstable = tf.replace("poles = [-10.0,", "poles = [10.0,")
    assert "weights.disturbance[0]: pole 10" in error_of(unstable)
    assert "weights.disturbance[0].gain: missing" in error_of(tf.replace("gain = 4.0\n", ""))


def test_channel_units():
    text = VALID.replace('performance = ["y"]\n', 'performance = ["y"]\n'
                         'units = { u = "kN", y = "m" }\n', 1)
    ch = parse(text).channels
    assert ch.unit_of("u") == "kN" and ch.unit_of("y") == "m" and ch.unit_of("d") == ""
    bad = VALID.replace('performance = ["y"]\n', 'performance = ["y"]\nunits = { q = "m" }\n', 1)
    assert "channels.units.q: 'q' is not a channel" in error_of(bad)
    # a plant that gives another unit for the same signal is refused (the matrices are
    # in the plant's units)
    plant = LinearPlant(np.array([[-1.0]]), np.array([[1.0, 1.0]]), np.array([[1.0]]),
                        np.zeros((1, 2)), ("x",), ("u", "d"), ("y",), ("m",), ("N", ""), ("m",))
    with pytest.raises(InputError, match=r'channels.units.u = "kN" but the model gives input '
                                         r"'u' in \"N\""):
        validate_against_plant(parse(text), plant)
    # the plant's unit fills in where the design gives none
    assert parse(VALID).channels.unit_of("u", plant, "input") == "N"


def test_missing_required_keys():
    no_weights = VALID.split("[[weights.performance]]")[0]
    assert "weights: missing required key" in error_of(no_weights)
    no_lower = VALID.replace("lower = 1.0\n", "", 1)
    assert "variable[0].lower: missing required key" in error_of(no_lower)


def test_validate_against_plant_names_unknown_channel():
    spec = parse(VALID)
    plant = LinearPlant(np.array([[-1.0]]), np.array([[1.0, 1.0]]), np.array([[1.0]]),
                        np.zeros((1, 2)), ("x",), ("force", "d"), ("y",))
    with pytest.raises(InputError) as info:
        validate_against_plant(spec, plant)
    msg = str(info.value)
    assert "'u' is not a plant input" in msg and "force, d" in msg and "\n" not in msg
    good = LinearPlant(plant.A, plant.B, plant.C, plant.D, ("x",), ("u", "d"), ("y",))
    validate_against_plant(spec, good)


def test_bundled_demo_design_parses():
    # the demo design shipped with the package must follow the schema
    from importlib import resources

    try:
        ref = resources.files("schedule.demo_crane") / "crane_design.toml"
    except ModuleNotFoundError:
        pytest.skip("demo package not installed")
    if not ref.is_file():
        pytest.skip("demo design file not written yet")
    spec = load_design(Path(str(ref)))
    assert len(spec.variables) >= 1 and spec.channels.controls
