"""The service's clocks: what time a tick is, and how long to wait for the next one.

- :class:`WallClock`: the plant runs in real time; ticks are wall-clock time (keep the plant's
  and this machine's clocks synchronised with NTP: staleness and the future-timestamp check
  compare them).
- :class:`PlantClock`: a simulated plant whose clock runs ``speed`` times faster than the
  wall clock (the demo, the end-to-end tests). Its time is taken from the newest source
  timestamp the plant has sent, and carried on at ``speed`` between values and through an
  outage, so that ticks keep coming (and the communication alarm with them) while nothing
  arrives.

Both are monotone: a tick's time never goes back, whatever the underlying clock does.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Protocol


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
    """

    def __init__(
        self,
        newest_source_s: Callable[[], float | None],
        speed: float,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        if not speed > 0.0:
            raise ValueError(f"speed must be positive; got {speed}")
        self.speed = speed
        self._newest = newest_source_s
        self._monotonic = monotonic
        self._anchor: tuple[float, float] | None = None
        self._last = -float("inf")

    def now_s(self) -> float | None:
        newest = self._newest()
        wall = self._monotonic()
        if newest is not None and (self._anchor is None or newest > self._carried(wall)):
            self._anchor = (newest, wall)
        if self._anchor is None:
            return None
        self._last = max(self._last, self._carried(wall))
        return self._last

    def _carried(self, wall: float) -> float:
        assert self._anchor is not None
        plant, at = self._anchor
        return plant + self.speed * (wall - at)
