r"""The batch recipe as a DCS runs it, with the remote setpoint the advisor may write.

Phases, in order (our names, ``sensor.shell.config.BATCH_PHASES``):

======================  ========================================================================
phase                   what the recipe does; when it moves on
======================  ========================================================================
``idle``                holds the charge temperature for ``idle_s``
``heat``                ramps the setpoint at ``heat_rate_k_per_min`` to ``dissolve_temp_c``;
                        on when the reactor is within ``temp_tolerance_k`` of it
``dissolve``            holds for ``dissolve_hold_s``
``cool-to-seed``        ramps down at ``cool_to_seed_rate_k_per_min`` to ``seed_temp_c``; on when
                        the reactor is within the tolerance
``seed``                the seed is charged as the phase starts; holds for ``seed_s``
``seed-hold``           holds for ``seed_hold_s`` (seed healing)
``controlled-cooling``  cools to ``final_temp_c``: its own profile, or the remote setpoint (below);
                        on when the setpoint is at the final temperature and the reactor within
                        the tolerance
``final-hold``          holds for ``final_hold_s``
``discharge``           holds for ``discharge_s``; then the batch is over
======================  ========================================================================

The recipe's own cooling profile over ``cooling_duration_s`` (:math:`\tau`) from the seed
temperature :math:`T_0` to the final one :math:`T_f` is linear or the Mullin-Nývlt cubic [1]_
(slow at first, while the seed surface is small):

.. math:: T(t) = T_0 - (T_0 - T_f)\,(t/\tau) \qquad\text{or}\qquad
          T(t) = T_0 - (T_0 - T_f)\,(t/\tau)^3

or a table read from a profile CSV (``cooling_profile = "file"``, for example the plan of
``sigmatrack plan --out``), linear between its rows and held at its last.

**Remote setpoint.** During controlled cooling the recipe follows the remote reactor-temperature
setpoint only while the permissive is on, the advisor's heartbeat counter has changed within
``heartbeat_timeout_s`` (the watchdog), the value is a finite number, and the phase has run less
than ``cooling_max_s``. Otherwise it follows its own profile, resumed bumplessly from the point
of the profile that matches the setpoint it holds. Whatever the source, the setpoint stays
between the final and the seed temperature and moves no faster than
``max_cooling_rate_k_per_min`` down and ``max_heating_rate_k_per_min`` up.

A phase that waits for the reactor temperature waits while that measurement is not usable
(bad or missing), as a DCS step condition does.

References
----------
.. [1] J. W. Mullin, J. Nývlt, "Programmed cooling of batch crystallizers", Chem. Eng. Sci. 26
   (1971) 369-377. doi:10.1016/0009-2509(71)83012-9
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sensor.numerics import FloatArray
from sensor.units import ZERO_CELSIUS_K
from simulators.settings import RecipeSettings


@dataclass(frozen=True)
class DcsInputs:
    """What the advisor (or the operator, for the permissive) writes to the DCS.

    Parameters
    ----------
    permissive : the DCS grants the advisor's setpoint
    remote_setpoint_c : the advisor's reactor temperature setpoint [°C]
    heartbeat : the advisor's heartbeat counter; it must keep changing
    """

    permissive: bool = False
    remote_setpoint_c: float = math.nan
    heartbeat: int = 0


@dataclass(frozen=True)
class RecipeOutput:
    """What the recipe decided at one DCS scan.

    Attributes
    ----------
    phase : our phase name
    setpoint_k : working reactor temperature setpoint [K]
    setpoint_rate_k_per_s : its rate over the last scan [K/s]
    remote_active : the remote setpoint is in control
    charge_seed : the seed is to be charged now (once per batch)
    finished : the batch is over
    """

    phase: str
    setpoint_k: float
    setpoint_rate_k_per_s: float
    remote_active: bool
    charge_seed: bool
    finished: bool


def cooling_profile_k(
    elapsed_s: float, start_k: float, final_k: float, duration_s: float, shape: str
) -> float:
    """The recipe's cooling profile [K] at ``elapsed_s`` [s] (module equations); ``shape`` is
    ``"linear"`` or ``"cubic"``; held at ``final_k`` after ``duration_s``.

    Examples
    --------
    >>> cooling_profile_k(1800.0, 326.15, 283.15, 3600.0, "cubic")
    320.775
    """
    fraction = min(max(elapsed_s / duration_s, 0.0), 1.0)
    if fraction == 1.0:
        return final_k
    if shape == "cubic":
        fraction = fraction**3
    return start_k - (start_k - final_k) * fraction


def cooling_profile_time_s(
    temp_k: float, start_k: float, final_k: float, duration_s: float, shape: str
) -> float:
    """The inverse of :func:`cooling_profile_k`: the time [s] at which the profile reaches
    ``temp_k`` [K] (0 above the start, ``duration_s`` below the end)."""
    fraction = min(max((start_k - temp_k) / (start_k - final_k), 0.0), 1.0)
    if shape == "cubic":
        fraction = fraction ** (1.0 / 3.0)
    return fraction * duration_s


def table_profile_k(elapsed_s: float, time_s: FloatArray, temp_k: FloatArray) -> float:
    """A tabulated profile [K] at ``elapsed_s`` [s]: linear between the rows (``time_s``
    increasing, ``temp_k`` never rising), held at the first before it and the last after it.

    Examples
    --------
    >>> table_profile_k(150.0, np.array([0.0, 100.0, 200.0]), np.array([320.0, 310.0, 300.0]))
    305.0
    """
    return float(np.interp(elapsed_s, time_s, temp_k))


def table_profile_time_s(temp_k: float, time_s: FloatArray, temp_k_table: FloatArray) -> float:
    """The inverse of :func:`table_profile_k` on a table that never rises: the earliest time [s]
    at which the profile reaches ``temp_k`` [K] (0 above the start, the last time below the
    end). On a hold (rows of one temperature) it is the hold's start, so a resume never skips
    a hold.

    Examples
    --------
    >>> table_profile_time_s(
    ...     305.0, np.array([0.0, 100.0, 200.0, 300.0]), np.array([320.0, 310.0, 310.0, 300.0])
    ... )
    250.0
    """
    # the first row at or below temp_k; -temp_k_table is non-decreasing
    row = int(np.searchsorted(-temp_k_table, -temp_k, side="left"))
    if row == 0:
        return 0.0
    if row == len(time_s):
        return float(time_s[-1])
    upper, lower = temp_k_table[row - 1], temp_k_table[row]
    fraction = (upper - temp_k) / (upper - lower)
    return float(time_s[row - 1] + fraction * (time_s[row] - time_s[row - 1]))


class Recipe:
    """The recipe's state machine (module table), stepped by the DCS scan.

    Parameters
    ----------
    settings : the ``[simulator.recipe]`` table
    start_temp_k : the charge temperature, the first setpoint [K]
    """

    def __init__(self, settings: RecipeSettings, start_temp_k: float) -> None:
        self.settings = settings
        self.phase = "idle"
        self.phase_start_s = 0.0
        self.time_s = 0.0
        self.setpoint_k = start_temp_k
        self.remote_active = False
        self.finished = False
        self._seed_charged = False
        self._heartbeat: int | None = None
        self._heartbeat_seen_s = -math.inf
        self._profile_clock_s = 0.0
        self._was_remote = False
        s = settings
        self._dissolve_k = s.dissolve_temp_c + ZERO_CELSIUS_K
        self._seed_k = s.seed_temp_c + ZERO_CELSIUS_K
        self._final_k = s.final_temp_c + ZERO_CELSIUS_K

    def heartbeat_alive(self, time_s: float) -> bool:
        """Whether the advisor's heartbeat changed within the watchdog timeout."""
        return time_s - self._heartbeat_seen_s <= self.settings.heartbeat_timeout_s

    def _enter(self, phase: str, time_s: float) -> None:
        self.phase = phase
        self.phase_start_s = time_s

    def _ramp(self, target_k: float, rate_k_per_min: float, dt_s: float) -> float:
        step = rate_k_per_min / 60.0 * dt_s
        return min(max(target_k, self.setpoint_k - step), self.setpoint_k + step)

    def _near(self, measured_k: float | None, target_k: float) -> bool:
        return (
            measured_k is not None and abs(measured_k - target_k) <= self.settings.temp_tolerance_k
        )

    def update(
        self, time_s: float, dt_s: float, measured_temp_k: float | None, inputs: DcsInputs
    ) -> RecipeOutput:
        """One DCS scan at ``time_s`` [s], ``dt_s`` [s] after the last, with the measured
        reactor temperature [K] (``None`` if not usable) and the advisor's inputs."""
        self.time_s = time_s
        if inputs.heartbeat != self._heartbeat:
            if self._heartbeat is not None:
                self._heartbeat_seen_s = time_s
            self._heartbeat = inputs.heartbeat
        previous = self.setpoint_k
        charge_seed = False
        s = self.settings
        elapsed = time_s - self.phase_start_s
        self.remote_active = False
        if self.phase == "idle" and elapsed >= s.idle_s:
            self._enter("heat", time_s)
        elif self.phase == "heat":
            self.setpoint_k = self._ramp(self._dissolve_k, s.heat_rate_k_per_min, dt_s)
            if self.setpoint_k == self._dissolve_k and self._near(
                measured_temp_k, self._dissolve_k
            ):
                self._enter("dissolve", time_s)
        elif self.phase == "dissolve" and elapsed >= s.dissolve_hold_s:
            self._enter("cool-to-seed", time_s)
        elif self.phase == "cool-to-seed":
            self.setpoint_k = self._ramp(self._seed_k, s.cool_to_seed_rate_k_per_min, dt_s)
            if self.setpoint_k == self._seed_k and self._near(measured_temp_k, self._seed_k):
                self._enter("seed", time_s)
        elif self.phase == "seed":
            if not self._seed_charged:
                self._seed_charged = charge_seed = True
            if elapsed >= s.seed_s:
                self._enter("seed-hold", time_s)
        elif self.phase == "seed-hold" and elapsed >= s.seed_hold_s:
            self._enter("controlled-cooling", time_s)
            self._profile_clock_s = 0.0
        elif self.phase == "controlled-cooling":
            self._controlled_cooling(time_s, dt_s, elapsed, inputs)
            if self.setpoint_k == self._final_k and self._near(measured_temp_k, self._final_k):
                self._enter("final-hold", time_s)
        elif self.phase == "final-hold" and elapsed >= s.final_hold_s:
            self._enter("discharge", time_s)
        elif self.phase == "discharge" and elapsed >= s.discharge_s:
            self.finished = True
        return RecipeOutput(
            phase=self.phase,
            setpoint_k=self.setpoint_k,
            setpoint_rate_k_per_s=(self.setpoint_k - previous) / dt_s,
            remote_active=self.remote_active,
            charge_seed=charge_seed,
            finished=self.finished,
        )

    def _controlled_cooling(
        self, time_s: float, dt_s: float, elapsed_s: float, inputs: DcsInputs
    ) -> None:
        s = self.settings
        remote = (
            inputs.permissive
            and self.heartbeat_alive(time_s)
            and math.isfinite(inputs.remote_setpoint_c)
            and elapsed_s < s.cooling_max_s
        )
        if remote:
            target = min(
                max(inputs.remote_setpoint_c + ZERO_CELSIUS_K, self._final_k), self._seed_k
            )
        else:
            if self._was_remote:
                self._profile_clock_s = self._profile_time_s(self.setpoint_k)
            self._profile_clock_s += dt_s
            target = self._profile_k(self._profile_clock_s)
        step_down = s.max_cooling_rate_k_per_min / 60.0 * dt_s
        step_up = s.max_heating_rate_k_per_min / 60.0 * dt_s
        self.setpoint_k = min(max(target, self.setpoint_k - step_down), self.setpoint_k + step_up)
        self.remote_active = self._was_remote = remote

    def _profile_k(self, elapsed_s: float) -> float:
        """The recipe's own profile [K], ``elapsed_s`` [s] into it."""
        s, table = self.settings, self.settings.profile_table
        if table is not None:
            if elapsed_s >= table.time_s[-1]:
                return self._final_k  # the table ends within its resolution of it
            value = table_profile_k(elapsed_s, table.time_s, table.temp_k)
            return min(max(value, self._final_k), self._seed_k)
        return cooling_profile_k(
            elapsed_s, self._seed_k, self._final_k, s.cooling_duration_s, s.cooling_profile
        )

    def _profile_time_s(self, temp_k: float) -> float:
        """Where on the recipe's own profile [s] it reaches ``temp_k`` [K]."""
        s, table = self.settings, self.settings.profile_table
        if table is not None:
            return table_profile_time_s(temp_k, table.time_s, table.temp_k)
        return cooling_profile_time_s(
            temp_k, self._seed_k, self._final_k, s.cooling_duration_s, s.cooling_profile
        )
