"""The plant client: sigmatrack's OPC UA link to the DCS, for one or more crystallizer units.

:class:`PlantClient` is an async context manager. Inside it one supervisor task owns the link:

.. code-block:: text

    STARTING -> CONNECTING -> CONNECTED -> LOST -> (backoff) -> CONNECTING -> ...
                                                                 (stop) -> STOPPED

- **Connect**: a fresh asyncua ``Client`` per attempt, with the site's security and user
  (:mod:`~sensor.shell.opcua.security`); the data type of every tag is read once, then one
  subscription (publishing interval ``opcua.publishing_interval_ms``) with one monitored item
  per tag (sampling interval ``opcua.sampling_interval_ms``, a server-side queue of
  ``opcua.monitored_queue_size`` values that discards the oldest, and a data-change filter that
  reports every new source timestamp, so a steady value still shows it is alive).
- **Consume**: the subscription's notifications are read as an async iterator from asyncua's
  bounded queue (``opcua.notification_queue_max``; when full, asyncua drops the oldest
  notification: the supervisor drains it continuously, so it fills only if the event loop stalls
  for ``queue / rate`` seconds). Each DataValue is judged by :class:`~sensor.shell.opcua.tags.
  TagTrack` (timestamps backwards, repeated, missing), kept as the tag's latest value, and queued
  for the store (:meth:`PlantClient.take_updates`, bounded the same way; overflow counted).
- **Lose**: asyncua's own watchdog reads the server state every second; a closed socket, a
  failed probe, a subscription that reports a Bad status or ends, all end the session. Writes in
  flight are failed at once (never retried), the state turns ``LOST`` (communication lost, for
  the alarm and the guard), and from then on every sample marks the analog readings
  ``BadCommunicationError`` with no value (NaN): nothing is carried over or invented.
- **Back off**: the next attempt after ``opcua.reconnect_initial_s``, doubling after each
  failure up to ``opcua.reconnect_max_s``; a connection that was established resets it. On
  reconnect every tag is subscribed afresh; the server's first notification repeats each tag's
  current value, which the timestamp check drops as a duplicate if it was already seen.

A unit's **sample** (:meth:`PlantClient.sample`) is taken on the caller's tick: the newest value
of each analog tag that has not been put into a sample yet (converted once, here, to K and
kg/kg solvent), refused if its source time lies more than ``opcua.future_tolerance_s`` beyond
the tick, plus the DCS's signals (phase mapped to our names, permissive, setpoints, batch id,
heartbeat read back) from their latest values of Good quality. The soft sensor judges staleness
by the readings' source times.

**Writes** (:meth:`PlantClient.write_outputs`) happen only when ``opcua.write_to_dcs`` is true,
and only as the guard decided: the remote setpoint when ``decision.write``, the heartbeat when
its count changed. One request, no retry; a refused or failed write is reported and logged. The
DCS keeps control: it decides, under its permissive and its own limits, whether to follow.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
import math
import os
import time
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import Enum

from asyncua import Client, ua
from asyncua.client.ua_client import UaClientState
from asyncua.common.subscription import (
    DataChangeEvent,
    OverflowPolicy,
    StatusChangeEvent,
    Subscription,
)

from controller.guard import GuardDecision
from sensor.errors import SigmatrackError
from sensor.samples import Reading, Sample, Severity, severity
from sensor.shell.config import SiteConfig
from sensor.shell.opcua.credentials import opcua_password
from sensor.shell.opcua.security import check_identity, secure_client, trust_store
from sensor.shell.opcua.tags import (
    BAD_COMMUNICATION,
    BAD_TYPE,
    INTEGER_RANGES,
    NUMERIC_TYPES,
    TagProblem,
    TagSpec,
    TagTrack,
    TagUpdate,
    TagValue,
    analog_reading,
    is_number,
    tag_specs,
)
from sensor.shell.sitesensor import analyzer_unit
from sensor.units import ZERO_CELSIUS_K

_log = logging.getLogger(__name__)

POLL_S = 0.25
"""How often the supervisor looks at the link between notifications [s]."""
LOST_CLOSE_S = 1.0
"""Longest wait to close the session of a link already lost [s]."""
LOG_EVERY_S = 60.0
"""A tag's problem of one kind is logged at most this often [s] (all reach the snapshots)."""
PROBLEMS_KEPT = 1000
"""Problems kept per unit between two samples (the oldest dropped first, counted)."""
DATA_CHANGE_FILTER = ua.DataChangeFilter(Trigger=ua.DataChangeTrigger.StatusValueTimestamp)
"""Report a value whenever its status, value or source timestamp changes (OPC 10000-4, 7.22.2)."""
FILTER_REFUSED = frozenset(
    {ua.StatusCodes.BadMonitoredItemFilterUnsupported, ua.StatusCodes.BadFilterNotAllowed}
)
WRITTEN_SIGNALS = ("remote_setpoint", "heartbeat")
MEASURED_SIGNALS = frozenset({"temp", "jacket_temp", "conc"})
"""The signals the plant's instruments stamp (source timestamps of the plant's own clock)."""
DEFAULT_WRITE_TYPES = {"remote_setpoint": ua.VariantType.Double, "heartbeat": ua.VariantType.Int32}
"""The type written to a tag whose DataType is abstract (Number, Integer) and whose value is
null; the server refuses it if it wants another (BadTypeMismatch, reported)."""


