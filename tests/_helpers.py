"""Helpers shared by several test modules and benchmarks (not collected by pytest).

Design-file snippets: the tests and benchmarks write many small TOML design
files that differ only in names and numbers. These builders write the
repeated tables (``[[variable]]``, ``[channels]``, ``[[weights.*]]``) from
compact Python data, following the schema of docs/design-file.md.

Benchmarks import this module after putting ``tests/`` on ``sys.path``.
"""

from __future__ import annotations

import json
from collections.abc import Sequence


def _value(x) -> str:
    """A TOML value: strings pass through verbatim (inline tables, arrays), numbers as floats."""
    return x if isinstance(x, str) else repr(float(x))


def _names(names: Sequence[str]) -> str:
    return json.dumps(list(names))


def toml_table(name: str, **keys) -> str:
    """A ``[name]`` table; string values are quoted, numbers written as given (int or float)."""
    lines = [f"[{name}]"]
    for key, value in keys.items():
        lines.append(f"{key} = {json.dumps(value)}")
    return "\n".join(lines) + "\n"


SCHEDULED_MATRICES = (toml_table("gamma", policy="common", margin=0.05)
                      + toml_table("interpolation", form="matrices", kind="multilinear"))
"""Common gamma with a 5 % margin, multilinear interpolation of the controller matrices."""


def toml_variables(*variables: tuple[str, str, float, float]) -> str:
    """``[[variable]]`` tables from ``(name, unit, lower, upper)`` tuples."""
    return "".join(f'[[variable]]\nname = "{name}"\nunit = "{unit}"\n'
                   f"lower = {_value(lower)}\nupper = {_value(upper)}\n"
                   for name, unit, lower, upper in variables)


def toml_channels(controls: Sequence[str], measured: Sequence[str],
                  disturbances: Sequence[str] = (), performance: Sequence[str] = ()) -> str:
    """The ``[channels]`` table (empty lists are left out: they are the schema default)."""
    lines = ["[channels]", f"controls = {_names(controls)}"]
    if disturbances:
        lines.append(f"disturbances = {_names(disturbances)}")
    lines.append(f"measured = {_names(measured)}")
    if performance:
        lines.append(f"performance = {_names(performance)}")
    return "\n".join(lines) + "\n"


def toml_weights(performance: Sequence[tuple] = (), effort: Sequence[tuple] = (),
                 noise: Sequence[tuple] = (), disturbance: Sequence[tuple] = ()) -> str:
    """``[[weights.<group>]]`` tables, one per entry.

    An entry is ``(channel, gain)`` for a static weight or ``(channel, {key:
    number, ...})`` for any other form of docs/design-file.md (for example
    ``{"peak_sensitivity": 2.0, "bandwidth": 0.5, "low_frequency_error": 0.01}``);
    a number given as a string (for example a scheduled inline table) is
    written verbatim.
    """
    out = []
    for group, key, entries in (("performance", "output", performance),
                                ("effort", "input", effort),
                                ("noise", "output", noise),
                                ("disturbance", "input", disturbance)):
        for entry in entries:
            channel, numbers = entry
            out.append(f'[[weights.{group}]]\n{key} = "{channel}"\n')
            if isinstance(numbers, dict):
                out += [f"{k} = {_value(v)}\n" for k, v in numbers.items()]
            else:
                out.append(f"gain = {_value(numbers)}\n")
    return "".join(out)


def performance_numbers(peak: float, bandwidth, low_error: float) -> dict:
    """The keys of a performance weight (``bandwidth`` may be a scheduled inline table)."""
    return {"peak_sensitivity": peak, "bandwidth": bandwidth, "low_frequency_error": low_error}


def lightly_damped_modes(rng, n, zeta):
    """The state matrix of a stable model of order n (even) with one mode of damping zeta
    (natural frequency 0.1..100 rad/s) among well damped ones (0.05..0.7), in random
    coordinates: ``(A, damped frequency of that mode)``."""
    import numpy as np
    from scipy.linalg import block_diag

    wn = 10.0 ** rng.uniform(-1.0, 2.0)
    wd = wn * np.sqrt(1.0 - zeta * zeta)
    blocks = [np.array([[-zeta * wn, wd], [-wd, -zeta * wn]])]
    while sum(b.shape[0] for b in blocks) < n:
        w2, z2 = 10.0 ** rng.uniform(-1.0, 2.0), rng.uniform(0.05, 0.7)
        blocks.append(np.array([[-z2 * w2, w2], [-w2, -z2 * w2]]))
    T = np.eye(n) + 0.3 * rng.standard_normal((n, n))
    return T @ block_diag(*blocks) @ np.linalg.inv(T), wd


def spring_design(title: str, extra: str = "") -> str:
    """Design text of a spring-mass plant scheduled on its stiffness (model.py's
    ``plant_at``; inputs force and push, output pos; three grid points, four check
    samples, no margin requirement), followed by ``extra`` tables."""
    return (f'title = "{title}"\n'
            + toml_variables(("stiffness", "-", 0.0, 1.0))
            + '[source]\nmodel_file = "model.py"\nfunction = "plant_at"\n'
            + "[grid]\nstiffness = [0.0, 0.5, 1.0]\n"
            + toml_channels(["force"], ["pos"], ["push"], ["pos"])
            + toml_weights(performance=[("pos", 2.0)], effort=[("force", 5.0)],
                           noise=[("pos", 0.05)], disturbance=[("push", 1.0)])
            + SCHEDULED_MATRICES
            + "[check]\nsamples = 4\ngain_margin_db = 0.0\nphase_margin_deg = 0.0\n"
            + extra)
