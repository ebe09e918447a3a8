"""The durable queue: parcels of rows waiting on disk while the database cannot take them.

A folder holds a small SQLite file (stdlib :mod:`sqlite3`, WAL mode, ``synchronous=FULL``: a
parcel once pushed survives a crash of the process and a power cut) with the parcels in
first-in-first-out order, and a second SQLite file whose exclusive lock, held for the queue's
life, keeps a second process from using the same folder (the operating system releases it
when the process dies, also by SIGKILL).

A parcel is one table's rows as database values (see :class:`~sensor.shell.store.schema.
TableSpec`), kept as JSON with its column names: exact for every value the store holds, and
readable with any SQLite tool. A parcel is removed only after the database has committed it,
so a crash between the two writes it again on restart; the rows' keys make that harmless.

The queue is bounded by ``max_rows``: :meth:`DurableQueue.push` refuses a parcel that would
pass it (the caller keeps it; nothing already queued is dropped). Rows the database refuses
for what they hold (not for an outage) are set aside in the same file (:meth:`reject`), never
dropped.
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sensor.shell.store.errors import StoreError

QUEUE_FILE = "queue.sqlite"
LOCK_FILE = "lock.sqlite"
OWNER_FILE = "owner"

_SCHEMA = (
    "CREATE TABLE IF NOT EXISTS parcels ("
    " id INTEGER PRIMARY KEY AUTOINCREMENT, table_name TEXT NOT NULL,"
    " row_count INTEGER NOT NULL, columns TEXT NOT NULL, rows TEXT NOT NULL)",
    "CREATE TABLE IF NOT EXISTS rejected ("
    " id INTEGER PRIMARY KEY AUTOINCREMENT, table_name TEXT NOT NULL, columns TEXT NOT NULL,"
    " row TEXT NOT NULL, error TEXT NOT NULL, rejected_at_us INTEGER NOT NULL)",
)


@dataclass(frozen=True)
class QueuedParcel:
    """One parcel as it waits in the queue."""

    id: int
    table_name: str
    columns: tuple[str, ...]
    values: list[tuple[Any, ...]]


@dataclass(frozen=True)
class RejectedRow:
    """A row the database refused for what it holds, with the database's error."""

    table_name: str
    columns: tuple[str, ...]
    values: tuple[Any, ...]
    error: str
    rejected_at_us: int


