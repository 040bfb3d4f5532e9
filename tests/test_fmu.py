"""The FMI 2.0 co-simulation unit against an independent importer, fmpy.

References: fmpy (general-purpose open-source FMI importer) validates the unit
(schema, variable names, causality/variability/initial combinations, units, model
structure) and co-simulates it; its outputs must match the Python runtime to 1e-9 on
random trajectories whose scheduling values leave the table's range and whose commands
saturate. The vendored FMI headers must be byte-identical to the copies fmpy ships.
The binary is built once per module with -std=c99 -Wall -Wextra -Werror -pedantic.
"""

from __future__ import annotations

import shutil
import zipfile
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from test_export_fixtures import make_family

from schedule.cli.main import main
from schedule.errors import InputError
from schedule.export import TableController, build_table
from schedule.export import fmu as fmu_mod
from schedule.store import write_family

fmpy = pytest.importorskip("fmpy")
from fmpy import simulate_fmu  # noqa: E402
from fmpy.validation import validate_fmu  # noqa: E402

CC = fmu_mod.find_compiler()
LIMITS = {"act0": (-0.4, 0.3, 5.0)}


def _table(**kw):
    fam = make_family(n=4, ny=2, nu=1, with_plant=True)
    return build_table(fam, sample_time=0.05, method="tustin", limits=LIMITS, **kw)


@pytest.fixture(scope="module")
def unit(tmp_path_factory):
    tab = _table()
    path = tmp_path_factory.mktemp("fmu") / "ctrl_unit.fmu"
    outcome = fmu_mod.write_fmu(path, tab, extra_flags=("-Werror",))
    return tab, outcome


def test_vendored_headers_equal_fmpys():
    theirs = Path(fmpy.__file__).parent / "c-code"
    for name in fmu_mod.FMI_HEADERS:
        assert (fmu_mod.fmi2_header_dir() / name).read_bytes() == (theirs / name).read_bytes()
    assert "BSD" in (fmu_mod.fmi2_header_dir() / "LICENSE.txt").read_text()


def test_layout_and_validation(unit):
    tab, outcome = unit
    assert validate_fmu(str(outcome.path)) == []
    with zipfile.ZipFile(outcome.path) as zf:
        names = set(zf.namelist())
    assert {"modelDescription.xml", "sources/ctrl_unit_table.c", "sources/ctrl_unit_table.h",
            "sources/ctrl_unit_fmi2.c"} <= names
    if CC is not None:
        assert outcome.platform is not None
        assert f"binaries/{outcome.platform}/ctrl_unit.so" in names
    md = fmpy.read_model_description(str(outcome.path))
    by = {v.name: v for v in md.modelVariables}
    assert [v.name for v in md.modelVariables if v.causality == "input"] == \
        ["meas0", "meas1", "rope_length", "payload_mass"]
    assert [v.name for v in md.modelVariables if v.causality == "output"] == ["act0"]
    assert by["rope_length"].unit == "m" and by["payload_mass"].unit == "kg"
    assert float(by["sample_time"].start) == 0.05 and by["sample_time"].unit == "s"
    assert float(by["act0.lower"].start) == -0.4 and float(by["act0.rate"].start) == 5.0
    assert md.coSimulation.modelIdentifier == "ctrl_unit"


def _signals(tab, K, seed):
    rng = np.random.default_rng(seed)
    T = tab.sample_time
    t = np.arange(K) * T
    y = rng.standard_normal((K, tab.n_inputs)) * 2.0
    lo = np.array([b[0] for b in tab.breakpoints])
    hi = np.array([b[-1] for b in tab.breakpoints])
    p = rng.uniform(lo - 0.3 * (hi - lo), hi + 0.3 * (hi - lo), (K, len(lo)))
    names = list(tab.measured_names) + [v.name for v in tab.variables]
    dtype = [("time", float)] + [(n, float) for n in names]
    sig = np.array([tuple(r) for r in np.column_stack([t, y, p])], dtype=dtype)
    return sig, y, p


