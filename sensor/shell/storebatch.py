"""A batch read back from the store, as the replay's input.

The store keeps each raw sample as the plant delivered it (:class:`~sensor.shell.store.rows.
SampleRow`: our signal name, the source timestamp, the value in plant units, the OPC UA
StatusCode). :func:`stored_batch` lays a batch's samples out as the historian reader does
(:class:`~sensor.shell.historian.HistorianBatch`): one row per instant at which any signal was
sampled, each signal present where it has a sample at that instant, plant units converted to
SI here (the historian reader's conversion), the phase carried forward, so that a stored batch
replays through exactly the same code as a historian file.

The phase may be stored as the DCS's value (``value``, mapped through ``unit.phase_values``)
or as our phase name (``text``). A "line" of a stored batch is the number of its instant,
counted from 1.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from sensor.batchfilter import BatchArrays, phase_code
from sensor.samples import severity
from sensor.shell.config import BATCH_PHASES, SiteConfig
from sensor.shell.historian import ANALOG_SIGNALS, HistorianBatch, plant_to_si
from sensor.shell.store.errors import StoreError
from sensor.shell.store.reader import BatchRecord
from sensor.shell.store.rows import SampleRow, epoch_us, from_epoch_us
from sensor.softsensor import UnitSetup


def timestamp_text(time_us: int) -> str:
    """A store timestamp as the historian writes one (UTC, milliseconds, ``Z``).

    >>> timestamp_text(1773468001000000)
    '2026-03-14T06:00:01.000Z'
    """
    return from_epoch_us(time_us).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def _unit_index(site: SiteConfig, record: BatchRecord, where: str) -> int:
    for i, unit in enumerate(site.unit):
        if unit.id == record.batch.unit_id:
            return i
    raise StoreError(
        where,
        f"batch {record.batch.batch_id!r} ran on unit {record.batch.unit_id!r}, which the site "
        f"file {site.path} does not have",
    )


def _phase_name(sample: SampleRow, names: dict[str, str], where: str) -> str:
    if sample.text is not None:
        if sample.text in BATCH_PHASES:
            return sample.text
        key = sample.text
    elif sample.value is not None and float(sample.value).is_integer():
        key = str(int(sample.value))
    else:
        key = str(sample.value)
    if key not in names:
        raise StoreError(
            where,
            f"phase sample at {sample.time.isoformat()}: {key!r} is neither one of the unit's "
            f"phase_values ({', '.join(names)}) nor a phase name",
        )
    return names[key]


def stored_batch(
    record: BatchRecord, site: SiteConfig, setups: Callable[[int], UnitSetup], where: str
) -> HistorianBatch:
    """The replay input of a stored batch (module docstring).

    Parameters
    ----------
    record : the batch as :func:`~sensor.shell.store.reader.read_batch` returns it
    site : the site file (units, tags' plant units, phase values)
    setups : the soft-sensor setup of a unit by index (which phases are estimated)
    where : the store's URL, for messages

    Raises
    ------
    StoreError
        If the batch's unit is not in the site file, it holds no sample of the soft sensor's
        signals, or a phase sample is not one the unit knows.
    """
    index = _unit_index(site, record, where)
    unit = site.unit[index]
    batch_id = record.batch.batch_id
    analog = [s for s in record.samples if s.signal in ANALOG_SIGNALS]
    if not analog:
        raise StoreError(where, f"batch {batch_id!r} holds no temperature or analyzer sample")
    phases = [s for s in record.samples if s.signal == "phase"]
    instants = np.unique(np.array([epoch_us(s.time) for s in (*analog, *phases)], dtype=np.int64))
    count = len(instants)
    row_of = {int(t): k for k, t in enumerate(instants)}
    raw = np.full((3, count), np.nan)
    codes = np.zeros((3, count), dtype=np.int64)
    present = np.zeros((3, count), dtype=np.bool_)
    for sample in analog:
        signal, k = ANALOG_SIGNALS.index(sample.signal), row_of[epoch_us(sample.time)]
        present[signal, k] = True
        raw[signal, k] = np.nan if sample.value is None else sample.value
        codes[signal, k] = sample.status_code
    names = {str(value): phase for phase, value in unit.phase_values.items()}
    phase_at = [""] * count
    for sample in phases:
        phase_at[row_of[epoch_us(sample.time)]] = _phase_name(sample, names, where)
    for k in range(1, count):
        phase_at[k] = phase_at[k] or phase_at[k - 1]
    times_s = instants / 1e6
    setup = setups(index)
    arrays = BatchArrays(
        time_s=times_s,
        values=plant_to_si(raw, site, unit),
        severities=np.vectorize(lambda c: int(severity(c)), otypes=[np.int8])(codes),
        source_s=np.where(present, times_s, np.nan),
        present=present,
        seeded_phase=np.array([phase_code(setup, p) for p in phase_at], dtype=np.int8),
    )
    return HistorianBatch(
        file=Path(f"store:{batch_id}"),
        batch=batch_id,
        unit=index,
        lines=np.arange(1, count + 1),
        timestamps=tuple(timestamp_text(int(t)) for t in instants),
        arrays=arrays,
        phases=tuple(phase_at),
    )
