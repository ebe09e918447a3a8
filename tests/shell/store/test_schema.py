"""The tables generated from the row types, and the conversions to and from database values."""

from __future__ import annotations

import math
from datetime import timedelta

from sqlalchemy.dialects import postgresql

from sensor.shell.store import BatchRow, SampleRow
from sensor.shell.store.rows import epoch_us
from sensor.shell.store.schema import (
    SCHEMA_VERSION,
    TABLE_SPECS,
    group_values,
    metadata,
)
from tests.shell.store.conftest import T0, estimate_row, sample_rows

LAYOUT_V2 = {
    "alarm_events": (
        ("unit_id", "alarm", "time_us", "event"),
        "unit_id TEXT!, alarm TEXT!, time_us BIGINT!, event TEXT!, state TEXT!, priority TEXT!, "
        "message TEXT!, user_name TEXT, shelved_until_us BIGINT, value DOUBLE PRECISION",
    ),
    "audit": (
        ("time_us", "subject"),
        "time_us BIGINT!, subject TEXT!, version TEXT!, site_sha256 TEXT, detail TEXT!",
    ),
    "batches": (
        ("unit_id", "batch_id"),
        "unit_id TEXT!, batch_id TEXT!, start_us BIGINT!, end_us BIGINT, site_sha256 TEXT",
    ),
    "checkpoints": (
        ("unit_id", "time_us"),
        "unit_id TEXT!, time_us BIGINT!, state TEXT!, batch_id TEXT",
    ),
    "estimates": (
        ("unit_id", "time_us"),
        "unit_id TEXT!, time_us BIGINT!, temp_k DOUBLE PRECISION, conc DOUBLE PRECISION, "
        "conc_sat DOUBLE PRECISION, delta_c DOUBLE PRECISION, "
        "supersaturation_ratio DOUBLE PRECISION, sigma DOUBLE PRECISION, "
        "sigma_std DOUBLE PRECISION, margin_k DOUBLE PRECISION, margin_sigma DOUBLE PRECISION, "
        "solids DOUBLE PRECISION, yield_fraction DOUBLE PRECISION, mean_size_m DOUBLE PRECISION, "
        "analyzer_bias DOUBLE PRECISION, healthy BOOLEAN!, flags TEXT!, conc_std DOUBLE PRECISION",
    ),
    "proposals": (
        ("unit_id", "time_us"),
        "unit_id TEXT!, time_us BIGINT!, guard_state TEXT!, reason TEXT!, written BOOLEAN!, "
        "setpoint_temp_k DOUBLE PRECISION, cooling_rate_k_per_s DOUBLE PRECISION",
    ),
    "samples": (
        ("unit_id", "time_us", "signal"),
        "unit_id TEXT!, signal TEXT!, time_us BIGINT!, value DOUBLE PRECISION, "
        "status_code BIGINT!, text TEXT, server_time_us BIGINT",
    ),
    "site_files": (("sha256",), "sha256 TEXT!, path TEXT!, text TEXT!"),
    "store_meta": (("key",), "key TEXT!, value TEXT!"),
}
"""The layout of schema version 2 ("!" = NOT NULL; version 1 had no ``checkpoints``).
Changing a row type's fields changes it: then raise SCHEMA_VERSION and add the new layout
here, so that no database is ever written with a layout its version does not describe."""


def test_layout_is_the_one_of_its_schema_version():
    assert SCHEMA_VERSION == 2
    dialect = postgresql.dialect()
    layout = {
        table.name: (
            tuple(c.name for c in table.primary_key.columns),
            ", ".join(
                f"{c.name} {c.type.compile(dialect=dialect)}{'' if c.nullable else '!'}"
                for c in table.columns
            ),
        )
        for table in metadata.sorted_tables
    }
    assert layout == LAYOUT_V2


def test_values_round_trip_and_nan_becomes_null(rng):
    row = estimate_row(T0, rng)
    spec = TABLE_SPECS[type(row)]
    assert spec.row(spec.values(row)) == row
    nan_row = type(row)(**{**{c: getattr(row, c) for c in row.__slots__}, "sigma": math.nan})
    values = spec.values(nan_row)
    assert values[spec.columns.index("sigma")] is None
    assert values[spec.columns.index("time_us")] == epoch_us(T0)
    back = spec.row(values)
    assert math.isnan(back.sigma)  # a required float: NaN, as it was
    optional = type(row)(**{**{c: getattr(row, c) for c in row.__slots__}, "conc_std": math.nan})
    assert spec.row(spec.values(optional)).conc_std is None  # an optional float: absent


def test_batch_rows_with_one_key_fold_as_the_database_would():
    spec = TABLE_SPECS[BatchRow]
    end = T0 + timedelta(hours=3)
    rows = [
        BatchRow("CR-301", "B1", T0),
        BatchRow("CR-301", "B2", T0 + timedelta(hours=4)),
        BatchRow("CR-301", "B1", T0, end, "ab" * 32),
        BatchRow("CR-301", "B1", T0 + timedelta(minutes=1)),  # start is kept, end not erased
    ]
    merged = [spec.row(v) for v in spec.merge([spec.values(r) for r in rows])]
    assert merged == [BatchRow("CR-301", "B1", T0, end, "ab" * 32), rows[1]]


def test_samples_are_not_folded():
    spec = TABLE_SPECS[SampleRow]
    values = [spec.values(r) for r in sample_rows(3)] * 2
    assert spec.merge(values) == values


def test_rows_group_by_table_in_chunks(rng):
    rows = [*sample_rows(5), estimate_row(T0, rng), *sample_rows(2, first=5)]
    parcels = group_values(rows, chunk_rows=3)
    assert [(spec.table.name, len(values)) for spec, values in parcels] == [
        ("samples", 3),
        ("samples", 3),
        ("samples", 1),
        ("estimates", 1),
    ]
