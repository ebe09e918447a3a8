"""Reading the store back: batches, in time order, as rows and as arrays (for replay).

A batch's rows are those of its unit from its start to its end, both included; a batch with no
end yet (running, or cut short by a crash) runs until the next batch of the unit starts, or
without bound. Samples come ordered by time, then signal; estimates, proposals and alarm events
by time.

Reading never creates anything: a SQLite file that does not exist, or a database without
sigmatrack's tables, is refused with a :class:`~sensor.shell.store.errors.StoreError`, and a
database that cannot be reached with a
:class:`~sensor.shell.store.errors.StoreUnavailableError`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, fields
from pathlib import Path
from typing import TypeVar

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import ColumnElement, exc, select

from sensor.numerics import FloatArray
from sensor.shell.store.database import Store
from sensor.shell.store.errors import StoreError, StoreUnavailableError
from sensor.shell.store.rows import (
    AlarmEventRow,
    AuditRow,
    BatchRow,
    CheckpointRow,
    EstimateRow,
    ProposalRow,
    SampleRow,
    SiteFileRow,
    StoreRow,
    epoch_us,
)
from sensor.shell.store.schema import TABLE_SPECS, TableSpec

R = TypeVar("R", bound=StoreRow)


@dataclass(frozen=True)
class SignalSeries:
    """One signal of a batch as arrays, in time order.

    Attributes
    ----------
    time_s : source timestamps as Unix time [s] (float64: about 0.2 us resolution today)
    value : values in the tag's plant unit; NaN where the sample had no numeric value
    status_code : OPC UA StatusCodes (uint32)
    text : textual values (``None`` where numeric)
    """

    time_s: FloatArray
    value: FloatArray
    status_code: NDArray[np.uint32]
    text: tuple[str | None, ...]


@dataclass(frozen=True)
class BatchRecord:
    """Everything the store holds about one batch, in time order."""

    batch: BatchRow
    samples: tuple[SampleRow, ...]
    estimates: tuple[EstimateRow, ...]
    proposals: tuple[ProposalRow, ...]
    alarm_events: tuple[AlarmEventRow, ...]

    def signals(self) -> tuple[str, ...]:
        """The signals sampled in the batch, sorted."""
        return tuple(sorted({s.signal for s in self.samples}))

    def signal(self, name: str) -> SignalSeries:
        """The samples of one signal as arrays (empty arrays if it was never sampled)."""
        rows = [s for s in self.samples if s.signal == name]
        return SignalSeries(
            time_s=np.array([epoch_us(s.time) / 1e6 for s in rows], dtype=float),
            value=np.array([np.nan if s.value is None else s.value for s in rows], dtype=float),
            status_code=np.array([s.status_code for s in rows], dtype=np.uint32),
            text=tuple(s.text for s in rows),
        )

    def estimate_arrays(self) -> dict[str, NDArray[np.float64] | NDArray[np.bool_]]:
        """The estimates as arrays: ``time_s`` (Unix time [s]), every numeric field of
        :class:`EstimateRow` (NaN where it had none) and ``healthy`` (bool)."""
        arrays: dict[str, NDArray[np.float64] | NDArray[np.bool_]] = {
            "time_s": np.array([epoch_us(e.time) / 1e6 for e in self.estimates], dtype=float)
        }
        for f in fields(EstimateRow):
            if f.name in ("unit_id", "time", "flags", "healthy"):
                continue
            arrays[f.name] = np.array(
                [
                    np.nan if getattr(e, f.name) is None else getattr(e, f.name)
                    for e in self.estimates
                ],
                dtype=float,
            )
        arrays["healthy"] = np.array([e.healthy for e in self.estimates], dtype=bool)
        return arrays


def _check_readable(store: Store) -> None:
    """Refuse a store that does not exist yet (reading must not create one)."""
    database = store.engine.url.database
    on_disk = store.backend == "sqlite" and database not in (None, "", ":memory:")
    if on_disk and not Path(str(database)).is_file():
        raise StoreError(store.url, "no such database file")
    try:
        store.ensure_schema(create=False)
    except exc.DBAPIError as error:
        raise StoreUnavailableError(store.url, f"cannot be read ({_first_line(error)})") from None


def _first_line(error: BaseException) -> str:
    lines = str(error).strip().splitlines()
    return lines[0] if lines else type(error).__name__


def _select(
    store: Store,
    row_type: type[R],
    where: Callable[[TableSpec], list[ColumnElement[bool]]],
    order: tuple[str, ...],
) -> list[R]:
    spec = TABLE_SPECS[row_type]
    table = spec.table
    query = (
        select(*(table.c[c] for c in spec.columns))
        .where(*where(spec))
        .order_by(*(table.c[c] for c in order))
    )
    try:
        with store.engine.connect() as conn:
            found = conn.execute(query).all()
    except exc.DBAPIError as error:
        raise StoreUnavailableError(store.url, f"cannot be read ({_first_line(error)})") from None
    return [spec.row(values) for values in found]  # type: ignore[misc]


def list_batches(store: Store, unit_id: str | None = None) -> list[BatchRow]:
    """The batches in the store (of one unit, if given), by start time."""
    _check_readable(store)
    return _select(
        store,
        BatchRow,
        lambda s: [] if unit_id is None else [s.table.c.unit_id == unit_id],
        ("start_us", "unit_id", "batch_id"),
    )


def find_batch(store: Store, batch_id: str, unit_id: str | None = None) -> BatchRow:
    """The batch with this id (in this unit, if given).

    Raises
    ------
    StoreError
        If there is no such batch, or ``unit_id`` is not given and several units ran a batch
        of this id.
    """
    _check_readable(store)
    found = _select(
        store,
        BatchRow,
        lambda s: (
            [s.table.c.batch_id == batch_id]
            + ([] if unit_id is None else [s.table.c.unit_id == unit_id])
        ),
        ("unit_id",),
    )
    of_unit = "" if unit_id is None else f" of unit {unit_id!r}"
    if not found:
        raise StoreError(store.url, f"no batch {batch_id!r}{of_unit}")
    if len(found) > 1:
        units = ", ".join(b.unit_id for b in found)
        raise StoreError(store.url, f"batch {batch_id!r} was run by units {units}: name the unit")
    return found[0]


def _window_end_us(store: Store, batch: BatchRow) -> tuple[int | None, bool]:
    """The end of a batch's window [us] and whether it is included: its end, else the next
    batch's start of the same unit (excluded), else none."""
    if batch.end is not None:
        return epoch_us(batch.end), True
    start_us = epoch_us(batch.start)
    later = _select(
        store,
        BatchRow,
        lambda s: [s.table.c.unit_id == batch.unit_id, s.table.c.start_us > start_us],
        ("start_us",),
    )
    return (epoch_us(later[0].start), False) if later else (None, False)


