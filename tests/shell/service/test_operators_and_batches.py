"""The live service end to end, over real OPC UA on loopback and a real store (SQLite and
PostgreSQL), for what an operator and the DCS's batches do to it:

- an operator acknowledges an alarm on sigmatrack's own server (a secured channel, a user of
  the users file): the alarm's state changes on the server and the acknowledgement is in the
  store with the operator's name and comment;
- sigmatrack stopped during one batch and started again while the DCS runs the next one: the
  unit does not take up the old batch's filter state, says so, and the store holds both
  batches, the first one's estimates ending where the second one's begin afresh.

The plant is the simulator's OPC UA server in this process at 50x real time (the short recipe
of the simulator's tests, served from the start of controlled cooling).
"""

from __future__ import annotations

import asyncio
import logging
from datetime import timedelta

from asyncua import ua

from controller.alarms import AlarmState
from sensor.shell.demo_command import with_changes
from sensor.shell.service.service import Service, UnitStep
from sensor.shell.store import Store, list_batches, read_batch
from simulators.faults import Fault
from simulators.settings import read_simulator_settings
from tests.shell.opcua.conftest import ADVISOR_URI, free_port, pki, plant_at, run, wait_until
from tests.shell.opcua.desk import OPERATOR, SIGN, client_of, users_file
from tests.shell.service.harness import Served, service_site
from tests.simulators.conftest import shortened

__all__ = ["pki"]  # the fixture, used here

SPEED = 50.0
UNIT = "CR-301"
ALARM = "analyzer-bad"


def _state(step: UnitStep, alarm: str) -> AlarmState:
    return next(s.state for s in step.outputs.alarms if s.name == alarm)


class Running:
    """The service on ``site`` against ``sim`` served on ``endpoint``, every step appended to
    ``steps``; stopped on leaving, its final status in ``status``."""

    def __init__(self, site, sim, endpoint: str, steps: list[UnitStep]) -> None:
        self.service = Service(site, plant_clock_speed=SPEED, listeners=[steps.append])
        self.served = Served(site, sim, endpoint, SPEED, [])
        self.stop = asyncio.Event()
        self.status = None

    async def __aenter__(self) -> Running:
        await self.served.__aenter__()
        self.task = asyncio.create_task(self.service.run(self.stop))
        return self

    async def __aexit__(self, *exc: object) -> None:
        self.stop.set()
        try:
            self.status = await self.task
        finally:
            await self.served.__aexit__()


def test_an_acknowledgement_on_the_server_is_stored_with_the_operator(
    backend, demo_site, pki, tmp_path
):
    settings = shortened(read_simulator_settings(demo_site), permissive=True)
    plant_endpoint = f"opc.tcp://127.0.0.1:{free_port()}/plant"
    site = with_changes(
        service_site(demo_site, plant_endpoint, backend.url, backend.schema, tmp_path),
        opcua={"application_uri": ADVISOR_URI, "certificate": pki.advisor_cert,
               "private_key": pki.advisor_key},
        opcua_server={"security_modes": ("none", "sign", "sign-and-encrypt"),
                      "trust_dir": pki.trusted_by_advisor, "users_file": users_file(tmp_path)},
    )  # fmt: skip
    cooling_s = plant_at(site, settings, "controlled-cooling", seed=4).time_s
    # the analyzer flags its values Bad from a minute into controlled cooling, for an hour
    bad = Fault("bad", start_s=cooling_s + 60.0, duration_s=3600.0, signal="conc")
    sim = plant_at(site, settings, "controlled-cooling", seed=4, faults=(bad,))
    steps: list[UnitStep] = []
    comment = "analyzer flagged Bad; instrument tech called"

    async def exercise():
        async with Running(site, sim, plant_endpoint, steps) as running:
            await wait_until(
                lambda: steps and _state(steps[-1], ALARM) is AlarmState.UNACKNOWLEDGED,
                30.0,
                "the analyzer alarm raised",
            )
            client = await client_of(
                site, cert=pki.peer_cert, key=pki.peer_key, mode=SIGN, user=OPERATOR
            )
            async with client:
                ns = await client.get_namespace_index(site.opcua.server.namespace_uri)
                alarm = client.get_node(ua.NodeId(f"{UNIT}.alarms.{ALARM}", ns))
                method = ua.NodeId(f"{UNIT}.alarms.{ALARM}.acknowledge", ns)
                await alarm.call_method(method, comment)
                state = client.get_node(ua.NodeId(f"{UNIT}.alarms.{ALARM}.state", ns))
                await wait_until(
                    lambda: _state(steps[-1], ALARM) is AlarmState.ACKNOWLEDGED,
                    10.0,
                    "the acknowledgement taken",
                )
                await asyncio.sleep(0.5)  # a publish of the state after it
                on_server = await state.read_value()
        return running.status, on_server

    status, on_server = run(exercise(), timeout_s=120.0)
    assert on_server == "acknowledged"
    assert status.store.dropped_rows == 0
    with Store(backend.url, schema=backend.schema) as store:
        record = read_batch(store, sim.batch_id)
    acks = [e for e in record.alarm_events if e.alarm == ALARM and e.event == "acknowledged"]
    assert len(acks) == 1
    assert acks[0].user_name == OPERATOR[0]
    assert acks[0].state == "acknowledged"
    assert comment in acks[0].message
    raised = [e for e in record.alarm_events if e.alarm == ALARM and e.event == "raised"]
    assert len(raised) == 1
    assert raised[0].user_name is None
    assert raised[0].time < acks[0].time


def test_a_restart_into_the_next_batch_starts_the_unit_afresh(backend, demo_site, tmp_path, caplog):
    settings = shortened(read_simulator_settings(demo_site), permissive=True)
    plant_endpoint = f"opc.tcp://127.0.0.1:{free_port()}/plant"
    site = service_site(demo_site, plant_endpoint, backend.url, backend.schema, tmp_path)
    first = plant_at(site, settings, "controlled-cooling", seed=5)
    steps: list[UnitStep] = []

    async def serve(sim, count: int):
        async with Running(site, sim, plant_endpoint, steps) as running:
            await wait_until(
                lambda: sum(s.batch_id == sim.batch_id for s in steps) >= count,
                40.0,
                f"{count} steps of batch {sim.batch_id}",
            )
        return running.status

    with caplog.at_level(logging.INFO, logger="sensor.shell.service"):
        run(serve(first, 200), timeout_s=90.0)
        # the next batch of the same unit, started an hour after the first one stood
        second = type(first).from_site(
            site,
            seed=6,
            settings=settings,
            batch_id=f"{UNIT}-next",
            start=first.timestamp() + timedelta(hours=1),
        )
        for _ in range(20_000):
            if second.phase == "controlled-cooling":
                break
            second.step()
        status = run(serve(second, 100), timeout_s=90.0)
    text = caplog.text
    assert "resumed from the checkpoint" in text
    why = f"the DCS runs batch {second.batch_id}, the checkpoint was of batch {first.batch_id}"
    assert why in text
    assert status.resumed == ()
    with Store(backend.url, schema=backend.schema) as store:
        batches = {b.batch_id: b for b in list_batches(store, UNIT)}
        old = read_batch(store, first.batch_id)
        new = read_batch(store, second.batch_id)
    assert set(batches) == {first.batch_id, second.batch_id}
    assert old.estimates
    assert new.estimates
    # the first batch ends at the last step sigmatrack made in it (its checkpoint)
    assert batches[first.batch_id].end == max(e.time for e in old.estimates)
    assert batches[second.batch_id].end is None  # still running
    assert max(e.time for e in old.estimates) < min(e.time for e in new.estimates)
