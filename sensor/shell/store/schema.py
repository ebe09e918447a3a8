"""The store's tables (SQLAlchemy Core), generated from the row types so that each field is
written once.

Each row type of :mod:`sensor.shell.store.rows` gives one table: a field becomes a column of the
same name (a timestamp ``time`` becomes ``time_us``, integer microseconds since the Unix epoch),
``str`` -> TEXT, ``float`` -> DOUBLE (nullable: NaN is stored as NULL and reads back as NaN,
or as ``None`` for an optional field), ``int`` -> BIGINT,
``bool`` -> BOOLEAN, flags -> TEXT (comma-separated), and the row's ``KEY`` is the primary key in
that order (``samples`` is keyed ``unit_id, time_us, signal``, so one unit's samples are read in
time order from the key). On SQLite the tables of small rows are ``WITHOUT ROWID`` (clustered on
the key).

Rows are written with insert-or-ignore on the key (``ON CONFLICT DO NOTHING``), so a row written
twice is stored once; ``batches`` is an upsert that records a batch's end (and site file) when it
becomes known and never erases one with ``None``. ``store_meta`` holds ``schema_version``: a
database of an older version whose later versions only added tables (:data:`ADDED_TABLES`) is
brought up to date when it is opened for writing, and logged; any other version is refused,
never silently altered.

:class:`TableSpec` converts between rows and database values; the tuples it produces (plain
``str``, ``int``, ``float``, ``bool`` and ``None``) are also what the durable queue keeps.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

from sqlalchemy import BigInteger, Boolean, Column, Double, MetaData, PrimaryKeyConstraint, Table
from sqlalchemy import Text as SqlText
from sqlalchemy.types import TypeEngine

from sensor.shell.store.rows import (
    ROW_PLANS,
    ROW_TYPES,
    AuditRow,
    BatchRow,
    CheckpointRow,
    FieldPlan,
    Kind,
    SiteFileRow,
    StoreRow,
    epoch_us,
    from_epoch_us,
)

SCHEMA_VERSION = 2
"""Version of the table layout. Change it with every change of a row type's fields (a test
holds the layout of each version)."""

CHECKPOINTS_KEPT = 10
"""Checkpoints kept per unit: writing one deletes that unit's older ones beyond this many. A
checkpoint is the state to resume from, not a record of the batch (the estimates, decisions and
events are), and one unit's is tens of kB a minute: kept for months, gigabytes."""

ADDED_TABLES: Mapping[int, tuple[str, ...]] = {2: ("checkpoints",)}
"""Tables each version added to the one before, and nothing else changed: a store of an older
version is brought up to date by creating them (:meth:`Store.ensure_schema`), and can be read
as it is. A version that changes existing tables is not listed: such a store is refused."""

metadata = MetaData()

store_meta = Table(
    "store_meta",
    metadata,
    Column("key", SqlText, primary_key=True),
    Column("value", SqlText, nullable=False),
)

_SQL_TYPES: Mapping[Kind, type[TypeEngine[Any]]] = {
    "str": SqlText,
    "float": Double,
    "int": BigInteger,
    "bool": Boolean,
    "time": BigInteger,
    "flags": SqlText,
}

_LARGE_ROWS = (SiteFileRow, AuditRow, CheckpointRow)
"""Rows that can be many kB (texts): kept in ordinary rowid tables on SQLite."""

UPSERT_FIELDS: Mapping[type[StoreRow], tuple[str, ...]] = {BatchRow: ("end", "site_sha256")}
"""Per row type, the fields a later row with the same key updates (where it is not None);
every other type is insert-or-ignore."""


def column_name(plan: FieldPlan) -> str:
    return f"{plan.name}_us" if plan.kind == "time" else plan.name


def _time_to_db(value: Any) -> Any:
    return None if value is None else epoch_us(value)


def _float_to_db(value: Any) -> Any:
    return None if value is None or value != value else value


def _flags_to_db(value: Any) -> Any:
    return ",".join(value)


def _time_from_db(value: Any) -> Any:
    return None if value is None else from_epoch_us(value)


def _flags_from_db(value: Any) -> Any:
    return tuple(value.split(",")) if value else ()


def _bool_from_db(value: Any) -> Any:
    return None if value is None else bool(value)


def _required_float_from_db(value: Any) -> Any:
    return math.nan if value is None else value


