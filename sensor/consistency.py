r"""Filter consistency: the windowed normalised innovation squared (NIS).

For a consistent filter the NIS :math:`\nu_k^2 = y_k^2 / S_k` of scalar updates are independent
:math:`\chi^2_1`, so the sum over a window of :math:`N` of them is :math:`\chi^2_N`. The window's
state is ``ok`` inside the two-sided band at ``probability``, ``high`` above it (innovations larger
than the filter expects: model mismatch, a drifting analyzer, too little process noise), ``low``
below it (the filter is more cautious than it needs to be), and ``filling`` until the window holds
:math:`N` values [1]_.

References
----------
.. [1] Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
   Navigation*, Wiley, 2001, section 5.4.2 (chi-square tests of the NIS).
"""

from __future__ import annotations

from collections import deque
from typing import Any

import numpy as np
from scipy import stats

from controller.checkpoint import get_float, put_float
from sensor.numerics import FloatArray

NIS_STATES = ("filling", "ok", "high", "low")
"""The window states, indexed by code."""


def nis_band(window: int, probability: float) -> tuple[float, float]:
    """Two-sided band of the sum of ``window`` NIS values at ``probability`` [-]."""
    if window < 1 or not 0.0 < probability < 1.0:
        raise ValueError("the NIS window needs at least 1 value and a probability in (0, 1)")
    tail = (1.0 - probability) / 2.0
    return float(stats.chi2.ppf(tail, window)), float(stats.chi2.ppf(1.0 - tail, window))


def nis_state_codes(nis: FloatArray, window: int, probability: float) -> np.ndarray:
    """The window state code after each entry of a NIS series (NaN: no update at that sample,
    which leaves the window as it was).

    Examples
    --------
    >>> codes = nis_state_codes(np.array([1.0, np.nan, 1.0, 50.0]), 2, 0.95)
    >>> [NIS_STATES[c] for c in codes]
    ['filling', 'filling', 'ok', 'high']
    """
    nis = np.asarray(nis, dtype=float)
    lo, hi = nis_band(window, probability)
    present = ~np.isnan(nis)
    values = nis[present]
    sums = np.cumsum(values)
    window_sums = sums - np.concatenate([np.zeros(window), sums[:-window]])[: len(sums)]
    count = np.arange(1, len(values) + 1)
    codes_present = np.where(
        count < window, 0, np.where(window_sums > hi, 2, np.where(window_sums < lo, 3, 1))
    )
    # carry each update's code forward to the samples without an update
    index = np.cumsum(present) - 1
    codes = np.where(index >= 0, codes_present[np.maximum(index, 0)] if len(values) else 0, 0)
    return codes.astype(np.int64)


class NisWindow:
    """The windowed NIS, one update at a time (the live path); the same states as
    :func:`nis_state_codes`."""

    def __init__(self, window: int, probability: float) -> None:
        self.window = window
        self.band = nis_band(window, probability)
        self._values: deque[float] = deque(maxlen=window)

    def checkpoint(self) -> list[Any]:
        """The NIS values in the window, oldest first (strict JSON values)."""
        return [put_float(v) for v in self._values]

    def restore(self, values: list[Any]) -> None:
        """Take the values :meth:`checkpoint` gave."""
        self._values.clear()
        self._values.extend(get_float(v) for v in values)

    def push(self, nis: float) -> None:
        self._values.append(float(nis))

    @property
    def total(self) -> float:
        return float(sum(self._values))

    @property
    def state(self) -> str:
        if len(self._values) < self.window:
            return NIS_STATES[0]
        total = self.total
        if total > self.band[1]:
            return NIS_STATES[2]
        if total < self.band[0]:
            return NIS_STATES[3]
        return NIS_STATES[1]
