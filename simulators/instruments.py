"""The plant's instruments: temperature transmitters and the inline concentration analyzer.

Each produces at most one :class:`Reading` per DCS scan, in plant units (°C; the analyzer's
``conc_unit``), with an OPC UA StatusCode name, or nothing:

- a **temperature transmitter** reads every scan: the true temperature plus its calibration
  offset and white noise (``unit.temp_noise_std_k``), rounded to its resolution;
- the **analyzer** grabs a sample every ``analyzer.sample_interval_s`` and reports it
  ``analyzer.delay_s`` later (transport and processing): the true concentration at the grab
  plus its calibration bias (a random walk in kg/kg solvent), converted to ``conc_unit``, plus
  white noise (``analyzer.noise_std``), rounded to its resolution.

A value outside the instrument's range is reported at the range limit flagged
``UncertainEngineeringUnitsExceeded``, as a transmitter at the end of its span does. Faults
(:mod:`simulators.faults`) then act on what is reported. Every random draw comes from the
instrument's own generator, so adding a fault to one instrument never changes another's noise.
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from sensor.units import ConcentrationUnit
from simulators.faults import SignalFaults

GOOD = "Good"
EU_EXCEEDED = "UncertainEngineeringUnitsExceeded"
NOT_ACCURATE = "UncertainSensorNotAccurate"
SENSOR_FAILURE = "BadSensorFailure"


@dataclass(frozen=True)
class Reading:
    """One value as an instrument or the DCS reports it.

    Parameters
    ----------
    value : in plant units (°C, the analyzer's unit, a phase value, ...)
    status : OPC UA StatusCode name (``Good``, ``UncertainSensorNotAccurate``,
        ``BadSensorFailure``, ...)
    source_time_s : the source timestamp it carries, from the start of the batch [s]; ``None``:
        the time it is reported (a timestamp fault sets another)
    """

    value: float | int | str | bool
    status: str = GOOD
    source_time_s: float | None = None


class NormalStream:
    """Standard normal draws from ``rng``, taken in blocks (one call per draw is slow)."""

    def __init__(self, rng: np.random.Generator, block: int = 4096) -> None:
        self._rng = rng
        self._block = block
        self._values: list[float] = []

    def next(self) -> float:
        if not self._values:
            self._values = self._rng.standard_normal(self._block).tolist()[::-1]
        return self._values.pop()


class Channel:
    """What every instrument does to a raw measurement before it is reported: resolution,
    range, then faults.

    Parameters
    ----------
    faults : the faults of this signal
    rng : generator for the fault's random draws (spikes)
    noise_std : the instrument's noise std, in plant units (spike heights are multiples of it)
    resolution : smallest step of the reported value, in plant units
    value_range : (low, high) of the instrument, in plant units
    sample_interval_s : how often it reports [s] (a spike's chance per report)
    """

    def __init__(
        self,
        faults: SignalFaults,
        rng: np.random.Generator,
        noise_std: float,
        resolution: float,
        value_range: tuple[float, float],
        sample_interval_s: float,
    ) -> None:
        self.faults = faults
        self._rng = rng
        self.noise_std = noise_std
        self.resolution = resolution
        self.value_range = value_range
        self.sample_interval_s = sample_interval_s
        self.last: Reading | None = None
        self._stamped_s: float | None = None

    def drift_per_s(self, time_s: float) -> float:
        """Sum of the active drift faults' rates, per second (their unit per hour / 3600)."""
        return sum(f.rate_per_h for f in self.faults.active("drift", time_s)) / 3600.0  # type: ignore[misc]

    def report(self, time_s: float, raw: float) -> Reading | None:
        """The reading reported at ``time_s`` [s] for the raw measurement ``raw``, with the
        source timestamp a timestamp fault gives it."""
        kinds = self.faults.kinds_at(time_s) if self.faults.faults else frozenset()
        reading = self._value(time_s, raw, kinds)
        if reading is None:
            return None
        if "stuck-timestamp" in kinds and self._stamped_s is not None:
            return dataclasses.replace(reading, source_time_s=self._stamped_s)
        self._stamped_s = time_s
        behind = self.faults.active("clock-behind", time_s) if kinds else ()
        if behind:
            return dataclasses.replace(reading, source_time_s=time_s - (behind[0].lag_s or 0.0))
        return reading

    def _value(self, time_s: float, raw: float, kinds: frozenset[str]) -> Reading | None:
        if "dropout" in kinds:
            return None
        if "nan" in kinds and "bad" not in kinds:
            return Reading(math.nan, GOOD)
        if "frozen" in kinds and "bad" not in kinds and self.last is not None:
            return self.last
        value = raw
        for fault in self.faults.active("spikes", time_s) if kinds else ():
            every_s, size_std = fault.every_s or math.inf, fault.size_std or 0.0
            draw = self._rng.random(2)
            if draw[0] < self.sample_interval_s / every_s:
                value += math.copysign(size_std * self.noise_std, draw[1] - 0.5)
        # quantized, then rounded so that the decimal text is the resolution's (52.37, not
        # 52.370000000000005)
        value = round(round(value / self.resolution) * self.resolution, 12)
        low, high = self.value_range
        status = GOOD
        if not low <= value <= high:
            value, status = min(max(value, low), high), EU_EXCEEDED
        if "bad" in kinds:
            return Reading(value, SENSOR_FAILURE)
        if "uncertain" in kinds:
            status = NOT_ACCURATE
        self.last = Reading(value, status)
        return self.last


class TemperatureTransmitter:
    """A temperature transmitter (module text), read every DCS scan.

    Parameters
    ----------
    channel : resolution, range [°C] and faults
    noise : its noise draws
    noise_std_k : white noise std [K]
    """

    def __init__(self, channel: Channel, noise: NormalStream, noise_std_k: float) -> None:
        self.channel = channel
        self._noise = noise
        self.noise_std_k = noise_std_k
        self.offset_k = 0.0

    def read(self, time_s: float, dt_s: float, temp_c: float) -> Reading | None:
        """Reading at ``time_s`` [s] of the true temperature ``temp_c`` [°C]; ``dt_s`` [s] since
        the last (for drift)."""
        self.offset_k += self.channel.drift_per_s(time_s) * dt_s
        raw = temp_c + self.offset_k + self.noise_std_k * self._noise.next()
        return self.channel.report(time_s, raw)


class Analyzer:
    """The inline concentration analyzer (module text), on the DCS scan grid.

    Parameters
    ----------
    channel : resolution, range (``conc_unit``) and faults
    unit : converter from kg/kg solvent to the analyzer's unit
    noise : its noise draws
    noise_std : white noise std [conc_unit]
    interval_steps : scans between grabs [-]
    delay_steps : scans between a grab and its report [-]
    dt_s : the scan interval [s]
    initial_bias : calibration bias at the start [kg/kg solvent]
    bias_walk_per_sqrt_s : random-walk std of the bias [kg/kg solvent per sqrt(s)]
    bias_noise : the bias walk's draws
    """

    def __init__(
        self,
        channel: Channel,
        unit: ConcentrationUnit,
        noise: NormalStream,
        noise_std: float,
        interval_steps: int,
        delay_steps: int,
        dt_s: float,
        initial_bias: float,
        bias_walk_per_sqrt_s: float,
        bias_noise: NormalStream,
    ) -> None:
        self.channel = channel
        self.unit = unit
        self._noise = noise
        self.noise_std = noise_std
        self.interval_steps = interval_steps
        self.delay_steps = delay_steps
        self.dt_s = dt_s
        self.bias = initial_bias
        self._walk_std = bias_walk_per_sqrt_s * math.sqrt(interval_steps * dt_s)
        self._bias_noise = bias_noise
        self._pending: deque[tuple[int, float]] = deque()

    def step(self, step: int, conc: float) -> Reading | None:
        """Grab and/or report at scan ``step`` (time ``step * dt_s``), the true concentration
        being ``conc`` [kg/kg solvent]."""
        time_s = step * self.dt_s
        if step % self.interval_steps == 0:
            interval_s = self.interval_steps * self.dt_s
            self.bias += self._walk_std * self._bias_noise.next()
            self.bias += self.channel.drift_per_s(time_s) * interval_s
            self._pending.append((step + self.delay_steps, max(conc + self.bias, 0.0)))
        if not self._pending or self._pending[0][0] != step:
            return None
        _, measured = self._pending.popleft()
        raw = float(self.unit.from_kg_per_kg(measured)) + self.noise_std * self._noise.next()
        return self.channel.report(time_s, raw)
