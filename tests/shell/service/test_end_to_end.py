"""The live service end to end, over real OPC UA on loopback and a real store (SQLite and
PostgreSQL): a seeded batch of the simulated plant with the advisor's setpoints followed by
the recipe, through a network cut, a plant server restart and a database outage; afterwards
every sample the plant published while the link stood is in the store exactly once.

The plant runs at 50x real time (one plant second is 20 ms of wall time), the short recipe
of the simulator's tests, served from the start of controlled cooling.
"""

from __future__ import annotations

import asyncio
import math
import urllib.request
from datetime import UTC, datetime

from sensor.shell.service.clock import RESYNC_AFTER_S
from sensor.shell.service.service import Service, UnitStep
from sensor.shell.store import ProposalRow, Store, read_batch
from simulators.settings import read_simulator_settings
from tests.shell.opcua.conftest import free_port, plant_at, run, wait_until
from tests.shell.service.harness import (
    MEASURED,
    Served,
    published_measured,
    service_site,
    stored_measured,
    stored_samples,
)
from tests.shell.store.tcpproxy import TcpProxy
from tests.shell.store.test_writer import _mid_stream_outage
from tests.simulators.conftest import shortened

SPEED = 50.0
DETECT_S = 3.0
"""Wall time within which a cut link is noticed (asyncua's watchdog reads the server state
every second) [s]."""


RESUBSCRIBE_S = 5.0
"""Wall time within which a link back has its monitored items again (this machine is
shared) [s]."""
CUT_S = 0.1
"""Wall time before an outage's gap in the store within which the last publishes of a
stopping server or a cut link may have been lost part way (two publishing intervals) [s]."""
IN_FLIGHT_S = 1.0
"""Wall time before the service is told to stop within which a value the plant published may
still be on its way (publishing interval 50 ms, a shared machine) [s]: not expected stored."""


def _fetch(url: str) -> str:
    with urllib.request.urlopen(url, timeout=10.0) as response:  # loopback only
        return response.read().decode()


def _lost(steps: list[UnitStep]) -> bool:
    return bool(steps) and steps[-1].snapshot.communication_lost


def _age(step: UnitStep) -> float | None:
    """How old the step's reactor temperature reading is [plant s]; None without one."""
    temp = step.snapshot.sample.temp
    return None if temp is None else step.outputs.time_s - temp.source_time_s


def _fresh(step: UnitStep) -> bool:
    """Whether the step has a reactor temperature reading of the last ``IN_FLIGHT_S``."""
    age = _age(step)
    return age is not None and age <= IN_FLIGHT_S * SPEED


def _outage_windows(steps: list[UnitStep]) -> list[tuple[float, float]]:
    """The stretches of plant time [s] during which the service saw the link lost."""
    windows, start = [], None
    for step in steps:
        lost = step.snapshot.communication_lost
        if lost and start is None:
            start = step.outputs.time_s
        elif not lost and start is not None:
            windows.append((start, step.outputs.time_s))
            start = None
    return windows


def _missing(sent, stored, first: float, last: float, windows) -> list:
    """The published values between ``first`` and ``last`` [s], outside ``windows``, that are
    not in the store."""
    return [
        key for key in sent
        if first <= key[2].timestamp() <= last and key not in stored
        and not any(a <= key[2].timestamp() <= b for a, b in windows)
    ]  # fmt: skip


