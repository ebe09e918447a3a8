"""The sample: one instant of a unit's signals, as the live OPC UA service, the simulator and the
historian replay all hand it to the core.

A :class:`Reading` is what one tag said: its value in sigmatrack's units (K, kg/kg solvent), the
OPC UA StatusCode that came with it, and its source timestamp. A :class:`Sample` holds the readings
of one unit at one instant, each optional (``None``: nothing arrived for that tag at this instant,
e.g. between analyzer samples). Times are seconds on one time base chosen by the driver (UNIX time
for live and historian data); the core never reads a clock, so staleness is judged against the
sample's own time.

The StatusCode's severity is its two most significant bits (OPC UA Part 4, StatusCode encoding):
00 Good, 01 Uncertain, 10 Bad (11 is reserved and treated as Bad).

References
----------
.. [1] OPC Foundation, *OPC 10000-4: OPC Unified Architecture, Part 4: Services*, section 7.39
   (StatusCode), and *Part 8: Data Access* (the Uncertain and Bad codes of field devices).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntEnum

GOOD = 0x00000000
"""The OPC UA StatusCode ``Good``."""


class Severity(IntEnum):
    """Severity of an OPC UA StatusCode."""

    GOOD = 0
    UNCERTAIN = 1
    BAD = 2


def severity(status_code: int) -> Severity:
    """The severity of a 32-bit OPC UA StatusCode.

    Examples
    --------
    >>> severity(0x808C0000).name  # BadSensorFailure
    'BAD'
    >>> severity(0x40900000).name  # UncertainLastUsableValue
    'UNCERTAIN'
    """
    bits = (int(status_code) >> 30) & 0b11
    return Severity.GOOD if bits == 0 else Severity.UNCERTAIN if bits == 1 else Severity.BAD


@dataclass(frozen=True)
class Reading:
    """One tag's value at one instant.

    Parameters
    ----------
    value : in sigmatrack's units: temperatures [K], concentrations [kg/kg solvent]
    status_code : the OPC UA StatusCode delivered with it (``GOOD`` = 0)
    source_time_s : when the device produced it [s], on the sample's time base; staleness is the
        sample's time minus this
    """

    value: float
    status_code: int = GOOD
    source_time_s: float | None = None


@dataclass(frozen=True)
class Sample:
    """One unit's signals at ``time_s`` [s].

    Parameters
    ----------
    time_s : the sample's time [s]
    temp : reactor temperature [K]
    jacket_temp : jacket temperature [K]
    conc : analyzer concentration [kg/kg solvent], as it arrives (delayed by the analyzer)
    phase : the batch phase, in sigmatrack's phase names (``sensor.shell.config.BATCH_PHASES``),
        already mapped from the DCS's value; None when not known
    """

    time_s: float
    temp: Reading | None = None
    jacket_temp: Reading | None = None
    conc: Reading | None = None
    phase: str | None = None
