"""What sets gamma_opt (schedule.hinf.gamma_opt_limits) and how `schedule inspect` says it.

Every plant here is built so that its optimal gamma and the condition that sets it are
known in closed form (derivations beside each plant), outside the code under test:

- the D11 bound: with C1 = 0 the performance outputs see no state, so the closed loop's
  D11 block the controller cannot change is a lower bound on ||T||, reached by K = 0
  (Parrott-type bound; Glover and Doyle 1988; Zhou, Doyle and Glover 1996, Theorem 17.1);
- the state-feedback sub-problem: a scalar unstable plant whose disturbance is measured
  (disturbance feedforward: Y = 0), so gamma_opt is the X Riccati bound b1 / b2;
- the output-injection sub-problem: the dual of that plant (transposed transfer
  matrix, same norm), whose Y Riccati bound is the same b1 / b2.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from _files import run_cli

from schedule.hinf import gamma_opt_limits, limit_channels, optimal_gamma
from schedule.plant import GeneralizedPlant


def _plant(A, B1, B2, C1, C2, D11, D12, D21, D22=None) -> GeneralizedPlant:
    m = [np.atleast_2d(np.asarray(x, dtype=float)) for x in (A, B1, B2, C1, C2, D11, D12, D21)]
    D22 = np.zeros((m[4].shape[0], m[2].shape[1])) if D22 is None else np.atleast_2d(D22)
    return GeneralizedPlant(*m, D22)


def d11_row_plant(d: float, a: float = -1.0) -> GeneralizedPlant:
    """z = [z_pos (no state, not reached by u); z_eff = u], w = [w_load; w_noise],
    y = x + w_noise, x' = a x + w_load + u (a < 0).

    D11 = [[0, d], [0, 0]]: the measurement noise reaches z_pos directly. u does not
    appear in z_pos, so T(z_pos, w_noise) = d for every controller: ||T|| >= |d|, and
    K = 0 gives T = [[0, d], [0, 0]] with norm exactly |d|. gamma_opt = |d|, set by the
    row block [D11 row of z_pos] (z the controls cannot reach)."""
    return _plant([[a]], [[1.0, 0.0]], [[1.0]], [[0.0], [0.0]], [[1.0]],
                  [[0.0, d], [0.0, 0.0]], [[0.0], [1.0]], [[0.0, 1.0]])


def d11_column_plant(d: float) -> GeneralizedPlant:
    """z = [z_eff = u + d w_load; z_pos = 0 x], w = [w_load (not measured); w_noise],
    y = x + w_noise, x' = -x + w_load + u.

    D11 = [[d, 0], [0, 0]] with D12 = [1; 0]: the controller output u reaches z_eff but
    only through y, which does not contain w_load (D21 = [0, 1]), so at infinite
    frequency T(z_eff, w_load) = d + D_K * 0 = d for every proper K: ||T|| >= |d|, and
    K = 0 reaches it. gamma_opt = |d|, set by the column block (w the measurements do
    not see)."""
    return _plant([[-1.0]], [[1.0, 0.0]], [[1.0]], [[0.0], [0.0]], [[1.0]],
                  [[d, 0.0], [0.0, 0.0]], [[1.0], [0.0]], [[0.0, 1.0]])


def state_feedback_plant(a=1.0, b1=3.0, b2=1.5, c1=1.0, c2=1.0) -> GeneralizedPlant:
    """x' = a x + b1 w + b2 u (a > 0), z = [c1 x; u], y = c2 x + w (one w, measured).

    X Riccati (Zhou, Doyle and Glover 1996, ch. 16; D11 = 0, D12'C1 = 0):
    2 a X - (b2^2 - b1^2 / gamma^2) X^2 + c1^2 = 0. With r = b2^2 - b1^2/gamma^2 > 0 the
    stabilizing root X = (a + sqrt(a^2 + r c1^2)) / r > 0 exists (closed loop
    -sqrt(a^2 + r c1^2)); for r <= 0 every root X >= 0 leaves a + |r| X > 0 unstable.
    So the X bound is b1 / b2, and X grows without bound as gamma falls to it.
    Y Riccati: B1 (I - D21'(D21 D21')^-1 D21) B1' = 0 (the disturbance is the
    measurement's only noise), so Y = 0 is the stabilizing solution when
    a - b1 c2 < 0 (here 1 - 3 = -2), and rho(XY) = 0 < gamma^2: gamma_opt = b1 / b2
    (disturbance feedforward: output feedback does as well as full information; Doyle,
    Glover, Khargonekar and Francis 1989, section V; from memory)."""
    return _plant([[a]], [[b1]], [[b2]], [[c1], [0.0]], [[c2]], [[0.0], [0.0]],
                  [[0.0], [1.0]], [[1.0]])


def dual(p: GeneralizedPlant) -> GeneralizedPlant:
    """The transposed problem: P(s)' has the same optimal gamma, X and Y swap roles."""
    return GeneralizedPlant(p.A.T, p.C1.T, p.C2.T, p.B1.T, p.B2.T, p.D11.T, p.D21.T,
                            p.D12.T, p.D22.T)


