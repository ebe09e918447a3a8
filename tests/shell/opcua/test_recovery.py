"""The plant link survives the plant: its server restarted mid-stream, its connections closed
from the server's side, the network cut for a stretch, a link that hangs with a write in
flight, a server that is not there yet. Each time the client notices, backs off, reconnects,
resubscribes, and marks the samples around the outage instead of inventing any."""

from __future__ import annotations

import asyncio
import contextlib
import math
import threading

from asyncua import ua

from controller.guard import GuardDecision, GuardMode
from sensor.shell.opcua.plant_client import ConnectionState, PlantClient
from tests.shell.opcua.conftest import free_port, loopback, plant_at, run, wait_until, with_opcua
from tests.shell.opcua.miniplant import MiniPlant
from tests.shell.opcua.test_plant_client import UNIT, Served
from tests.shell.store.tcpproxy import TcpProxy

FAST = {"reconnect_initial_s": 0.2, "reconnect_max_s": 0.8}
"""Backoff for these tests: 0.2, 0.4, 0.8, 0.8, ... s."""


class Recorder:
    """Samples a unit every ``step_s`` while running, and the link's status transitions."""

    def __init__(self, client: PlantClient, clock, step_s: float = 0.05) -> None:
        self.client = client
        self.clock = clock
        self.step_s = step_s
        self.snapshots = []
        self.statuses = []
        self._task = None

    async def _run(self) -> None:
        while True:
            status = self.client.status
            if not self.statuses or self.statuses[-1] != status:
                self.statuses.append(status)
            self.snapshots.append(self.client.sample(UNIT, self.clock()))
            await asyncio.sleep(self.step_s)

    def __enter__(self) -> Recorder:
        self._task = asyncio.create_task(self._run())
        return self

    def __exit__(self, *exc) -> None:
        self._task.cancel()

    def readings(self, signal: str):
        return [getattr(s.sample, signal) for s in self.snapshots if getattr(s.sample, signal)]

    def delays(self) -> list[float]:
        """The backoff before each attempt, from the LOST statuses [s]."""
        lost = [s for s in self.statuses if s.state is ConnectionState.LOST]
        return [round(s.next_attempt_s - s.since_s, 2) for s in lost]


def _check_marked_not_invented(recorder: Recorder) -> None:
    lost = [s for s in recorder.snapshots if s.communication_lost]
    assert lost, "no sample was taken during the outage"
    for snapshot in lost:
        for reading in (snapshot.sample.temp, snapshot.sample.jacket_temp, snapshot.sample.conc):
            assert math.isnan(reading.value)
            assert reading.status_code == ua.StatusCodes.BadCommunicationError
        assert snapshot.dcs.permissive is None
        assert snapshot.sample.phase is None
    live = [r for s in recorder.snapshots if not s.communication_lost for r in [s.sample.temp] if r]
    times = [r.source_time_s for r in live]
    assert times == sorted(set(times)), "a value reached two samples, or time went back"


def test_the_plant_server_restarted_mid_stream(demo_site, short_settings):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, **FAST)
    sim = plant_at(site, short_settings, "controlled-cooling")

    async def exercise():
        client = PlantClient(site)
        first = Served(site, [sim], endpoint)
        await first.__aenter__()
        await client.start()
        try:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            with Recorder(client, first.now_s) as recorder:
                await asyncio.sleep(1.5)
                before = sim.time_s
                await first.__aexit__()
                await client.wait_for(ConnectionState.LOST, 10.0)
                await wait_until(lambda: client.status.failures >= 4, 10.0, "four failures")
                second = Served(site, [sim], endpoint)  # the same batch, from where it stood
                recorder.clock = second.now_s
                async with second:
                    await client.wait_for(ConnectionState.CONNECTED, 10.0)
                    await asyncio.sleep(1.5)
            return recorder, client.take_updates(), client.status, before
        finally:
            await client.stop()

    recorder, updates, status, before = run(exercise())
    assert status.connections == 2
    assert recorder.delays()[:4] == [0.2, 0.4, 0.8, 0.8]  # doubling, capped
    _check_marked_not_invented(recorder)
    keys = [(u.signal, u.source_time) for u in updates]
    assert len(keys) == len(set(keys)), "a value was stored twice"
    # the batch goes on where it stood: values after the outage are newer than all before it
    snapshots = recorder.snapshots
    first_lost = next(k for k, s in enumerate(snapshots) if s.communication_lost)
    back = next(k for k in range(first_lost, len(snapshots)) if not snapshots[k].communication_lost)
    before_outage = [s.sample.temp.source_time_s for s in snapshots[:first_lost] if s.sample.temp]
    after_outage = [
        s.sample.temp.source_time_s
        for s in snapshots[back:]
        if s.sample.temp and s.sample.temp.source_time_s is not None
    ]
    assert before_outage
    assert after_outage
    assert min(after_outage) > max(before_outage)
    assert max(before_outage) <= sim.start.timestamp() + before


