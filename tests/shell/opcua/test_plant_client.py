"""The plant client against real OPC UA servers on loopback: the simulator's plant server for
values, StatusCodes, timestamps, subscriptions and writes; the mini plant for what a test must
set itself (timestamps backwards or in the future, read-only and mistyped tags)."""

from __future__ import annotations

import asyncio
import math
from datetime import UTC, datetime, timedelta

import pytest
from asyncua import Client, ua

from controller.guard import GuardDecision, GuardMode
from sensor.samples import severity
from sensor.shell.opcua.plant_client import ConnectionState, PlantClient
from sensor.units import ZERO_CELSIUS_K
from simulators.faults import Fault
from simulators.shell.server import PlantServer
from tests.shell.opcua.conftest import loopback, plant_at, run, wait_until, with_opcua
from tests.shell.opcua.miniplant import MiniPlant

UNIT = "CR-301"
SPEED = 20.0
"""Simulated seconds per wall second in these tests."""


def decision(time_s, *, write, setpoint_c=40.0, heartbeat=1):
    mode = GuardMode.ADVISING if write else GuardMode.STANDBY
    return GuardDecision(
        time_s, mode, write, setpoint_c + ZERO_CELSIUS_K, 0.0, None, heartbeat, (), ()
    )


class Served:
    """A simulated plant served on loopback, with a running clock."""

    def __init__(self, site, sims, endpoint, speed=SPEED):
        self.server = PlantServer(site, sims, endpoint=endpoint, speed=speed, tick_s=0.02)
        self.stop = asyncio.Event()
        self.task = None

    def now_s(self):
        return self.server.clock.now().timestamp()

    async def __aenter__(self):
        await self.server.start()
        self.task = asyncio.create_task(self.server.run(self.stop))
        return self

    async def __aexit__(self, *exc):
        self.stop.set()
        await self.task
        await self.server.stop()


