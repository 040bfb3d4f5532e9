"""Tables read back from the generated C source and from an FMU, without running code.

Reference: the in-memory table itself, bit for bit (the C arrays hold each double in the
shortest text that reads back to the same value, Python's repr, IEEE 754 round trip), and
the names byte for byte through C's octal escapes (C99 6.4.4.4); damaged text gets a
one-line error.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from test_export_fixtures import make_family

from schedule.errors import InputError
from schedule.export import build_table, read_table, write_fmu, write_table
from schedule.export.c_reader import table_from_c_text
from schedule.export.c_source import c_source_text
from schedule.types import SchedulingVariable


@pytest.fixture(scope="module")
def table():
    fam = make_family(with_plant=True)
    fam = dataclasses.replace(
        fam, measured_names=("position \u00b5m", 'quote"back\\slash'),
        control_names=("force */ ??/",),
        variables=(SchedulingVariable("rope_length", "m", 3.0, 30.0),
                   SchedulingVariable("payload_mass", "kg", 2000.0, 20000.0)),
        units={"measured": ("\u00b5m", "rad"), "controls": ("kN",)})
    return build_table(fam, sample_time=0.013, method="zoh",
                       limits={"force */ ??/": (-1.5, 2.5, 40.0)})


def _same(a, b):
    for k in "ABCDH":
        np.testing.assert_array_equal(getattr(a, k), getattr(b, k))
    assert [x.tolist() for x in a.breakpoints] == [x.tolist() for x in b.breakpoints]
    assert a.measured_names == b.measured_names and a.control_names == b.control_names
    assert a.measured_units == b.measured_units and a.control_units == b.control_units
    assert [v.name for v in a.variables] == [v.name for v in b.variables]
    assert (a.sample_time, a.method) == (b.sample_time, b.method)
    np.testing.assert_array_equal(a.actuator_limits.upper, b.actuator_limits.upper)
    np.testing.assert_array_equal(a.actuator_limits.rate, b.actuator_limits.rate)


def test_c_source_and_fmu_read_back_exactly(table, tmp_path):
    write_table(table, "c", tmp_path / "c", prefix="ctl")
    for path in (tmp_path / "c", tmp_path / "c" / "ctl_table.c", tmp_path / "c" / "ctl_table.h"):
        _same(table, read_table(path))
    fmu = write_fmu(tmp_path / "unit.fmu", table, binary=False).path
    _same(table, read_table(fmu))


@pytest.mark.parametrize("edit, match", [
    (lambda h, c: (h, c.replace("static const double ctl_tab_B", "static double ctl_tab_B")),
     "no array ctl_tab_B"),
    (lambda h, c: (h, c.replace("ctl_bp0[3] = {\n    3.0", "ctl_bp0[3] = {\n    three")),
     "not a number"),
    (lambda h, c: (h.replace("#define CTL_N_STATES 3", "#define CTL_N_STATES 4"), c),
     "holds"),
    (lambda h, c: ("/* other */\n" + h, c), "not a scheduled table"),
])
def test_damaged_c_text_is_one_line(table, edit, match):
    header, source = c_source_text(table, "ctl")
    h, c = edit(header, source)
    with pytest.raises(InputError, match=match) as info:
        table_from_c_text(h, c, "t.c")
    assert "\n" not in str(info.value)


def test_a_file_that_is_no_fmu_is_refused(tmp_path):
    bad = tmp_path / "x.fmu"
    bad.write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(InputError, match="not a readable FMU"):
        read_table(bad)
