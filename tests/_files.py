"""Small input files for the tests of untrusted input (not collected by pytest).

- :func:`lag_design`: a one-variable design of a first-order lag (three grid
  points, one state) with its model file; fast to synthesize.
- :func:`forge`: edit an HDF5 file with h5py as an attacker would, and (for a
  family file) recompute its SHA-256 content digest, which has no key.
- :func:`run_cli`: the command line in-process (click's CliRunner), returning
  ``(exit code, output, exception)``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
from click.testing import CliRunner

LAG_MODEL = '''
import numpy as np
from schedule.types import LinearPlant

def plant_at(point):
    # xdot = -p x + u + d, y = x: a first-order lag whose pole p is the scheduling variable
    p = point["pole"]
    return LinearPlant(np.array([[-p]]), np.array([[1.0, 1.0]]), np.array([[1.0]]),
                       np.zeros((1, 2)), ("x",), ("u", "d"), ("y",))
'''

LAG_DESIGN = '''title = "first-order lag"
[[variable]]
name = "pole"
unit = "1/s"
lower = 1.0
upper = 2.0

[source]
model_file = "lag.py"
function = "plant_at"

[grid]
pole = [1.0, 1.5, 2.0]

[channels]
controls = ["u"]
disturbances = ["d"]
measured = ["y"]
performance = ["y"]

[[weights.performance]]
output = "y"
peak_sensitivity = 2.0
bandwidth = 1.0
low_frequency_error = 0.1

[[weights.effort]]
input = "u"
gain = 0.1

[[weights.noise]]
output = "y"
gain = 0.01

[[weights.disturbance]]
input = "d"
gain = 1.0

[interpolation]
form = "matrices"
kind = "multilinear"

[check]
samples = 4
gain_margin_db = 0.0
phase_margin_deg = 0.0
'''


def lag_design(folder: Path, design_text: str = LAG_DESIGN) -> Path:
    """Write lag.py and design.toml into ``folder``; return the design file's path."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "lag.py").write_text(LAG_MODEL)
    path = folder / "design.toml"
    path.write_text(design_text)
    return path


def lag_family(folder: Path) -> Path:
    """Design the lag family into ``folder/family.h5`` (through the library); return the path."""
    from schedule.design_file import load_design
    from schedule.family import design_family

    out = folder / "family.h5"
    design_family(load_design(lag_design(folder)), out=out)
    return out


def forge(src: Path, dst: Path, edit, digest: bool = True) -> Path:
    """Copy ``src`` to ``dst``, apply ``edit(h5py.File)`` and recompute the family digest."""
    from schedule.store import _digest

    shutil.copy(src, dst)
    with h5py.File(dst, "a") as f:
        edit(f)
        if digest:
            f.attrs["content_sha256"] = _digest(f)
    return dst


def run_cli(*args) -> tuple[int, str, BaseException | None]:
    """Run ``schedule ARGS`` in-process; (exit code, stdout + stderr, unexpected exception)."""
    from schedule.cli.main import main

    res = CliRunner().invoke(main, [str(a) for a in args])
    unexpected = None if res.exception is None or isinstance(res.exception, SystemExit) \
        else res.exception
    return res.exit_code, res.output, unexpected
