"""The alarm engine against the ISA-18.2 alarm state transition diagram.

Outside reference: ANSI/ISA-18.2-2016, Management of Alarm Systems for the Process Industries,
the alarm state transition diagram (Figure 5 in the 2009 edition), quoted from memory: states
A normal, B unacknowledged, C acknowledged, D returned to normal unacknowledged, E latched
(not used here), F shelved, G suppressed by design, H out of service; the transitions are the
rows of ``ISA_18_2_TRANSITIONS`` below. Delays, deadbands and shelving limits are this
project's design (common practice against chattering, from the same standard's guidance).
"""

from __future__ import annotations

import math

import pytest

from controller.alarms import (
    AlarmDefinition,
    AlarmEngine,
    AlarmState,
    Direction,
    EventKind,
    Priority,
)
from controller.errors import ControllerError, SettingsError, TimeOrderError

A = AlarmState.NORMAL
B = AlarmState.UNACKNOWLEDGED
C = AlarmState.ACKNOWLEDGED
D = AlarmState.RETURNED_UNACKNOWLEDGED
F = AlarmState.SHELVED
G = AlarmState.SUPPRESSED_BY_DESIGN
H = AlarmState.OUT_OF_SERVICE

ALARM = "level-high"
DEFINITION = AlarmDefinition(
    ALARM, Priority.MEDIUM, Direction.HIGH, limit=1.0, applies_in=frozenset({"run"})
)


class Driver:
    """One alarm, no delays, stepped one second per action."""

    def __init__(self, definition: AlarmDefinition = DEFINITION) -> None:
        self.engine = AlarmEngine([definition], shelve_max_s=3600.0)
        self.time_s = 0.0
        self.phase = "run"
        self.value = 0.0

    def _tick(self) -> float:
        self.time_s += 1.0
        return self.time_s

    def read(self, value: float | None = None, phase: str | None = None):
        self.value = self.value if value is None else value
        self.phase = self.phase if phase is None else phase
        return self.engine.update(self._tick(), self.phase, {ALARM: self.value})

    def act(self, event: str):
        t = self._tick()
        engine = self.engine
        return {
            "abnormal": lambda: self.read(2.0),
            "normal": lambda: self.read(0.0),
            "acknowledge": lambda: engine.acknowledge(ALARM, t),
            "shelve": lambda: engine.shelve(ALARM, t, 600.0),
            "unshelve": lambda: engine.unshelve(ALARM, t),
            "suppress": lambda: self.read(phase="off"),
            "unsuppress": lambda: self.read(phase="run"),
            "remove": lambda: engine.remove_from_service(ALARM, t),
            "return": lambda: engine.return_to_service(ALARM, t),
        }[event]()

    @property
    def state(self) -> AlarmState:
        return self.engine.status(ALARM).state


# How to reach each state from a fresh engine (condition after the path in the name).
PATHS = {
    A: ["normal"],
    B: ["abnormal"],
    C: ["abnormal", "acknowledge"],
    D: ["abnormal", "normal"],
    (F, "normal"): ["normal", "shelve"],
    (F, "abnormal"): ["abnormal", "shelve"],
    (G, "normal"): ["normal", "suppress"],
    (G, "abnormal"): ["abnormal", "suppress"],
    (H, "normal"): ["normal", "remove"],
    (H, "abnormal"): ["abnormal", "remove"],
}

ISA_18_2_TRANSITIONS = [
    # (from, event, to)
    (A, "abnormal", B),
    (B, "acknowledge", C),
    (B, "normal", D),
    (C, "normal", A),
    (D, "acknowledge", A),
    (D, "abnormal", B),
    # no transition (nothing to acknowledge; condition unchanged)
    (A, "acknowledge", A),
    (C, "acknowledge", C),
    (C, "abnormal", C),
    (A, "normal", A),
    # shelving, suppression by design and removal from service from any of A-D
    *((s, "shelve", F) for s in (A, B, C, D)),
    *((s, "suppress", G) for s in (A, B, C, D)),
    *((s, "remove", H) for s in (A, B, C, D)),
    # on return the alarm is evaluated afresh: B if its condition is active, else A
    ((F, "normal"), "unshelve", A),
    ((F, "abnormal"), "unshelve", B),
    ((G, "normal"), "unsuppress", A),
    ((G, "abnormal"), "unsuppress", B),
    ((H, "normal"), "return", A),
    ((H, "abnormal"), "return", B),
    # precedence: out of service over suppressed over shelved
    ((F, "abnormal"), "suppress", G),
    ((F, "abnormal"), "remove", H),
    ((G, "abnormal"), "remove", H),
    # hidden alarms track their condition silently
    ((F, "normal"), "abnormal", F),
    ((G, "normal"), "abnormal", G),
    ((H, "normal"), "abnormal", H),
    ((F, "abnormal"), "acknowledge", F),
]


