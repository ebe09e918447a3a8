"""``sigmatrack run``'s engine: one process, many units, on a clock tick.

::

    PlantClient ──sample(unit, t)──> UnitPipeline.step ──> AdvisorServer.publish
        │                                   │          └─> PlantClient.write_outputs
        └─ take_updates() ─> samples        └─> estimates, proposals, alarm events ─> StoreWriter
                                                             checkpoints (periodic) ─┘

**Ticks.** A unit is stepped as soon as a new reactor temperature of it arrives (its scan),
at most once per 0.9 ``service.tick_s``, and in any case a tick after its previous step
without a scan, 1.5 ticks after one on a scan (so that an outage or a silent tag is noticed
and stepped through, and a scan due about now is waited for). Where no scan arrives, the
units are spread evenly across the tick (unit ``i`` of ``n`` at ``i/n`` of it), so that their
work, their publishes and their writes never pile up in one instant; where the plant spreads
its scans, so are the steps. A step's time is the clock's time when it runs
(:mod:`~sensor.shell.service.clock`), never earlier than the unit's previous one. A unit that
falls more than a tick behind (the machine stalled) skips the ticks it missed, counted in
:attr:`ServiceStatus.late_ticks`; nothing is stepped twice.

**The link to the plant.** While it is lost every sample says so (readings
``BadCommunicationError``): the pipeline's guard falls back, nothing is written (the heartbeat
stops with the writes, so the DCS's watchdog hands control back to its recipe), the proposal
is withdrawn from sigmatrack's own server, and the communication alarm is raised. Timestamps
that go backwards, repeat or lie in the future are refused by the plant client and counted
here per kind (:attr:`ServiceStatus.tag_problems`).

**The store** gets every accepted plant value (with its quality), every step's estimate, the
guard's decision, every alarm event (operators' acknowledgements and shelving with their user
name), the batches as the DCS names them, the audit trail of this start (site file, versions,
fitted models) and each unit's checkpoint every ``service.checkpoint_interval_s``. The writer
never blocks the tick (:class:`~sensor.shell.store.writer.StoreWriter`).

**The live trend page** (``[live]``, off by default; ``--live-port``) is fed every step, as
sigmatrack's OPC UA server is; its operators' actions go through the same handler.

**A restart** resumes each unit from its latest stored checkpoint, if the DCS still runs that
batch (:mod:`~sensor.shell.service.units`). **Stopping** (:meth:`Service.run` returns when its
``stop`` event is set) checkpoints every unit and flushes the store.

sigmatrack advises only: the DCS keeps the temperature loop and the recipe, and the safety
instrumented system keeps protection.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import hashlib
import logging
import math
import time
from collections import Counter
from collections.abc import Awaitable, Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import TYPE_CHECKING

import sqlalchemy.exc

from controller.alarm_set import crystallizer_alarms
from controller.alarms import AlarmDefinition, AlarmEvent
from controller.errors import ControllerError
from sensor.kalman import FilterError
from sensor.pipeline import DcsInputs, rehearse
from sensor.shell.config import SiteConfig
from sensor.shell.opcua.advisor_server import (
    AdvisorServer,
    OperatorAction,
    UnitOutputs,
    unit_outputs,
)
from sensor.shell.opcua.plant_client import ConnectionStatus, PlantClient, UnitSnapshot
from sensor.shell.service.clock import Clock, PlantClock, WallClock
from sensor.shell.service.records import alarm_event_rows, proposal_row, sample_row, step_rows
from sensor.shell.service.units import UnitRunner
from sensor.shell.sitemodels import fit_site_solubility, site_metastable_zone
from sensor.shell.sitesensor import pipeline_setup
from sensor.shell.store import (
    Store,
    StoreError,
    StoreRow,
    StoreUnavailableError,
    StoreWriter,
    WriterStatus,
    audit_rows,
    find_batch,
    read_latest_checkpoint,
)
from sensor.shell.store.database import is_outage
from sensor.softsensor import SampleOrderError

if TYPE_CHECKING:
    from sensor.shell.live.server import LivePage

_log = logging.getLogger(__name__)

IDLE_WAIT_S = 0.05
"""Wall time to wait while the clock is not known yet (a simulated plant's first value) [s]."""
POLL_S = 0.01
"""How often the scheduler looks for units whose scan has arrived [s of wall time]."""
MIN_GAP_TICKS = 0.9
"""A unit is stepped at most once per this share of a tick, however often its values come
(a little under one, so that a scan arriving a little early is not held for a whole tick)."""
AFTER_SCAN_TICKS = 1.5
"""After a step on a new scan, the next step without one waits this many ticks (more than one,
so that a scan that comes every tick, a little late, is waited for rather than raced by the
tick: otherwise the tick steps first, the scan then waits out ``MIN_GAP_TICKS``, and the
readings' age drifts up to a whole tick and back)."""
CLOSE_TIMEOUT_S = 30.0
"""Longest wait for the store to make every row durable when stopping [s]."""


@dataclass(frozen=True)
class UnitStep:
    """What one step of one unit did, for the console view and the live page.

    Attributes
    ----------
    unit_id : the unit
    snapshot : what the plant client gave (sample, DCS signals, link, tag problems)
    outputs : what was published
    written : ``(signal, value)`` the DCS accepted at this step
    batch_id : the batch the DCS runs
    """

    unit_id: str
    snapshot: UnitSnapshot
    outputs: UnitOutputs
    written: tuple[tuple[str, float | int], ...]
    batch_id: str | None


StepListener = Callable[[UnitStep], Awaitable[None] | None]
"""Called after every step (the console view, the live page); must not block."""


@dataclass(frozen=True)
class ServiceStatus:
    """The service as it stands.

    Attributes
    ----------
    steps : unit steps done since the start
    late_ticks : ticks skipped because a unit fell more than a tick behind
    resumed : units that resumed from a stored checkpoint
    tag_problems : tag problems reported by the plant client, by kind
    dropped_rows : rows the store's writer refused (its buffer was full)
    skipped_writes : decisions not sent to the DCS because the unit's previous write was
        still in flight
    link : the plant link
    store : the writer
    """

    steps: int
    late_ticks: int
    resumed: tuple[str, ...]
    tag_problems: Mapping[str, int]
    dropped_rows: int
    skipped_writes: int
    link: ConnectionStatus | None
    store: WriterStatus | None


def model_versions(site: SiteConfig) -> dict[str, str]:
    """A digest of each fitted model the units run with, for the audit trail."""
    fit = fit_site_solubility(site)
    zone = site_metastable_zone(site, fit)

    def digest(model: object) -> str:
        return "sha256:" + hashlib.sha256(repr(model).encode()).hexdigest()[:16]

    return {"solubility": digest(fit.curve), "metastable": digest(zone)}


class Service:
    """The live service for the units of a site file (module docstring).

    Parameters
    ----------
    site : the site file
    plant_clock_speed : follow a simulated plant's clock running this many times faster than
        the wall clock (:class:`~sensor.shell.service.clock.PlantClock`); None: the wall clock
    environ : where passwords named by the site file are looked up (default ``os.environ``)
    listeners : called after every unit step (console view)
    on_live : called with the live trend page's address once it listens (``live.enabled``)
    """

    def __init__(
        self,
        site: SiteConfig,
        *,
        plant_clock_speed: float | None = None,
        environ: Mapping[str, str] | None = None,
        listeners: Sequence[StepListener] = (),
        on_live: Sequence[Callable[[str], None]] = (),
    ) -> None:
        self.site = site
        self.plant_clock_speed = plant_clock_speed
        self.environ = environ
        self.listeners = list(listeners)
        fit = fit_site_solubility(site)
        self.zone = site_metastable_zone(site, fit)
        self.units = [
            UnitRunner(
                pipeline_setup(site, index, self.zone),
                site.sha256,
                site.service.checkpoint_interval_s,
            )
            for index in range(len(site.unit))
        ]
        self._by_id = {unit.unit_id: unit for unit in self.units}
        self.on_live = list(on_live)
        self.live: LivePage | None = None
        self.plant: PlantClient | None = None
        self.server: AdvisorServer | None = None
        self.writer: StoreWriter | None = None
        self._steps = 0
        self._late = 0
        self._problems: Counter[str] = Counter()
        self._dropped = 0
        self._skipped = 0
        self._prepared = False

    # --- status -------------------------------------------------------------------------------

    def status(self) -> ServiceStatus:
        return ServiceStatus(
            steps=self._steps,
            late_ticks=self._late,
            resumed=tuple(u.unit_id for u in self.units if u.resumed),
            tag_problems=dict(self._problems),
            dropped_rows=self._dropped,
            skipped_writes=self._skipped,
            link=None if self.plant is None else self.plant.status,
            store=None if self.writer is None else self.writer.status(),
        )

    # --- running ------------------------------------------------------------------------------

    def prepare(self) -> None:
        """Compile the live path's kernels before anything connects: a throwaway pipeline
        rehearses a short synthetic stretch (:func:`~sensor.pipeline.rehearse`) once per kind of
        filter the units use. Without it the first steps of a fresh install compile them,
        about ten seconds in which no unit is stepped and a plant's values pile up. Done once
        (:meth:`run` calls it; a caller may call it earlier, in a thread)."""
        if self._prepared:
            return
        kinds = {}
        for unit in self.units:
            kinds.setdefault(unit.setup.sensor.tuning.kind, unit.setup)
        for kind, setup in kinds.items():
            started = time.perf_counter()
            steps = rehearse(setup)
            _log.info(
                "%s filter rehearsed (%d steps, %.1f s)", kind, steps, time.perf_counter() - started
            )
        self._prepared = True

    async def run(self, stop: asyncio.Event, *, end_batches: bool = False) -> ServiceStatus:
        """Serve until ``stop`` is set; then checkpoint every unit, flush the store and return
        the final status. ``end_batches``: also record each unit's batch as ended at its last
        step (the demo, whose plant serves one batch; a live service leaves batches open, for
        the next start to resume).

        Raises
        ------
        SigmatrackError
            If the store, the security files or the server's endpoint cannot be used at the
            start.
        """
        self.prepare()
        writer = StoreWriter.from_config(self.site.store).start()
        self.writer = writer
        try:
            self._put_many(audit_rows(self.site, datetime.now(UTC), model_versions(self.site)))
            self._resume_units()
            alarms = crystallizer_alarms(self.site.alarms.settings(self.site.guard.heating_phases))
            async with (
                PlantClient(self.site, environ=self.environ) as plant,
                AdvisorServer(self.site, alarms, self._operator_action) as server,
                contextlib.AsyncExitStack() as optional,
            ):
                self.plant, self.server = plant, server
                if self.site.live.enabled:
                    self.live = await optional.enter_async_context(self._live_page(alarms))
                    _log.info("live trend page at %s", self.live.url)
                    for listener in self.on_live:
                        listener(self.live.url)
                clock = self._clock(plant)
                await self._schedule(clock, stop)
                await self._finish_writes()
                self._store_updates()
                for unit in self.units:
                    if math.isfinite(unit.last_time_s):
                        self._put(unit.checkpoint(unit.last_time_s))
                        if end_batches:
                            self._put_many(unit.end_batch(unit.last_time_s))
        finally:
            if not writer.close(CLOSE_TIMEOUT_S):
                _log.error("the store did not take every row within %s s", CLOSE_TIMEOUT_S)
        return self.status()

    def _live_page(self, alarms: Sequence[AlarmDefinition]) -> LivePage:
        # imported here: the page's modules are needed only when it is served
        from sensor.shell.live.server import LivePage, site_diagrams

        return LivePage(
            self.site.live,
            site_diagrams(self.site, self.zone),
            alarms,
            self._operator_action,
            title=self.site.site.name,
        )

    def _clock(self, plant: PlantClient) -> Clock:
        if self.plant_clock_speed is None:
            return WallClock()
        return PlantClock(lambda: plant.newest_source_s, self.plant_clock_speed)

    def _resume_units(self) -> None:
        """Each unit's latest checkpoint from the store, where there is one. A database that
        cannot be reached now is no reason not to start (the units start afresh, the rows
        wait in the durable queue); one of another schema version is (StoreError)."""
        config = self.site.store
        try:
            with Store(config.url, schema=config.schema) as store:
                store.ensure_schema()
                for unit in self.units:
                    row = read_latest_checkpoint(store, unit.unit_id)
                    if row is not None:
                        unit.resume(row, _batch_start(store, unit.unit_id, row.batch_id))
        except (StoreUnavailableError, sqlalchemy.exc.DBAPIError) as error:
            if isinstance(error, sqlalchemy.exc.DBAPIError) and not is_outage(error):
                raise
            first = str(error).strip().splitlines()[0] if str(error).strip() else repr(error)
            _log.warning("no checkpoint could be read, every unit starts afresh: %s", first)

    async def _schedule(self, clock: Clock, stop: asyncio.Event) -> None:
        """Step each unit when its scan arrives, and at least once per tick, until ``stop``
        (module docstring)."""
        plant = self.plant
        assert plant is not None
        tick = self.site.service.tick_s
        count = len(self.units)
        index_of = {unit.unit_id: i for i, unit in enumerate(self.units)}
        due: list[float] = []
        on_scan = [False] * count
        while not stop.is_set():
            now = clock.now_s()
            if now is None:
                await _wait(stop, IDLE_WAIT_S)
                continue
            if not due:
                base = math.floor(now / tick) * tick
                due = [base + tick * (1 + i / count) for i in range(count)]
            for unit_id in plant.take_arrivals():
                i = index_of[unit_id]
                soonest = self.units[i].last_time_s + MIN_GAP_TICKS * tick
                due[i] = min(due[i], max(now, soonest))
                on_scan[i] = True
            index = min(range(count), key=due.__getitem__)
            if due[index] > now:
                await _wait(stop, min(due[index] - now, POLL_S * clock.speed) / clock.speed)
                continue
            missed = math.floor((now - due[index]) / tick)
            if missed > 0:
                self._late += missed
            due[index] = now + tick * (AFTER_SCAN_TICKS if on_scan[index] else 1.0)
            on_scan[index] = False
            await self._step(self.units[index], now)

    async def _step(self, unit: UnitRunner, time_s: float) -> None:
        plant, server = self.plant, self.server
        assert plant is not None
        assert server is not None
        if time_s <= unit.last_time_s:
            return
        snapshot = plant.sample(unit.unit_id, time_s)
        for problem in snapshot.problems:
            self._problems[problem.kind] += 1
        self._put_many(unit.track_batch(snapshot.dcs.batch_id, time_s))
        dcs = DcsInputs(
            permissive=snapshot.dcs.permissive is True,
            active_setpoint_k=snapshot.dcs.setpoint_k,
            communication_lost=snapshot.communication_lost,
        )
        try:
            result = unit.pipeline.step(snapshot.sample, dcs)
        except (SampleOrderError, FilterError) as error:
            unit.restart(str(error))
            return
        unit.last_time_s = time_s
        unit.steps += 1
        self._steps += 1
        outputs = unit_outputs(result)
        if snapshot.communication_lost:
            outputs = dataclasses.replace(outputs, proposal=None)  # withdrawn
        await server.publish(unit.unit_id, outputs)
        if self.live is not None:
            self.live.publish(unit.unit_id, outputs)
        self._put_many(step_rows(unit.unit_id, outputs))
        await self._write(unit, outputs)
        if unit.checkpoint_due(time_s):
            self._put(unit.checkpoint(time_s))
        self._store_updates()
        step = UnitStep(unit.unit_id, snapshot, outputs, unit.last_written, unit.batch_id)
        for listener in self.listeners:
            called = listener(step)
            if called is not None:
                await called

    async def _write(self, unit: UnitRunner, outputs: UnitOutputs) -> None:
        """Hand the guard's decision to the plant client. Without ``opcua.write_to_dcs`` that
        sends nothing; with it, the write runs as a task of its own, so that a round trip to
        the DCS never delays the other units; while a unit's previous write is still in flight
        the new decision is not sent (the next one makes its own; counted in
        :attr:`ServiceStatus.skipped_writes`)."""
        plant = self.plant
        assert plant is not None
        if not self.site.opcua.write_to_dcs:
            result = await plant.write_outputs(unit.unit_id, outputs.decision)  # type: ignore[arg-type]
            self._put(proposal_row(unit.unit_id, outputs, result))
            return
        if unit.write_task is not None and not unit.write_task.done():
            self._skipped += 1
            self._put(proposal_row(unit.unit_id, outputs, None, skipped=True))
            return

        async def write() -> None:
            result = await plant.write_outputs(unit.unit_id, outputs.decision)  # type: ignore[arg-type]
            unit.last_written = result.written
            self._put(proposal_row(unit.unit_id, outputs, result))

        unit.write_task = asyncio.create_task(write(), name=f"write-{unit.unit_id}")

    async def _finish_writes(self) -> None:
        tasks = [u.write_task for u in self.units if u.write_task is not None]
        if tasks:
            await asyncio.gather(*tasks, return_exceptions=True)

    # --- operators ----------------------------------------------------------------------------

    async def _operator_action(self, action: OperatorAction) -> Sequence[AlarmEvent]:
        unit = self._by_id.get(action.unit_id)
        if unit is None:
            raise ControllerError(f"no unit {action.unit_id!r}")
        events = unit.pipeline.act(action.alarm, action.action, action.comment, action.duration_s)
        shelved_until = math.nan
        if action.action == "shelve" and events:
            shelved_until = events[-1].time_s + action.duration_s
        self._put_many(alarm_event_rows(unit.unit_id, events, action.user, shelved_until))
        return events

    # --- the store ----------------------------------------------------------------------------

    def _store_updates(self) -> None:
        if self.plant is not None:
            self._put_many(sample_row(update) for update in self.plant.take_updates())

    def _put(self, row: StoreRow) -> None:
        assert self.writer is not None
        if not self.writer.put(row):
            self._dropped += 1

    def _put_many(self, rows: Iterable[StoreRow]) -> None:
        for row in rows:
            self._put(row)


def _batch_start(store: Store, unit_id: str, batch_id: str | None) -> datetime | None:
    """When the stored batch ``batch_id`` of the unit started; None if it is not stored."""
    if batch_id is None:
        return None
    try:
        return find_batch(store, batch_id, unit_id).start
    except StoreError:
        return None


async def _wait(stop: asyncio.Event, seconds: float) -> None:
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(stop.wait(), timeout=max(seconds, 1e-4))