def test_values_statuses_and_timestamps_arrive_converted_once(demo_site, short_settings):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint)
    sim = plant_at(site, short_settings, "controlled-cooling")
    # the analyzer reports Bad for a stretch, 100 s (simulated) into the serving
    bad = Fault("bad", sim.time_s + 100.0, 60.0)
    sim = plant_at(site, short_settings, "controlled-cooling", faults=(bad,))

    async def exercise():
        async with Served(site, [sim], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            assert client.status.connections == 1
            conc_times, seen_bad, temps = [], False, []
            async with Client(endpoint) as reader:
                raw_conc = reader.get_node("ns=2;s=CR301.AT3015.PV")
                for _ in range(60):  # 6 s wall, 120 s simulated, a tick every 0.1 s
                    await asyncio.sleep(0.1)
                    snapshot = client.sample(UNIT, plant.now_s())
                    sample = snapshot.sample
                    assert not snapshot.communication_lost
                    assert snapshot.problems == ()
                    assert sample.phase == "controlled-cooling"
                    if sample.temp is not None:
                        temps.append(sample.temp)
                    if sample.conc is not None:
                        conc_times.append(sample.conc.source_time_s)
                        if severity(sample.conc.status_code) == 2:
                            assert sample.conc.status_code == ua.StatusCodes.BadSensorFailure
                            seen_bad = True
                raw = await raw_conc.read_data_value(raise_on_bad_status=False)
            await asyncio.sleep(0.5)  # the last notification is on its way
            dcs = snapshot.dcs
            latest = client.latest(UNIT, "conc")
        updates = client.take_updates()
        return conc_times, seen_bad, temps, dcs, updates, raw, latest

    conc_times, seen_bad, temps, dcs, updates, raw, latest = run(exercise())
    # each value reaches a sample once, in order: none repeated, none invented
    assert conc_times == sorted(set(conc_times))
    assert len(conc_times) >= 8  # an analyzer value every 10 s simulated
    assert seen_bad
    # converted once: °C -> K and g/100g -> kg/kg, with the source timestamps the server gave
    by_source = {(u.signal, u.source_time.timestamp()): u for u in updates}
    for reading in temps:
        update = by_source[("temp", reading.source_time_s)]
        assert reading.value == pytest.approx(update.value + ZERO_CELSIUS_K, abs=1e-9)
    # the server may publish the next analyzer value (every 10 s simulated, 0.5 s wall) before
    # ``latest`` is read: it is the value read directly or a later one, never an earlier one
    assert latest.source_time_s >= raw.SourceTimestamp.timestamp()
    assert latest.server_time_s is not None
    if latest.source_time_s == raw.SourceTimestamp.timestamp():
        assert latest.status_code == raw.StatusCode.value
    last_conc = by_source[("conc", raw.SourceTimestamp.timestamp())]
    assert last_conc.value == raw.Value.Value
    assert last_conc.status_code == raw.StatusCode.value
    assert len(by_source) == len(updates)  # no value twice in the store's stream
    assert dcs.phase_value == 6
    assert dcs.batch_id == sim.batch_id
    assert dcs.permissive is False
    assert 273.15 < dcs.jacket_setpoint_k < 373.15
    assert 273.15 < dcs.setpoint_k < 373.15  # the recipe's working setpoint, tagged by the demo
    assert dcs.heartbeat == 0


def test_writes_only_when_enabled_and_gated_by_the_decision(demo_site, short_settings):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, write_to_dcs=True)
    sim = plant_at(site, short_settings, "controlled-cooling")

    async def exercise():
        async with Served(site, [sim], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            now = plant.now_s()
            first = await client.write_outputs(UNIT, decision(now, write=True, setpoint_c=41.5))
            # the same heartbeat again and no write: nothing to send
            second = await client.write_outputs(UNIT, decision(now + 1, write=False))
            third = await client.write_outputs(UNIT, decision(now + 2, write=False, heartbeat=2))
            await wait_until(
                lambda: client.sample(UNIT, plant.now_s()).dcs.heartbeat == 2, 5.0, "heartbeat"
            )
            dcs = client.sample(UNIT, plant.now_s()).dcs
            async with Client(endpoint) as reader:
                remote = await reader.get_node("ns=2;s=CR301.TIC3011.RSP").read_data_value()
            return first, second, third, dcs, remote

    first, second, third, dcs, remote = run(exercise())
    assert first.ok
    assert first.written == (("remote_setpoint", pytest.approx(41.5)), ("heartbeat", 1))
    assert second.enabled
    assert second.written == ()
    assert third.written == (("heartbeat", 2),)
    assert remote.Value.VariantType == ua.VariantType.Double  # the tag's own type
    assert remote.Value.Value == pytest.approx(41.5)
    assert dcs.remote_setpoint_k == pytest.approx(41.5 + ZERO_CELSIUS_K)


def test_nothing_is_written_unless_the_site_file_enables_it(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint)
    assert not site.opcua.write_to_dcs

    async def exercise():
        async with MiniPlant(site.unit[0], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            result = await client.write_outputs(UNIT, decision(1.0, write=True))
            return result, plant.writes

    result, writes = run(exercise())
    assert not result.enabled
    assert result.written == result.failed == ()
    assert writes == []


def test_a_refused_write_is_reported_and_not_retried(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, write_to_dcs=True)

    async def exercise():
        # the DCS has not made the remote setpoint writable for us
        read_only = MiniPlant(site.unit[0], endpoint, writable=("heartbeat",))
        async with read_only as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            result = await client.write_outputs(UNIT, decision(1.0, write=True))
            await asyncio.sleep(0.5)
            return result, list(plant.writes), await plant.value("remote_setpoint")

    result, writes, remote = run(exercise())
    assert result.written == (("heartbeat", 1),)
    assert result.failed == (("remote_setpoint", "BadUserAccessDenied"),)
    assert not result.ok
    assert writes == [("remote_setpoint", pytest.approx(40.0)), ("heartbeat", 1)]  # once
    assert remote == 0.0


def test_timestamps_backwards_repeated_or_in_the_future_over_opcua(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, future_tolerance_s=5.0)

    async def exercise():
        async with MiniPlant(site.unit[0], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            t0 = datetime.now(UTC)
            client.sample(UNIT, t0.timestamp())  # take the initial values

            async def say(value, seconds):
                await plant.set("temp", value, t0 + timedelta(seconds=seconds))
                await asyncio.sleep(0.4)  # a publishing interval and then some

            await say(50.0, 1.0)
            first = client.sample(UNIT, t0.timestamp() + 1.5)
            await say(49.0, 0.5)  # backwards
            await say(48.0, 1.0)  # the same timestamp, another value
            backwards = client.sample(UNIT, t0.timestamp() + 2.0)
            await say(47.0, 90.0)  # 87.5 s ahead of the next tick
            future = client.sample(UNIT, t0.timestamp() + 2.5)
            await say(46.0, 91.0)
            later = client.sample(UNIT, t0.timestamp() + 91.0)
            return first, backwards, future, later, client.tag_counts()[(UNIT, "temp")]

    first, backwards, future, later, counts = run(exercise())
    assert first.sample.temp.value == pytest.approx(50.0 + ZERO_CELSIUS_K)
    assert backwards.sample.temp is None
    assert [p.kind for p in backwards.problems] == ["timestamp-backwards", "timestamp-repeated"]
    assert "goes backwards from" in str(backwards.problems[0])
    assert future.sample.temp is None
    assert [p.kind for p in future.problems] == ["timestamp-in-future"]
    assert "87.5 s ahead of the sample tick (tolerance 5 s)" in future.problems[0].detail
    assert later.sample.temp.value == pytest.approx(46.0 + ZERO_CELSIUS_K)
    assert counts["timestamp-backwards"] == counts["timestamp-repeated"] == 1


def test_wrong_types_and_unknown_phases_are_reported_not_used(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint)
    types = {"permissive": ua.VariantType.Int32, "temp": ua.VariantType.String}

    async def exercise():
        mistyped = MiniPlant(site.unit[0], endpoint, types=types)
        async with mistyped as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            now = datetime.now(UTC)
            await plant.set("permissive", 1, now)
            await plant.set("temp", "hot", now)
            await plant.set("phase", 42, now)
            await asyncio.sleep(0.5)
            first = client.sample(UNIT, now.timestamp() + 0.5)
            second = client.sample(UNIT, now.timestamp() + 1.0)
            return first, second

    first, second = run(exercise())
    assert first.dcs.permissive is None  # 1 is not a Boolean grant
    assert first.sample.phase is None
    assert math.isnan(first.sample.temp.value)
    assert first.sample.temp.status_code == ua.StatusCodes.BadTypeMismatch
    kinds = sorted(p.kind for p in first.problems)
    assert kinds == ["unknown-phase", "wrong-type", "wrong-type"]
    assert any("phase value 42 is not in the unit's phase_values" in str(p) for p in first.problems)
    assert second.problems == ()  # reported once per value


def test_the_store_buffer_is_bounded_and_counts_what_it_drops(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, notification_queue_max=100)

    async def exercise():
        async with MiniPlant(site.unit[0], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            await asyncio.sleep(0.5)  # the initial values
            client.take_updates()
            dropped = client.status.dropped_updates
            start = datetime.now(UTC)
            for k in range(150):
                await plant.set("temp", 20.0 + 0.01 * k, start + timedelta(seconds=k))
                await asyncio.sleep(0.01)
            await wait_until(
                lambda: client.status.dropped_updates - dropped >= 50, 10.0, "50 dropped"
            )
            return client.take_updates(), client.status.dropped_updates - dropped

    updates, dropped = run(exercise())
    assert len(updates) == 100
    assert dropped == 50
    # the oldest were dropped: the newest 100 are kept, in order
    assert [u.value for u in updates] == pytest.approx([20.0 + 0.01 * k for k in range(50, 150)])
