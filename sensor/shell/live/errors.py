"""The live page's exceptions (children of :class:`~sensor.errors.SigmatrackError`)."""

from __future__ import annotations

from sensor.errors import SigmatrackError


class LivePageError(SigmatrackError, ValueError):
    """What the live page was handed cannot be shown: an unknown unit, a time going backwards.

    The message names the unit and what is wrong.
    """
