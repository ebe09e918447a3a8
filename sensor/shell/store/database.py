"""The connection to the store's database: SQLite (the embedded default) or PostgreSQL by URL.

:class:`Store` owns one SQLAlchemy engine. It creates the tables when it first reaches the
database, refuses a database of another schema version, and writes one parcel of rows (one
table, up to a few thousand rows) per transaction, insert-or-ignore on each row's key.

- SQLite: ``sqlite:///relative/path.db`` (relative to the working directory) or
  ``sqlite:////absolute/path.db``. Every connection runs in WAL mode with
  ``synchronous=NORMAL`` (a commit is durable across a crash of the process; a power cut may
  lose the last commits, never corrupt the file) and waits up to
  :data:`SQLITE_BUSY_TIMEOUT_S` for a lock. Parcels are written with ``executemany``.
- PostgreSQL: ``postgresql+psycopg://user@host:port/database`` (install the ``postgres``
  extra). Keep the password out of the URL (the site file refuses one): libpq reads
  ``PGPASSWORD`` or the file ``PGPASSFILE`` (``~/.pgpass``). An optional schema keeps the
  tables apart (one per site or test run). Parcels are written as one
  ``INSERT ... SELECT FROM unnest(arrays)`` with binary parameters: one statement per parcel,
  about twice the rows/s of ``executemany`` on this project's machine.

:func:`is_outage` tells an error that means "the database cannot take rows now" (wait and
retry) from one that means "this row cannot be written" (set it aside): on PostgreSQL by the
error's SQLSTATE class.
"""

from __future__ import annotations

import logging
import sqlite3
from collections.abc import Sequence
from typing import Any

from sqlalchemy import (
    Connection,
    Engine,
    MetaData,
    create_engine,
    delete,
    event,
    exc,
    func,
    inspect,
    select,
)
from sqlalchemy import bindparam as sql_bindparam
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import URL, make_url
from sqlalchemy.sql.dml import Insert

from sensor.shell.config import SQL_SCHEMA_NAME
from sensor.shell.store.errors import StoreError
from sensor.shell.store.rows import CheckpointRow
from sensor.shell.store.schema import (
    ADDED_TABLES,
    CHECKPOINTS_KEPT,
    SCHEMA_VERSION,
    TableSpec,
    metadata,
    store_meta,
)

_log = logging.getLogger(__name__)

SQLITE_BUSY_TIMEOUT_S = 2.0
"""How long a SQLite write waits for another connection's lock before it counts as an outage."""

POSTGRES_CONNECT_TIMEOUT_S = 5
"""How long a PostgreSQL connection attempt may take (libpq ``connect_timeout``, whole s)."""


