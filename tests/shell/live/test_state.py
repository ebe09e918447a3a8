"""What the page is sent of a unit: JSON without NaN, a step with nothing in it yet, the
alarms in the order an operator deals with them."""

from __future__ import annotations

import math

import numpy as np
import pytest

from controller.alarms import AlarmState, AlarmStatus, Priority
from sensor.shell.live.state import alarm_rows, json_safe, trend_row, unit_state
from sensor.shell.live.trend import TREND_FIELDS
from sensor.shell.opcua.advisor_server import UnitOutputs


def test_json_has_no_nan():
    value = {"a": math.nan, "b": [np.float64(math.inf), np.int64(3)], "c": (1.5, None, "x")}
    assert json_safe(value) == {"a": None, "b": [None, 3], "c": [1.5, None, "x"]}
    assert json_safe(np.array([1.0, np.nan])) == [1.0, None]
    with pytest.raises(TypeError, match="cannot show a object"):
        json_safe(object())


def test_a_step_with_nothing_yet():
    outputs = UnitOutputs(time_s=1.7e9, communication_lost=True)
    row = trend_row(outputs)
    assert row[0] == 1.7e9
    assert np.all(np.isnan(row[1:]))
    assert len(row) == len(TREND_FIELDS)
    state = unit_state(outputs)
    assert state["has_estimate"] is False
    assert state["communication_lost"] is True
    assert state["values"]["estimates.sigma"] is None
    assert state["alarms"] == []


def test_alarms_in_the_order_they_are_dealt_with():
    def status(name, state, priority, since_s):
        return AlarmStatus(name, state, priority, True, since_s, math.nan)

    rows = alarm_rows(
        [
            status("quiet", AlarmState.NORMAL, Priority.HIGH, math.nan),
            status("shelved", AlarmState.SHELVED, Priority.HIGH, 5.0),
            status("acked", AlarmState.ACKNOWLEDGED, Priority.HIGH, 1.0),
            status("new-low", AlarmState.UNACKNOWLEDGED, Priority.LOW, 2.0),
            status("new-high-late", AlarmState.UNACKNOWLEDGED, Priority.HIGH, 9.0),
            status("back", AlarmState.RETURNED_UNACKNOWLEDGED, Priority.HIGH, 3.0),
        ]
    )
    assert [r["name"] for r in rows] == [
        "back", "new-high-late", "new-low", "acked", "shelved", "quiet",
    ]  # fmt: skip
    assert rows[0]["label"] == "▲ HIGH"
    assert rows[2]["label"] == "● LOW"
    assert rows[0]["unacknowledged"] is True
    assert rows[4]["shelved"] is True
    assert rows[5]["since_s"] is None
