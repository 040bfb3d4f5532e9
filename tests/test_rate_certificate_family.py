"""The rate certificate on a designed family: design-file table, check hook, JSON, CLI, report."""

from __future__ import annotations

import json

import numpy as np
import pytest
from _helpers import spring_design
from click.testing import CliRunner

from schedule.errors import InputError

# A lightly damped mass-spring whose stiffness moves a factor 10 over the envelope, with an
# expensive control effort: the closed loop keeps lightly damped modes that moving hurts.
MODEL = '''
import numpy as np
from schedule.types import LinearPlant

def plant_at(point):
    k = 1.0 + 9.0 * point["stiffness"]
    A = np.array([[0.0, 1.0], [-k, -0.02]])
    B = np.array([[0.0, 0.0], [1.0, 1.0]])
    return LinearPlant(A, B, np.array([[1.0, 0.0]]), np.zeros((1, 2)), ("x", "v"),
                       ("force", "push"), ("pos",))
'''

DESIGN = spring_design("moving spring", """[rate_certificate]
basis = ["1", "stiffness", "stiffness**2"]
rates = { stiffness = 0.05 }
dense = 8
samples = 8
curve = 2
""")


@pytest.fixture(scope="module")
def spring(tmp_path_factory):
    from schedule.design_file import load_design
    from schedule.family import design_family
    from schedule.store import write_family

    tmp = tmp_path_factory.mktemp("spring")
    (tmp / "model.py").write_text(MODEL)
    (tmp / "design.toml").write_text(DESIGN)
    spec = load_design(tmp / "design.toml")
    fam = design_family(spec)
    write_family(tmp / "family.h5", fam)
    return spec, fam, tmp


@pytest.fixture(scope="module")
def checked(spring):
    from schedule.check import CheckSettings, check_family

    spec, fam, _ = spring
    s = CheckSettings.from_spec(spec, gamma_opt=False, rate_certificate=True)
    return check_family(fam, s, spec)


def test_check_hook_certifies_the_target_and_reports_beside_the_frozen_bound(checked):
    rc = checked.rate_certificate
    assert rc is not None, checked.notes
    assert rc.basis == ("1", "stiffness", "stiffness**2")
    rate = rc.certified_rate["stiffness"]
    assert rate >= 0.05 and rc.meets_targets
    # the frozen-Lyapunov bound (schedule.rate) is reported beside, for the same variable
    assert set(rc.frozen_bound) == {"stiffness"}
    # gamma(nu): from 0 to the certified rate, never below the largest frozen norm
    curve = rc.gain_curve["stiffness"]
    assert curve[0][0] == 0.0 and curve[-1][0] == pytest.approx(rate)
    # nan where no finite gain bound is certified: at the largest stability rate the gain
    # LMI sits on the edge of feasibility, so only the certified values are compared
    certified = [g for _, g in curve if np.isfinite(g)]
    assert len(certified) >= 2 and np.isfinite(curve[0][1])
    assert all(g >= rc.frozen_gain * (1 - 1e-6) for g in certified)
    assert all(b >= a * (1 - 1e-6) for a, b in zip(certified, certified[1:]))
    # the frozen norms agree with the check's own: the largest closed-loop norm at the check
    # points (true plant; leave-one-out predictions are another controller) is at most the
    # largest frozen norm over the (denser) certificate points
    true = checked.kind != "leave_one_out"
    assert np.max(checked.values["norm"][true]) <= rc.frozen_gain * (1 + 1e-3)
    w = rc.witness
    assert w is not None and w.trajectories > 0
    # a certified rate cannot be destabilizing: the witness finds nothing unstable below it
    assert w.unstable_rate["stiffness"] > rate
    d = json.loads(json.dumps(checked.to_dict()))["rate_certificate"]
    assert d["certified_rate"]["stiffness"] == pytest.approx(rate)
    assert d["a_posteriori_check"]["stiffness"]["dense_points"] >= 17
    assert d["a_posteriori_check"]["stiffness"]["worst_relative_eigenvalue"] < 0


def test_report_plots_gamma_of_nu(checked, spring, tmp_path):
    from schedule.report import write_report

    out = write_report(checked, spring[1], tmp_path / "rep")
    names = [p.name for p in out["figures"]]
    assert "gain_vs_rate.png" in names
    text = out["markdown"].read_text()
    assert "Certified scheduling rates" in text and "stiffness" in text


def test_cli_option_and_json(spring):
    from schedule.cli.main import main

    path = spring[2] / "family.h5"
    design = ["--design", str(spring[2] / "design.toml")]  # the true plant (a file is data)
    res = CliRunner().invoke(main, ["check", str(path), "--no-gamma-opt", "--json"] + design)
    assert res.exit_code == 0, res.output
    assert json.loads(res.output)["rate_certificate"] is None  # not asked for
    res = CliRunner().invoke(main, ["check", str(path), "--no-gamma-opt", "--rate-certificate"]
                             + design)
    assert res.exit_code == 0, res.output
    assert "rate certificate" in res.output and "certified alone" in res.output


def _parse(extra: str):
    from schedule.design_file import parse_design

    text = DESIGN.split("[rate_certificate]")[0] + "[rate_certificate]\n" + extra
    return parse_design(text, ".")


def test_design_file_table_is_checked():
    spec = _parse('basis = ["1", "1/(1 + stiffness)"]\nrates = { stiffness = 0.2 }\n'
                  'solver = "cvxpy:SCS"\n')
    rc = spec.rate_certificate
    assert rc.basis == ("1", "1/(1 + stiffness)") and dict(rc.rates) == {"stiffness": 0.2}
    assert rc.solver == "cvxpy:SCS"
    assert _parse("").rate_certificate is not None
    assert _parse("").rate_certificate.basis is None
    for extra, match in [
        ('basis = ["__import__(\'os\').system(\'true\')"]', r"rate_certificate\.basis"),
        ('basis = ["stiffness.real"]', "not allowed"),
        ('basis = "1"', "list of expressions"),
        ("rates = { load = 1.0 }", "not a scheduling variable"),
        ("rates = { stiffness = -1.0 }", "must be > 0"),
        ("speed = 3", "unknown key 'speed'"),
        ("dense = 0", "must be >= 1"),
        ('solver = "mosek"', "not allowed"),
        ("gain = 1", "true or false"),
    ]:
        with pytest.raises(InputError, match=match):
            _parse(extra + "\n")
