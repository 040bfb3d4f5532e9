"""``schedule inspect family.h5 [--json]``: summary, interpolant and leave-one-out table."""

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
                     "median_matrix_error": _num(r.median_error), "failure": r.failure})
    return rows


def inspect_family(path: str, loo: bool = True, progress=None) -> dict:
    """The information `schedule inspect` prints, as a JSON-ready dict."""
    from ..coordinates import check_family_coordinates
    from ..interpolate import (
        ScheduledController,
        choose_interpolant,
        evidence_from_arrays,
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
    info["interpolant"] = None
    if f.interpolant:
        try:
            info["interpolant"] = ScheduledController.from_family(f).describe()
        except ScheduleError as exc:
            info["interpolant"] = {"error": str(exc)}
    evidence, source = evidence_from_arrays(f.extra), "file"
    chosen = str(f.extra.get("loo_chosen", "")) if evidence else ""
    if evidence is None and loo and ok.sum() >= 2:
        try:
            best, evidence = choose_interpolant(f, progress=progress)
            source, chosen = "computed", f"{best.form}/{best.kind}"
        except ScheduleError as exc:
            evidence, source = [], f"not computed: {exc}"
    info["leave_one_out"] = {"source": source if evidence is not None else "absent",
                             "best": chosen or None,
                             "table": _loo_rows(evidence or [])}
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
        echo(f"  {label:<28} {r['unstable']:>3}/{r['points']:<4} "
             f"{_fmt(r['max_stable_norm_over_gamma']):>14} {_fmt(r['median_matrix_error']):>11}")


@click.command("inspect")
@click.argument("family_file", type=click.Path(exists=True, dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.option("--loo/--no-loo", default=True, show_default=True,
              help="Compute the leave-one-out table when the file does not hold one.")
def inspect_command(family_file: str, as_json: bool, loo: bool) -> None:
    """Summarize FAMILY_FILE: points, gamma, failures, interpolant, leave-one-out table.

    The leave-one-out table refits each interpolant without one design point at
    a time and closes the predicted controller with the true plant there
    (max |T|/gamma over the stable predictions; 'unstable' counts the others).
    """
    def progress(label: str) -> None:
        if not as_json:
            click.echo(f"leave-one-out: {label}", err=True)

    info = inspect_family(family_file, loo=loo, progress=progress)
    if as_json:
        click.echo(json.dumps(info, indent=2))
    else:
        _print(info)
