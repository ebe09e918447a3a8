"""sigmatrack's own server, read by a real client on loopback: the soft sensor's outputs (from a
real SoftSensor run), a proposal, a real guard decision and the alarms, with EngineeringUnits,
StatusCodes and source timestamps; alarm events as OPC UA events; shelving by an operator."""

from __future__ import annotations

import asyncio
import dataclasses
import math
from datetime import UTC, datetime

import numpy as np
import pytest
from asyncua import Client, ua

from controller.alarm_set import crystallizer_alarm_engine, crystallizer_alarms
from controller.guard import Guard, GuardInputs
from controller.law import LawMode, Proposal
from sensor.outputs import Estimates
from sensor.shell.opcua.advisor_server import (
    ESTIMATE_UNITS,
    VARIABLES,
    AdvisorServer,
    UnitOutputs,
    unece_unit,
)
from sensor.softsensor import SoftSensor
from sensor.units import ZERO_CELSIUS_K
from tests.shell.opcua.conftest import loopback, run, with_server
from tests.shell.opcua.desk import OPERATOR, SIGN, AlarmDesk, alarm_nodes, client_of, server_site
from tests.synthetic import cooling_batch, demo_setup

UNIT = "CR-301"


@pytest.fixture(scope="module")
def step_result():
    """The soft sensor's result after 15 minutes of a synthetic seeded batch (the method's own
    model made the data: this tests the publishing, not the estimate)."""
    setup = demo_setup()
    batch = cooling_batch(setup, np.random.default_rng(11), hours=0.25, seed_at_s=300.0)
    sensor = SoftSensor(setup)
    result = None
    for sample in batch.samples:
        result = sensor.step(sample)
    assert result is not None
    assert result.started
    return result


def _decision(site, proposal, time_s):
    guard = Guard(site.guard.limits(site.controller.update_interval_s))
    inputs = GuardInputs(
        time_s=time_s,
        phase="controlled-cooling",
        active_setpoint_k=proposal.setpoint_k + 0.3,
        permissive=False,
        health_good=True,
    )
    return guard.step(inputs, proposal.setpoint_k)


