"""Tests of schedule/interpolate.py, schedule/coordinates.py and `schedule inspect`."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from schedule.coordinates import check_coordinates, check_family_coordinates
from schedule.errors import InputError
from schedule.hinf import central_controller, optimal_gamma
from schedule.interpolate import (
    CONTROLLER_KEYS,
    PLANT_KEYS,
    ScheduledController,
    choose_interpolant,
    evidence_from_arrays,
    evidence_to_arrays,
    fit_for_family,
    leave_one_out,
)
from schedule.norms import closed_loop, h_infinity_norm, is_stable
from schedule.plant import GeneralizedPlant
from schedule.types import Family, SchedulingVariable

K_AXIS = (1.0, 2.0, 3.0, 4.0)
C_AXIS = (0.2, 0.5, 1.0)


def spring_plant(k: float, c: float) -> GeneralizedPlant:
    """Mass-spring-damper x'' = -k x - c x' + u + d, measured y = x + n, z = [x; u]."""
    return GeneralizedPlant(
        A=np.array([[0.0, 1.0], [-k, -c]]), B1=np.array([[0.0, 0.0], [1.0, 0.0]]),
        B2=np.array([[0.0], [1.0]]), C1=np.array([[1.0, 0.0], [0.0, 0.0]]),
        C2=np.array([[1.0, 0.0]]), D11=np.zeros((2, 2)), D12=np.array([[0.0], [1.0]]),
        D21=np.array([[0.0, 1.0]]), D22=np.zeros((1, 1)))


def _family(plants, controllers, pieces, points, gamma, grid=True) -> Family:
    n = len(points)
    stack = lambda objs: {k: np.stack([o[k] for o in objs]) for k in objs[0]}  # noqa: E731
    return Family(
        variables=(SchedulingVariable("k", "N/m", K_AXIS[0], K_AXIS[-1]),
                   SchedulingVariable("c", "N s/m", C_AXIS[0], C_AXIS[-1])),
        points=np.asarray(points, float), status=np.array(["ok"] * n, dtype="<U6"),
        reasons=("",) * n, gamma_opt=np.full(n, np.nan), gamma=gamma,
        plant=stack([p.to_arrays() for p in plants]), controller=stack(controllers),
        pieces=stack(pieces) if pieces else {},
        breakpoints=(np.array(K_AXIS), np.array(C_AXIS)) if grid else None,
        grid_index=np.array([[K_AXIS.index(p[0]), C_AXIS.index(p[1])] for p in points])
        if grid else None,
        measured_names=("y",), control_names=("u",))


@pytest.fixture(scope="module")
def hinf_family() -> Family:
    points = [(k, c) for k in K_AXIS for c in C_AXIS]
    plants = [spring_plant(*p) for p in points]
    gamma = 1.1 * max(optimal_gamma(p) for p in plants)
    ks = [central_controller(p, gamma) for p in plants]
    return _family(plants, [dict(zip(CONTROLLER_KEYS, k.as_tuple(), strict=True)) for k in ks],
                   [k.pieces.to_arrays() for k in ks], points, gamma)


def affine_family() -> Family:
    """Controllers that are an exact affine function of (k, c) (not designed; any plant)."""
    r = np.random.default_rng(3)
    base = {"A": r.normal(size=(3, 3)) - 4 * np.eye(3), "B": r.normal(size=(3, 1)),
            "C": r.normal(size=(1, 3)), "D": r.normal(size=(1, 1))}
    dk = {k: r.normal(size=v.shape) for k, v in base.items()}
    dc = {k: r.normal(size=v.shape) for k, v in base.items()}
    points = [(k, c) for k in K_AXIS for c in C_AXIS]
    ctrl = [{n: base[n] + p[0] * dk[n] + p[1] * dc[n] for n in base} for p in points]
    return _family([spring_plant(*p) for p in points], ctrl, None, points, 2.0)


# ----------------------------------------------------------------------------- controller
@pytest.mark.parametrize("form", ["matrices", "observer"])
def test_scheduled_controller_reproduces_the_designed_controllers_at_the_points(hinf_family,
                                                                                form):
    sc = ScheduledController.fit(hinf_family, form, "multilinear")
    K = sc.evaluate(hinf_family.points)
    for n in CONTROLLER_KEYS:
        assert np.allclose(K[n], hinf_family.controller[n], rtol=1e-9, atol=1e-9)
    P = sc.plant_at(hinf_family.points)
    for n in PLANT_KEYS:
        assert np.allclose(P[n], hinf_family.plant[n], atol=1e-12)


