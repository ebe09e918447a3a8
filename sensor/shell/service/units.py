"""One unit inside the service: its pipeline, the batch it is in, and when it was last
checkpointed.

A unit resumes from its stored checkpoint (``checkpoints`` table) when sigmatrack restarts, as
long as the DCS still runs the batch the checkpoint was taken in; a new batch, or a checkpoint
that cannot be used (another version, another unit), starts the unit afresh, and says why.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
from dataclasses import dataclass, field
from datetime import datetime

from controller.errors import ControllerError
from sensor.pipeline import PipelineSetup, UnitPipeline
from sensor.shell.service.records import when
from sensor.shell.store.rows import BatchRow, CheckpointRow, StoreRow

_log = logging.getLogger(__name__)


@dataclass
class UnitRunner:
    """The service's state of one unit.

    Parameters
    ----------
    setup : the unit's pipeline setup
    site_sha256 : the site file in force, for the batch rows
    checkpoint_interval_s : how often to checkpoint [s]
    """

    setup: PipelineSetup
    site_sha256: str
    checkpoint_interval_s: float
    pipeline: UnitPipeline = field(init=False)
    batch_id: str | None = None
    batch_start_s: float | None = None
    restored_batch_id: str | None = None
    resumed: bool = False
    last_checkpoint_s: float = -float("inf")
    last_time_s: float = -float("inf")
    steps: int = 0
    write_task: asyncio.Task[None] | None = None
    last_written: tuple[tuple[str, float | int], ...] = ()

    def __post_init__(self) -> None:
        self.pipeline = UnitPipeline(self.setup)

    @property
    def unit_id(self) -> str:
        return self.setup.unit_id

    def resume(self, row: CheckpointRow, batch_start: datetime | None = None) -> bool:
        """Take up the state of a stored checkpoint, and the batch it was taken in (started at
        ``batch_start``, as stored); False (and a warning) if it cannot be used."""
        try:
            self.pipeline = UnitPipeline.restore(self.setup, json.loads(row.state))
        except (ControllerError, ValueError, KeyError, TypeError) as error:
            _log.warning(
                "%s: the checkpoint of %s cannot be used (%s); starting afresh",
                self.unit_id,
                row.time.isoformat(),
                error,
            )
            return False
        self.restored_batch_id = row.batch_id
        self.resumed = True
        self.last_checkpoint_s = row.time.timestamp()
        if row.batch_id is not None and batch_start is not None:
            self.batch_id = row.batch_id
            self.batch_start_s = batch_start.timestamp()
        _log.info("%s: resumed from the checkpoint of %s", self.unit_id, row.time.isoformat())
        return True

    def restart(self, why: str) -> None:
        """Start the unit's pipeline afresh."""
        _log.warning("%s: pipeline started afresh: %s", self.unit_id, why)
        self.pipeline = UnitPipeline(self.setup)
        self.resumed = False

    def track_batch(self, batch_id: str | None, time_s: float) -> list[StoreRow]:
        """Follow the DCS's batch id; the batch rows to store when it changes (the old batch
        ends at the unit's last step in it, the new one starts now). A checkpoint of another
        batch than the DCS's is given up."""
        if batch_id is None or batch_id == self.batch_id:
            return []
        last_s = self.last_time_s if math.isfinite(self.last_time_s) else self.last_checkpoint_s
        rows = self.end_batch(last_s) if math.isfinite(last_s) else []
        if self.resumed and self.restored_batch_id not in (None, batch_id):
            self.restart(
                f"the DCS runs batch {batch_id}, the checkpoint was of batch "
                f"{self.restored_batch_id}"
            )
        self.restored_batch_id = None
        self.batch_id = batch_id
        self.batch_start_s = time_s
        rows.append(BatchRow(self.unit_id, batch_id, when(time_s), None, self.site_sha256))
        return rows

    def end_batch(self, time_s: float) -> list[StoreRow]:
        """The row that ends the current batch at ``time_s`` (the demo's last step)."""
        if self.batch_id is None or self.batch_start_s is None:
            return []
        return [
            BatchRow(
                self.unit_id,
                self.batch_id,
                when(self.batch_start_s),
                when(max(time_s, self.batch_start_s)),
                self.site_sha256,
            )
        ]

    def checkpoint_due(self, time_s: float) -> bool:
        return time_s - self.last_checkpoint_s >= self.checkpoint_interval_s

    def checkpoint(self, time_s: float) -> CheckpointRow:
        """The unit's whole state now, as a row."""
        self.last_checkpoint_s = time_s
        state = json.dumps(self.pipeline.checkpoint(), allow_nan=False, separators=(",", ":"))
        return CheckpointRow(self.unit_id, when(time_s), state, self.batch_id)