def _sqlite_pragmas(dbapi_connection: sqlite3.Connection, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


ROW_SQLSTATE_CLASSES = ("22", "23", "P0")
"""PostgreSQL SQLSTATE classes that are about the row written: data exception, integrity
constraint violation, and a PL/pgSQL ``RAISE`` (a trigger refusing it). PostgreSQL
documentation, Appendix A "PostgreSQL Error Codes"."""


def is_outage(error: BaseException) -> bool:
    """Whether ``error`` means the database cannot take rows for now, so that they should wait
    and be retried, rather than that these rows cannot be written.

    - PostgreSQL (errors carry a SQLSTATE): every class but :data:`ROW_SQLSTATE_CLASSES` is an
      outage: connection exceptions (08), no such table or no privilege (42), insufficient
      resources such as a full disk (53), an administrator's shutdown (57), deadlocks and
      serialisation failures (40), ...
    - SQLite (no SQLSTATE): everything but ``IntegrityError`` and ``DataError`` (a file that
      cannot be opened, is locked, read-only or full; no such table).
    - A lost connection, a timeout, tables that cannot be created or are of another schema
      version (:class:`StoreError`).

    Holding rows back is the safe side: a doubtful error keeps them in the durable queue and
    shows in the writer's status, where setting them aside would need a person to put them
    back.
    """
    if isinstance(error, StoreError):
        return True
    if isinstance(error, exc.DBAPIError):
        if error.connection_invalidated:
            return True
        sqlstate = getattr(error.orig, "sqlstate", None)
        if isinstance(sqlstate, str) and len(sqlstate) == 5:
            return sqlstate[:2] not in ROW_SQLSTATE_CLASSES
        return not isinstance(error, exc.IntegrityError | exc.DataError)
    return isinstance(error, exc.TimeoutError | ConnectionError | TimeoutError)


def parse_store_url(url: str) -> URL:
    """The URL as SQLAlchemy reads it; refuses backends other than SQLite and PostgreSQL.

    Raises
    ------
    StoreError
        If the URL cannot be read or names another backend.
    """
    try:
        parsed = make_url(url)
    except exc.ArgumentError:
        raise StoreError(
            url, "not a database URL (sqlite:///FILE or postgresql+psycopg://...)"
        ) from None
    if parsed.get_backend_name() not in ("sqlite", "postgresql"):
        raise StoreError(
            parsed.render_as_string(hide_password=True),
            "only SQLite (sqlite:///FILE) and PostgreSQL (postgresql+psycopg://...) are supported",
        )
    return parsed


class Store:
    """One database holding sigmatrack's tables.

    Parameters
    ----------
    url : SQLAlchemy URL, ``sqlite:///FILE`` or ``postgresql+psycopg://user@host:port/db``
    schema : PostgreSQL schema for the tables (created if missing); ``None`` for the default
        (``public``). Not for SQLite.

    Creating a Store does not connect: :meth:`ensure_schema` (or the first write or read) does,
    so a Store can be made while the database is down.

    Raises
    ------
    StoreError
        If the URL is not SQLite or PostgreSQL, its driver is not installed, or ``schema`` is
        given for SQLite or is not a plain lower-case SQL name.
    """

    def __init__(self, url: str, *, schema: str | None = None) -> None:
        parsed = parse_store_url(url)
        self.url = parsed.render_as_string(hide_password=True)
        """The URL with any password hidden: what messages show."""
        self.backend = parsed.get_backend_name()
        self.schema = schema
        if schema is not None and (
            self.backend != "postgresql" or not SQL_SCHEMA_NAME.fullmatch(schema)
        ):
            raise StoreError(
                self.url,
                f"schema {schema!r}: only for PostgreSQL, and a plain lower-case SQL name",
            )
        try:
            if self.backend == "sqlite":
                engine = create_engine(parsed, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_S})
                event.listen(engine, "connect", _sqlite_pragmas)
            else:
                engine = create_engine(
                    parsed,
                    pool_pre_ping=True,
                    connect_args={"connect_timeout": POSTGRES_CONNECT_TIMEOUT_S},
                )
        except (exc.NoSuchModuleError, ImportError) as error:
            raise StoreError(
                self.url,
                f"the database driver is not installed ({error}); for PostgreSQL: "
                "pip install 'sigmatrack[postgres]'",
            ) from None
        options: dict[str, Any] = {"preserve_rowcount": True}
        if schema is not None:
            options["schema_translate_map"] = {None: schema}
        self.engine: Engine = engine.execution_options(**options)
        self._schema_ready = False
        self._statements: dict[str, Insert | str] = {}

    def __repr__(self) -> str:
        return f"Store({self.url!r})"

    def ensure_schema(self, *, create: bool = True) -> None:
        """Create the tables if they are missing (unless ``create`` is false: reading never
        creates) and check the schema version; once per Store.

        Raises
        ------
        StoreError
            If the database holds sigmatrack tables of another schema version, or (with
            ``create=False``) no sigmatrack tables at all.
        sqlalchemy.exc.DBAPIError
            If the database cannot be reached (see :func:`is_outage`).
        """
        if self._schema_ready:
            return
        with self.engine.begin() as conn:
            if create:
                if self.schema is not None:
                    conn.exec_driver_sql(f'CREATE SCHEMA IF NOT EXISTS "{self.schema}"')
                metadata.create_all(conn)
            elif not inspect(conn).has_table(store_meta.name, schema=self.schema):
                raise StoreError(self.url, "holds no sigmatrack store (no table store_meta)")
            stored = conn.execute(
                select(store_meta.c.value).where(store_meta.c.key == "schema_version")
            ).scalar_one_or_none()
            if stored is None:
                if not create:
                    raise StoreError(self.url, "holds no store schema version")
                conn.execute(
                    store_meta.insert().values(key="schema_version", value=str(SCHEMA_VERSION))
                )
            elif stored != str(SCHEMA_VERSION):
                self._upgrade(conn, stored, create)
        self._schema_ready = True

    def _upgrade(self, conn: Connection, stored: str, create: bool) -> None:
        """Bring a store of an older version up to date (its missing tables were just created
        by ``create_all``), or accept it as it is for reading; refuse any other version."""
        older = int(stored) if stored.isdigit() else None
        added = (
            [ADDED_TABLES.get(v) for v in range(older + 1, SCHEMA_VERSION + 1)]
            if older is not None and older < SCHEMA_VERSION
            else [None]
        )
        if any(tables is None for tables in added):
            raise StoreError(
                self.url,
                f"holds store schema version {stored}; this sigmatrack writes version "
                f"{SCHEMA_VERSION} (migrate the database or give another URL)",
            )
        if not create:
            return  # an older layout reads as it is: its tables are unchanged
        conn.execute(
            store_meta.update()
            .where(store_meta.c.key == "schema_version")
            .values(value=str(SCHEMA_VERSION))
        )
        names = ", ".join(name for tables in added for name in tables or ())
        _log.warning(
            "%s: store schema version %s brought up to %d (tables added: %s)",
            self.url,
            stored,
            SCHEMA_VERSION,
            names,
        )

    def write(self, spec: TableSpec, values: Sequence[tuple[Any, ...]]) -> int:
        """Write one parcel of rows (database values of one table) in one transaction.

        Returns
        -------
        the number of rows inserted or updated; rows already stored are skipped

        Raises
        ------
        StoreError
            If the tables cannot be created or checked (another schema version, no privilege).
        sqlalchemy.exc.DBAPIError
            On any other database error; nothing of the parcel is written then.
        """
        try:
            self.ensure_schema()
        except exc.DBAPIError as error:
            if error.connection_invalidated or isinstance(error, exc.OperationalError):
                raise
            first = (str(error.orig).strip().splitlines() or [type(error).__name__])[0]
            raise StoreError(self.url, f"cannot create or check the tables ({first})") from error
        rows = spec.merge(values)
        if not rows:
            return 0
        with self.engine.begin() as conn:
            written = self._execute(conn, spec, rows)
            if spec.row_type is CheckpointRow:
                self._prune_checkpoints(conn, spec, rows)
            return written

    @staticmethod
    def _prune_checkpoints(conn: Connection, spec: TableSpec, rows: list[tuple[Any, ...]]) -> None:
        """Delete each written unit's checkpoints older than its newest
        :data:`~sensor.shell.store.schema.CHECKPOINTS_KEPT`, in the write's transaction."""
        table = spec.table
        at = spec.columns.index("unit_id")
        for unit_id in sorted({row[at] for row in rows}):
            oldest_kept = (
                select(table.c.time_us)
                .where(table.c.unit_id == unit_id)
                .order_by(table.c.time_us.desc())
                .offset(CHECKPOINTS_KEPT - 1)
                .limit(1)
                .scalar_subquery()
            )
            conn.execute(
                delete(table).where(table.c.unit_id == unit_id, table.c.time_us < oldest_kept)
            )

    def _execute(self, conn: Connection, spec: TableSpec, rows: list[tuple[Any, ...]]) -> int:
        statement = self._statement(spec)
        if isinstance(statement, str):  # insert-or-ignore, SQL for the driver (see below)
            if self.backend == "sqlite":
                return conn.exec_driver_sql(statement, rows).rowcount
            arrays = dict(zip(spec.columns, map(list, zip(*rows, strict=True)), strict=True))
            return conn.exec_driver_sql(statement, arrays).rowcount
        params = [dict(zip(spec.columns, row, strict=True)) for row in rows]
        return conn.execute(statement, params).rowcount

    def _statement(self, spec: TableSpec) -> Insert | str:
        name = spec.table.name
        if name not in self._statements:
            self._statements[name] = self._build_statement(spec)
        return self._statements[name]

    def _build_statement(self, spec: TableSpec) -> Insert | str:
        """The statement that writes a parcel of ``spec``'s table:

        - upsert tables: ``INSERT ... ON CONFLICT (key) DO UPDATE``, executemany of
          dictionaries (few rows);
        - SQLite: ``INSERT ... ON CONFLICT DO NOTHING`` compiled once to SQL with positional
          parameters in the order of ``spec.columns``, so that the parcel's tuples go to the
          driver's executemany as they are (no per-row dictionaries: about twice the rows/s);
        - PostgreSQL: ``INSERT ... SELECT FROM unnest(arrays) ON CONFLICT DO NOTHING``, one
          statement per parcel with one array per column, compiled once (schema included) and
          sent with psycopg's binary placeholders ``%(name)b``, which spare the server parsing
          every element as text (about 20 % more rows/s here).
        """
        table = spec.table
        dialect = postgresql if self.backend == "postgresql" else sqlite
        if spec.upsert_columns:
            insert = dialect.insert(table)
            return insert.on_conflict_do_update(
                index_elements=list(spec.key_columns),
                set_={
                    c: func.coalesce(insert.excluded[c], table.c[c]) for c in spec.upsert_columns
                },
            )
        if self.backend == "sqlite":
            compiled = (
                sqlite.insert(table).on_conflict_do_nothing().compile(dialect=self.engine.dialect)
            )
            if tuple(compiled.positiontup or ()) != spec.columns:
                raise AssertionError(f"{table.name}: parameters out of column order")
            return str(compiled)
        if self.schema is not None:
            table = table.to_metadata(MetaData(), schema=self.schema)
        arrays = [sql_bindparam(c, type_=postgresql.ARRAY(table.c[c].type)) for c in spec.columns]
        source = func.unnest(*arrays).table_valued(*spec.columns).render_derived()
        sql = str(
            postgresql.insert(table)
            .from_select(list(spec.columns), select(*source.c))
            .on_conflict_do_nothing()
            .compile(dialect=self.engine.dialect)
        )
        for column in spec.columns:
            if sql.count(f"%({column})s") != 1:
                raise AssertionError(f"{table.name}: no single parameter for {column}")
            sql = sql.replace(f"%({column})s", f"%({column})b")
        return sql

    def dispose(self) -> None:
        """Close the engine's connections (the Store can be used again afterwards)."""
        self.engine.dispose()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *_: object) -> None:
        self.dispose()
