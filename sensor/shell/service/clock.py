"""The service's clocks: what time a tick is, and how long to wait for the next one.

- :class:`WallClock`: the plant runs in real time; ticks are wall-clock time (keep the plant's
  and this machine's clocks synchronised with NTP: staleness and the future-timestamp check
  compare them).
- :class:`PlantClock`: a simulated plant whose clock runs ``speed`` times faster than the
  wall clock (the demo, the end-to-end tests). Its time is taken from the newest source
  timestamp the plant has sent, and carried on at ``speed`` between values and through an
  outage, so that ticks keep coming (and the communication alarm with them) while nothing
  arrives. A plant that paused (a simulator whose server was stopped and started again with
  its batch where it stood) sends values behind the carried time; once the newest of them is
  more than ``speed * resync_after_s`` behind, the clock takes it up again: it holds at its
  last tick until the plant's time passes it, so that ticks and readings agree again.

Both are monotone: a tick's time never goes back, whatever the underlying clock does.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Protocol

RESYNC_AFTER_S = 2.0
"""Default lag [wall s] of the plant's newest value behind a :class:`PlantClock` after which
the clock follows the plant back."""


class Clock(Protocol):
    """Time for the service's ticks."""

    speed: float
    """Clock seconds per wall second."""

    def now_s(self) -> float | None:
        """The time now [s since the Unix epoch]; None while it is not known yet."""
        ...


class WallClock:
    """Real time, monotone."""

    speed = 1.0

    def __init__(self, wall: Callable[[], float] = time.time) -> None:
        self._wall = wall
        self._last = -float("inf")

    def now_s(self) -> float:
        self._last = max(self._last, self._wall())
        return self._last


class PlantClock:
    """A simulated plant's clock, followed from its source timestamps (module docstring).

    Parameters
    ----------
    newest_source_s : the newest source timestamp received from the plant [s since the Unix
        epoch], or None before the first
    speed : how many plant seconds pass per wall second
    monotonic : the wall's monotonic clock [s]
    resync_after_s : how far [wall s] the plant's newest value may lag the carried time before
        the clock follows the plant back (a value's normal delivery delay, a few publishing
        intervals, stays well inside it)
    """

    def __init__(
        self,
        newest_source_s: Callable[[], float | None],
        speed: float,
        monotonic: Callable[[], float] = time.monotonic,
        resync_after_s: float = RESYNC_AFTER_S,
    ) -> None:
        if not speed > 0.0:
            raise ValueError(f"speed must be positive; got {speed}")
        if not resync_after_s > 0.0:
            raise ValueError(f"resync_after_s must be positive; got {resync_after_s}")
        self.speed = speed
        self.resync_after_s = resync_after_s
        self._newest = newest_source_s
        self._monotonic = monotonic
        self._anchor: tuple[float, float] | None = None
        self._last = -float("inf")

    def now_s(self) -> float | None:
        newest = self._newest()
        wall = self._monotonic()
        if newest is not None and (
            self._anchor is None
            or newest > self._carried(wall)
            or (newest > self._anchor[0] and self._behind(newest, wall))
        ):
            self._anchor = (newest, wall)
        if self._anchor is None:
            return None
        self._last = max(self._last, self._carried(wall))
        return self._last

    def _behind(self, newest: float, wall: float) -> bool:
        """Whether a new value from the plant lags the carried time by more than
        ``resync_after_s`` of wall time: the plant paused."""
        return self._carried(wall) - newest > self.speed * self.resync_after_s

    def _carried(self, wall: float) -> float:
        assert self._anchor is not None
        plant, at = self._anchor
        return plant + self.speed * (wall - at)
