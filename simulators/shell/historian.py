"""Writing a simulated batch as a plant historian would export it, and its truth beside it.

Both formats are fixed in DEVELOPERS.md ("Data formats between the parts"); the replay reader is
written against that text.

- **Historian CSV**: ``#`` comment lines (seed, site file and its sha256, batch id, unit,
  mismatch, faults), then a header ``timestamp`` and one column per tag of the unit, named by
  the tag, in plant units, with a ``<tag>.quality`` column (the OPC UA StatusCode name) after
  each analog tag. One row per scan; a blank cell means nothing was recorded (between analyzer
  samples, a dropout).
- **Truth CSV**: ``time_s``, ``timestamp`` and the fields of
  :class:`~simulators.plant.PlantTruth`, floats written to round-trip exactly.
"""

from __future__ import annotations

import csv
import dataclasses
import math
from datetime import datetime
from typing import TextIO

from sensor.shell.config import SIGNALS, UnitConfig
from simulators.plant import PlantSample, PlantTruth

ANALOG_SIGNALS = ("temp", "jacket_temp", "jacket_setpoint", "conc")
"""Signals whose historian column has a ``.quality`` column beside it."""

TRUTH_COLUMNS = (
    "time_s",
    "timestamp",
    "temp_c",
    "jacket_temp_c",
    "conc",
    "conc_sat",
    "sigma",
    "solids_kg_per_kg_solvent",
    "mean_size_um",
    "phase",
    "analyzer_bias",
    "setpoint_c",
    "jacket_setpoint_c",
    "sigma_limit",
    "seed_added_kg_per_kg_solvent",
    "count_per_kg_solvent",
    "growth_rate_m_per_s",
    "nucleation_rate_per_kg_s",
    "remote_active",
)
"""Columns of the truth CSV: the DEVELOPERS.md minimum first, then the simulator's own."""


def format_timestamp(moment: datetime) -> str:
    """ISO 8601 in UTC with milliseconds and ``Z``: ``2026-03-14T06:00:00.000Z``."""
    return f"{moment:%Y-%m-%dT%H:%M:%S}.{moment.microsecond // 1000:03d}Z"


def format_value(value: float | int | str | bool) -> str:
    """A historian cell: booleans as 0/1, floats in their shortest exact form."""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else "NaN"
    return str(value)


class HistorianWriter:
    """Writes :class:`~simulators.plant.PlantSample` rows for one unit.

    Parameters
    ----------
    stream : a text stream opened with ``newline=""``
    unit : the unit whose tags name the columns
    comments : lines written first, each after ``# ``
    """

    def __init__(self, stream: TextIO, unit: UnitConfig, comments: list[str]) -> None:
        self.signals = [s for s in SIGNALS if s in unit.tags]
        header = ["timestamp"]
        for signal in self.signals:
            name = unit.tags[signal].name
            header.append(name)
            if signal in ANALOG_SIGNALS:
                header.append(f"{name}.quality")
        for line in comments:
            stream.write(f"# {line}\n")
        self._writer = csv.writer(stream, lineterminator="\n")
        self._writer.writerow(header)
        self.header = tuple(header)

    def write(self, sample: PlantSample, moment: datetime) -> None:
        row = [format_timestamp(moment)]
        readings = sample.readings
        for signal in self.signals:
            reading = readings.get(signal)
            row.append("" if reading is None else format_value(reading.value))
            if signal in ANALOG_SIGNALS:
                row.append("" if reading is None else reading.status)
        self._writer.writerow(row)


class TruthWriter:
    """Writes :class:`~simulators.plant.PlantTruth` rows (columns :data:`TRUTH_COLUMNS`)."""

    def __init__(self, stream: TextIO, comments: list[str]) -> None:
        names = {f.name for f in dataclasses.fields(PlantTruth)} | {"timestamp"}
        assert set(TRUTH_COLUMNS) == names, "TRUTH_COLUMNS and PlantTruth disagree"
        for line in comments:
            stream.write(f"# {line}\n")
        self._writer = csv.writer(stream, lineterminator="\n")
        self._writer.writerow(TRUTH_COLUMNS)
        self._fields = TRUTH_COLUMNS[2:]

    def write(self, truth: PlantTruth, moment: datetime) -> None:
        row = [format_value(truth.time_s), format_timestamp(moment)]
        row.extend(format_value(getattr(truth, name)) for name in self._fields)
        self._writer.writerow(row)
