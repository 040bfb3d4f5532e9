"""Tests of schedule/family.py and the `schedule design` command.

The envelope is an invented mass-spring-damper (position and velocity measured,
stiffness and damping scheduled). References outside the code under test:
the definition of the common gamma (max of per-point optima times 1 + margin,
recomputed here from the file read with plain h5py), closed-loop stability by
eigenvalues of the lower LFT formed here by hand (Zhou, Doyle and Glover 1996,
eq. 10.3, with D22 = 0 and u = K y), and the closed-loop H-infinity norm
against gamma (schedule.norms, itself checked against scipy in its own tests).
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest
from _helpers import performance_numbers, toml_channels, toml_variables, toml_weights
from click.testing import CliRunner

from schedule.cli.main import main
from schedule.design_file import load_design
from schedule.errors import InputError
from schedule.family import common_gamma, extend_family, run_design
from schedule.store import read_family
from schedule.types import LinearPlant

HERE = Path(__file__).resolve()


# ----------------------------------------------------------------------------- the models
def msd_plant(point):
    """Mass-spring-damper: x = (position, velocity), inputs (u, d), outputs (pos, vel)."""
    k, c = point["stiffness"], point["damping"]
    A = np.array([[0.0, 1.0], [-k, -c]])
    B = np.array([[0.0, 0.0], [1.0, 0.5 + 1.0 / k]])
    return LinearPlant(A, B, np.eye(2), np.zeros((2, 2)), ("pos", "vel"), ("u", "d"),
                       ("pos", "vel"))


def msd_flaky(point):
    """Like msd_plant, but the 'model' raises at one point and gives NaN at another."""
    if point["stiffness"] == 2.0 and point["damping"] == 1.0:
        raise RuntimeError("trim did not converge")
    plant = msd_plant(point)
    if point["stiffness"] == 3.0 and point["damping"] == 0.5:
        A = plant.A.copy()
        A[1, 0] = np.nan
        return LinearPlant(A, plant.B, plant.C, plant.D, plant.state_names,
                           plant.input_names, plant.output_names)
    return plant


DESIGN = (toml_variables(("stiffness", "N/m", 1.0, 4.0), ("damping", "N s/m", 0.5, 2.0))
          + """
[source]
model_file = "{model_file}"
function = "{function}"

[grid]
stiffness = {stiffness}
damping = {damping}

"""
          + toml_channels(["u"], ["pos", "vel"], ["d"], ["pos"])
          + toml_weights(performance=[("pos", performance_numbers(2.0, 0.435, 0.1))],
                         effort=[("u", 0.1)],
                         noise=[("pos", 0.01), ("vel", 0.01)], disturbance=[("d", 1.0)])
          + """
