"""The OPC UA plant server, read and written by a real asyncua client on a free loopback port."""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import socket
from datetime import timedelta

import pytest
from asyncua import Client, ua

from sensor.shell.config import TagRef
from simulators.errors import SimulatorError
from simulators.faults import Fault
from simulators.plant import PlantSimulation
from simulators.shell.server import CELSIUS_UNIT_ID, PlantServer, loopback_endpoint


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _node(client, name):
    return client.get_node(f"ns=2;s={name}")


async def _wait_for(predicate, timeout_s, what):
    """Poll ``predicate`` every 50 ms for at most ``timeout_s`` wall seconds."""
    for _ in range(int(timeout_s / 0.05)):
        if await predicate():
            return
        await asyncio.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def _cooling_plant(site, settings, faults):
    sim = PlantSimulation.from_site(site, seed=4, settings=settings, faults=faults)
    for _ in range(20000):  # the short recipe reaches controlled cooling in about 4,100 s
        if sim.phase == "controlled-cooling":
            return sim
        sim.step()
    raise AssertionError("controlled cooling never started")


def test_only_loopback_endpoints():
    assert loopback_endpoint("opc.tcp://127.0.0.1:4840/plant")
    with pytest.raises(SimulatorError, match=r"listens on 127\.0\.0\.1 only; got 10\.1\.2\.3"):
        loopback_endpoint("opc.tcp://10.1.2.3:4840/plant")
    with pytest.raises(SimulatorError, match=r"expected opc\.tcp://127\.0\.0\.1:PORT/PATH"):
        loopback_endpoint("http://127.0.0.1/plant")


def test_a_real_client_reads_tags_and_drives_the_remote_setpoint(demo_site, short_settings):
    asyncio.run(asyncio.wait_for(_exercise(demo_site, short_settings), timeout=60.0))


async def _exercise(site, settings):
    plant = _cooling_plant(site, settings, ())
    at = plant.time_s
    # the analyzer fails 350 s (simulated) into the serving, after the remote-setpoint checks,
    # for 80 s
    bad = Fault("bad", at + 350.0, 80.0)
    plant = PlantSimulation.from_site(site, seed=4, settings=settings, faults=(bad,))
    plant.advance_to(at)
    async with _served(site, plant, 40.0) as (client, server):
        await _check_reads(client, plant, server)
        await _check_remote(client, plant, settings)
        await _check_bad_status(client, plant, bad)


@contextlib.asynccontextmanager
async def _served(site, plant, speed):
    """The plant served on a free loopback port, its clock running, and a client of it."""
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/plant"
    server = PlantServer(site, [plant], endpoint=endpoint, speed=speed, tick_s=0.02)
    stop = asyncio.Event()
    async with server:
        runner = asyncio.create_task(server.run(stop))
        try:
            async with Client(endpoint, timeout=10) as client:
                yield client, server
        finally:
            stop.set()
            await runner


async def _check_reads(client, plant, server):
    assert await client.get_namespace_index("urn:sigmatrack:simulated-plant") == 2
    temp = _node(client, "CR301.TT3011.PV")
    conc = _node(client, "CR301.AT3015.PV")
    await _wait_for(lambda: _good(conc), 10.0, "a first analyzer value")
    value = await temp.read_data_value(raise_on_bad_status=False)
    assert value.Value.VariantType == ua.VariantType.Double
    assert value.StatusCode.is_good()
    assert abs(value.Value.Value - plant.truth().temp_c) < 1.0
    # source timestamps follow the simulated clock: within a few seconds of simulated time
    assert abs(value.SourceTimestamp - server.clock.now()) < timedelta(seconds=20)
    assert value.SourceTimestamp > plant.start + timedelta(seconds=3600)
    units = await (await temp.get_child("0:EngineeringUnits")).read_value()
    assert units.UnitId == CELSIUS_UNIT_ID
    assert units.DisplayName.Text == "°C"
    assert await (await temp.get_child("0:EURange")).read_value() == ua.Range(-20.0, 120.0)
    conc_units = await (await conc.get_child("0:EngineeringUnits")).read_value()
    assert conc_units.DisplayName.Text == "g/100g"
    assert await (await conc.get_child("0:EURange")).read_value() == ua.Range(0.0, 40.0)
    assert await _node(client, "CR301.PHASE").read_value() == 6  # controlled-cooling
    assert await _node(client, "CR301.BATCH_ID").read_value() == plant.batch_id


async def _good(node):
    value = await node.read_data_value(raise_on_bad_status=False)
    return value.Value.Value is not None and value.StatusCode.is_good()


