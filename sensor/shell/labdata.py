"""Lab and recipe data files: solubility points, polythermal cloud points, cooling profiles.

The files are CSV with a header row. Lines starting with ``#`` and blank lines are skipped
anywhere; columns other than the ones needed are ignored. Each value needed must be a finite
number; the first problem found is reported with the file and its line number, and nothing is
guessed. Concentrations are converted to kg/kg solvent and temperatures to K here, once.

=================  ==========================================  ============================
file               columns                                     units
=================  ==========================================  ============================
solubility         ``temp_c``, ``conc``                        °C, the unit given
cloud points       ``conc``, ``rate_k_per_min``,               the unit given, K/min, °C
                   ``cloud_temp_c``
cooling profile    ``time_min``, ``temp_c``                    min, °C
                   (``cooling_rate_k_per_min`` written,
                   not read: it is derived)
=================  ==========================================  ============================

The cooling profile is the one file format here that sigmatrack also writes
(:func:`write_profile_csv`, for ``sigmatrack plan --out``) and the plant simulator's recipe
reads (:func:`read_profile_csv`); it lives here, beside the other site data files, so that the
writer and the reader are one piece of code (DEVELOPERS.md, "Profile CSV").
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import numpy as np

from sensor.errors import DataFileError, UnitError
from sensor.numerics import FloatArray
from sensor.units import (
    ConcentrationUnit,
    celsius_to_kelvin,
    kelvin_to_celsius,
    per_minute_to_per_second,
)


@dataclass(frozen=True)
class Columns:
    """Numeric columns read from a CSV file, with the file line each row came from."""

    file: Path
    values: dict[str, FloatArray]
    lines: tuple[int, ...]

    def line_of(self, row: int) -> int:
        return self.lines[row]


@dataclass(frozen=True)
class CsvText:
    """A CSV file's header and rows, comment and blank lines dropped, with line numbers."""

    file: Path
    header: list[str]
    header_line: int
    rows: list[tuple[int, list[str]]]


def read_csv_text(path: Path | str) -> CsvText:
    """Read a CSV file with a header; lines starting with ``#`` and blank lines are skipped.

    Raises
    ------
    DataFileError
        If the file cannot be read, is not UTF-8 or holds no header.
    """
    file = Path(path)
    try:
        text = file.read_text(encoding="utf-8-sig")
    except OSError as error:
        raise DataFileError(file, None, f"cannot be read ({error.strerror})") from None
    except UnicodeDecodeError:
        raise DataFileError(file, None, "is not UTF-8 text") from None
    numbered = [
        (number, line)
        for number, line in enumerate(text.splitlines(), start=1)
        if line.strip() and not line.lstrip().startswith("#")
    ]
    if not numbered:
        raise DataFileError(file, None, "holds no header and no data")
    rows = csv.reader([line for _, line in numbered])
    header = [name.strip() for name in next(rows)]
    body = [(number, row) for (number, _), row in zip(numbered[1:], rows, strict=True)]
    return CsvText(file, header, numbered[0][0], body)


def read_numeric_columns(path: Path | str, names: Sequence[str]) -> Columns:
    """Read the named columns of a CSV file as floats.

    Raises
    ------
    DataFileError
        If the file cannot be read, has no header or lacks a column, or a cell is empty, not a
        number, NaN or infinite; the message names the file, the line and the column.
    """
    table = read_csv_text(path)
    file, header, header_line = table.file, table.header, table.header_line
    index = {}
    for name in names:
        if name not in header:
            raise DataFileError(
                file, header_line, f"no column {name!r} (the header has {', '.join(header)})"
            )
        index[name] = header.index(name)
    columns: dict[str, list[float]] = {name: [] for name in names}
    lines = []
    for number, row in table.rows:
        for name in names:
            position = index[name]
            cell = row[position].strip() if position < len(row) else ""
            if not cell:
                raise DataFileError(file, number, f"column {name!r} is empty")
            try:
                value = float(cell)
            except ValueError:
                raise DataFileError(
                    file, number, f"column {name!r}: {cell!r} is not a number"
                ) from None
            if not math.isfinite(value):
                raise DataFileError(file, number, f"column {name!r}: {cell!r} is not finite")
            columns[name].append(value)
        lines.append(number)
    if not lines:
        raise DataFileError(file, None, "holds a header but no data rows")
    return Columns(file, {n: np.array(v) for n, v in columns.items()}, tuple(lines))


def _convert(
    columns: Columns, name: str, unit: ConcentrationUnit, temp_k: FloatArray
) -> FloatArray:
    """Column ``name`` in ``unit`` to kg/kg solvent (at each row's temperature, for g/L)."""
    raw = columns.values[name]
    try:
        return unit.to_kg_per_kg(raw, temp_k)
    except UnitError:
        for row, value in enumerate(raw):
            try:
                unit.to_kg_per_kg(value, temp_k[row])
            except UnitError as error:
                raise DataFileError(
                    columns.file, columns.line_of(row), f"column {name!r}: {error}"
                ) from None
        raise


@dataclass(frozen=True)
class SolubilityData:
    """Solubility points: saturation temperature [K] and concentration [kg/kg solvent]."""

    temp_k: FloatArray
    conc: FloatArray
    source: Columns