[gamma]
{gamma}
""")


def write_design(folder: Path, function: str = "msd_plant",
                 stiffness=(1.0, 2.0, 3.0, 4.0), damping=(0.5, 1.0),
                 gamma: str = 'policy = "common"\nmargin = 0.05') -> Path:
    text = DESIGN.format(model_file=str(HERE), function=function,
                         stiffness=list(stiffness), damping=list(damping), gamma=gamma)
    path = folder / "design.toml"
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def flaky_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("flaky")
    spec = load_design(write_design(folder, "msd_flaky"))
    out = folder / "family.h5"
    run = run_design(spec, out, fit=False)
    return run, out


# ----------------------------------------------------------------------------- tests
def test_failures_recorded_and_run_continues(flaky_run):
    run, out = flaky_run
    fam = read_family(out)
    pts = fam.points
    raised = np.flatnonzero((pts[:, 0] == 2.0) & (pts[:, 1] == 1.0))[0]
    nan = np.flatnonzero((pts[:, 0] == 3.0) & (pts[:, 1] == 0.5))[0]
    assert fam.status[raised] == "failed" and "trim did not converge" in fam.reasons[raised]
    assert fam.status[nan] == "failed" and "NaN" in fam.reasons[nan]
    for i in (raised, nan):
        assert "\n" not in fam.reasons[i]
        assert np.isnan(fam.gamma_opt[i])
        assert not fam.controller["A"][i].any()
    others = np.setdiff1d(np.arange(len(pts)), [raised, nan])
    assert (fam.status[others] == "ok").all(), fam.reasons
    assert np.isfinite(fam.gamma_opt[others]).all()
    assert not Path(str(out).replace(".h5", ".partial.h5")).exists()


def test_common_gamma_from_stored_optima(flaky_run):
    _, out = flaky_run
    # Recompute with plain h5py: gamma = max(gamma_opt over ok points) * (1 + margin).
    with h5py.File(out, "r") as f:
        opt = f["points/gamma_opt"][()]
        status = np.array([s.decode() for s in f["points/status"][()]])
        gamma = float(f.attrs["gamma"])
    assert gamma == pytest.approx(np.max(opt[status == "ok"]) * 1.05, rel=1e-12)


def _lower_lft(P: dict, i: int, K: tuple):
    """Closed loop of P (D22 = 0 here) with u = K y: A_cl by Zhou-Doyle-Glover eq. 10.3."""
    A, B2, C2 = P["A"][i], P["B2"][i], P["C2"][i]
    Ak, Bk, Ck, Dk = K
    assert not P["D22"][i].any()
    return np.block([[A + B2 @ Dk @ C2, B2 @ Ck], [Bk @ C2, Ak]])


def test_controllers_stabilize_and_meet_gamma(flaky_run):
    from schedule.norms import closed_loop, h_infinity_norm
    from schedule.plant import GeneralizedPlant

    _, out = flaky_run
    fam = read_family(out)
    for i in np.flatnonzero(fam.ok):
        K = tuple(fam.controller[k][i] for k in "ABCD")
        eig = np.linalg.eigvals(_lower_lft(fam.plant, i, K))
        assert eig.real.max() < 0, f"point {i} unstable"
        plant = GeneralizedPlant(**{k: fam.plant[k][i] for k in fam.plant})
        norm, _ = h_infinity_norm(*closed_loop(plant, K))
        assert norm < fam.gamma, (i, norm, fam.gamma)
        # gamma_opt is a lower bound on any stabilizing controller's norm (definition).
        assert norm >= fam.gamma_opt[i] * (1 - 1e-3)


def test_fixed_gamma_fails_points_above(tmp_path, flaky_run):
    run, _ = flaky_run
    opt = run.family.gamma_opt[run.family.ok]
    value = float(np.median(opt))
    if not opt.min() < value < opt.max():
        pytest.skip("optima do not spread around the median")
    spec = load_design(write_design(tmp_path, "msd_flaky",
                                    gamma=f'policy = "fixed"\nvalue = {value!r}'))
    fam = run_design(spec, None, fit=False).family
    assert fam.gamma == value
    above = np.isfinite(fam.gamma_opt) & (fam.gamma_opt >= value)
    assert above.any()
    for i in np.flatnonzero(above):
        assert fam.status[i] == "failed" and "fixed gamma" in fam.reasons[i]


def test_common_gamma_function():
    # Definition of the policies (design schema): max * (1 + margin) over ok points.
    assert common_gamma(np.array([1.0, 3.0, np.nan]), np.array([1, 1, 0], bool),
                        "common", 0.1) == pytest.approx(3.3)
    assert common_gamma(np.array([1.0]), np.array([True]), "fixed", value=7.0) == 7.0
    with pytest.raises(InputError, match="no operating point"):
        common_gamma(np.array([np.nan]), np.array([False]))


def test_extend_family_keeps_gamma(tmp_path, flaky_run):
    run, _ = flaky_run
    spec = load_design(write_design(tmp_path, "msd_flaky"))
    ext = extend_family(run.family, spec, [[2.5, 0.75]])
    assert len(ext.points) == len(run.family.points) + 1
    assert ext.status[-1] == "ok" and ext.gamma == run.family.gamma
    np.testing.assert_array_equal(ext.controller["A"][:-1], run.family.controller["A"])
    assert ext.gamma_opt[-1] < ext.gamma


def test_cli_json_and_bad_input(tmp_path):
    design = write_design(tmp_path, stiffness=(1.0, 4.0), damping=(0.5,))
    runner = CliRunner()
    res = runner.invoke(main, ["design", str(design), "--out", str(tmp_path / "f.h5"),
                               "--json", "--no-fit"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.output)
    assert info["points"] == 2 and info["computed"]["gamma_opt"] == 2
    assert (tmp_path / "f.h5").exists()
    res = runner.invoke(main, ["design", str(design), "--out", str(tmp_path / "g.h5"),
                               "--frobnicate"])
    assert res.exit_code == 2
    res = runner.invoke(main, ["design", str(tmp_path / "missing.toml"), "--out",
                               str(tmp_path / "g.h5")])
    assert res.exit_code == 2 and "does not exist" in res.output
    res = runner.invoke(main, ["design", str(design), "--out",
                               str(tmp_path / "no_such_dir" / "g.h5")])
    assert res.exit_code == 2 and "does not exist" in res.output
    assert not (tmp_path / "g.h5").exists()


# ----------------------------------------------------------------------------- scale
def _scattered_design(folder: Path, n: int) -> Path:
    r = np.random.default_rng(0)
    pts = np.column_stack([r.uniform(1.0, 4.0, n), r.uniform(0.5, 2.0, n)])
    text = DESIGN.format(model_file=str(HERE), function="msd_plant", stiffness=[1.0],
                         damping=[0.5], gamma='policy = "common"\nmargin = 0.05')
    text = text.replace("stiffness = [1.0]\ndamping = [0.5]", f"points = {pts.tolist()}")
    path = folder / f"scattered{n}.toml"
    path.write_text(text)
    return path


def test_plant_stage_memory_per_point_is_that_of_the_stored_plants(tmp_path):
    # The model and weights are evaluated chunk by chunk and only the stacked results are
    # kept: the memory each extra point costs (tracemalloc peak, difference of two
    # envelope sizes) must stay near the bytes of its stored plant, whatever per-point
    # objects the model and the weights create. Keeping them (one LinearPlant and one
    # GeneralizedPlant per point) costs several times the stored bytes.
    import tracemalloc

    from schedule.family import plants_for

    plants_for(load_design(_scattered_design(tmp_path, 20)), chunk_size=32)  # imports
    peaks, stored = {}, {}
    for n in (256, 1024):
        spec = load_design(_scattered_design(tmp_path, n))
        tracemalloc.start()
        got = plants_for(spec, chunk_size=64)
        peaks[n] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        assert got.valid.all() and got.plant["A"].shape[0] == n
        stored[n] = sum(v.nbytes for v in got.plant.values()) / n
    per_point = (peaks[1024] - peaks[256]) / (1024 - 256)
    assert per_point < 2.0 * stored[1024], (per_point, stored[1024])


def test_estimate_is_within_a_factor_of_two_of_the_run(tmp_path):
    # the ratio of the estimate to the time measured right after it (same machine, same
    # load), on a 20 x 20 grid with the interpolant choice
    from schedule.family import estimate_design

    axis = [float(v) for v in np.linspace(1.0, 4.0, 20)]
    spec = load_design(write_design(tmp_path, stiffness=axis,
                                    damping=[float(v) for v in np.linspace(0.5, 2.0, 20)]))
    est = estimate_design(spec)
    run = run_design(spec, None)
    assert est.points == 400 and set(est.stage_seconds) == {"plants", "gamma", "controllers",
                                                            "fit"}
    assert 0.5 <= est.seconds / run.seconds <= 2.0, (est.to_dict(), run.stage_seconds)


def test_large_run_needs_yes(tmp_path, monkeypatch):
    import schedule.family as family

    design = write_design(tmp_path, stiffness=[float(v) for v in np.linspace(1.0, 4.0, 16)],
                          damping=[float(v) for v in np.linspace(0.5, 2.0, 16)])  # estimated
    monkeypatch.setattr(family, "CONFIRM_SECONDS", 1e-3)  # everything counts as long
    runner = CliRunner()
    out = tmp_path / "f.h5"
    res = runner.invoke(main, ["design", str(design), "--out", str(out), "--no-fit"])
    assert res.exit_code == 2 and "pass --yes" in res.output and not out.exists()
    assert res.output.count("\n") == 1
    res = runner.invoke(main, ["design", str(design), "--out", str(out), "--no-fit", "--json"])
    assert res.exit_code == 2 and not out.exists()
    report = json.loads(res.output[:res.output.rindex("}") + 1])
    assert report["started"] is False and report["estimate"]["points"] == 256
    res = runner.invoke(main, ["design", str(design), "--out", str(out), "--no-fit", "--json",
                               "--yes"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.output)
    assert info["estimate"]["points"] == 256 and info["points"] == 256 and out.exists()
