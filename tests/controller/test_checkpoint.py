"""Checkpoints of the guard and the alarm engine: strict JSON, and a restored object steps on
exactly as the saved one (the whole pipeline's is checked in ``tests/test_pipeline.py``)."""

from __future__ import annotations

import json
import math

import pytest

from controller.alarm_set import AlarmSettings, crystallizer_alarm_engine
from controller.checkpoint import get_float, put_float
from controller.errors import ControllerError
from controller.guard import Fallback, Guard, GuardInputs, GuardLimits


def test_floats_round_trip_through_strict_json():
    values = [0.1, -0.0, 1e-300, math.inf, -math.inf, 123456.789]
    back = [get_float(v) for v in json.loads(json.dumps([put_float(v) for v in values]))]
    assert back == values
    assert math.isnan(get_float(json.loads(json.dumps(put_float(math.nan)))))
    with pytest.raises(ValueError, match="not a number"):
        get_float("NaN")


LIMITS = GuardLimits(
    setpoint_range_k=(273.15, 353.15),
    final_temp_k=283.15,
    max_cooling_rate_k_per_s=1 / 60,
    max_step_k=0.5,
    interval_s=30.0,
    proposal_phases=frozenset({"controlled-cooling"}),
    heartbeat_period_s=10.0,
    fallback=Fallback.HOLD_RATE,
)


def _inputs(t: float, healthy: bool = True) -> GuardInputs:
    return GuardInputs(t, "controlled-cooling", 320.0 - t / 120.0, True, healthy)


def test_a_restored_guard_steps_as_the_saved_one():
    a, b = Guard(LIMITS), Guard(LIMITS)
    for t in range(0, 300, 7):
        a.step(_inputs(float(t)), 300.0)
    b.restore(json.loads(json.dumps(a.checkpoint(), allow_nan=False)))
    for t in range(300, 600, 7):
        healthy = t % 70 != 0  # doubts now and then: the held rate matters
        assert repr(a.step(_inputs(float(t), healthy), 300.0)) == repr(
            b.step(_inputs(float(t), healthy), 300.0)
        )


def test_a_restored_alarm_engine_steps_as_the_saved_one():
    settings = AlarmSettings()
    a, b = crystallizer_alarm_engine(settings), crystallizer_alarm_engine(settings)
    names = [d.name for d in a.definitions]

    def readings(t: float) -> dict[str, float]:
        return {n: (1.0 if (t // 100 + i) % 3 == 0 else 0.0) for i, n in enumerate(names)}

    for t in range(0, 500, 5):
        a.update(float(t), "controlled-cooling", readings(t))
    a.shelve("analyzer-bad", 500.0, 120.0)
    b.restore(json.loads(json.dumps(a.checkpoint(), allow_nan=False)))
    for t in range(505, 1200, 5):
        assert repr(a.update(float(t), "controlled-cooling", readings(t))) == repr(
            b.update(float(t), "controlled-cooling", readings(t))
        )
    assert repr([a.status(n) for n in names]) == repr([b.status(n) for n in names])


def test_an_engine_refuses_a_checkpoint_of_other_alarms():
    engine = crystallizer_alarm_engine(AlarmSettings())
    state = engine.checkpoint()
    del state["alarms"]["seed-window"]
    with pytest.raises(ControllerError, match="holds the alarms"):
        engine.restore(state)