def test_controllers_at_the_points_meet_gamma_on_the_true_plant(hinf_family):
    # Zhou, Doyle and Glover (1996), Thm 17.1 (from memory): the central controller at
    # gamma > gamma_opt stabilizes the plant and gives ||T_zw||_inf < gamma
    sc = ScheduledController.fit(hinf_family, "observer", "spline")
    K = sc.evaluate(hinf_family.points)
    for i in range(len(hinf_family.points)):
        P = GeneralizedPlant.from_arrays({n: hinf_family.plant[n][i] for n in PLANT_KEYS})
        cl = closed_loop(P, tuple(K[n][i] for n in CONTROLLER_KEYS))
        assert is_stable(cl[0])
        assert h_infinity_norm(*cl)[0] < hinf_family.gamma


def test_derivative_of_matrices_form_matches_finite_differences(hinf_family):
    # reference: central differences of evaluate()
    sc = ScheduledController.fit(hinf_family, "matrices", "spline")
    q = np.array([[1.7, 0.33], [3.2, 0.8]])
    for j, h in ((0, 1e-5), (1, 1e-6)):
        dq = np.zeros(2)
        dq[j] = h
        hi, lo, d = sc.evaluate(q + dq), sc.evaluate(q - dq), sc.derivative(q, j)
        for n in CONTROLLER_KEYS:
            fd = (hi[n] - lo[n]) / (2 * h)
            assert np.allclose(d[n], fd, rtol=1e-5, atol=1e-6 * (1 + np.abs(fd).max()))


def test_round_trip_through_the_family_file(hinf_family, tmp_path):
    from schedule.store import read_family, write_family

    fam = hinf_family
    q = np.random.default_rng(0).uniform([1, 0.2], [4, 1], size=(40, 2))
    for form, kind in (("observer", "gaussian_process"), ("matrices", "rbf"),
                       ("matrices", "delaunay"), ("observer", "polynomial")):
        sc = ScheduledController.fit(fam, form, kind)
        fam2 = Family(**{**fam.__dict__, "interpolant": sc.to_arrays(), "extra": {}})
        write_family(tmp_path / "f.h5", fam2)
        back = ScheduledController.from_family(read_family(tmp_path / "f.h5"))
        a, b = sc.evaluate(q), back.evaluate(q)
        for n in CONTROLLER_KEYS:
            assert np.all(np.abs(a[n] - b[n]) <= 1e-12 * (1 + np.abs(a[n]).max())), (form, kind)


def test_missing_interpolant_and_bad_form_are_clear_errors(hinf_family):
    with pytest.raises(InputError, match="no interpolant"):
        ScheduledController.from_family(hinf_family)
    with pytest.raises(InputError, match="unknown interpolation form"):
        ScheduledController.fit(hinf_family, "states", "multilinear")
    sc = ScheduledController.fit(hinf_family, "matrices", "multilinear")
    with pytest.raises(InputError, match=r"shape \(M, 2\)"):
        sc.evaluate(np.zeros((4, 3)))


# ----------------------------------------------------------------------------- LOO
def test_leave_one_out_is_exact_for_affine_controllers_with_multilinear():
    # analytic: a left-out grid node is refilled by linear interpolation along the grid
    # lines (linear extrapolation at the boundary), exact for affine data
    fam = affine_family()
    res = leave_one_out(fam, "matrices", "multilinear")
    assert res.rel_error.shape == (12,)
    assert np.nanmax(res.rel_error) < 1e-12
    # Delaunay is exact inside the hull (interior nodes: k in 2, 3 and c = 0.5)
    res = leave_one_out(fam, "matrices", "delaunay")
    interior = (fam.points[:, 0] > 1) & (fam.points[:, 0] < 4) & (fam.points[:, 1] == 0.5)
    assert np.max(res.rel_error[interior]) < 1e-12


