"""Round trips of the CSV / JSON / HDF5 tables and the generated C99 source.

The C check compiles the generated source with the system C compiler
(``cc -std=c99 -O2 -Wall -Wextra -Werror -shared -fPIC``), loads it with ctypes and
steps it against the Python runtime on random scheduling trajectories.
"""

from __future__ import annotations

import csv
import ctypes
import json
import os
import shutil
import subprocess

import numpy as np
import pytest
from test_export_fixtures import make_family

from schedule.errors import InputError
from schedule.export import (
    TableController,
    build_table,
    c_source_text,
    read_table,
    write_table,
)

CC = shutil.which("cc") or shutil.which("gcc")


def _table(**kw):
    fam_kw = {k: kw.pop(k) for k in ("breakpoints", "n", "ny", "nu", "with_plant") if k in kw}
    return build_table(make_family(**fam_kw), sample_time=kw.pop("sample_time", 0.05),
                       method=kw.pop("method", "tustin"), source_sha256="ab" * 32, **kw)


@pytest.mark.parametrize("fmt,name", [("csv", "t.csv"), ("json", "t.json"), ("hdf5", "t.h5")])
@pytest.mark.parametrize("limited", [False, True])
def test_round_trip_is_exact(tmp_path, fmt, name, limited):
    tab = _table(with_plant=True, limits={"act0": (-0.3, 0.5, 2.0)}) if limited else _table()
    assert (tab.H is not None) == limited
    out = tmp_path / name
    write_table(tab, fmt, out)
    back = read_table(out)
    for k in "ABCDH" if limited else "ABCD":
        np.testing.assert_array_equal(getattr(back, k), getattr(tab, k))
    if limited:
        for k in ("lower", "upper", "rate"):
            np.testing.assert_array_equal(getattr(back.limits, k), getattr(tab.limits, k))
        assert back.metadata()["limits"] == [{"name": "act0", "lower": -0.3, "upper": 0.5,
                                              "rate": 2.0}]
    for b1, b2 in zip(back.breakpoints, tab.breakpoints, strict=True):
        np.testing.assert_array_equal(b1, b2)
    np.testing.assert_array_equal(back.inside, tab.inside)
    assert back.metadata() == tab.metadata()
    # the runtime from the file steps exactly like the in-memory one
    rng = np.random.default_rng(0)
    c1, c2 = TableController(tab), TableController(out)
    for _ in range(30):
        y = rng.standard_normal(tab.n_inputs)
        p = [rng.uniform(0, 40), rng.uniform(0, 30000)]
        np.testing.assert_array_equal(c1.step(y, p), c2.step(y, p))


def test_csv_layout_and_metadata(tmp_path):
    tab = _table()
    out = tmp_path / "t.csv"
    write_table(tab, "csv", out)
    lines = out.read_text().splitlines()
    meta = json.loads(lines[0][1:])
    assert meta["method"] == "tustin" and meta["sample_time"] == 0.05
    assert meta["source_sha256"] == "ab" * 32
    assert [v["unit"] for v in meta["variables"]] == ["m", "kg"]
    header = next(csv.reader([lines[1]]))  # "A[0,1]" is quoted as CSV requires
    assert header[:3] == ["rope_length", "payload_mass", "inside"]
    assert header[3] == "A[0,0]" and header[4] == "A[0,1]" and header[-1] == "D[0,1]"
    assert len(lines) == 2 + 6  # one row per node


def test_unknown_format_and_bad_files(tmp_path):
    tab = _table()
    with pytest.raises(InputError, match="unknown table format"):
        write_table(tab, "xml", tmp_path / "t.xml")
    junk = tmp_path / "junk.csv"
    junk.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match="metadata"):
        read_table(junk)
    with pytest.raises(InputError, match="does not exist"):
        read_table(tmp_path / "missing.json")