@pytest.mark.parametrize("d", [0.99997, 5.0, 2e-3])
def test_d11_row_block_sets_gamma_opt(d):
    p = d11_row_plant(d)
    g = optimal_gamma(p)
    assert g == pytest.approx(d, rel=2e-4)  # analytic gamma_opt = d (docstring)
    (lim,) = gamma_opt_limits([p], [g])
    assert lim.cause == "d11" and lim.block == "row"
    assert lim.bound == pytest.approx(d, rel=1e-12)
    assert (lim.z, lim.w) == (0, 1)  # z_pos / w_noise
    assert lim.z_share == pytest.approx(1.0) and lim.w_share == pytest.approx(1.0)


def test_d11_column_block_sets_gamma_opt():
    d = 0.8
    p = d11_column_plant(d)
    g = optimal_gamma(p)
    assert g == pytest.approx(d, rel=2e-4)
    (lim,) = gamma_opt_limits([p], [g])
    assert (lim.cause, lim.block, lim.z, lim.w) == ("d11", "column", 0, 0)  # z_eff / w_load
    assert lim.bound == pytest.approx(d, rel=1e-12)


def test_state_feedback_and_output_injection_bounds():
    a, b1, b2 = 1.0, 3.0, 1.5
    p = state_feedback_plant(a, b1, b2)
    g = optimal_gamma(p)
    assert g == pytest.approx(b1 / b2, rel=2e-4)  # closed form (docstring)
    q = dual(p)
    gq = optimal_gamma(q)
    assert gq == pytest.approx(b1 / b2, rel=2e-4)  # the transpose has the same norm
    lp, lq = gamma_opt_limits([p, q], [g, gq])
    assert lp.cause == "state_feedback"
    assert lq.cause == "output_injection"
    assert np.isnan(lp.bound) and lp.z == -1


def test_channels_whose_halving_lowers_gamma_opt():
    # state_feedback_plant: gamma_opt = b1 / b2 with b1 the disturbance's entry and b2
    # the control's, the control weighted by 1 in z_eff. Halving w multiplies b1 by 1/2;
    # halving z_eff (z_eff = u / 2) is the control entering with 2 b2 at unit cost: both
    # halve gamma_opt. Halving z_x (c1 -> c1 / 2) leaves b1 / b2 unchanged (docstring:
    # the bound does not depend on c1).
    p = state_feedback_plant()
    assert limit_channels(p, optimal_gamma(p)) == ([1], [0])
    # the dual problem: the roles of z and w swap
    q = dual(p)
    assert limit_channels(q, optimal_gamma(q)) == ([0], [1])
    # d11_row_plant: gamma_opt = |d| = |D11(z_pos, w_noise)|; halving z_pos or w_noise
    # halves it, halving z_eff or w_load leaves it (K = 0 stays optimal).
    r = d11_row_plant(0.9)
    assert limit_channels(r, optimal_gamma(r)) == ([0], [1])