def test_every_unit_variable_is_published_with_units_and_status(demo_site, step_result):
    site = with_server(demo_site, endpoint=loopback("sigmatrack"))
    time_s = datetime(2026, 3, 14, 9, 0, tzinfo=UTC).timestamp()
    proposal = Proposal(
        time_s, 318.15, 0.004, LawMode.TRACKING, 0.04, 317.9, 0.012, "tracking the target"
    )
    decision = _decision(site, proposal, time_s)
    settings = site.alarms.settings(site.guard.heating_phases)
    engine = crystallizer_alarm_engine(settings)
    definitions = crystallizer_alarms(settings)

    async def no_action(action):
        raise AssertionError("nobody acts in this test")

    outputs = UnitOutputs(
        time_s=time_s,
        step=step_result,
        proposal=proposal,
        decision=decision,
        alarms=tuple(engine.status(d.name) for d in definitions),
        health_good=True,
    )

    async def exercise():
        async with AdvisorServer(site, definitions, no_action) as server:
            await server.publish(UNIT, outputs)
            async with Client(site.opcua.server.endpoint) as client:
                index = await client.get_namespace_index(site.opcua.server.namespace_uri)
                assert index == server.namespace_index

                def node(path):
                    return client.get_node(ua.NodeId(f"{UNIT}.{path}", index))

                values = {}
                for path, _vtype, _unit in VARIABLES:
                    values[path] = await node(path).read_data_value(raise_on_bad_status=False)
                units = {}
                for name, unit in ESTIMATE_UNITS.items():
                    if unit is not None:
                        units[name] = await (
                            await node(f"estimates.{name}").get_child("0:EngineeringUnits")
                        ).read_value()
                beat = client.get_node(ua.NodeId("sigmatrack.heartbeat", index))
                first_beat = await beat.read_value()
                await server.publish(UNIT, dataclasses.replace(outputs, communication_lost=True))
                lost = await node("estimates.sigma").read_data_value(raise_on_bad_status=False)
                note = await client.get_node(ua.NodeId("sigmatrack.note", index)).read_value()
                return values, units, first_beat, await beat.read_value(), lost, note

    values, units, first_beat, second_beat, lost, note = run(exercise())
    row = step_result.estimates.row(0)
    for name in Estimates.names():
        data = values[f"estimates.{name}"]
        expected = row[name]
        if isinstance(expected, float) and math.isnan(expected):
            assert data.StatusCode.value == ua.StatusCodes.BadNoDataAvailable, name
            continue
        assert data.StatusCode.is_good(), name
        assert data.Value.Value == pytest.approx(expected, rel=1e-15), name
        assert data.SourceTimestamp.timestamp() == pytest.approx(time_s), name
    assert units["temp_c"].DisplayName.Text == "°C"
    assert units["temp_c"].UnitId == (ord("C") << 16) | (ord("E") << 8) | ord("L")
    assert units["margin_k"].DisplayName.Text == "K"
    assert units["conc"].DisplayName.Text == "kg/kg"
    assert units["conc"].UnitId == -1
    assert unece_unit("KEL", "K", "").UnitId == 0x4B454C  # the UnitId encoding, OPC 10000-8
    assert values["proposal.setpoint_c"].Value.Value == pytest.approx(45.0)
    assert values["proposal.cooling_rate_k_per_min"].Value.Value == pytest.approx(0.24)
    assert values["proposal.mode"].Value.Value == "tracking"
    assert values["guard.mode"].Value.Value == "standby"
    assert values["guard.written"].Value.Value is False
    assert values["guard.reasons"].Value.Value == ["the DCS has not granted the permissive"]
    assert values["guard.setpoint_c"].Value.Value == pytest.approx(
        decision.setpoint_k - ZERO_CELSIUS_K
    )
    assert values["guard.heartbeat"].Value.Value == decision.heartbeat
    assert values["health.conc_reason"].Value.Value == step_result.conc.label
    assert values["health.nis_state"].Value.Value == step_result.nis_state
    assert values["health.health_good"].Value.Value is True
    assert values["alarms.annunciated"].Value.Value == []
    assert values["alarms.unacknowledged"].Value.Value == 0
    assert second_beat == first_beat + 1
    assert lost.StatusCode.value == ua.StatusCodes.UncertainNoCommunicationLastUsableValue
    assert "safety instrumented system keeps protection" in note


def test_alarm_events_and_an_operator_shelving(demo_site, pki, tmp_path):
    site = server_site(demo_site, pki, tmp_path)
    desk = AlarmDesk(site)

    async def exercise():
        async with AdvisorServer(site, desk.definitions, desk.act) as server:
            client = await client_of(
                site, cert=pki.peer_cert, key=pki.peer_key, mode=SIGN, user=OPERATOR
            )
            async with client:
                event_type = await client.nodes.base_event_type.get_child(
                    f"{server.namespace_index}:AlarmEventType"
                )
                unit_node = client.get_node(ua.NodeId(UNIT, server.namespace_index))
                subscription = await client.create_subscription(50, handler=None)
                await subscription.subscribe_events(unit_node, event_type)
                await server.publish(UNIT, desk.outputs(desk.raise_communication_lost()))
                events = []
                for _ in range(20):
                    found = await subscription.next_event(timeout=0.1)
                    if found is not None:
                        events.append(found.event)
                alarm, _method, state = alarm_nodes(client, server)
                shelve = ua.NodeId(
                    f"{UNIT}.alarms.communication-lost.shelve", alarm.nodeid.NamespaceIndex
                )
                with pytest.raises(ua.UaStatusCodeError, match="BadInvalidArgument"):
                    await alarm.call_method(shelve, 10.0 * desk.engine.shelve_max_s, "too long")
                await alarm.call_method(shelve, 600.0, "maintenance on the link")
                await server.publish(UNIT, desk.outputs())
                await asyncio.sleep(0.2)
                return events, await state.read_value()

    events, state = run(exercise())
    raised = [e for e in events if e.Event == "raised"]
    assert [(e.Alarm, e.State, e.Priority, e.Severity) for e in raised] == [
        ("communication-lost", "unacknowledged", "high", 800)
    ]
    assert raised[0].UserName == ""
    assert raised[0].SourceName == "CR-301/communication-lost"
    assert state == "shelved"
    assert [(a.action, a.duration_s, a.user) for a in desk.actions][-1] == (
        "shelve",
        600.0,
        "shift-a",
    )
