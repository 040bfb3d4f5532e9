"""Exceptions raised by the package.

Every error a user can cause (bad data, bad options, an infeasible gamma) is a
:class:`ScheduleError`, which is a :class:`ValueError`. Its message is a single
line that names the thing at fault and the fix. The command line turns any
``ScheduleError`` into ``error: <message>`` and exit code 2, never a traceback.
"""

from __future__ import annotations


class ScheduleError(ValueError):
    """Base class of all user-facing errors; the message is one line."""


class PlantError(ScheduleError):
    """The plant data are invalid or the synthesis conditions do not hold."""


class InfeasibleGammaError(ScheduleError):
    """No stabilizing controller reaches the requested gamma.

    The message names the condition that failed (X Riccati, Y Riccati or the
    coupling condition rho(XY) < gamma^2) and the number that shows it.
    """


class NumericalError(ScheduleError):
    """A numerical step failed (residual too large, ill-conditioned solve)."""


class InputError(ScheduleError):
    """A file, design file or option is malformed or inconsistent."""