def test_unwritable_path_leaves_nothing(tmp_path):
    tab = _table()
    with pytest.raises(InputError, match="does not exist"):
        write_table(tab, "json", tmp_path / "nofolder" / "t.json")
    if os.geteuid() != 0:  # root can write anywhere
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        with pytest.raises(InputError, match="not writable"):
            write_table(tab, "csv", ro / "t.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == (["ro"] if os.geteuid() else [])


def test_failed_write_leaves_no_partial_file(tmp_path, monkeypatch):
    # Simulate a crash in the middle of writing: the target must not appear.
    from schedule.export import json_table
    tab = _table()
    monkeypatch.setattr(json_table, "json_text", lambda table: "{\"half\": ")
    monkeypatch.setattr("schedule.atomic.os.replace",
                        lambda *a: (_ for _ in ()).throw(OSError(28, "No space left")))
    with pytest.raises(InputError, match="No space"):
        write_table(tab, "json", tmp_path / "t.json")
    assert list(tmp_path.iterdir()) == []


def test_c_export_requires_discrete_and_valid_prefix(tmp_path):
    cont = build_table(make_family())
    with pytest.raises(InputError, match="discrete"):
        c_source_text(cont)
    for bad in ("1abc", "a-b", "int", ""):
        with pytest.raises(InputError, match="prefix"):
            c_source_text(_table(), bad)


def test_c_folder_is_replaced_atomically_and_never_clobbers_user_files(tmp_path):
    tab = _table()
    out = tmp_path / "ctab"
    write_table(tab, "c", out, prefix="crane")
    assert sorted(p.name for p in out.iterdir()) == ["crane_table.c", "crane_table.h"]
    write_table(tab, "c", out, prefix="crane")  # rewrite in place
    (out / "notes.txt").write_text("mine")
    with pytest.raises(InputError, match="other files"):
        write_table(tab, "c", out, prefix="crane")
    assert (out / "notes.txt").read_text() == "mine"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ctab"]


def c_state_type(tab):
    """The ctypes mirror of ``<prefix>_state`` (docs/tables.md, C99)."""
    n, nu = max(tab.n_states, 1), tab.n_outputs

    class State(ctypes.Structure):
        _fields_ = [("x", ctypes.c_double * n), ("u_last", ctypes.c_double * nu),
                    ("lower", ctypes.c_double * nu), ("upper", ctypes.c_double * nu),
                    ("rate", ctypes.c_double * nu), ("anti_windup", ctypes.c_int)]
    return State


def _compile(tmp_path, tab, prefix):
    out = tmp_path / f"c_{prefix}"
    write_table(tab, "c", out, prefix=prefix)
    lib = tmp_path / f"lib{prefix}.so"
    cmd = [CC, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-pedantic", "-shared",
           "-fPIC", "-o", str(lib), str(out / f"{prefix}_table.c")]
    res = subprocess.run(cmd, capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    so = ctypes.CDLL(str(lib))
    State = c_state_type(tab)
    dp = ctypes.POINTER(ctypes.c_double)
    sp = ctypes.POINTER(State)
    getattr(so, f"{prefix}_init").argtypes = [sp, dp]
    getattr(so, f"{prefix}_init_steady").argtypes = [sp, dp, dp, dp]
    getattr(so, f"{prefix}_step").argtypes = [sp, dp, dp, dp]
    getattr(so, f"{prefix}_lookup").argtypes = [dp, dp, dp, dp, dp]
    getattr(so, f"{prefix}_lookup_gain").argtypes = [dp, dp]
    return so, State


def _ptr(a):
    if a is None:
        return None
    return np.ascontiguousarray(a, dtype=float).ctypes.data_as(ctypes.POINTER(ctypes.c_double))


C_CASES = [
    dict(breakpoints=((3.0, 10.0, 30.0), (2000.0, 20000.0)), method="tustin"),
    dict(breakpoints=((3.0, 6.0, 10.0, 20.0, 30.0),), n=2, ny=1, nu=2, method="zoh",
         with_plant=True, limits={"act0": (-0.5, 0.8, 3.0), "act1": (-0.3, 0.3, float("inf"))}),
    dict(breakpoints=((0.0, 1.0), (5.0,), (-1.0, 0.0, 2.0)), n=4, ny=3, nu=2, method="tustin",
         prewarp=3.0, with_plant=True, limits={"act1": (-0.4, 0.2, 2.0)}),
]


@pytest.mark.skipif(CC is None, reason="no C compiler")
@pytest.mark.parametrize("case", C_CASES)
def test_c_matches_python_runtime(tmp_path, case):
    # Reference: the Python runtime, itself checked against scipy.signal.dlsim and against
    # the scipy reference loop of tests/test_antiwindup.py. Limits that act often (the
    # second and third cases) exercise the limiter and the anti-windup path in both.
    tab = _table(**case)
    prefix = "tab"
    so, State = _compile(tmp_path, tab, prefix)
    rng = np.random.default_rng(42)
    d = len(tab.variables)
    lo = np.array([b[0] for b in tab.breakpoints])
    hi = np.array([b[-1] for b in tab.breakpoints])
    span = np.maximum(hi - lo, 1.0)
    py = TableController(tab)
    x0 = rng.standard_normal(tab.n_states)
    py.reset(x0)
    st = State()
    getattr(so, f"{prefix}_init")(ctypes.byref(st), _ptr(x0))
    assert st.anti_windup == int(tab.H is not None)
    # random walk of the scheduling point that leaves the table's range (clamping) at times
    p = lo + 0.5 * (hi - lo)
    u_c = np.zeros(tab.n_outputs)
    worst, limited = 0.0, 0
    for k in range(400):
        p = p + rng.normal(0, 0.08, d) * span
        if k % 97 == 0:
            p = rng.uniform(lo - 0.3 * span, hi + 0.3 * span)
        y = rng.standard_normal(tab.n_inputs)
        u_py = py.step(y, p)
        rc = getattr(so, f"{prefix}_step")(ctypes.byref(st), _ptr(y), _ptr(p),
                                           u_c.ctypes.data_as(ctypes.POINTER(ctypes.c_double)))
        assert rc == 0
        x_c = np.array(st.x[: tab.n_states])
        scale = max(1.0, np.max(np.abs(u_py)))
        worst = max(worst, np.max(np.abs(u_c - u_py)) / scale)
        limited += int(np.any(np.abs(u_py) >= np.abs(tab.actuator_limits.upper).min()))
        np.testing.assert_allclose(x_c, py.state, rtol=1e-12, atol=1e-12)
        np.testing.assert_array_equal(np.array(st.u_last[:]), py.last_command)
    assert worst <= 1e-12
    if tab.limits is not None:
        assert limited > 20  # the limiter really acted
    # the lookup alone, at nodes, midpoints and outside the range
    mats = {k: np.zeros(getattr(tab, k).shape[1:]) for k in "ABCD"}
    H = np.zeros((tab.n_states, tab.n_outputs))
    for p in list(tab.nodes()) + [lo - 1.0, hi + 1.0, (lo + hi) / 2.0]:
        p = np.ascontiguousarray(p, dtype=float)
        getattr(so, f"{prefix}_lookup")(_ptr(p), *(mats[k].ctypes.data_as(
            ctypes.POINTER(ctypes.c_double)) for k in "ABCD"))
        getattr(so, f"{prefix}_lookup_gain")(_ptr(p), H.ctypes.data_as(
            ctypes.POINTER(ctypes.c_double)))
        ref = py.matrices(p)
        for k in "ABCD":
            np.testing.assert_allclose(mats[k], ref[k], rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(H, ref.get("H", np.zeros_like(H)), rtol=1e-12, atol=1e-14)


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_c_lookup_is_null_safe_and_step_rejects_non_finite_input(tmp_path):
    # The header says any matrix argument may be NULL; issue 12: a NaN measurement or
    # scheduling value is refused with a return code and leaves the state unchanged, as
    # the Python runtime raises and leaves its state unchanged.
    tab = _table(with_plant=True, limits={"act0": (-0.2, 0.2, 1.0)})
    so, State = _compile(tmp_path, tab, "nul")
    p = np.array([12.0, 8000.0])
    A = np.zeros((tab.n_states, tab.n_states))
    so.nul_lookup(_ptr(p), A.ctypes.data_as(ctypes.POINTER(ctypes.c_double)), None, None, None)
    np.testing.assert_allclose(A, TableController(tab).matrices(p)["A"], rtol=1e-12)
    so.nul_lookup(_ptr(p), None, None, None, None)
    so.nul_lookup_gain(_ptr(p), None)
    st, py = State(), TableController(tab)
    so.nul_init(ctypes.byref(st), None)
    u = np.zeros(1)
    up = u.ctypes.data_as(ctypes.POINTER(ctypes.c_double))
    for _ in range(5):
        y = np.array([0.3, -0.1])
        assert so.nul_step(ctypes.byref(st), _ptr(y), _ptr(p), up) == 0
        py.step(y, p)
    before = bytes(st)
    for y, q, code in (([np.nan, 0.0], p, 1), ([np.inf, 0.0], p, 1),
                       ([0.1, 0.0], [np.nan, 8000.0], 2), ([0.1, 0.0], [12.0, -np.inf], 2)):
        u[:] = 7.0
        assert so.nul_step(ctypes.byref(st), _ptr(y), _ptr(q), up) == code
        assert bytes(st) == before and u[0] == 7.0  # nothing written, nothing changed
        x_py = py.state
        with pytest.raises(InputError, match="unchanged"):
            py.step(y, q)
        np.testing.assert_array_equal(py.state, x_py)
    np.testing.assert_allclose(np.array(st.x[:tab.n_states]), py.state, rtol=1e-12, atol=1e-14)


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_c_bumpless_start_matches_python(tmp_path):
    # Reference: schedule.export.antiwindup.bumpless_state (numpy solves); the C solves
    # with its own Gaussian elimination, so agreement is to rounding (1e-9 relative).
    tab = _table(with_plant=True, n=4, ny=2, nu=1, limits={"act0": (-5.0, 5.0, 50.0)})
    so, State = _compile(tmp_path, tab, "bump")
    p, y0, u0 = np.array([7.0, 15000.0]), np.array([0.4, -0.2]), np.array([0.7])
    st, py = State(), TableController(tab)
    assert so.bump_init_steady(ctypes.byref(st), _ptr(y0), _ptr(u0), _ptr(p)) == 0
    py.reset_steady(y0, u0, p)
    np.testing.assert_allclose(np.array(st.x[:4]), py.state, rtol=1e-9, atol=1e-12)
    assert st.u_last[0] == 0.7
    u = np.zeros(1)
    so.bump_step(ctypes.byref(st), _ptr(y0), _ptr(p), u.ctypes.data_as(
        ctypes.POINTER(ctypes.c_double)))
    np.testing.assert_allclose(u, u0, rtol=1e-9)  # no jump at switch-in
    assert so.bump_init_steady(ctypes.byref(st), _ptr([np.nan, 0.0]), _ptr(u0), _ptr(p)) == 1
    assert so.bump_init_steady(ctypes.byref(st), _ptr(y0), _ptr([np.inf]), _ptr(p)) == 3
    assert so.bump_init_steady(ctypes.byref(st), _ptr(y0), _ptr(u0), _ptr([np.nan, 1.0])) == 2


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_c_header_compiles_in_user_program(tmp_path):
    # A user's main() including the header, with a struct per controller (no globals).
    tab = _table()
    out = tmp_path / "c"
    write_table(tab, "c", out, prefix="crane")
    (tmp_path / "main.c").write_text(
        '#include <stdio.h>\n#include "crane_table.h"\n'
        "int main(void) {\n crane_state s1, s2;\n double y[CRANE_N_INPUTS] = {0.1, -0.2};\n"
        " double p[CRANE_N_VARIABLES] = {12.0, 8000.0};\n double u[CRANE_N_OUTPUTS];\n"
        " crane_init(&s1, NULL); crane_init(&s2, NULL);\n"
        " crane_step(&s1, y, p, u);\n printf(\"%.17g %s\\n\", u[0], crane_input_names[0]);\n"
        " return 0;\n}\n")
    exe = tmp_path / "prog"
    res = subprocess.run([CC, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-I", str(out),
                          "-o", str(exe), str(tmp_path / "main.c"), str(out / "crane_table.c")],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    run = subprocess.run([str(exe)], capture_output=True, text=True, check=True)
    u_c, name = run.stdout.split()
    ref = TableController(tab).step([0.1, -0.2], [12.0, 8000.0])
    assert name == "meas0"
    np.testing.assert_allclose(float(u_c), ref[0], rtol=1e-12)


@pytest.mark.parametrize("breakpoints", [((3.0, 10.0, 30.0),), ((3.0, 10.0, 30.0), (2e3, 2e4))])
def test_interpolate_matrices_mapping_matches_reference_interpolation(breakpoints):
    # Issue 13 item 9: interpolate_matrices takes {name: value} as TableController.step
    # does. Reference outside the runtime: numpy.interp (1 variable) and scipy's
    # RegularGridInterpolator(method="linear") (2 variables) on the table's own node
    # values, with the point clamped into the box first (the table clamps).
    from scipy.interpolate import RegularGridInterpolator

    from schedule.export import interpolate_matrices

    tab = _table(breakpoints=breakpoints)
    names = [v.name for v in tab.variables]
    rng = np.random.default_rng(3)
    for _ in range(12):
        raw = [rng.uniform(b[0] - 0.3 * (b[-1] - b[0]), b[-1] * 1.3) for b in breakpoints]
        by_name = interpolate_matrices(tab, dict(zip(names, raw, strict=True)))
        by_order = interpolate_matrices(tab, raw)
        clamped = [min(max(x, b[0]), b[-1]) for x, b in zip(raw, breakpoints, strict=True)]
        for k in "ABCD":
            np.testing.assert_array_equal(by_name[k], by_order[k])
            T = getattr(tab, k)
            grid = T.reshape(tuple(len(b) for b in breakpoints) + T.shape[1:])
            if len(breakpoints) == 1:
                flat = grid.reshape(len(breakpoints[0]), -1)
                ref = np.array([np.interp(raw[0], breakpoints[0], col) for col in flat.T])
                ref = ref.reshape(T.shape[1:])
            else:
                ref = RegularGridInterpolator(breakpoints, grid, method="linear")(clamped)[0]
            np.testing.assert_allclose(by_name[k], ref, rtol=1e-12, atol=1e-13)
    with pytest.raises(InputError, match="lacks"):
        interpolate_matrices(tab, {})


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_c_lookup_with_null_matrices_in_a_user_program(tmp_path):
    # Issue 13 item 9: the header documents that every matrix argument of lookup "may be
    # NULL"; a user's program passing NULL literals compiles with -std=c99 -Wall -Wextra
    # -Werror -pedantic, runs without a crash and fills the one matrix it asked for with
    # the values the Python runtime gives (docs/tables.md: agreement to 1e-12 relative).
    from schedule.export import interpolate_matrices

    tab = _table(with_plant=True, limits={"act0": (-0.2, 0.2, 1.0)})
    out = tmp_path / "c"
    write_table(tab, "c", out, prefix="arm")
    (tmp_path / "main.c").write_text(
        '#include <stdio.h>\n#include "arm_table.h"\n'
        "int main(void) {\n"
        "    const double p[ARM_N_VARIABLES] = {12.0, 8000.0};\n"
        "    double A[ARM_N_STATES * ARM_N_STATES];\n"
        "    double D[ARM_N_OUTPUTS * ARM_N_INPUTS];\n"
        "    int i;\n"
        "    arm_lookup(p, NULL, NULL, NULL, NULL);\n"
        "    arm_lookup_gain(p, NULL);\n"
        "    arm_lookup(p, A, NULL, NULL, NULL);\n"
        "    arm_lookup(p, NULL, NULL, NULL, D);\n"
        '    for (i = 0; i < ARM_N_STATES * ARM_N_STATES; ++i) printf("%.17g\\n", A[i]);\n'
        '    for (i = 0; i < ARM_N_OUTPUTS * ARM_N_INPUTS; ++i) printf("%.17g\\n", D[i]);\n'
        "    return 0;\n}\n")
    exe = tmp_path / "prog"
    res = subprocess.run([CC, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-I",
                          str(out), "-o", str(exe), str(tmp_path / "main.c"),
                          str(out / "arm_table.c")], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    run = subprocess.run([str(exe)], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    values = np.array([float(v) for v in run.stdout.split()])
    ref = interpolate_matrices(tab, {"rope_length": 12.0, "payload_mass": 8000.0})
    n = tab.n_states * tab.n_states
    np.testing.assert_allclose(values[:n], ref["A"].ravel(), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(values[n:], ref["D"].ravel(), rtol=1e-12, atol=1e-14)
