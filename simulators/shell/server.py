"""The OPC UA plant server: the simulated crystallizers' tags, as a DCS's OPC UA server shows them.

Every tag of every unit in the site file becomes a variable under ``Objects/<unit id>``, with the
node id the site file gives it (``TagRef.node_id(opcua.node_id_format)``; the demo's
``ns=2;s=<tag>``). The server's first registered namespace, :data:`NAMESPACE_URI`, has index 2;
if a tag names a higher namespace index, placeholder namespaces are registered up to it.

========================  ============  ==================================================
signal                    data type     notes
========================  ============  ==================================================
temp, jacket_temp         Double, °C    AnalogItemType: EngineeringUnits, EURange
jacket_setpoint           Double, °C    AnalogItemType
setpoint                  Double, °C    AnalogItemType: the recipe's working reactor setpoint
conc                      Double        AnalogItemType, the analyzer's ``conc_unit``; its
                                        StatusCode is Good, Uncertain or Bad
phase                     Int32/String  the DCS's value (``unit.phase_values``)
batch_id                  String
permissive                Boolean       writable (the operator's grant)
remote_setpoint           Double, °C    writable (the advisor's setpoint), AnalogItemType
heartbeat                 Int32         writable (the advisor's counter)
========================  ============  ==================================================

A write of another data type is refused by the server (``BadTypeMismatch``). Source timestamps
follow the one simulated clock, which runs ``speed`` times faster than the wall clock from the
moment the server starts, except where a timestamp fault (:mod:`simulators.faults`) holds a
reading's source timestamp back; server timestamps are the wall clock. The writable tags
(:data:`INPUT_SIGNALS`) carry their writer's clock: asyncua stamps a client's write with the wall
clock, and the server's own initial values of them are stamped with it too, so that a client
which wrote them before the server was restarted never sees their timestamps go backwards.
Until a tag's first sample its status is ``BadWaitingForInitialData``. The server listens on a
loopback address only.

This server simulates a plant for tests and demonstrations. It is not a DCS and has no safety
function.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from urllib.parse import urlparse

from asyncua import Node, Server, ua
from asyncua.common.instantiate_util import instantiate

from sensor.shell.config import SiteConfig, UnitConfig
from simulators.errors import SimulatorError
from simulators.instruments import Reading
from simulators.plant import PlantSimulation

NAMESPACE_URI = "urn:sigmatrack:simulated-plant"
INPUT_SIGNALS = ("permissive", "remote_setpoint", "heartbeat")
"""Signals the DCS receives from outside: the server reads them, never overwrites them."""
ANALOG_SIGNALS = ("temp", "jacket_temp", "jacket_setpoint", "setpoint", "conc", "remote_setpoint")
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")
MIN_SPEED, MAX_SPEED = 1.0, 100_000.0
CELSIUS_UNIT_ID = (ord("C") << 16) | (ord("E") << 8) | ord("L")
"""UNECE Recommendation 20 code ``CEL`` (degree Celsius) as an OPC UA UnitId (Part 8, 5.6.3)."""
UNECE_URI = "http://www.opcfoundation.org/UA/units/un/cefact"

_PLACEHOLDERS: dict[ua.VariantType, object] = {
    ua.VariantType.Double: 0.0,
    ua.VariantType.Boolean: False,
    ua.VariantType.Int32: 0,
    ua.VariantType.String: "",
}
"""A value of each type to create a variable with, before its first sample."""

_log = logging.getLogger(__name__)


def loopback_endpoint(url: str) -> str:
    """Check that ``url`` is an ``opc.tcp`` endpoint on a loopback address.

    Raises
    ------
    SimulatorError
        Otherwise: the plant server never listens beyond this machine.
    """
    parsed = urlparse(url)
    if parsed.scheme != "opc.tcp" or parsed.hostname is None or parsed.port is None:
        raise SimulatorError(f"endpoint {url!r}: expected opc.tcp://127.0.0.1:PORT/PATH")
    if parsed.hostname not in LOOPBACK_HOSTS:
        raise SimulatorError(
            f"endpoint {url!r}: the plant server listens on 127.0.0.1 only; got {parsed.hostname}"
        )
    return url


class SimulatedClock:
    """The one simulated clock: ``start`` at the moment of :meth:`begin`, then ``speed`` times
    the wall clock (monotonic)."""

    def __init__(self, start: datetime, speed: float) -> None:
        if not MIN_SPEED <= speed <= MAX_SPEED:
            raise SimulatorError(f"speed must be {MIN_SPEED:g} to {MAX_SPEED:g}x; got {speed:g}")
        self.start = start
        self.speed = speed
        self._wall_start: float | None = None

    def begin(self) -> None:
        self._wall_start = time.monotonic()

    def now(self) -> datetime:
        elapsed = 0.0 if self._wall_start is None else time.monotonic() - self._wall_start
        return self.start + timedelta(seconds=self.speed * elapsed)


@dataclass
class _ServedUnit:
    unit: UnitConfig
    sim: PlantSimulation
    nodes: dict[str, Node]
    variant_types: dict[str, ua.VariantType]
    batches_done: int = 0


def _phase_type(unit: UnitConfig) -> ua.VariantType:
    values = list(unit.phase_values.values())
    if values and all(isinstance(v, int) for v in values):
        return ua.VariantType.Int32
    return ua.VariantType.String


def _variant_types(unit: UnitConfig) -> dict[str, ua.VariantType]:
    double = ua.VariantType.Double
    types = {
        "temp": double,
        "jacket_temp": double,
        "jacket_setpoint": double,
        "setpoint": double,
        "conc": double,
        "remote_setpoint": double,
        "permissive": ua.VariantType.Boolean,
        "heartbeat": ua.VariantType.Int32,
        "batch_id": ua.VariantType.String,
        "phase": _phase_type(unit),
    }
    return {signal: types[signal] for signal in unit.tags}


def _units_and_range(sim: PlantSimulation, signal: str) -> tuple[ua.EUInformation, ua.Range]:
    if signal == "conc":
        name = sim.unit.analyzer.conc_unit
        low, high = sim.unit.analyzer.range
        info = ua.EUInformation(
            NamespaceUri=UNECE_URI,
            UnitId=-1,
            DisplayName=ua.LocalizedText(name),
            Description=ua.LocalizedText(f"concentration in {name}"),
        )
        return info, ua.Range(low, high)
    if signal in ("jacket_setpoint", "setpoint", "remote_setpoint"):
        low, high = sim.settings.thermal.jacket_setpoint_range_c
        if signal == "remote_setpoint":
            recipe = sim.settings.recipe
            low, high = recipe.final_temp_c, recipe.seed_temp_c
    else:
        low, high = sim.settings.instruments.temp_range_c
    info = ua.EUInformation(
        NamespaceUri=UNECE_URI,
        UnitId=CELSIUS_UNIT_ID,
        DisplayName=ua.LocalizedText("°C"),
        Description=ua.LocalizedText("degree Celsius"),
    )
    return info, ua.Range(low, high)


class PlantServer:
    """Serves simulated batches over OPC UA (module text).

    Parameters
    ----------
    site : the site file (node ids, tags)
    simulations : one batch per unit to serve, each already built (and possibly advanced)
    endpoint : ``opc.tcp://127.0.0.1:PORT/PATH``
    speed : simulated seconds per wall second, 1 to 100,000; when the machine cannot keep up
        the simulation runs as fast as it can and the clock keeps its rate
    next_batch : builds a unit's next batch from the finished one; ``None``: a finished batch
        stays as it ended
    batches : stop after this many batches per unit (``None``: never)
    tick_s : wall time between updates [s]
    """

    def __init__(
        self,
        site: SiteConfig,
        simulations: Sequence[PlantSimulation],
        *,
        endpoint: str,
        speed: float = 1.0,
        next_batch: Callable[[PlantSimulation], PlantSimulation] | None = None,
        batches: int | None = None,
        tick_s: float = 0.05,
    ) -> None:
        if not simulations:
            raise SimulatorError("nothing to serve: no simulation given")
        self.site = site
        self.endpoint = loopback_endpoint(endpoint)
        start = max(s.timestamp() for s in simulations)
        self.clock = SimulatedClock(start, speed)
        self.next_batch = next_batch
        self.batches = batches
        self.tick_s = tick_s
        self._simulations = list(simulations)
        self._units: list[_ServedUnit] = []
        self._server: Server | None = None

    @property
    def simulations(self) -> list[PlantSimulation]:
        """The batches being served now, one per unit."""
        return [served.sim for served in self._units] or list(self._simulations)

    async def start(self) -> None:
        """Build the address space and start listening."""
        logging.getLogger("asyncua").setLevel(logging.ERROR)
        server = Server()
        await server.init()
        server.set_endpoint(self.endpoint)
        server.set_server_name("sigmatrack simulated plant (not a DCS)")
        server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        await server.register_namespace(NAMESPACE_URI)
        node_ids = {
            (sim.unit.id, signal): ua.NodeId.from_string(
                tag.node_id(self.site.opcua.node_id_format)
            )
            for sim in self._simulations
            for signal, tag in sim.unit.tags.items()
        }
        highest = max(node.NamespaceIndex for node in node_ids.values())
        for (unit_id, signal), node in node_ids.items():
            if node.NamespaceIndex < 2:
                raise SimulatorError(
                    f"{unit_id} {signal}: node id {node.to_string()} is in namespace "
                    f"{node.NamespaceIndex}, which belongs to OPC UA itself; use ns=2 or above"
                )
        for index in range(3, highest + 1):
            await server.register_namespace(f"{NAMESPACE_URI}:ns{index}")
        analog_type = server.get_node(ua.NodeId(ua.ObjectIds.AnalogItemType))
        for sim in self._simulations:
            folder = await server.nodes.objects.add_object(
                ua.NodeId(f"{sim.unit.id}", 2), ua.QualifiedName(sim.unit.id, 2)
            )
            types = _variant_types(sim.unit)
            nodes: dict[str, Node] = {}
            for signal, tag in sim.unit.tags.items():
                node_id = node_ids[(sim.unit.id, signal)]
                name = ua.QualifiedName(tag.name, node_id.NamespaceIndex)
                if signal in ANALOG_SIGNALS:
                    created = await instantiate(
                        folder,
                        analog_type,
                        nodeid=node_id,
                        bname=name,
                        dname=ua.LocalizedText(tag.name),
                    )
                    node = created[0]
                    info, value_range = _units_and_range(sim, signal)
                    await (await node.get_child("0:EngineeringUnits")).write_value(info)
                    await (await node.get_child("0:EURange")).write_value(value_range)
                else:
                    placeholder = _PLACEHOLDERS[types[signal]]
                    node = await folder.add_variable(node_id, name, placeholder, types[signal])
                if signal in INPUT_SIGNALS:
                    await node.set_writable()
                nodes[signal] = node
            self._units.append(_ServedUnit(sim.unit, sim, nodes, types))
        await server.start()
        self._server = server
        for served in self._units:
            await self._write_initial(served)
        self.clock.begin()

    async def stop(self) -> None:
        if self._server is not None:
            await self._server.stop()
            self._server = None

    async def __aenter__(self) -> PlantServer:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()

    async def _write(
        self, served: _ServedUnit, signal: str, reading: Reading | None, source: datetime
    ) -> None:
        assert self._server is not None
        vtype = served.variant_types[signal]
        if reading is None:
            value = ua.DataValue(
                ua.Variant(None, ua.VariantType.Null),
                StatusCode=ua.StatusCode(ua.StatusCodes.BadWaitingForInitialData),
                SourceTimestamp=source,
                ServerTimestamp=datetime.now(UTC),
            )
        else:
            value = ua.DataValue(
                ua.Variant(reading.value, vtype),
                StatusCode=ua.StatusCode(getattr(ua.StatusCodes, reading.status)),
                SourceTimestamp=source,
                ServerTimestamp=datetime.now(UTC),
            )
        await self._server.write_attribute_value(served.nodes[signal].nodeid, value)

    async def _write_initial(self, served: _ServedUnit) -> None:
        sim = served.sim
        now = sim.timestamp()
        initial = {
            "permissive": Reading(sim.inputs.permissive),
            "remote_setpoint": Reading(sim.inputs.remote_setpoint_c),
            "heartbeat": Reading(sim.inputs.heartbeat),
            "batch_id": Reading(sim.batch_id),
        }
        for signal in served.nodes:
            stamp = datetime.now(UTC) if signal in INPUT_SIGNALS else now
            await self._write(served, signal, initial.get(signal), stamp)

    async def _read_inputs(self, served: _ServedUnit) -> None:
        values = {}
        for signal in INPUT_SIGNALS:
            if signal in served.nodes:
                values[signal] = await served.nodes[signal].read_value()
        remote = values.get("remote_setpoint")
        served.sim.set_inputs(
            permissive=values.get("permissive"),
            remote_setpoint_c=None if remote is None else float(remote),
            heartbeat=values.get("heartbeat"),
        )

    async def update(self) -> bool:
        """Bring every unit up to the simulated clock and publish what changed; False when
        every unit has served its last batch."""
        target = self.clock.now()
        running = False
        for served in self._units:
            if self.batches is not None and served.batches_done >= self.batches:
                continue
            running = True
            await self._read_inputs(served)
            sim = served.sim
            samples = sim.advance_to((target - sim.start).total_seconds())
            latest: dict[str, tuple[Reading, float]] = {}
            for sample in samples:
                for signal, reading in sample.readings.items():
                    latest[signal] = (reading, sample.time_s)
            for signal, (reading, time_s) in latest.items():
                if signal not in INPUT_SIGNALS:
                    stamp_s = time_s if reading.source_time_s is None else reading.source_time_s
                    await self._write(served, signal, reading, sim.timestamp(stamp_s))
            if sim.finished:
                served.batches_done += 1
                _log.info("batch %s finished", sim.batch_id)
                more = self.batches is None or served.batches_done < self.batches
                if self.next_batch is not None and more:
                    served.sim = self.next_batch(sim)
                    if "batch_id" in served.nodes:
                        batch = Reading(served.sim.batch_id)
                        await self._write(served, "batch_id", batch, served.sim.timestamp())
        return running

    async def run(self, stop: asyncio.Event | None = None) -> None:
        """Update every ``tick_s`` until ``stop`` is set or every unit is done."""
        stop = asyncio.Event() if stop is None else stop
        while not stop.is_set():
            began = time.monotonic()
            if not await self.update():
                return
            rest = self.tick_s - (time.monotonic() - began)
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(stop.wait(), timeout=max(rest, 1e-3))
