r"""Reference cooling profiles: time/temperature tables an engineer can load into a recipe.

- :func:`linear_profile`: a constant cooling rate, the usual recipe.
- :func:`mullin_nyvlt_profile`: the controlled-cooling profile of Mullin and Nývlt [1]_ [2]_,
  which keeps supersaturation (and so the growth rate) constant on a seeded batch: slow at
  first, while the seed's surface is small, faster as the crystals grow.
- the offline optimised profile (``controller.optimal_profile``), built on the model.

Any of them can be written as a profile CSV (``sensor.shell.labdata.write_profile_csv``, the
format's one writer and reader) for a recipe's fallback profile.

The Mullin-Nývlt profile
------------------------
Assume seeded growth only (no nucleation, no breakage), a constant linear growth rate, and a
solubility linear in temperature over the batch. Then the seed crystals grow from size
:math:`L_s` to :math:`L_p` linearly in time, the mass deposited is proportional to
:math:`L^3 - L_s^3`, and with a linear solubility the temperature drop is proportional to the
mass deposited, so

.. math:: \frac{T_0 - T(t)}{T_0 - T_f}
          = \frac{(1 + a\,t/\tau)^3 - 1}{(1 + a)^3 - 1}
          = \frac{x^3 + 3 r x^2 + 3 r^2 x}{1 + 3 r + 3 r^2},
          \qquad x = \frac{t}{\tau},\ a = \frac{L_p - L_s}{L_s},\ r = \frac{1}{a}

:math:`\tau` is the batch time. With small seeds (:math:`r \to 0`) this is the cubic profile
:math:`T = T_0 - (T_0 - T_f)(t/\tau)^3`.

References
----------
.. [1] J. W. Mullin, J. Nývlt, "Programmed cooling of batch crystallizers", Chem. Eng. Sci. 26
   (1971) 369-377. doi:10.1016/0009-2509(71)83012-9
.. [2] J. W. Mullin, *Crystallization*, 4th ed., Butterworth-Heinemann, 2001, the section on
   programmed (controlled) cooling of batch crystallizers (the section number is not quoted
   here: it is not remembered with certainty).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from controller.errors import SettingsError
from controller.protocols import FloatArray


@dataclass(frozen=True)
class CoolingProfile:
    """A reactor-temperature profile: temperatures at times from its start.

    Parameters
    ----------
    name : what made it, e.g. ``"linear"``
    time_s : times from the start [s], starting at 0, strictly increasing
    temp_k : reactor-temperature setpoints at those times [K], never rising (a cooling
        profile)
    """

    name: str
    time_s: FloatArray
    temp_k: FloatArray

    def __post_init__(self) -> None:
        owner = type(self).__name__
        time = np.asarray(self.time_s, dtype=float)
        temp = np.asarray(self.temp_k, dtype=float)
        if time.ndim != 1 or time.shape != temp.shape or time.size < 2:
            raise SettingsError(
                owner,
                "time_s",
                f"times and temperatures must be 1-D, of one length >= 2; "
                f"got {time.shape} and {temp.shape}",
            )
        if not (np.all(np.isfinite(time)) and np.all(np.isfinite(temp))):
            raise SettingsError(owner, "time_s", "times and temperatures must be finite")
        if time[0] != 0.0 or np.any(np.diff(time) <= 0.0):
            raise SettingsError(owner, "time_s", "must start at 0 and increase strictly")
        if np.any(np.diff(temp) > 0.0):
            raise SettingsError(owner, "temp_k", "a cooling profile never rises")
        object.__setattr__(self, "time_s", time)
        object.__setattr__(self, "temp_k", temp)

    @property
    def duration_s(self) -> float:
        """Time from the first point to the last [s]."""
        return float(self.time_s[-1])

    def temp_at(self, time_s: ArrayLike) -> FloatArray:
        """Setpoint [K] at ``time_s`` [s], linear between points, held after the end."""
        return np.interp(np.asarray(time_s, dtype=float), self.time_s, self.temp_k)

    def cooling_rate_k_per_s(self) -> FloatArray:
        """Cooling rate of each segment [K/s], positive when cooling; one fewer than points."""
        return -np.diff(self.temp_k) / np.diff(self.time_s)


def _check_ends(owner: str, start_temp_k: float, final_temp_k: float, duration_s: float) -> None:
    if not (math.isfinite(start_temp_k) and math.isfinite(final_temp_k)):
        raise SettingsError(owner, "start_temp_k", "temperatures must be finite")
    if not final_temp_k < start_temp_k:
        raise SettingsError(
            owner, "final_temp_k", f"must be below the start {start_temp_k} K; got {final_temp_k}"
        )
    if not (math.isfinite(duration_s) and duration_s > 0.0):
        raise SettingsError(owner, "duration_s", f"must be positive; got {duration_s}")


def linear_profile(
    start_temp_k: float, final_temp_k: float, duration_s: float, *, points: int = 2
) -> CoolingProfile:
    """A constant cooling rate from ``start_temp_k`` to ``final_temp_k`` [K] in
    ``duration_s`` [s], as ``points`` equally spaced points (2 is enough for a recipe).

    Examples
    --------
    >>> profile = linear_profile(323.15, 283.15, 8000.0, points=3)
    >>> profile.temp_k.tolist()
    [323.15, 303.15, 283.15]
    """
    _check_ends("linear_profile", start_temp_k, final_temp_k, duration_s)
    time = np.linspace(0.0, duration_s, max(points, 2))
    temp = start_temp_k + (final_temp_k - start_temp_k) * time / duration_s
    return CoolingProfile("linear", time, temp)


def mullin_nyvlt_fraction(time_fraction: ArrayLike, seed_ratio: float = 0.0) -> FloatArray:
    r"""Fraction of the temperature drop done at ``time_fraction`` :math:`x = t/\tau` [-].

    .. math:: \frac{T_0 - T}{T_0 - T_f} = \frac{x^3 + 3 r x^2 + 3 r^2 x}{1 + 3 r + 3 r^2}

    Parameters
    ----------
    time_fraction : :math:`x` [-], in [0, 1]
    seed_ratio : :math:`r = L_s / (L_p - L_s)` [-], seed size over the growth of a crystal
        during the batch; 0 for the cubic profile

    Examples
    --------
    >>> [round(float(v), 6) for v in mullin_nyvlt_fraction([0.0, 0.5, 1.0])]
    [0.0, 0.125, 1.0]
    """
    if not (math.isfinite(seed_ratio) and seed_ratio >= 0.0):
        raise SettingsError(
            "mullin_nyvlt_fraction", "seed_ratio", f"must be >= 0; got {seed_ratio}"
        )
    x = np.asarray(time_fraction, dtype=float)
    r = seed_ratio
    return (x**3 + 3.0 * r * x**2 + 3.0 * r**2 * x) / (1.0 + 3.0 * r + 3.0 * r**2)


def mullin_nyvlt_profile(
    start_temp_k: float,
    final_temp_k: float,
    duration_s: float,
    *,
    seed_size_m: float = 0.0,
    product_size_m: float | None = None,
    points: int = 21,
) -> CoolingProfile:
    """The Mullin-Nývlt controlled-cooling profile (see the module's description).

    Parameters
    ----------
    start_temp_k : temperature at seeding [K]
    final_temp_k : final temperature [K]
    duration_s : batch time :math:`\\tau` [s]
    seed_size_m : :math:`L_s`, seed crystal size [m]; 0 for the cubic profile
    product_size_m : :math:`L_p`, product crystal size [m], larger than the seed; needed when
        ``seed_size_m`` is positive
    points : equally spaced points in the table
    """
    owner = "mullin_nyvlt_profile"
    _check_ends(owner, start_temp_k, final_temp_k, duration_s)
    if points < 3:
        raise SettingsError(owner, "points", f"a curve needs at least 3 points; got {points}")
    ratio = 0.0
    if seed_size_m:
        if product_size_m is None or not (seed_size_m > 0.0 and product_size_m > seed_size_m):
            raise SettingsError(
                owner,
                "product_size_m",
                f"must exceed the seed size {seed_size_m} m; got {product_size_m}",
            )
        ratio = seed_size_m / (product_size_m - seed_size_m)
    time = np.linspace(0.0, duration_s, points)
    drop = (start_temp_k - final_temp_k) * mullin_nyvlt_fraction(time / duration_s, ratio)
    return CoolingProfile("mullin-nyvlt", time, start_temp_k - drop)