class ConnectionState(Enum):
    """The state of the link to the plant's OPC UA server."""

    STARTING = "starting"
    """Before the first attempt."""
    CONNECTING = "connecting"
    """An attempt is in progress (connect, security, subscribe)."""
    CONNECTED = "connected"
    """A session is active and the tags are subscribed."""
    LOST = "lost"
    """No link: the connection dropped or an attempt failed; the next one after the backoff."""
    STOPPED = "stopped"
    """The client was closed."""


@dataclass(frozen=True)
class ConnectionStatus:
    """The link as it stands.

    Attributes
    ----------
    state : the connection state
    since_s : when it entered that state [s since the Unix epoch, wall clock]
    failures : failed attempts since the last established connection
    next_attempt_s : when the next attempt is due [s], while ``LOST``
    last_error : why the last attempt failed or the last connection ended
    connections : how many times a connection was established
    dropped_updates : accepted values the store's buffer had to drop (full)
    """

    state: ConnectionState
    since_s: float
    failures: int = 0
    next_attempt_s: float | None = None
    last_error: str | None = None
    connections: int = 0
    dropped_updates: int = 0

    @property
    def communication_lost(self) -> bool:
        """No live link to the plant (for the communication alarm and the guard)."""
        return self.state is not ConnectionState.CONNECTED


@dataclass(frozen=True)
class DcsSignals:
    """What the DCS says about a unit, beyond the soft sensor's readings, from the latest values
    of Good quality (NaN or None: not tagged, not known, not Good, or no link).

    Attributes
    ----------
    phase_value : the DCS's phase value as it came (the sample holds our phase name)
    batch_id : the DCS's batch identifier
    permissive : the DCS grants the advisor's setpoint; only True is a grant
    setpoint_k : the reactor-temperature setpoint the DCS's loop uses now [K]
    remote_setpoint_k : the remote setpoint as the DCS holds it [K]
    jacket_setpoint_k : the jacket temperature setpoint [K]
    heartbeat : the heartbeat counter as the DCS holds it
    """

    phase_value: object = None
    batch_id: str | None = None
    permissive: bool | None = None
    setpoint_k: float = math.nan
    remote_setpoint_k: float = math.nan
    jacket_setpoint_k: float = math.nan
    heartbeat: int | None = None


@dataclass(frozen=True)
class UnitSnapshot:
    """One unit at one tick: the soft sensor's sample, the DCS's signals, the link, and the
    problems seen since the unit's previous snapshot."""

    unit_id: str
    sample: Sample
    dcs: DcsSignals
    connection: ConnectionStatus
    problems: tuple[TagProblem, ...]

    @property
    def communication_lost(self) -> bool:
        return self.connection.communication_lost


@dataclass(frozen=True)
class WriteResult:
    """What :meth:`PlantClient.write_outputs` did.

    Attributes
    ----------
    unit_id : the unit
    time_s : the guard decision's time [s]
    enabled : ``opcua.write_to_dcs`` (False: nothing is ever written)
    written : ``(signal, value)`` written and accepted by the server (plant units: °C)
    failed : ``(signal, why)`` refused by the server (its StatusCode name) or not sent (no link,
        a timeout, a data type that cannot hold the value); never retried
    """

    unit_id: str
    time_s: float
    enabled: bool
    written: tuple[tuple[str, float | int], ...] = ()
    failed: tuple[tuple[str, str], ...] = ()

    @property
    def ok(self) -> bool:
        return not self.failed


