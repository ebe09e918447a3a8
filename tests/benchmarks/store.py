"""Benchmark: store rows per second, batched against one commit per row, side by side.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/store.py [--check] [--rows N] [--no-postgres]

On a SQLite file in a temporary folder (WAL, synchronous=NORMAL, as the store runs), and on
PostgreSQL at 127.0.0.1:5432, database ``test``, in a schema made for the run and dropped after
it (skipped, saying why, when the server cannot be reached), it measures for raw samples
(7 columns) and estimates (18 columns), best of ``--repeats`` runs each:

- one commit per row: ``Store.write`` of one row per transaction (the baseline);
- batched: ``Store.write`` of parcels of 1,000 rows, one transaction each, conversion of the
  rows to database values included (target: at least 100,000 sample rows/s);
- through the writer: ``StoreWriter.put`` of every row from the calling thread, then
  ``flush``: rows/s end to end, and what ``put`` costs the producer per row;
- reading a batch of samples back with ``read_batch`` (rows built as dataclasses);
- on PostgreSQL also the server alone inserting rows it makes itself (``generate_series``),
  the ceiling any client can reach on this machine.

Rows are built before the clock starts (the producer builds them anyway); building one costs
what the first line says. Each ratio is printed as ``NNx``; with ``--check`` the script exits
1 when a target is missed.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import uuid
from collections.abc import Callable, Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

from sensor.shell.store import (
    BatchRow,
    EstimateRow,
    SampleRow,
    Store,
    StoreRow,
    StoreWriter,
    read_batch,
)
from sensor.shell.store.durable_queue import DurableQueue
from sensor.shell.store.schema import group_values

BATCHED_TARGET = 100_000.0
"""Sample rows per second, batched (issue 6)."""
PARCEL_ROWS = 1000
POSTGRES_URL = os.environ.get(
    "SIGMATRACK_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
T0 = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)


def samples(count: int, first: int = 0) -> list[StoreRow]:
    return [
        SampleRow("CR-301", "temp", T0 + timedelta(seconds=i), 60.0 - i * 1e-4)
        for i in range(first, first + count)
    ]


def estimates(count: int, first: int = 0) -> list[StoreRow]:
    rng = np.random.default_rng(7)
    numbers = rng.uniform(0.0, 1.0, (count, 13)).tolist()
    return [
        EstimateRow("CR-301", T0 + timedelta(seconds=first + i), *numbers[i], healthy=True)
        for i in range(count)
    ]


def rows_per_s(
    write: Callable[[Store, Sequence[StoreRow]], None], store: Store, rows: Sequence[StoreRow]
) -> float:
    start = time.perf_counter()
    write(store, rows)
    return len(rows) / (time.perf_counter() - start)


def write_batched(store: Store, rows: Sequence[StoreRow]) -> None:
    for spec, values in group_values(rows, PARCEL_ROWS):
        store.write(spec, values)


def write_one_commit_per_row(store: Store, rows: Sequence[StoreRow]) -> None:
    for spec, values in group_values(rows, 1):
        store.write(spec, values)


def read_back_rows_per_s(store: Store, rows: int, first: int) -> float:
    """Rows/s of ``read_batch`` on a batch of ``rows`` samples (rows and dataclasses built)."""
    batch_id = f"bench-{first}"
    start_time = T0 + timedelta(seconds=first)
    write_batched(
        store,
        [
            BatchRow("CR-301", batch_id, start_time, start_time + timedelta(seconds=rows - 1)),
            *samples(rows, first=first),
        ],
    )
    start = time.perf_counter()
    record = read_batch(store, batch_id)
    seconds = time.perf_counter() - start
    if len(record.samples) != rows:
        raise RuntimeError(f"read {len(record.samples)} samples of {rows}")
    return rows / seconds


def through_writer(store: Store, queue_dir: Path, rows: Sequence[StoreRow]) -> tuple[float, float]:
    """(rows/s end to end, mean put cost [us])."""
    writer = StoreWriter(store, DurableQueue(queue_dir, 10**7), batch_rows=PARCEL_ROWS).start()
    start = time.perf_counter()
    put = writer.put
    for row in rows:
        put(row)
    put_s = time.perf_counter() - start
    if not writer.flush(600.0):
        raise RuntimeError("the writer did not flush within 600 s")
    total_s = time.perf_counter() - start
    status = writer.status()
    writer.close()
    if status.written_rows != len(rows) or status.queued_rows or status.dropped_rows:
        raise RuntimeError(f"the writer lost or queued rows: {status}")
    return len(rows) / total_s, put_s / len(rows) * 1e6


_server_keys = iter(range(0, 10**12, 10**7))


def server_alone_rows_per_s(store: Store, rows: int) -> float:
    """PostgreSQL inserting sample rows it makes itself (generate_series) with the same
    insert-or-ignore: the ceiling of any client on this machine, measured side by side."""
    table = f'"{store.schema}".samples' if store.schema else "samples"
    start = time.perf_counter()
    first_key = next(_server_keys)
    for first in range(first_key, first_key + rows, PARCEL_ROWS):
        with store.engine.begin() as conn:
            conn.exec_driver_sql(
                f"INSERT INTO {table} SELECT 'CR-302', 'temp', g, g * 1e-4, 0, NULL, NULL "
                f"FROM generate_series({first}, {first + PARCEL_ROWS - 1}) AS g "
                "ON CONFLICT DO NOTHING"
            )
    return rows / (time.perf_counter() - start)


def measure(name: str, store: Store, folder: Path, rows: int, repeats: int) -> list[str]:
    """Print the measurements on one backend (best of ``repeats`` runs, each on new rows: the
    run least disturbed by the machine); returns the targets missed."""
    store.ensure_schema()
    missed = []
    slow_rows = max(200, rows // 100)
    offsets = iter(range(0, 10**9, rows))
    if store.backend == "postgresql":
        alone = max(server_alone_rows_per_s(store, rows) for _ in range(repeats))
        print(f"{name} samples inserted by the server alone: {alone:,.0f} rows/s (the ceiling)")
    for kind, make in (("samples", samples), ("estimates", estimates)):
        one = max(
            rows_per_s(write_one_commit_per_row, store, make(slow_rows, first=next(offsets)))
            for _ in range(repeats)
        )
        batched = max(
            rows_per_s(write_batched, store, make(rows, first=next(offsets)))
            for _ in range(repeats)
        )
        if kind == "samples":
            read = max(read_back_rows_per_s(store, rows, next(offsets)) for _ in range(repeats))
        end_to_end, put_us = max(
            through_writer(store, folder / f"queue-{kind}-{i}", make(rows, first=next(offsets)))
            for i in range(repeats)
        )
        print(
            f"{name} {kind}: one commit per row {one:,.0f} rows/s; batched {batched:,.0f} rows/s; "
            f"through the writer {end_to_end:,.0f} rows/s (put {put_us:.2f} us/row)"
        )
        if kind == "samples":
            print(f"{name} samples read back with read_batch: {read:,.0f} rows/s")
        target = f" (target {BATCHED_TARGET:,.0f} rows/s)" if kind == "samples" else ""
        print(f"{name} {kind} batched vs one commit per row: {batched / one:.0f}x{target}")
        if kind == "samples" and store.backend == "postgresql":
            print(f"{name} samples batched vs the server alone: {batched / alone:.2f}x")
        if kind == "samples" and batched < BATCHED_TARGET:
            missed.append(f"{name} batched samples {batched:,.0f} rows/s < {BATCHED_TARGET:,.0f}")
    return missed


def postgres_store() -> tuple[Store | None, str]:
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return None, "psycopg is not installed (pip install -e '.[test]')"
    schema = f"sigmatrack_bench_{os.getpid()}_{uuid.uuid4().hex[:6]}"
    store = Store(POSTGRES_URL, schema=schema)
    try:
        store.ensure_schema()
    except Exception as error:
        store.dispose()
        return None, f"PostgreSQL not reachable at {store.url} ({type(error).__name__})"
    return store, schema


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--rows", type=int, default=100_000, help="rows per batched run")
    parser.add_argument("--repeats", type=int, default=3, help="runs of each, best kept")
    parser.add_argument("--no-postgres", action="store_true", help="SQLite only")
    args = parser.parse_args()

    build_s = time.perf_counter()
    samples(10_000)
    build_s = time.perf_counter() - build_s
    print(f"building a SampleRow (checked): {build_s / 10_000 * 1e6:.2f} us")
    missed = []
    with tempfile.TemporaryDirectory(prefix="sigmatrack-bench-") as folder:
        sqlite = Store(f"sqlite:///{Path(folder) / 'store.db'}")
        missed += measure("sqlite", sqlite, Path(folder), args.rows, args.repeats)
        sqlite.dispose()
        if not args.no_postgres:
            postgres, schema = postgres_store()
            if postgres is None:
                print(f"postgresql: skipped: {schema}")
            else:
                try:
                    missed += measure("postgresql", postgres, Path(folder), args.rows, args.repeats)
                finally:
                    with postgres.engine.begin() as conn:
                        conn.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
                    postgres.dispose()
    for line in missed:
        print(f"MISSED: {line}")
    return 1 if (args.check and missed) else 0


if __name__ == "__main__":
    sys.exit(main())