async def _check_remote(client, plant, settings):
    permit = _node(client, "CR301.ADVISOR_PERMIT")
    remote = _node(client, "CR301.TIC3011.RSP")
    beat = _node(client, "CR301.ADVISOR_HEARTBEAT")
    target = settings.recipe.seed_temp_c - 1.0  # 60 s away at the recipe's 1 K/min limit
    await remote.write_value(ua.Variant(target, ua.VariantType.Double))
    await permit.write_value(ua.Variant(True, ua.VariantType.Boolean))
    # a heartbeat that does not change never hands control over
    await asyncio.sleep(0.5)
    assert not plant.truth().remote_active
    # a wrong data type is refused by the server
    with pytest.raises(ua.UaStatusCodeError, match="BadTypeMismatch"):
        await beat.write_value(ua.Variant(1.5, ua.VariantType.Double))
    for n in range(1, 26):  # 2.5 s wall, 100 s simulated: the heartbeat changes every 4 s
        await beat.write_value(ua.Variant(n, ua.VariantType.Int32))
        await asyncio.sleep(0.1)
    truth = plant.truth()
    assert truth.remote_active
    assert truth.setpoint_c == pytest.approx(target, abs=0.05)
    # the heartbeat stops: after the watchdog (30 s simulated, 0.75 s wall) the recipe's own
    # profile takes over again
    await _wait_for(
        lambda: _not_active(plant), 6.0, "the watchdog to hand control back to the recipe"
    )
    # permissive off with a live heartbeat: the recipe keeps control
    await permit.write_value(ua.Variant(False, ua.VariantType.Boolean))
    for n in range(40, 46):
        await beat.write_value(ua.Variant(n, ua.VariantType.Int32))
        await asyncio.sleep(0.1)
    assert not plant.truth().remote_active


async def _not_active(plant):
    return not plant.truth().remote_active


async def _check_bad_status(client, plant, bad):
    conc = _node(client, "CR301.AT3015.PV")

    async def flagged_bad():
        value = await conc.read_data_value(raise_on_bad_status=False)
        return value.StatusCode.value == ua.StatusCodes.BadSensorFailure

    assert plant.time_s < bad.start_s, "the remote checks took too long to see the fault"
    await _wait_for(flagged_bad, 20.0, "the analyzer's BadSensorFailure")
    assert bad.start_s <= plant.time_s
    await _wait_for(lambda: _good(conc), 20.0, "the analyzer's recovery")
    assert plant.time_s >= bad.end_s


def test_the_working_setpoint_is_served_where_the_site_file_tags_it(demo_site, short_settings):
    asyncio.run(asyncio.wait_for(_exercise_setpoint(demo_site, short_settings), timeout=30.0))


async def _exercise_setpoint(site, settings):
    unit = site.unit[0]
    tagged = dataclasses.replace(unit, tags={**unit.tags, "setpoint": TagRef("CR301.TIC3011.SP")})
    site = dataclasses.replace(site, unit=(tagged,))
    plant = _cooling_plant(site, settings, ())
    async with _served(site, plant, 20.0) as (client, _server):
        node = _node(client, "CR301.TIC3011.SP")
        await _wait_for(lambda: _good(node), 10.0, "a first working setpoint")
        value = await node.read_data_value(raise_on_bad_status=False)
        assert value.Value.VariantType == ua.VariantType.Double
        units = await (await node.get_child("0:EngineeringUnits")).read_value()
        assert units.UnitId == CELSIUS_UNIT_ID
        # the recipe's working setpoint, published to 1 mK, one scan behind at most (cooling
        # at most 1 K/min: 1/60 K per 1 s scan)
        assert value.Value.Value == pytest.approx(plant.truth().setpoint_c, abs=0.05)


WRITTEN_TAGS = {
    "CR301.ADVISOR_PERMIT": ua.Variant(True, ua.VariantType.Boolean),
    "CR301.TIC3011.RSP": ua.Variant(30.0, ua.VariantType.Double),
    "CR301.ADVISOR_HEARTBEAT": ua.Variant(7, ua.VariantType.Int32),
}
"""The demo unit's writable tags (the simulator's ``INPUT_SIGNALS``) and a value for each."""


def test_a_restarted_server_never_stamps_a_written_tag_before_its_last_write(
    demo_site, short_settings
):
    """The writable tags carry their writer's clock (asyncua stamps a client's write with the
    wall clock); the server's own first values of them after a restart carry it too, so that a
    client that wrote them before the restart sees no timestamp go backwards."""
    plant = _cooling_plant(demo_site, short_settings, ())

    async def exercise():
        written = {}
        async with _served(demo_site, plant, 40.0) as (client, _server):
            for name, variant in WRITTEN_TAGS.items():
                await _node(client, name).write_value(variant)
                value = await _node(client, name).read_data_value(raise_on_bad_status=False)
                written[name] = value.SourceTimestamp
        async with _served(demo_site, plant, 40.0) as (client, _server):
            for name, before in written.items():
                value = await _node(client, name).read_data_value(raise_on_bad_status=False)
                assert value.SourceTimestamp >= before, f"{name} goes back after the restart"

    asyncio.run(asyncio.wait_for(exercise(), timeout=60.0))
