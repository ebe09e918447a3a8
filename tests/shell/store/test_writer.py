"""The writer: batched, off the producer's path, and loss-free through real outages.

Outages are made for real: a SQLite file locked by another connection, a SQLite file whose
folder does not exist yet, the network to PostgreSQL cut by closing a loopback proxy, and a
PostgreSQL URL on a port nothing listens on. Afterwards every row is in the store exactly once,
with its value. Every wait is bounded.
"""

from __future__ import annotations

import logging
import os
import sqlite3
import threading
import uuid
from collections.abc import Callable, Iterator
from datetime import timedelta
from pathlib import Path

import pytest
from sqlalchemy import event
from sqlalchemy.engine import make_url

from sensor.shell.store import SampleRow, Store, StoreError, StoreWriter, WriterState
from sensor.shell.store.durable_queue import DurableQueue
from sensor.shell.store.rows import epoch_us
from tests.shell.store.conftest import T0, Backend, sample_rows, wait_until
from tests.shell.store.tcpproxy import TcpProxy, free_port
from tests.shell.store.test_database import install_refusing_trigger

FAST = {"flush_interval_s": 0.05, "retry_max_s": 0.2}
WAIT_S = 30.0
"""Bound on every wait: far above what the writer needs here (under a second)."""


@pytest.fixture
def open_writer(tmp_path: Path) -> Iterator[Callable[..., StoreWriter]]:
    """Make started writers with their queue in the test's folder; closed after the test."""
    made: list[StoreWriter] = []

    def make(store: Store, queue_dir: Path | None = None, **options) -> StoreWriter:
        queue = DurableQueue(queue_dir or tmp_path / "queue", options.pop("queue_max_rows", 10**6))
        writer = StoreWriter(store, queue, **{**FAST, **options}).start()
        made.append(writer)
        return writer

    yield make
    for writer in made:
        if writer.status().state is not WriterState.STOPPED:
            writer.close()


def stored(backend: Backend) -> list[tuple[int, float]]:
    """(time_us, value) of every stored sample, in time order."""
    with backend.store() as store, store.engine.connect() as conn:
        if backend.schema:
            conn.exec_driver_sql(f'SET search_path TO "{backend.schema}"')
        return [
            tuple(r)
            for r in conn.exec_driver_sql("SELECT time_us, value FROM samples ORDER BY time_us")
        ]


def expected(rows: list[SampleRow]) -> list[tuple[int, float]]:
    return sorted((epoch_us(r.time), r.value) for r in rows)


def count_stored(backend: Backend) -> int:
    try:
        return int(backend.scalar("SELECT count(*) FROM samples"))
    except Exception:  # not reachable or not created yet
        return 0


def test_rows_are_written_in_batches(backend, open_writer):
    store = backend.store()
    commits = []
    event.listen(store.engine, "commit", lambda conn: commits.append(1))
    writer = open_writer(store, batch_rows=1000, flush_interval_s=60.0)
    rows = sample_rows(5000)
    assert writer.put_many(rows) == 5000
    assert writer.flush(WAIT_S)
    assert stored(backend) == expected(rows)
    # One transaction creates the tables; then at most one per parcel of 1000 rows (a wake-up
    # can split a parcel where the producer was when the writer took the rows).
    assert len(commits) <= 1 + 10
    status = writer.status()
    assert (status.state, status.accepted_rows, status.written_rows) == (
        WriterState.WRITING,
        5000,
        5000,
    )
    assert (status.buffered_rows, status.queued_rows, status.dropped_rows) == (0, 0, 0)


def test_rows_wait_at_most_the_flush_interval(backend, open_writer):
    writer = open_writer(backend.store(), batch_rows=1000)
    writer.put_many(sample_rows(3))  # far below batch_rows: only the interval wakes the writer
    wait_until(lambda: count_stored(backend) == 3, WAIT_S, "3 rows written without a flush")


def test_rows_sent_twice_are_stored_once_and_counted(backend, open_writer):
    writer = open_writer(backend.store())
    writer.put_many(sample_rows(100))
    assert writer.flush(WAIT_S)
    writer.put_many(sample_rows(100, first=50))
    assert writer.flush(WAIT_S)
    assert stored(backend) == expected(sample_rows(150))
    status = writer.status()
    assert (status.written_rows, status.duplicate_rows) == (150, 50)


def test_a_writer_closed_without_starting_still_writes_what_it_was_given(backend, tmp_path):
    writer = StoreWriter(backend.store(), DurableQueue(tmp_path / "queue", 100))
    writer.put_many(sample_rows(10))
    assert writer.close()
    assert stored(backend) == expected(sample_rows(10))


