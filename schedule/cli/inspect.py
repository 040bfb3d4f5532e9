"""``schedule inspect family.h5 [--json] [--evidence]``: summary, interpolant, leave-one-out.

Inspecting reads the file and computes nothing long: what sets gamma_opt at each
point comes from the stored generalized plants (one quick existence test per point,
:func:`schedule.hinf.gamma_opt_limits`; no model code runs); the leave-one-out table is
shown when the family file holds it (``schedule design`` stores it); for a
family written with ``--no-fit`` it is computed only on request (``--evidence``).
"""

from __future__ import annotations

import json
import math

import click
import numpy as np

from ..errors import ScheduleError


def _num(v) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _point(names, row) -> dict:
    return {n: float(x) for n, x in zip(names, row, strict=True)}


def _loo_rows(evidence) -> list[dict]:
    rows = []
    for r in evidence:
        rows.append({"form": r.form, "kind": r.kind, "points": int(len(r.stable)),
                     "unstable": r.n_unstable, "max_norm_over_gamma": _num(r.max_norm_ratio),
                     "max_stable_norm_over_gamma": _num(r.max_stable_norm_ratio),
                     "median_matrix_error": _num(r.median_error), "failure": r.failure,
                     "norms": r.norm_status})
    return rows


def _design_of(family):
    """The family's stored design (None when absent or unreadable); nothing is imported."""
    if not family.design_text:
        return None
    from ..design_file import parse_design
    from ..store import family_base_dir

    try:
        return parse_design(family.design_text, family_base_dir(family) or ".")
    except (ScheduleError, ValueError):
        return None


def _same(lo: float, hi: float) -> bool:
    return hi <= lo * (1 + 1e-4)


def _range(lo: float, hi: float) -> str:
    return f"{lo:.5g}" if _same(lo, hi) else f"{lo:.5g} .. {hi:.5g}"


LIMIT_MAX_POINTS = 1000  # above this many ok points, what sets gamma_opt is tested on a subset


def gamma_opt_limit_groups(family, max_points: int = LIMIT_MAX_POINTS) -> dict:
    """What sets gamma_opt at the family's ok points, grouped (JSON-ready).

    Every ok point's stored generalized plant is tested just below its gamma_opt
    (:func:`schedule.hinf.gamma_opt_limits`); points with the same cause (and, for the
    D11 bound, the same z and w channels of the D11 block) form one group. For the
    other causes the channels are those whose halving alone lowers gamma_opt at the
    group's largest gamma_opt (:func:`schedule.hinf.limit_channels`). Groups are
    ordered by their largest gamma_opt, so the first holds the point that sets the
    common gamma. A family of more than ``max_points`` ok points is tested at
    ``max_points`` of them, evenly spaced in point order, plus those of the largest and
    the smallest gamma_opt (about 1 ms per point tested); ``tested`` and ``ok_points``
    say so.
    """
    from ..hinf import LIMIT_CAUSES, LIMIT_RTOL, gamma_opt_limits, limit_channels
    from ..plant import PLANT_KEYS, GeneralizedPlant

    opt = np.asarray(family.gamma_opt, dtype=float)
    ok = np.flatnonzero(family.ok & np.isfinite(opt))
    n_ok = int(ok.size)
    if n_ok > max_points >= 2:
        pick = np.round(np.linspace(0, n_ok - 1, max_points)).astype(int)
        ends = [int(np.argmax(opt[ok])), int(np.argmin(opt[ok]))]
        ok = ok[np.unique(np.concatenate([pick, ends]))]
    plants = [GeneralizedPlant(**{k: family.plant[k][i] for k in PLANT_KEYS}) for i in ok]
    limits = gamma_opt_limits(plants, opt[ok])
    zn, wn = family.performance_names, family.exogenous_names
    groups: dict[tuple, list[int]] = {}
    for k, lim in enumerate(limits):
        key = (lim.cause, lim.z, lim.w, lim.block) if lim.cause == "d11" else (lim.cause,)
        groups.setdefault(key, []).append(k)
    out = []
    for key, members in groups.items():
        idx = ok[members]
        g = opt[idx]
        top = int(idx[int(np.argmax(g))])
        item = {"cause": key[0], "description": LIMIT_CAUSES[key[0]], "points": len(idx),
                "of": int(len(ok)), "gamma_opt_min": float(g.min()),
                "gamma_opt_max": float(g.max()), "index_of_max": top,
                "point_of_max": _point(family.variable_names, family.points[top]),
                "indices": [int(i) for i in idx]}
        if key[0] in ("state_feedback", "output_injection", "sub_problems", "coupling"):
            # the channels, at the group's largest gamma_opt (a few existence tests)
            zs, ws = limit_channels(plants[members[int(np.argmax(g))]], float(g.max()))
            item["z_channels"] = [zn[i] if i < len(zn) else f"z{i}" for i in zs]
            item["w_channels"] = [wn[j] if j < len(wn) else f"w{j}" for j in ws]
            item["all_channels"] = len(zs) == len(zn) and len(ws) == len(wn)
        if key[0] == "d11":
            lims = [limits[k] for k in members]
            norms = np.array([lim.bound for lim in lims])
            first = lims[0]
            item.update({
                "z": zn[first.z] if 0 <= first.z < len(zn) else f"z{first.z}",
                "w": wn[first.w] if 0 <= first.w < len(wn) else f"w{first.w}",
                "z_share_min": min(lim.z_share for lim in lims),
                "w_share_min": min(lim.w_share for lim in lims),
                "block": first.block, "block_norm_min": float(norms.min()),
                "block_norm_max": float(norms.max())})
        out.append(item)
    out.sort(key=lambda it: -it["gamma_opt_max"])
    return {"tolerance": LIMIT_RTOL, "tested": int(ok.size), "ok_points": n_ok, "groups": out}


