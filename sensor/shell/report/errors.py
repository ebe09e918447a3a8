"""The report's own error: a request it cannot honour (an unknown good batch, too few good
batches for an envelope, an output it cannot write)."""

from __future__ import annotations

from sensor.errors import SigmatrackError


class ReportError(SigmatrackError, ValueError):
    """A report or comparison cannot be made as asked; the message says where and what."""
