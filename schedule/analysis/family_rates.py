"""The rate certificate of a controller family: its loop, its point sets, one call.

:func:`certify_family` closes the family's scheduled controller with the
plant at any point - the design's true plant from its model where the design
has one, else the family's interpolated plant (the weaker check, noted) -
through the same routines as the frozen-point checks
(:func:`schedule.check.plants_at` and :func:`schedule.norms.closed_loop_many`), picks the
imposed points (the design points) and the dense a-posteriori points (each
grid interval subdivided, plus Sobol samples), runs
:func:`schedule.analysis.lpv_certificate.certify_loop` and, if asked, the
witness search (:mod:`schedule.analysis.witness`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..errors import InputError
from ..types import Family, point_text
from .lpv_certificate import CertificateSettings, RateCertificate, certify_loop
from .witness import search_witness

__all__ = ["certify_family", "family_loop", "dense_points", "MAX_DENSE"]

#: the most dense-check points taken from a subdivided grid (the subdivision is
#: reduced until the grid fits)
MAX_DENSE = 30000


def family_loop(family: Family, spec=None, controller=None) -> tuple[Callable, bool]:
    """``(loop_at, interpolated)``: points (M, d) -> the frozen closed loop w -> z.

    ``interpolated`` is True when the plant is the family's interpolated plant
    (no model in the design). Results are cached by point.
    """
    from ..check import plants_at
    from ..interpolate import ScheduledController
    from ..norms import closed_loop_many

    sc = controller or ScheduledController.from_family(family)
    names = family.variable_names
    cache: dict[tuple, tuple] = {}
    interpolated = not (spec is not None and (spec.source.model is not None
                                              or spec.source.model_file is not None))

    def loop_at(points) -> tuple[np.ndarray, ...]:
        pts = np.asarray(points, dtype=float).reshape(-1, len(names))
        keys = [tuple(np.round(r, 13)) for r in pts]
        todo = [i for i, k in enumerate(keys) if k not in cache]
        if todo:
            sub = pts[todo]
            P, _src, ok, reasons = plants_at(family, sub, spec, sc)
            if not np.all(ok):
                i = int(np.flatnonzero(~ok)[0])
                raise InputError(f"the plant model failed at ({point_text(names, sub[i])}): "
                                 f"{reasons[i]}; the rate certificate needs the loop "
                                 "everywhere in the envelope")
            loop = closed_loop_many(P, sc.evaluate(sub))
            for r, i in enumerate(todo):
                cache[keys[i]] = tuple(m[r] for m in loop)
        return tuple(np.stack([cache[k][m] for k in keys]) for m in range(4))

    return loop_at, interpolated


def dense_points(family: Family, settings: CertificateSettings) -> np.ndarray:
    """The a-posteriori check points: each grid interval cut into ``settings.dense``
    pieces (fewer if the grid would exceed :data:`MAX_DENSE` points), the cell
    centres, and ``settings.samples`` Sobol points."""
    from .. import envelope as env

    parts = []
    if family.breakpoints is not None:
        bps = [np.asarray(b, float) for b in family.breakpoints]
        r = int(settings.dense)
        while r > 1 and np.prod([(b.size - 1) * r + 1 for b in bps]) > MAX_DENSE:
            r -= 1
        axes = [np.unique(np.concatenate([np.linspace(b[i], b[i + 1], r + 1)
                                          for i in range(b.size - 1)])) if b.size > 1 else b
                for b in bps]
        mesh = np.meshgrid(*axes, indexing="ij")
        parts.append(np.stack([m.reshape(-1) for m in mesh], axis=1))
    if settings.samples:
        parts.append(env.sobol(family.variables, int(settings.samples), seed=1))
    parts.append(np.asarray(family.points, float)[family.ok])
    return np.vstack(parts)


def certify_family(family: Family, spec=None, settings: CertificateSettings | None = None,
                   controller=None, frozen_bound=None,
                   progress: Callable[[str], None] | None = None) -> RateCertificate:
    """Certified scheduling rates and gain bounds of a family's scheduled loop.

    Parameters
    ----------
    family : the family (with its interpolant, or pass ``controller``).
    spec : the DesignSpec (its model gives the true plant); None: the
        interpolated plant, noted as a weaker analysis.
    settings : :class:`CertificateSettings` (default: the design's
        [rate_certificate] table, else the defaults).
    frozen_bound : optional :class:`schedule.rate.RateBound` to report beside.
    progress : optional callable receiving one-line messages.

    Returns
    -------
    RateCertificate
    """
    from dataclasses import replace

    if settings is None:
        settings = getattr(spec, "rate_certificate", None) or CertificateSettings()
    loop_at, interpolated = family_loop(family, spec, controller)
    imposed = np.asarray(family.points, float)[family.ok]
    if imposed.shape[0] == 0:
        raise InputError("the family has no successful design point; nothing to certify")
    cert = certify_loop(loop_at, family.variables, imposed, dense_points(family, settings),
                        settings, progress=progress)
    notes = list(cert.notes)
    if interpolated:
        notes.append("the loop uses the family's interpolated plant (no model in the design): "
                     "a weaker analysis; add a model to the design")
    notes.append("the LPV model is the frozen-matrix loop; the nonlinear plant under moving "
                 "parameters has extra terms (Shamma and Athans 1990) - simulate it too")
    frozen = {}
    if frozen_bound is not None:
        frozen = {n: (float(s), float(j)) for n, s, j in zip(frozen_bound.names,
                                                             frozen_bound.single,
                                                             frozen_bound.joint, strict=True)}
    witness = None
    if settings.witness:
        if progress:
            progress("rate certificate: witness search")
        witness = search_witness(loop_at, family.variables, dict(cert.certified_rate),
                                 gain=settings.gain)
    return replace(cert, frozen_bound=frozen, witness=witness, notes=tuple(notes))