def test_leave_one_out_norms_are_computed_on_the_true_plant(hinf_family):
    res = leave_one_out(hinf_family, "observer", "multilinear")
    assert res.norm.shape == (12,)
    # reference: recompute one entry with norms.py from the predicted controller of a
    # refit without that point (done here by hand)
    i = 4
    keep = np.arange(12) != i
    sub = Family(**{**hinf_family.__dict__,
                    "status": np.where(keep, "ok", "failed").astype("<U6")})
    K = ScheduledController.fit(sub, "observer", "multilinear").evaluate(
        hinf_family.points[i:i + 1])
    P = GeneralizedPlant.from_arrays({n: hinf_family.plant[n][i] for n in PLANT_KEYS})
    cl = closed_loop(P, tuple(K[n][0] for n in CONTROLLER_KEYS))
    assert res.stable[i] == is_stable(cl[0])
    if res.stable[i]:
        assert np.isclose(res.norm[i], h_infinity_norm(*cl)[0], rtol=1e-5)


def test_choose_interpolant_ranks_and_evidence_round_trips(hinf_family):
    sc, evidence = choose_interpolant(hinf_family)
    labels = [r.label for r in evidence]
    assert len(labels) == 12 and "observer/gaussian_process" in labels
    best = min((r for r in evidence if not r.failure), key=lambda r: r.rank_key())
    assert (sc.form, sc.kind) == (best.form, best.kind)
    assert all(best.n_unstable <= r.n_unstable for r in evidence)
    arrays = evidence_to_arrays(evidence, f"{sc.form}/{sc.kind}")
    back = evidence_from_arrays(arrays)
    for r, b in zip(evidence, back, strict=True):
        assert r.label == b.label and r.n_unstable == b.n_unstable
        assert np.array_equal(r.norm, b.norm, equal_nan=True)
        assert r.norm_status == b.norm_status


def test_fit_for_family_respects_a_fixed_choice(hinf_family):
    interp, evidence = fit_for_family(hinf_family, "matrices", "spline")
    assert interp["attrs"]["form"] == "matrices" and interp["attrs"]["kind"] == "spline"
    assert list(evidence["loo_candidates"]) == ["matrices/spline"]
    assert evidence["loo_chosen"] == "matrices/spline"
    with pytest.raises(InputError, match="unknown interpolant kind"):
        fit_for_family(hinf_family, "matrices", "kriging")


def test_grid_kinds_are_skipped_for_scattered_families(hinf_family):
    fam = Family(**{**hinf_family.__dict__, "breakpoints": None, "grid_index": None})
    _, evidence = choose_interpolant(fam, "matrices", "auto")
    assert [r.kind for r in evidence] == ["delaunay", "polynomial", "rbf", "gaussian_process"]


# ----------------------------------------------------------------------------- coordinates
def _transform_point(fam: Family, i: int, T: np.ndarray) -> Family:
    plant = {k: v.copy() for k, v in fam.plant.items()}
    Ti = np.linalg.inv(T)
    plant["A"][i] = T @ plant["A"][i] @ Ti
    for k in ("B1", "B2"):
        plant[k][i] = T @ plant[k][i]
    for k in ("C1", "C2"):
        plant[k][i] = plant[k][i] @ Ti
    return Family(**{**fam.__dict__, "plant": plant})


@pytest.mark.parametrize("T", [np.array([[0.0, 1.0], [1.0, 0.0]]),  # states permuted
                               np.diag([1.0, 10.0]),                   # units changed
                               np.diag([-1.0, 1.0])])                  # sign flipped
def test_coordinate_diagnostic_flags_a_point_in_other_state_coordinates(hinf_family, T):
    assert check_family_coordinates(hinf_family).ok
    bad = _transform_point(hinf_family, 7, T)
    # reference (analytic): a similarity transform leaves the frequency response unchanged
    from schedule.norms import frequency_response

    w = np.logspace(-2, 2, 30)
    P0 = [hinf_family.plant[n][7] for n in ("A", "B1", "C1", "D11")]
    P1 = [bad.plant[n][7] for n in ("A", "B1", "C1", "D11")]
    assert np.allclose(frequency_response(*P0, w), frequency_response(*P1, w), atol=1e-12)
    rep = check_family_coordinates(bad)
    assert not rep.ok and rep.suspects == (7,)
    assert "point 7" in rep.message and "same state coordinates" in rep.message
    assert "\n" not in rep.message


