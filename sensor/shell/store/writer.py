"""The store's writer: rows in from the control path, batched into the database off it, never
lost while the database is away.

The producer (the service's event loop, a replay) calls :meth:`StoreWriter.put`: it appends
the row to an in-memory buffer under a lock held for a few instructions, and returns. It never
waits for the database or the disk.

One writer thread does the rest, every ``flush_interval_s`` or as soon as ``batch_rows`` rows
are waiting: it groups the rows by table into parcels of at most ``batch_rows`` and writes each
parcel in one transaction, insert-or-ignore on the rows' keys. When a write fails because the
database cannot be reached or written (:func:`~sensor.shell.store.database.is_outage`), the
parcel goes to the :class:`~sensor.shell.store.durable_queue.DurableQueue` on disk, and so do
all parcels after it, in order, until the queue is empty again; the writer retries the database
with capped exponential backoff (``flush_interval_s`` doubling up to ``retry_max_s``) and, once
it answers, drains the queue oldest first, a slice at a time so that new rows keep reaching
the disk within about ``flush_interval_s``. A parcel leaves the queue only after its commit, so
a crash between the two writes it again, which the keys make harmless: every row ends up in the
database exactly once.

A row is *durable* once committed to the database or pushed to the durable queue.

Overflow policy (bounded memory): the buffer holds at most ``buffer_max_rows`` rows not yet
durable. When it is full (the durable queue is full too, or the disk is failing), ``put``
refuses the new row, returns ``False`` and counts it in :attr:`WriterStatus.dropped_rows`;
rows already accepted are kept. The durable queue holds at most ``queue_max_rows``; a parcel
that does not fit waits in the buffer.

What a crash can lose: rows accepted in the last ``flush_interval_s`` (or ``batch_rows`` rows)
that had not yet become durable when the process was killed; :meth:`StoreWriter.flush` waits
until everything accepted so far is durable. A row the database refuses for what it holds (not
an outage) is retried alone and, if still refused, set aside in the queue's ``rejected`` table
with the error (:attr:`WriterStatus.rejected_rows`).
"""

from __future__ import annotations

import enum
import logging
import threading
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy.engine import make_url

from sensor.shell.config import StoreConfig
from sensor.shell.store.database import Store, is_outage
from sensor.shell.store.durable_queue import DurableQueue, QueuedParcel
from sensor.shell.store.errors import StoreError
from sensor.shell.store.rows import StoreRow
from sensor.shell.store.schema import SPECS_BY_TABLE, TableSpec, group_values

log = logging.getLogger("sigmatrack.store")


class WriterState(enum.Enum):
    """Where the writer's rows go."""

    WRITING = "writing"
    """Straight into the database."""
    QUEUEING = "queueing"
    """Into the durable queue: the database cannot be reached or written."""
    DRAINING = "draining"
    """The database is back; the durable queue is being written to it oldest first, and new
    rows join the queue until it is empty."""
    STOPPED = "stopped"


@dataclass(frozen=True)
class WriterStatus:
    """A snapshot of the writer, for health checks and screens.

    Attributes
    ----------
    state : where rows go now
    store : the database's URL (password hidden)
    accepted_rows : rows ``put`` accepted since the writer started
    buffered_rows : accepted rows not yet durable (in memory)
    queued_rows : rows waiting in the durable queue
    written_rows : rows this writer committed to the database (new ones)
    duplicate_rows : rows found already stored (written before a crash, or sent twice)
    dropped_rows : rows ``put`` refused because the buffer was full
    rejected_rows : rows the database refused for what they hold, set aside in the queue
    last_error : the last database error, ``None`` after a successful write
    """

    state: WriterState
    store: str
    accepted_rows: int
    buffered_rows: int
    queued_rows: int
    written_rows: int
    duplicate_rows: int
    dropped_rows: int
    rejected_rows: int
    last_error: str | None


