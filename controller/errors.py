"""The exceptions the controller raises on purpose.

``controller`` imports nothing of sigmatrack, so it cannot derive these from
``sensor.errors.SigmatrackError``; they derive from the standard exceptions instead, and the
shell that drives the controller turns them into its own errors (a one-line message and exit
status 2 on the command line). Messages say where (which object, which field) and what.

The guard never raises while it steps: a bad input is a doubt it reports, and it falls back.
"""

from __future__ import annotations

import math
from collections.abc import Iterable


class ControllerError(ValueError):
    """Base of the errors a caller of the controller can cause and fix."""


class SettingsError(ControllerError):
    """A settings object (law, guard, alarms, profile) holds an impossible value.

    Parameters
    ----------
    owner : the settings class or function, e.g. ``"GuardLimits"``
    field : the field at fault, e.g. ``"max_step_k"``
    problem : what is wrong, in plain words
    """

    def __init__(self, owner: str, field: str, problem: str) -> None:
        self.owner = owner
        self.field = field
        self.problem = problem
        super().__init__(f"{owner}.{field}: {problem}")


class TimeOrderError(ControllerError):
    """A step or an operator action was stamped earlier than the one before it."""


class PlanError(ControllerError):
    """No reference profile meets the request (e.g. no cooling keeps sigma under its cap)."""


def check_fields(owner: object, checks: Iterable[tuple[str, bool, str]]) -> None:
    """Raise :class:`SettingsError` for the first field of ``owner`` whose check fails or whose
    value is not finite; ``checks`` are ``(field, ok, problem)``."""
    for name, ok, problem in checks:
        value = getattr(owner, name)
        if not (ok and math.isfinite(value)):
            raise SettingsError(type(owner).__name__, name, f"{problem}; got {value}")