def test_coordinate_diagnostic_on_scattered_points_uses_delaunay_neighbours():
    r = np.random.default_rng(5)
    pts = r.uniform(size=(15, 2))
    A = np.stack([np.array([[0.0, 1.0], [-1 - p[0], -0.5 - p[1]]]) for p in pts])
    B = np.tile(np.array([[0.0], [1.0]]), (15, 1, 1))
    C = np.tile(np.array([[1.0, 0.0]]), (15, 1, 1))
    D = np.zeros((15, 1, 1))
    assert check_coordinates(pts, A, B, C, D).ok
    T = np.array([[0.0, 2.0], [1.0, 0.0]])
    A[3], B[3], C[3] = T @ A[3] @ np.linalg.inv(T), T @ B[3], C[3] @ np.linalg.inv(T)
    rep = check_coordinates(pts, A, B, C, D)
    assert 3 in rep.suspects


# ----------------------------------------------------------------------------- CLI
def test_inspect_command_text_json_and_bad_file(hinf_family, tmp_path):
    from schedule.cli.main import main
    from schedule.store import write_family

    fam = Family(**{**hinf_family.__dict__,
                    "status": np.array(["ok"] * 11 + ["failed"], dtype="<U6"),
                    "reasons": ("",) * 11 + ("Y Riccati has no stabilizing solution",),
                    "gamma_opt": np.linspace(1, 2, 12)})
    interp, evidence = fit_for_family(fam, "auto", "multilinear")
    fam.interpolant, fam.extra = interp, dict(evidence)
    write_family(tmp_path / "fam.h5", fam)
    runner = CliRunner()
    out = runner.invoke(main, ["inspect", str(tmp_path / "fam.h5")])
    assert out.exit_code == 0, out.output
    assert "Y Riccati" in out.output and "leave-one-out" in out.output
    out = runner.invoke(main, ["inspect", str(tmp_path / "fam.h5"), "--json"])
    info = json.loads(out.output)
    assert info["failed"] == 1 and info["gamma_opt_max"]["index"] == 11
    assert info["leave_one_out"]["source"] == "file"
    assert {r["kind"] for r in info["leave_one_out"]["table"]} == {"multilinear"}
    assert info["interpolant"]["kind"] == "multilinear"
    (tmp_path / "junk.h5").write_bytes(b"not an hdf5 file")
    out = runner.invoke(main, ["inspect", str(tmp_path / "junk.h5")])
    assert out.exit_code == 2 and out.output.count("\n") <= 2


def test_inspect_computes_evidence_only_when_asked(hinf_family, tmp_path, monkeypatch):
    import schedule.interpolate as interp
    from schedule.cli.main import main
    from schedule.store import write_family

    write_family(tmp_path / "bare.h5", hinf_family)  # as `design --no-fit` writes it
    calls = []
    real = interp.choose
    monkeypatch.setattr(interp, "choose", lambda *a, **k: calls.append(1) or real(*a, **k))
    runner = CliRunner()
    out = runner.invoke(main, ["inspect", str(tmp_path / "bare.h5"), "--json"])
    assert out.exit_code == 0, out.output
    info = json.loads(out.output)
    assert calls == [] and info["leave_one_out"]["table"] == []
    assert "--evidence" in info["leave_one_out"]["source"]
    out = runner.invoke(main, ["inspect", str(tmp_path / "bare.h5"), "--json", "--evidence"])
    info = json.loads(out.output)
    assert calls == [1] and info["leave_one_out"]["source"] == "computed"
    assert len(info["leave_one_out"]["table"]) == len(interp.candidate_pairs(hinf_family))


# ----------------------------------------------------------------------------- the choice
@pytest.fixture(scope="module")
def crane_family() -> Family:
    from importlib import resources

    from schedule.design_file import load_design
    from schedule.family import run_design

    with resources.as_file(resources.files("schedule.demo_crane") / "crane_design.toml") as p:
        return run_design(load_design(p), None, fit=False).family