def read_solubility_csv(path: Path | str, unit: ConcentrationUnit) -> SolubilityData:
    """Read a solubility file (columns ``temp_c``, ``conc``).

    The same temperature twice with different concentrations is refused: average replicate
    measurements before fitting (a repeated identical row is accepted).
    """
    columns = read_numeric_columns(path, ("temp_c", "conc"))
    temp_c = columns.values["temp_c"]
    temp_k = celsius_to_kelvin(temp_c)
    conc = _convert(columns, "conc", unit, temp_k)
    first_seen: dict[float, int] = {}
    for row, t in enumerate(temp_c):
        if t in first_seen:
            earlier = first_seen[t]
            if conc[earlier] != conc[row]:
                raise DataFileError(
                    columns.file,
                    columns.line_of(row),
                    f"temp_c {t:g} is already on line {columns.line_of(earlier)} with conc "
                    f"{columns.values['conc'][earlier]:g} (here {columns.values['conc'][row]:g}); "
                    "average replicates before fitting",
                )
        else:
            first_seen[t] = row
    for row, c in enumerate(conc):
        if c <= 0.0:
            raise DataFileError(
                columns.file, columns.line_of(row), "conc must be positive for a solubility point"
            )
    return SolubilityData(temp_k, conc, columns)


@dataclass(frozen=True)
class CloudPointData:
    """Cloud points: concentration [kg/kg solvent], cooling rate [K/s], cloud temperature [K]."""

    conc: FloatArray
    rate_k_per_s: FloatArray
    cloud_temp_k: FloatArray
    source: Columns


def read_cloud_points_csv(path: Path | str, unit: ConcentrationUnit) -> CloudPointData:
    """Read a cloud-point file (columns ``conc``, ``rate_k_per_min``, ``cloud_temp_c``)."""
    columns = read_numeric_columns(path, ("conc", "rate_k_per_min", "cloud_temp_c"))
    cloud_temp_k = celsius_to_kelvin(columns.values["cloud_temp_c"])
    conc = _convert(columns, "conc", unit, cloud_temp_k)
    rate = columns.values["rate_k_per_min"]
    for row, value in enumerate(rate):
        if value <= 0.0:
            raise DataFileError(
                columns.file,
                columns.line_of(row),
                f"rate_k_per_min must be positive; got {value:g}",
            )
    return CloudPointData(conc, per_minute_to_per_second(rate), cloud_temp_k, columns)


PROFILE_COLUMNS = ("time_min", "temp_c", "cooling_rate_k_per_min")
"""The profile CSV's header."""

PROFILE_CAUTION = (
    "Advisory reference profile from sigmatrack. Review it against the site's limits, "
    "management of change and licensed practice before loading it into a recipe; the DCS "
    "keeps control and the safety instrumented system keeps protection."
)
"""Written as the last comment line of every profile CSV."""


@dataclass(frozen=True)
class ProfileData:
    """A cooling profile read from a profile CSV: setpoints at times from its start.

    Attributes
    ----------
    time_s : times from the start [s]: 0 first, strictly increasing
    temp_k : reactor-temperature setpoints [K], never rising
    source : the columns as read, with their line numbers
    """

    time_s: FloatArray
    temp_k: FloatArray
    source: Columns


def write_profile_csv(
    stream: TextIO,
    name: str,
    time_s: FloatArray,
    temp_k: FloatArray,
    *,
    comments: Iterable[str] = (),
) -> None:
    """Write a cooling profile as a profile CSV to an open text stream.

    Parameters
    ----------
    stream : where to write
    name : what made the profile (the first comment line)
    time_s : times from the start [s]
    temp_k : reactor-temperature setpoints at those times [K]
    comments : further ``#`` lines, after the name and before the caution

    Times are written to 0.01 min, temperatures to 0.01 °C and the cooling rate to the next row
    to 0.0001 K/min (positive when cooling, 0 on the last row).
    """
    time = np.asarray(time_s, dtype=float)
    temp = np.asarray(temp_k, dtype=float)
    stream.write(f"# sigmatrack reference cooling profile: {name}\n")
    for line in (*comments, PROFILE_CAUTION):
        stream.write(f"# {line}\n")
    writer = csv.writer(stream, lineterminator="\n")
    writer.writerow(PROFILE_COLUMNS)
    rates = np.append(-np.diff(temp) / np.diff(time) * 60.0, 0.0)
    for t, c, rate in zip(time, kelvin_to_celsius(temp), rates, strict=True):
        writer.writerow([f"{t / 60.0:.2f}", f"{c:.2f}", f"{rate + 0.0:.4f}"])


def read_profile_csv(path: Path | str) -> ProfileData:
    """Read a profile CSV (columns ``time_min``, ``temp_c``).

    Raises
    ------
    DataFileError
        Besides :func:`read_numeric_columns`' reasons: fewer than two rows, a first time other
        than 0, a time not after the one before, or a temperature above the one before (a
        cooling profile never rises); the message names the file and the line.
    """
    columns = read_numeric_columns(path, ("time_min", "temp_c"))
    time_min = columns.values["time_min"]
    temp_c = columns.values["temp_c"]
    if len(time_min) < 2:
        raise DataFileError(columns.file, None, "a profile needs at least two rows")
    if time_min[0] != 0.0:
        raise DataFileError(
            columns.file, columns.line_of(0), f"time_min must start at 0; got {time_min[0]:g}"
        )
    for row in range(1, len(time_min)):
        if time_min[row] <= time_min[row - 1]:
            raise DataFileError(
                columns.file,
                columns.line_of(row),
                f"time_min {time_min[row]:g} is not after {time_min[row - 1]:g} on line "
                f"{columns.line_of(row - 1)}",
            )
        if temp_c[row] > temp_c[row - 1]:
            raise DataFileError(
                columns.file,
                columns.line_of(row),
                f"temp_c {temp_c[row]:g} is above {temp_c[row - 1]:g} on line "
                f"{columns.line_of(row - 1)}: a cooling profile never rises",
            )
    return ProfileData(time_min * 60.0, celsius_to_kelvin(temp_c), columns)
