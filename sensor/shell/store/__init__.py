"""The store: what sigmatrack saw, estimated, proposed and raised, in SQLite or PostgreSQL.

- :mod:`~sensor.shell.store.rows`: the row types (plain frozen dataclasses) and the audit trail
- :mod:`~sensor.shell.store.schema`: the tables, generated from the row types
- :mod:`~sensor.shell.store.database`: :class:`Store`, one database by URL
- :mod:`~sensor.shell.store.durable_queue`: parcels waiting on disk while the database is away
- :mod:`~sensor.shell.store.writer`: :class:`StoreWriter`, batched and loss-free writes off the
  control path
- :mod:`~sensor.shell.store.reader`: batches read back in time order

The core never imports this package; the service hands it rows.
"""

from sensor.shell.store.database import Store
from sensor.shell.store.errors import RowError, StoreError, StoreUnavailableError
from sensor.shell.store.reader import (
    BatchRecord,
    SignalSeries,
    find_batch,
    list_batches,
    read_audit,
    read_batch,
    read_latest_checkpoint,
    read_site_file,
)
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
    audit_rows,
    site_file_row,
)
from sensor.shell.store.writer import StoreWriter, WriterState, WriterStatus

__all__ = [
    "AlarmEventRow",
    "AuditRow",
    "BatchRecord",
    "BatchRow",
    "CheckpointRow",
    "EstimateRow",
    "ProposalRow",
    "RowError",
    "SampleRow",
    "SignalSeries",
    "SiteFileRow",
    "Store",
    "StoreError",
    "StoreRow",
    "StoreUnavailableError",
    "StoreWriter",
    "WriterState",
    "WriterStatus",
    "audit_rows",
    "find_batch",
    "list_batches",
    "read_audit",
    "read_batch",
    "read_latest_checkpoint",
    "read_site_file",
    "site_file_row",
]
