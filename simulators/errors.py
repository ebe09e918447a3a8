"""The simulator's own error: a request the simulated plant cannot honour.

Problems in the site file's ``[simulator]`` table are :class:`~sensor.errors.SiteConfigError`
(they name the file and the key); a bad ``--faults`` or ``--mismatch`` text, or a stepping call
the engine cannot take, is a :class:`SimulatorError`. Both are
:class:`~sensor.errors.SigmatrackError`, so the CLI prints one line and exits 2.
"""

from __future__ import annotations

from sensor.errors import SigmatrackError


class SimulatorError(SigmatrackError, ValueError):
    """The simulator was asked something it cannot do; the message says where and what."""