def test_limit_is_invariant_to_units_and_state_coordinates():
    # gamma_opt and its cause do not depend on units (gamma scales with z/w units) or
    # state coordinates (Zhou, Doyle and Glover 1996: the problem is coordinate-free).
    p = d11_row_plant(0.7)
    s_z, s_w, T = 1e3, 1e-2, np.array([[250.0]])
    q = GeneralizedPlant(p.A, p.B1 * s_w / T[0, 0], p.B2 / T[0, 0], s_z * p.C1 * T[0, 0],
                         p.C2 * T[0, 0], s_z * p.D11 * s_w, s_z * p.D12, p.D21 * s_w, p.D22)
    g = optimal_gamma(q)
    assert g == pytest.approx(0.7 * s_z * s_w, rel=2e-4)
    (lim,) = gamma_opt_limits([q], [g])
    assert lim.cause == "d11" and lim.bound == pytest.approx(0.7 * s_z * s_w, rel=1e-10)
    r = state_feedback_plant()
    r2 = GeneralizedPlant(r.A, r.B1 * 7.0 / 40.0, r.B2 / 40.0, r.C1 * 40.0 * 1e-3,
                          r.C2 * 40.0, r.D11 * 7e-3, r.D12 * 1e-3, r.D21 * 7.0, r.D22)
    g2 = optimal_gamma(r2)
    assert g2 == pytest.approx(2.0 * 7e-3, rel=2e-4)
    assert gamma_opt_limits([r2], [g2])[0].cause == "state_feedback"


def test_limits_skip_missing_gamma_and_check_input():
    p = d11_row_plant(1.0)
    assert gamma_opt_limits([p], [np.nan])[0].cause == "none"
    with pytest.raises(Exception, match="one per plant"):
        gamma_opt_limits([p, p], [1.0])


def _family_file(tmp_path, plants, z_names, w_names):
    from schedule.family import synthesize_family
    from schedule.store import write_family
    from schedule.types import SchedulingVariable

    points = np.linspace(1.0, 2.0, len(plants))[:, None]
    n = plants[0].n
    names = {"measured": ("position",), "controls": ("drive",),
             "exogenous": tuple(w_names), "performance": tuple(z_names),
             "states": tuple(f"x{i}" for i in range(n))}
    run = synthesize_family(points, plants, [""] * len(plants),
                            variables=(SchedulingVariable("load", "kg", 1.0, 2.0),),
                            names=names, margin=0.1)
    path = tmp_path / "fam.h5"
    write_family(path, run.family)
    return path, run.family


def test_inspect_names_the_d11_channel(tmp_path):
    # Issue 13: "every point at 0.99997 because of one noise weight" -> inspect names it.
    d = 0.99997
    plants = [d11_row_plant(d, a=-a) for a in (0.5, 1.0, 2.0, 4.0, 8.0)]
    path, fam = _family_file(tmp_path, plants, ["e:position", "u:effort"],
                             ["d:load", "n:noise_position"])
    np.testing.assert_allclose(fam.gamma_opt, d, rtol=2e-4)  # analytic
    code, out, exc = run_cli("inspect", path)
    assert exc is None and code == 0, out
    line = next(ln for ln in out.splitlines() if ln.startswith("limit"))
    assert "at all 5 points is set by the D11 bound" in line
    assert "z 'e:position' / w 'n:noise_position'" in line
    assert "||D11 block|| = 0.99997" in line
    code, out, exc = run_cli("inspect", path, "--json")
    assert exc is None and code == 0
    (group,) = json.loads(out)["gamma_opt_limits"]["groups"]
    assert (group["cause"], group["z"], group["w"], group["points"]) == \
        ("d11", "e:position", "n:noise_position", 5)
    assert group["block_norm_max"] == pytest.approx(d, rel=1e-12)