def default_queue_dir(url: str) -> Path:
    """Where the durable queue lives when the site file does not say: beside a SQLite file as
    ``<file>.queue``, else ``sigmatrack-queue`` in the working directory."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite" and parsed.database not in (None, "", ":memory:"):
        return Path(f"{parsed.database}.queue")
    return Path("sigmatrack-queue")


class StoreWriter:
    """Batched, loss-free writing of rows to a :class:`Store`.

    Parameters
    ----------
    store : the database
    queue : the durable queue for outages (the writer closes it on :meth:`close`)
    batch_rows : rows per parcel (one transaction), and how many waiting rows wake the writer
    flush_interval_s : longest a row waits in memory before the writer handles it [s]
    buffer_max_rows : most accepted rows held in memory before ``put`` refuses (at least
        ``batch_rows``)
    retry_max_s : longest wait between two attempts to reach the database [s]

    Start it with :meth:`start` (or use it as a context manager) and stop it with :meth:`close`.
    """

    def __init__(
        self,
        store: Store,
        queue: DurableQueue,
        *,
        batch_rows: int = 1000,
        flush_interval_s: float = 1.0,
        buffer_max_rows: int = 200_000,
        retry_max_s: float = 30.0,
    ) -> None:
        if batch_rows < 1 or flush_interval_s <= 0 or retry_max_s <= 0:
            raise StoreError(
                "StoreWriter", "batch_rows, flush_interval_s and retry_max_s must be positive"
            )
        if buffer_max_rows < batch_rows:
            raise StoreError(
                "StoreWriter",
                f"buffer_max_rows ({buffer_max_rows}) must be at least batch_rows ({batch_rows})",
            )
        self.store = store
        self.queue = queue
        self.batch_rows = batch_rows
        self.flush_interval_s = flush_interval_s
        self.buffer_max_rows = buffer_max_rows
        self.retry_max_s = retry_max_s
        # Shared with producers, under _lock:
        self._lock = threading.Lock()
        self._pending: list[StoreRow] = []
        self._accepted = 0
        self._taken = 0
        self._not_durable = 0
        self._dropped = 0
        self._stopping = False
        self._wake = threading.Event()
        # Rows taken by the thread with everything before them durable (under _settled):
        self._settled_through = 0
        self._settled = threading.Condition(threading.Lock())
        # Owned by the writer thread: parcels taken but not yet durable, in order.
        self._outbox: list[tuple[TableSpec, list[tuple[Any, ...]]]] = []
        self._state = WriterState.DRAINING if queue.rows else WriterState.WRITING
        self._failures = 0
        self._retry_at = 0.0
        self._written = 0
        self._duplicates = 0
        self._rejected = 0
        self._last_error: str | None = None
        self._last_unexpected: str | None = None
        self._thread = threading.Thread(target=self._run, name="sigmatrack-store", daemon=True)

    @classmethod
    def from_config(cls, config: StoreConfig) -> StoreWriter:
        """A writer as the site file's ``[store]`` section says (not started).

        Raises
        ------
        StoreError
            If the URL or its driver is unusable, or the durable queue cannot be opened.
        """
        store = Store(config.url, schema=config.schema)
        queue_dir = config.queue_dir or default_queue_dir(config.url)
        return cls(
            store,
            DurableQueue(queue_dir, config.queue_max_rows),
            batch_rows=config.batch_rows,
            flush_interval_s=config.flush_interval_s,
            buffer_max_rows=config.buffer_max_rows,
            retry_max_s=config.retry_max_s,
        )

    # --- the producer's side ---------------------------------------------------------------

    def put(self, row: StoreRow) -> bool:
        """Accept a row for writing; never waits for the database or the disk.

        Returns
        -------
        ``True`` if accepted; ``False`` if refused because the buffer is full or the writer is
        closing (the row is not kept, and is counted in :attr:`WriterStatus.dropped_rows`)
        """
        with self._lock:
            if self._not_durable >= self.buffer_max_rows or self._stopping:
                self._dropped += 1
                return False
            self._pending.append(row)
            self._accepted += 1
            self._not_durable += 1
            wake = len(self._pending) >= self.batch_rows
        if wake:
            self._wake.set()
        return True

    def put_many(self, rows: Iterable[StoreRow]) -> int:
        """:meth:`put` each row; returns how many were accepted."""
        return sum(self.put(row) for row in rows)

    def flush(self, timeout_s: float) -> bool:
        """Wait until every row accepted before this call is durable (committed or in the
        durable queue), at most ``timeout_s`` [s]; ``True`` if it is."""
        with self._lock:
            target = self._accepted
        self._wake.set()
        with self._settled:
            return self._settled.wait_for(lambda: self._settled_through >= target, timeout_s)

    def status(self) -> WriterStatus:
        with self._lock:
            accepted, not_durable, dropped = self._accepted, self._not_durable, self._dropped
        return WriterStatus(
            state=self._state,
            store=self.store.url,
            accepted_rows=accepted,
            buffered_rows=not_durable,
            queued_rows=self.queue.rows,
            written_rows=self._written,
            duplicate_rows=self._duplicates,
            dropped_rows=dropped,
            rejected_rows=self._rejected,
            last_error=self._last_error,
        )

    def start(self) -> StoreWriter:
        self._thread.start()
        return self

    def close(self, timeout_s: float = 10.0) -> bool:
        """Write or queue everything accepted, stop the thread and close the queue.

        Rows still in the durable queue stay there for the next run.

        Returns
        -------
        ``True`` if every accepted row was durable when the writer stopped; ``False`` if the
        thread was still busy after ``timeout_s`` [s] (it is left to finish as a daemon) or
        rows could be neither written nor queued (they are lost, and logged)
        """
        with self._lock:
            self._stopping = True
        self._wake.set()
        if self._thread.ident is None:  # never started: do its last cycle here
            self._run()
        elif self._thread.is_alive():
            self._thread.join(timeout_s)
        if self._thread.is_alive():
            log.error("store writer still busy after %.1f s; leaving it to finish", timeout_s)
            return False
        with self._lock:
            lost = self._not_durable
        if lost:
            log.error("store: %d rows could be neither written nor queued and are lost", lost)
        self.queue.close()
        self.store.dispose()
        self._state = WriterState.STOPPED
        return lost == 0

    def __enter__(self) -> StoreWriter:
        return self.start()

    def __exit__(self, *_: object) -> None:
        self.close()

    # --- the writer thread -----------------------------------------------------------------

    def _run(self) -> None:
        while True:
            self._wake.wait(self._next_wait_s())
            self._wake.clear()
            with self._lock:
                rows, self._pending = self._pending, []
                self._taken += len(rows)
                taken, stopping = self._taken, self._stopping
            self._outbox += group_values(rows, self.batch_rows)
            try:
                self._cycle()
            except Exception as error:  # e.g. the queue's disk failing; the outbox keeps the rows
                if (
                    _one_line(error) != self._last_unexpected
                ):  # once per kind of error, not per cycle
                    log.exception("store writer: unexpected error; rows not yet durable are kept")
                self._last_unexpected = _one_line(error)
            else:
                self._last_unexpected = None
            if not self._outbox:
                with self._settled:
                    self._settled_through = taken
                    self._settled.notify_all()
            if stopping:
                return

    def _next_wait_s(self) -> float:
        if self._state is WriterState.QUEUEING:
            return max(0.0, min(self.flush_interval_s, self._retry_at - time.monotonic()))
        if self._state is WriterState.DRAINING:
            return 0.0
        return self.flush_interval_s

    def _cycle(self) -> None:
        self._send_outbox()
        retry_due = self._state is WriterState.QUEUEING and time.monotonic() >= self._retry_at
        if retry_due or self._state is WriterState.DRAINING:
            self._drain(deadline=time.monotonic() + self.flush_interval_s)
            self._send_outbox()

    def _send_outbox(self) -> None:
        """Write the outbox's parcels in order while the database takes them directly; push
        the rest to the durable queue while it has room."""
        while self._outbox and self._state is WriterState.WRITING:
            spec, values = self._outbox[0]
            settled = self._write(spec, values)
            self._made_durable(settled)
            if settled == len(values):
                self._outbox.pop(0)
            else:
                self._outbox[0] = (spec, values[settled:])
        if self._outbox:
            pushed = self.queue.push_many(
                [(spec.table.name, spec.columns, values) for spec, values in self._outbox]
            )
            self._made_durable(sum(len(values) for _, values in self._outbox[:pushed]))
            del self._outbox[:pushed]

    def _drain(self, deadline: float) -> None:
        """Write queued parcels to the database, oldest first, until the queue is empty (then
        rows go straight to the database again), an outage, or ``deadline`` (monotonic [s]).
        The parcels written leave the queue together at the end."""
        done: QueuedParcel | None = None
        try:
            while time.monotonic() < deadline:
                parcel = self.queue.peek(after=0 if done is None else done.id)
                if parcel is None:
                    if self._state is not WriterState.WRITING:
                        log.info(
                            "store %s: durable queue written; writing directly", self.store.url
                        )
                    self._state = WriterState.WRITING
                    return
                if not self._write_queued(parcel):
                    return
                done = parcel
                if self._state is WriterState.QUEUEING:
                    log.info("store %s: back; writing the durable queue", self.store.url)
                    self._state = WriterState.DRAINING
        finally:
            if done is not None:
                self.queue.remove_through(done)

    def _write_queued(self, parcel: QueuedParcel) -> bool:
        """Write one queued parcel: ``True`` if it is settled, ``False`` after an outage (its
        rows not yet settled stay in the queue, in the parcel's place)."""
        spec = SPECS_BY_TABLE.get(parcel.table_name)
        if spec is None or parcel.columns != spec.columns:  # queued by another version
            for value in parcel.values:
                self._reject(
                    parcel.table_name,
                    parcel.columns,
                    value,
                    "queued with a table layout this version of sigmatrack does not write",
                )
            return True
        settled = self._write(spec, parcel.values)
        if 0 < settled < len(parcel.values):
            self.queue.keep_only(parcel, parcel.values[settled:])
        return settled == len(parcel.values)

    def _write(self, spec: TableSpec, values: list[tuple[Any, ...]]) -> int:
        """Write a parcel to the database; returns how many of its rows, from the front, are
        settled (written, or set aside as refused): all of them, or fewer after an outage."""
        try:
            inserted = self.store.write(spec, values)
        except Exception as error:
            if is_outage(error):
                self._outage(error)
                return 0
            log.warning(
                "store: a parcel of %s was refused (%s); writing its rows one by one",
                spec.table.name,
                _one_line(error),
            )
            return self._write_alone(spec, values)
        self._wrote(len(values), inserted)
        return len(values)

    def _write_alone(self, spec: TableSpec, values: list[tuple[Any, ...]]) -> int:
        for i, value in enumerate(values):
            try:
                inserted = self.store.write(spec, [value])
            except Exception as error:
                if is_outage(error):
                    self._outage(error)
                    return i
                self._reject(spec.table.name, spec.columns, value, _one_line(error))
            else:
                self._wrote(1, inserted)
        return len(values)

    def _wrote(self, rows: int, inserted: int) -> None:
        self._written += inserted
        self._duplicates += max(0, rows - inserted)
        self._failures = 0
        self._last_error = None

    def _reject(
        self, table_name: str, columns: tuple[str, ...], value: tuple[Any, ...], error: str
    ) -> None:
        self.queue.reject(table_name, columns, value, error)
        self._rejected += 1
        log.error("store: a row of %s set aside in the durable queue: %s", table_name, error)

    def _outage(self, error: BaseException) -> None:
        self._failures += 1
        self._last_error = _one_line(error)
        if self._failures == 1:
            log.warning(
                "store %s cannot be written (%s); queueing rows in %s",
                self.store.url,
                self._last_error,
                self.queue.directory,
            )
        backoff_s = min(self.flush_interval_s * 2.0 ** (self._failures - 1), self.retry_max_s)
        self._retry_at = time.monotonic() + backoff_s
        self._state = WriterState.QUEUEING

    def _made_durable(self, rows: int) -> None:
        with self._lock:
            self._not_durable -= rows


def _one_line(error: BaseException) -> str:
    text = str(error).strip().splitlines()
    return f"{type(error).__name__}: {text[0] if text else ''}"
