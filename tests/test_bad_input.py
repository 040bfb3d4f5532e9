"""Bad input ends in one clear line (exit code 2), never a traceback or a wrong message.

Design files: a UTF-8 byte-order mark (accepted, as Python's own "utf-8-sig"
codec does), nesting deep enough to exhaust the parser's recursion, absurd
sizes (check.samples, grid points, gamma margin), control characters in names,
files that are not files. Models returning complex matrices. A family with a
single synthesized point. Stale temporaries of killed writes. References: the
TOML and Unicode standards (BOM, general categories via unicodedata), the OS
(process table for the stale-file clean-up).
"""

from __future__ import annotations

import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
from _files import LAG_DESIGN, lag_design, run_cli

from schedule.design_file import load_design, parse_design
from schedule.errors import InputError


def test_byte_order_mark_is_accepted(tmp_path):
    path = lag_design(tmp_path)
    path.write_bytes(b"\xef\xbb\xbf" + LAG_DESIGN.encode("utf-8"))
    spec = load_design(path)
    assert spec.title == "first-order lag" and not spec.text.startswith("\ufeff")


@pytest.mark.parametrize("nested", ["x = " + "[" * 3000 + "]" * 3000,
                                    "x = " + "{a = " * 3000 + "1" + "}" * 3000])
def test_deep_nesting_is_one_line(nested):
    with pytest.raises(InputError, match="nested too deeply"):
        parse_design(nested + "\n" + LAG_DESIGN, ".")


@pytest.mark.parametrize("edit,match", [
    (("samples = 4", "samples = 100000000000"), "check.samples: value 100000000000 is above"),
    (("[interpolation]", "[gamma]\nmargin = 1e308\n[interpolation]"), "gamma.margin"),
    (("[interpolation]", "[gamma]\npolicy = \"fixed\"\nvalue = 1e300\n[interpolation]"),
     "gamma.value"),
    (("pole = [1.0, 1.5, 2.0]", "pole = [" + ", ".join(str(1 + i / 2e6) for i in range(2))
      + "]"), None),
    (('unit = "1/s"', 'unit = "1/s\\r\\n"'), "variable\\[0\\].unit: .* control character"),
    (('measured = ["y"]', 'measured = ["y\\u001b[2J"]'), "channels.measured: .* control"),
    (('title = "first-order lag"', 'title = "lag\\u202e"'), "title: .* format character"),
])
def test_absurd_values_and_control_characters(edit, match):
    text = LAG_DESIGN.replace(*edit)
    assert text != LAG_DESIGN
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no RuntimeWarning (overflow) on the way
        if match is None:
            parse_design(text, ".")
            return
        with pytest.raises(InputError, match=match) as err:
            parse_design(text, ".")
    assert "\n" not in str(err.value)


def test_grid_too_large_and_cli_sample_limit(tmp_path):
    many = "\n".join(f'[[variable]]\nname = "v{i}"\nlower = 0.0\nupper = 1.0' for i in range(8))
    grid = "\n".join(f"v{i} = [{', '.join(str(k / 10) for k in range(10))}]" for i in range(8))
    text = (many + '\n[source]\nmodel = "m:f"\n[grid]\n' + grid
            + '\n[channels]\ncontrols = ["u"]\nmeasured = ["y"]\n'
            '[[weights.effort]]\ninput = "u"\ngain = 1.0\n'
            '[[weights.noise]]\noutput = "y"\ngain = 1.0\n')
    with pytest.raises(InputError, match="1e\\+08 grid points"):
        parse_design(text, ".")
    code, out, exc = run_cli("check", tmp_path / "f.h5", "--samples", "100000000000")
    assert exc is None and code == 2 and "100000000000" in out


def test_design_file_that_is_not_a_file(tmp_path):
    fifo = tmp_path / "design.toml"
    os.mkfifo(fifo)
    big = tmp_path / "big.toml"
    with open(big, "wb") as fh:
        fh.truncate(5_000_000)
    for path, match in ((tmp_path, "is a folder"), (fifo, "is a pipe"),
                        ("/dev/zero", "character device"), (big, "larger than")):
        with pytest.raises(InputError, match=match):
            load_design(path)


def test_complex_model_results_are_refused():
    from schedule.sources import as_linear_plant

    A = np.array([[-1.0 + 0.5j]])
    with pytest.raises(InputError, match="complex A .*0.5"):
        as_linear_plant((A, np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1))))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a zero imaginary part loses nothing: accepted
        plant = as_linear_plant((np.array([[-1 + 0j]]), np.ones((1, 1)), np.ones((1, 1)),
                                 np.zeros((1, 1))))
    assert plant.A.dtype == float
    from schedule.types import LinearPlant

    named = LinearPlant(plant.A, plant.B, plant.C, plant.D, ("x\n",), ("u",), ("y",))
    with pytest.raises(InputError, match=r"state names: .* control character \(U\+000A\)"):
        as_linear_plant(named)


def test_single_point_family_says_what_is_wrong():
    from schedule.interpolate import ScheduledController
    from schedule.types import Family, SchedulingVariable

    one = {k: np.zeros((1, 1, 1)) for k in ("A", "B1", "B2", "C1", "C2", "D11", "D12", "D21",
                                             "D22")}
    fam = Family(variables=(SchedulingVariable("p", "", 0.0, 1.0),), points=np.array([[0.5]]),
                 status=np.array(["ok"]), reasons=("",), gamma_opt=np.ones(1), gamma=1.1,
                 plant=one, controller={k: np.zeros((1, 1, 1)) for k in "ABCD"}, pieces={})
    with pytest.raises(InputError, match="1 synthesized operating point.*at least two"):
        ScheduledController.from_family(fam)


def test_stale_temporaries_of_dead_writers_are_removed(tmp_path):
    from schedule.atomic import write_text_atomic

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    target = tmp_path / "table.json"
    stale = [tmp_path / f".table.json.{dead}.abc123.part",
             tmp_path / f".table.json.{os.getpid()}.zz9_x.part"]  # ours, not being written
    for p in stale:
        p.write_text("half")
    stale_dir = tmp_path / f".table.json.{dead}.q1w2.old"
    stale_dir.mkdir()
    live = tmp_path / ".table.json.1.keep00.part"  # pid 1 runs and started before it
    live.write_text("someone else's")
    other = tmp_path / ".other.json.99999999.abc.part"  # another target: not ours to judge
    other.write_text("x")
    write_text_atomic(target, "{}")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == sorted([".other.json.99999999.abc.part", ".table.json.1.keep00.part",
                            "table.json"])