def test_impossible_writer_settings_are_refused(tmp_path):
    with (
        Store(f"sqlite:///{tmp_path / 'store.db'}") as store,
        DurableQueue(tmp_path / "queue", 10) as queue,
        pytest.raises(StoreError, match=r"^StoreWriter: buffer_max_rows \(5\) must be at least"),
    ):
        StoreWriter(store, queue, batch_rows=10, buffer_max_rows=5)


def test_a_closed_writer_refuses_rows(backend, open_writer):
    writer = open_writer(backend.store())
    assert writer.close()
    assert not writer.put(sample_rows(1)[0])
    assert writer.status().dropped_rows == 1


class SqliteLock:
    """Another connection holds the SQLite file's write lock: writes fail as 'locked'."""

    def __init__(self, backend: Backend) -> None:
        self.path = backend.url.removeprefix("sqlite:///")
        self.connection: sqlite3.Connection | None = None

    def begin(self) -> None:
        # begun and ended from any thread (the end-to-end test's asyncio.to_thread workers)
        self.connection = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        self.connection.execute("BEGIN EXCLUSIVE")

    def end(self) -> None:
        assert self.connection is not None
        self.connection.execute("ROLLBACK")
        self.connection.close()


class NetworkCut:
    """The writer reaches PostgreSQL through a loopback proxy, which is closed and reopened."""

    def __init__(self, backend: Backend) -> None:
        self.proxy = TcpProxy(backend.address).start()
        self.via = backend.via_port(self.proxy.port)

    def begin(self) -> None:
        self.proxy.cut()

    def end(self) -> None:
        self.proxy.restore()


def _mid_stream_outage(backend: Backend) -> SqliteLock | NetworkCut:
    return SqliteLock(backend) if backend.name == "sqlite" else NetworkCut(backend)


def test_an_outage_mid_stream_loses_nothing_and_duplicates_nothing(backend, open_writer, caplog):
    install_refusing_trigger(backend)
    outage = _mid_stream_outage(backend)
    writer_backend = outage.via if isinstance(outage, NetworkCut) else backend
    writer = open_writer(writer_backend.store(), batch_rows=200)
    before, during, after = sample_rows(500), sample_rows(3000, first=500), sample_rows(500, 3500)
    refused = SampleRow("CR-301", "temp", T0 + timedelta(days=1), 1.0e300)  # by the trigger
    try:
        writer.put_many(before)
        assert writer.flush(WAIT_S)
        with caplog.at_level(logging.WARNING, logger="sigmatrack.store"):
            outage.begin()
            try:
                producer = threading.Thread(target=writer.put_many, args=([*during, refused],))
                producer.start()
                producer.join(WAIT_S)
                # The producer finished while the database was still away: put never waited.
                assert not producer.is_alive()
                wait_until(
                    lambda: writer.status().queued_rows == len(during) + 1,
                    WAIT_S,
                    "every row of the outage in the durable queue",
                )
                assert writer.status().state is WriterState.QUEUEING  # retries fail
                assert writer.status().last_error is not None
                assert writer.flush(WAIT_S)  # queued rows are durable
            finally:
                outage.end()
        assert "cannot be written" in caplog.text
        writer.put_many(after)
        wait_until(lambda: _all_written(writer), WAIT_S, "the durable queue written")
        assert stored(backend) == expected(before + during + after)
        status = writer.status()
        assert (status.rejected_rows, status.dropped_rows) == (1, 0)
        assert writer.close()
    finally:
        if isinstance(outage, NetworkCut):
            outage.proxy.close()
    (rejected,) = DurableQueue(backend.folder / "queue", 10).rejected()
    assert rejected.values[rejected.columns.index("value")] == 1.0e300
    assert "refused by the test trigger" in rejected.error


def _all_written(writer: StoreWriter) -> bool:
    status = writer.status()
    return (
        status.state is WriterState.WRITING
        and not status.queued_rows
        and not (status.buffered_rows)
    )


class MissingFolder:
    """The SQLite file's folder does not exist (a volume not mounted yet) until ``end``."""

    def __init__(self, backend: Backend) -> None:
        self.folder = backend.folder / "not-mounted-yet"
        self.via = Backend("sqlite", f"sqlite:///{self.folder / 'store.db'}", None, backend.folder)

    def end(self) -> None:
        self.folder.mkdir()


class ClosedPort:
    """The writer's PostgreSQL URL names a port nothing listens on, until a proxy opens it."""

    def __init__(self, backend: Backend) -> None:
        self.proxy = TcpProxy(backend.address, port=free_port())
        self.via = backend.via_port(self.proxy.port)

    def end(self) -> None:
        self.proxy.start()