@pytest.mark.parametrize(
    ("start", "event", "end"),
    ISA_18_2_TRANSITIONS,
    ids=lambda v: v if isinstance(v, str) else str(v),
)
def test_transitions_of_the_isa_18_2_state_diagram(start, event, end):
    driver = Driver()
    for step in PATHS[start]:
        driver.act(step)
    expected_start = start[0] if isinstance(start, tuple) else start
    assert driver.state is expected_start
    driver.act(event)
    assert driver.state is end


@pytest.mark.parametrize("start", [A, C])
def test_acknowledging_what_awaits_no_acknowledgement_records_nothing(start):
    driver = Driver()
    for step in PATHS[start]:
        driver.act(step)
    before = len(driver.engine.history)
    assert driver.act("acknowledge") == ()
    assert len(driver.engine.history) == before


def test_a_hidden_alarm_returns_in_the_state_its_condition_reached_meanwhile():
    driver = Driver()
    driver.act("normal")
    driver.act("shelve")
    driver.act("abnormal")
    driver.act("normal")
    driver.act("abnormal")
    driver.act("unshelve")
    assert driver.state is B


def test_events_record_the_states_before_and_after_and_the_reading():
    driver = Driver()
    (raised,) = driver.act("abnormal")
    assert (raised.kind, raised.before, raised.after, raised.value) == (
        EventKind.RAISED,
        A,
        B,
        2.0,
    )
    (acked,) = driver.engine.acknowledge(ALARM, 10.0, note="seen by J. Doe")
    assert (acked.kind, acked.before, acked.after, acked.note) == (
        EventKind.ACKNOWLEDGED,
        B,
        C,
        "seen by J. Doe",
    )
    assert math.isnan(acked.value)
    assert [e.kind for e in driver.engine.history] == [EventKind.RAISED, EventKind.ACKNOWLEDGED]


def _delayed(**changes) -> Driver:
    definition = AlarmDefinition(
        ALARM,
        Priority.MEDIUM,
        Direction.HIGH,
        limit=1.0,
        deadband=0.1,
        on_delay_s=30.0,
        off_delay_s=60.0,
    )
    return Driver(AlarmDefinition(**{**definition.__dict__, **changes}))


def _run(driver: Driver, readings: list[tuple[float, float]]) -> list[tuple[float, str]]:
    """Feed (time, value) pairs; return (time, kind) of the raise/clear events."""
    out = []
    for time_s, value in readings:
        for event in driver.engine.update(time_s, "run", {ALARM: value}):
            out.append((time_s, event.kind.value))
    return out


def test_the_on_delay_raises_only_a_condition_that_holds_that_long():
    driver = _delayed()
    events = _run(driver, [(0.0, 1.2), (10.0, 1.2), (20.0, 1.2), (29.0, 1.2), (30.0, 1.2)])
    assert events == [(30.0, "raised")]


def test_a_blip_below_the_limit_restarts_the_on_delay():
    driver = _delayed()
    events = _run(driver, [(0.0, 1.2), (20.0, 1.2), (25.0, 0.99), (30.0, 1.2), (59.0, 1.2)])
    assert events == []
    assert _run(driver, [(60.0, 1.2)]) == [(60.0, "raised")]


def test_the_deadband_and_the_off_delay_keep_a_chattering_reading_raised():
    driver = _delayed(on_delay_s=0.0)
    assert _run(driver, [(0.0, 1.2)]) == [(0.0, "raised")]
    # inside the deadband (0.9 to 1.0): the condition is not clear
    assert _run(driver, [(10.0, 0.95), (100.0, 0.95), (200.0, 0.91)]) == []
    # clear, but not for the 60 s off-delay; then clear long enough
    assert _run(driver, [(210.0, 0.85), (250.0, 0.85), (255.0, 0.95), (260.0, 0.8)]) == []
    assert _run(driver, [(319.0, 0.8), (320.0, 0.8)]) == [(320.0, "cleared")]


def test_low_alarms_mirror_high_ones():
    driver = _delayed(direction=Direction.LOW, on_delay_s=0.0, off_delay_s=0.0)
    assert _run(driver, [(0.0, 1.1), (1.0, 1.0)]) == [(1.0, "raised")]
    assert _run(driver, [(2.0, 1.05), (3.0, 1.11)]) == [(3.0, "cleared")]