def variant_of(data_type: ua.NodeId) -> ua.VariantType | None:
    """The built-in type of a DataType node id (OPC 10000-6, 5.1.2: ids 1 to 25 of namespace
    0); None for any other (a structure, an enumeration, a subtype)."""
    if data_type.NamespaceIndex == 0 and isinstance(data_type.Identifier, int):
        try:
            return ua.VariantType(data_type.Identifier)
        except ValueError:
            return None
    return None


def _error_text(error: BaseException) -> str:
    text = str(error).strip()
    return f"{type(error).__name__}: {text}" if text else type(error).__name__


class PlantClient:
    """The OPC UA link to the plant for the units of a site file (module docstring).

    Parameters
    ----------
    site : the site file (``[opcua]``, the units' tags)
    unit_ids : the units to serve (default: every unit)
    environ : where ``opcua.password_env`` is looked up (default ``os.environ``)
    """

    def __init__(
        self,
        site: SiteConfig,
        *,
        unit_ids: Sequence[str] | None = None,
        environ: Mapping[str, str] | None = None,
    ) -> None:
        self.site = site
        self.config = site.opcua
        ids = [unit.id for unit in site.unit] if unit_ids is None else list(unit_ids)
        known = {unit.id for unit in site.unit}
        for unit_id in ids:
            if unit_id not in known:
                raise SigmatrackError(f"{site.path}: no unit {unit_id!r} in the site file")
        self._password = opcua_password(self.config, os.environ if environ is None else environ)
        specs = [spec for spec in tag_specs(site) if spec.unit_id in ids]
        self._tracks = [TagTrack(spec) for spec in specs]
        self._units: dict[str, dict[str, TagTrack]] = {unit_id: {} for unit_id in ids}
        for track in self._tracks:
            self._units[track.spec.unit_id][track.spec.signal] = track
        units = {unit.id: unit for unit in site.unit}
        self._converters = {unit_id: analyzer_unit(site, units[unit_id]) for unit_id in ids}
        self._phases = {
            unit_id: {str(value): phase for phase, value in units[unit_id].phase_values.items()}
            for unit_id in ids
        }
        self._write_types: dict[tuple[str, str], ua.VariantType] = {}
        self._heartbeat_sent: dict[str, int] = {}
        self._updates: deque[TagUpdate] = deque()
        self._problems: dict[str, deque[TagProblem]] = {unit_id: deque() for unit_id in ids}
        self._logged: dict[tuple[str, str, str], tuple[float, int]] = {}
        self._status = ConnectionStatus(ConnectionState.STARTING, time.time())
        self._newest_source_s: float | None = None
        self._arrivals: set[str] = set()
        self._client: Client | None = None
        self._pending: set[asyncio.Task] = set()
        self._lost_reason = ""
        self._stopping = asyncio.Event()
        self._changed = asyncio.Event()
        self._supervisor: asyncio.Task[None] | None = None

    # --- lifecycle ----------------------------------------------------------------------------

    async def __aenter__(self) -> PlantClient:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()

    async def start(self) -> None:
        """Check the local security files and start the supervisor (it connects in the
        background; watch :attr:`status` or :meth:`wait_for`).

        Raises
        ------
        SecurityFileError
            If sigmatrack's certificate, its key or the trust folder cannot be used (a problem
            that no retry fixes).
        """
        if self.config.security_policy != "none":
            assert self.config.trust_dir is not None
            check_identity(self.config)
            await trust_store(self.config.trust_dir)
        if self._supervisor is None:
            self._supervisor = asyncio.create_task(self._supervise(), name="plant-client")

    async def stop(self) -> None:
        """Fail pending writes, close the session and stop the supervisor."""
        self._stopping.set()
        if self._supervisor is not None:
            await self._supervisor
            self._supervisor = None
        self._set_status(ConnectionState.STOPPED)

    @property
    def status(self) -> ConnectionStatus:
        return self._status

    async def wait_for(self, state: ConnectionState, timeout_s: float) -> None:
        """Wait until the link is in ``state``, at most ``timeout_s`` [s] (TimeoutError)."""
        async with asyncio.timeout(timeout_s):
            while self._status.state is not state:
                self._changed.clear()
                await self._changed.wait()

    def _set_status(self, state: ConnectionState, **changes: object) -> None:
        if state is not self._status.state:
            _log.info("plant link %s -> %s", self._status.state.value, state.value)
        changes = {"next_attempt_s": None, **changes}
        self._status = dataclasses.replace(
            self._status,
            state=state,
            since_s=time.time(),
            **changes,  # type: ignore[arg-type]
        )
        self._changed.set()

    # --- the supervisor -----------------------------------------------------------------------

    async def _supervise(self) -> None:
        delay = self.config.reconnect_initial_s
        failures = 0
        while not self._stopping.is_set():
            self._set_status(ConnectionState.CONNECTING, failures=failures)
            client = Client(self.config.endpoint, timeout=self.config.request_timeout_s)
            established, reason = await self._session(client)
            self._fail_pending(reason)
            if self._stopping.is_set():
                await self._discard(client)
                break
            if established:
                failures, delay = 0, self.config.reconnect_initial_s
            failures += 1
            due = time.time() + delay
            self._set_status(
                ConnectionState.LOST, failures=failures, next_attempt_s=due, last_error=reason
            )
            _log.warning(
                "plant link to %s: %s; next attempt in %.1f s", self.config.endpoint, reason, delay
            )
            await self._discard(client)
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stopping.wait(), timeout=max(0.0, due - time.time()))
            delay = min(2.0 * delay, self.config.reconnect_max_s)

    async def _session(self, client: Client) -> tuple[bool, str]:
        """One connection: connect, subscribe, consume until it ends. Returns whether it was
        established and why it ended."""
        established = False
        try:
            await secure_client(client, self.config, self._password)
            await client.connect()
            subscription = await self._subscribe(client)
            self._client = client
            established = True
            self._set_status(
                ConnectionState.CONNECTED,
                last_error=None,
                failures=0,
                connections=self._status.connections + 1,
            )
            reason = await self._consume(client, subscription)
        except asyncio.CancelledError:
            raise
        except (OSError, TimeoutError, ua.UaError, SigmatrackError) as error:
            reason = _error_text(error)
        except Exception as error:  # a bug: keep the supervisor alive, and say so loudly
            _log.exception("plant link: unexpected error")
            reason = f"unexpected error {_error_text(error)}"
        finally:
            self._client = None
        return established, reason

    async def _subscribe(self, client: Client) -> Subscription:
        nodes = [client.get_node(track.spec.node_id) for track in self._tracks]
        types = await client.read_attributes(nodes, ua.AttributeIds.DataType)
        self._write_types.clear()
        monitored = []
        for handle, (track, data_type) in enumerate(zip(self._tracks, types, strict=True), 1):
            spec = track.spec
            if not data_type.StatusCode.is_good():
                detail = f"cannot be read: {data_type.StatusCode.name}"
                self._keep(track.problem("no-such-node", detail))
                continue
            variant = variant_of(data_type.Value.Value)
            if spec.signal in WRITTEN_SIGNALS and variant is not None:
                self._write_types[(spec.unit_id, spec.signal)] = variant
            monitored.append((handle, spec))
        subscription = await client.create_subscription(
            self.config.publishing_interval_ms,
            queue_maxsize=self.config.notification_queue_max,
            overflow=OverflowPolicy.DROP_OLDEST,
        )
        results = await subscription.create_monitored_items(
            [self._item(handle, spec, DATA_CHANGE_FILTER) for handle, spec in monitored]
        )
        retry = []
        for (handle, spec), result in zip(monitored, results, strict=True):
            if isinstance(result, ua.StatusCode):
                if result.value in FILTER_REFUSED:
                    retry.append((handle, spec))
                else:
                    self._keep(self._tracks[handle - 1].problem("not-subscribed", result.name))
        if retry:  # a server without the timestamp trigger: report value changes only
            results = await subscription.create_monitored_items(
                [self._item(handle, spec, None) for handle, spec in retry]
            )
            for (handle, _spec), result in zip(retry, results, strict=True):
                if isinstance(result, ua.StatusCode):
                    self._keep(self._tracks[handle - 1].problem("not-subscribed", result.name))
        return subscription

    def _item(
        self, handle: int, spec: TagSpec, data_filter: ua.DataChangeFilter | None
    ) -> ua.MonitoredItemCreateRequest:
        parameters = ua.MonitoringParameters(
            ClientHandle=handle,
            SamplingInterval=self.config.sampling_interval_ms,
            QueueSize=self.config.monitored_queue_size,
            DiscardOldest=True,
            Filter=data_filter,
        )
        return ua.MonitoredItemCreateRequest(
            ItemToMonitor=ua.ReadValueId(NodeId=spec.node_id, AttributeId=ua.AttributeIds.Value),
            MonitoringMode=ua.MonitoringMode.Reporting,
            RequestedParameters=parameters,
        )

    async def _consume(self, client: Client, subscription: Subscription) -> str:
        """Read notifications until the link ends; returns why it ended."""
        while not self._stopping.is_set():
            try:
                event = await subscription.next_event(timeout=POLL_S)
            except StopAsyncIteration:
                return "the subscription ended"
            if event is None:
                if client.state is not UaClientState.CONNECTED:
                    return "connection lost"
                continue
            if isinstance(event, DataChangeEvent):
                self._on_value(event)
            elif isinstance(event, StatusChangeEvent):
                status = event.notification.Status
                if status is not None and not status.is_good():
                    return f"the subscription reports {status.name}"
        return "stopped"

    async def _discard(self, client: Client) -> None:
        """Close an asyncua client: gracefully while its link stands; otherwise abort its socket
        first (a dead link must not hold anything up), then end its session and its tasks."""
        try:
            if client.state is UaClientState.CONNECTED:
                await asyncio.wait_for(client.disconnect(), self.config.request_timeout_s)
                return
            protocol = client.uaclient.protocol
            if protocol is not None and protocol.transport is not None:
                protocol.transport.abort()
            with contextlib.suppress(OSError, TimeoutError, ua.UaError):
                await asyncio.wait_for(client.close_session(), LOST_CLOSE_S)
        except (OSError, TimeoutError, ua.UaError) as error:
            _log.info("plant link: closing the session: %s", _error_text(error))

    def _fail_pending(self, reason: str) -> None:
        """Fail the writes in flight: the link they went out on is gone."""
        self._lost_reason = reason
        for task in list(self._pending):
            task.cancel()
        self._pending.clear()

    # --- values in ----------------------------------------------------------------------------

    def _keep(self, problem: TagProblem | None) -> None:
        """Keep a problem for the unit's next snapshot, and log it (each kind of problem of a
        tag at most once per :data:`LOG_EVERY_S`, with how many were not logged since)."""
        if problem is None:
            return
        key = (problem.unit_id, problem.signal, problem.kind)
        now = time.monotonic()
        last, quiet = self._logged.get(key, (-math.inf, 0))
        if now - last >= LOG_EVERY_S:
            more = f" ({quiet} more since the last report)" if quiet else ""
            _log.warning("plant tag %s%s", problem, more)
            self._logged[key] = (now, 0)
        else:
            self._logged[key] = (last, quiet + 1)
        kept = self._problems[problem.unit_id]
        if len(kept) >= PROBLEMS_KEPT:
            kept.popleft()
        kept.append(problem)

    def _on_value(self, event: DataChangeEvent) -> None:
        handle = event.data.monitored_item.ClientHandle
        if not 1 <= handle <= len(self._tracks):
            return
        track = self._tracks[handle - 1]
        value, problem = track.offer(event.data.monitored_item.Value)
        self._keep(problem)
        if value is None:
            return
        measured = track.spec.signal in MEASURED_SIGNALS
        if track.spec.signal == "temp":
            self._arrivals.add(track.spec.unit_id)
        if measured and (
            self._newest_source_s is None or value.source_time_s > self._newest_source_s
        ):
            self._newest_source_s = value.source_time_s
        if len(self._updates) >= self.config.notification_queue_max:
            self._updates.popleft()
            self._status = dataclasses.replace(
                self._status, dropped_updates=self._status.dropped_updates + 1
            )
        self._updates.append(
            TagUpdate(
                track.spec.unit_id,
                track.spec.signal,
                value.value,
                value.status_code,
                datetime.fromtimestamp(value.source_time_s, UTC),
                None
                if value.server_time_s is None
                else datetime.fromtimestamp(value.server_time_s, UTC),
            )
        )

    @property
    def newest_source_s(self) -> float | None:
        """The newest source timestamp of a measured value (:data:`MEASURED_SIGNALS`) accepted
        so far [s since the Unix epoch]: a simulated plant's clock
        (:class:`~sensor.shell.service.clock.PlantClock`). The tags others write (permissive,
        remote setpoint, heartbeat) carry the writer's clock, so they do not count."""
        return self._newest_source_s

    def take_arrivals(self) -> set[str]:
        """The units whose reactor temperature (their scan) arrived since the last call."""
        arrivals, self._arrivals = self._arrivals, set()
        return arrivals

    def take_updates(self) -> list[TagUpdate]:
        """Every value accepted since the last call, oldest first (for the store)."""
        updates = list(self._updates)
        self._updates.clear()
        return updates

    def latest(self, unit_id: str, signal: str) -> TagValue | None:
        """The latest value a tag reported and sigmatrack accepted (value, StatusCode, source and
        server timestamps, in plant units), whether or not it went into a sample; None before
        the first. It is kept through an outage: look at :attr:`status` to know whether it is
        current."""
        track = self._units[unit_id].get(signal)
        return None if track is None else track.latest

    def tag_counts(self) -> dict[tuple[str, str], dict[str, int]]:
        """Per ``(unit, signal)``, how often each kind of problem occurred."""
        return {(t.spec.unit_id, t.spec.signal): dict(t.counts) for t in self._tracks}

    # --- samples ------------------------------------------------------------------------------

    def sample(self, unit_id: str, time_s: float) -> UnitSnapshot:
        """The unit's sample at the tick ``time_s`` [s since the Unix epoch] (module docstring).

        Raises
        ------
        KeyError
            If the client does not serve ``unit_id``.
        """
        tracks = self._units[unit_id]
        status = self._status
        lost = status.communication_lost

        def analog(signal: str) -> Reading | None:
            track = tracks.get(signal)
            if track is None:
                return None
            if lost:
                return Reading(math.nan, BAD_COMMUNICATION, None)
            value, problem = track.fresh(time_s, self.config.future_tolerance_s)
            self._keep(problem)
            if value is None:
                return None
            reading = analog_reading(value, track.spec.kind, self._converters[unit_id])
            if reading is None:
                self._keep(track.wrong_type(value))
                return Reading(math.nan, BAD_TYPE, value.source_time_s)
            return reading

        sample_readings = {signal: analog(signal) for signal in ("temp", "jacket_temp", "conc")}
        good = {} if lost else _good_values(tracks)
        phase = self._phase(unit_id, good.get("phase"))
        sample = Sample(time_s, phase=phase, **sample_readings)
        dcs = DcsSignals(
            phase_value=None if "phase" not in good else good["phase"][1].value,
            batch_id=self._typed(good.get("batch_id"), str),
            permissive=self._typed(good.get("permissive"), bool),
            setpoint_k=self._temperature(good.get("setpoint")),
            remote_setpoint_k=self._temperature(good.get("remote_setpoint")),
            jacket_setpoint_k=self._temperature(good.get("jacket_setpoint")),
            heartbeat=self._typed(good.get("heartbeat"), int),
        )
        kept = self._problems[unit_id]
        problems = tuple(kept)
        kept.clear()
        return UnitSnapshot(unit_id, sample, dcs, status, problems)

    def _typed(self, found: tuple[TagTrack, TagValue] | None, kind: type) -> object:
        """The value if it is of ``kind`` (and of a matching OPC UA type), else None (reported
        once)."""
        if found is None or found[1].value is None:
            return None
        track, value = found
        if type(value.value) is kind and value.variant in track.spec.types:
            return value.value
        self._keep(track.wrong_type(value))
        return None

    def _temperature(self, found: tuple[TagTrack, TagValue] | None) -> float:
        """A Good temperature tag in K; NaN when unknown or not a number (reported once)."""
        if found is None or found[1].value is None:
            return math.nan
        track, value = found
        if is_number(value):
            return float(value.value) + ZERO_CELSIUS_K  # type: ignore[arg-type]
        self._keep(track.wrong_type(value))
        return math.nan

    def _phase(self, unit_id: str, found: tuple[TagTrack, TagValue] | None) -> str | None:
        """Our phase name for the DCS's phase value; None when unknown (reported once)."""
        if found is None or found[1].value is None:
            return None
        track, value = found
        phase = self._phases[unit_id].get(str(value.value))
        if phase is None or value.variant not in track.spec.types:
            known = ", ".join(self._phases[unit_id]) or "none configured"
            detail = f"phase value {value.value!r} is not in the unit's phase_values ({known})"
            self._keep(track.problem_once(value, "unknown-phase", detail))
            return None
        return phase

    # --- writes -------------------------------------------------------------------------------

    async def write_outputs(self, unit_id: str, decision: GuardDecision) -> WriteResult:
        """Write what the guard decided for ``unit_id``: the remote setpoint [°C] if
        ``decision.write``, the heartbeat if its count changed. Only with
        ``opcua.write_to_dcs``; one request; never retried (module docstring)."""
        if not self.config.write_to_dcs:
            return WriteResult(unit_id, decision.time_s, enabled=False)
        planned: list[tuple[str, float | int]] = []
        if decision.write and math.isfinite(decision.setpoint_k):
            planned.append(("remote_setpoint", decision.setpoint_k - ZERO_CELSIUS_K))
        if decision.heartbeat != self._heartbeat_sent.get(unit_id):
            planned.append(("heartbeat", decision.heartbeat))
        if not planned:
            return WriteResult(unit_id, decision.time_s, enabled=True)
        tracks = self._units[unit_id]
        client = self._client
        if client is None or self._status.state is not ConnectionState.CONNECTED:
            return self._failed(unit_id, decision, planned, "no link to the plant")
        nodes, values, sent, failed = [], [], [], []
        for signal, value in planned:
            variant = self._write_types.get((unit_id, signal))
            latest = tracks[signal].latest
            if variant is None:  # an abstract DataType (Number, Integer): the value's, or ours
                known = latest is not None and latest.variant in NUMERIC_TYPES
                variant = latest.variant if known else DEFAULT_WRITE_TYPES[signal]  # type: ignore[union-attr]
            data = _write_value(value, variant)
            if data is None:
                name = "unknown" if variant is None else variant.name
                failed.append((signal, f"its data type {name} cannot hold {value!r}"))
                continue
            nodes.append(client.get_node(tracks[signal].spec.node_id))
            values.append(data)
            sent.append((signal, value))
        if not nodes:
            return self._failed(unit_id, decision, [], "", failed)
        task = asyncio.ensure_future(
            client.write_values(nodes, values, raise_on_partial_error=False)
        )
        self._pending.add(task)
        try:
            codes = await asyncio.wait_for(task, self.config.request_timeout_s)
        except asyncio.CancelledError:
            current = asyncio.current_task()
            if not task.cancelled() or (current is not None and current.cancelling()):
                raise
            lost = f"connection lost while writing ({self._lost_reason})"
            return self._failed(unit_id, decision, sent, lost, failed)
        except (OSError, TimeoutError, ua.UaError) as error:
            return self._failed(unit_id, decision, sent, _error_text(error), failed)
        finally:
            self._pending.discard(task)
        written = []
        for (signal, value), code in zip(sent, codes, strict=True):
            if code.is_good():
                written.append((signal, value))
                if signal == "heartbeat":
                    self._heartbeat_sent[unit_id] = int(value)
            else:
                failed.append((signal, code.name))
        result = WriteResult(unit_id, decision.time_s, True, tuple(written), tuple(failed))
        if failed:
            _log.warning("plant write for %s refused: %s", unit_id, failed)
        return result

    def _failed(
        self,
        unit_id: str,
        decision: GuardDecision,
        planned: Sequence[tuple[str, float | int]],
        why: str,
        failed: Sequence[tuple[str, str]] = (),
    ) -> WriteResult:
        failures = (*failed, *((signal, why) for signal, _value in planned))
        _log.warning("plant write for %s not done: %s", unit_id, failures)
        return WriteResult(unit_id, decision.time_s, True, (), tuple(failures))


def _good_values(tracks: Mapping[str, TagTrack]) -> dict[str, tuple[TagTrack, TagValue]]:
    """Each tag's latest value, where its quality is Good."""
    values = {}
    for signal, track in tracks.items():
        latest = track.latest
        if latest is not None and severity(latest.status_code) is Severity.GOOD:
            values[signal] = (track, latest)
    return values


def _write_value(value: float | int, variant: ua.VariantType | None) -> ua.DataValue | None:
    """``value`` as a DataValue of the tag's own type, without timestamps (many DCS servers
    refuse written timestamps); None if the type cannot hold it."""
    if variant in (ua.VariantType.Float, ua.VariantType.Double):
        return ua.DataValue(ua.Variant(float(value), variant))
    if variant not in INTEGER_RANGES or float(value) != int(value):
        return None
    low, high = INTEGER_RANGES[variant]
    if not low <= int(value) <= high:
        return None
    return ua.DataValue(ua.Variant(int(value), variant))
