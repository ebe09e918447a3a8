"""The trends of the live page: a bounded buffer per unit, decimated as it fills.

Time is cut into slices of ``window_s / (points // 2)`` seconds; of each slice the buffer keeps
the sample with the lowest and the one with the highest sigma (both, in time order; the last
sample where sigma is not a number in the whole slice), with the other values of those samples.
The peaks of supersaturation, which matter most on a trend, so survive any decimation; the
slices' other samples are dropped as the slice closes. The window spans ``points // 2`` closed
slices and the open one, so the buffer holds at most ``points`` closed rows (a ring: the oldest
goes first) and three open ones (the open slice's lowest, highest and last), whatever the
step rate: the rows of the last ``window_s`` seconds.

Min-max decimation is common practice for process trends: it keeps every excursion visible at
any zoom, where taking every n-th sample can miss a short peak.
"""

from __future__ import annotations

import math

import numpy as np

from sensor.numerics import FloatArray
from sensor.shell.live.errors import LivePageError

TREND_FIELDS = (
    "time_s",
    "sigma",
    "sigma_std",
    "sigma_limit",
    "temp_c",
    "conc",
    "proposal_c",
    "setpoint_c",
)
"""The columns of a trend row: the step's time [s since the Unix epoch], sigma and its std [-],
the metastable limit at the current rate [-], the reactor temperature [°C], the dissolved solute
[kg/kg solvent], the law's proposed setpoint and the guard's setpoint [°C]. NaN: none."""

SIGMA = TREND_FIELDS.index("sigma")


class TrendBuffer:
    """The decimated trend of one unit (module docstring).

    Parameters
    ----------
    window_s : how far back the trend reaches [s]
    points : rows kept per window (at least 4; two per slice)
    """

    def __init__(self, window_s: float, points: int) -> None:
        if not (math.isfinite(window_s) and window_s > 0.0):
            raise ValueError(f"window_s must be positive; got {window_s}")
        if points < 4:
            raise ValueError(f"points must be at least 4; got {points}")
        self.window_s = window_s
        self.slice_s = window_s / (points // 2)
        self.capacity = points
        self.max_rows = points + 3
        """The most rows :meth:`rows` gives."""
        self._ring = np.full((self.capacity, len(TREND_FIELDS)), np.nan)
        self._next = 0
        self._count = 0
        self._slice: float | None = None
        self._open: list[FloatArray] = []
        self._last_time = -math.inf

    def __len__(self) -> int:
        return len(self.rows())

    def add(self, row: FloatArray) -> FloatArray:
        """Take one step's row (:data:`TREND_FIELDS`); returns the rows this closed into the
        buffer (0 to 2 rows, shape ``(k, len(TREND_FIELDS))``).

        Raises
        ------
        LivePageError
            If the row's time is not a number or goes back before the last row's.
        """
        row = np.asarray(row, dtype=float)
        if row.shape != (len(TREND_FIELDS),):
            raise ValueError(f"a trend row has {len(TREND_FIELDS)} values; got {row.shape}")
        time_s = float(row[0])
        if not math.isfinite(time_s):
            raise LivePageError(f"the step's time is not a number: {time_s}")
        if time_s < self._last_time:
            raise LivePageError(
                f"the step's time {time_s:.3f} s goes back from the last one, "
                f"{self._last_time:.3f} s"
            )
        self._last_time = time_s
        index = math.floor(time_s / self.slice_s)
        closed = np.empty((0, len(TREND_FIELDS)))
        if self._slice is not None and index != self._slice:
            closed = self._kept(self._open)
            for kept in closed:
                self._ring[self._next] = kept
                self._next = (self._next + 1) % self.capacity
                self._count = min(self._count + 1, self.capacity)
            self._open = []
        self._slice = index
        self._open.append(row)
        self._open = list(self._kept(self._open, keep_last=True))
        return closed

    def _kept(self, rows: list[FloatArray], keep_last: bool = False) -> FloatArray:
        """Of a slice's rows, the lowest and highest sigma (and the last, while it is open)."""
        if not rows:
            return np.empty((0, len(TREND_FIELDS)))
        sigma = np.array([r[SIGMA] for r in rows])
        finite = np.isfinite(sigma)
        picks = {len(rows) - 1} if keep_last or not np.any(finite) else set()
        if np.any(finite):
            picks |= {
                int(np.argmin(np.where(finite, sigma, np.inf))),
                int(np.argmax(np.where(finite, sigma, -np.inf))),
            }
        return np.array([rows[i] for i in sorted(picks)])

    def closed_rows(self) -> FloatArray:
        """The rows of closed slices within the window, oldest first."""
        order = (np.arange(self._count) + self._next - self._count) % self.capacity
        rows = self._ring[order]
        return rows[rows[:, 0] >= self._last_time - self.window_s]

    def open_rows(self) -> FloatArray:
        """The open slice's rows so far (its lowest and highest sigma and its last sample)."""
        return np.array(self._open).reshape(-1, len(TREND_FIELDS))

    def rows(self) -> FloatArray:
        """Everything the trend shows, oldest first: closed rows, then the open slice's."""
        return np.concatenate([self.closed_rows(), self.open_rows()])
