"""schedule: gain-scheduled H-infinity output-feedback controller families.

Sign convention everywhere: the controller is ``u = K y`` and the closed loop
is the lower linear fractional transformation (LFT) of the generalized plant
with K.

The public names below are imported lazily so that ``import schedule`` stays
fast and the command line starts quickly.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_PUBLIC = {
    # errors
    "ScheduleError": "errors", "PlantError": "errors", "InfeasibleGammaError": "errors",
    "NumericalError": "errors", "InputError": "errors",
    # data types
    "SchedulingVariable": "types", "LinearPlant": "types", "Family": "types",
    # core
    "GeneralizedPlant": "plant",
    "optimal_gamma": "hinf", "gamma_lower_bound": "hinf", "central_controller": "hinf",
    "Controller": "hinf", "ObserverPieces": "hinf", "assemble_controller": "hinf",
    "closed_loop": "norms", "h_infinity_norm": "norms", "h2_norm": "norms",
    "singular_values": "norms", "spectral_abscissa": "norms",
    "h_infinity_norm_many": "norms", "frequency_response": "norms", "is_stable": "norms",
    "h_infinity_norms": "norms", "stability": "norms", "certify_controller": "hinf",
    # linearization helper
    "trim": "linearize", "linearize": "linearize", "trim_and_linearize": "linearize",
    # files
    "OperatingPoints": "oppoints", "read_operating_points": "oppoints",
    "write_operating_points": "oppoints",
    "read_family": "store", "write_family": "store",
    # stages
    "load_design": "design_file", "design_family": "family",
}

__all__ = sorted(_PUBLIC) + ["__version__"]


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'schedule' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return __all__