def read_batch(store: Store, batch_id: str, unit_id: str | None = None) -> BatchRecord:
    """Everything stored about one batch, in time order (for ``replay --batch``).

    Raises
    ------
    StoreError
        As :func:`find_batch`; :class:`StoreUnavailableError` if the database cannot be read.
    """
    batch = find_batch(store, batch_id, unit_id)
    start_us = epoch_us(batch.start)
    end_us, end_included = _window_end_us(store, batch)

    def window(spec: TableSpec) -> list[ColumnElement[bool]]:
        time_us = spec.table.c.time_us
        conditions = [spec.table.c.unit_id == batch.unit_id, time_us >= start_us]
        if end_us is not None:
            conditions.append(time_us <= end_us if end_included else time_us < end_us)
        return conditions

    return BatchRecord(
        batch=batch,
        samples=tuple(_select(store, SampleRow, window, ("time_us", "signal"))),
        estimates=tuple(_select(store, EstimateRow, window, ("time_us",))),
        proposals=tuple(_select(store, ProposalRow, window, ("time_us",))),
        alarm_events=tuple(_select(store, AlarmEventRow, window, ("time_us", "alarm", "event"))),
    )


def read_audit(store: Store) -> list[AuditRow]:
    """The audit trail, oldest first."""
    _check_readable(store)
    return _select(store, AuditRow, lambda s: [], ("time_us", "subject"))


def read_site_file(store: Store, sha256: str) -> SiteFileRow:
    """The text of a site file used, by its sha256.

    Raises
    ------
    StoreError
        If the store holds no site file of this sha256.
    """
    _check_readable(store)
    found = _select(store, SiteFileRow, lambda s: [s.table.c.sha256 == sha256], ("sha256",))
    if not found:
        raise StoreError(store.url, f"no site file with sha256 {sha256}")
    return found[0]


def read_latest_checkpoint(store: Store, unit_id: str) -> CheckpointRow | None:
    """The unit's most recent checkpoint, or None if it has none (a first start).

    Raises
    ------
    StoreError
        As :func:`find_batch`; :class:`StoreUnavailableError` if the database cannot be read.
    """
    _check_readable(store)
    spec = TABLE_SPECS[CheckpointRow]
    table = spec.table
    query = (
        select(*(table.c[c] for c in spec.columns))
        .where(table.c.unit_id == unit_id)
        .order_by(table.c.time_us.desc())
        .limit(1)
    )
    try:
        with store.engine.connect() as conn:
            found = conn.execute(query).first()
    except exc.DBAPIError as error:
        raise StoreUnavailableError(store.url, f"cannot be read ({_first_line(error)})") from None
    return None if found is None else spec.row(tuple(found))  # type: ignore[return-value]