_TO_DB: Mapping[Kind, Callable[[Any], Any]] = {
    "time": _time_to_db,
    "float": _float_to_db,
    "flags": _flags_to_db,
}
_FROM_DB: Mapping[Kind, Callable[[Any], Any]] = {
    "time": _time_from_db,
    "flags": _flags_from_db,
    "bool": _bool_from_db,
}


class TableSpec:
    """A row type and its table: the conversions between rows and database values.

    Attributes
    ----------
    row_type : the row dataclass
    table : its SQLAlchemy table
    columns : column names, in the order of :meth:`values`
    key_columns : the primary key's columns, in key order
    upsert_columns : columns a later row with the same key updates (empty: insert-or-ignore)
    """

    __slots__ = (
        "_from_db",
        "_get",
        "_to_db",
        "columns",
        "key_columns",
        "row_type",
        "table",
        "upsert_columns",
    )

    def __init__(self, row_type: type[StoreRow]) -> None:
        plans = ROW_PLANS[row_type]
        by_name = {p.name: p for p in plans}
        self.row_type = row_type
        self.columns = tuple(column_name(p) for p in plans)
        self.key_columns = tuple(column_name(by_name[name]) for name in row_type.KEY)
        self.upsert_columns = tuple(
            column_name(by_name[name]) for name in UPSERT_FIELDS.get(row_type, ())
        )
        self.table = Table(
            row_type.TABLE,
            metadata,
            *(
                Column(
                    column_name(p),
                    _SQL_TYPES[p.kind](),
                    nullable=p.optional or p.kind == "float",
                )
                for p in plans
            ),
            PrimaryKeyConstraint(*self.key_columns),
            sqlite_with_rowid=row_type in _LARGE_ROWS,
        )
        self._get = operator.attrgetter(*(p.name for p in plans))
        self._to_db = tuple((i, _TO_DB[p.kind]) for i, p in enumerate(plans) if p.kind in _TO_DB)
        self._from_db = tuple(
            _required_float_from_db
            if p.kind == "float" and not p.optional
            else _FROM_DB.get(p.kind)
            for p in plans
        )

    def values(self, row: StoreRow) -> tuple[Any, ...]:
        """The row as database values, in the order of :attr:`columns`."""
        values = list(self._get(row))
        for i, convert in self._to_db:
            values[i] = convert(values[i])
        return tuple(values)

    def row(self, values: Sequence[Any]) -> StoreRow:
        """The row back from database values in the order of :attr:`columns`."""
        return self.row_type(
            *(
                value if convert is None else convert(value)
                for value, convert in zip(values, self._from_db, strict=True)
            )
        )

    def merge(self, values: Sequence[tuple[Any, ...]]) -> list[tuple[Any, ...]]:
        """For an upsert table, fold rows with the same key into one, as the database would
        (later non-None values win), so that one statement never touches a row twice; other
        tables' rows are returned as they are."""
        if not self.upsert_columns:
            return list(values)
        key_at = [self.columns.index(c) for c in self.key_columns]
        update_at = [self.columns.index(c) for c in self.upsert_columns]
        merged: dict[tuple[Any, ...], list[Any]] = {}
        for value in values:
            key = tuple(value[i] for i in key_at)
            if key not in merged:
                merged[key] = list(value)
                continue
            for i in update_at:
                if value[i] is not None:
                    merged[key][i] = value[i]
        return [tuple(v) for v in merged.values()]


TABLE_SPECS: Mapping[type[StoreRow], TableSpec] = {cls: TableSpec(cls) for cls in ROW_TYPES}
"""The table of each row type."""

SPECS_BY_TABLE: Mapping[str, TableSpec] = {s.table.name: s for s in TABLE_SPECS.values()}


def group_values(
    rows: Iterable[StoreRow], chunk_rows: int
) -> list[tuple[TableSpec, list[tuple[Any, ...]]]]:
    """Rows as database values, grouped by table in first-seen order and cut into chunks of at
    most ``chunk_rows``: the parcels one transaction writes (and the durable queue keeps)."""
    grouped: dict[type[StoreRow], list[tuple[Any, ...]]] = {}
    for row in rows:
        cls = type(row)
        if cls not in grouped:
            grouped[cls] = []
        grouped[cls].append(TABLE_SPECS[cls].values(row))
    return [
        (TABLE_SPECS[cls], values[i : i + chunk_rows])
        for cls, values in grouped.items()
        for i in range(0, len(values), chunk_rows)
    ]
