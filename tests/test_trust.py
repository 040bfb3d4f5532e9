"""A family file never chooses code to run (the "data files name no code" rule).

The attack: take a family file received from someone else, edit the design
text stored in it so that it names a model of the sender's choosing, and
recompute the SHA-256 digest (it has no key). ``check``, ``refine`` and
``simulate`` must not import that model. The model file creates a marker
file when it is imported; the test fails if the marker appears. The positive
controls show that the same marker does appear when the user names the model
(``--design``, ``--model``), so the tests can fail.
"""

from __future__ import annotations

import sys

import pytest
from _files import LAG_DESIGN, lag_family, run_cli

from schedule.store import read_family, write_family

EVIL = '''
import numpy as np
from pathlib import Path
Path({marker!r}).write_text("the sender's code ran")
from schedule.types import LinearPlant

def plant_at(point):
    p = point["pole"]
    return LinearPlant(np.array([[-p]]), np.array([[1.0, 1.0]]), np.array([[1.0]]),
                       np.zeros((1, 2)), ("x",), ("u", "d"), ("y",))

def make():
    return None
'''


@pytest.fixture(scope="module")
def family(tmp_path_factory):
    return lag_family(tmp_path_factory.mktemp("lag"))


@pytest.fixture
def attack(tmp_path, family, monkeypatch):
    """A forged family naming the sender's model three ways; returns (family, marker, module)."""
    marker = tmp_path / "marker.txt"
    module = f"sender_model_{tmp_path.name.replace('-', '_')}"
    (tmp_path / "evil.py").write_text(EVIL.format(marker=str(marker)))
    (tmp_path / f"{module}.py").write_text(EVIL.format(marker=str(marker)))
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.delitem(sys.modules, module, raising=False)
    fam = read_family(family)
    forged = tmp_path / "received.h5"

    def make(source: str) -> object:
        fam.design_text = LAG_DESIGN.replace('model_file = "lag.py"\nfunction = "plant_at"',
                                             source)
        fam.design_base_dir = str(tmp_path)
        write_family(forged, fam)  # recomputes the digest, as the sender can
        return forged

    return make, marker, module


@pytest.mark.parametrize("how", ["model_file", "model"])
def test_check_does_not_import_a_model_named_by_the_family(attack, how):
    make, marker, module = attack
    source = ('model_file = "evil.py"\nfunction = "plant_at"' if how == "model_file" else
              f'model = "{module}:plant_at"')
    forged = make(source)
    code, out, exc = run_cli("check", forged, "--samples", "2", "--no-gamma-opt")
    assert exc is None and code in (0, 1), out
    assert not marker.exists()
    assert "was not imported" in out and ("evil.py" in out or module in out)
    assert "WEAKER CHECK" in out  # the interpolated plant, labelled


def test_check_family_api_does_not_import_either(attack):
    from schedule.check import CheckSettings, check_family

    make, marker, _module = attack
    fam = read_family(make('model_file = "evil.py"\nfunction = "plant_at"'))
    result = check_family(fam, CheckSettings(samples=2, gamma_opt=False, rate=False))
    assert not marker.exists() and result.weaker


def test_refine_and_simulate_refuse_a_model_named_by_the_family(attack, tmp_path):
    make, marker, module = attack
    forged = make(f'model = "{module}:plant_at"\nnonlinear_model = "{module}:make"')
    code, out, exc = run_cli("refine", forged, "--out", tmp_path / "refined.h5")
    assert exc is None and code == 2 and "was not imported" in out, out
    code, out, exc = run_cli("simulate", forged, "--out", tmp_path / "sim")
    assert exc is None and code == 2 and "was not imported" in out, out
    assert len(out.strip().splitlines()) == 1
    assert not marker.exists()
    assert not (tmp_path / "refined.h5").exists() and not (tmp_path / "sim").exists()


def test_a_model_the_user_names_is_imported(attack, tmp_path):
    """Positive control: the marker mechanism works, so the tests above can fail."""
    make, marker, module = attack
    forged = make('model_file = "evil.py"\nfunction = "plant_at"')
    trusted = tmp_path / "trusted.toml"
    trusted.write_text(LAG_DESIGN.replace('model_file = "lag.py"', 'model_file = "evil.py"'))
    code, out, exc = run_cli("check", forged, "--samples", "2", "--no-gamma-opt",
                             "--design", trusted)
    assert exc is None and code in (0, 1), out
    assert marker.exists() and "WEAKER CHECK" not in out and "was not imported" not in out
    marker.unlink()
    code, out, exc = run_cli("check", forged, "--samples", "2", "--no-gamma-opt",
                             "--model", f"{module}:plant_at")
    assert exc is None and code in (0, 1), out
    assert marker.exists()