def test_a_reading_that_is_not_a_number_leaves_the_condition_and_restarts_the_delays():
    driver = _delayed()
    assert _run(driver, [(0.0, 1.2), (20.0, math.nan), (40.0, 1.2), (69.0, 1.2)]) == []
    assert _run(driver, [(70.0, 1.2)]) == [(70.0, "raised")]
    assert _run(driver, [(80.0, math.nan), (500.0, math.nan)]) == []
    assert driver.state is B


def test_shelving_expires_at_its_time_and_is_limited():
    driver = Driver()
    driver.act("abnormal")
    driver.engine.shelve(ALARM, 10.0, 100.0, note="known: probe cleaning")
    assert driver.engine.status(ALARM).shelved_until_s == 110.0
    events = driver.engine.update(500.0, "run", {ALARM: 2.0})
    assert [(e.kind, e.time_s, e.after) for e in events] == [(EventKind.SHELVE_EXPIRED, 110.0, B)]
    with pytest.raises(ControllerError, match=r"at most 3600 s; got 7200"):
        driver.engine.shelve(ALARM, 600.0, 7200.0)
    with pytest.raises(ControllerError, match=r"must be positive and at most 3600 s; got 0"):
        driver.engine.shelve(ALARM, 600.0, 0.0)


def test_an_alarm_out_of_service_or_suppressed_cannot_be_shelved():
    driver = Driver()
    driver.act("remove")
    with pytest.raises(ControllerError, match=r"shelve 'level-high': it is out of service"):
        driver.engine.shelve(ALARM, 100.0, 60.0)
    driver.act("return")
    driver.act("suppress")
    with pytest.raises(ControllerError, match=r"it is suppressed by design, not annunciating"):
        driver.engine.shelve(ALARM, 100.0, 60.0)


def test_time_never_goes_back():
    driver = Driver()
    driver.engine.update(100.0, "run", {ALARM: 0.0})
    with pytest.raises(TimeOrderError, match=r"time went backwards, from 100\.0 s to 99\.0 s"):
        driver.engine.update(99.0, "run", {ALARM: 0.0})
    with pytest.raises(TimeOrderError, match=r"time went backwards"):
        driver.engine.acknowledge(ALARM, 50.0)


def test_readings_must_name_every_alarm_and_nothing_else():
    driver = Driver()
    with pytest.raises(ControllerError, match=r"missing \['level-high'\], unknown \['levle'\]"):
        driver.engine.update(1.0, "run", {"levle": 0.0})
    with pytest.raises(ControllerError, match=r"no alarm named 'other'"):
        driver.engine.acknowledge("other", 2.0)


def test_annunciated_alarms_come_most_urgent_first_then_oldest_first():
    definitions = [
        AlarmDefinition(name, priority, Direction.HIGH, limit=1.0)
        for name, priority in (("a", Priority.LOW), ("b", Priority.HIGH), ("c", Priority.HIGH))
    ]
    engine = AlarmEngine(definitions, shelve_max_s=60.0)
    engine.update(0.0, "run", {"a": 2.0, "b": 0.0, "c": 2.0})
    engine.update(5.0, "run", {"a": 2.0, "b": 2.0, "c": 2.0})
    assert [s.name for s in engine.annunciated()] == ["c", "b", "a"]
    engine.update(6.0, "run", {"a": 2.0, "b": 0.0, "c": 2.0})  # b returns unacknowledged
    assert [s.name for s in engine.annunciated()] == ["c", "b", "a"]
    engine.acknowledge("b", 7.0)
    assert [s.name for s in engine.annunciated()] == ["c", "a"]


def test_the_history_is_bounded_and_counts_what_it_dropped():
    engine = AlarmEngine([DEFINITION], shelve_max_s=60.0, history_size=4)
    for i in range(6):
        engine.update(float(i), "run", {ALARM: 2.0 if i % 2 == 0 else 0.0})
    assert len(engine.history) == 4
    assert engine.dropped_events == 2
    assert [e.time_s for e in engine.history] == [2.0, 3.0, 4.0, 5.0]


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: AlarmEngine([DEFINITION, DEFINITION], shelve_max_s=1.0), r"'level-high' twice"),
        (lambda: AlarmEngine([DEFINITION], shelve_max_s=0.0), r"shelve_max_s: must be positive"),
        (
            lambda: AlarmDefinition("x", Priority.LOW, Direction.HIGH, limit=1.0, deadband=-1.0),
            r"AlarmDefinition\('x'\)\.deadband: must be 0 or more; got -1\.0",
        ),
        (
            lambda: AlarmDefinition("x", Priority.LOW, Direction.HIGH, limit=math.nan),
            r"AlarmDefinition\('x'\)\.limit: must be a finite number",
        ),
    ],
)
def test_impossible_alarm_settings_are_refused_by_name(call, message):
    with pytest.raises(SettingsError, match=message):
        call()
