"""Fixtures of the store's tests: the two backends, isolated per test, and rows to write.

SQLite: a file in the test's temporary folder. PostgreSQL: the server at 127.0.0.1:5432,
database ``test`` (``SIGMATRACK_TEST_POSTGRES_URL`` may name another), in a schema made for
the test and dropped after it; where the server cannot be reached those tests skip and say
why. The server itself is never stopped: outages are made with a loopback proxy
(:mod:`tests.shell.store.tcpproxy`) or a port nothing listens on.
"""

from __future__ import annotations

import os
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, timedelta
from functools import cache
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import Connection, text
from sqlalchemy.engine import make_url

from sensor.shell.store import EstimateRow, SampleRow, Store

POSTGRES_URL = os.environ.get(
    "SIGMATRACK_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
T0 = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)
"""Start of the invented demo batches."""


@cache
def postgres_problem() -> str | None:
    """Why the PostgreSQL tests cannot run here, or None (asked once per session)."""
    try:
        import psycopg
    except ImportError:
        return "psycopg is not installed (pip install -e '.[test]')"
    url = make_url(POSTGRES_URL)
    try:
        psycopg.connect(
            host=url.host, port=url.port, user=url.username, dbname=url.database, connect_timeout=3
        ).close()
    except psycopg.Error as error:
        first = str(error).strip().splitlines()[0]
        return f"PostgreSQL at {url.host}:{url.port}, database {url.database}, unreachable: {first}"
    return None


@dataclass(frozen=True)
class Backend:
    """One database for one test."""

    name: str
    url: str
    schema: str | None = None
    folder: Path = Path()
    opened: list[Store] = field(default_factory=list)

    def store(self) -> Store:
        """A new Store on the test's database, disposed of after the test."""
        store = Store(self.url, schema=self.schema)
        self.opened.append(store)
        return store

    def dispose(self) -> None:
        for store in self.opened:
            store.dispose()

    def via_port(self, port: int) -> Backend:
        """The same database reached through another loopback port (a proxy)."""
        return replace(self, url=make_url(self.url).set(port=port).render_as_string(False))

    @property
    def address(self) -> tuple[str, int]:
        url = make_url(self.url)
        return (url.host or "127.0.0.1", url.port or 5432)

    def scalar(self, sql: str):
        """One value from a query on the test's database (tables unqualified)."""
        with self._connection() as conn:
            return conn.execute(text(sql)).scalar()

    def execute(self, sql: str) -> None:
        """Run SQL on the test's database (tables unqualified), committed."""
        with self._connection() as conn:
            conn.execute(text(sql))

    @contextmanager
    def _connection(self) -> Iterator[Connection]:
        with self.store().engine.begin() as conn:
            if self.schema is not None:
                conn.exec_driver_sql(f'SET search_path TO "{self.schema}"')
            yield conn


def _postgres_backend(folder: Path) -> Iterator[Backend]:
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    schema = f"sigmatrack_test_{os.getpid()}_{uuid.uuid4().hex[:8]}"
    backend = Backend("postgres", POSTGRES_URL, schema, folder)
    try:
        yield backend
    finally:
        backend.dispose()
        store = Store(POSTGRES_URL)
        with store.engine.begin() as conn:
            conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        store.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def backend(request, tmp_path: Path) -> Iterator[Backend]:
    """Each test using it runs on SQLite and on PostgreSQL."""
    if request.param == "sqlite":
        backend = Backend("sqlite", f"sqlite:///{tmp_path / 'store.db'}", None, tmp_path)
        yield backend
        backend.dispose()
    else:
        yield from _postgres_backend(tmp_path)


@pytest.fixture
def postgres(tmp_path: Path) -> Iterator[Backend]:
    """PostgreSQL only (mark the test ``postgres``)."""
    yield from _postgres_backend(tmp_path)


def wait_until(condition: Callable[[], bool], timeout_s: float, what: str) -> None:
    """Poll ``condition`` every 20 ms for at most ``timeout_s``; fail naming ``what``."""
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout_s} s waiting for {what}")
        time.sleep(0.02)


def sample_rows(
    count: int, first: int = 0, unit_id: str = "CR-301", signal: str = "temp"
) -> list[SampleRow]:
    """Samples ``first`` .. ``first + count - 1``, one per second from T0, value = index/1000:
    each row says which it is, so a test can tell a lost one from a wrong one."""
    return [
        SampleRow(unit_id, signal, T0 + timedelta(seconds=i), i / 1000.0)
        for i in range(first, first + count)
    ]


def estimate_row(time: datetime, rng: np.random.Generator, unit_id: str = "CR-301") -> EstimateRow:
    """An estimate with made-up numbers (for storage tests only: nothing here is physics)."""
    numbers = rng.uniform(0.0, 1.0, 14)
    return EstimateRow(
        unit_id,
        time,
        *(float(x) for x in numbers[:13]),
        healthy=bool(numbers[13] > 0.5),
        flags=("analyzer-stale",) if numbers[13] > 0.8 else (),
        conc_std=float(numbers[0] / 10),
    )