def test_a_database_away_from_the_start_gets_every_row_once_it_is_there(backend, open_writer):
    outage = MissingFolder(backend) if backend.name == "sqlite" else ClosedPort(backend)
    writer = open_writer(outage.via.store(), batch_rows=100)
    rows = sample_rows(2000)
    writer.put_many(rows)
    wait_until(lambda: writer.status().queued_rows == 2000, WAIT_S, "all rows queued")
    assert writer.flush(WAIT_S)
    try:
        outage.end()
        wait_until(lambda: _all_written(writer), WAIT_S, "the queue written")
        assert stored(outage.via) == expected(rows)
        assert writer.close()
    finally:
        if isinstance(outage, ClosedPort):
            outage.proxy.close()


def test_when_memory_and_queue_are_full_new_rows_are_refused_and_counted(tmp_path, open_writer):
    outage = MissingFolder(Backend("sqlite", "", None, tmp_path))
    writer = open_writer(outage.via.store(), batch_rows=50, buffer_max_rows=300, queue_max_rows=100)
    first, second = sample_rows(300), sample_rows(200, first=300)
    assert writer.put_many(first) == 300
    wait_until(lambda: writer.status().queued_rows == 100, WAIT_S, "the queue full")
    # 200 rows wait in memory; 100 more fit under buffer_max_rows, the rest are refused.
    assert writer.put_many(second) == 100
    status = writer.status()
    assert (status.accepted_rows, status.buffered_rows, status.dropped_rows) == (400, 300, 100)
    assert not writer.flush(0.2)  # not everything accepted can be made durable now
    outage.end()
    wait_until(lambda: _all_written(writer), WAIT_S, "every accepted row written")
    assert stored(outage.via) == expected(first + second[:100])
    assert writer.close()


def test_rows_queued_when_closing_are_written_by_the_next_writer(tmp_path, open_writer):
    outage = MissingFolder(Backend("sqlite", "", None, tmp_path))
    writer = open_writer(outage.via.store())
    rows = sample_rows(1000)
    writer.put_many(rows)
    assert writer.close()  # every row durable: in the queue
    with DurableQueue(tmp_path / "queue", 10**6) as queue:
        assert queue.rows == 1000
    outage.end()
    again = open_writer(outage.via.store())
    wait_until(lambda: _all_written(again), WAIT_S, "the queue written")
    assert stored(outage.via) == expected(rows)


def test_a_parcel_queued_with_another_layout_is_set_aside(backend, open_writer):
    queue_dir = backend.folder / "queue"
    with DurableQueue(queue_dir, 100) as queue:
        queue.push("samples", ("unit_id", "time_us", "value_v0"), [("CR-301", 1, 2.0)])
        queue.push("no_such_table", ("x",), [(1,)])
    writer = open_writer(backend.store(), queue_dir=queue_dir)
    wait_until(lambda: _all_written(writer), WAIT_S, "the queue drained")
    assert writer.status().rejected_rows == 2
    writer.put_many(sample_rows(10))
    assert writer.flush(WAIT_S)
    assert count_stored(backend) == 10


@pytest.mark.postgres
def test_a_database_refusing_the_tables_holds_the_rows_until_it_is_fixed(postgres, open_writer):
    # A role without the privilege to create the tables: a database not in a state to take
    # rows (SQLSTATE class 42), which must hold the rows back, not refuse them one by one.
    role = f"sigmatrack_test_{os.getpid()}_{uuid.uuid4().hex[:6]}"
    postgres.execute(f'CREATE ROLE "{role}" LOGIN')
    database = make_url(postgres.url).database
    try:
        url = make_url(postgres.url).set(username=role).render_as_string(False)
        writer = open_writer(Store(url, schema=postgres.schema), batch_rows=100)
        rows = sample_rows(500)
        writer.put_many(rows)
        wait_until(lambda: writer.status().queued_rows == 500, WAIT_S, "the rows queued")
        last_error = writer.status().last_error or ""
        assert "cannot create or check the tables" in last_error
        assert "permission denied" in last_error
        assert writer.status().rejected_rows == 0
        postgres.execute(f'GRANT CREATE ON DATABASE "{database}" TO "{role}"')
        wait_until(lambda: _all_written(writer), WAIT_S, "the rows written once allowed")
        assert stored(postgres) == expected(rows)
        assert writer.close()
    finally:
        postgres.execute(f'DROP SCHEMA IF EXISTS "{postgres.schema}" CASCADE')
        postgres.execute(f'REVOKE ALL ON DATABASE "{database}" FROM "{role}"')
        postgres.execute(f'DROP ROLE "{role}"')
