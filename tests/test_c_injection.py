"""Names and units cannot inject C (issue 12, item 3).

Attacks from the security review: a unit holding a backslash-newline closes the comment
around it (line splicing happens before comments are removed, C99 5.1.1.2); a name
holding the trigraph ``??/`` (a backslash under -std=c99, C99 5.2.1.1) escapes a string
literal; a comment end ``*/`` in a name; a carriage return broke compilation. Each
attack tries to define a function ``injected_*``. References: the compiler itself
(``cc -std=c99`` and ``-std=gnu17``) and ``nm`` on the object file: no injected symbol
may exist, the object must compile with -Wall -Wextra -Werror -pedantic, and the name
strings in the object must read back byte for byte as the original names.
"""

from __future__ import annotations

import ctypes
import dataclasses
import shutil
import subprocess

import pytest
from test_export_fixtures import make_family

from schedule.export import build_table, write_table
from schedule.export.c_source import c_comment, c_string
from schedule.types import SchedulingVariable

CC = shutil.which("cc") or shutil.which("gcc")
NM = shutil.which("nm")

ATTACKS = {
    "comment_end": "x */ int injected_a(void) { return 1; } /* y",
    "splice": "m\\\n/ int injected_b(void) { return 2; } /",
    "trigraph_comment": "m*??/\n/ int injected_c(void) { return 3; } /* ",
    "trigraph_string": 'q??/"; int injected_d(void) { return 4; } static const char *z = "',
    "quote": '"; int injected_e(void) { return 5; } static const char *w = "',
    "carriage_return": "force\rcommand",
    "escape_digit": "a\x01" + "7",
    "utf8": "Kraft [kN] \u00b5 \u2192 ok",
}


def _injected_table():
    fam = make_family()
    names = list(ATTACKS.values())
    fam = dataclasses.replace(
        fam, measured_names=(names[1], names[3]), control_names=(names[0],),
        variables=(SchedulingVariable(names[4], names[2], 3.0, 30.0),
                   SchedulingVariable(names[5], names[6] + names[7], 2000.0, 20000.0)))
    tab = build_table(fam, sample_time=0.05, source_sha256=names[2], tool_version=names[1])
    return tab, names


@pytest.mark.skipif(CC is None or NM is None, reason="no C compiler or nm")
@pytest.mark.parametrize("std", ["c99", "gnu17"])
def test_injected_symbols_do_not_exist(tmp_path, std):
    tab, names = _injected_table()
    out = tmp_path / "c"
    write_table(tab, "c", out, prefix="inj")
    obj = tmp_path / "inj.o"
    res = subprocess.run([CC, f"-std={std}", "-Wall", "-Wextra", "-Werror", "-pedantic", "-c",
                          str(out / "inj_table.c"), "-o", str(obj)], capture_output=True,
                         text=True)
    assert res.returncode == 0, res.stderr
    symbols = subprocess.run([NM, str(obj)], capture_output=True, text=True, check=True).stdout
    assert "injected" not in symbols
    assert "inj_step" in symbols  # nm does list the object's own functions


@pytest.mark.skipif(CC is None, reason="no C compiler")
def test_names_read_back_byte_for_byte(tmp_path):
    # The escaping must keep the text: the string arrays in the library hold the names.
    tab, names = _injected_table()
    out = tmp_path / "c"
    write_table(tab, "c", out, prefix="inj")
    lib = tmp_path / "libinj.so"
    subprocess.run([CC, "-std=c99", "-shared", "-fPIC", "-o", str(lib),
                    str(out / "inj_table.c")], check=True)
    so = ctypes.CDLL(str(lib))
    for sym, expected in (("inj_input_names", tab.measured_names),
                          ("inj_output_names", tab.control_names),
                          ("inj_variable_names", tuple(v.name for v in tab.variables))):
        arr = (ctypes.c_char_p * len(expected)).in_dll(so, sym)
        assert [arr[i].decode("utf-8") for i in range(len(expected))] == list(expected)


def test_escapers_keep_only_plain_characters():
    # Analytic: after escaping, no backslash-newline, no '?', no control character and
    # no comment delimiter can remain in comment text; string literals hold no raw
    # quote, backslash other than octal escapes, '?' or control character.
    for text in ATTACKS.values():
        c = c_comment(text)
        assert "*/" not in c and "/*" not in c and "?" not in c and "\\" not in c
        assert all(32 <= ord(ch) < 127 for ch in c)
        s = c_string(text)[1:-1]
        assert '"' not in s and "?" not in s and all(32 <= ord(ch) < 127 for ch in s)
        assert all(s[i + 1:i + 4].isdigit() for i, ch in enumerate(s) if ch == "\\")
    assert c_string("a\x01" + "7") == '"a\\0017"'  # octal escapes stop after 3 digits