class DurableQueue:
    """A bounded first-in-first-out queue of parcels in ``directory``.

    Parameters
    ----------
    directory : folder of the queue (created, readable only by its owner); a queue left by a
        previous run is picked up where it stopped
    max_rows : most rows the queue holds

    Raises
    ------
    StoreError
        If the folder cannot be made or opened, or another process is using it.

    Not thread-safe: one thread (the store's writer) uses it.
    """

    def __init__(self, directory: Path | str, max_rows: int) -> None:
        self.directory = Path(directory)
        self.max_rows = max_rows
        where = str(self.directory)
        try:
            self.directory.mkdir(mode=0o700, parents=True, exist_ok=True)
            self._lock = sqlite3.connect(self.directory / LOCK_FILE, timeout=0.0)
        except (OSError, sqlite3.Error) as error:
            raise StoreError(where, f"cannot open the durable queue here ({error})") from None
        try:
            self._lock.execute("BEGIN EXCLUSIVE")
        except sqlite3.OperationalError:
            self._lock.close()
            owner = self._read_owner()
            raise StoreError(
                where, f"the durable queue is in use by another process{owner}"
            ) from None
        try:
            (self.directory / OWNER_FILE).write_text(f"{os.getpid()}\n", encoding="utf-8")
            self._db = sqlite3.connect(
                self.directory / QUEUE_FILE, isolation_level=None, check_same_thread=False
            )
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA synchronous=FULL")
            for statement in _SCHEMA:
                self._db.execute(statement)
            (self._rows,) = self._db.execute(
                "SELECT coalesce(sum(row_count), 0) FROM parcels"
            ).fetchone()
        except (OSError, sqlite3.Error) as error:
            self._lock.close()
            raise StoreError(where, f"cannot open the durable queue here ({error})") from None

    def _read_owner(self) -> str:
        try:
            pid = (self.directory / OWNER_FILE).read_text(encoding="utf-8").strip()
        except OSError:
            return ""
        return f" (pid {pid})" if pid else ""

    @property
    def rows(self) -> int:
        """Rows waiting in the queue."""
        return self._rows

    def __len__(self) -> int:
        """Parcels waiting in the queue."""
        (count,) = self._db.execute("SELECT count(*) FROM parcels").fetchone()
        return int(count)

    def push(
        self, table_name: str, columns: Sequence[str], values: Sequence[tuple[Any, ...]]
    ) -> bool:
        """Append one parcel, durably; ``False`` (and nothing written) if it would pass
        ``max_rows``."""
        return self.push_many([(table_name, columns, values)]) == 1

    def push_many(
        self, parcels: Sequence[tuple[str, Sequence[str], Sequence[tuple[Any, ...]]]]
    ) -> int:
        """Append parcels ``(table_name, columns, values)`` in order, durably, in one
        transaction, up to the first that would pass ``max_rows``.

        Returns
        -------
        how many parcels were appended (from the front)

        Raises
        ------
        sqlite3.Error
            If the queue's file cannot be written (a full disk); nothing is appended then.
        """
        fitting, rows = 0, self._rows
        for _, _, values in parcels:
            if rows + len(values) > self.max_rows:
                break
            fitting, rows = fitting + 1, rows + len(values)
        if fitting:
            self._transaction(
                "INSERT INTO parcels (table_name, row_count, columns, rows) VALUES (?, ?, ?, ?)",
                [
                    (name, len(values), json.dumps(list(columns)), json.dumps(values))
                    for name, columns, values in parcels[:fitting]
                ],
            )
            self._rows = rows
        return fitting

    def peek(self, after: int = 0) -> QueuedParcel | None:
        """The oldest parcel whose id is above ``after``, left in the queue; ``None`` if
        there is none."""
        found = self._db.execute(
            "SELECT id, table_name, columns, rows FROM parcels WHERE id > ? ORDER BY id LIMIT 1",
            (after,),
        ).fetchone()
        if found is None:
            return None
        parcel_id, table_name, columns, rows = found
        return QueuedParcel(
            parcel_id,
            table_name,
            tuple(json.loads(columns)),
            [tuple(row) for row in json.loads(rows)],
        )

    def remove_through(self, parcel: QueuedParcel) -> None:
        """Remove ``parcel`` and every older one, once the database has committed them.

        One transaction for many parcels. If a crash undoes it, the parcels are written
        again, which their rows' keys make harmless.
        """
        (removed,) = self._db.execute(
            "SELECT coalesce(sum(row_count), 0) FROM parcels WHERE id <= ?", (parcel.id,)
        ).fetchone()
        self._transaction("DELETE FROM parcels WHERE id <= ?", [(parcel.id,)])
        self._rows -= removed

    def _transaction(self, statement: str, params: Sequence[tuple[Any, ...]]) -> None:
        self._db.execute("BEGIN IMMEDIATE")
        try:
            self._db.executemany(statement, params)
        except BaseException:
            self._db.execute("ROLLBACK")
            raise
        self._db.execute("COMMIT")

    def keep_only(self, parcel: QueuedParcel, values: Sequence[tuple[Any, ...]]) -> None:
        """Keep only ``values`` (the rows not yet settled) of a parcel, in its place."""
        self._db.execute(
            "UPDATE parcels SET row_count = ?, rows = ? WHERE id = ?",
            (len(values), json.dumps(values), parcel.id),
        )
        self._rows -= len(parcel.values) - len(values)

    def reject(
        self, table_name: str, columns: Sequence[str], values: tuple[Any, ...], error: str
    ) -> None:
        """Set a row aside that the database refused for what it holds."""
        self._db.execute(
            "INSERT INTO rejected (table_name, columns, row, error, rejected_at_us) "
            "VALUES (?, ?, ?, ?, ?)",
            (
                table_name,
                json.dumps(list(columns)),
                json.dumps(values),
                error,
                time.time_ns() // 1000,
            ),
        )

    def rejected(self) -> list[RejectedRow]:
        """The rows set aside, oldest first."""
        return [
            RejectedRow(name, tuple(json.loads(columns)), tuple(json.loads(row)), error, at)
            for name, columns, row, error, at in self._db.execute(
                "SELECT table_name, columns, row, error, rejected_at_us FROM rejected ORDER BY id"
            )
        ]

    def close(self) -> None:
        """Close the files and release the folder (what is queued stays for the next run)."""
        self._db.close()
        self._lock.close()

    def __enter__(self) -> DurableQueue:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()