def test_inspect_splits_points_by_what_sets_them(tmp_path):
    # Three points pinned by the D11 bound, two by the state-feedback bound, in one
    # family (one layout): state_feedback_plant with a third output z_gap = d w_bump
    # that no control reaches, from a second input w_bump that no measurement sees
    # (D21 = [1, 0]). The z_gap/w_bump channel is a static gain d that no controller
    # changes and is decoupled from the rest, so the closed loop is block diagonal and
    # gamma_opt = max(|d|, b1 / 1.5) (the larger block's norm; state_feedback_plant for
    # the second). The disturbance w_gust is still the measurement's only noise: Y = 0.
    def mixed(d, b1):
        return _plant([[1.0]], [[b1, 0.0]], [[1.5]], [[1.0], [0.0], [0.0]], [[1.0]],
                      [[0.0, 0.0], [0.0, 0.0], [0.0, d]], [[0.0], [1.0], [0.0]],
                      [[1.0, 0.0]])
    plants = [mixed(3.0, 1.5), mixed(3.0, 0.75), mixed(3.0, 2.25),
              mixed(0.1, 3.0), mixed(0.1, 4.5)]
    path, fam = _family_file(tmp_path, plants, ["e:pos", "u:drive", "e:gap"],
                             ["d:gust", "d:bump"])
    np.testing.assert_allclose(fam.gamma_opt, [3.0, 3.0, 3.0, 2.0, 3.0], rtol=2e-4)
    code, out, exc = run_cli("inspect", path, "--json")
    assert exc is None and code == 0, out
    groups = json.loads(out)["gamma_opt_limits"]["groups"]
    by = {g["cause"]: g for g in groups}
    assert set(by) == {"d11", "state_feedback"}, groups
    assert sorted(by["d11"]["indices"]) == [0, 1, 2]
    assert (by["d11"]["z"], by["d11"]["w"]) == ("e:gap", "d:bump")
    assert sorted(by["state_feedback"]["indices"]) == [3, 4]
    # at the state-feedback points the bound b1 / 1.5 involves only the control's cost
    # and the gust (test_channels_whose_halving_lowers_gamma_opt); the D11 channel
    # (0.1) stays below it when either is halved
    assert (by["state_feedback"]["z_channels"], by["state_feedback"]["w_channels"]) == \
        (["u:drive"], ["d:gust"])
    code, out, exc = run_cli("inspect", path)
    assert "set by the state-feedback sub-problem (X Riccati bound): z 'u:drive' / " \
        "w 'd:gust'" in out


def test_large_family_is_tested_on_an_even_subset(tmp_path):
    # inspect stays fast on a big family: above max_points ok points only an evenly
    # spaced subset is tested, always with the largest and the smallest gamma_opt, and
    # the text says so. Here every plant's cause is known (docstrings above): the
    # state-feedback plants have gamma_opt b1 / 1.5, the D11 plants d.
    from schedule.cli.inspect import _limit_lines, gamma_opt_limit_groups

    plants = [d11_row_plant(0.5 + 0.01 * k) for k in range(7)]
    _, fam = _family_file(tmp_path, plants, ["e:position", "u:effort"],
                          ["d:load", "n:noise_position"])
    out = gamma_opt_limit_groups(fam, max_points=4)
    assert (out["tested"], out["ok_points"]) == (4, 7)
    (group,) = out["groups"]
    assert group["cause"] == "d11" and {0, 6} <= set(group["indices"])
    (line,) = _limit_lines(out)
    assert "at all 4 tested points (of 7 ok points, evenly spaced)" in line
    full = gamma_opt_limit_groups(fam)
    assert (full["tested"], full["ok_points"]) == (7, 7)
    assert "tested" not in _limit_lines(full)[0]
