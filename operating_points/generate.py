"""Regenerate the demo envelope file crane_envelope.h5 from the crane model.

Run ``python -m schedule.demo_crane.generate`` or, from the repository,
``python operating_points/generate.py`` (both write next to this module,
that is into the installed package or the repository's operating_points/), or
``python -m schedule.demo_crane.generate --out some/dir/crane_envelope.h5``.

7 rope lengths x 5 payload masses = 35 operating points, rope length varying
slowest. Matrix entries are rounded to 12 significant digits so that the file
comes out bit-for-bit identical on machines whose maths libraries differ in
the last bit; the complex-step Jacobians are accurate to about 1e-15 relative,
so nothing of substance is lost.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import numpy as np
from schedule.demo_crane.crane import VARIABLES, linear_plant_at

from schedule.oppoints import OperatingPoints, write_operating_points

# Rope lengths about evenly spaced in log(L) (ratio ~1.47): the sway frequency goes as
# L^(-1/2), so this spaces the plants evenly in frequency ratio; an even spacing in L
# leaves the short-rope cells, where the plant changes fastest, too coarse for the
# interpolated controller (checked with schedule check).
ROPE_LENGTHS = (3.0, 4.4, 6.5, 9.5, 14.0, 20.5, 30.0)  # m
PAYLOAD_MASSES = (2000.0, 10000.0, 20000.0, 30000.0, 40000.0)  # kg
FILE_NAME = "crane_envelope.h5"
SIGNIFICANT_DIGITS = 12
DESCRIPTION = ("Invented container gantry crane (schedule.demo_crane.crane), trimmed at rest "
               "under an 8 m/s wind along the boom and linearized by the complex step; "
               "7 rope lengths x 5 payload masses. Illustrative only, not a real machine.")


def _round(a: np.ndarray, digits: int = SIGNIFICANT_DIGITS) -> np.ndarray:
    """Round to ``digits`` significant digits (zeros stay zero)."""
    a = np.asarray(a, dtype=float)
    out = np.zeros_like(a)
    nz = a != 0
    exponent = np.floor(np.log10(np.abs(a[nz])))
    factor = 10.0 ** (digits - 1 - exponent)
    out[nz] = np.round(a[nz] * factor) / factor
    return out + 0.0  # no negative zeros


def envelope() -> OperatingPoints:
    """The 35 linearized crane plants as an :class:`OperatingPoints`."""
    values = np.array([(L, m) for L in ROPE_LENGTHS for m in PAYLOAD_MASSES], dtype=float)
    plants = [linear_plant_at({"rope_length": L, "payload_mass": m}) for L, m in values]
    stack = {k: _round(np.stack([getattr(p, k) for p in plants])) for k in "ABCD"}
    first = plants[0]
    return OperatingPoints(
        variables=VARIABLES, values=values, A=stack["A"], B=stack["B"], C=stack["C"],
        D=stack["D"], state_names=first.state_names, input_names=first.input_names,
        output_names=first.output_names,
        breakpoints=(np.array(ROPE_LENGTHS), np.array(PAYLOAD_MASSES)),
        description=DESCRIPTION)


def generate(path: str | Path | None = None) -> Path:
    """Write the envelope file (atomically) and return its path."""
    path = Path(__file__).with_name(FILE_NAME) if path is None else Path(path)
    write_operating_points(path, envelope())
    os.chmod(path, 0o644)  # the atomic writer's temporary file is private (0600)
    return path


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Regenerate the demo crane envelope file.")
    parser.add_argument("--out", default=None, help=f"output file (default: {FILE_NAME} "
                        "next to this module)")
    args = parser.parse_args(argv)
    print(generate(args.out))


if __name__ == "__main__":
    main()