def _limit_lines(limits: dict) -> list[str]:
    lines = []
    sampled = limits.get("tested", 0) < limits.get("ok_points", 0)
    for it in limits["groups"]:
        tested = " tested" if sampled else ""
        where = (f"at all {it['points']}{tested} points" if it["points"] == it["of"]
                 else f"at {it['points']} of {it['of']}{tested} points")
        if sampled:
            where += f" (of {limits['ok_points']} ok points, evenly spaced)"
        text = (f"gamma_opt {_range(it['gamma_opt_min'], it['gamma_opt_max'])} {where} is "
                f"set by {it['description']}")
        if it["cause"] == "d11":
            z, w = f"z '{it['z']}'", f"w '{it['w']}'"
            if it["z_share_min"] < 0.95:
                z += f" (mostly; {it['z_share_min']:.0%} of the direction)"
            if it["w_share_min"] < 0.95:
                w += f" (mostly; {it['w_share_min']:.0%} of the direction)"
            text += (f": {z} / {w} (||D11 block|| = "
                     f"{_range(it['block_norm_min'], it['block_norm_max'])})")
        elif "z_channels" in it:
            zs, ws = it["z_channels"], it["w_channels"]
            if it["all_channels"]:
                text += "; every z and w channel takes part (halving any one lowers it)"
            elif zs or ws:
                names = " / ".join(part for part in (
                    ("z " + ", ".join(f"'{n}'" for n in zs)) if zs else "",
                    ("w " + ", ".join(f"'{n}'" for n in ws)) if ws else "") if part)
                text += f": {names} (halving any one of these alone lowers it)"
            else:
                text += "; no single channel (halving any one alone leaves it)"
        lines.append(text)
    return lines