def _evidence_by_refitting(fam: Family) -> list:
    """The definition of the evidence: every candidate refitted without each ok point
    (Stone 1974), the prediction closed with the true plant there (norms.closed_loop,
    norms.h_infinity_norm, checked against scipy in tests/test_norms.py)."""
    from schedule.errors import ScheduleError
    from schedule.interpolate import LooResult, candidate_pairs

    rows = np.flatnonzero(fam.ok)
    pts = fam.points[rows]
    out = []
    for form, kind in candidate_pairs(fam):
        sc = ScheduledController.fit(fam, form, kind)
        source = fam.controller if form == "matrices" else fam.pieces
        part, ok = sc.part.leave_one_out_by_refit(pts, sc.part_layout.pack(source, rows))
        plant, pok = sc.plant.leave_one_out_by_refit(pts, sc.plant_layout.pack(fam.plant, rows))
        err, norm = np.full(rows.size, np.nan), np.full(rows.size, np.inf)
        stable = np.zeros(rows.size, dtype=bool)
        for i in np.flatnonzero(ok & pok):
            K = sc.part_layout.unpack(part[i:i + 1])
            try:
                if form == "observer":
                    K = sc._assemble(pts[i:i + 1], K, sc.plant_layout.unpack(plant[i:i + 1]))
            except ScheduleError:
                continue
            block = np.block([[K["A"][0], K["B"][0]], [K["C"][0], K["D"][0]]])
            true = np.block([[fam.controller[n][rows[i]] for n in ("A", "B")],
                             [fam.controller[n][rows[i]] for n in ("C", "D")]])
            err[i] = np.linalg.norm(block - true) / np.linalg.norm(true)
            P = GeneralizedPlant.from_arrays({n: fam.plant[n][rows[i]] for n in PLANT_KEYS})
            cl = closed_loop(P, tuple(K[n][0] for n in CONTROLLER_KEYS))
            if is_stable(cl[0]):
                stable[i], norm[i] = True, h_infinity_norm(*cl, rtol=1e-6)[0]
        out.append(LooResult(form, kind, fam.gamma, rows, err, norm, stable))
    return out


def test_crane_choice_and_evidence_are_those_of_refitting_every_point(crane_family):
    from schedule.interpolate import best_candidate, choose

    choice = choose(crane_family)
    reference = _evidence_by_refitting(crane_family)
    best = best_candidate(reference)
    assert (choice.controller.form, choice.controller.kind) == (best.form, best.kind)
    for got, ref in zip(choice.evidence, reference, strict=True):
        assert got.label == ref.label and got.norm_status == "complete"
        assert np.array_equal(got.stable, ref.stable), got.label
        assert np.allclose(got.rel_error, ref.rel_error, rtol=1e-8, equal_nan=True)
        assert np.isclose(got.max_stable_norm_ratio, ref.max_stable_norm_ratio, rtol=1e-5)


def test_costly_kinds_are_left_out_above_the_limit_and_the_notes_say_so(hinf_family):
    from schedule.interpolate import choose

    choice = choose(hinf_family, "matrices", "auto", costly_kinds_max_points=5)
    kinds = [r.kind for r in choice.evidence]
    assert "rbf" not in kinds and "gaussian_process" not in kinds and "spline" in kinds
    assert any("rbf, gaussian_process not tried: 12 ok points > 5" in n for n in choice.notes)
    named = choose(hinf_family, "matrices", "rbf", costly_kinds_max_points=5)
    assert [r.kind for r in named.evidence] == ["rbf"]  # a kind the design names is tried


def test_pruned_evidence_makes_the_same_choice_as_complete_evidence(hinf_family, monkeypatch):
    # reference: the same choice with every norm computed; pruning may only skip norms
    # that cannot change the ranking (first key: fewest unstable; then the max norm)
    import schedule.interpolate as interp

    complete = interp.choose(hinf_family)
    monkeypatch.setattr(interp, "COMPLETE_EVIDENCE_LOOPS", 0)
    monkeypatch.setattr(interp, "NORM_PIECE", 2)
    pruned = interp.choose(hinf_family)
    assert (pruned.controller.form, pruned.controller.kind) == (complete.controller.form,
                                                                complete.controller.kind)
    status = [r.norm_status for r in pruned.evidence]
    assert "bound" in status and "skipped" in status
    best = interp.best_candidate(pruned.evidence)
    for r, full in zip(pruned.evidence, complete.evidence, strict=True):
        assert r.n_unstable == full.n_unstable
        if r.norm_status == "skipped":
            assert r.n_unstable > best.n_unstable
        elif r.norm_status == "bound":  # a lower bound of the maximum, above the best one
            assert best.max_stable_norm_ratio < r.max_stable_norm_ratio
            assert r.max_stable_norm_ratio <= full.max_stable_norm_ratio * (1 + 1e-12)
        else:
            assert np.isclose(r.max_stable_norm_ratio, full.max_stable_norm_ratio, rtol=1e-9)
    assert any("norms computed only as far as the ranking needs" in n for n in pruned.notes)
