"""The demo's console line: sigma against its limit, the advice, and the alarms annunciated
as ISA-18.2 has them (ANSI/ISA-18.2-2016, the alarm state transition diagram: an alarm that
returned to normal stays annunciated until acknowledged)."""

from __future__ import annotations

from types import SimpleNamespace

from sensor.shell.service.console import status_line
from sensor.shell.service.service import UnitStep
from tests.shell.opcua.desk import ALARM, AlarmDesk


def _line(desk: AlarmDesk) -> str:
    step = UnitStep(
        unit_id="CR-301",
        snapshot=SimpleNamespace(sample=SimpleNamespace(phase="controlled-cooling")),
        outputs=desk.outputs(),
        written=(),
        batch_id="B-1",
    )
    return status_line(step, 3600.0)


def test_a_cleared_alarm_not_yet_acknowledged_says_so(demo_site):
    desk = AlarmDesk(demo_site)
    assert "alarms: none" in _line(desk)
    desk.raise_communication_lost()
    assert f"alarms: {ALARM} (high)" in _line(desk)
    quiet = {d.name: 0.0 for d in desk.definitions} | {"undersaturated": 0.5}
    for time_s in (50.0, 200.0):  # past the 60 s off-delay
        desk.engine.update(time_s, "controlled-cooling", quiet)
    desk.time_s = 200.0
    assert f"alarms: {ALARM} (high, cleared, unacknowledged)" in _line(desk)
    desk.engine.acknowledge(ALARM, 201.0, "seen")
    assert "alarms: none" in _line(desk)