def test_connections_closed_by_the_server(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, **FAST)

    async def exercise():
        async with MiniPlant(site.unit[0], endpoint) as plant, PlantClient(site) as client:
            await client.wait_for(ConnectionState.CONNECTED, 10.0)
            plant.close_client_connections()
            await client.wait_for(ConnectionState.LOST, 5.0)
            lost = client.status
            await client.wait_for(ConnectionState.CONNECTED, 5.0)
            return lost, client.status

    lost, back = run(exercise())
    assert lost.communication_lost
    assert lost.last_error  # why, in plain words
    assert back.connections == 2
    assert back.failures == 0


def test_the_network_cut_for_a_stretch(demo_site, short_settings):
    upstream = loopback()
    proxy = TcpProxy(("127.0.0.1", int(upstream.rsplit(":", 1)[1].split("/")[0])))
    site = with_opcua(demo_site, endpoint=f"opc.tcp://127.0.0.1:{proxy.port}/plant", **FAST)
    served_site = with_opcua(demo_site, endpoint=upstream)
    sim = plant_at(served_site, short_settings, "controlled-cooling")

    async def exercise():
        proxy.start()
        try:
            async with Served(served_site, [sim], upstream) as plant, PlantClient(site) as client:
                await client.wait_for(ConnectionState.CONNECTED, 10.0)
                with Recorder(client, plant.now_s) as recorder:
                    await asyncio.sleep(1.0)
                    await asyncio.to_thread(proxy.cut)
                    await client.wait_for(ConnectionState.LOST, 5.0)
                    await wait_until(lambda: client.status.failures >= 3, 10.0, "failures")
                    proxy.restore()
                    await client.wait_for(ConnectionState.CONNECTED, 10.0)
                    await asyncio.sleep(1.0)
                return recorder, client.status
        finally:
            await asyncio.to_thread(proxy.cut)

    recorder, status = run(exercise())
    assert status.connections == 2
    assert "refused" in recorder.statuses[-2].last_error.lower()  # the cut, in plain words
    _check_marked_not_invented(recorder)


class FreezableProxy(TcpProxy):
    """A proxy that can hold every byte (a link that hangs without closing)."""

    def __init__(self, target, port=None):
        super().__init__(target, port)
        self.flowing = threading.Event()
        self.flowing.set()

    def _pump(self, source, sink):
        while True:
            try:
                data = source.recv(65536)
                if not data:
                    break
                self.flowing.wait(20.0)
                sink.sendall(data)
            except OSError:
                break
        with contextlib.suppress(OSError):
            sink.shutdown(2)

    def cut(self):
        self.flowing.set()
        super().cut()


def test_a_hanging_link_fails_the_write_in_flight_and_is_noticed(demo_site):
    upstream_port = free_port()
    upstream = f"opc.tcp://127.0.0.1:{upstream_port}/plant"
    proxy = FreezableProxy(("127.0.0.1", upstream_port))
    site = with_opcua(
        demo_site,
        endpoint=f"opc.tcp://127.0.0.1:{proxy.port}/plant",
        write_to_dcs=True,
        request_timeout_s=15.0,  # the write would wait this long: the watchdog is faster
        **FAST,
    )
    write = GuardDecision(1.0, GuardMode.ADVISING, True, 313.15, 0.0, None, 7, (), ())

    async def exercise():
        proxy.start()
        try:
            async with MiniPlant(site.unit[0], upstream), PlantClient(site) as client:
                await client.wait_for(ConnectionState.CONNECTED, 10.0)
                proxy.flowing.clear()
                started = asyncio.get_running_loop().time()
                result = await client.write_outputs(UNIT, write)
                took = asyncio.get_running_loop().time() - started
                lost = client.status
                proxy.flowing.set()
                await client.wait_for(ConnectionState.CONNECTED, 15.0)
                return result, took, lost
        finally:
            await asyncio.to_thread(proxy.cut)

    result, took, lost = run(exercise())
    assert lost.state is ConnectionState.LOST
    assert result.written == ()
    assert [signal for signal, _why in result.failed] == ["remote_setpoint", "heartbeat"]
    assert all("connection lost while writing" in why for _signal, why in result.failed)
    assert took < 10.0  # failed when the link was declared lost, not at the request timeout


def test_a_server_that_is_not_there_yet(demo_site):
    endpoint = loopback()
    site = with_opcua(demo_site, endpoint=endpoint, **FAST)

    async def exercise():
        async with PlantClient(site) as client:
            await wait_until(lambda: client.status.failures >= 3, 10.0, "three failures")
            waiting = client.status
            async with MiniPlant(site.unit[0], endpoint):
                await client.wait_for(ConnectionState.CONNECTED, 10.0)
                return waiting, client.status

    waiting, connected = run(exercise())
    assert waiting.state in (ConnectionState.LOST, ConnectionState.CONNECTING)
    assert waiting.communication_lost
    assert connected.connections == 1