@pytest.mark.skipif(CC is None, reason="no C compiler")
@pytest.mark.parametrize("anti_windup", [True, False])
def test_cosimulation_matches_python_runtime(unit, anti_windup):
    tab, outcome = unit
    K = 400
    sig, y, p = _signals(tab, K, seed=3 + anti_windup)
    res = simulate_fmu(str(outcome.path), start_time=0.0, stop_time=(K - 1) * tab.sample_time,
                       output_interval=tab.sample_time, input=sig, output=["act0"],
                       start_values={"anti_windup": anti_windup})
    ctl = TableController(tab, anti_windup=anti_windup)
    u = np.array([ctl.step(y[k], p[k])[0] for k in range(K)])
    # the command computed from the inputs at t_k is the output from t_{k+1} on
    np.testing.assert_allclose(res["act0"][1:], u[:-1], rtol=1e-9, atol=1e-12)
    assert res["act0"][0] == 0.0
    assert np.mean((u <= -0.4 + 1e-12) | (u >= 0.3 - 1e-12)) > 0.2  # commands saturate
    assert np.mean(np.abs(np.diff(u)) >= 5.0 * tab.sample_time - 1e-12) > 0.05  # rate acts


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_bumpless_start_and_tuned_limits(unit):
    tab, outcome = unit
    K = 40
    sig, y, p = _signals(tab, K, seed=9)
    sig["meas0"][:], sig["meas1"][:] = 0.2, -0.1
    sig["rope_length"][:], sig["payload_mass"][:] = 12.0, 9000.0
    res = simulate_fmu(str(outcome.path), start_time=0.0, stop_time=(K - 1) * tab.sample_time,
                       output_interval=tab.sample_time, input=sig, output=["act0"],
                       start_values={"bumpless_start": True, "act0.start": 0.1,
                                     "act0.upper": 0.5})
    ctl = TableController(tab)
    ctl.limits.upper[0] = 0.5
    ctl.reset_steady([0.2, -0.1], [0.1], {"rope_length": 12.0, "payload_mass": 9000.0})
    u = np.array([ctl.step([0.2, -0.1], [12.0, 9000.0])[0] for _ in range(K)])
    np.testing.assert_allclose(res["act0"][1:], u[:-1], rtol=1e-9, atol=1e-12)
    assert abs(res["act0"][1] - 0.1) < 1e-9  # switched in without a jump


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_non_finite_input_is_refused_and_the_state_kept(unit, tmp_path):
    # Driven step by step through fmpy's FMU2Slave: a NaN measurement or scheduling value
    # makes fmi2DoStep fail (fmi2Error) without touching the state, exactly as the Python
    # runtime raises and keeps its state; afterwards both go on identically.
    from fmpy import extract, read_model_description
    from fmpy.fmi2 import FMU2Slave
    tab, outcome = unit
    md = read_model_description(str(outcome.path))
    slave = FMU2Slave(guid=md.guid, unzipDirectory=extract(str(outcome.path), str(tmp_path)),
                      modelIdentifier="ctrl_unit", instanceName="nan")
    slave.instantiate()
    slave.setupExperiment(startTime=0.0)
    slave.enterInitializationMode()
    slave.exitInitializationMode()
    ctl = TableController(tab)
    rng = np.random.default_rng(8)
    T, t = tab.sample_time, 0.0
    for k in range(30):
        y, p = rng.standard_normal(2), [12.0, 9000.0]
        if k in (10, 20):
            bad_y, bad_p = ([np.nan, 0.0], p) if k == 10 else (y, [12.0, np.inf])
            slave.setReal([0, 1, 2, 3], [*bad_y, *bad_p])
            with pytest.raises(Exception, match="status 3"):
                slave.doStep(t, T)
            with pytest.raises(InputError, match="unchanged"):
                ctl.step(bad_y, bad_p)
        slave.setReal([0, 1, 2, 3], [*y, *p])
        slave.doStep(t, T)
        t += T
        np.testing.assert_allclose(slave.getReal([4]), ctl.step(y, p), rtol=1e-12, atol=1e-14)
    slave.terminate()
    slave.freeInstance()


def test_source_only_unit_without_compiler(tmp_path, monkeypatch):
    monkeypatch.setattr(fmu_mod, "find_compiler", lambda: None)
    out = fmu_mod.write_fmu(tmp_path / "src_only.fmu", _table())
    assert out.platform is None and "no C compiler" in out.note
    assert validate_fmu(str(out.path)) == []
    with zipfile.ZipFile(out.path) as zf:
        assert not any(n.startswith("binaries/") for n in zf.namelist())


def test_bad_names_and_tables(tmp_path):
    with pytest.raises(InputError, match="C identifier"):
        fmu_mod.write_fmu(tmp_path / "my-unit.fmu", _table())
    with pytest.raises(InputError, match=r"\.fmu"):
        fmu_mod.write_fmu(tmp_path / "unit.zip", _table())
    with pytest.raises(InputError, match="discrete"):
        fmu_mod.write_fmu(tmp_path / "unit.fmu",
                          build_table(make_family(with_plant=True), limits=LIMITS))
    import dataclasses
    bad = dataclasses.replace(_table(), measured_names=("a\nb", "c"))
    with pytest.raises(InputError, match="control character"):
        fmu_mod.write_fmu(tmp_path / "unit.fmu", bad)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.skipif(shutil.which("cc") is None, reason="no C compiler")
def test_export_command_writes_a_valid_unit(tmp_path):
    family = tmp_path / "family.h5"
    write_family(family, make_family(with_plant=True))
    out = tmp_path / "crane_ctrl.fmu"
    res = CliRunner().invoke(main, ["export", str(family), "-f", "fmu", "-o", str(out),
                                    "--sample-time", "0.02", "--no-table-check"])
    assert res.exit_code == 0, res.output
    assert "FMU binary for" in res.output
    assert validate_fmu(str(out)) == []
    res = CliRunner().invoke(main, ["export", str(family), "-f", "fmu", "-o",
                                    str(tmp_path / "bad-name.fmu"), "--sample-time", "0.02"])
    assert res.exit_code == 2 and "C identifier" in res.output


def test_rate_limit_units_read_as_a_rate():
    """The rate limit of a command in m/s is in (m/s)/s, of one in rad in rad/s (SI
    derived units: a rate is the unit divided by the second; a unit with a slash is
    bracketed so that the result cannot be read as m/(s/s))."""
    import dataclasses

    tab = _table()
    for unit, expected in (("m/s", "(m/s)/s"), ("rad", "rad/s"), ("", "")):
        t = dataclasses.replace(tab, control_units=(unit,))
        by = {v.name: v for v in fmu_mod.fmu_variables(t)}
        assert by["act0.rate"].unit == expected
        assert by["act0.upper"].unit == unit