def inspect_family(path: str, evidence: bool = False, progress=None, jobs: int = 1) -> dict:
    """The information `schedule inspect` prints, as a JSON-ready dict.

    The leave-one-out table comes from the file; when the file has none it is computed
    only with ``evidence=True`` (the choice of :func:`schedule.interpolate.choose`,
    with the costly-kinds limit of the family's design text, on ``jobs`` workers).
    """
    from ..coordinates import check_family_coordinates
    from ..interpolate import (
        COSTLY_KINDS_MAX_POINTS,
        ScheduledController,
        choose,
        evidence_from_arrays,
        evidence_notes,
    )
    from ..store import read_family

    f = read_family(path)
    names = f.variable_names
    ok = f.ok
    opt = np.asarray(f.gamma_opt, dtype=float)
    info: dict = {
        "file": str(path),
        "variables": [{"name": v.name, "unit": v.unit, "lower": v.lower, "upper": v.upper}
                      for v in f.variables],
        "points": int(len(f.points)), "ok": int(ok.sum()), "failed": int((~ok).sum()),
        "grid": None if f.breakpoints is None else [int(len(b)) for b in f.breakpoints],
        "gamma": float(f.gamma),
        "failures": [{"index": int(i), "point": _point(names, f.points[i]),
                      "reason": str(f.reasons[i])} for i in np.flatnonzero(~ok)],
    }
    if np.isfinite(opt).any():
        lo, hi = int(np.nanargmin(opt)), int(np.nanargmax(opt))
        info["gamma_opt_min"] = {"value": float(opt[lo]), "index": lo,
                                 "point": _point(names, f.points[lo])}
        info["gamma_opt_max"] = {"value": float(opt[hi]), "index": hi,
                                 "point": _point(names, f.points[hi])}
        try:
            info["gamma_opt_limits"] = gamma_opt_limit_groups(f)
        except (ScheduleError, ValueError, np.linalg.LinAlgError) as exc:
            info["gamma_opt_limits"] = {"error": str(exc), "groups": []}
    info["interpolant"] = None
    if f.interpolant:
        try:
            info["interpolant"] = ScheduledController.from_family(f).describe()
        except ScheduleError as exc:
            info["interpolant"] = {"error": str(exc)}
    table, source = evidence_from_arrays(f.extra), "file"
    chosen = str(f.extra.get("loo_chosen", "")) if table else ""
    notes = evidence_notes(f.extra) if table else []
    if table is None and evidence and ok.sum() >= 2:
        limit = COSTLY_KINDS_MAX_POINTS
        spec = _design_of(f)
        if spec is not None:
            limit = spec.interpolation.costly_kinds_max_points
        try:
            choice = choose(f, progress=progress, costly_kinds_max_points=limit, jobs=jobs)
            table, source = choice.evidence, "computed"
            chosen, notes = f"{choice.controller.form}/{choice.controller.kind}", \
                list(choice.notes)
        except ScheduleError as exc:
            table, source = [], f"not computed: {exc}"
    elif table is None:
        source = ("absent (computed only on request: schedule inspect FILE --evidence; "
                  f"{int(ok.sum())} ok points)") if ok.sum() >= 2 else "absent"
    info["leave_one_out"] = {"source": source, "best": chosen or None,
                             "table": _loo_rows(table or []), "notes": notes}
    try:
        rep = check_family_coordinates(f) if ok.sum() >= 2 else None
        info["coordinates"] = None if rep is None else (
            {"ok": rep.ok, "suspects": [int(k) for k in rep.suspects], "message": rep.message})
    except ScheduleError as exc:
        info["coordinates"] = {"ok": None, "suspects": [], "message": str(exc)}
    return info


def _text(v) -> str:
    return ", ".join(f"{k}={x:g}" for k, x in v.items())


def _fmt(v, spec: str = ".4g") -> str:
    return "-" if v is None else format(v, spec)


