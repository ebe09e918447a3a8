"""Reading historian CSV files (the format ``sigmatrack simulate`` writes, and plain historian
exports): one timestamp column and one column per tag, named by the site file's tag names.

The format is in DEVELOPERS.md ("Historian CSV"). Here, once: temperatures °C -> K, the analyzer's
unit -> kg/kg solvent, OPC UA StatusCode names -> codes, the DCS's phase values -> our phase names,
ISO 8601 timestamps -> seconds since 1970-01-01T00:00Z. A blank cell means nothing was recorded at
that instant; for the phase and batch id it means "unchanged". A file whose batch id changes holds
several batches and is split there.

Every problem that makes a file unusable is a :class:`~sensor.errors.DataFileError` naming the
file and the line: no header, a missing tag column, a timestamp without a UTC offset, one that
repeats or goes backwards (with the line of the one before), a cell that is not a number, an
unknown StatusCode name or phase value. A value that is a number but not a usable reading (NaN, a
negative concentration, a Bad quality) is not a file problem: it goes to validation, which rejects
it and says why.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
from asyncua.ua.status_codes import code_to_name_doc

from sensor.batchfilter import BatchArrays, phase_code
from sensor.errors import DataFileError, UnitError
from sensor.samples import severity
from sensor.shell.config import SiteConfig, UnitConfig
from sensor.shell.labdata import read_csv_text
from sensor.shell.sitesensor import analyzer_unit
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K

STATUS_CODES = {name: code for code, (name, _doc) in code_to_name_doc.items()}
"""OPC UA StatusCode names to codes (the OPC Foundation's table, as asyncua ships it)."""

ANALOG_SIGNALS = ("temp", "jacket_temp", "conc")
"""The signals the soft sensor reads, in the order of :class:`~sensor.batchfilter.BatchArrays`."""


@dataclass(frozen=True)
class HistorianBatch:
    """One batch read from a historian file.

    Attributes
    ----------
    file : the file
    batch : the batch id (the batch id column, else the file's name without its suffix)
    unit : index of the site file's unit whose tags the file holds
    lines : (N,) the file line of each sample
    timestamps : (N,) the timestamp text of each sample, as written
    arrays : the samples, in sigmatrack's units
    phases : (N,) our phase name at each sample ("" when not known)
    """

    file: Path
    batch: str
    unit: int
    lines: np.ndarray
    timestamps: tuple[str, ...]
    arrays: BatchArrays
    phases: tuple[str, ...]

    @property
    def samples(self) -> int:
        return len(self.lines)


def status_code(text: str) -> int:
    """A StatusCode from its name (``BadSensorFailure``) or number (``0x808C0000``, decimal);
    blank is ``Good``. Raises KeyError for an unknown name, ValueError for a bad number."""
    text = text.strip()
    if not text:
        return 0
    if text in STATUS_CODES:
        return STATUS_CODES[text]
    if text[:1].isdigit():
        return int(text, 0)
    raise KeyError(text)


def parse_timestamp(text: str) -> float:
    """ISO 8601 with an explicit UTC offset to seconds since the UNIX epoch [s]; ValueError
    otherwise."""
    moment = datetime.fromisoformat(text.strip())
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError("no UTC offset")
    return moment.timestamp()


def _unit_of(
    site: SiteConfig, header: list[str], unit_id: str | None, file: Path, line: int
) -> int:
    if unit_id is not None:
        for i, unit in enumerate(site.unit):
            if unit.id == unit_id:
                return i
        known = ", ".join(u.id for u in site.unit)
        raise DataFileError(file, None, f"the site file has no unit {unit_id!r} (it has {known})")
    matches = [i for i, unit in enumerate(site.unit) if unit.tags["temp"].name in header]
    if len(matches) == 1:
        return matches[0]
    if not matches:
        raise DataFileError(
            file, line, "the header holds no unit's temperature tag (is it the right site file?)"
        )
    raise DataFileError(file, line, "the header holds the tags of several units: name one")


def _columns(unit: UnitConfig, header: list[str], file: Path, line: int) -> dict[str, int]:
    index: dict[str, int] = {}
    if "timestamp" not in header:
        raise DataFileError(file, line, "no column 'timestamp'")
    index["timestamp"] = header.index("timestamp")
    for signal in ANALOG_SIGNALS:
        name = unit.tags[signal].name
        if name not in header:
            raise DataFileError(file, line, f"no column {name!r} (the {signal} tag)")
        index[signal] = header.index(name)
        if f"{name}.quality" in header:
            index[f"{signal}.quality"] = header.index(f"{name}.quality")
    for signal in ("phase", "batch_id"):
        if signal in unit.tags and unit.tags[signal].name in header:
            index[signal] = header.index(unit.tags[signal].name)
    return index


def read_historian_csv(
    path: Path | str,
    site: SiteConfig,
    setups: Callable[[int], UnitSetup],
    unit_id: str | None = None,
) -> list[HistorianBatch]:
    """Read a historian CSV into its batches (one, unless the batch id changes inside).

    Parameters
    ----------
    path : the file
    site : the site file; its tag names name the columns
    setups : the soft-sensor setup of a unit by index (it knows which phases are estimated)
    unit_id : the unit the file belongs to; by default the one whose temperature tag is a column

    Raises
    ------
    DataFileError
        As the module docstring says, naming the file and the line.
    """
    table = read_csv_text(path)
    file, header, header_line = table.file, table.header, table.header_line
    unit_index = _unit_of(site, header, unit_id, file, header_line)
    unit = site.unit[unit_index]
    setup = setups(unit_index)
    columns = _columns(unit, header, file, header_line)
    phase_of = {str(value): phase for phase, value in unit.phase_values.items()}
    count = len(table.rows)
    if count == 0:
        raise DataFileError(file, None, "holds a header but no data rows")
    times = np.empty(count)
    stamps: list[str] = []
    raw = np.full((3, count), np.nan)
    codes = np.zeros((3, count), dtype=np.int64)
    present = np.zeros((3, count), dtype=np.bool_)
    phases: list[str] = []
    batch_ids: list[str] = []
    lines = np.empty(count, dtype=np.int64)
    phase, batch_id = "", ""
    for k, (number, row) in enumerate(table.rows):
        lines[k] = number

        def cell(key: str, row: list[str] = row) -> str:
            position = columns.get(key)
            return row[position].strip() if position is not None and position < len(row) else ""

        stamp = cell("timestamp")
        try:
            times[k] = parse_timestamp(stamp)
        except ValueError:
            raise DataFileError(
                file, number, f"timestamp {stamp!r} is not ISO 8601 with a UTC offset"
            ) from None
        if k and times[k] <= times[k - 1]:
            what = "repeats" if times[k] == times[k - 1] else "goes backwards from"
            raise DataFileError(
                file, number, f"timestamp {stamp} {what} the one on line {lines[k - 1]}"
            )
        stamps.append(stamp)
        for signal_index, signal in enumerate(ANALOG_SIGNALS):
            value = cell(signal)
            if not value:
                continue
            try:
                raw[signal_index, k] = float(value)
            except ValueError:
                raise DataFileError(
                    file, number, f"column {unit.tags[signal].name!r}: {value!r} is not a number"
                ) from None
            present[signal_index, k] = True
            quality = cell(f"{signal}.quality")
            try:
                codes[signal_index, k] = status_code(quality)
            except (KeyError, ValueError):
                raise DataFileError(
                    file,
                    number,
                    f"column {unit.tags[signal].name}.quality: {quality!r} is not an OPC UA "
                    "StatusCode name",
                ) from None
        value = cell("phase")
        if value:
            if value not in phase_of:
                raise DataFileError(
                    file,
                    number,
                    f"phase value {value!r} is not in the unit's phase_values "
                    f"({', '.join(phase_of)})",
                )
            phase = phase_of[value]
        phases.append(phase)
        batch_id = cell("batch_id") or batch_id
        batch_ids.append(batch_id)
    values = plant_to_si(raw, site, unit)
    severities = np.vectorize(lambda c: int(severity(c)), otypes=[np.int8])(codes)
    return _split(
        setup, file, unit_index, lines, stamps, times, values, severities, present, phases,
        batch_ids,
    )  # fmt: skip


def plant_to_si(raw: np.ndarray, site: SiteConfig, unit: UnitConfig) -> np.ndarray:
    """Temperatures °C -> K; the analyzer's unit -> kg/kg (a value the unit cannot hold, such as
    a negative concentration, becomes NaN: validation rejects it as not finite)."""
    values = raw.copy()
    values[:2] += ZERO_CELSIUS_K
    converter = analyzer_unit(site, unit)
    conc = raw[2]
    finite = np.isfinite(conc)
    try:
        values[2, finite] = converter.to_kg_per_kg(conc[finite])
    except UnitError:
        for k in np.flatnonzero(finite):
            try:
                values[2, k] = float(converter.to_kg_per_kg(conc[k]))
            except UnitError:
                values[2, k] = math.nan
    return values


def _split(
    setup: UnitSetup,
    file: Path,
    unit_index: int,
    lines: np.ndarray,
    stamps: list[str],
    times: np.ndarray,
    values: np.ndarray,
    severities: np.ndarray,
    present: np.ndarray,
    phases: list[str],
    batch_ids: list[str],
) -> list[HistorianBatch]:
    ids = np.array(batch_ids, dtype=object)
    starts = [0, *(k for k in range(1, len(ids)) if ids[k] != ids[k - 1])]
    ends = [*starts[1:], len(ids)]
    batches = []
    for lo, hi in zip(starts, ends, strict=True):
        arrays = BatchArrays(
            time_s=times[lo:hi].copy(),
            values=values[:, lo:hi].copy(),
            severities=severities[:, lo:hi].copy(),
            source_s=np.full((3, hi - lo), np.nan),
            present=present[:, lo:hi].copy(),
            seeded_phase=np.array([phase_code(setup, p) for p in phases[lo:hi]], dtype=np.int8),
        )
        batches.append(
            HistorianBatch(
                file=file,
                batch=ids[lo] or file.stem,
                unit=unit_index,
                lines=lines[lo:hi].copy(),
                timestamps=tuple(stamps[lo:hi]),
                arrays=arrays,
                phases=tuple(phases[lo:hi]),
            )
        )
    return batches