def test_a_batch_through_a_cut_a_restart_and_a_database_outage(backend, demo_site, tmp_path):
    settings = shortened(read_simulator_settings(demo_site), permissive=True)
    upstream_port = free_port()
    upstream = f"opc.tcp://127.0.0.1:{upstream_port}/plant"
    link = TcpProxy(("127.0.0.1", upstream_port))
    outage = _mid_stream_outage(backend)
    url = backend.url if backend.name == "sqlite" else outage.via.url
    site = service_site(
        demo_site, f"opc.tcp://127.0.0.1:{link.port}/plant", url, backend.schema, tmp_path
    )
    sim = plant_at(site, settings, "controlled-cooling", seed=11)
    sim = type(sim).from_site(site, seed=11, settings=settings)
    while sim.phase != "controlled-cooling":
        sim.step()
    published: list = []
    steps: list[UnitStep] = []
    followed: list[bool] = []
    db_out: list[float] = []
    told_to_stop: list[float] = []
    on_time: list[int] = []

    def listen(step: UnitStep) -> None:
        steps.append(step)
        followed.append(sim.truth().remote_active)

    async def exercise():
        link.start()
        stop = asyncio.Event()
        service = Service(site, plant_clock_speed=SPEED, listeners=[listen])
        served = await Served(site, sim, upstream, SPEED, published).__aenter__()
        running = asyncio.create_task(service.run(stop))
        try:
            await wait_until(lambda: any(followed), 30.0, "the recipe following the advisor")
            # the live trend page, fed by the same steps
            page = await asyncio.to_thread(_fetch, service.live.url)
            assert "CR-301" in page
            # the network cut for a stretch
            await asyncio.to_thread(link.cut)
            await wait_until(lambda: _lost(steps), DETECT_S + 2, "the cut noticed")
            lost_steps = len(steps)
            await asyncio.sleep(1.0)
            link.restore()
            await wait_until(lambda: not _lost(steps), 10.0, "the link back")
            during = [s for s in steps[lost_steps:] if s.snapshot.communication_lost]
            # the plant server stopped, and started again with the batch where it stood
            await asyncio.sleep(1.0)
            await served.__aexit__()
            await wait_until(lambda: _lost(steps), DETECT_S + 2, "the stop noticed")
            # down for longer than the clock's resync lag (shorter pauses leave the ticks at
            # most that far ahead, by design): the ticks must follow the plant back
            await asyncio.sleep(RESYNC_AFTER_S + 0.5)
            served = await Served(site, sim, upstream, SPEED, published).__aenter__()
            await wait_until(lambda: not _lost(steps), 10.0, "the plant back")
            # its clock waited while the server was down: the service's ticks follow it back
            await wait_until(lambda: _fresh(steps[-1]), 15.0, "ticks on the plant's time again")
            on_time.append(len(steps))
            # the database away for a stretch
            await asyncio.sleep(1.0)
            await asyncio.to_thread(outage.begin)
            db_out.append(steps[-1].outputs.time_s)
            writer = service.writer
            await wait_until(lambda: writer.status().queued_rows > 0, 10.0, "rows queued")
            await asyncio.sleep(1.5)
            await asyncio.to_thread(outage.end)
            db_out.append(steps[-1].outputs.time_s)
            await wait_until(lambda: writer.status().queued_rows == 0, 20.0, "the queue drained")
            await asyncio.sleep(1.0)
        finally:
            # the plant's time (its writable tags carry the wall clock)
            told_to_stop.append(max(t for _u, s, t, _v in published if s in MEASURED).timestamp())
            stop.set()
            status = await running
            await served.__aexit__()
            await asyncio.to_thread(link.cut)
        return status, during

    status, during = run(exercise(), timeout_s=150.0)
    assert status.store.dropped_rows == 0
    assert status.link.connections == 3
    # while the link was lost: proposals withdrawn, nothing written (the heartbeat stops with
    # the writes), the guard says why (with no phase known it stands by rather than falls back)
    assert during
    for step in during:
        assert step.outputs.proposal is None
        assert not step.outputs.decision.write
        assert step.written == ()
        assert "communication with the DCS is lost" in step.outputs.decision.reasons
    samples = stored_samples(backend.url, backend.schema)
    stored, sent = stored_measured(samples), published_measured(published)
    first = min(s.outputs.time_s for s in steps) - 5.0  # the subscription's first values
    until = told_to_stop[0] - IN_FLIGHT_S * SPEED  # published before the stop, and delivered
    assert set(stored) <= set(sent), "a stored sample the plant never published"
    assert max(stored.values()) == 1, "a sample stored twice"
    # A link lost is noticed within DETECT_S; once back, its subscription is made afresh
    # within RESUBSCRIBE_S (values between are not recovered: the plant historian has them).
    # Outside those windows every value the plant published is stored.
    t0 = min(s.outputs.time_s for s in steps)
    outages = _outage_windows(steps)
    assert len(outages) == 2
    windows = [(a - DETECT_S * SPEED, b + RESUBSCRIBE_S * SPEED) for a, b in outages]
    outside = _missing(sent, stored, first, until, windows)
    assert outside == [], (
        f"{len(outside)} published samples lost outside the link outages, at "
        f"{sorted({round(k[2].timestamp() - t0) for k in outside})} s; outages "
        f"{[(round(a - t0), round(b - t0)) for a, b in windows]}"
    )
    # Tighter: each outage's own gap in the store (from the last value stored before the loss
    # was noticed to the first stored after the link was back; at its ends some values may be
    # stored and others not, as a server stopping or a link cut can end its last publishes
    # part way: CUT_S before it), and nothing else: the database's outage loses nothing.
    times = sorted(k[2].timestamp() for k in stored)
    gaps = [
        (max((t for t in times if t <= a), default=a), min((t for t in times if t >= b), default=b))
        for a, b in outages
    ]
    checked = [k for k in sent if first <= k[2].timestamp() <= until]
    cut = CUT_S * SPEED
    checked = [k for k in checked if not any(a - cut <= k[2].timestamp() <= b for a, b in gaps)]
    assert len(checked) > 100, f"only {len(checked)} samples outside the link outages"
    # once on the plant's time again, the ticks stay on it (through the database's outage)
    aged = [s for s in steps[on_time[0] :] if _age(s) is not None]
    late = [s.outputs.time_s - t0 for s in aged if not _fresh(s)]
    assert late == [], f"readings older than {IN_FLIGHT_S * SPEED} s at {late[:10]} s"
    # the advisor's setpoints were written and followed; alarms and proposals stored
    with Store(backend.url, schema=backend.schema) as store:
        record = read_batch(store, sim.batch_id)
    written = [p for p in record.proposals if p.written]
    assert written
    assert all(isinstance(p, ProposalRow) and math.isfinite(p.setpoint_temp_k) for p in written)
    raised = {(e.alarm, e.event) for e in record.alarm_events}
    assert ("communication-lost", "raised") in raised
    assert record.estimates
    assert record.batch.start <= datetime.now(UTC)
    # last, so that everything above is checked either way
    undelivered = [k for k in checked if k not in stored]
    assert undelivered == [], (
        f"{len(undelivered)} published values not stored, at "
        f"{sorted({round(k[2].timestamp() - t0) for k in undelivered})} s; outages "
        f"{[(round(a - t0), round(b - t0)) for a, b in gaps]}; database away "
        f"{[round(t - t0) for t in db_out]}; tag problems {status.tag_problems}"
    )
