"""Reading batches back: which rows belong to a batch, in time order, as rows and arrays."""

from __future__ import annotations

import math
from datetime import timedelta

import numpy as np
import pytest
from asyncua import ua

from sensor.shell.store import (
    BatchRow,
    CheckpointRow,
    SampleRow,
    Store,
    StoreError,
    StoreUnavailableError,
    find_batch,
    list_batches,
    read_batch,
    read_latest_checkpoint,
    read_site_file,
)
from sensor.shell.store.rows import epoch_us
from sensor.shell.store.schema import CHECKPOINTS_KEPT
from tests.shell.store.conftest import T0, estimate_row
from tests.shell.store.tcpproxy import free_port
from tests.shell.store.test_database import write_rows

HOUR = timedelta(hours=1)
B1 = BatchRow("CR-301", "B1", T0, T0 + HOUR)
B2 = BatchRow("CR-301", "B2", T0 + 2 * HOUR)  # no end: cut short, until B3 starts
B3 = BatchRow("CR-301", "B3", T0 + 5 * HOUR)  # no end: running
OTHER = BatchRow("CR-302", "B1", T0, T0 + 7 * HOUR)  # another unit, same batch id


def _minutes(first: int, last: int, step: int, unit_id: str = "CR-301") -> list[SampleRow]:
    return [
        SampleRow(unit_id, "temp", T0 + timedelta(minutes=m), 60.0 - m / 10)
        for m in range(first, last + 1, step)
    ]


@pytest.fixture
def three_batches(backend):
    rows = [B1, B2, B3, OTHER, *_minutes(0, 420, 10), *_minutes(0, 420, 30, "CR-302")]
    write_rows(backend.store(), rows)
    return backend.store()


def _sample_minutes(record) -> list[int]:
    return [round((s.time - T0).total_seconds() / 60) for s in record.samples]


def test_a_batch_runs_from_its_start_to_its_end_both_included(three_batches):
    record = read_batch(three_batches, "B1", "CR-301")
    assert record.batch == B1
    assert _sample_minutes(record) == list(range(0, 61, 10))


def test_a_batch_without_an_end_runs_until_the_next_one_starts(three_batches):
    assert _sample_minutes(read_batch(three_batches, "B2")) == list(range(120, 300, 10))
    assert _sample_minutes(read_batch(three_batches, "B3")) == list(range(300, 421, 10))


def test_batches_are_listed_by_start(three_batches):
    assert list_batches(three_batches) == [B1, OTHER, B2, B3]
    assert list_batches(three_batches, "CR-302") == [OTHER]


def test_a_batch_id_of_two_units_needs_the_unit(three_batches):
    with pytest.raises(StoreError, match=r": batch 'B1' was run by units CR-301, CR-302: name"):
        find_batch(three_batches, "B1")
    assert find_batch(three_batches, "B1", "CR-302") == OTHER
    with pytest.raises(StoreError, match=r": no batch 'B9' of unit 'CR-301'$"):
        find_batch(three_batches, "B9", "CR-301")
    with pytest.raises(StoreError, match=r": no site file with sha256 00ff"):
        read_site_file(three_batches, "00ff")


def test_samples_come_in_time_order_then_signal_and_as_arrays(backend, rng):
    batch = BatchRow("CR-301", "B-arrays", T0, T0 + HOUR)
    times = [T0 + timedelta(seconds=s) for s in (30, 10, 20)]
    samples = [
        *(SampleRow("CR-301", "temp", t, 60.0 + i) for i, t in enumerate(times)),
        SampleRow("CR-301", "conc", times[1], None, ua.StatusCodes.BadSensorFailure),
        SampleRow("CR-301", "conc", times[0], 12.5),
    ]
    estimates = [estimate_row(t, rng) for t in times]
    write_rows(backend.store(), [batch, *samples, *estimates])
    record = read_batch(backend.store(), "B-arrays")
    assert [(s.time, s.signal) for s in record.samples] == sorted(
        (s.time, s.signal) for s in samples
    )
    assert record.signals() == ("conc", "temp")
    conc = record.signal("conc")
    np.testing.assert_array_equal(conc.time_s, [epoch_us(times[1]) / 1e6, epoch_us(times[0]) / 1e6])
    assert math.isnan(conc.value[0])
    assert conc.value[1] == 12.5
    assert conc.status_code.dtype == np.uint32
    assert conc.status_code.tolist() == [ua.StatusCodes.BadSensorFailure, 0]
    np.testing.assert_array_equal(record.signal("temp").value, [61.0, 62.0, 60.0])
    assert record.signal("phase").time_s.shape == (0,)
    arrays = record.estimate_arrays()
    ordered = sorted(estimates, key=lambda e: e.time)
    np.testing.assert_array_equal(arrays["sigma"], [e.sigma for e in ordered])
    np.testing.assert_array_equal(arrays["healthy"], [e.healthy for e in ordered])
    assert arrays["time_s"].tolist() == [epoch_us(e.time) / 1e6 for e in ordered]


def test_reading_a_missing_sqlite_file_creates_nothing(tmp_path):
    path = tmp_path / "nowhere.db"
    with pytest.raises(StoreError, match=r"nowhere\.db: no such database file"):
        list_batches(Store(f"sqlite:///{path}"))
    assert not path.exists()


@pytest.mark.postgres
def test_reading_an_empty_schema_or_a_closed_port_is_refused(postgres):
    with pytest.raises(StoreError, match=r"holds no sigmatrack store \(no table store_meta\)"):
        list_batches(postgres.store())
    closed = postgres.via_port(free_port())
    with closed.store() as store, pytest.raises(StoreUnavailableError, match=r"cannot be read"):
        list_batches(store)


def test_the_latest_checkpoint_of_a_unit_is_the_one_read_back(backend):
    store = backend.store()
    write_rows(store, [BatchRow("CR-301", "B1", T0)])
    assert read_latest_checkpoint(store, "CR-301") is None  # a first start
    rows = [
        CheckpointRow("CR-301", T0 + timedelta(minutes=m), f'{{"minute": {m}}}', "B1")
        for m in (2, 9, 5)
    ]
    write_rows(store, [*rows, CheckpointRow("CR-302", T0 + HOUR, "{}")])
    assert read_latest_checkpoint(store, "CR-301") == rows[1]
    assert read_latest_checkpoint(store, "CR-302").batch_id is None


def test_only_the_newest_checkpoints_of_each_unit_are_kept(backend):
    store = backend.store()
    minutes = list(range(CHECKPOINTS_KEPT + 5))
    for first in range(0, len(minutes), 4):  # written in several parcels, as the writer does
        write_rows(
            store,
            [
                CheckpointRow("CR-301", T0 + timedelta(minutes=m), f'{{"minute": {m}}}', "B1")
                for m in minutes[first : first + 4]
            ],
        )
    write_rows(store, [CheckpointRow("CR-302", T0, "{}")])
    kept = backend.scalar("SELECT count(*) FROM checkpoints WHERE unit_id = 'CR-301'")
    oldest = backend.scalar("SELECT min(time_us) FROM checkpoints WHERE unit_id = 'CR-301'")
    assert kept == CHECKPOINTS_KEPT
    assert oldest == epoch_us(T0 + timedelta(minutes=minutes[-CHECKPOINTS_KEPT]))
    assert backend.scalar("SELECT count(*) FROM checkpoints WHERE unit_id = 'CR-302'") == 1
    assert read_latest_checkpoint(store, "CR-301").state == f'{{"minute": {minutes[-1]}}}'
