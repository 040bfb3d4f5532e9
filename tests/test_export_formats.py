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
    fam_kw = {k: kw.pop(k) for k in ("breakpoints", "n", "ny", "nu") if k in kw}
    return build_table(make_family(**fam_kw), sample_time=kw.pop("sample_time", 0.05),
                       method=kw.pop("method", "tustin"), source_sha256="ab" * 32, **kw)


@pytest.mark.parametrize("fmt,name", [("csv", "t.csv"), ("json", "t.json"), ("hdf5", "t.h5")])
def test_round_trip_is_exact(tmp_path, fmt, name):
    tab = _table()
    out = tmp_path / name
    write_table(tab, fmt, out)
    back = read_table(out)
    for k in "ABCD":
        np.testing.assert_array_equal(getattr(back, k), getattr(tab, k))
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


def _compile(tmp_path, tab, prefix):
    out = tmp_path / f"c_{prefix}"
    write_table(tab, "c", out, prefix=prefix)
    lib = tmp_path / f"lib{prefix}.so"
    cmd = [CC, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-pedantic", "-shared",
           "-fPIC", "-o", str(lib), str(out / f"{prefix}_table.c")]
    res = subprocess.run(cmd, capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    so = ctypes.CDLL(str(lib))
    n = max(tab.n_states, 1)

    class State(ctypes.Structure):
        _fields_ = [("x", ctypes.c_double * n)]

    dp = ctypes.POINTER(ctypes.c_double)
    getattr(so, f"{prefix}_init").argtypes = [ctypes.POINTER(State), dp]
    getattr(so, f"{prefix}_step").argtypes = [ctypes.POINTER(State), dp, dp, dp]
    getattr(so, f"{prefix}_lookup").argtypes = [dp, dp, dp, dp, dp]
    return so, State


def _ptr(a):
    return a.ctypes.data_as(ctypes.POINTER(ctypes.c_double))


@pytest.mark.skipif(CC is None, reason="no C compiler")
@pytest.mark.parametrize("case", [
    dict(breakpoints=((3.0, 10.0, 30.0), (2000.0, 20000.0)), method="tustin"),
    dict(breakpoints=((3.0, 6.0, 10.0, 20.0, 30.0),), n=2, ny=1, nu=2, method="zoh"),
    dict(breakpoints=((0.0, 1.0), (5.0,), (-1.0, 0.0, 2.0)), n=4, ny=3, nu=2, method="tustin",
         prewarp=3.0),
])
def test_c_matches_python_runtime(tmp_path, case):
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
    getattr(so, f"{prefix}_init")(ctypes.byref(st), _ptr(np.ascontiguousarray(x0)))
    # random walk of the scheduling point that leaves the table's range (clamping) at times
    p = lo + 0.5 * (hi - lo)
    u_c = np.zeros(tab.n_outputs)
    worst = 0.0
    for k in range(400):
        p = p + rng.normal(0, 0.08, d) * span
        if k % 97 == 0:
            p = rng.uniform(lo - 0.3 * span, hi + 0.3 * span)
        y = rng.standard_normal(tab.n_inputs)
        u_py = py.step(y, p)
        getattr(so, f"{prefix}_step")(ctypes.byref(st), _ptr(np.ascontiguousarray(y)),
                                      _ptr(np.ascontiguousarray(p, dtype=float)), _ptr(u_c))
        x_c = np.array(st.x[: tab.n_states])
        scale = max(1.0, np.max(np.abs(u_py)))
        worst = max(worst, np.max(np.abs(u_c - u_py)) / scale)
        np.testing.assert_allclose(x_c, py.state, rtol=1e-12, atol=1e-12)
    assert worst <= 1e-12
    # the lookup alone, at nodes, midpoints and outside the range
    mats = {k: np.zeros(getattr(tab, k).shape[1:]) for k in "ABCD"}
    for p in list(tab.nodes()) + [lo - 1.0, hi + 1.0, (lo + hi) / 2.0]:
        p = np.ascontiguousarray(p, dtype=float)
        getattr(so, f"{prefix}_lookup")(_ptr(p), *(_ptr(mats[k]) for k in "ABCD"))
        ref = py.matrices(p)
        for k in "ABCD":
            np.testing.assert_allclose(mats[k], ref[k], rtol=1e-12, atol=1e-14)


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