def _print(info: dict) -> None:
    echo = click.echo
    echo(f"family file   {info['file']}")
    for v in info["variables"]:
        echo(f"variable      {v['name']} [{v['unit']}] {v['lower']:g} .. {v['upper']:g}")
    grid = "scattered" if info["grid"] is None else "grid " + " x ".join(map(str, info["grid"]))
    echo(f"points        {info['points']} ({info['ok']} ok, {info['failed']} failed; {grid})")
    if "gamma_opt_min" in info:
        lo, hi = info["gamma_opt_min"], info["gamma_opt_max"]
        echo(f"gamma_opt     {lo['value']:.5g} at {_text(lo['point'])} .. "
             f"{hi['value']:.5g} at {_text(hi['point'])}")
        limits = info.get("gamma_opt_limits") or {}
        if limits.get("error"):
            echo(f"limit         not determined: {limits['error']}")
        for line in _limit_lines(limits) if limits.get("groups") else []:
            echo(f"limit         {line}")
    echo(f"common gamma  {info['gamma']:.5g}")
    for item in info["failures"]:
        echo(f"failed        [{item['index']}] {_text(item['point'])}: {item['reason']}")
    it = info["interpolant"]
    if it is None:
        echo("interpolant   none stored")
    elif "error" in it:
        echo(f"interpolant   unreadable: {it['error']}")
    else:
        settings = ", ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
                             for k, v in it["settings"].items()
                             if k not in ("kind", "n_variables", "n_values"))
        echo(f"interpolant   {it['form']}/{it['kind']}" + (f" ({settings})" if settings else ""))
    coords = info.get("coordinates")
    if coords and coords.get("message"):
        echo(f"coordinates   {coords['message']}")
    elif coords:
        echo("coordinates   consistent (no neighbour pair differs much more in matrices than "
             "in response)")
    loo = info["leave_one_out"]
    if not loo["table"]:
        echo(f"leave-one-out {loo['source']}")
        return
    echo(f"leave-one-out ({loo['source']}; best {loo['best'] or '-'}):")
    echo(f"  {'form/kind':<28} {'unstable':>8} {'max |T|/gamma':>14} {'median err':>11}"
         "   (max over the stable predictions; err = relative Frobenius error)")
    for r in loo["table"]:
        label = f"{r['form']}/{r['kind']}"
        if r["failure"]:
            echo(f"  {label:<28} failed: {r['failure']}")
            continue
        peak = r["max_stable_norm_over_gamma"]
        peak = {"bound": f"> {_fmt(peak)}", "skipped": "-"}.get(r.get("norms"), _fmt(peak))
        echo(f"  {label:<28} {r['unstable']:>3}/{r['points']:<4} "
             f"{peak:>14} {_fmt(r['median_matrix_error']):>11}")
    if any(r.get("norms") != "complete" for r in loo["table"] if not r["failure"]):
        echo("  (> x: norms stopped once one exceeded the best candidate's maximum; -: not "
             "computed, more unstable predictions than the best)")
    for note in loo.get("notes", []):
        echo(f"  note: {note}")


@click.command("inspect")
@click.argument("family_file", type=click.Path(exists=True, dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.option("--evidence", is_flag=True,
              help="Compute the leave-one-out table when the file does not hold one "
                   "(a family designed with --no-fit); this can take as long as fitting.")
@click.option("--jobs", "-j", default=1, show_default=True, type=click.IntRange(min=1),
              help="Worker processes for --evidence.")
def inspect_command(family_file: str, as_json: bool, evidence: bool, jobs: int) -> None:
    """Summarize FAMILY_FILE: points, gamma and what sets it, interpolant, leave-one-out.

    The 'limit' lines say what sets gamma_opt: the D11 bound (with the z and w channels
    of the D11 block), the state-feedback or output-injection sub-problem, or the
    coupling condition rho(XY) < gamma^2, and which channels take part (halving one
    alone lowers gamma_opt).

    Reads the file (and tests the stored plants near gamma_opt); nothing long is
    computed unless --evidence asks for the leave-one-out table of a family that has
    none. That table predicts every design
    point from the others with each candidate interpolant (closed forms, no refits)
    and closes the predicted controller with the true plant there (max |T|/gamma over
    the stable predictions; 'unstable' counts the others).
    """
    from .common import progress_bar

    with progress_bar(False, "read family") as bar:
        info = inspect_family(family_file, evidence=evidence, progress=bar, jobs=jobs)
    if as_json:
        click.echo(json.dumps(info, indent=2))
    else:
        _print(info)
